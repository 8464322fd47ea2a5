"""Named schema migration steps, applied in order, each inside the one write transaction.

``schema_migrations`` records the name of every step applied. A registry opened by an
older textsieve that finds a step it does not know refuses to touch it rather than guess,
unless the newer textsieve that applied the step recorded it in ``schema_additive_steps``: an
additive step (new nullable columns, new tables, indexes that the older code's writes satisfy)
leaves everything an older release reads and writes as it was, so the older release carries on,
and replicas of two releases can share one registry through a rolling upgrade (common practice:
the "expand" half of an expand-and-contract schema change).
Steps are written in SQL both SQLite and PostgreSQL accept; ``{serial}`` is the one type that
differs (an ever-increasing integer key: ids are never reused, so event ids work as cursors).
Times are ISO 8601 UTC text and JSON is text, so both engines store exactly the same values.
"""

from __future__ import annotations

from dataclasses import dataclass

from textsieve.errors import RegistryError, UnavailableError
from textsieve.registry._db import Backend


@dataclass(frozen=True)
class Migration:
    name: str
    sql: str
    # True when an older textsieve that knows nothing of this step may still read and write the
    # registry after it: the step only adds (nullable columns, tables, indexes its writes satisfy).
    additive: bool = False


MIGRATIONS: tuple[Migration, ...] = (
    Migration(
        "0001_models_and_versions",
        """
        CREATE TABLE models (
            name TEXT PRIMARY KEY,
            created_at TEXT NOT NULL,
            updated_at TEXT NOT NULL
        );
        CREATE TABLE versions (
            model TEXT NOT NULL REFERENCES models(name),
            version INTEGER NOT NULL CHECK (version >= 1),
            state TEXT NOT NULL CHECK (state IN ('registered', 'candidate', 'live', 'retired')),
            labels TEXT NOT NULL,
            manifest_sha256 TEXT NOT NULL,
            created_at TEXT NOT NULL,
            published_by TEXT NOT NULL,
            reason TEXT NOT NULL,
            accuracy DOUBLE PRECISION NOT NULL,
            macro_f1 DOUBLE PRECISION NOT NULL,
            parity_passed INTEGER NOT NULL,
            promoted_at TEXT,
            previous_live INTEGER,
            PRIMARY KEY (model, version)
        );
        CREATE UNIQUE INDEX versions_one_live ON versions (model) WHERE state = 'live';
        CREATE UNIQUE INDEX versions_one_candidate ON versions (model) WHERE state = 'candidate';
        CREATE UNIQUE INDEX versions_same_manifest ON versions (model, manifest_sha256);
        CREATE TABLE version_files (
            model TEXT NOT NULL,
            version INTEGER NOT NULL,
            name TEXT NOT NULL,
            sha256 TEXT NOT NULL,
            size BIGINT NOT NULL,
            PRIMARY KEY (model, version, name),
            FOREIGN KEY (model, version) REFERENCES versions (model, version)
        )
    """,
    ),
    Migration(
        "0002_evaluation_sets",
        """
        CREATE TABLE evalsets (
            id {serial},
            model TEXT NOT NULL REFERENCES models(name),
            sha256 TEXT NOT NULL,
            texts INTEGER NOT NULL,
            labels TEXT NOT NULL,
            source TEXT NOT NULL,
            added_at TEXT NOT NULL,
            added_by TEXT NOT NULL
        );
        CREATE INDEX evalsets_model ON evalsets (model, id)
    """,
    ),
    Migration(
        "0003_events",
        """
        CREATE TABLE events (
            id {serial},
            model TEXT NOT NULL,
            version INTEGER,
            kind TEXT NOT NULL,
            actor TEXT NOT NULL,
            at TEXT NOT NULL,
            reason TEXT NOT NULL,
            details TEXT NOT NULL
        );
        CREATE INDEX events_model ON events (model, id)
    """,
    ),
    # One report per (version, evaluation set, version compared against; 0 = none), so each is
    # computed once; its JSON and HTML are blobs.
    Migration(
        "0004_reports",
        """
        CREATE TABLE reports (
            model TEXT NOT NULL,
            version INTEGER NOT NULL,
            evalset_sha256 TEXT NOT NULL,
            against INTEGER NOT NULL,
            json_sha256 TEXT NOT NULL,
            html_sha256 TEXT NOT NULL,
            created_at TEXT NOT NULL,
            created_by TEXT NOT NULL,
            PRIMARY KEY (model, version, evalset_sha256, against),
            FOREIGN KEY (model, version) REFERENCES versions (model, version)
        )
    """,
    ),
    Migration(
        "0005_model_settings",
        # One row per setting a person chose for a model; a key without a row has its default.
        # event_id points at the audit event that set the value (who, why, the old value).
        """
        CREATE TABLE model_settings (
            model TEXT NOT NULL REFERENCES models(name),
            key TEXT NOT NULL,
            value TEXT NOT NULL,
            set_by TEXT NOT NULL,
            set_at TEXT NOT NULL,
            reason TEXT NOT NULL,
            event_id BIGINT NOT NULL,
            PRIMARY KEY (model, key)
        )
    """,
    ),
    Migration(
        "0006_shadow_counts",
        # Counts of the candidate scored in the shadow of live traffic, per (live, candidate)
        # pair; replicas add theirs with UPSERTs, so every column is a sum. Disagreeing texts
        # are kept only when a replica is told to (bounded and aged out by the writers).
        """
        CREATE TABLE shadow_pairs (
            model TEXT NOT NULL,
            live_version INTEGER NOT NULL,
            candidate_version INTEGER NOT NULL,
            texts BIGINT NOT NULL,
            agreed BIGINT NOT NULL,
            dropped BIGINT NOT NULL,
            delta_sum DOUBLE PRECISION NOT NULL,
            flushes BIGINT NOT NULL,
            first_at TEXT NOT NULL,
            updated_at TEXT NOT NULL,
            PRIMARY KEY (model, live_version, candidate_version)
        );
        CREATE TABLE shadow_transitions (
            model TEXT NOT NULL,
            live_version INTEGER NOT NULL,
            candidate_version INTEGER NOT NULL,
            live_label TEXT NOT NULL,
            candidate_label TEXT NOT NULL,
            texts BIGINT NOT NULL,
            PRIMARY KEY (model, live_version, candidate_version, live_label, candidate_label)
        );
        CREATE TABLE shadow_texts (
            id {serial},
            model TEXT NOT NULL,
            live_version INTEGER NOT NULL,
            candidate_version INTEGER NOT NULL,
            text TEXT NOT NULL,
            live_label TEXT NOT NULL,
            live_probability DOUBLE PRECISION NOT NULL,
            candidate_label TEXT NOT NULL,
            candidate_probability DOUBLE PRECISION NOT NULL,
            at TEXT NOT NULL
        );
        CREATE INDEX shadow_texts_model ON shadow_texts (model, id)
    """,
    ),
    # Reviewers' verdicts on single predictions: the text they judged, what the version said and
    # the label they gave. Rows are only added or deleted (data-protection requests), never changed.
    Migration(
        "0007_verdicts",
        """
        CREATE TABLE verdicts (
            id {serial},
            model TEXT NOT NULL,
            version INTEGER NOT NULL,
            text TEXT NOT NULL,
            predicted_label TEXT NOT NULL,
            predicted_probability DOUBLE PRECISION NOT NULL
                CHECK (predicted_probability >= 0 AND predicted_probability <= 1),
            verdict_label TEXT NOT NULL,
            reviewer TEXT NOT NULL,
            at TEXT NOT NULL,
            FOREIGN KEY (model, version) REFERENCES versions (model, version)
        );
        CREATE INDEX verdicts_model ON verdicts (model, version, id);
        CREATE INDEX verdicts_at ON verdicts (model, at)
    """,
    ),
    # The Idempotency-Key a verdict was recorded under (draft-ietf-httpapi-idempotency-key-header)
    # and the sha256 of what the request asked (registry/verdicts.py fingerprint). They live on the
    # verdict's own row, so the key is stored in the same INSERT as the verdict and goes when the
    # verdict is deleted. Older rows keep NULL: they were recorded without a key. The unique index
    # is what makes two concurrent requests with one key store one verdict.
    Migration(
        "0008_verdict_keys",
        """
        ALTER TABLE verdicts ADD COLUMN idempotency_key TEXT;
        ALTER TABLE verdicts ADD COLUMN request_sha256 TEXT;
        CREATE UNIQUE INDEX verdicts_idempotency_key ON verdicts (model, idempotency_key)
            WHERE idempotency_key IS NOT NULL
    """,
        additive=True,  # verdicts recorded without a key leave both columns NULL, as older releases do
    ),
    # Drift windows shared by replicas: each row is one replica's flush of one served version's
    # drift counts (registry/drift.py, a comma-separated count vector). A version's window is its
    # newest rows summing to the window's size; older rows are deleted by the writers. A new table
    # an older release never reads: additive.
    Migration(
        "0009_drift_counts",
        """
        CREATE TABLE drift_counts (
            id {serial},
            model TEXT NOT NULL,
            version INTEGER NOT NULL,
            replica TEXT NOT NULL,
            flushed_at TEXT NOT NULL,
            texts BIGINT NOT NULL CHECK (texts >= 1),
            counts TEXT NOT NULL
        );
        CREATE INDEX drift_counts_version ON drift_counts (model, version, id)
    """,
        additive=True,
    ),
    # The window size (TEXTSIEVE_DRIFT_WINDOW_TEXTS) of the replica that wrote each drift row. Pruning
    # keeps the rows the largest size declared among a version's rows can reach, so a replica set to a
    # smaller window no longer deletes the rows a larger one reads, and replies say when replicas
    # disagree (registry/drift_queries.py). Rows written before, or by an older release, keep NULL: a
    # size nobody declared. A nullable column an older release never names: additive.
    Migration(
        "0010_drift_window_texts",
        """
        ALTER TABLE drift_counts ADD COLUMN window_texts BIGINT CHECK (window_texts >= 1)
    """,
        additive=True,
    ),
)

FIRST_MIGRATION = MIGRATIONS[0].name  # when it was applied is the registry's identity (Registry.registry_id)

_TABLE = "CREATE TABLE IF NOT EXISTS schema_migrations (name TEXT PRIMARY KEY, applied_at TEXT NOT NULL)"
_ADDITIVE = "CREATE TABLE IF NOT EXISTS schema_additive_steps (name TEXT PRIMARY KEY)"


def applied(backend: Backend) -> list[str]:
    """Names of the steps recorded as applied, in the order they were applied."""
    with backend.write() as tx:
        tx.run(_TABLE)
        return [r["name"] for r in tx.all("SELECT name FROM schema_migrations ORDER BY name")]


def migrate(backend: Backend, now: str, steps: tuple[Migration, ...] = MIGRATIONS) -> list[str]:
    """Apply every step not yet applied; returns the names applied now."""
    known = [m.name for m in steps]
    if _up_to_date(backend, known):
        return []
    done_now: list[str] = []
    with backend.write() as tx:
        tx.run(_TABLE)
        tx.run(_ADDITIVE)
        done = {r["name"] for r in tx.all("SELECT name FROM schema_migrations")}
        additive = {r["name"] for r in tx.all("SELECT name FROM schema_additive_steps")}
        unknown = sorted(done - set(known) - additive)
        if unknown:
            raise RegistryError(
                f"{backend.description}: the registry has schema step {unknown[-1]!r}, "
                "which this textsieve does not know; upgrade textsieve"
            )
        for step in steps:
            if step.name in done:
                continue
            tx.script(step.sql.format(**backend.ddl_types))
            tx.run("INSERT INTO schema_migrations (name, applied_at) VALUES (?, ?)", (step.name, now))
            if step.additive:
                tx.run("INSERT INTO schema_additive_steps (name) VALUES (?)", (step.name,))
            done_now.append(step.name)
    return done_now


def _up_to_date(backend: Backend, known: list[str]) -> bool:
    """The common cases answered without taking the write lock: every step applied, and no other
    than a newer release's additive ones."""
    try:
        with backend.read() as tx:
            done = {r["name"] for r in tx.all("SELECT name FROM schema_migrations")}
            if done == set(known):
                return True
            if not done >= set(known):
                return False
            newer = done - set(known)
            return newer <= {r["name"] for r in tx.all("SELECT name FROM schema_additive_steps")}
    except (RegistryError, UnavailableError):
        return False  # no table yet, or unreadable (e.g. locked): the write path decides


__all__ = ["FIRST_MIGRATION", "MIGRATIONS", "Migration", "applied", "migrate"]
