"""``textsieve serve``: settings from the environment and flags, then uvicorn."""

from __future__ import annotations

import argparse
import logging
import sys

from textsieve.service.settings import load_settings


def cli_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from textsieve.service import logs
    from textsieve.service.app import create_app

    settings = load_settings(
        host=args.host, port=args.port, registry=args.registry, blobs=getattr(args, "blobs", None),
        models=getattr(args, "models", None), workers=getattr(args, "workers", None),
    )
    logs.configure()
    logging.getLogger("textsieve.service").info(
        "serving on http://%s:%s (page at /, readiness at /readyz); registry %s; admin %s",
        settings.host, settings.port, settings.registry, "on" if settings.admin_enabled else "off")
    print(f"textsieve: serving on http://{settings.host}:{settings.port}/ (Ctrl-C stops)", file=sys.stderr, flush=True)
    uvicorn.run(create_app(settings), host=settings.host, port=settings.port, access_log=False, log_config=None,
                lifespan="on", timeout_graceful_shutdown=10, server_header=False)
    return 0


__all__ = ["cli_serve"]
