"""``POST /v1/verdicts``: a reviewer confirms or corrects one prediction's label.

Guarded by the reviewer token (``TEXTSIEVE_REVIEW_TOKEN``), a role apart from admin: this route
accepts only the reviewer token and the admin routes only the admin token, so a reviewer cannot
promote and an admin script cannot record verdicts in a reviewer's name. Without a configured
token the route answers 403 ``/problems/review-disabled``. The token is compared with
``secrets.compare_digest``.

The verdict is written to the registry before the reply (a reviewer is told it is stored only
when it is), through the service's registry thread. Verdicts are rare next to predictions, one
per reviewer action, so they need no batching; the text obeys the prediction limits
(``TEXTSIEVE_MAX_CHARS`` per text, ``TEXTSIEVE_MAX_BODY_BYTES`` per body).

A reply lost on the way back (a gateway's 504, a dropped connection) leaves the reviewer unsure
whether the verdict was stored. With an ``Idempotency-Key`` header (draft-ietf-httpapi-idempotency-key-header,
:mod:`textsieve.service.web.idempotency`) sending the same request again is safe: the key is stored with
the verdict in one INSERT, and a repeat gets the first reply again (201, the same verdict, plus
``Textsieve-Replayed: true``) instead of a second verdict. The draft's 409 for a repeat that arrives
while the first is still being processed does not arise: writes are serialised and the key commits
with its verdict, so a concurrent repeat waits for the first and is answered as a retry.
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request
from fastapi.responses import JSONResponse

from textsieve.errors import LimitError
from textsieve.service.settings import Settings
from textsieve.service.web.deps import RegistryDep, SettingsDep, no_query
from textsieve.service.web.idempotency import HEADER, SCHEMA, IdempotencyKey
from textsieve.service.web.jsonbody import JsonBodyRoute
from textsieve.service.web.openapi import REVIEW_SCHEME, Tag
from textsieve.service.web.problems import MEDIA_TYPE
from textsieve.service.web.schemas import Problem, VerdictReply, VerdictRequest
from textsieve.service.web.tokens import reviewer_refusal

router = APIRouter(route_class=JsonBodyRoute)
_P = {"model": Problem, "content": {MEDIA_TYPE: {}}}
_RESPONSES: dict[int | str, dict[str, Any]] = {
    400: _P,
    401: _P,
    403: _P,
    404: _P,
    413: _P,
    422: _P,
    503: _P,
}
REPLAYED_HEADER = "Textsieve-Replayed"
_KEY_PARAMETER = {
    "name": HEADER,
    "in": "header",
    "required": False,
    "description": "draft-ietf-httpapi-idempotency-key-header: one Structured Field string (RFC 8941 §3.3.3) of 1 to "
    "255 printable ASCII characters, e.g. a random UUID in double quotes. The first request with a key records "
    "the verdict; the same request again with it gets the same reply (with Textsieve-Replayed: true) and records "
    "nothing; another request with it is answered 422. Keys are per model and kept as long as their verdict.",
    "schema": SCHEMA,
}


async def require_reviewer(request: Request, settings: SettingsDep) -> None:
    refusal = reviewer_refusal(settings, request.headers.getlist("authorization"))
    if refusal is not None:
        raise refusal


Reviewer = Annotated[None, Depends(require_reviewer)]


def _check_length(body: VerdictRequest, settings: Settings) -> None:
    if len(body.text) > settings.max_chars:
        raise LimitError(
            f"text has {len(body.text)} characters; the limit is {settings.max_chars} per text "
            "(TEXTSIEVE_MAX_CHARS), as for predictions",
            limit={
                "name": "max_chars",
                "setting": "TEXTSIEVE_MAX_CHARS",
                "value": settings.max_chars,
                "got": len(body.text),
            },
        )


@router.post(
    "/v1/verdicts",
    dependencies=[Depends(require_reviewer), Depends(no_query)],  # the token first: 401/403 before any other answer
    operation_id="recordVerdict",
    tags=[Tag.REVIEWS],
    status_code=201,
    response_model=VerdictReply,
    responses=_RESPONSES,
    openapi_extra={"security": [{REVIEW_SCHEME: []}], "parameters": [_KEY_PARAMETER]},
    summary="Record a reviewer's verdict on one prediction: confirm its label or correct it",
)
async def record_verdict(
    body: VerdictRequest,
    request: Request,
    _: Reviewer,
    key: IdempotencyKey,
    settings: SettingsDep,
    store: RegistryDep,
) -> JSONResponse:
    _check_length(body, settings)
    recorded = await store.record_verdict(
        body.model,
        body.version,
        text=body.text,
        predicted_label=body.predicted_label,
        predicted_probability=body.predicted_probability,
        verdict_label=body.verdict_label,
        reviewer=body.reviewer,
        idempotency_key=key,
    )
    info = recorded.verdict
    request.state.model, request.state.version = info.model, info.version
    reply = VerdictReply(
        id=info.id,
        model=info.model,
        version=info.version,
        predicted_label=info.predicted_label,
        verdict_label=info.verdict_label,
        agrees=info.agrees,
        reviewer=info.reviewer,
        at=info.at,
    )
    headers = {REPLAYED_HEADER: "true"} if recorded.replayed else None
    return JSONResponse(reply.model_dump(), status_code=201, headers=headers)


__all__ = ["REPLAYED_HEADER", "require_reviewer", "router"]
