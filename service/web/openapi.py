"""The OpenAPI document as the service really answers: every error body is problem+json.

FastAPI documents an error response declared with a model under ``application/json`` and adds
its own 422 body (``HTTPValidationError``) to every route with parameters, while the service
answers all of them with ``application/problem+json`` (RFC 9457 §3) built in
:mod:`textsieve.service.web.problems`. The generated document is rewritten once, here, so that
clients and schema-driven tests (tests/reliability/test_fuzz.py) see what is actually sent: the Problem
schema under problem+json for every error, 413 and 415 wherever a body is accepted (the body-size
limit and the refusal of compressed bodies answer before any route, and a JSON body not in UTF-8 is
415 too, service/web/jsonbody.py), and the admin and reviewer
bearer tokens as security schemes.

Generated clients name their methods after operation ids and group them by tag, so every route
states a short ``operation_id`` (FastAPI's default, ``predict_v1_predict_post``, changes with the
path and reads badly as a method name) and exactly one :class:`Tag`; scripts/check_openapi.py and
tests/service/test_openapi.py hold every operation to that.
"""

from __future__ import annotations

from collections.abc import Callable
from enum import StrEnum
from typing import Any

from fastapi import FastAPI
from starlette.routing import Match, Route
from starlette.types import Scope

from textsieve.service.web.problems import MEDIA_TYPE

ADMIN_SCHEME = "adminToken"
REVIEW_SCHEME = "reviewerToken"
_SCHEMES = {
    ADMIN_SCHEME: "the service's admin token (TEXTSIEVE_ADMIN_TOKEN); admin calls are off without one",
    REVIEW_SCHEME: "the service's reviewer token (TEXTSIEVE_REVIEW_TOKEN), distinct from the admin token; "
    "recording verdicts is off without one",
}


class Tag(StrEnum):
    """The areas of the API; each operation carries exactly one."""

    PREDICTIONS = "predictions"
    REGISTRY = "registry"
    ADMIN = "admin"
    REVIEWS = "reviews"
    HEALTH = "health"


TAGS: list[dict[str, Any]] = [
    {
        "name": Tag.PREDICTIONS.value,
        "description": "Labels, calibrated probabilities and the n-gram spans behind them, "
        "from a model's live version or a version the request names.",
    },
    {
        "name": Tag.REGISTRY.value,
        "description": "Read-only views of the registry: models, their versions and recent history, "
        "with what this replica serves of each, and drift signals of the live texts it answered.",
    },
    {
        "name": Tag.ADMIN.value,
        "description": "Promote and roll back versions through the registry's gates; "
        "needs the admin bearer token, and every call is an audit event.",
    },
    {
        "name": Tag.REVIEWS.value,
        "description": "Reviewers' verdicts on predictions: confirm or correct a label; needs the reviewer "
        "bearer token, and the verdicts are stored in the registry for agreement figures and new training data.",
    },
    {
        "name": Tag.HEALTH.value,
        "description": "Liveness, readiness and Prometheus metrics, for probes, load balancers and scrapers.",
    },
]
_PROBLEM = "#/components/schemas/Problem"
_FASTAPI_ERROR_MODELS = ("HTTPValidationError", "ValidationError")
_METHODS = ("get", "put", "post", "delete", "patch", "head", "options", "trace")


def _is_problem(response: dict[str, Any]) -> bool:
    content = response.get("content")
    if not content:
        return True
    refs = {media.get("schema", {}).get("$ref", "") for media in content.values()}
    return any(ref == _PROBLEM or ref.rsplit("/", 1)[-1] in _FASTAPI_ERROR_MODELS for ref in refs)


def _problem_response(description: str) -> dict[str, Any]:
    return {"description": description, "content": {MEDIA_TYPE: {"schema": {"$ref": _PROBLEM}}}}


def rewrite(document: dict[str, Any]) -> dict[str, Any]:
    """``document`` with error bodies, the body limit and the admin token stated as served."""
    secured: set[str] = set()
    for operations in document.get("paths", {}).values():
        for method, op in operations.items():
            if method not in _METHODS:
                continue
            responses: dict[str, Any] = op.setdefault("responses", {})
            for code, response in responses.items():
                if code[:1] in "45" and _is_problem(response):
                    responses[code] = _problem_response(response.get("description", "problem details"))
            if "requestBody" in op:
                responses.setdefault("413", _problem_response("a request limit was exceeded"))
                responses.setdefault(
                    "415", _problem_response("the body was sent compressed (Content-Encoding), or not as UTF-8")
                )
            secured |= {scheme for req in op.get("security", []) for scheme in req}
    components = document.setdefault("components", {})
    schemas = components.get("schemas", {})
    for name in _FASTAPI_ERROR_MODELS:
        schemas.pop(name, None)
    for scheme in sorted(secured & set(_SCHEMES)):
        components.setdefault("securitySchemes", {})[scheme] = {
            "type": "http",
            "scheme": "bearer",
            "description": _SCHEMES[scheme],
        }
    return document


def install(app: FastAPI) -> None:
    """Serve the rewritten document at /openapi.json (built on first request, then cached)."""
    generate: Callable[[], dict[str, Any]] = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            app.openapi_schema = rewrite(generate())
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]
    routes = app.router.routes
    for i, route in enumerate(routes):
        if type(route) is Route and route.path == app.openapi_url:
            routes[i] = _NamedRoute(
                route.path,
                route.endpoint,
                methods=route.methods,
                name=route.name,
                include_in_schema=route.include_in_schema,
            )


class _NamedRoute(Route):
    """A Starlette route that names itself on the request, as FastAPI's own routes do. FastAPI serves the
    document through a plain Starlette route, which names none: the access log and ``/metrics`` booked
    every fetch of /openapi.json under ``unmatched``, with the 404s. Named when it matches, its 405s (a
    POST, say), which the route refuses before its endpoint runs, are booked under it too."""

    def matches(self, scope: Scope) -> tuple[Match, Scope]:
        match, child_scope = super().matches(scope)
        if match is not Match.NONE:
            child_scope["route"] = self
        return match, child_scope


__all__ = ["ADMIN_SCHEME", "REVIEW_SCHEME", "TAGS", "Tag", "install", "rewrite"]
