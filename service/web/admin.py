"""Admin over HTTP: promote and rollback, behind a bearer token.

Without ``TEXTSIEVE_ADMIN_TOKEN`` the routes still exist but answer 403 with a problem of type
``/problems/admin-disabled`` saying how to enable them: a 404 would be mistaken for an unknown
model. A missing or malformed ``Authorization`` header is 401 (with ``WWW-Authenticate:
Bearer``), a wrong token 403; tokens are compared with ``secrets.compare_digest``.
After a successful call the service swaps to the new live version before answering.
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request

from textsieve.service.web.deps import ModelsDep, RegistryDep, SettingsDep, no_query
from textsieve.service.web.jsonbody import JsonBodyRoute
from textsieve.service.web.openapi import ADMIN_SCHEME, Tag
from textsieve.service.web.problems import MEDIA_TYPE
from textsieve.service.web.schemas import (
    AdminReply,
    GateView,
    Problem,
    PromoteRequest,
    RollbackRequest,
    ServingView,
    VersionView,
)
from textsieve.service.web.tokens import admin_refusal
from textsieve.service.web.views import _version_number

router = APIRouter(prefix="/v1/models", route_class=JsonBodyRoute)
_P = {"model": Problem, "content": {MEDIA_TYPE: {}}}
_RESPONSES: dict[int | str, dict[str, Any]] = {401: _P, 403: _P, 404: _P, 409: _P, 422: _P, 503: _P}
_SECURED: dict[str, Any] = {"security": [{ADMIN_SCHEME: []}]}


async def require_admin(request: Request, settings: SettingsDep) -> None:
    refusal = admin_refusal(settings, request.headers.getlist("authorization"))
    if refusal is not None:
        raise refusal


Admin = Annotated[None, Depends(require_admin)]


def _actor(request: Request, given: str | None) -> str:
    if given:
        return given
    client = request.client.host if request.client else "unknown"
    return f"admin-api@{client}"


@router.post(
    "/{name}/versions/{n}/promote",
    dependencies=[Depends(require_admin), Depends(no_query)],  # the token first: 401/403 before any other answer
    operation_id="promoteVersion",
    tags=[Tag.ADMIN],
    response_model=AdminReply,
    responses=_RESPONSES,
    openapi_extra=_SECURED,
    summary="Promote a version to candidate or live (through the registry's gates)",
)
async def promote(
    name: str, n: str, body: PromoteRequest, request: Request, _: Admin, store: RegistryDep, models: ModelsDep
) -> AdminReply:
    version = _version_number(n)
    result = await store.promote(
        name, version, body.to, reason=body.reason, actor=_actor(request, body.actor), force=body.force
    )
    await models.refresh(name, why=f"promote via admin API: {body.reason}")
    await models.refresh_candidate(name)
    request.state.model, request.state.version = name, version
    return AdminReply(
        model=name,
        version=VersionView.of(result.version),
        gates=[GateView.model_validate(g.model_dump()) for g in result.gates],
        forced=result.forced,
        retired=result.retired,
        serving=ServingView.model_validate(models.serving(name)),
    )


@router.post(
    "/{name}/rollback",
    dependencies=[Depends(require_admin), Depends(no_query)],  # the token first: 401/403 before any other answer
    operation_id="rollbackModel",
    tags=[Tag.ADMIN],
    response_model=AdminReply,
    responses=_RESPONSES,
    openapi_extra=_SECURED,
    summary="Make the previous live version live again",
)
async def rollback(
    name: str, body: RollbackRequest, request: Request, _: Admin, store: RegistryDep, models: ModelsDep
) -> AdminReply:
    info = await store.rollback(name, reason=body.reason, actor=_actor(request, body.actor))
    await models.refresh(name, why=f"rollback via admin API: {body.reason}")
    await models.refresh_candidate(name)
    request.state.model, request.state.version = name, info.version
    return AdminReply(
        model=name, version=VersionView.of(info), serving=ServingView.model_validate(models.serving(name))
    )


__all__ = ["require_admin", "router"]
