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

__all__ = [
    "mean_ci",
    "mean_test",
    "paired_difference",
    "seeds_needed",
    "seeds_needed_range",
    "sd_interval",
    "holm",
    "two_stage_total",
    "two_stage_interval",
    "paired_binary_test",
    "censored_sign_test",
    "kaplan_meier",
    "km_median",
]


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


# --- seed rounds: Stein's two-stage design ---------------------------------------------------


def two_stage_total(first_stage, halfwidth: float, cap: int | None, level: float = 0.95) -> int:
    """Total seeds of Stein's (1945) two-stage design from the first stage's values (paired
    differences or effect contrasts, one per seed): with n0 values of sample SD s0,

        N = max(n0, ceil((t_{q, n0-1} s0 / w)^2)),   at most ``cap`` (None: no cap),

    so that the final interval (:func:`two_stage_interval`) has half-width at most w unless capped.
    Zero spread gives N = n0 (no interval exists; see :func:`two_stage_interval`)."""
    q = _check_level(level)
    d = _sample(first_stage)
    n0 = d.size
    if n0 < 2:
        raise ValueError(f"the first stage needs at least 2 seeds, got {n0}")
    if not (math.isfinite(halfwidth) and halfwidth > 0.0):
        raise ValueError(f"halfwidth must be finite and > 0, got {halfwidth}")
    s0 = float(d.std(ddof=1))
    needed = math.ceil((float(stats.t.ppf(q, n0 - 1)) * s0 / halfwidth) ** 2)
    total = max(n0, needed)
    return int(total if cap is None else min(max(cap, n0), total))


def two_stage_interval(values, n0: int, level: float = 0.95) -> tuple[float, float, float, float]:
    """Stein's (1945) interval after a two-stage design: the mean of all N values, with the first
    stage's SD s0 and its n0 - 1 degrees of freedom,

        mean_N +/- t_{q, n0-1} s0 / sqrt(N),    p = 2 P(T_{n0-1} > |mean_N| sqrt(N) / s0).

    For normal values its coverage is exact whatever N the first stage chose (the mean is
    independent of s0). ``values`` are in seed order, the first ``n0`` the first stage's. Returns
    ``(mean, low, high, p)``; NaN bounds and p when s0 = 0 (no interval exists)."""
    q = _check_level(level)
    d = _sample(values)
    if not 2 <= n0 <= d.size:
        raise ValueError(f"n0 must be in [2, {d.size}], got {n0}")
    mean = float(d.mean())
    s0 = float(d[:n0].std(ddof=1))
    if s0 <= 1e-12 * max(float(np.abs(d[:n0]).max()), 1e-300):
        return mean, math.nan, math.nan, math.nan
    se = s0 / math.sqrt(d.size)
    half = float(stats.t.ppf(q, n0 - 1)) * se
    p = float(2.0 * stats.t.sf(abs(mean) / se, n0 - 1))
    return mean, mean - half, mean + half, p


# --- binary and censored outcomes ------------------------------------------------------------


def paired_binary_test(a, b) -> tuple[int, int, float]:
    """Exact McNemar (1947) test of paired yes/no outcomes (a[i], b[i] from the same seed): the
    seeds where they disagree, ``(only_a, only_b, p)``, p = two-sided binomial test of only_a out
    of only_a + only_b at 1/2 (scipy.stats.binomtest); p = 1 when they never disagree."""
    x, y = np.asarray(a, dtype=bool), np.asarray(b, dtype=bool)
    if x.shape != y.shape:
        raise ValueError(f"paired outcomes differ in length: {x.size} vs {y.size}")
    only_a, only_b = int(np.sum(x & ~y)), int(np.sum(~x & y))
    if only_a + only_b == 0:
        return 0, 0, 1.0
    return only_a, only_b, float(stats.binomtest(only_a, only_a + only_b, 0.5).pvalue)


def censored_sign_test(times_a, times_b, budget: float) -> tuple[int, int, float]:
    """Paired comparison of times to an event that some seeds never reach within a common budget
    (None or a value > budget: censored at the budget, never imputed). Per seed: both reached ->
    the sooner one wins; one reached -> it wins (the other is later than the budget); neither ->
    tied beyond the budget (dropped). Returns ``(a_sooner, b_sooner, p)``, p from the exact sign
    test (binomial at 1/2; 1 when nothing differs)."""
    a_wins = b_wins = 0
    for ta, tb in zip(times_a, times_b, strict=True):
        ra = ta is not None and math.isfinite(ta) and ta <= budget
        rb = tb is not None and math.isfinite(tb) and tb <= budget
        if ra and (not rb or ta < tb):
            a_wins += 1
        elif rb and (not ra or tb < ta):
            b_wins += 1
    if a_wins + b_wins == 0:
        return 0, 0, 1.0
    return a_wins, b_wins, float(stats.binomtest(a_wins, a_wins + b_wins, 0.5).pvalue)


def kaplan_meier(times, observed) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Kaplan & Meier (1958) product-limit estimate of S(t) = P(event later than t).

    At each distinct event time t_j with d_j events among n_j still at risk (censored times count
    as at risk up to and including their own time): S(t_j) = prod_{i <= j} (1 - d_i / n_i), with
    Greenwood's variance sum_{i <= j} d_i / (n_i (n_i - d_i)) of log S. Returns the event times,
    S at them and that sum."""
    t = np.asarray(times, dtype=float)
    e = np.asarray(observed, dtype=bool)
    if t.shape != e.shape or t.size == 0:
        raise ValueError("times and observed must be 1-D of one non-zero length")
    event_times = np.unique(t[e])
    surv, green, s, g = [], [], 1.0, 0.0
    for tj in event_times:
        n = int(np.sum(t >= tj))
        d = int(np.sum((t == tj) & e))
        s *= 1.0 - d / n
        g += d / (n * (n - d)) if n > d else math.inf
        surv.append(s)
        green.append(g)
    return event_times, np.array(surv), np.array(green)


def km_median(times, observed, level: float = 0.95) -> tuple[float, float, float]:
    """Median time of a Kaplan-Meier curve (the first event time with S <= 1/2) and its interval
    from the log(-log) pointwise band of S (Greenwood variance; the interval's lower end is where
    the band's lower curve first reaches 1/2, its upper end where the upper curve does; NaN where
    a curve never does within the data: not defined)."""
    q = _check_level(level)
    z = float(stats.norm.ppf(q))
    t, s, g = kaplan_meier(times, observed)

    def first_below(curve) -> float:
        hits = np.flatnonzero(curve <= 0.5)
        return float(t[hits[0]]) if hits.size else math.nan

    with np.errstate(divide="ignore", invalid="ignore"):
        log_s = np.log(s)
        spread = z * np.sqrt(g) / np.abs(log_s)
        lower = np.where(s > 0, s ** np.exp(spread), 0.0)
        upper = np.where(s > 0, s ** np.exp(-spread), 0.0)
    lower = np.where(np.isfinite(lower), lower, 0.0)
    upper = np.where(np.isfinite(upper), upper, np.where(s > 0, 1.0, 0.0))
    return first_below(s), first_below(lower), first_below(upper)
