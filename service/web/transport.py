"""Connections: a cap per replica and a deadline for reading each request.

uvicorn bounds neither the number of open connections (its ``limit_concurrency`` answers a
plain-text 503 only once a request's headers have been read) nor the time a client may take to
send a request: a connection that trickles a byte every few seconds, or sends nothing at all,
holds its socket and buffers for ever. This module gives uvicorn's httptools protocol both:

- **Connection cap.** A connection beyond ``max_connections`` is answered at once with a
  problem+json 503 carrying ``Retry-After`` and ``Connection: close``, and closed, before
  anything is read from it.
- **Read deadline.** From the moment a connection opens, or a keep-alive connection's next
  request begins, the client has ``read_timeout_seconds`` to send the request's headers and
  whole body. Past it the connection is answered 408 (RFC 9110 §15.5.9) if no response has
  started, and closed. Idle keep-alive connections are closed by uvicorn after
  ``keepalive_seconds`` (its ``timeout_keep_alive``).

Both are counted (:class:`ConnectionGuard`) and exposed in ``/metrics``.
"""

from __future__ import annotations

import asyncio
from typing import Any

import orjson
from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol

from textsieve.service.web.problems import MEDIA_TYPE


def _raw_response(status: int, reason: str, slug: str, title: str, detail: str, retry_after: int | None) -> bytes:
    body = orjson.dumps({"type": f"/problems/{slug}", "title": title, "status": status, "detail": detail})
    head = [
        f"HTTP/1.1 {status} {reason}",
        f"content-type: {MEDIA_TYPE}",
        f"content-length: {len(body)}",
        "connection: close",
    ]
    if retry_after is not None:
        head.append(f"retry-after: {retry_after}")
    return ("\r\n".join(head) + "\r\n\r\n").encode("ascii") + body


class ConnectionGuard:
    """The replica's connection cap and read deadline, and what they refused or closed."""

    def __init__(self, *, max_connections: int, read_timeout: float) -> None:
        self.max_connections = max_connections
        self.read_timeout = read_timeout
        self.open = 0
        self.refused = 0
        self.timed_out = 0
        self.over_capacity = _raw_response(
            503,
            "Service Unavailable",
            "overloaded",
            "This replica is at capacity",
            f"this replica already has {max_connections} open connections (TEXTSIEVE_MAX_CONNECTIONS): "
            "retry after the Retry-After seconds, or on another replica",
            1,
        )
        self.too_slow = _raw_response(
            408,
            "Request Timeout",
            "request-timeout",
            "The request arrived too slowly",
            f"the request's headers and body did not arrive within {read_timeout:g} s "
            "(TEXTSIEVE_READ_TIMEOUT_SECONDS); the connection is closed",
            None,
        )

    def protocol(self) -> type[HttpToolsProtocol]:
        """uvicorn's httptools protocol with this guard's cap and deadline (``uvicorn.Config(http=…)``)."""
        guard = self

        class GuardedHttpToolsProtocol(HttpToolsProtocol):
            _refused = False
            _read_timer: asyncio.TimerHandle | None = None

            def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
                if guard.open >= guard.max_connections:
                    guard.refused += 1
                    self._refused = True
                    self.transport = transport
                    transport.write(guard.over_capacity)
                    transport.close()
                    return
                guard.open += 1
                super().connection_made(transport)
                self._arm()

            def connection_lost(self, exc: Exception | None) -> None:
                if self._refused:
                    return
                guard.open -= 1
                self._disarm()
                super().connection_lost(exc)

            def data_received(self, data: bytes) -> None:
                if self._refused:
                    return
                super().data_received(data)

            def on_message_begin(self) -> None:
                super().on_message_begin()
                if self._read_timer is None:
                    self._arm()

            def on_message_complete(self) -> None:
                self._disarm()
                super().on_message_complete()

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
                if cycle is None or not cycle.response_started:
                    self.transport.write(guard.too_slow)
                self.transport.close()

        return GuardedHttpToolsProtocol


__all__ = ["ConnectionGuard"]
