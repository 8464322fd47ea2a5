"""``textsieve serve``: its flags, settings from them and the environment, then uvicorn.

Shutdown. On SIGTERM (or Ctrl-C) uvicorn closes the listening socket, lets the requests it has
accepted finish (up to ``GRACEFUL_SECONDS``), then runs the app's shutdown. Afterwards it
restores the previous signal handlers and re-raises the signal, so that the default action ends
the process; for SIGTERM that would make every orderly stop look like a crash (exit status
-15), so a handler installed first turns the re-raised SIGTERM into a normal return, exit 0.
"""

from __future__ import annotations

import argparse
import errno
import gc
import logging
import os
import signal
import socket
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
        ws="none",  # no WebSocket routes; an Upgrade is declined (service/web/transport.py)
        # uvicorn believes X-Forwarded-For from 127.0.0.1 unless FORWARDED_ALLOW_IPS says otherwise,
        # and serve binds 127.0.0.1 with no proxy in front by default: every caller could then
        # write any text as its client address in the access log (CWE-348, CWE-117). Only proxies
        # an operator names are believed (deploy/ names nginx); otherwise the socket's peer is logged.
        proxy_headers=bool(os.environ.get("FORWARDED_ALLOW_IPS", "").strip()),
    )


def listen(host: str, port: int) -> list[socket.socket]:
    """Bind the listening sockets before anything loads, so that a port in use or a host that is not
    this machine's is one line and an exit status, not a log record after "serving on".

    Like asyncio's ``create_server`` (which uvicorn calls when given a host and port): one socket
    per address the host resolves to, SO_REUSEADDR, IPv6 sockets IPv6-only. Port 0 lets the
    system choose; every address then gets the port the first was given.
    """
    from textsieve.errors import InputError, UnavailableError

    where = f"{host}:{port}" if ":" not in host else f"[{host}]:{port}"
    try:
        infos = socket.getaddrinfo(host or None, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
    except (socket.gaierror, UnicodeError) as exc:
        raise InputError(f"--host / TEXTSIEVE_HOST {host!r}: not an address of this machine ({exc})") from None
    sockets: list[socket.socket] = []
    seen: set[tuple[int, object]] = set()
    try:
        for family, kind, proto, _, address in infos:
            if (family, address[:2]) in seen:
                continue
            seen.add((family, address[:2]))
            sock = socket.socket(family, kind, proto)
            sockets.append(sock)
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            if family == socket.AF_INET6:
                sock.setsockopt(socket.IPPROTO_IPV6, socket.IPV6_V6ONLY, 1)
            if port == 0 and len(sockets) > 1:
                address = (address[0], sockets[0].getsockname()[1], *address[2:])
            try:
                sock.bind(address)
            except OSError as exc:
                if exc.errno == errno.EADDRINUSE:
                    raise UnavailableError(
                        f"cannot listen on {where}: the port is in use by another process; stop it, "
                        "or choose another port (--port or TEXTSIEVE_PORT)"
                    ) from None
                if exc.errno == errno.EACCES:
                    raise InputError(
                        f"cannot listen on {where}: permission denied (ports below 1024 need privileges); "
                        "choose a port from 1024 to 65535 (--port or TEXTSIEVE_PORT)"
                    ) from None
                raise InputError(
                    f"cannot listen on {where}: {exc.strerror or exc}; give an address of this machine "
                    "(--host or TEXTSIEVE_HOST), e.g. 127.0.0.1 or 0.0.0.0"
                ) from None
    except BaseException:
        for sock in sockets:
            sock.close()
        raise
    return sockets


def bound_url(sockets: list[socket.socket]) -> str:
    """``http://HOST:PORT`` of the first listening socket: the port the system chose for port 0."""
    host, port = sockets[0].getsockname()[:2]
    return f"http://[{host}]:{port}" if ":" in host else f"http://{host}:{port}"


def cli_serve(args: argparse.Namespace) -> int:
    from textsieve.service.settings import load_settings

    # Settings first: a bad flag or TEXTSIEVE_* value is one line before anything heavy loads.
    settings = load_settings(
        flags={name: f"--{name}" for name in ("host", "port", "registry", "blobs", "models", "workers", "inference")},
        host=args.host,
        port=args.port,
        registry=args.registry,
        blobs=getattr(args, "blobs", None),
        models=getattr(args, "models", None),
        workers=getattr(args, "workers", None),
        inference=getattr(args, "inference", None),
    )

    sockets = listen(settings.host, settings.port)
    url = bound_url(sockets)

    import uvicorn

    from textsieve.service import logs
    from textsieve.service.web.app import create_app

    logs.configure()
    log = logging.getLogger("textsieve.service")
    log.info(
        "serving on %s (page at /, readiness at /readyz); registry %s; admin %s",
        url,
        settings.registry_label,
        "on" if settings.admin_enabled else "off",
    )
    print(f"textsieve: serving on {url}/ (Ctrl-C stops)", file=sys.stderr, flush=True)
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
        server.run(sockets=sockets)
    except KeyboardInterrupt:
        pass  # Ctrl-C: uvicorn has shut down gracefully and re-raised SIGINT
    finally:
        signal.signal(signal.SIGTERM, previous)
        for sock in sockets:
            sock.close()
    if stopped:
        log.info("stopped on SIGTERM after answering the requests in flight")
    return 0


__all__ = ["bound_url", "cli_serve", "listen", "register", "server_config"]
