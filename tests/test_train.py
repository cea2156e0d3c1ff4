"""End-to-end: h2h-train runs, records, TensorBoard curves, resume and determinism."""

import math

import pytest
from trainer_helpers import SMALL_DATA, run_dirs, scalars, summary, tags, train

pytestmark = pytest.mark.e2e  # runs the real commands in a subprocess

SMOKE = ["budget=smoke", "probes=off", *SMALL_DATA]


@pytest.fixture(scope="session")
def smoke_runs(tmp_path_factory, cache):
    root = tmp_path_factory.mktemp("smoke")
    out = {}
    for attention in ("standard", "differential"):
        proc = train([f"attention={attention}", *SMOKE], root / attention, cache)
        assert proc.returncode == 0, proc.stderr[-3000:]
        (run_dir,) = run_dirs(root / attention)
        out[attention] = run_dir
    return out


@pytest.mark.parametrize("attention", ["standard", "differential"])
def test_smoke_run_writes_a_complete_summary(smoke_runs, attention):
    s = summary(smoke_runs[attention])
    for key in (
        "status",
        "attention",
        "seed",
        "params",
        "non_embedding_params",
        "flops_per_token",
        "tokens",
        "train_flops",
        "final_val_loss",
        "wall_seconds",
        "probes",
        "environment",
    ):
        assert key in s, key
    assert s["status"] == "completed" and s["attention"] == attention
    vocab = 1024
    # the loss fell below the uniform-prediction level ln(V) (common practice, no source)
    assert math.isfinite(s["final_val_loss"]) and s["final_val_loss"] < math.log(vocab)
    assert s["tokens"] == 16384 and s["train_flops"] == pytest.approx(s["tokens"] * s["flops_per_token"])
    assert s["environment"]["torch_version"] and s["environment"]["threads"] >= 1
    assert (smoke_runs[attention] / "config.yaml").exists() and (
        smoke_runs[attention] / "checkpoint.pt"
    ).exists()


@pytest.mark.parametrize("attention", ["standard", "differential"])
def test_event_file_has_the_tags_with_token_steps(smoke_runs, attention):
    run_dir = smoke_runs[attention]
    expected = {
        "loss/train",
        "loss/val",
        "optim/lr",
        "optim/grad_norm",
        "speed/tokens_per_second",
        "compute/train_flops",
    }
    if attention == "differential":
        expected |= {f"lambda/layer_{i}" for i in range(4)}
    assert expected <= tags(run_dir)
    steps = [step for step, _ in scalars(run_dir, "loss/train")]
    tokens_per_step = summary(run_dir)["tokens_per_step"]
    assert steps == sorted(set(steps)) and all(s % tokens_per_step == 0 for s in steps)
    assert steps[-1] == summary(run_dir)["tokens"]
    flops = dict(scalars(run_dir, "compute/train_flops"))
    assert flops[steps[-1]] == pytest.approx(summary(run_dir)["train_flops"], rel=1e-6)


@pytest.mark.parametrize("attention", ["standard", "differential"])
def test_train_log_tells_the_run_with_timestamps(smoke_runs, attention):
    from ablate.runlog import read_log

    lines = read_log(smoke_runs[attention])
    events = [ln["event"] for ln in lines]
    assert events[0] == "start" and events[-1] == "finish" and "eval" in events and "checkpoint" in events
    start, finish = lines[0], lines[-1]
    assert start["device"] == "cpu" and start["threads"] == 1 and start["compile"] == "off"
    assert finish["status"] == "completed" and finish["time"] >= start["time"]
    s = summary(smoke_runs[attention])
    assert finish["tokens"] == s["tokens"] and finish["val_loss"] == pytest.approx(s["final_val_loss"])


def test_interrupted_run_resumes_to_the_same_numbers(tmp_path, cache, smoke_runs):
    root = tmp_path / "resume"
    first = train(["attention=differential", *SMOKE, "runtime.stop_after_steps=9"], root, cache)
    assert first.returncode == 0, first.stderr[-2000:]
    (run_dir,) = {p.parent for p in root.rglob("checkpoint.pt")}
    assert not (run_dir / "summary.json").exists()  # not finished, so no summary yet
    second = train(["attention=differential", *SMOKE], root, cache)
    assert second.returncode == 0, second.stderr[-2000:]
    assert "resuming" in second.stdout
    resumed, whole = summary(run_dir), summary(smoke_runs["differential"])
    assert resumed["final_val_loss"] == whole["final_val_loss"]
    assert resumed["final_train_loss"] == whole["final_train_loss"]
    # no duplicated and no missing steps: the resumed curve equals the uninterrupted one
    assert scalars(run_dir, "loss/train") == scalars(smoke_runs["differential"], "loss/train")
    assert scalars(run_dir, "loss/val") == scalars(smoke_runs["differential"], "loss/val")


def test_same_seed_same_curve_and_other_seed_differs(tmp_path, cache, smoke_runs):
    again = train(["attention=standard", *SMOKE], tmp_path / "again", cache)
    other = train(["attention=standard", *SMOKE, "seed=1"], tmp_path / "other", cache)
    assert again.returncode == 0 and other.returncode == 0, again.stderr[-2000:] + other.stderr[-2000:]
    reference = scalars(smoke_runs["standard"], "loss/train")
    assert scalars(run_dirs(tmp_path / "again")[0], "loss/train") == reference
    assert scalars(run_dirs(tmp_path / "other")[0], "loss/train") != reference


def test_rerunning_a_finished_run_trains_nothing(tmp_path, cache, smoke_runs):
    root = smoke_runs["standard"].parents[1]
    proc = train(["attention=standard", *SMOKE], root, cache)
    assert proc.returncode == 0
    assert "skip" in proc.stdout and "done" not in proc.stdout


BAD = [
    (["attention=nonexistent"], "attention"),
    (["model=huge"], "model"),
    (["data=nowhere"], "data"),
    (["budget=forever"], "budget"),
    (["recipe=nothing"], "recipe"),
    (["model.d_model=100"], "d_model=100"),
    (["attention=differential", "model.d_model=96"], "d_model=96"),
    (["model.seq_len=128"], "seq_len"),
    (["budget.tokens=0"], "budget.tokens"),
    (["budget.tokens=-5"], "budget.tokens"),
    (["optim.lr=0"], "optim.lr"),
    (["optim.lr=-1e-3"], "optim.lr"),
    (["budget.batch_size=0"], "budget.batch_size"),
    (["attention=differential", "attention.lambda_init=1.5"], "lambda_init"),
    (["attention=differential", "attention.lambda_mode=wobbly"], "lambda_mode"),
    (["model.d_model=abc"], "model.d_model"),
    (["no_such_key=1"], "no_such_key"),
    (["runtime.device=tpu"], "runtime.device"),
]


@pytest.mark.parametrize("args, word", BAD, ids=[" ".join(a) for a, _ in BAD])
def test_bad_config_exits_2_with_one_line(tmp_path, cache, args, word):
    keys = {a.split("=")[0] for a in args}
    base = [a for a in SMOKE if a.split("=")[0] not in keys]
    proc = train([*base, *args], tmp_path / "runs", cache, timeout=120)
    assert proc.returncode == 2, (proc.returncode, proc.stderr[-2000:])
    lines = [ln for ln in proc.stderr.strip().splitlines() if ln.strip()]
    assert len(lines) == 1, proc.stderr
    assert "Traceback" not in proc.stderr and word in lines[0]
    assert not (tmp_path / "runs").exists()  # nothing trained, no run folder made


def test_reference_kernels_train_to_the_same_losses(smoke_runs, tmp_path, cache):
    # runtime.kernels=reference runs the published equations under plain autograd over the full
    # window; a short run must give the fast kernels' losses (same seed, same data) to 1e-5.
    proc = train(["attention=differential", "runtime.kernels=reference", *SMOKE], tmp_path, cache)
    assert proc.returncode == 0, proc.stderr[-3000:]
    (run_dir,) = run_dirs(tmp_path)
    ref, fast = summary(run_dir), summary(smoke_runs["differential"])
    assert ref["step"] == fast["step"] > 0
    for key in ("final_train_loss", "final_val_loss"):
        assert abs(ref[key] - fast[key]) <= 1e-5, key
