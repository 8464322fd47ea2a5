"""``textsieve serve``: its flags, settings from them and the environment, then uvicorn.

Shutdown. On SIGTERM (or Ctrl-C) uvicorn closes the listening socket, lets the requests it has
accepted finish (up to ``GRACEFUL_SECONDS``), then runs the app's shutdown. Afterwards it
restores the previous signal handlers and re-raises the signal, so that the default action ends
the process; for SIGTERM that would make every orderly stop look like a crash (exit status
-15), so a handler installed first turns the re-raised SIGTERM into a normal return, exit 0.
"""

from __future__ import annotations

import argparse
import gc
import logging
import signal
import sys
from types import FrameType
from typing import TYPE_CHECKING, Any

from textsieve.registry.cli import add_location_args

if TYPE_CHECKING:  # the web stack is imported only when a server starts (tests/test_cli.py)
    from collections.abc import Callable

    import uvicorn
    from uvicorn._types import ASGIApplication

    from textsieve.service.settings import Settings
    from textsieve.service.web.transport import ConnectionGuard

GRACEFUL_SECONDS = 10


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add ``serve``. Its flags default to None: the settings fill in the environment, then their defaults."""
    p = sub.add_parser("serve", help="serve predictions over HTTP")
    p.add_argument("--host", help="address to listen on (default: $TEXTSIEVE_HOST, else 127.0.0.1)")
    p.add_argument("--port", type=int, help="port to listen on (default: $TEXTSIEVE_PORT, else 8000)")
    p.add_argument(
        "--models",
        help="comma-separated model names to serve (default: $TEXTSIEVE_MODELS, else every model with a live version)",
    )
    p.add_argument("--workers", type=int, help="inference workers (default: $TEXTSIEVE_WORKERS, else one per core)")
    p.add_argument(
        "--inference",
        choices=("processes", "threads"),
        help="run inference workers as processes (fastest) or as threads of the server "
        "(default: $TEXTSIEVE_INFERENCE, else processes)",
    )
    add_location_args(p)
    p.set_defaults(func=cli_serve)


def server_config(
    app: ASGIApplication | Callable[..., Any], guard: ConnectionGuard, settings: Settings
) -> uvicorn.Config:
    """How ``serve`` runs uvicorn; bench/http_floor.py runs its floor app with the same."""
    import uvicorn

    return uvicorn.Config(
        app,
        http=guard.protocol(),  # connection cap and read deadline: service/web/transport.py
        timeout_keep_alive=settings.keepalive_seconds,
        host=settings.host,
        port=settings.port,
        access_log=False,
        log_config=None,
        lifespan="on",
        timeout_graceful_shutdown=GRACEFUL_SECONDS,
        server_header=False,
    )


def cli_serve(args: argparse.Namespace) -> int:
    from textsieve.service.settings import load_settings

    # Settings first: a bad flag or TEXTSIEVE_* value is one line before anything heavy loads.
    settings = load_settings(
        host=args.host,
        port=args.port,
        registry=args.registry,
        blobs=getattr(args, "blobs", None),
        models=getattr(args, "models", None),
        workers=getattr(args, "workers", None),
        inference=getattr(args, "inference", None),
    )

    import uvicorn

    from textsieve.service import logs
    from textsieve.service.web.app import create_app

    logs.configure()
    log = logging.getLogger("textsieve.service")
    log.info(
        "serving on http://%s:%s (page at /, readiness at /readyz); registry %s; admin %s",
        settings.host,
        settings.port,
        settings.registry_label,
        "on" if settings.admin_enabled else "off",
    )
    print(f"textsieve: serving on http://{settings.host}:{settings.port}/ (Ctrl-C stops)", file=sys.stderr, flush=True)
    app = create_app(settings)
    server = uvicorn.Server(server_config(app, app.state.guard, settings))
    stopped: list[int] = []

    def _on_sigterm(signum: int, frame: FrameType | None) -> None:
        if not server.started:
            raise SystemExit(0)  # uvicorn has not taken the signal over yet: nothing accepted, stop now
        stopped.append(signum)  # uvicorn re-raises SIGTERM after its graceful shutdown: end normally

    previous = signal.signal(signal.SIGTERM, _on_sigterm)
    # Everything alive now (the imports, the app, its routes and schemas) lives as long as the
    # process. Moved out of the cycle collector's reach, a full collection scans only what requests
    # created since, instead of stopping every request for tens of milliseconds each time it runs
    # (the open-loop tail in bench/README.md); the documented use of gc.freeze (Python docs, gc).
    gc.freeze()
    try:
        server.run()
    except KeyboardInterrupt:
        pass  # Ctrl-C: uvicorn has shut down gracefully and re-raised SIGINT
    finally:
        signal.signal(signal.SIGTERM, previous)
    if stopped:
        log.info("stopped on SIGTERM after answering the requests in flight")
    return 0


__all__ = ["cli_serve", "register", "server_config"]
