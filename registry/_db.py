"""The small interface both metadata backends (SQLite, PostgreSQL) offer the registry.

Queries are written once, with ``?`` placeholders and SQL both engines accept; a backend
only knows how to connect, open read and write transactions, lock a model, and translate
its driver's errors into :mod:`textsieve.errors`.

Write transactions are serialised per registry (SQLite ``BEGIN IMMEDIATE``; PostgreSQL a
transaction-scoped advisory lock plus ``SELECT ... FOR UPDATE`` on the model row), which
also keeps event ids in commit order, so a reader polling "events after id N" never misses
one that commits late.
"""

from __future__ import annotations

import abc
import contextlib
from collections.abc import Sequence
from typing import Any

Row = dict[str, Any]
Params = Sequence[Any]


class Tx(abc.ABC):
    """One open transaction."""

    dialect: str

    @abc.abstractmethod
    def run(self, sql: str, params: Params = ()) -> int:
        """Execute a statement; returns the number of rows it changed."""

    @abc.abstractmethod
    def all(self, sql: str, params: Params = ()) -> list[Row]:
        """Every row of a query, as dicts."""

    def one(self, sql: str, params: Params = ()) -> Row | None:
        rows = self.all(sql, params)
        return rows[0] if rows else None

    @abc.abstractmethod
    def script(self, sql: str) -> None:
        """Several DDL statements separated by ';' (migration steps)."""

    @abc.abstractmethod
    def lock_model(self, name: str) -> None:
        """Hold the model row until the transaction ends (no-op where the whole store is locked)."""


class Backend(abc.ABC):
    """A metadata store: one connection per process, used under a lock by one thread at a time."""

    dialect: str
    description: str

    @abc.abstractmethod
    def read(self) -> contextlib.AbstractContextManager[Tx]:
        """A read-only transaction that sees one consistent snapshot."""

    @abc.abstractmethod
    def write(self) -> contextlib.AbstractContextManager[Tx]:
        """A write transaction, serialised against every other writer of this registry."""

    @abc.abstractmethod
    def close(self) -> None: ...

    # Column types that differ between the engines; migration steps use these names.
    @property
    @abc.abstractmethod
    def ddl_types(self) -> dict[str, str]: ...


__all__ = ["Backend", "Params", "Row", "Tx"]
