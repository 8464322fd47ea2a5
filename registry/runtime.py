"""Scoring a bundle with onnxruntime: encoding, length-sorted batches, calibrated probabilities
and the n-gram spans behind each prediction.

Used by the exporter's parity check, the registry's promotion gates and the service, so all
three see the same numbers.

Span weights. Max-over-time pooling makes each filter report one n-gram window (Jacovi,
Sar Shalom and Goldberg, 2018, "Understanding Convolutional Neural Networks for Text
Classification", treat filters as n-gram detectors). A class logit is exactly
``bias_c + Σ_f pooled_f · W[c, f]``, so ``pooled_f · W[c, f]`` is filter f's additive share of
the logit and is the weight its window gets. Windows are summed per token interval, those
with at least ``SPAN_FLOOR`` of the strongest window's weight are kept, overlapping ones are
merged (weights added), and the top k by weight are returned.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from textsieve.registry.bundle import Bundle, open_bundle
from textsieve.registry.encoder import Encoder, Layout, span_bounds
from textsieve.registry.encoder import offsets as layout_offsets
from textsieve.registry.measures import softmax
from textsieve.registry.tokenizer import Tokenizer, Vocabulary

# Half the strongest window: lower floors let weak windows chain a short text into one span
# covering all of it (measured on the demo model), which explains nothing.
SPAN_FLOOR = 0.5
DEFAULT_BATCH = 64
# Texts :meth:`Predictor.logits` runs at once (a few tens of MB of graph outputs).
LOGITS_CHUNK = 4096


@dataclass(slots=True)
class Encoded:
    """One text, ready for the graph. Its tokens' character offsets (``starts``, ``ends``) are
    found when first read: from the tokens' layout kept by ``Predictor.encode(text)`` (and a
    span's two offsets alone by :meth:`bounds`), or by encoding again if the text was encoded
    without them (``offsets=False``): only spans read them."""

    text: str
    ids: list[int]
    _starts: list[int] | None  # each kept token's character offsets into ``text``; None: not yet
    _ends: list[int] | None
    tokens: int  # before truncation
    unknown: int  # unknown tokens among those kept
    _encoder: Encoder | None = None  # finds the offsets when they are read
    _layout: Layout | None = None  # or these, the tokens' gaps and lengths (Encoder.layout)

    @property
    def truncated(self) -> bool:
        return self.tokens > len(self.ids)

    @property
    def starts(self) -> list[int]:
        return self._offsets()[0]

    @property
    def ends(self) -> list[int]:
        return self._offsets()[1]

    @property
    def layout(self) -> Layout | None:
        """The tokens' gaps and lengths its offsets are still to be found from
        (:meth:`Encoder.layout`), or None when they were found (or will be by encoding again)."""
        return self._layout if self._starts is None else None

    def bounds(self, first: int, end: int) -> tuple[int, int]:
        """``(starts[first], ends[end - 1])``: the characters of tokens ``first`` … ``end − 1``,
        without finding every token's offsets when they were left in the layout."""
        if self._layout is not None and self._starts is None:
            return span_bounds(self._layout, first, end)
        starts, ends = self._offsets()
        return starts[first], ends[end - 1]

    def _offsets(self) -> tuple[list[int], list[int]]:
        if self._starts is None or self._ends is None:
            if self._layout is not None:
                starts, ends = layout_offsets(self._layout)
                kept = len(self.ids)
                self._starts, self._ends = starts[:kept], ends[:kept]
                return self._starts, self._ends
            if self._encoder is None:
                raise ValueError("this Encoded was made without offsets and cannot find them")
            _, starts, ends = self._encoder(self.text)
            kept = len(self.ids)
            self._starts, self._ends = starts[:kept], ends[:kept]
        return self._starts, self._ends


@dataclass(slots=True)
class Span:
    start: int
    end: int
    text: str
    label: str
    weight: float
    width: int
    token_start: int
    token_end: int
    filters: list[int] = field(default_factory=list)

    def public(self) -> dict[str, object]:
        return {
            "start": self.start,
            "end": self.end,
            "text": self.text,
            "label": self.label,
            "weight": self.weight,
            "width": self.width,
        }


@dataclass(slots=True)
class Outputs:
    """Graph outputs for a list of texts, rows in the caller's order."""

    logits: NDArray[np.float32]
    pooled: NDArray[np.float32]
    positions: NDArray[np.int64]
    contributions: NDArray[np.float32]


@dataclass(slots=True)
class Prediction:
    label: str
    probabilities: dict[str, float]
    spans: list[Span]
    tokens: int
    truncated: bool
    unknown: int

    def public(self) -> dict[str, object]:
        return {
            "label": self.label,
            "probabilities": self.probabilities,
            "spans": [s.public() for s in self.spans],
            "tokens": self.tokens,
            "truncated": self.truncated,
            "unknown": self.unknown,
        }


def make_session(model_path: Path, threads: int = 1):  # type: ignore[no-untyped-def]
    import onnxruntime as ort

    so = ort.SessionOptions()
    so.intra_op_num_threads = threads
    so.inter_op_num_threads = 1
    so.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    return ort.InferenceSession(str(model_path), so, providers=["CPUExecutionProvider"])


class Predictor:
    """One model loaded into one onnxruntime session, with its exact preprocessing."""

    def __init__(
        self,
        model_path: Path,
        *,
        labels: list[str],
        temperature: float,
        tokenizer: Tokenizer,
        vocab: Vocabulary,
        max_length: int,
        min_length: int,
        filter_widths: list[int],
        threads: int = 1,
        batch_size: int = DEFAULT_BATCH,
    ) -> None:
        self.labels = list(labels)
        self.temperature = temperature
        self.tokenizer = tokenizer
        self.vocab = vocab
        self.encoder = Encoder(tokenizer, vocab)
        self.max_length = max_length
        self.min_length = min_length
        self.filter_widths = np.asarray(filter_widths, dtype=np.int64)
        self.batch_size = batch_size
        self.session = make_session(model_path, threads)

    @classmethod
    def from_bundle(cls, bundle: Bundle | Path, *, threads: int = 1, batch_size: int = DEFAULT_BATCH) -> Predictor:
        b = bundle if isinstance(bundle, Bundle) else open_bundle(Path(bundle))
        m = b.manifest
        return cls(
            b.path / m.onnx.file,
            labels=m.labels,
            temperature=m.calibration.temperature,
            tokenizer=Tokenizer(m.tokenizer),
            vocab=Vocabulary.load(b.path / m.vocabulary.file),
            max_length=m.lengths.max_length,
            min_length=m.lengths.min_length,
            filter_widths=m.architecture.filter_widths(),
            threads=threads,
            batch_size=batch_size,
        )

    # -- encoding -------------------------------------------------------------------------
    def encode(self, text: str, *, offsets: bool = True) -> Encoded:
        """The text's ids, cut to ``max_length``; ``offsets=False`` leaves the tokens' character
        offsets to be found if and when they are read (a text that gets no spans never needs them)."""
        starts: list[int] | None
        ends: list[int] | None
        layout: Layout | None = None
        if offsets:  # found now, or from the layout when read
            ids, layout, starts, ends = self.encoder.layout(text)
        else:
            ids, starts, ends = self.encoder.ids(text), None, None
        n = len(ids)
        if n > self.max_length:
            cut = self.max_length
            ids = ids[:cut]
            if starts is not None and ends is not None:
                starts, ends = starts[:cut], ends[:cut]
        return Encoded(
            text, ids, starts, ends, n, ids.count(self.vocab.unk_id), None if offsets else self.encoder, layout
        )

    # -- the graph ------------------------------------------------------------------------
    def run_arrays(self, token_ids: NDArray[np.int64], lengths: NDArray[np.int64]) -> list[NDArray]:  # type: ignore[type-arg]
        out: list[NDArray] = self.session.run(None, {"token_ids": token_ids, "lengths": lengths})  # type: ignore[type-arg]
        return out

    def logits(self, encoded: Sequence[Encoded]) -> NDArray[np.float32]:
        """Every text's logits, the graph run on at most :data:`LOGITS_CHUNK` texts at a time.
        :meth:`run` keeps every filter's pooled value, window and per-class contributions for every
        text it is given (8.4 KB a text for 300 filters and 4 labels): over a whole evaluation set
        that is gigabytes, where a score needs the logits alone. A text's logits do not depend on
        what it is run with (padded windows are masked), so they equal one call's."""
        logits = np.empty((len(encoded), len(self.labels)), np.float32)
        for lo in range(0, len(encoded), LOGITS_CHUNK):
            part = list(encoded[lo : lo + LOGITS_CHUNK])
            logits[lo : lo + len(part)] = self.run(part).logits
        return logits

    def run(self, encoded: list[Encoded], *, sort: bool = True) -> Outputs:
        """Run every text, in length-sorted batches each padded only to its own longest."""
        n = len(encoded)
        lengths = np.fromiter((len(e.ids) for e in encoded), dtype=np.int64, count=n)
        order = np.argsort(lengths, kind="stable") if sort else np.arange(n)
        parts: list[tuple[NDArray, list[NDArray]]] = []  # type: ignore[type-arg]
        for lo in range(0, n, self.batch_size):
            idx = order[lo : lo + self.batch_size]
            parts.append((idx, self.run_arrays(*self.pad([encoded[i] for i in idx]))))
        classes = len(self.labels)
        filters = len(self.filter_widths)
        logits = np.empty((n, classes), np.float32)
        pooled = np.empty((n, filters), np.float32)
        positions = np.empty((n, filters), np.int64)
        contributions = np.empty((n, filters, classes), np.float32)
        for idx, (lg, pl, ps, ct) in parts:
            logits[idx], pooled[idx], positions[idx], contributions[idx] = lg, pl, ps, ct
        return Outputs(logits, pooled, positions, contributions)

    def pad(self, batch: list[Encoded], width: int | None = None) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        lengths = np.fromiter((len(e.ids) for e in batch), dtype=np.int64, count=len(batch))
        seq = max(int(lengths.max(initial=0)), self.min_length) if width is None else max(width, self.min_length)
        ids = np.zeros((len(batch), seq), dtype=np.int64)
        total = int(lengths.sum())
        if total:
            # One pass over all ids, placed row by row through the mask (row-major order).
            flat = np.fromiter(itertools.chain.from_iterable(e.ids for e in batch), dtype=np.int64, count=total)
            ids[np.arange(seq) < lengths[:, None]] = flat
        return ids, lengths

    # -- results --------------------------------------------------------------------------
    def probabilities(self, logits: NDArray[np.floating]) -> NDArray[np.float64]:
        """softmax(logits / T): temperature scaling (Guo et al., 2017)."""
        return softmax(logits, self.temperature)

    def spans(self, enc: Encoded, out: Outputs, row: int, label: int, k: int) -> list[Span]:
        n = len(enc.ids)
        if k <= 0 or n == 0:
            return []
        contrib = out.contributions[row, :, label]
        fired = np.flatnonzero(contrib > 0)
        if fired.size == 0:
            return []
        starts = out.positions[row, fired]
        ends = np.minimum(starts + self.filter_widths[fired], n)
        windows: dict[tuple[int, int], tuple[float, list[int]]] = {}
        for f, s, e, w in zip(fired.tolist(), starts.tolist(), ends.tolist(), contrib[fired].tolist(), strict=True):
            total, members = windows.get((s, e), (0.0, []))
            members.append(f)
            windows[(s, e)] = (total + w, members)
        floor = SPAN_FLOOR * max(v[0] for v in windows.values())
        kept = sorted((key, v) for key, v in windows.items() if v[0] >= floor)
        merged: list[list] = []  # type: ignore[type-arg]
        for (s, e), (w, members) in kept:
            if merged and s < merged[-1][1]:
                last = merged[-1]
                last[1] = max(last[1], e)
                last[2] += w
                last[3].extend(members)
            else:
                merged.append([s, e, w, list(members)])
        merged.sort(key=lambda m: -m[2])
        name = self.labels[label]
        result = []
        for s, e, w, members in merged[:k]:
            cs, ce = enc.starts[s], enc.ends[e - 1]
            result.append(Span(cs, ce, enc.text[cs:ce], name, float(w), e - s, s, e, sorted(members)))
        return result

    def predict(self, texts: list[str], *, spans: int = 3) -> list[Prediction]:
        encoded = [self.encode(t, offsets=spans > 0) for t in texts]
        out = self.run(encoded)
        return self.results(encoded, out, spans=spans)

    def results(self, encoded: list[Encoded], out: Outputs, *, spans: int = 3) -> list[Prediction]:
        """One :class:`Prediction` a text. Its spans are :meth:`spans`' for the top label, found for
        the whole batch at once (registry/spans.py; the tests hold the two equal)."""
        from textsieve.registry.spans import batch_span_objects

        probs = self.probabilities(out.logits)
        best = probs.argmax(axis=1)
        labels = self.labels
        found: list[list[Span]] = (
            batch_span_objects(self, encoded, out, best, np.full(len(encoded), spans, dtype=np.int64))
            if spans > 0
            else [[] for _ in encoded]
        )
        return [
            Prediction(labels[c], dict(zip(labels, row, strict=True)), s, enc.tokens, enc.truncated, enc.unknown)
            for enc, c, row, s in zip(encoded, best.tolist(), probs.tolist(), found, strict=True)
        ]


__all__ = ["Encoded", "Outputs", "Prediction", "Predictor", "Span", "make_session", "SPAN_FLOOR"]
