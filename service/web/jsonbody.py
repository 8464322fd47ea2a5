"""JSON request bodies: read as UTF-8 only, and refused only once the route's token has been checked.

RFC 8259 §8.1: JSON exchanged between systems MUST be encoded as UTF-8. FastAPI reads a JSON body
with ``json.loads(bytes)``, which guesses UTF-16 and UTF-32 from a byte-order mark or from where
the NUL bytes are, and it ignores the media type's ``charset``; so a UTF-16 body and a
``Content-Type: application/json; charset=utf-16`` were answered as if they were UTF-8, on every
JSON route, while the refusals told callers to send UTF-8. Here every route that reads a JSON
body (:class:`JsonBodyRoute`) reads it as UTF-8 or refuses it:

- a ``charset`` other than ``utf-8`` (any case, quoted or not) is refused with 415 naming it
  (RFC 8259 §11 defines no charset parameter; ``utf-8`` is harmless and stays accepted);
- a body in UTF-16 or UTF-32, told by its byte-order mark or by a NUL byte among its first two
  (a JSON text begins with an ASCII character, so UTF-8 JSON never has one there; RFC 4627 §3's
  rule), is refused with 415 naming the encoding found;
- a UTF-8 byte-order mark is ignored, as RFC 8259 §8.1 allows a parser to: the bytes after it are
  UTF-8 and mean the same, and common tools add one (Windows PowerShell 5.1's ``-Encoding utf8``,
  from memory), so refusing it would fail callers for nothing. The lane
  (:mod:`~textsieve.service.web.lane`) does not read such a body; it hands it here.
- bytes that are not UTF-8 at all, JSON that does not parse, nesting deeper than the reader's
  recursion and numbers past Python's 4300 digits are 422, as before;
- a member name given twice in one object (``{"to": "candidate", "to": "live"}``, an escape such
  as ``"t\\u006f"`` included) is 422 naming it. RFC 8259 §4 leaves such an object's meaning to
  each reader: Python's and pydantic's take the last, many take the first, so a gateway, audit
  filter or log in front could read a promotion to candidate that the service carried out to live.

FastAPI reads the body before it runs a route's dependencies, so any such refusal used to come
before the admin or reviewer token's 401/403 (DEVELOPERS.md: the token is checked before anything
else about the request). The request here keeps the refusal in its state and hands FastAPI a
value no request model takes; the dependencies run (the token, a query string), then the body's
validation fails and :mod:`~textsieve.service.web.problems` answers with the refusal kept.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Coroutine
from typing import Any

from fastapi import Request, Response
from fastapi.routing import APIRoute
from starlette.types import Message, Receive, Scope, Send

from textsieve.errors import InputError
from textsieve.service.web.problems import BODY_REFUSAL, CharsetError, body_shape, is_json
from textsieve.service.web.schemas import quoted_name, shown_name

UTF8_BOM = b"\xef\xbb\xbf"
# Longest first: UTF-32LE's mark begins with UTF-16LE's.
_MARKS = (
    (b"\x00\x00\xfe\xff", "UTF-32BE"),
    (b"\xff\xfe\x00\x00", "UTF-32LE"),
    (b"\xfe\xff", "UTF-16BE"),
    (b"\xff\xfe", "UTF-16LE"),
)


def charsets(content_type: str) -> list[str]:
    """The ``charset`` parameters of a Content-Type, lowercased and unquoted (RFC 9110 §8.3.2)."""
    found = []
    for param in content_type.split(";")[1:]:
        name, eq, value = param.partition("=")
        if eq and name.strip().lower() == "charset":
            found.append(value.strip().strip('"').strip().lower())
    return found


def foreign_encoding(body: bytes) -> str | None:
    """The UTF-16 or UTF-32 form ``body`` is in and how it shows (the same guess Python's
    ``json.detect_encoding`` makes), or None."""
    for mark, name in _MARKS:
        if body.startswith(mark):
            return f"{name} (its byte-order mark {mark.hex(' ').upper()})"
    head = body[:4]
    if len(head) < 2 or (head[0] and head[1]):
        return None
    if not head[0]:
        name = "UTF-16BE" if head[1] or len(head) < 4 else "UTF-32BE"
    else:
        name = "UTF-16LE" if len(head) < 4 or head[2] or head[3] else "UTF-32LE"
    return f"{name} (a NUL byte among its first bytes {head.hex(' ').upper()})"


def _unreadable(why: str, shape: Callable[[], str], cause: BaseException) -> InputError:
    message = f"the body could not be read as JSON ({why}); send UTF-8 JSON: {shape()}"
    error = InputError(f"body: {message}", errors=[{"field": "body", "message": message, "type": "body_unreadable"}])
    error.__cause__ = cause
    return error


class _Repeated(Exception):
    def __init__(self, name: str) -> None:
        self.name = name


def _unique(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    """An object's members as a dict; raises :class:`_Repeated` for a name given twice."""
    members = dict(pairs)
    if len(members) != len(pairs):
        seen: set[str] = set()
        for name, _ in pairs:
            if name in seen:
                raise _Repeated(name)
            seen.add(name)
    return members


def _repeated(name: str) -> InputError:
    shown = shown_name(name)
    message = (
        f"the body gives the member {quoted_name(name)} more than once; JSON member names must be unique "
        "(RFC 8259 §4 leaves a repeated one's meaning to each reader): give each field once"
    )
    return InputError(
        f"{shown}: {message}", errors=[{"field": shown, "message": message, "type": "json_duplicate_name"}]
    )


def parse(body: bytes, content_type: str, shape: Callable[[], str]) -> Any:
    """The JSON value of a request body sent as ``content_type``; raises :class:`InputError`
    (:class:`CharsetError` for another encoding) with the words for the reply. ``shape()`` says
    what the route's body looks like, for the refusals that say what to send."""
    for charset in charsets(content_type):
        if charset != "utf-8":
            raise CharsetError(f"Content-Type: {content_type[:100]} declares charset {charset[:40]!r}", shape())
    found = foreign_encoding(body)
    if found is not None:
        raise CharsetError(f"the body is {found}", shape())
    skip = len(UTF8_BOM) if body.startswith(UTF8_BOM) else 0
    try:
        # surrogatepass, as json.loads(bytes) decodes: an encoded surrogate is then named by the field's check.
        text = (body[skip:] if skip else body).decode("utf-8", "surrogatepass")
    except UnicodeDecodeError as exc:
        raise _unreadable(f"not UTF-8: {exc.reason} at byte {exc.start + skip}", shape, exc) from None
    try:
        return json.loads(text, object_pairs_hook=_unique)
    except _Repeated as exc:
        raise _repeated(exc.name) from None
    except json.JSONDecodeError as exc:
        message = f"the body is not valid JSON (at character {exc.pos}: {exc.msg})"
        raise InputError(
            f"body: {message}", errors=[{"field": "body", "message": message, "type": "json_invalid"}]
        ) from exc
    except RecursionError as exc:
        raise _unreadable("nested too deeply", shape, exc) from None
    except ValueError as exc:  # Python's int conversion limit (4300 digits)
        raise _unreadable("a number has too many digits", shape, exc) from None


class Refused:
    """What a refused body is handed to FastAPI as: no request model accepts it, so its
    validation fails after the route's dependencies have run."""

    __slots__ = ()


REFUSED = Refused()


class _Utf8JsonRequest(Request):
    async def json(self) -> Any:
        if not hasattr(self, "_json"):
            content_type = self.headers.get("content-type", "")
            try:
                self._json = parse(await self.body(), content_type, lambda: body_shape(self.scope))
            except InputError as exc:
                self.scope.setdefault("state", {})[BODY_REFUSAL] = exc
                self._json = REFUSED
        return self._json


def decided_by_head(scope: Scope) -> bool:
    """Whether a request that expects ``100 Continue`` is refused whatever its body holds: a query
    string (:func:`textsieve.service.web.deps.no_query`, a dependency of every JSON route) or a
    Content-Type not read as JSON (its body is validated as bytes, which no request model takes).
    Only such a request pays for this scan: the predict lane takes the common one before it."""
    if scope.get("http_version") != "1.1":  # an HTTP/1.0 expectation is ignored (service/web/transport.py)
        return False
    expects = False
    types: list[bytes] = []
    for name, value in scope["headers"]:
        if name == b"expect":
            expects = value.strip().lower() == b"100-continue"
        elif name == b"content-type":
            types.append(value)
    if not expects:
        return False
    return bool(scope["query_string"]) or (len(types) == 1 and not is_json(types[0].decode("latin-1")))


# What the route reads in place of a body it does not ask for: not empty (an empty body is "missing",
# which the body would not have been), and no JSON, as a body sent as another media type is not read as.
_STAND_IN: Message = {"type": "http.request", "body": b"\x00", "more_body": False}


def _unread(receive: Receive, send: Send) -> tuple[Receive, Send]:
    """``receive`` that hands out a stand-in body first, so uvicorn, asked for no body, sends no
    ``100 Continue`` (RFC 9110 §10.1.1 lets the final status come in its place); and ``send`` that
    closes the connection after the reply, as the client sends the body it was never asked for, or none."""
    given = False

    async def stand_in() -> Message:
        nonlocal given
        if not given:
            given = True
            return _STAND_IN
        return await receive()

    async def closing(message: Message) -> None:
        if message["type"] == "http.response.start":
            message = {**message, "headers": [*message.get("headers", []), (b"connection", b"close")]}
        await send(message)

    return stand_in, closing


class JsonBodyRoute(APIRoute):
    """A route whose JSON body is read by :func:`parse` (``APIRouter(route_class=JsonBodyRoute)``).
    A request that expects ``100 Continue`` and whose headers decide its refusal gets the refusal in
    its place, and its body is not read (:func:`decided_by_head`)."""

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        handler = super().get_route_handler()

        async def read_as_utf8(request: Request) -> Response:
            return await handler(_Utf8JsonRequest(request.scope, request.receive))

        return read_as_utf8

    async def handle(self, scope: Scope, receive: Receive, send: Send) -> None:
        if decided_by_head(scope):
            receive, send = _unread(receive, send)
        await super().handle(scope, receive, send)


__all__ = ["REFUSED", "JsonBodyRoute", "charsets", "foreign_encoding", "parse"]
