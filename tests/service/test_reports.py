"""GET /v1/models/{name}/versions/{n}/report and …/card: the stored report as HTML (with its own
Content-Security-Policy) or JSON, problem+json when there is none, and the page in Chromium."""

from __future__ import annotations

import json
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.helpers.net import free_port
from tests.helpers.service import MODEL, assert_problem, make_registry, serving, settings_for, uvicorn_server
from textsieve.registry import open_registry

pytestmark = pytest.mark.anyio


@pytest.fixture(scope="module")
def report_registry(tmp_path_factory: pytest.TempPathFactory, tiny_bundles: dict[str, Path], tiny_data: Path) -> Path:
    """``support`` v1 live, v2 with a report against v1 on the tiny test set; v1 has none."""
    folder = make_registry(tmp_path_factory.mktemp("report-registry") / "registry", tiny_bundles)
    with open_registry(folder) as reg:
        reg.add_evalset(MODEL, tiny_data / "test.jsonl", actor="tests")
        reg.report(MODEL, 2, against=1, actor="tests")
    return folder


@pytest.fixture(scope="module")
async def client(report_registry: Path) -> AsyncIterator[httpx.AsyncClient]:
    async with serving(settings_for(report_registry)) as (_, c):
        yield c


async def test_report_is_html_by_default_with_the_csp(client: httpx.AsyncClient) -> None:
    r = await client.get(f"/v1/models/{MODEL}/versions/2/report")
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("text/html")
    csp = r.headers["content-security-policy"]
    assert "default-src 'none'" in csp and "script-src 'none'" in csp and "style-src 'sha256-" in csp
    assert r.headers["x-content-type-options"] == "nosniff"
    assert "Compared with version 1" in r.text and "<script" not in r.text


# RFC 9110 §12.5.1: the type with the higher quality wins, whatever the order; q=0 is "not acceptable".
@pytest.mark.parametrize(
    ("accept", "json"),
    [
        ("application/json;q=0, text/html", False),
        ("application/json;q=0.1, text/html;q=0.9", False),
        ("text/html;q=0, application/json;q=0.5", True),
        ("text/html;q=0.2, application/*", True),
        ("*/*;q=0.1, application/json;q=0", False),
        ("text/html, application/json", False),
    ],
    ids=str,
)
async def test_report_follows_the_quality_values_of_accept(client: httpx.AsyncClient, accept: str, json: bool) -> None:
    """Only the order of the types decided (found by probing)."""
    r = await client.get(f"/v1/models/{MODEL}/versions/2/report", headers={"Accept": accept})
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("application/json" if json else "text/html")


@pytest.mark.parametrize(
    "accept", ["application/json", "application/json, text/html;q=0.5", "application/json;q=1"], ids=str
)
async def test_report_is_json_when_asked(client: httpx.AsyncClient, accept: str) -> None:
    r = await client.get(f"/v1/models/{MODEL}/versions/2/report", headers={"Accept": accept})
    assert r.status_code == 200 and r.headers["content-type"] == "application/json"
    body: dict[str, Any] = r.json()
    assert (body["model"], body["version"], body["comparison"]["against"]) == (MODEL, 2, 1)
    assert set(body["metrics"]) >= {"accuracy", "macro_f1", "ece"}


@pytest.mark.parametrize(
    ("path", "status", "slug", "expected"),
    [
        pytest.param(f"/v1/models/{MODEL}/versions/1/report", 404, "not-found", "textsieve evaluate", id="no-report"),
        pytest.param(f"/v1/models/{MODEL}/versions/9/report", 404, "not-found", "no version 9", id="no-version"),
        pytest.param("/v1/models/nobody/versions/1/report", 404, "not-found", "no model 'nobody'", id="no-model"),
        pytest.param(f"/v1/models/{MODEL}/versions/x/report", 422, "invalid-input", "bad version", id="bad-version"),
    ],
)
async def test_report_refusals(client: httpx.AsyncClient, path: str, status: int, slug: str, expected: str) -> None:
    body = assert_problem(await client.get(path), status, slug)
    assert expected in body["detail"]


async def test_card_names_the_model_and_links_the_report(client: httpx.AsyncClient) -> None:
    r = await client.get(f"/v1/models/{MODEL}/versions/2/card")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/markdown")
    assert r.text.startswith(f"# Model card: {MODEL}, version 2")
    assert f"/v1/models/{MODEL}/versions/2/report" in r.text


def test_report_renders_in_chromium(browser: Any, report_registry: Path, tmp_path: Path) -> None:
    from selenium.webdriver.common.by import By

    with uvicorn_server(settings_for(report_registry, port=free_port())) as server:
        data = json.loads(
            httpx.get(f"{server.url}/v1/models/{MODEL}/versions/2/report", headers={"Accept": "application/json"}).text
        )
        browser.get(f"{server.url}/v1/models/{MODEL}/versions/2/report")
        assert browser.find_element(By.TAG_NAME, "h1").text.startswith(f"Evaluation report: {MODEL} version 2")
        plots = browser.find_elements(By.CSS_SELECTOR, "svg.plot")
        assert len(plots) >= 6
        for plot in plots:  # drawn, not collapsed to nothing by a blocked style
            assert plot.size["width"] > 100 and plot.size["height"] > 100
        cells = browser.find_elements(By.CSS_SELECTOR, "svg.plot-heatmap text.cell-text")
        k = len(data["labels"])
        assert len(cells) == k * k
        assert [c.text.split(" ")[0] for c in cells] == [str(x) for row in data["confusion"]["counts"] for x in row]
        assert "human review" in browser.find_element(By.TAG_NAME, "body").text
        browser.save_screenshot(str(tmp_path / "report.png"))
        assert (tmp_path / "report.png").stat().st_size > 10_000
        severe = [e for e in browser.get_log("browser") if e["level"] == "SEVERE"]
        assert severe == []  # nothing blocked by the Content-Security-Policy, no errors


# Script injection (CWE-79) through what an evaluation set and a bundle put on the page: labels
# and texts, each trying to leave its element, its attribute or its URL (OWASP XSS Prevention
# Cheat Sheet, rules 1, 2 and 5). The report has no script, so any that runs was injected.
HOSTILE = (
    '</script><script>window.__hit = "script"</script>',
    '"><img src=x onerror="window.__hit = \'img\'">',
    "javascript:window.__hit='url'",
    "'><svg onload=\"window.__hit = 'svg'\"></svg>",
)


def test_a_report_file_shows_hostile_labels_and_texts_as_text_and_runs_no_script(
    browser: Any, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    import shutil

    from selenium.webdriver.common.by import By

    from tests.helpers.registries import edit_manifest
    from textsieve.labelled import load_examples
    from textsieve.registry.bundle import open_bundle
    from textsieve.registry.evalsets import LabelledText
    from textsieve.registry.report.files import make_report

    bundle = tmp_path / "bundle"
    shutil.copytree(tiny_bundles["a"], bundle)
    labels = json.loads((bundle / "manifest.json").read_text())["labels"]
    renamed = {label: f"{label}{HOSTILE[i % len(HOSTILE)]}" for i, label in enumerate(labels)}
    edit_manifest(bundle, {"labels": [renamed[label] for label in labels]})
    examples = [
        LabelledText(f"{e.text} {HOSTILE[i % len(HOSTILE)]}", renamed[e.label])
        for i, e in enumerate(load_examples(tiny_data / "test.jsonl"))
    ]
    _, _, html = make_report(open_bundle(bundle), examples, model="hostile", version=1)
    page = tmp_path / "report.html"  # opened from disk, as `textsieve evaluate` leaves it: no header
    page.write_bytes(html)
    spliced = tmp_path / "spliced.html"  # what an escaping fault would let through
    spliced.write_bytes(html.replace(b"<body>", b'<body><script>window.__hit = "spliced"</script>', 1))

    browser.get(page.as_uri())
    body = browser.find_element(By.TAG_NAME, "body").text
    assert all(renamed[label] in body for label in labels), "each label is shown, as text"
    assert browser.execute_script("return window.__hit") is None
    for tag in ("script", "img", "iframe", "a"):
        assert browser.find_elements(By.TAG_NAME, tag) == [], f"a <{tag}> was injected"
    assert [e for e in browser.get_log("browser") if e["level"] == "SEVERE"] == []  # its policy allows its style

    browser.get(spliced.as_uri())
    assert browser.execute_script("return window.__hit") is None, "the file's own policy stops a script"
    blocked = [e["message"] for e in browser.get_log("browser") if e["level"] == "SEVERE"]
    assert any("Content Security Policy" in m for m in blocked), blocked


# Labels stored before labels were held to textsieve/printable.py's rule (no control, format, private-use
# or unassigned characters), which report.json keeps as stored: each must show as its escape, as the CLI's
# tables and the reviewer page show it, and the joiner of an emoji sequence (Unicode TR #51) as it is.
UNSHOWN_LABELS = {
    "account": ("ac\u200bcount", "ac\\u200bcount"),  # U+200B ZERO WIDTH SPACE: would pass for "account"
    "billing": ("bi\u202elling", "bi\\u202elling"),  # U+202E RIGHT-TO-LEFT OVERRIDE: would show "bignill"
    "praise": ("pr\u0007aise\U0001f469\u200d\U0001f4bb", "pr\\x07aise\U0001f469\u200d\U0001f4bb"),  # BEL; ZWJ kept
    "repair": ("re\ue000pair", "re\\ue000pair"),  # U+E000, private use: no meaning between two parties
}

# Every text node and title of the page, and the characters in them no label may show: categories Cc, Cf,
# Co, Cn (ECMAScript's Unicode property escapes), a joiner between two visible characters excepted.
_UNSHOWN_JS = r"""
const bad = [];
const walker = document.createTreeWalker(document.body, NodeFilter.SHOW_TEXT);
const texts = [];
for (let n = walker.nextNode(); n; n = walker.nextNode()) texts.push(n.data);
for (const e of document.querySelectorAll("[title]")) texts.push(e.getAttribute("title"));
for (const t of texts) {
  const cs = Array.from(t);
  cs.forEach((c, i) => {
    if (!/[\p{Cc}\p{Cf}\p{Co}\p{Cn}]/u.test(c) || /[\n\t\r]/.test(c)) return;
    const joins = (c === "\u200c" || c === "\u200d") && i > 0 && i < cs.length - 1
      && !/[\s\p{Cf}]/u.test(cs[i - 1]) && !/[\s\p{Cf}]/u.test(cs[i + 1]);
    if (!joins) bad.push(`U+${c.codePointAt(0).toString(16)} in ${JSON.stringify(t.slice(0, 60))}`);
  });
}
return bad;
"""

# The left edge of each visible character of each element whose text holds the label with the override,
# in the order the characters are stored: increasing when nothing reorders them (UAX #9).
_EDGES_JS = r"""
const out = [];
for (const e of document.querySelectorAll("td, svg text")) {
  const node = e.firstChild;
  if (!node || node.nodeType !== Node.TEXT_NODE) continue;
  if (!node.data.includes("bi\u202e") && !node.data.includes("bi\\u202e")) continue;
  const xs = [];
  for (let i = 0; i < node.data.length; i++) {
    const r = document.createRange();
    r.setStart(node, i);
    r.setEnd(node, i + 1);
    const box = r.getBoundingClientRect();
    if (box.width > 0) xs.push(box.left);
  }
  out.push([node.data, xs]);
}
return out;
"""


def test_a_report_shows_unshown_label_characters_as_escapes_that_reorder_nothing(
    browser: Any, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    """Before: the report escaped labels for HTML only, so "ac\\u200bcount" passed for "account", U+202E
    showed "billing" as "bignill", and BEL and U+E000 reached the page as they are."""
    from html.parser import HTMLParser

    from selenium.webdriver.common.by import By

    from textsieve.labelled import load_examples
    from textsieve.registry.bundle import open_bundle
    from textsieve.registry.report.files import dump_json, make_report
    from textsieve.registry.report.html import render_html

    report, _, _ = make_report(
        open_bundle(tiny_bundles["a"]), load_examples(tiny_data / "test.jsonl"), model="hostile", version=1
    )
    stored = dump_json(report).decode()
    assert set(report["per_class"]) == set(UNSHOWN_LABELS)
    for label, (hostile, _) in UNSHOWN_LABELS.items():  # every label field of report.json, texts untouched
        stored = stored.replace(json.dumps(label), json.dumps(hostile, ensure_ascii=False))
    html = render_html(json.loads(stored))

    class Shown(HTMLParser):  # what a reader sees: text, and the titles shown on hover
        def __init__(self) -> None:
            super().__init__()
            self.seen: list[str] = []

        def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
            self.seen += [v or "" for k, v in attrs if k == "title"]

        def handle_data(self, data: str) -> None:
            self.seen.append(data)

    parser = Shown()
    parser.feed(html)
    seen = "".join(parser.seen)
    assert not any(c in seen for c in "\u200b\u202e\u0007\ue000"), "a label's character reached the page as it is"
    for _, shown in UNSHOWN_LABELS.values():
        assert seen.count(shown) >= 3, shown  # the per-class table, the bar chart, the confusion matrix

    page = tmp_path / "report.html"
    page.write_text(html, encoding="utf-8")
    browser.get(page.as_uri())
    body = browser.find_element(By.TAG_NAME, "body").text
    assert all(shown in body for _, shown in UNSHOWN_LABELS.values()), "each label is shown, escapes visible"
    assert browser.execute_script(_UNSHOWN_JS) == []
    cells = browser.execute_script(_EDGES_JS)
    assert len(cells) >= 3, cells  # the per-class table, the bar chart, the confusion matrix (twice)
    for text, xs in cells:
        assert len(xs) >= len("bi…") and xs == sorted(xs), f"{text!r} drawn out of order: {xs}"
