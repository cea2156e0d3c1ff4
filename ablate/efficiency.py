"""How much size (or data) one attention choice saves over another, from a sweep.

Per attention choice, final validation loss is fitted against x (non-embedding parameters, or
training tokens) with a saturating power law

    L(x) = E + A * (x / x_ref) ** (-alpha),     E >= 0, A >= 0, alpha > 0,

where x_ref is the geometric mean of the fitted x values (it only rescales A and keeps the fit
well scaled). The fit uses scipy.optimize.curve_fit. When the fit is ill-conditioned (fewer
than 4 distinct x values, no convergence, no finite covariance, a parameter pinned at a bound,
or a parameter whose standard error exceeds its value) the curve falls back to a straight line
in log-log space, log L = log A - alpha * log(x / x_ref), i.e. the same formula with E = 0; the
result says which curve was used and why. When one of the two compared curves falls back, both
use the log-log line, so that like is compared with like.

Size ratio. For a candidate curve L_c and the baseline curve L_b, at a point x:

    x_b(x) = L_b^{-1}(L_c(x))       (the x the baseline needs to reach the candidate's loss)
    R(x)   = x / x_b(x)

R < 1 means the candidate reaches the baseline's loss with fewer parameters (tokens): "the
candidate reaches the baseline's loss with R of its parameters", i.e. with R times the
parameters the baseline needs for that loss. The reported point of comparison is the middle of
the candidate's swept range, x_mid = geometric mean of its distinct x values. If L_c(x) is at or
below the baseline's fitted floor E_b, no finite x_b exists and R = 0 (the limit).

Interval: bootstrap over seeds, resampled jointly. Seeds are paired (same seed = same data order
in every cell), so each resample draws n seed indices with replacement from the n seeds and uses
those seeds in every cell of both curves; both curves are refitted (same curve kind as the
full-data fit) and R(x_mid) recomputed. A draw that fails a fit or a check is not dropped (that
would empty one tail): it counts as an extreme on the side it points to. The 95% interval is the
2.5 and 97.5 percentiles (order statistics) of the draws after their deviations from the point
estimate are scaled by sqrt(n / (n - 1)) t_{0.975, n-1} / z_{0.975}: resampling n of n seeds
shrinks the spread by sqrt((n - 1) / n), and a spread estimated from n seeds calls for a t, not a
normal, quantile. In the seeded simulation of tests/test_efficiency.py this covered 0.930 at 4
seeds, 0.935 at 6 and 0.945 at 10 (200 sweeps each; the plain percentile interval with failed draws
dropped gave 0.82 / 0.87 / 0.92). Below 10 seeds the interval is labelled approximate.

A ratio is stated only when it is determined by the sweep: every fit (the point estimate and
each refit) must pass the same checks (loss falls with x: exponent > 0; the baseline's required
size x_b(x_mid) lies inside its swept range), fewer than 2.5% of the draws may fail them, and the
interval's high / low must be at most 4. Otherwise the result says "not determined by this
sweep" and which check failed.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import stats
from scipy.optimize import OptimizeWarning, curve_fit

__all__ = [
    "AXIS_LABELS",
    "AXIS_NOUNS",
    "EfficiencyError",
    "LOG_LINE",
    "POWER_LAW",
    "LossCurve",
    "Comparison",
    "check_pair",
    "compare",
    "fit_loss_curve",
    "fit_power_law",
    "fit_log_line",
    "refit",
    "size_ratio",
    "bootstrap_ratio",
    "geometric_middle",
]

POWER_LAW = "power law"
LOG_LINE = "log-log line"
ALPHA_BOUNDS = (1e-3, 5.0)
AXIS_NOUNS = {"params": "parameters", "tokens": "training tokens"}
AXIS_LABELS = {"params": "non-embedding parameters", "tokens": "training tokens"}


class EfficiencyError(ValueError):
    """The sweep cannot give a size ratio (too few points, loss not falling with x, ...)."""


class IllConditioned(Exception):
    pass


@dataclass(frozen=True)
class LossCurve:
    """L(x) = floor + amplitude * (x / x_ref) ** (-exponent)."""

    kind: str
    floor: float
    amplitude: float
    exponent: float
    x_ref: float
    note: str = ""

    def loss(self, x):
        return self.floor + self.amplitude * (np.asarray(x, dtype=float) / self.x_ref) ** (-self.exponent)

    def x_for_loss(self, target):
        """The x with loss(x) = target (inf at or below the floor)."""
        target = np.asarray(target, dtype=float)
        excess = target - self.floor
        with np.errstate(divide="ignore", invalid="ignore"):
            x = self.x_ref * (excess / self.amplitude) ** (-1.0 / self.exponent)
        return np.where(excess > 0, x, np.inf)

    def amplitude_at_unit_x(self) -> float:
        """A in L = E + A x^(-alpha) with x in its own units (no x_ref)."""
        return self.amplitude * self.x_ref**self.exponent


def _model(u, floor, amplitude, exponent):
    return floor + amplitude * u ** (-exponent)


def _jacobian(u, floor, amplitude, exponent):
    p = u ** (-exponent)
    return np.stack([np.ones_like(u), p, -amplitude * p * np.log(u)], axis=1)


def _xy(x, y) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(x, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    if x.shape != y.shape:
        raise EfficiencyError(f"x and loss differ in length: {x.size} vs {y.size}")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))) or np.any(x <= 0) or np.any(y <= 0):
        raise EfficiencyError("x and loss must be finite and positive")
    return x, y


def geometric_middle(x) -> float:
    return float(np.exp(np.mean(np.log(np.unique(np.asarray(x, dtype=float))))))


def _starting_point(u, y) -> tuple[float, float, float]:
    """Best (E, A, alpha) over a grid of alpha, with E and A from linear least squares."""
    best, best_sse = None, math.inf
    for alpha in np.geomspace(0.02, 3.0, 40):
        design = np.stack([np.ones_like(u), u ** (-alpha)], axis=1)
        (floor, amplitude), *_ = np.linalg.lstsq(design, y, rcond=None)
        if not (0.0 <= floor < y.min() and amplitude > 0):
            continue
        sse = float(np.sum((design @ [floor, amplitude] - y) ** 2))
        if sse < best_sse:
            best, best_sse = (float(floor), float(amplitude), float(alpha)), sse
    if best is None:
        raise IllConditioned(
            "no starting point with 0 <= E < min(loss) and A > 0 (loss does not fall with x)"
        )
    return best


def fit_power_law(x, y, x_ref: float | None = None) -> LossCurve:
    """Saturating power law by curve_fit; raises IllConditioned (with the reason) when unsound."""
    x, y = _xy(x, y)
    distinct = np.unique(x).size
    if distinct < 4:
        raise IllConditioned(f"only {distinct} distinct x values; a 3-parameter curve needs at least 4")
    x_ref = geometric_middle(x) if x_ref is None else x_ref
    u = x / x_ref
    p0 = _starting_point(u, y)
    lower = [0.0, 0.0, ALPHA_BOUNDS[0]]
    upper = [float(y.min()), np.inf, ALPHA_BOUNDS[1]]
    p0 = np.clip(p0, lower, [upper[0] * (1 - 1e-9), np.inf, upper[2]])
    with warnings.catch_warnings():
        warnings.simplefilter("error", OptimizeWarning)
        try:
            params, cov = curve_fit(_model, u, y, p0=p0, jac=_jacobian, bounds=(lower, upper), max_nfev=2000)
        except (RuntimeError, ValueError, OptimizeWarning) as exc:
            raise IllConditioned(f"curve_fit did not converge ({str(exc).splitlines()[0]})") from None
    floor, amplitude, exponent = (float(v) for v in params)
    if not np.all(np.isfinite(cov)):
        raise IllConditioned("curve_fit returned no finite covariance")
    span = float(y.max() - y.min()) or 1.0
    if floor <= 1e-6 * span:
        raise IllConditioned("floor E pinned at 0 (the data look like a pure power law)")
    if floor >= y.min() - 1e-6 * span:
        raise IllConditioned("floor E pinned at the lowest observed loss")
    if not ALPHA_BOUNDS[0] * 1.001 < exponent < ALPHA_BOUNDS[1] * 0.999:
        raise IllConditioned(f"exponent alpha pinned at a bound ({exponent:.3g})")
    errors = np.sqrt(np.diag(cov))
    for name, value, err in zip(("E", "A", "alpha"), (floor, amplitude, exponent), errors):
        if err > abs(value):
            raise IllConditioned(f"{name} is not determined (standard error {err:.3g} > value {value:.3g})")
    return LossCurve(POWER_LAW, floor, amplitude, exponent, x_ref)


def fit_log_line(x, y, x_ref: float | None = None, note: str = "") -> LossCurve:
    """Straight line in log-log space: L = A (x / x_ref)^(-alpha), floor 0."""
    x, y = _xy(x, y)
    if np.unique(x).size < 2:
        raise EfficiencyError("a log-log line needs at least 2 distinct x values")
    x_ref = geometric_middle(x) if x_ref is None else x_ref
    slope, intercept = np.polyfit(np.log(x / x_ref), np.log(y), 1)
    return LossCurve(LOG_LINE, 0.0, float(np.exp(intercept)), float(-slope), x_ref, note)


def fit_loss_curve(x, y, x_ref: float | None = None) -> LossCurve:
    """Power law when well conditioned, else the log-log line with the reason in ``note``."""
    try:
        return fit_power_law(x, y, x_ref)
    except IllConditioned as exc:
        return fit_log_line(x, y, x_ref, note=f"power-law fit ill-conditioned: {exc}; used a log-log line")


def refit(curve: LossCurve, x, y) -> LossCurve:
    """Refit the same kind of curve to resampled data, starting from ``curve`` (fast path)."""
    if curve.kind == LOG_LINE:
        return fit_log_line(x, y, curve.x_ref)
    u = np.asarray(x, dtype=float) / curve.x_ref
    y = np.asarray(y, dtype=float)
    p0 = (curve.floor, curve.amplitude, curve.exponent)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OptimizeWarning)
        params, _ = curve_fit(
            _model, u, y, p0=p0, jac=_jacobian, method="lm", maxfev=2000, check_finite=False
        )
        floor, amplitude, exponent = (float(v) for v in params)
        if not (0.0 <= floor and amplitude > 0 and ALPHA_BOUNDS[0] <= exponent <= ALPHA_BOUNDS[1]):
            # Left the admissible region unconstrained: redo with bounds.
            upper = [float(y.min()), np.inf, ALPHA_BOUNDS[1]]
            start = np.clip(p0, [0.0, 0.0, ALPHA_BOUNDS[0]], [upper[0] * (1 - 1e-9), np.inf, upper[2]])
            params, _ = curve_fit(
                _model,
                u,
                y,
                p0=start,
                jac=_jacobian,
                bounds=([0.0, 0.0, ALPHA_BOUNDS[0]], upper),
                max_nfev=2000,
            )
    return LossCurve(POWER_LAW, *(float(v) for v in params), curve.x_ref)


def size_ratio(baseline: LossCurve, candidate: LossCurve, x):
    """R(x) = x / L_b^{-1}(L_c(x)); 0 where the candidate is below the baseline's floor."""
    x = np.asarray(x, dtype=float)
    needed = baseline.x_for_loss(candidate.loss(x))
    return np.where(np.isfinite(needed), x / np.where(np.isfinite(needed), needed, 1.0), 0.0)


MAX_FAILED_SHARE = 0.025
MAX_SPREAD = 4.0
APPROXIMATE_BELOW = 10


@dataclass
class Comparison:
    axis: str
    baseline: str
    candidate: str
    x_mid: float
    ratio: float
    ci_low: float
    ci_high: float
    resamples: int
    failed_resamples: int
    n_seeds: int
    determined: bool = True
    reason: str = ""
    needed_x: float = math.nan
    grid_x: np.ndarray = field(repr=False, default=None)
    grid_ratio: np.ndarray = field(repr=False, default=None)
    grid_low: np.ndarray = field(repr=False, default=None)
    grid_high: np.ndarray = field(repr=False, default=None)
    grid_inside: np.ndarray = field(repr=False, default=None)  # where the baseline's answer was swept

    @property
    def approximate(self) -> bool:
        return self.n_seeds < APPROXIMATE_BELOW

    def sentence(self) -> str:
        if not self.determined:
            return f"{self.candidate} vs {self.baseline}: not determined by this sweep ({self.reason})"
        noun = AXIS_NOUNS[self.axis]
        label = "approximate 95% CI" if self.approximate else "95% CI"
        return (
            f"{self.candidate} reaches {self.baseline}'s loss with {100 * self.ratio:.0f}% "
            f"({label} {100 * self.ci_low:.0f}-{100 * self.ci_high:.0f}%) of its {noun} at this scale"
        )


Cells = dict  # x value -> {seed: final loss} (or a 1-d array, seeds by position)


def _by_seed(cells: Cells) -> dict[float, dict]:
    return {
        float(x): (dict(v) if isinstance(v, dict) else dict(enumerate(np.asarray(v, dtype=float).tolist())))
        for x, v in cells.items()
    }


def _stack(cells: Cells, seeds=None) -> tuple[np.ndarray, np.ndarray]:
    """(x, loss) arrays; with ``seeds``, one point per drawn seed the cell holds (repeats kept)."""
    xs, ys = [], []
    for x, per_seed in sorted(_by_seed(cells).items()):
        for seed in per_seed if seeds is None else [s for s in seeds if s in per_seed]:
            xs.append(x)
            ys.append(float(per_seed[seed]))
    return np.array(xs, dtype=float), np.array(ys, dtype=float)


def check_pair(baseline: LossCurve, candidate: LossCurve, x_mid: float, swept: tuple[float, float]) -> str:
    """The first check a pair of fits fails ('' when none): the loss must fall with x for both
    (exponent > 0; an exponent of exactly 0 is a flat curve) and the baseline's required size
    x_b(x_mid) must lie inside its swept range."""
    for curve, who in ((baseline, "baseline"), (candidate, "candidate")):
        if not curve.exponent > 0:
            return f"the {who}'s loss does not fall with x (fitted exponent {curve.exponent:.3g})"
    needed = float(baseline.x_for_loss(candidate.loss(x_mid)))
    if not swept[0] <= needed <= swept[1]:
        side = "above" if needed > swept[1] else "below"
        return (
            f"the baseline would need x = {needed:.3g} for the candidate's loss at {x_mid:.3g}, "
            f"{side} its swept range {swept[0]:.3g}-{swept[1]:.3g}"
        )
    return ""


def _failed_side(reason: str) -> float:
    """Where a draw that failed a check lies: -inf (the candidate looks better than any ratio
    the sweep can measure: the baseline's loss does not fall, or it would need more than its
    largest size), +inf (the reverse), or 0 (unknown: a fit that did not converge)."""
    if "baseline's loss does not fall" in reason or "above its swept range" in reason:
        return -math.inf
    if "candidate's loss does not fall" in reason or "below its swept range" in reason:
        return math.inf
    return 0.0


def bootstrap_ratio(
    baseline_cells: Cells,
    candidate_cells: Cells,
    baseline_fit: LossCurve,
    candidate_fit: LossCurve,
    x_points,
    resamples: int = 1000,
    seed: int = 0,
):
    """Bootstrap R at ``x_points`` (x_points[0] = x_mid), seeds resampled jointly across all cells.

    Returns (ratios of every draw, [draws, points]; number failed). A draw that fails a fit or
    :func:`check_pair` is kept as an extreme value on the side it points to (-inf or +inf at
    every point; an unknown side alternates), never dropped: dropping them would empty one tail.
    """
    rng = np.random.default_rng(seed)
    x_points = np.atleast_1d(np.asarray(x_points, dtype=float))
    seeds = sorted(
        {s for cells in (baseline_cells, candidate_cells) for v in _by_seed(cells).values() for s in v}
    )
    swept = (min(baseline_cells), max(baseline_cells))
    draws, failed = [], 0
    for _ in range(resamples):
        drawn = [seeds[i] for i in rng.integers(0, len(seeds), len(seeds))]
        try:
            base = refit(baseline_fit, *_stack(baseline_cells, drawn))
            cand = refit(candidate_fit, *_stack(candidate_cells, drawn))
            reason = check_pair(base, cand, x_points[0], swept)
        except (RuntimeError, ValueError, TypeError, EfficiencyError):
            reason = "fit failed"
        if reason:
            side = _failed_side(reason) or (math.inf if failed % 2 else -math.inf)
            failed += 1
            draws.append(np.full(x_points.size, side))
            continue
        draws.append(np.atleast_1d(size_ratio(base, cand, x_points)))
    return np.array(draws).reshape(-1, x_points.size), failed


def _matched_fits(baseline_name, baseline_cells, candidate_name, candidate_cells):
    base_fit = fit_loss_curve(*_stack(baseline_cells))
    cand_fit = fit_loss_curve(*_stack(candidate_cells))
    # Compare like with like: when one curve had to fall back, both use the log-log line.
    if base_fit.kind != cand_fit.kind:
        if base_fit.kind == POWER_LAW:
            base_fit = fit_log_line(
                *_stack(baseline_cells), note=f"log-log line to match {candidate_name}'s fallback"
            )
        else:
            cand_fit = fit_log_line(
                *_stack(candidate_cells), note=f"log-log line to match {baseline_name}'s fallback"
            )
    return base_fit, cand_fit


def _undetermined_reason(failed: int, resamples: int, low: float, high: float) -> str:
    if failed >= MAX_FAILED_SHARE * resamples:
        return f"{failed} of {resamples} bootstrap draws failed a check (limit {100 * MAX_FAILED_SHARE:g}%)"
    if not (math.isfinite(low) and math.isfinite(high)):
        return f"failed bootstrap draws reach the interval's end ({low:.3g}-{high:.3g}): unbounded"
    if not (low > 0 and high / low <= MAX_SPREAD):
        return f"the interval {low:.3g}-{high:.3g} spans more than a factor {MAX_SPREAD:g}"
    return ""


def _fill_interval(result: Comparison, draws: np.ndarray, n_all: int, level: float) -> None:
    """Order-statistic percentile interval of the draws (failed draws sit at -inf or +inf), with
    the deviations from the point estimate scaled by t_{q, n-1} / z_q: a t calibration of the
    percentile bootstrap for n seeds (measured in tests/test_efficiency.py)."""
    q = 0.5 + level / 2
    scale = float(stats.t.ppf(q, max(n_all - 1, 1)) / stats.norm.ppf(q)) * math.sqrt(
        n_all / max(n_all - 1, 1)
    )
    point = np.concatenate([[result.ratio], result.grid_ratio])
    with np.errstate(invalid="ignore"):
        draws = np.where(np.isfinite(draws), point + (draws - point) * scale, draws)
    ordered = np.sort(draws, axis=0)
    m = ordered.shape[0]
    low = ordered[max(0, math.floor((1 - q) * m)), :]
    high = ordered[min(m - 1, math.ceil(q * m) - 1), :]
    result.ci_low, result.ci_high = float(low[0]), float(high[0])
    result.grid_low, result.grid_high = low[1:], high[1:]


def compare(
    baseline_name: str,
    baseline_cells: Cells,
    candidate_name: str,
    candidate_cells: Cells,
    axis: str,
    resamples: int = 1000,
    seed: int = 0,
    level: float = 0.95,
) -> tuple[Comparison, LossCurve, LossCurve]:
    """Fit both curves, the ratio at the candidate's middle x, its joint-seed bootstrap interval,
    and whether the sweep determines it (see the module docstring)."""
    if axis not in AXIS_NOUNS:
        raise EfficiencyError(f"sweep axis must be one of {sorted(AXIS_NOUNS)}, got {axis!r}")
    for name, cells in ((baseline_name, baseline_cells), (candidate_name, candidate_cells)):
        if len(cells) < 3:
            raise EfficiencyError(f"{name}: needs at least 3 distinct {axis} values, found {len(cells)}")
    base_fit, cand_fit = _matched_fits(baseline_name, baseline_cells, candidate_name, candidate_cells)
    xs = np.array(sorted(candidate_cells), dtype=float)
    x_mid = geometric_middle(xs)
    grid = np.geomspace(xs.min(), xs.max(), 40)
    n_seeds = min(len(v) for cells in (baseline_cells, candidate_cells) for v in _by_seed(cells).values())
    nan = math.nan
    result = Comparison(
        axis, baseline_name, candidate_name, x_mid, nan, nan, nan, resamples, 0, n_seeds, grid_x=grid
    )
    reason = check_pair(base_fit, cand_fit, x_mid, (min(baseline_cells), max(baseline_cells)))
    if reason:
        result.determined, result.reason = False, reason
        return result, base_fit, cand_fit
    result.ratio = float(size_ratio(base_fit, cand_fit, x_mid))
    result.needed_x = float(base_fit.x_for_loss(cand_fit.loss(x_mid)))
    result.grid_ratio = size_ratio(base_fit, cand_fit, grid)
    swept = (min(baseline_cells), max(baseline_cells))
    needed = np.asarray(base_fit.x_for_loss(cand_fit.loss(grid)), dtype=float)
    result.grid_inside = (needed >= swept[0]) & (needed <= swept[1])  # the band is drawn only here
    draws, result.failed_resamples = bootstrap_ratio(
        baseline_cells, candidate_cells, base_fit, cand_fit, np.concatenate([[x_mid], grid]), resamples, seed
    )
    if result.failed_resamples == resamples:
        result.determined, result.reason = False, f"all {resamples} bootstrap draws failed a check"
        return result, base_fit, cand_fit
    n_all = len(
        {k for cells in (baseline_cells, candidate_cells) for v in _by_seed(cells).values() for k in v}
    )
    _fill_interval(result, draws, n_all, level)
    result.reason = _undetermined_reason(result.failed_resamples, resamples, result.ci_low, result.ci_high)
    result.determined = not result.reason
    return result, base_fit, cand_fit
