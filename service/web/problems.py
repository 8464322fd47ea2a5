"""Exceptions → ``application/problem+json`` (RFC 9457), in this one place.

Routes raise the classes of :mod:`textsieve.errors`; this table turns each class into a status,
a problem ``type`` and a ``title``. Every ``type`` is a path on the service itself
(``/problems/<slug>``) that answers with a short explanation, so the URI is dereferenceable as
RFC 9457 §3.1.1 recommends. ``instance`` is the request's path and ``request_id`` (an extension
member) matches the ``X-Request-Id`` header and the access-log line.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Any

import orjson
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import PlainTextResponse, Response
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.types import Scope

from textsieve.errors import (
    AuthError,
    BundleError,
    DeadlinePassedError,
    GateRefusedError,
    InputError,
    IntegrityError,
    KeyReusedError,
    LimitError,
    NotFoundError,
    OverloadedError,
    StateError,
    TextsieveError,
    UnavailableError,
)
from textsieve.service.modelset.registry_thread import private_detail
from textsieve.service.web.idempotency import IdempotencyKeyError
from textsieve.service.web.methods import ASTERISK, SERVER_METHODS, allowed, options_reply
from textsieve.texts import lone_surrogate

MEDIA_TYPE = "application/problem+json"
# Where service/web/jsonbody.py keeps a body's refusal (in the request's state) until the route's
# dependencies have run.
BODY_REFUSAL = "body_refusal"
RETRY_AFTER_SECONDS = 2
log = logging.getLogger("textsieve.service")


class AdminDisabledError(AuthError):
    """Admin calls were made but no admin token is configured (HTTP 403)."""

    def __init__(self) -> None:
        super().__init__(
            "admin is disabled on this service: set TEXTSIEVE_ADMIN_TOKEN (at least 16 "
            "characters) and restart to enable promote and rollback over HTTP",
            missing=False,
        )


class ReviewerAuthError(AuthError):
    """The reviewer token is missing or wrong on a verdict call (HTTP 401/403)."""


class ReviewDisabledError(ReviewerAuthError):
    """A verdict was sent but no reviewer token is configured (HTTP 403)."""

    def __init__(self) -> None:
        super().__init__(
            "recording verdicts is disabled on this service: set TEXTSIEVE_REVIEW_TOKEN (at least 16 "
            "characters, not the admin token) and restart to let reviewers record verdicts",
            missing=False,
        )


class ContentEncodingError(InputError):
    """A request body sent compressed (Content-Encoding other than identity): HTTP 415."""

    def __init__(self, coding: str) -> None:
        super().__init__(
            f"the request body has Content-Encoding {coding!r}; this service reads request bodies "
            "uncompressed only: send the JSON without Content-Encoding"
        )


class TransferCodingError(InputError):
    """A request body sent with a transfer coding other than chunked (e.g. gzip, chunked): HTTP 501."""

    def __init__(self, codings: list[str]) -> None:
        super().__init__(
            f"the request body has Transfer-Encoding {', '.join(codings)!r}; this service reads request bodies "
            "as sent or chunked only: send the JSON with Content-Length, or with Transfer-Encoding: chunked alone"
        )


class CharsetError(InputError):
    """A JSON body not in UTF-8: another charset declared, or UTF-16/UTF-32 found (HTTP 415)."""

    def __init__(self, found: str, shape: str) -> None:
        super().__init__(
            f"{found}; JSON request bodies are read as UTF-8 only (RFC 8259 §8.1): send {shape} encoded as "
            "UTF-8, with Content-Type: application/json (a charset parameter, if any, utf-8)"
        )


@dataclass(frozen=True, slots=True)
class Kind:
    status: int
    slug: str
    title: str
    explanation: str


# Looked up along the exception's MRO, so a subclass listed here wins over its parent.
KINDS: dict[type[BaseException], Kind] = {
    LimitError: Kind(
        413,
        "limit-exceeded",
        "A request limit was exceeded",
        "The request is larger than a configured limit; the body names the limit, its "
        "value and the setting that controls it. Split the request or ask the operator.",
    ),
    ContentEncodingError: Kind(
        415,
        "unsupported-content-encoding",
        "The body's content coding is not accepted",
        "Request bodies are read as sent, uncompressed; the response's Accept-Encoding header "
        "names what is accepted (identity). Send the body without Content-Encoding.",
    ),
    CharsetError: Kind(
        415,
        "unsupported-charset",
        "The body's character encoding is not accepted",
        "JSON request bodies are read as UTF-8 (RFC 8259 §8.1): a Content-Type charset other than utf-8, or a "
        "body in UTF-16 or UTF-32 (told by its byte-order mark or its NUL bytes), is refused; the response's "
        "Accept header names the media type to send. A UTF-8 byte-order mark is ignored.",
    ),
    TransferCodingError: Kind(
        501,
        "unsupported-transfer-coding",
        "The body's transfer coding is not implemented",
        "Request bodies are read with Content-Length or Transfer-Encoding: chunked; any other transfer coding "
        "(RFC 9112 §6.1) is not undone here, so the body would be read as if it were JSON. Send it uncompressed.",
    ),
    IdempotencyKeyError: Kind(
        400,
        "bad-idempotency-key",
        "The Idempotency-Key header is not valid",
        "An Idempotency-Key (draft-ietf-httpapi-idempotency-key-header) is sent once, as one Structured Field "
        'string (RFC 8941 §3.3.3): 1 to 255 printable ASCII characters inside double quotes, such as "8e03978e-'
        '40d5-43e8-bc93-6894a57f9324". Nothing was recorded.',
    ),
    KeyReusedError: Kind(
        422,
        "idempotency-key-reused",
        "The Idempotency-Key was already used for another request",
        "The key already recorded a verdict, and this request differs from the one that recorded it "
        "(its model, version, text, labels, probability or reviewer). Nothing new was recorded. A retry must "
        "repeat the first request exactly; a new verdict needs a new key.",
    ),
    InputError: Kind(
        422,
        "invalid-input",
        "The request is not valid",
        "A field is missing, has the wrong type or an unsupported value, or the body is not "
        "JSON. The 'errors' list names each field and what is allowed.",
    ),
    BundleError: Kind(
        422,
        "invalid-bundle",
        "The bundle is not valid",
        "A bundle failed one of its checks; the detail names the check.",
    ),
    NotFoundError: Kind(
        404, "not-found", "Not found", "The model, version or path does not exist; GET /v1/models lists what does."
    ),
    StateError: Kind(
        409,
        "state-conflict",
        "The version's state does not allow this",
        "The lifecycle transition is not allowed from the version's current state.",
    ),
    GateRefusedError: Kind(
        409,
        "gate-refused",
        "A promotion gate refused",
        "A promotion gate refused; 'gates' holds every gate's result. Fix the cause, "
        "or promote with force and a reason (recorded in the audit trail).",
    ),
    IntegrityError: Kind(
        503,
        "integrity",
        "A stored file failed its check",
        "A stored blob is missing or its sha256 differs from the record; the version "
        "cannot be loaded until the registry's storage is repaired.",
    ),
    UnavailableError: Kind(
        503,
        "unavailable",
        "Temporarily unavailable",
        "The service cannot answer this right now (a model is still loading, or the "
        "registry cannot be reached). Retry after the Retry-After seconds.",
    ),
    OverloadedError: Kind(
        503,
        "overloaded",
        "This replica is at capacity",
        "The replica refused the request at once rather than queue it past its admitted wait "
        "(TEXTSIEVE_QUEUE_WAIT_MS), or its request bodies or connections are at their bounds. "
        "Nothing was computed: retry after the Retry-After seconds, or on another replica.",
    ),
    DeadlinePassedError: Kind(
        504,
        "deadline-passed",
        "The caller's deadline passed",
        "The request carried a Textsieve-Deadline header and inference could not start before "
        "it passed; nothing was computed. Retrying with the same deadline under the same load "
        "will likely fail again.",
    ),
    AdminDisabledError: Kind(
        403,
        "admin-disabled",
        "Admin is disabled",
        "No admin token is configured, so promote and rollback over HTTP are off. "
        "Set TEXTSIEVE_ADMIN_TOKEN and restart the service to enable them.",
    ),
    AuthError: Kind(
        403,
        "forbidden",
        "The admin token is wrong",
        "Admin calls need 'Authorization: Bearer <token>' with the service's admin token.",
    ),
    ReviewDisabledError: Kind(
        403,
        "review-disabled",
        "Recording verdicts is disabled",
        "No reviewer token is configured, so verdicts cannot be recorded over HTTP. "
        "Set TEXTSIEVE_REVIEW_TOKEN and restart the service to enable them.",
    ),
    ReviewerAuthError: Kind(
        403,
        "reviewer-forbidden",
        "The reviewer token is wrong",
        "Recording a verdict needs 'Authorization: Bearer <token>' with the service's reviewer token "
        "(TEXTSIEVE_REVIEW_TOKEN); the admin token is not accepted there, nor the reviewer token for admin calls.",
    ),
    TextsieveError: Kind(500, "internal", "Internal error", "The service failed; the request id locates the log line."),
}
MISSING_TOKEN = Kind(
    401,
    "unauthorized",
    "An admin token is needed",
    "Admin calls need 'Authorization: Bearer <token>' with the service's admin token.",
)
MISSING_REVIEW_TOKEN = Kind(
    401,
    "reviewer-unauthorized",
    "A reviewer token is needed",
    "Recording a verdict needs 'Authorization: Bearer <token>' with the service's reviewer token.",
)
# A missing token is 401 with the realm to authenticate against; a wrong one is the class's 403.
_MISSING: dict[type[BaseException], tuple[Kind, str]] = {
    AuthError: (MISSING_TOKEN, "textsieve-admin"),
    ReviewerAuthError: (MISSING_REVIEW_TOKEN, "textsieve-review"),
}
_REALMS = {kind.slug: realm for kind, realm in _MISSING.values()}
INTERNAL = KINDS[TextsieveError]
_HTTP_KINDS = {
    404: KINDS[NotFoundError],
    405: Kind(405, "method-not-allowed", "Method not allowed", "The path exists but not for this HTTP method."),
}
# Answered by the connection layer (service/web/transport.py) before any application code runs.
REQUEST_TIMEOUT = Kind(
    408,
    "request-timeout",
    "The request arrived too slowly",
    "A request's headers and whole body must arrive within TEXTSIEVE_READ_TIMEOUT_SECONDS of the "
    "connection opening (or of the previous reply on a kept-alive connection); the connection was "
    "closed. Send each request whole, without pauses.",
)
MALFORMED = Kind(
    400,
    "malformed-request",
    "The request is not valid HTTP",
    "The request line, a header (an HTTP/1.1 request has exactly one Host: a host name or address, maybe with "
    "a port), the Content-Length or the chunked framing could not be parsed as HTTP/1.1 (RFC 9112), or the "
    "request target is one no request may carry (a fragment, '#…'; '*' with another method than OPTIONS); the "
    "connection was closed. Nothing was computed.",
)
HEAD_TOO_LARGE = Kind(
    431,
    "request-head-too-large",
    "The request's headers are too large",
    "A request's line and headers together must fit in the bound the 431 detail names (TEXTSIEVE_MAX_HEAD_BYTES); "
    "the connection "
    "was closed. Send shorter headers and put data in the body. Nothing was computed.",
)
UNKNOWN_METHOD = Kind(
    501,
    "unknown-method",
    "The request method is not one this service knows",
    "The request's method is not an HTTP method the service recognises, or is CONNECT, which asks for a "
    "tunnel the service does not implement, not being a proxy (RFC 9110 §9.1 and §9.3.6: answered 501); "
    "the connection was closed. Its paths answer GET, HEAD, POST and OPTIONS, as the Allow header of a 405 "
    "or of an OPTIONS reply lists for each. Nothing was computed.",
)
VERSION_NOT_SUPPORTED = Kind(
    505,
    "http-version-not-supported",
    "The request's HTTP version is not one this service speaks",
    "The request line named an HTTP version other than HTTP/1.1 or HTTP/1.0 (HTTP/2.0 or HTTP/0.9 in a "
    "text request line is neither: HTTP/2 is a binary protocol with its own framing, RFC 9113), answered "
    "505 (RFC 9110 §15.6.6); the connection was closed. Send the request as HTTP/1.1. Nothing was computed.",
)
SLUGS: dict[str, Kind] = {
    k.slug: k
    for k in [
        *KINDS.values(),
        MISSING_TOKEN,
        MISSING_REVIEW_TOKEN,
        *_HTTP_KINDS.values(),
        REQUEST_TIMEOUT,
        MALFORMED,
        HEAD_TOO_LARGE,
        UNKNOWN_METHOD,
        VERSION_NOT_SUPPORTED,
    ]
}


def kind_of(exc: BaseException) -> Kind:
    for cls in type(exc).__mro__:
        if cls in KINDS:
            if getattr(exc, "missing", False):
                role = next(c for c in type(exc).__mro__ if c in _MISSING)
                return _MISSING[role][0]
            return KINDS[cls]
    return INTERNAL


_STANDARD = frozenset({"type", "title", "status", "detail", "instance", "request_id"})


def _jsonable(value: Any) -> Any:
    dump = getattr(value, "model_dump", None)
    if callable(dump):
        return dump(mode="json")
    if isinstance(value, (set, frozenset, tuple)):
        return list(value)
    return str(value)


def request_id(scope: Scope) -> str | None:
    state = scope.get("state")
    return state.get("request_id") if isinstance(state, dict) else None


def problem(kind: Kind, detail: str, scope: Scope, *, headers: dict[str, str] | None = None, **extra: Any) -> Response:
    body: dict[str, Any] = {
        "type": f"/problems/{kind.slug}",
        "title": kind.title,
        "status": kind.status,
        "detail": detail,
        "instance": scope.get("path", ""),
    }
    rid = request_id(scope)
    if rid:
        body["request_id"] = rid
    body.update({k: v for k, v in extra.items() if v is not None})
    hdrs = dict(headers or {})
    if kind.status == 503:
        hdrs.setdefault("Retry-After", str(RETRY_AFTER_SECONDS))
    realm = _REALMS.get(kind.slug)
    if realm is not None:
        hdrs.setdefault("WWW-Authenticate", f'Bearer realm="{realm}"')
    return Response(
        orjson.dumps(body, default=_jsonable, option=orjson.OPT_NON_STR_KEYS),
        status_code=kind.status,
        media_type=MEDIA_TYPE,
        headers=hdrs,
    )


def render(exc: BaseException, scope: Scope) -> Response:
    """The problem response for any exception; the single exception → HTTP mapping."""
    kind = kind_of(exc)
    if isinstance(exc, TextsieveError) and kind is not INTERNAL:
        if exc.__cause__ is not None and (detail := private_detail(exc)) != exc.message:
            # The reply says "the server's log says why" (service/modelset/registry_thread.py): say it here.
            log.warning("%s on %s (request %s): %s", kind.status, scope.get("path"), request_id(scope), detail)
        ctx = dict(exc.context)
        if set(ctx) == {"context"} and isinstance(ctx["context"], dict):
            ctx = dict(ctx["context"])
        ctx = {k: v for k, v in ctx.items() if k not in _STANDARD}
        retry_after = getattr(exc, "retry_after", None)
        headers = {"Retry-After": str(retry_after)} if retry_after is not None else None
        return problem(kind, exc.message, scope, headers=headers, **ctx)
    log.error(
        "unhandled error on %s (request %s)",
        scope.get("path"),
        request_id(scope),
        exc_info=(type(exc), exc, exc.__traceback__),
    )
    return problem(INTERNAL, "the service failed while answering; the request id locates the log line", scope)


def _field(loc: tuple[Any, ...] | list[Any]) -> str:
    parts = [str(p) for p in loc]
    if parts and parts[0] in ("body", "query", "path", "header"):
        parts = parts[1:]
    return ".".join(parts) or "body"


def _content_type(scope: Scope) -> str | None:
    for name, value in scope.get("headers", ()):
        if name == b"content-type":
            return str(value.decode("latin-1"))
    return None


def is_json(content_type: str) -> bool:
    """What FastAPI reads as JSON: application/json or application/*+json, any parameters."""
    kind = content_type.split(";", 1)[0].strip().lower()
    return kind == "application/json" or (kind.startswith("application/") and kind.endswith("+json"))


def body_shape(scope: Scope) -> str:
    """What the matched route's body looks like, from its request model's required fields."""
    field = getattr(scope.get("route"), "body_field", None)
    model = getattr(getattr(field, "field_info", None), "annotation", None)
    fields = getattr(model, "model_fields", None)
    if not isinstance(fields, dict):
        return "a JSON object"
    required = [name for name, info in fields.items() if info.is_required()]
    if required == ["texts"]:
        return 'a JSON object such as {"texts": ["..."]}'
    if not required:
        return "a JSON object"
    return "a JSON object with the field(s) " + ", ".join(f'"{name}"' for name in required)


# A reply names what is wrong, it does not echo the body: 100,000 wrong items or one key of
# megabytes would otherwise get a reply several times the size of the request.
MAX_LISTED_ERRORS = 20


def _validation_problem(exc: RequestValidationError, scope: Scope) -> Response:
    errors: list[dict[str, Any]] = []
    found = exc.errors()
    for err in found[:MAX_LISTED_ERRORS]:
        field = _field(err.get("loc", ()))
        msg = str(err.get("msg", "invalid"))
        if msg.startswith("Value error, "):
            msg = msg[len("Value error, ") :]
        kind = err.get("type", "")
        if kind == "missing" and field == "body":
            msg = f"the body is missing; send {body_shape(scope)}"
        elif kind == "string_unicode":  # pydantic's words for a lone surrogate in a string field
            why = lone_surrogate(value) if isinstance(value := err.get("input"), str) else None
            msg = f"{field} {why}" if why is not None else msg
        elif kind == "unknown_field":
            field = ", ".join(err.get("ctx", {}).get("fields", [])) or field
        elif kind == "model_attributes_type" or (kind == "dict_type" and field == "body"):
            sent = _content_type(scope)
            if sent is None or is_json(sent):
                msg = f"the body must be {body_shape(scope)}, sent with Content-Type: application/json"
            else:  # the body was never read as JSON: say so, whatever it holds (curl -d sends a form)
                msg = (
                    f"the body was sent as Content-Type: {sent[:100]}, which is not read as JSON; "
                    f"send {body_shape(scope)} with Content-Type: application/json"
                )
        errors.append({"field": field, "message": msg, "type": kind})
    first = errors[0] if errors else {"field": "body", "message": "invalid"}
    more = f" (and {len(found) - 1} more problem(s), see 'errors')" if len(found) > 1 else ""
    if len(found) > len(errors):
        more = f" (and {len(found) - 1} more problem(s); 'errors' lists the first {len(errors)})"
    detail = f"{first['field']}: {first['message']}{more}"
    return problem(KINDS[InputError], detail, scope, errors=errors)


async def _on_textsieve(request: Request, exc: Exception) -> Response:
    return render(exc, request.scope)


async def _on_validation(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, RequestValidationError)
    refusal = request.scope.get("state", {}).get(BODY_REFUSAL)
    if refusal is not None:  # the body was not read (service/web/jsonbody.py): that is what to fix
        response = render(refusal, request.scope)
        if isinstance(refusal, CharsetError):
            # RFC 9110 §12.5.1: Accept in a response names what the resource takes in a request.
            response.headers["Accept"] = "application/json"
        return response
    return _validation_problem(exc, request.scope)


async def _on_http(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, StarletteHTTPException)
    if exc.status_code == 400 and exc.__cause__ is not None:
        # FastAPI could not read the body (JSON bodies are read by service/web/jsonbody.py).
        why = type(exc.__cause__).__name__
        msg = f"the body could not be read ({why}); send UTF-8 JSON: {body_shape(request.scope)}"
        return problem(
            KINDS[InputError],
            f"body: {msg}",
            request.scope,
            errors=[{"field": "body", "message": msg, "type": "body_unreadable"}],
        )
    kind = _HTTP_KINDS.get(exc.status_code) or Kind(
        exc.status_code, f"http-{exc.status_code}", str(exc.detail), str(exc.detail)
    )
    headers = dict(exc.headers or {})
    if request.method == "OPTIONS":  # what the target answers, not a refusal (service/web/methods.py)
        if exc.status_code == 405 and "Allow" in headers:
            return options_reply(allowed(headers["Allow"].split(",")))
        if exc.status_code == 404 and request.scope["path"] == ASTERISK:
            return options_reply(SERVER_METHODS)
    if exc.status_code == 404:
        path = request.url.path
        hint = f"; paths here end without a slash: {path.rstrip('/')}" if len(path) > 1 and path.endswith("/") else ""
        detail = f"no such path: {request.method} {path}{hint}; see GET /v1/models or the page at /"
    elif exc.status_code == 405 and "Allow" in headers:
        headers["Allow"] = allowed(headers["Allow"].split(","))
        detail = f"{request.url.path} answers {headers['Allow']} only (see the Allow header)"
    else:
        detail = str(exc.detail)
    return problem(kind, detail, request.scope, headers=headers)


async def _on_unexpected(request: Request, exc: Exception) -> Response:
    return render(exc, request.scope)


async def _explain(slug: str) -> Response:
    kind = SLUGS.get(slug)
    if kind is None:
        raise NotFoundError(f"no problem type {slug!r}; known: {', '.join(sorted(SLUGS))}")
    return PlainTextResponse(f"{kind.title} (HTTP {kind.status})\n\n{kind.explanation}\n")


def install(app: FastAPI) -> None:
    app.add_exception_handler(TextsieveError, _on_textsieve)
    app.add_exception_handler(RequestValidationError, _on_validation)
    app.add_exception_handler(StarletteHTTPException, _on_http)
    app.add_exception_handler(Exception, _on_unexpected)
    app.add_api_route("/problems/{slug}", _explain, methods=["GET"], include_in_schema=False)


__all__ = [
    "BODY_REFUSAL",
    "AdminDisabledError",
    "CharsetError",
    "ContentEncodingError",
    "KINDS",
    "ReviewDisabledError",
    "ReviewerAuthError",
    "MEDIA_TYPE",
    "TransferCodingError",
    "body_shape",
    "install",
    "is_json",
    "problem",
    "render",
]
