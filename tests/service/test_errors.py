"""Limits and client mistakes: 413/422/404 problem+json bodies (RFC 9457 §3), never a 500."""

from __future__ import annotations

import gzip
import json
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.helpers.service import (
    ADMIN_TOKEN,
    AUTH,
    MODEL,
    PROBLEM,
    REVIEW_AUTH,
    REVIEW_TOKEN,
    assert_problem,
    serving,
    settings_for,
)
from textsieve.texts import text_refusal

pytestmark = pytest.mark.anyio


BIG = json.dumps({"texts": ["y" * 40] * 60}).encode()  # 2,651 bytes: over the 2 KiB of small_limits_client
JSON = {"content-type": "application/json"}


async def _chunks(data: bytes, size: int = 500) -> AsyncIterator[bytes]:
    """The body without a Content-Length (chunked), so the limit is found by reading."""
    for i in range(0, len(data), size):
        yield data[i : i + size]


def _limit(name: str, setting: str, value: int, got: int | None, **more: int) -> dict[str, Any]:
    return {"name": name, "setting": setting, "value": value, "got": got, **more}


# (request body, sent chunked?) -> status, problem slug, the problem's "limit" member, words in its detail
@pytest.mark.parametrize(
    ("body", "chunked", "status", "slug", "limit", "words"),
    [
        pytest.param(
            {"texts": ["a"] * 5},
            False,
            413,
            "limit-exceeded",
            _limit("max_texts", "TEXTSIEVE_MAX_TEXTS", 4, 5),
            ["TEXTSIEVE_MAX_TEXTS", "4"],
            id="5 texts, 4 allowed",
        ),
        pytest.param(
            {"texts": ["fine", "x" * 51]},
            False,
            413,
            "limit-exceeded",
            _limit("max_chars", "TEXTSIEVE_MAX_CHARS", 50, 51, index=1),
            ["texts[1]"],
            id="51 characters in texts[1], 50 allowed",
        ),
        pytest.param(
            BIG,
            False,
            413,
            "limit-exceeded",
            _limit("max_body_bytes", "TEXTSIEVE_MAX_BODY_BYTES", 2048, len(BIG)),
            [],
            id="declared body over 2 KiB",
        ),
        pytest.param(
            BIG,
            True,
            413,
            "limit-exceeded",
            _limit("max_body_bytes", "TEXTSIEVE_MAX_BODY_BYTES", 2048, None),
            [],
            id="chunked body over 2 KiB",
        ),
        pytest.param(
            {"texts": ["a"], "spans": 6},
            False,
            422,
            "invalid-input",
            _limit("max_spans", "TEXTSIEVE_MAX_SPANS", 5, 6),
            [],
            id="6 spans, 5 allowed",
        ),
    ],
)
async def test_a_request_over_a_limit_is_refused_naming_the_limit_and_setting(
    small_limits_client: httpx.AsyncClient,
    body: dict[str, Any] | bytes,
    chunked: bool,
    status: int,
    slug: str,
    limit: dict[str, Any],
    words: list[str],
) -> None:
    content = body if isinstance(body, bytes) else json.dumps(body).encode()
    assert len(BIG) > 2048
    r = await small_limits_client.post("/v1/predict", content=_chunks(content) if chunked else content, headers=JSON)
    problem = assert_problem(r, status, slug)
    assert problem["limit"] == limit
    for word in words:
        assert word in problem["detail"], (word, problem["detail"])


@pytest.mark.parametrize(
    ("body", "chunked"),
    [
        pytest.param({"texts": ["x" * 50]}, False, id="a text of exactly 50 characters"),
        pytest.param({"texts": ["a b"]}, True, id="a small chunked body"),
    ],
)
async def test_a_request_at_the_limits_is_answered(
    small_limits_client: httpx.AsyncClient, body: dict[str, Any], chunked: bool
) -> None:
    content = json.dumps(body).encode()
    r = await small_limits_client.post("/v1/predict", content=_chunks(content) if chunked else content, headers=JSON)
    assert r.status_code == 200, r.text


# body -> the field the first error names, words in its message
@pytest.mark.parametrize(
    ("content", "field", "needle"),
    [
        pytest.param(b'{"texts": ["a",', "body", "not valid JSON", id="truncated JSON"),
        pytest.param(b'["a", "b"]', "body", "JSON object", id="an array, not an object"),
        pytest.param(b"{}", "texts", "Field required", id="no texts"),
        pytest.param(b'{"texts": []}', "texts", "at least 1", id="no text in texts"),
        pytest.param(b'{"texts": "one string"}', "texts", "list", id="texts a string"),
        pytest.param(b'{"texts": [1, 2]}', "texts.0", "string", id="texts of numbers"),
        pytest.param(
            b'{"texts": ["a"], "span": 3}', "span", "allowed: texts, model, version, spans", id="unknown field"
        ),
        pytest.param(b'{"texts": ["a"], "version": 0}', "version", "greater than or equal to 1", id="version 0"),
        pytest.param(b'{"texts": ["a"], "version": "two"}', "version", "integer", id="version a word"),
        pytest.param(b'{"texts": ["a"], "spans": -1}', "spans", "greater than or equal to 0", id="negative spans"),
        pytest.param(b'{"texts": ["ok", "\\ud800 lone"]}', "texts", "lone surrogate", id="a lone surrogate"),
        pytest.param(b"", "body", "body is missing", id="empty body"),
    ],
)
async def test_malformed_requests_are_422_with_field_errors(
    shared_client: httpx.AsyncClient, content: bytes, field: str, needle: str
) -> None:
    r = await shared_client.post("/v1/predict", content=content, headers=JSON)
    body = assert_problem(r, 422, "invalid-input")
    assert body["errors"], body
    assert body["errors"][0]["field"] == field
    assert needle in body["errors"][0]["message"]
    assert body["detail"].startswith(field)


def _surrogate_refusal_before_keep(text: str) -> str | None:
    """The lone-surrogate words of textsieve/texts.py ``text_refusal`` as of 0c77129, before the
    service kept each text's UTF-8 form: the reference the 422s below must still match."""
    if not text.isascii():
        try:
            text.encode("utf-8")  # strict UTF-8 refuses U+D800–U+DFFF (RFC 3629 section 3)
        except UnicodeEncodeError as exc:
            code = ord(text[exc.start])
            return f"contains a lone surrogate (U+{code:04X}) at character {exc.start}; send valid Unicode"
    return None


# A field name as JSON escapes in the body -> as the reply shows it, in the detail's leading field, in the
# quoted copy and in errors[].field alike: Python's repr escapes (the names of an audit of the HTTP API,
# 2026-12-05: the leading copy held a raw ESC, U+202E or NUL, a lone surrogate came out escaped twice).
SHOWN_NAMES = [
    pytest.param("\\u001b[31mred", "\\x1b[31mred", id="ESC"),
    pytest.param("\\u202eabc", "\\u202eabc", id="right-to-left override"),
    pytest.param("\\u0000", "\\x00", id="NUL"),
    pytest.param("\\ud800", "\\ud800", id="lone surrogate"),
    pytest.param("a\\nb", "a\\nb", id="line break"),
    pytest.param("back\\\\slash", "back\\\\slash", id="a backslash shown as two"),
    pytest.param("caf\\u00e9", "caf\u00e9", id="printable non-ASCII as it is"),
]


@pytest.mark.parametrize("repeated", [False, True], ids=["unknown", "given twice"])
@pytest.mark.parametrize(("escaped", "shown"), SHOWN_NAMES)
async def test_a_field_name_is_shown_escaped_everywhere_in_the_problem(
    shared_client: httpx.AsyncClient, escaped: str, shown: str, repeated: bool
) -> None:
    member = f'"{escaped}": 1'
    content = ('{"texts": ["a"], ' + (f"{member}, {member}" if repeated else member) + "}").encode()
    r = await shared_client.post("/v1/predict", content=content, headers=JSON)
    body = assert_problem(r, 422, "invalid-input")
    (error,) = body["errors"]
    assert error["field"] == shown
    assert body["detail"].startswith(f"{shown}: ")
    assert f"'{shown}'" in error["message"] and f"'{shown}'" in body["detail"]
    for text in (body["detail"], error["field"], error["message"]):
        assert text.isprintable(), text  # no control, format or surrogate character reaches the reader


# The texts sent, the one holding a lone surrogate last. Sent as JSON with ASCII escapes, so a lone
# surrogate is "\ud800" and an astral character a pair of escapes the parser joins into one.
@pytest.mark.parametrize(
    "texts",
    [
        pytest.param(["\ud800 first"], id="high first"),
        pytest.param(["\udc00 first"], id="low first"),
        pytest.param(["in the \udbff middle"], id="high middle"),
        pytest.param(["last \ude00"], id="low last"),
        pytest.param(["a \udc00 b \ud800 c"], id="several"),
        pytest.param(["\U0001f6b2 bike \ud800"], id="astral before"),
        pytest.param(["\U0001f44d\U00020000 \udc00 \U0001f6b2"], id="astral around"),
        pytest.param(["caf\u00e9 \u2014 \u7f8e\u54b2", "\U0001f6b2 ok", "caf\u00e9 \udfff"], id="after valid texts"),
    ],
)
async def test_a_lone_surrogate_is_refused_with_its_index_as_before(
    shared_client: httpx.AsyncClient, texts: list[str]
) -> None:
    bad = len(texts) - 1
    expected = _surrogate_refusal_before_keep(texts[bad])
    assert expected is not None and all(_surrogate_refusal_before_keep(t) is None for t in texts[:bad])
    body = json.dumps({"texts": texts}, ensure_ascii=True).encode()
    r = await shared_client.post("/v1/predict", content=body, headers=JSON)
    problem = assert_problem(r, 422, "invalid-input")
    assert problem["detail"] == f"texts: texts[{bad}] {expected}"
    assert problem["errors"] == [{"field": "texts", "message": f"texts[{bad}] {expected}", "type": "value_error"}]


# request -> status, problem slug, words in its detail
@pytest.mark.parametrize(
    ("method", "path", "body", "status", "slug", "words"),
    [
        pytest.param(
            "POST", "/v1/predict", {"texts": ["a"], "model": "nosuch"}, 404, "not-found", ["nosuch"], id="unknown model"
        ),
        pytest.param(
            "POST",
            "/v1/predict",
            {"texts": ["a"], "model": "Bad Name!"},
            422,
            "invalid-input",
            ["bad model name"],
            id="bad model name",
        ),
        pytest.param(
            "POST",
            "/v1/predict",
            {"texts": ["a"], "model": MODEL, "version": 99},
            404,
            "not-found",
            ["no version 99"],
            id="unknown version",
        ),
        pytest.param("GET", "/v2/predict", None, 404, "not-found", [], id="unknown path"),
        # A query string was ignored on the POST routes: ?model=x got the live model's answer.
        pytest.param(
            "POST",
            "/v1/predict?model=nosuch&version=3",
            {"texts": ["a"]},
            422,
            "invalid-input",
            ["POST /v1/predict reads no query parameters (got 'model', 'version')", "JSON body"],
            id="query string on predict",
        ),
        # A slash too many was redirected (307) to an address made from the Host header.
        pytest.param(
            "GET",
            "/healthz/",
            None,
            404,
            "not-found",
            ["paths here end without a slash: /healthz"],
            id="slash too many",
        ),
        pytest.param(
            "POST",
            "/v1/predict/",
            {"texts": ["a"]},
            404,
            "not-found",
            ["paths here end without a slash: /v1/predict"],
            id="slash too many on predict",
        ),
        pytest.param(
            "GET", "/v1/predict", None, 405, "method-not-allowed", ["/v1/predict answers POST"], id="GET on predict"
        ),
        pytest.param(
            "DELETE",
            "/healthz",
            None,
            405,
            "method-not-allowed",
            ["/healthz answers GET, HEAD, OPTIONS"],
            id="DELETE healthz",
        ),
        pytest.param("GET", "/v1/models/nosuch", None, 404, "not-found", [], id="view of an unknown model"),
        pytest.param(
            "GET", f"/v1/models/{MODEL}/versions/99", None, 404, "not-found", [], id="view of an unknown version"
        ),
        pytest.param(
            "GET", f"/v1/models/{MODEL}/versions/zero", None, 422, "invalid-input", [], id="view of version 'zero'"
        ),
    ],
)
async def test_unknown_model_version_and_path(
    shared_client: httpx.AsyncClient,
    method: str,
    path: str,
    body: dict[str, Any] | None,
    status: int,
    slug: str,
    words: list[str],
) -> None:
    r = await shared_client.request(method, path, json=body, headers={"Host": "elsewhere.example"})
    problem = assert_problem(r, status, slug)
    assert "location" not in r.headers
    for word in words:
        assert word in problem["detail"], (word, problem["detail"])


_READ = "GET, HEAD, OPTIONS"
_WRITE = "POST, OPTIONS"
# Every path the service answers, and its methods (the OpenAPI document's operations, HEAD beside GET,
# OPTIONS everywhere), the page, the document itself and the problem types' pages included.
PATH_METHODS = [
    ("/v1/predict", _WRITE),
    ("/v1/verdicts", _WRITE),
    (f"/v1/models/{MODEL}/versions/2/promote", _WRITE),
    (f"/v1/models/{MODEL}/rollback", _WRITE),
    ("/v1/models", _READ),
    (f"/v1/models/{MODEL}", _READ),
    (f"/v1/models/{MODEL}/versions", _READ),
    (f"/v1/models/{MODEL}/versions/1", _READ),
    (f"/v1/models/{MODEL}/versions/1/report", _READ),
    (f"/v1/models/{MODEL}/versions/1/card", _READ),
    (f"/v1/models/{MODEL}/drift", _READ),
    ("/healthz", _READ),
    ("/readyz", _READ),
    ("/metrics", _READ),
    ("/", _READ),
    ("/openapi.json", _READ),
    ("/problems/overloaded", _READ),
]


@pytest.mark.parametrize(("path", "allow"), PATH_METHODS)
async def test_a_405_lists_every_allowed_method_head_beside_get(
    shared_client: httpx.AsyncClient, path: str, allow: str
) -> None:
    # RFC 9110 §15.5.6: a 405 carries Allow with the target's methods; §9.1: a server that
    # answers GET answers HEAD too, so Allow names both; and OPTIONS, which every path answers.
    for method in ("PUT", "DELETE", "PATCH", "TRACE", "GET" if allow == _WRITE else "POST"):
        r = await shared_client.request(method, path)
        body = assert_problem(r, 405, "method-not-allowed")
        assert r.headers["allow"] == allow, method
        assert f"answers {allow} only" in body["detail"]


@pytest.mark.parametrize(("path", "allow"), PATH_METHODS)
async def test_options_names_the_methods_of_every_path_without_cors_or_a_body(
    shared_client: httpx.AsyncClient, path: str, allow: str
) -> None:
    # RFC 9110 §9.3.7: OPTIONS asks for the target's communication options, answered with Allow;
    # §15.3.5 and §8.6: a 204 has no content and no Content-Length. It was a 405 naming the methods,
    # none of them OPTIONS. The page is same-origin: no CORS headers (an origin is no caller's proof).
    r = await shared_client.options(path, headers={"Origin": "http://elsewhere.example"})
    assert r.status_code == 204, r.text
    assert r.content == b""
    assert r.headers["allow"] == allow
    assert "content-length" not in r.headers and "content-type" not in r.headers
    assert r.headers["x-request-id"]
    assert not [name for name in r.headers if name.startswith("access-control-")]


async def test_options_on_no_path_is_a_404_and_the_lane_agrees_with_the_full_app(shared_registry: Path) -> None:
    # The predict lane takes only POST: OPTIONS and GET on its path reach the full app, whichever is in front.
    for fast_lane in (True, False):
        async with serving(settings_for(shared_registry), fast_lane=fast_lane) as (_, client):
            assert_problem(await client.options("/v1/nosuch"), 404, "not-found")
            r = await client.options("/v1/predict")
            assert (r.status_code, r.headers["allow"], r.content) == (204, _WRITE, b"")
            r = await client.get("/v1/predict")
            assert_problem(r, 405, "method-not-allowed")
            assert r.headers["allow"] == _WRITE


@pytest.fixture(scope="module")
async def tokens_client(shared_registry: Path) -> AsyncIterator[httpx.AsyncClient]:
    """Like ``shared_client`` with the admin and reviewer tokens set."""
    async with serving(settings_for(shared_registry, admin_token=ADMIN_TOKEN, review_token=REVIEW_TOKEN)) as (_, c):
        yield c


# The verdict route needs its token before its body is looked at (service/web/tokens.py).
_AUTHORISED = {"/v1/predict": {}, "/v1/verdicts": REVIEW_AUTH}


@pytest.mark.parametrize("coding", ["gzip", "deflate", "br", "GZIP"])
@pytest.mark.parametrize("path", ["/v1/predict", "/v1/verdicts"])
async def test_a_compressed_request_body_is_refused_with_415_naming_what_is_accepted(
    tokens_client: httpx.AsyncClient, coding: str, path: str
) -> None:
    # RFC 9110 §15.5.16: 415 for a content coding the server does not accept, with Accept-Encoding
    # naming what it does (RFC 7694 §3). Before, a gzip body read as "not UTF-8" (422).
    body = gzip.compress(json.dumps({"texts": ["my card was charged twice"]}).encode())
    headers = {**JSON, "content-encoding": coding, **_AUTHORISED[path]}
    r = await tokens_client.post(path, content=body, headers=headers)
    problem = assert_problem(r, 415, "unsupported-content-encoding")
    assert repr(coding) in problem["detail"] and "without Content-Encoding" in problem["detail"]
    assert r.headers["accept-encoding"] == "identity"


@pytest.mark.parametrize("coding", ["gzip, chunked", "x-custom, chunked", "GZIP,chunked"])
@pytest.mark.parametrize("path", ["/v1/predict", "/v1/verdicts"])
async def test_a_transfer_coding_besides_chunked_is_refused_with_501(
    tokens_client: httpx.AsyncClient, coding: str, path: str
) -> None:
    # RFC 9112 §6.1: 501 for a transfer coding the server does not understand. The HTTP parser
    # undoes only the chunking, so before, a gzip body read as "not UTF-8" (422) and any other
    # coding's bytes were classified as if they were the JSON itself (200).
    body = json.dumps({"texts": ["my card was charged twice"]}).encode()
    for content in (gzip.compress(body), body):
        headers = {**JSON, "transfer-encoding": coding, **_AUTHORISED[path]}
        r = await tokens_client.post(path, content=content, headers=headers)
        problem = assert_problem(r, 501, "unsupported-transfer-coding")
        named = coding.split(",")[0]
        assert f"Transfer-Encoding '{named}, chunked'" in problem["detail"], problem["detail"]
        assert "Transfer-Encoding: chunked alone" in problem["detail"]
        assert r.headers["connection"] == "close"
    headers = {**JSON, "transfer-encoding": "Chunked", **_AUTHORISED[path]}
    r = await tokens_client.post(path, content=_chunks(body), headers=headers)
    assert r.status_code != 501, r.text


async def test_identity_and_an_empty_content_encoding_are_read_as_they_are(shared_client: httpx.AsyncClient) -> None:
    body = json.dumps({"texts": ["my card was charged twice"]}).encode()
    for coding in ("identity", "Identity", ""):
        r = await shared_client.post("/v1/predict", content=body, headers={**JSON, "content-encoding": coding})
        assert r.status_code == 200, (coding, r.text)


async def test_problem_types_resolve_to_explanations(shared_client: httpx.AsyncClient) -> None:
    r = await shared_client.post("/v1/predict", json={"texts": []})
    explained = await shared_client.get(r.json()["type"])
    unknown = await shared_client.get("/problems/nope")
    assert explained.status_code == 200 and "HTTP 422" in explained.text
    # The connection layer's own answers (service/web/transport.py) name types that resolve too.
    for slug, status in (
        ("request-timeout", 408),
        ("malformed-request", 400),
        ("overloaded", 503),
        ("unknown-method", 501),
        ("http-version-not-supported", 505),
    ):
        r = await shared_client.get(f"/problems/{slug}")
        assert r.status_code == 200 and f"HTTP {status}" in r.text, slug
    assert unknown.status_code == 404


_json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-5, 10**12) | st.floats(allow_nan=False) | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=12,
)
_bodies = st.one_of(
    _json_values.map(lambda v: json.dumps(v).encode()),
    st.fixed_dictionaries(
        {"texts": _json_values}, optional={"model": _json_values, "version": _json_values, "spans": _json_values}
    ).map(lambda v: json.dumps(v).encode()),
    st.binary(max_size=64),
)


async def test_no_client_mistake_is_a_500(shared_registry: Path) -> None:
    async with serving(settings_for(shared_registry, max_texts=8)) as (_, client):
        seen: list[tuple[bytes, int]] = []

        @settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
        @given(_bodies)
        def collect(body: bytes) -> None:
            seen.append((body, 0))

        collect()
        for body, _ in seen:
            r = await client.post("/v1/predict", content=body, headers={"content-type": "application/json"})
            # 415: random bytes that read as UTF-16 or UTF-32 (RFC 8259 §8.1 asks for UTF-8; RFC 9110
            # §15.5.16 allows 415 for a format found by inspecting the data).
            assert r.status_code in (200, 404, 413, 415, 422), (body, r.status_code, r.text)
            if r.status_code != 200:
                assert r.headers["content-type"] == PROBLEM


# The class → status table, checked against the error tree of textsieve/errors.py: each class
# keeps its status, CLI exit code and place (UnavailableError reports worker crashes and
# shutdown too, so it is not a RegistryError, yet still a 503 with Retry-After and exit 1).
@pytest.mark.parametrize(
    ("error", "status", "slug", "exit_code", "registry_error"),
    [
        ("UnavailableError", 503, "unavailable", 1, False),
        ("IntegrityError", 503, "integrity", 1, True),
        ("NotFoundError", 404, "not-found", 2, True),
        ("StateError", 409, "state-conflict", 2, True),
        ("GateRefusedError", 409, "gate-refused", 1, True),
        ("LoginRefusedError", 503, "unavailable", 2, False),
        ("NoDatabaseError", 503, "unavailable", 2, False),
    ],
)
def test_error_classes_map_to_their_status_and_exit_code(
    error: str, status: int, slug: str, exit_code: int, registry_error: bool
) -> None:
    from textsieve import errors
    from textsieve.service.web.problems import render

    exc = getattr(errors, error)("something is off")
    assert isinstance(exc, errors.RegistryError) is registry_error
    assert isinstance(exc, errors.TextsieveError) and exc.exit_code == exit_code
    r = render(exc, {"type": "http", "path": "/v1/models"})
    body = json.loads(bytes(r.body))
    assert r.status_code == status and body["type"] == f"/problems/{slug}"
    assert ("retry-after" in r.headers) is (status == 503)


_VERDICT = {
    "model": MODEL,
    "version": 1,
    "text": "my card was charged twice",
    "predicted_label": "billing",
    "predicted_probability": 0.5,
    "verdict_label": "billing",
    "reviewer": "ana",
}
_PROMOTE = {"to": "candidate", "reason": "a lone surrogate's test"}
_ROLLBACK = {"reason": "a lone surrogate's test"}
_LONE = "ok \ud800 here"  # sent as the JSON escape "\ud800", as json.dumps writes it


# (path, headers, body, the field given _LONE, what the refusal calls the string): every free-text string field
# a client sends. pydantic's words were "Input should be a valid string, unable to parse raw data as a unicode
# string" on every route but predict's texts (an audit of the HTTP API, 2026-12-05). Model names, reviewers' and
# actors' names are judged by their own rules (registry/names.py), which name what they allow, on every route
# alike (tests/service/test_admin.py::test_an_actor_too_long_is_refused_in_the_registrys_words).
LONE_SURROGATES = [
    pytest.param("/v1/predict", {}, {"texts": [_LONE]}, "texts", "texts[0]", id="predict texts"),
    pytest.param("/v1/verdicts", REVIEW_AUTH, _VERDICT, "text", "the verdict's text", id="verdict text"),
    *(
        pytest.param("/v1/verdicts", REVIEW_AUTH, _VERDICT, field, field, id=f"verdict {field}")
        for field in ("predicted_label", "verdict_label")
    ),
    pytest.param(f"/v1/models/{MODEL}/versions/2/promote", AUTH, _PROMOTE, "reason", "reason", id="promote reason"),
    pytest.param(f"/v1/models/{MODEL}/rollback", AUTH, _ROLLBACK, "reason", "reason", id="rollback reason"),
]


@pytest.mark.parametrize(("path", "auth", "body", "field", "named"), LONE_SURROGATES)
async def test_a_lone_surrogate_is_refused_in_the_same_words_on_every_route(
    tokens_client: httpx.AsyncClient, path: str, auth: dict[str, str], body: dict[str, Any], field: str, named: str
) -> None:
    sent = {**body, field: [_LONE] if field == "texts" else _LONE}
    content = json.dumps(sent).encode()  # ensure_ascii: the surrogate as its escape
    assert b"\\ud800" in content
    r = await tokens_client.post(path, content=content, headers={**JSON, **auth})
    problem = assert_problem(r, 422, "invalid-input")
    # The one rule's words (textsieve/texts.py), after what names the string, as predict has them.
    expected = f"{named} {text_refusal(_LONE)}"
    assert expected.endswith("contains a lone surrogate (U+D800) at character 3; send valid Unicode")
    assert [(e["field"], e["message"]) for e in problem["errors"]] == [(field, expected)]
    assert problem["detail"] == f"{field}: {expected}"
