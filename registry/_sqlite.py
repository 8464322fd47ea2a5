"""SQLite metadata backend: one file, no server; the default for a registry folder.

WAL journal so readers never wait for a writer; ``BEGIN IMMEDIATE`` so a write transaction
takes the database's single write lock up front (a deferred one that upgrades later can fail
with "database is locked" without waiting); ``synchronous=FULL`` so a committed version
survives power loss, not only a killed process.
"""

from __future__ import annotations

import contextlib
import os
import sqlite3
import threading
from collections.abc import Iterator
from pathlib import Path

from textsieve.errors import RegistryError, StateError, UnavailableError
from textsieve.registry._db import Backend, Params, Row, Tx

BUSY_TIMEOUT_S = 30.0


def translate(exc: sqlite3.Error, where: str, path: Path | None = None) -> RegistryError | UnavailableError:
    text = str(exc)
    if isinstance(exc, sqlite3.IntegrityError):
        return StateError(f"{where}: the change conflicts with the registry's rules ({text})")
    if isinstance(exc, sqlite3.OperationalError) and ("locked" in text or "busy" in text):
        return UnavailableError(
            f"{where}: the registry database stayed locked by another writer for {BUSY_TIMEOUT_S:.0f} s; try again"
        )
    if isinstance(exc, sqlite3.OperationalError) and ("readonly" in text or "unable to open" in text):
        unwritable = None if path is None else _unwritable(path)
        if unwritable is not None:
            return UnavailableError(unwritable)
    if isinstance(exc, sqlite3.OperationalError) and "unable to open" in text:
        return UnavailableError(f"{where}: cannot open the registry database ({text})")
    if isinstance(exc, sqlite3.DatabaseError) and ("not a database" in text or "malformed" in text):
        # SQLite's words alone leave the operator guessing what to do about it.
        return RegistryError(
            f"{where}: registry database error: {text}; this file is not a registry database or is damaged: "
            "restore the registry folder from a backup, or point --registry (or TEXTSIEVE_REGISTRY) at another"
        )
    return RegistryError(f"{where}: registry database error: {text}")


def _unwritable(path: Path) -> str | None:
    """What this process may not write for SQLite to use the database at ``path``, and what to do; None if nothing."""
    # SQLite's own message ("unable to open database file", "attempt to write a readonly database")
    # names neither the folder nor the file, and a reader does not expect to need write access at all.
    folder = path.parent
    copy = "or copy the registry folder somewhere writable and point --registry (or TEXTSIEVE_REGISTRY) at the copy"
    if not os.access(folder, os.W_OK):
        return (
            f"{folder}: the registry folder is not writable, and SQLite writes beside the database even to read it "
            f"(its lock and journal files {path.name}-shm and {path.name}-wal); make the folder writable for this "
            f"user, {copy}"
        )
    if path.exists() and not os.access(path, os.W_OK):
        return (
            f"{path}: the registry database file is not writable, so the registry cannot be changed; make it "
            f"writable for this user, {copy}"
        )
    for name in (f"{path.name}-wal", f"{path.name}-shm"):
        file = folder / name
        if file.exists() and not os.access(file, os.W_OK):
            return (
                f"{file}: SQLite's journal or lock file is not writable, and SQLite writes to it to use the "
                f"database; make it writable for this user, {copy}"
            )
    return None


class _SqliteTx(Tx):
    dialect = "sqlite"

    def __init__(self, conn: sqlite3.Connection) -> None:
        self.conn = conn

    def run(self, sql: str, params: Params = ()) -> int:
        return self.conn.execute(sql, tuple(params)).rowcount

    def all(self, sql: str, params: Params = ()) -> list[Row]:
        cur = self.conn.execute(sql, tuple(params))
        names = [d[0] for d in cur.description]
        return [dict(zip(names, row, strict=True)) for row in cur.fetchall()]

    def script(self, sql: str) -> None:
        # executescript() would COMMIT first; run statement by statement to stay inside the transaction.
        for statement in sql.split(";"):
            if statement.strip():
                self.conn.execute(statement)

    def lock_model(self, name: str) -> None:
        # BEGIN IMMEDIATE already holds the database's one write lock.
        return None


class SqliteBackend(Backend):
    dialect = "sqlite"

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self.description = str(self.path)
        self._lock = threading.RLock()
        self._conn: sqlite3.Connection | None = None
        self._pid = 0
        self._depth = 0

    @property
    def ddl_types(self) -> dict[str, str]:
        return {"serial": "INTEGER PRIMARY KEY AUTOINCREMENT"}

    def _connection(self) -> sqlite3.Connection:
        # A connection must not cross fork(): a child opens its own.
        if self._conn is None or self._pid != os.getpid():
            try:
                conn = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_S, isolation_level=None, check_same_thread=False)
                conn.execute("PRAGMA journal_mode=WAL")
                conn.execute("PRAGMA synchronous=FULL")
                conn.execute("PRAGMA foreign_keys=ON")
            except sqlite3.Error as exc:
                raise translate(exc, self.description, self.path) from exc
            self._conn, self._pid = conn, os.getpid()
        return self._conn

    @contextlib.contextmanager
    def _transaction(self, begin: str) -> Iterator[Tx]:
        with self._lock:
            if self._depth:
                # One connection, one transaction: an inner BEGIN would fail or commit the outer one.
                raise RuntimeError("a registry transaction was opened inside another one")
            self._depth += 1
            try:
                with self._transaction_body(begin) as tx:
                    yield tx
            finally:
                self._depth -= 1

    @contextlib.contextmanager
    def _transaction_body(self, begin: str) -> Iterator[Tx]:
        conn = self._connection()
        try:
            conn.execute(begin)
        except sqlite3.Error as exc:
            raise translate(exc, self.description, self.path) from exc
        try:
            yield _SqliteTx(conn)
        except BaseException as exc:
            with contextlib.suppress(sqlite3.Error):
                conn.execute("ROLLBACK")
            if isinstance(exc, sqlite3.Error):
                raise translate(exc, self.description, self.path) from exc
            raise
        try:
            conn.execute("COMMIT")
        except sqlite3.Error as exc:
            with contextlib.suppress(sqlite3.Error):
                conn.execute("ROLLBACK")
            raise translate(exc, self.description, self.path) from exc

    def read(self) -> contextlib.AbstractContextManager[Tx]:
        return self._transaction("BEGIN DEFERRED")

    def write(self) -> contextlib.AbstractContextManager[Tx]:
        return self._transaction("BEGIN IMMEDIATE")

    def close(self) -> None:
        with self._lock:
            if self._conn is not None and self._pid == os.getpid():
                self._conn.close()
            self._conn = None


__all__ = ["SqliteBackend"]
