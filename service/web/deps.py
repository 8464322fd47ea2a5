"""Typed dependencies: what a route may ask for, read from the app built by ``create_app``.

They are ``async def`` on purpose: FastAPI runs plain ``def`` dependencies in a thread pool,
which costs a thread hop per dependency per request.
"""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request

from textsieve.service.modelset.model_set import ModelSet
from textsieve.service.modelset.registry_thread import RegistryThread
from textsieve.service.settings import Settings
from textsieve.service.telemetry import ServiceMetrics


async def _settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


async def _models(request: Request) -> ModelSet:
    models: ModelSet = request.app.state.models
    return models


async def _metrics(request: Request) -> ServiceMetrics:
    metrics: ServiceMetrics = request.app.state.metrics
    return metrics


async def _store(request: Request) -> RegistryThread:
    store: RegistryThread = request.app.state.store
    return store


SettingsDep = Annotated[Settings, Depends(_settings)]
ModelsDep = Annotated[ModelSet, Depends(_models)]
MetricsDep = Annotated[ServiceMetrics, Depends(_metrics)]
RegistryDep = Annotated[RegistryThread, Depends(_store)]

__all__ = ["MetricsDep", "ModelsDep", "SettingsDep", "RegistryDep"]
