"""Seed rounds: the stopping rule reads only the interval's width."""

import math

import pytest
from scipy import stats

from ablate import records
from ablate.rounds import more_rounds, primary_halfwidth, with_seeds


def write_runs(folder, values):
    for cell, by_seed in values.items():
        for seed, v in by_seed.items():
            run = folder / f"{cell},seed={seed}"
            run.mkdir(parents=True)
            records.write_summary(
                run, records.RunSummary(status="completed", cell=cell, seed=seed, final_val_loss=v)
            )


def grid_record(folder, seeds, **kw):
    return records.GridRecord(
        name="g", dir=str(folder), baseline="attention=standard", seeds=seeds, jobs=2 * len(seeds), **kw
    )


def test_halfwidth_is_the_student_t_interval_of_the_paired_differences(tmp_path):
    base = {0: 3.0, 1: 3.1, 2: 2.9}
    other = {0: 2.95, 1: 3.02, 2: 2.88}
    write_runs(tmp_path, {"attention=standard": base, "attention=differential": other})
    d = [other[s] - base[s] for s in range(3)]
    sd = math.sqrt(sum((x - sum(d) / 3) ** 2 for x in d) / 2)
    expected = stats.t.ppf(0.975, 2) * sd / math.sqrt(3)  # textbook t interval (scipy's quantile)
    assert math.isclose(primary_halfwidth(grid_record(tmp_path, [0, 1, 2])), expected, rel_tol=1e-12)


def test_with_one_pair_the_width_is_unknown(tmp_path):
    write_runs(tmp_path, {"attention=standard": {0: 3.0}, "attention=differential": {0: 2.9}})
    assert primary_halfwidth(grid_record(tmp_path, [0])) is None


def test_seed_override_is_replaced_not_added():
    assert with_seeds(["-m", "recipe=quickstart", "seed=0,1"], [0, 1, 2, 3]) == [
        "-m",
        "recipe=quickstart",
        "seed=0,1,2,3",
    ]


def test_rounds_double_the_seeds_until_the_cap_and_stop(tmp_path):
    # the differences are noisy, so the width never reaches 1e-9: rounds run to the cap
    values = {"attention=standard": {0: 3.0, 1: 3.2}, "attention=differential": {0: 2.9, 1: 3.3}}
    write_runs(tmp_path, values)
    grid = grid_record(tmp_path, [0, 1], max_seeds=5, resolution=1e-9)
    launched = []

    def launch(argv):
        seeds = [int(s) for s in argv[-1].split("=")[1].split(",")]
        launched.append(seeds)
        new = {
            cell: {s: 3.0 + 0.1 * ((s * 7 + len(cell)) % 3) for s in seeds if s not in by}
            for cell, by in values.items()
        }
        write_runs(tmp_path, new)
        for cell in values:
            values[cell].update(new[cell])

    more_rounds(grid, ["-m", "seed=0,1"], launch)
    assert launched == [[0, 1, 2, 3], [0, 1, 2, 3, 4]]
    assert grid.rounds == 3 and records.read_grid(tmp_path).seeds == [0, 1, 2, 3, 4]


def test_rounds_stop_once_the_width_is_reached(tmp_path):
    write_runs(
        tmp_path,
        {"attention=standard": {0: 3.0, 1: 3.1, 2: 3.2}, "attention=differential": {0: 2.9, 1: 3.0, 2: 3.1}},
    )
    launched = []
    more_rounds(grid_record(tmp_path, [0, 1, 2], max_seeds=8, resolution=0.01), ["-m"], launched.append)
    assert launched == []  # a constant difference has zero width: resolved after the first round


@pytest.mark.e2e
def test_a_drill_grid_adds_seed_rounds_to_the_cap_and_reports(tmp_path, cache):
    # Through the real commands: a tiny induction grid whose resolution cannot be met runs its
    # rounds (2 -> 4 -> 5 seeds), stops at grid.max_seeds, and the report reads it.
    import subprocess
    import sys

    from trainer_helpers import ROOT, run_dirs, summary, train

    proc = train(
        [
            "-m",
            "recipe=induction",
            "hydra.launcher.n_jobs=1",
            "budget.tokens=2e4",
            "budget.eval_every_tokens=1e4",
            "probes=off",
            "grid.max_seeds=5",
            "grid.resolution=1e-9",
            "seed=0,1",
        ],
        tmp_path,
        cache,
        timeout=600,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "round 2 adds seeds 2-3" in proc.stdout and "round 3 adds seeds 4-4" in proc.stdout
    assert "at the cap of 5 seeds" in proc.stdout
    done = [summary(d) for d in run_dirs(tmp_path)]
    assert sorted((s["attention"], s["seed"]) for s in done) == sorted(
        (a, s) for a in ("standard", "differential") for s in range(5)
    )
    assert all("drill/auc" in s["probes"] and 0.0 <= s["probes"]["drill/auc"] <= 1.0 for s in done)
    grid = records.read_grid(tmp_path / "induction")
    assert grid.rounds == 3 and grid.seeds == [0, 1, 2, 3, 4]
    report = subprocess.run(
        [sys.executable, "-m", "ablate.report", str(tmp_path / "induction")],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=300,
    )
    assert report.returncode == 0, report.stderr[-2000:]
    assert (
        report.stdout.splitlines()[0].startswith("induction:")
        and "drill/auc" in report.stdout.splitlines()[0]
    )
