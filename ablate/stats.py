"""Small statistics for comparing runs over seeds.

All intervals are two-sided Student-t intervals for a mean (the seeds are the sample):

    mean +/- t_{q, n-1} * s / sqrt(n),   q = (1 + level) / 2,   s = sample std (ddof = 1)

A paired comparison applies the same interval to the per-seed differences a_i - b_i (same seed =
same data order, so the pairing removes the data-order part of the noise) and takes its p-value
from the paired t-test (scipy.stats.ttest_rel).

``seeds_needed`` inverts the half-width: the normal approximation n = ceil((z_q s / w)^2), then
the smallest n >= 2 with t_{q, n-1} s / sqrt(n) <= w.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats


def _sample(values) -> np.ndarray:
    arr = np.asarray(values, dtype=float).ravel()
    if arr.size == 0:
        raise ValueError("need at least one value")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"values must be finite, got {arr.tolist()}")
    return arr


def _check_level(level: float) -> float:
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must lie in (0, 1), got {level}")
    return 0.5 + level / 2.0


def mean_ci(values, level: float = 0.95) -> tuple[float, float, float]:
    """Mean and Student-t confidence interval ``(mean, low, high)``.

    One value gives NaN bounds (no spread can be measured from one seed).
    """
    q = _check_level(level)
    arr = _sample(values)
    mean = float(arr.mean())
    n = arr.size
    if n < 2:
        return mean, math.nan, math.nan
    half = float(stats.t.ppf(q, n - 1)) * float(arr.std(ddof=1)) / math.sqrt(n)
    return mean, mean - half, mean + half


def mean_test(values, level: float = 0.95) -> tuple[float, float, float, float]:
    """Mean of ``values``, its t interval, and the one-sample t-test p-value against zero
    (scipy.stats.ttest_1samp). Returns ``(mean, low, high, p)``; with one value the bounds and p
    are NaN, and with zero spread (up to float rounding) p is NaN (the t statistic is undefined)
    while the interval collapses to the mean."""
    d = _sample(values)
    mean, low, high = mean_ci(d, level)
    # Spread at rounding level (e.g. a constant offset stored in floats) counts as no spread.
    if d.size < 2 or float(np.std(d, ddof=1)) <= 1e-12 * max(float(np.abs(d).max()), 1e-300):
        return mean, low, high, math.nan
    return mean, low, high, float(stats.ttest_1samp(d, 0.0).pvalue)


def paired_difference(a, b, level: float = 0.95) -> tuple[float, float, float, float]:
    """Mean of ``a - b`` over pairs, its t interval, and the paired t-test p-value.

    ``a[i]`` and ``b[i]`` must come from the same seed. Returns ``(mean, low, high, p)`` as
    :func:`mean_test` of the differences (the paired t-test is the one-sample test of the
    differences: scipy.stats.ttest_rel).
    """
    x = _sample(a)
    y = _sample(b)
    if x.shape != y.shape:
        raise ValueError(f"paired samples differ in length: {x.size} vs {y.size}")
    return mean_test(x - y, level)


def seeds_needed(std: float, halfwidth: float, level: float = 0.95) -> tuple[int, int]:
    """Seeds needed so the interval half-width is at most ``halfwidth``: ``(n_normal, n_t)``.

    ``n_normal = ceil((z s / w)^2)`` (at least 1) uses the normal quantile z (1.95996... for 95%);
    ``n_t`` is the smallest n >= 2 with ``t_{n-1} s / sqrt(n) <= w``, the honest count for a t
    interval (always >= n_normal because t quantiles exceed z).
    """
    q = _check_level(level)
    if not (math.isfinite(std) and std >= 0.0):
        raise ValueError(f"std must be finite and >= 0, got {std}")
    if not (math.isfinite(halfwidth) and halfwidth > 0.0):
        raise ValueError(f"halfwidth must be finite and > 0, got {halfwidth}")
    z = float(stats.norm.ppf(q))
    n_normal = max(1, math.ceil((z * std / halfwidth) ** 2))

    def fits(n: int) -> bool:
        return float(stats.t.ppf(q, n - 1)) * std / math.sqrt(n) <= halfwidth

    lo = max(2, n_normal)
    if fits(lo):
        return n_normal, lo
    hi = 2 * lo
    while not fits(hi):  # half-width falls with n, so doubling brackets the answer
        lo, hi = hi, 2 * hi
    while hi - lo > 1:  # invariant: fits(hi) and not fits(lo)
        mid = (lo + hi) // 2
        if fits(mid):
            hi = mid
        else:
            lo = mid
    return n_normal, hi


def holm(pvalues) -> np.ndarray:
    """Holm (1979) step-down adjusted p-values, controlling the family-wise error rate.

    Sort the m p-values ascending, p_(1) <= ... <= p_(m); then

        p~_(i) = max_{j <= i} min(1, (m - j + 1) p_(j))

    and p~ is returned in the input order. NaN entries (no test) are left NaN and do not count in m.
    """
    p = np.asarray(pvalues, dtype=float).ravel()
    out = np.full(p.shape, math.nan)
    tested = np.flatnonzero(np.isfinite(p))
    m = tested.size
    if m == 0:
        return out
    if np.any((p[tested] < 0) | (p[tested] > 1)):
        raise ValueError(f"p-values must lie in [0, 1], got {p.tolist()}")
    order = tested[np.argsort(p[tested], kind="stable")]
    scaled = np.minimum(1.0, (m - np.arange(m)) * p[order])
    out[order] = np.maximum.accumulate(scaled)
    return out


def sd_interval(std: float, n: int, level: float = 0.95) -> tuple[float, float]:
    """Chi-square interval of a normal population's SD from a sample SD ``s`` of ``n`` values:

    ( s sqrt((n-1) / chi2_{q, n-1}),  s sqrt((n-1) / chi2_{1-q, n-1}) ),  q = (1 + level) / 2
    """
    q = _check_level(level)
    if n < 2:
        raise ValueError(f"need n >= 2 for a spread, got {n}")
    df = n - 1
    return (
        std * math.sqrt(df / float(stats.chi2.ppf(q, df))),
        std * math.sqrt(df / float(stats.chi2.ppf(1.0 - q, df))),
    )


def seeds_needed_range(std: float, n: int, halfwidth: float, level: float = 0.95) -> tuple[int, int]:
    """Range of seeds needed for a t half-width <= ``halfwidth``: :func:`seeds_needed` (t-refined)
    at both ends of the chi-square interval of the SD (:func:`sd_interval`, n - 1 degrees of freedom)."""
    low_sd, high_sd = sd_interval(std, n, level)
    return seeds_needed(low_sd, halfwidth, level)[1], seeds_needed(high_sd, halfwidth, level)[1]
