"""Running one collected batch as length-sorted sub-batches with bounded padding.

onnxruntime's cost grows with the padded area (texts × longest text), plus a fixed cost per
call, so a batch of mixed lengths is sorted and cut wherever padding would exceed both
``SLACK`` of the real tokens and ``CALL_TOKENS`` padded positions (about what one call's fixed
cost buys with the tap-tables layout: ~100 µs per call against ~1 µs per padded position on
the 2-core benchmark machine); a sub-batch keeps at least ``MIN_TEXTS`` texts, and a batch of
at most that many runs as one call: below ~24 rows a call's cost per text rises faster than
the padding it saves (bench/packing_ab.py; bench/README.md, "Packing small batches"). Padded
windows are masked in the graph, so the cut points do not change any text's result.
"""

from __future__ import annotations

import itertools

import numpy as np
from numpy.typing import NDArray

from textsieve.registry.runtime import Encoded, Outputs, Predictor

SLACK = 0.25
MIN_TEXTS = 24
CALL_TOKENS = 128


def sub_batches(
    lengths: NDArray[np.int64],
    *,
    slack: float = SLACK,
    min_texts: int = MIN_TEXTS,
    max_texts: int | None = None,
    call_tokens: int = CALL_TOKENS,
) -> list[NDArray[np.int64]]:
    """Row indices per sub-batch, shortest texts first: consecutive runs of the length order."""
    order = np.argsort(lengths, kind="stable")
    most = len(order) if max_texts is None else max_texts
    cuts: list[int] = []
    count = tokens = 0
    for at, n in enumerate(np.maximum(lengths[order], 1).tolist()):
        if count and (
            count >= most
            or (count >= min_texts and (count + 1) * n - (tokens + n) > max(slack * (tokens + n), call_tokens))
        ):
            cuts.append(at)
            count = tokens = 0
        count += 1
        tokens += n
    return np.split(order, cuts) if len(order) else []


def run_packed(p: Predictor, encoded: list[Encoded]) -> Outputs:
    """Like ``Predictor.run``, with sub-batches cut by padding waste instead of a fixed size.

    Each sub-batch is padded as ``Predictor.pad`` pads it; the ids of the whole batch are
    gathered once, in length order, so a sub-batch's are one slice of them. A batch that makes
    one sub-batch (a few texts, or texts of similar lengths) is run as it came, in one call."""
    n = len(encoded)
    if 0 < n <= min(MIN_TEXTS, p.batch_size):  # never cut: sub_batches would give one group
        return Outputs(*p.run_arrays(*p.pad(encoded)))
    lengths = np.fromiter((len(e.ids) for e in encoded), dtype=np.int64, count=n)
    groups = sub_batches(lengths, min_texts=MIN_TEXTS, max_texts=p.batch_size)
    if len(groups) == 1:
        # One call: the texts as they came, padded to the longest (the same width as sorted),
        # with no gather or scatter; each row's outputs do not depend on the other rows'.
        return Outputs(*p.run_arrays(*p.pad(encoded)))
    classes, filters = len(p.labels), len(p.filter_widths)
    logits = np.empty((n, classes), np.float32)
    pooled = np.empty((n, filters), np.float32)
    positions = np.empty((n, filters), np.int64)
    contributions = np.empty((n, filters, classes), np.float32)
    order = np.concatenate(groups) if groups else np.zeros(0, dtype=np.int64)
    flat = np.fromiter(
        itertools.chain.from_iterable(encoded[i].ids for i in order.tolist()), dtype=np.int64, count=int(lengths.sum())
    )
    at = 0
    for idx in groups:
        rows = lengths[idx]
        seq = max(int(rows.max(initial=0)), p.min_length)
        ids = np.zeros((len(idx), seq), dtype=np.int64)
        total = int(rows.sum())
        if total:
            ids[np.arange(seq) < rows[:, None]] = flat[at : at + total]
        at += total
        lg, pl, ps, ct = p.run_arrays(ids, rows)
        logits[idx], pooled[idx], positions[idx], contributions[idx] = lg, pl, ps, ct
    return Outputs(logits, pooled, positions, contributions)


__all__ = ["CALL_TOKENS", "MIN_TEXTS", "SLACK", "run_packed", "sub_batches"]
