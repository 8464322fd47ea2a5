"""The one exception tree of textsieve.

    TextsieveError                 base; never raised itself
    ├── InputError                 bad user input (data file, argument, request): CLI exit 2, HTTP 422
    │   ├── LimitError             a request limit was exceeded: HTTP 413
    │   └── KeyReusedError         an idempotency key already recorded a different request: HTTP 422
    ├── BundleError                a bundle is malformed or fails a check: CLI exit 2, HTTP 422
    │   └── ParityError            exported model disagrees with its source: CLI exit 1
    ├── RegistryError              registry state or storage problem
    │   ├── NotFoundError          unknown model, version or evaluation set: CLI exit 2, HTTP 404
    │   ├── StateError             transition not allowed from the current state: CLI exit 2, HTTP 409
    │   ├── GateRefusedError       a promotion gate refused: CLI exit 1, HTTP 409
    │   └── IntegrityError         a stored blob is missing or its sha256 differs: CLI exit 1, HTTP 503
    ├── UnavailableError           cannot answer now, retry (registry unreachable, worker gone, shutting down):
    │   │                          CLI exit 1, HTTP 503
    │   ├── OverloadedError        this replica is at a bound (queue, bodies, connections): HTTP 503 + Retry-After
    │   ├── ClientGoneError        the client left before its queued texts were computed: nothing was, and
    │   │                          nothing is sent (booked 499)
    │   ├── LoginRefusedError      the registry's database refused the login (user, password, a role that
    │   │                          does not exist): CLI exit 2, HTTP 503 (a replica that cannot log in is not ready)
    │   └── NoDatabaseError        the registry URL names a database the server does not have: CLI exit 2,
    │                              HTTP 503
    ├── DeadlinePassedError        the caller's own deadline passed before inference started: HTTP 504
    └── AuthError                  missing or wrong admin token: HTTP 401/403

Lower-layer errors (sqlite3, psycopg, onnxruntime, torch, OSError) are translated at one
boundary each with ``raise ... from exc``.
"""

from __future__ import annotations

from typing import Any


class TextsieveError(Exception):
    """Base of every error textsieve raises on purpose."""

    exit_code = 2

    def __init__(self, message: str, **context: Any) -> None:
        super().__init__(message)
        self.message = message
        self.context = context


class InputError(TextsieveError):
    """Bad input from a user: a data file, an argument or a request field."""


class LimitError(InputError):
    """A configured request limit was exceeded."""


class KeyReusedError(InputError):
    """An idempotency key came again with a request unlike the one it first recorded."""


class BundleError(TextsieveError):
    """A bundle directory is malformed or fails one of its checks."""


class ParityError(BundleError):
    """The exported ONNX model disagrees with the PyTorch model beyond tolerance."""

    exit_code = 1


class RegistryError(TextsieveError):
    """A registry operation failed."""


class NotFoundError(RegistryError):
    """An unknown model, version or evaluation set."""


class StateError(RegistryError):
    """A lifecycle transition that the version's current state does not allow."""


class GateRefusedError(RegistryError):
    """A promotion gate refused; ``context['gates']`` holds every gate's result."""

    exit_code = 1


class IntegrityError(RegistryError):
    """A stored blob is missing or does not match its recorded sha256."""

    exit_code = 1


class UnavailableError(TextsieveError):
    """Not possible right now, worth retrying: the registry's database cannot be reached, an
    inference worker stopped, a model is still loading, or the service is shutting down.

    Not a :class:`RegistryError`: most of its causes have nothing to do with the registry.
    """

    exit_code = 1


class ClientGoneError(UnavailableError):
    """The request's client went away while its texts waited in the queue: they were dropped uncomputed.

    Nobody receives its reply (the access log and metrics book 499); an UnavailableError so that,
    were it ever rendered, it would read as a retryable 503."""


class OverloadedError(UnavailableError):
    """This replica has more work queued than it can start within its admitted wait."""

    def __init__(self, message: str, *, retry_after: int, **context: Any) -> None:
        super().__init__(message, **context)
        self.retry_after = retry_after


class LoginRefusedError(UnavailableError):
    """The registry's database refused the login: a setting to fix, not a moment to wait (CLI exit 2).

    An :class:`UnavailableError` still, so a replica that cannot log in answers 503 on readiness and
    keeps trying, which lets a rotated password reach it without a restart.
    """

    exit_code = 2


class NoDatabaseError(UnavailableError):
    """The registry URL names a database the PostgreSQL server does not have: a setting to fix (CLI exit 2).

    An :class:`UnavailableError` still, as :class:`LoginRefusedError` is: a replica answers 503 on readiness
    and keeps trying, so a database created after it started is used without a restart.
    """

    exit_code = 2


class DeadlinePassedError(TextsieveError):
    """The caller's own deadline passed before inference started; nothing was computed."""

    exit_code = 1


class AuthError(TextsieveError):
    """Admin credentials are missing or wrong."""

    def __init__(self, message: str, *, missing: bool) -> None:
        super().__init__(message)
        self.missing = missing


class SavedThenInterrupted(KeyboardInterrupt):
    """Ctrl-C arrived in the optional work that follows a committed change (its evaluation report):
    the change stands. ``saved`` says what was saved; ``result`` is what the call would have
    returned, so a command can still show it."""

    def __init__(self, saved: str, result: object = None) -> None:
        super().__init__(saved)
        self.saved = saved
        self.result = result


class Terminated(KeyboardInterrupt):
    """SIGTERM arrived during a verb that stops on it as on Ctrl-C (``textsieve score``: its work so
    far kept for ``--resume``); CLI exit 143, as a shell reports a process ended by SIGTERM."""


__all__ = [
    "AuthError",
    "BundleError",
    "ClientGoneError",
    "DeadlinePassedError",
    "GateRefusedError",
    "InputError",
    "IntegrityError",
    "KeyReusedError",
    "LimitError",
    "LoginRefusedError",
    "NoDatabaseError",
    "NotFoundError",
    "OverloadedError",
    "ParityError",
    "RegistryError",
    "SavedThenInterrupted",
    "Terminated",
    "StateError",
    "TextsieveError",
    "UnavailableError",
]
