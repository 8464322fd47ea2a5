"""The ``Idempotency-Key`` request header (draft-ietf-httpapi-idempotency-key-header), read as the
draft defines it: an Item Structured Field whose value is a String (RFC 8941 §3.3.3), sent once.

Only the bare string is accepted: parameters after it (``"k";a=1``) or a list (``"k", "l"``, also
what two field lines combine into, RFC 8941 §4.2) are refused rather than half-read, and so is a
repeated header line, which the draft forbids clients to send. What the key means for a verdict is
:mod:`textsieve.registry.verdicts`'s business; here is only its syntax.
"""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request

from textsieve.errors import InputError
from textsieve.registry.verdicts import MAX_KEY_CHARS

HEADER = "Idempotency-Key"
EXAMPLE = '"8e03978e-40d5-43e8-bc93-6894a57f9324"'  # the draft's own example of a UUID key
ALLOWED = (
    f"one Structured Field string (RFC 8941 §3.3.3): 1 to {MAX_KEY_CHARS} printable ASCII characters inside "
    f"double quotes, such as {HEADER}: {EXAMPLE}"
)
SCHEMA = {"type": "string", "pattern": r'^"(?:[ !#-\[\]-~]|\\["\\])+"$', "examples": [EXAMPLE]}


class IdempotencyKeyError(InputError):
    """An ``Idempotency-Key`` header that is not one RFC 8941 string of 1–255 characters (HTTP 400)."""

    def __init__(self, why: str) -> None:
        super().__init__(f"header {HEADER}: {why}; give {ALLOWED}", header=HEADER)


def parse(lines: list[str]) -> str | None:
    """The key the header's field lines carry, or None without the header."""
    if not lines:
        return None
    if len(lines) > 1:
        raise IdempotencyKeyError(f"sent {len(lines)} times; send it once")
    raw = lines[0].strip(" ")  # RFC 8941 §4.2: leading and trailing spaces are discarded
    if not raw.startswith('"'):
        raise IdempotencyKeyError(f"{raw[:40]!r} is not in double quotes")
    value, end = _string(raw)
    if raw[end:].strip(" "):
        raise IdempotencyKeyError(f"{raw[end : end + 40]!r} follows the closing quote (no parameters or lists)")
    if not value:
        raise IdempotencyKeyError("the key is empty")
    if len(value) > MAX_KEY_CHARS:
        raise IdempotencyKeyError(f"the key has {len(value)} characters")
    return value


def _string(raw: str) -> tuple[str, int]:
    """RFC 8941 §4.2.5 (parsing a string): the value and the index just past its closing quote."""
    out: list[str] = []
    i = 1
    while i < len(raw):
        c = raw[i]
        if c == "\\":
            following = raw[i + 1 : i + 2]
            if following not in ('"', "\\"):
                raise IdempotencyKeyError('a backslash in the key may only escape " or \\')
            out.append(following)
            i += 2
            continue
        if c == '"':
            return "".join(out), i + 1
        if not " " <= c <= "~":
            raise IdempotencyKeyError(f"the key has the character U+{ord(c):04X}, which is not printable ASCII")
        out.append(c)
        i += 1
    raise IdempotencyKeyError("the key has no closing double quote")


async def idempotency_key(request: Request) -> str | None:
    # Read by hand: a FastAPI Header parameter keeps one of several field lines and would not see
    # a repeat. The header is documented in the operation's openapi_extra.
    return parse(request.headers.getlist(HEADER))


IdempotencyKey = Annotated[str | None, Depends(idempotency_key)]

__all__ = [
    "ALLOWED",
    "EXAMPLE",
    "HEADER",
    "SCHEMA",
    "IdempotencyKey",
    "IdempotencyKeyError",
    "idempotency_key",
    "parse",
]
