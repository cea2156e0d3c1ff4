"""Figures of a report, all through one matplotlib set-up (the Agg backend, files only).
The first figure is the paired-difference chart: one bar per comparison on the primary metric,
whiskers = the 95% t interval of the paired difference."""

from __future__ import annotations

import math
import re
from collections import defaultdict
from pathlib import Path

import numpy as np

from ablate import efficiency
from ablate.cells import Cell
from ablate.stats import kaplan_meier, mean_ci

from .table import Report, budget_tokens
from .verdicts import formation_family
from .wording import count

__all__ = [
    "interaction_plot",
    "km_plot",
    "over_training_plot",
    "paired_difference_chart",
    "plot_lambda",
    "plot_retrieval",
    "plot_sweep",
    "plot_val_loss",
    "retrieval_grid",
    "short_labels",
    "pyplot",
]

LAMBDA_TAG = re.compile(r"^lambda/layer_(\d+)$")
RETRIEVAL_KEY = re.compile(
    r"^retrieval/acc[/_]len(?P<length>\d+)[/_]depth(?P<depth>\d+(?:\.\d+)?)(?P<rest>.*)$"
)


def pyplot():
    """matplotlib's pyplot on the Agg backend (files only), imported on first use: a report
    that draws nothing never pays for it."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _save(plt, fig, path: Path) -> None:
    """Every figure is laid out, written at one resolution and closed the same way."""
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def paired_difference_chart(report: Report, path: Path) -> bool:
    shown = [v.estimate for v in report.verdicts if math.isfinite(v.estimate.mean)]
    if not shown:
        return False
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(max(5.5, 1.4 * len(shown) + 2), 3.6))
    x = np.arange(len(shown))
    lows = [e.mean - e.low if math.isfinite(e.low) else 0.0 for e in shown]
    highs = [e.high - e.mean if math.isfinite(e.high) else 0.0 for e in shown]
    ax.bar(x, [e.mean for e in shown], 0.6, yerr=[lows, highs], capsize=4, color="tab:blue")
    ax.axhline(0.0, color="black", lw=0.8)
    labels = [f"{e.contrast.cells[0].label(e.contrast.cells[1])}\n(n={e.n})" for e in shown]
    ax.set_xticks(x, labels, fontsize=8)
    ax.set_ylabel(f"paired difference in {report.metric}")
    method = "two-stage t" if report.first_stage else "t"
    ax.set_title(f"{report.metric}: cell minus reference\nwhiskers = 95% {method} interval", fontsize=9)
    _save(plt, fig, path)
    return True


def _aligned(curves: list[tuple[np.ndarray, np.ndarray]]):
    """Curves interpolated onto the densest run's steps within the range all runs cover."""
    start = max(c[0][0] for c in curves)
    stop = min(c[0][-1] for c in curves)
    grid = max(curves, key=lambda c: len(c[0]))[0]
    grid = grid[(grid >= start) & (grid <= stop)]
    if grid.size == 0:
        return grid, np.empty((len(curves), 0))
    return grid, np.stack([np.interp(grid, s, v) for s, v in curves])


def plot_val_loss(runs: list, path: Path, labels: dict[str, str]) -> list[str]:
    plt = pyplot()
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
        (line,) = ax.plot(
            steps,
            stacked.mean(axis=0),
            marker="o" if steps.size <= 20 else None,
            markersize=3,
            label=f"{labels[cell]} ({count(n, 'seed')})",
        )
        ax.fill_between(steps, stacked.min(axis=0), stacked.max(axis=0), color=line.get_color(), alpha=0.2)
    ax.set_xlabel("tokens seen")
    ax.set_ylabel("validation loss (nats)")
    ax.set_title("validation loss: mean over seeds, band = min to max")
    ax.legend(fontsize=8)
    _save(plt, fig, path)
    return sorted(by_cell)


def plot_lambda(runs: list, path: Path, labels: dict[str, str]) -> bool:
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
    plt = pyplot()
    cells = sorted(by_cell)
    fig, axes = plt.subplots(1, len(cells), figsize=(5.5 * len(cells), 4), squeeze=False)
    for ax, cell in zip(axes[0], cells):
        layers = sorted(by_cell[cell])
        cmap = plt.get_cmap("viridis")
        for i, layer in enumerate(layers):
            steps, stacked = _aligned(by_cell[cell][layer])
            ax.plot(
                steps, stacked.mean(axis=0), color=cmap(i / max(1, len(layers) - 1)), label=f"layer {layer}"
            )
        ax.set_title(f"lambda per layer: {labels[cell]}", fontsize=9)
        ax.set_xlabel("tokens seen")
        ax.set_ylabel("lambda (mean over seeds)")
        ax.legend(fontsize=7)
    _save(plt, fig, path)
    return True


def retrieval_grid(by_cell) -> dict[str, tuple[list[int], list[float], np.ndarray]]:
    """cell -> (lengths, depths, accuracy[depth, length]), mean over seeds.

    Uses ``retrieval/acc_len<L>_depth<D>`` where present; otherwise averages the keys that carry
    further axes (``..._depth<D>_n<N>_r<R>``) over those axes.
    """
    grids = {}
    for cell, per_metric in by_cell.items():
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
    plt = pyplot()
    cells = sorted(grids)
    fig, axes = plt.subplots(
        1, len(cells), figsize=(4.5 * len(cells) + 1, 3.8), squeeze=False, layout="constrained"
    )
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
                ax.text(
                    j,
                    i,
                    f"{value:.2f}",
                    ha="center",
                    va="center",
                    fontsize=7,
                    color="black" if value > 0.6 else "white",
                )
    fig.colorbar(image, ax=axes[0].tolist(), label="retrieval accuracy")
    fig.savefig(path, dpi=110)
    plt.close(fig)


def short_labels(cells: list[Cell]) -> tuple[dict[Cell, str], list[str]]:
    """Plot labels without the ``key=value`` parts every cell shares; also returns those parts."""
    shared = (
        [f"{k}={v}" for k, v in cells[0].items if all(c.get(k) == v for c in cells)] if len(cells) > 1 else []
    )
    keep = {k for c in cells for k, v in c.items if f"{k}={v}" not in shared}
    labels = {c: str(c.only(keep)) if len(c.only(keep)) else str(c) for c in cells}
    if len(set(labels.values())) < len(cells):
        return {c: str(c) for c in cells}, []
    return labels, shared


def plot_sweep(path, axis: str, cells_by_choice: dict, fits: dict, comparisons: list) -> None:
    """Left: points and fitted curves per attention choice. Right: ratio R(x) with its band."""
    plt = pyplot()
    fig, (left, right) = plt.subplots(1, 2, figsize=(11, 4.2))
    cycle = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    colors = {name: cycle[i % len(cycle)] for i, name in enumerate(sorted(cells_by_choice))}
    label = efficiency.AXIS_LABELS[axis]
    for name, cells in sorted(cells_by_choice.items()):
        color = colors[name]
        xs, ys = efficiency._stack(cells)
        left.scatter(xs, ys, s=14, color=color, alpha=0.7)
        if name in fits:
            curve = fits[name]
            grid = np.geomspace(xs.min(), xs.max(), 100)
            left.plot(grid, curve.loss(grid), color=color, label=f"{name} ({curve.kind})")
        else:
            left.plot([], [], color=color, label=f"{name} (no fit)")
    left.set_xscale("log")
    left.set_xlabel(label)
    left.set_ylabel("final validation loss")
    left.set_title("loss across the sweep")
    left.legend(fontsize=8)
    for comp in [c for c in comparisons if c.determined]:
        color = colors.get(comp.candidate, "black")
        inside = comp.grid_inside if comp.grid_inside is not None else np.ones(len(comp.grid_x), bool)
        x = comp.grid_x[inside]
        right.plot(
            x, 100 * comp.grid_ratio[inside], color=color, label=f"{comp.candidate} vs {comp.baseline}"
        )
        low, high = comp.grid_low[inside], comp.grid_high[inside]
        finite = np.isfinite(low) & np.isfinite(high)
        right.fill_between(x[finite], 100 * low[finite], 100 * high[finite], color=color, alpha=0.2)
        right.errorbar(
            [comp.x_mid],
            [100 * comp.ratio],
            color=color,
            fmt="o",
            yerr=[[100 * (comp.ratio - comp.ci_low)], [100 * (comp.ci_high - comp.ratio)]],
        )
    right.axhline(100, color="grey", lw=0.8, ls="--")
    right.set_xscale("log")
    right.set_xlabel(label)
    right.set_ylabel(f"% of baseline's {efficiency.AXIS_NOUNS[axis]} for equal loss")
    few = any(c.approximate for c in comparisons if c.determined)
    band = "approximate t-calibrated bootstrap 95%" if few else "t-calibrated bootstrap 95%"
    right.set_title(
        f"size ratio R (band: {band}, where the baseline's\nanswer lies in its swept range)", fontsize=9
    )
    if comparisons:
        right.legend(fontsize=8)
    _save(plt, fig, path)


def interaction_plot(report: Report, by_cell: dict, path: Path) -> bool:
    """The primary metric against the first factor's levels, one line per level of the second
    (other factors averaged): per-seed points faint, mean and 95% t interval bold."""
    crossed = [f for f in report.factors if not len(f.within)]
    if len(crossed) < 2:
        return False

    a, b = crossed[0], crossed[1]
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6, 4))
    x = np.arange(len(a.levels))
    for j, level_b in enumerate(b.levels):
        per_seed = []
        for level_a in a.levels:
            cells = [c for c in by_cell if c.get(a.key) == level_a and c.get(b.key) == level_b]
            seeds = (
                set.intersection(*(set(by_cell[c].get(report.metric, {})) for c in cells)) if cells else set()
            )
            per_seed.append({s: np.mean([by_cell[c][report.metric][s] for c in cells]) for s in seeds})
        offset = (j - (len(b.levels) - 1) / 2) * 0.06
        (line,) = ax.plot([], [], marker="o", lw=2.2, label=f"{b.label}={level_b}")
        for i, values in enumerate(per_seed):
            ax.scatter(
                [x[i] + offset] * len(values), list(values.values()), color=line.get_color(), alpha=0.3, s=14
            )
        stats = [mean_ci(list(v.values())) if len(v) else (math.nan,) * 3 for v in per_seed]
        means = [m for m, _, _ in stats]
        errs = [
            [m - lo if math.isfinite(lo) else 0 for m, lo, _ in stats],
            [hi - m if math.isfinite(hi) else 0 for m, _, hi in stats],
        ]
        ax.errorbar(x + offset, means, yerr=errs, color=line.get_color(), lw=2.2, capsize=5, marker="o")
    ax.set_xticks(x, [f"{a.label}={v}" for v in a.levels])
    ax.set_ylabel(report.metric)
    ax.set_title(
        f"{report.metric} by {a.label} and {b.label}\nfaint: seeds; bold: mean, 95% t interval", fontsize=9
    )
    ax.legend(fontsize=8)
    _save(plt, fig, path)
    return True


def over_training_plot(report: Report, names: dict, path: Path) -> bool:
    """Every effect (or pairwise difference) on the primary metric at each evaluation point, with
    its 95% t interval as a band; zero dashed."""
    shown = [t for t in report.over_training if t.points and t.contrast.kind != "simple"]
    if not shown:
        return False
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(7.5, 4.2))
    for t in shown:
        tokens = np.array([p[0] for p in t.points])
        est = [p[1] for p in t.points]
        (line,) = ax.plot(tokens, [e.mean for e in est], marker="o", markersize=3, label=names[t.contrast])
        low = [e.low if math.isfinite(e.low) else e.mean for e in est]
        high = [e.high if math.isfinite(e.high) else e.mean for e in est]
        ax.fill_between(tokens, low, high, color=line.get_color(), alpha=0.2)
    ax.axhline(0.0, color="black", lw=0.8, ls="--")
    ax.set_xlabel("tokens seen")
    ax.set_ylabel(f"effect on {report.metric}")
    ax.set_title(f"{report.metric}: effects over training (band: 95% t interval across seeds)", fontsize=9)
    ax.legend(fontsize=8)
    _save(plt, fig, path)
    return True


def km_plot(report: Report, by_cell: dict, path: Path) -> bool:
    """Kaplan-Meier curves of the tokens to the halfway level, one per cell: the share of seeds
    that have not reached it yet (not reached by the budget = censored there, marked +)."""
    family = formation_family(report.metric)
    budget = budget_tokens(report.runs)
    if family is None or not math.isfinite(budget):
        return False
    curves = {}
    for cell, per in sorted(by_cell.items()):
        flags, times = per.get(f"{family}/half_reached", {}), per.get(f"{family}/tokens_to_half", {})
        if flags:
            t = [times.get(s, budget) if flags[s] > 0.5 else budget for s in flags]
            curves[cell] = (t, [flags[s] > 0.5 for s in flags])
    if not curves:
        return False
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(7, 4))
    labels, _ = short_labels(list(curves))
    for cell, (t, observed) in curves.items():
        x, s = [0.0], [1.0]
        if any(observed):
            event_t, surv, _ = kaplan_meier(t, observed)
            x, s = [0.0, *event_t.tolist()], [1.0, *surv.tolist()]
        (line,) = ax.step(
            x + [budget], s + [s[-1]], where="post", label=f"{labels[cell]} ({sum(observed)}/{len(t)})"
        )
        if not all(observed):
            ax.plot([budget], [s[-1]], "+", color=line.get_color(), markersize=10)
    ax.set_xlabel("tokens seen")
    ax.set_ylabel("share of seeds not yet at halfway")
    ax.set_ylim(-0.02, 1.02)
    ax.set_title("Kaplan-Meier: tokens to the halfway level (+ = not reached by the budget)", fontsize=9)
    ax.legend(fontsize=8)
    _save(plt, fig, path)
    return True
