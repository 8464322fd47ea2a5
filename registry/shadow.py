"""Shadow counts: how a candidate version labels the live traffic its model's live version answers.

A serving replica scores a sample of live texts with the candidate too, off the request path,
and keeps a :class:`Tally` per (model, live version, candidate version). Every flush adds a
tally to the registry in one transaction (additive UPSERTs, so replicas add up and a replica
that dies loses at most what it had not flushed yet) and starts a new one.
:class:`ShadowCounts` is what the registry hands back: the sums over every replica and flush.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field

from pydantic import BaseModel, ConfigDict, Field

from textsieve.registry.stats import wilson_interval


@dataclass
class KeptText:
    """A text the two versions labelled differently, kept only when the operator asked for it."""

    text: str
    live_label: str
    live_probability: float
    candidate_label: str
    candidate_probability: float


@dataclass
class Tally:
    """One replica's counts for one (live, candidate) pair since its last flush."""

    texts: int = 0
    agreed: int = 0
    dropped: int = 0
    delta_sum: float = 0.0  # Σ (candidate's − live's probability of the live label)
    transitions: Counter[tuple[str, str]] = field(default_factory=Counter)
    kept: list[KeptText] = field(default_factory=list)

    def add(
        self,
        live_labels: Sequence[str],
        candidate_labels: Sequence[str],
        delta_sum: float,
        kept: Sequence[KeptText] = (),
        keep_at_most: int = 0,
    ) -> None:
        self.texts += len(live_labels)
        self.agreed += sum(a == b for a, b in zip(live_labels, candidate_labels, strict=True))
        self.delta_sum += delta_sum
        self.transitions.update(zip(live_labels, candidate_labels, strict=True))
        if keep_at_most > 0 and kept:
            self.kept.extend(kept)
            del self.kept[:-keep_at_most]  # only the most recent are ever kept

    def merge(self, other: Tally, keep_at_most: int = 0) -> None:
        """Add ``other`` (a flush that failed) back in."""
        self.texts += other.texts
        self.agreed += other.agreed
        self.dropped += other.dropped
        self.delta_sum += other.delta_sum
        self.transitions.update(other.transitions)
        if keep_at_most > 0:
            self.kept[:0] = other.kept
            del self.kept[:-keep_at_most]

    @property
    def empty(self) -> bool:
        return self.texts == 0 and self.dropped == 0


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True)


class Transition(_Record):
    live_label: str
    candidate_label: str
    texts: int


class StoredText(_Record):
    id: int
    text: str
    live_label: str
    live_probability: float
    candidate_label: str
    candidate_probability: float
    at: str


class ShadowCounts(_Record):
    """Every replica's shadow counts for one (live, candidate) pair, summed."""

    model: str
    live_version: int
    candidate_version: int
    texts: int = Field(description="texts both versions labelled")
    agreed: int = Field(description="texts both versions gave the same label")
    dropped: int = Field(
        description="sampled texts not scored: the shadow queue was full, their batch failed, or the service stopped"
    )
    delta_sum: float = Field(
        description="sum over texts of the candidate's minus the live version's probability of the live label"
    )
    flushes: int
    first_at: str
    updated_at: str
    transitions: list[Transition] = Field(default_factory=list)

    @property
    def agreement(self) -> float | None:
        return self.agreed / self.texts if self.texts else None

    def agreement_interval(self) -> tuple[float, float]:
        """Wilson 95 % interval of the agreement (Wilson, 1927)."""
        return wilson_interval(self.agreed, self.texts)

    @property
    def mean_delta(self) -> float | None:
        return self.delta_sum / self.texts if self.texts else None


__all__ = ["KeptText", "ShadowCounts", "StoredText", "Tally", "Transition"]
