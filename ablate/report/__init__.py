"""h2h-report: what differed between the cells of a grid and how sure we are.

Usage::

    h2h-report GRID_FOLDER [GRID_FOLDER ...] [--baseline CELL] [--metric NAME] [--resolution W]
               [--resamples N] [--bootstrap-seed S]

Reads only files on disk: every ``summary.json`` below a grid folder (one run each), TensorBoard
event files, and ``grid.json`` (baseline, primary metric, resolution, rounds, sweep). Without
grid.json, ``--baseline`` is required. Writes ``report.md``, ``summary.csv`` and ``plots/*.png``
into each grid folder and prints each grid's verdict first, one line per comparison, then a
compact table. Exit code 0 on success, 2 (one line on stderr) on input the user must fix.

summary.csv: one row per cell per number (columns: render.CSV_COLUMNS).

    kind              ``metric`` (averaged and tested), ``context`` (metadata such as copy levels,
                      item counts, reached flags: values listed, never averaged) or ``ratio``
                      (efficiency, sweep grids)
    n, mean, ci_low, ci_high   completed seeds with the number; mean and 95% Student-t interval
    reference, n_paired        the cell compared against; seeds present in both
    diff_to_baseline, diff_ci_low, diff_ci_high, p_value   paired difference, its t interval, paired t-test
    p_holm            Holm (1979) adjusted p-value within the comparison (cell vs reference)
    resolution        half-width that counts as resolved (grid.json for the primary metric; 0.01 nats
                      for losses; 0.02 for accuracies, shares and areas; empty otherwise)
    seeds_needed_low, seeds_needed_high   seeds for that half-width, from the chi-square interval of
                      the SD of the paired differences (needs >= 3 pairs)
    note              censoring ("not reached in k of n seeds"), reduced seeds, why no seeds number
"""

from __future__ import annotations

import argparse
import csv
import sys
from pathlib import Path

from . import attribution, plots, render, table
from .load import ReportError, load_grid

OWN_PLOTS = (
    "paired_difference.png",
    "val_loss.png",
    "lambda.png",
    "retrieval_heatmap.png",
    "efficiency.png",
    "interaction.png",
    "over_training.png",
    "tokens_to_half.png",
)


def write_plots(report: table.Report, plot_dir: Path) -> list[tuple[str, str]]:
    plot_dir.mkdir(exist_ok=True)
    for name in OWN_PLOTS:
        (plot_dir / name).unlink(missing_ok=True)  # ours from an earlier report of this grid
    written = []
    if plots.paired_difference_chart(report, plot_dir / OWN_PLOTS[0]):
        written.append((f"paired differences in {report.metric}", OWN_PLOTS[0]))
    if plots.interaction_plot(report, table.values_by_cell(report.runs), plot_dir / OWN_PLOTS[5]):
        written.append((f"{report.metric} by factor levels", OWN_PLOTS[5]))
    names = {t.contrast: attribution.contrast_name(report, t.contrast) for t in report.over_training}
    what = "effects" if report.factors else "paired differences"
    if plots.over_training_plot(report, names, plot_dir / OWN_PLOTS[6]):
        written.append((f"{what} in {report.metric} over training", OWN_PLOTS[6]))
    if plots.km_plot(report, table.values_by_cell(report.runs), plot_dir / OWN_PLOTS[7]):
        written.append(("tokens to halfway (Kaplan-Meier)", OWN_PLOTS[7]))
    cells = sorted(report.refs)
    labels, _ = plots.short_labels(cells)
    if plots.plot_val_loss(report.runs, plot_dir / OWN_PLOTS[1], labels):
        written.append(("validation loss over training", OWN_PLOTS[1]))
    if plots.plot_lambda(report.runs, plot_dir / OWN_PLOTS[2], labels):
        written.append(("lambda per layer over training", OWN_PLOTS[2]))
    grids = plots.retrieval_grid(table.values_by_cell(report.runs))
    if grids:
        plots.plot_retrieval(grids, plot_dir / OWN_PLOTS[3], labels)
        written.append(("retrieval accuracy over length and depth", OWN_PLOTS[3]))
    if report.efficiency:
        plots.plot_sweep(
            plot_dir / OWN_PLOTS[4],
            report.sweep["axis"],
            report.sweep_designs,
            report.fits,
            report.efficiency,
        )
        written.append(("efficiency across the sweep", OWN_PLOTS[4]))
    return written


def write_report(report: table.Report) -> None:
    folder = Path(report.folder)
    written = write_plots(report, folder / "plots")
    with (folder / "summary.csv").open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(render.CSV_COLUMNS)
        writer.writerows(render.csv_rows(report))
    (folder / "report.md").write_text(render.markdown(report, written))


def parse(argv):
    parser = argparse.ArgumentParser(
        prog="h2h-report", description="Compare the cells of grid folders over seeds."
    )
    parser.add_argument(
        "grids", type=Path, nargs="+", help="grid folders holding run folders with summary.json"
    )
    parser.add_argument("--baseline", default=None, help="baseline cell (required without grid.json)")
    parser.add_argument(
        "--metric", default=None, help="primary metric (default: grid.json, else final_val_loss)"
    )
    parser.add_argument("--resolution", type=float, default=None, help="resolution of the primary metric")
    parser.add_argument(
        "--resamples", type=int, default=1000, help="bootstrap draws for the efficiency ratio"
    )
    parser.add_argument("--bootstrap-seed", type=int, default=0, help="seed of the bootstrap resampling")
    args = parser.parse_args(argv)
    if args.resamples < 1:
        raise ReportError(f"--resamples must be at least 1, got {args.resamples}")
    if args.resolution is not None and not args.resolution > 0:
        raise ReportError(f"--resolution must be > 0, got {args.resolution}")
    return args


def main(argv: list[str] | None = None) -> int:
    try:
        args = parse(argv)
        reports = [
            table.build(
                load_grid(g, args.baseline, args.metric), args.resolution, args.resamples, args.bootstrap_seed
            )
            for g in args.grids
        ]
        for report in reports:
            write_report(report)
    except ReportError as exc:
        print(f"h2h-report: {exc}", file=sys.stderr)
        return 2
    if len(reports) > 1:  # every grid's first lines together, then each grid's details once
        print("\n".join(line for r in reports for line in render.named(r, render.headline(r))) + "\n")
    print("\n\n".join(render.console(r, with_headline=len(reports) == 1) for r in reports))
    print("wrote " + ", ".join(f"{r.folder}/report.md" for r in reports))
    return 0
