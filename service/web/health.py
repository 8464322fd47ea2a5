"""Liveness, readiness and the Prometheus metrics page."""

from __future__ import annotations

import orjson
from fastapi import APIRouter, Response

from textsieve.service.telemetry import CONTENT_TYPE
from textsieve.service.web.deps import MetricsDep, ModelsDep
from textsieve.service.web.openapi import Tag
from textsieve.service.web.schemas import Readiness

router = APIRouter()


@router.get("/healthz", operation_id="getLiveness", tags=[Tag.HEALTH], summary="Liveness: the process answers")
async def healthz() -> dict[str, str]:
    return {"status": "alive"}


@router.get(
    "/readyz",
    operation_id="getReadiness",
    tags=[Tag.HEALTH],
    summary="Readiness: every served model is loaded and warmed (503 otherwise)",
    response_class=Response,
    responses={
        200: {"model": Readiness, "description": "ready; 'degraded' lists what works less well"},
        503: {"model": Readiness, "description": "not ready; 'reason' says why"},
    },
)
async def readyz(models: ModelsDep) -> Response:
    ready, reason = models.readiness()
    body = {"ready": ready, "reason": reason, "degraded": models.degraded(), "models": models.describe()}
    # A status report rather than an error, so plain JSON in both cases; Retry-After helps pollers.
    headers = {} if ready else {"Retry-After": "2"}
    return Response(
        orjson.dumps(body), status_code=200 if ready else 503, media_type="application/json", headers=headers
    )


@router.get(
    "/metrics",
    operation_id="getMetrics",
    tags=[Tag.HEALTH],
    summary="Prometheus text format",
    response_class=Response,
    responses={200: {"content": {"text/plain": {"schema": {"type": "string"}}}}},
)
async def metrics_page(metrics: MetricsDep) -> Response:
    return Response(metrics.render(), media_type=CONTENT_TYPE)


__all__ = ["router"]
