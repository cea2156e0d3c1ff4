"""Verdicts on hand-made grid folders: the primary metric tested alone (Holm across the grid's
primary comparisons, never with the secondary metrics), words that say which way is better with
direction and precision apart, drill formation and timing, and the trust section."""

import json

import numpy as np
import pytest
from scipy import stats as sps
from statsmodels.stats.multitest import multipletests

from ablate import calibration, records, report
from ablate.report import load, render, table

SEEDS = [0, 1, 2, 3]


def write(root, cell, seed, loss, probes=None, tokens=2_000_000):
    folder = root / f"{cell},seed={seed}"
    folder.mkdir(parents=True)
    attention = cell.split("=", 1)[1]
    summary = {
        "status": "completed",
        "attention": attention,
        "seed": seed,
        "cell": cell,
        "final_val_loss": loss,
        "tokens": tokens,
        "probes": probes or {},
    }
    (folder / "summary.json").write_text(json.dumps(summary))


def grid_json(root, **extra):
    fields = dict(
        name=root.name, dir=str(root), baseline="attention=standard", varied=["attention"], seeds=SEEDS
    )
    records.write_grid(records.GridRecord(**{**fields, **extra}))


def build(root, **kw):
    return table.build(load.load_grid(root, **kw))


@pytest.fixture
def three_against_one(tmp_path):
    rng = np.random.default_rng(5)
    base = 3.0 + rng.normal(0, 0.05, 4)
    for s in SEEDS:
        write(tmp_path, "attention=standard", s, float(base[s]), {f"m{i}/acc": 0.5 for i in range(9)})
    for shift, name in ((0.02, "a"), (0.05, "b"), (0.2, "c")):
        for s in SEEDS:
            probes = {f"m{i}/acc": float(0.5 + rng.normal(0, 0.02)) for i in range(9)}
            write(tmp_path, f"attention={name}", s, float(base[s] + shift + rng.normal(0, 0.03)), probes)
    grid_json(tmp_path)
    return tmp_path


def test_primary_comparisons_are_holm_adjusted_across_cells_and_alone(three_against_one):
    rep = build(three_against_one)
    raw = [v.estimate.p for v in rep.verdicts]
    # paired t of each cell against the baseline (scipy.stats.ttest_rel), Holm across the three
    # (statsmodels multipletests, Holm 1979)
    base = {r.cell: r for r in rep.rows if r.metric == "final_val_loss"}
    assert all(np.isfinite(raw)) and len(raw) == 3
    assert [v.estimate.p_holm for v in rep.verdicts] == pytest.approx(
        list(multipletests(raw, method="holm")[1])
    )
    # the appendix's primary rows carry the same adjusted p as the headline
    for v in rep.verdicts:
        assert base[v.contrast.cells[0]].p_holm == pytest.approx(v.estimate.p_holm)
    # the secondary metrics form their own family per comparison: nine metrics, never the primary
    assert all(t.tested == 9 for t in rep.tests)
    lines = render.headline(rep)
    assert lines[0] == "3 comparisons against the baseline; Holm across them for direction"
    assert any("Holm across 3 comparisons" in line for line in lines)


def test_a_primary_p_of_003_says_clear_in_headline_and_appendix_alike(tmp_path):
    # One comparison: its p is its Holm p (a family of one); nine secondary metrics do not touch it.
    d = np.array([0.030, 0.015, 0.025, 0.010])
    for s in SEEDS:
        write(tmp_path, "attention=standard", s, 3.0 + s / 10, {f"m{i}/acc": 0.5 + s / 100 for i in range(9)})
        write(
            tmp_path, "attention=differential", s, 3.0 + s / 10 + d[s], {f"m{i}/acc": 0.5 for i in range(9)}
        )
    grid_json(tmp_path)
    rep = build(tmp_path)
    (v,) = rep.verdicts
    p = sps.ttest_1samp(d, 0).pvalue  # reference: scipy
    assert v.estimate.p == pytest.approx(p) and v.estimate.p_holm == pytest.approx(p) and p < 0.05
    assert v.status == "clear"
    row = next(r for r in rep.rows if r.metric == "final_val_loss" and not r.is_reference)
    assert row.p_holm == pytest.approx(p)


def test_the_words_name_better_or_worse_and_keep_direction_and_precision_apart(tmp_path, capsys):
    d = [0.30, 0.35, 0.40, 0.45]
    for s in SEEDS:
        write(tmp_path, "attention=standard", s, 3.0 + s / 10)
        write(tmp_path, "attention=differential", s, 3.0 + s / 10 + d[s])
    grid_json(tmp_path, resolution=0.01)
    assert report.main([str(tmp_path)]) == 0
    out = capsys.readouterr().out
    low, high = sps.t.interval(0.95, 3, loc=np.mean(d), scale=sps.sem(d))
    first = out.splitlines()[0]
    assert first == (
        f"{tmp_path.name}: final validation loss: differential is worse than standard by 0.375 nats "
        f"(95% CI {low:.3g} to {high:.3g}; paired t, 4 seeds)."
    )
    second = out.splitlines()[1]
    half = (high - low) / 2
    assert (
        second.startswith("  Direction: clear (p = ")
        and f"Precision: +/-{half:.2g} nats against the +/-0.01 asked" in second
    )
    assert "seeds (" in second and "would reach it" in second
    assert out.count("is worse than standard") == 1  # each verdict once


def test_metric_given_on_the_command_line_is_said(tmp_path, capsys):
    for s in SEEDS:
        write(tmp_path, "attention=standard", s, 3.0 + s / 10, {"x/acc": 0.5 + s / 50})
        write(tmp_path, "attention=differential", s, 3.1 + s / 10, {"x/acc": 0.55 + s / 40})
    grid_json(tmp_path)
    assert report.main([str(tmp_path), "--metric", "x/acc", "--resolution", "0.05"]) == 0
    out = capsys.readouterr().out
    assert "(--metric x/acc replaced the recipe's primary metric final_val_loss)" in out
    assert "(--resolution 0.05 replaced the recipe's 0.01)" in out
    assert "differential is better than standard" in out  # accuracy: higher is better


def test_a_drill_verdict_reports_formation_and_censored_timing(tmp_path, capsys):
    # standard formed recall in 1 of 4 seeds, differential in 3: not judged for precision, and
    # the formation test and the censored sign test are beside the verdict.
    formed = {"standard": [1, 0, 0, 0], "differential": [1, 1, 1, 0]}
    times = {"standard": [9e5, None, None, None], "differential": [4e5, 6e5, 8e5, None]}
    for name in formed:
        for s in SEEDS:
            probes = {
                "drill/auc": 0.33 + 0.4 * formed[name][s] + 0.01 * s,
                "drill/half_reached": float(formed[name][s]),
            }
            if times[name][s] is not None:
                probes["drill/tokens_to_half"] = times[name][s]
            write(tmp_path, f"attention={name}", s, 2.0, probes)
    grid_json(tmp_path, primary_metric="drill/auc", resolution=10.0)
    rep = build(tmp_path)
    (v,) = rep.verdicts
    assert v.formation.formed == {v.contrast.cells[0]: (3, 4), v.contrast.cells[1]: (1, 4)}
    assert (v.formation.only_cell, v.formation.only_reference) == (2, 0)
    assert v.formation.p == pytest.approx(sps.binomtest(2, 2, 0.5).pvalue)
    assert v.precision == "formation incomplete"  # even though the width is below the resolution
    assert (v.timing.cell_sooner, v.timing.reference_sooner) == (3, 0)
    # Kaplan-Meier: S = 3/4 after 4e5, 2/4 after 6e5 (the censored seed stays at risk): median 6e5
    assert v.timing.medians[v.contrast.cells[0]][0] == 6e5
    assert report.main([str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "Formed recall (reached halfway): differential 3 of 4; standard 1 of 4" in out
    assert "not judged while fewer than half of the seeds formed recall" in out


def test_the_trust_section_quotes_the_shipped_simulations(tmp_path):
    for s in SEEDS:
        write(tmp_path, "attention=standard", s, 3.0 + s / 10)
        write(tmp_path, "attention=differential", s, 3.05 + s / 9)
    grid_json(tmp_path)
    assert report.main([str(tmp_path)]) == 0
    md = (tmp_path / "report.md").read_text()
    section = md.split("## How far to trust these verdicts")[1].split("##")[0]
    row = next(r for r in calibration.load() if r["rule"] == "fixed" and r["seeds"] == 4)
    assert f"covered the truth {row['coverage']:.3f}" in section and f"{row['reps']:,} simulations" in section
    assert "tested alone at 0.05" in section


def test_no_spread_is_never_resolved(tmp_path):
    # An A/A grid with common random numbers gives the same value in every seed: no interval
    # exists, whatever the resolution asked.
    for s in SEEDS:
        write(tmp_path, "attention=standard", s, 3.0 + s / 10)
        write(tmp_path, "attention=standard_copy", s, 3.0 + s / 10)
    grid_json(tmp_path, resolution=0.01)
    (v,) = build(tmp_path).verdicts
    assert v.status == "no spread" and v.precision == "no interval"
    assert "no interval exists" in " ".join(render.headline(build(tmp_path)))
