"""h2h-bench on a very small model: every number it writes is present and sane."""

import json
import math

import pytest

from ablate.bench import main, named_choices
from conftest import NAMED_ATTENTION

SMALL = [
    "--override", "model.d_model=64",
    "--override", "model.n_layers=2",
    "--override", "model.seq_len=32",
    "--batch-size", "2",
    "--vocab-size", "64",
    "--steps", "4",
    "--warmup", "1",
    "--threads", "1",
]


def _positive_finite(value) -> bool:
    return isinstance(value, (int, float)) and math.isfinite(value) and value > 0


def test_bench_writes_every_field_with_sane_values(tmp_path, capsys):
    out = tmp_path / "bench.json"
    assert main([*SMALL, "--json", str(out)]) == 0
    result = json.loads(out.read_text())
    printed = capsys.readouterr().out

    settings = result["settings"]
    assert (settings["d_model"], settings["n_layers"], settings["seq_len"]) == (64, 2, 32)
    assert settings["tokens_per_step"] == 2 * 32
    assert settings["threads"] == 1

    peak = result["matmul_peak"]
    assert _positive_finite(peak["flops_per_second"])
    assert peak["flops_per_second"] == max(peak["by_shape"].values())
    assert "1024x1024x1024" in peak["by_shape"]
    assert result["process_max_rss_bytes"] > 0

    designs = result["designs"]
    assert sorted(designs) == sorted(NAMED_ATTENTION)  # default: every named choice
    for name, row in designs.items():
        assert name in printed
        assert len(row["step_seconds"]) == len(row["cpu_seconds"]) == 4
        for key in ("median_step_seconds", "min_step_seconds", "tokens_per_second", "flops_per_second",
                    "share_of_peak", "flops_per_token", "step_ratio", "paired_step_ratio",
                    "median_cpu_seconds", "cpu_ratio", "final_loss"):
            assert _positive_finite(row[key]), (name, key, row[key])
        assert row["min_step_seconds"] <= row["median_step_seconds"]
        assert row["tokens_per_second"] == pytest.approx(64 / row["median_step_seconds"])
        assert row["flops_per_second"] == pytest.approx(row["flops_per_token"] * 64 / row["median_step_seconds"])
        assert row["share_of_peak"] == pytest.approx(row["flops_per_second"] / peak["flops_per_second"])
        assert row["step_spread"] >= 0
        assert row["baseline"] == "standard"
        assert row["memory"]["peak_rss_bytes"] > 0
        assert len(row["warmup_seconds"]) == 1 and row["warmup_seconds"][0] > 0
    assert designs["standard"]["step_ratio"] == 1.0
    assert designs["standard"]["paired_step_ratio"] == 1.0 and designs["standard"]["cpu_ratio"] == 1.0
    ratio = designs["differential"]["median_step_seconds"] / designs["standard"]["median_step_seconds"]
    assert designs["differential"]["step_ratio"] == pytest.approx(ratio)
    # Differential attention costs more per token (two value products per head).
    assert designs["differential"]["flops_per_token"] > designs["standard"]["flops_per_token"]


def test_named_choices_are_the_config_files_standard_first():
    names = named_choices()
    assert names[0] == "standard"
    assert sorted(names) == sorted(NAMED_ATTENTION)


@pytest.mark.parametrize("argv, words", [
    (["--attention", "standard,sparse"], ["--attention='sparse'", "differential"]),
    (["--compile", "graph"], ["--compile='graph'", "block", "model"]),
    (["--steps", "0"], ["--steps=0"]),
    (["--model", "huge"], ["--model='huge'", "small", "tiny"]),
])
def test_bad_options_name_the_option(argv, words, capsys):
    with pytest.raises(SystemExit) as err:
        main(argv)
    assert err.value.code == 2
    message = capsys.readouterr().err
    for word in words:
        assert word in message


def test_bad_override_is_one_readable_line(capsys):
    assert main(["--attention", "standard", "--override", "model.no_such_key=3", "--steps", "1"]) == 2
    message = capsys.readouterr().err.strip()
    assert message.startswith("h2h-bench: bad --override:") and "no_such_key" in message
    assert len(message.splitlines()) == 1
