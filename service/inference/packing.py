"""Running one collected batch as length-sorted sub-batches with bounded padding.

onnxruntime's cost grows with the padded area (texts × longest text), plus a fixed cost per
call, so a batch of mixed lengths is sorted and cut wherever padding would exceed both
``SLACK`` of the real tokens and ``CALL_TOKENS`` padded positions (about what one call's fixed
cost buys with the tap-tables layout: ~100 µs per call against ~1 µs per padded position on
the 2-core benchmark machine); a sub-batch keeps at least ``MIN_TEXTS`` texts. Padded
windows are masked in the graph, so the cut points do not change any text's result.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from textsieve.registry.runtime import Encoded, Outputs, Predictor

SLACK = 0.25
MIN_TEXTS = 4
CALL_TOKENS = 128


def sub_batches(
    lengths: NDArray[np.int64],
    *,
    slack: float = SLACK,
    min_texts: int = MIN_TEXTS,
    max_texts: int | None = None,
    call_tokens: int = CALL_TOKENS,
) -> list[NDArray[np.int64]]:
    """Row indices per sub-batch, shortest texts first."""
    order = np.argsort(lengths, kind="stable")
    groups: list[list[int]] = []
    current: list[int] = []
    tokens = 0
    for i in order.tolist():
        n = max(int(lengths[i]), 1)
        full = max_texts is not None and len(current) >= max_texts
        wasteful = (len(current) + 1) * n - (tokens + n) > max(slack * (tokens + n), call_tokens)
        if current and (full or (wasteful and len(current) >= min_texts)):
            groups.append(current)
            current, tokens = [], 0
        current.append(i)
        tokens += n
    if current:
        groups.append(current)
    return [np.asarray(g, dtype=np.int64) for g in groups]


def run_packed(p: Predictor, encoded: list[Encoded]) -> Outputs:
    """Like ``Predictor.run``, with sub-batches cut by padding waste instead of a fixed size."""
    n = len(encoded)
    lengths = np.fromiter((len(e.ids) for e in encoded), dtype=np.int64, count=n)
    classes, filters = len(p.labels), len(p.filter_widths)
    logits = np.empty((n, classes), np.float32)
    pooled = np.empty((n, filters), np.float32)
    positions = np.empty((n, filters), np.int64)
    contributions = np.empty((n, filters, classes), np.float32)
    for idx in sub_batches(lengths, max_texts=p.batch_size):
        lg, pl, ps, ct = p.run_arrays(*p.pad([encoded[i] for i in idx]))
        logits[idx], pooled[idx], positions[idx], contributions[idx] = lg, pl, ps, ct
    return Outputs(logits, pooled, positions, contributions)


__all__ = ["CALL_TOKENS", "MIN_TEXTS", "SLACK", "run_packed", "sub_batches"]
