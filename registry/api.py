"""The registry: publish verified bundles as numbered versions, move them through
registered → candidate → live → retired behind gates, roll back, and keep an audit trail.

Lifecycle rules (one live and at most one candidate per model, enforced by the code under a
write lock and again by unique indexes in the database):

- ``promote --to candidate`` from registered or retired; a previous candidate goes back to
  registered (it is not lost, and can be put forward again).
- ``promote --to live`` from registered, candidate or retired, through the gates; the old live
  version becomes retired and is remembered as the new one's predecessor.
- ``rollback`` makes the live version's predecessor live again and retires the current one;
  rolling back again walks further back. It runs no gates (it restores a version that was
  live before) but does re-check the target's blobs.

Gates run outside the write lock (scoring can take seconds); the write transaction then
checks that the live version and evaluation set are still the ones the gates compared
against, and runs the gates again if another process changed them meanwhile. After a few
such rounds (heavy contention) the gates run inside the write transaction instead, which
always finishes.
"""

from __future__ import annotations

import datetime as dt
import functools
import hashlib
import math
import os
import time
from collections.abc import Callable
from pathlib import Path
from types import TracebackType
from typing import TYPE_CHECKING

from textsieve.environment import POSTGRES_SCHEMES as PG_SCHEMES
from textsieve.errors import (
    BundleError,
    GateRefusedError,
    InputError,
    NotFoundError,
    RegistryError,
    SavedThenInterrupted,
    StateError,
    TextsieveError,
)
from textsieve.registry._db import Backend, Tx
from textsieve.registry.blobs import OWNER_FILE, BlobStore, materialize
from textsieve.registry.bundle import Bundle, check_card, check_labels, open_bundle
from textsieve.registry.drift_queries import DriftQueries
from textsieve.registry.evalsets import (
    LabelledText,
    NormalisedEvalset,
    load_evalset,
    normalise,
    parse_stored,
    refused_rows,
    refused_summary,
    unknown_labels,
)
from textsieve.registry.gates import (
    GateSettings,
    Side,
    cautions_gate,
    labels_gate,
    metric_gates,
    parity_gate,
    shadow_gate,
)
from textsieve.registry.manifest import CARD_FILE, MANIFEST, Manifest
from textsieve.registry.migrations import FIRST_MIGRATION, migrate
from textsieve.registry.model_settings import MCNEMAR, TOLERANCES, Group, ModelSettings, Value, setting
from textsieve.registry.names import resolve_actor, validate_model_name, validate_reason, validate_version
from textsieve.registry.queries import Queries
from textsieve.registry.records import (
    EvalsetInfo,
    Event,
    GarbageReport,
    GateResult,
    ModelInfo,
    Promotion,
    ReportInfo,
    State,
    VersionInfo,
)
from textsieve.registry.shadow import ShadowCounts, StoredText, Tally
from textsieve.registry.shadow_queries import ShadowQueries
from textsieve.registry.verdicts import Verdicts

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import NDArray

    from textsieve.registry.drift import StoredWindow

DB_FILE = "registry.sqlite3"
BLOB_DIR = "blobs"
CACHE_DIR = "cache"
_GATE_ATTEMPTS = 3
_CHANGES_LIMIT = 1000
# Unreferenced blobs younger than this are kept by garbage collection: a publish may be between
# storing them and recording the version that refers to them.
GC_GRACE_SECONDS = 3600.0


def utc_now() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="microseconds")


class Registry:
    """A registry: metadata in SQLite or PostgreSQL, artifacts in a content-addressed blob folder."""

    def __init__(
        self,
        backend: Backend,
        blobs: BlobStore,
        cache: Path,
        *,
        location: str,
        settings: GateSettings | None = None,
        blobs_inside: bool = False,
    ) -> None:
        self.backend = backend
        self.blobs = blobs
        # A folder registry's own blobs/ (no --blobs): no other registry's folder can be there by mistake.
        self.blobs_inside = blobs_inside
        self.cache = Path(cache)
        self.location = location
        self.settings = settings or GateSettings()

    # -- lifetime -------------------------------------------------------------------------
    def close(self) -> None:
        self.backend.close()

    def __enter__(self) -> Registry:
        return self

    def __exit__(self, et: type[BaseException] | None, e: BaseException | None, tb: TracebackType | None) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Registry({self.location!r})"

    @property
    def verdicts(self) -> Verdicts:
        """Reviewers' verdicts on this registry's models (see :mod:`textsieve.registry.verdicts`)."""
        return Verdicts(self)

    # -- reading --------------------------------------------------------------------------
    def models(self) -> list[ModelInfo]:
        with self.backend.read() as tx:
            return Queries(tx).models()

    def versions(self, model: str) -> list[VersionInfo]:
        model = validate_model_name(model)
        with self.backend.read() as tx:
            q = Queries(tx)
            self._require_model(q, model)
            return q.versions(model)

    def version(self, model: str, version: int) -> VersionInfo:
        model, version = validate_model_name(model), validate_version(version)
        with self.backend.read() as tx:
            return self._require_version(Queries(tx), model, version)

    def live(self, model: str) -> VersionInfo | None:
        model = validate_model_name(model)
        with self.backend.read() as tx:
            q = Queries(tx)
            self._require_model(q, model)
            return q.in_state(model, State.LIVE)

    def candidate(self, model: str) -> VersionInfo | None:
        model = validate_model_name(model)
        with self.backend.read() as tx:
            q = Queries(tx)
            self._require_model(q, model)
            return q.in_state(model, State.CANDIDATE)

    def evalset(self, model: str) -> EvalsetInfo | None:
        model = validate_model_name(model)
        with self.backend.read() as tx:
            q = Queries(tx)
            self._require_model(q, model)
            return q.evalset(model)

    def model_settings(self, model: str) -> ModelSettings:
        """The model's settings (gate tolerances, review threshold), each with who set it, when and why."""
        model = validate_model_name(model)
        with self.backend.read() as tx:
            q = Queries(tx)
            self._require_model(q, model)
            return self._settings_in(q, model)

    def _settings_in(self, q: Queries, model: str) -> ModelSettings:
        return ModelSettings.resolve(model, q.setting_rows(model), self.settings.as_defaults())

    def history(self, model: str, *, version: int | None = None, last: int | None = None) -> list[Event]:
        """The model's audit trail, oldest first; only ``version``'s events, only the ``last`` ones."""
        return self.history_page(model, version=version, last=last)[0]

    def history_page(
        self, model: str, *, version: int | None = None, last: int | None = None
    ) -> tuple[list[Event], int]:
        """:meth:`history` and how many events there are in all (with the same ``version``), read together."""
        model = validate_model_name(model)
        if version is not None:
            version = validate_version(version)
        if last is not None and (isinstance(last, bool) or not isinstance(last, int) or last < 1):
            raise InputError(f"last {last!r}: give a whole number of events from 1, or None for all")
        with self.backend.read() as tx:
            q = Queries(tx)
            self._require_model(q, model)
            if version is not None:
                self._require_version(q, model, version)
            events = q.events(model, version=version, last=last)
            return events, (len(events) if last is None else q.count_events(model, version=version))

    def cursor(self) -> int:
        """Id of the newest event (0 when there is none): pass it to :meth:`changes_since` later."""
        with self.backend.read() as tx:
            return Queries(tx).last_event_id()

    def changes_since(self, cursor: int, *, limit: int = _CHANGES_LIMIT) -> tuple[int, list[Event]]:
        """Events after ``cursor``, oldest first, and the cursor to pass next time."""
        if isinstance(cursor, bool) or not isinstance(cursor, int) or cursor < 0:
            raise InputError(f"bad cursor {cursor!r}: a cursor is an event id, 0 or more")
        with self.backend.read() as tx:
            events = Queries(tx).events_after(cursor, limit)
        return (events[-1].id if events else cursor), events

    def manifest(self, model: str, version: int | None = None) -> Manifest:
        """A version's manifest (the live one's by default), read from its verified blob."""
        info = self._resolve(model, version)
        data = self.blobs.read_bytes(info.files[MANIFEST])
        return Manifest.model_validate_json(data)

    def fetch(self, model: str, version: int | None = None) -> Bundle:
        """The version's bundle (live by default) as local files, every blob re-hashed on every call."""
        return self._materialize(self._resolve(model, version))

    def _materialize(self, info: VersionInfo) -> Bundle:
        # No database access here: the gates call this while a write transaction may be open.
        folder = self.cache / info.model / f"{info.version}-{info.manifest_sha256[:16]}"
        try:
            materialize(self.blobs, info.files, folder)
        except OSError as exc:
            raise RegistryError(f"{folder}: cannot write the verified copy ({exc.strerror or exc})") from exc
        try:
            manifest = Manifest.model_validate_json((folder / MANIFEST).read_bytes())
        except ValueError as exc:  # verified bytes that no longer parse: a newer manifest format
            raise BundleError(
                f"version {info.version} of {info.model!r} has a manifest this textsieve cannot read"
            ) from exc
        return Bundle(folder, manifest)

    # -- garbage ------------------------------------------------------------------------------
    def collect_garbage(self, *, older_than: float = GC_GRACE_SECONDS, dry_run: bool = False) -> GarbageReport:
        """Remove blobs that no version and no evaluation set refers to (left by killed publishes).

        A referenced blob is never removed. An unreferenced one is removed only once it is older
        than ``older_than`` seconds: a publish stores its blobs before the transaction that
        refers to them, and reusing an old blob makes it recent again, so a publish running
        alongside never loses a blob it is about to record.
        """
        if not math.isfinite(older_than) or older_than < 0:
            # NaN compares false with every mtime, so it would delete blobs a publish is about to record.
            raise InputError(f"older_than {older_than!r}: give a finite number of seconds, 0 or more")
        owner = self._check_blob_owner()
        cutoff = time.time() - older_than
        stored = list(self.blobs.stored())  # listed before the references are read: see above
        with self.backend.read() as tx:
            referenced = Queries(tx).referenced_blobs()
        if owner is None and stored:
            # An unmarked folder (from before the marks) outside a folder registry is taken for this
            # registry's only when it holds some of the blobs this registry refers to.
            if not self.blobs_inside and not any(digest in referenced for digest, _, _ in stored):
                raise InputError(
                    f"{self.blobs.root}: holds {len(stored)} blobs and none this registry refers to, and names no "
                    "registry: it looks like another registry's blob folder, so nothing was deleted; pass this "
                    "registry's own folder (--blobs / TEXTSIEVE_BLOBS), or publish to this one first to mark it"
                )
            if not dry_run:
                self.blobs.claim(self.registry_id)
        removed: list[str] = []
        removed_bytes = spared = 0
        for digest, mtime, size in stored:
            if digest in referenced:
                continue
            if mtime > cutoff:
                spared += 1
                continue
            if not dry_run and not self.blobs.remove_if_older(digest, cutoff):
                spared += 1  # reused by a publish since it was listed
                continue
            removed.append(digest)
            removed_bytes += size
        temporary = 0 if dry_run else self.blobs.sweep_temporary(older_than=max(older_than, 60.0))
        present = {digest for digest, _, _ in stored}
        # A publish alongside may have stored and recorded blobs since the listing: look again.
        missing = [digest for digest in referenced - present if not self.blobs.has(digest)]
        return GarbageReport(
            referenced=len(referenced),
            missing=len(missing),
            blob_folder_missing=not self.blobs.exists(),
            removed=sorted(removed),
            removed_bytes=removed_bytes,
            spared_recent=spared,
            temporary_removed=temporary,
            dry_run=dry_run,
        )

    def _require_blob_folder(self) -> None:
        """Refuse to store into a blob folder that holds none of the blobs the registry refers to: a
        mistyped --blobs or an unmounted shared volume would otherwise get files that every other verb
        and replica looks for in the registry's real blob folder, and never finds. Nor into another
        registry's folder; an unmarked one becomes this registry's."""
        owner = self._check_blob_owner()
        with self.backend.read() as tx:
            referenced = Queries(tx).referenced_blobs()
        if referenced and not any(self.blobs.has(digest) for digest in referenced):
            raise InputError(
                f"{self.blobs.root}: holds none of the {len(referenced)} blobs this registry refers to, so it is "
                "not the registry's blob folder; pass the folder every verb and replica uses "
                "(--blobs / TEXTSIEVE_BLOBS; is its volume mounted?)"
            )
        if owner is None:
            self.blobs.claim(self.registry_id)

    @functools.cached_property
    def registry_id(self) -> str:
        """This registry's identity: a digest of when its schema was first made (a copy of the
        database, a backup restored, keeps it; another registry has its own)."""
        with self.backend.read() as tx:
            row = tx.one("SELECT applied_at FROM schema_migrations WHERE name = ?", (FIRST_MIGRATION,))
        made = "" if row is None else str(row["applied_at"])
        return hashlib.sha256(f"textsieve registry made {made}".encode()).hexdigest()[:24]

    def _check_blob_owner(self) -> str | None:
        """The blob folder's owner; InputError when it is another registry's."""
        owner = self.blobs.owner()
        if owner is not None and owner != self.registry_id:
            raise InputError(
                f"{self.blobs.root}: is another registry's blob folder (its {OWNER_FILE} names {owner}; this "
                f"registry is {self.registry_id}): storing or collecting garbage there would mix or delete that "
                "registry's blobs; pass this registry's own blob folder (--blobs / TEXTSIEVE_BLOBS)"
            )
        return owner

    # -- publishing -----------------------------------------------------------------------
    def publish(
        self,
        bundle_dir: Path,
        model: str,
        *,
        actor: str | None = None,
        reason: str = "",
        evalset: Path | None = None,
        text_field: str = "text",
        label_field: str = "label",
    ) -> VersionInfo:
        """Check the bundle fully, store its files as blobs and record it as the model's next version."""
        model = validate_model_name(model)
        actor = resolve_actor(actor)
        reason = validate_reason(reason, required=False)
        bundle_dir = Path(bundle_dir)
        manifest_bytes = _read_manifest_bytes(bundle_dir)
        bundle = open_bundle(bundle_dir)
        check_card(bundle_dir)
        check_labels(bundle_dir, bundle.manifest.labels)
        if Manifest.model_validate_json(manifest_bytes) != bundle.manifest:
            raise BundleError(f"{bundle_dir}: {MANIFEST} changed while it was being checked; publish again")
        labels = bundle.manifest.labels
        normalised = None
        if evalset is not None:
            normalised = load_evalset(evalset, text_field=text_field, label_field=label_field)
            _check_evalset_labels(evalset, normalised, labels)

        # Blobs first, metadata last: a crash in between leaves unreferenced blobs, never a
        # version whose files are missing.
        self._require_blob_folder()
        self.blobs.ensure()
        self.blobs.sweep_temporary()
        files: dict[str, tuple[str, int]] = {}
        for name, expected in bundle.manifest.files.items():
            digest = self.blobs.put_file(bundle_dir / name)
            if digest != expected:
                raise BundleError(f"{bundle_dir}: {name} changed while it was being published; publish again")
            files[name] = (digest, (bundle_dir / name).stat().st_size)
        manifest_sha = self.blobs.put_bytes(manifest_bytes)
        files[MANIFEST] = (manifest_sha, len(manifest_bytes))
        evalset_sha = self.blobs.put_bytes(normalised.data) if normalised else None

        m = bundle.manifest
        now = utc_now()
        with self.backend.write() as tx:
            q = Queries(tx)
            q.ensure_model(model, now)
            tx.lock_model(model)
            existing = q.version_with_manifest(model, manifest_sha)
            if existing is not None:
                raise StateError(
                    f"this bundle is already version {existing} of {model!r}; versions are immutable "
                    "and each bundle is published once"
                )
            n = q.next_version(model)
            q.insert_version(
                model=model,
                version=n,
                labels=list(labels),
                manifest_sha256=manifest_sha,
                created_at=now,
                published_by=actor,
                reason=reason,
                accuracy=m.metrics.accuracy,
                macro_f1=m.metrics.macro_f1,
                parity_passed=m.parity.passed,
                files=files,
            )
            q.add_event(
                model=model,
                version=n,
                kind="publish",
                actor=actor,
                at=now,
                reason=reason,
                details={
                    "manifest_sha256": manifest_sha,
                    "labels": labels,
                    "files": {k: v[0] for k, v in files.items()},
                    "metrics": m.metrics.model_dump(),
                    "parity": parity_gate(m).figures,
                    "source": str(bundle_dir.resolve()),
                },
            )
            if normalised is not None and evalset_sha is not None and evalset is not None:
                self._record_evalset(q, model, normalised, evalset_sha, Path(evalset).name, now, actor, reason)
            q.touch_model(model, now)
            info = q.version(model, n)
            live_now = q.in_state(model, State.LIVE)
        assert info is not None
        if normalised is not None:
            try:
                self._report_quietly(model, n, _num(live_now), actor)  # evaluation report; never fails the publish
            except SavedThenInterrupted:
                raise SavedThenInterrupted(
                    f"{model!r} version {n} is published; its evaluation report was not made "
                    f"(textsieve evaluate {model} {n} makes it)",
                    info,
                ) from None
        return info

    def add_evalset(
        self,
        model: str,
        file: Path,
        *,
        text_field: str = "text",
        label_field: str = "label",
        actor: str | None = None,
        reason: str = "",
    ) -> EvalsetInfo:
        """Register a labelled file as the model's evaluation set (the newest one is used by the gates)."""
        model = validate_model_name(model)
        actor = resolve_actor(actor)
        reason = validate_reason(reason, required=False)
        with self.backend.read() as tx:
            q = Queries(tx)
            self._require_model(q, model)
            versions = q.versions(model)
            reference = q.in_state(model, State.LIVE) or (versions[-1] if versions else None)
        normalised = load_evalset(file, text_field=text_field, label_field=label_field)
        if reference is not None:
            _check_evalset_labels(file, normalised, reference.labels, version=reference.version)
        self._require_blob_folder()
        self.blobs.ensure()
        digest = self.blobs.put_bytes(normalised.data)
        now = utc_now()
        with self.backend.write() as tx:
            q = Queries(tx)
            tx.lock_model(model)
            info = self._record_evalset(q, model, normalised, digest, Path(file).name, now, actor, reason)
            q.touch_model(model, now)
        return info

    def _record_evalset(
        self,
        q: Queries,
        model: str,
        normalised: NormalisedEvalset,
        digest: str,
        source: str,
        now: str,
        actor: str,
        reason: str,
    ) -> EvalsetInfo:
        info = q.add_evalset(
            model=model,
            sha256=digest,
            texts=len(normalised.examples),
            labels=normalised.labels,
            source=source,
            at=now,
            by=actor,
        )
        q.add_event(
            model=model,
            version=None,
            kind="evalset",
            actor=actor,
            at=now,
            reason=reason,
            details={
                "evalset_id": info.id,
                "sha256": digest,
                "texts": info.texts,
                "labels": info.labels,
                "source": source,
                "repeated_texts": normalised.repeated,
                "conflicting_texts": len(normalised.conflicting),
            },
        )
        return info

    # -- settings -------------------------------------------------------------------------
    def change_settings(
        self,
        model: str,
        values: dict[str, Value] | None = None,
        *,
        reset: tuple[str, ...] | list[str] = (),
        reason: str,
        actor: str | None = None,
        group: Group | None = None,
    ) -> tuple[ModelSettings, list[str]]:
        """Set some settings and return others to their defaults, in one audited change.

        Returns the settings afterwards and the keys that changed (a value equal to the one in
        force, already chosen the same way, is no change and is not recorded). ``group`` limits
        the keys to one group (what one verb may change).
        """
        model = validate_model_name(model)
        reason = validate_reason(reason, required=True)
        actor = resolve_actor(actor)
        chosen = {setting(k, group).key: setting(k, group).validate(v) for k, v in (values or {}).items()}
        back = [setting(k, group).key for k in reset]
        both = sorted(set(chosen) & set(back))
        if both:
            raise InputError(f"{', '.join(both)}: set and reset at once; choose one")
        now = utc_now()
        with self.backend.write() as tx:
            q = Queries(tx)
            self._require_model(q, model)
            tx.lock_model(model)
            before = self._settings_in(q, model)
            changes: dict[str, dict[str, Value]] = {}
            for key, value in chosen.items():
                old = before.values[key]
                if old.is_default or old.value != value:
                    changes[key] = {"from": old.value, "to": value}
            for key in back:
                old = before.values[key]
                if not old.is_default:
                    changes[key] = {"from": old.value, "to": old.default, "default": True}
            if not changes:
                return before, []
            after = {k: v.value for k, v in before.values.items()} | {k: c["to"] for k, c in changes.items()}
            if not after[TOLERANCES.key] and not after[MCNEMAR.key]:
                raise InputError(
                    f"{TOLERANCES.key}=off needs {MCNEMAR.key}=on: at least one gate must compare a candidate "
                    "with the live version"
                )
            event_id = q.add_event(
                model=model,
                version=None,
                kind="settings",
                actor=actor,
                at=now,
                reason=reason,
                details={"changes": changes},
            )
            for key, change in changes.items():
                if change.get("default"):
                    q.drop_setting(model, key)
                else:
                    q.put_setting(
                        model=model, key=key, value=change["to"], by=actor, at=now, reason=reason, event_id=event_id
                    )
            q.touch_model(model, now)
            return self._settings_in(q, model), sorted(changes)

    # -- evaluation reports ---------------------------------------------------------------
    def report(
        self,
        model: str,
        version: int,
        *,
        against: int | None = None,
        examples: list[LabelledText] | None = None,
        actor: str | None = None,
        progress: Callable[[str], None] | None = None,
        run: Path | None = None,
        against_run: Path | None = None,
    ) -> ReportInfo:
        """The version's evaluation report on ``examples`` (default: the model's evaluation set),
        compared with version ``against`` when given: the stored one, or built and stored now.

        One report per (version, evaluation-set sha256, ``against``): asking again costs a lookup.
        Given training run folders (``run``, ``against_run``: the registry keeps none), the report
        is built again with how the embeddings moved, and replaces the stored one.
        """
        if against_run is not None and against is None:
            raise InputError("against_run is the run folder of the version compared with: give against too")
        with_runs = run is not None or against_run is not None
        from textsieve.registry.report.files import make_report

        model, version = validate_model_name(model), validate_version(version)
        with self.backend.read() as tx:
            q = Queries(tx)
            target = self._require_version(q, model, version)
            other = None if against is None else self._require_version(q, model, validate_version(against))
            registered = q.evalset(model)
        data: bytes | None = None
        if examples is None:
            if registered is None:
                raise InputError(
                    f"{model!r} has no evaluation set; pass one (textsieve evaluate {model} {version} --evalset FILE) "
                    f"or register it (textsieve evalset add {model} FILE)"
                )
            digest = registered.sha256
        else:
            refused = refused_rows(examples)
            if refused:
                raise InputError(f"the evaluation texts cannot be scored: {refused_summary(refused, len(examples))}")
            data = normalise(examples).data
            digest = hashlib.sha256(data).hexdigest()
        if other is not None and other.version == version:
            other = None  # a version compared with itself says nothing
        against_n = _num(other)
        with self.backend.read() as tx:
            stored = Queries(tx).report(model, version, digest, against_n)
        if stored is not None and not with_runs:
            return stored
        if examples is None:
            assert registered is not None
            examples = parse_stored(self.blobs.read_bytes(digest))
            problem = _refused_evalset(model, registered, examples)
            if problem is not None:
                raise InputError(f"{problem}, or pass a file: textsieve evaluate {model} {version} --evalset FILE")
        bundle = self._materialize(target)
        pair = None if other is None else (self._materialize(other), other.version)
        # Before any scoring: a run folder of another version or model gave a report crediting its
        # embeddings to this one (or a note that the two "share 0 words").
        _check_run(run, bundle, model, version)
        if pair is not None:
            _check_run(against_run, pair[0], model, pair[1])
        _, json_bytes, html_bytes = make_report(
            bundle,
            examples,
            model=model,
            version=version,
            against=pair,
            progress=progress,
            run=run,
            against_run=against_run,
        )
        self.blobs.ensure()
        if data is not None:
            self.blobs.put_bytes(data)  # kept with the report: the texts it was computed on
        info = ReportInfo(
            model=model,
            version=version,
            evalset_sha256=digest,
            against=against_n,
            json_sha256=self.blobs.put_bytes(json_bytes),
            html_sha256=self.blobs.put_bytes(html_bytes),
            created_at=utc_now(),
            created_by=resolve_actor(actor),
        )
        with self.backend.write() as tx:
            q = Queries(tx)
            q.add_report(info, replace=with_runs)
            stored = q.report(model, version, digest, against_n)
        assert stored is not None
        return stored

    def reports(self, model: str) -> list[ReportInfo]:
        """Every stored report of the model's versions, by version then age."""
        model = validate_model_name(model)
        with self.backend.read() as tx:
            q = Queries(tx)
            self._require_model(q, model)
            return q.reports(model)

    def stored_report(self, model: str, version: int) -> ReportInfo:
        """The version's newest stored report (on the current evaluation set when there is one);
        NotFoundError saying how to make one when there is none."""
        model, version = validate_model_name(model), validate_version(version)
        with self.backend.read() as tx:
            q = Queries(tx)
            self._require_version(q, model, version)
            current = q.evalset(model)
            info = q.newest_report(model, version, None if current is None else current.sha256)
        if info is None:
            raise NotFoundError(
                f"version {version} of {model!r} has no evaluation report yet; make one with "
                f"'textsieve evaluate {model} {version}' (publishing with --evalset and promoting also make one)"
            )
        return info

    def report_content(self, model: str, version: int, kind: str) -> tuple[ReportInfo, bytes]:
        """The newest stored report's ``json`` or ``html`` bytes, re-hashed on read."""
        return self.report_file(self.stored_report(model, version), kind)

    def report_file(self, info: ReportInfo, kind: str) -> tuple[ReportInfo, bytes]:
        """A stored report's ``json`` or ``html`` bytes, re-hashed on read."""
        if kind not in ("json", "html"):
            raise InputError(f"report kind {kind!r}; allowed: json, html")
        return info, self.blobs.read_bytes(info.json_sha256 if kind == "json" else info.html_sha256)

    def card(self, model: str, version: int) -> str:
        """The version's model card as published: named, and linking its evaluation report
        (the bundle's own card.md is immutable; see registry/report/card.py)."""
        from textsieve.registry.report.card import published_card

        info = self.version(model, version)
        try:
            report: ReportInfo | None = self.stored_report(info.model, info.version)
        except NotFoundError:
            report = None
        digest = info.files.get(CARD_FILE)
        text = self.blobs.read_bytes(digest).decode("utf-8") if digest else ""
        return published_card(text, info.model, info.version, report)

    def _report_quietly(self, model: str, version: int, against: int | None, actor: str) -> ReportInfo | None:
        """Build the report publishing and promotion owe, never raising: they must not fail over a report.
        A failure is recorded as a ``report_failed`` event; no evaluation set, or one whose labels the
        version does not know (the gates say so already), means there is simply nothing to report."""
        try:
            with self.backend.read() as tx:
                q = Queries(tx)
                registered = q.evalset(model)
                target = q.version(model, version)
            if registered is None or target is None or unknown_labels(registered.labels, target.labels):
                return None
            return self.report(model, version, against=against, actor=actor)
        except (TextsieveError, ValueError, RuntimeError, OSError, KeyboardInterrupt) as exc:
            if isinstance(exc, KeyboardInterrupt):
                # Ctrl-C after the change was committed: the caller says what stands (SavedThenInterrupted).
                raise SavedThenInterrupted("") from None
            message = exc.message if isinstance(exc, TextsieveError) else f"{type(exc).__name__}: {exc}"
            try:
                with self.backend.write() as tx:
                    Queries(tx).add_event(
                        model=model,
                        version=version,
                        kind="report_failed",
                        actor=actor,
                        at=utc_now(),
                        reason="",
                        details={"against": against, "error": message[:500]},
                    )
            except (TextsieveError, OSError):
                pass  # the registry itself failing will show in the next call; the publish stands
            return None

    # -- lifecycle ------------------------------------------------------------------------
    def check(self, model: str, version: int) -> list[GateResult]:
        """Run the promotion-to-live gates without promoting (nothing is recorded); StateError when the
        version could not become live (already live), as promote would say."""
        model, version = validate_model_name(model), validate_version(version)
        with self.backend.read() as tx:
            q = Queries(tx)
            target = self._require_version(q, model, version)
            _allowed(target, State.LIVE)
            live = q.in_state(model, State.LIVE)
            evalset = q.evalset(model)
            settings = self._settings_in(q, model)
            shadow = self._shadow_for_gate(tx, model, live, target, settings)
        return self._gates(model, target, live, evalset, settings, shadow=shadow)

    def promote(
        self,
        model: str,
        version: int,
        to: str = State.LIVE,
        *,
        reason: str,
        actor: str | None = None,
        force: bool = False,
    ) -> Promotion:
        """Move a version to ``candidate`` or ``live``; GateRefusedError when a gate refuses and not forced."""
        model, version = validate_model_name(model), validate_version(version)
        if to not in (State.CANDIDATE, State.LIVE):
            raise InputError(f"cannot promote to {to!r}; allowed: candidate, live")
        reason = validate_reason(reason, required=True)
        actor = resolve_actor(actor)
        if to == State.CANDIDATE:
            promotion = self._to_candidate(model, version, reason, actor)
            # -- evaluation report of this attempt (never fails the promotion) --
            live_now = self.live(model)
            try:
                report = self._report_quietly(model, version, _num(live_now), actor)
            except SavedThenInterrupted:
                raise SavedThenInterrupted(_unreported(promotion.version), promotion) from None
            return promotion.model_copy(update={"report": report})
        for attempt in range(_GATE_ATTEMPTS + 1):
            if attempt < _GATE_ATTEMPTS:
                with self.backend.read() as tx:
                    q = Queries(tx)
                    target = self._require_version(q, model, version)
                    live = q.in_state(model, State.LIVE)
                    evalset = q.evalset(model)
                    settings = self._settings_in(q, model)
                    shadow = self._shadow_for_gate(tx, model, live, target, settings)
                gates = self._judge(model, target, live, evalset, settings, shadow)
                with self.backend.write() as tx:
                    q = Queries(tx)
                    tx.lock_model(model)
                    current = self._require_version(q, model, version)
                    if (
                        _num(q.in_state(model, State.LIVE)) != _num(live)
                        or _id(q.evalset(model)) != _id(evalset)
                        or self._settings_in(q, model) != settings
                        or current.state != target.state
                    ):
                        if current.state == State.LIVE:
                            raise StateError(
                                f"version {version} of {model!r} became live meanwhile (another promotion)"
                            )
                        continue  # something moved while the gates ran: judge again against the new state
                    outcome = self._apply_live(q, target, live, gates, reason=reason, actor=actor, force=force)
            else:
                # Still contended after several tries: judge under the lock, so nothing can move.
                with self.backend.write() as tx:
                    q = Queries(tx)
                    tx.lock_model(model)
                    target = self._require_version(q, model, version)
                    live = q.in_state(model, State.LIVE)
                    settings = self._settings_in(q, model)
                    shadow = self._shadow_for_gate(tx, model, live, target, settings)
                    gates = self._judge(model, target, live, q.evalset(model), settings, shadow)
                    outcome = self._apply_live(q, target, live, gates, reason=reason, actor=actor, force=force)
            event_id, info, failed = outcome
            # -- evaluation report of this attempt, against the live version the gates judged with
            # (stored before a refusal is raised, so the refusal can point at report_path(); never fails) --
            try:
                report = self._report_quietly(model, version, _num(live), actor)
            except SavedThenInterrupted:
                if info is None:  # refused: nothing changed but the refusal's record, which it says
                    raise _refusal(model, version, gates, failed, event_id) from None
                done = Promotion(version=info, gates=gates, forced=bool(failed), retired=_num(live), event_id=event_id)
                raise SavedThenInterrupted(_unreported(info), done) from None
            # -- end of the report hook --
            if info is None:
                raise _refusal(model, version, gates, failed, event_id)
            return Promotion(
                version=info, gates=gates, forced=bool(failed), retired=_num(live), event_id=event_id, report=report
            )
        raise AssertionError("unreachable: the last attempt runs under the lock")

    def _judge(
        self,
        model: str,
        target: VersionInfo,
        live: VersionInfo | None,
        evalset: EvalsetInfo | None,
        settings: ModelSettings,
        shadow: ShadowCounts | None,
    ) -> list[GateResult]:
        _allowed(target, State.LIVE)
        for digest in target.files.values():
            self.blobs.verify(digest)  # a damaged version is never promoted, forced or not
        if shadow is None:  # the common case keeps _gates' five-argument call
            return self._gates(model, target, live, evalset, settings)
        return self._gates(model, target, live, evalset, settings, shadow=shadow)

    def _shadow_for_gate(
        self, tx: Tx, model: str, live: VersionInfo | None, target: VersionInfo, settings: ModelSettings
    ) -> ShadowCounts | None:
        # Read only when the gate is on. Shadow counts grow all the time, so unlike the live
        # version and the evaluation set they are not re-checked before the promotion commits.
        if GateSettings.of(settings).shadow_agreement_min is None or live is None:
            return None
        return ShadowQueries(tx).pair(model, live.version, target.version)

    def _apply_live(
        self,
        q: Queries,
        target: VersionInfo,
        live: VersionInfo | None,
        gates: list[GateResult],
        *,
        reason: str,
        actor: str,
        force: bool,
    ) -> tuple[int, VersionInfo | None, list[str]]:
        """Record the refusal, or make ``target`` live; returns (event id, new info or None if refused, failed)."""
        model, version = target.model, target.version
        failed = [g.name for g in gates if not g.passed]
        gate_dump = [g.model_dump() for g in gates]
        now = utc_now()
        if failed and not force:
            event_id = q.add_event(
                model=model,
                version=version,
                kind="refuse",
                actor=actor,
                at=now,
                reason=reason,
                details={
                    "to": State.LIVE,
                    "from": target.state,
                    "live": _num(live),
                    "gates": gate_dump,
                    "failed": failed,
                },
            )
            return event_id, None, failed
        if live is not None:
            q.set_state(model, live.version, State.RETIRED)
        q.make_live(model, version, at=now, previous_live=_num(live), keep_previous=False)
        event_id = q.add_event(
            model=model,
            version=version,
            kind="promote",
            actor=actor,
            at=now,
            reason=reason,
            details={
                "to": State.LIVE,
                "from": target.state,
                "retired": _num(live),
                "gates": gate_dump,
                "forced": bool(failed),
                "overridden": failed,
            },
        )
        q.touch_model(model, now)
        return event_id, q.version(model, version), failed

    def _to_candidate(self, model: str, version: int, reason: str, actor: str) -> Promotion:
        with self.backend.read() as tx:
            target = self._require_version(Queries(tx), model, version)
        _allowed(target, State.CANDIDATE)
        for digest in target.files.values():
            self.blobs.verify(digest)  # every replica loads a candidate (shadow scoring): never a damaged one
        now = utc_now()
        with self.backend.write() as tx:
            q = Queries(tx)
            tx.lock_model(model)
            target = self._require_version(q, model, version)
            _allowed(target, State.CANDIDATE)
            previous = q.in_state(model, State.CANDIDATE)
            back: State | None = None
            if previous is not None:
                # Back to what it was: a version that has been live (a retired one on trial again) stays retired.
                back = State.RETIRED if previous.promoted_at is not None else State.REGISTERED
                q.set_state(model, previous.version, back)
            q.set_state(model, version, State.CANDIDATE)
            event_id = q.add_event(
                model=model,
                version=version,
                kind="promote",
                actor=actor,
                at=now,
                reason=reason,
                details={
                    "to": State.CANDIDATE,
                    "from": target.state,
                    "replaced_candidate": _num(previous),
                    "replaced_candidate_to": back,  # registered, or retired if it had been live
                    "gates": [],
                    "forced": False,
                },
            )
            q.touch_model(model, now)
            info = q.version(model, version)
        assert info is not None
        return Promotion(version=info, gates=[], forced=False, retired=None, event_id=event_id)

    def rollback(self, model: str, *, reason: str, actor: str | None = None) -> VersionInfo:
        """Make the version that was live before the current one live again; returns it."""
        model = validate_model_name(model)
        reason = validate_reason(reason, required=True)
        actor = resolve_actor(actor)
        for attempt in range(_GATE_ATTEMPTS + 1):
            locked = attempt == _GATE_ATTEMPTS  # still contended: check the blobs under the lock
            if not locked:
                with self.backend.read() as tx:
                    live, target = self._rollback_pair(Queries(tx), model)
                for digest in target.files.values():
                    self.blobs.verify(digest)
            with self.backend.write() as tx:
                q = Queries(tx)
                tx.lock_model(model)
                if locked:
                    live, target = self._rollback_pair(q, model)
                    for digest in target.files.values():
                        self.blobs.verify(digest)
                elif _num(q.in_state(model, State.LIVE)) != live.version:
                    continue
                now = utc_now()
                q.set_state(model, live.version, State.RETIRED)
                q.make_live(model, target.version, at=now, previous_live=None, keep_previous=True)
                q.add_event(
                    model=model,
                    version=target.version,
                    kind="rollback",
                    actor=actor,
                    at=now,
                    reason=reason,
                    details={"from": live.version, "to": target.version, "target_was": target.state},
                )
                q.touch_model(model, now)
                info = q.version(model, target.version)
            assert info is not None
            return info
        raise AssertionError("unreachable: the last attempt runs under the lock")

    def _rollback_pair(self, q: Queries, model: str) -> tuple[VersionInfo, VersionInfo]:
        """(the live version, the one to restore), or StateError when there is none."""
        self._require_model(q, model)
        live = q.in_state(model, State.LIVE)
        if live is None:
            raise StateError(f"{model!r} has no live version, so there is nothing to roll back")
        if live.previous_live is None:
            # After rollbacks the versions that were live since are retired, so "no version was live
            # before it" read as false: this is the start of the chain, not the absence of history.
            raise StateError(
                f"version {live.version} of {model!r} is live and was its first live version, so rollback has "
                f"nothing earlier to return to; promote another version instead (textsieve promote {model} N "
                "--to live)"
            )
        return live, self._require_version(q, model, live.previous_live)

    # -- shadow counts ------------------------------------------------------------------------
    def add_shadow_counts(
        self,
        model: str,
        live_version: int,
        candidate_version: int,
        tally: Tally,
        *,
        keep_texts: int = 0,
        keep_seconds: float = 7 * 86400.0,
    ) -> None:
        """Add one replica's shadow tally to the pair's sums, in one transaction (see registry/shadow.py).

        With ``keep_texts`` > 0 the tally's disagreeing texts are stored too, and the model's stored
        texts are trimmed to the newest ``keep_texts``. Texts older than ``keep_seconds`` are deleted
        either way. A replica that keeps none (``keep_texts`` 0, the default) stores none and leaves the
        count to the replicas that keep some: it used to delete every kept text of the model at its
        first flush, so one replica left at the default emptied what the others kept for review.
        """
        model = validate_model_name(model)
        live_version, candidate_version = validate_version(live_version), validate_version(candidate_version)
        if tally.empty and not tally.kept:
            return
        at = dt.datetime.now(dt.UTC)
        now = at.isoformat(timespec="microseconds")  # as utc_now() writes it
        cutoff = (at - dt.timedelta(seconds=max(keep_seconds, 0.0))).isoformat(timespec="microseconds")
        with self.backend.write() as tx:
            q = Queries(tx)
            self._require_model(q, model)
            sq = ShadowQueries(tx)
            sq.add(model, live_version, candidate_version, tally, now)
            if keep_texts > 0 and tally.kept:
                sq.keep_texts(model, live_version, candidate_version, tally, now)
            sq.trim_texts(model, keep_texts if keep_texts > 0 else None, cutoff)

    def shadow_counts(self, model: str) -> list[ShadowCounts]:
        """Every (live, candidate) pair's shadow counts, the most recently updated first."""
        model = validate_model_name(model)
        with self.backend.read() as tx:
            self._require_model(Queries(tx), model)
            return ShadowQueries(tx).pairs(model)

    def shadow_pair(self, model: str, live_version: int, candidate_version: int) -> ShadowCounts | None:
        model = validate_model_name(model)
        with self.backend.read() as tx:
            self._require_model(Queries(tx), model)
            return ShadowQueries(tx).pair(model, validate_version(live_version), validate_version(candidate_version))

    def shadow_texts(self, model: str, live_version: int, candidate_version: int, limit: int = 50) -> list[StoredText]:
        """The newest kept disagreeing texts of a pair (none unless a replica was told to keep them)."""
        model = validate_model_name(model)
        with self.backend.read() as tx:
            self._require_model(Queries(tx), model)
            return ShadowQueries(tx).texts(model, live_version, candidate_version, max(1, limit))

    # -- drift windows (shared by replicas, see registry/drift.py) ----------------------------
    def add_drift_counts(
        self,
        model: str,
        version: int,
        replica: str,
        texts: int,
        counts: NDArray[np.int64],
        *,
        window_texts: int,
    ) -> StoredWindow:
        """Store one replica's flush of a version's drift counts (recording its ``window_texts``), delete
        the rows no window of the largest size a replica declared can reach any more, and return the
        window of ``window_texts``: one transaction."""
        model, version = validate_model_name(model), validate_version(version)
        now = utc_now()
        with self.backend.write() as tx:
            dq = DriftQueries(tx)
            if texts > 0:
                self._require_model(Queries(tx), model)
                dq.add(model, version, replica, now, texts, counts, window_texts=window_texts)
                dq.prune(model, version, window_texts)
            return dq.window(model, version, window_texts, len(counts))

    def drift_window(self, model: str, version: int, *, window_texts: int, size: int) -> StoredWindow:
        """A version's drift window: its newest rows, every replica's, summing to ``window_texts`` texts."""
        model, version = validate_model_name(model), validate_version(version)
        with self.backend.read() as tx:
            return DriftQueries(tx).window(model, version, window_texts, size)

    # -- helpers --------------------------------------------------------------------------
    def _gates(
        self,
        model: str,
        target: VersionInfo,
        live: VersionInfo | None,
        evalset: EvalsetInfo | None,
        settings: ModelSettings,
        shadow: ShadowCounts | None = None,
    ) -> list[GateResult]:
        manifest = Manifest.model_validate_json(self.blobs.read_bytes(target.files[MANIFEST]))
        card_sha = target.files.get(CARD_FILE)
        card = None if card_sha is None else self.blobs.read_bytes(card_sha)
        gates = [
            parity_gate(manifest),
            labels_gate(target.labels, None if live is None else live.labels, _num(live)),
            cautions_gate(model, target.version, card),
        ]
        examples = refused = None
        if evalset is not None:
            examples = parse_stored(self.blobs.read_bytes(evalset.sha256))
            refused = _refused_evalset(model, evalset, examples)
        cand = Side(target.version, target.labels, lambda: self._materialize(target))
        live_side = None if live is None else Side(live.version, live.labels, lambda: self._materialize(live))
        digest = None if evalset is None else evalset.sha256
        gate_settings = GateSettings.of(settings)
        gates += metric_gates(model, cand, live_side, examples, digest, gate_settings, refused)
        if gate_settings.shadow_agreement_min is not None:
            gates.append(shadow_gate(shadow, target.version, _num(live), gate_settings))
        return gates

    def _resolve(self, model: str, version: int | None) -> VersionInfo:
        model = validate_model_name(model)
        with self.backend.read() as tx:
            q = Queries(tx)
            if version is not None:
                return self._require_version(q, model, validate_version(version))
            self._require_model(q, model)
            live = q.in_state(model, State.LIVE)
        if live is None:
            raise NotFoundError(
                f"{model!r} has no live version; promote one (textsieve promote {model} N --to live) "
                "or ask for a version number"
            )
        return live

    def _require_model(self, q: Queries, model: str) -> None:
        if not q.model_exists(model):
            known = [m.name for m in q.models()]
            hint = f"known models: {', '.join(known[:20])}" if known else "the registry has no models yet"
            raise NotFoundError(f"no model {model!r} in {self.location}; {hint}")

    def _require_version(self, q: Queries, model: str, version: int) -> VersionInfo:
        self._require_model(q, model)
        info = q.version(model, version)
        if info is None:
            n = q.next_version(model) - 1
            raise NotFoundError(f"{model!r} has no version {version}; its versions are 1–{n}")
        return info


def _check_run(run: Path | None, bundle: Bundle, model: str, version: int) -> None:
    """Refuse a training run folder that is not the one ``version``'s bundle was exported from."""
    from textsieve.registry.report.embedding_files import run_difference

    if run is None:
        return
    difference = run_difference(run, bundle)
    if difference is not None:
        raise InputError(
            f"{run}: not the training run of {model!r} version {version} ({difference}); give that version's run folder"
        )


def _num(v: VersionInfo | None) -> int | None:
    return None if v is None else v.version


def _id(e: EvalsetInfo | None) -> int | None:
    return None if e is None else e.id


_ALLOWED_FROM: dict[State, tuple[State, ...]] = {
    State.CANDIDATE: (State.REGISTERED, State.RETIRED),
    State.LIVE: (State.REGISTERED, State.CANDIDATE, State.RETIRED),
}


def _allowed(target: VersionInfo, to: State) -> None:
    if target.state in _ALLOWED_FROM[to]:
        return
    if target.state == to:
        raise StateError(f"version {target.version} of {target.model!r} is already {to}")
    raise StateError(
        f"version {target.version} of {target.model!r} is {target.state} and cannot become {to}; "
        f"allowed from: {', '.join(_ALLOWED_FROM[to])}"
        + ("; use rollback or promote another version" if target.state == State.LIVE else "")
    )


def _unreported(info: VersionInfo) -> str:
    return (
        f"{info.model!r} version {info.version} is now {info.state}; its evaluation report was not made "
        f"(textsieve evaluate {info.model} {info.version} makes it)"
    )


# Worded for the admin API's body fields; the promote verb names its flags instead (registry/cli.py).
OVERRIDE_HINT = "fix it, or override it with force and a reason (both recorded)"


def _refusal(model: str, version: int, gates: list[GateResult], failed: list[str], event_id: int) -> GateRefusedError:
    first = next(g for g in gates if not g.passed)
    more = f" (and {len(failed) - 1} more: {', '.join(failed[1:])})" if len(failed) > 1 else ""
    return GateRefusedError(
        f"version {version} of {model!r} not promoted to live: gate {first.name} refused: {first.detail}{more}; "
        + OVERRIDE_HINT,
        gates=[g.model_dump() for g in gates],
        failed=failed,
        event_id=event_id,
    )


def _read_manifest_bytes(bundle_dir: Path) -> bytes:
    if not bundle_dir.is_dir():
        raise BundleError(f"{bundle_dir}: not a folder; pass the folder 'textsieve export --out' wrote")
    try:
        return (bundle_dir / MANIFEST).read_bytes()
    except FileNotFoundError:
        raise BundleError(f"{bundle_dir}: no {MANIFEST}; a bundle is the folder 'textsieve export' writes") from None
    except OSError as exc:
        raise BundleError(f"{bundle_dir / MANIFEST}: cannot be read ({exc.strerror})") from exc


def _refused_evalset(model: str, info: EvalsetInfo, examples: list[LabelledText]) -> str | None:
    """Why a stored evaluation set must not be scored (texts the service refuses), or None."""
    refused = refused_rows(examples)
    if not refused:
        return None
    return (
        f"the evaluation set of {model!r} ({info.source!r}, sha256 {info.sha256[:12]}…, added {info.added_at[:10]}) "
        f"cannot be scored: {refused_summary(refused, len(examples))}; register a cleaned set with "
        f"'textsieve evalset add {model} FILE' (the stored rows, in order, are the JSONL blob {info.sha256} "
        "in the blob folder)"
    )


def _check_evalset_labels(
    path: Path, evalset: NormalisedEvalset, labels: list[str], *, version: int | None = None
) -> None:
    unknown = unknown_labels(evalset.labels, labels)
    if unknown:
        whose = "the bundle" if version is None else f"version {version}"
        raise InputError(
            f"{path}: labels not known to {whose}: {', '.join(repr(x) for x in unknown[:10])}; "
            f"allowed: {', '.join(labels)}"
        )


# -- opening ------------------------------------------------------------------------------
def public_location(location: str) -> str:
    """``location`` fit to show: a postgresql:// URL loses its password, a folder stays as it is."""
    if not location.startswith(PG_SCHEMES):
        return location
    from textsieve.registry._postgres import describe

    return describe(location)


def check_location(location: str) -> str:
    """``location`` if it can name a registry; a postgresql:// URL libpq cannot read is an InputError
    that does not show the URL (its password may be what is wrong)."""
    if location.startswith(PG_SCHEMES):
        from textsieve.registry._postgres import check_url

        check_url(location)
    return location


def open_registry(
    location: str | os.PathLike[str],
    *,
    blobs: str | os.PathLike[str] | None = None,
    cache: str | os.PathLike[str] | None = None,
    create: bool = True,
    settings: GateSettings | None = None,
) -> Registry:
    """Open a registry folder (SQLite + blobs inside it) or a ``postgresql://`` URL plus a blob folder.

    Layout of a folder registry: ``registry.sqlite3`` (metadata), ``blobs/<sha256>`` (content)
    and ``cache/<model>/<version>-<manifest sha256 prefix>/`` (verified copies that
    :meth:`Registry.fetch` hands out). For PostgreSQL the cache sits beside the blob folder
    (``<blobs>/../cache``) unless ``cache`` names another folder. With ``create=False`` a folder
    that holds no registry yet is a NotFoundError instead of becoming a new, empty registry.
    """
    # os.fspath would raise TypeError (None, an int) or hand bytes to the str checks below.
    for what, value, allowed in (
        ("registry location", location, "a folder path (str or pathlib.Path) or a postgresql:// URL"),
        ("blob folder", blobs, "a folder path (str or pathlib.Path), or None"),
        ("cache folder", cache, "a folder path (str or pathlib.Path), or None"),
    ):
        if not isinstance(value, str | os.PathLike) and (value is not None or what == "registry location"):
            raise InputError(f"the {what} must be {allowed}, not {type(value).__name__}")
    text = os.fspath(location)
    # Path("") is the current folder: `--registry "$UNSET"` made a registry there (and `" "` a folder
    # named by a space), where the same value in TEXTSIEVE_REGISTRY is refused.
    if not text.strip():
        raise InputError(
            f"the registry location is empty ({text!r}); give a registry folder or a postgresql:// URL "
            "to --registry, or leave it out for $TEXTSIEVE_REGISTRY, else ./textsieve-registry"
        )
    if blobs is not None and not os.fspath(blobs).strip():
        raise InputError(
            f"the blob folder is empty ({os.fspath(blobs)!r}); give a folder to --blobs, or leave it out "
            "(a folder registry keeps its blobs in REGISTRY/blobs)"
        )
    if text.startswith(PG_SCHEMES):
        if blobs is None:
            raise InputError(
                "a postgresql:// registry needs a blob folder: pass --blobs FOLDER (or set TEXTSIEVE_BLOBS)"
            )
        from textsieve.registry._postgres import PostgresBackend

        blob_root = Path(blobs)
        backend: Backend = PostgresBackend(text)
        cache_dir = Path(cache) if cache is not None else blob_root.parent / CACHE_DIR
        location_text = backend.description
    elif "://" in text:
        raise InputError(
            f"unsupported registry URL {text.split('://')[0]}://…; use a folder path or a postgresql:// URL"
        )
    else:
        folder = Path(text)
        _check_folder(folder, create)
        from textsieve.registry._sqlite import SqliteBackend

        backend = SqliteBackend(folder / DB_FILE)
        blob_root = Path(blobs) if blobs is not None else folder / BLOB_DIR
        cache_dir = Path(cache) if cache is not None else folder / CACHE_DIR
        location_text = str(folder)
    try:
        migrate(backend, utc_now())
    except BaseException:
        backend.close()
        raise
    return Registry(
        backend,
        BlobStore(blob_root),
        cache_dir,
        location=location_text,
        settings=settings,
        blobs_inside=not text.startswith(PG_SCHEMES) and blobs is None,
    )


def _check_folder(folder: Path, create: bool) -> None:
    if folder.exists() and not folder.is_dir():
        raise InputError(
            f"{folder}: is a file; --registry (or TEXTSIEVE_REGISTRY) names a registry folder or a postgresql:// URL"
        )
    if (folder / DB_FILE).is_file():
        return
    if not create:
        raise NotFoundError(
            f"no registry at {folder}; publish a bundle first (textsieve publish BUNDLE --model NAME) "
            "or point --registry / TEXTSIEVE_REGISTRY at one"
        )
    if folder.is_dir() and any(p.name not in (BLOB_DIR, CACHE_DIR) for p in folder.iterdir()):
        raise InputError(
            f"{folder}: is a folder that is not empty and holds no {DB_FILE}; "
            "choose a new or empty folder for a registry"
        )
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{folder}: cannot create the registry folder ({exc.strerror})") from exc


__all__ = [
    "BLOB_DIR",
    "CACHE_DIR",
    "DB_FILE",
    "Registry",
    "check_location",
    "open_registry",
    "public_location",
    "utc_now",
]
