"""Send a response's head and its first body part back to back.

uvicorn writes the status line and headers as soon as the app sends ``http.response.start``,
and the body when ``http.response.body`` follows. Between the two, control returns through
every middleware, and with inference threads in the process the interpreter may switch threads
there for milliseconds. A replica killed in that gap has sent a complete head and no body; a
proxy that has already passed the head on can no longer resend the request elsewhere, so the
caller gets a truncated reply (seen once in tests/deploy/test_deploy.py, SIGKILL under load). Holding
the head until the body is ready and sending both from here, just inside the outermost layer,
shrinks that gap to two function calls.
"""

from __future__ import annotations

from starlette.types import ASGIApp, Message, Receive, Scope, Send


class HeadWithBodyMiddleware:
    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        held: list[Message] = []

        async def send_together(message: Message) -> None:
            if message["type"] == "http.response.start":
                held.append(message)
                return
            if held and message["type"] == "http.response.body":
                head = held.pop()
                await send(head)
            await send(message)

        await self.app(scope, receive, send_together)
        if held:  # a head with no body message at all
            await send(held.pop())


__all__ = ["HeadWithBodyMiddleware"]
