"""Seeds until the answer is clear: after a grid's first round, add seeds in rounds until the
primary comparison's interval is narrow enough or ``grid.max_seeds`` is reached.

The stopping rule looks only at the interval's half-width (``grid.resolution``), never at the
sign of the difference or its p-value, so stopping cannot favour a result. Each round doubles the
seeds (capped at the maximum); a relaunch skips runs that already finished.
"""

from __future__ import annotations

import math
from pathlib import Path

from . import records
from .stats import paired_difference


def metric_of(summary: records.RunSummary, name: str) -> float | None:
    """The named number of a run: a summary field (``final_val_loss``) or a probe (``drill/auc``)."""
    value = summary.probes.get(name) if name in summary.probes else getattr(summary, name, None)
    return float(value) if isinstance(value, (int, float)) and math.isfinite(value) else None


def values_by_cell(grid_dir: Path, metric: str) -> dict[str, dict[int, float]]:
    """``cell -> seed -> value`` over the grid's completed runs."""
    out: dict[str, dict[int, float]] = {}
    for path in sorted(Path(grid_dir).glob(f"*/{records.SUMMARY}")):
        s = records.read_summary(path.parent)
        value = metric_of(s, metric) if s and s.status == "completed" else None
        if value is not None and s.cell is not None and s.seed is not None:
            out.setdefault(s.cell, {})[int(s.seed)] = value
    return out


def primary_halfwidth(grid: records.GridRecord) -> float | None:
    """The widest 95% half-width of the paired differences against the baseline (None when some
    comparison has fewer than 2 pairs)."""
    cells = values_by_cell(Path(grid.dir), grid.primary_metric)
    base = cells.get(grid.baseline)
    others = [c for c in cells if c != grid.baseline]
    if base is None or not others:
        return None
    widths = []
    for cell in others:
        seeds = sorted(set(base) & set(cells[cell]))
        if len(seeds) < 2:
            return None
        _, low, high, _ = paired_difference([cells[cell][s] for s in seeds], [base[s] for s in seeds])
        widths.append((high - low) / 2)
    return max(widths)


def with_seeds(argv: list[str], seeds: list[int]) -> list[str]:
    """The command line with its seed override replaced by ``seed=<seeds>``."""
    kept = [a for a in argv if not a.split("=", 1)[0].lstrip("+~") == "seed"]
    return kept + ["seed=" + ",".join(str(s) for s in seeds)]


def more_rounds(grid: records.GridRecord, argv: list[str], launch) -> None:
    """Launch further seed rounds while the primary comparison is wider than ``grid.resolution``."""
    if not grid.max_seeds:
        return
    while True:
        width = primary_halfwidth(grid)
        shown = "unknown" if width is None else f"{width:.4g}"
        if width is not None and width <= grid.resolution:
            print(
                f"seed rounds: {grid.primary_metric} half-width {shown} <= {grid.resolution} after "
                f"{len(grid.seeds)} seeds; stopping",
                flush=True,
            )
            return
        if len(grid.seeds) >= grid.max_seeds:
            print(
                f"seed rounds: {grid.primary_metric} half-width {shown} > {grid.resolution} at the cap of "
                f"{grid.max_seeds} seeds (grid.max_seeds); stopping",
                flush=True,
            )
            return
        extra = min(len(grid.seeds), grid.max_seeds - len(grid.seeds))
        start = max(grid.seeds) + 1
        grid.seeds = grid.seeds + list(range(start, start + extra))
        grid.jobs, grid.rounds = grid.jobs // (len(grid.seeds) - extra) * len(grid.seeds), grid.rounds + 1
        records.write_grid(grid)
        print(
            f"seed rounds: {grid.primary_metric} half-width {shown} > {grid.resolution}; round {grid.rounds} "
            f"adds seeds {start}-{start + extra - 1}",
            flush=True,
        )
        launch(with_seeds(argv, grid.seeds))
