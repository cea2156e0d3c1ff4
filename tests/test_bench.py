"""h2h-bench on a very small model: every number it writes is present and sane."""

import json
import math
import statistics
import time

import pytest
from conftest import NAMED_ATTENTION

from ablate.bench import main, named_choices, paired_ratio, ratios_to, time_rounds

SMALL = [
    "--override",
    "model.d_model=64",
    "--override",
    "model.n_layers=2",
    "--override",
    "model.seq_len=32",
    "--batch-size",
    "2",
    "--vocab-size",
    "64",
    "--steps",
    "4",
    "--warmup",
    "1",
    "--threads",
    "1",
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
        for key in (
            "median_step_seconds",
            "min_step_seconds",
            "tokens_per_second",
            "flops_per_second",
            "share_of_peak",
            "flops_per_token",
            "step_ratio",
            "paired_step_ratio",
            "median_cpu_seconds",
            "cpu_ratio",
            "final_loss",
        ):
            assert _positive_finite(row[key]), (name, key, row[key])
        assert row["min_step_seconds"] <= row["median_step_seconds"]
        # 64 tokens per step (batch 2 x seq_len 32, set above) in the median step time.
        assert row["tokens_per_second"] == pytest.approx(64 / statistics.median(row["step_seconds"]))
        assert row["step_spread"] >= 0
        assert row["baseline"] == "standard"
        for key in ("paired_cpu_ratio",):
            assert _positive_finite(row[key]), (name, key, row[key])
        assert row["memory"]["peak_rss_bytes"] > 0
        assert len(row["warmup_seconds"]) == 1 and row["warmup_seconds"][0] > 0
    # At equal d_model the equations cost the same per token (scores 2 T d, one value product
    # 2 T d per layer for both; tests/test_compute.py has the closed form), so the FLOPs agree.
    assert designs["differential"]["flops_per_token"] == pytest.approx(designs["standard"]["flops_per_token"])
    load = settings["load_average"]
    assert len(load["before"]) == len(load["after"]) == 3 and all(
        x >= 0 for x in load["before"] + load["after"]
    )
    assert "load average" in printed and settings["baseline"] == "standard"


def test_paired_ratio_is_the_median_of_within_round_ratios():
    # By hand: rounds give 3/1, 8/4, 5/5, 4/2 = 3, 2, 1, 2; their median is 2. The ratio of the
    # medians would be 4.5 / 3 = 1.5, so the two summaries are told apart.
    assert paired_ratio([3.0, 8.0, 5.0, 4.0], [1.0, 4.0, 5.0, 2.0]) == 2.0
    assert statistics.median([3.0, 8.0, 5.0, 4.0]) / statistics.median([1.0, 4.0, 5.0, 2.0]) == 1.5


class SpinContender:
    """Busy-waits a known CPU time per step, so its cost is known from outside the bench."""

    def __init__(self, name: str, seconds: float):
        self.name, self.seconds = name, seconds
        self.times, self.cpu_times = [], []

    def step(self):
        cpu_start, start = time.process_time(), time.perf_counter()
        while time.process_time() - cpu_start < self.seconds:
            pass
        return time.perf_counter() - start, time.process_time() - cpu_start


def test_rounds_recover_known_relative_cost():
    # A loop spinning 3x the CPU time must come out at ~3x in CPU time (tolerance ours: +-20 %) and
    # in wall time within +-50 % (a shared machine may deschedule a loop mid-way, which stretches
    # wall time but not CPU time).
    cheap, dear = SpinContender("cheap", 0.01), SpinContender("dear", 0.03)
    time_rounds([cheap, dear], [], 9)
    assert len(cheap.times) == len(dear.cpu_times) == 9
    ratios = ratios_to(dear, cheap)
    assert ratios["baseline"] == "cheap"
    for key in ("cpu_ratio", "paired_cpu_ratio"):
        assert ratios[key] == pytest.approx(3.0, rel=0.2), key
    for key in ("step_ratio", "paired_step_ratio"):
        assert ratios[key] == pytest.approx(3.0, rel=0.5), key


def test_baseline_option_sets_every_ratio_and_joins_the_choices(tmp_path):
    out = tmp_path / "bench.json"
    assert (
        main(
            [
                *SMALL,
                "--model",
                "drill",
                "--attention",
                "standard",
                "--baseline",
                "differential",
                "--json",
                str(out),
            ]
        )
        == 0
    )
    result = json.loads(out.read_text())
    assert result["settings"]["model"] == "drill" and result["settings"]["seq_len"] == 32  # override wins
    assert sorted(result["designs"]) == ["differential", "standard"]
    for row in result["designs"].values():
        assert row["baseline"] == "differential"
        assert all(
            _positive_finite(row[k])
            for k in ("step_ratio", "paired_step_ratio", "cpu_ratio", "paired_cpu_ratio")
        )


def test_named_choices_are_the_config_files_standard_first():
    names = named_choices()
    assert names[0] == "standard"
    assert sorted(names) == sorted(NAMED_ATTENTION)


@pytest.mark.parametrize(
    "argv, words",
    [
        (["--attention", "standard,sparse"], ["--attention='sparse'", "differential"]),
        (["--compile", "graph"], ["--compile='graph'", "block", "model"]),
        (["--steps", "0"], ["--steps=0"]),
        (["--model", "huge"], ["--model='huge'", "drill", "small", "tiny"]),
        (["--baseline", "sparse"], ["--baseline='sparse'", "standard", "differential"]),
    ],
)
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
