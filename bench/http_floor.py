"""The HTTP floor: what a single-text request costs on the service's server stack before any model work.

    .venv/bin/python bench/http_floor.py --port PORT --reply-bytes N

uvicorn runs exactly as ``textsieve serve`` runs it (``service/cli.py: server_config``: the
httptools protocol with the service's connection guard, uvloop, keep-alive and header settings,
from the same ``TEXTSIEVE_*`` settings). The app is a bare ASGI callable, no framework: it reads
the body, parses and validates it with the service's own request schema and limits
(``PredictRequest``, ``check_limits``), and answers a fixed JSON reply of ``N`` bytes, the size
of the service's typical reply to the same requests. What the service spends above this floor
(FastAPI's routing and dependencies, its middlewares, the batcher, the worker round trip, the
model) is its own cost and could in principle be cut; what the floor spends could not, short of
another server stack.
"""

from __future__ import annotations

import argparse
import json
from typing import Any

from textsieve.service.cli import server_config
from textsieve.service.settings import load_settings
from textsieve.service.web.app import connection_guard
from textsieve.service.web.predict import check_limits
from textsieve.service.web.schemas import PredictRequest

Scope = dict[str, Any]


def fixed_reply(size: int) -> bytes:
    """A JSON object shaped like a one-text prediction reply, padded to exactly ``size`` bytes."""
    head = {"model": "floor", "version": 1, "results": [{"label": "floor", "pad": ""}]}
    bare = len(json.dumps(head, separators=(",", ":")).encode())
    head["results"][0]["pad"] = "x" * max(0, size - bare)
    return json.dumps(head, separators=(",", ":")).encode()


def make_app(reply: bytes, settings: Any) -> Any:
    ok_headers = [(b"content-type", b"application/json"), (b"content-length", str(len(reply)).encode())]
    small = b'{"ready":true}'
    small_headers = [(b"content-type", b"application/json"), (b"content-length", str(len(small)).encode())]

    async def app(scope: Scope, receive: Any, send: Any) -> None:
        if scope["type"] == "lifespan":
            while True:
                message = await receive()
                kind = message["type"].rsplit(".", 1)[-1]  # startup / shutdown
                await send({"type": f"lifespan.{kind}.complete"})
                if kind == "shutdown":
                    return
        if scope["method"] != "POST":  # /healthz, /readyz: the runner waits on them
            await send({"type": "http.response.start", "status": 200, "headers": small_headers})
            await send({"type": "http.response.body", "body": small})
            return
        chunks = []
        more = True
        while more:
            message = await receive()
            chunks.append(message.get("body", b""))
            more = message.get("more_body", False)
        check_limits(PredictRequest.model_validate_json(b"".join(chunks)), settings)
        await send({"type": "http.response.start", "status": 200, "headers": ok_headers})
        await send({"type": "http.response.body", "body": reply})

    return app


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--port", type=int, required=True)
    parser.add_argument("--reply-bytes", type=int, required=True, help="size of the fixed reply")
    args = parser.parse_args()
    import uvicorn

    settings = load_settings(host="127.0.0.1", port=args.port)
    app = make_app(fixed_reply(args.reply_bytes), settings)
    uvicorn.Server(server_config(app, connection_guard(settings), settings)).run()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
