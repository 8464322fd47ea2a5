"""Overload and hostile clients: bounded bodies, connections and queues; refusals that come at once.

Against the real ``textsieve serve`` (uvicorn on loopback), since the guards live in the
server's protocol and middleware. Status codes: 503 with Retry-After for a replica at capacity
and 408 for a request that arrives too slowly (RFC 9110 §15.6.4 and §15.5.9); 504 for a
caller's own deadline that passed before inference started (the HTTP status that the gRPC
status DEADLINE_EXCEEDED is mapped to in Google's HTTP mapping of gRPC codes; from memory).
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import re
import select
import socket
import time
from collections.abc import Iterator
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import httpx
import pytest

from tests.helpers.servers import running_server
from tests.helpers.service import guarded_uvicorn, make_registry, serving, settings_for
from textsieve.errors import DeadlinePassedError, OverloadedError
from textsieve.service.inference.admission import Admission
from textsieve.service.inference.batcher import QUANTUM, Batcher, _Job
from textsieve.service.settings import Settings

MIB = 1024 * 1024
MAX_HEAD_BYTES = Settings.model_fields["max_head_bytes"].default


@pytest.fixture(scope="module")
def registry_path(tmp_path_factory: pytest.TempPathFactory, tiny_bundles: dict[str, Path]) -> Path:
    return make_registry(tmp_path_factory.mktemp("overload") / "registry", tiny_bundles)


def _connect(port: int) -> socket.socket:
    s = socket.create_connection(("127.0.0.1", port), timeout=10)
    s.setblocking(True)
    return s


def _head(length: int) -> bytes:
    return (
        f"POST /v1/predict HTTP/1.1\r\nHost: t\r\nContent-Type: application/json\r\nContent-Length: {length}\r\n\r\n"
    ).encode()


def _response(s: socket.socket, timeout: float) -> bytes:
    """What the server sent within ``timeout`` (until it closed the connection or went quiet)."""
    out = b""
    end = time.monotonic() + timeout
    while (left := end - time.monotonic()) > 0:
        ready, _, _ = select.select([s], [], [], left)
        if not ready:
            break
        try:
            chunk = s.recv(65536)
        except ConnectionError:
            break
        if not chunk:
            break
        out += chunk
    return out


def _status(raw: bytes) -> int:
    return int(raw.split(b" ", 2)[1]) if raw.startswith(b"HTTP/1.1 ") else 0


def _problem(raw: bytes) -> dict[str, Any]:
    body: dict[str, Any] = json.loads(raw.split(b"\r\n\r\n", 1)[1])
    return body


def scraped(url: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """/metrics read with prometheus_client's own parser."""
    from prometheus_client.parser import text_string_to_metric_families

    text = httpx.get(f"{url}/metrics", timeout=10).text
    return {
        (s.name, tuple(sorted(s.labels.items()))): s.value
        for family in text_string_to_metric_families(text)
        for s in family.samples
    }


def refusals(url: str, reason: str) -> float:
    return scraped(url)[("textsieve_overload_refusals_total", (("reason", reason),))]


@pytest.fixture
def sockets() -> Iterator[list[socket.socket]]:
    opened: list[socket.socket] = []
    yield opened
    for s in opened:
        s.close()


def test_stalled_bodies_are_bounded_by_the_budget_and_released_by_the_read_deadline(
    registry_path: Path, tmp_path: Path, sockets: list[socket.socket]
) -> None:
    budget, body = 8 * MIB + 64 * 1024, 2 * MIB  # room for four stalled uploads and one small request
    with running_server(
        str(registry_path),
        tmp_path / "server.log",
        workers=1,
        inference="threads",
        body_budget_bytes=budget,
        max_body_bytes=body,
        read_timeout_seconds=4,
        max_requests=2,  # fewer than the uploads that will stall: they must not fill the request limit
    ) as server:
        idle = server.rss_bytes()
        statuses = []
        started = time.monotonic()
        for _ in range(12):  # each declares 2 MiB, sends all but the last byte, then stalls
            s = _connect(server.port)
            sockets.append(s)
            s.sendall(_head(body))
            refusal = _response(s, 0.3)
            if refusal:
                statuses.append(_status(refusal))
                assert b"retry-after: 1" in refusal.lower() and b"connection: close" in refusal.lower()
                assert _problem(refusal)["type"] == "/problems/overloaded"
                continue
            s.sendall(b" " * (body - 1))
            statuses.append(0)  # admitted, now stalled
        assert statuses.count(0) == budget // body, statuses  # the rest were refused before their body was read
        assert statuses.count(503) == 12 - budget // body
        held = server.rss_bytes()
        # Stalled uploads are not work: probes and a whole request are still answered while they hold.
        for path in ("/healthz", "/readyz", "/metrics"):
            assert httpx.get(f"{server.url}{path}", timeout=5).status_code == 200, path
        r = httpx.post(f"{server.url}/v1/predict", json={"texts": ["refund please"]}, timeout=10)
        assert r.status_code == 200, r.text
        # The stalled bodies cost about the budget, not 12 x 2 MiB (uvicorn keeps up to 64 KiB per connection).
        assert held - idle < budget + 12 * 64 * 1024 + 24 * MIB, (idle, held)
        # Past the read deadline every stalled upload is answered 408 and closed; the budget is free again.
        answers = [_response(s, 8) for s in sockets if s.fileno() != -1]
        assert time.monotonic() - started < 15
        timed_out = [a for a in answers if _status(a) == 408]
        assert len(timed_out) == budget // body, [a[:40] for a in answers]
        r = httpx.post(f"{server.url}/v1/predict", json={"texts": ["charged twice"]}, timeout=10)
        assert r.status_code == 200, r.text
        assert refusals(server.url, "body_budget") == statuses.count(503)
        assert scraped(server.url)[("textsieve_connections_timed_out_total", ())] >= budget // body
        assert scraped(server.url)[("textsieve_body_bytes_in_flight", ())] == 0
        after = server.rss_bytes()
        assert after <= idle * 1.10, (idle, held, after)


def test_slow_and_silent_clients_are_closed_at_the_read_deadline(
    registry_path: Path, tmp_path: Path, sockets: list[socket.socket]
) -> None:
    with running_server(
        str(registry_path), tmp_path / "server.log", workers=1, inference="threads", read_timeout_seconds=2
    ) as server:
        silent = _connect(server.port)
        trickle = _connect(server.port)
        sockets += [silent, trickle]
        started = time.monotonic()
        head = _head(40)
        for i in range(len(head)):  # one byte every 0.25 s: the headers alone would take 20 s
            try:
                trickle.send(head[i : i + 1])
            except OSError:
                break
            time.sleep(0.25)
            if time.monotonic() - started > 6:
                break
        for s in (silent, trickle):
            answer = _response(s, 5)
            assert _status(answer) == 408, answer[:200]
            assert s.recv(1) == b""  # and closed
        assert time.monotonic() - started < 8
        # Ordinary clients are unaffected.
        r = httpx.post(f"{server.url}/v1/predict", json={"texts": ["a refund please"]}, timeout=10)
        assert r.status_code == 200
        metrics = scraped(server.url)
        assert metrics[("textsieve_connections_timed_out_total", ())] == 2
        # Also in the HTTP families, as the app's own replies are (before, in none of them).
        timed_out = [
            v
            for (name, labels), v in metrics.items()
            if name == "textsieve_http_requests_total"
            and ("status", "408") in labels
            and ("route", "unmatched") in labels
        ]
        assert sum(timed_out) == 2, metrics


_BODY = b'{"texts":["a"]}'
MALFORMED = {
    # RFC 9112 §6.3: a negative or repeated, differing Content-Length, and Content-Length beside
    # Transfer-Encoding, are framing errors a server must not guess at (request smuggling).
    "negative length": b"POST /v1/predict HTTP/1.1\r\nHost: t\r\nContent-Length: -5\r\n\r\n" + _BODY,
    "two lengths": b"POST /v1/predict HTTP/1.1\r\nHost: t\r\nContent-Length: 15\r\nContent-Length: 16\r\n\r\n" + _BODY,
    "length and chunked": b"POST /v1/predict HTTP/1.1\r\nHost: t\r\nContent-Length: 15\r\n"
    b"Transfer-Encoding: chunked\r\n\r\nf\r\n" + _BODY + b"\r\n0\r\n\r\n",
    "bad chunk size": b"POST /v1/predict HTTP/1.1\r\nHost: t\r\nTransfer-Encoding: chunked\r\n\r\nzz\r\n" + _BODY,
    "not HTTP": b"HELLO\r\n\r\n",
    "NUL in a header": b"GET /healthz HTTP/1.1\r\nHost: t\r\nX-A: a\x00b\r\n\r\n",
    # RFC 9112 §3.2: an HTTP/1.1 request has exactly one Host (before, both were answered 200).
    "no Host": b"POST /v1/predict HTTP/1.1\r\nContent-Type: application/json\r\nContent-Length: 15\r\n\r\n" + _BODY,
    "two Hosts": b"GET /healthz HTTP/1.1\r\nHost: t\r\nHost: u\r\n\r\n",
}


def test_requests_that_are_not_valid_http_are_answered_400_problem_json_and_closed(
    registry_path: Path, tmp_path: Path
) -> None:
    with running_server(str(registry_path), tmp_path / "server.log", workers=1, inference="threads") as server:
        for name, raw in MALFORMED.items():
            with _connect(server.port) as s:
                # A valid request pipelined after the bad one must not be answered: nothing after a
                # framing error can be trusted to start where the client meant.
                s.sendall(raw + b"GET /healthz HTTP/1.1\r\nHost: t\r\n\r\n")
                answer = _response(s, 5)
            assert _status(answer) == 400, (name, answer[:200])
            assert b"content-type: application/problem+json" in answer.lower() and b"connection: close" in answer
            problem = _problem(answer)
            assert problem["type"] == "/problems/malformed-request" and "HTTP/1.1" in problem["detail"], name
            assert answer.count(b"HTTP/1.1 ") == 1, name
        explained = httpx.get(f"{server.url}/problems/malformed-request", timeout=10)
        assert explained.status_code == 200 and "HTTP 400" in explained.text
        assert scraped(server.url)[("textsieve_connections_malformed_total", ())] == len(MALFORMED)
        # A well-formed request with a method no one defined: 501 (RFC 9110 §9.1), not 400.
        with _connect(server.port) as s:
            s.sendall(b"FOO /healthz HTTP/1.1\r\nHost: t\r\n\r\n")
            answer = _response(s, 5)
        assert _status(answer) == 501 and b"connection: close" in answer, answer[:200]
        assert _problem(answer)["type"] == "/problems/unknown-method"
        r = httpx.post(f"{server.url}/v1/predict", json={"texts": ["a refund please"]}, timeout=10)
        assert r.status_code == 200


def test_a_request_head_past_its_bound_is_answered_431_and_closed_before_it_fills_memory(
    registry_path: Path, tmp_path: Path
) -> None:
    # The parser holds a header it has not seen the end of; before, one header line of 100 MiB sent
    # within the read deadline grew the server by 100 MiB and was then answered 200.
    with running_server(str(registry_path), tmp_path / "server.log", workers=1, inference="threads") as server:
        idle = server.rss_bytes()
        with _connect(server.port) as s:
            s.sendall(b"GET /healthz HTTP/1.1\r\nHost: t\r\nX-Big: ")
            sent = 0
            with contextlib.suppress(OSError):  # the server closes the connection mid-way
                while sent < 64 * MIB:
                    s.sendall(b"a" * MIB)
                    sent += MIB
            answer = _response(s, 5)
        assert sent < 64 * MIB and server.rss_bytes() < idle + 16 * MIB, (sent, idle, server.rss_bytes())
        assert _status(answer) == 431, answer[:200]
        assert b"content-type: application/problem+json" in answer.lower() and b"connection: close" in answer
        problem = _problem(answer)
        assert problem["type"] == "/problems/request-head-too-large" and str(MAX_HEAD_BYTES) in problem["detail"]
        explained = httpx.get(f"{server.url}{problem['type']}", timeout=10)
        assert explained.status_code == 200 and "HTTP 431" in explained.text
        # Long but ordinary heads pass: a 10 kB request id, thousands of short headers, pipelined requests.
        r = httpx.get(f"{server.url}/healthz", headers={"x-request-id": "a" * 10_000}, timeout=10)
        assert r.status_code == 200
        many = b"".join(b"X-H%d: v\r\n" % i for i in range(5000))
        assert len(many) < MAX_HEAD_BYTES
        one = b"POST /v1/predict HTTP/1.1\r\nHost: t\r\nContent-Type: application/json\r\nContent-Length: 15\r\n"
        with _connect(server.port) as s:
            s.sendall(
                (one + many + b"\r\n" + _BODY) * 20 + b"GET /healthz HTTP/1.1\r\nHost: t\r\nConnection: close\r\n\r\n"
            )
            answer = _response(s, 10)
        assert answer.count(b"HTTP/1.1 200 OK") == 21, answer[:300]


def test_the_head_bound_is_a_setting_holds_for_a_head_read_at_once_and_its_refusals_are_counted(
    registry_path: Path, tmp_path: Path
) -> None:
    # Before, the bound was a constant, and a head was measured only over the reads after the one it
    # began in: a 100 kB head sent in one write (one read on loopback) was answered 200. Replies the
    # connection layer wrote itself (431, 400, 501) were in no HTTP metric.
    bound = 16 * 1024
    line = b"GET /healthz HTTP/1.1\r\nHost: t\r\nConnection: close\r\nX-Big: "
    with running_server(
        str(registry_path), tmp_path / "server.log", workers=1, inference="threads", max_head_bytes=bound
    ) as server:
        before = scraped(server.url)
        with _connect(server.port) as s:  # 4 bytes under the bound, the blank line included
            s.sendall(line + b"a" * (bound - len(line) - 6) + b"\r\n\r\n")
            assert _status(_response(s, 5)) == 200
        for size in (bound + 1 - len(line) - 4, 100_000):  # a byte over the bound; 100 kB
            with _connect(server.port) as s:
                s.sendall(line + b"a" * size + b"\r\n\r\n")
                answer = _response(s, 5)
            assert _status(answer) == 431, (size, answer[:200])
            assert str(bound) in _problem(answer)["detail"] and b"connection: close" in answer
        with _connect(server.port) as s:  # RFC 9112 §3.2: an HTTP/1.1 request without Host is a 400
            s.sendall(b"POST /v1/predict HTTP/1.1\r\nContent-Length: 2\r\n\r\n{}")
            assert _status(_response(s, 5)) == 400
        with _connect(server.port) as s:  # RFC 9110 §9.1: a method the server does not know is a 501
            s.sendall(b"FROB / HTTP/1.1\r\nHost: t\r\n\r\n")
            assert _status(_response(s, 5)) == 501
        after = scraped(server.url)

    def added(method: str, status: str) -> float:
        key = ("textsieve_http_requests_total", (("method", method), ("route", "unmatched"), ("status", status)))
        return after.get(key, 0.0) - before.get(key, 0.0)

    assert (added("GET", "431"), added("POST", "400"), added("unknown", "501")) == (2, 1, 1)
    timed = ("textsieve_http_request_seconds_count", (("route", "unmatched"),))
    assert after[timed] - before.get(timed, 0.0) == 4


_UPGRADES = {
    # What curl --http2 sends on http:// with its first request, body and all.
    "h2c": b"Upgrade: h2c\r\nConnection: Upgrade, HTTP2-Settings\r\nHTTP2-Settings: AAMAAABkAARAAAAAAAIAAAAA\r\n",
    "websocket": b"Upgrade: websocket\r\nConnection: upgrade\r\nSec-WebSocket-Key: dGhlIHNhbXBsZSBub25jZQ==\r\n"
    b"Sec-WebSocket-Version: 13\r\n",
}


@pytest.mark.parametrize("upgrade", list(_UPGRADES))
def test_an_upgrade_is_declined_and_the_request_answered_as_http_1_1_body_and_all(
    registry_path: Path, tmp_path: Path, upgrade: str
) -> None:
    # RFC 9110 §7.8: a server may ignore Upgrade. The parser ended such a request at its headers, so
    # a prediction sent by curl --http2 was answered 422 "the body is missing", and a WebSocket
    # handshake an empty 403 that was not problem+json.
    body = json.dumps({"texts": ["my card was charged twice"]}).encode()
    one = b"POST /v1/predict HTTP/1.1\r\nHost: t\r\nContent-Type: application/json\r\n" + _UPGRADES[upgrade]
    with running_server(str(registry_path), tmp_path / "server.log", workers=1, inference="threads") as server:
        expected = httpx.post(f"{server.url}/v1/predict", content=body, headers={"content-type": "application/json"})
        with _connect(server.port) as s:
            # A length, then chunks split across reads; a request pipelined behind them is answered too.
            s.sendall(one + b"Content-Length: %d\r\n\r\n" % len(body) + body)
            s.sendall(one + b"Transfer-Encoding: chunked\r\n\r\n%x\r\n" % len(body) + body[:9])
            time.sleep(0.2)
            s.sendall(body[9:] + b"\r\n0\r\n\r\nGET /healthz HTTP/1.1\r\nHost: t\r\nConnection: close\r\n\r\n")
            answer = _response(s, 10)
        replies = answer.split(b"HTTP/1.1 ")[1:]
        assert [_status(b"HTTP/1.1 " + r) for r in replies] == [200, 200, 200], answer[:300]
        for reply in replies[:2]:
            assert json.loads(reply.split(b"\r\n\r\n", 1)[1]) == expected.json()
        with _connect(server.port) as s:
            s.sendall(b"GET /healthz HTTP/1.1\r\nHost: t\r\n" + _UPGRADES[upgrade] + b"\r\n")
            assert _status(_response(s, 2)) == 200
        # Checked once, when parsed again: without a Host it is one 400 (and was a traceback besides).
        with _connect(server.port) as s:
            s.sendall(b"GET /healthz HTTP/1.1\r\n" + _UPGRADES[upgrade] + b"\r\n")
            answer = _response(s, 2)
        assert answer.count(b"HTTP/1.1 ") == 1 and _status(answer) == 400, answer[:200]
        assert "Traceback" not in server.output()


def test_connections_beyond_the_cap_are_refused_at_once(
    registry_path: Path, tmp_path: Path, sockets: list[socket.socket]
) -> None:
    cap = 6
    with running_server(
        str(registry_path),
        tmp_path / "server.log",
        workers=1,
        inference="threads",
        max_connections=cap,
        read_timeout_seconds=30,
    ) as server:
        time.sleep(0.5)  # the readiness poll's connection has closed
        held = [_connect(server.port) for _ in range(cap)]
        sockets += held
        time.sleep(0.3)
        extra = _connect(server.port)
        sockets.append(extra)
        started = time.monotonic()
        answer = _response(extra, 5)
        assert time.monotonic() - started < 1.0
        assert _status(answer) == 503 and b"retry-after: 1" in answer.lower(), answer[:300]
        assert "TEXTSIEVE_MAX_CONNECTIONS" in _problem(answer)["detail"]
        for s in held:
            s.close()
        time.sleep(0.3)
        r = httpx.post(f"{server.url}/v1/predict", json={"texts": ["the app crashes"]}, timeout=10)
        assert r.status_code == 200
        assert refusals(server.url, "connections") == 1
        # No request was read from it, and it is in the HTTP family as such.
        key = (("method", "unknown"), ("route", "unmatched"), ("status", "503"))
        assert scraped(server.url)[("textsieve_http_requests_total", key)] == 1


# -- admission control ----------------------------------------------------------------------------
def test_admission_admits_what_the_measured_rate_finishes_within_the_wait() -> None:
    a = Admission(max_wait_seconds=0.25, threads=2)
    a.measured(texts=1000, seconds=0.5)  # 2,000 texts/s per thread, 4,000 for the replica
    assert a.rate == pytest.approx(4000)
    assert a.limit == 1000
    a.admit(900)
    a.admit(100)
    with pytest.raises(OverloadedError) as refused:
        a.admit(1)
    assert refused.value.retry_after == 1 and "TEXTSIEVE_QUEUE_WAIT_MS" in refused.value.message
    a.finished(1000)
    a.admit(5000)  # an empty queue admits one request whatever its size
    assert a.refused == 1


def test_a_passed_deadline_is_refused_and_counted() -> None:
    a = Admission(max_wait_seconds=0.25, threads=1)
    a.check_deadline(None)
    a.check_deadline(time.perf_counter() + 10)
    with pytest.raises(DeadlinePassedError):
        a.check_deadline(time.perf_counter() - 0.01)
    assert a.deadline_passed == 1


def test_small_requests_take_turns_with_a_large_one() -> None:
    # Fair order: a 256-text request queued first must not hold 20 single-text requests back.
    pool = SimpleNamespace(admission=Admission(max_wait_seconds=1, threads=1))
    from textsieve.service.telemetry import ServiceMetrics

    batcher = Batcher(SimpleNamespace(name="m", version=1), pool, ServiceMetrics(), max_texts=128, wait_ms=0)  # type: ignore[arg-type]
    loop = asyncio.new_event_loop()
    try:
        big = _Job(["x"] * 256, 0, loop.create_future(), 0.0, [None] * 256, 0, 256)
        small = [_Job(["y"], 0, loop.create_future(), 0.0, [None], 0, 1) for _ in range(20)]
        batcher._queue.extend([big, *small])
        first = batcher._take(128)
    finally:
        loop.close()
    taken: dict[int, int] = {}
    for p in first:
        taken[id(p.job)] = taken.get(id(p.job), 0) + p.hi - p.lo
    assert all(taken.get(id(j)) == 1 for j in small)  # every small request is in the first batch
    assert taken[id(big)] == 128 - 20 and sum(taken.values()) == 128
    assert QUANTUM < 128


@pytest.mark.anyio
async def test_a_deadline_that_passes_before_inference_is_answered_504(registry_path: Path) -> None:
    async with serving(settings_for(registry_path)) as (_, client):
        ok = await client.post("/v1/predict", json={"texts": ["hello"]}, headers={"Textsieve-Deadline": "60000"})
        assert ok.status_code == 200
        late = await client.post("/v1/predict", json={"texts": ["hello"]}, headers={"Textsieve-Deadline": "0.001"})
        assert late.status_code == 504, late.text
        assert late.json()["type"] == "/problems/deadline-passed"
        bad = await client.post("/v1/predict", json={"texts": ["hello"]}, headers={"Textsieve-Deadline": "soon"})
        assert bad.status_code == 422


def test_overload_is_refused_at_once_with_retry_after_and_nothing_is_lost(registry_path: Path, tmp_path: Path) -> None:
    # A tiny admitted wait and many large requests at once: some are refused (503, Retry-After),
    # every other one is answered in full; no other status appears.
    texts = [f"my order {i} arrived damaged and support never replied" for i in range(256)]
    with running_server(
        str(registry_path), tmp_path / "server.log", workers=1, inference="threads", queue_wait_ms=5
    ) as server:

        async def burst() -> list[httpx.Response]:
            limits = httpx.Limits(max_connections=64)
            async with httpx.AsyncClient(base_url=server.url, timeout=30, limits=limits) as c:
                return await asyncio.gather(*(c.post("/v1/predict", json={"texts": texts}) for _ in range(48)))

        replies = asyncio.run(burst())
        # Refused by the inference queue, or (the limit adapting to the 5 ms wait) before the app ran.
        refused_queue = refusals(server.url, "queue") + refusals(server.url, "requests")
        metrics = scraped(server.url)
    statuses = [r.status_code for r in replies]
    # Every refusal is in the HTTP family, the app's and the connection layer's alike.
    counted = sum(
        v
        for (name, labels), v in metrics.items()
        if name == "textsieve_http_requests_total"
        and ("status", "503") in labels
        and ("route", "/readyz") not in labels
    )  # /readyz answered 503 while the models loaded
    assert counted == statuses.count(503), metrics
    assert set(statuses) <= {200, 503}, statuses
    assert statuses.count(503) >= 1 and statuses.count(200) >= 1, statuses
    assert refused_queue == statuses.count(503)
    for r in replies:
        if r.status_code == 503:
            assert r.headers["retry-after"].isdigit()
            assert r.json()["type"] == "/problems/overloaded"
        else:
            assert len(r.json()["results"]) == 256


def test_the_request_limit_shrinks_when_slow_and_grows_when_full_and_fast() -> None:
    # Additive increase, multiplicative decrease (Jacobson, 1988), on the mean time in the app.
    from textsieve.service.web.transport import ConnectionGuard

    g = ConnectionGuard(max_connections=1000, read_timeout=15, target_seconds=0.25, min_requests=4, start_requests=200)
    assert g.limit == 200
    g.request_finished(0.26, now=1.0)  # a little slow: at least a tenth off
    assert g.limit == pytest.approx(200 * 0.9)
    g.request_finished(2.0, now=2.0)  # far too slow: halved at most
    assert g.limit == pytest.approx(200 * 0.9 * 0.5)
    for k in range(40):
        g.request_finished(0.8, now=3.0 + k)
    assert g.limit == 4  # never below the floor
    g.inflight = 4
    assert not g.request_may_start() and g.refused_requests == 1
    g.request_finished(0.01, now=100.0)  # in time, and the limit was reached: grows
    assert g.limit == 5
    g.request_finished(0.01, now=101.0)  # in time but not full: unchanged
    assert g.limit == 5
    g.inflight = 4
    assert g.request_may_start()


def test_a_client_that_half_closes_after_its_request_still_gets_the_reply(registry_path: Path, tmp_path: Path) -> None:
    """A client may shut its side for writing once its request is sent (RFC 9112 §9.6); uvicorn took
    that for a disconnect and wrote nothing. A request cut short still ends the connection at once."""
    body = b'{"texts": ["the chain came off twice"]}'
    pipelined = b"GET /healthz HTTP/1.1\r\nHost: t\r\n\r\nGET /readyz HTTP/1.1\r\nHost: t\r\n\r\n"
    with running_server(str(registry_path), tmp_path / "server.log", workers=1, inference="threads") as server:
        for name, raw, answers in (
            ("a whole prediction", _head(len(body)) + body, [200]),
            ("two pipelined requests", pipelined, [200, 200]),
            ("a body cut short", _head(len(body) + 10) + body, []),
        ):
            with _connect(server.port) as s:
                s.sendall(raw)
                s.shutdown(socket.SHUT_WR)
                started = time.monotonic()
                answer = _response(s, 10)
            statuses = [int(part.split(b" ", 1)[0]) for part in answer.split(b"HTTP/1.1 ")[1:]]
            assert statuses == answers, (name, answer[:300])
            assert time.monotonic() - started < 5, name  # closed once answered, not at the read deadline


@contextlib.contextmanager
def _guarded_uvicorn(guard: Any, seconds: float) -> Iterator[tuple[str, int]]:
    """A real uvicorn on loopback with ``guard``'s protocol, in front of an app that answers every
    request 200 ``{}`` after ``seconds`` (so a reply is still pending when what follows it is read)."""

    async def app(scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            return
        await asyncio.sleep(seconds)
        await send({"type": "http.response.start", "status": 200, "headers": [(b"content-length", b"2")]})
        await send({"type": "http.response.body", "body": b"{}"})

    with guarded_uvicorn(guard, app) as address:
        yield address


def _statuses_until_closed(address: tuple[str, int], data: bytes) -> tuple[list[int], bytes]:
    got = b""
    with socket.create_connection(address, timeout=10) as s:
        s.sendall(data)
        while chunk := s.recv(65536):
            got += chunk
    return [int(m) for m in re.findall(rb"HTTP/1\.1 (\d{3}) ", got)], got


_PROBE = b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n"


def test_a_pipelined_request_refused_by_the_request_limit_is_answered_after_the_requests_ahead() -> None:
    # RFC 9112 §9.3.2: replies in request order. A request refused 503 at its headers behind another
    # still being answered was refused at once and the connection closed: the reply ahead was lost
    # and the client read the 503 as its first request's reply. The replica is made full by hand
    # (probes are admitted whatever the count).
    from textsieve.service.web.transport import ConnectionGuard

    guard = ConnectionGuard(max_connections=8, read_timeout=5, min_requests=1, start_requests=1)
    guard.inflight = 1  # the limit (1) is reached
    with _guarded_uvicorn(guard, 0.2) as address:
        post = b"POST /v1/predict HTTP/1.1\r\nHost: x\r\nContent-Length: 2\r\n\r\n{}"
        statuses, got = _statuses_until_closed(address, _PROBE + post)
    assert statuses == [200, 503], got
    assert got.index(b"{}") < got.index(b"/problems/overloaded")  # the 503 is problem+json, after the 200
    assert guard.refused_requests == 1


@pytest.mark.parametrize("keep_alive", [True, False], ids=["kept alive", "closed"])
def test_a_head_refused_by_the_request_limit_gets_the_head_alone(keep_alive: bool) -> None:
    # RFC 9110 §9.3.2: a reply to HEAD has no content. The 503's problem+json body followed its head,
    # and on a kept-alive connection the client read those bytes as the start of its next reply
    # (found probing a real server, 2026-12-05). The next request, a probe, is admitted at the limit.
    from textsieve.service.web.transport import ConnectionGuard

    guard = ConnectionGuard(max_connections=8, read_timeout=5, min_requests=1, start_requests=1)
    guard.inflight = 1  # the limit (1) is reached
    head = b"HEAD /v1/models HTTP/1.1\r\nHost: x\r\n" + (b"" if keep_alive else b"Connection: close\r\n") + b"\r\n"
    after = b"GET /healthz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n" if keep_alive else b""
    with _guarded_uvicorn(guard, 0.0) as address:
        statuses, got = _statuses_until_closed(address, head + after)
    refusal, _, rest = got.partition(b"\r\n\r\n")
    assert statuses == ([503, 200] if keep_alive else [503]), got
    assert refusal.startswith(b"HTTP/1.1 503 ") and b"content-length: " in refusal.lower()
    # Nothing between the 503's head and the next reply (or the end): no body.
    assert rest.startswith(b"HTTP/1.1 200 ") if keep_alive else rest == b"", got
    assert guard.refused_requests == 1


def test_a_head_refused_by_the_connection_layer_gets_the_head_alone() -> None:
    # The same for the refusals that close the connection (here a fragment in the target: 400).
    from textsieve.service.web.transport import ConnectionGuard

    guard = ConnectionGuard(max_connections=8, read_timeout=5)
    with _guarded_uvicorn(guard, 0.0) as address:
        statuses, got = _statuses_until_closed(address, b"HEAD /healthz#x HTTP/1.1\r\nHost: x\r\n\r\n")
    assert statuses == [400] and got.endswith(b"\r\n\r\n") and got.count(b"\r\n\r\n") == 1, got


@pytest.mark.parametrize(
    ("line", "status"),
    [(b"FOO /healthz HTTP/1.1", 501), (b"\x16\x03\x01 not http", 400)],
    ids=["unknown method", "not a request line"],
)
@pytest.mark.parametrize("ahead", [b"HEAD", b"GET"])
def test_a_refusal_after_a_kept_alive_request_is_whole_and_booked_with_no_method(
    line: bytes, status: int, ahead: bytes
) -> None:
    # httptools goes on reporting the last request's method until the next request line is read: a
    # next line that could not be read was refused as if to that request, so after a HEAD the 501 or
    # 400 went out as a head alone (its Content-Length promising a body never sent: "peer closed
    # connection without sending complete message body", found by an audit, 2026-12-05), and either
    # was booked with the method of the request before.
    from textsieve.service.web.transport import ConnectionGuard

    booked: list[tuple[str, str, int]] = []

    class Booked:
        def answered(self, method: str, route: str, status: int, seconds: float) -> None:
            booked.append((method, route, status))

    guard = ConnectionGuard(max_connections=8, read_timeout=5)
    guard.metrics = Booked()
    with _guarded_uvicorn(guard, 0.0) as address, socket.create_connection(address, timeout=10) as s:
        s.sendall(ahead + b" /healthz HTTP/1.1\r\nHost: x\r\n\r\n")
        first = b""
        while not first.endswith(b"\r\n\r\n" if ahead == b"HEAD" else b"{}"):
            first += s.recv(65536)
        s.sendall(line + b"\r\nHost: x\r\n\r\n")  # in a read of its own
        got = b""
        while chunk := s.recv(65536):
            got += chunk
    head, _, body = got.partition(b"\r\n\r\n")
    assert head.startswith(b"HTTP/1.1 %d " % status), got
    length = int(re.search(rb"(?i)content-length: (\d+)", head).group(1))  # type: ignore[union-attr]
    assert length > 0 and len(body) == length and json.loads(body)["status"] == status
    assert booked == [("unknown", "unmatched", status)]


@pytest.mark.parametrize(
    ("target", "admitted"),
    [
        pytest.param(b"/healthz", True, id="origin form"),
        pytest.param(b"http://x/healthz", True, id="absolute form"),
        pytest.param(b"HTTP://x:80/readyz?verbose=1", True, id="absolute form, upper-case scheme, a port, a query"),
        pytest.param(b"/%6Detrics", True, id="a percent-encoded letter"),
        pytest.param(b"http://x/v1/models", False, id="absolute form, no probe"),
        pytest.param(b"/healthz%2F", False, id="an encoded slash: another path"),
    ],
)
def test_a_probe_is_admitted_at_the_request_limit_whatever_form_its_target_takes(target: bytes, admitted: bool) -> None:
    # Probes are never refused by the request limit (the access middleware never counts them). The
    # connection layer compared the raw target with "/healthz", so an absolute-form target (RFC 9112
    # §3.2.2: a server MUST accept it) or a percent-encoded letter (RFC 3986 §6.2.2.2: the same path),
    # routed to the probe all the same, was refused 503 at the limit (found reading the code, 2026-12-05).
    from textsieve.service.web.transport import ConnectionGuard

    guard = ConnectionGuard(max_connections=8, read_timeout=5, min_requests=1, start_requests=1)
    guard.inflight = 1  # the limit (1) is reached
    with _guarded_uvicorn(guard, 0.0) as address:
        statuses, got = _statuses_until_closed(
            address, b"GET " + target + b" HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n"
        )
    assert statuses == ([200] if admitted else [503]), got
    assert guard.refused_requests == (0 if admitted else 1)


@pytest.mark.parametrize(
    "stalled",
    [
        pytest.param(b"POST /x HTTP/1.1\r\nHost: x\r\nContent-Length: 10\r\n\r\n{}", id="its body"),
        pytest.param(b"POST /x HTTP/1.1\r\nHost: x\r\n", id="its head"),
    ],
)
def test_a_pipelined_request_that_stalls_past_the_read_deadline_is_answered_408_after_the_requests_ahead(
    stalled: bytes,
) -> None:
    # RFC 9112 §9.3.2, as above: the 408 was written at once, and the reply still pending was lost.
    from textsieve.service.web.transport import ConnectionGuard

    guard = ConnectionGuard(max_connections=8, read_timeout=0.3)
    with _guarded_uvicorn(guard, 0.8) as address:
        statuses, got = _statuses_until_closed(address, _PROBE + stalled)
    assert statuses == [200, 408], got
    assert guard.timed_out == 1 and b"/problems/request-timeout" in got.split(b"{}", 1)[1]
