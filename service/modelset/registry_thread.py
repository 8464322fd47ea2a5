"""The registry as the service uses it: every call on one dedicated thread.

SQLite connections belong to the thread that opened them, and registry calls block, so the
registry is opened and used on a single worker thread and awaited from the event loop. Each
registry operation the service needs has a typed method of the same name here, so a renamed
or re-typed registry method is a type error, not a failure at request time.
"""

from __future__ import annotations

import asyncio
import functools
import sqlite3
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import ParamSpec, TypeVar

import numpy as np
from numpy.typing import NDArray

from textsieve.errors import RegistryError, StateError, TextsieveError, UnavailableError
from textsieve.registry import (
    Bundle,
    Event,
    ModelInfo,
    ModelSettings,
    Promotion,
    Registry,
    ReportInfo,
    VersionInfo,
    open_registry,
)
from textsieve.registry.drift import StoredWindow
from textsieve.registry.shadow import Tally
from textsieve.registry.verdicts import Recorded
from textsieve.service.settings import public_location

P = ParamSpec("P")

# What a caller of the service is told when the registry's storage fails. The registry's own words
# name its database (user, host, port, database) or its folder, and the driver's add hosts and ports:
# right for the CLI's operator, wrong for HTTP callers who hold no token (views, pinned predictions,
# /readyz). The server's log keeps the registry's words (:func:`private_detail`).
_UNAVAILABLE = (
    "the registry's database cannot be reached or stayed busy (the server's log says why); "
    "the versions already loaded keep serving: retry after the Retry-After seconds"
)
_NOT_OPEN = (
    "this service has not opened its registry yet: it is starting, or the registry cannot be reached "
    "(the server's log says why); retry after the Retry-After seconds"
)
_CONFLICT = "the change conflicts with the registry's rules (the server's log says which)"
_FAILED = "the registry's database failed (the server's log says why)"


def _from_storage(exc: BaseException) -> bool:
    """Whether ``exc`` is the registry's translation of its database driver's error (``raise … from``)."""
    cause = exc.__cause__
    return isinstance(cause, sqlite3.Error) or type(cause).__module__.split(".")[0] == "psycopg"


def public(exc: TextsieveError) -> TextsieveError:
    """``exc``, or for a failure of the registry's storage the same class of error in words that
    name no database, host or folder."""
    if not _from_storage(exc):
        return exc
    if isinstance(exc, UnavailableError):
        return UnavailableError(_UNAVAILABLE)
    if isinstance(exc, StateError):
        return StateError(_CONFLICT)
    if isinstance(exc, RegistryError):
        return RegistryError(_FAILED)
    return exc


def private_detail(exc: BaseException) -> str:
    """The whole story of an error for the server's log: the registry's own words when
    :func:`public` reworded them."""
    cause = exc.__cause__
    if isinstance(cause, TextsieveError) and _from_storage(cause):
        return cause.message
    return exc.message if isinstance(exc, TextsieveError) else str(exc)


T = TypeVar("T")


class RegistryThread:
    def __init__(self, location: str, blobs: str | None = None) -> None:
        self.location = location
        self.label = public_location(location)  # for messages: no database password
        self.blobs = blobs
        self._executor = ThreadPoolExecutor(1, thread_name_prefix="textsieve-registry")
        self._registry: Registry | None = None

    def _open(self) -> Registry:
        # create=False: a mistyped registry path is reported instead of becoming a new, empty registry.
        registry = open_registry(self.location, blobs=self.blobs, create=False)
        # Its messages reach HTTP callers who hold no token ("no model 'x' in ..."): they name
        # no folder or database of this machine; the server's log says which registry it reads.
        registry.location = "this service's registry"
        return registry

    async def _run(self, fn: Callable[P, T], *args: P.args, **kwargs: P.kwargs) -> T:
        """``fn(*args, **kwargs)`` on the registry thread; its exceptions are raised here unchanged,
        but for the storage's own failures, which are raised in words for any caller (:func:`public`)."""
        loop = asyncio.get_running_loop()
        try:
            return await loop.run_in_executor(self._executor, functools.partial(fn, *args, **kwargs))
        except TextsieveError as exc:
            said = public(exc)
            if said is exc:
                raise
            raise said from exc

    async def open(self) -> None:
        if self._registry is None:
            self._registry = await self._run(self._open)

    @property
    def is_open(self) -> bool:
        return self._registry is not None

    @property
    def registry(self) -> Registry:
        """The open registry; only to be used on the registry thread (through the methods below)."""
        if self._registry is None:
            # Anyone may meet this (a view, a pinned prediction while the service starts or its database
            # is down): no location in it; the server's log names the registry and why it is not open.
            raise UnavailableError(_NOT_OPEN)
        return self._registry

    # -- reading ------------------------------------------------------------------------
    async def models(self) -> list[ModelInfo]:
        return await self._run(self.registry.models)

    async def versions(self, model: str) -> list[VersionInfo]:
        return await self._run(self.registry.versions, model)

    async def version(self, model: str, version: int) -> VersionInfo:
        return await self._run(self.registry.version, model, version)

    async def live(self, model: str) -> VersionInfo | None:
        return await self._run(self.registry.live, model)

    async def candidate(self, model: str) -> VersionInfo | None:
        return await self._run(self.registry.candidate, model)

    async def history(self, model: str) -> list[Event]:
        return await self._run(self.registry.history, model)

    async def cursor(self) -> int:
        return await self._run(self.registry.cursor)

    async def changes_since(self, cursor: int) -> tuple[int, list[Event]]:
        return await self._run(self.registry.changes_since, cursor)

    async def model_settings(self, model: str) -> ModelSettings:
        return await self._run(self.registry.model_settings, model)

    async def fetch(self, model: str, version: int | None = None) -> Bundle:
        return await self._run(self.registry.fetch, model, version)

    async def report_content(self, model: str, version: int, kind: str) -> tuple[ReportInfo, bytes]:
        return await self._run(self.registry.report_content, model, version, kind)

    async def card(self, model: str, version: int) -> str:
        return await self._run(self.registry.card, model, version)

    # -- changing -----------------------------------------------------------------------
    async def promote(
        self, model: str, version: int, to: str, *, reason: str, actor: str | None = None, force: bool = False
    ) -> Promotion:
        return await self._run(self.registry.promote, model, version, to, reason=reason, actor=actor, force=force)

    async def rollback(self, model: str, *, reason: str, actor: str | None = None) -> VersionInfo:
        return await self._run(self.registry.rollback, model, reason=reason, actor=actor)

    async def record_verdict(
        self,
        model: str,
        version: int,
        *,
        text: str,
        predicted_label: str,
        predicted_probability: float,
        verdict_label: str,
        reviewer: str,
        idempotency_key: str | None = None,
    ) -> Recorded:
        """Store a verdict; under an idempotency key, a repeat returns the verdict the key recorded."""
        if idempotency_key is None:
            info = await self._run(
                self.registry.verdicts.record,
                model,
                version,
                text=text,
                predicted_label=predicted_label,
                predicted_probability=predicted_probability,
                verdict_label=verdict_label,
                reviewer=reviewer,
            )
            return Recorded(info, replayed=False)
        return await self._run(
            self.registry.verdicts.record_once,
            model,
            version,
            key=idempotency_key,
            text=text,
            predicted_label=predicted_label,
            predicted_probability=predicted_probability,
            verdict_label=verdict_label,
            reviewer=reviewer,
        )

    async def add_shadow_counts(
        self, model: str, live: int, candidate: int, tally: Tally, *, keep_texts: int, keep_seconds: float
    ) -> None:
        await self._run(
            self.registry.add_shadow_counts,
            model,
            live,
            candidate,
            tally,
            keep_texts=keep_texts,
            keep_seconds=keep_seconds,
        )

    async def add_drift_counts(
        self, model: str, version: int, replica: str, texts: int, counts: NDArray[np.int64], *, window_texts: int
    ) -> StoredWindow:
        return await self._run(
            self.registry.add_drift_counts, model, version, replica, texts, counts, window_texts=window_texts
        )

    async def drift_window(self, model: str, version: int, *, window_texts: int, size: int) -> StoredWindow:
        return await self._run(self.registry.drift_window, model, version, window_texts=window_texts, size=size)

    async def close(self) -> None:
        if self._registry is not None:
            reg, self._registry = self._registry, None
            await self._run(reg.close)
        self._executor.shutdown(wait=True)


__all__ = ["RegistryThread", "private_detail", "public"]
