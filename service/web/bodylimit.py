"""Request bodies: the per-request limit and the replica's budget for bodies in flight.

``max_body_bytes`` bounds one request: a declared Content-Length over it is refused (413)
without reading, a chunked body when it crosses it. ``body_budget_bytes`` bounds all of them
together: every request reserves its body's bytes (the declared length at once, a chunked body
as it arrives) before they are read, and gives them back when it has been answered. A request
that would take the replica past the budget is refused at once with 503, Retry-After and
``Connection: close`` (so its unread body is never read), instead of every slow or stalled
upload holding megabytes until memory runs out. When the bodies in flight drop back to none
after a burst, freed memory is handed back to the operating system (see
:mod:`textsieve.service.inference.memory`), so a replica's memory returns near its idle level.

The refusals are the same problem+json as every other limit (:mod:`textsieve.service.web.problems`).
On the admin and verdict routes the token is checked before any of them (:mod:`textsieve.service.web.tokens`).
A request refused here never reaches the router, so the route its method and path would have
matched is looked up for the access log and the HTTP metrics (:func:`_name_route`), on the refusal
only: a 413 or 415 to ``POST /v1/predict`` was booked under ``unmatched``, with the 404s.
"""

from __future__ import annotations

import asyncio
import gc
from collections.abc import Sequence

from starlette.datastructures import Headers
from starlette.routing import BaseRoute, Match
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from textsieve.errors import InputError, LimitError, OverloadedError
from textsieve.service.inference.memory import release_freed_memory
from textsieve.service.web.problems import ContentEncodingError, TransferCodingError, render
from textsieve.service.web.tokens import TokenGate
from textsieve.service.web.transport import WITH_BODY

TRIM_AFTER_BYTES = 8 * 1024 * 1024  # hand memory back once at least this much passed through
TRIM_EVERY_SECONDS = 1.0


class BodyBudget:
    """Bytes of request bodies reserved across every connection of this replica."""

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self.used = 0
        self.refused = 0
        self._since_trim = 0
        self._trim_pending = False

    def take(self, n: int) -> bool:
        if self.used + n > self.limit:
            self.refused += 1
            return False
        self.used += n
        self._since_trim += n
        return True

    def give_back(self, n: int) -> None:
        self.used -= n
        if self.used == 0 and self._since_trim >= TRIM_AFTER_BYTES and not self._trim_pending:
            # A moment later, not now: the request that gave its bytes back is still unwinding
            # (its body, a logged traceback) and frees them only after this returns.
            self._trim_pending = True
            asyncio.get_running_loop().call_later(TRIM_EVERY_SECONDS, self._trim)

    def _trim(self) -> None:
        self._trim_pending = False
        if self.used == 0:
            self._since_trim = 0
            # A closed connection's protocol, request cycle and body chunks refer to each other, so
            # only the cycle collector frees them, and in a quiet replica it may not run for minutes;
            # until it does the allocator has nothing to hand back.
            gc.collect()
            release_freed_memory()


def _too_large(limit: int, got: int | None) -> LimitError:
    size = f"{got} bytes" if got is not None else "more bytes"
    return LimitError(
        f"the request body has {size}; the limit is {limit} bytes (TEXTSIEVE_MAX_BODY_BYTES): "
        "send fewer or shorter texts per request",
        limit={"name": "max_body_bytes", "setting": "TEXTSIEVE_MAX_BODY_BYTES", "value": limit, "got": got},
    )


def _over_budget(budget: BodyBudget) -> OverloadedError:
    return OverloadedError(
        f"this replica is already holding {budget.used} bytes of request bodies, its budget is "
        f"{budget.limit} (TEXTSIEVE_BODY_BUDGET_BYTES): retry after the Retry-After seconds, or on another replica",
        retry_after=1,
    )


def _repeated_content_type(types: list[str]) -> InputError:
    # RFC 9110 §8.3: one media type. Which line a filter in front reads is its own choice (one that
    # reads "text/plain" skips its JSON checks), so none is taken here.
    named = ", ".join(repr(t[:100]) for t in types[:5])
    message = (
        f"the request has {len(types)} Content-Type header lines ({named}); send one: Content-Type: application/json"
    )
    return InputError(
        f"Content-Type: {message}", errors=[{"field": "Content-Type", "message": message, "type": "header_repeated"}]
    )


def _name_route(scope: Scope, routes: Sequence[BaseRoute]) -> None:
    """Put in ``scope`` the route the router would have taken for it, as the router does: the first
    that matches its path and method, else the first that matches its path (whose 405 it would have
    answered). The routes name themselves in the scope they give back (FastAPI's, openapi._NamedRoute)."""
    partial: Scope | None = None
    for route in routes:
        match, child_scope = route.matches(scope)
        if match is Match.FULL:
            partial = child_scope
            break
        if match is Match.PARTIAL and partial is None:
            partial = child_scope
    if partial is not None and "route" in partial:
        scope["route"] = partial["route"]


class BodyLimitMiddleware:
    def __init__(
        self,
        app: ASGIApp,
        max_bytes: int,
        budget: BodyBudget,
        tokens: TokenGate | None = None,
        routes: Sequence[BaseRoute] = (),
    ) -> None:
        self.app = app
        self.max_bytes = max_bytes
        self.budget = budget
        self.tokens = tokens  # the admin and reviewer routes' tokens, checked before anything else here
        self.routes = routes  # the app's routes: a refused request is booked under the one it asked for

    async def _refuse(self, exc: Exception, scope: Scope, receive: Receive, send: Send) -> None:
        _name_route(scope, self.routes)
        response = render(exc, scope)
        response.headers["Connection"] = "close"  # the unread rest of the body is never read
        await response(scope, receive, send)

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] not in WITH_BODY:
            await self.app(scope, receive, send)
            return
        headers = Headers(scope=scope)
        if self.tokens is not None:
            refusal = self.tokens.refusal(scope)
            if refusal is not None:
                # A caller without the route's token learns nothing about its body, and none of it
                # is read (service/web/tokens.py); a body it announced is left unread, so close.
                _name_route(scope, self.routes)
                response = render(refusal, scope)
                if headers.get("content-length", "0") != "0" or "transfer-encoding" in headers:
                    response.headers["Connection"] = "close"
                await response(scope, receive, send)
                return
        types = headers.getlist("content-type")
        if len(types) > 1:
            await self._refuse(_repeated_content_type(types), scope, receive, send)
            return
        # Every line of the header, combined (RFC 9110 §5.3): "identity" then "gzip" is a gzip body.
        content_codings = [c.strip() for v in headers.getlist("content-encoding") for c in v.split(",") if c.strip()]
        if any(c.lower() != "identity" for c in content_codings):
            # A compressed body would be read, counted and parsed as if it were JSON; say so at once
            # (RFC 9110 §15.5.16, with Accept-Encoding naming what is accepted: RFC 7694).
            _name_route(scope, self.routes)
            response = render(ContentEncodingError(", ".join(content_codings)), scope)
            response.headers["Accept-Encoding"] = "identity"
            response.headers["Connection"] = "close"  # its body is never read
            await response(scope, receive, send)
            return
        # The parser takes "gzip, chunked" (chunked last) and undoes only the chunking; the gzip would
        # be read as JSON. RFC 9112 §6.1: a transfer coding the server does not understand is a 501.
        codings = [c.strip() for v in headers.getlist("transfer-encoding") for c in v.split(",") if c.strip()]
        if any(c.lower() != "chunked" for c in codings):
            await self._refuse(TransferCodingError(codings), scope, receive, send)
            return
        declared = headers.get("content-length")
        expected = int(declared) if declared is not None and declared.isdigit() else None
        if expected is not None and expected > self.max_bytes:
            await self._refuse(_too_large(self.max_bytes, expected), scope, receive, send)
            return
        taken = 0
        try:
            if expected is not None:
                # A declared length is reserved whole before anything is read; the app reads it.
                if expected and not self.budget.take(expected):
                    await self._refuse(_over_budget(self.budget), scope, receive, send)
                    return
                taken = expected
                await self.app(scope, receive, send)
                return
            chunks: list[bytes] = []
            size = 0
            while True:
                message = await receive()
                if message["type"] != "http.request":  # the client went away (or was timed out)
                    return
                chunk = message.get("body", b"")
                size += len(chunk)
                if size > self.max_bytes:
                    await self._refuse(_too_large(self.max_bytes, None), scope, receive, send)
                    return
                if size > taken:  # a chunked body reserves as it arrives
                    if not self.budget.take(size - taken):
                        await self._refuse(_over_budget(self.budget), scope, receive, send)
                        return
                    taken = size
                chunks.append(chunk)
                if not message.get("more_body", False):
                    break
            body = b"".join(chunks)
            del chunks
            sent = False

            async def replay() -> Message:
                nonlocal sent
                if not sent:
                    sent = True
                    return {"type": "http.request", "body": body, "more_body": False}
                return await receive()

            await self.app(scope, replay, send)
        finally:
            self.budget.give_back(taken)


__all__ = ["BodyBudget", "BodyLimitMiddleware"]
