"""Request ids, one JSON access-log line per request, and the HTTP metrics.

A pure ASGI middleware (no response buffering). The request id is the caller's
``X-Request-Id`` when it is short and plain, else a fresh UUID4; it is echoed as a response
header, put in problem bodies and logged, so a caller's report leads straight to the log line.
The predict lane (:mod:`textsieve.service.web.lane`) answers most predictions without this
middleware and books them through the same :func:`begin` and :meth:`Access.finish`.
"""

from __future__ import annotations

import logging
import random
import re
import time
from typing import Any

from starlette.datastructures import Headers, MutableHeaders
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from textsieve.service.inference.admission import CLIENT_LEFT
from textsieve.service.logs import ACCESS, line_handler
from textsieve.service.telemetry import ServiceMetrics
from textsieve.service.web.methods import ASTERISK
from textsieve.service.web.transport import ANSWERED_HERE, PROBE_PATHS, WITH_BODY, ConnectionGuard

_SAFE_ID = re.compile(r"[A-Za-z0-9._:-]{1,128}")
# Booked for a request whose client went away mid-body (whatever the app made of the missing body,
# its reply went nowhere), or later but before its reply was written whole (the connection layer
# marks its scope, transport.CLIENT_LEFT): nginx's "client closed request". When the connection layer answered it
# instead (408 for a body that stalled past the read deadline, 400 for broken chunked framing), that
# status is booked, as the client got it (transport.ANSWERED_HERE, read only on this rare path).
CLIENT_GONE = 499
log = logging.getLogger(ACCESS)
# Request ids need to be unique, not secret. os.urandom (behind uuid4) releases the GIL, and
# with inference threads busy, getting it back can cost the event loop milliseconds per request.
_ids = random.Random()


def new_request_id() -> str:
    return f"{_ids.getrandbits(128):032x}"


def begin(scope: Scope, given: str) -> tuple[str, float]:
    """The request's id (``given``, the caller's X-Request-Id, when short and plain) and its
    arrival time, both also put in its state."""
    rid = given if _SAFE_ID.fullmatch(given) else new_request_id()
    state = scope.setdefault("state", {})
    state["request_id"] = rid
    started = time.perf_counter()
    state["received"] = started  # a caller's Textsieve-Deadline counts from here
    return rid, started


def _route(scope: Scope) -> str:
    route = scope.get("route")
    path = getattr(route, "path", None)
    if isinstance(path, str):
        return path
    # ``OPTIONS *`` (the server as a whole; only OPTIONS reaches the app with it, service/web/methods.py)
    # matches no route but is answered 204: booked under its target, not with the 404s.
    return ASTERISK if scope.get("path") == ASTERISK else "unmatched"


class Access:
    """Where answered requests are booked: the HTTP metrics, the access log and the guard's count."""

    def __init__(self, metrics: ServiceMetrics, enabled: bool = True, guard: ConnectionGuard | None = None) -> None:
        self.metrics = metrics
        self.enabled = enabled
        self.guard = guard  # counts and times the requests inside the app (service/web/transport.py)

    def finish(self, scope: Scope, route: str, status: int, started: float, entered: float | None) -> None:
        """Book one answered request; ``entered`` is when it entered the guard's count (None: it never did)."""
        ended = time.perf_counter()
        seconds = ended - started
        guard = self.guard
        if guard is not None and entered is not None:
            guard.inflight -= 1
            guard.request_finished(ended - entered, ended)
        self.metrics.answered(scope["method"], route, status, seconds)
        if self.enabled:
            state = scope["state"]
            fields: dict[str, Any] = {
                "event": "request",
                "request_id": state["request_id"],
                "method": scope["method"],
                "path": scope["path"],
                "route": route,
                "status": status,
                "duration_ms": round(seconds * 1000, 3),
                "client": (scope.get("client") or ("", 0))[0],
            }
            for key in ("model", "version", "texts"):
                if key in state:
                    fields[key] = state[key]
            handler = line_handler(log)
            if handler is not None:  # as the line below would, with no LogRecord made on the loop
                handler.add_fields(ACCESS, fields)
            else:
                log.info("request", extra={"fields": fields})


class AccessMiddleware:
    def __init__(self, app: ASGIApp, access: Access) -> None:
        self.app = app
        self.access = access

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        rid, started = begin(scope, Headers(scope=scope).get("x-request-id", ""))
        status = 0  # no response started

        async def send_with_id(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = int(message["status"])
                MutableHeaders(scope=message)["X-Request-Id"] = rid
            await send(message)

        # The adaptive request limit counts and times work, not uploads: a request enters it once
        # its whole body has arrived (at once when it has none), so slow or stalled uploads (bounded
        # by the body budget and the read deadline) neither fill the limit nor shrink it. Probes
        # stay outside it: a busy replica must still answer its liveness and readiness checks.
        guard = None if scope["path"] in PROBE_PATHS else self.access.guard
        entered: float | None = None
        # The connection ended before the body did: whatever the app answers after that goes nowhere.
        # The client got the connection layer's reply (408, 400) or none at all (499).
        cut = False
        app_receive = receive
        if guard is not None:
            if scope["method"] in WITH_BODY:

                async def app_receive() -> Message:
                    nonlocal entered, cut
                    message = await receive()
                    if entered is None:
                        if message["type"] != "http.request":
                            cut = True
                        elif not message.get("more_body"):
                            entered = time.perf_counter()
                            guard.inflight += 1
                    return message

            else:
                entered = started
                guard.inflight += 1
        try:
            await self.app(scope, app_receive, send_with_id)
        except BaseException:
            status = status or 500  # the server answers it 500
            raise
        finally:
            if cut:
                booked = scope.get(ANSWERED_HERE, CLIENT_GONE)
            else:
                booked = CLIENT_GONE if CLIENT_LEFT in scope else status or CLIENT_GONE
            self.access.finish(scope, _route(scope), booked, started, entered)


__all__ = ["CLIENT_GONE", "Access", "AccessMiddleware", "begin"]
