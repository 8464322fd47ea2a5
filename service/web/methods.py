"""HEAD and OPTIONS on every path (RFC 9110 §9.1: a general-purpose server supports GET and HEAD;
§9.3.2: HEAD is GET without the content; §9.3.7: OPTIONS asks which methods a target answers).

FastAPI declares its routes for the methods they are written for and answers HEAD with 405, so a
deployment script or monitor that checks ``/healthz`` with ``curl -I`` or ``wget --spider`` would
see the replica as broken. Here a HEAD request is routed as GET, on a copy of the scope: the
server's own request cycle still knows the method is HEAD and sends the head alone, with the
Content-Length the GET reply would have had. The access log and metrics, outside this layer, see
HEAD; the route the router matched is copied back for them.

OPTIONS goes to the router like any method no route declares: on a path some route answers, the
router's 405 names that path's methods, and :func:`options_reply` turns it into a 204 with that
``Allow`` (``service/web/problems.py``, where the router's refusals become replies); ``OPTIONS *``
(RFC 9112 §3.2.4: the server as a whole) is a 204 naming every method the service answers. Both were
a 405, refusing the one method that asks what is allowed. No CORS headers: the reviewer page is
served from the same origin as the API, and no other origin is meant to call it.
"""

from __future__ import annotations

from collections.abc import Iterable

from starlette.responses import Response
from starlette.types import ASGIApp, Receive, Scope, Send

# The order an Allow header lists methods in (RFC 9110 §10.2.1 leaves it free).
_ORDER = ("GET", "HEAD", "POST", "PUT", "PATCH", "DELETE", "OPTIONS")
# What the service as a whole answers: the Allow of ``OPTIONS *``.
SERVER_METHODS = "GET, HEAD, POST, OPTIONS"
ASTERISK = "*"  # the asterisk-form request target (RFC 9112 §3.2.4), which only OPTIONS may use


class HeadAsGetMiddleware:
    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] != "HEAD":
            await self.app(scope, receive, send)
            return
        inner = dict(scope)
        inner["method"] = "GET"
        try:
            await self.app(inner, receive, send)
        finally:
            if "route" in inner:
                scope["route"] = inner["route"]


def allowed(methods: Iterable[str]) -> str:
    """An Allow header naming ``methods``, HEAD beside GET (a 405 from the router lists only GET), and
    OPTIONS, which every path answers."""
    given = {m.strip().upper() for m in methods if m.strip()}
    if "GET" in given:
        given.add("HEAD")
    given.add("OPTIONS")
    return ", ".join([m for m in _ORDER if m in given] + sorted(given.difference(_ORDER)))


def options_reply(allow: str) -> Response:
    """The reply to OPTIONS on a target answering ``allow``: 204, no content (RFC 9110 §15.3.5, so no
    Content-Length either, §8.6), and the Allow header."""
    return Response(status_code=204, headers={"Allow": allow})


__all__ = ["ASTERISK", "SERVER_METHODS", "HeadAsGetMiddleware", "allowed", "options_reply"]
