"""One write per reply: the guarded protocol holds a response's head until its body comes."""

from __future__ import annotations

import json
import socket
import time
from pathlib import Path
from typing import Any

from tests.helpers.servers import running_server
from textsieve.service.web.transport import _HeadWithBody


class _Recorded:
    def __init__(self) -> None:
        self.writes: list[bytes] = []
        self.closed = False

    def write(self, data: bytes) -> None:
        self.writes.append(bytes(data))

    def close(self) -> None:
        self.closed = True

    def is_closing(self) -> bool:
        return self.closed

    def get_extra_info(self, name: str) -> Any:
        return f"info {name}"


def test_head_and_body_go_out_in_one_write_and_the_rest_as_they_come() -> None:
    real = _Recorded()
    t = _HeadWithBody(real)  # type: ignore[arg-type]
    t.write(b"HTTP/1.1 200 OK\r\ncontent-length: 6\r\n\r\n")
    assert real.writes == []
    t.write(b"abc")
    t.write(b"def")
    assert real.writes == [b"HTTP/1.1 200 OK\r\ncontent-length: 6\r\n\r\nabc", b"def"]
    assert t.get_extra_info("peername") == "info peername" and not t.is_closing()


def test_an_interim_continue_goes_at_once_and_a_lone_head_before_closing() -> None:
    real = _Recorded()
    t = _HeadWithBody(real)  # type: ignore[arg-type]
    t.write(b"HTTP/1.1 100 Continue\r\n\r\n")
    assert real.writes == [b"HTTP/1.1 100 Continue\r\n\r\n"]
    t.write(b"HTTP/1.1 500 Internal Server Error\r\n\r\n")  # then the app fails before any body
    t.close()
    assert real.writes[1:] == [b"HTTP/1.1 500 Internal Server Error\r\n\r\n"] and real.closed


def _replies(port: int, request: bytes, count: int) -> list[tuple[bytes, dict[str, Any]]]:
    """Send ``request`` (one or more HTTP requests) and read ``count`` replies: (head, JSON body)."""
    out = []
    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(request)
        got = b""
        deadline = time.monotonic() + 10
        while len(out) < count and time.monotonic() < deadline:
            head, sep, rest = got.partition(b"\r\n\r\n")
            if sep:
                length = int(head.lower().split(b"content-length: ")[1].split(b"\r\n")[0])
                if len(rest) >= length:
                    out.append((head, json.loads(rest[:length])))
                    got = rest[length:]
                    continue
            chunk = s.recv(65536)
            if not chunk:
                break
            got += chunk
        assert got == b""  # nothing beyond the replies
    return out


def _post(text: str) -> bytes:
    body = json.dumps({"texts": [text]}).encode()
    head = b"POST /v1/predict HTTP/1.1\r\nhost: x\r\ncontent-type: application/json\r\n"
    return head + b"content-length: %d\r\n\r\n" % len(body) + body


def test_the_real_server_answers_whole_replies_to_kept_alive_and_pipelined_requests(
    registry_dir: Path, tmp_path: Path
) -> None:
    short, longer = "my card was charged twice", "my card was charged twice again and again"
    with running_server(str(registry_dir), tmp_path / "server.log", workers=1) as server:
        ((head, reply),) = _replies(server.port, _post(short), 1)
        assert head.startswith(b"HTTP/1.1 200 OK\r\n") and reply["results"][0]["tokens"] == 5
        # Two requests in one packet, on one connection: both answered, in order, each head with its body.
        replies = _replies(server.port, _post(short) + _post(longer) + _post(short), 3)
        assert [h.split(b"\r\n")[0] for h, _ in replies] == [b"HTTP/1.1 200 OK"] * 3
        assert [r["results"][0]["tokens"] for _, r in replies] == [5, 8, 5]


def _heads_and_bodies(port: int, requests: bytes, head_only: list[bool]) -> list[tuple[bytes, bytes]]:
    """Send ``requests`` on one connection and read one reply per entry of ``head_only``: its head,
    and its Content-Length of body bytes, or none for a reply to HEAD (whatever its Content-Length)."""
    out: list[tuple[bytes, bytes]] = []
    got = b""
    with socket.create_connection(("127.0.0.1", port), timeout=5) as s:
        s.sendall(requests)
        for bare in head_only:
            while b"\r\n\r\n" not in got or (
                not bare and len(got.partition(b"\r\n\r\n")[2]) < _content_length(got.partition(b"\r\n\r\n")[0])
            ):
                chunk = s.recv(65536)  # a reply held back times out here (TimeoutError)
                assert chunk, "the server closed the connection"
                got += chunk
            head, _, rest = got.partition(b"\r\n\r\n")
            length = 0 if bare else _content_length(head)
            out.append((head, rest[:length]))
            got = rest[length:]
        s.settimeout(0.3)
        try:
            extra = s.recv(65536)
        except TimeoutError:
            extra = b""
        assert got + extra == b""  # no body after a reply to HEAD
    return out


def _content_length(head: bytes) -> int:
    return int(head.lower().split(b"content-length: ")[1].split(b"\r\n")[0])


def test_head_is_answered_at_once_as_get_without_its_body_on_a_kept_alive_connection(
    registry_dir: Path, tmp_path: Path
) -> None:
    # RFC 9110 §9.3.2: HEAD is GET without the content, with the headers GET would send (its
    # Content-Length included). The guarded protocol held every head until a body came, and uvicorn
    # writes none after HEAD: `curl -I /healthz` waited for ever (found 2026-12-04).
    def request(method: str, path: str) -> bytes:
        return f"{method} {path} HTTP/1.1\r\nhost: x\r\n\r\n".encode()

    with running_server(str(registry_dir), tmp_path / "server.log", workers=1) as server:
        for path in ("/healthz", "/readyz", "/v1/models"):
            ((get_head, get_body),) = _heads_and_bodies(server.port, request("GET", path), [False])
            replies = _heads_and_bodies(
                server.port, request("HEAD", path) + request("GET", path) + request("HEAD", path), [True, False, True]
            )
            assert [h.split(b"\r\n")[0] for h, _ in replies] == [b"HTTP/1.1 200 OK"] * 3
            assert [_content_length(h) for h, _ in replies] == [len(get_body)] * 3
            assert json.loads(replies[1][1]) == json.loads(get_body) or path == "/readyz"
        ((head, _),) = _heads_and_bodies(server.port, request("HEAD", "/v1/predict"), [True])
        assert head.startswith(b"HTTP/1.1 405 ") and b"\r\nallow: POST" in head
