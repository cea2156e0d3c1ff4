"""h2h-report: compare the cells of a grid folder over seeds.

Usage::

    h2h-report GRID_FOLDER [--target-halfwidth W] [--resamples N] [--bootstrap-seed S]

Every ``summary.json`` below GRID_FOLDER (any depth) is one run; its folder also holds
``config.yaml`` and TensorBoard event files (read with TensorBoard's own EventAccumulator).
An optional ``grid.json`` at the root names the recipe, the baseline cell, the target half-width
and, for size or data sweeps, ``"sweep": {"axis": "params" | "tokens", "key": ...}``.

Writes into GRID_FOLDER: ``report.md``, ``summary.csv`` and ``plots/*.png``; prints the main
table. Only completed runs with a finite final loss enter averages; failed and diverged runs are
listed by folder, as are run folders without summary.json. Exit code 0 on success, 2 (one line
on stderr) on a missing folder, a folder without summary.json, or unreadable input.

Comparisons are against a reference cell: the baseline, or, when grid.json declares a sweep,
the baseline's design at the same sweep point (same cell name with the baseline's other
choices), when the grid holds one.

summary.csv: one row per cell per metric.

    cell              grid cell (the run's design choices without the seed)
    metric            ``final_val_loss``, a probe name from summary.json, or ``params_ratio`` /
                      ``tokens_ratio`` (efficiency estimate, see ablate.efficiency; cell is then
                      the attention choice)
    n                 completed seeds with a finite value of the metric (ratio row: the fewest
                      seeds in any swept cell)
    mean              mean over those seeds (for a ratio row: the fitted ratio)
    ci_low, ci_high   95% Student-t interval of the mean (empty when n = 1); for a ratio row the
                      bootstrap percentile interval
    diff_to_baseline  mean over shared seeds of (cell - reference); empty for the reference itself
    diff_ci_low, diff_ci_high   95% t interval of that paired difference
    p_value           paired t-test p-value (empty with fewer than 2 shared seeds or no spread)
    n_paired          seeds present in both the cell and its reference
    seeds_needed      seeds for a 95% half-width of target_halfwidth on the paired difference, from
                      the measured std of the per-seed differences (t-refined; same units as the
                      metric)
    reference         the cell compared against
    note              plain-language remark (e.g. "1 seed: no interval", the efficiency sentence)
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import re
import sys
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ablate import efficiency
from ablate.stats import mean_ci, paired_difference, seeds_needed

LOSS = "final_val_loss"
COPY_LEVEL = "/copy_level"   # a property of the probe set, reported beside the probes, not as one
DEFAULT_HALFWIDTH = 0.01
CSV_COLUMNS = ["cell", "metric", "n", "mean", "ci_low", "ci_high", "diff_to_baseline", "diff_ci_low",
               "diff_ci_high", "p_value", "n_paired", "seeds_needed", "reference", "note"]
FAIRNESS_KEYS = [("params", "params"), ("non_embedding_params", "non-emb params"),
                 ("flops_per_token", "FLOPs/token"), ("tokens", "tokens"), ("train_flops", "train FLOPs")]
RETRIEVAL_KEY = re.compile(r"^retrieval/acc[/_]len(?P<length>\d+)[/_]depth(?P<depth>\d+(?:\.\d+)?)(?P<rest>.*)$")
LAMBDA_TAG = re.compile(r"^lambda/layer_(\d+)$")
OWN_PLOTS = ("val_loss.png", "lambda.png", "retrieval_heatmap.png", "efficiency.png")
CELL_PART = re.compile(r"([^\s,=]+)=([^\s,]+)")


class ReportError(Exception):
    """A problem with the input the user must fix; printed as one line, exit code 2."""


# ----------------------------------------------------------------------------- reading runs


@dataclass
class Run:
    folder: Path
    name: str  # folder relative to the grid folder
    summary: dict
    scalars: dict = field(default_factory=dict)  # tag -> (steps, values)

    @property
    def status(self) -> str:
        return str(self.summary.get("status", "missing"))

    @property
    def attention(self) -> str:
        return str(self.summary.get("attention", "?"))

    @property
    def cell(self) -> str:
        return str(self.summary.get("cell") or self.summary.get("attention") or "?")

    @property
    def seed(self):
        return self.summary.get("seed")

    @property
    def final_loss(self) -> float:
        value = self.summary.get(LOSS)
        return float(value) if _is_number(value) else math.nan

    @property
    def usable(self) -> bool:
        return self.status == "completed" and math.isfinite(self.final_loss)

    def metrics(self) -> dict[str, float]:
        values = {LOSS: self.final_loss}
        for name, value in (self.summary.get("probes") or {}).items():
            if _is_number(value) and not str(name).endswith(COPY_LEVEL):
                values[str(name)] = float(value)
        return {k: v for k, v in values.items() if math.isfinite(v)}

    def rejected_probes(self) -> list[str]:
        """Probe names whose value is not a finite number (left out of every average)."""
        probes = self.summary.get("probes") or {}
        return [str(k) for k, v in probes.items() if not (_is_number(v) and math.isfinite(float(v)))]


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def find_runs(grid: Path) -> list[Run]:
    runs = []
    for path in sorted(grid.rglob("summary.json")):
        try:
            summary = json.loads(path.read_text())
        except (OSError, json.JSONDecodeError) as exc:
            raise ReportError(f"{path}: cannot read summary.json ({exc})") from None
        if not isinstance(summary, dict):
            raise ReportError(f"{path}: summary.json is not a JSON object")
        runs.append(Run(path.parent, str(path.parent.relative_to(grid)) or ".", summary))
    return runs


def unfinished_folders(grid: Path) -> list[Path]:
    """Run folders (holding config.yaml) without a summary.json: unfinished or interrupted runs."""
    return sorted(p.parent for p in grid.rglob("config.yaml") if not (p.parent / "summary.json").exists())


def event_files(folder: Path) -> list[Path]:
    """Event files anywhere under a run folder, except inside nested run folders."""
    found = []
    for path in sorted(folder.rglob("events.out.tfevents.*")):
        parents = path.relative_to(folder).parents
        nested = any((folder / p / "summary.json").exists() for p in parents if str(p) != ".")
        if not nested and path.is_file():
            found.append(path)
    return found


def read_scalars(folder: Path) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """All scalar series of a run, step -> value, merged over its event files (later files win)."""
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    merged: dict[str, dict[int, float]] = defaultdict(dict)
    for path in event_files(folder):
        acc = EventAccumulator(str(path), size_guidance={"scalars": 0})
        acc.Reload()
        for tag in acc.Tags().get("scalars", []):
            for event in acc.Scalars(tag):
                merged[tag][int(event.step)] = float(event.value)
    return {tag: (np.array(sorted(points)), np.array([points[s] for s in sorted(points)]))
            for tag, points in merged.items()}


def read_grid_info(grid: Path) -> dict:
    path = grid / "grid.json"
    if not path.exists():
        return {}
    try:
        info = json.loads(path.read_text())
    except (OSError, json.JSONDecodeError) as exc:
        raise ReportError(f"{path}: cannot read grid.json ({exc})") from None
    if not isinstance(info, dict):
        raise ReportError(f"{path}: grid.json is not a JSON object")
    return info


# ----------------------------------------------------------------------------- grouping


def choose_baseline(runs: list[Run], info: dict) -> tuple[str, str]:
    cells = sorted({r.cell for r in runs})
    named = info.get("baseline")
    if named:
        if named not in cells:
            raise ReportError(f"grid.json names baseline {named!r}, but no run has that cell; cells: {', '.join(cells)}")
        return named, "named in grid.json"
    standard = sorted({r.cell for r in runs if r.attention == "standard"})
    if standard:
        return standard[0], "no grid.json baseline; chosen as the cell with attention 'standard'"
    return cells[0], "no grid.json baseline and no 'standard' cell; chosen as the first cell alphabetically"


def _cell_parts(cell: str) -> dict[str, str]:
    return dict(CELL_PART.findall(cell))


def reference_cells(cells: list[str], baseline: str, sweep_key: str | None) -> dict[str, str]:
    """Each cell's reference: the baseline, or the baseline's design at the cell's sweep point."""
    refs = {cell: baseline for cell in cells}
    base_parts = _cell_parts(baseline)
    if not sweep_key or sweep_key not in base_parts:
        return refs
    by_parts = {tuple(sorted(_cell_parts(c).items())): c for c in cells}
    for cell in cells:
        parts = _cell_parts(cell)
        if sweep_key not in parts:
            continue
        wanted = dict(base_parts, **{sweep_key: parts[sweep_key]})
        refs[cell] = by_parts.get(tuple(sorted(wanted.items())), baseline)
    return refs


def values_by_cell(runs: list[Run]) -> dict[str, dict[str, dict]]:
    """cell -> metric -> {seed: value}, completed runs only; duplicate seeds are an error."""
    table: dict[str, dict[str, dict]] = defaultdict(lambda: defaultdict(dict))
    owner: dict[tuple, str] = {}
    for run in runs:
        if not run.usable:
            continue
        key = (run.cell, run.seed)
        if key in owner:
            raise ReportError(f"cell {run.cell!r} has seed {run.seed} twice: {owner[key]} and {run.name}")
        owner[key] = run.name
        for metric, value in run.metrics().items():
            table[run.cell][metric][run.seed] = value
    return table


# ----------------------------------------------------------------------------- statistics


@dataclass
class Row:
    cell: str
    metric: str
    n: int
    mean: float = math.nan
    ci_low: float = math.nan
    ci_high: float = math.nan
    diff: float = math.nan
    diff_low: float = math.nan
    diff_high: float = math.nan
    p_value: float = math.nan
    n_paired: int = 0
    diff_std: float = math.nan
    seeds_needed: int | None = None
    seeds_needed_normal: int | None = None
    reference: str = ""
    note: str = ""

    def csv_values(self) -> list:
        def num(v):
            return "" if v is None or (isinstance(v, float) and not math.isfinite(v)) else repr(v)

        is_ref = self.cell == self.reference
        return [self.cell, self.metric, self.n, num(self.mean), num(self.ci_low), num(self.ci_high),
                "" if is_ref else num(self.diff), "" if is_ref else num(self.diff_low),
                "" if is_ref else num(self.diff_high), "" if is_ref else num(self.p_value),
                "" if is_ref else self.n_paired, num(self.seeds_needed), self.reference, self.note]


def _natural(text: str) -> tuple:
    """Sort key that orders layer2 before layer10 and pos32 before pos128."""
    return tuple((0, int(t), "") if t.isdigit() else (1, 0, t) for t in re.split(r"(\d+)", text) if t)


def metric_rows(table, refs: dict[str, str], halfwidth: float) -> list[Row]:
    metrics = sorted({m for per in table.values() for m in per}, key=lambda m: (m != LOSS, _natural(m)))
    rows = []
    for metric in metrics:
        for cell in sorted(refs):
            seeds = table.get(cell, {}).get(metric, {})
            ref = refs[cell]
            row = Row(cell, metric, len(seeds), reference=ref)
            if seeds:
                row.mean, row.ci_low, row.ci_high = mean_ci(list(seeds.values()))
                if len(seeds) == 1:
                    row.note = "1 seed: no interval"
            ref_seeds = table.get(ref, {}).get(metric, {})
            shared = sorted(set(seeds) & set(ref_seeds), key=str)
            row.n_paired = len(shared)
            if cell != ref and shared:
                a = [seeds[s] for s in shared]
                b = [ref_seeds[s] for s in shared]
                row.diff, row.diff_low, row.diff_high, row.p_value = paired_difference(a, b)
                if len(shared) >= 2:
                    row.diff_std = float(np.std(np.subtract(a, b), ddof=1))
                    row.seeds_needed_normal, row.seeds_needed = seeds_needed(row.diff_std, halfwidth)
            rows.append(row)
    return rows


def fairness_rows(runs: list[Run], refs: dict[str, str]) -> list[dict]:
    by_cell: dict[str, list[Run]] = defaultdict(list)
    for run in runs:
        by_cell[run.cell].append(run)
    values = {}
    for cell, cell_runs in by_cell.items():
        source = [r for r in cell_runs if r.usable] or cell_runs
        entry = {"cell": cell, "from": "completed runs" if any(r.usable for r in cell_runs) else "unfinished runs"}
        for key, _ in FAIRNESS_KEYS:
            numbers = [float(r.summary[key]) for r in source if _is_number(r.summary.get(key))]
            entry[key] = float(np.mean(numbers)) if numbers else math.nan
            entry[key + "_varies"] = len(set(numbers)) > 1
        values[cell] = entry
    for cell, entry in values.items():
        ref = values.get(refs[cell], {})
        for key, _ in FAIRNESS_KEYS:
            denom = ref.get(key, math.nan)
            entry[key + "_ratio"] = entry[key] / denom if denom and math.isfinite(denom) else math.nan
        entry["reference"] = refs[cell]
    return [values[c] for c in sorted(values)]


def efficiency_section(runs: list[Run], info: dict, baseline: str, resamples: int, seed: int):
    """(comparisons, fits, cells_by_choice, notes) for a sweep grid, else None."""
    sweep = info.get("sweep")
    if not sweep:
        return None
    if not isinstance(sweep, dict) or sweep.get("axis") not in efficiency.AXIS_NOUNS:
        raise ReportError(f"grid.json 'sweep' must be {{'axis': 'params' | 'tokens', 'key': ...}}, got {sweep!r}")
    axis = sweep["axis"]
    field_name = "non_embedding_params" if axis == "params" else "tokens"
    cells_by_choice: dict[str, dict[float, list]] = defaultdict(lambda: defaultdict(list))
    for run in runs:
        if run.usable and _is_number(run.summary.get(field_name)):
            cells_by_choice[run.attention][float(run.summary[field_name])].append(run.final_loss)
    base_attention = next((r.attention for r in runs if r.cell == baseline), None)
    notes, fits, comparisons = [], {}, []
    if base_attention not in cells_by_choice:
        notes.append(f"No completed runs of the baseline's attention ({base_attention}); no efficiency estimate.")
        return comparisons, fits, cells_by_choice, notes
    base_cells = {x: np.array(v) for x, v in cells_by_choice[base_attention].items()}
    for choice in sorted(cells_by_choice):
        if choice == base_attention:
            continue
        cand_cells = {x: np.array(v) for x, v in cells_by_choice[choice].items()}
        try:
            result, base_fit, cand_fit = efficiency.compare(base_attention, base_cells, choice, cand_cells,
                                                            axis, resamples=resamples, seed=seed)
        except efficiency.EfficiencyError as exc:
            notes.append(f"{choice} vs {base_attention}: no estimate ({exc}).")
            continue
        fits[base_attention], fits[choice] = base_fit, cand_fit
        comparisons.append(result)
    for name, curve in sorted(fits.items()):
        notes.append(f"{name}: {describe_curve(curve, axis)}" + (f" ({curve.note})" if curve.note else ""))
    return comparisons, fits, cells_by_choice, notes


def describe_curve(curve: efficiency.LossCurve, axis: str) -> str:
    x = "N" if axis == "params" else "D"
    return (f"{curve.kind}: L({x}) = {curve.floor:.4g} + {curve.amplitude:.4g} * ({x} / {curve.x_ref:.4g})^"
            f"(-{curve.exponent:.4g})")


# ----------------------------------------------------------------------------- plots


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _aligned(curves: list[tuple[np.ndarray, np.ndarray]]):
    """Curves interpolated onto the densest run's steps within the range all runs cover."""
    start = max(c[0][0] for c in curves)
    stop = min(c[0][-1] for c in curves)
    grid = max(curves, key=lambda c: len(c[0]))[0]
    grid = grid[(grid >= start) & (grid <= stop)]
    if grid.size == 0:
        return grid, np.empty((len(curves), 0))
    return grid, np.stack([np.interp(grid, s, v) for s, v in curves])


def plot_val_loss(runs: list[Run], path: Path, labels: dict[str, str]) -> list[str]:
    plt = _plt()
    by_cell = defaultdict(list)
    for run in runs:
        if run.usable and "loss/val" in run.scalars and run.scalars["loss/val"][0].size:
            by_cell[run.cell].append(run.scalars["loss/val"])
    if not by_cell:
        return []
    fig, ax = plt.subplots(figsize=(7, 4.2))
    for cell in sorted(by_cell):
        steps, stacked = _aligned(by_cell[cell])
        if steps.size == 0:
            continue
        n = len(by_cell[cell])
        line, = ax.plot(steps, stacked.mean(axis=0), marker="o" if steps.size <= 20 else None, markersize=3,
                        label=f"{labels[cell]} ({n} seed{'s' if n != 1 else ''})")
        ax.fill_between(steps, stacked.min(axis=0), stacked.max(axis=0), color=line.get_color(), alpha=0.2)
    ax.set_xlabel("tokens seen")
    ax.set_ylabel("validation loss (nats)")
    ax.set_title("validation loss: mean over seeds, band = min to max")
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return sorted(by_cell)


def plot_lambda(runs: list[Run], path: Path, labels: dict[str, str]) -> bool:
    by_cell: dict[str, dict[int, list]] = defaultdict(lambda: defaultdict(list))
    for run in runs:
        if not run.usable:
            continue
        for tag, series in run.scalars.items():
            match = LAMBDA_TAG.match(tag)
            if match and series[0].size:
                by_cell[run.cell][int(match.group(1))].append(series)
    if not by_cell:
        return False
    plt = _plt()
    cells = sorted(by_cell)
    fig, axes = plt.subplots(1, len(cells), figsize=(5.5 * len(cells), 4), squeeze=False)
    for ax, cell in zip(axes[0], cells):
        layers = sorted(by_cell[cell])
        cmap = plt.get_cmap("viridis")
        for i, layer in enumerate(layers):
            steps, stacked = _aligned(by_cell[cell][layer])
            ax.plot(steps, stacked.mean(axis=0), color=cmap(i / max(1, len(layers) - 1)), label=f"layer {layer}")
        ax.set_title(f"lambda per layer: {labels[cell]}", fontsize=9)
        ax.set_xlabel("tokens seen")
        ax.set_ylabel("lambda (mean over seeds)")
        ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return True


def short_labels(cells: list[str]) -> tuple[dict[str, str], list[str]]:
    """Plot labels without the ``key=value`` parts every cell shares; also returns those parts."""
    parts = {c: c.split(",") for c in cells}
    shared = [p for p in parts[cells[0]] if all(p in parts[c] for c in cells)] if len(cells) > 1 else []
    labels = {c: ",".join(p for p in parts[c] if p not in shared) or c for c in cells}
    if len(set(labels.values())) < len(cells):
        return {c: c for c in cells}, []
    return labels, shared


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name).strip("_") or "metric"


def bar_groups(rows: list[Row], skip: set[str], per_chart: int = 16) -> dict[str, list[tuple[str, str]]]:
    """Chart title -> [(metric, x label)], so that each chart holds numbers of one kind.

    ``family/<middle>/measure`` (e.g. one number per layer) -> one chart per family and measure,
    x = the middle part; ``family/name`` -> one chart per family, split into numbers within
    [-1, 1] and larger ones; the final loss has its own chart. Charts hold at most ``per_chart``
    groups of bars (longer ones are split into numbered parts).
    """
    largest: dict[str, float] = defaultdict(float)
    for r in rows:
        if math.isfinite(r.mean):
            largest[r.metric] = max(largest[r.metric], abs(r.mean))
    groups: dict[str, list[tuple[str, str]]] = defaultdict(list)
    for metric in dict.fromkeys(r.metric for r in rows):
        if metric in skip:
            continue
        parts = metric.split("/")
        if metric == LOSS:
            groups["final validation loss"].append((metric, metric))
        elif len(parts) >= 3:
            groups[f"{parts[0]}: {parts[-1]}"].append((metric, "/".join(parts[1:-1])))
        else:
            family = parts[0] if len(parts) == 2 else "probes"
            scale = "within -1 to 1" if largest[metric] <= 1.0 else "larger numbers"
            groups[f"{family} ({scale})"].append((metric, parts[-1]))
    charts = {}
    for title, members in groups.items():
        chunks = [members[i:i + per_chart] for i in range(0, len(members), per_chart)]
        for k, chunk in enumerate(chunks):
            charts[title if len(chunks) == 1 else f"{title} (part {k + 1} of {len(chunks)})"] = chunk
    return charts


def plot_bars(rows: list[Row], plot_dir: Path, skip: set[str], labels: dict[str, str]) -> list[tuple[str, str]]:
    """Grouped bar charts (see bar_groups): bars = cells, whiskers = 95% t interval.

    Returns (title, file name) per chart written.
    """
    plt = _plt()
    written = []
    cells = sorted({r.cell for r in rows})
    lookup = {(r.cell, r.metric): r for r in rows}
    for title, members in bar_groups(rows, skip).items():
        legend_width = 0.07 * max(len(labels[c]) for c in cells) + 0.6
        fig, ax = plt.subplots(figsize=(max(5.0, 0.45 * len(members) * len(cells) + 2) + legend_width, 4.2))
        width = 0.8 / len(cells)
        ends, any_single = [], False
        for j, cell in enumerate(cells):
            means, errs, single = [], [[], []], []
            for metric, _ in members:
                row = lookup.get((cell, metric))
                mean = row.mean if row and row.n else math.nan
                means.append(mean)
                has_ci = bool(row) and math.isfinite(row.ci_low)
                errs[0].append(mean - row.ci_low if has_ci else math.nan)
                errs[1].append(row.ci_high - mean if has_ci else math.nan)
                single.append(not has_ci)
                ends += [v for v in ((row.ci_low, row.ci_high, mean) if has_ci else (mean,)) if math.isfinite(v)]
            bars = ax.bar(np.arange(len(members)) + (j - (len(cells) - 1) / 2) * width, means, width, yerr=errs,
                          capsize=3, label=labels[cell])
            for bar, no_interval in zip(bars, single):
                if no_interval:
                    bar.set_hatch("//")
                    any_single = True
        ticks = [tick for _, tick in members]
        tilt = len(members) > 3 or max(len(x) for x in ticks) > 14
        ax.set_xticks(np.arange(len(members)))
        ax.set_xticklabels(ticks, rotation=30 if tilt else 0, ha="right" if tilt else "center", fontsize=8)
        heading = f"{title}\nmean over seeds, whiskers = 95% t interval"
        if any_single:
            heading += "; hatched = 1 seed, no interval"
        # Small differences on a large positive level (losses) vanish on an axis from 0: zoom in.
        if ends and min(ends) > 0 and max(ends) - min(ends) < 0.2 * max(ends):
            pad = 0.25 * (max(ends) - min(ends)) or 0.01 * max(ends)
            ax.set_ylim(min(ends) - pad, max(ends) + pad)
            heading += " (axis does not start at 0)"
        ax.set_title(heading, fontsize=10)
        ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))
        fig.tight_layout()
        name = f"bars_{_safe(title)}.png"
        fig.savefig(plot_dir / name, dpi=110)
        plt.close(fig)
        written.append((title, name))
    return written


def retrieval_grid(table) -> dict[str, tuple[list[int], list[float], np.ndarray]]:
    """cell -> (lengths, depths, accuracy[depth, length]), mean over seeds.

    Uses ``retrieval/acc_len<L>_depth<D>`` where present; otherwise averages the keys that carry
    further axes (``..._depth<D>_n<N>_r<R>``) over those axes.
    """
    grids = {}
    for cell, per_metric in table.items():
        exact: dict[tuple[int, float], list] = defaultdict(list)
        finer: dict[tuple[int, float], list] = defaultdict(list)
        for metric, seeds in per_metric.items():
            match = RETRIEVAL_KEY.match(metric)
            if match:
                key = (int(match.group("length")), float(match.group("depth")))
                (finer if match.group("rest") else exact)[key].extend(seeds.values())
        # A key with no further axes is already the mean over them: prefer it to re-averaging.
        cells_acc = {key: exact.get(key) or finer[key] for key in set(exact) | set(finer)}
        if cells_acc:
            lengths = sorted({k[0] for k in cells_acc})
            depths = sorted({k[1] for k in cells_acc})
            acc = np.full((len(depths), len(lengths)), np.nan)
            for (length, depth), values in cells_acc.items():
                acc[depths.index(depth), lengths.index(length)] = float(np.mean(values))
            grids[cell] = (lengths, depths, acc)
    return grids


def plot_retrieval(grids, path: Path, labels: dict[str, str]) -> None:
    plt = _plt()
    cells = sorted(grids)
    fig, axes = plt.subplots(1, len(cells), figsize=(4.5 * len(cells) + 1, 3.8), squeeze=False,
                             layout="constrained")
    image = None
    for ax, cell in zip(axes[0], cells):
        lengths, depths, acc = grids[cell]
        image = ax.imshow(acc, vmin=0.0, vmax=1.0, cmap="magma", origin="lower", aspect="auto")
        ax.set_xticks(range(len(lengths)), [str(v) for v in lengths])
        ax.set_yticks(range(len(depths)), [f"{v:g}" for v in depths])
        ax.set_xlabel("context length")
        ax.set_ylabel("depth")
        ax.set_title(labels[cell], fontsize=9)
        for (i, j), value in np.ndenumerate(acc):
            if math.isfinite(value):
                ax.text(j, i, f"{value:.2f}", ha="center", va="center", fontsize=7,
                        color="black" if value > 0.6 else "white")
    fig.colorbar(image, ax=axes[0].tolist(), label="retrieval accuracy")
    fig.savefig(path, dpi=110)
    plt.close(fig)


# ----------------------------------------------------------------------------- writing


def _f(value, digits=4) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    if isinstance(value, int) or (isinstance(value, float) and value.is_integer() and abs(value) < 1e10):
        return f"{int(value):,}"
    return f"{value:.{digits}g}" if abs(value) >= 1e4 or abs(value) < 1e-3 and value != 0 else f"{value:.{digits}f}"


def _ratio(value) -> str:
    return f"{value:.3f}" if math.isfinite(value) else "-"


def _interval(low, high) -> str:
    return f"[{_f(low)}, {_f(high)}]" if math.isfinite(low) else "1 seed: no interval"


def _p(p) -> str:
    return "-" if not math.isfinite(p) else ("<0.0001" if p < 1e-4 else f"{p:.4f}")


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(str(c) for c in row) + " |" for row in rows]
    return lines


def seeds_sentence(row: Row, halfwidth: float, unit: str) -> str:
    head = f"`{row.cell}` vs `{row.reference}`, {row.metric}: "
    if row.n_paired < 2:
        return head + f"cannot estimate the spread from {row.n_paired} shared seed(s); run at least 2 seeds of each."
    return (head + f"paired differences vary by s = {_f(row.diff_std)}{unit} over {row.n_paired} seeds; "
            f"needs about {row.seeds_needed} seeds for +/-{halfwidth:g}{unit} "
            f"(normal approximation: {row.seeds_needed_normal}).")


def copy_levels(runs: list[Run]) -> dict[str, float]:
    """``probe family -> copy level`` from completed runs' summaries (a property of the probe set;
    when runs disagree, e.g. different data configs, the family's range is not one number and it
    is left out)."""
    seen: dict[str, set[float]] = {}
    for run in runs:
        if not run.usable:
            continue
        for name, value in (run.summary.get("probes") or {}).items():
            if str(name).endswith(COPY_LEVEL) and _is_number(value) and math.isfinite(float(value)):
                seen.setdefault(str(name)[: -len(COPY_LEVEL)], set()).add(round(float(value), 9))
    return {family: values.pop() for family, values in seen.items() if len(values) == 1}


def left_out_rows(runs: list[Run]) -> list[list[str]]:
    rows = []
    for run in sorted(runs, key=lambda r: r.name):
        if run.usable:
            continue
        s = run.summary
        last = max((int(steps[-1]) for steps, _ in run.scalars.values() if steps.size), default=None)
        where = f"last logged at {last:,} tokens" if last is not None else "no curves logged"
        if run.status == "diverged":
            where = f"diverged at {_f(s.get('diverged_at_tokens'))} tokens"
            detail = f"last finite loss {_f(s.get('last_finite_loss'))}"
        elif run.status == "failed":
            error = str(s.get("error") or "").strip()
            detail = error.splitlines()[0][:200] if error else "no error message"
        elif run.status == "stopped":
            where = f"stopped at step {s.get('step', '?')}"
            detail = "stopped early on request; rerun the same command to finish"
        elif run.status == "completed":
            detail = "completed but final_val_loss missing or not finite"
        else:
            detail = f"unknown status {run.status!r}"
        rows.append([f"`{run.name}`", run.status, where, detail.replace("|", "/")])
    return rows


def write_csv(path: Path, rows: list[Row], comparisons: list) -> None:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(CSV_COLUMNS)
        for row in rows:
            writer.writerow(row.csv_values())
        for comp in comparisons:
            writer.writerow([comp.candidate, f"{comp.axis}_ratio", comp.n_seeds, repr(comp.ratio), repr(comp.ci_low),
                             repr(comp.ci_high), "", "", "", "", "", "", comp.baseline, comp.sentence()])


def build_report(grid: Path, halfwidth: float | None, resamples: int, boot_seed: int) -> tuple[str, str]:
    if not grid.is_dir():
        raise ReportError(f"grid folder not found (or not a folder): {grid}")
    runs = find_runs(grid)
    if not runs:
        raise ReportError(f"no summary.json below {grid}")
    info = read_grid_info(grid)
    if halfwidth is None:
        halfwidth = float(info.get("target_halfwidth") or DEFAULT_HALFWIDTH)
    if not halfwidth > 0:
        raise ReportError(f"target half-width must be > 0, got {halfwidth}")
    baseline, how = choose_baseline(runs, info)
    sweep_key = (info.get("sweep") or {}).get("key") if isinstance(info.get("sweep"), dict) else None
    cells = sorted({r.cell for r in runs})
    refs = reference_cells(cells, baseline, sweep_key)
    for run in runs:
        run.scalars = read_scalars(run.folder)
    table = values_by_cell(runs)
    rows = metric_rows(table, refs, halfwidth)
    fairness = fairness_rows(runs, refs)
    eff = efficiency_section(runs, info, baseline, resamples, boot_seed)

    plot_dir = grid / "plots"
    plot_dir.mkdir(exist_ok=True)
    for stale in [*plot_dir.glob("bars_*.png"), *(plot_dir / n for n in OWN_PLOTS)]:
        stale.unlink(missing_ok=True)  # ours from an earlier report of this grid
    plots, plot_notes = [], []
    labels, shared = short_labels(cells)
    if plot_val_loss(runs, plot_dir / "val_loss.png", labels):
        plots.append(("validation loss over training", "val_loss.png"))
    else:
        plot_notes.append("No `loss/val` curves found in the event files; validation-loss plot skipped.")
    if plot_lambda(runs, plot_dir / "lambda.png", labels):
        plots.append(("lambda per layer over training", "lambda.png"))
    else:
        plot_notes.append("No `lambda/layer_<i>` tags found; lambda plot skipped.")
    grids = retrieval_grid(table)
    retrieval_metrics = {m for per in table.values() for m in per if RETRIEVAL_KEY.match(m)}
    if grids:
        plot_retrieval(grids, plot_dir / "retrieval_heatmap.png", labels)
        plots.append(("retrieval accuracy over length and depth", "retrieval_heatmap.png"))
    else:
        plot_notes.append("No probe keys of the form `retrieval/acc_len<L>_depth<D>`; retrieval heatmap skipped.")
    for title, name in plot_bars([r for r in rows if r.n], plot_dir, retrieval_metrics, labels):
        plots.append((f"bar chart, {title}", name))
    if eff and eff[0]:
        comparisons, fits, cells_by_choice, _ = eff
        efficiency.plot_sweep(plot_dir / "efficiency.png", comparisons[0].axis, cells_by_choice, fits, comparisons)
        plots.append(("efficiency across the sweep", "efficiency.png"))
    comparisons = eff[0] if eff else []
    write_csv(grid / "summary.csv", rows, comparisons)

    # ---- report.md
    n_by_status = defaultdict(int)
    for run in runs:
        n_by_status["averaged" if run.usable else run.status] += 1
    md = [f"# headtohead report: {grid.name}", ""]
    md.append(f"- Grid folder: `{grid}`")
    if info.get("recipe"):
        md.append(f"- Recipe: {info['recipe']}")
    elif info.get("name"):
        md.append(f"- Grid: {info['name']} (grid.json names no recipe)")
    else:
        md.append("- Recipe: not stated (" + ("no grid.json" if not info else "grid.json names none") + ")")
    md.append(f"- Baseline: `{baseline}` ({how})")
    if sweep_key and any(refs[c] != baseline for c in cells):
        md.append(f"- Sweep over `{sweep_key}`: each cell is compared with the baseline's design at the same sweep point.")
    elif sweep_key:
        md.append(f"- Sweep over `{sweep_key}`, but no cell name carries `{sweep_key}=<value>` matching a baseline cell: "
                  "every cell is compared with the one baseline.")
    md.append(f"- Runs: {len(runs)} found; {n_by_status['averaged']} completed and averaged"
              + "".join(f", {n} {s}" for s, n in sorted(n_by_status.items()) if s != "averaged") + ".")
    if info.get("varied"):
        md.append(f"- Varied: {', '.join(f'`{v}`' for v in info['varied'])}")
    if info.get("unequal_axes"):
        md.append(f"- Unequal by design (the ratios below are expected to differ from 1 along): "
                  f"{', '.join(f'`{v}`' for v in info['unequal_axes'])}")
    md.append(f"- Intervals: 95% Student t over seeds; differences paired by seed; target half-width {halfwidth:g}.")
    md += ["", "## Fairness: size and compute per cell", ""]
    md += _table(["cell"] + [label for _, label in FAIRNESS_KEYS] + [f"{label} ratio" for _, label in FAIRNESS_KEYS]
                 + ["reference"],
                 [[f"`{e['cell']}`"] + [_f(e[k]) + (" (varies)" if e[k + "_varies"] else "") for k, _ in FAIRNESS_KEYS]
                  + [_ratio(e[k + "_ratio"]) for k, _ in FAIRNESS_KEYS] + [f"`{e['reference']}`"] for e in fairness])
    if any(e["from"] != "completed runs" for e in fairness):
        md.append("")
        md.append("Cells without a completed run take their sizes from unfinished runs.")
    md += ["", "## Final validation loss", ""]
    md += metric_table([r for r in rows if r.metric == LOSS])
    probe_rows = [r for r in rows if r.metric != LOSS]
    md += ["", "## Probes", ""]
    levels = copy_levels(runs)
    if levels:
        md += ["Copy levels: what a guess that ignores the question scores on the probe set: copying a random "
               "fact's value (retrieval); the episode's most frequent or last label, whichever scores better "
               "(classification). An accuracy at or near its level shows no recall. "
               + "; ".join(f"`{name}/acc` {value:.3f}" for name, value in sorted(levels.items())) + ".", ""]
    md += metric_table(probe_rows, with_metric=True) if probe_rows else ["No probe numbers in summary.json."]
    md += ["", "## How many seeds are enough", ""]
    loss_comparisons = [r for r in rows if r.metric == LOSS and r.cell != r.reference]
    md += [f"- {seeds_sentence(r, halfwidth, ' nats')}" for r in loss_comparisons] or ["- Only one cell: nothing to compare."]
    md.append("")
    md.append(f"For probes, the `seeds for +/-w` column uses the same w = {halfwidth:g} in each probe's own units.")
    if eff is not None:
        comparisons, _, _, notes = eff
        axis = info["sweep"]["axis"]
        md += ["", f"## Efficiency across the sweep ({efficiency.AXIS_LABELS[axis]})", ""]
        for comp in comparisons:
            md.append(f"- **{comp.sentence()}.**")
            md.append(f"  Compared at {efficiency.AXIS_LABELS[axis]} = {comp.x_mid:.4g} (geometric middle of the sweep); "
                      f"ratio = x / (baseline's x for the same loss); bootstrap over seeds, {comp.resamples} resamples"
                      + (f", {comp.failed_resamples} refits failed and were left out" if comp.failed_resamples else "")
                      + (f", {comp.below_floor_resamples} fell below the baseline's floor (ratio 0)" if comp.below_floor_resamples else "")
                      + ".")
        md += [f"- {note}" for note in notes]
    rejected = [f"`{run.name}`: {name}" for run in runs if run.usable for name in run.rejected_probes()]
    if rejected:
        md += ["", f"{len(rejected)} probe value(s) were not finite numbers and were left out: "
               + "; ".join(rejected[:10]) + ("; ..." if len(rejected) > 10 else "")]
    md += ["", "## Runs left out of the averages", ""]
    left = left_out_rows(runs)
    for folder in unfinished_folders(grid):
        steps = [int(st[-1]) for st, _ in read_scalars(folder).values() if st.size]
        where = f"last logged at {max(steps):,} tokens" if steps else "no curves logged"
        left.append([f"`{folder.relative_to(grid)}`", "no summary", where, "unfinished or interrupted (no summary.json)"])
    md += _table(["run folder", "status", "where", "detail"], left) if left else ["None: every run completed."]
    md += ["", "## Plots", ""]
    md += [f"- {title}: ![{title}](plots/{name})" for title, name in plots]
    md += [f"- {note}" for note in plot_notes]
    if shared:
        md.append(f"- Plot labels leave out the choices every cell shares: {', '.join(f'`{p}`' for p in shared)}.")
    report = "\n".join(md) + "\n"
    (grid / "report.md").write_text(report)

    console = console_table(rows, baseline, how, left, comparisons, grid)
    return report, console


def metric_table(rows: list[Row], with_metric: bool = False) -> list[str]:
    header = (["metric"] if with_metric else []) + ["cell", "seeds", "mean", "95% CI", "diff to reference", "95% CI of diff",
                                                    "p", "paired n", "seeds for +/-w"]
    body = []
    for r in rows:
        is_ref = r.cell == r.reference
        body.append(([f"`{r.metric}`"] if with_metric else []) + [
            f"`{r.cell}`" + (" (reference)" if is_ref else ""), str(r.n), _f(r.mean),
            _interval(r.ci_low, r.ci_high) if r.n else "no completed seeds",
            "-" if is_ref else _f(r.diff), "-" if is_ref or not math.isfinite(r.diff_low) else _interval(r.diff_low, r.diff_high),
            "-" if is_ref else _p(r.p_value), "-" if is_ref else str(r.n_paired),
            "-" if r.seeds_needed is None else str(r.seeds_needed)])
    return _table(header, body)


def console_table(rows, baseline, how, left, comparisons, grid) -> str:
    header = ["cell", "seeds", "final val loss", "95% CI", "diff", "p", "seeds needed"]
    body = []
    for r in rows:
        if r.metric != LOSS:
            continue
        is_ref = r.cell == r.reference
        body.append([r.cell + (" *" if r.cell == baseline else ""), str(r.n), _f(r.mean),
                     _interval(r.ci_low, r.ci_high) if r.n else "-", "-" if is_ref else _f(r.diff),
                     "-" if is_ref else _p(r.p_value), "-" if r.seeds_needed is None else str(r.seeds_needed)])
    widths = [max(len(h), *(len(b[i]) for b in body)) if body else len(h) for i, h in enumerate(header)]
    lines = ["  ".join(h.ljust(w) for h, w in zip(header, widths))]
    lines += ["  ".join(c.ljust(w) for c, w in zip(b, widths)) for b in body]
    lines.append(f"* baseline ({how})")
    if left:
        lines.append(f"{len(left)} run(s) left out of the averages (failed, diverged or unfinished): see report.md")
    lines += [comp.sentence() for comp in comparisons]
    lines.append(f"wrote {grid / 'report.md'}, {grid / 'summary.csv'}, {grid / 'plots'}/")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="h2h-report", description="Compare the cells of a grid folder over seeds.")
    parser.add_argument("grid", type=Path, help="grid folder holding run folders with summary.json")
    parser.add_argument("--target-halfwidth", type=float, default=None,
                        help="95%% half-width to plan seeds for (default: grid.json, else 0.01 nats)")
    parser.add_argument("--resamples", type=int, default=1000, help="bootstrap resamples for the efficiency estimate")
    parser.add_argument("--bootstrap-seed", type=int, default=0, help="seed of the bootstrap resampling")
    args = parser.parse_args(argv)
    if args.resamples < 1:
        print(f"h2h-report: --resamples must be at least 1, got {args.resamples}", file=sys.stderr)
        return 2
    try:
        _, console = build_report(args.grid, args.target_halfwidth, args.resamples, args.bootstrap_seed)
    except ReportError as exc:
        print(f"h2h-report: {exc}", file=sys.stderr)
        return 2
    print(console)
    return 0


if __name__ == "__main__":
    sys.exit(main())
