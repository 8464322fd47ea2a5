"""Typed dependencies: what a route may ask for, read from the app built by ``create_app``.

They are ``async def`` on purpose: FastAPI runs plain ``def`` dependencies in a thread pool,
which costs a thread hop per dependency per request.
"""

from __future__ import annotations

from typing import Annotated
from urllib.parse import parse_qsl

from fastapi import Depends, Request

from textsieve.errors import InputError
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


async def no_query(request: Request) -> None:
    """For the POST routes, which read every field from the JSON body: a query string there is a
    caller's mistake (``?model=x`` was ignored and the live model answered), refused as an unknown
    body field is."""
    query: bytes = request.scope.get("query_string", b"")
    if not query:
        return
    names = list(dict.fromkeys(k for k, _ in parse_qsl(query.decode("latin-1"), keep_blank_values=True)))
    shown = ", ".join(repr(n[:40]) for n in names[:10]) + (f" and {len(names) - 10} more" if len(names) > 10 else "")
    got = shown or repr(query[:40].decode("latin-1"))
    message = (
        f"{request.method} {request.url.path} reads no query parameters (got {got}); send every field in the JSON body"
    )
    raise InputError(message, errors=[{"field": "query", "message": message, "type": "query_not_read"}])


SettingsDep = Annotated[Settings, Depends(_settings)]
ModelsDep = Annotated[ModelSet, Depends(_models)]
MetricsDep = Annotated[ServiceMetrics, Depends(_metrics)]
RegistryDep = Annotated[RegistryThread, Depends(_store)]

__all__ = ["MetricsDep", "ModelsDep", "RegistryDep", "SettingsDep", "no_query"]
