"""Read-only registry views, with what this service serves of each model."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Path

from textsieve.registry.names import validate_version
from textsieve.service.web.deps import ModelsDep, RegistryDep
from textsieve.service.web.openapi import Tag
from textsieve.service.web.problems import MEDIA_TYPE
from textsieve.service.web.schemas import ModelDetail, ModelView, Problem, ServingView, VersionView

router = APIRouter(prefix="/v1/models")
_PROBLEM: dict[int | str, dict[str, Any]] = {
    404: {"model": Problem, "content": {MEDIA_TYPE: {}}},
    503: {"model": Problem, "content": {MEDIA_TYPE: {}}},
}
HISTORY = 20


def _version_number(n: str) -> int:
    # Taken as a string so that "abc", "0" or a thousand digits get our problem body naming the rule.
    return validate_version(n)


@router.get(
    "",
    operation_id="listModels",
    tags=[Tag.REGISTRY],
    response_model=list[ModelView],
    responses=_PROBLEM,
    summary="Every model in the registry",
)
async def list_models(store: RegistryDep, models: ModelsDep) -> list[ModelView]:
    infos = await store.models()
    return [ModelView.of(m, ServingView.model_validate(models.serving(m.name))) for m in infos]


@router.get(
    "/{name}",
    operation_id="getModel",
    tags=[Tag.REGISTRY],
    response_model=ModelDetail,
    responses=_PROBLEM,
    summary="One model and its recent history",
)
async def get_model(name: str, store: RegistryDep, models: ModelsDep) -> ModelDetail:
    infos = {m.name: m for m in await store.models()}
    events = await store.history(name)  # NotFoundError for an unknown model
    info = infos.get(name)
    if info is None:  # created between the two reads; ask once more
        info = {m.name: m for m in await store.models()}[name]
    view = ModelView.of(info, ServingView.model_validate(models.serving(name)))
    recent = [e.model_dump(mode="json") for e in sorted(events, key=lambda e: e.id, reverse=True)[:HISTORY]]
    return ModelDetail(**view.model_dump(), history=recent)


@router.get(
    "/{name}/versions",
    operation_id="listVersions",
    tags=[Tag.REGISTRY],
    response_model=list[VersionView],
    responses=_PROBLEM,
    summary="A model's versions",
)
async def list_versions(name: str, store: RegistryDep) -> list[VersionView]:
    return [VersionView.of(v) for v in await store.versions(name)]


@router.get(
    "/{name}/versions/{n}",
    operation_id="getVersion",
    tags=[Tag.REGISTRY],
    response_model=VersionView,
    responses=_PROBLEM,
    summary="One version",
)
async def get_version(name: str, store: RegistryDep, n: str = Path(description="version number")) -> VersionView:
    return VersionView.of(await store.version(name, _version_number(n)))


__all__ = ["router"]
