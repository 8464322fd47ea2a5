"""Refuse request bodies above ``max_body_bytes`` before anything parses them.

A declared Content-Length over the limit is refused without reading; a body without one
(chunked) is read up to the limit and replayed to the app. The refusal is the same
problem+json as every other limit (built by :mod:`textsieve.service.web.problems`).
"""

from __future__ import annotations

from starlette.datastructures import Headers
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from textsieve.errors import LimitError
from textsieve.service.web.problems import render

_WITH_BODY = frozenset({"POST", "PUT", "PATCH"})


def _too_large(limit: int, got: int | None) -> LimitError:
    size = f"{got} bytes" if got is not None else "more bytes"
    return LimitError(
        f"the request body has {size}; the limit is {limit} bytes (TEXTSIEVE_MAX_BODY_BYTES): "
        "send fewer or shorter texts per request",
        limit={"name": "max_body_bytes", "setting": "TEXTSIEVE_MAX_BODY_BYTES", "value": limit, "got": got},
    )


class BodyLimitMiddleware:
    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] not in _WITH_BODY:
            await self.app(scope, receive, send)
            return
        declared = Headers(scope=scope).get("content-length")
        if declared is not None:
            if declared.isdigit() and int(declared) > self.max_bytes:
                await render(_too_large(self.max_bytes, int(declared)), scope)(scope, receive, send)
                return
            await self.app(scope, receive, send)
            return
        chunks: list[bytes] = []
        size = 0
        while True:
            message = await receive()
            if message["type"] != "http.request":  # the client went away
                return
            chunk = message.get("body", b"")
            size += len(chunk)
            if size > self.max_bytes:
                await render(_too_large(self.max_bytes, None), scope)(scope, receive, send)
                return
            chunks.append(chunk)
            if not message.get("more_body", False):
                break
        body = b"".join(chunks)
        sent = False

        async def replay() -> Message:
            nonlocal sent
            if not sent:
                sent = True
                return {"type": "http.request", "body": body, "more_body": False}
            return await receive()

        await self.app(scope, replay, send)


__all__ = ["BodyLimitMiddleware"]
