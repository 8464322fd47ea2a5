"""Logits that drive temperature scaling's search to each end of its bracket, and scipy's bounded
minimiser as the reference that no minimum lies inside it (the card, export's report and the
evaluation report all check what they say of such a fit against these)."""

from __future__ import annotations

import numpy as np

# bound -> (logits, targets, the temperature the search ends at)
BOUND_CASES: dict[str, tuple[list[list[float]], list[int], float]] = {
    # Every text's own class has the lower logit: the model is sure and wrong, so flattening every
    # probability towards 1/2 lowers the NLL all the way up (Guo et al., 2017, NLL in §4.2).
    "upper": ([[3.0, 0.0], [0.0, 3.0], [2.5, -1.0], [-1.0, 2.0]], [1, 0, 1, 0], 20.0),
    # Two texts told apart and one tie, which no temperature moves off 1/2: the NLL falls as T shrinks.
    "lower": ([[1.0, 0.0], [0.0, 1.0], [0.0, 0.0]], [0, 1, 0], 0.05),
}


def reference_minimum(logits: np.ndarray, targets: np.ndarray) -> float:
    """Where scipy's bounded minimiser puts the NLL's minimum over the search's bracket."""
    from scipy.optimize import minimize_scalar

    from textsieve.registry.measures import TEMPERATURE_BOUNDS, nll

    best = minimize_scalar(
        lambda t: nll(logits, targets, t), bounds=TEMPERATURE_BOUNDS, method="bounded", options={"xatol": 1e-8}
    )
    return float(best.x)
