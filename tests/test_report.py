"""h2h-report on hand-made run folders (summary.json + TensorBoard event files written here).

Expected numbers come from scipy.stats (t.interval, ttest_rel), not from the report's own code.
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

from ablate import report
from ablate.stats import seeds_needed

ROOT = Path(__file__).resolve().parents[1]
SEEDS = [0, 1, 2]
# Hand-made final losses and probe numbers (test input, not results).
LOSSES = {"standard": [3.412, 3.398, 3.431], "differential": [3.371, 3.380, 3.392]}
COPY_ACC = {"standard": [0.61, 0.58, 0.66], "differential": [0.70, 0.64, 0.69]}
RETRIEVAL = {"standard": 0.5, "differential": 0.8}  # base accuracy, lowered with length/depth below


def _summary(attention, seed, **extra):
    base = {
        "status": "completed", "attention": attention, "seed": seed, "cell": f"attention={attention}",
        "choices": {"attention": attention}, "params": 1_200_000, "non_embedding_params": 800_000,
        "flops_per_token": 4.8e6 if attention == "standard" else 5.0e6, "tokens": 2_000_000,
        "train_flops": (4.8e6 if attention == "standard" else 5.0e6) * 2_000_000, "wall_seconds": 60.0,
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
    curves = {"loss/val": [(s, final + 3.0 * math.exp(-s / 6e5) + 0.001 * seed) for s in steps],
              "loss/train": [(s, final + 3.1 * math.exp(-s / 6e5)) for s in steps]}
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
                    RETRIEVAL[attention] - length / 1000 - depth / 10 - distractors / 100 + 0.01 * i, 4)
    return probes


@pytest.fixture(scope="module")
def grid(tmp_path_factory):
    root = tmp_path_factory.mktemp("grid")
    for attention in ("standard", "differential"):
        for i, seed in enumerate(SEEDS):
            loss = LOSSES[attention][i]
            _write_run(root / f"attention={attention}" / f"seed={seed}",
                       _summary(attention, seed, final_val_loss=loss, probes=_probes(attention, i)),
                       _curves(attention, seed, loss), subdir="tb" if seed % 2 == 0 else None)
    # Left out: a failed run (no loss) and a diverged run whose large loss would shift any average.
    _write_run(root / "attention=differential" / "seed=3",
               _summary("differential", 3, status="failed", error="RuntimeError: out of memory\nmore lines",
                        final_val_loss=None, probes={}))
    _write_run(root / "attention=standard" / "seed=3",
               _summary("standard", 3, status="diverged", diverged_at_tokens=750_000, last_finite_loss=7.5,
                        final_val_loss=50.0, probes={"copy/acc": 0.0}))
    (root / "grid.json").write_text(json.dumps({
        "recipe": "test_recipe", "baseline": "attention=standard", "varied": ["attention"],
        "unequal_axes": [], "target_halfwidth": None}))
    return root


@pytest.fixture(scope="module")
def built(grid):
    code = report.main([str(grid)])
    assert code == 0
    with (grid / "summary.csv").open() as handle:
        rows = list(csv.DictReader(handle))
    return grid, rows, (grid / "report.md").read_text()


def _row(rows, cell, metric):
    found = [r for r in rows if r["cell"] == cell and r["metric"] == metric]
    assert len(found) == 1, (cell, metric)
    return found[0]


def test_csv_has_documented_columns(built):
    _, rows, _ = built
    assert list(rows[0].keys()) == report.CSV_COLUMNS
    for column in ["cell", "metric", "n", "mean", "ci_low", "ci_high", "diff_to_baseline", "diff_ci_low",
                   "diff_ci_high", "p_value", "seeds_needed"]:
        assert column in report.__doc__


@pytest.mark.parametrize("metric,source", [("final_val_loss", LOSSES), ("copy/acc", COPY_ACC)])
def test_csv_numbers_equal_scipy(built, metric, source):
    _, rows, _ = built
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
    # seeds needed from the std of paired differences at the default 0.01 half-width: smallest n
    # with t(0.975, n-1) s / sqrt(n) <= 0.01, checked against scipy's t quantile directly.
    n = int(row["seeds_needed"])
    s = d.std(ddof=1)
    assert sps.t.ppf(0.975, n - 1) * s / math.sqrt(n) <= 0.01 < sps.t.ppf(0.975, n - 2) * s / math.sqrt(n - 1)
    baseline_row = _row(rows, "attention=standard", metric)
    assert baseline_row["diff_to_baseline"] == "" and baseline_row["p_value"] == ""


def test_failed_and_diverged_runs_listed_not_averaged(built):
    _, rows, md = built
    left_out = md.split("## Runs left out of the averages")[1].split("##")[0]
    assert "`attention=differential/seed=3` | failed" in left_out
    assert "RuntimeError: out of memory" in left_out and "more lines" not in left_out
    assert "`attention=differential/seed=3` | failed | no curves logged |" in left_out
    assert "`attention=standard/seed=3` | diverged | diverged at 750,000 tokens | last finite loss 7.5" in left_out
    assert "8 found; 6 completed and averaged, 1 diverged, 1 failed" in md


def test_report_opens_with_fairness_table_and_ratios(built):
    _, _, md = built
    sections = [line for line in md.splitlines() if line.startswith("## ")]
    assert sections[0].startswith("## Fairness")
    fairness = md.split("## Fairness")[1].split("##")[0]
    diff_line = next(line for line in fairness.splitlines() if line.startswith("| `attention=differential`"))
    # FLOPs/token ratio 5.0e6 / 4.8e6 = 1.042 (test input), params ratio 1.000.
    assert "| 1.042 |" in diff_line and "| 1.000 |" in diff_line
    assert "Baseline: `attention=standard` (named in grid.json)" in md
    assert "Recipe: test_recipe" in md


def test_seeds_sentence_in_words(built):
    _, rows, md = built
    d = np.array(LOSSES["differential"]) - np.array(LOSSES["standard"])
    n_normal, n_t = seeds_needed(float(d.std(ddof=1)), 0.01)
    assert f"needs about {n_t} seeds for +/-0.01 nats (normal approximation: {n_normal})" in md


def test_plots_written(built):
    grid, _, md = built
    for name in ["val_loss.png", "lambda.png", "retrieval_heatmap.png", "bars_final_validation_loss.png",
                 "bars_copy_within_-1_to_1.png"]:
        path = grid / "plots" / name
        assert path.exists() and path.stat().st_size > 1000, name
        assert f"(plots/{name})" in md
    # Retrieval grid keys go to the heatmap, not to a crowded bar chart.
    assert sorted(p.name for p in (grid / "plots").glob("bars_*")) == [
        "bars_copy_within_-1_to_1.png", "bars_final_validation_loss.png"]


def test_bar_groups_keep_one_kind_of_number_per_chart():
    def row(metric, mean):
        return report.Row("c", metric, 3, mean=mean)

    rows = [row("final_val_loss", 3.2), row("attention/layer0/asked_mass", 0.4),
            row("attention/layer1/asked_mass", 0.5), row("attention/layer0/asked_to_distractor", 12.0),
            row("quantization/loss_w8", 3.3), row("quantization/increase_w8", 0.01)]
    rows += [row(f"position/loss_pos{i}_{i + 1}", 3.0) for i in range(20)]
    groups = report.bar_groups(rows, skip=set())
    assert groups["final validation loss"] == [("final_val_loss", "final_val_loss")]
    assert groups["attention: asked_mass"] == [("attention/layer0/asked_mass", "layer0"),
                                               ("attention/layer1/asked_mass", "layer1")]
    assert groups["attention: asked_to_distractor"] == [("attention/layer0/asked_to_distractor", "layer0")]
    assert groups["quantization (larger numbers)"] == [("quantization/loss_w8", "loss_w8")]
    assert groups["quantization (within -1 to 1)"] == [("quantization/increase_w8", "increase_w8")]
    assert [len(groups[f"position (larger numbers) (part {k} of 2)"]) for k in (1, 2)] == [16, 4]


def test_event_files_read_back_from_run_folder_and_tb_subfolder(grid):
    for seed, where in [(0, "tb"), (1, ".")]:
        folder = grid / "attention=differential" / f"seed={seed}"
        assert [p.parent.name for p in report.event_files(folder)] == [folder.name if where == "." else "tb"]
        scalars = report.read_scalars(folder)
        expected = _curves("differential", seed, LOSSES["differential"][seed])
        assert set(scalars) == set(expected)
        steps, values = scalars["lambda/layer_1"]
        assert steps.tolist() == [s for s, _ in expected["lambda/layer_1"]]
        # TensorBoard stores scalars as float32.
        assert values == pytest.approx([v for _, v in expected["lambda/layer_1"]], rel=1e-6)


def test_retrieval_grid_averages_over_other_axes_and_seeds():
    table = {"c": {"retrieval/acc_len64_depth0.5_dist2": {0: 0.2, 1: 0.4},
                   "retrieval/acc_len64_depth0.5_dist4": {0: 0.6, 1: 0.8},
                   "retrieval/acc/len128_depth0.5": {0: 1.0},
                   "copy/acc": {0: 0.9}}}
    lengths, depths, acc = report.retrieval_grid(table)["c"]
    assert lengths == [64, 128] and depths == [0.5]
    assert acc.tolist() == [[pytest.approx(0.5), pytest.approx(1.0)]]
    assert report.retrieval_grid({"c": {"copy/acc": {0: 1.0}}}) == {}
    # Where the plain length x depth key exists it is used as is (it already averages the rest).
    table["c"]["retrieval/acc_len64_depth0.5"] = {0: 0.3, 1: 0.3}
    _, _, acc = report.retrieval_grid(table)["c"]
    assert acc[0, 0] == pytest.approx(0.3)


def test_plot_labels_drop_choices_all_cells_share():
    labels, shared = report.short_labels(["attention=standard,budget=smoke", "attention=differential,budget=smoke"])
    assert labels == {"attention=standard,budget=smoke": "attention=standard",
                      "attention=differential,budget=smoke": "attention=differential"}
    assert shared == ["budget=smoke"]
    assert report.short_labels(["attention=standard"]) == ({"attention=standard": "attention=standard"}, [])


def test_non_finite_probe_values_are_named_not_averaged(tmp_path):
    _write_run(tmp_path / "a", _summary("standard", 0, final_val_loss=3.0, probes={"x/acc": 0.5}))
    _write_run(tmp_path / "b", _summary("standard", 1, final_val_loss=3.1, probes={"x/acc": float("nan")}))
    assert report.main([str(tmp_path)]) == 0
    with (tmp_path / "summary.csv").open() as handle:
        row = _row(list(csv.DictReader(handle)), "attention=standard", "x/acc")
    assert row["n"] == "1" and float(row["mean"]) == 0.5
    assert "1 probe value(s) were not finite numbers and were left out: `b`: x/acc" in (tmp_path / "report.md").read_text()


def test_stopped_run_listed_with_its_step(tmp_path):
    _write_run(tmp_path / "a", _summary("standard", 0, final_val_loss=3.0, probes={}))
    _write_run(tmp_path / "b", {"status": "stopped", "attention": "standard", "seed": 1,
                                "cell": "attention=standard", "step": 40})
    assert report.main([str(tmp_path)]) == 0
    md = (tmp_path / "report.md").read_text()
    assert "| `b` | stopped | stopped at step 40 | stopped early on request" in md


def test_unfinished_run_folder_without_summary_is_listed(tmp_path):
    _write_run(tmp_path / "a", _summary("standard", 0, final_val_loss=3.0, probes={}))
    unfinished = tmp_path / "b"
    unfinished.mkdir()
    (unfinished / "config.yaml").write_text("seed: 1\n")
    from torch.utils.tensorboard import SummaryWriter

    writer = SummaryWriter(log_dir=str(unfinished))
    writer.add_scalar("loss/train", 6.0, global_step=8192)
    writer.close()
    assert report.main([str(tmp_path)]) == 0
    md = (tmp_path / "report.md").read_text()
    assert "| `b` | no summary | last logged at 8,192 tokens | unfinished or interrupted" in md


def test_console_table_printed(grid, capsys):
    assert report.main([str(grid), "--target-halfwidth", "0.02"]) == 0
    out = capsys.readouterr().out
    assert out.splitlines()[0].split()[:4] == ["cell", "seeds", "final", "val"]
    assert "attention=standard *" in out and "1 run(s)" not in out and "2 run(s) left out of the averages" in out
    assert "+/-0.02 nats" in (grid / "report.md").read_text()


def test_baseline_without_grid_json_is_the_standard_cell(tmp_path):
    for attention, loss in [("differential", 3.3), ("standard", 3.4), ("alpha", 3.5)]:
        _write_run(tmp_path / attention, _summary(attention, 0, final_val_loss=loss, probes={}))
    assert report.main([str(tmp_path)]) == 0
    md = (tmp_path / "report.md").read_text()
    assert "Baseline: `attention=standard` (no grid.json baseline; chosen as the cell with attention 'standard')" in md
    assert "1 seed: no interval" in md
    assert "No `loss/val` curves found" in md and "retrieval heatmap skipped" in md


def test_unknown_baseline_in_grid_json_is_a_one_line_error(tmp_path, capsys):
    _write_run(tmp_path / "a", _summary("standard", 0, final_val_loss=3.0, probes={}))
    (tmp_path / "grid.json").write_text(json.dumps({"baseline": "attention=nope"}))
    assert report.main([str(tmp_path)]) == 2
    assert "names baseline 'attention=nope'" in capsys.readouterr().err


@pytest.mark.parametrize("make", ["empty", "missing"])
def test_exit_code_2_without_runs(tmp_path, make):
    target = tmp_path / "grid" if make == "missing" else tmp_path
    result = subprocess.run([sys.executable, "-m", "ablate.report", str(target)], cwd=ROOT,
                            capture_output=True, text=True, timeout=60)
    assert result.returncode == 2
    assert len(result.stderr.strip().splitlines()) == 1 and "Traceback" not in result.stderr
    assert ("no summary.json" if make == "empty" else "not found") in result.stderr


# ----------------------------------------------------------------------------- sweep grid


SIZES = {"m1": 1e5, "m2": 3e5, "m3": 1e6, "m4": 3e6, "m5": 1e7}
AMPLITUDE = {"standard": 100.0, "differential": 80.0}  # hand-made L = 2 + A N^-0.35


@pytest.fixture(scope="module")
def sweep_grid(tmp_path_factory):
    root = tmp_path_factory.mktemp("sweep")
    rng = np.random.default_rng(1)
    for attention, amplitude in AMPLITUDE.items():
        for model, size in SIZES.items():
            for seed in SEEDS:
                loss = 2.0 + amplitude * size**-0.35 + rng.normal(0, 0.004)
                _write_run(root / f"{attention}_{model}_s{seed}",
                           _summary(attention, seed, cell=f"attention={attention},model={model}",
                                    non_embedding_params=int(size), final_val_loss=float(loss), probes={}))
    (root / "grid.json").write_text(json.dumps({
        "recipe": "size_sweep", "baseline": "attention=standard,model=m1", "varied": ["attention", "model"],
        "unequal_axes": ["model"], "target_halfwidth": 0.01, "sweep": {"axis": "params", "key": "model"}}))
    assert report.main([str(root), "--resamples", "200"]) == 0
    return root


def test_sweep_report_writes_ratio_interval_and_plot(sweep_grid):
    md = (sweep_grid / "report.md").read_text()
    with (sweep_grid / "summary.csv").open() as handle:
        rows = list(csv.DictReader(handle))
    ratio = _row(rows, "differential", "params_ratio")
    truth = (80.0 / 100.0) ** (1 / 0.35)  # closed form for equal E and alpha
    assert float(ratio["mean"]) == pytest.approx(truth, rel=0.1)
    assert float(ratio["ci_low"]) < float(ratio["mean"]) < float(ratio["ci_high"])
    assert ratio["reference"] == "standard"
    sentence = ratio["note"]
    assert sentence.startswith("differential reaches standard's loss with ") and "(95% CI " in sentence
    assert sentence.endswith("of its parameters at this scale")
    assert f"**{sentence}.**" in md
    assert (sweep_grid / "plots" / "efficiency.png").stat().st_size > 1000
    assert "(plots/efficiency.png)" in md


def test_sweep_cells_compare_at_the_same_sweep_point(sweep_grid):
    with (sweep_grid / "summary.csv").open() as handle:
        rows = list(csv.DictReader(handle))
    row = _row(rows, "attention=differential,model=m3", "final_val_loss")
    assert row["reference"] == "attention=standard,model=m3"
    assert "compared with the baseline's design at the same sweep point" in (sweep_grid / "report.md").read_text()


def test_copy_levels_are_printed_beside_the_probes_not_averaged_as_one(tmp_path):
    levels = {"retrieval/copy_level": 0.14, "classification/copy_level": 0.173}
    _write_run(tmp_path / "a", _summary("standard", 0, final_val_loss=3.0, probes={"retrieval/acc": 0.01, **levels}))
    _write_run(tmp_path / "b", _summary("standard", 1, final_val_loss=3.1, probes={"retrieval/acc": 0.02, **levels}))
    assert report.main([str(tmp_path)]) == 0
    with (tmp_path / "summary.csv").open() as handle:
        metrics = {row["metric"] for row in csv.DictReader(handle)}
    assert "retrieval/acc" in metrics and not any(m.endswith("copy_level") for m in metrics)
    text = (tmp_path / "report.md").read_text()
    assert "`classification/acc` 0.173; `retrieval/acc` 0.140." in text
