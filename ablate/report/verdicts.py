"""The verdicts on the primary metric: one per primary comparison, each with its direction (tested
alone at 0.05, Holm across the grid's primary comparisons) kept apart from its precision (the
half-width against ``grid.resolution``).

A primary comparison is a contrast of cells on the primary metric: ``cell - reference`` in a
pairwise grid, a main effect or interaction in a factorial one (``primary_contrasts``); the seed
rounds (``ablate.rounds``) plan on exactly these. Its interval is the paired t interval, or
Stein's two-stage interval when the grid ran seed rounds (``ablate.stats.two_stage_interval``).

On a drill, recall can form abruptly in some seeds only; then the area under the accuracy curve is
close to a count of lucky seeds and a t interval misleads. So a drill comparison also carries:
formation as a paired yes/no outcome per seed (``<family>/half_reached``; exact McNemar test on the
seeds where the designs disagree), the tokens to the halfway level with censoring kept
(Kaplan-Meier median per cell; a paired sign test that counts "not reached by the budget" as
later than any reached time), and it is never resolved while fewer than half of the seeds formed
in any cell it compares.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ablate.cells import Cell
from ablate.factors import Contrast, effect_contrasts
from ablate.stats import censored_sign_test, holm, km_median, paired_binary_test, seeds_needed_range

from .effects import Estimate, estimate, pair_contrasts

__all__ = [
    "Verdict",
    "Formation",
    "Timing",
    "primary_contrasts",
    "primary_estimates",
    "primary_verdicts",
    "formation_family",
]


@dataclass
class Formation:
    """Seeds that reached the halfway level, per cell of the comparison, and the exact test."""

    formed: dict  # cell -> (formed seeds, seeds)
    only_cell: int | None = None  # pairs only: seeds where only the cell formed it
    only_reference: int | None = None
    p: float = math.nan

    @property
    def enough(self) -> bool:
        """At least half of the seeds formed it in every cell compared."""
        return all(2 * k >= n > 0 for k, n in self.formed.values())


@dataclass
class Timing:
    """Tokens to the halfway level: Kaplan-Meier median per cell (with its interval, NaN where not
    defined) and, for a pair, the censored sign test."""

    budget: float
    medians: dict  # cell -> (median, low, high)
    cell_sooner: int | None = None
    reference_sooner: int | None = None
    p: float = math.nan


@dataclass
class Verdict:
    estimate: Estimate
    method: str  # "paired t" | "two-stage t"
    family: int  # comparisons in the Holm family of the headline
    resolution: float | None
    seeds_needed: tuple | None = None
    seeds_note: str = ""
    formation: Formation | None = None
    timing: Timing | None = None
    reduced: str = ""
    censored: str = ""

    @property
    def contrast(self) -> Contrast:
        return self.estimate.contrast

    @property
    def half(self) -> float:
        e = self.estimate
        return (e.high - e.low) / 2 if math.isfinite(e.low) else math.nan

    @property
    def status(self) -> str:
        """``clear`` | ``unclear`` | ``no spread`` | ``one seed`` | ``missing`` | ``censored``."""
        if self.censored:
            return "censored"
        if self.estimate.status != "estimated":
            return self.estimate.status
        return "clear" if self.estimate.p_holm < 0.05 else "unclear"

    @property
    def precision(self) -> str:
        """``resolved`` | ``not resolved`` | ``formation incomplete`` | ``no interval``."""
        if self.estimate.status != "estimated" or not math.isfinite(self.half) or self.resolution is None:
            return "no interval"  # no spread (never "resolved"), one seed, missing cells
        if self.formation is not None and not self.formation.enough:
            return "formation incomplete"
        return "resolved" if self.half <= self.resolution else "not resolved"


def primary_contrasts(factors: list, refs: dict[Cell, Cell]) -> list[Contrast]:
    """The grid's primary comparisons: a factorial grid's main effects and interactions, else
    every cell against its reference."""
    if factors:
        return [k for k in effect_contrasts(factors) if k.kind != "simple"]
    return pair_contrasts(refs)


def formation_family(metric: str) -> str | None:
    """``drill`` for ``drill/auc``: the family whose ``half_reached`` flags say where recall formed."""
    family = metric.split("/", 1)[0]
    return family if "/" in metric and family.startswith("drill") else None


def formation_of(by_cell: dict, contrast: Contrast, family: str) -> Formation | None:
    flags = {c: by_cell.get(c, {}).get(f"{family}/half_reached", {}) for c in contrast.cells}
    if not all(flags.values()):
        return None
    out = Formation({c: (sum(v > 0.5 for v in f.values()), len(f)) for c, f in flags.items()})
    if contrast.kind == "pair":
        cell, ref = contrast.cells
        seeds = sorted(set(flags[cell]) & set(flags[ref]))
        a = [flags[cell][s] > 0.5 for s in seeds]
        b = [flags[ref][s] > 0.5 for s in seeds]
        out.only_cell, out.only_reference, out.p = paired_binary_test(a, b)
    return out


def timing_of(by_cell: dict, contrast: Contrast, family: str, budget: float) -> Timing | None:
    key = f"{family}/tokens_to_half"
    flags = {c: by_cell.get(c, {}).get(f"{family}/half_reached", {}) for c in contrast.cells}
    if not all(flags.values()):
        return None
    times = {
        c: {s: by_cell[c].get(key, {}).get(s) if f[s] > 0.5 else None for s in f} for c, f in flags.items()
    }
    medians = {}
    for c, by_seed in times.items():
        observed = [t is not None for t in by_seed.values()]
        medians[c] = (
            km_median([budget if t is None else t for t in by_seed.values()], observed)
            if any(observed)
            else (math.nan, math.nan, math.nan)
        )
    out = Timing(budget, medians)
    if contrast.kind == "pair":
        cell, ref = contrast.cells
        seeds = sorted(set(times[cell]) & set(times[ref]))
        out.cell_sooner, out.reference_sooner, out.p = censored_sign_test(
            [times[cell][s] for s in seeds], [times[ref][s] for s in seeds], budget
        )
    return out


def _needed(e: Estimate, resolution: float | None) -> tuple[tuple | None, str]:
    if e.status == "no spread":
        return None, f"no spread across {e.n} seeds"
    if resolution is None:
        return None, "no resolution for this unit"
    if e.n < 3:
        return None, "needs >= 3 paired seeds to estimate"
    sd = float(np.std(list(e.values.values()), ddof=1))
    return seeds_needed_range(sd, e.n, resolution), ""


def primary_estimates(
    by_cell: dict, contrasts: list[Contrast], metric: str, first_stage: list | None
) -> list[Estimate]:
    """Each primary comparison's estimate, p-values Holm-adjusted across them (Holm, 1979).
    ``first_stage``: the seeds of a two-stage design's first round (Stein's interval), else None
    (paired t)."""
    values = {c: by_cell.get(c, {}).get(metric, {}) for c in by_cell}
    found = [estimate(values, contrast, metric, first_stage) for contrast in contrasts]
    for e, p in zip(found, holm([e.p for e in found])):
        e.p_holm = float(p)
    return found


def primary_verdicts(
    by_cell: dict,
    estimates: list[Estimate],
    resolution: float | None,
    two_stage: bool,
    budget: float = math.nan,
    notes: dict | None = None,
) -> list[Verdict]:
    """One verdict per primary comparison (the estimates of :func:`primary_estimates`), with the
    seeds a resolved interval would need and, on a drill, formation and timing. ``notes``:
    contrast -> (reduced, censored) words from the metric rows."""
    out = []
    for e in estimates:
        verdict = Verdict(e, "two-stage t" if two_stage else "paired t", len(estimates), resolution)
        verdict.seeds_needed, verdict.seeds_note = _needed(e, resolution)
        verdict.reduced, verdict.censored = (notes or {}).get(e.contrast, ("", ""))
        family = formation_family(e.metric)
        if family:
            verdict.formation = formation_of(by_cell, e.contrast, family)
            verdict.timing = timing_of(by_cell, e.contrast, family, budget)
        out.append(verdict)
    return out
