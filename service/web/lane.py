"""The predict lane: ``POST /v1/predict`` answered in front of the framework.

Through FastAPI's whole stack a single-text prediction cost the server's event loop about
1.1 ms, against 0.12 ms for the bare HTTP floor (bench/README.md): its error, telemetry and
body-limit layers, our three middlewares, routing, dependency solving and a second parse of
the body cost more than the prediction's own work on the loop. So the app's outermost layer
takes the common request, ``POST /v1/predict`` with ``Content-Type: application/json``, a
``Content-Length`` within the body limit and the body budget and no ``Transfer-Encoding``, and
does the route's whole job itself with the same parts: the request id and access booking
(:mod:`~textsieve.service.web.access`), the body budget (:mod:`~textsieve.service.web.bodylimit`),
``PredictRequest`` and ``check_limits``, the deadline header and the prediction itself
(:func:`textsieve.service.web.predict.classify`). The route stays, for the OpenAPI document
and for every request the lane passes on.

A request it cannot answer exactly as the app would goes to the full app, with any body it has
read replayed: a body, limit or header the app refuses (it words those refusals), another
content type, a chunked body, a client that went away, a replica without its models yet, and a
body that may give a member name twice (pydantic's reader takes the last one; the app's reader
refuses it, :mod:`~textsieve.service.web.jsonbody`).
Refusals once the request is valid (an unknown model or version, overloaded, deadline passed,
unavailable) are rendered by :func:`textsieve.service.web.problems.render`, as the app's
exception handlers render them (one difference: an unexpected error's 500 carries the
X-Request-Id header here, which the app's outermost error layer cannot add).
tests/service/test_lane.py compares both paths reply by reply.

A middleware added to the app never sees the requests the lane answers: whatever it should do
for predictions has to be done here too.
"""

from __future__ import annotations

import time

from fastapi import FastAPI
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from textsieve.errors import TextsieveError
from textsieve.service.inference.admission import CLIENT_LEFT
from textsieve.service.modelset.model_set import ModelSet
from textsieve.service.settings import Settings
from textsieve.service.telemetry import ServiceMetrics
from textsieve.service.web.access import CLIENT_GONE, Access, begin
from textsieve.service.web.bodylimit import BodyBudget
from textsieve.service.web.predict import DEADLINE_HEADER, check_limits, classify, deadline_at
from textsieve.service.web.problems import render
from textsieve.service.web.schemas import PredictRequest

PATH = "/v1/predict"
_JSON = frozenset({b"application/json", b"application/json; charset=utf-8"})
_DEADLINE = DEADLINE_HEADER.lower().encode("latin-1")
_REPLY_TYPE = (b"content-type", b"application/json")
# A member name given twice shows as its quoted name twice, unless one of them is written with
# escapes; the request's names are made of a-z, whose escapes begin with \u006 or \u007.
_QUOTED = {name: f'"{name}"'.encode("ascii") for name in PredictRequest.model_fields}


def _may_repeat_a_name(body: bytes, given: set[str]) -> bool:
    """Whether ``body``, read as a request that gives the members ``given``, may give one of them
    twice. Texts holding a quoted member name or an escaped letter also say yes (the full app's
    exact reader then answers them); only the names given are looked for, so a plain request costs
    one scan for "texts" and one for an escape."""
    for name in given:
        if body.count(_QUOTED[name]) > 1:
            return True
    return b"\\u00" in body and (b"\\u006" in body or b"\\u007" in body)


def _replay(messages: list[Message], receive: Receive) -> Receive:
    """``receive`` that first hands out ``messages`` (already read from the client) again."""

    async def replay() -> Message:
        return messages.pop(0) if messages else await receive()

    return replay


class PredictLane:
    """Answers plain ``POST /v1/predict`` requests; hands every other one to ``full``."""

    def __init__(
        self,
        full: ASGIApp,
        settings: Settings,
        metrics: ServiceMetrics,
        access: Access,
        budget: BodyBudget | None,
    ) -> None:
        self.full = full
        # The app's models, handed over by its lifespan once started (None before and after it).
        # Read from here, not from ``state``: a starlette State looks an attribute up in its own
        # dict only after the plain lookup has failed and made an AttributeError, every request.
        self.models: ModelSet | None = None
        self.settings = settings
        self.metrics = metrics
        self.access = access
        self.budget = budget  # None: no body budget (bench/unguarded_server.py only)
        self.taken = 0  # requests answered here
        self.passed = 0  # requests handed to the full app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        plain = _plain_headers(scope)
        models = self.models
        budget = self.budget
        if (
            plain is None
            or models is None
            or not 0 < plain[0] <= self.settings.max_body_bytes
            or (budget is not None and budget.used + plain[0] > budget.limit)
        ):
            await self._pass(scope, receive, send)
            return
        length, given_id, raw_deadline = plain
        rid, started = begin(scope, given_id)
        taken = length if budget is not None and budget.take(length) else 0
        try:
            messages, body = await _read_body(receive)
            # The request enters the guard's count once its whole body is in, as in access.py;
            # nothing else runs on the loop between here and the count below.
            entered = time.perf_counter()
            request = None if body is None else self._valid(body, raw_deadline, started)
        except BaseException:
            if budget is not None:
                budget.give_back(taken)
            raise
        if request is None:
            if budget is not None:
                budget.give_back(taken)  # the full app's body limit reserves it again
            await self._pass(scope, _replay(messages, receive), send)
            return
        self.taken += 1
        try:
            await self._answer(scope, send, models, request, rid, started, entered)
        finally:
            if budget is not None:
                budget.give_back(taken)

    async def _pass(self, scope: Scope, receive: Receive, send: Send) -> None:
        self.passed += 1
        await self.full(scope, receive, send)

    def _valid(
        self, body: bytes, raw_deadline: str | None, received: float
    ) -> tuple[PredictRequest, float | None] | None:
        """The request and its deadline, or None for anything the full app should word the refusal of."""
        try:
            request = PredictRequest.model_validate_json(body)
            if _may_repeat_a_name(body, request.model_fields_set):
                return None
            check_limits(request, self.settings)
            deadline = None if raw_deadline is None else deadline_at(raw_deadline, received)
        except Exception:  # noqa: BLE001 - every refusal is the full app's to word
            return None
        return request, deadline

    async def _answer(
        self,
        scope: Scope,
        send: Send,
        models: ModelSet,
        parsed: tuple[PredictRequest, float | None],
        rid: str,
        started: float,
        entered: float,
    ) -> None:
        guard = self.access.guard
        if guard is not None:
            guard.inflight += 1
        status = 500
        rid_header = (b"x-request-id", rid.encode("latin-1"))
        try:
            try:
                answer = await classify(parsed[0], parsed[1], models, self.metrics, scope)
            except Exception as exc:
                response = render(exc, scope)
                status = response.status_code
                await _send(send, status, [*response.raw_headers, rid_header], response.body)
                if not isinstance(exc, TextsieveError):
                    raise  # as the app's error layer does: the server logs it too
                return
            status = 200
            headers = [
                (b"x-model-version", answer.model_version.encode("latin-1")),
                (b"content-length", str(len(answer.body)).encode("latin-1")),
                _REPLY_TYPE,
                rid_header,
            ]
            await _send(send, 200, headers, answer.body)
            if answer.after_reply is not None:
                await answer.after_reply()
        finally:
            # A client that left before the reply was written whole got nothing (uvicorn drops it):
            # 499, as the access middleware books it, not the 200 or 503 made for nobody.
            booked = CLIENT_GONE if CLIENT_LEFT in scope else status
            self.access.finish(scope, PATH, booked, started, entered if guard is not None else None)


def _plain_headers(scope: Scope) -> tuple[int, str, str | None] | None:
    """Content-Length, X-Request-Id ("" when absent) and Textsieve-Deadline of a request the lane
    may take; None when its headers ask for the full app."""
    length = content_type = None
    given_id = ""
    deadline = None
    seen_id = False
    for name, value in scope["headers"]:
        if name == b"content-length":
            if length is not None:
                return None
            length = value
        elif name == b"content-type":
            if content_type is not None:
                return None
            content_type = value
        elif name in (b"transfer-encoding", b"content-encoding"):
            return None
        elif name == b"x-request-id":
            if not seen_id:  # the first one counts, as starlette's Headers.get has it
                given_id, seen_id = value.decode("latin-1"), True
        elif name == _DEADLINE:
            if deadline is None:
                deadline = value.decode("latin-1")
    if length is None or not length.isdigit() or content_type is None or content_type.lower() not in _JSON:
        return None
    return int(length), given_id, deadline


async def _read_body(receive: Receive) -> tuple[list[Message], bytes | None]:
    """Every message of the request's body, and the body (None if the client went away first)."""
    messages: list[Message] = []
    while True:
        message = await receive()
        messages.append(message)
        if message["type"] != "http.request":
            return messages, None
        if not message.get("more_body", False):
            break
    if len(messages) == 1:
        return messages, messages[0].get("body", b"")
    return messages, b"".join(m.get("body", b"") for m in messages)


async def _send(send: Send, status: int, headers: list[tuple[bytes, bytes]], body: bytes | memoryview) -> None:
    # Head and body back to back, as service/web/onewrite.py makes the full app do.
    await send({"type": "http.response.start", "status": status, "headers": headers})
    await send({"type": "http.response.body", "body": body})


class LanedFastAPI(FastAPI):
    """FastAPI with a :class:`PredictLane` in front of its whole stack, its own ``__call__``
    included (which asks OpenTelemetry's global providers on every request)."""

    lane: PredictLane | None = None

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        lane = self.lane
        if (
            lane is not None
            and scope["type"] == "http"
            and scope["path"] == PATH
            and scope["method"] == "POST"
            and not scope["query_string"]  # refused by the full app (deps.no_query)
        ):
            await lane(scope, receive, send)
        else:
            await super().__call__(scope, receive, send)

    async def full(self, scope: Scope, receive: Receive, send: Send) -> None:
        """The app without the lane."""
        await super().__call__(scope, receive, send)


__all__ = ["LanedFastAPI", "PredictLane"]
