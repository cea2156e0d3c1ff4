"""Factorial effects of a grid, at the final budget and over training.

Each effect is a contrast of cell values (``ablate.factors``) computed per seed; the seeds'
contrast values give a Student-t interval and a one-sample t-test (``ablate.stats.mean_test``),
so the pairing by seed is kept. The primary metric's main effects and interactions form one
family: their p-values are Holm-adjusted together (Holm, 1979).

Over training, the same contrasts are taken of the logged curves at every evaluation point the
runs share (``loss/val`` for ``final_val_loss``; for ``drill/auc`` the area under ``drill/acc``
up to that point), with an interval at each point.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ablate import curves
from ablate.cells import Cell
from ablate.factors import Contrast, Factor, contrast_values, effect_contrasts, pair_contrast
from ablate.stats import holm, mean_test, two_stage_interval

__all__ = [
    "Estimate",
    "Trajectory",
    "estimate",
    "effect_estimates",
    "missing_cells",
    "trajectories",
    "curve_of",
]


@dataclass
class Estimate:
    """One contrast on one metric: per-seed values, their mean, 95% t interval and p-value."""

    contrast: Contrast
    metric: str
    values: dict = field(default_factory=dict)  # seed -> contrast value
    mean: float = math.nan
    low: float = math.nan
    high: float = math.nan
    p: float = math.nan
    p_holm: float = math.nan
    missing: tuple = ()  # cells the contrast needs that have no completed run

    @property
    def n(self) -> int:
        return len(self.values)

    @property
    def status(self) -> str:
        if self.missing:
            return "missing"
        if self.n == 0:
            return "no seeds"
        if self.n == 1:
            return "one seed"
        return "no spread" if not math.isfinite(self.p) else "estimated"


def estimate(
    values: dict[Cell, dict], contrast: Contrast, metric: str, first_stage: list | None = None
) -> Estimate:
    """The contrast's estimate from ``cell -> seed -> value`` (cells without values are missing):
    the paired t interval across seeds, or, with ``first_stage`` (the first round's seeds of a
    two-stage design, all present), Stein's interval (``ablate.stats.two_stage_interval``)."""
    missing = tuple(c for c in contrast.cells if not values.get(c))
    out = Estimate(contrast, metric, missing=missing)
    if missing:
        return out
    out.values = contrast_values(values, contrast)
    if not out.values:
        return out
    first = [s for s in (first_stage or []) if s in out.values]
    if first_stage and len(first) == len(first_stage) and len(first) >= 2:
        ordered = first + [s for s in out.values if s not in first]
        out.mean, out.low, out.high, out.p = two_stage_interval([out.values[s] for s in ordered], len(first))
    else:
        out.mean, out.low, out.high, out.p = mean_test(list(out.values.values()))
    return out


def missing_cells(values: dict[Cell, dict], factors: list[Factor]) -> list[Cell]:
    """Cells of the factorial that no completed run stands for (never run, failed or diverged)."""
    needed = dict.fromkeys(c for k in effect_contrasts(factors) for c in k.cells)
    return [c for c in needed if not values.get(c)]


def effect_estimates(
    by_cell: dict, factors: list[Factor], metrics: list[str], primary: str, first_stage: list | None = None
) -> list[Estimate]:
    """Every effect (and simple effect) on every metric; Holm across the primary metric's main
    effects and interactions. ``first_stage``: a two-stage design's first seeds (the primary
    metric's intervals are then Stein's)."""
    contrasts = effect_contrasts(factors)
    rows = [
        estimate(
            {c: by_cell.get(c, {}).get(m, {}) for c in by_cell}, k, m, first_stage if m == primary else None
        )
        for m in metrics
        for k in contrasts
    ]
    family = [r for r in rows if r.metric == primary and r.contrast.kind != "simple"]
    for row, p in zip(family, holm([r.p for r in family])):
        row.p_holm = float(p)
    for contrast in contrasts:  # secondary metrics: Holm within each effect, across the metrics
        if contrast.kind == "simple":
            continue
        group = [r for r in rows if r.contrast == contrast and r.metric != primary]
        for row, p in zip(group, holm([r.p for r in group])):
            row.p_holm = float(p)
    return rows


# --- over training ---------------------------------------------------------------------------


def curve_of(scalars: dict, metric: str) -> tuple[np.ndarray, np.ndarray] | None:
    """The logged curve behind ``metric`` for one run (tokens, values), or None."""
    if metric == "final_val_loss":
        return scalars.get("loss/val")
    if metric == "drill/auc":
        acc, level = scalars.get("drill/acc"), scalars.get("drill/copy_level")
        if acc is None or level is None or not acc[0].size:
            return None
        tokens, values = acc
        areas = [
            curves.normalised_area(tokens[: i + 1], values[: i + 1], t, float(level[1][-1]))
            for i, t in enumerate(tokens)
            if t > 0
        ]
        return tokens[tokens > 0], np.array(areas)
    return scalars.get(metric) or scalars.get(f"probe/{metric}")


@dataclass
class Trajectory:
    """One contrast over training: (tokens, estimate) at every shared evaluation point."""

    contrast: Contrast
    metric: str
    points: list = field(default_factory=list)  # [(tokens, Estimate)]

    def settled_from(self) -> float | None:
        """The earliest evaluation point from which every later point's interval overlaps all the
        others' (a common value lies in all of them); None when no such point precedes the last."""
        for i, (tokens, _) in enumerate(self.points[:-1]):
            later = [e for _, e in self.points[i:] if math.isfinite(e.low)]
            if len(later) == len(self.points) - i and max(e.low for e in later) <= min(e.high for e in later):
                return tokens
        return None

    def sign_change(self) -> str:
        """``clear`` when one point's interval lies above zero and another's below it; ``estimate``
        when only the estimates change sign; '' when neither."""
        ests = [e for _, e in self.points if math.isfinite(e.mean)]
        if any(e.low > 0 for e in ests) and any(e.high < 0 for e in ests):
            return "clear"
        signs = {np.sign(e.mean) for e in ests if e.mean != 0}
        return "estimate" if len(signs) > 1 else ""


def _shared_points(curves_by_cell: dict[Cell, dict]) -> list[float]:
    steps = [set(map(float, c[0])) for per_seed in curves_by_cell.values() for c in per_seed.values()]
    return sorted(set.intersection(*steps)) if steps else []


def trajectories(
    runs: list, metric: str, contrasts: list[Contrast], first_stage: list | None = None
) -> list[Trajectory]:
    """Each contrast at each evaluation point every usable run logged (empty without curves), with
    the same interval rule as the verdicts (Stein's after seed rounds, ``first_stage``)."""
    by_cell: dict[Cell, dict] = {}
    for run in runs:
        curve = curve_of(run.scalars, metric) if run.usable else None
        if curve is not None and len(curve[0]):
            by_cell.setdefault(run.cell, {})[run.summary.seed] = curve
    points = _shared_points(by_cell)
    out = []
    for contrast in contrasts:
        if any(c not in by_cell for c in contrast.cells):
            continue
        traj = Trajectory(contrast, metric)
        for t in points:
            values = {
                c: {s: float(v[np.flatnonzero(s_ == t)[0]]) for s, (s_, v) in seeds.items()}
                for c, seeds in by_cell.items()
            }
            traj.points.append((t, estimate(values, contrast, metric, first_stage)))
        out.append(traj)
    return out


def pair_contrasts(refs: dict[Cell, Cell]) -> list[Contrast]:
    """``cell - reference`` for every cell that is not its own reference."""
    return [pair_contrast(c, r) for c, r in sorted(refs.items()) if c != r]
