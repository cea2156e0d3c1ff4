"""One report object per grid: cells, comparisons and metric rows, the verdict on the primary
metric, fairness rows, left-out runs, the efficiency result and seed rounds. Built from loaded
runs (load.py); plots and rendering read it and nothing else.

Statistics (ablate.stats): 95% Student-t intervals over seeds; differences paired by seed with
the paired t-test; Holm (1979) adjusted p-values within each comparison (one cell against its
reference, over all its metrics); seeds needed from the chi-square interval of the SD of the
paired differences.
"""

from __future__ import annotations

import math
import re
from collections import defaultdict
from dataclasses import dataclass, field

import numpy as np

from ablate import efficiency
from ablate.cells import Cell
from ablate.factors import Factor, pair_contrast
from ablate.stats import holm, mean_ci, paired_difference, seeds_needed_range

from . import effects as fx
from . import verdicts
from .load import LoadedGrid, ReportError, Run, folder_cell, is_number, read_scalars

__all__ = [
    "Report",
    "CellRuns",
    "MetricRow",
    "Context",
    "FairnessRow",
    "LeftOut",
    "TestCount",
    "LOSS",
    "build",
    "values_by_cell",
    "better_direction",
    "budget_tokens",
    "resolution_for",
    "reference_cells",
]

LOSS = "final_val_loss"
# Numbers that describe a probe set or a run rather than measure a design: shown, never tested.
CONTEXT_PATTERNS = [
    re.compile(p) for p in (r"(^|/)n_[^/]*$", r"^probe_seconds(/|$)", r"/copy_level$", r"_reached$")
]
TOKENS_TO = re.compile(r"^(?P<family>.+)/tokens_to_(?P<level>[^/]+)$")
LOSS_RESOLUTION, SHARE_RESOLUTION = 0.01, 0.02
SHARE_WORDS = re.compile(r"(acc|share|auc|area)")


def is_context(key: str) -> bool:
    return any(p.search(key) for p in CONTEXT_PATTERNS)


def resolution_for(metric: str, primary: str, primary_resolution: float, values) -> float | None:
    """The primary metric's resolution from the grid record; 0.01 nats for losses; 0.02 for
    accuracies, shares and areas in [0, 1]; None for any other unit."""
    if metric == primary:
        return primary_resolution
    if "loss" in metric:
        return LOSS_RESOLUTION
    last = metric.rsplit("/", 1)[-1]
    if SHARE_WORDS.search(last) and all(0.0 <= v <= 1.0 for v in values):
        return SHARE_RESOLUTION
    return None


# Which way is better, by the metric's name (first match wins); a recipe can say otherwise with
# grid.better ({metric: lower | higher}). Shares and other descriptive numbers have no better way.
BETTER = (
    (re.compile(r"loss|perplexity"), "lower"),
    (re.compile(r"(^|/)tokens_to_"), "lower"),
    (re.compile(r"(^|/)(acc|auc|accuracy)([_/]|$)|/acc_"), "higher"),
)


def better_direction(metric: str, declared: dict | None = None) -> str | None:
    """``lower``, ``higher`` or None (no better way: a share, a count, a norm)."""
    if declared and metric in declared:
        return declared[metric]
    return next((way for pattern, way in BETTER if pattern.search(metric)), None)


@dataclass
class CellRuns:
    """How many runs of a cell were launched, completed and diverged, and the completed seeds."""

    name: Cell
    launched: int
    completed: int
    diverged: int
    seeds: list


@dataclass
class MetricRow:
    cell: Cell
    metric: str
    reference: Cell
    n: int = 0
    mean: float = math.nan
    ci_low: float = math.nan
    ci_high: float = math.nan
    n_paired: int = 0
    diff: float = math.nan
    diff_low: float = math.nan
    diff_high: float = math.nan
    p_value: float = math.nan
    p_holm: float = math.nan
    diff_std: float = math.nan
    no_spread: bool = False
    censored: str = ""  # "not reached in k of n seeds": no interval, no imputation
    reduced: str = ""  # "paired on 3 of 4 launched seeds"
    resolution: float | None = None
    seeds_needed: tuple | None = None  # (low, high) from the chi-square interval of the SD
    seeds_note: str = ""

    @property
    def is_reference(self) -> bool:
        return self.cell == self.reference


@dataclass
class Context:
    cell: Cell
    key: str
    values: list


@dataclass
class FairnessRow:
    cell: Cell
    reference: Cell
    values: dict
    ratios: dict
    budget_match: str | None
    flag: str = ""


@dataclass
class LeftOut:
    folder: str
    status: str
    where: str
    reason: str


@dataclass
class TestCount:
    cell: Cell
    reference: Cell
    tested: int
    below: int
    below_holm: int


@dataclass
class Report:
    name: str
    folder: str
    recipe: str | None
    baseline: Cell
    metric: str
    resolution: float | None
    refs: dict
    cells: list
    rows: list
    verdicts: list
    tests: list
    context: list
    fairness: list
    left_out: list
    rounds: int
    seeds: list
    efficiency: list = field(default_factory=list)
    efficiency_notes: list = field(default_factory=list)
    sweep: dict | None = None
    fits: dict = field(default_factory=dict)
    sweep_designs: dict = field(default_factory=dict)
    factors: list = field(default_factory=list)  # [Factor]: a factorial grid
    effects: list = field(default_factory=list)  # [effects.Estimate], every metric
    missing: list = field(default_factory=list)  # [Cell] of the factorial without a completed run
    over_training: list = field(default_factory=list)  # [effects.Trajectory] on the primary metric
    effect_verdicts: list = field(default_factory=list)  # [verdicts.Verdict]: the factorial headline
    first_stage: list | None = None  # seeds of a two-stage design's first round (seed rounds)
    max_seeds: int | None = None  # the seed rounds' cap (grid.max_seeds)
    metric_given: bool = False  # --metric on the command line
    declared_metric: str | None = None  # the recipe's grid.primary_metric
    resolution_given: bool = False
    declared_resolution: float | None = None
    runs: list = field(default_factory=list, repr=False)


def reference_cells(cells: list[Cell], baseline: Cell, sweep_key: str | None) -> dict[Cell, Cell]:
    """Each cell's reference: the baseline, or the baseline's design at the cell's sweep point."""
    refs = {cell: baseline for cell in cells}
    if not sweep_key or baseline.get(sweep_key) is None:
        return refs
    for cell in cells:
        if cell.get(sweep_key) is not None:
            wanted = baseline.with_values({sweep_key: cell.get(sweep_key)})
            refs[cell] = wanted if wanted in refs else baseline
    return refs


def run_numbers(run: Run) -> dict[str, float]:
    values = {LOSS: run.summary.final_val_loss}
    values.update(run.summary.probes or {})
    values.update(run.summary.curve_metrics or {})
    return {str(k): float(v) for k, v in values.items() if is_number(v) and math.isfinite(float(v))}


def values_by_cell(runs: list[Run]) -> dict[Cell, dict[str, dict]]:
    """cell -> key -> {seed: value}, completed runs only; duplicate seeds are an error."""
    by_cell: dict[Cell, dict[str, dict]] = defaultdict(lambda: defaultdict(dict))
    owner: dict[tuple, str] = {}
    for run in runs:
        if not run.usable:
            continue
        key = (run.cell, run.summary.seed)
        if key in owner:
            raise ReportError(
                f"cell {str(run.cell)!r} has seed {run.summary.seed} twice: {owner[key]} and {run.name}"
            )
        owner[key] = run.name
        for name, value in run_numbers(run).items():
            by_cell[run.cell][name][run.summary.seed] = value
    return by_cell


def cells_of(loaded: LoadedGrid) -> list[CellRuns]:
    by_cell: dict[Cell, list[Run]] = defaultdict(list)
    for run in loaded.runs:
        by_cell[run.cell].append(run)
    unfinished = defaultdict(int)
    for folder in loaded.unfinished:
        unfinished[folder_cell(folder, loaded.record.varied if loaded.record else None)] += 1
    return [
        CellRuns(
            name,
            len(rs) + unfinished.get(name, 0),
            sum(r.usable for r in rs),
            sum(r.summary.status == "diverged" for r in rs),
            sorted(r.summary.seed for r in rs if r.usable),
        )
        for name, rs in sorted(by_cell.items())
    ]


def censoring(by_cell, cell: Cell, metric: str) -> str:
    """'not reached in k of n seeds' for a tokens-to metric some seed did not reach, else ''."""
    match = TOKENS_TO.match(metric)
    if not match:
        return ""
    flags = by_cell.get(cell, {}).get(f"{match['family']}/{match['level']}_reached", {})
    n = len(by_cell.get(cell, {}).get(LOSS, {}))
    missed = sum(1 for v in flags.values() if v < 0.5) if flags else n - len(by_cell[cell].get(metric, {}))
    return f"not reached in {missed} of {n} seeds" if missed else ""


def fill_difference(row: MetricRow, seeds: dict, ref_seeds: dict) -> None:
    shared = sorted(set(seeds) & set(ref_seeds), key=str)
    row.n_paired = len(shared)
    if row.is_reference or not shared:
        return
    a, b = [seeds[s] for s in shared], [ref_seeds[s] for s in shared]
    row.diff, row.diff_low, row.diff_high, row.p_value = paired_difference(a, b)
    if len(shared) >= 2:
        row.diff_std = float(np.std(np.subtract(a, b), ddof=1))
        row.no_spread = not math.isfinite(row.p_value)


def fill_seeds_needed(row: MetricRow) -> None:
    if row.is_reference or row.censored:
        return
    if row.no_spread:
        row.seeds_note = f"no spread across {row.n_paired} seeds"
    elif row.resolution is None:
        row.seeds_note = "no resolution for this unit"
    elif row.n_paired < 3:
        row.seeds_note = "needs >= 3 paired seeds to estimate"
    else:
        row.seeds_needed = seeds_needed_range(row.diff_std, row.n_paired, row.resolution)


def metric_row(by_cell, cell: Cell, metric: str, ref: Cell, primary: tuple[str, float]) -> MetricRow:
    seeds = by_cell.get(cell, {}).get(metric, {})
    row = MetricRow(cell, metric, ref, n=len(seeds))
    row.censored = censoring(by_cell, cell, metric) or (
        censoring(by_cell, ref, metric) and "reference " + censoring(by_cell, ref, metric)
    )
    if seeds and not row.censored:
        row.mean, row.ci_low, row.ci_high = mean_ci(list(seeds.values()))
        fill_difference(row, seeds, by_cell.get(ref, {}).get(metric, {}))
    values = [v for c in by_cell.values() for v in c.get(metric, {}).values()]
    row.resolution = resolution_for(metric, primary[0], primary[1], values)
    fill_seeds_needed(row)
    return row


def natural(text: str) -> tuple:
    """Sort key that orders layer2 before layer10 and pos32 before pos128."""
    return tuple((0, int(t), "") if t.isdigit() else (1, 0, t) for t in re.split(r"(\d+)", text) if t)


def metric_rows(by_cell, refs: dict[Cell, Cell], primary: tuple[str, float]) -> list[MetricRow]:
    keys = {m for per in by_cell.values() for m in per if not is_context(m)}
    metrics = sorted(keys, key=lambda m: (m != primary[0], m != LOSS, natural(m)))
    return [
        metric_row(by_cell, cell, metric, refs[cell], primary) for metric in metrics for cell in sorted(refs)
    ]


def adjust_and_count(rows: list[MetricRow], primary: str) -> list[TestCount]:
    """Holm-adjusted p-values of the secondary metrics within each comparison (the primary metric
    is tested alone, see ``verdicts``); counts of p < 0.05 before and after."""
    groups: dict[tuple, list[MetricRow]] = defaultdict(list)
    for row in rows:
        if not row.is_reference and row.metric != primary:
            groups[(row.cell, row.reference)].append(row)
    counts = []
    for (cell, ref), members in sorted(groups.items()):
        adjusted = holm([r.p_value for r in members])
        for row, p in zip(members, adjusted):
            row.p_holm = float(p)
        tested = [r for r in members if math.isfinite(r.p_value)]
        counts.append(
            TestCount(
                cell,
                ref,
                len(tested),
                sum(r.p_value < 0.05 for r in tested),
                sum(r.p_holm < 0.05 for r in tested),
            )
        )
    return counts


def mark_reduced(rows: list[MetricRow], cells: list[CellRuns]) -> None:
    """Flag comparisons paired on fewer seeds than were launched for either cell."""
    launched = {c.name: c.launched for c in cells}
    for row in rows:
        most = max(launched.get(row.cell, 0), launched.get(row.reference, 0))
        if not row.is_reference and row.n_paired < most:
            row.reduced = f"paired on {row.n_paired} of {most} launched seeds"


def context_values(by_cell) -> list[Context]:
    """Metadata per cell (copy levels, item counts, reached flags, probe timings): listed, not tested."""
    out = []
    for cell in sorted(by_cell):
        for key in sorted(by_cell[cell], key=natural):
            if is_context(key):
                out.append(
                    Context(cell, key, [by_cell[cell][key][s] for s in sorted(by_cell[cell][key], key=str)])
                )
    return out


FAIRNESS_KEYS = ("params", "non_embedding_params", "flops_per_token", "tokens", "train_flops")


def fairness_rows(runs: list[Run], refs: dict[Cell, Cell], tolerance: float) -> list[FairnessRow]:
    by_cell: dict[Cell, list[Run]] = defaultdict(list)
    for run in runs:
        by_cell[run.cell].append(run)
    values, match = {}, {}
    for cell, cell_runs in by_cell.items():
        source = [r for r in cell_runs if r.usable] or cell_runs
        numbers = {
            k: [float(getattr(r.summary, k)) for r in source if is_number(getattr(r.summary, k))]
            for k in FAIRNESS_KEYS
        }
        values[cell] = {k: float(np.mean(v)) if v else math.nan for k, v in numbers.items()}
        match[cell] = next((r.summary.budget_match for r in source if r.summary.budget_match), None)
    rows = []
    for cell in sorted(values):
        ref = values.get(refs[cell], {})
        ratios = {k: values[cell][k] / ref[k] if ref.get(k) else math.nan for k in FAIRNESS_KEYS}
        row = FairnessRow(cell, refs[cell], values[cell], ratios, match[cell])
        flops = ratios["flops_per_token"]
        if match[cell] == "tokens" and math.isfinite(flops) and abs(flops - 1.0) > tolerance:
            row.flag = (
                f"FLOPs/token {flops:.3f}x the reference at matched tokens "
                f"(beyond the {tolerance:g} tolerance)"
            )
        rows.append(row)
    return rows


def left_out(loaded: LoadedGrid) -> list[LeftOut]:
    rows = []
    for run in sorted(loaded.runs, key=lambda r: r.name):
        if not run.usable:
            rows.append(left_out_row(run))
    for folder in loaded.unfinished:
        rows.append(
            LeftOut(
                str(folder.relative_to(loaded.folder)),
                "no summary",
                last_logged(folder),
                "unfinished or interrupted (no summary.json)",
            )
        )
    for cell in loaded.record.running_elsewhere if loaded.record else []:
        rows.append(LeftOut(str(cell), "running elsewhere", "-", "another process held this cell"))
    return rows


def last_logged(folder, scalars=None) -> str:
    scalars = read_scalars(folder) if scalars is None else scalars
    steps = [int(st[-1]) for st, _ in scalars.values() if st.size]
    return f"last logged at {max(steps):,} tokens" if steps else "no curves logged"


def left_out_row(run: Run) -> LeftOut:
    s = run.summary
    where = last_logged(run.folder, run.scalars)
    if s.status == "diverged":
        where = (
            f"diverged at {s.diverged_at_tokens:,} tokens" if is_number(s.diverged_at_tokens) else "diverged"
        )
        detail = f"last finite loss {s.last_finite_loss}"
    elif s.status == "failed":
        error = str(s.error or "").strip()
        detail = error.splitlines()[0][:200] if error else "no error message"
    elif s.status == "stopped":
        where, detail = (
            f"stopped at step {s.step}",
            "stopped early on request; rerun the same command to finish",
        )
    elif s.status == "completed":
        detail = "completed but final_val_loss missing or not finite"
    else:
        detail = f"unknown status {s.status!r}"
    return LeftOut(run.name, s.status, where, detail)


def sweep_cells(runs: list[Run], sweep_key: str, field_name: str) -> dict[str, dict[float, dict]]:
    """design (cell name minus the sweep key) -> x -> {seed: final loss}."""
    out: dict[str, dict[float, dict]] = defaultdict(lambda: defaultdict(dict))
    for run in runs:
        x = getattr(run.summary, field_name)
        if run.usable and is_number(x):
            design = run.cell.without(sweep_key)
            out[str(design if len(design) else run.cell)][float(x)][run.summary.seed] = (
                run.summary.final_val_loss
            )
    return out


def efficiency_results(runs, sweep: dict, baseline: Cell, resamples: int, seed: int):
    """(comparisons, fits, cells by design, notes) for a sweep grid."""
    if not isinstance(sweep, dict) or sweep.get("axis") not in efficiency.AXIS_NOUNS:
        raise ReportError(
            f"grid.json 'sweep' must be {{'axis': 'params' | 'tokens', 'key': ...}}, got {sweep!r}"
        )
    key = sweep.get("key")
    designs = sweep_cells(runs, key, "non_embedding_params" if sweep["axis"] == "params" else "tokens")
    base = str(baseline.without(key) if len(baseline.without(key)) else baseline)
    comparisons, fits, notes = [], {}, []
    if base not in designs:
        return (
            comparisons,
            fits,
            designs,
            [f"No completed runs of the baseline design {base}; no efficiency estimate."],
        )
    for design in sorted(d for d in designs if d != base):
        try:
            result, fits[base], fits[design] = efficiency.compare(
                base, designs[base], design, designs[design], sweep["axis"], resamples=resamples, seed=seed
            )
        except efficiency.EfficiencyError as exc:
            notes.append(f"{design} vs {base}: not determined by this sweep ({exc}).")
            continue
        comparisons.append(result)
    return comparisons, fits, designs, notes


def build(
    loaded: LoadedGrid, resolution: float | None = None, resamples: int = 1000, seed: int = 0
) -> Report:
    record = loaded.record
    resolution_asked = resolution
    resolution = resolution or (record.resolution if record else None)
    resolution = resolution or resolution_for(loaded.metric, "", None, [])
    by_cell = values_by_cell(loaded.runs)
    if not any(loaded.metric in per for per in by_cell.values()):
        raise ReportError(f"primary metric {loaded.metric!r}: no completed run has it")
    sweep = record.sweep if record else None
    refs = reference_cells(sorted({r.cell for r in loaded.runs}), loaded.baseline, (sweep or {}).get("key"))
    cells = cells_of(loaded)
    rows = metric_rows(by_cell, refs, (loaded.metric, resolution))
    mark_reduced(rows, cells)
    tests = adjust_and_count(rows, loaded.metric)
    report = Report(
        name=record.name if record else loaded.folder.name,
        folder=str(loaded.folder),
        recipe=record.recipe if record else None,
        baseline=loaded.baseline,
        metric=loaded.metric,
        resolution=resolution,
        refs=refs,
        cells=cells,
        rows=rows,
        verdicts=[],
        tests=tests,
        context=context_values(by_cell),
        fairness=fairness_rows(loaded.runs, refs, record.tolerance if record else 0.02),
        left_out=left_out(loaded),
        rounds=record.rounds if record else 1,
        seeds=sorted({s for c in cells for s in c.seeds}),
        sweep=sweep,
        runs=loaded.runs,
    )
    report.metric_given, report.resolution_given = loaded.metric_given, resolution_asked is not None
    report.declared_metric = record.primary_metric if record else None
    report.declared_resolution = record.resolution if record else None
    first_stage = list(record.first_stage) if record and record.first_stage else None
    report.first_stage = first_stage
    report.max_seeds = record.max_seeds if record else None
    report.verdicts = pairwise_verdicts(report, by_cell, first_stage)
    attribute(report, by_cell, record, first_stage)
    if sweep:
        report.efficiency, report.fits, report.sweep_designs, report.efficiency_notes = efficiency_results(
            loaded.runs, sweep, loaded.baseline, resamples, seed
        )
    return report


def budget_tokens(runs: list[Run]) -> float:
    """The grid's training budget in tokens (the most any usable run trained)."""
    tokens = [float(r.summary.tokens) for r in runs if r.usable and is_number(r.summary.tokens)]
    return max(tokens) if tokens else math.nan


def pairwise_verdicts(report: Report, by_cell: dict, first_stage: list | None) -> list:
    """Every cell against its reference on the primary metric; the primary rows of the by_cell take
    the verdicts' Holm-adjusted p-values, so the headline and the appendix agree."""
    notes = {
        pair_contrast(r.cell, r.reference): (r.reduced, r.censored)
        for r in report.rows
        if r.metric == report.metric and not r.is_reference
    }
    pairs = fx.pair_contrasts(report.refs)
    estimates = verdicts.primary_estimates(by_cell, pairs, report.metric, first_stage)
    found = verdicts.primary_verdicts(
        by_cell, estimates, report.resolution, bool(first_stage), budget_tokens(report.runs), notes
    )
    by_pair = {v.contrast: v for v in found}
    for row in report.rows:
        v = by_pair.get(pair_contrast(row.cell, row.reference)) if row.metric == report.metric else None
        if v is not None:
            row.p_holm = v.estimate.p_holm
    return found


def attribute(report: Report, by_cell: dict, record, first_stage: list | None) -> None:
    """A factorial grid's effects on every metric (the primary family as verdicts), the cells it
    misses, and the primary metric's effects over training; a pairwise grid's differences over
    training."""
    report.factors = [Factor.from_dict(f) for f in (record.factors if record else [])]
    if report.factors:
        # a tokens-to metric some seed did not reach has no mean to contrast (censored, never
        # imputed): the Kaplan-Meier lines and figure speak for it
        censored = {r.metric for r in report.rows if r.censored}
        metrics = list(dict.fromkeys(r.metric for r in report.rows if r.metric not in censored))
        report.effects = fx.effect_estimates(by_cell, report.factors, metrics, report.metric, first_stage)
        report.missing = fx.missing_cells(by_cell, report.factors)
        family = [e for e in report.effects if e.metric == report.metric and e.contrast.kind != "simple"]
        report.effect_verdicts = verdicts.primary_verdicts(
            by_cell, family, report.resolution, bool(first_stage), budget_tokens(report.runs)
        )
        contrasts = [e.contrast for e in report.effects if e.metric == report.metric]
    else:
        contrasts = fx.pair_contrasts(report.refs)
    report.over_training = fx.trajectories(report.runs, report.metric, contrasts, first_stage)
