"""Read a grid folder: run summaries (``records.read_summary``), TensorBoard scalars (TensorBoard's
own EventAccumulator), the grid record (``records.read_grid``) and run folders left unfinished."""

from __future__ import annotations

import math
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ablate import records
from ablate.cells import Cell

__all__ = [
    "LoadedGrid",
    "ReportError",
    "Run",
    "event_files",
    "folder_cell",
    "cell_of",
    "is_number",
    "load_grid",
    "read_scalars",
    "find_runs",
    "unfinished_folders",
]


class ReportError(Exception):
    """A problem with the input the user must fix; printed as one line, exit code 2."""


@dataclass
class Run:
    folder: Path
    name: str  # folder relative to the grid folder
    summary: records.RunSummary
    scalars: dict = field(default_factory=dict)  # tag -> (steps, values)
    cell: Cell = field(default_factory=Cell)  # set by load_grid: the run's values of the swept keys

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
    baseline: Cell
    metric: str
    metric_given: bool = False  # --metric replaced what the recipe declared


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


def cell_of(summary: records.RunSummary, keys: list[str] | None) -> Cell:
    """A run's cell: its ``summary.cell`` (the attention choice for a summary without one), kept to
    the grid's swept keys when the grid record names them."""
    if summary.cell is None:
        return Cell.of({"attention": summary.attention or "?"})
    cell = Cell.parse(summary.cell)
    return cell.only(keys) if keys else cell


def folder_cell(folder: Path, keys: list[str] | None = None) -> Cell:
    """The cell a run folder belongs to, from its name (the overrides, seed left out)."""
    try:
        cell = Cell.parse(folder.name)
    except ValueError:
        return Cell.of({"folder": folder.name})
    return cell.only(keys) if keys else cell


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
    # here, not at the top: tensorboard's reader is a heavy import that only curve reading needs
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
    keys = list(record.varied) if record and record.varied else None
    for run in runs:
        run.cell = cell_of(run.summary, keys)
    cells = sorted({r.cell for r in runs})
    names = ", ".join(map(str, cells))
    chosen = baseline or (record.baseline if record else None)
    if chosen is None:
        raise ReportError(f"{grid} has no {records.GRID}: pass --baseline CELL (one of: {names})")
    try:
        wanted = Cell.parse(chosen)
    except ValueError as exc:
        raise ReportError(f"--baseline {chosen!r}: {exc}") from None
    matches = [c for c in cells if c == wanted] or [c for c in cells if c.contains(wanted)]
    if len(matches) != 1:
        where = "--baseline" if baseline else f"{records.GRID} baseline"
        raise ReportError(f"{where} names {chosen!r}, which matches {len(matches)} cells; cells: {names}")
    for run in runs:
        run.scalars = read_scalars(run.folder)
    primary = metric or (record.primary_metric if record else "final_val_loss")
    unfinished = unfinished_folders(grid)
    return LoadedGrid(grid, runs, unfinished, record, matches[0], primary, metric_given=metric is not None)
