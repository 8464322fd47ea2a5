"""Drift signals: what texts look like to a model, as histograms a baseline and a live window share.

Five signals, each a histogram over fixed bins so that the export's baseline (the validation
texts) and the rolling window of live texts (shared by replicas through the registry) are
comparable bin for bin:

- ``tokens``: tokens per text before truncation;
- ``unknown_share``: share of a text's kept tokens outside the vocabulary;
- ``truncated``: whether a text was cut to ``max_length`` (two bins: whole, cut);
- ``label``: the predicted label (one bin per label, in the manifest's order);
- ``top_probability``: the calibrated probability of the predicted label.

A batch's counts are one flat int64 vector (every signal's bins, then the batch's unknown and
kept token totals) made with a few vectorised NumPy calls, so workers can count every batch
for a few microseconds and the server only adds vectors. PSI and Jensen–Shannon distance come
from :mod:`textsieve.registry.stats`; the bands are the usual reading (common practice).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray
from pydantic import BaseModel, ConfigDict, Field

from textsieve.registry import stats

if TYPE_CHECKING:
    from textsieve.registry.runtime import Encoded

SIGNALS: tuple[str, ...] = ("tokens", "unknown_share", "truncated", "label", "top_probability")
# Edges as stats.histogram reads them: [e_i, e_i+1), the last bin closed and catching anything
# above it (a text of 2,000 tokens lands in the last tokens bin).
TOKEN_EDGES: tuple[float, ...] = (0, 1, 2, 3, 4, 6, 8, 12, 16, 24, 32, 48, 64, 96, 128, 192, 256, 512)
UNKNOWN_EDGES: tuple[float, ...] = (0.0, 1e-9, 0.05, 0.1, 0.2, 0.35, 0.5, 1.0)
TRUNCATED_EDGES: tuple[float, ...] = (0.0, 0.5, 1.0)
TOP_EDGES: tuple[float, ...] = (0.0, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.99, 1.0)
DEFAULT_EDGES: dict[str, tuple[float, ...]] = {
    "tokens": TOKEN_EDGES,
    "unknown_share": UNKNOWN_EDGES,
    "truncated": TRUNCATED_EDGES,
    "top_probability": TOP_EDGES,
}


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class SignalHistogram(_Strict):
    edges: list[float] | None = Field(description="bin edges; None for the label mix (one bin per label)")
    counts: list[int]


class DriftBaseline(_Strict):
    """The signals of the texts a bundle was checked on, recorded at export (an optional manifest part)."""

    source: str = Field(description="which texts: 'validation'")
    texts: int = Field(ge=1)
    unknown_rate: float = Field(ge=0, le=1, description="unknown tokens / kept tokens")
    truncation_rate: float = Field(ge=0, le=1, description="share of texts cut to max_length")
    histograms: dict[str, SignalHistogram]


@dataclass(frozen=True)
class Layout:
    """Where each signal's bins sit in a flat count vector, for one model's labels and edges."""

    edges: dict[str, tuple[float, ...]]
    labels: int
    arrays: dict[str, NDArray[np.float64]] = field(default_factory=dict, compare=False, repr=False)

    @classmethod
    def of(cls, labels: int, baseline: DriftBaseline | None = None) -> Layout:
        edges = dict(DEFAULT_EDGES)
        if baseline is not None:  # the bundle's own edges win, so its baseline stays comparable
            for name, h in baseline.histograms.items():
                if h.edges is not None and name in edges:
                    edges[name] = tuple(h.edges)
        return cls(edges, labels)

    inner: dict[str, NDArray[np.float64]] = field(default_factory=dict, compare=False, repr=False)
    offsets: dict[str, int] = field(default_factory=dict, compare=False, repr=False)

    def __post_init__(self) -> None:
        # As arrays once: count() runs for every batch.
        object.__setattr__(self, "arrays", {k: np.asarray(v, dtype=np.float64) for k, v in self.edges.items()})
        # The edges between the first and the last: searchsorted(inner, v, side="right") is the bin
        # of stats.histogram ([e_i, e_i+1), below the first edge in the first bin, at or above the
        # last in the last) without the clip.
        object.__setattr__(self, "inner", {k: v[1:-1].copy() for k, v in self.arrays.items()})
        object.__setattr__(self, "offsets", {k: s.start for k, s in self.slices().items()})

    def bins(self, name: str) -> int:
        return self.labels if name == "label" else len(self.edges[name]) - 1

    def slices(self) -> dict[str, slice]:
        out, at = {}, 0
        for name in SIGNALS:
            out[name] = slice(at, at + self.bins(name))
            at += self.bins(name)
        return out

    @property
    def size(self) -> int:
        return sum(self.bins(n) for n in SIGNALS) + 2  # + unknown tokens, kept tokens


def count(
    layout: Layout,
    tokens: NDArray[np.int64],
    kept: NDArray[np.int64],
    unknown: NDArray[np.int64],
    best: NDArray[np.int64],
    top: NDArray[np.floating],
) -> NDArray[np.int64]:
    """One batch's flat count vector (see the module docstring).

    Every text's bin of every signal, offset to where that signal's bins sit, counted by one
    ``np.bincount``: it runs for every batch the service answers, and a batch of one text paid
    ~70 µs for a dozen small NumPy calls."""
    share = unknown / np.maximum(kept, 1)
    inner, at = layout.inner, layout.offsets
    where = np.concatenate(
        (
            np.searchsorted(inner["tokens"], tokens, side="right") + at["tokens"],
            np.searchsorted(inner["unknown_share"], share, side="right") + at["unknown_share"],
            (tokens > kept) + at["truncated"],  # not truncated, then truncated
            best + at["label"],
            np.searchsorted(inner["top_probability"], top, side="right") + at["top_probability"],
        )
    )
    counts = np.bincount(where, minlength=layout.size - 2)
    return np.append(counts, (int(unknown.sum()), int(kept.sum()))).astype(np.int64, copy=False)


def count_encoded(layout: Layout, encoded: Sequence[Encoded], probs: NDArray[np.floating]) -> NDArray[np.int64]:
    """:func:`count` for encoded texts and their calibrated probabilities (rows in the same order)."""
    n = len(encoded)
    tokens = np.fromiter((e.tokens for e in encoded), dtype=np.int64, count=n)
    kept = np.fromiter((len(e.ids) for e in encoded), dtype=np.int64, count=n)
    unknown = np.fromiter((e.unknown for e in encoded), dtype=np.int64, count=n)
    return count(layout, tokens, kept, unknown, probs.argmax(axis=1), probs.max(axis=1))


def baseline(
    layout: Layout,
    counts: NDArray[np.int64],
    *,
    source: str = "validation",
) -> DriftBaseline:
    """A baseline from a count vector (the export's validation texts)."""
    sl = layout.slices()
    texts = int(counts[sl["truncated"]].sum())
    hists = {
        name: SignalHistogram(
            edges=None if name == "label" else list(layout.edges[name]), counts=[int(c) for c in counts[sl[name]]]
        )
        for name in SIGNALS
    }
    unknown, kept = int(counts[-2]), int(counts[-1])
    return DriftBaseline(
        source=source,
        texts=max(texts, 1),
        unknown_rate=unknown / kept if kept else 0.0,
        truncation_rate=int(counts[sl["truncated"]][1]) / texts if texts else 0.0,
        histograms=hists,
    )


@dataclass(frozen=True)
class SignalDrift:
    name: str
    psi: float | None
    js_distance: float | None
    band: str | None  # None without a baseline, or while the window is under ``min_texts``
    min_texts: int | None = None  # the window from which the band is more than noise (stats.psi_min_texts)


@dataclass(frozen=True)
class DriftReport:
    """One version's window against its baseline; figures are None where either side is empty."""

    texts: int
    unknown_rate: float | None
    truncation_rate: float | None
    baseline: DriftBaseline | None
    signals: list[SignalDrift]


def compare(layout: Layout, base: DriftBaseline | None, counts: NDArray[np.int64]) -> DriftReport:
    """PSI and Jensen–Shannon distance of each signal, window (``counts``) against ``base``."""
    sl = layout.slices()
    texts = int(counts[sl["truncated"]].sum())
    unknown, kept = int(counts[-2]), int(counts[-1])
    signals = []
    for name in SIGNALS:
        window = counts[sl[name]]
        expected = None if base is None else base.histograms.get(name)
        if expected is None or texts == 0 or sum(expected.counts) == 0 or len(expected.counts) != len(window):
            signals.append(SignalDrift(name, None, None, None))
            continue
        psi = stats.population_stability_index(expected.counts, window)
        js = stats.jensen_shannon_distance(expected.counts, window)
        # A band only once the window is large enough that the baseline's own texts, sampled as
        # often, would read "stable" 95 times in 100; before that the figures are shown, not judged.
        least = stats.psi_min_texts(len(window), int(sum(expected.counts)))
        band = stats.psi_band(psi) if least is not None and texts >= least else None
        signals.append(SignalDrift(name, psi, js, band, least))
    return DriftReport(
        texts=texts,
        unknown_rate=unknown / kept if kept else None,
        truncation_rate=int(counts[sl["truncated"]][1]) / texts if texts else None,
        baseline=base,
        signals=signals,
    )


class Window:
    """A served version's drift window as one replica sees it.

    The window is shared by replicas (README, "Live traffic"): every replica adds its batches'
    counts to ``pending`` (one vector addition on the server thread) and its flushing task moves
    them to the registry as one row (:func:`encode_counts`); the registry hands back the newest
    rows of every replica summing to at least ``size`` texts (``shared``). What a replica reports
    is ``shared`` plus what it has counted and not flushed yet, so every replica reports the same
    figures once all have flushed, and a reload or a restart finds the window where it was.
    """

    def __init__(self, layout: Layout, size: int) -> None:
        self.layout = layout
        self.size = size
        self._pending = np.zeros(layout.size, dtype=np.int64)
        self._pending_texts = 0
        self._flushing: tuple[int, NDArray[np.int64]] | None = None  # taken, not yet in ``shared``
        self._shared = np.zeros(layout.size, dtype=np.int64)
        self._shared_texts = 0
        self.flushes = 0  # flushes begun: a read begun before one must not overwrite what it settles
        self.declared: tuple[int, ...] = ()  # the window sizes the registry's rows were written under

    def add(self, texts: int, counts: NDArray[np.int64]) -> None:
        if texts <= 0 or len(counts) != self.layout.size:
            return
        self._pending += counts
        self._pending_texts += texts

    def take(self) -> tuple[int, NDArray[np.int64]]:
        """The counts not flushed yet, to be written; they still count until :meth:`settle` or :meth:`put_back`."""
        taken = (self._pending_texts, self._pending)
        self._flushing = taken
        self.flushes += 1
        self._pending = np.zeros(self.layout.size, dtype=np.int64)
        self._pending_texts = 0
        return taken

    def put_back(self) -> None:
        """The flush failed: what it took is pending again, for the next one."""
        if self._flushing is not None:
            texts, counts = self._flushing
            self._flushing = None
            self._pending += counts
            self._pending_texts += texts

    def settle(self, stored: StoredWindow) -> None:
        """The flush landed (or there was nothing to write): ``stored`` is the registry's window now."""
        self._flushing = None
        self.read(stored)

    @property
    def flushing(self) -> bool:
        return self._flushing is not None

    def read(self, stored: StoredWindow) -> None:
        """``stored`` is the registry's window now (read while no flush of this window was under way)."""
        self.declared = stored.declared
        if stored.texts == 0 or len(stored.counts) != self.layout.size:
            self._shared = np.zeros(self.layout.size, dtype=np.int64)
            self._shared_texts = 0
        else:
            self._shared, self._shared_texts = stored.counts, stored.texts

    def sizes(self) -> tuple[int, ...]:
        """Every window size the replicas sharing this window declare, this one's included, smallest first:
        more than one means they are set differently (each reports the newest texts of its own size)."""
        return tuple(sorted({self.size, *self.declared}))

    @property
    def pending_texts(self) -> int:
        return self._pending_texts

    @property
    def texts(self) -> int:
        flushing = 0 if self._flushing is None else self._flushing[0]
        return self._shared_texts + self._pending_texts + flushing

    def counts(self) -> NDArray[np.int64]:
        out = self._shared + self._pending
        if self._flushing is not None:
            out = out + self._flushing[1]
        return out


@dataclass(frozen=True)
class StoredWindow:
    """The registry's window of one version: the sum of its newest rows (every replica's flushes)."""

    texts: int
    counts: NDArray[np.int64]
    rows: int
    # The window sizes the version's stored rows were written under (every replica's
    # TEXTSIEVE_DRIFT_WINDOW_TEXTS that flushed within the largest window), smallest first.
    declared: tuple[int, ...] = ()


def encode_counts(counts: NDArray[np.int64]) -> str:
    """A count vector as stored: decimal integers separated by commas (text, so both engines store
    the same value; most bins are small, so it is about as short as 8-byte integers)."""
    return ",".join(map(str, counts.tolist()))


def decode_counts(text: str) -> NDArray[np.int64]:
    return np.array(text.split(","), dtype=np.int64)


def newest_rows(texts: Sequence[int], size: int) -> int:
    """How many of the newest rows (``texts`` newest first) make the window: the fewest whose texts
    reach ``size``, or all of them."""
    total = 0
    for i, n in enumerate(texts):
        total += n
        if total >= size:
            return i + 1
    return len(texts)


__all__ = [
    "DEFAULT_EDGES",
    "SIGNALS",
    "DriftBaseline",
    "DriftReport",
    "Layout",
    "SignalDrift",
    "SignalHistogram",
    "StoredWindow",
    "Window",
    "baseline",
    "compare",
    "count",
    "count_encoded",
    "decode_counts",
    "encode_counts",
    "newest_rows",
]
