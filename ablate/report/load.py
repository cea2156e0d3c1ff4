"""Read a grid folder: run summaries (``records.read_summary``), TensorBoard scalars (TensorBoard's
own EventAccumulator), the grid record (``records.read_grid``) and run folders left unfinished."""

from __future__ import annotations

import math
import re
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ablate import records

SEED_PART = re.compile(r",?seed=\d+$")


class ReportError(Exception):
    """A problem with the input the user must fix; printed as one line, exit code 2."""


@dataclass
class Run:
    folder: Path
    name: str  # folder relative to the grid folder
    summary: records.RunSummary
    scalars: dict = field(default_factory=dict)  # tag -> (steps, values)

    @property
    def cell(self) -> str:
        return str(self.summary.cell or self.summary.attention or "?")

    @property
    def usable(self) -> bool:
        loss = self.summary.final_val_loss
        return self.summary.status == "completed" and is_number(loss) and math.isfinite(loss)


@dataclass
class LoadedGrid:
    folder: Path
    runs: list[Run]
    unfinished: list[Path]
    record: records.GridRecord | None
    baseline: str
    metric: str


def is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def find_runs(grid: Path) -> list[Run]:
    runs = []
    for path in sorted(grid.rglob(records.SUMMARY)):
        summary = records.read_summary(path.parent)
        if summary is None:
            raise ReportError(f"{path}: cannot read {records.SUMMARY} (not a JSON object)")
        runs.append(Run(path.parent, str(path.parent.relative_to(grid)) or ".", summary))
    return runs


def unfinished_folders(grid: Path) -> list[Path]:
    """Run folders (holding config.yaml) without a summary.json: unfinished or interrupted runs."""
    return sorted(p.parent for p in grid.rglob(records.CONFIG) if not (p.parent / records.SUMMARY).exists())


def folder_cell(folder: Path) -> str:
    """The cell a run folder belongs to, from its name (the overrides without ``seed=N``)."""
    return SEED_PART.sub("", folder.name)


def event_files(folder: Path) -> list[Path]:
    """Event files anywhere under a run folder, except inside nested run folders."""
    found = []
    for path in sorted(folder.rglob("events.out.tfevents.*")):
        parents = path.relative_to(folder).parents
        nested = any((folder / p / records.SUMMARY).exists() for p in parents if str(p) != ".")
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
    return {
        tag: (np.array(sorted(points)), np.array([points[s] for s in sorted(points)]))
        for tag, points in merged.items()
    }


def read_record(grid: Path) -> records.GridRecord | None:
    path = grid / records.GRID
    if not path.exists():
        return None
    try:
        record = records.read_grid(grid)
    except TypeError as exc:
        raise ReportError(f"{path}: not a grid record ({exc})") from None
    if record is None:
        raise ReportError(f"{path}: cannot read {records.GRID} (not a JSON object)")
    return record


def load_grid(grid: Path, baseline: str | None = None, metric: str | None = None) -> LoadedGrid:
    """Runs, record, baseline and primary metric of one grid folder (baseline and metric from
    grid.json; ``baseline``/``metric`` given by the user override it)."""
    grid = Path(grid)
    if not grid.is_dir():
        raise ReportError(f"grid folder not found (or not a folder): {grid}")
    runs = find_runs(grid)
    if not runs:
        raise ReportError(f"no {records.SUMMARY} below {grid}")
    record = read_record(grid)
    cells = sorted({r.cell for r in runs})
    chosen = baseline or (record.baseline if record else None)
    if chosen is None:
        raise ReportError(f"{grid} has no {records.GRID}: pass --baseline CELL (one of: {', '.join(cells)})")
    if chosen not in cells:
        where = "--baseline" if baseline else f"{records.GRID} baseline"
        raise ReportError(f"{where} names {chosen!r}, but no run has that cell; cells: {', '.join(cells)}")
    for run in runs:
        run.scalars = read_scalars(run.folder)
    primary = metric or (record.primary_metric if record else "final_val_loss")
    return LoadedGrid(grid, runs, unfinished_folders(grid), record, chosen, primary)
