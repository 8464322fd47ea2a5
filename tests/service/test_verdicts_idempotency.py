"""POST /v1/verdicts with an ``Idempotency-Key``: a retry after a lost reply gets the first reply
instead of storing a second verdict.

Sources beside the checks: draft-ietf-httpapi-idempotency-key-header (read from the working group's
draft): the header is an Item Structured Field whose value is a String (RFC 8941 §3.3.3), clients
send it at most once, a retry after the first request completed gets that request's result, and a
key reused with a different payload is answered 422. RFC 8941 §3.3.3 and §4.2.5: a String is
printable ASCII (%x20-7E) between double quotes, in which only ``"`` and ``\\`` are escaped.
The 1–255 character bound is this service's published rule (the draft leaves the key's format to
the server).
"""

from __future__ import annotations

import concurrent.futures
import threading
import uuid
from collections.abc import AsyncIterator
from pathlib import Path

import httpx
import pytest

from tests.helpers.net import free_port
from tests.helpers.registries import RegistrySpec
from tests.helpers.service import (
    MODEL,
    REVIEW_AUTH,
    REVIEW_TOKEN,
    assert_problem,
    make_registry,
    serving,
    settings_for,
    uvicorn_server,
)
from tests.service.test_verdicts import VERDICT
from textsieve.registry import open_registry
from textsieve.service.settings import Settings

pytestmark = pytest.mark.anyio
HEADER = "Idempotency-Key"
REPLAYED = "Textsieve-Replayed"


@pytest.fixture(scope="module")
def review_registry(tmp_path_factory: pytest.TempPathFactory, tiny_bundles: dict[str, Path]) -> Path:
    return make_registry(tmp_path_factory.mktemp("idem-registry") / "registry", tiny_bundles)


@pytest.fixture(scope="module")
async def client(review_registry: Path) -> AsyncIterator[httpx.AsyncClient]:
    async with serving(settings_for(review_registry, review_token=REVIEW_TOKEN, poll_seconds=600)) as (_, c):
        yield c


def _count(registry: Path) -> int:
    with open_registry(registry) as reg:
        return len(reg.verdicts.of(MODEL))


def _key() -> str:
    return f'"{uuid.uuid4()}"'


async def test_a_retry_with_the_key_gets_the_first_reply_and_stores_nothing(
    client: httpx.AsyncClient, review_registry: Path
) -> None:
    before = _count(review_registry)
    key = _key()
    first = await client.post("/v1/verdicts", json=VERDICT, headers={**REVIEW_AUTH, HEADER: key})
    again = await client.post("/v1/verdicts", json=VERDICT, headers={**REVIEW_AUTH, HEADER: key})
    assert (first.status_code, again.status_code) == (201, 201), again.text
    assert again.json() == first.json()  # the same verdict id and time: the first reply again
    assert REPLAYED not in first.headers and again.headers[REPLAYED] == "true"
    assert _count(review_registry) == before + 1
    # Without the header, each request is a new verdict, as before.
    for _ in range(2):
        r = await client.post("/v1/verdicts", json=VERDICT, headers=REVIEW_AUTH)
        assert r.status_code == 201 and REPLAYED not in r.headers
    assert _count(review_registry) == before + 3


async def test_an_escaped_key_is_the_same_key_as_its_value(client: httpx.AsyncClient) -> None:
    # RFC 8941 §4.2.5: \" and \\ stand for " and \ in the string's value.
    key = f"{uuid.uuid4()}"
    first = await client.post("/v1/verdicts", json=VERDICT, headers={**REVIEW_AUTH, HEADER: f'"{key}\\"q\\\\"'})
    again = await client.post("/v1/verdicts", json=VERDICT, headers={**REVIEW_AUTH, HEADER: f'"{key}\\"q\\\\"'})
    assert first.status_code == 201 and again.headers.get(REPLAYED) == "true" and again.json() == first.json()


async def test_the_key_with_another_verdict_is_refused_422(client: httpx.AsyncClient, review_registry: Path) -> None:
    key = _key()
    first = await client.post("/v1/verdicts", json=VERDICT, headers={**REVIEW_AUTH, HEADER: key})
    before = _count(review_registry)
    other = {**VERDICT, "verdict_label": "repair"}
    r = await client.post("/v1/verdicts", json=other, headers={**REVIEW_AUTH, HEADER: key})
    body = assert_problem(r, 422, "idempotency-key-reused")
    assert "already used for another verdict" in body["detail"] and f"#{first.json()['id']}" in body["detail"]
    assert body["verdict_id"] == first.json()["id"]
    assert _count(review_registry) == before


LONGEST = "k" * 255
MALFORMED: list[tuple[str, list[tuple[bytes, bytes]], str]] = [
    ("unquoted", [(b"Idempotency-Key", b"8e03978e-40d5")], "is not in double quotes"),
    ("empty", [(b"Idempotency-Key", b'""')], "the key is empty"),
    ("too-long", [(b"Idempotency-Key", b'"' + b"k" * 256 + b'"')], "the key has 256 characters"),
    ("non-ascii", [(b"Idempotency-Key", '"clé"'.encode())], "not printable ASCII"),
    ("unterminated", [(b"Idempotency-Key", b'"abc')], "no closing double quote"),
    ("bad-escape", [(b"Idempotency-Key", b'"a\\nb"')], "may only escape"),
    ("parameters", [(b"Idempotency-Key", b'"abc";v=1')], "follows the closing quote"),
    ("a-list", [(b"Idempotency-Key", b'"abc", "def"')], "follows the closing quote"),
    ("repeated", [(b"Idempotency-Key", b'"abc"'), (b"Idempotency-Key", b'"def"')], "sent 2 times"),
    ("repeated-same", [(b"Idempotency-Key", b'"abc"'), (b"Idempotency-Key", b'"abc"')], "sent 2 times"),
]


@pytest.mark.parametrize(("lines", "why"), [c[1:] for c in MALFORMED], ids=[c[0] for c in MALFORMED])
async def test_a_malformed_key_is_refused_400_naming_the_header_and_its_form(
    client: httpx.AsyncClient, review_registry: Path, lines: list[tuple[bytes, bytes]], why: str
) -> None:
    before = _count(review_registry)
    headers = [(b"Authorization", f"Bearer {REVIEW_TOKEN}".encode()), *lines]
    r = await client.post("/v1/verdicts", json=VERDICT, headers=headers)
    body = assert_problem(r, 400, "bad-idempotency-key")
    assert body["detail"].startswith("header Idempotency-Key: ") and why in body["detail"], body["detail"]
    assert "RFC 8941 §3.3.3" in body["detail"] and "1 to 255 printable ASCII characters" in body["detail"]
    assert body["header"] == HEADER
    assert _count(review_registry) == before


async def test_the_longest_key_works_as_a_key(client: httpx.AsyncClient) -> None:
    first = await client.post("/v1/verdicts", json=VERDICT, headers={**REVIEW_AUTH, HEADER: f'"{LONGEST}"'})
    again = await client.post("/v1/verdicts", json=VERDICT, headers={**REVIEW_AUTH, HEADER: f'"{LONGEST}"'})
    assert first.status_code == 201 and again.headers.get(REPLAYED) == "true" and again.json() == first.json()


@pytest.mark.parametrize(
    ("auth", "status", "slug"),
    [({}, 401, "reviewer-unauthorized"), ({"Authorization": "Bearer wrong-token-wrong"}, 403, "reviewer-forbidden")],
)
async def test_the_token_is_checked_before_the_key(
    client: httpx.AsyncClient, auth: dict[str, str], status: int, slug: str
) -> None:
    r = await client.post("/v1/verdicts", json=VERDICT, headers={**auth, HEADER: "unquoted"})
    assert_problem(r, status, slug)
    # The same key with the token is what is refused next.
    r = await client.post("/v1/verdicts", json=VERDICT, headers={**REVIEW_AUTH, HEADER: "unquoted"})
    assert_problem(r, 400, "bad-idempotency-key")


def _post_together(urls: list[str], key: str, n: int) -> list[httpx.Response]:
    """``n`` requests with one key, released at once, spread over the servers."""
    start = threading.Barrier(n)

    def post(i: int) -> httpx.Response:
        with httpx.Client(timeout=60) as c:
            start.wait()
            return c.post(f"{urls[i % len(urls)]}/v1/verdicts", json=VERDICT, headers={**REVIEW_AUTH, HEADER: key})

    with concurrent.futures.ThreadPoolExecutor(n) as pool:
        return list(pool.map(post, range(n)))


def test_simultaneous_requests_with_one_key_through_two_servers_store_one_verdict(
    spec: RegistrySpec, tiny_bundles: dict[str, Path]
) -> None:
    """Two real uvicorn replicas on one registry (SQLite file or PostgreSQL), eight requests at once."""
    with spec.open() as reg:
        reg.publish(tiny_bundles["a"], MODEL, actor="tests")
        reg.promote(MODEL, 1, "live", reason="tests start here", actor="tests", force=True)

    def settings() -> Settings:
        return Settings(
            registry=spec.location,
            blobs=spec.blobs,
            review_token=REVIEW_TOKEN,
            workers=1,
            port=free_port(),
            poll_seconds=600,
            access_log=False,
        )

    with uvicorn_server(settings()) as one, uvicorn_server(settings()) as two:
        replies = _post_together([one.url, two.url], _key(), 8)
    assert [r.status_code for r in replies] == [201] * 8, [r.text for r in replies]
    assert len({r.json()["id"] for r in replies}) == 1
    assert sorted(r.headers.get(REPLAYED, "") for r in replies) == [""] + ["true"] * 7
    with spec.open() as reg:
        assert len(reg.verdicts.of(MODEL)) == 1
