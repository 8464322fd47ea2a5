"""Independent references for drift figures: PSI computed with NumPy from its formula, and a live
token-length histogram made with NumPy's own ``histogram`` from the predict replies."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from textsieve.registry.stats import PSI_FLOOR


def psi_numpy(expected: Sequence[int], actual: Sequence[int]) -> float:
    # PSI = Σ (a_i − e_i) · ln(a_i / e_i) over shares (Yurdakul, 2018, eq. 1), floored as documented.
    e = np.maximum(np.asarray(expected, float) / sum(expected), PSI_FLOOR)
    a = np.maximum(np.asarray(actual, float) / sum(actual), PSI_FLOOR)
    return float(np.sum((a - e) * np.log(a / e)))


def tokens_histogram(results: Sequence[dict[str, Any]], edges: Sequence[float]) -> list[int]:
    """The replies' token counts over the baseline's bins, the last bin catching anything above it."""
    lengths = np.clip([r["tokens"] for r in results], edges[0], edges[-1])
    return [int(n) for n in np.histogram(lengths, bins=np.asarray(edges, float))[0]]
