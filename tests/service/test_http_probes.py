"""What real clients and attackers send, answered by a real ``textsieve serve`` on loopback.

Each case here was found by probing a running server with raw sockets and httpx; the probes that
were already answered well are listed in SECURITY.md ("Probed on the wire"). The references are
the RFCs each test names.
"""

from __future__ import annotations

import asyncio
import gzip
import json
import socket
import struct
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.helpers.net import wait_ready
from tests.helpers.servers import running_server
from tests.helpers.service import (
    ADMIN_TOKEN,
    AUTH,
    MODEL,
    REVIEW_AUTH,
    REVIEW_TOKEN,
    assert_problem,
    guarded_uvicorn,
    make_registry,
    settings_for,
)
from textsieve.registry import open_registry
from textsieve.service.inference.admission import CLIENT_LEFT
from textsieve.service.web.app import create_app
from textsieve.service.web.transport import ConnectionGuard


@pytest.fixture(scope="module")
def probed(tmp_path_factory: pytest.TempPathFactory, tiny_bundles: dict[str, Path]) -> Iterator[tuple[str, Path]]:
    """``textsieve serve`` with admin and reviewer tokens on a registry of its own (v1 live, v2 registered)."""
    folder = tmp_path_factory.mktemp("probed")
    registry = make_registry(folder / "registry", tiny_bundles)
    log = folder / "server.log"
    with running_server(str(registry), log, workers=1, admin_token=ADMIN_TOKEN, review_token=REVIEW_TOKEN) as server:
        yield server.url, registry


JSON = {"Content-Type": "application/json"}
_VERDICT = (
    b'{"model": "support", "version": 1, "text": "my card was charged twice", "predicted_label": "repair", '
    b'"predicted_probability": 0.5, "reviewer": "ann", '
)
# RFC 8259 §4: "The names within an object SHOULD be unique", and when they are not, "the behavior
# of software that receives such an object is unpredictable": one reader takes the first, another
# the last. A gateway, audit filter or log that reads the first "to" saw a promotion to candidate
# while the service (the last one wins in Python's and pydantic's readers) promoted to live.
DUPLICATES = [
    pytest.param(
        "/v1/predict",
        {},
        b'{"texts": ["my card was charged twice"], "texts": ["the brake is broken"]}',
        "texts",
        id="predict: texts twice",
    ),
    pytest.param(
        "/v1/predict",
        {},
        b'{"texts": ["my card was charged twice"], "spans": 1, "sp\\u0061ns": 0}',
        "spans",
        id="predict: spans twice, once written with an escape",
    ),
    pytest.param(
        f"/v1/models/{MODEL}/versions/2/promote",
        AUTH,
        b'{"to": "candidate", "reason": "probe", "to": "live", "force": true}',
        "to",
        id="promote: to twice",
    ),
    pytest.param(
        f"/v1/models/{MODEL}/rollback",
        AUTH,
        b'{"reason": "first", "reason": "second"}',
        "reason",
        id="rollback: reason twice",
    ),
    pytest.param(
        "/v1/verdicts",
        REVIEW_AUTH,
        _VERDICT + b'"verdict_label": "billing", "verdict_label": "repair"}',
        "verdict_label",
        id="verdicts: verdict_label twice",
    ),
]


def _states(registry: Path) -> list[tuple[int, str]]:
    with open_registry(registry) as reg:
        return [(v.version, v.state) for v in reg.versions(MODEL)]


def _verdicts(registry: Path) -> int:
    with open_registry(registry) as reg:
        return len(reg.verdicts.of(MODEL))


@pytest.mark.parametrize("chunked", [False, True], ids=["Content-Length", "chunked"])
@pytest.mark.parametrize(("path", "auth", "body", "name"), DUPLICATES)
def test_a_member_name_given_twice_is_refused_naming_it_and_changes_nothing(
    probed: tuple[str, Path], path: str, auth: dict[str, str], body: bytes, name: str, chunked: bool
) -> None:
    url, registry = probed
    before = (_states(registry), _verdicts(registry))
    content: Any = iter([body[:10], body[10:]]) if chunked else body
    r = httpx.post(url + path, content=content, headers={**JSON, **auth}, timeout=30)
    problem = assert_problem(r, 422, "invalid-input")
    assert problem["errors"][0] == {
        "field": name,
        "message": problem["errors"][0]["message"],
        "type": "json_duplicate_name",
    }
    assert f"'{name}' more than once" in problem["detail"] and "once" in problem["errors"][0]["message"]
    assert (_states(registry), _verdicts(registry)) == before


def test_names_and_escapes_inside_texts_are_not_taken_for_repeated_members(probed: tuple[str, Path]) -> None:
    """The fast lane hands a body that may repeat a name to the full app; texts that hold a member
    name in quotes, or an escaped letter, are still answered, as the same texts sent plainly are."""
    url, _ = probed
    texts = ['"texts" and "model" in quotes', "model", "an escaped letter: \\u0061", "spans"]
    tricky = json.dumps({"texts": texts, "model": MODEL, "spans": 2}).encode()
    assert tricky.count(b'"model"') == 2 and b"\\\\u0061" in tricky
    escaped = b'{"texts": ["my card was charged twice"], "m\\u006fdel": "support"}'
    with httpx.Client(base_url=url, headers=JSON, timeout=30) as client:
        r = client.post("/v1/predict", content=tricky)
        assert r.status_code == 200, r.text
        assert [len(x["spans"]) <= 2 for x in r.json()["results"]] == [True] * 4
        alone = [client.post("/v1/predict", json={"texts": [t], "spans": 2}).json()["results"][0] for t in texts]
        assert r.json()["results"] == alone
        r = client.post("/v1/predict", content=escaped)
        assert r.status_code == 200, r.text
        assert r.json()["model"] == MODEL


# -- the connection: replies in the order the requests came ---------------------------------------
_BODY = b'{"texts": ["my card was charged twice"]}'
_PREDICT = b"POST /v1/predict HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
_FRAMED = _PREDICT + b"Content-Length: %d\r\n\r\n" % len(_BODY) + _BODY


def _replies_until_closed(url: str, data: bytes, *, half_close: bool = False) -> list[tuple[int, dict[str, Any]]]:
    """Send ``data`` on one connection and read every reply (status, JSON body) until the server closes it."""
    host, port = url.removeprefix("http://").split(":")
    got = b""
    with socket.create_connection((host, int(port)), timeout=20) as s:
        s.sendall(data)
        if half_close:
            s.shutdown(socket.SHUT_WR)
        while chunk := s.recv(65536):
            got += chunk
    replies = []
    while got:
        head, sep, rest = got.partition(b"\r\n\r\n")
        assert sep, got
        lines = head.decode("latin-1").split("\r\n")
        fields = dict(line.lower().split(": ", 1) for line in lines[1:])
        status = int(lines[0].split(" ")[1])
        length = int(fields["content-length"]) if status >= 200 else 0  # an interim reply is a head alone
        replies.append((status, json.loads(rest[:length]) if length else {}))
        got = rest[length:]
    return replies


# RFC 9112 §9.3.2: a server MUST send its responses in the order the requests were received. A
# request the parser refuses (400) after others in the same read was answered at once and the
# connection closed: the replies of the requests before it were lost, and the client took the 400
# (or a 501 "unknown method", judged from the first request's line) for the reply to its first request.
ORDERED = [
    pytest.param(_FRAMED + b"\x01garbage\r\n\r\n", [200, 400], id="a prediction, then bytes that are no request"),
    pytest.param(
        b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\nGET /healthz HTTP/1.1\r\nHost: x\r\nBad Name: x\r\n\r\n",
        [200, 400],
        id="a probe, then a header name with a space",
    ),
    pytest.param(
        _FRAMED + _FRAMED + b"GET /healthz HTTP/1.1\r\nHost: x\r\nX: \x01\r\n\r\n",
        [200, 200, 400],
        id="two predictions pipelined, then a control byte in a header",
    ),
    # RFC 9112 §6.3: a request with neither Content-Length nor Transfer-Encoding has no body; the JSON
    # a client sent after it anyway is the next "request". The first is answered (the body is missing),
    # then the rest is refused as malformed, not as an unknown method.
    pytest.param(_PREDICT + b"\r\n" + _BODY, [422, 400], id="a body sent without Content-Length"),
]


@pytest.mark.parametrize("half_close", [False, True], ids=["open", "half-closed after sending"])
@pytest.mark.parametrize(("data", "statuses"), ORDERED)
def test_a_malformed_request_is_refused_after_the_replies_to_the_requests_before_it(
    probed: tuple[str, Path], data: bytes, statuses: list[int], half_close: bool
) -> None:
    replies = _replies_until_closed(probed[0], data, half_close=half_close)
    assert [status for status, _ in replies] == statuses
    for status, body in replies:
        if status == 200:
            assert body == {"status": "alive"} or (body["model"] == MODEL and body["results"][0]["label"])
        else:
            assert body["status"] == status and body["detail"]
    assert replies[-1][1]["type"] == "/problems/malformed-request"
    if statuses[0] == 422:
        assert "the body is missing" in replies[0][1]["detail"]


def test_a_lone_malformed_request_and_an_unknown_method_are_refused_as_before(probed: tuple[str, Path]) -> None:
    assert [s for s, _ in _replies_until_closed(probed[0], b"\x01garbage\r\n\r\n")] == [400]
    (reply,) = _replies_until_closed(probed[0], b"BREW /v1/predict HTTP/1.1\r\nHost: x\r\n\r\n")
    assert reply[0] == 501 and reply[1]["type"] == "/problems/unknown-method"


# -- percent-encoded slashes ------------------------------------------------------------------------
_CLOSE = b"Host: x\r\nConnection: close\r\n"


@pytest.mark.parametrize(
    ("request_bytes", "status", "slug", "named"),
    [
        pytest.param(
            b"GET /v1/models/support/versions/1%2Fcard HTTP/1.1\r\n" + _CLOSE + b"\r\n",
            422,
            "invalid-input",
            "bad version '1%2Fcard'",
            id="a version segment holding a slash (was the card)",
        ),
        pytest.param(
            b"GET /v1/models/support%2fversions HTTP/1.1\r\n" + _CLOSE + b"\r\n",
            422,
            "invalid-input",
            "bad model name 'support%2Fversions'",
            id="lower-case %2f in a model name (was the version list)",
        ),
        pytest.param(
            _PREDICT.replace(b"/v1/predict", b"/v1%2Fpredict")
            + b"Connection: close\r\nContent-Length: %d\r\n\r\n" % len(_BODY)
            + _BODY,
            404,
            "not-found",
            "no such path: POST /v1%2Fpredict",
            id="predict's path with its slash encoded (was a prediction, through the lane)",
        ),
        pytest.param(
            b"POST /v1/models/support/versions/2%2Fpromote HTTP/1.1\r\n"
            + _CLOSE
            + b'Content-Type: application/json\r\nContent-Length: 30\r\n\r\n{"to":"live","reason":"probe"}',
            405,
            "method-not-allowed",
            "/v1/models/support/versions/2%2Fpromote answers GET, HEAD, OPTIONS only",
            id="an admin route spelt with an encoded slash: a version view (was the admin route: 401)",
        ),
    ],
)
def test_an_encoded_slash_is_data_in_its_segment_not_a_separator(
    probed: tuple[str, Path], request_bytes: bytes, status: int, slug: str, named: str
) -> None:
    # RFC 3986 §2.2: "URIs that differ in the replacement of a reserved character with its corresponding
    # percent-encoded octet are not equivalent": %2F is data inside a segment. uvicorn decoded it to "/"
    # before routing, so these reached a route that a proxy, filter or log in front, reading the path as
    # written, took for another resource (found probing, 2026-12-05).
    ((got, body),) = _replies_until_closed(probed[0], request_bytes)
    assert got == status and body["type"] == f"/problems/{slug}"
    assert named in body["detail"]


def test_other_percent_encodings_in_a_path_are_still_decoded(probed: tuple[str, Path]) -> None:
    # RFC 3986 §6.2.2.2: percent-encoded unreserved characters are equivalent to the characters.
    ((status, body),) = _replies_until_closed(
        probed[0], b"GET /v1/models/%73upport/versions/%31 HTTP/1.1\r\n" + _CLOSE + b"\r\n"
    )
    assert status == 200 and body["model"] == MODEL and body["version"] == 1


# -- clients that reset the connection ------------------------------------------------------------
def test_a_client_resetting_while_a_pipelined_reply_is_pending_costs_no_error() -> None:
    # Found probing `textsieve serve` (2026-12-05): twenty GETs of an evaluation report pipelined on one
    # connection by a client that reads nothing and then resets it (SO_LINGER 0, then close) logged
    # uvicorn's "Exception in ASGI application" and the app's "unhandled error", each with a traceback
    # (RuntimeError: the uvloop transport is closed), for predictions as for views. uvicorn tells only
    # the last request read that the client is gone; the one being answered ahead of it, started when
    # the reply before it was buffered, wrote its reply to the closed transport. Here the first reply
    # (4 MiB) fills the buffers, the second request waits until after the reset, a third is queued.
    big = b"x" * (4 << 20)
    seen: dict[str, str] = {}

    async def app(scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            return
        path = scope["path"]
        body = big if path == "/big" else b"{}"
        try:
            if path == "/slow":
                await asyncio.sleep(0.4)  # the client resets at 0.1 s
                await receive()  # the request's (empty) body
                seen["told"] = (await asyncio.wait_for(receive(), 2))["type"]
            start = {"type": "http.response.start", "status": 200, "headers": [(b"content-length", b"%d" % len(body))]}
            await send(start)
            await send({"type": "http.response.body", "body": body})
            seen[path] = "sent"
        except Exception as exc:  # noqa: BLE001 - what the server would log with a traceback
            seen[path] = repr(exc)

    guard = ConnectionGuard(max_connections=8, read_timeout=5)
    with guarded_uvicorn(guard, app) as address:
        s = socket.socket()
        s.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
        s.connect(address)
        s.sendall(b"".join(b"GET /%s HTTP/1.1\r\nHost: x\r\n\r\n" % p for p in (b"big", b"slow", b"next")))
        time.sleep(0.1)
        s.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
        s.close()
        deadline = time.monotonic() + 5
        while "/slow" not in seen and time.monotonic() < deadline:
            time.sleep(0.05)
        # The request being answered learns that its client is gone, its reply goes nowhere quietly, and
        # the request queued behind it never runs.
        assert seen == {"/big": "sent", "told": "http.disconnect", "/slow": "sent"}
        with socket.create_connection(address, timeout=5) as again:  # the server answers on
            again.sendall(b"GET /next HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
            assert again.recv(65536).startswith(b"HTTP/1.1 200 ")
    assert guard.open == 0


# -- a prediction whose client left before its reply --------------------------------------------------
def _predictions_booked(url: str) -> dict[str, float]:
    """``textsieve_http_requests_total`` of POST /v1/predict by status, from /metrics."""
    booked: dict[str, float] = {}
    for line in httpx.get(f"{url}/metrics", timeout=10).text.splitlines():
        prefix = 'textsieve_http_requests_total{method="POST",route="/v1/predict",status="'
        if line.startswith(prefix):
            status, _, count = line[len(prefix) :].partition('"} ')
            booked[status] = float(count)
    return booked


@pytest.mark.parametrize(
    ("inference", "content_type"),
    [
        pytest.param("threads", b"application/json", id="threads, the predict lane"),
        pytest.param("threads", b"application/json;charset=utf-8", id="threads, the full app"),
        pytest.param("processes", b"application/json", id="processes, the predict lane"),
    ],
)
def test_a_prediction_whose_client_left_before_its_reply_is_booked_499(
    tmp_path: Path, tiny_bundles: dict[str, Path], monkeypatch: pytest.MonkeyPatch, inference: str, content_type: bytes
) -> None:
    # Found probing `textsieve serve` (2026-12-05): a client that sent a whole 256-text prediction and
    # reset the connection 5 ms later (SO_LINGER 0, then close) was booked 200 in the access log and
    # metrics 30 ms later, when its batch was done and uvicorn dropped the reply it could not write;
    # the reset was not even seen before then, since uvicorn stops reading past 64 KiB of body and
    # only the reply resumed it. Here the request's batch is held until the server has seen the reset.
    from textsieve.service.inference.batcher import Batcher

    computing, release = threading.Event(), threading.Event()
    if inference == "threads":
        work = Batcher._work

        def held(self: Batcher, texts: list[str], ks: list[int]) -> Any:
            computing.set()
            release.wait(20)
            return work(self, texts, ks)

        monkeypatch.setattr(Batcher, "_work", held)
    else:
        work_in_process = Batcher._work_in_process

        async def held_async(self: Batcher, texts: list[str], ks: list[int]) -> Any:
            computing.set()
            await asyncio.to_thread(release.wait, 20)
            return await work_in_process(self, texts, ks)

        monkeypatch.setattr(Batcher, "_work_in_process", held_async)
    registry = make_registry(tmp_path / "registry", tiny_bundles)
    app = create_app(settings_for(registry, inference=inference, workers=1))
    guard = app.state.guard
    with guarded_uvicorn(guard, app, lifespan="on") as (host, port):
        url = f"http://{host}:{port}"
        wait_ready(url)
        # Over uvicorn's 64 KiB body buffer, past which it stops reading the connection.
        body = json.dumps({"texts": ["my card was charged twice and the brake is broken " * 36] * 256}).encode()
        assert len(body) > 7 * 64 * 1024
        s = socket.socket()
        s.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
        s.connect((host, port))
        s.sendall(
            b"POST /v1/predict HTTP/1.1\r\nHost: x\r\nContent-Type: %s\r\nContent-Length: %d\r\n\r\n%s"
            % (content_type, len(body), body)
        )
        assert computing.wait(20)  # the whole request is in, its batch is computing
        s.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
        s.close()
        deadline = time.monotonic() + 10
        while guard.open > 0 and time.monotonic() < deadline:  # the server has seen the reset
            time.sleep(0.01)
        release.set()
        while not _predictions_booked(url) and time.monotonic() < deadline:
            time.sleep(0.02)
        # Its reply went nowhere: booked as a client that closed its request, not as the 200 nobody got.
        assert _predictions_booked(url) == {"499": 1.0}
        r = httpx.post(f"{url}/v1/predict", content=body, headers={"Content-Type": content_type.decode()}, timeout=20)
        assert r.status_code == 200  # a client that waits for its reply gets it, and is booked 200
        assert _predictions_booked(url) == {"499": 1.0, "200": 1.0}


class _Transport(asyncio.Transport):
    """A connection's transport that records whether the protocol is reading from it."""

    def __init__(self) -> None:
        super().__init__()
        self.reading = True
        self.written = bytearray()

    def get_extra_info(self, name: str, default: Any = None) -> Any:
        return default

    def pause_reading(self) -> None:
        self.reading = False

    def resume_reading(self) -> None:
        self.reading = True

    def write(self, data: Any) -> None:
        self.written += data

    def is_closing(self) -> bool:
        return False

    def close(self) -> None:
        pass


@pytest.mark.parametrize("size", [100 * 1024, 1024], ids=["a body past 64 KiB", "a small body"])
def test_the_connection_is_read_again_once_a_request_body_is_whole(size: int) -> None:
    # uvicorn stops reading a connection while more than 64 KiB of a request's body waits for the app,
    # and only its reply resumed it: until then a reset (or a close) went unseen, the request was
    # computed for nobody and booked as answered (the test above has the whole story on a real server).
    import uvicorn
    from uvicorn.server import ServerState

    started: list[dict[str, Any]] = []

    async def app(scope: dict[str, Any], receive: Any, send: Any) -> None:
        started.append(scope)
        await asyncio.sleep(10)

    async def one_read() -> tuple[bool, bool]:
        guard = ConnectionGuard(max_connections=8, read_timeout=5)
        config = uvicorn.Config(app, http=guard.protocol(), ws="none", lifespan="off", log_level="critical")
        config.load()
        protocol = config.http_protocol_class(config=config, server_state=ServerState(), app_state={})
        transport = _Transport()
        protocol.connection_made(transport)
        body = b"x" * size
        protocol.data_received(b"POST /v1/predict HTTP/1.1\r\nHost: x\r\nContent-Length: %d\r\n\r\n%s" % (size, body))
        await asyncio.sleep(0)  # the request's task starts
        reading = transport.reading
        protocol.data_received(b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n")  # pipelined behind it
        queued_pauses = not transport.reading
        protocol.connection_lost(None)
        await asyncio.sleep(0)
        return reading, queued_pauses

    reading, queued_pauses = asyncio.run(one_read())
    assert len(started) == 1
    assert reading  # a reset or close is seen while the request is answered
    assert queued_pauses  # a request pipelined behind it still stops reading until its turn (uvicorn)
    assert started[0].get(CLIENT_LEFT) is True  # and a client gone before its reply is marked


# -- header lines given more than once --------------------------------------------------------------
@pytest.mark.parametrize("compressed", [True, False], ids=["gzip body", "plain body declared gzip"])
@pytest.mark.parametrize(
    ("path", "auth"), [("/v1/predict", {}), ("/v1/verdicts", REVIEW_AUTH)], ids=["predict", "verdicts"]
)
def test_a_content_coding_on_a_second_header_line_is_refused_as_on_the_first(
    probed: tuple[str, Path], path: str, auth: dict[str, str], compressed: bool
) -> None:
    # RFC 9110 §5.3: field lines of one name combine, in order, into one comma-separated list, so
    # "identity" then "gzip" is "identity, gzip": a gzip body. Only the first line was read, and such
    # a body was parsed as if it were the JSON itself (422 "not UTF-8", or 200 for JSON declared gzip).
    body = json.dumps({"texts": ["my card was charged twice"]}).encode()
    content = gzip.compress(body) if compressed else body
    headers = [*JSON.items(), *auth.items(), ("Content-Encoding", "identity"), ("Content-Encoding", "gzip")]
    r = httpx.post(probed[0] + path, content=content, headers=headers, timeout=30)
    problem = assert_problem(r, 415, "unsupported-content-encoding")
    assert "'identity, gzip'" in problem["detail"] and r.headers["accept-encoding"] == "identity"
    twice = [*JSON.items(), ("Content-Encoding", "identity"), ("Content-Encoding", "identity")]
    assert httpx.post(probed[0] + "/v1/predict", content=body, headers=twice, timeout=30).status_code == 200


_WRONG = "Bearer " + "w" * 27


@pytest.mark.parametrize(
    "lines",
    [
        pytest.param([_WRONG, "Bearer {token}"], id="a wrong token, then the right one"),
        pytest.param(["Bearer {token}", _WRONG], id="the right token, then a wrong one"),
        pytest.param(["Bearer {token}", "Bearer {token}"], id="the right token twice"),
    ],
)
@pytest.mark.parametrize(
    ("path", "token", "slug"),
    [
        pytest.param(f"/v1/models/{MODEL}/rollback", ADMIN_TOKEN, "unauthorized", id="rollback"),
        pytest.param("/v1/verdicts", REVIEW_TOKEN, "reviewer-unauthorized", id="verdicts"),
    ],
)
def test_an_authorization_header_given_on_two_lines_is_refused_whichever_holds_the_token(
    probed: tuple[str, Path], path: str, token: str, slug: str, lines: list[str]
) -> None:
    # RFC 9110 §11.6.2: Authorization holds one set of credentials; RFC 6750 §3.1 calls a request that
    # repeats them malformed. Only the first line was read, so a request whose proxy, log or audit
    # filter reads the last line was judged on other credentials than the service's (CWE-436).
    url, registry = probed
    before = (_states(registry), _verdicts(registry))
    headers = [*JSON.items(), *(("Authorization", line.format(token=token)) for line in lines)]
    r = httpx.post(url + path, content=b'{"reason": "probe"}', headers=headers, timeout=30)
    problem = assert_problem(r, 401, slug)
    assert "2 Authorization header lines" in problem["detail"] and "one" in problem["detail"]
    assert r.headers["www-authenticate"].startswith("Bearer") and token not in r.text
    assert (_states(registry), _verdicts(registry)) == before


def test_an_http_1_0_request_that_expects_100_continue_gets_no_interim_reply(probed: tuple[str, Path]) -> None:
    # RFC 9110 §10.1.1: a server MUST ignore a 100-continue expectation in an HTTP/1.0 request, and
    # §15.2: it MUST NOT send a 1xx response to an HTTP/1.0 client, which reads the first status line
    # it gets as the reply. It got "100 Continue" and took that for the answer to its prediction.
    request = b"POST /v1/predict HTTP/1.0\r\nContent-Type: application/json\r\nExpect: 100-continue\r\n"
    replies = _replies_until_closed(probed[0], request + b"Content-Length: %d\r\n\r\n" % len(_BODY) + _BODY)
    assert [status for status, _ in replies] == [200] and replies[0][1]["model"] == MODEL
    # HTTP/1.1 keeps its interim reply (RFC 9110 §15.2.1), sent before the final one.
    host, port = probed[0].removeprefix("http://").split(":")
    with socket.create_connection((host, int(port)), timeout=20) as s:
        s.sendall(_PREDICT + b"Expect: 100-continue\r\nContent-Length: %d\r\n\r\n" % len(_BODY))
        assert s.recv(100) == b"HTTP/1.1 100 Continue\r\n\r\n"


# RFC 9112 §3.2: a server MUST answer 400 to an HTTP/1.1 request whose Host is not a valid field value:
# RFC 3986 §3.2.2's host (a name, an IPv4 address or a bracketed IP literal) with an optional port.
@pytest.mark.parametrize(
    ("host", "status"),
    [
        pytest.param(b"a b", 400, id="a space"),
        pytest.param(b"x/y", 400, id="a path"),
        pytest.param(b"user@x", 400, id="userinfo"),
        pytest.param(b"x:80:90", 400, id="two ports"),
        pytest.param(b"x:http", 400, id="a port that is no number"),
        pytest.param(b"x\x7f", 400, id="DEL"),
        pytest.param(b"x", 200, id="a name"),
        pytest.param(b"svc_1.example:8000", 200, id="a name and port"),
        pytest.param(b"127.0.0.1:8000", 200, id="IPv4 and port"),
        pytest.param(b"[::1]:8000", 200, id="IPv6 literal and port"),
        pytest.param(b"", 200, id="empty (allowed when the target has no authority)"),
    ],
)
def test_a_host_that_is_no_host_is_refused_400(probed: tuple[str, Path], host: bytes, status: int) -> None:
    replies = _replies_until_closed(
        probed[0], b"GET /healthz HTTP/1.1\r\nHost: " + host + b"\r\nConnection: close\r\n\r\n"
    )
    assert [s for s, _ in replies] == [status]
    if status == 400:
        assert replies[0][1]["type"] == "/problems/malformed-request" and "Host" in replies[0][1]["detail"]


@pytest.mark.parametrize(
    "types",
    [
        pytest.param(["text/plain", "application/json"], id="text/plain, then JSON"),
        pytest.param(["application/json", "text/plain"], id="JSON, then text/plain"),
        pytest.param(["application/json", "application/json"], id="JSON twice"),
    ],
)
@pytest.mark.parametrize(
    ("path", "auth", "body"),
    [
        pytest.param("/v1/predict", {}, _BODY, id="predict"),
        pytest.param("/v1/verdicts", REVIEW_AUTH, _VERDICT + b'"verdict_label": "billing"}', id="verdicts"),
    ],
)
def test_a_content_type_given_on_two_lines_is_refused_naming_both(
    probed: tuple[str, Path], path: str, auth: dict[str, str], body: bytes, types: list[str]
) -> None:
    # RFC 9110 §8.3: Content-Type holds one media type. Only the first line was read: a filter in front
    # that reads the last one saw text/plain (and skipped its JSON checks) where the service read JSON.
    url, registry = probed
    before = _verdicts(registry)
    headers = [*auth.items(), *(("Content-Type", t) for t in types)]
    r = httpx.post(url + path, content=body, headers=headers, timeout=30)
    problem = assert_problem(r, 422, "invalid-input")
    assert problem["errors"][0]["field"] == "Content-Type"
    assert "2 Content-Type header lines" in problem["detail"] and all(repr(t) in problem["detail"] for t in types)
    assert "Content-Type: application/json" in problem["detail"] and _verdicts(registry) == before
    r = httpx.post(url + path, content=body, headers=[("Content-Type", "text/plain"), ("Content-Type", "x/y")])
    assert r.status_code == (422 if not auth else 401)  # the token still comes first


# -- the worker processes under concurrent large requests ------------------------------------------
def test_concurrent_large_requests_never_lose_a_worker(tmp_path: Path, tiny_bundles: dict[str, Path]) -> None:
    """Under ``textsieve serve`` the event loop is uvloop, whose add_reader makes the worker pipe's
    socket non-blocking (libuv's uv_poll_init does). A batch sent into a full pipe then failed with
    EAGAIN, part written, and was taken for a dead worker: the worker was killed and replaced and
    its requests answered 503 "an inference worker stopped" (four concurrent 256-text requests were
    enough). Every request here is admitted (a long queue wait), so each must be answered 200."""
    import asyncio

    registry = make_registry(tmp_path / "registry", tiny_bundles)
    text = "my card was charged twice and the brake is broken, the chain is flat again today " * 20
    large = json.dumps({"texts": [text] * 256, "spans": 20}).encode()  # over 64 KiB: sent from a thread
    small = json.dumps({"texts": [text] * 16, "spans": 20}).encode()  # under it: sent from the loop
    with running_server(str(registry), tmp_path / "server.log", workers=2, queue_wait_ms=60_000) as server:

        async def burst(body: bytes, n: int) -> list[str]:
            async with httpx.AsyncClient(base_url=server.url, headers=JSON, timeout=120) as client:
                replies = await asyncio.gather(*(client.post("/v1/predict", content=body) for _ in range(n)))
            return ["200" if r.status_code == 200 else f"{r.status_code} {r.text[:200]}" for r in replies]

        for _ in range(3):
            assert asyncio.run(burst(large, 4)) == ["200"] * 4
            assert asyncio.run(burst(small, 24)) == ["200"] * 24
        assert "stopped" not in server.output()


# -- framing an HTTP/1.0 request cannot have, and a method asking for a tunnel ---------------------
def test_an_http_1_0_request_with_a_transfer_coding_is_refused_400_and_closed(probed: tuple[str, Path]) -> None:
    # RFC 9112 §6.1: a server that receives a request message with a transfer coding in HTTP/1.0 "MUST
    # treat it as if the framing is faulty" and close the connection. It was read as chunked and
    # answered 200, so a proxy in front that reads HTTP/1.0 framing (no chunking) saw another body.
    chunked = b"%x\r\n%s\r\n0\r\n\r\n" % (len(_BODY), _BODY)
    request = b"POST /v1/predict HTTP/1.0\r\nContent-Type: application/json\r\nTransfer-Encoding: chunked\r\n\r\n"
    ((status, body),) = _replies_until_closed(probed[0], request + chunked)
    assert status == 400 and body["type"] == "/problems/malformed-request"
    assert "HTTP/1.0" in body["detail"] and "Transfer-Encoding" in body["detail"]
    assert "Content-Length" in body["detail"]  # what is allowed instead
    # The same body framed by Content-Length is read as before.
    framed = b"POST /v1/predict HTTP/1.0\r\nContent-Type: application/json\r\nContent-Length: %d\r\n\r\n" % len(_BODY)
    ((status, body),) = _replies_until_closed(probed[0], framed + _BODY)
    assert status == 200 and body["model"] == MODEL


def test_connect_is_answered_501_as_a_method_this_origin_server_does_not_implement(probed: tuple[str, Path]) -> None:
    # RFC 9110 §9.3.6: CONNECT asks a proxy for a tunnel, and "most origin servers do not implement
    # CONNECT"; §9.1: a method the origin server does not implement SHOULD be answered 501. (405 would
    # need an Allow for the target, and an authority-form target names no resource here.) It was a 400
    # "not valid HTTP", though the code's comment promised a 405.
    ((status, body),) = _replies_until_closed(probed[0], b"CONNECT x:443 HTTP/1.1\r\nHost: x:443\r\n\r\n")
    assert status == 501 and body["type"] == "/problems/unknown-method"
    assert "CONNECT" in body["detail"] and "GET, HEAD, POST and OPTIONS" in body["detail"]


# -- OPTIONS and absolute-form targets ---------------------------------------------------------------
def _replies_with_heads(url: str, data: bytes) -> list[tuple[int, dict[str, str], bytes]]:
    """Send ``data`` (its last request saying ``Connection: close``) and read each reply's status,
    header fields and body until the server closes the connection (no HEAD: its replies have no body)."""
    host, port = url.removeprefix("http://").split(":")
    got = b""
    with socket.create_connection((host, int(port)), timeout=20) as s:
        s.sendall(data)
        while chunk := s.recv(65536):
            got += chunk
    replies = []
    while got:
        head, sep, rest = got.partition(b"\r\n\r\n")
        assert sep, got
        lines = head.decode("latin-1").split("\r\n")
        fields = {name.lower(): value for name, value in (line.split(": ", 1) for line in lines[1:])}
        length = int(fields.get("content-length", "0"))
        replies.append((int(lines[0].split(" ")[1]), fields, rest[:length]))
        got = rest[length:]
    return replies


def _check_options_replies(replies: list[tuple[int, dict[str, str], bytes]]) -> None:
    for status, fields, body in replies:
        if status == 204:
            assert body == b"" and "content-length" not in fields and "content-type" not in fields
            assert not [name for name in fields if name.startswith("access-control-")]


def test_options_names_the_methods_of_a_path_and_options_star_those_of_the_server(probed: tuple[str, Path]) -> None:
    # RFC 9110 §9.3.7: OPTIONS asks for the target's communication options (Allow); "OPTIONS *" (RFC 9112
    # §3.2.4) for the server's as a whole. Both were refused: 405 on a path, 404 ("no such path") for "*".
    # The replies follow on one connection, so the 204s are framed as having no content (RFC 9110 §8.6).
    host = b"Host: x\r\n"
    data = (
        b"OPTIONS * HTTP/1.1\r\n" + host + b"\r\n"
        b"OPTIONS /readyz HTTP/1.1\r\n" + host + b"\r\n"
        b"GET /healthz HTTP/1.1\r\n" + host + b"\r\n"
        b"OPTIONS /v1/predict HTTP/1.1\r\n" + host + b"Connection: close\r\n\r\n"
    )
    replies = _replies_with_heads(probed[0], data)
    assert [(status, fields.get("allow")) for status, fields, _ in replies] == [
        (204, "GET, HEAD, POST, OPTIONS"),
        (204, "GET, HEAD, OPTIONS"),
        (200, None),
        (204, "POST, OPTIONS"),
    ]
    assert json.loads(replies[2][2]) == {"status": "alive"}
    _check_options_replies(replies)


def test_an_absolute_form_target_without_a_path_is_read_as_the_root(probed: tuple[str, Path]) -> None:
    # RFC 9112 §3.2.2: a server MUST accept the absolute form; RFC 9110 §4.2.3 reads an empty path as
    # "/", and RFC 9112 §3.2.4 an OPTIONS target with an empty path and no query as "*". "GET http://x"
    # was a 400 "not valid HTTP", with uvicorn's warning in the log.
    host = b"Host: x\r\n"
    data = (
        b"GET http://x:80 HTTP/1.1\r\n" + host + b"\r\n"
        b"GET http://x?q=1 HTTP/1.1\r\n" + host + b"\r\n"
        b"OPTIONS http://x HTTP/1.1\r\n" + host + b"\r\n"
        b"OPTIONS http://x?q HTTP/1.1\r\n" + host + b"Connection: close\r\n\r\n"
    )
    replies = _replies_with_heads(probed[0], data)
    assert [(status, fields.get("allow")) for status, fields, _ in replies] == [
        (200, None),
        (200, None),
        (204, "GET, HEAD, POST, OPTIONS"),
        (204, "GET, HEAD, OPTIONS"),  # with a query, the target is the page at "/"
    ]
    for _, fields, body in replies[:2]:
        assert fields["content-type"].startswith("text/html") and b"textsieve" in body
    _check_options_replies(replies)


def _first_reply(url: str, head: bytes) -> tuple[int, dict[str, Any]]:
    """Send a request's head alone (its body held back, as a client that expects 100-continue does)
    and read the first reply: an interim 100 is returned as it is, with an empty body."""
    host, port = url.removeprefix("http://").split(":")
    got = b""
    with socket.create_connection((host, int(port)), timeout=10) as s:
        s.sendall(head)
        while b"\r\n\r\n" not in got and (chunk := s.recv(65536)):
            got += chunk
        if got.startswith(b"HTTP/1.1 100 "):
            return 100, {}
        while chunk := s.recv(65536):  # a refusal closes the connection: its body is never read
            got += chunk
    return _replies_from(got)[0]


def _replies_from(got: bytes) -> list[tuple[int, dict[str, Any]]]:
    replies = []
    while got:
        head, _, rest = got.partition(b"\r\n\r\n")
        lines = head.decode("latin-1").split("\r\n")
        fields = dict(line.lower().split(": ", 1) for line in lines[1:])
        length = int(fields["content-length"])
        replies.append((int(lines[0].split(" ")[1]), json.loads(rest[:length]) if length else {}))
        got = rest[length:]
    return replies


_EXPECT = b"Expect: 100-continue\r\nHost: x\r\n"


# RFC 9110 §10.1.1: a server that receives 100-continue may answer with a final status instead of
# 100 when the request's headers already decide it, so the client does not send the body for nothing.
@pytest.mark.parametrize(
    ("head", "status", "field"),
    [
        pytest.param(
            b"POST /v1/predict?model=x HTTP/1.1\r\nContent-Type: application/json\r\n",
            422,
            "query",
            id="a query string",
        ),
        pytest.param(b"POST /v1/predict HTTP/1.1\r\nContent-Type: text/plain\r\n", 422, "body", id="text/plain"),
        pytest.param(
            b"POST /v1/verdicts HTTP/1.1\r\nContent-Type: application/x-www-form-urlencoded\r\nAuthorization: Bearer "
            + REVIEW_TOKEN.encode()
            + b"\r\n",
            422,
            "body",
            id="a form to a route with a token",
        ),
        pytest.param(
            b"POST /v1/models/%s/rollback?x=1 HTTP/1.1\r\nContent-Type: application/json\r\n" % MODEL.encode()
            + b"Authorization: Bearer %s\r\n" % ADMIN_TOKEN.encode(),
            422,
            "query",
            id="a query string on an admin route",
        ),
        pytest.param(
            b"POST /v1/predict HTTP/1.1\r\nContent-Type: application/json\r\n", 413, None, id="over the limit"
        ),
        pytest.param(
            b"POST /v1/models/%s/rollback HTTP/1.1\r\nContent-Type: application/json\r\n" % MODEL.encode(),
            401,
            None,
            id="no admin token",
        ),
        pytest.param(
            b"POST /v1/verdicts HTTP/1.1\r\nContent-Type: application/json\r\nAuthorization: "
            + _WRONG.encode()
            + b"\r\n",
            403,
            None,
            id="a wrong reviewer token",
        ),
        pytest.param(b"POST /v1/nowhere?x=1 HTTP/1.1\r\nContent-Type: text/plain\r\n", 404, None, id="an unknown path"),
    ],
)
def test_expect_100_continue_gets_the_refusal_instead_when_the_headers_decide_it(
    probed: tuple[str, Path], head: bytes, status: int, field: str | None
) -> None:
    length = 10**9 if status == 413 else len(_BODY)
    reply = _first_reply(probed[0], head + _EXPECT + b"Content-Length: %d\r\n\r\n" % length)
    assert reply[0] == status, reply
    assert reply[1]["status"] == status and reply[1]["detail"]
    if field is not None:
        assert reply[1]["errors"][0]["field"] == field
        # The same problem as when the body is sent without the expectation.
        host_line = b"Host: x\r\n"
        whole = head + host_line + b"Connection: close\r\nContent-Length: %d\r\n\r\n" % len(_BODY) + _BODY
        ((plain_status, plain),) = _replies_until_closed(probed[0], whole)
        assert (plain_status, plain["detail"], plain["errors"]) == (status, reply[1]["detail"], reply[1]["errors"])


@pytest.mark.parametrize(
    "head",
    [
        pytest.param(b"POST /v1/predict HTTP/1.1\r\nContent-Type: application/json\r\n", id="predict"),
        pytest.param(b"POST /v1/predict HTTP/1.1\r\nContent-Type: application/json; charset=utf-8\r\n", id="charset"),
        pytest.param(b"POST /v1/predict HTTP/1.1\r\nContent-Type: application/problem+json\r\n", id="+json"),
    ],
)
def test_expect_100_continue_still_gets_100_when_the_body_may_change_the_answer(
    probed: tuple[str, Path], head: bytes
) -> None:
    assert _first_reply(probed[0], head + _EXPECT + b"Content-Length: %d\r\n\r\n" % len(_BODY))[0] == 100


def test_a_broken_chunked_body_queued_behind_another_request_is_refused_after_its_reply(
    probed: tuple[str, Path],
) -> None:
    # RFC 9112 §9.3.2: replies in request order. The second request's chunked framing breaks while the
    # first is still being answered: its 400 went out at once and the connection closed, so the
    # first request's reply was lost (and the client read the 400 as that reply).
    broken = _PREDICT + b"Transfer-Encoding: chunked\r\n\r\nzz\r\n" + _BODY + b"\r\n0\r\n\r\n"
    replies = _replies_until_closed(probed[0], _FRAMED + broken)
    assert [status for status, _ in replies] == [200, 400]
    assert replies[0][1]["model"] == MODEL and replies[1][1]["type"] == "/problems/malformed-request"
    replies = _replies_until_closed(probed[0], _FRAMED + _FRAMED + broken)
    assert [status for status, _ in replies] == [200, 200, 400]


# -- request targets a request may not carry -----------------------------------------------------------
# RFC 9112 §3: an invalid request-line is answered 400 (or redirected); a recipient "SHOULD NOT attempt to
# autocorrect and then process the request", since it "might be deliberately crafted to bypass security
# filters along the request chain". Both were corrected and answered (found probing, 2026-12-05).
@pytest.mark.parametrize(
    ("data", "statuses", "named"),
    [
        # RFC 9112 §3.2: origin-form is absolute-path ["?" query] and absolute-form an absolute-URI (RFC 3986
        # §4.3), neither with a fragment (RFC 9110 §7.1: the fragment is the client's). uvicorn dropped it.
        pytest.param(
            _PREDICT.replace(b"/v1/predict", b"/v1/predict#x") + b"Content-Length: %d\r\n\r\n" % len(_BODY) + _BODY,
            [400],
            "fragment",
            id="a fragment on predict (the lane answered 200)",
        ),
        pytest.param(b"GET /v1/models#x HTTP/1.1\r\n" + _CLOSE + b"\r\n", [400], "fragment", id="a fragment on a view"),
        pytest.param(b"GET /readyz?x=1#y HTTP/1.1\r\n" + _CLOSE + b"\r\n", [400], "fragment", id="after a query"),
        pytest.param(b"GET http://x/healthz# HTTP/1.1\r\n" + _CLOSE + b"\r\n", [400], "fragment", id="absolute form"),
        pytest.param(
            b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\nGET /healthz#x HTTP/1.1\r\n" + _CLOSE + b"\r\n",
            [200, 400],
            "fragment",
            id="after a request answered",
        ),
        # RFC 9112 §3.2.4: the asterisk form is used only for OPTIONS. It was routed as the path "*": a 404
        # "no such path: GET /*".
        pytest.param(b"GET * HTTP/1.1\r\n" + _CLOSE + b"\r\n", [400], "'*' is for OPTIONS only", id="GET *"),
        pytest.param(
            b"POST * HTTP/1.1\r\n"
            + _CLOSE
            + b"Content-Type: application/json\r\nContent-Length: %d\r\n\r\n" % len(_BODY)
            + _BODY,
            [400],
            "'*' is for OPTIONS only",
            id="POST *",
        ),
    ],
)
def test_a_target_with_a_fragment_or_an_asterisk_for_another_method_than_options_is_refused_400(
    probed: tuple[str, Path], data: bytes, statuses: list[int], named: str
) -> None:
    replies = _replies_until_closed(probed[0], data)
    assert [status for status, _ in replies] == statuses
    status, body = replies[-1]
    assert body["type"] == "/problems/malformed-request" and named in body["detail"]
    assert "RFC 9112 §3.2" in body["detail"]


@pytest.mark.parametrize(
    "data",
    [
        b"GET /healthz HTTP/2.0\r\n" + _CLOSE + b"\r\n",
        b"GET /healthz HTTP/0.9\r\n" + _CLOSE + b"\r\n",
        b"POST /v1/predict HTTP/2.0\r\n" + _CLOSE + b"Content-Length: %d\r\n\r\n" % len(_BODY) + _BODY,
    ],
    ids=["HTTP/2.0", "HTTP/0.9", "a prediction as HTTP/2.0"],
)
def test_a_request_line_naming_another_http_version_is_refused_505(probed: tuple[str, Path], data: bytes) -> None:
    # httptools reads "HTTP/2.0" and "HTTP/0.9" in a text request line (it refuses 1.2 and 3.0), and
    # uvicorn answered them 200 as HTTP/1.1 (found by an audit, 2026-12-05). RFC 9110 §15.6.6: 505 for
    # a major version the server does not support; HTTP/2 is a binary protocol (RFC 9113), never a
    # request line of text.
    replies = _replies_until_closed(probed[0], data)
    assert [status for status, _ in replies] == [505]
    body = replies[0][1]
    assert body["type"] == "/problems/http-version-not-supported" and "HTTP/1.1" in body["detail"]


def test_head_star_is_refused_400_and_options_star_still_answered(probed: tuple[str, Path]) -> None:
    host, port = probed[0].removeprefix("http://").split(":")
    with socket.create_connection((host, int(port)), timeout=20) as s:
        s.sendall(b"HEAD * HTTP/1.1\r\n" + _CLOSE + b"\r\n")
        got = b""
        while chunk := s.recv(65536):
            got += chunk
    assert got.startswith(b"HTTP/1.1 400 "), got
    ((status, fields, _),) = _replies_with_heads(probed[0], b"OPTIONS * HTTP/1.1\r\n" + _CLOSE + b"\r\n")
    assert status == 204 and fields["allow"] == "GET, HEAD, POST, OPTIONS"
