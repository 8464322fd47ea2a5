"""``POST /v1/predict``: labels, calibrated probabilities and the spans behind them."""

from __future__ import annotations

import functools
import math
import re
import time
from collections.abc import Awaitable, Callable
from dataclasses import dataclass
from typing import Any

import orjson
from fastapi import APIRouter, Depends, Request, Response
from starlette.background import BackgroundTask
from starlette.types import Scope

from textsieve.errors import InputError, LimitError
from textsieve.service.modelset.model_set import ModelSet
from textsieve.service.settings import Settings
from textsieve.service.telemetry import ServiceMetrics
from textsieve.service.web.deps import MetricsDep, ModelsDep, SettingsDep, no_query
from textsieve.service.web.jsonbody import JsonBodyRoute
from textsieve.service.web.openapi import Tag
from textsieve.service.web.problems import MEDIA_TYPE
from textsieve.service.web.schemas import PredictRequest, PredictResponse, Problem

router = APIRouter(route_class=JsonBodyRoute)
MAX_DEADLINE_MS = 3_600_000
DEADLINE_HEADER = "Textsieve-Deadline"


_MILLISECONDS = re.compile(r"[0-9]{1,9}(?:\.[0-9]{1,9})?")


def deadline_at(raw: str, received: float) -> float:
    """The perf_counter time by which inference must start: the header's milliseconds after ``received``."""
    # Digits with an optional fraction: float() alone also took "1_000", " 5 ", "1e3" and other
    # scripts' digits, none of them how a header value of milliseconds is written.
    ms = float(raw) if _MILLISECONDS.fullmatch(raw) else math.nan
    if not 0 < ms <= MAX_DEADLINE_MS:  # also refuses nan
        raise InputError(
            f"header {DEADLINE_HEADER}: {raw[:40]!r} is not allowed; give milliseconds, more than 0 "
            f"and at most {MAX_DEADLINE_MS}"
        )
    return received + ms / 1000.0


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
    dependencies=[Depends(no_query)],
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
    openapi_extra={
        "parameters": [
            {
                "name": DEADLINE_HEADER,
                "in": "header",
                "required": False,
                "description": "the caller's own deadline in milliseconds from arrival: work that cannot start "
                "before it is dropped and answered 504",
                "schema": {"type": "number", "exclusiveMinimum": 0, "maximum": MAX_DEADLINE_MS},
            }
        ]
    },
)
async def predict(
    body: PredictRequest,
    request: Request,
    models: ModelsDep,
    settings: SettingsDep,
    metrics: MetricsDep,
) -> Response:
    check_limits(body, settings)
    # Read by hand rather than as a FastAPI Header parameter: validating an absent header costs
    # every request a few microseconds; the parameter is documented in openapi_extra above.
    raw = request.headers.get(DEADLINE_HEADER)
    deadline = None if raw is None else deadline_at(raw, getattr(request.state, "received", time.perf_counter()))
    answer = await classify(body, deadline, models, metrics, request.scope)
    return Response(
        answer.body,
        media_type="application/json",
        headers={"X-Model-Version": answer.model_version},
        background=None if answer.after_reply is None else BackgroundTask(answer.after_reply),
    )


@dataclass(frozen=True, slots=True)
class Answer:
    """A prediction's reply body, its X-Model-Version, and what runs once it has been sent."""

    body: bytes
    model_version: str
    after_reply: Callable[[], Awaitable[None]] | None


async def classify(
    body: PredictRequest, deadline: float | None, models: ModelSet, metrics: ServiceMetrics, scope: Scope
) -> Answer:
    """The work behind ``POST /v1/predict`` once the request is valid (the route and the lane,
    :mod:`textsieve.service.web.lane`, both call it); the access log's fields go in ``scope``'s state."""
    served = models.acquire_live(body.model, body.version) or await models.acquire(body.model, body.version)
    after_reply = None
    try:
        batcher = served.batcher
        assert batcher is not None
        shadow = models.shadow_sample(served)
        results, scores = await batcher.run(body.texts, body.spans, deadline, keep_scores=shadow, watch=scope)
        if shadow:
            # Offered to the shadow queue only once the reply has been sent (and never waited for).
            assert models.shadow is not None and scores is not None
            after_reply = functools.partial(
                models.shadow.offer_after_reply, served.name, served.version, served.labels, body.texts, scores
            )
    finally:
        models.release(served)
    state = scope.setdefault("state", {})
    state["model"], state["version"], state["texts"] = served.name, served.version, len(body.texts)
    metrics.for_version(served.name, served.version).requests.inc()
    payload = {"model": served.name, "version": served.version, "results": results}
    return Answer(orjson.dumps(payload), f"{served.name}/{served.version}", after_reply)


__all__ = ["DEADLINE_HEADER", "Answer", "check_limits", "classify", "deadline_at", "router"]
