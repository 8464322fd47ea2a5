"""``POST /v1/predict``: labels, calibrated probabilities and the spans behind them."""

from __future__ import annotations

import time
from typing import Annotated, Any

import orjson
from fastapi import APIRouter, Header, Request, Response

from textsieve.errors import InputError, LimitError
from textsieve.service.settings import Settings
from textsieve.service.web.deps import MetricsDep, ModelsDep, SettingsDep
from textsieve.service.web.openapi import Tag
from textsieve.service.web.problems import MEDIA_TYPE
from textsieve.service.web.schemas import PredictRequest, PredictResponse, Problem

router = APIRouter()
MAX_DEADLINE_MS = 3_600_000
_PROBLEM: dict[str, Any] = {"model": Problem, "content": {MEDIA_TYPE: {}}}


def check_limits(body: PredictRequest, settings: Settings) -> None:
    n = len(body.texts)
    if n > settings.max_texts:
        raise LimitError(
            f"{n} texts in one request; the limit is {settings.max_texts} (TEXTSIEVE_MAX_TEXTS): split the request",
            limit={"name": "max_texts", "setting": "TEXTSIEVE_MAX_TEXTS", "value": settings.max_texts, "got": n},
        )
    for i, text in enumerate(body.texts):
        if len(text) > settings.max_chars:
            raise LimitError(
                f"texts[{i}] has {len(text)} characters; the limit is {settings.max_chars} per text "
                "(TEXTSIEVE_MAX_CHARS): shorten or split it",
                limit={
                    "name": "max_chars",
                    "setting": "TEXTSIEVE_MAX_CHARS",
                    "value": settings.max_chars,
                    "got": len(text),
                    "index": i,
                },
            )
    if body.spans > settings.max_spans:
        raise InputError(
            f"spans {body.spans} is above the limit of {settings.max_spans} per text (TEXTSIEVE_MAX_SPANS)",
            limit={
                "name": "max_spans",
                "setting": "TEXTSIEVE_MAX_SPANS",
                "value": settings.max_spans,
                "got": body.spans,
            },
        )


@router.post(
    "/v1/predict",
    operation_id="predict",
    tags=[Tag.PREDICTIONS],
    response_class=Response,
    responses={
        200: {"model": PredictResponse, "description": "one result per text, in order"},
        404: _PROBLEM,
        409: _PROBLEM,
        413: _PROBLEM,
        422: _PROBLEM,
        503: _PROBLEM,
        504: _PROBLEM,
    },
    summary="Classify texts; each result has calibrated probabilities and the n-gram spans behind the label",
)
async def predict(
    body: PredictRequest,
    request: Request,
    models: ModelsDep,
    settings: SettingsDep,
    metrics: MetricsDep,
    deadline_ms: Annotated[
        float | None,
        Header(
            alias="Textsieve-Deadline",
            gt=0,
            le=MAX_DEADLINE_MS,
            description="the caller's own deadline in milliseconds from arrival: work that cannot start "
            "before it is dropped and answered 504",
        ),
    ] = None,
) -> Response:
    check_limits(body, settings)
    deadline = None
    if deadline_ms is not None:
        deadline = getattr(request.state, "received", time.perf_counter()) + deadline_ms / 1000.0
    served = await models.acquire(body.model, body.version)
    try:
        assert served.batcher is not None
        results = await served.batcher.submit(body.texts, body.spans, deadline=deadline)
    finally:
        models.release(served)
    state = request.state
    state.model, state.version, state.texts = served.name, served.version, len(body.texts)
    metrics.for_version(served.name, served.version).requests.inc()
    payload = {"model": served.name, "version": served.version, "results": results}
    return Response(
        orjson.dumps(payload),
        media_type="application/json",
        headers={"X-Model-Version": f"{served.name}/{served.version}"},
    )


__all__ = ["check_limits", "router"]
