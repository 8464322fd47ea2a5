"""The registry's queries, written once for both backends and run inside a caller's transaction."""

from __future__ import annotations

import json
from collections.abc import Iterable
from typing import Any

from textsieve.registry._db import Tx
from textsieve.registry.records import EvalsetInfo, Event, ModelInfo, ReportInfo, State, VersionInfo

_VERSION_COLUMNS = (
    "model, version, state, labels, manifest_sha256, created_at, published_by, reason, "
    "accuracy, macro_f1, parity_passed, promoted_at, previous_live"
)


def dumps(value: Any) -> str:
    return json.dumps(value, sort_keys=True, ensure_ascii=False, separators=(",", ":"))


class Queries:
    """Domain reads and writes over one open transaction."""

    def __init__(self, tx: Tx) -> None:
        self.tx = tx

    # -- models ---------------------------------------------------------------------------
    def model_exists(self, name: str) -> bool:
        return self.tx.one("SELECT name FROM models WHERE name = ?", (name,)) is not None

    def ensure_model(self, name: str, now: str) -> None:
        self.tx.run(
            "INSERT INTO models (name, created_at, updated_at) VALUES (?, ?, ?) ON CONFLICT (name) DO NOTHING",
            (name, now, now),
        )

    def touch_model(self, name: str, now: str) -> None:
        self.tx.run("UPDATE models SET updated_at = ? WHERE name = ?", (now, name))

    def models(self) -> list[ModelInfo]:
        rows = self.tx.all(
            "SELECT m.name, m.created_at, m.updated_at, "
            "(SELECT COUNT(*) FROM versions v WHERE v.model = m.name) AS versions, "
            "(SELECT v.version FROM versions v WHERE v.model = m.name AND v.state = 'live') AS live, "
            "(SELECT v.version FROM versions v WHERE v.model = m.name AND v.state = 'candidate') AS candidate, "
            "(SELECT e.texts FROM evalsets e WHERE e.model = m.name ORDER BY e.id DESC LIMIT 1) AS evalset_texts "
            "FROM models m ORDER BY m.name"
        )
        return [
            ModelInfo(
                name=r["name"],
                live=r["live"],
                candidate=r["candidate"],
                versions=int(r["versions"]),
                created_at=r["created_at"],
                updated_at=r["updated_at"],
                evalset_texts=r["evalset_texts"],
            )
            for r in rows
        ]

    # -- versions -------------------------------------------------------------------------
    def next_version(self, model: str) -> int:
        row = self.tx.one("SELECT MAX(version) AS n FROM versions WHERE model = ?", (model,))
        return int(row["n"] or 0) + 1 if row else 1

    def version_with_manifest(self, model: str, manifest_sha256: str) -> int | None:
        row = self.tx.one(
            "SELECT version FROM versions WHERE model = ? AND manifest_sha256 = ?", (model, manifest_sha256)
        )
        return None if row is None else int(row["version"])

    def insert_version(
        self,
        *,
        model: str,
        version: int,
        labels: list[str],
        manifest_sha256: str,
        created_at: str,
        published_by: str,
        reason: str,
        accuracy: float,
        macro_f1: float,
        parity_passed: bool,
        files: dict[str, tuple[str, int]],
    ) -> None:
        self.tx.run(
            "INSERT INTO versions (model, version, state, labels, manifest_sha256, created_at, published_by, reason, "
            "accuracy, macro_f1, parity_passed) VALUES (?, ?, 'registered', ?, ?, ?, ?, ?, ?, ?, ?)",
            (
                model,
                version,
                dumps(labels),
                manifest_sha256,
                created_at,
                published_by,
                reason,
                accuracy,
                macro_f1,
                int(parity_passed),
            ),
        )
        for name, (digest, size) in sorted(files.items()):
            self.tx.run(
                "INSERT INTO version_files (model, version, name, sha256, size) VALUES (?, ?, ?, ?, ?)",
                (model, version, name, digest, size),
            )

    def _files(self, model: str, versions: Iterable[int] | None = None) -> dict[int, dict[str, str]]:
        rows = self.tx.all(
            "SELECT version, name, sha256 FROM version_files WHERE model = ? ORDER BY version, name", (model,)
        )
        wanted = None if versions is None else set(versions)
        out: dict[int, dict[str, str]] = {}
        for r in rows:
            if wanted is None or r["version"] in wanted:
                out.setdefault(int(r["version"]), {})[r["name"]] = r["sha256"]
        return out

    def version(self, model: str, version: int) -> VersionInfo | None:
        row = self.tx.one(f"SELECT {_VERSION_COLUMNS} FROM versions WHERE model = ? AND version = ?", (model, version))
        if row is None:
            return None
        files = {
            r["name"]: r["sha256"]
            for r in self.tx.all(
                "SELECT name, sha256 FROM version_files WHERE model = ? AND version = ? ORDER BY name", (model, version)
            )
        }
        return VersionInfo.from_row(row, files)

    def versions(self, model: str) -> list[VersionInfo]:
        rows = self.tx.all(f"SELECT {_VERSION_COLUMNS} FROM versions WHERE model = ? ORDER BY version", (model,))
        files = self._files(model)
        return [VersionInfo.from_row(r, files.get(int(r["version"]), {})) for r in rows]

    # Bound as a plain string (str() of a member is its value): drivers differ in how they adapt
    # Enum members (psycopg dumps a plain Enum by its name), and the column holds the values.
    def in_state(self, model: str, state: State) -> VersionInfo | None:
        row = self.tx.one("SELECT version FROM versions WHERE model = ? AND state = ?", (model, str(state)))
        return None if row is None else self.version(model, int(row["version"]))

    def set_state(self, model: str, version: int, state: State) -> None:
        self.tx.run("UPDATE versions SET state = ? WHERE model = ? AND version = ?", (str(state), model, version))

    def make_live(self, model: str, version: int, *, at: str, previous_live: int | None, keep_previous: bool) -> None:
        if keep_previous:
            # A rollback target keeps its own predecessor, so rolling back twice walks further back.
            self.tx.run(
                "UPDATE versions SET state = 'live', promoted_at = ? WHERE model = ? AND version = ?",
                (at, model, version),
            )
        else:
            self.tx.run(
                "UPDATE versions SET state = 'live', promoted_at = ?, previous_live = ? "
                "WHERE model = ? AND version = ?",
                (at, previous_live, model, version),
            )

    # -- evaluation sets ------------------------------------------------------------------
    def add_evalset(
        self, *, model: str, sha256: str, texts: int, labels: dict[str, int], source: str, at: str, by: str
    ) -> EvalsetInfo:
        self.tx.run(
            "INSERT INTO evalsets (model, sha256, texts, labels, source, added_at, added_by) "
            "VALUES (?, ?, ?, ?, ?, ?, ?)",
            (model, sha256, texts, dumps(labels), source, at, by),
        )
        info = self.evalset(model)
        assert info is not None
        return info

    def evalset(self, model: str) -> EvalsetInfo | None:
        row = self.tx.one(
            "SELECT id, model, sha256, texts, labels, source, added_at, added_by FROM evalsets "
            "WHERE model = ? ORDER BY id DESC LIMIT 1",
            (model,),
        )
        return None if row is None else EvalsetInfo.from_row(row)

    # -- events ---------------------------------------------------------------------------
    def add_event(
        self, *, model: str, version: int | None, kind: str, actor: str, at: str, reason: str, details: dict[str, Any]
    ) -> int:
        # RETURNING works in both engines (SQLite since 3.35).
        row = self.tx.one(
            "INSERT INTO events (model, version, kind, actor, at, reason, details) "
            "VALUES (?, ?, ?, ?, ?, ?, ?) RETURNING id",
            (model, version, kind, actor, at, reason, dumps(details)),
        )
        assert row is not None
        return int(row["id"])

    def events(self, model: str, *, version: int | None = None, last: int | None = None) -> list[Event]:
        """A model's events oldest first: all of them, or those about one version (:meth:`Event.concerns`:
        its own, and the promotions and rollbacks recorded against another version that changed its
        state), or only the ``last`` of those."""
        columns = "id, model, version, kind, actor, at, reason, details"
        if version is not None:  # which promotions and rollbacks concern it is in their details
            rows = self.tx.all(
                f"SELECT {columns} FROM events WHERE model = ? AND (version = ? OR kind IN ('promote', 'rollback')) "
                "ORDER BY id",
                (model, version),
            )
            events = [e for e in map(Event.from_row, rows) if e.concerns(version)]
            return events if last is None else events[-last:]
        if last is None:
            rows = self.tx.all(f"SELECT {columns} FROM events WHERE model = ? ORDER BY id", (model,))
        else:  # newest first to LIMIT them in the database, whatever the history's length; then turned round
            rows = self.tx.all(f"SELECT {columns} FROM events WHERE model = ? ORDER BY id DESC LIMIT ?", (model, last))[
                ::-1
            ]
        return [Event.from_row(r) for r in rows]

    def count_events(self, model: str, *, version: int | None = None) -> int:
        if version is not None:
            return len(self.events(model, version=version))
        row = self.tx.one("SELECT COUNT(*) AS n FROM events WHERE model = ?", (model,))
        return int(row["n"]) if row else 0

    def events_after(self, cursor: int, limit: int) -> list[Event]:
        rows = self.tx.all(
            "SELECT id, model, version, kind, actor, at, reason, details FROM events WHERE id > ? ORDER BY id LIMIT ?",
            (cursor, limit),
        )
        return [Event.from_row(r) for r in rows]

    # -- per-model settings ---------------------------------------------------------------
    def setting_rows(self, model: str) -> list[dict[str, Any]]:
        return self.tx.all(
            "SELECT key, value, set_by, set_at, reason, event_id FROM model_settings WHERE model = ? ORDER BY key",
            (model,),
        )

    def put_setting(self, *, model: str, key: str, value: Any, by: str, at: str, reason: str, event_id: int) -> None:
        self.tx.run(
            "INSERT INTO model_settings (model, key, value, set_by, set_at, reason, event_id) "
            "VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT (model, key) DO UPDATE SET value = excluded.value, "
            "set_by = excluded.set_by, set_at = excluded.set_at, reason = excluded.reason, "
            "event_id = excluded.event_id",
            (model, key, dumps(value), by, at, reason, event_id),
        )

    def drop_setting(self, model: str, key: str) -> None:
        self.tx.run("DELETE FROM model_settings WHERE model = ? AND key = ?", (model, key))

    # -- reports --------------------------------------------------------------------------
    _REPORT_COLUMNS = "model, version, evalset_sha256, against, json_sha256, html_sha256, created_at, created_by"

    def add_report(self, info: ReportInfo, *, replace: bool = False) -> None:
        """Record a report; one computed meanwhile by another process for the same key is kept,
        unless ``replace`` (a fuller report of the same key: built with the training run folders)."""
        on_conflict = (
            "DO UPDATE SET json_sha256 = excluded.json_sha256, html_sha256 = excluded.html_sha256, "
            "created_at = excluded.created_at, created_by = excluded.created_by"
            if replace
            else "DO NOTHING"
        )
        self.tx.run(
            f"INSERT INTO reports ({self._REPORT_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?, ?, ?) "
            f"ON CONFLICT (model, version, evalset_sha256, against) {on_conflict}",
            (
                info.model,
                info.version,
                info.evalset_sha256,
                info.against or 0,
                info.json_sha256,
                info.html_sha256,
                info.created_at,
                info.created_by,
            ),
        )

    def report(self, model: str, version: int, evalset_sha256: str, against: int | None) -> ReportInfo | None:
        row = self.tx.one(
            f"SELECT {self._REPORT_COLUMNS} FROM reports "
            "WHERE model = ? AND version = ? AND evalset_sha256 = ? AND against = ?",
            (model, version, evalset_sha256, against or 0),
        )
        return None if row is None else ReportInfo.from_row(row)

    def reports(self, model: str) -> list[ReportInfo]:
        rows = self.tx.all(
            f"SELECT {self._REPORT_COLUMNS} FROM reports WHERE model = ? ORDER BY version, created_at", (model,)
        )
        return [ReportInfo.from_row(r) for r in rows]

    def newest_report(self, model: str, version: int, prefer_evalset: str | None) -> ReportInfo | None:
        """The version's report on ``prefer_evalset`` if there is one, else its newest on any set."""
        rows = self.tx.all(
            f"SELECT {self._REPORT_COLUMNS} FROM reports WHERE model = ? AND version = ? ORDER BY created_at DESC",
            (model, version),
        )
        best = [r for r in rows if r["evalset_sha256"] == prefer_evalset] or rows
        return ReportInfo.from_row(best[0]) if best else None

    def referenced_blobs(self) -> set[str]:
        """Every sha256 a version (its files and manifest), an evaluation set or a report refers to."""
        rows = self.tx.all(
            "SELECT sha256 AS d FROM version_files UNION SELECT manifest_sha256 FROM versions "
            "UNION SELECT sha256 FROM evalsets UNION SELECT json_sha256 FROM reports "
            "UNION SELECT html_sha256 FROM reports UNION SELECT evalset_sha256 FROM reports"
        )
        return {str(r["d"]) for r in rows}

    def last_event_id(self) -> int:
        row = self.tx.one("SELECT MAX(id) AS n FROM events")
        return int(row["n"] or 0) if row else 0


__all__ = ["Queries", "dumps"]
