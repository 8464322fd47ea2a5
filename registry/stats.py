"""Small statistics the reports, gates, shadow counts, drift signals and verdicts share.

Plain NumPy and the standard library (SciPy is a test-only reference): the service imports this
module too. Each function names its source; tests hold each to SciPy or a published example.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from statistics import NormalDist

import numpy as np
from numpy.typing import ArrayLike, NDArray

Z95 = NormalDist().inv_cdf(0.975)  # 1.959963984540054
# Added to every bin's share before a logarithm so that an empty bin gives a large, finite
# term (common practice for PSI; the figure is then comparable across windows).
PSI_FLOOR = 1e-4


def wilson_interval(successes: int, n: int, z: float = Z95) -> tuple[float, float]:
    """Wilson score interval for a binomial proportion (Wilson, 1927; Newcombe, 1998, method 3).

    ``(0.0, 1.0)`` when ``n`` is 0: nothing is known yet.
    """
    if n < 0 or successes < 0 or successes > n:
        raise ValueError(f"need 0 <= successes <= n, got {successes} of {n}")
    if n == 0:
        return 0.0, 1.0
    p = successes / n
    z2 = z * z
    centre = (p + z2 / (2 * n)) / (1 + z2 / n)
    half = z / (1 + z2 / n) * math.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def binomial_two_sided_p(k: int, n: int) -> float:
    """Exact two-sided p of k successes in n trials at p = 1/2 (doubling the smaller tail)."""
    if n == 0:
        return 1.0
    k = min(k, n - k)
    # log-space sum: n can be large (tens of thousands of discordant pairs)
    log_half_n = -n * math.log(2.0)
    tail = 0.0
    for i in range(k + 1):
        tail += math.exp(math.lgamma(n + 1) - math.lgamma(i + 1) - math.lgamma(n - i + 1) + log_half_n)
    return min(1.0, 2.0 * tail)


def mcnemar_exact_p(right_to_wrong: int, wrong_to_right: int) -> float:
    """McNemar's test, exact form (McNemar, 1947; Dietterich, 1998, §3.2): under "no difference"
    each discordant pair is equally likely to go either way, so the count one way is
    Binomial(b + c, 1/2)."""
    return binomial_two_sided_p(right_to_wrong, right_to_wrong + wrong_to_right)


def bootstrap_interval(
    statistic: Callable[[NDArray[np.int64]], float],
    n: int,
    resamples: int = 2000,
    seed: int = 0,
    confidence: float = 0.95,
) -> tuple[float, float]:
    """Percentile bootstrap interval (Efron & Tibshirani, 1993, ch. 13).

    ``statistic`` receives an index array (one resample of ``range(n)``) and returns the figure
    computed on those rows, so paired figures (two versions on the same texts) resample pairs.
    """
    if n == 0:
        return math.nan, math.nan
    rng = np.random.default_rng(seed)
    values = np.empty(resamples, dtype=np.float64)
    for i in range(resamples):
        values[i] = statistic(rng.integers(0, n, size=n))
    alpha = (1.0 - confidence) / 2
    lo, hi = np.quantile(values, [alpha, 1.0 - alpha])
    return float(lo), float(hi)


def minimum_detectable_difference(n: int, discordant_share: float, alpha: float = 0.05, power: float = 0.8) -> float:
    """Smallest accuracy difference a paired (McNemar) comparison of ``n`` texts detects with the
    given power, for a share ``discordant_share`` of texts the two versions label differently
    (Connor, 1987, eq. 3, solved for the difference). ``inf`` when nothing can be detected."""
    if n <= 0 or discordant_share <= 0:
        return math.inf
    za = NormalDist().inv_cdf(1 - alpha / 2)
    zb = NormalDist().inv_cdf(power)
    psi = min(discordant_share, 1.0)
    # n * d**2 = (za*sqrt(psi) + zb*sqrt(psi - d**2))**2 ; solve by bisection on d in (0, psi]
    lo, hi = 0.0, psi
    for _ in range(100):
        d = (lo + hi) / 2
        need = (za * math.sqrt(psi) + zb * math.sqrt(max(psi - d * d, 0.0))) ** 2 / (d * d)
        if need > n:
            lo = d
        else:
            hi = d
    return hi if hi < psi else math.inf


def _shares(counts: ArrayLike) -> NDArray[np.float64]:
    c = np.asarray(counts, dtype=np.float64)
    total = c.sum()
    if total <= 0:
        raise ValueError("a histogram with no counts has no shares")
    return np.asarray(c / total, dtype=np.float64)


def population_stability_index(expected: ArrayLike, actual: ArrayLike, floor: float = PSI_FLOOR) -> float:
    """PSI = Σ (a_i − e_i) · ln(a_i / e_i) over bins (Yurdakul, 2018, eq. 1), shares floored at
    ``floor`` so an empty bin contributes a large finite term instead of infinity."""
    e = np.maximum(_shares(expected), floor)
    a = np.maximum(_shares(actual), floor)
    return float(np.sum((a - e) * np.log(a / e)))


def jensen_shannon_distance(p: ArrayLike, q: ArrayLike) -> float:
    """Square root of the Jensen–Shannon divergence with natural logarithms (Lin, 1991; Endres &
    Schindelin, 2003), as ``scipy.spatial.distance.jensenshannon`` computes it."""
    a = _shares(p)
    b = _shares(q)
    m = (a + b) / 2

    def kl(x: NDArray[np.float64]) -> float:
        mask = x > 0
        return float(np.sum(x[mask] * np.log(x[mask] / m[mask])))

    return math.sqrt(max((kl(a) + kl(b)) / 2, 0.0))


def psi_band(value: float) -> str:
    """The usual reading of a PSI figure: < 0.1 stable, 0.1–0.25 watch, > 0.25 act (common
    practice, no single source)."""
    if value < 0.1:
        return "stable"
    if value <= 0.25:
        return "watch"
    return "act"


def chi2_quantile(q: float, dof: int) -> float:
    """The ``q`` quantile of the chi-square distribution with ``dof`` degrees of freedom: exact for
    1 and 2 (the square of a normal quantile; −2 ln(1 − q)), the Wilson–Hilferty cube-root normal
    approximation above (Wilson & Hilferty, 1931), within 1 % of the exact value there for the
    quantiles used here (tests compare it with scipy.stats.chi2.ppf)."""
    if not 0.0 < q < 1.0 or dof < 1:
        raise ValueError(f"need 0 < q < 1 and dof >= 1, got q={q}, dof={dof}")
    if dof == 1:
        return NormalDist().inv_cdf((1.0 + q) / 2.0) ** 2
    if dof == 2:
        return -2.0 * math.log1p(-q)
    k = 2.0 / (9.0 * dof)
    return float(dof * (1.0 - k + NormalDist().inv_cdf(q) * math.sqrt(k)) ** 3)


def psi_min_texts(bins: int, baseline: int, threshold: float = 0.1, q: float = 0.95) -> int | None:
    """The fewest live texts for which a window drawn from the baseline's own distribution stays
    under ``threshold`` PSI with probability ``q``; None when no window size does (the baseline is
    too small). With no drift, PSI is approximately (1/n + 1/N) · χ²(bins − 1) for a window of n
    and a baseline of N texts (Yurdakul, 2018, §3): below this size a "watch" or "act" band is
    mostly sampling noise."""
    if bins < 2 or baseline < 1:
        return None
    room = threshold / chi2_quantile(q, bins - 1) - 1.0 / baseline
    if room <= 0:
        return None
    return math.ceil(1.0 / room)


def histogram(values: Sequence[float] | NDArray[np.floating], edges: Sequence[float]) -> list[int]:
    """Counts in the bins ``[edges[i], edges[i+1])``, the last bin closed; values outside the
    edges fall in the first or last bin (a drift histogram must count every text)."""
    x = np.asarray(values, dtype=np.float64)
    e = np.asarray(edges, dtype=np.float64)
    which = np.clip(np.searchsorted(e, x, side="right") - 1, 0, len(e) - 2)
    return [int(c) for c in np.bincount(which, minlength=len(e) - 1)]


__all__ = [
    "PSI_FLOOR",
    "Z95",
    "binomial_two_sided_p",
    "bootstrap_interval",
    "chi2_quantile",
    "histogram",
    "jensen_shannon_distance",
    "mcnemar_exact_p",
    "minimum_detectable_difference",
    "population_stability_index",
    "psi_band",
    "psi_min_texts",
    "wilson_interval",
]
