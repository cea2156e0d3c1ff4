"""Pure functions of a :class:`~ablate.report.table.Report`: Markdown, CSV rows, console text."""

from __future__ import annotations

import math
import re

from ablate import calibration

from . import attribution, wording
from .table import LOSS, Report

__all__ = [
    "CSV_COLUMNS",
    "console",
    "csv_rows",
    "headline",
    "markdown",
    "named",
    "verdict_sentence",
    "markdown_table",
]

CSV_COLUMNS = [
    "cell",
    "metric",
    "kind",
    "n",
    "mean",
    "ci_low",
    "ci_high",
    "reference",
    "n_paired",
    "diff_to_baseline",
    "diff_ci_low",
    "diff_ci_high",
    "p_value",
    "p_holm",
    "resolution",
    "seeds_needed_low",
    "seeds_needed_high",
    "note",
]
HEADLINE_PER_FAMILY = 4


def num(value, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    if isinstance(value, int) or (isinstance(value, float) and value.is_integer() and abs(value) < 1e10):
        return f"{int(value):,}"
    return f"{value:.{digits}g}" if abs(value) >= 1e4 or abs(value) < 1e-3 else f"{value:.{digits}f}"


def signed(value: float) -> str:
    return f"{value:+.3g}"


def unit(metric: str) -> str:
    return " nats" if "loss" in metric else ""


def interval(low: float, high: float) -> str:
    return f"[{num(low)}, {num(high)}]" if math.isfinite(low) else "-"


def verdict_sentence(report: Report, v) -> str:
    """A verdict in one line (its sentence, direction and precision), for lists."""
    return " ".join(line.strip() for line in wording.verdict_lines(report, v)[:2])


def headline(report: Report) -> list[str]:
    """The first lines: a factorial grid's effects on the primary metric, else its verdicts."""
    if report.factors:
        return attribution.effect_lines(report) + replaced_lines(report)
    lines = [line for v in report.verdicts for line in wording.verdict_lines(report, v)]
    if not lines:
        return [f"only the baseline {report.baseline}: nothing to compare"]
    several = len(report.verdicts) > 1
    if several:
        lines.insert(
            0, f"{len(report.verdicts)} comparisons against the baseline; Holm across them for direction"
        )
    return lines + replaced_lines(report)


def replaced_lines(report: Report) -> list[str]:
    """Say where the command line replaced what the recipe declared."""
    out = []
    if report.metric_given and report.declared_metric and report.metric != report.declared_metric:
        out.append(
            f"  (--metric {report.metric} replaced the recipe's primary metric {report.declared_metric})"
        )
    if report.resolution_given and report.declared_resolution not in (None, report.resolution):
        out.append(
            f"  (--resolution {report.resolution:g} replaced the recipe's {report.declared_resolution:g})"
        )
    return out


def markdown_table(header: list[str], rows: list[list]) -> list[str]:
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    return lines + ["| " + " | ".join(str(c).replace("|", "/") for c in row) + " |" for row in rows]


def family_of(metric: str) -> str:
    return "loss" if metric == LOSS else metric.split("/", 1)[0]


SHARE_ORDER = ("pair", "lookalike", "filler", "other")  # the drill attention probe's categories


def headline_metrics(metrics: list[str], rows: list = ()) -> list[str]:
    """A family's first rows: its metrics without a layer or head index; for a per-layer family,
    the last layer's head averages (per-head values stay in the appendix). Metrics that are zero in
    every cell (filler shares of a drill without filler) are left to the appendix."""
    plain = [m for m in metrics if not re.search(r"\d", m)]
    if not plain:
        averaged = [m for m in metrics if "/head" not in m] or metrics
        last = max(_layer(m) for m in averaged)
        plain = [m for m in averaged if _layer(m) == last]
    zero = {m for m in plain if all(r.mean == 0 and r.no_spread for r in rows if r.metric == m)}
    plain = [m for m in plain if m not in zero] or plain  # without rows every metric counts as zero

    def order(m: str):
        leaf = m.rsplit("/", 1)[-1]
        share = next(
            (i for i, name in enumerate(SHARE_ORDER) if leaf.startswith(name + "_")), len(SHARE_ORDER)
        )
        return ("acc" not in leaf, share, m)

    return sorted(plain, key=order)[:HEADLINE_PER_FAMILY]


def _layer(metric: str) -> int:
    found = re.search(r"layer(\d+)", metric)
    return int(found.group(1)) if found else -1


def context_text(report: Report, cell: str, family: str) -> str:
    found = [
        c
        for c in report.context
        if c.cell == cell
        and c.key.startswith(family + "/")
        and (c.key.endswith("copy_level") or c.key.endswith("_reached"))
    ]
    parts = []
    for c in found:
        if c.key.endswith("_reached"):
            parts.append(f"{c.key.rsplit('/', 1)[-1]} in {sum(v > 0.5 for v in c.values)} of {len(c.values)}")
        else:
            parts.append(
                f"copy level {num(c.values[0])}" if len(set(c.values)) == 1 else f"copy level {c.values}"
            )
    return "; ".join(parts) or "-"


def mean_text(r) -> str:
    if r.censored or not r.n:
        return r.censored or "no completed seeds"
    if math.isfinite(r.ci_low) and r.ci_low == r.ci_high:
        return f"{num(r.mean)} (no spread across {r.n} seeds)"
    return f"{num(r.mean)} {interval(r.ci_low, r.ci_high)}"


def diff_text(r) -> str:
    if r.censored or not math.isfinite(r.diff):
        return "-"
    if r.no_spread:
        return f"{num(r.diff)} (no spread across {r.n_paired} seeds)"
    return f"{num(r.diff)} {interval(r.diff_low, r.diff_high)}"


def row_cells(r) -> list[str]:
    mean = mean_text(r)
    if r.is_reference:
        return [f"`{r.cell}` (reference)", mean, "-", "-"]
    return [f"`{r.cell}`", mean, diff_text(r), str(r.n_paired) + (" (reduced)" if r.reduced else "")]


def family_tables(report: Report) -> list[str]:
    metrics = list(dict.fromkeys(r.metric for r in report.rows))
    out = []
    for family in dict.fromkeys(family_of(m) for m in metrics):
        chosen = headline_metrics([m for m in metrics if family_of(m) == family], report.rows)
        body = [
            [f"`{r.metric}`", *row_cells(r), context_text(report, r.cell, family)]
            for m in chosen
            for r in report.rows
            if r.metric == m
        ]
        out += [f"### {family}", ""]
        header = ["metric", "cell", "mean [95% CI]", "paired diff [95% CI]", "paired n", "context"]
        out += markdown_table(header, body)
        out.append("")
    return out


def seeds_text(r) -> str:
    if r.seeds_needed:
        return f"{r.seeds_needed[0]}-{r.seeds_needed[1]} seeds for +/-{r.resolution:g}{unit(r.metric)}"
    return r.seeds_note or "-"


def rounds_line(report: Report) -> str:
    seeds = report.seeds
    span = (
        f"seeds {seeds[0]}-{seeds[-1]}"
        if seeds and seeds == list(range(seeds[0], seeds[-1] + 1))
        else "seeds " + ", ".join(map(str, seeds))
    )
    return f"{wording.count(report.rounds, 'round')} ran ({span})"


def fairness_lines(report: Report) -> list[str]:
    body = [
        [
            f"`{f.cell}`",
            num(f.values["params"]),
            f"{f.ratios['params']:.3f}",
            num(f.values["flops_per_token"]),
            f"{f.ratios['flops_per_token']:.3f}",
            num(f.values["tokens"]),
            f.budget_match or "-",
            f.flag or "-",
        ]
        for f in report.fairness
    ]
    return markdown_table(
        [
            "cell",
            "params",
            "params ratio",
            "FLOPs/token",
            "FLOPs ratio",
            "tokens",
            "budget matched by",
            "flag",
        ],
        body,
    )


def efficiency_lines(report: Report) -> list[str]:
    out = [f"- **{c.sentence()}.**" for c in report.efficiency]
    out += [
        f"  Compared at x = {c.x_mid:.4g}; the baseline needs {c.needed_x:.4g}; {c.resamples} joint-seed "
        f"bootstrap draws, {c.failed_resamples} failed a check."
        for c in report.efficiency
        if c.determined
    ]
    return out + [f"- {n}" for n in report.efficiency_notes]


def appendix(report: Report) -> list[str]:
    out = [
        f"- `{t.cell}` vs `{t.reference}`: {t.below} of {t.tested} below 0.05; about {0.05 * t.tested:.1f} "
        f"expected by chance; {t.below_holm} below 0.05 after Holm's adjustment."
        for t in report.tests
    ]
    body = [
        [f"`{r.metric}`", *row_cells(r), num(r.p_value), num(r.p_holm), seeds_text(r)] for r in report.rows
    ]
    return (
        out
        + [""]
        + markdown_table(
            [
                "metric",
                "cell",
                "mean [95% CI]",
                "paired diff [95% CI]",
                "paired n",
                "p",
                "p (Holm)",
                "seeds needed",
            ],
            body,
        )
    )


def images(plots: list[tuple[str, str]], *names: str) -> list[str]:
    """The named figures that were drawn, as Markdown images, in the order asked."""
    drawn = dict((name, title) for title, name in plots)
    return [f"![{drawn[n]}](plots/{n})" for n in names if n in drawn]


def bullets(lines: list[str], end: str = "") -> list[str]:
    """Markdown list items; an indented line becomes an item under the one before."""

    def item(ln: str) -> str:
        text = ln.strip()
        return text if text.endswith(".") else text + end

    return [f"  - {item(ln)}" if ln.startswith("  ") else f"- {item(ln)}" for ln in lines]


def attribution_section(report: Report, plots: list[tuple[str, str]]) -> list[str]:
    md = ["## What each part did", ""]
    md += [attribution.convention_line(), ""]
    md += images(plots, "interaction.png", "over_training.png", "tokens_to_half.png")
    header, rows = attribution.effects_table(report)
    md += [
        "",
        "### Effects on every metric",
        "",
        "Holm's adjustment runs over the primary metric's effects (one family), and for each effect "
        "over the secondary metrics.",
        "",
    ]
    return md + markdown_table(header, rows) + [""]


def markdown(report: Report, plots: list[tuple[str, str]]) -> str:
    title = "What each part of the design did" if report.factors else "Verdict"
    md = [
        f"# headtohead report: {report.name}",
        "",
        f"**{title}, on `{report.metric}`** (baseline `{report.baseline}`):",
        "",
    ]
    md += bullets(headline(report), end=".")
    md += [""] + bullets(attribution.training_lines(report)) + [""]
    if report.factors:
        md += attribution_section(report, plots)
        md += ["## Pairwise against the baseline", ""]
        md += [f"- {verdict_sentence(report, v)}" for v in report.verdicts] + [""]
    if not report.factors:
        md += images(plots, "paired_difference.png", "over_training.png", "tokens_to_half.png")
    md += ["", "## Probe families", ""]
    md += family_tables(report)
    md += ["## Cells and seeds", "", f"- {rounds_line(report)}; recipe {report.recipe or 'not stated'}."]
    md += [
        f"- `{c.name}`: {c.completed}/{c.launched} completed ({c.diverged} diverged)" for c in report.cells
    ]
    md += [
        f"- seeds needed, `{r.cell}` on `{r.metric}`: {seeds_text(r)}"
        for r in report.rows
        if r.metric == report.metric and not r.is_reference
    ]
    md += ["", "## How far to trust these verdicts", ""]
    md += [f"- {line}" for line in wording.trust_lines(report, calibration.load())]
    md += ["", "## Fairness: size and compute per cell", ""] + fairness_lines(report)
    if report.sweep:
        md += ["", "## Efficiency across the sweep", ""] + efficiency_lines(report)
    md += ["", "## Runs left out of the averages", ""]
    md += (
        markdown_table(
            ["run folder", "status", "where", "reason"],
            [[f"`{x.folder}`", x.status, x.where, x.reason] for x in report.left_out],
        )
        if report.left_out
        else ["None: every run completed."]
    )
    md += ["", "## Plots", ""] + [f"- {title}: ![{title}](plots/{name})" for title, name in plots]
    md += ["", "## Appendix: every metric (full table also in summary.csv)", ""] + appendix(report)
    return "\n".join(md) + "\n"


def csv_value(v) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return ""
    return repr(v) if isinstance(v, float) else str(v)


def csv_rows(report: Report) -> list[list[str]]:
    rows = []
    for r in report.rows:
        ref = r.is_reference
        low, high = r.seeds_needed or (None, None)
        rows.append(
            [
                csv_value(x)
                for x in (
                    r.cell,
                    r.metric,
                    "metric",
                    r.n,
                    r.mean,
                    r.ci_low,
                    r.ci_high,
                    r.reference,
                    None if ref else r.n_paired,
                    None if ref else r.diff,
                    None if ref else r.diff_low,
                    None if ref else r.diff_high,
                    None if ref else r.p_value,
                    None if ref else r.p_holm,
                    r.resolution,
                    low,
                    high,
                    "; ".join(x for x in (r.censored, r.reduced, "" if ref else r.seeds_note) if x),
                )
            ]
        )
    for c in report.context:
        rows.append(
            [c.cell, c.key, "context", str(len(c.values))]
            + [""] * 13
            + ["values: " + ", ".join(num(v) for v in sorted(set(c.values)))]
        )
    for c in report.efficiency:
        rows.append(
            [
                csv_value(x)
                for x in (
                    c.candidate,
                    f"{c.axis}_ratio",
                    "ratio",
                    c.n_seeds,
                    c.ratio,
                    c.ci_low,
                    c.ci_high,
                    c.baseline,
                )
            ]
            + [""] * 9
            + [c.sentence()]
        )
    return rows + effect_csv_rows(report)


def effect_csv_rows(report: Report) -> list[list[str]]:
    """Factorial effects: ``cell`` holds the effect's name, ``kind`` is ``effect`` (main effects
    and interactions) or ``simple effect``; ``mean`` and its interval are the effect's; ``p_holm``
    is set for the primary metric's family."""
    rows = []
    for e in report.effects:
        kind = "simple effect" if e.contrast.kind == "simple" else "effect"
        name = attribution.term_name(report, e.contrast)
        if e.contrast.at:
            name += " at " + ",".join(f"{k}={v}" for k, v in e.contrast.at)
        note = f"missing cells: {', '.join(map(str, e.missing))}" if e.missing else e.status
        values = (
            name,
            e.metric,
            kind,
            e.n,
            e.mean,
            e.low,
            e.high,
            None,
            None,
            None,
            None,
            None,
            e.p,
            e.p_holm,
        )
        rows.append([csv_value(x) for x in values] + ["", "", "", note])
    return rows


def named(report: Report, lines: list[str]) -> list[str]:
    """Lines under the grid's name: ``name: first line``, indented lines kept as they are."""
    return [line if line.startswith("  ") else f"{report.name}: {line}" for line in lines]


def console(report: Report, with_headline: bool = True) -> str:
    lines = named(report, headline(report)) if with_headline else []
    if report.factors:
        lines += attribution.training_lines(report) + [attribution.convention_line(), ""]
        lines += [f"pairwise: {verdict_sentence(report, v)}" for v in report.verdicts]
    else:
        lines += attribution.training_lines(report)
    header = ["cell", "completed", report.metric, "95% CI", "paired n", "diff", "95% CI of diff"]
    body = [
        [
            str(r.cell) + (" *" if r.cell == report.baseline else ""),
            next(f"{c.completed}/{c.launched}" for c in report.cells if c.name == r.cell),
            num(r.mean),
            interval(r.ci_low, r.ci_high),
            "-" if r.is_reference else str(r.n_paired),
            "-" if r.is_reference else num(r.diff),
            "-" if r.is_reference else interval(r.diff_low, r.diff_high),
        ]
        for r in report.rows
        if r.metric == report.metric
    ]
    widths = [max(len(h), *(len(b[i]) for b in body)) for i, h in enumerate(header)]
    lines += ["  ".join(h.ljust(w) for h, w in zip(header, widths))]
    lines += ["  ".join(c.ljust(w) for c, w in zip(b, widths)) for b in body]
    lines.append(f"* baseline; {rounds_line(report)}")
    if any(v.method == "two-stage t" for v in report.verdicts):
        lines.append(
            "the diff intervals in this table are paired t over all seeds; the verdict above uses Stein's "
            "two-stage interval (the first stage's SD), the one that keeps its 95% under seed rounds"
        )
    if report.left_out:
        lines.append(
            f"{len(report.left_out)} run(s) left out of the averages "
            "(failed, diverged or unfinished): see report.md"
        )
    lines += [c.sentence() for c in report.efficiency]
    return "\n".join(lines)
