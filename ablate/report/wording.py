"""Words of a verdict: which way is better, direction and precision kept apart, and, on a drill,
formation and time to the halfway level. Pure functions of verdicts and a Report."""

from __future__ import annotations

import math

import numpy as np

from ablate.cells import Cell
from ablate.stats import seeds_needed

from .table import Report, better_direction
from .verdicts import Verdict

__all__ = [
    "count",
    "metric_words",
    "verdict_lines",
    "direction_text",
    "precision_text",
    "drill_text",
    "cell_names",
    "fmt",
]

METRIC_WORDS = {"final_val_loss": "final validation loss"}


def count(n: int, noun: str) -> str:
    """``1 seed``, ``2 seeds``."""
    return f"{n} {noun}{'' if n == 1 else 's'}"


def metric_words(metric: str) -> str:
    return METRIC_WORDS.get(metric, metric)


def unit(metric: str) -> str:
    return " nats" if "loss" in metric else ""


def fmt(value: float) -> str:
    """Three significant digits, or ``-`` for a missing number."""
    return f"{value:.3g}" if math.isfinite(value) else "-"


def tokens(value: float) -> str:
    if not math.isfinite(value):
        return "not defined"
    return f"{value / 1e6:.3g}M" if value >= 1e5 else f"{value:,.0f}"


def cell_names(cells: list[Cell]) -> dict[Cell, str]:
    """Short names: what sets each of two cells apart from the other, else each cell's values."""
    if len(cells) == 2:
        a, b = cells
        return {a: a.label(b), b: b.label(a)}
    return {c: ",".join(v for _, v in c.items) or str(c) for c in cells}


def _names(v: Verdict) -> tuple[str, str]:
    cell, ref = v.contrast.cells
    return cell.label(ref), ref.label(cell)


def comparison_text(v: Verdict) -> str:
    """``differential is worse than standard by 0.385 nats (95% CI 0.316 to 0.455; paired t, 4 seeds)``."""
    e, u = v.estimate, unit(v.estimate.metric)
    who, ref = _names(v)
    seeds = count(e.n, "seed")
    if e.status == "missing":
        return f"{who} against {ref}: no completed run of {', '.join(map(str, e.missing))}"
    if e.n == 0:
        return f"{who} against {ref}: no paired seeds"
    if e.status == "one seed":
        return f"{who} minus {ref}: {e.mean:+.3g}{u} on 1 seed: no interval"
    if e.status == "no spread":
        return (
            f"{who} minus {ref} is {e.mean:+.3g}{u} in every one of {e.n} seeds: "
            "no spread, so no interval exists"
        )
    better = better_direction(e.metric)
    ci = f"(95% CI {fmt(e.low)} to {fmt(e.high)}; {v.method}, {seeds})"
    if v.status == "clear":
        if better is None:
            way = "higher" if e.mean > 0 else "lower"
        else:
            way = "better" if (e.mean < 0) == (better == "lower") else "worse"
        low, high = (e.low, e.high) if e.mean >= 0 else (-e.high, -e.low)  # the interval of the "by"
        by_ci = f"(95% CI {fmt(low)} to {fmt(high)}; {v.method}, {seeds})"
        return f"{who} is {way} than {ref} by {abs(e.mean):.3g}{u} {by_ci}"
    return f"{who} minus {ref}: {e.mean:+.3g}{u} {ci}"


def direction_text(v: Verdict) -> str:
    if v.status in ("missing", "one seed", "no spread", "censored"):
        return "Direction: not tested."
    family = f"Holm across {v.family} comparisons, " if v.family > 1 else ""
    word = "clear" if v.status == "clear" else "unclear"
    return f"Direction: {word} ({family}p = {v.estimate.p_holm:.2g})."


def precision_text(v: Verdict) -> str:
    """The half-width against the resolution asked, and the seeds that would reach it."""
    if v.precision == "no interval":
        if v.estimate.status == "no spread":
            return "Precision: no interval exists (no spread across seeds); not resolved."
        return "Precision: no interval." if v.resolution is not None else "Precision: no resolution set."
    u = unit(v.estimate.metric)
    head = f"Precision: +/-{v.half:.2g}{u} against the +/-{v.resolution:g} asked"
    if v.precision == "formation incomplete":
        return head + "; not judged while fewer than half of the seeds formed recall in a cell compared."
    if v.precision == "resolved":
        return head + " (resolved)."
    if not v.seeds_needed:
        return head + f"; {v.seeds_note}." if v.seeds_note else head + "."
    sd = float(np.std(list(v.estimate.values.values()), ddof=1))
    about = seeds_needed(sd, v.resolution)[1]
    low, high = v.seeds_needed
    return head + f"; about {about} seeds ({low}-{high}) would reach it."


def drill_text(v: Verdict) -> list[str]:
    """Formation (k of n seeds per cell, exact McNemar) and tokens to halfway (Kaplan-Meier medians,
    censored sign test), for a pairwise drill verdict."""
    out = []
    f, t = v.formation, v.timing
    if f is not None:
        names = cell_names(list(f.formed))
        counts = "; ".join(f"{names[c]} {k} of {n}" for c, (k, n) in f.formed.items())
        text = f"Formed recall (reached halfway): {counts}"
        if f.only_cell is not None:
            disagree = count(f.only_cell + f.only_reference, "seed")
            text += f"; they disagree on {disagree}, exact McNemar p = {f.p:.2g}"
        out.append(text + ".")
    if t is not None:
        names = cell_names(list(t.medians))
        medians = "; ".join(
            f"{names[c]} {tokens(m)} (95% CI {tokens(lo)} to {tokens(hi)})"
            for c, (m, lo, hi) in t.medians.items()
        )
        censored = f"not reached = censored at {tokens(t.budget)}"
        text = f"Tokens to halfway, Kaplan-Meier median ({censored}): {medians}"
        if t.cell_sooner is not None:
            who, ref = _names(v)
            text += (
                f"; {who} sooner in {count(t.cell_sooner, 'seed')}, {ref} sooner in {t.reference_sooner}, "
                f"sign test p = {t.p:.2g}"
            )
        out.append(text + ".")
    return out


def verdict_lines(report: Report, v: Verdict) -> list[str]:
    """A verdict as printed: one sentence, then its direction, precision and drill lines indented."""
    first = f"{metric_words(report.metric)}: {comparison_text(v)}"
    if v.reduced:
        first += f" ({v.reduced})"
    if v.censored:
        return [
            f"{metric_words(report.metric)}: {_names(v)[0]} against {_names(v)[1]}: "
            f"{v.censored}: no interval."
        ]
    lines = [first + ".", f"  {direction_text(v)} {precision_text(v)}"]
    return lines + [f"  {line}" for line in drill_text(v)]


def _nearest(rows: list[dict], rule: str, **want) -> dict | None:
    found = [r for r in rows if r["rule"] == rule]
    if not found:
        return None
    return min(found, key=lambda r: sum(abs(math.log(r[k] / v)) for k, v in want.items() if v and r.get(k)))


def _rate(row: dict) -> str:
    return (
        f"covered the truth {row['coverage']:.3f} of the time (Monte-Carlo SE {row['coverage_se']:.3f}) and "
        f"called a direction that is not there {100 * row['false_direction']:.1f}% of the time "
        f"({row['reps']:,} simulations)"
    )


def trust_lines(report: Report, rows: list[dict]) -> list[str]:
    """The section "How far to trust these verdicts": the rules this grid used and how often each
    was wrong in the shipped simulations (``ablate.calibration``), nearest simulated setting."""
    verdicts = report.effect_verdicts if report.factors else report.verdicts
    n = max((v.estimate.n for v in verdicts), default=0)
    family = len(verdicts)
    out = [
        f"The primary metric ({report.metric}) is tested alone at 0.05"
        + (f", Holm across its {family} comparisons" if family > 1 else "")
        + "; the other metrics are secondary, Holm-adjusted within each comparison (the appendix).",
    ]
    if report.first_stage:
        first = [v.estimate.values[s] for v in verdicts for s in report.first_stage if s in v.estimate.values]
        s0 = float(np.std(first, ddof=1)) if len(first) > 1 else 0.0
        ratio = report.resolution / s0 if s0 > 0 and report.resolution else None
        cap = report.max_seeds or max(n, len(report.seeds))
        row = _nearest(rows, "two-stage", first_stage=len(report.first_stage), cap=cap, resolution_sd=ratio)
        out.append(
            f"Seeds: two-stage rounds (Stein 1945: {len(report.first_stage)} first-stage seeds fixed "
            "the total at "
            f"{len(report.seeds)}; Stein's interval)."
        )
        if row:
            out.append(
                f"In simulation (first stage {row['first_stage']}, cap {row['cap']}, resolution "
                f"{row['resolution_sd']:g} SD) this rule {_rate(row)}."
            )
    else:
        row = _nearest(rows, "fixed", seeds=max(n, 2))
        out.append(f"Seeds: a fixed {n} per cell, paired by seed; Student-t interval of the per-seed values.")
        if row:
            out.append(
                f"In simulation with normal differences at {row['seeds']} seeds this rule {_rate(row)}."
            )
    if any(v.formation is not None for v in verdicts):
        row = _nearest(rows, "formation", seeds=max(n, 2))
        if row:
            out.append(
                f"On a drill where recall forms in some seeds only (formed {row['formed_a']:.0%} against "
                f"{row['formed_b']:.0%} of seeds, {row['seeds']} seeds), the t interval on the area covered "
                f"{row['coverage']:.2f} and {100 * row['false_resolved_old']:.0f}% of grids would have "
                "looked resolved while missing the truth; with the rule that needs half of each cell's "
                f"seeds formed, {100 * row['false_resolved_new']:.1f}% did ({row['reps']:,} simulations). "
                "Read the formation "
                "counts and their exact test beside each verdict."
            )
    return out
