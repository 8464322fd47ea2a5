"""Classification and calibration metrics in plain NumPy (no scikit-learn at run time).

Tests check each against scikit-learn or a worked example.
"""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


def softmax(logits: NDArray[np.floating], temperature: float = 1.0) -> FloatArray:
    z = np.asarray(logits, dtype=np.float64) / temperature
    z = z - z.max(axis=-1, keepdims=True)
    e = np.exp(z)
    out: FloatArray = e / e.sum(axis=-1, keepdims=True)
    return out


def log_softmax(logits: NDArray[np.floating], temperature: float = 1.0) -> FloatArray:
    z = np.asarray(logits, dtype=np.float64) / temperature
    z = z - z.max(axis=-1, keepdims=True)
    out: FloatArray = z - np.log(np.exp(z).sum(axis=-1, keepdims=True))
    return out


def nll(logits: NDArray[np.floating], targets: IntArray, temperature: float = 1.0) -> float:
    """Mean negative log-likelihood of the targets."""
    lp = log_softmax(logits, temperature)
    return float(-lp[np.arange(len(targets)), targets].mean())


# The bracket the temperature is searched in: from sharpening every logit 20× to flattening it 20×.
TEMPERATURE_BOUNDS = (0.05, 20.0)


def fit_temperature(logits: NDArray[np.floating], targets: IntArray) -> float:
    """Temperature scaling (Guo et al., 2017, "On Calibration of Modern Neural Networks", §4.2).

    NLL is convex in 1/T, so a golden-section search on log T over a wide bracket finds
    the minimum; the tests compare it with ``scipy.optimize``. When the NLL has no minimum
    inside the bracket the search ends at a bound (:func:`temperature_bound` says which).
    """
    lo, hi = math.log(TEMPERATURE_BOUNDS[0]), math.log(TEMPERATURE_BOUNDS[1])

    def f(log_t: float) -> float:
        return nll(logits, targets, math.exp(log_t))

    golden = (math.sqrt(5) - 1) / 2
    a, b = lo, hi
    c, d = b - golden * (b - a), a + golden * (b - a)
    fc, fd = f(c), f(d)
    for _ in range(80):
        if fc < fd:
            b, d, fd = d, c, fc
            c = b - golden * (b - a)
            fc = f(c)
        else:
            a, c, fc = c, d, fd
            d = a + golden * (b - a)
            fd = f(d)
    return math.exp((a + b) / 2)


def temperature_bound(temperature: float) -> Literal["lower", "upper"] | None:
    """'lower' or 'upper' when ``temperature`` is where :func:`fit_temperature`'s search ends at a bound
    of :data:`TEMPERATURE_BOUNDS` (the golden-section search stops within 1e-9 of it in log T), else None."""
    lo, hi = TEMPERATURE_BOUNDS
    if temperature <= lo * (1 + 1e-6):
        return "lower"
    if temperature >= hi * (1 - 1e-6):
        return "upper"
    return None


def expected_calibration_error(probabilities: NDArray[np.floating], targets: IntArray, bins: int = 15) -> float:
    """ECE with equal-width confidence bins (Naeini et al., 2015; Guo et al., 2017, eq. 3).

    A prediction with confidence c falls in bin m when (m-1)/M < c ≤ m/M.
    """
    p = np.asarray(probabilities, dtype=np.float64)
    confidence = p.max(axis=1)
    correct = (p.argmax(axis=1) == targets).astype(np.float64)
    edges = np.linspace(0.0, 1.0, bins + 1)
    which = np.clip(np.searchsorted(edges, confidence, side="left") - 1, 0, bins - 1)
    total = 0.0
    n = len(targets)
    for m in range(bins):
        sel = which == m
        if sel.any():
            total += sel.sum() / n * abs(correct[sel].mean() - confidence[sel].mean())
    return float(total)


def confusion_matrix(targets: IntArray, predicted: IntArray, classes: int) -> IntArray:
    """Rows are true classes, columns predicted classes (scikit-learn's convention)."""
    cm = np.zeros((classes, classes), dtype=np.int64)
    np.add.at(cm, (np.asarray(targets), np.asarray(predicted)), 1)
    return cm


def accuracy(targets: IntArray, predicted: IntArray) -> float:
    return float((np.asarray(targets) == np.asarray(predicted)).mean())


def macro_f1(targets: IntArray, predicted: IntArray, classes: int) -> float:
    """Unweighted mean of per-class F1; a class with no true and no predicted examples counts 0
    (scikit-learn's ``zero_division=0``)."""
    cm = confusion_matrix(targets, predicted, classes)
    tp = np.diag(cm).astype(np.float64)
    fp = cm.sum(axis=0) - tp
    fn = cm.sum(axis=1) - tp
    denom = 2 * tp + fp + fn
    f1 = np.divide(2 * tp, denom, out=np.zeros_like(tp), where=denom > 0)
    return float(f1.mean())


__all__ = [
    "TEMPERATURE_BOUNDS",
    "accuracy",
    "confusion_matrix",
    "expected_calibration_error",
    "fit_temperature",
    "log_softmax",
    "macro_f1",
    "nll",
    "softmax",
    "temperature_bound",
]
