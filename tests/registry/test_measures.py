"""registry.measures checked against outside references: scikit-learn, SciPy and a hand-worked ECE."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize
import scipy.special
import sklearn.metrics

from textsieve.registry import measures
from textsieve.registry.gates import present_macro_f1


def _predictions(seed: int, n: int, k: int, *, drop_class: bool) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    y = rng.integers(0, k, n)
    p = np.where(rng.random(n) < 0.6, y, rng.integers(0, k, n))
    if drop_class:  # a class that never occurs in truth nor predictions (the zero_division case)
        y[y == k - 1] = 0
        p[p == k - 1] = 0
    return y.astype(np.int64), p.astype(np.int64)


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("drop_class", [False, True])
def test_classification_metrics_match_scikit_learn(seed: int, drop_class: bool) -> None:
    k = 2 + seed % 4
    y, p = _predictions(seed, 50 + 37 * seed, k, drop_class=drop_class)
    labels = list(range(k))
    assert measures.accuracy(y, p) == pytest.approx(sklearn.metrics.accuracy_score(y, p), abs=1e-12)
    np.testing.assert_array_equal(
        measures.confusion_matrix(y, p, k), sklearn.metrics.confusion_matrix(y, p, labels=labels)
    )
    assert measures.macro_f1(y, p, k) == pytest.approx(
        sklearn.metrics.f1_score(y, p, labels=labels, average="macro", zero_division=0), abs=1e-12
    )
    # the gates' macro-F1: averaged over labels present, scikit-learn's default label set
    assert present_macro_f1(y, p) == pytest.approx(
        sklearn.metrics.f1_score(y, p, average="macro", zero_division=0), abs=1e-12
    )


def test_nll_and_softmax_match_references() -> None:
    rng = np.random.default_rng(11)
    logits = rng.normal(0, 3, (200, 4))
    y = rng.integers(0, 4, 200)
    for t in (0.5, 1.0, 2.7):
        np.testing.assert_allclose(measures.softmax(logits, t), scipy.special.softmax(logits / t, axis=1), rtol=1e-12)
        expected = sklearn.metrics.log_loss(y, scipy.special.softmax(logits / t, axis=1), labels=[0, 1, 2, 3])
        assert measures.nll(logits, y, t) == pytest.approx(expected, rel=1e-9)


# Hand-worked example, ECE = Σ_m |B_m|/n · |acc(B_m) − conf(B_m)| with equal-width bins,
# bin m holding confidences in ((m−1)/M, m/M] (Naeini, Cooper & Hauskrecht, 2015; Guo, Pleiss,
# Sun & Weinberger, 2017, "On Calibration of Modern Neural Networks", eq. 3).
_PROBS = np.array(
    [
        [0.95, 0.05],  # conf .95, predicts 0, target 0: right  → bin 15 (14/15, 1]
        [0.05, 0.95],  # conf .95, predicts 1, target 0: wrong  → bin 15
        [1.00, 0.00],  # conf 1.0, right                          → bin 15 (1.0 is in the last bin)
        [0.62, 0.38],  # conf .62, right                          → bin 10 (9/15, 10/15]
        [0.38, 0.62],  # conf .62, right                          → bin 10
        [0.62, 0.38],  # conf .62, wrong                          → bin 10
        [0.30, 0.70],  # conf .70, right                          → bin 11 (10/15, 11/15]
        [0.55, 0.45],  # conf .55, wrong                          → bin 9 (8/15, 9/15]
    ]
)
_TARGETS = np.array([0, 0, 0, 0, 1, 1, 1, 1])


def test_ece_hand_worked_15_bins() -> None:
    # bin 15: 3/8 · |2/3 − 2.9/3| = 3/8 · 0.3      = 0.1125
    # bin 10: 3/8 · |2/3 − 0.62|  = 3/8 · 0.046667 = 0.0175
    # bin 11: 1/8 · |1 − 0.70|    = 0.0375
    # bin  9: 1/8 · |0 − 0.55|    = 0.06875
    # total                         0.23625
    assert measures.expected_calibration_error(_PROBS, _TARGETS, bins=15) == pytest.approx(0.23625, abs=1e-12)


def test_ece_hand_worked_one_bin() -> None:
    # one bin: |accuracy 5/8 − mean confidence 6.01/8| = |0.625 − 0.75125| = 0.12625
    assert measures.expected_calibration_error(_PROBS, _TARGETS, bins=1) == pytest.approx(0.12625, abs=1e-12)


def test_ece_is_zero_when_confidence_equals_accuracy() -> None:
    # 4 texts at confidence 0.75, 3 of them right: perfectly calibrated by definition
    probs = np.array([[0.75, 0.25]] * 4)
    assert measures.expected_calibration_error(probs, np.array([0, 0, 0, 1])) == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize(("seed", "true_t"), [(1, 2.5), (2, 0.6), (3, 1.0)])
def test_fit_temperature_matches_scipy_minimisation(seed: int, true_t: float) -> None:
    """Guo et al. (2017) §4.2: T minimises the NLL of softmax(z / T); SciPy's bounded scalar
    minimiser on the same objective (NLL via scipy.special.log_softmax) must agree."""
    rng = np.random.default_rng(seed)
    logits = rng.normal(0, 3, (400, 3))
    p = scipy.special.softmax(logits / true_t, axis=1)
    y = np.array([rng.choice(3, p=row) for row in p])

    def objective(t: float) -> float:
        return float(-scipy.special.log_softmax(logits / t, axis=1)[np.arange(len(y)), y].mean())

    ref = scipy.optimize.minimize_scalar(objective, bounds=(0.05, 20.0), method="bounded", options={"xatol": 1e-10})
    got = measures.fit_temperature(logits, y)
    assert got == pytest.approx(ref.x, rel=1e-4)
    assert objective(got) == pytest.approx(ref.fun, abs=1e-9)
    assert abs(got - true_t) / true_t < 0.35  # and it recovers the temperature the data was drawn with
