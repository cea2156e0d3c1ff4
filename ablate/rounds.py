"""Seed rounds that keep their 95%: Stein's (1945) two-stage design.

``grid.max_seeds=N`` makes the grid's first round (its n0 seeds) a first stage. From the first
stage's per-seed values of every primary comparison (``ablate.report.verdicts``: the cells against
their references, or a factorial grid's effects) the total number of seeds is fixed once,

    N = max over the comparisons of max(n0, ceil((t_{0.975, n0-1} s0 / w)^2)),   at most max_seeds,

with s0 the comparison's first-stage SD and w = ``grid.resolution``; one more round adds the
missing seeds. The report then gives each primary comparison Stein's interval (the mean of all N
seeds, s0 and n0 - 1 degrees of freedom), whose coverage is exact for normal differences whatever
N the first stage chose (``ablate.stats.two_stage_interval``); a rule that keeps adding seeds until
the interval looks narrow does not keep its 95% (``ablate.calibration`` measures both).

On a drill, a comparison where fewer than half of a cell's first-stage seeds formed recall asks
for the cap: its spread says little while formation is a matter of luck. A comparison with no
spread in the first stage has no interval at all; it is noted, never called resolved.
"""

from __future__ import annotations

import math
from pathlib import Path

from . import records
from .report.load import ReportError, load_grid
from .report.table import build
from .stats import two_stage_total


def with_seeds(argv: list[str], seeds: list[int]) -> list[str]:
    """The command line with its seed override replaced by ``seed=<seeds>``."""
    kept = [a for a in argv if not a.split("=", 1)[0].lstrip("+~") == "seed"]
    return kept + ["seed=" + ",".join(str(s) for s in seeds)]


def first_stage_verdicts(grid: records.GridRecord) -> list:
    """The primary comparisons of the grid folder as the report computes them (one function for
    both): the factorial effects on the primary metric, else each cell against its reference."""

    report = build(load_grid(Path(grid.dir)), resamples=1)
    return report.effect_verdicts if report.factors else report.verdicts


def plan_total(verdicts: list, first_stage: list[int], resolution: float, cap: int) -> tuple[int, list[str]]:
    """The total number of seeds (Stein's two-stage rule, largest over the comparisons) and one
    line per comparison saying why."""
    n0 = len(first_stage)
    total, lines = n0, []
    for v in verdicts:
        e = v.estimate
        name = " vs ".join(map(str, e.contrast.cells)) if e.contrast.kind == "pair" else str(e.contrast.terms)
        values = [e.values[s] for s in first_stage if s in e.values]
        if v.formation is not None and not v.formation.enough:
            need, why = cap, "fewer than half of a cell's seeds formed recall: the cap"
        elif len(values) < 2:
            need, why = cap, f"{len(values)} first-stage value(s): the cap"
        elif max(values) == min(values):
            need, why = n0, "no spread in the first stage: no interval exists"
        else:
            need = two_stage_total(values, resolution, None)
            why = f"first-stage SD {_sd(values):.3g}"
        total = max(total, min(cap, need))
        capped = f" (the rule asks {need}; cap {cap})" if need > cap else ""
        lines.append(f"  {name}: {why}; needs {min(cap, need)} seeds{capped}")
    return total, lines


def _sd(values: list[float]) -> float:
    mean = sum(values) / len(values)
    return math.sqrt(sum((v - mean) ** 2 for v in values) / (len(values) - 1))


def more_rounds(grid: records.GridRecord, argv: list[str], launch) -> None:
    """After the first round: fix the total number of seeds and launch the missing ones once."""
    if not grid.max_seeds:
        return

    grid.first_stage = list(grid.seeds)
    records.write_grid(grid)
    try:
        verdicts = first_stage_verdicts(grid)
    except ReportError as exc:
        print(f"seed rounds: cannot plan the second round ({exc}); stopping", flush=True)
        return
    total, lines = plan_total(verdicts, grid.first_stage, grid.resolution, grid.max_seeds)
    print(
        f"seed rounds (two-stage, Stein 1945): {len(grid.first_stage)} first-stage seeds, resolution "
        f"{grid.resolution:g} on {grid.primary_metric}, cap {grid.max_seeds}:",
        *lines,
        sep="\n",
        flush=True,
    )
    extra = total - len(grid.seeds)
    if extra <= 0:
        print("seed rounds: the first stage is enough; no second round", flush=True)
        return
    start = max(grid.seeds) + 1
    grid.jobs = grid.jobs // len(grid.seeds) * total
    grid.seeds = grid.seeds + list(range(start, start + extra))
    grid.rounds = 2
    records.write_grid(grid)
    print(f"seed rounds: round 2 adds seeds {start}-{start + extra - 1} ({total} in all)", flush=True)
    launch(with_seeds(argv, grid.seeds))
