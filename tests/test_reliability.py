"""Faults a run must survive: divergence, kills, Ctrl-C/SIGTERM, bad checkpoints, bad inputs.

The end-to-end tests run the real ``h2h-train`` in a subprocess at the smoke budget on the
small test corpus, with one torch thread (two threads on two shared cores run several times
slower) and a checkpoint every 2 steps, so a signal always lands between checkpoints.
"""

import math
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch
from trainer_helpers import ROOT, SMALL_DATA, run_dirs, scalars, summary, train

pytestmark = pytest.mark.e2e  # runs the real commands in a subprocess

SMOKE = ["budget=smoke", "probes=off", *SMALL_DATA, "runtime.threads=1"]
RESUMABLE = [*SMOKE, "budget.checkpoint_every_tokens=2048"]  # 16 steps of 1024 tokens, a checkpoint every 2
# AdamW at this lr gives a non-finite loss at step 2 of the smoke run (seen, not assumed); written
# the way Hydra's sweeper writes it, so the single run and the grid cell share a run folder.
DIVERGING_LR = "1000.0"
# RESUMABLE at the default lr, spelled as the grid's sweep spells it: the same config and the same
# run folder name as the grid's completed cell, which serves as the uninterrupted reference.
REFERENCE = [*RESUMABLE, "optim.lr=0.002"]


def start_train(args, run_root, cache):
    """``h2h-train`` in the background, as trainer_helpers.train runs it."""
    env = dict(os.environ, HEADTOHEAD_CACHE=str(cache), PYTHONHASHSEED="0")
    cmd = [sys.executable, "-m", "ablate.train", f"run_root={run_root}", "runtime.progress=false", *args]
    # The run keeps an ignored SIGINT ignored (as under nohup); a suite started as a background job
    # passes SIGINT on ignored, so give the child the default disposition a terminal would.
    return subprocess.Popen(
        cmd,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
        cwd=ROOT,
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL),
    )


def file_version(path):
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return None
    return (st.st_ino, st.st_mtime_ns, st.st_size)


def wait_for_new_checkpoint(proc, run_root, before=None, timeout=120):
    """Poll until the run writes a checkpoint other than ``before``; return its path."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        for path in Path(run_root).rglob("checkpoint.pt"):
            version = file_version(path)
            if version is not None and version != before:
                return path
        if proc.poll() is not None:
            out, err = proc.communicate()
            pytest.fail(
                f"run ended (exit {proc.returncode}) before a new checkpoint appeared:\n{err[-2000:]}"
            )
        time.sleep(0.02)
    proc.kill()
    pytest.fail("no new checkpoint within the timeout")


def checkpoint_step(path):
    # torch.load weights_only=True: tensors and plain containers only (torch.load docs)
    return int(torch.load(path, map_location="cpu", weights_only=True)["step"])


def error_lines(proc):
    return [ln for ln in proc.stderr.strip().splitlines() if ln.strip()]


@pytest.fixture(scope="module")
def grid(tmp_path_factory, cache):
    """A 2-cell grid over the learning rate: one cell trains, the other diverges."""
    root = tmp_path_factory.mktemp("grid")
    proc = train(
        ["-m", *RESUMABLE, f"optim.lr=0.002,{DIVERGING_LR}", "grid.baseline='optim.lr=0.002'"], root, cache
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    runs = {summary(d)["status"]: d for d in run_dirs(root)}
    assert set(runs) == {"completed", "diverged"}, runs
    return {"root": root, "proc": proc, **runs, "grid_dir": runs["completed"].parent}


@pytest.fixture(scope="module")
def reference(grid):
    """An uninterrupted run of REFERENCE: the grid's completed cell."""
    return grid["completed"]


@pytest.fixture(scope="module")
def interrupted(tmp_path_factory, cache):
    """One run of RESUMABLE taken through SIGKILL, then SIGINT, then run to its end; each stage
    is the same command again. Returns what each stage left behind."""
    root = tmp_path_factory.mktemp("interrupted")
    stages = {}
    before = None
    for name, sig in (("kill", signal.SIGKILL), ("int", signal.SIGINT)):
        proc = start_train(RESUMABLE, root, cache)
        ckpt = wait_for_new_checkpoint(proc, root, before)
        proc.send_signal(sig)
        out, err = proc.communicate(timeout=120)
        before = file_version(ckpt)
        stages[name] = {
            "rc": proc.returncode,
            "stdout": out,
            "stderr": err,
            "run_dir": ckpt.parent,
            "step": checkpoint_step(ckpt),
            "summary": (ckpt.parent / "summary.json").exists(),
            "temp_files": sorted(p.name for p in ckpt.parent.glob(".*")),
        }
    final = train(RESUMABLE, root, cache)
    stages["final"] = {
        "rc": final.returncode,
        "stdout": final.stdout,
        "stderr": final.stderr,
        "temp_files": sorted(p.name for p in stages["int"]["run_dir"].glob(".*")),
    }
    return stages


def test_sigkill_leaves_a_loadable_checkpoint_and_no_summary(interrupted):
    kill = interrupted["kill"]
    assert kill["rc"] == -signal.SIGKILL
    assert kill["step"] >= 2 and kill["step"] % 2 == 0  # one of the every-2-steps checkpoints, read whole
    assert not kill["summary"]


def test_sigint_stops_with_exit_130_a_fresh_checkpoint_and_a_resume_hint(interrupted):
    stage = interrupted["int"]
    assert stage["rc"] == 130, stage["stderr"][-2000:]
    assert f"resuming {stage['run_dir'].name} from step {interrupted['kill']['step']}" in stage["stdout"]
    lines = [ln for ln in stage["stderr"].splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in stage["stderr"], stage["stderr"]
    assert "SIGINT" in lines[0] and "Run the same command again to resume" in lines[0]
    assert f"at step {stage['step']} " in lines[0]  # the step it names is the step the checkpoint holds
    assert stage["step"] > interrupted["kill"]["step"] and not stage["summary"]
    assert stage["temp_files"] == []  # a stop at a step boundary leaves no half-written file


def test_sigterm_and_sigint_wait_for_the_step_inside_the_loop_and_interrupt_outside():
    from ablate.signals import StopSignals

    def deliver(sig):
        os.kill(os.getpid(), sig)
        for _ in range(100):  # Python runs the handler between bytecodes of the main thread
            time.sleep(0.001)

    previous = signal.getsignal(signal.SIGTERM)
    with StopSignals() as stops:
        with stops.deferred():
            deliver(signal.SIGTERM)
            deliver(signal.SIGINT)  # a second signal, e.g. during the final save, changes nothing
        assert stops.received == "SIGTERM"
        with pytest.raises(KeyboardInterrupt):
            deliver(signal.SIGTERM)
    assert signal.getsignal(signal.SIGTERM) is previous


def test_resumed_run_ends_with_the_numbers_of_an_uninterrupted_one(interrupted, reference):
    final = interrupted["final"]
    assert final["rc"] == 0, final["stderr"][-2000:]
    assert f"from step {interrupted['int']['step']}" in final["stdout"]
    assert final["temp_files"] == []  # whatever the SIGKILL left half-written was cleared
    run_dir = interrupted["int"]["run_dir"]
    resumed, whole = summary(run_dir), summary(reference)
    assert resumed["status"] == whole["status"] == "completed"
    assert resumed["fingerprint"] == whole["fingerprint"]  # the same config as the grid cell
    for key in ("final_val_loss", "final_train_loss", "tokens", "step", "train_flops"):
        assert resumed[key] == whole[key], key
    # tensorboard's own event reader: same steps, no duplicates or gaps, same values
    for tag in ("loss/train", "loss/val", "optim/lr", "compute/train_flops", "final/val_loss"):
        assert scalars(run_dir, tag) == scalars(reference, tag), tag


def copy_of_run(run_dir, root):
    """The run folder at the place a single run of REFERENCE uses under another run root,
    without its summary, as an interrupted run would leave it."""
    target = Path(root) / "single" / run_dir.name
    shutil.copytree(run_dir, target)
    (target / "summary.json").unlink()
    return target


def assert_refused(proc, run_dir, checkpoint_bytes, words):
    assert proc.returncode == 2, (proc.returncode, proc.stderr[-2000:])
    lines = error_lines(proc)
    assert len(lines) == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert all(w in lines[0] for w in words), lines[0]
    assert (run_dir / "checkpoint.pt").read_bytes() == checkpoint_bytes  # left as found
    assert not (run_dir / "summary.json").exists()
    assert lines[0].removeprefix("h2h-train: ") in (run_dir / "train.log").read_text()


def test_truncated_checkpoint_is_refused_in_one_line(tmp_path, cache, reference):
    run_dir = copy_of_run(reference, tmp_path)
    ckpt = run_dir / "checkpoint.pt"
    cut = ckpt.read_bytes()[: ckpt.stat().st_size // 2]
    ckpt.write_bytes(cut)
    config_before = (run_dir / "config.yaml").read_bytes()
    proc = train(REFERENCE, tmp_path, cache)
    assert_refused(proc, run_dir, cut, ["damaged or truncated", "delete it"])
    assert (run_dir / "config.yaml").read_bytes() == config_before


def test_checkpoint_from_another_config_is_refused(tmp_path, cache, reference):
    from omegaconf import OmegaConf

    from ablate import records
    from ablate.config import compose

    other = compose([*REFERENCE, "seed=1"])  # same shapes, so only the config check can refuse it
    state = torch.load(reference / "checkpoint.pt", map_location="cpu", weights_only=True)
    state["fingerprint"] = records.config_fingerprint(OmegaConf.to_container(other, resolve=True))
    run_dir = copy_of_run(reference, tmp_path)
    records.save_checkpoint(run_dir / "checkpoint.pt", state)
    written = (run_dir / "checkpoint.pt").read_bytes()
    proc = train(REFERENCE, tmp_path, cache)
    assert_refused(proc, run_dir, written, ["another config", "fingerprint"])


def test_divergence_stops_the_run_and_records_where(grid):
    run_dir = grid["diverged"]
    s = summary(run_dir)
    assert f"optim.lr={DIVERGING_LR}" in s["cell"]
    assert 1 <= s["diverged_at_step"] == s["step"] < s["total_steps"]  # stopped at once, not at the budget
    assert s["diverged_at_tokens"] == s["tokens"] == s["step"] * s["tokens_per_step"]
    assert s["diverged_on"] in ("loss", "gradient")
    assert isinstance(s["last_finite_loss"], float) and math.isfinite(s["last_finite_loss"])
    # the event file is kept, read back whole, and ends with the non-finite value where it diverged
    tag = "loss/train" if s["diverged_on"] == "loss" else "optim/grad_norm"
    step, value = scalars(run_dir, tag)[-1]
    assert step == s["diverged_at_tokens"] and not math.isfinite(value)


def test_grid_goes_on_past_a_diverged_run_and_lists_it(grid):
    done = summary(grid["completed"])
    assert done["status"] == "completed" and done["tokens"] == done["total_steps"] * done["tokens_per_step"]
    assert f"diverged: {grid['diverged'].name}" in grid["proc"].stdout


def test_report_lists_the_diverged_run(grid):
    grid_dir = grid["grid_dir"]
    proc = subprocess.run(
        [sys.executable, "-m", "ablate.report", str(grid_dir)],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=ROOT,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    report = (grid_dir / "report.md").read_text()
    left_out = report.split("## Runs left out of the averages", 1)[1].split("\n## ", 1)[0]
    (row,) = [ln for ln in left_out.splitlines() if grid["diverged"].name in ln]
    cells = [c.strip() for c in row.strip("|").split("|")]
    assert (
        cells[1] == "diverged" and f"{summary(grid['diverged'])['diverged_at_tokens']:,} tokens" in cells[2]
    ), row


def test_rerunning_a_diverged_config_repeats_nothing(grid, cache):
    # without -m the run folder of this config is the grid's cell (grid name "single" in both)
    proc = train([*RESUMABLE, f"optim.lr={DIVERGING_LR}"], grid["root"], cache, timeout=120)
    assert proc.returncode == 1 and "already diverged" in proc.stdout, (
        proc.returncode,
        proc.stdout,
        proc.stderr,
    )


def test_bad_config_the_data_reveals_leaves_only_the_error_in_train_log(tmp_path, cache):
    """A window longer than the tokenized validation text is known only once the corpus is
    tokenized, so it is found inside the run rather than by the pre-flight."""
    proc = train([*SMOKE, "model.seq_len=100000"], tmp_path, cache, timeout=120)
    assert proc.returncode == 2, proc.stderr[-2000:]
    lines = error_lines(proc)
    assert len(lines) == 1 and "Traceback" not in proc.stderr
    assert "model.seq_len=100000" in lines[0] and "allowed:" in lines[0]
    (run_dir,) = {p.parent for p in tmp_path.rglob("train.log")}
    assert sorted(p.name for p in run_dir.iterdir()) == ["train.log"]
    assert "model.seq_len=100000" in (run_dir / "train.log").read_text()


# Cases of the list that tests/test_train.py::BAD does not already hold. They take the
# pre-flight's path to exit code 2 that BAD pins end to end, so they are checked in-process.
MORE_BAD = [
    (["budget.batch_size=-4"], "budget.batch_size=-4"),
    (["attention=differential", "attention.lambda_init=0"], "lambda_init=0"),  # the open interval's edge
    (["attention=differential", "attention.lambda_init=1.0"], "lambda_init=1.0"),
    (["attention=differential", "attention.lambda_init=-0.2"], "lambda_init=-0.2"),
]


@pytest.mark.parametrize("args, word", MORE_BAD, ids=[" ".join(a) for a, _ in MORE_BAD])
def test_more_bad_values_stop_in_the_preflight(args, word):
    from ablate.schema import ConfigError
    from ablate.train import preflight

    with pytest.raises(ConfigError) as caught:
        preflight([*SMOKE, *args])
    message = str(caught.value)
    assert word in message and "\n" not in message


def test_summary_records_versions_commit_and_tree_state(reference):
    import platform

    import ablate

    env = summary(reference)["environment"]
    assert env["headtohead_version"] == ablate.__version__
    assert env["torch_version"] == torch.__version__ and env["python_version"] == platform.python_version()
    assert env["threads"] == 1 and env["device"] == "cpu"  # runtime.threads=1 was asked for
    if (ROOT / ".git").exists():
        assert isinstance(env["git_dirty"], bool)
        known = subprocess.run(["git", "-C", str(ROOT), "cat-file", "-e", f"{env['git_commit']}^{{commit}}"])
        assert known.returncode == 0, env["git_commit"]  # a commit of this checkout
    else:
        assert env["git_commit"] is None and env["git_dirty"] is None


def test_optimizer_step_is_skipped_on_a_non_finite_gradient():
    from ablate.attention import StandardAttention
    from ablate.model import Decoder
    from ablate.optim import build_optimizer, training_step

    torch.manual_seed(0)
    model = Decoder(8, 8, 1, 4, lambda i: StandardAttention(8, i, 1, head_dim=4))
    optimizer = build_optimizer(model, lr=1e-2)
    batch = torch.randint(0, 8, (2, 5))
    loss, grad_norm = training_step(model, optimizer, batch, lr=1e-2, grad_clip=1.0)
    assert torch.isfinite(loss) and torch.isfinite(grad_norm)
    with torch.no_grad():
        model.blocks[0].ffn.down.weight[0, 0] = float("nan")
    before = {k: v.clone() for k, v in model.state_dict().items()}
    steps_before = [float(s["step"]) for s in optimizer.state.values()]
    loss, grad_norm = training_step(model, optimizer, batch, lr=1e-2, grad_clip=1.0)
    assert not torch.isfinite(grad_norm)
    for key, value in model.state_dict().items():  # no update, not even AdamW's weight decay
        torch.testing.assert_close(value, before[key], rtol=0, atol=0, equal_nan=True)
    assert [float(s["step"]) for s in optimizer.state.values()] == steps_before
    assert steps_before == [1.0] * len(list(model.parameters()))


# The calls atomic_write_bytes makes, in order, as (os function, which call of it); the child
# process dies (SIGKILL) on reaching it. The second fsync is the folder's, after the rename.
KILL_POINTS = [
    ("fdopen", 1, "old"),
    ("fsync", 1, "old"),
    ("chmod", 1, "old"),
    ("replace", 1, "old"),
    ("fsync", 2, "new"),
]


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs os.fork (POSIX)")
@pytest.mark.parametrize("call, nth, survivor", KILL_POINTS, ids=[f"{c}{n}" for c, n, _ in KILL_POINTS])
def test_atomic_write_killed_at_each_step_leaves_a_whole_file(tmp_path, call, nth, survivor):
    from ablate import records

    target = tmp_path / "summary.json"
    old, new = b"old " * 50000, b"new " * 60000
    target.write_bytes(old)
    pid = os.fork()
    if pid == 0:  # child: die the moment atomic_write_bytes reaches the nth call of `call`
        try:
            real, calls = getattr(os, call), []

            def hook(*args, **kwargs):
                calls.append(1)
                if len(calls) == nth:
                    os.kill(os.getpid(), signal.SIGKILL)
                return real(*args, **kwargs)

            setattr(os, call, hook)
            records.atomic_write_bytes(target, new)
        finally:
            os._exit(3)  # reached only when the kill point never came
    _, status = os.waitpid(pid, 0)
    assert os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGKILL
    assert target.read_bytes() == (old if survivor == "old" else new)
    left = records.remove_stale_temp_files(tmp_path)
    assert len(left) == (1 if survivor == "old" else 0)
    assert [p.name for p in tmp_path.iterdir()] == ["summary.json"]


def test_load_checkpoint_refuses_files_that_are_not_ours(tmp_path):
    from ablate.records import CheckpointError, load_checkpoint, save_checkpoint

    plain = tmp_path / "plain.pt"
    torch.save({"weights": torch.zeros(2)}, plain)
    with pytest.raises(CheckpointError, match="not a headtohead checkpoint"):
        load_checkpoint(plain, "0" * 16)
    # weights_only=True refuses pickled objects other than tensors and plain containers
    # (torch.load docs, "weights_only"); such a file is refused, never unpickled
    pickled = tmp_path / "pickled.pt"
    torch.save(
        {"fingerprint": "0" * 16, "step": 1, "model": {}, "optimizer": {}, "extra": Path("x")}, pickled
    )
    with pytest.raises(CheckpointError, match="objects other than tensors"):
        load_checkpoint(pickled, "0" * 16)
    ours = tmp_path / "ours.pt"
    save_checkpoint(ours, {"fingerprint": "a" * 16, "step": 3, "model": {}, "optimizer": {}})
    assert load_checkpoint(ours, "a" * 16)["step"] == 3
    with pytest.raises(CheckpointError, match="another config"):
        load_checkpoint(ours, "b" * 16)


def test_saved_weights_of_another_model_are_refused_before_loading():
    from ablate.records import CheckpointError
    from ablate.runner import check_fits

    model = torch.nn.Sequential(torch.nn.Linear(4, 3, bias=False), torch.nn.Linear(3, 2, bias=False))
    check_fits(model, model.state_dict(), Path("ok.pt"))  # its own weights fit
    wider = torch.nn.Sequential(torch.nn.Linear(4, 5, bias=False), torch.nn.Linear(5, 2, bias=False))
    with pytest.raises(
        CheckpointError, match=r"0 tensors missing, 0 unexpected, 2 of another shape, e\.g\. 0\.weight"
    ):
        check_fits(model, wider.state_dict(), Path("wide.pt"))
    with pytest.raises(CheckpointError, match=r"1 tensors missing, 0 unexpected"):
        check_fits(model, {"0.weight": model[0].weight}, Path("short.pt"))


def test_a_failure_keeps_the_folders_earlier_result(tmp_path):
    """A grid relaunched after its recipe changed refuses the old checkpoint and records a
    failure; the folder's earlier completed summary is kept under another name, not overwritten."""
    from types import SimpleNamespace

    from ablate import records
    from ablate.train import _record_failure

    earlier = {"status": "completed", "fingerprint": "abc123", "final_val_loss": 2.6}
    records.write_json(tmp_path / records.SUMMARY, earlier)
    info = SimpleNamespace(
        run_dir=tmp_path,
        choices={"attention": "standard"},
        cell="attention=standard",
        overrides=["attention=standard"],
    )
    failed = _record_failure(
        info, SimpleNamespace(seed=0), records.CheckpointError("written by another config")
    )
    assert records.read_json(tmp_path / "summary.abc123.json") == earlier
    assert records.read_summary(tmp_path) == failed and failed.status == "failed"
    # a second failure replaces the first failure only: nothing else to keep
    _record_failure(info, SimpleNamespace(seed=0), records.CheckpointError("again"))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["summary.abc123.json", "summary.json"]
