"""Grids: the fairness gate, an A/A grid, a smoke grid through h2h-train -m and the report,
and relaunching a finished grid."""

import csv
import subprocess
import sys

import numpy as np
import pytest
from scipy import stats as sps
from trainer_helpers import ROOT, SMALL_DATA, run_dirs, summary, train

from ablate import records
from ablate.schema import ConfigError
from ablate.train import preflight

SMOKE = ["budget=smoke", "probes=off", *SMALL_DATA]


def test_fairness_gate_stops_a_grid_whose_cells_differ():
    with pytest.raises(ConfigError) as err:
        preflight(
            [
                "-m",
                "recipe=quickstart",
                "model.d_model=128,192",
                "attention=standard",
                "grid.baseline='model.d_model=128'",
            ]
        )
    message = str(err.value)
    assert "grid.tolerance=0.02" in message and "model.d_model=192" in message
    assert "params" in message.splitlines()[1]  # the table follows the one-line verdict


def test_fairness_gate_lets_a_declared_unequal_axis_through():
    grid = preflight(
        [
            "-m",
            "recipe=quickstart",
            "model.d_model=128,192",
            "attention=standard",
            "grid.unequal_axes=[model.d_model]",
            "grid.baseline='model.d_model=128'",
        ]
    )
    ratios = {row["cell"]: row["params_ratio"] for row in grid.fairness}
    assert len(ratios) == 2 and max(ratios.values()) > 1.5


def test_differential_and_standard_pass_the_gate_with_their_table():
    grid = preflight(["-m", "recipe=quickstart"])
    rows = {row["cell"]: row for row in grid.fairness}
    assert grid.baseline == "attention=standard" and grid.jobs == 8  # 2 designs x 4 seeds
    assert abs(rows["attention=differential"]["params_ratio"] - 1) < 0.02
    assert rows["attention=differential"]["flops_ratio"] == 1.0  # one value product (README, FLOPs)


def report(grid_dir):
    return subprocess.run(
        [sys.executable, "-m", "ablate.report", str(grid_dir)],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=300,
    )


@pytest.mark.e2e
def test_smoke_grid_report_and_relaunch(tmp_path, cache):
    proc = train(["-m", "recipe=quickstart", *SMOKE, "seed=0,1"], tmp_path, cache)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "h2h-report" in proc.stdout and "tensorboard --logdir" in proc.stdout
    grid_dir = tmp_path / "quickstart"
    runs = run_dirs(grid_dir)
    assert len(runs) == 4 and all(summary(r)["status"] == "completed" for r in runs)
    out = report(grid_dir)
    assert out.returncode == 0, out.stderr[-2000:]
    assert (grid_dir / "report.md").exists() and list((grid_dir / "plots").glob("*.png"))
    rows = list(csv.DictReader((grid_dir / "summary.csv").open()))
    cells = {r["cell"] for r in rows}
    assert any("differential" in c for c in cells) and any("standard" in c for c in cells)
    # relaunching the finished grid trains nothing
    again = train(["-m", "recipe=quickstart", *SMOKE, "seed=0,1"], tmp_path, cache)
    assert again.returncode == 0
    assert again.stdout.count("skip") == 4 and "done " not in again.stdout


@pytest.mark.e2e
def test_a_a_grid_reports_a_difference_whose_interval_covers_zero(tmp_path, cache):
    # The same block under two names (a copy of standard.yaml), 3 seeds: paired by seed the
    # runs are identical, so the difference must be exactly 0 and its interval must cover 0.
    conf = tmp_path / "extra" / "attention"
    conf.mkdir(parents=True)
    conf.joinpath("standard_copy.yaml").write_text((ROOT / "conf/attention/standard.yaml").read_text())
    proc = train(
        [
            "-m",
            "recipe=quickstart",
            *SMOKE,
            "attention=standard,standard_copy",
            "seed=0,1,2",
            f"hydra.searchpath=[file://{tmp_path / 'extra'}]",
        ],
        tmp_path / "runs",
        cache,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    grid_dir = tmp_path / "runs" / "quickstart"
    out = report(grid_dir)
    assert out.returncode == 0, out.stderr[-2000:]
    rows = [
        r
        for r in csv.DictReader((grid_dir / "summary.csv").open())
        if "standard_copy" in r["cell"] and r["metric"] == "final_val_loss"
    ]
    assert len(rows) == 1
    row = rows[0]
    assert int(row["n"]) == 3
    low, high = float(row["diff_ci_low"]), float(row["diff_ci_high"])
    assert float(row["diff_to_baseline"]) == 0.0 and low <= 0.0 <= high


def test_size_sweep_checks_each_design_at_the_same_size():
    # The swept depth may change the parameter count; attention must still match at each depth.
    grid = preflight(["-m", "recipe=size_sweep"])
    assert grid.jobs == 24 and grid.sweep["key"] == "model.n_layers"
    with pytest.raises(ConfigError, match="grid.tolerance"):
        preflight(["-m", "recipe=size_sweep", "grid.unequal_axes=[]"])
    with pytest.raises(ConfigError, match="model.d_model=192"):
        preflight(["-m", "recipe=size_sweep", "model.n_layers=2", "model.d_model=128,192"])


@pytest.mark.parametrize("recipe", sorted(p.stem for p in (ROOT / "recipes").glob("*.yaml")))
def test_every_shipped_recipe_passes_its_preflight(recipe):
    """Each recipe composes, validates and passes the fairness gate as shipped, and its grid has
    the baseline it names among its cells."""
    grid = preflight(["-m", f"recipe={recipe}"])
    assert grid.jobs >= 2
    assert grid.baseline in {row["cell"] for row in grid.fairness}


@pytest.mark.e2e
def test_factorial_grid_effects_equal_a_hand_computation_from_the_summaries(tmp_path, cache):
    # The 2x2 of map x head norm at the smoke budget, 3 seeds, through h2h-train -m and h2h-report.
    proc = train(["-m", "recipe=head_norm", *SMOKE, "seed=0,1,2"], tmp_path, cache)
    assert proc.returncode == 0, proc.stderr[-3000:]
    grid_dir = tmp_path / "head_norm"
    loss = {}
    for run in run_dirs(grid_dir):
        s = summary(run)
        loss[(s["choices"]["attention"], "head_norm=True" in s["cell"], s["seed"])] = s["final_val_loss"]
    assert len(loss) == 12
    out = report(grid_dir)
    assert out.returncode == 0, out.stderr[-2000:]
    first = out.stdout.splitlines()[:4]
    assert first[0].startswith("head_norm: final validation loss (lower is better): 2x2 factorial")
    rows = {r["cell"]: r for r in csv.DictReader((grid_dir / "summary.csv").open()) if r["kind"] == "effect"}
    # Hand computation per seed (Box, Hunter & Hunter 2005, ch. 5: effects as contrasts; the
    # interaction as the difference of the two simple effects), then a t interval across seeds.
    y = lambda a, h, s: loss[(a, h, s)]  # noqa: E731
    head = [
        (
            (y("standard", True, s) - y("standard", False, s))
            + (y("differential", True, s) - y("differential", False, s))
        )
        / 2
        for s in range(3)
    ]
    inter = [
        (y("differential", True, s) - y("standard", True, s))
        - (y("differential", False, s) - y("standard", False, s))
        for s in range(3)
    ]
    for name, values in (("head_norm True vs False", head), ("attention x head_norm", inter)):
        row = rows[name]
        low, high = sps.t.interval(0.95, 2, loc=np.mean(values), scale=sps.sem(values))  # reference: scipy
        assert float(row["mean"]) == pytest.approx(np.mean(values), abs=1e-12)
        assert (float(row["ci_low"]), float(row["ci_high"])) == (
            pytest.approx(low, abs=1e-12),
            pytest.approx(high, abs=1e-12),
        )
        assert any(line.strip().startswith(name) for line in first)
    # TensorBoard's HPARAMS view filters by factor: each run records its levels (read back with
    # tensorboard's own event reader and its hparams plugin protos).
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator
    from tensorboard.plugins.hparams import plugin_data_pb2

    run = next(r for r in run_dirs(grid_dir) if "head_norm=True" in summary(r)["cell"])
    acc = EventAccumulator(str(run))
    acc.Reload()
    starts = [
        plugin_data_pb2.HParamsPluginData.FromString(raw)
        for raw in acc.PluginTagToContent("hparams").values()
    ]
    hparams = next(d.session_start_info.hparams for d in starts if d.HasField("session_start_info"))
    assert hparams["factor/attention.head_norm"].string_value == "True"
    assert hparams["factor/attention"].string_value == summary(run)["choices"]["attention"]


def test_nested_factors_launch_as_branches_and_make_no_impossible_cells():
    # lambda's mode and first value exist only for differential attention: Hydra's sweeper would
    # cross them with standard too, so the grid launches once per branch.
    grid = preflight(["-m", "recipe=lambda"])
    assert grid.branches == [
        ["attention=standard"],
        [
            "attention=differential",
            "attention.lambda_mode=learned,fixed",
            "attention.lambda_init=depth,0.8,0.5",
        ],
    ]
    assert grid.jobs == 3 * (1 + 2 * 3) and grid.baseline == "attention=standard"
    cells = {row["cell"] for row in grid.fairness}
    assert "attention=standard" in cells and not any("standard" in c and "lambda" in c for c in cells)
    assert [f["within"] for f in grid.factors] == [None, "attention=differential", "attention=differential"]


def test_a_factorial_recipe_needs_no_baseline_and_an_extra_swept_key_becomes_a_factor():
    grid = preflight(["-m", "recipe=head_norm"])
    assert grid.baseline == "attention=standard,attention.head_norm=False" and grid.jobs == 16
    grid = preflight(["-m", "recipe=head_norm", "optim.lr=0.002,0.004", "budget.tokens=1e5"])
    assert [f["key"] for f in grid.factors] == ["attention", "attention.head_norm", "optim.lr"]
    assert grid.factors[2]["reference"] == "0.002" and "budget.tokens" not in grid.varied


def test_factor_levels_go_to_the_hparams_table():
    from ablate.runner import factor_levels

    resolved = {
        "grid": {"factors": {"attention": "standard", "attention.lambda_mode": {"reference": "learned"}}},
        "attention": {"head_dim": 16},
    }
    assert factor_levels({"attention": "standard"}, resolved) == {
        "factor/attention": "standard",
        "factor/attention.lambda_mode": "-",
    }


@pytest.mark.e2e
def test_flop_matched_budgets_are_priced_before_the_runs(tmp_path, cache):
    # budget.match=flops with budget.flops=null: the pre-flight prices budget.tokens at the
    # baseline's FLOPs per token (the run composes no second config), so the narrower model trains
    # on more tokens for the same training FLOPs, and config.yaml says what it was given.
    proc = train(
        [
            "-m",
            "attention=standard",
            "model.d_model=64,128",
            "grid.baseline='model.d_model=128'",
            "grid.unequal_axes=[model.d_model]",
            "budget.match=flops",
            *SMOKE,
        ],
        tmp_path,
        cache,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    runs = {summary(r)["cell"]: summary(r) for r in run_dirs(tmp_path)}
    narrow, wide = runs["model.d_model=64"], runs["model.d_model=128"]
    assert narrow["tokens"] > wide["tokens"]
    per_step = narrow["tokens_per_step"] * narrow["flops_per_token"]
    assert abs(narrow["train_flops"] - wide["train_flops"]) <= per_step  # equal up to one step
    grid = records.read_grid(tmp_path / "single")
    config = (run_dirs(tmp_path)[0] / "config.yaml").read_text()
    assert "flops: null" not in config and set(grid.budget_flops) == {"model.d_model=64", "model.d_model=128"}


def test_cuda_asked_for_where_there_is_none_stops_in_the_preflight():
    # No silent fallback to the CPU: the pre-flight refuses runtime.device=cuda without CUDA.
    import torch

    if torch.cuda.is_available():
        assert preflight(["runtime.device=cuda", "budget=smoke"]) is None
    else:
        with pytest.raises(ConfigError, match="runtime.device='cuda': CUDA is not available"):
            preflight(["runtime.device=cuda", "budget=smoke"])
