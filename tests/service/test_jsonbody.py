"""JSON request bodies are read as UTF-8 only, on every route that takes one (service/web/jsonbody.py).

The reference is RFC 8259 §8.1 (JSON exchanged between systems MUST be UTF-8; a parser MAY
ignore a byte-order mark) with the bodies made by Python's own codecs, and RFC 4627 §3's rule
for telling UTF-16 and UTF-32 from the NUL bytes among a JSON text's first characters.
Before, ``json.loads(bytes)`` read UTF-16 and UTF-32 bodies and the routes answered them as if
they were UTF-8, and a ``charset=utf-16`` was ignored; a body that did not parse was refused
before the admin or reviewer token was checked.
"""

from __future__ import annotations

import json
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.helpers.service import (
    ADMIN_TOKEN,
    AUTH,
    MODEL,
    REVIEW_AUTH,
    REVIEW_TOKEN,
    assert_problem,
    serving,
    settings_for,
)

pytestmark = pytest.mark.anyio
RID = {"X-Request-Id": "jsonbody-test-0001"}

# route, its credentials, a body it parses and then answers without changing anything, and that answer
ROUTES = [
    pytest.param("/v1/predict", {}, {"texts": ["my card was charged twice"]}, 200, id="predict"),
    pytest.param(f"/v1/models/{MODEL}/versions/2/promote", AUTH, {"to": "live"}, 422, id="promote"),
    pytest.param(f"/v1/models/{MODEL}/rollback", AUTH, {}, 422, id="rollback"),
    pytest.param("/v1/verdicts", REVIEW_AUTH, {}, 422, id="verdicts"),
]
# what Python's codecs make of a JSON text, and the encoding the refusal must name
FOREIGN = [
    pytest.param("utf-16", "UTF-16LE", id="UTF-16 with its byte-order mark (Python writes little-endian here)"),
    pytest.param("utf-16-le", "UTF-16LE", id="UTF-16LE without a mark"),
    pytest.param("utf-16-be", "UTF-16BE", id="UTF-16BE without a mark"),
    pytest.param("utf-32", "UTF-32LE", id="UTF-32 with its byte-order mark"),
    pytest.param("utf-32-be", "UTF-32BE", id="UTF-32BE without a mark"),
]


@pytest.fixture(scope="module")
async def client(shared_registry: Path) -> AsyncIterator[httpx.AsyncClient]:
    settings = settings_for(shared_registry, admin_token=ADMIN_TOKEN, review_token=REVIEW_TOKEN)
    async with serving(settings) as (_, c):
        yield c


def _text(body: Any) -> str:
    return json.dumps(body)


@pytest.mark.parametrize(("encoding", "named"), FOREIGN)
@pytest.mark.parametrize(("path", "auth", "body", "status"), ROUTES)
async def test_a_body_in_utf16_or_utf32_is_refused_naming_what_was_found(
    client: httpx.AsyncClient, path: str, auth: dict[str, str], body: Any, status: int, encoding: str, named: str
) -> None:
    content = _text(body).encode(encoding)
    r = await client.post(path, content=content, headers={"Content-Type": "application/json", **auth})
    problem = assert_problem(r, 415, "unsupported-charset")  # RFC 9110 §15.5.16: found by inspecting the data
    assert f"the body is {named}" in problem["detail"] and "UTF-8 only (RFC 8259 §8.1)" in problem["detail"]
    assert r.headers["accept"] == "application/json"  # RFC 9110 §12.5.1: what to send instead


@pytest.mark.parametrize(
    "content_type",
    [
        pytest.param("application/json; charset=utf-16", id="utf-16"),
        pytest.param("application/json;charset=UTF-16LE", id="UTF-16LE"),
        pytest.param('application/json; charset="iso-8859-1"', id="quoted latin-1"),
        pytest.param("application/json; charset=utf8", id="utf8 (not the registered name)"),
    ],
)
@pytest.mark.parametrize(("path", "auth", "body", "status"), ROUTES)
async def test_a_charset_other_than_utf8_is_refused_with_415(
    client: httpx.AsyncClient, path: str, auth: dict[str, str], body: Any, status: int, content_type: str
) -> None:
    r = await client.post(path, content=_text(body).encode(), headers={"Content-Type": content_type, **auth})
    problem = assert_problem(r, 415, "unsupported-charset")
    declared = content_type.split("=", 1)[1].strip('"').lower()
    assert f"declares charset '{declared}'" in problem["detail"], problem
    assert "Content-Type: application/json" in problem["detail"]


@pytest.mark.parametrize(
    "content_type",
    [
        pytest.param("application/json", id="none"),
        pytest.param("application/json; charset=utf-8", id="utf-8"),
        pytest.param('application/json; charset="UTF-8"', id="quoted, upper case"),
    ],
)
@pytest.mark.parametrize(("path", "auth", "body", "status"), ROUTES)
async def test_utf8_with_or_without_a_byte_order_mark_is_read_alike(
    client: httpx.AsyncClient, path: str, auth: dict[str, str], body: Any, status: int, content_type: str
) -> None:
    # RFC 8259 §8.1: a parser MAY ignore a byte-order mark; it is ignored on every route.
    headers = {"Content-Type": content_type, **auth, **RID}
    plain = await client.post(path, content=_text(body).encode(), headers=headers)
    marked = await client.post(path, content=b"\xef\xbb\xbf" + _text(body).encode(), headers=headers)
    assert plain.status_code == marked.status_code == status, marked.text
    assert marked.content == plain.content


@pytest.mark.parametrize(
    ("path", "auth"),
    [
        pytest.param(f"/v1/models/{MODEL}/rollback", {}, id="rollback, no token"),
        pytest.param(f"/v1/models/{MODEL}/versions/2/promote", {"Authorization": "Bearer wrong-token"}, id="promote"),
        pytest.param("/v1/verdicts", AUTH, id="verdicts, the admin token"),
    ],
)
@pytest.mark.parametrize(
    ("content", "content_type"),
    [
        pytest.param('{"reason": "x"}'.encode("utf-16"), "application/json", id="UTF-16"),
        pytest.param(b'{"reason": "x"}', "application/json; charset=utf-16", id="charset"),
        pytest.param(b'{"reason": ', "application/json", id="not JSON"),
    ],
)
async def test_the_token_is_checked_before_the_body(
    client: httpx.AsyncClient, path: str, auth: dict[str, str], content: bytes, content_type: str
) -> None:
    # DEVELOPERS.md: admin and reviewer routes check their token before anything else about the request.
    r = await client.post(path, content=content, headers={"Content-Type": content_type, **auth})
    assert r.status_code in (401, 403), r.text
    assert r.json()["type"] in ("/problems/unauthorized", "/problems/forbidden", "/problems/reviewer-forbidden")


async def test_bytes_that_are_not_utf8_are_named_by_their_offset(client: httpx.AsyncClient) -> None:
    body = b'\xef\xbb\xbf{"texts": ["caf\xe9"]}'  # Latin-1 after a UTF-8 mark
    with pytest.raises(UnicodeDecodeError) as found:  # Python's UTF-8 codec as the reference
        body.decode("utf-8")
    r = await client.post("/v1/predict", content=body, headers={"Content-Type": "application/json"})
    problem = assert_problem(r, 422, "invalid-input")
    assert f"not UTF-8: {found.value.reason} at byte {found.value.start}" in problem["detail"], problem
