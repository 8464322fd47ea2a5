"""Reviewers' verdicts: a person confirms or corrects the label a version gave one text.

Verdicts are the registry's record of what people think of live predictions. They are shared by
every replica (one table in SQLite or PostgreSQL), survive restarts, and serve three uses:

- agreement per version, with a Wilson 95 % interval: a running estimate of live accuracy that
  needs no evaluation set, only reviewers' time (Wilson, 1927; see :mod:`textsieve.registry.stats`);
- an export as labelled JSONL that ``train`` and ``evalset add`` read as is, so corrections flow
  back into data;
- deletion before a date or by id, for data-protection requests; each deletion is an audit event
  that names the ids and the cut-off, never the texts.

A verdict stores the text it judges because that is what makes it reusable as training data; the
texts are kept only because a reviewer chose to submit them, and :meth:`Verdicts.delete` removes them.

A verdict may be recorded under an idempotency key (the ``Idempotency-Key`` of
draft-ietf-httpapi-idempotency-key-header): the first request with a key stores the verdict, a
repeat of the same request with it gets that verdict back instead of a second one, and the same key
with another request is refused. The key is stored on the verdict's row with the sha256 of what the
request asked, so it lives exactly as long as the verdict: that is the keys' whole expiry policy.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from textsieve.errors import InputError, KeyReusedError, NotFoundError
from textsieve.files import atomic_write_text
from textsieve.labelled import JSON_SUFFIXES
from textsieve.registry._db import Tx
from textsieve.registry.names import (
    resolve_actor,
    validate_model_name,
    validate_reason,
    validate_reviewer,
    validate_version,
)
from textsieve.registry.queries import Queries
from textsieve.registry.records import Agreement, VerdictInfo
from textsieve.registry.stats import wilson_interval
from textsieve.texts import text_refusal

if TYPE_CHECKING:
    from textsieve.registry.api import Registry

_COLUMNS = "id, model, version, text, predicted_label, predicted_probability, verdict_label, reviewer, at"
# What a keyed request's fingerprint covers: every field it asks to store, as validated.
_ASKED = ("model", "version", "text", "predicted_label", "predicted_probability", "verdict_label", "reviewer")
MAX_DELETE_IDS = 10_000
MAX_KEY_CHARS = 255
KEY_RULE = f"1 to {MAX_KEY_CHARS} printable ASCII characters (space to ~)"


@dataclass(frozen=True)
class Deletion:
    """What a deletion removed: the ids gone and the audit event."""

    deleted: list[int]
    event_id: int


def utc_cutoff(text: str) -> str:
    """A date (``2026-11-30``, meaning its start in UTC) or an ISO 8601 time, as the stored time format."""
    raw = text.strip()
    try:
        if len(raw) == 10:
            moment = dt.datetime.combine(dt.date.fromisoformat(raw), dt.time(), dt.UTC)
        else:
            moment = dt.datetime.fromisoformat(raw.replace("Z", "+00:00"))
    except ValueError:
        raise InputError(
            f"bad date {text[:40]!r}: give a date such as 2026-11-30 (its start, UTC) or an ISO 8601 time "
            "such as 2026-11-30T12:00:00+00:00"
        ) from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=dt.UTC)
    try:
        utc = moment.astimezone(dt.UTC)
    except OverflowError:  # e.g. 9999-12-31T23:00:00-05:00 is in year 10000 in UTC
        raise InputError(
            f"date {text[:40]!r} is out of range: in UTC it must fall from 0001-01-01T00:00:00Z to 9999-12-31T23:59:59Z"
        ) from None
    # Stored times are isoformat(timespec="microseconds") in UTC, so the same spelling compares as text.
    return utc.isoformat(timespec="microseconds")


@dataclass(frozen=True)
class Recorded:
    """A verdict recorded under an idempotency key, and whether the key had already recorded it."""

    verdict: VerdictInfo
    replayed: bool


def check_key(key: object) -> str:
    """An idempotency key: 1–255 printable ASCII characters, the characters of an RFC 8941 string."""
    if not isinstance(key, str) or not 1 <= len(key) <= MAX_KEY_CHARS or not all(" " <= c <= "~" for c in key):
        shown = repr(key)[:60]
        raise InputError(f"bad idempotency key {shown}: {KEY_RULE}")
    return key


def fingerprint(fields: dict[str, object]) -> str:
    """sha256 of a request's validated fields as canonical JSON (sorted keys, no spaces, UTF-8)."""
    canonical = json.dumps(fields, sort_keys=True, ensure_ascii=False, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()


def check_text(text: object) -> str:
    if not isinstance(text, str) or not text.strip():
        raise InputError("the verdict's text is empty; send the text the prediction was made for")
    why = text_refusal(text)  # what a prediction's text is refused for: no verdict can be on one
    if why is not None:
        raise InputError(f"the verdict's text {why}")
    return text


def _check_probability(p: object) -> float:
    if isinstance(p, bool) or not isinstance(p, int | float) or not math.isfinite(p) or not 0.0 <= p <= 1.0:
        raise InputError(f"bad predicted probability {p!r}: a number from 0 to 1")
    return float(p)


def _check_label(what: str, label: object, labels: list[str], model: str, version: int) -> str:
    if not isinstance(label, str) or label not in labels:
        shown = repr(label)[:60]
        raise InputError(
            f"{what} {shown} is not a label of version {version} of {model!r}; allowed: {', '.join(labels)}"
        )
    return label


class Verdicts:
    """The verdicts of one registry (``registry.verdicts``)."""

    def __init__(self, registry: Registry) -> None:
        self._registry = registry

    def record(
        self,
        model: str,
        version: int,
        *,
        text: str,
        predicted_label: str,
        predicted_probability: float,
        verdict_label: str,
        reviewer: str,
    ) -> VerdictInfo:
        """Store one verdict; both labels must be labels of that version."""
        return self._store(
            model,
            version,
            None,
            text=text,
            predicted_label=predicted_label,
            predicted_probability=predicted_probability,
            verdict_label=verdict_label,
            reviewer=reviewer,
        ).verdict

    def record_once(
        self,
        model: str,
        version: int,
        *,
        key: str,
        text: str,
        predicted_label: str,
        predicted_probability: float,
        verdict_label: str,
        reviewer: str,
    ) -> Recorded:
        """Store one verdict under an idempotency key, scoped to the model.

        The same key with the same request returns the verdict it recorded (``replayed``) and
        stores nothing; with another request it is a :class:`KeyReusedError`.
        """
        return self._store(
            model,
            version,
            check_key(key),
            text=text,
            predicted_label=predicted_label,
            predicted_probability=predicted_probability,
            verdict_label=verdict_label,
            reviewer=reviewer,
        )

    def _store(
        self,
        model: str,
        version: int,
        key: str | None,
        *,
        text: str,
        predicted_label: str,
        predicted_probability: float,
        verdict_label: str,
        reviewer: str,
    ) -> Recorded:
        model, version = validate_model_name(model), validate_version(version)
        text = check_text(text)
        probability = _check_probability(predicted_probability)
        reviewer = validate_reviewer(reviewer)
        from textsieve.registry.api import utc_now

        reg = self._registry
        with reg.backend.write() as tx:
            info = reg._require_version(Queries(tx), model, version)
            _check_label("predicted label", predicted_label, info.labels, model, version)
            _check_label("verdict label", verdict_label, info.labels, model, version)
            values = (model, version, text, predicted_label, probability, verdict_label, reviewer)
            asked = None if key is None else fingerprint(dict(zip(_ASKED, values, strict=True)))
            # With a key, the unique index (model, idempotency_key) decides which of two concurrent
            # requests stores its verdict: the other inserts nothing and reads the winner's row.
            row = tx.one(
                "INSERT INTO verdicts (model, version, text, predicted_label, predicted_probability, verdict_label, "
                "reviewer, at, idempotency_key, request_sha256) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?) "
                "ON CONFLICT (model, idempotency_key) WHERE idempotency_key IS NOT NULL DO NOTHING "
                f"RETURNING {_COLUMNS}",
                (*values, utc_now(), key, asked),
            )
            if row is not None:
                return Recorded(VerdictInfo.from_row(row), replayed=False)
            first = tx.one(
                f"SELECT {_COLUMNS}, request_sha256 FROM verdicts WHERE model = ? AND idempotency_key = ?", (model, key)
            )
        assert first is not None and key is not None  # only a key can conflict, and its row is committed
        if first.pop("request_sha256") != asked:
            raise KeyReusedError(
                f"idempotency key {key[:60]!r} was already used for another verdict on {model!r} (#{first['id']}, "
                f"recorded {first['at']}); a retry must repeat that request exactly, and a new verdict needs a new key",
                verdict_id=first["id"],
            )
        return Recorded(VerdictInfo.from_row(first), replayed=True)

    def of(self, model: str, *, version: int | None = None) -> list[VerdictInfo]:
        """Every verdict on the model (or one version), oldest first."""
        model = validate_model_name(model)
        reg = self._registry
        with reg.backend.read() as tx:
            if version is None:
                reg._require_model(Queries(tx), model)
                rows = tx.all(f"SELECT {_COLUMNS} FROM verdicts WHERE model = ? ORDER BY id", (model,))
            else:
                version = validate_version(version)
                reg._require_version(Queries(tx), model, version)
                rows = tx.all(
                    f"SELECT {_COLUMNS} FROM verdicts WHERE model = ? AND version = ? ORDER BY id", (model, version)
                )
        return [VerdictInfo.from_row(r) for r in rows]

    def agreement(self, model: str) -> list[Agreement]:
        """Per version with verdicts: how many, how many confirmed the label, and the Wilson 95 % interval."""
        model = validate_model_name(model)
        reg = self._registry
        with reg.backend.read() as tx:
            reg._require_model(Queries(tx), model)
            rows = tx.all(
                "SELECT version, COUNT(*) AS n, "
                "SUM(CASE WHEN verdict_label = predicted_label THEN 1 ELSE 0 END) AS agreed, "
                "MIN(at) AS first_at, MAX(at) AS last_at FROM verdicts WHERE model = ? "
                "GROUP BY version ORDER BY version",
                (model,),
            )
        out = []
        for r in rows:
            n, agreed = int(r["n"]), int(r["agreed"])
            low, high = wilson_interval(agreed, n)
            out.append(
                Agreement(
                    model=model,
                    version=int(r["version"]),
                    verdicts=n,
                    agreed=agreed,
                    low=low,
                    high=high,
                    first_at=r["first_at"],
                    last_at=r["last_at"],
                )
            )
        return out

    def delete(
        self,
        model: str,
        *,
        before: str | None = None,
        ids: Sequence[int] = (),
        actor: str | None = None,
        reason: str,
    ) -> Deletion:
        """Delete the model's verdicts recorded before a time and/or those with the given ids; audited.

        Every id must name one of the model's verdicts: otherwise a :class:`NotFoundError` names the
        missing ids and nothing is deleted or recorded (one transaction).
        """
        model = validate_model_name(model)
        reason = validate_reason(reason, required=True)
        actor = resolve_actor(actor)
        cutoff = None if before is None else utc_cutoff(before)
        wanted = sorted({_verdict_id(i) for i in ids})
        if cutoff is None and not wanted:
            raise InputError("say which verdicts to delete: a date (--delete-before) or ids (--delete ID)")
        if len(wanted) > MAX_DELETE_IDS:
            raise InputError(f"{len(wanted)} ids in one deletion; at most {MAX_DELETE_IDS}: split it")
        from textsieve.registry.api import utc_now

        reg = self._registry
        with reg.backend.write() as tx:
            q = Queries(tx)
            reg._require_model(q, model)
            tx.lock_model(model)
            found = _ids_of(tx, model, wanted)
            missing = sorted(set(wanted) - set(found))
            if missing:
                # All or nothing: a mistyped id deletes nothing and leaves no audit event.
                shown = ", ".join(map(str, missing[:10])) + (
                    f" and {len(missing) - 10} more" if len(missing) > 10 else ""
                )
                raise NotFoundError(
                    f"no verdict {shown} on {model!r}; nothing deleted. "
                    f"'textsieve verdicts {model}' lists the verdicts and their ids",
                    missing=missing,
                )
            doomed = set(found)
            if cutoff is not None:
                doomed |= {
                    int(r["id"]) for r in tx.all("SELECT id FROM verdicts WHERE model = ? AND at < ?", (model, cutoff))
                }
            deleted = sorted(doomed)
            for start in range(0, len(deleted), 500):
                chunk = deleted[start : start + 500]
                tx.run(
                    f"DELETE FROM verdicts WHERE model = ? AND id IN ({', '.join('?' * len(chunk))})", (model, *chunk)
                )
            event_id = q.add_event(
                model=model,
                version=None,
                kind="verdicts-delete",
                actor=actor,
                at=utc_now(),
                reason=reason,
                details={"deleted": len(deleted), "ids": deleted, "before": cutoff},
            )
        return Deletion(deleted=deleted, event_id=event_id)


def _verdict_id(value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value < 2**63:
        raise InputError(f"bad verdict id {value!r}: ids are whole numbers from 1, as 'textsieve verdicts' lists them")
    return value


def _ids_of(tx: Tx, model: str, wanted: list[int]) -> list[int]:
    found: list[int] = []
    for start in range(0, len(wanted), 500):
        chunk = wanted[start : start + 500]
        rows = tx.all(
            f"SELECT id FROM verdicts WHERE model = ? AND id IN ({', '.join('?' * len(chunk))})", (model, *chunk)
        )
        found += [int(r["id"]) for r in rows]
    return sorted(found)


def export_jsonl(verdicts: Sequence[VerdictInfo], path: Path) -> int:
    """Write verdicts as labelled JSONL (``text`` and ``label``: the reviewer's label), atomically.

    Besides text and label, each row says where the label came from. The reviewer's name stays in
    the registry: a training file travels further than the people named in it need to.
    """
    path = Path(path)
    if path.suffix.lower() not in JSON_SUFFIXES or path.suffix.lower() == ".json":
        raise InputError(f"{path}: export writes JSONL; name the file .jsonl or .ndjson")
    if path.parent.exists() and not path.parent.is_dir():
        raise InputError(f"{path.parent}: not a folder; export to a file in a folder")
    if not path.parent.is_dir():
        raise InputError(f"{path.parent}: no such folder; create it or export elsewhere")
    lines = []
    for v in verdicts:
        row = {
            "text": v.text,
            "label": v.verdict_label,
            "verdict_id": v.id,
            "model": v.model,
            "version": v.version,
            "predicted_label": v.predicted_label,
            "predicted_probability": v.predicted_probability,
            "at": v.at,
        }
        lines.append(json.dumps(row, ensure_ascii=False) + "\n")
    try:
        atomic_write_text(path, "".join(lines))
    except OSError as exc:
        raise InputError(f"{path}: cannot be written ({exc.strerror or exc})") from exc
    return len(lines)


__all__ = [
    "KEY_RULE",
    "MAX_DELETE_IDS",
    "MAX_KEY_CHARS",
    "Deletion",
    "Recorded",
    "Verdicts",
    "check_key",
    "check_text",
    "export_jsonl",
    "fingerprint",
    "utc_cutoff",
]
