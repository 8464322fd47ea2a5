"""The bearer tokens of the admin and reviewer routes, checked before anything else about a request.

A route that changes what is served (promote, rollback) or what is recorded (verdicts) checks its
token first (DEVELOPERS.md), and a caller without a valid one learns nothing else about how the
service treats its request. FastAPI runs a route's dependencies only after the body has been
read, and the body middleware (:mod:`~textsieve.service.web.bodylimit`) refuses a compressed,
oversized or over-budget body before that, so such a body used to be answered 415/413/501/503
to anyone, while every other refusal came after the 401/403. Now the body middleware asks
:class:`TokenGate` first: on a protected route without a valid token it answers the 401/403 at
once, before any framing check and without reading the body (``Connection: close`` when one was
announced), so an unauthenticated caller neither sees those refusals nor makes the replica read
its body, however large. The routes keep their dependencies (the same checks), which the
OpenAPI document shows and which answer when no middleware is in front.
"""

from __future__ import annotations

import secrets
from collections.abc import Callable, Iterable

from fastapi.routing import APIRoute
from starlette.datastructures import Headers
from starlette.routing import Match
from starlette.types import Scope

from textsieve.errors import AuthError
from textsieve.service.settings import Settings
from textsieve.service.web.problems import AdminDisabledError, ReviewDisabledError, ReviewerAuthError

# A check takes the settings and every line of the request's Authorization header.
Check = Callable[[Settings, list[str]], AuthError | None]


def _repeated(lines: list[str]) -> str | None:
    """Why ``lines`` are not one Authorization header, or None. RFC 9110 §11.6.2: it holds one set of
    credentials; a request with two lines is malformed (RFC 6750 §3.1), and which line a proxy, log or
    audit filter in front reads is its own choice, so none is taken here."""
    if len(lines) < 2:
        return None
    return f"the request has {len(lines)} Authorization header lines; send one: 'Authorization: Bearer <token>'"


def _bearer(authorization: str) -> str | None:
    """The token of ``Authorization: Bearer <token>`` (RFC 6750 §2.1), or None when malformed."""
    scheme, _, token = authorization.strip().partition(" ")
    if scheme.lower() != "bearer" or not token.strip():
        return None
    return token.strip()


def admin_refusal(settings: Settings, lines: list[str]) -> AuthError | None:
    """Why an admin call with these Authorization header lines is refused, or None when its token is right."""
    if settings.admin_token is None:
        return AdminDisabledError()
    repeated = _repeated(lines)
    if repeated is not None:
        return AuthError(repeated, missing=True)
    authorization = lines[0] if lines else ""
    if not authorization:
        return AuthError("admin calls need an 'Authorization: Bearer <token>' header", missing=True)
    token = _bearer(authorization)
    if token is None:
        return AuthError("the Authorization header must be 'Bearer <token>'", missing=True)
    if not secrets.compare_digest(token.encode(), settings.admin_token.get_secret_value().encode()):
        return AuthError("the admin token is wrong", missing=False)
    return None


def reviewer_refusal(settings: Settings, lines: list[str]) -> AuthError | None:
    """Why a verdict call with these Authorization header lines is refused, or None when its token is right."""
    if settings.review_token is None:
        return ReviewDisabledError()
    repeated = _repeated(lines)
    if repeated is not None:
        return ReviewerAuthError(repeated, missing=True)
    authorization = lines[0] if lines else ""
    if not authorization:
        return ReviewerAuthError("recording a verdict needs an 'Authorization: Bearer <token>' header", missing=True)
    token = _bearer(authorization)
    if token is None:
        return ReviewerAuthError("the Authorization header must be 'Bearer <token>'", missing=True)
    if not secrets.compare_digest(token.encode(), settings.review_token.get_secret_value().encode()):
        return ReviewerAuthError("the reviewer token is wrong (the admin token is not accepted here)", missing=False)
    return None


class TokenGate:
    """Which routes need which token, found from the routes themselves: each (route, check) pair."""

    def __init__(self, settings: Settings, guarded: Iterable[tuple[APIRoute, Check]]) -> None:
        self.settings = settings
        self.guarded = list(guarded)

    @classmethod
    def of(cls, settings: Settings, routes: Iterable[object], checks: dict[Callable[..., object], Check]) -> TokenGate:
        """The routes among ``routes`` that depend on one of ``checks``' keys (a route's token dependency)."""
        guarded = []
        for route in routes:
            if isinstance(route, APIRoute):
                for dependency in route.dependant.dependencies:
                    check = checks.get(dependency.call) if dependency.call is not None else None
                    if check is not None:
                        guarded.append((route, check))
                        break
        return cls(settings, guarded)

    def refusal(self, scope: Scope) -> AuthError | None:
        """The 401/403 for a request to a guarded route without its valid token; None otherwise."""
        for route, check in self.guarded:
            if route.matches(scope)[0] is Match.FULL:
                return check(self.settings, Headers(scope=scope).getlist("authorization"))
        return None


__all__ = ["TokenGate", "admin_refusal", "reviewer_refusal"]
