"""h2h-report on hand-made run folders (summary.json + TensorBoard event files written here).

Expected numbers come from scipy.stats (t.interval, ttest_rel, chi2.ppf), statsmodels
(multipletests) or hand computation, never from ablate.stats.
"""

import csv
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats as sps

from ablate import records, report
from ablate.report import load, table

ROOT = Path(__file__).resolve().parents[1]
SEEDS = [0, 1, 2]
# Hand-made final losses and probe numbers (test input, not results).
LOSSES = {"standard": [3.412, 3.398, 3.431], "differential": [3.371, 3.380, 3.392]}
COPY_ACC = {"standard": [0.61, 0.58, 0.66], "differential": [0.70, 0.64, 0.69]}
RETRIEVAL = {"standard": 0.5, "differential": 0.8}  # base accuracy, lowered with length/depth below


def _summary(attention, seed, **extra):
    base = {
        "status": "completed",
        "attention": attention,
        "seed": seed,
        "cell": f"attention={attention}",
        "choices": {"attention": attention},
        "params": 1_200_000,
        "non_embedding_params": 800_000,
        "flops_per_token": 4.8e6 if attention == "standard" else 5.0e6,
        "tokens": 2_000_000,
        "train_flops": (4.8e6 if attention == "standard" else 5.0e6) * 2_000_000,
        "wall_seconds": 60.0,
        "budget_match": "tokens",
    }
    base.update(extra)
    return base


def _write_run(folder: Path, summary: dict, curves: dict | None = None, subdir: str | None = "tb"):
    folder.mkdir(parents=True)
    (folder / "summary.json").write_text(json.dumps(summary))
    (folder / "config.yaml").write_text(f"attention: {summary['attention']}\nseed: {summary['seed']}\n")
    if curves:
        from torch.utils.tensorboard import SummaryWriter

        writer = SummaryWriter(log_dir=str(folder / subdir if subdir else folder))
        for tag, points in curves.items():
            for step, value in points:
                writer.add_scalar(tag, value, global_step=step)
        writer.close()


def _curves(attention, seed, final):
    steps = [250_000 * k for k in range(1, 9)]
    curves = {
        "loss/val": [(s, final + 3.0 * math.exp(-s / 6e5) + 0.001 * seed) for s in steps],
        "loss/train": [(s, final + 3.1 * math.exp(-s / 6e5)) for s in steps],
    }
    if attention == "differential":
        for layer in range(2):
            curves[f"lambda/layer_{layer}"] = [(s, 0.2 + 0.1 * layer - 0.01 * k) for k, s in enumerate(steps)]
    return curves


def _probes(attention, i):
    probes = {"copy/acc": COPY_ACC[attention][i]}
    for length in (64, 128):
        for depth in (0.25, 0.75):
            for distractors in (2, 4):
                probes[f"retrieval/acc_len{length}_depth{depth}_dist{distractors}"] = round(
                    RETRIEVAL[attention] - length / 1000 - depth / 10 - distractors / 100 + 0.01 * i, 4
                )
    return probes


def _grid_json(root, baseline="attention=standard", varied=("attention",), **extra):
    records.write_grid(
        records.GridRecord(
            name=root.name,
            dir=str(root),
            baseline=baseline,
            recipe="test_recipe",
            varied=list(varied),
            seeds=SEEDS,
            **extra,
        )
    )


@pytest.fixture(scope="module")
def grid(tmp_path_factory):
    root = tmp_path_factory.mktemp("grid")
    for attention in ("standard", "differential"):
        for i, seed in enumerate(SEEDS):
            loss = LOSSES[attention][i]
            probes = {
                **_probes(attention, i),
                "copy/copy_level": 0.25,
                "copy/n_items": 100.0,
                "probe_seconds/copy": 1.0 + i,
            }
            _write_run(
                root / f"attention={attention},seed={seed}",
                _summary(attention, seed, final_val_loss=loss, probes=probes),
                _curves(attention, seed, loss),
                subdir="tb" if seed % 2 == 0 else None,
            )
    # Left out: a failed run (no loss) and a diverged run whose large loss would shift any average.
    _write_run(
        root / "attention=differential,seed=3",
        _summary(
            "differential",
            3,
            status="failed",
            error="RuntimeError: out of memory\nmore lines",
            final_val_loss=None,
            probes={},
        ),
    )
    _write_run(
        root / "attention=standard,seed=3",
        _summary(
            "standard",
            3,
            status="diverged",
            diverged_at_tokens=750_000,
            last_finite_loss=7.5,
            final_val_loss=50.0,
            probes={"copy/acc": 0.0},
        ),
    )
    _grid_json(root, running_elsewhere=["attention=other"])
    return root


@pytest.fixture(scope="module")
def built(grid):
    code = report.main([str(grid)])
    assert code == 0
    with (grid / "summary.csv").open() as handle:
        rows = list(csv.DictReader(handle))
    return grid, rows, (grid / "report.md").read_text(), table.build(load.load_grid(grid))


def _row(rows, cell, metric):
    found = [r for r in rows if r["cell"] == cell and r["metric"] == metric]
    assert len(found) == 1, (cell, metric)
    return found[0]


def _obj(rep, cell, metric):
    found = [r for r in rep.rows if str(r.cell) == cell and r.metric == metric]
    assert len(found) == 1, (cell, metric)
    return found[0]


def test_csv_header_is_the_documented_one(built):
    _, rows, _, _ = built
    # Written out here, not read from the constant that wrote the file.
    assert list(rows[0].keys()) == [
        "cell",
        "metric",
        "kind",
        "n",
        "mean",
        "ci_low",
        "ci_high",
        "reference",
        "n_paired",
        "diff_to_baseline",
        "diff_ci_low",
        "diff_ci_high",
        "p_value",
        "p_holm",
        "resolution",
        "seeds_needed_low",
        "seeds_needed_high",
        "note",
    ]
    for column in rows[0]:
        assert column in report.__doc__


@pytest.mark.parametrize("metric,source", [("final_val_loss", LOSSES), ("copy/acc", COPY_ACC)])
def test_csv_numbers_equal_scipy(built, metric, source):
    _, rows, _, _ = built
    for attention in ("standard", "differential"):
        values = np.array(source[attention])
        row = _row(rows, f"attention={attention}", metric)
        assert int(row["n"]) == 3  # the diverged run's 50.0 / 0.0 is not averaged in
        low, high = sps.t.interval(0.95, 2, loc=values.mean(), scale=sps.sem(values))
        assert float(row["mean"]) == pytest.approx(values.mean(), rel=1e-12)
        assert float(row["ci_low"]) == pytest.approx(low, rel=1e-12)
        assert float(row["ci_high"]) == pytest.approx(high, rel=1e-12)
    a, b = np.array(source["differential"]), np.array(source["standard"])
    row = _row(rows, "attention=differential", metric)
    d = a - b
    d_low, d_high = sps.t.interval(0.95, 2, loc=d.mean(), scale=sps.sem(d))
    assert float(row["diff_to_baseline"]) == pytest.approx(d.mean(), rel=1e-12)
    assert float(row["diff_ci_low"]) == pytest.approx(d_low, rel=1e-12)
    assert float(row["diff_ci_high"]) == pytest.approx(d_high, rel=1e-12)
    assert float(row["p_value"]) == pytest.approx(sps.ttest_rel(a, b).pvalue, rel=1e-12)
    assert row["reference"] == "attention=standard" and int(row["n_paired"]) == 3
    baseline_row = _row(rows, "attention=standard", metric)
    assert baseline_row["diff_to_baseline"] == "" and baseline_row["p_value"] == ""


def test_seeds_needed_range_from_chi_square_bound_on_the_sd(built):
    _, rows, _, _ = built
    # Hand computation: SD interval s*sqrt(2/chi2(0.975, 2)) .. s*sqrt(2/chi2(0.025, 2)) (scipy.stats.chi2),
    # then the smallest n with t(0.975, n-1) sd / sqrt(n) <= 0.01 at each end (scipy.stats.t).
    d = np.array(LOSSES["differential"]) - np.array(LOSSES["standard"])
    s = d.std(ddof=1)
    ends = [s * math.sqrt(2 / sps.chi2.ppf(0.975, 2)), s * math.sqrt(2 / sps.chi2.ppf(0.025, 2))]
    expected = [
        next(n for n in range(2, 10**6) if sps.t.ppf(0.975, n - 1) * sd / math.sqrt(n) <= 0.01) for sd in ends
    ]
    row = _row(rows, "attention=differential", "final_val_loss")
    assert [int(row["seeds_needed_low"]), int(row["seeds_needed_high"])] == expected


def test_holm_column_equals_statsmodels_within_the_comparison(built):
    from statsmodels.stats.multitest import multipletests

    _, rows, md, rep = built
    ours = [
        r for r in rows if r["cell"] == "attention=differential" and r["kind"] == "metric" and r["p_value"]
    ]
    # The primary metric is tested alone (a family of one here): its Holm p is its own p.
    (primary,) = [r for r in ours if r["metric"] == "final_val_loss"]
    assert float(primary["p_holm"]) == pytest.approx(float(primary["p_value"]), rel=1e-12)
    mine = [r for r in ours if r["metric"] != "final_val_loss"]  # the secondary family
    raw = [float(r["p_value"]) for r in mine]
    # Reference: statsmodels.stats.multitest.multipletests(method="holm") (Holm, 1979).
    expected = multipletests(raw, method="holm")[1]
    assert [float(r["p_holm"]) for r in mine] == pytest.approx(list(expected), rel=1e-12)
    count = rep.tests[0]
    assert (count.tested, count.below) == (len(raw), sum(p < 0.05 for p in raw))
    assert f"{count.below} of {count.tested} below 0.05" in md


def test_metadata_is_context_not_tested(built):
    _, rows, _, rep = built
    metrics = {r.metric for r in rep.rows}
    assert not {"copy/copy_level", "copy/n_items", "probe_seconds/copy"} & metrics
    kinds = {r["metric"]: r["kind"] for r in rows}
    assert (
        kinds["copy/copy_level"] == kinds["probe_seconds/copy"] == "context" and kinds["copy/acc"] == "metric"
    )
    level = next(
        c for c in rep.context if c.key == "copy/copy_level" and str(c.cell) == "attention=differential"
    )
    assert level.values == [0.25, 0.25, 0.25]


def test_verdict_on_primary_metric_from_grid_record(built):
    _, _, md, rep = built
    (v,) = rep.verdicts
    d = np.array(LOSSES["differential"]) - np.array(LOSSES["standard"])
    low, high = sps.t.interval(0.95, 2, loc=d.mean(), scale=sps.sem(d))  # reference: scipy
    cell, ref = v.contrast.cells
    assert (v.estimate.metric, str(cell), str(ref), v.estimate.n) == (
        "final_val_loss",
        "attention=differential",
        "attention=standard",
        3,
    )
    e = v.estimate
    assert (e.low, e.high) == (pytest.approx(low, rel=1e-12), pytest.approx(high, rel=1e-12))
    assert v.status == ("clear" if high < 0 or low > 0 else "unclear")
    # Render check: the report opens with the verdict sentence, then the paired-difference chart.
    body = md.split("\n\n")
    assert body[2].startswith("- final validation loss: differential is better than standard by")
    assert "paired t, 3 seeds" in body[2] and "Direction: clear" in body[2]
    assert body[3].startswith("- over training (final_val_loss at each of 8 evaluation points):\n  - ")
    assert body[4].splitlines()[0] == "![paired differences in final_val_loss](plots/paired_difference.png)"


def test_cells_count_completed_launched_and_diverged(built):
    _, _, _, rep = built
    cells = {str(c.name): (c.completed, c.launched, c.diverged) for c in rep.cells}
    assert cells == {"attention=standard": (3, 4, 1), "attention=differential": (3, 4, 0)}
    assert _obj(rep, "attention=differential", "final_val_loss").reduced == "paired on 3 of 4 launched seeds"


def test_failed_diverged_and_elsewhere_runs_listed_not_averaged(built):
    _, _, _, rep = built
    left = {(x.folder, x.status): x for x in rep.left_out}
    failed = left[("attention=differential,seed=3", "failed")]
    assert failed.reason == "RuntimeError: out of memory" and failed.where == "no curves logged"
    diverged = left[("attention=standard,seed=3", "diverged")]
    assert diverged.where == "diverged at 750,000 tokens" and diverged.reason == "last finite loss 7.5"
    assert ("attention=other", "running elsewhere") in left


def test_fairness_flags_flops_ratio_at_matched_tokens(built):
    _, _, _, rep = built
    row = next(f for f in rep.fairness if str(f.cell) == "attention=differential")
    # 5.0e6 / 4.8e6 = 1.0417 (test input) is beyond the 0.02 tolerance with tokens matched.
    assert row.ratios["flops_per_token"] == pytest.approx(5.0 / 4.8, rel=1e-12) and "beyond" in row.flag
    assert row.ratios["params"] == 1.0


def test_plots_written(built):
    grid, _, md, _ = built
    for name in ["paired_difference.png", "val_loss.png", "lambda.png", "retrieval_heatmap.png"]:
        path = grid / "plots" / name
        assert path.exists() and path.stat().st_size > 1000, name
        assert f"(plots/{name})" in md


def test_event_files_read_back_from_run_folder_and_tb_subfolder(grid):
    for seed, where in [(0, "tb"), (1, ".")]:
        folder = grid / f"attention=differential,seed={seed}"
        assert [p.parent.name for p in load.event_files(folder)] == [folder.name if where == "." else "tb"]
        scalars = load.read_scalars(folder)
        expected = _curves("differential", seed, LOSSES["differential"][seed])
        assert set(scalars) == set(expected)
        steps, values = scalars["lambda/layer_1"]
        assert steps.tolist() == [s for s, _ in expected["lambda/layer_1"]]
        # TensorBoard stores scalars as float32.
        assert values == pytest.approx([v for _, v in expected["lambda/layer_1"]], rel=1e-6)


def test_console_opens_with_the_verdict_then_the_table(grid, capsys):
    assert report.main([str(grid)]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].startswith(f"{grid.name}: final validation loss: differential is better than standard by")
    assert out[1].startswith("  Direction: clear")
    assert out[2].startswith("over training (final_val_loss at each of 8 evaluation points):")
    assert out[4].split()[:5] == ["cell", "completed", "final_val_loss", "95%", "CI"]
    assert "paired" in out[4]


def test_several_grids_open_with_one_verdict_line_each(grid, tmp_path, capsys):
    for attention, loss in [("standard", [3.0, 3.1, 3.2]), ("differential", [3.0, 3.1, 3.2])]:
        for seed in SEEDS:
            _write_run(
                tmp_path / f"attention={attention},seed={seed}",
                _summary(attention, seed, final_val_loss=loss[seed] + 0.01 * (attention == "standard")),
            )
    _grid_json(tmp_path)
    assert report.main([str(grid), str(tmp_path)]) == 0
    out = capsys.readouterr().out.splitlines()
    firsts = [line for line in out if not line.startswith("  ")]
    assert firsts[0].startswith(f"{grid.name}: ") and firsts[1].startswith(f"{tmp_path.name}: ")
    # Equal offset 0.01 on every seed: no spread, no interval, no seeds number.
    assert "in every one of 3 seeds: no spread, so no interval exists" in firsts[1]
    assert sum(line.startswith(f"{grid.name}: ") for line in out) == 1  # each verdict printed once
    rep = table.build(load.load_grid(tmp_path))
    row = _obj(rep, "attention=differential", "final_val_loss")
    assert row.no_spread and row.seeds_needed is None and row.seeds_note == "no spread across 3 seeds"
    assert (tmp_path / "report.md").exists()


def test_no_grid_json_needs_baseline(tmp_path, capsys):
    for attention, loss in [("differential", 3.3), ("standard", 3.4)]:
        _write_run(tmp_path / attention, _summary(attention, 0, final_val_loss=loss, probes={}))
    assert report.main([str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--baseline" in err[0]
    assert report.main([str(tmp_path), "--baseline", "attention=differential"]) == 0
    rep = table.build(load.load_grid(tmp_path, "attention=differential"))
    assert str(rep.baseline) == "attention=differential" and rep.verdicts[0].status == "one seed"


def test_fewer_than_three_pairs_give_no_seeds_number(tmp_path):
    for attention in ("standard", "differential"):
        for seed in (0, 1):
            _write_run(
                tmp_path / f"attention={attention},seed={seed}",
                _summary(
                    attention,
                    seed,
                    final_val_loss=3.0 + 0.1 * seed + 0.01 * (seed + 1) * (attention == "differential"),
                ),
            )
    _grid_json(tmp_path)
    row = _obj(table.build(load.load_grid(tmp_path)), "attention=differential", "final_val_loss")
    assert row.seeds_needed is None and row.seeds_note == "needs >= 3 paired seeds to estimate"


def test_drill_tokens_to_not_reached_is_censored(tmp_path):
    for attention in ("standard", "differential"):
        for seed in SEEDS:
            reached = not (attention == "differential" and seed == 2)
            probes = {
                "drill/auc": 0.5 + 0.01 * seed,
                "drill/acc": 0.9,
                "drill/copy_level": 0.125,
                "drill/half_reached": float(reached),
            }
            if reached:
                probes["drill/tokens_to_half"] = 1000.0 * (seed + 1)
            _write_run(
                tmp_path / f"attention={attention},seed={seed}",
                _summary(attention, seed, final_val_loss=2.0, probes=probes),
            )
    _grid_json(tmp_path, primary_metric="drill/auc", resolution=0.02)
    rep = table.build(load.load_grid(tmp_path))
    assert rep.metric == "drill/auc" and rep.verdicts[0].estimate.metric == "drill/auc"
    row = _obj(rep, "attention=differential", "drill/tokens_to_half")
    assert row.censored == "not reached in 1 of 3 seeds"
    assert math.isnan(row.mean) and math.isnan(row.diff) and math.isnan(row.p_holm)
    assert _obj(rep, "attention=standard", "drill/tokens_to_half").mean == pytest.approx(2000.0)
    assert "drill/half_reached" not in {r.metric for r in rep.rows}


def test_resolution_per_unit():
    # Rule from the brief: losses 0.01 nats, accuracies/shares/areas in [0, 1] 0.02, others none.
    assert table.resolution_for("drill/auc", "drill/auc", 0.05, [0.4]) == 0.05
    assert table.resolution_for("position/loss_pos0_32", "final_val_loss", 0.03, [5.0]) == 0.01
    assert table.resolution_for("attention/layer0/asked_share", "final_val_loss", 0.03, [0.2]) == 0.02
    assert table.resolution_for("outliers/layer0/hidden_kurtosis", "final_val_loss", 0.03, [12.0]) is None


def test_unknown_baseline_in_grid_json_is_a_one_line_error(tmp_path, capsys):
    _write_run(tmp_path / "a", _summary("standard", 0, final_val_loss=3.0, probes={}))
    _grid_json(tmp_path, baseline="attention=nope")
    assert report.main([str(tmp_path)]) == 2
    assert "names 'attention=nope'" in capsys.readouterr().err


@pytest.mark.parametrize("make", ["empty", "missing"])
def test_exit_code_2_without_runs(tmp_path, make):
    target = tmp_path / "grid" if make == "missing" else tmp_path
    result = subprocess.run(
        [sys.executable, "-m", "ablate.report", str(target)],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert result.returncode == 2
    assert len(result.stderr.strip().splitlines()) == 1 and "Traceback" not in result.stderr
    assert ("no summary.json" if make == "empty" else "not found") in result.stderr


SIZES = {"m1": 1e5, "m2": 3e5, "m3": 1e6, "m4": 3e6, "m5": 1e7}
AMPLITUDE = {"standard": 100.0, "differential": 80.0}  # hand-made L = 2 + A N^-0.35


@pytest.fixture(scope="module")
def sweep_grid(tmp_path_factory):
    root = tmp_path_factory.mktemp("sweep")
    rng = np.random.default_rng(1)
    for attention, amplitude in AMPLITUDE.items():
        for model, size in SIZES.items():
            for seed in range(5):
                loss = 2.0 + amplitude * size**-0.35 + rng.normal(0, 0.004)
                _write_run(
                    root / f"attention={attention},model={model},seed={seed}",
                    _summary(
                        attention,
                        seed,
                        cell=f"attention={attention},model={model}",
                        non_embedding_params=int(size),
                        final_val_loss=float(loss),
                        probes={},
                    ),
                )
    _grid_json(
        root,
        baseline="attention=standard,model=m1",
        varied=["attention", "model"],
        unequal_axes=["model"],
        sweep={"axis": "params", "key": "model"},
    )
    assert report.main([str(root), "--resamples", "200"]) == 0
    return root


def test_sweep_report_states_a_determined_ratio(sweep_grid):
    with (sweep_grid / "summary.csv").open() as handle:
        rows = list(csv.DictReader(handle))
    ratio = _row(rows, "attention=differential", "params_ratio")
    truth = (80.0 / 100.0) ** (1 / 0.35)  # closed form for equal E and alpha
    assert float(ratio["mean"]) == pytest.approx(truth, rel=0.1)
    assert float(ratio["ci_low"]) < float(ratio["mean"]) < float(ratio["ci_high"])
    # Fitted per design (cell name minus the sweep key), not per attention value.
    assert ratio["reference"] == "attention=standard"
    assert ratio["note"].startswith("attention=differential reaches attention=standard's loss with ")
    assert (sweep_grid / "plots" / "efficiency.png").stat().st_size > 1000


def test_sweep_cells_compare_at_the_same_sweep_point(sweep_grid):
    with (sweep_grid / "summary.csv").open() as handle:
        rows = list(csv.DictReader(handle))
    assert (
        _row(rows, "attention=differential,model=m3", "final_val_loss")["reference"]
        == "attention=standard,model=m3"
    )


def test_retrieval_grid_averages_over_other_axes_and_seeds():
    from ablate.report import plots

    grid_table = {
        "c": {
            "retrieval/acc_len64_depth0.5_dist2": {0: 0.2, 1: 0.4},
            "retrieval/acc_len64_depth0.5_dist4": {0: 0.6, 1: 0.8},
            "retrieval/acc/len128_depth0.5": {0: 1.0},
            "copy/acc": {0: 0.9},
        }
    }
    lengths, depths, acc = plots.retrieval_grid(grid_table)["c"]
    assert lengths == [64, 128] and depths == [0.5]
    assert acc.tolist() == [[pytest.approx(0.5), pytest.approx(1.0)]]


def test_stopped_and_unfinished_runs_are_listed(tmp_path):
    _write_run(tmp_path / "attention=standard,seed=0", _summary("standard", 0, final_val_loss=3.0, probes={}))
    _write_run(
        tmp_path / "attention=standard,seed=1",
        {"status": "stopped", "attention": "standard", "seed": 1, "cell": "attention=standard", "step": 40},
    )
    unfinished = tmp_path / "attention=standard,seed=2"
    unfinished.mkdir()
    (unfinished / "config.yaml").write_text("seed: 2\n")
    from torch.utils.tensorboard import SummaryWriter

    writer = SummaryWriter(log_dir=str(unfinished))
    writer.add_scalar("loss/train", 6.0, global_step=8192)
    writer.close()
    _grid_json(tmp_path)
    rep = table.build(load.load_grid(tmp_path))
    left = {x.folder: (x.status, x.where) for x in rep.left_out}
    assert left["attention=standard,seed=1"] == ("stopped", "stopped at step 40")
    assert left["attention=standard,seed=2"] == ("no summary", "last logged at 8,192 tokens")
    assert [(c.completed, c.launched) for c in rep.cells] == [(1, 3)]


def test_a_per_layer_familys_first_rows_are_the_last_layers_head_averages_without_all_zero_ones():
    from ablate.report.render import headline_metrics
    from ablate.report.table import MetricRow

    names = [
        f"drill_attention/layer{i}/{head}{cat}_{kind}"
        for i in (0, 1)
        for head in ("", "head0/")
        for cat in ("filler", "lookalike", "other", "pair")
        for kind in ("share", "signed")
    ]
    rows = [
        MetricRow(
            cell="c", metric=m, reference="c", mean=0.0 if "filler" in m else 0.3, no_spread="filler" in m
        )
        for m in names
    ]
    got = headline_metrics(names, rows)
    assert got == [
        "drill_attention/layer1/pair_share",
        "drill_attention/layer1/pair_signed",
        "drill_attention/layer1/lookalike_share",
        "drill_attention/layer1/lookalike_signed",
    ]
    # a family without indices keeps its accuracy metrics first, as before
    assert headline_metrics(["drill/auc", "drill/acc", "drill/tokens_to_half"])[0] == "drill/acc"
