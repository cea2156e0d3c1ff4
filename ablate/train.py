"""``h2h-train``: the Hydra application over conf/.

    h2h-train attention=differential attention.head_norm=false seed=3
    h2h-train -m recipe=quickstart

Before Hydra starts any run, :func:`main` composes and validates every job (a bad value stops
the program with exit code 2 and one line), and for a grid checks parameter fairness against
the recipe's baseline. Runs land in deterministic folders named after their overrides, so the
same command resumes an interrupted run and skips a finished one.
"""

from __future__ import annotations

import json
import os
import sys
import traceback
from pathlib import Path

import hydra
from hydra.core.global_hydra import GlobalHydra
from hydra.core.hydra_config import HydraConfig
from hydra.types import RunMode
from omegaconf import OmegaConf

from . import records
from .cells import Cell
from .checks import one_line
from .config import CONF_DIR
from .factors import FactorError, factors_of
from .grid import (
    check_all,
    check_cells,
    check_fairness,
    compose_checked,
    expand_jobs,
    find_baseline,
    format_table,
    output_folder,
    price_budget,
)
from .rounds import more_rounds
from .runner import Interrupted, RunInfo, run
from .schema import ConfigError

__all__ = ["main", "preflight", "exit_code", "EXIT_FAILED", "EXIT_CONFIG", "EXIT_BUSY", "EXIT_INTERRUPTED"]

PASS_THROUGH = (
    "--help",
    "-h",
    "--hydra-help",
    "--cfg",
    "-c",
    "--info",
    "-i",
    "--resolve",
    "--package",
    "-p",
    "--shell-completion",
    "-sc",
    "--version",
)
EXIT_FAILED = 1  # a run failed or diverged, or a file could not be written
EXIT_CONFIG = 2  # a value the user must fix (also a damaged or foreign checkpoint)
EXIT_BUSY = 2  # another process holds the run folder
EXIT_INTERRUPTED = 130  # Ctrl-C or SIGTERM


class Diverged(Exception):
    """A single run ended with a non-finite loss or gradient (its summary says where)."""


def exit_code(exc: BaseException) -> int:
    """The one place an error becomes an exit code."""
    for kinds, code in (
        ((ConfigError, records.CheckpointError), EXIT_CONFIG),
        ((records.FolderBusy,), EXIT_BUSY),
        ((Interrupted, KeyboardInterrupt), EXIT_INTERRUPTED),
        ((records.WriteError, Diverged), EXIT_FAILED),
    ):
        if isinstance(exc, kinds):
            return code
    raise exc  # not ours: let its traceback show


def _stop(exc: BaseException) -> None:
    """Print the error in one line on stderr and exit with its code."""
    code = exit_code(exc)
    if not isinstance(exc, Diverged):  # a divergence was reported when the run ended
        words = (
            "error: " if isinstance(exc, (ConfigError, records.CheckpointError, records.WriteError)) else ""
        )
        print(f"h2h-train: {words}{exc}", file=sys.stderr, flush=True)
    sys.exit(code)


# A single run's FLOPs budget when budget.match=flops leaves budget.flops null: priced by the
# pre-flight (which composes the baseline's config) and read by the run in the same process.
_SINGLE_RUN_FLOPS: float | None = None


def _split_argv(argv: list[str]) -> tuple[bool, list[str], list[str]]:
    multirun = any(a in ("-m", "--multirun") for a in argv)

    def hydra_only(a: str) -> bool:  # launcher and output settings; the search path shapes the config
        key = a.lstrip("+~")
        return key.startswith("hydra") and not key.startswith("hydra.searchpath")

    design = [a for a in argv if not a.startswith("-") and not hydra_only(a)]
    hydra_side = [a for a in argv if not a.startswith("-") and hydra_only(a)]
    return multirun, design, hydra_side


def preflight(argv: list[str]) -> records.GridRecord | None:
    """Validate everything before anything trains. Returns the grid record for ``-m``."""
    multirun, design, hydra_side = _split_argv(argv)
    if not multirun:
        cfg = compose_checked(design)
        _check_free(output_folder(design + hydra_side, multirun=False))
        global _SINGLE_RUN_FLOPS
        _SINGLE_RUN_FLOPS = price_budget(cfg, design, cfg.grid.baseline)
        return None
    jobs, base, branches = expand_jobs(design, hydra_side)
    cells = check_cells(jobs)
    grid = base.grid
    factors = grid_factors(grid, cells)
    base_cell = find_baseline(cells, grid.baseline or reference_cell(factors))
    rows = check_fairness(cells, base_cell, grid.tolerance, list(grid.unequal_axes))
    prices = {str(c.cell): price_budget(c.cfg, c.overrides, str(base_cell.cell)) for c in cells}
    return records.GridRecord(
        name=str(grid.name),
        dir=str(output_folder(design + hydra_side, multirun=True)),
        baseline=str(base_cell.cell),
        recipe=base.hydra.runtime.choices.get("recipe"),
        primary_metric=str(grid.primary_metric),
        resolution=float(grid.resolution),
        max_seeds=grid.max_seeds,
        varied=sorted({k for c in cells for k in c.cell.keys()}),
        factors=[f.to_dict() for f in factors],
        unequal_axes=list(grid.unequal_axes),
        tolerance=grid.tolerance,
        sweep=OmegaConf.to_container(grid.sweep) if grid.sweep is not None else None,
        jobs=len(jobs),
        budget_flops={k: v for k, v in prices.items() if v is not None},
        parallel=_parallel_jobs(base.hydra.launcher),
        branches=branches,
        seeds=sorted({_seed_of(j, base.seed) for j in jobs}),
        fairness=rows,
    )


def _seed_of(job: list[str], default: int) -> int:
    seeds = [o.split("=", 1)[1] for o in job if o.split("=", 1)[0].lstrip("+") == "seed"]
    return int(seeds[-1]) if seeds else int(default)


def grid_factors(grid, cells) -> list:
    """The factors of a grid whose recipe declares ``grid.factors`` (else none: a pairwise grid)."""
    if grid.get("factors") is None:
        return []
    try:
        return factors_of(OmegaConf.to_container(grid.factors), [c.cell for c in cells])
    except FactorError as exc:
        raise ConfigError(str(exc)) from None


def reference_cell(factors) -> str | None:
    """The cell with every factor at its reference level (a nested factor counts where its
    ``within`` cell is itself at reference): a factorial grid's default baseline."""
    if not factors:
        return None
    refs = Cell.of({f.key: f.reference for f in factors if not len(f.within)})
    nested = {f.key: f.reference for f in factors if len(f.within) and refs.contains(f.within)}
    return str(refs.with_values(nested))


def _check_free(run_dir: Path) -> None:
    """Raise FolderBusy when another process holds the run folder (checked again, race-free,
    when the run takes the folder's lock)."""
    holder = records.lock_holder(run_dir)
    if holder is not None:
        raise records.FolderBusy(run_dir, holder)


# In a grid folder during a launch: one JSON line per cell skipped because another process held it.
ELSEWHERE = ".running_elsewhere.jsonl"


def _note_running_elsewhere(grid_dir: Path, exc: records.FolderBusy) -> None:
    """Append (O_APPEND: one short line per write, safe from parallel jobs) for the epilogue."""
    line = json.dumps({"run": exc.folder.name, **exc.holder}) + "\n"
    with open(grid_dir / ELSEWHERE, "a") as f:
        f.write(line)


def _task_impl(cfg) -> records.RunSummary | None:
    hc = HydraConfig.get()
    in_grid = hc.mode == RunMode.MULTIRUN
    run_dir = Path(hc.runtime.output_dir)
    choices = {k: v for k, v in hc.runtime.choices.items() if not k.startswith("hydra") and v is not None}
    overrides = list(hc.overrides.task)
    # in a grid, the cell is the run's values of the keys the grid sweeps (the pre-flight's grid.json)
    record = records.read_grid(Path(os.path.abspath(hc.sweep.dir))) if in_grid else None
    cell = Cell.from_overrides(overrides, record.varied if record else None)
    n_jobs = _parallel_jobs(hc.launcher) if "n_jobs" in hc.launcher else None
    slot = int(hc.job.num) % n_jobs if in_grid and n_jobs and n_jobs > 1 else None
    info = RunInfo(run_dir=run_dir, choices=choices, cell=str(cell), overrides=overrides, slot=slot)

    if cfg.budget.match == "flops" and cfg.budget.flops is None:  # priced by the pre-flight
        cfg.budget.flops = record.budget_flops.get(str(cell)) if record else _SINGLE_RUN_FLOPS
    fingerprint = records.config_fingerprint(OmegaConf.to_container(cfg, resolve=True))
    done = records.read_summary(run_dir)
    if done and done.status in ("completed", "diverged") and done.fingerprint == fingerprint:
        # the same config and seed give the same numbers, so running it again would repeat them
        print(f"skip {run_dir.name}: already {done.status} with the same config", flush=True)
        if done.status == "diverged" and not in_grid:
            raise Diverged(run_dir)
        return done
    try:
        with records.folder_lock(run_dir):
            return _locked_run(cfg, info, in_grid, n_jobs)
    except records.FolderBusy as exc:
        if not in_grid:
            raise
        print(f"skip {run_dir.name}: running elsewhere ({exc})", flush=True)
        _note_running_elsewhere(Path(os.path.abspath(hc.sweep.dir)), exc)
        return None  # no summary of this launch: the cell is listed in the grid's epilogue


# What a single run stops on with one line and an exit code; in a grid the failure is recorded
# and the other runs go on (anything else also prints its traceback).
EXPECTED = (ConfigError, records.CheckpointError, records.WriteError)


def _locked_run(cfg, info, in_grid: bool, n_jobs) -> records.RunSummary | None:
    """One run, its failure path included, while this process holds the run folder's lock."""
    try:
        check_all(cfg)
        summary = run(cfg, info, parallel_jobs=n_jobs if in_grid else None)
    except (Interrupted, KeyboardInterrupt) as exc:  # stops the whole launch; the checkpoint is kept
        if isinstance(exc, KeyboardInterrupt):
            exc = Interrupted(
                f"interrupted outside the training loop; {info.run_dir} keeps its last complete "
                "checkpoint, if any. Run the same command again to resume."
            )
        _stop(exc)
    except Exception as exc:
        if not in_grid and isinstance(exc, EXPECTED):  # one line and an exit code, nothing written
            if not isinstance(exc, records.WriteError):  # but the reason, when the disk takes it
                _log_error(info.run_dir, exc)
            raise
        failed = _record_failure(info, cfg, exc)
        if not in_grid:
            raise
        if not isinstance(exc, EXPECTED):
            traceback.print_exc()
        return failed
    _report_run(summary, info.run_dir)
    if summary.status == "diverged" and not in_grid:
        raise Diverged(info.run_dir)
    return summary


def _log_error(run_dir: Path, exc: BaseException) -> None:
    with open(run_dir / records.LOG, "a") as log:
        log.write(f"error: {exc}\n")


def _record_failure(info, cfg, exc: BaseException) -> records.RunSummary:
    """The one failure summary: written to the run folder (an earlier non-failed summary is kept
    under another name); when even that cannot be written, it is only returned."""
    run_dir = info.run_dir
    summary = records.RunSummary(
        status="failed",
        attention=info.choices.get("attention"),
        cell=info.cell,
        seed=int(cfg.seed),
        choices=info.choices,
        overrides=info.overrides,
        error=one_line(f"{type(exc).__name__}: {exc}", 1000),
    )
    try:
        earlier = records.read_summary(run_dir)
        if earlier and earlier.status != "failed":
            # e.g. a grid relaunched after its recipe changed: the earlier result stays, under another name
            kept = run_dir / f"summary.{earlier.fingerprint or 'earlier'}.json"
            (run_dir / records.SUMMARY).replace(kept)
            print(
                f"run {run_dir.name}: its earlier {earlier.status} summary was kept as {kept.name}",
                file=sys.stderr,
            )
        records.write_summary(run_dir, summary)
    except (OSError, records.WriteError) as write_exc:
        print(f"run {run_dir.name}: its failure could not be recorded ({write_exc})", file=sys.stderr)
    print(f"run {run_dir.name} failed: {summary.error}", file=sys.stderr, flush=True)
    return summary


def _report_run(s: records.RunSummary, run_dir: Path) -> None:
    if s.status == "completed":
        acc = s.curve_metrics.get("drill/acc")
        drill = f", held-out accuracy {acc:.3f}" if acc is not None else ""
        print(
            f"done {s.cell} seed {s.seed}: val loss {s.final_val_loss:.4f}{drill} after {s.tokens:,} tokens "
            f"in {s.wall_seconds:.0f} s -> {run_dir}",
            flush=True,
        )
    elif s.status == "diverged":
        print(
            f"DIVERGED {s.cell} seed {s.seed}: non-finite loss or gradient at {s.diverged_at_tokens:,} "
            "tokens "
            f"(last finite loss {s.last_finite_loss}); event files kept in {run_dir}",
            file=sys.stderr,
            flush=True,
        )
    elif s.status == "stopped":
        print(
            f"stopped {run_dir.name} at step {s.step} as asked (runtime.stop_after_steps); "
            "run the same command without it to continue",
            flush=True,
        )


def _hydra_app():
    @hydra.main(config_path=str(CONF_DIR), config_name="config", version_base="1.3")
    def task(cfg):
        try:
            return _task_impl(cfg)
        except (*EXPECTED, records.FolderBusy, Diverged) as exc:  # single runs (a grid goes on)
            _stop(exc)

    return task


def _rel(path: Path) -> str:
    try:
        return os.path.relpath(path)
    except ValueError:
        return str(path)


def main(argv: list[str] | None = None) -> None:
    try:
        _main(argv)
    except KeyboardInterrupt:
        print("h2h-train: interrupted before training started; nothing was written", file=sys.stderr)
        sys.exit(EXIT_INTERRUPTED)
    except (ConfigError, records.FolderBusy) as exc:  # the pre-flight's: before anything trains
        _stop(exc)


def _main(argv: list[str] | None = None) -> None:
    argv = list(sys.argv[1:] if argv is None else argv)
    grid = None
    if not any(a in PASS_THROUGH or a.startswith(("--cfg", "--package")) for a in argv):
        grid = preflight(argv)
        if grid is not None:
            Path(grid.dir).mkdir(parents=True, exist_ok=True)
            (Path(grid.dir) / ELSEWHERE).unlink(missing_ok=True)  # notes of an earlier launch
            records.write_grid(grid)
            at_once = f"{grid.parallel} at a time" if grid.parallel > 1 else "one at a time"
            print(f"grid {grid.name}: {grid.jobs} runs, {at_once}, into {grid.dir}; baseline {grid.baseline}")
            print(format_table(grid.fairness), flush=True)
    launch = _launcher(grid.branches if grid is not None else [[]])
    launch(argv)
    if grid is not None:
        more_rounds(grid, argv, launch)
        _grid_epilogue(Path(grid.dir))


def _parallel_jobs(launcher) -> int:
    """How many runs a launcher config runs at once (joblib's ``n_jobs``; <= 0 means all cores)."""
    n_jobs = launcher.get("n_jobs") if "n_jobs" in launcher else None
    if n_jobs is not None and n_jobs <= 0:
        return os.cpu_count() or 1
    return int(n_jobs or 1)


def _launcher(branches: list[list[str]]):
    """Launch the command line once per branch (one branch unless the grid nests factors)."""

    def launch(argv: list[str]) -> None:
        for branch in branches:
            _launch(argv + branch)

    return launch


def _launch(argv: list[str]) -> None:
    """Hand the command line to Hydra. Its parser wants -m before the overrides; accept it anywhere."""
    multirun_flags = [a for a in argv if a in ("-m", "--multirun")]
    sys.argv = [sys.argv[0]] + multirun_flags + [a for a in argv if a not in multirun_flags]
    GlobalHydra.instance().clear()  # a second seed round starts Hydra again in this process
    _hydra_app()()


def _running_elsewhere(grid_dir: Path) -> list[dict]:
    """The cells this launch skipped because another process held them (noted by the jobs)."""
    notes = grid_dir / ELSEWHERE
    if not notes.exists():
        return []
    rows = [json.loads(ln) for ln in notes.read_text().splitlines() if ln.strip()]
    return sorted({r["run"]: r for r in rows}.values(), key=lambda r: r["run"])


def _grid_epilogue(grid_dir: Path) -> None:
    """Counts by status of the grid folder Hydra wrote into (the pre-flight's ``grid['dir']``),
    the failed, diverged and running-elsewhere runs by name, and what to run next. The cells
    running elsewhere are kept in ``grid.json`` (``GridRecord.running_elsewhere``)."""
    statuses = {}
    for path in sorted(grid_dir.glob(f"*/{records.SUMMARY}")):
        s = records.read_summary(path.parent)
        statuses.setdefault(s.status if s else "unreadable", []).append(path.parent.name)
    elsewhere = _running_elsewhere(grid_dir)
    record = records.read_grid(grid_dir)
    if record is not None and (elsewhere or record.running_elsewhere):
        record.running_elsewhere = elsewhere
        records.write_grid(record)
    (grid_dir / ELSEWHERE).unlink(missing_ok=True)
    counts = [f"{len(v)} {k}" for k, v in sorted(statuses.items())]
    counts += [f"{len(elsewhere)} running elsewhere"] if elsewhere else []
    print(f"\ngrid finished in {grid_dir}: {', '.join(counts) or 'no run summaries'}")
    for status in ("failed", "diverged"):
        for name in statuses.get(status, []):
            print(f"  {status}: {name}")
    for row in elsewhere:
        who = f"pid {row.get('pid')} on {row.get('host')} since {row.get('since')}"
        print(f"  running elsewhere: {row['run']} ({who})")
    print(f"report:      h2h-report {_rel(grid_dir)}")
    print(f"curves:      tensorboard --logdir {_rel(grid_dir)}")


if __name__ == "__main__":
    main()
