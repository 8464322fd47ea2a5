"""registry/stats.py against SciPy and published examples (sources named beside each check)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps
from scipy.spatial.distance import jensenshannon

from textsieve.registry import stats


@pytest.mark.parametrize(("k", "n"), [(0, 20), (1, 29), (15, 148), (81, 263), (50, 50), (7, 10), (0, 1)])
def test_wilson_equals_scipy(k: int, n: int) -> None:
    # Reference: scipy.stats.binomtest(...).proportion_ci(method="wilson").
    ref = sps.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    lo, hi = stats.wilson_interval(k, n)
    assert lo == pytest.approx(ref.low, abs=1e-12)
    assert hi == pytest.approx(ref.high, abs=1e-12)


def test_wilson_published_example() -> None:
    # Newcombe (1998), "Two-sided confidence intervals for the single proportion", Table II,
    # example 81/263, method 3 (Wilson score): 0.2553 to 0.3662 (values from memory; SciPy above agrees).
    lo, hi = stats.wilson_interval(81, 263)
    assert (round(lo, 4), round(hi, 4)) == (0.2553, 0.3662)


def test_wilson_refuses_impossible_counts() -> None:
    with pytest.raises(ValueError, match="successes"):
        stats.wilson_interval(5, 3)
    assert stats.wilson_interval(0, 0) == (0.0, 1.0)


@pytest.mark.parametrize(("b", "c"), [(0, 0), (1, 0), (10, 3), (150, 86), (3, 3), (0, 25), (400, 350)])
def test_mcnemar_exact_equals_binomtest(b: int, c: int) -> None:
    # Reference: the exact McNemar test is a two-sided binomial test of b in b+c at 1/2
    # (McNemar, 1947; Dietterich, 1998, §3.2); SciPy's binomtest computes it.
    ref = 1.0 if b + c == 0 else sps.binomtest(b, b + c, 0.5).pvalue
    assert stats.mcnemar_exact_p(b, c) == pytest.approx(ref, rel=1e-9, abs=1e-300)


def test_bootstrap_interval_close_to_scipy() -> None:
    # Reference: scipy.stats.bootstrap, percentile method, same resample count.
    rng = np.random.default_rng(3)
    correct = (rng.random(600) < 0.8).astype(np.float64)
    lo, hi = stats.bootstrap_interval(lambda idx: float(correct[idx].mean()), len(correct), resamples=4000, seed=1)
    ref = sps.bootstrap((correct,), np.mean, n_resamples=4000, method="percentile", random_state=1)
    assert lo == pytest.approx(ref.confidence_interval.low, abs=0.006)
    assert hi == pytest.approx(ref.confidence_interval.high, abs=0.006)
    assert lo < correct.mean() < hi


def test_minimum_detectable_difference_inverts_connor() -> None:
    # Connor (1987), eq. 3: n = (za*sqrt(psi) + zb*sqrt(psi - d^2))^2 / d^2; solving for d and
    # putting it back must give n.
    n, psi = 600, 0.1
    d = stats.minimum_detectable_difference(n, psi)
    za, zb = 1.959963984540054, 0.8416212335729143
    back = (za * math.sqrt(psi) + zb * math.sqrt(psi - d * d)) ** 2 / (d * d)
    assert back == pytest.approx(n, rel=1e-6)
    assert stats.minimum_detectable_difference(6000, psi) < d
    assert stats.minimum_detectable_difference(600, 0.0) == math.inf


def test_psi_hand_worked_example() -> None:
    # Hand-worked (common practice formula, Yurdakul 2018 eq. 1): shares e=(0.5,0.5), a=(0.6,0.4):
    # (0.1)ln(1.2) + (-0.1)ln(0.8) = 0.0182321557 + 0.0223143551 = 0.0405465108.
    assert stats.population_stability_index([50, 50], [60, 40]) == pytest.approx(0.0405465108, abs=1e-9)
    e = np.array([10.0, 20, 30, 40])
    a = np.array([15.0, 25, 25, 35])
    es, as_ = e / e.sum(), a / a.sum()
    assert stats.population_stability_index(e, a) == pytest.approx(float(np.sum((as_ - es) * np.log(as_ / es))))
    assert stats.population_stability_index(e, e) == 0.0
    assert stats.psi_band(0.05) == "stable" and stats.psi_band(0.2) == "watch" and stats.psi_band(0.3) == "act"


@pytest.mark.parametrize("seed", range(5))
def test_jensen_shannon_equals_scipy(seed: int) -> None:
    rng = np.random.default_rng(seed)
    p = rng.integers(0, 20, size=8).astype(np.float64) + (np.arange(8) == 0)
    q = rng.integers(0, 20, size=8).astype(np.float64) + (np.arange(8) == 1)
    assert stats.jensen_shannon_distance(p, q) == pytest.approx(float(jensenshannon(p, q)), abs=1e-12)


def test_histogram_counts_every_value() -> None:
    counts = stats.histogram([-5, 0, 0.5, 1, 2, 99], [0, 1, 2, 3])
    assert counts == [3, 1, 2]
    assert sum(counts) == 6
    assert counts == list(np.histogram(np.clip([-5, 0, 0.5, 1, 2, 99], 0, 3), [0, 1, 2, 3])[0])


@pytest.mark.parametrize("q", [0.9, 0.95, 0.99])
def test_chi2_quantile_is_within_1_percent_of_scipy(q: float) -> None:
    from scipy.stats import chi2

    for dof in range(1, 101):
        assert stats.chi2_quantile(q, dof) == pytest.approx(chi2.ppf(q, dof), rel=0.01), dof
    assert stats.chi2_quantile(0.95, 1) == pytest.approx(chi2.ppf(0.95, 1), rel=1e-12)  # exact for 1 and 2
    assert stats.chi2_quantile(0.95, 2) == pytest.approx(chi2.ppf(0.95, 2), rel=1e-12)


@pytest.mark.parametrize(("shares", "baseline"), [((0.1, 0.2, 0.3, 0.4), 600), ((0.5, 0.5), 300), ((0.1,) * 10, 2000)])
def test_psi_min_texts_keeps_sampling_noise_stable_95_times_in_100(shares: tuple[float, ...], baseline: int) -> None:
    # Monte Carlo against the published approximation (Yurdakul, 2018, §3: with no drift, PSI is
    # about (1/n + 1/N)·χ²(B − 1)): a baseline and a window drawn from the same distribution, the
    # window at psi_min_texts, read "watch" or worse (PSI ≥ 0.1) about 5 times in 100; a window a
    # quarter that size, far more often.
    rng = np.random.default_rng(2026)
    n = stats.psi_min_texts(len(shares), baseline)
    assert n is not None

    def noisy(size: int) -> float:
        trials = 2000
        base = rng.multinomial(baseline, shares, size=trials)
        window = rng.multinomial(size, shares, size=trials)
        psi = [stats.population_stability_index(b, w) for b, w in zip(base, window, strict=True)]
        return float(np.mean(np.asarray(psi) >= 0.1))

    assert noisy(n) <= 0.08
    assert noisy(max(n // 4, 1)) >= 0.2


def test_psi_min_texts_is_none_when_the_baseline_alone_is_too_noisy() -> None:
    assert stats.psi_min_texts(17, 100) is None  # 16 degrees of freedom: (1/100)·26.3 > 0.1 already
    assert stats.psi_min_texts(1, 1000) is None and stats.psi_min_texts(4, 0) is None
