"""``textsieve serve``: settings from the environment and flags, then uvicorn.

Shutdown. On SIGTERM (or Ctrl-C) uvicorn closes the listening socket, lets the requests it has
accepted finish (up to ``GRACEFUL_SECONDS``), then runs the app's shutdown. Afterwards it
restores the previous signal handlers and re-raises the signal, so that the default action ends
the process; for SIGTERM that would make every orderly stop look like a crash (exit status
-15), so a handler installed first turns the re-raised SIGTERM into a normal return, exit 0.
"""

from __future__ import annotations

import argparse
import logging
import signal
import sys
from types import FrameType

from textsieve.service.settings import load_settings

GRACEFUL_SECONDS = 10


def cli_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from textsieve.service import logs
    from textsieve.service.web.app import create_app

    settings = load_settings(
        host=args.host,
        port=args.port,
        registry=args.registry,
        blobs=getattr(args, "blobs", None),
        models=getattr(args, "models", None),
        workers=getattr(args, "workers", None),
        inference=getattr(args, "inference", None),
    )
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
    config = uvicorn.Config(
        create_app(settings),
        host=settings.host,
        port=settings.port,
        access_log=False,
        log_config=None,
        lifespan="on",
        timeout_graceful_shutdown=GRACEFUL_SECONDS,
        server_header=False,
    )
    server = uvicorn.Server(config)
    stopped: list[int] = []

    def _on_sigterm(signum: int, frame: FrameType | None) -> None:
        if not server.started:
            raise SystemExit(0)  # uvicorn has not taken the signal over yet: nothing accepted, stop now
        stopped.append(signum)  # uvicorn re-raises SIGTERM after its graceful shutdown: end normally

    previous = signal.signal(signal.SIGTERM, _on_sigterm)
    try:
        server.run()
    except KeyboardInterrupt:
        pass  # Ctrl-C: uvicorn has shut down gracefully and re-raised SIGINT
    finally:
        signal.signal(signal.SIGTERM, previous)
    if stopped:
        log.info("stopped on SIGTERM after answering the requests in flight")
    return 0


__all__ = ["cli_serve"]
