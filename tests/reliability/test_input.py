"""The bad-input catalogue: each hostile or broken request is answered 4xx with an RFC 9457
problem+json body whose ``detail`` names what is wrong (and, where a setting is involved, the
limit and the setting), never a 5xx or a traceback.

Covered elsewhere and not repeated here (tests/service/test_errors.py): truncated JSON, a body
that is not an object, missing/empty/non-list ``texts``, non-string texts, an unknown field
``span``, version 0 or a string, negative spans, a lone surrogate, an empty body, the three size
limits at small settings, unknown model/version/path. This module adds the rest of the
catalogue, at the service's default limits where sizes matter:

- NUL characters (escaped in a text, raw in the body, in a model name);
- empty and whitespace-only texts, an empty model name;
- invalid UTF-8 byte sequences (RFC 3629 §3: overlong forms, encoded surrogates, truncated
  sequences and bytes that never occur in UTF-8);
- a 1 MB text, 5 MB of texts, 100 000 texts;
- JSON nested 100 000 deep;
- several unknown fields at once, and unknown fields in admin bodies;
- a retired version, versions past what the registry can store, huge or fractional spans;
- wrong content types.

Decision on unknown fields: refused with 422 naming each unknown field and the allowed ones
(see service/web/schemas.py and SECURITY.md, API3): a misspelt option silently ignored would give
callers results they did not ask for, and accepting arbitrary properties invites mass
assignment once a field is added.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.helpers.service import AUTH, MODEL, REVIEW_AUTH, assert_problem
from textsieve.registry import open_registry

pytestmark = pytest.mark.anyio
JSON = {"content-type": "application/json"}
MAX_VERSION = 2**31 - 1  # the largest PostgreSQL INTEGER (PostgreSQL docs, "Numeric Types")


def _big(n_chars: int) -> str:
    return ("charged twice " * (n_chars // 14 + 1))[:n_chars]


# body bytes, status, problem slug, field named in errors (or None), words the detail must contain
CATALOGUE = [
    pytest.param(
        b'{"texts": ["fine", "bad\\u0000text"]}',
        422,
        "invalid-input",
        "texts",
        ["texts[1]", "U+0000"],
        id="NUL escaped in a text",
    ),
    pytest.param(
        b'{"texts": ["bad\x00text"]}', 422, "invalid-input", "body", ["not valid JSON"], id="raw NUL byte in the body"
    ),
    pytest.param(
        b'{"texts": ["a"], "model": "sup\\u0000port"}',
        422,
        "invalid-input",
        None,
        ["bad model name"],
        id="NUL in the model name",
    ),
    pytest.param(b'{"texts": ["fine", ""]}', 422, "invalid-input", "texts", ["texts[1]", "empty"], id="empty text"),
    pytest.param(
        b'{"texts": [" \\t\\n\\u3000"]}',
        422,
        "invalid-input",
        "texts",
        ["texts[0]", "empty"],
        id="whitespace-only text",
    ),
    pytest.param(
        b'{"texts": ["fine", "\\u200b \\u2060\\ufeff"]}',
        422,
        "invalid-input",
        "texts",
        ["texts[1]", "only whitespace and invisible characters (such as U+200B), no words"],
        id="invisible characters only (no token: the label would be the model's prior)",
    ),
    pytest.param(
        b'{"texts": ["a"], "model": ""}', 422, "invalid-input", None, ["bad model name"], id="empty model name"
    ),
    pytest.param(
        b'{"texts": ["caf\xff"]}', 422, "invalid-input", "body", ["not UTF-8"], id="byte 0xFF (never in UTF-8)"
    ),
    pytest.param(
        b'{"texts": ["a\xc0\xafb"]}', 422, "invalid-input", "body", ["not UTF-8"], id="overlong encoding of '/'"
    ),
    # Python's JSON decoder lets encoded surrogates through (surrogatepass); the text check then names it.
    pytest.param(
        b'{"texts": ["a\xed\xa0\x80b"]}',
        422,
        "invalid-input",
        "texts",
        ["texts[0]", "lone surrogate"],
        id="UTF-8-encoded surrogate",
    ),
    pytest.param(
        b'{"texts": ["a\xe2\x82"]}', 422, "invalid-input", "body", ["not UTF-8"], id="truncated 3-byte sequence"
    ),
    pytest.param(
        '{"texts": ["déjà vu"]}'.encode("latin-1"), 422, "invalid-input", "body", ["not UTF-8"], id="Latin-1 body"
    ),
    pytest.param(
        json.dumps({"texts": [_big(1_000_000)]}).encode(),
        413,
        "limit-exceeded",
        None,
        ["texts[0]", "1000000 characters", "TEXTSIEVE_MAX_CHARS"],
        id="a 1 MB text",
    ),
    pytest.param(
        json.dumps({"texts": [_big(19_000)] * 270}).encode(),
        413,
        "limit-exceeded",
        None,
        ["TEXTSIEVE_MAX_BODY_BYTES"],
        id="5 MB of texts",
    ),
    pytest.param(
        json.dumps({"texts": ["a"] * 100_000}).encode(),
        413,
        "limit-exceeded",
        None,
        ["100000 texts", "TEXTSIEVE_MAX_TEXTS"],
        id="100 000 texts",
    ),
    pytest.param(
        b'{"texts": ' + b"[" * 100_000 + b"]" * 100_000 + b"}",
        422,
        "invalid-input",
        "body",
        ["nested too deeply"],
        id="arrays nested 100 000 deep",
    ),
    pytest.param(
        b'{"texts": ["a"], "x": ' + b'{"a": ' * 5000 + b"1" + b"}" * 5000 + b"}",
        422,
        "invalid-input",
        "body",
        ["nested too deeply"],
        id="objects nested 5 000 deep",
    ),
    pytest.param(
        b'{"texts": ["a"], "modle": "x", "top_k": 3}',
        422,
        "invalid-input",
        "modle, top_k",
        ["'modle', 'top_k'", "allowed: texts, model, version, spans"],
        id="several unknown fields",
    ),
    pytest.param(
        b'{"texts": ["a"], "version": 100000000000000000000000}',
        422,
        "invalid-input",
        "version",
        [str(MAX_VERSION)],
        id="version past the storable range",
    ),
    pytest.param(
        f'{{"texts": ["a"], "version": {2**31}}}'.encode(),
        422,
        "invalid-input",
        "version",
        [str(MAX_VERSION)],
        id="version 2**31",
    ),
    pytest.param(
        f'{{"texts": ["a"], "version": {MAX_VERSION}}}'.encode(),
        404,
        "not-found",
        None,
        [f"no version {MAX_VERSION}"],
        id="largest storable version (unknown)",
    ),
    pytest.param(
        b'{"texts": ["a"], "spans": 100000000000000000000000}', 422, "invalid-input", "spans", [], id="huge spans"
    ),
    pytest.param(
        b'{"texts": ["a"], "spans": 1000000}',
        422,
        "invalid-input",
        None,
        ["TEXTSIEVE_MAX_SPANS"],
        id="spans above the setting",
    ),
    pytest.param(b'{"texts": ["a"], "spans": 2.5}', 422, "invalid-input", "spans", ["integer"], id="fractional spans"),
    pytest.param(b'{"texts": ["a"], "spans": "3"}', 422, "invalid-input", "spans", ["integer"], id="spans as text"),
    pytest.param(
        b'{"texts": ["a"], "version": 1}',
        409,
        "state-conflict",
        None,
        ["version 1", "retired", "live version (2)"],
        id="retired version",
    ),
    # A refusal names what is wrong without echoing the body (the reply stays under 8 KiB below):
    # before, each of these was answered with 7 to 12 MB.
    pytest.param(
        json.dumps({"texts": ["a"], **{f"k{i}": 1 for i in range(200_000)}}).encode(),
        422,
        "invalid-input",
        "k0, k1, k10, k100, k1000, k10000, k100000, k100001, k100002, k100003",
        ["'k0', 'k1'", "and 199990 more; allowed: texts, model, version, spans"],
        id="200 000 unknown fields",
    ),
    pytest.param(
        json.dumps({"texts": ["a"], "k" * 3_000_000: 1}).encode(),
        422,
        "invalid-input",
        "k" * 40 + "...",
        ["allowed: texts, model, version, spans"],
        id="an unknown field named by 3 MB",
    ),
    pytest.param(
        json.dumps({"texts": [1] * 100_000}).encode(),
        422,
        "invalid-input",
        "texts.0",
        ["valid string", "and 99999 more problem(s); 'errors' lists the first 20"],
        id="100 000 texts that are not strings",
    ),
    # Types are strict: no "3" for 3, no 1.0 for 1, no 1 for true (what the OpenAPI schema says).
    pytest.param(
        b'{"texts": ["a"], "version": 1.0}', 422, "invalid-input", "version", ["integer"], id="version written 1.0"
    ),
]


@pytest.mark.parametrize(("body", "status", "slug", "field", "words"), CATALOGUE)
async def test_bad_input_catalogue(
    retired_client: httpx.AsyncClient, body: bytes, status: int, slug: str, field: str | None, words: list[str]
) -> None:
    r = await retired_client.post("/v1/predict", content=body, headers=JSON)
    problem = assert_problem(r, status, slug)
    if field is not None:
        assert problem["errors"][0]["field"] == field, problem
    for word in words:
        assert word in problem["detail"], (word, problem["detail"])
    assert "Traceback" not in r.text and len(r.content) < 8192


@pytest.mark.parametrize(
    ("content_type", "body"),
    [
        pytest.param("text/plain", b'{"texts": ["a"]}', id="JSON sent as text/plain"),
        pytest.param("application/x-www-form-urlencoded", b"texts=a", id="a form"),
        pytest.param(
            "multipart/form-data; boundary=x",
            b'--x\r\nContent-Disposition: form-data; name="texts"\r\n\r\na\r\n--x--\r\n',
            id="a multipart form",
        ),
    ],
)
async def test_bodies_that_are_not_json_are_refused(
    retired_client: httpx.AsyncClient, content_type: str, body: bytes
) -> None:
    r = await retired_client.post("/v1/predict", content=body, headers={"content-type": content_type})
    problem = assert_problem(r, 422, "invalid-input")
    assert "JSON object" in problem["detail"] or "not valid JSON" in problem["detail"], problem
    # The type it was sent as is named, and the one to use: curl -d sends a form, a common slip.
    assert f"Content-Type: {content_type}" in problem["detail"], problem
    assert "with Content-Type: application/json" in problem["detail"], problem


@pytest.mark.parametrize(
    ("path", "body", "field"),
    [
        pytest.param(
            f"/v1/models/{MODEL}/versions/1/promote",
            {"to": "live", "reason": "x", "forced": True},
            "forced",
            id="promote with 'forced'",
        ),
        pytest.param(
            f"/v1/models/{MODEL}/rollback", {"reason": "x", "version": 1}, "version", id="rollback to a version"
        ),
    ],
)
async def test_unknown_fields_in_admin_bodies_are_refused_and_change_nothing(
    retired_client: httpx.AsyncClient, retired_registry: Path, path: str, body: dict[str, Any], field: str
) -> None:
    r = await retired_client.post(path, json=body, headers=AUTH)
    problem = assert_problem(r, 422, "invalid-input")
    assert problem["errors"][0]["field"] == field and "allowed:" in problem["detail"]
    with open_registry(retired_registry) as reg:
        assert reg.live(MODEL).version == 2  # type: ignore[union-attr]


@pytest.mark.parametrize(
    ("path", "auth"),
    [
        pytest.param("/v1/predict", {}, id="predict"),
        pytest.param(f"/v1/models/{MODEL}/versions/1/promote", AUTH, id="promote"),
        pytest.param(f"/v1/models/{MODEL}/rollback", AUTH, id="rollback"),
        pytest.param("/v1/verdicts", REVIEW_AUTH, id="verdicts"),
    ],
)
async def test_an_unknown_field_named_by_a_lone_surrogate_is_named_as_escaped(
    retired_client: httpx.AsyncClient, retired_registry: Path, path: str, auth: dict[str, str]
) -> None:
    # Python's JSON reader lets an escaped lone surrogate through (RFC 8259 §8.2 leaves it to the
    # reader); as a field name it was put in the refusal as it was, which no UTF-8 reply can hold
    # (RFC 3629 §3), so the problem's encoder failed and every JSON route answered 500.
    body = b'{"\\ud800x": 1, "\\udfff": 2}'
    r = await retired_client.post(path, content=body, headers={**JSON, **auth})
    problem = assert_problem(r, 422, "invalid-input")
    assert problem["errors"][0]["field"] == "\\ud800x, \\udfff", problem
    assert "unknown field(s)" in problem["detail"]
    with open_registry(retired_registry) as reg:
        assert reg.live(MODEL).version == 2  # type: ignore[union-attr]


@pytest.mark.parametrize(
    "path",
    [
        pytest.param(f"/v1/models/{MODEL}/versions/{2**31}", id="view version 2**31"),
        pytest.param(f"/v1/models/{MODEL}/versions/{10**30}", id="view version 10**30"),
        pytest.param(f"/v1/models/{MODEL}/versions/{10**30}/promote", id="promote version 10**30"),
    ],
)
async def test_version_numbers_in_paths_past_the_storable_range(retired_client: httpx.AsyncClient, path: str) -> None:
    if path.endswith("promote"):
        r = await retired_client.post(path, json={"to": "live", "reason": "x"}, headers=AUTH)
    else:
        r = await retired_client.get(path)
    problem = assert_problem(r, 422, "invalid-input")
    assert str(MAX_VERSION) in problem["detail"]
