"""Words for a factorial grid: one sentence per effect of the primary metric, how each effect
moves over training, and the effects of every metric as a table. Pure functions of a Report."""

from __future__ import annotations

import math

from ablate.factors import Contrast

from . import wording
from .effects import Estimate, Trajectory
from .table import Report, better_direction

__all__ = [
    "effect_lines",
    "training_lines",
    "effects_table",
    "convention_line",
    "term_name",
    "contrast_name",
    "tokens_text",
]


def signed(value: float) -> str:
    return f"{value:+.3g}" if math.isfinite(value) else "-"


def tokens_text(tokens: float) -> str:
    return f"{tokens / 1e6:.3g}M" if tokens >= 1e5 else f"{tokens:,.0f}"


def _labels(report: Report) -> dict[str, str]:
    return {f.key: f.label for f in report.factors}


def _levels(report: Report, key: str) -> tuple[str, str]:
    f = next(f for f in report.factors if f.key == key)
    return f.label, f.reference


def term_name(report: Report, contrast: Contrast) -> str:
    """``head_norm True vs False``; ``attention x head_norm`` for an interaction of two-level
    factors (levels named where a factor has more than two)."""
    parts = []
    for key, level in contrast.terms:
        factor = next(f for f in report.factors if f.key == key)
        if contrast.kind == "interaction" and len(factor.levels) == 2:
            parts.append(factor.label)
        else:
            parts.append(f"{factor.label} {level} vs {factor.reference}")
    name = " x ".join(parts)
    if len(contrast.scope):
        name += f" (within {contrast.scope})"
    return name


def interval_text(e: Estimate) -> str:
    if e.status == "no spread":
        return f"{signed(e.mean)} in every seed (no spread: no interval)"
    if not math.isfinite(e.low):
        return f"{signed(e.mean)} (no interval: {e.status})"
    return f"{signed(e.mean)} (95% CI {signed(e.low)} to {signed(e.high)})"


def clear(e: Estimate) -> bool:
    """Direction clear: the Holm-adjusted p (primary family) or, outside it, the p-value below 0.05."""
    p = e.p_holm if math.isfinite(e.p_holm) else e.p
    return math.isfinite(p) and p < 0.05


def judgement(e: Estimate, better: str | None) -> str:
    """``better``/``worse`` (or ``higher``/``lower`` for a metric with no better way) when the
    direction is clear; an interaction is ``clear`` or not (its sign has no better way)."""
    if e.status != "estimated":
        return e.status
    if not clear(e):
        return "direction unclear"
    if e.contrast.kind == "interaction":
        return "clear"
    if better is None:
        return "higher" if e.mean > 0 else "lower"
    good = (e.mean < 0) == (better == "lower")
    return "better" if good else "worse"


def _simple(report: Report, interaction: Estimate) -> list[Estimate]:
    """The simple effects of the interaction's first factor at the second factor's reference
    level and at its level in the interaction, in that order."""
    (a_key, a_level), (b_key, b_level) = interaction.contrast.terms
    b_ref = next(f.reference for f in report.factors if f.key == b_key)
    found = {
        e.contrast.at[0][1]: e
        for e in report.effects
        if e.metric == interaction.metric
        and e.contrast.kind == "simple"
        and e.contrast.terms == ((a_key, a_level),)
        and e.contrast.at
        and e.contrast.at[0][0] == b_key
        and e.contrast.scope == interaction.contrast.scope
    }
    return [found[v] for v in (b_ref, b_level) if v in found]


def interaction_reading(report: Report, e: Estimate, better: str | None) -> str:
    """The two simple effects behind a two-factor interaction, and what they say together."""
    if len(e.contrast.terms) != 2:
        return ""
    simple = _simple(report, e)
    if len(simple) != 2:
        return ""
    a_label, a_ref = _levels(report, e.contrast.terms[0][0])
    a_level = e.contrast.terms[0][1]
    b_label = _labels(report)[e.contrast.terms[1][0]]
    parts = [f"{interval_text(s)} with {b_label}={s.contrast.at[0][1]}" for s in simple]
    words = [judgement(s, better) for s in simple]
    text = f"simple effects (not adjusted): {a_label} {a_level} vs {a_ref} is " + " and ".join(parts)
    if better and words.count("better") == 1 and "worse" not in words:
        at = simple[words.index("better")].contrast.at[0][1]
        text += f": {a_level} helps only with {b_label}={at}"
    elif better and words.count("worse") == 1 and "better" not in words:
        at = simple[words.index("worse")].contrast.at[0][1]
        text += f": {a_level} hurts only with {b_label}={at}"
    elif better and sorted(words) == ["better", "worse"]:
        text += f": {a_level} helps with one level of {b_label} and hurts with the other"
    elif better and words[0] == words[1] and words[0] in ("better", "worse"):
        more = simple[int(abs(simple[1].mean) > abs(simple[0].mean))].contrast.at[0][1]
        verb = "helps" if words[0] == "better" else "hurts"
        text += f": {a_level} {verb} at both levels, more with {b_label}={more}"
    return text


def effect_sentence(report: Report, e: Estimate) -> str:
    better = better_direction(e.metric)
    name = term_name(report, e.contrast)
    if e.status == "missing":
        return f"{name}: not estimated: no completed run of {', '.join(map(str, e.missing))}"
    over = f", averaged over {' and '.join(e.contrast.averaged_over)}" if e.contrast.averaged_over else ""
    text = f"{name}{over}: {interval_text(e)}: {judgement(e, better)}"
    if e.contrast.kind == "interaction":
        reading = interaction_reading(report, e, better)
        text += f"; {reading}" if reading else ""
    return text


def primary_effects(report: Report) -> list[Estimate]:
    return [e for e in report.effects if e.metric == report.metric and e.contrast.kind != "simple"]


def effect_lines(report: Report) -> list[str]:
    """The first screen of a factorial report: what was measured, then one sentence per effect."""
    effects = primary_effects(report)
    seeds = sorted({e.n for e in effects if e.n})
    better = better_direction(report.metric)
    way = f" ({better} is better)" if better else ""
    shape = "x".join(str(len(f.levels)) for f in report.factors)
    design = " x ".join(f"{f.label} ({', '.join(f.levels)})" for f in report.factors)
    head = (
        f"{wording.metric_words(report.metric)}{way}: {shape} factorial, {design}, "
        f"{'/'.join(map(str, seeds)) or 0} seeds; per-seed contrasts with 95% t intervals; "
        f"direction at 0.05 after Holm across {len(effects)} effects"
    )
    lines = [head] + [f"  {effect_sentence(report, e)}" for e in effects]
    if report.missing:
        lines.append(f"  missing from the factorial: {', '.join(map(str, report.missing))}")
    return lines + precision_lines(report)


def precision_lines(report: Report) -> list[str]:
    """The widest effect's precision against the resolution asked, and on a drill where recall
    formed (a precision is not judged while fewer than half of a cell's seeds formed it)."""
    shown = [v for v in report.effect_verdicts if v.precision != "no interval"]
    out = []
    if shown:
        widest = max(shown, key=lambda v: v.half)
        out.append(f"  {wording.precision_text(widest).replace('Precision:', 'Precision (widest effect):')}")
    formation = next((v.formation for v in report.effect_verdicts if v.formation is not None), None)
    if formation is not None:
        names = wording.cell_names(list(formation.formed))
        counts = "; ".join(f"{names[c]} {k} of {n}" for c, (k, n) in sorted(formation.formed.items()))
        out.append(f"  Formed recall (reached halfway): {counts}.")
    return out


def convention_line() -> str:
    return (
        "An interaction is the difference of the two simple effects (how much more the first factor "
        "changes the metric at the second factor's other level); the two-level textbook convention "
        "is half of it. A main effect is averaged over the other factors' levels."
    )


def contrast_name(report: Report, contrast: Contrast) -> str:
    """An effect's name, or ``cell vs reference`` for a pairwise difference."""
    if contrast.kind == "pair":
        cell, ref = contrast.cells
        return f"{cell.label(ref)} vs {ref.label(cell)}"
    return term_name(report, contrast)


def training_sentence(report: Report, t: Trajectory) -> str:
    name = contrast_name(report, t.contrast)
    pts = t.points
    first, last = pts[0], pts[-1]
    text = (
        f"{name}: {signed(first[1].mean)} at {tokens_text(first[0])} tokens, "
        f"{interval_text(last[1])} at {tokens_text(last[0])}"
    )
    change = t.sign_change()
    if change == "clear":
        text += "; changes sign (intervals on both sides of zero)"
    elif change == "estimate":
        text += "; the estimate crosses zero (not clearly)"
    settled = t.settled_from()
    if settled is not None:
        text += f"; settled from {tokens_text(settled)} tokens on"
    else:
        text += "; not settled within the budget"
    return text


def training_lines(report: Report) -> list[str]:
    shown = [
        t for t in report.over_training if t.contrast.kind in ("main", "interaction", "pair") and t.points
    ]
    if not shown:
        return []
    lines = [f"over training ({report.metric} at each of {len(shown[0].points)} evaluation points):"]
    return lines + [f"  {training_sentence(report, t)}" for t in shown]


def effects_table(report: Report) -> tuple[list[str], list[list[str]]]:
    """Every metric's main effects and interactions: (header, rows) for a Markdown table."""
    header = ["metric", "effect", "estimate [95% CI]", "seeds", "p", "p (Holm)", "reading"]
    rows = []
    for e in report.effects:
        if e.contrast.kind == "simple":
            continue
        ci = f"[{signed(e.low)}, {signed(e.high)}]" if math.isfinite(e.low) else "-"
        rows.append(
            [
                f"`{e.metric}`",
                term_name(report, e.contrast),
                f"{signed(e.mean)} {ci}",
                str(e.n),
                f"{e.p:.3g}" if math.isfinite(e.p) else "-",
                f"{e.p_holm:.3g}" if math.isfinite(e.p_holm) else "-",
                judgement(e, better_direction(e.metric)),
            ]
        )
    return header, rows
