"""The application factory: ``create_app(settings)`` wires routes, middleware and the served models.

Startup order (lifespan): the registry is opened and every served model's live version is
loaded, verified and warmed in the background, so ``/healthz`` answers at once while
``/readyz`` says 503 with the reason until the models are in; then the registry poller runs.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import AsyncIterator

from fastapi import FastAPI
from starlette.routing import Route

from textsieve import __version__
from textsieve.service.inference.batcher import InferencePool
from textsieve.service.modelset.model_set import ModelSet
from textsieve.service.modelset.registry_thread import RegistryThread
from textsieve.service.settings import Settings, load_settings
from textsieve.service.telemetry import ServiceMetrics
from textsieve.service.web import admin, drift, health, openapi, page, predict, problems, reports, reviews, views
from textsieve.service.web.access import Access, AccessMiddleware
from textsieve.service.web.bodylimit import BodyBudget, BodyLimitMiddleware
from textsieve.service.web.lane import LanedFastAPI, PredictLane
from textsieve.service.web.methods import HeadAsGetMiddleware
from textsieve.service.web.onewrite import HeadWithBodyMiddleware
from textsieve.service.web.tokens import TokenGate, admin_refusal, reviewer_refusal
from textsieve.service.web.transport import ConnectionGuard


def connection_guard(settings: Settings, metrics: ServiceMetrics | None = None) -> ConnectionGuard:
    """The connection cap, read deadline, head bound and adaptive request limit that ``settings``
    ask for; the replies it writes itself are counted in ``metrics``."""
    return ConnectionGuard(
        max_connections=settings.max_connections,
        read_timeout=settings.read_timeout_seconds,
        target_seconds=settings.queue_wait_ms / 1000.0,
        min_requests=2 * settings.workers,
        start_requests=settings.max_requests,
        max_head_bytes=settings.max_head_bytes,
        metrics=metrics,
    )


def create_app(settings: Settings | None = None, *, fast_lane: bool = True) -> LanedFastAPI:
    """The service's app; ``fast_lane=False`` leaves every request to FastAPI's stack (tests compare the two)."""
    settings = settings if settings is not None else load_settings()
    metrics = ServiceMetrics()

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        pool = InferencePool(
            settings.workers,
            settings.inference,
            queue_wait_ms=settings.queue_wait_ms,
            worker_scheduling=settings.worker_scheduling,
        )
        metrics.watch_workers(pool.procs.processes if pool.procs is not None else None, pool)
        metrics.overload.admission = pool.admission
        store = RegistryThread(settings.registry, settings.blobs)
        models = ModelSet(settings, store, pool, metrics)
        app.state.store, app.state.pool, app.state.models = store, pool, models
        metrics.live_loop.models = models
        lane = getattr(app, "lane", None)
        if lane is not None:
            lane.models = models
        starting = asyncio.get_running_loop().create_task(models.start(), name="load served models")
        try:
            yield
        finally:
            starting.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await starting
            await models.stop()
            await asyncio.to_thread(pool.shutdown)
            metrics.watch_workers(None)
            metrics.live_loop.models = None
            if lane is not None:
                lane.models = None

    app = LanedFastAPI(
        title="textsieve",
        version=__version__,
        summary="Convolutional text classifiers: calibrated probabilities and the n-gram spans behind them.",
        lifespan=lifespan,
        openapi_tags=openapi.TAGS,
        # The interactive docs pages load their scripts from a CDN; the schema stays available.
        docs_url=None,
        redoc_url=None,
        # /healthz/ was redirected to an address built from the request's Host header (any host,
        # and http:// behind a TLS proxy); a path with a slash too many is a 404 naming the right one.
        redirect_slashes=False,
    )
    app.state.settings = settings
    app.state.metrics = metrics
    # Bounds across requests (see bodylimit.py and transport.py); serve hands the guard to uvicorn.
    app.state.budget = budget = BodyBudget(settings.body_budget_bytes)
    app.state.guard = connection_guard(settings, metrics)
    metrics.overload.guard, metrics.overload.budget = app.state.guard, budget
    problems.install(app)
    modules = (predict, views, reports, drift, admin, reviews, health, page)
    for module in modules:
        app.include_router(module.router)
    openapi.install(app)
    app.add_middleware(HeadAsGetMiddleware)  # innermost of ours: the router sees GET, the layers above HEAD
    # The routers' own routes: the app's list holds the included routers, not their routes.
    tokens = TokenGate.of(
        settings,
        [*admin.router.routes, *reviews.router.routes],
        {admin.require_admin: admin_refusal, reviews.require_reviewer: reviewer_refusal},
    )
    # Every route the router tries, in its order: the app's own, then each included router's (the
    # app's list holds the routers, whose matches() name no route outside the router's own pass).
    routes = [r for r in app.router.routes if isinstance(r, Route)]
    routes += [r for module in modules for r in module.router.routes]
    app.add_middleware(
        BodyLimitMiddleware, max_bytes=settings.max_body_bytes, budget=budget, tokens=tokens, routes=routes
    )
    app.state.access = access = Access(metrics, enabled=settings.access_log, guard=app.state.guard)
    app.add_middleware(AccessMiddleware, access=access)
    app.add_middleware(HeadWithBodyMiddleware)  # outermost of ours in the stack: see service/web/onewrite.py
    if fast_lane:  # in front of the whole stack: see service/web/lane.py
        app.lane = PredictLane(app.full, settings, metrics, access, budget)
    return app


__all__ = ["connection_guard", "create_app"]
