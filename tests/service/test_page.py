"""GET /: the reviewer's page is self-contained, carries the cautions, and its CSP hashes
match its inline script and style (hash sources as defined by W3C Content Security Policy
Level 2, §4.2.4: base64 of the SHA-256 of the element's text)."""

from __future__ import annotations

import base64
import hashlib
import re
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.helpers.environment import skip_or_fail
from tests.helpers.graphemes import clustered, widened
from tests.helpers.service import serving, settings_for

pytestmark = pytest.mark.anyio


async def test_page_is_self_contained_and_shows_the_cautions(shared_registry: Path) -> None:
    async with serving(settings_for(shared_registry)) as (_, client):
        r = await client.get("/")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
    html = r.text
    # No external assets: nothing fetched from another origin, no CDN, no imports.
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", html)
    assert "@import" not in html and "url(http" not in html
    assert not re.search(r"<(link|img|iframe)\b", html)
    for caution in (
        "aids for human review",
        "biases of that training data",
        "monitoring",
        "Decisions stay with accountable people",
    ):
        assert caution in html
    csp = r.headers["content-security-policy"]
    assert "default-src 'none'" in csp and "connect-src 'self'" in csp
    for tag in ("script", "style"):
        bodies = re.findall(rf"<{tag}>(.*?)</{tag}>", html, flags=re.S)
        assert bodies
        for body in bodies:
            digest = base64.b64encode(hashlib.sha256(body.encode("utf-8")).digest()).decode()
            assert f"'sha256-{digest}'" in csp
    # The page asks the API the page's own origin serves, with code-point offsets.
    assert 'fetch("/v1/predict"' in html and "Array.from(text)" in html


async def test_the_page_is_made_off_the_event_loop(shared_registry: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The first page scans the Unicode tables for the reviewer-name rule (~0.2 s): done on the event
    loop's thread it would stall every prediction meanwhile, so it runs on another thread."""
    import threading

    from textsieve.service.web import page as page_module

    made_on: list[threading.Thread] = []
    rule_json = page_module._rule_json

    def recorded() -> str:
        made_on.append(threading.current_thread())
        return rule_json()

    monkeypatch.setattr(page_module, "_rule_json", recorded)
    page_module.page.cache_clear()
    try:
        async with serving(settings_for(shared_registry)) as (_, client):
            loop_thread = threading.current_thread()
            first, second = await client.get("/"), await client.get("/")
    finally:
        page_module.page.cache_clear()
    assert first.status_code == second.status_code == 200 and first.text == second.text
    assert len(made_on) == 1 and made_on[0] is not loop_thread  # made once, not on the loop


async def test_openapi_documents_the_contract_without_cdn_docs(shared_registry: Path) -> None:
    async with serving(settings_for(shared_registry)) as (_, client):
        schema = (await client.get("/openapi.json")).json()
        docs = await client.get("/docs")
    assert {
        "/v1/predict",
        "/v1/models",
        "/v1/models/{name}",
        "/v1/models/{name}/versions",
        "/v1/models/{name}/versions/{n}",
        "/v1/models/{name}/versions/{n}/promote",
        "/v1/models/{name}/rollback",
        "/healthz",
        "/readyz",
        "/metrics",
    } <= set(schema["paths"])
    assert docs.status_code == 404


def _run_helpers(tmp_path: Path, name: str, call: str, cases: object) -> object:
    """Run the page's pure helpers (its first script) in Node on ``cases`` (JSON on stdin)."""
    import json
    import shutil
    import subprocess

    from textsieve.service.web.page import page

    node = shutil.which("node")
    if node is None:
        skip_or_fail("node is needed to run the page's script (apt-get install nodejs)")
    html, _ = page()
    helpers = re.findall(r"<script>(.*?)</script>", html, flags=re.S)[0]
    script = tmp_path / f"{name}.js"
    script.write_text(
        helpers + "\nconst cases = JSON.parse(require('fs').readFileSync(0, 'utf8'));\n"
        f"process.stdout.write(JSON.stringify({call}));\n",
        encoding="utf-8",
    )
    out = subprocess.run(
        [node, str(script)], input=json.dumps(cases), capture_output=True, text=True, timeout=60, check=True
    )
    return json.loads(out.stdout)


def test_page_highlighting_slices_code_points_like_python(tmp_path: Path) -> None:
    """Run the page's own ``segments`` helper in Node and compare with Python's str slicing, the
    highlights widened to the texts' grapheme clusters as UAX #29 draws them (tests/helpers/graphemes.py)."""
    texts = [
        "|👩🏽\u200d💻| charged twice |🇫🇷||🇫🇷| |e\u0301| again",
        "修理 ok مرحبا \u200b fine 😀😀 |क्ष||मा| क|रें|",
        "plain text here",
    ]
    cases = []
    for marked in texts:
        text, _ = clustered(marked)
        n = len(text)
        spans = [
            {"start": 2, "end": min(9, n), "weight": 1.0, "label": "x", "width": 2},
            {"start": max(n - 4, 10), "end": n, "weight": 2.0, "label": "x", "width": 1},
            {"start": 3, "end": 5, "weight": 0.5, "label": "x", "width": 1},
        ]  # overlaps the first: skipped
        cases.append({"text": text, "spans": spans})
    # And every single span of every text, one case each: each boundary falls anywhere.
    singles = []
    for marked in texts[:2]:
        text, _ = clustered(marked)
        singles += [
            {"text": text, "spans": [{"start": a, "end": b, "weight": 1.0, "label": "x", "width": 1}]}
            for a in range(len(text))
            for b in range(a + 1, len(text) + 1)
        ]
    call = "cases.map(c => segments(c.text, c.spans).map(s => [s.text, s.rank, s.ranks]))"
    out = _run_helpers(tmp_path, "segments", call, cases + singles)
    assert isinstance(out, list)
    for case, segs in zip(cases + singles, out, strict=True):
        text, spans = case["text"], case["spans"]
        _, bounds = clustered(next(m for m in texts if clustered(m)[0] == text))
        assert "".join(s for s, _, _ in segs) == text
        marked_segs = [(s, rank) for s, rank, _ in segs if rank is not None]
        shown = [widened(bounds, spans[i]["start"], spans[i]["end"]) for i in range(min(2, len(spans)))]
        assert marked_segs == [(text[a:b], i + 1) for i, (a, b) in enumerate(shown)]


def test_page_shows_a_labels_invisible_and_reordering_characters_as_escapes(tmp_path: Path) -> None:
    """Run the page's ``shownLabel`` in Node on labels a version stored before the label rule may hold.
    Reference: the general categories of the Unicode Character Database (Python's unicodedata) and
    PRECIS's FreeformClass (RFC 8264, section 4.3: no controls, format, separator, private-use or
    unassigned characters; joiners in context, RFC 5892 appendix A), escaped as the CLI's tables do."""
    import unicodedata

    from textsieve.labelled import label_problem

    refused = {"Cc", "Cf", "Zl", "Zp", "Co", "Cn", "Cs"}

    def expected(label: str) -> str:
        out = []
        for i, c in enumerate(label):
            joins = (
                c in "\u200c\u200d"
                and 0 < i < len(label) - 1
                and all(not x.isspace() and unicodedata.category(x) != "Cf" for x in (label[i - 1], label[i + 1]))
            )
            if unicodedata.category(c) not in refused or joins:
                out.append(c)
            else:
                out.append(f"\\x{ord(c):02x}" if ord(c) < 0x100 else f"\\u{ord(c):04x}")
        return "".join(out)

    labels = [
        "billing\u202e",
        "\u2066repair\u2069",
        "re\u200bpair",
        "soft\u00adhyphen",
        "two\u2028lines",
        "para\u2029graph",
        "private\ue000",
        "unassigned\U000e0fff",
        "c1\x85next",
        "\u0645\u06cc\u200c\u0646\u0627",  # Persian: the non-joiner spells the word
        "\U0001f469\u200d\U0001f4bb",  # an emoji sequence
        "ends in a joiner\u200d",
        "billing",
        "退款",
    ]
    out = _run_helpers(tmp_path, "labels", "cases.map(shownLabel)", labels)
    assert out == [expected(label) for label in labels]
    assert out[0] == "billing\\u202e" and out[8] == "c1\\x85next" and out[9] == labels[9]
    # A label shown as it is is one a new version may publish, and the other way round.
    for label, shown in zip(labels, out, strict=True):
        assert (shown == label) == (label_problem(label) is None), label


def test_page_highlights_sharing_a_character_become_one(tmp_path: Path) -> None:
    """Two spans the API gives apart (the token before a skin tone, and the skin tone) meet inside
    one cluster once widened: they are shown as one highlight carrying both ranks."""
    text, bounds = clustered("fixed |👍🏿| it")
    thumb = text.index("👍")
    spans = [
        {"start": 0, "end": thumb + 1, "weight": 1.0, "label": "x", "width": 2},
        {"start": thumb + 1, "end": len(text), "weight": 0.5, "label": "x", "width": 2},
    ]
    out = _run_helpers(
        tmp_path,
        "shared",
        "segments(cases.text, cases.spans).map(s => [s.text, s.ranks])",
        {"text": text, "spans": spans},
    )
    assert bounds[-1] == len(text) and out == [[text, [1, 2]]]


def test_page_reads_retry_after_as_rfc_9110_defines_it(tmp_path: Path) -> None:
    """RFC 9110 §10.2.3: Retry-After is delay-seconds or an HTTP-date, and a recipient takes all
    three forms of HTTP-date (§5.6.7, whose example instant the three dates below are)."""
    now = 784111777000 - 90_000  # 90 s before Sun, 06 Nov 1994 08:49:37 GMT, in ms since 1970
    values = [
        "120",
        "0",
        "Sun, 06 Nov 1994 08:49:37 GMT",  # IMF-fixdate
        "Sunday, 06-Nov-94 08:49:37 GMT",  # obsolete RFC 850 format
        "Sun Nov  6 08:49:37 1994",  # ANSI C's asctime() format
        "Sat, 05 Nov 1994 08:49:37 GMT",  # a day past: try now
        "soon",
        "1.5",
        "",
    ]
    call = f"cases.map(v => retryAfterSeconds(v, {now})).map(s => [s, s === null ? null : tryAgainIn(s)])"
    out = _run_helpers(tmp_path, "retry", call, values)
    assert out == [
        [120, "try again in 2 min"],
        [0, "try again now"],
        [90, "try again in 90 s"],
        [90, "try again in 90 s"],
        [90, "try again in 90 s"],
        [0, "try again now"],
        [None, None],
        [None, None],
        [None, None],
    ]


def test_page_keys_map_to_verdict_actions(tmp_path: Path) -> None:
    """Run the page's own ``keyAction`` helper in Node: Y confirms, C then a digit corrects, N/P move."""
    import json
    import shutil
    import subprocess

    from textsieve.service.web.page import page

    node = shutil.which("node")
    if node is None:
        skip_or_fail("node is needed to run the page's script (apt-get install nodejs)")
    html, _ = page()
    helpers = re.findall(r"<script>(.*?)</script>", html, flags=re.S)[0]
    labels = ["billing", "repair", "account", "praise"]
    presses = [("y", False), ("Y", False), ("c", False), ("2", True), ("4", True), ("5", True), ("2", False)]
    presses += [("n", False), ("J", False), ("ArrowDown", False), ("p", False), ("k", False), ("x", False)]
    script = tmp_path / "keys.js"
    script.write_text(
        helpers + f"\nprocess.stdout.write(JSON.stringify({json.dumps(presses)}.map("
        f"([k, c]) => keyAction(k, {json.dumps(labels)}, c))));\n",
        encoding="utf-8",
    )
    out = subprocess.run([node, str(script)], capture_output=True, text=True, timeout=30, check=True)
    assert json.loads(out.stdout) == [
        {"action": "confirm"},
        {"action": "confirm"},
        {"action": "choose"},
        {"action": "correct", "label": "repair"},
        {"action": "correct", "label": "praise"},
        None,  # no fifth label
        None,  # a digit means nothing until C was pressed
        {"action": "next"},
        {"action": "next"},
        {"action": "next"},
        {"action": "previous"},
        {"action": "previous"},
        None,
    ]


def test_page_palette_has_no_orange_and_keeps_the_token_out_of_urls() -> None:
    import colorsys

    from textsieve.service.web.page import page

    html, _ = page()
    style = re.findall(r"<style>(.*?)</style>", html, flags=re.S)[0]
    colours = [tuple(int(h[i : i + 2], 16) / 255 for i in (0, 2, 4)) for h in re.findall(r"#([0-9a-fA-F]{6})\b", style)]
    colours += [tuple(int(v) / 255 for v in m) for m in re.findall(r"(\d+), (\d+), (\d+)", style)]
    assert len(colours) > 10
    for r, g, b in colours:
        hue, lightness, saturation = colorsys.rgb_to_hls(r, g, b)
        # Orange spans hues of roughly 15°-45° (common practice, e.g. the CSS named colour
        # "orange" is 39°, "darkorange" 33°); greys and near-whites carry no hue worth the name.
        assert not (15 / 360 <= hue <= 45 / 360 and saturation > 0.35 and 0.2 < lightness < 0.92), (r, g, b)
    script = "\n".join(re.findall(r"<script>(.*?)</script>", html, flags=re.S))
    assert 'fetch("/v1/verdicts"' in script and "sessionStorage" in script
    assert "localStorage" not in script and "location.search" not in script and "?token" not in script


# Names a reviewer may type or paste, where the page's mirror of the service's rule could part from it:
# Python's str.strip against JavaScript's trim (U+FEFF, U+001C–U+001F, U+0085), joiners in and out of
# context (RFC 5892 appendix A), quotes and backslashes in repr, code points over U+FFFF (two UTF-16 units
# each: JavaScript's length is not Python's), and each category the rule refuses (printable.py).
_EDGE_CHARS = "\ufeff\x1c\x1f\x85\u00a0\u3000 \t\u200c\u200d\u200b\u202e\u2028'\"\\\x07\ue000\U000f0000\u0378\ufffe"
_NAME_CHARS = st.one_of(
    st.sampled_from(_EDGE_CHARS),
    st.sampled_from("aZ9éक्षمی👩💻😀王"),
    st.characters(exclude_categories=()),  # any code point, lone surrogates (Cs) and unassigned (Cn) too
)
_NAMES = st.one_of(
    st.text(_NAME_CHARS, max_size=12),
    st.builds(
        lambda pad, core, end: pad + core + end,
        st.text(_NAME_CHARS, max_size=3),
        st.text("ab👩", min_size=115, max_size=125),
        st.text(_NAME_CHARS, max_size=3),
    ),
)


@settings(max_examples=8, deadline=None, database=None, suppress_health_check=list(HealthCheck))
@given(names=st.lists(_NAMES, min_size=100, max_size=150))
def test_page_refuses_the_reviewer_names_the_service_refuses_in_its_words(tmp_path: Path, names: list[str]) -> None:
    """The page's ``checkedReviewer`` (run in Node) against the service's rule, registry/names.py
    ``validate_reviewer``, on names Hypothesis draws: the same names refused with the same message, and the
    others recorded as the service records them. Before, the page signed in any name with a character
    (U+202E, U+200B, BEL) and refused only the empty one, and the service said why at the first verdict."""
    from textsieve.errors import InputError
    from textsieve.registry.names import validate_reviewer

    expected: list[dict[str, str | None]] = []
    for name in names:
        try:
            expected.append({"name": validate_reviewer(name), "problem": None})
        except InputError as exc:
            expected.append({"name": None, "problem": exc.message})
    out = _run_helpers(tmp_path, "reviewers", "cases.map(checkedReviewer)", names)
    assert isinstance(out, list)
    for name, want, got in zip(names, expected, out, strict=True):
        assert got["problem"] == want["problem"], name
        if want["problem"] is None:
            assert got["name"] == want["name"], name
