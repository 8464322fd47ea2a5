"""A reverse proxy on a free port of 127.0.0.1 in front of a live service, for the reviewer page's
browser tests (this module holds no tests).

It forwards every request to the service and hands back the service's reply, except the requests
a test tells it to answer itself, as a gateway does while the service behind it is down, slow or
shedding load: an HTML 502, an empty 503 or 504, a 429 with ``Retry-After``. A reply marked
``after_forwarding`` is sent only once the service has answered, and instead of that answer: the
gateway that times out (504) after the service acted, so the page never learns that it did. The page is loaded
through it, so the page's own origin (its CSP's ``connect-src 'self'``) is the proxy's.
"""

from __future__ import annotations

import contextlib
import http.client
import threading
from collections.abc import Iterator
from dataclasses import dataclass
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from urllib.parse import urlsplit

# RFC 9110 §7.6.1: connection-specific fields a proxy does not forward; the body is handed on
# whole with its Content-Length, so Transfer-Encoding goes too.
HOP_BY_HOP = frozenset(
    {"connection", "keep-alive", "proxy-connection", "te", "trailer", "transfer-encoding", "upgrade", "content-length"}
)


@dataclass(frozen=True)
class Reply:
    """What the proxy answers itself. ``reason`` may be empty, as RFC 9112 §4 allows."""

    status: int
    reason: str
    body: bytes = b""
    headers: tuple[tuple[str, str], ...] = ()
    after_forwarding: bool = False  # forward first, drop the service's reply, send this one


class Gateway:
    """The proxy's rules: ``(method, path)`` → the :class:`Reply` it gives instead of forwarding."""

    def __init__(self, upstream: str) -> None:
        parts = urlsplit(upstream)
        self.upstream_host = parts.hostname or "127.0.0.1"
        self.upstream_port = parts.port or 80
        self._rules: dict[tuple[str, str], Reply] = {}
        self._lock = threading.Lock()
        self.answered: list[tuple[str, str]] = []
        self.dropped: list[int] = []  # statuses of the service's replies an after_forwarding rule replaced
        self.url = ""

    def answer(self, method: str, path: str, reply: Reply) -> None:
        """From now on, answer ``method path`` with ``reply`` instead of the service."""
        with self._lock:
            self._rules[(method, path)] = reply

    def forward(self, method: str, path: str) -> None:
        """From now on, forward ``method path`` to the service again."""
        with self._lock:
            self._rules.pop((method, path), None)

    def rule(self, method: str, path: str) -> Reply | None:
        with self._lock:
            reply = self._rules.get((method, path))
            if reply is not None:
                self.answered.append((method, path))
            return reply


def _handler(gateway: Gateway) -> type[BaseHTTPRequestHandler]:
    class Handler(BaseHTTPRequestHandler):
        protocol_version = "HTTP/1.1"

        def log_message(self, format: str, *args: object) -> None:  # noqa: A002 - the stdlib's name
            """Quiet: a test reads what the page shows, not the proxy's log."""

        def _send(self, status: int, reason: str, headers: list[tuple[str, str]], body: bytes) -> None:
            self.send_response_only(status, reason)
            for name, value in headers:
                self.send_header(name, value)
            self.send_header("Content-Length", str(len(body)))
            # One request a connection keeps the proxy's threads from outliving a test.
            self.send_header("Connection", "close")
            self.end_headers()
            if self.command != "HEAD":
                self.wfile.write(body)
            self.close_connection = True

        def _relay(self) -> None:
            length = int(self.headers.get("Content-Length") or 0)
            body = self.rfile.read(length) if length else b""
            own = gateway.rule(self.command, self.path.split("?", 1)[0])
            if own is not None and not own.after_forwarding:
                self._send(own.status, own.reason, list(own.headers), own.body)
                return
            conn = http.client.HTTPConnection(gateway.upstream_host, gateway.upstream_port, timeout=60)
            try:
                fields = {k: v for k, v in self.headers.items() if k.lower() not in HOP_BY_HOP | {"host"}}
                conn.request(self.command, self.path, body=body or None, headers=fields)
                r = conn.getresponse()
                data = r.read()
                headers = [(k, v) for k, v in r.getheaders() if k.lower() not in HOP_BY_HOP]
            finally:
                conn.close()
            if own is not None:
                gateway.dropped.append(r.status)
                self._send(own.status, own.reason, list(own.headers), own.body)
                return
            self._send(r.status, r.reason, headers, data)

        do_GET = do_POST = do_HEAD = _relay

    return Handler


@contextlib.contextmanager
def gateway_in_front_of(upstream: str) -> Iterator[Gateway]:
    """A :class:`Gateway` serving in a background thread on 127.0.0.1; stopped on exit."""
    gateway = Gateway(upstream)
    server = ThreadingHTTPServer(("127.0.0.1", 0), _handler(gateway))
    server.daemon_threads = True
    gateway.url = f"http://127.0.0.1:{server.server_address[1]}"
    thread = threading.Thread(target=server.serve_forever, name="gateway-under-test", daemon=True)
    thread.start()
    try:
        yield gateway
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=10)


__all__ = ["Gateway", "Reply", "gateway_in_front_of"]
