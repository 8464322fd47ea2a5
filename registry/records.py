"""What the registry hands back: frozen pydantic models, separate from the storage rows."""

from __future__ import annotations

import json
from enum import StrEnum
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field


class State(StrEnum):
    """A version's lifecycle state. The values are the strings stored in the database and
    written in JSON, so a member equals its stored string and prints as it."""

    REGISTERED = "registered"
    CANDIDATE = "candidate"
    LIVE = "live"
    RETIRED = "retired"


STATES: tuple[State, ...] = tuple(State)  # in lifecycle order
EventKind = Literal[
    "publish", "evalset", "promote", "refuse", "rollback", "settings", "verdicts-delete", "report_failed"
]


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True)


class GarbageReport(_Record):
    """What a garbage collection of the blob folder found and removed."""

    referenced: int = Field(description="blobs a version or an evaluation set refers to (all kept)")
    missing: int = Field(description="referenced blobs that are not in the blob folder (a damaged registry)")
    blob_folder_missing: bool = Field(description="the blob folder itself is missing: every referenced blob is")
    removed: list[str] = Field(description="sha256 of the unreferenced blobs removed (or, dry run, to remove)")
    removed_bytes: int
    spared_recent: int = Field(description="unreferenced blobs younger than the grace period, kept for now")
    temporary_removed: int = Field(description="temporary files left by killed writers")
    dry_run: bool


class VersionInfo(_Record):
    model: str
    version: int
    state: State
    labels: list[str]
    created_at: str
    published_by: str
    reason: str
    manifest_sha256: str
    accuracy: float
    macro_f1: float
    parity_passed: bool
    promoted_at: str | None
    previous_live: int | None = Field(description="the version that was live when this one last became live")
    files: dict[str, str] = Field(description="file name → sha256, manifest.json included")

    @classmethod
    def from_row(cls, row: dict[str, Any], files: dict[str, str]) -> VersionInfo:
        return cls(
            model=row["model"],
            version=row["version"],
            state=row["state"],
            labels=json.loads(row["labels"]),
            created_at=row["created_at"],
            published_by=row["published_by"],
            reason=row["reason"],
            manifest_sha256=row["manifest_sha256"],
            accuracy=row["accuracy"],
            macro_f1=row["macro_f1"],
            parity_passed=bool(row["parity_passed"]),
            promoted_at=row["promoted_at"],
            previous_live=row["previous_live"],
            files=files,
        )


class ModelInfo(_Record):
    name: str
    live: int | None
    candidate: int | None
    versions: int
    created_at: str
    updated_at: str
    evalset_texts: int | None = Field(description="texts in the current evaluation set; None without one")


class EvalsetInfo(_Record):
    id: int
    model: str
    sha256: str
    texts: int
    labels: dict[str, int] = Field(description="label → number of texts")
    source: str
    added_at: str
    added_by: str

    @classmethod
    def from_row(cls, row: dict[str, Any]) -> EvalsetInfo:
        return cls(
            id=row["id"],
            model=row["model"],
            sha256=row["sha256"],
            texts=row["texts"],
            labels=json.loads(row["labels"]),
            source=row["source"],
            added_at=row["added_at"],
            added_by=row["added_by"],
        )


def report_path(model: str, version: int) -> str:
    """Where the service serves a version's evaluation report."""
    return f"/v1/models/{model}/versions/{version}/report"


class ReportInfo(_Record):
    """A stored evaluation report: one per (version, evaluation set, version compared against)."""

    model: str
    version: int
    evalset_sha256: str
    against: int | None = Field(description="the version it was compared with, or None")
    json_sha256: str = Field(description="blob holding report.json")
    html_sha256: str = Field(description="blob holding report.html")
    created_at: str
    created_by: str

    @property
    def path(self) -> str:
        return report_path(self.model, self.version)

    @classmethod
    def from_row(cls, row: dict[str, Any]) -> ReportInfo:
        return cls(
            model=row["model"],
            version=int(row["version"]),
            evalset_sha256=row["evalset_sha256"],
            against=int(row["against"]) or None,
            json_sha256=row["json_sha256"],
            html_sha256=row["html_sha256"],
            created_at=row["created_at"],
            created_by=row["created_by"],
        )


class GateResult(_Record):
    name: str
    passed: bool
    detail: str
    figures: dict[str, Any] = Field(default_factory=dict)


class Promotion(_Record):
    version: VersionInfo
    gates: list[GateResult]
    forced: bool
    retired: int | None = Field(description="the version that was live before, now retired")
    event_id: int
    report: ReportInfo | None = Field(default=None, description="the evaluation report this attempt produced")


class VerdictInfo(_Record):
    """One reviewer's verdict on one prediction: what the version said and the label they gave."""

    id: int
    model: str
    version: int
    text: str
    predicted_label: str
    predicted_probability: float = Field(description="the calibrated probability the reviewer was shown")
    verdict_label: str
    reviewer: str
    at: str

    @property
    def agrees(self) -> bool:
        return self.verdict_label == self.predicted_label

    @classmethod
    def from_row(cls, row: dict[str, Any]) -> VerdictInfo:
        return cls.model_validate(row)


class Agreement(_Record):
    """How often reviewers confirmed one version's labels: a running estimate of its live accuracy."""

    model: str
    version: int
    verdicts: int
    agreed: int
    low: float = Field(description="Wilson 95 % interval, lower end (0 with no verdicts)")
    high: float = Field(description="Wilson 95 % interval, upper end (1 with no verdicts)")
    first_at: str | None
    last_at: str | None

    @property
    def rate(self) -> float | None:
        return None if self.verdicts == 0 else self.agreed / self.verdicts


class Event(_Record):
    id: int
    model: str
    version: int | None
    kind: EventKind
    actor: str
    at: str
    reason: str
    details: dict[str, Any]

    @classmethod
    def from_row(cls, row: dict[str, Any]) -> Event:
        return cls(
            id=row["id"],
            model=row["model"],
            version=row["version"],
            kind=row["kind"],
            actor=row["actor"],
            at=row["at"],
            reason=row["reason"],
            details=json.loads(row["details"]),
        )

    def concerns(self, version: int) -> bool:
        """Whether this event is about ``version`` or changed its state while recording another one: a
        promotion to live that retired it, a promotion to candidate that replaced it, a rollback away
        from it (each recorded against the version it made live or candidate)."""
        if self.version == version:
            return True
        d = self.details
        if self.kind == "promote":
            return d.get("retired") == version or d.get("replaced_candidate") == version
        return self.kind == "rollback" and d.get("from") == version


__all__ = [
    "STATES",
    "Agreement",
    "EvalsetInfo",
    "Event",
    "EventKind",
    "GarbageReport",
    "GateResult",
    "ModelInfo",
    "Promotion",
    "State",
    "VerdictInfo",
    "VersionInfo",
]
