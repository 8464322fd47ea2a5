"""The service without its overload layer, for ``make bench``'s cost-of-the-guards figure only.

Same app, settings, routes, workers and uvicorn settings as ``textsieve serve``, minus what the
overload issue added in front of the work: uvicorn's stock httptools protocol instead of the
guarded one (no connection cap, read deadline or request limit), no body-budget middleware, no
request accounting in the access middleware, and an admitted wait so long that admission never
refuses. Throughput of ``textsieve serve`` divided by this server's, measured side by side,
is what the overload protections cost at normal load. Never serve traffic with it.

    .venv/bin/python bench/unguarded_server.py --registry DIR --port N
"""

from __future__ import annotations

import argparse
import os

import uvicorn

KNOWN = {"protocol", "body", "access", "admission"}


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--registry", required=True)
    p.add_argument("--port", type=int, required=True)
    p.add_argument(
        "--keep",
        default="",
        help="comma-separated guards to keep, for finding what costs: protocol, body, access, admission",
    )
    args = p.parse_args()
    keep = {k for k in args.keep.split(",") if k}
    if keep - KNOWN:
        p.error(f"--keep: unknown {sorted(keep - KNOWN)}; known: {sorted(KNOWN)}")
    if "admission" not in keep:
        os.environ["TEXTSIEVE_QUEUE_WAIT_MS"] = "60000"  # the setting's maximum: admission never refuses

    from textsieve.service import logs
    from textsieve.service.settings import Settings
    from textsieve.service.web.app import create_app
    from textsieve.service.web.bodylimit import BodyLimitMiddleware

    logs.configure()
    settings = Settings(registry=args.registry, host="127.0.0.1", port=args.port)
    app = create_app(settings)
    if "body" not in keep:
        app.user_middleware = [m for m in app.user_middleware if m.cls is not BodyLimitMiddleware]
        if app.lane is not None:
            app.lane.budget = None
    if "access" not in keep:
        app.state.access.guard = None  # the access middleware's and the predict lane's
    config = uvicorn.Config(
        app,
        http=app.state.guard.protocol() if "protocol" in keep else "httptools",
        timeout_keep_alive=settings.keepalive_seconds,
        host=settings.host,
        port=settings.port,
        access_log=False,
        log_config=None,
        lifespan="on",
        server_header=False,
    )
    uvicorn.Server(config).run()


if __name__ == "__main__":
    main()
