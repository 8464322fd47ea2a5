"""HEAD on every path that answers GET (RFC 9110 §9.1: a general-purpose server supports GET and
HEAD; §9.3.2: HEAD is GET without the content).

FastAPI declares its routes for the methods they are written for and answers HEAD with 405, so a
deployment script or monitor that checks ``/healthz`` with ``curl -I`` or ``wget --spider`` would
see the replica as broken. Here a HEAD request is routed as GET, on a copy of the scope: the
server's own request cycle still knows the method is HEAD and sends the head alone, with the
Content-Length the GET reply would have had. The access log and metrics, outside this layer, see
HEAD; the route the router matched is copied back for them.
"""

from __future__ import annotations

from starlette.types import ASGIApp, Receive, Scope, Send


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


def allowed(allow: str) -> str:
    """An Allow header's methods with HEAD beside GET (a 405 from the router lists only GET)."""
    methods = [m.strip() for m in allow.split(",") if m.strip()]
    if "GET" in methods and "HEAD" not in methods:
        methods.insert(methods.index("GET") + 1, "HEAD")
    return ", ".join(methods)


__all__ = ["HeadAsGetMiddleware", "allowed"]
