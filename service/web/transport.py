"""Connections: a cap per replica and a deadline for reading each request.

uvicorn bounds neither the number of open connections (its ``limit_concurrency`` answers a
plain-text 503 only once a request's headers have been read) nor the time a client may take to
send a request: a connection that trickles a byte every few seconds, or sends nothing at all,
holds its socket and buffers for ever. This module gives uvicorn's httptools protocol both:

- **Connection cap.** A connection beyond ``max_connections`` is answered at once with a
  problem+json 503 carrying ``Retry-After`` and ``Connection: close``, and closed, before
  anything is read from it.
- **Requests in the app.** A request whose headers arrive while ``limit`` requests are already
  inside the application (counted from when their whole body has arrived; probes never count
  and are never refused) is answered 503 from here (after the replies to requests pipelined ahead
  of it, RFC 9112 §9.3.2), before any Python of the app runs,
  so a crowd of callers cannot make the event loop itself the queue. The limit adapts, in the
  spirit of TCP's congestion window (Jacobson, 1988): it starts at ``max_requests``; every tenth
  of a second, if the requests finished in it took longer on average than the admitted wait
  (``queue_wait_ms``), it shrinks in proportion to the excess (by a tenth to a half); if the
  limit was reached and they were in time, it grows by a tenth. A refused connection's next
  request is read only after half the Retry-After it was given. The access middleware
  (:mod:`textsieve.service.web.access`) counts and times the requests inside the app.
- **Head size.** A request's line and headers together may hold ``max_head_bytes``
  (``TEXTSIEVE_MAX_HEAD_BYTES``); past it the request is answered 431 (RFC 6585 §5) and the
  connection closed. The parser keeps a header it has not seen the end of in memory, so without a
  bound one connection could fill the replica's memory with a single endless header line within
  the read deadline (the body budget bounds bodies only). An unfinished head is refused once the
  reads after the one it began in pass the bound (so at most one read more is held); a whole head
  is measured as parsed (its line, and each header's name and value with their separators) when
  it spans more than the bound's bytes of reads. Before, only the first check ran, and a 100 kB
  head that arrived in one read was answered as if it were within 64 KiB.
- **No upgrades.** The service speaks HTTP/1.1 only (uvicorn runs with ``ws="none"``), but the
  parser, on a request with ``Upgrade`` and ``Connection: upgrade``, ends the request at its
  headers and stops: ``curl --http2`` on ``http://`` sends ``Upgrade: h2c`` with every first
  request, and its body was lost (answered 422 "the body is missing"), a WebSocket handshake got
  an empty 403. RFC 9110 §7.8 lets a server ignore Upgrade, so the request is parsed again
  without it and answered as HTTP/1.1. ``CONNECT`` asks for a tunnel, which this origin server
  does not implement (it is no proxy): 501 (RFC 9110 §9.3.6 and §9.1), where it was a 400.
- **Absolute-form targets without a path.** ``GET http://host HTTP/1.1`` (RFC 9112 §3.2.2: a server
  MUST accept the absolute form) names the root, since an empty path is "/" (RFC 9110 §4.2.3), and
  ``OPTIONS http://host`` the server as a whole, "*" (RFC 9112 §3.2.4); uvicorn found no path in them
  and answered 400 with a warning.
- **Targets a request may not carry.** A fragment (``/v1/predict#x``: RFC 9112 §3.2 has none in a
  request target) and ``*`` for another method than OPTIONS (RFC 9112 §3.2.4) are answered 400 and the
  connection closed (RFC 9112 §3: an invalid request-line is refused, not corrected); uvicorn dropped the
  fragment and answered the path, and routed ``GET *`` as the path "*" (404).
- **Encoded slashes.** A ``%2F`` in a path stays ``%2F`` for routing (RFC 3986 §2.2: data in a
  segment, not a separator); uvicorn decoded it to "/", so ``…/versions/1%2Fcard`` was the card.
- **HTTP/1.0 framing.** An HTTP/1.0 request with ``Transfer-Encoding`` is answered 400 and the
  connection closed (RFC 9112 §6.1: its framing is faulty); it was read as chunked and answered.
- **Clients that go away.** uvicorn tells only the last request read on a connection that the client
  is gone; the request being answered ahead of a pipelined one is told too, or its reply met the closed
  transport (uvloop raises there) and a client's reset logged two tracebacks. A request whose client
  left before its reply was written whole is marked in its scope (``CLIENT_LEFT``), and booked 499 by
  the access log and metrics: uvicorn drops the reply quietly, and it was booked as the 200 or 503
  nobody received (its texts still queued are dropped, service/inference/batcher.py). For that the
  connection is read again once a request's body is whole: past 64 KiB of body uvicorn stopped reading
  until the reply, so a reset went unseen while the request was computed.
- **Read deadline.** From the moment a connection opens, or a keep-alive connection's next
  request begins, the client has ``read_timeout_seconds`` to send the request's headers and
  whole body. Past it the connection is answered 408 (RFC 9110 §15.5.9) if no response has
  started (after the replies to requests pipelined ahead of it), and closed. Idle keep-alive
  connections are closed by uvicorn after ``keepalive_seconds`` (its ``timeout_keep_alive``).

All of it is counted (:class:`ConnectionGuard`) and exposed in ``/metrics``; every reply written
here to a request the application never saw (400, 408, 431, 501, 503) is also counted in
``textsieve_http_requests_total`` and ``textsieve_http_request_seconds`` with the route
``unmatched`` (and the method ``unknown`` when it was not read), as the app's own replies are.
"""

from __future__ import annotations

import asyncio
import re
from typing import Any
from urllib.parse import unquote

import httptools
import orjson
from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol

from textsieve.service.inference.admission import CLIENT_LEFT
from textsieve.service.telemetry import ServiceMetrics
from textsieve.service.web.problems import (
    HEAD_TOO_LARGE,
    MALFORMED,
    MEDIA_TYPE,
    REQUEST_TIMEOUT,
    UNKNOWN_METHOD,
    VERSION_NOT_SUPPORTED,
)

# Liveness, readiness and metrics: cheap, bodiless, and what an orchestrator restarts or drains a
# replica by, so they are never refused by the request limit (a busy replica is alive).
PROBE_PATHS = frozenset({"/healthz", "/readyz", "/metrics"})
_PROBE_TARGETS = frozenset(p.encode() for p in PROBE_PATHS)
_ASTERISK = b"*"  # the asterisk-form target (RFC 9112 §3.2.4): OPTIONS only
WITH_BODY = frozenset({"POST", "PUT", "PATCH"})
# A request line: a method token (RFC 9110 §5.6.2), a target and an HTTP version.
_REQUEST_LINE = re.compile(rb"[!#$%&'*+.^_`|~0-9A-Za-z-]+ [^ \r\n]+ HTTP/[0-9]\.[0-9]\r?\n")
# A Host field value (RFC 9112 §3.2, RFC 3986 §3.2.2): a bracketed IP literal, or a name or IPv4 address
# (a reg-name: unreserved, percent-encoded and sub-delims characters, maybe none), then an optional port.
_HOST = re.compile(rb"(?:\[[0-9A-Za-z._~!$&'()*+,;=:-]+\]|[0-9A-Za-z._~%!$&'()*+,;=-]*)(?::[0-9]*)?")
# The route label of a reply written here: no route was matched, as for the app's own 404s.
UNMATCHED = "unmatched"
# The scope key of the status written here to a request the application holds (a body that stalled
# past the read deadline, 408, or whose chunked framing broke, 400): the access middleware books
# that, what the client got, instead of a disconnect (service/web/access.py).
ANSWERED_HERE = "textsieve.answered_by_connection"
# CLIENT_LEFT (imported above) is the scope key set (True) on a request whose client went away before
# its reply was written whole: whatever the application answers goes nowhere, so the access middleware
# and the predict lane book it 499 (service/web/access.py CLIENT_GONE), not the status nobody received,
# and the batcher drops its texts not yet in a batch.
UNKNOWN_METHOD_LABEL = "unknown"  # the request line was not read (or named no method httptools knows)


def _raw_response(
    status: int, reason: str, slug: str, title: str, detail: str, retry_after: int | None, *, close: bool = True
) -> bytes:
    body = orjson.dumps({"type": f"/problems/{slug}", "title": title, "status": status, "detail": detail})
    head = [
        f"HTTP/1.1 {status} {reason}",
        f"content-type: {MEDIA_TYPE}",
        f"content-length: {len(body)}",
        "connection: close" if close else "connection: keep-alive",
    ]
    if retry_after is not None:
        head.append(f"retry-after: {retry_after}")
    return ("\r\n".join(head) + "\r\n\r\n").encode("ascii") + body


_ENCODED_SLASH = re.compile(rb"%2[fF]")


def _path_keeping_encoded_slashes(raw_path: bytes) -> str:
    """A request's path decoded but for its encoded slashes, which stay "%2F": RFC 3986 §2.2 makes
    "%2F" data inside a segment, not the "/" between two. uvicorn decodes it to "/" before routing, so
    ``/v1/models/m/versions/1%2Fcard`` was answered as ``…/versions/1/card`` and ``/v1%2Fpredict`` as
    ``/v1/predict``: a proxy or filter in front that reads the path as written saw another resource
    than the one answered. Now such a segment is a path parameter's value (and refused as one) or a
    path no route answers (404)."""
    return "%2F".join(unquote(part.decode("ascii")) for part in _ENCODED_SLASH.split(raw_path))


def _names_a_probe(target: bytes) -> bool:
    """Whether ``target`` is routed to a probe: decided on the path the request is routed by (as uvicorn
    and :func:`_path_keeping_encoded_slashes` make ``scope["path"]``, which the access middleware reads),
    so ``GET http://x/healthz`` (absolute form, RFC 9112 §3.2.2) and ``GET /%68ealthz`` are probes as
    ``GET /healthz`` is. The raw target was compared: those counted against the request limit and were
    refused 503 at it, though answered by the probe's route."""
    path = target.split(b"?", 1)[0]
    if path in _PROBE_TARGETS:
        return True
    if path[:1] == b"/" and b"%" not in path:
        return False  # the common case: an origin-form path that decodes to itself
    try:
        raw = httptools.parse_url(target).path
        return raw is not None and _path_keeping_encoded_slashes(raw) in PROBE_PATHS
    except (httptools.HttpParserInvalidURLError, UnicodeDecodeError):
        return False  # refused 400 where uvicorn parses it


def _with_path(target: bytes, method: bytes) -> bytes:
    """An absolute-form request target (RFC 9112 §3.2.2) whose path is empty, given one: "/" (RFC 9110
    §4.2.3: an empty path is "/"), or for OPTIONS without a query the server as a whole, "*" (RFC 9112
    §3.2.4). Other targets are returned as they are. uvicorn took the missing path for an unparsable
    request: ``GET http://host HTTP/1.1``, which a server MUST accept, was a 400 and a logged warning."""
    try:
        parsed = httptools.parse_url(target)
    except httptools.HttpParserInvalidURLError:
        return target  # refused 400 where uvicorn parses it
    if parsed.path or not parsed.schema:
        return target
    if method == b"OPTIONS" and not parsed.query:
        return b"*"
    cut = min((i for i in (target.find(b"?"), target.find(b"#")) if i >= 0), default=len(target))
    return target[:cut] + b"/" + target[cut:]


RETRY_AFTER_SECONDS = 1
_CONTINUE = b"HTTP/1.1 100 Continue\r\n\r\n"


class _HeadWithBody:
    """What one request's response cycle writes to (uvicorn's ``RequestResponseCycle.transport``):
    the connection's transport, except that the response's head is held until its first body
    part and both go out in one write. uvicorn writes the head at ``http.response.start`` and the
    body at ``http.response.body``, two system calls per reply; the second is a tenth of the event
    loop's time under single-text load (bench/README.md), and a replica killed between the two
    would leave a head with no body (see service/web/onewrite.py). An interim ``100 Continue`` goes
    out at once; a held head goes out before the transport closes."""

    __slots__ = ("_transport", "_head", "_armed")

    def __init__(self, transport: asyncio.Transport) -> None:
        self._transport = transport
        self._head: bytes | None = None
        self._armed = True  # the cycle's first write, but for 100 Continue, is its head

    def write(self, data: bytes | bytearray | memoryview) -> None:
        if self._head is not None:
            head, self._head = self._head, None
            self._transport.write(head + data)
        elif self._armed and data != _CONTINUE:
            self._armed = False
            self._head = bytes(data)
        else:
            self._transport.write(data)

    def close(self) -> None:
        if self._head is not None:
            head, self._head = self._head, None
            self._transport.write(head)
        self._transport.close()

    def is_closing(self) -> bool:
        return self._transport.is_closing()

    def __getattr__(self, name: str) -> Any:
        return getattr(self._transport, name)


class ConnectionGuard:
    """The replica's connection cap and read deadline, and what they refused or closed."""

    def __init__(
        self,
        *,
        max_connections: int,
        read_timeout: float,
        target_seconds: float = 0.25,
        min_requests: int = 4,
        start_requests: int = 64,
        max_head_bytes: int = 64 * 1024,
        metrics: ServiceMetrics | None = None,
    ) -> None:
        self.max_connections = max_connections
        self.read_timeout = read_timeout
        self.metrics = metrics  # where the replies written here are counted (None: nowhere)
        self.open = 0
        self.refused = 0
        self.timed_out = 0
        # Requests inside the application and their adaptive limit.
        self.target = target_seconds
        self.min_requests = min_requests
        self.limit = float(max(min_requests, min(start_requests, max_connections)))
        self.inflight = 0
        self.refused_requests = 0
        self._window_end = 0.0
        self._count = 0
        self._seconds = 0.0
        self._saturated = False
        self.over_capacity = _raw_response(
            503,
            "Service Unavailable",
            "overloaded",
            "This replica is at capacity",
            f"this replica already has {max_connections} open connections (TEXTSIEVE_MAX_CONNECTIONS): "
            "retry after the Retry-After seconds, or on another replica",
            1,
        )
        busy = (
            503,
            "Service Unavailable",
            "overloaded",
            "This replica is at capacity",
            "this replica has as many requests in progress as it can answer within its admitted wait "
            "(TEXTSIEVE_QUEUE_WAIT_MS): retry after the Retry-After seconds, or on another replica",
            RETRY_AFTER_SECONDS,
        )
        self.busy = _raw_response(*busy)
        # Refusing on a kept-alive connection costs a parse and a write; closing it would make a
        # client that retries at once pay (and make the server pay) a new connection each time.
        self.busy_keep_alive = _raw_response(*busy, close=False)
        self.too_slow = _raw_response(
            REQUEST_TIMEOUT.status,
            "Request Timeout",
            REQUEST_TIMEOUT.slug,
            REQUEST_TIMEOUT.title,
            f"the request's headers and body did not arrive within {read_timeout:g} s "
            "(TEXTSIEVE_READ_TIMEOUT_SECONDS); the connection is closed",
            None,
        )
        # uvicorn's own answer to bytes its parser refuses is plain text; every error here is problem+json.
        self.malformed = _raw_response(
            MALFORMED.status,
            "Bad Request",
            MALFORMED.slug,
            MALFORMED.title,
            "the request could not be parsed as HTTP/1.1: check its request line, headers (one valid Host), "
            "Content-Length (one, a whole number) and chunked framing; the connection is closed",
            None,
        )
        self.malformed_requests = 0
        self.unknown_method = _raw_response(
            UNKNOWN_METHOD.status,
            "Not Implemented",
            UNKNOWN_METHOD.slug,
            UNKNOWN_METHOD.title,
            "the request's method is not an HTTP method this service knows; it answers GET, HEAD, POST and "
            "OPTIONS (the Allow header of a 405 or an OPTIONS reply names which for each path); the connection "
            "is closed",
            None,
        )
        # RFC 9112 §6.1: an HTTP/1.0 request with a transfer coding has faulty framing (HTTP/1.0 has no
        # chunking, so a proxy in front may have read another body than the one parsed here).
        self.coding_in_http_1_0 = _raw_response(
            MALFORMED.status,
            "Bad Request",
            MALFORMED.slug,
            MALFORMED.title,
            "an HTTP/1.0 request may not carry Transfer-Encoding (RFC 9112 §6.1): send its body with "
            "Content-Length, or send the request as HTTP/1.1; the connection is closed",
            None,
        )
        # RFC 9110 §9.3.6: CONNECT asks a proxy for a tunnel; this origin server implements no
        # tunnel, and §9.1 answers a method it does not implement 501 (a 405 would owe an Allow for a
        # target, and an authority-form target names no resource here).
        self.no_tunnel = _raw_response(
            UNKNOWN_METHOD.status,
            "Not Implemented",
            UNKNOWN_METHOD.slug,
            UNKNOWN_METHOD.title,
            "CONNECT asks for a tunnel, and this service is not a proxy (RFC 9110 §9.3.6); it answers GET, "
            "HEAD, POST and OPTIONS (the Allow header of a 405 or an OPTIONS reply names which for each path); "
            "the connection is closed",
            None,
        )
        # RFC 9112 §3: an invalid request-line is answered 400 (or redirected), not corrected and
        # answered, as it "might be deliberately crafted to bypass security filters along the request chain".
        # A fragment is no part of a request target (RFC 9112 §3.2: neither origin-form nor absolute-URI has
        # one; RFC 9110 §7.1: it is left to the client); uvicorn dropped it and answered the path before it.
        self.fragment = _raw_response(
            MALFORMED.status,
            "Bad Request",
            MALFORMED.slug,
            MALFORMED.title,
            "the request target holds a fragment ('#' and what follows), which a request target may not "
            "(RFC 9112 §3.2): send the path and query alone; the connection is closed",
            None,
        )
        # httptools reads "HTTP/2.0" and "HTTP/0.9" in a request line, and uvicorn answered them as HTTP/1.1.
        self.version_not_supported = _raw_response(
            VERSION_NOT_SUPPORTED.status,
            "HTTP Version Not Supported",
            VERSION_NOT_SUPPORTED.slug,
            VERSION_NOT_SUPPORTED.title,
            "this service speaks HTTP/1.1 and HTTP/1.0 only (RFC 9110 §15.6.6): send the request as HTTP/1.1; "
            "the connection is closed",
            None,
        )
        # The asterisk form names the server as a whole, for OPTIONS alone (RFC 9112 §3.2.4); "GET *" was
        # routed as the path "*" and answered 404 "no such path: GET /*".
        self.asterisk_not_options = _raw_response(
            MALFORMED.status,
            "Bad Request",
            MALFORMED.slug,
            MALFORMED.title,
            "the request target '*' is for OPTIONS only (RFC 9112 §3.2.4): send other methods to a path, "
            "such as /healthz or /v1/models; the connection is closed",
            None,
        )
        self.max_head_bytes = max_head_bytes
        self.head_too_large = _raw_response(
            HEAD_TOO_LARGE.status,
            "Request Header Fields Too Large",
            HEAD_TOO_LARGE.slug,
            HEAD_TOO_LARGE.title,
            f"the request's line and headers exceeded {max_head_bytes} bytes (TEXTSIEVE_MAX_HEAD_BYTES): send "
            "shorter headers (a long cookie or token?) and put data in the body; the connection is closed",
            None,
        )

    def answered(self, method: str, status: int, seconds: float) -> None:
        """Count a reply written here to a request the application never saw."""
        if self.metrics is not None:
            self.metrics.answered(method, UNMATCHED, status, seconds)

    def request_may_start(self) -> bool:
        if self.inflight >= int(self.limit):
            self._saturated = True
            self.refused_requests += 1
            return False
        return True

    def request_finished(self, seconds: float, now: float) -> None:
        self._count += 1
        self._seconds += seconds
        if now < self._window_end:
            return
        mean = self._seconds / self._count if self._count else 0.0
        if mean > self.target:  # shrink in proportion to the excess, at most by half a window
            self.limit = max(float(self.min_requests), self.limit * max(0.5, min(0.9, self.target / mean)))
        elif self._saturated:  # full and in time: grow by a tenth (at least one)
            self.limit = min(float(self.max_connections), max(self.limit + 1.0, self.limit * 1.1))
        self._window_end, self._count, self._seconds, self._saturated = now + 0.1, 0, 0.0, False

    def protocol(self) -> type[HttpToolsProtocol]:
        """uvicorn's httptools protocol with this guard's cap and deadline (``uvicorn.Config(http=…)``)."""
        guard = self

        class GuardedHttpToolsProtocol(HttpToolsProtocol):
            _over_cap = False  # refused at connection time: uvicorn never saw this connection
            _refused = False
            _skipping = False  # a refused request's body is being read past and dropped
            _read_timer: asyncio.TimerHandle | None = None
            _in_head = False  # a request has begun and its headers have not all arrived
            _head_began = False  # ... and it began in the data being read now
            _head_bytes = 0  # bytes read in whole while in the head (the first read's share is not counted)
            _read = 0  # the size of the read being parsed
            _head_upper = 0  # bytes of the reads the head arrived in: an upper bound of its size
            _began = 0.0  # when the current request began (loop time)
            _app_has_it = False  # the current request was handed to the application
            url = b""  # uvicorn sets it when a request begins; a connection may time out before any does
            _done_in_read = 0  # requests read whole in the data being parsed now
            _message_done = False  # the last request read is whole: what comes next begins another
            _deferred: bytes | None = None  # a refusal waiting for the replies to the requests before it
            _ahead: Any = None  # the request cycle the current one is queued behind (uvicorn keeps none)
            _running: Any = None  # the request cycle whose application task started last

            def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
                if guard.open >= guard.max_connections:
                    guard.refused += 1
                    self._over_cap = True
                    self.transport = transport
                    transport.write(guard.over_capacity)
                    transport.close()
                    guard.answered(UNKNOWN_METHOD_LABEL, 503, 0.0)
                    return
                guard.open += 1
                super().connection_made(transport)
                self._arm()

            def connection_lost(self, exc: Exception | None) -> None:
                if self._over_cap:
                    return
                guard.open -= 1
                self._disarm()
                super().connection_lost(exc)
                # uvicorn tells only the last request read that the client is gone. When it was read
                # behind another (pipelined), the one being answered went on to write its reply to the
                # closed transport: uvloop raises there, and a client resetting the connection cost a
                # RuntimeError, uvicorn's "Exception in ASGI application" and the app's own error line,
                # each with a traceback. It is told too, so its reply goes nowhere, quietly.
                running: Any = self._running
                if running is not None and running is not self.cycle and not running.response_complete:
                    running.disconnected = True
                    running.message_event.set()
                told: Any
                for told in (self.cycle, running):
                    if told is not None and told.disconnected:
                        told.scope[CLIENT_LEFT] = True

            def _start_asgi_task(self, cycle: Any, app: Any) -> None:
                self._running = cycle
                super()._start_asgi_task(cycle, app)

            def data_received(self, data: bytes) -> None:
                if self._over_cap or self._refused:
                    return
                self._head_began = False
                self._done_in_read = 0
                self._read = len(data)
                if self._in_head:
                    self._head_upper += len(data)
                self._feed(data)
                if self._in_head and not self._refused:
                    # All of this read went into an unfinished head, but for the read it began in (at
                    # most one read's size more than the limit is held).
                    self._head_bytes += 0 if self._head_began else len(data)
                    if self._head_bytes > guard.max_head_bytes:
                        self._head_too_large()

            def _head_too_large(self) -> None:
                self._close_with(guard.head_too_large, 431)

            def _close_with(self, reply: bytes, status: int) -> None:
                """Refuse the request being read with ``reply`` and close the connection, once the
                requests read before it have their replies. RFC 9112 §9.3.2: replies go out in the order
                the requests came. A refusal written at once went out before the reply of a request
                still being answered, which was then lost, and the client read the refusal as that
                request's reply (a body sent without Content-Length after a POST, a pipelined request
                with a bad header)."""
                reply = self._for_method(reply)
                self._refused = True  # whatever else arrives on this connection is not read
                self._disarm()
                cycle: Any = self.cycle
                if self._message_done:
                    self._app_has_it = False  # the refused request is not the one the application has
                elif cycle is not None and self.pipeline and self.pipeline[0][0] is cycle:
                    # The refused request (a broken chunked body, say) waits behind another: it never
                    # reaches the application, and its refusal follows the reply of the one ahead.
                    self.pipeline.popleft()
                    self.cycle = cycle = self._ahead
                    self._app_has_it, self._message_done = False, True
                self._count(status)
                if self._message_done and cycle is not None and not cycle.response_complete:
                    self._deferred = reply  # written by on_response_complete
                    return
                self.transport.write(reply)
                self.transport.close()

            def _for_method(self, reply: bytes) -> bytes:
                """A refusal as the request being read may get it: a reply to HEAD is its head alone
                (RFC 9110 §9.3.2; its Content-Length still says what a GET would get, §8.6). With the
                body sent too, a client kept alive read it as the start of its next reply."""
                # httptools says DELETE before a method is read, and the last request's until the next
                # request line is: a next line it could not read was refused as if to a HEAD after one,
                # head alone. The method is this request's once its target has been read (uvicorn
                # empties the target at each request's first byte, on_message_begin).
                if self.url and self.parser.get_method() == b"HEAD":
                    return reply[: reply.index(b"\r\n\r\n") + 4]
                return reply

            def _parsed_head_bytes(self) -> int:
                """The head's size as parsed: 'METHOD target HTTP/1.1\\r\\n', each 'name: value\\r\\n', '\\r\\n'."""
                line = len(self.parser.get_method()) + len(self.url) + 12
                return line + sum(len(name) + len(value) + 4 for name, value in self.headers) + 2

            def _count(self, status: int, seconds: float | None = None) -> None:
                """Count a reply written here, unless the application has the request: it books it then,
                with the status left in its scope when no reply of its own had started."""
                if self._app_has_it:
                    cycle: Any = self.cycle
                    if cycle is not None and not cycle.response_started:
                        cycle.scope[ANSWERED_HERE] = status
                    return
                # The method is known once the target has been read (the parser reads the method first).
                method = self.parser.get_method().decode("ascii") if self.url else UNKNOWN_METHOD_LABEL
                if seconds is None:
                    seconds = self.loop.time() - self._began if self._began else 0.0
                guard.answered(method, status, seconds)

            def _feed(self, data: bytes) -> None:
                """uvicorn's ``data_received``, but for an upgrade, which is declined (see the module's docstring)."""
                self._unset_keepalive_if_required()
                try:
                    self.parser.feed_data(data)
                except httptools.HttpParserInvalidMethodError:
                    # Where the refused request begins is known only when it begins the data: after a
                    # request read whole in the same data (a body sent without Content-Length, say), it
                    # is malformed, not a request line.
                    if self._done_in_read or not _REQUEST_LINE.match(data):
                        self.send_400_response("Invalid HTTP request received.")  # not a request line at all
                        return
                    # RFC 9110 §9.1: a well-formed request with a method the server does not know is
                    # answered 501, not 400.
                    self._close_with(guard.unknown_method, 501)
                except httptools.HttpParserError:
                    msg = "Invalid HTTP request received."
                    self.logger.warning(msg)
                    self.send_400_response(msg)
                except httptools.HttpParserUpgrade as exc:
                    if self._should_upgrade():
                        self._without_upgrade(data[exc.args[0] :])

            def _should_upgrade(self) -> bool:
                # True: the request is left alone (no checks, no cycle, no body), and _feed parses it
                # again. CONNECT asks for a tunnel, not an upgrade: on_headers_complete answers it 501.
                return bool(self.parser.should_upgrade()) and self.parser.get_method() != b"CONNECT"

            def _without_upgrade(self, rest: bytes) -> None:
                """Parse the request again from its head without Upgrade, then ``rest`` (its body and on)."""
                version = self.parser.get_http_version().encode("ascii")
                head = [self.parser.get_method(), b" ", self.url, b" HTTP/", version, b"\r\n"]
                for name, value in self.headers:
                    if name == b"connection":
                        value = b",".join(t for t in value.split(b",") if t.strip().lower() != b"upgrade")
                        if not value.strip():
                            continue
                    if name != b"upgrade":
                        head += [name, b": ", value, b"\r\n"]
                self.parser = httptools.HttpRequestParser(self)
                again = b"".join(head) + b"\r\n" + rest
                self._read = len(again)  # the head's upper bound when it is parsed again
                self._feed(again)

            def send_400_response(self, msg: str) -> None:  # uvicorn calls it when the parser refuses
                guard.malformed_requests += 1
                self._close_with(guard.malformed, 400)

            def on_message_begin(self) -> None:
                self._in_head, self._head_began, self._head_bytes = True, True, 0
                self._head_upper, self._began, self._app_has_it = self._read, self.loop.time(), False
                super().on_message_begin()
                if self._read_timer is None:
                    self._arm()

            def on_headers_complete(self) -> None:
                self._in_head = False
                if self._head_upper > guard.max_head_bytes and self._parsed_head_bytes() > guard.max_head_bytes:
                    self._head_too_large()  # a head that arrived whole in few reads
                    return
                if self._should_upgrade():  # checked and admitted once, when parsed again (see _feed)
                    return
                version = self.parser.get_http_version()
                if version != "1.1" and version != "1.0":
                    self._close_with(guard.version_not_supported, 505)
                    return
                hosts = [value for name, value in self.headers if name == b"host"]
                if len(hosts) > 1 or (not hosts and version == "1.1") or (hosts and not _HOST.fullmatch(hosts[0])):
                    # RFC 9112 §3.2: a server must answer 400 to an HTTP/1.1 request without a Host,
                    # with two (a proxy in front may have read the other one), or with one that is no host.
                    self.send_400_response("Host missing, repeated or invalid")
                    return
                if self.parser.get_method() == b"CONNECT":
                    self._close_with(guard.no_tunnel, 501)
                    return
                if version == "1.0" and any(n == b"transfer-encoding" for n, _ in self.headers):
                    guard.malformed_requests += 1
                    self._close_with(guard.coding_in_http_1_0, 400)
                    return
                if b"#" in self.url or (self.url == _ASTERISK and self.parser.get_method() != b"OPTIONS"):
                    guard.malformed_requests += 1
                    self._close_with(guard.fragment if b"#" in self.url else guard.asterisk_not_options, 400)
                    return
                if not _names_a_probe(self.url) and not guard.request_may_start():
                    cycle: Any = self.cycle
                    pipelined = cycle is not None and not cycle.response_complete
                    if pipelined or not self.parser.should_keep_alive():
                        # After the replies to the requests ahead of it (RFC 9112 §9.3.2): written at
                        # once, it went out before them and the connection closed on them.
                        self._close_with(guard.busy, 503)
                    else:
                        self._count(503)
                        self._skipping = True
                        self.transport.write(self._for_method(guard.busy_keep_alive))
                        # The refusal goes out now; this connection's next request is read only after
                        # half the Retry-After it was given. A caller that retries at once (ignoring
                        # it) would otherwise turn refusals into the event loop's whole work and
                        # starve the requests it admitted.
                        self.flow.pause_reading()
                        self.loop.call_later(RETRY_AFTER_SECONDS / 2, self._resume)
                    return
                if version == "1.0":
                    # RFC 9110 §10.1.1 and §15.2: an HTTP/1.0 request's 100-continue is ignored, since
                    # such a client takes the first status line it reads, an interim one too, for the reply.
                    self.expect_100_continue = False
                if self.url[:1] != b"/":
                    self.url = _with_path(self.url, self.parser.get_method())
                before = self.cycle
                super().on_headers_complete()
                cycle = self.cycle
                # Kept only while the new request waits behind it (no finished cycle is held on to).
                self._ahead = before if before is not None and not before.response_complete else None
                # Made just now, for this request. A reply to HEAD is a head alone: uvicorn writes
                # no body after it, so there is nothing to hold it for.
                if cycle is not None and cycle is not before:
                    self._app_has_it = True
                    self._message_done = False
                    if b"%2" in self.url and _ENCODED_SLASH.search(cycle.scope["raw_path"]):
                        cycle.scope["path"] = _path_keeping_encoded_slashes(cycle.scope["raw_path"])
                    if cycle.scope["method"] != "HEAD":
                        cycle.transport = _HeadWithBody(self.transport)

            def on_body(self, body: bytes) -> None:
                if not (self._refused or self._skipping):
                    super().on_body(body)

            def on_message_complete(self) -> None:
                if self._refused:
                    return
                self._disarm()
                self._done_in_read += 1
                self._message_done = True
                if self._skipping:  # the refused request has been read past: wait for the next one
                    self._skipping = False
                    self.timeout_keep_alive_task = self.loop.call_later(
                        self.timeout_keep_alive, self.timeout_keep_alive_handler
                    )
                    return
                super().on_message_complete()
                if not self.pipeline:
                    # A body past uvicorn's 64 KiB buffer paused reading, and only the reply resumed
                    # it: a client that reset meanwhile went unnoticed until then, its request computed
                    # for nobody and booked as answered. Read on, as after a smaller body: a pipelined
                    # request's head pauses reading again (uvicorn), and a half-close is eof_received's.
                    self.flow.resume_reading()

            _eof = False  # the client half-closed after a whole request (see eof_received)

            def eof_received(self) -> bool | None:  # type: ignore[override]  # asyncio.Protocol allows a bool
                # A client may send a whole request and then shut its side for writing (RFC 9112
                # §9.6 has a client half-close when done sending). uvicorn took that for a
                # disconnect: the reply was never written. Keep the connection open for writing while
                # a whole request still waits for its reply, and close it once it is answered; a
                # request cut short, or none, closes it now as before.
                cycle: Any = self.cycle
                if self._deferred is not None or (
                    cycle is not None and not cycle.response_complete and not cycle.more_body and not self._refused
                ):
                    self._eof = True
                    return True
                return None

            def on_response_complete(self) -> None:
                super().on_response_complete()
                if self._deferred is not None:
                    cycle: Any = self.cycle
                    if not self.pipeline and cycle.response_complete and not self.transport.is_closing():
                        reply, self._deferred = self._deferred, None
                        self.transport.write(reply)
                        self.transport.close()
                    return
                if self._eof and not self.pipeline and not self.transport.is_closing():
                    self._unset_keepalive_if_required()
                    self.transport.close()

            def _resume(self) -> None:
                if not self.transport.is_closing():
                    self.flow.resume_reading()

            def _arm(self) -> None:
                self._read_timer = self.loop.call_later(guard.read_timeout, self._too_slow)

            def _disarm(self) -> None:
                if self._read_timer is not None:
                    self._read_timer.cancel()
                    self._read_timer = None

            def _too_slow(self) -> None:
                self._read_timer = None
                if self.transport.is_closing():
                    return
                guard.timed_out += 1
                cycle: Any = self.cycle
                if cycle is not None and (
                    (self._message_done and not cycle.response_complete)
                    or (self.pipeline and self.pipeline[0][0] is cycle)
                ):
                    # The stalled request waits behind one still being answered: its 408 follows that
                    # reply (RFC 9112 §9.3.2), which closing now would have lost.
                    self._close_with(guard.too_slow, 408)
                    return
                if cycle is None or not cycle.response_started:
                    self.transport.write(guard.too_slow)
                    self._count(408, guard.read_timeout)  # the deadline ran from when the timer was armed
                self.transport.close()

        return GuardedHttpToolsProtocol


__all__ = ["ANSWERED_HERE", "PROBE_PATHS", "UNMATCHED", "WITH_BODY", "ConnectionGuard"]
