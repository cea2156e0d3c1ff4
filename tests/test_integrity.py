"""What lands on disk: the grid record in the folder Hydra writes to, one writer per run folder,
a checked corpus cache, a run's own train.log, and whole files when the disk is full.

End-to-end tests run the real ``h2h-train`` / ``h2h-corpus`` in a subprocess with one torch
thread, probes off and a budget of a few steps.
"""

import errno
import json
import math
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from trainer_helpers import ROOT, SMALL_DATA, run_dirs, summary

FAST = ["budget=smoke", "probes=off", *SMALL_DATA, "runtime.threads=1", "runtime.progress=false"]
ENOSPC_TEXT = os.strerror(errno.ENOSPC)  # the C library's text for ENOSPC, e.g. "No space left on device"


def h2h(args, cache, cwd, module="ablate.train", extra_env=None, popen=False, timeout=300):
    """The real command; PYTHONPATH points at this checkout so it runs from any folder."""
    env = dict(os.environ, HEADTOHEAD_CACHE=str(cache), PYTHONHASHSEED="0", PYTHONPATH=str(ROOT))
    env.update(extra_env or {})
    cmd = [sys.executable, "-m", module, *args]
    if popen:
        return subprocess.Popen(
            cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env, cwd=cwd
        )
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=env, cwd=cwd)


def stderr_lines(text):
    return [ln for ln in text.strip().splitlines() if ln.strip()]


# ----------------------------------------------------------------------------- 1. grid record folder
@pytest.mark.e2e  # runs the real commands in a subprocess
def test_grid_with_sweep_dir_writes_its_record_there_and_nowhere_else(tmp_path, cache):
    runs, cwd = tmp_path / "runs", tmp_path / "cwd"
    cwd.mkdir()
    demo = runs / "quickstart" / "grid.json"  # the default folder of the recipe holds another grid's record
    demo.parent.mkdir(parents=True)
    demo.write_bytes(b'{"name": "quickstart", "note": "the demo grid"}\n')
    before = demo.read_bytes()
    args = [
        "-m",
        "recipe=quickstart",
        *FAST,
        "budget.tokens=4096",
        "hydra.sweeper.params.seed=0",
        f"run_root={runs}",
        "hydra.sweep.dir=../elsewhere",
    ]
    proc = h2h(args, cache, cwd)
    assert proc.returncode == 0, proc.stderr[-3000:]
    elsewhere = tmp_path / "elsewhere"  # relative to the current folder, as Hydra takes it
    assert demo.read_bytes() == before
    assert set(tmp_path.rglob("grid.json")) == {demo, elsewhere / "grid.json"}
    record = json.loads((elsewhere / "grid.json").read_text())
    assert record["dir"] == str(elsewhere) and record["jobs"] == 2  # the sweeper override counted too
    assert [d.parent for d in run_dirs(tmp_path)] == [elsewhere, elsewhere]
    assert f"into {elsewhere}" in proc.stdout
    assert f"grid finished in {elsewhere}: 2 completed" in proc.stdout


@pytest.mark.e2e  # runs the real commands in a subprocess
def test_output_folder_is_the_folder_hydra_uses_for_a_single_run(tmp_path, cache):
    from ablate.grid import output_folder

    args = [*FAST, "budget.tokens=2048", f"run_root={tmp_path / 'runs'}", "hydra.run.dir=../here/${seed}"]
    cwd = tmp_path / "cwd"
    cwd.mkdir()
    proc = h2h(args, cache, cwd)
    assert proc.returncode == 0, proc.stderr[-3000:]
    (run_dir,) = run_dirs(tmp_path)
    assert run_dir == tmp_path / "here" / "0"
    os.chdir(cwd)
    try:
        assert output_folder(args, multirun=False) == run_dir
    finally:
        os.chdir(ROOT)


# ----------------------------------------------------------------------------- 2. one writer per folder
HOLD = """
import sys, time
from ablate.records import folder_lock
with folder_lock(sys.argv[1]):
    print("held", flush=True)
    time.sleep(120)
"""


def hold_in_child(folder):
    child = subprocess.Popen(
        [sys.executable, "-c", HOLD, str(folder)], stdout=subprocess.PIPE, text=True, cwd=ROOT
    )
    assert child.stdout.readline().strip() == "held"
    return child


def test_folder_lock_held_by_another_process_refuses_in_one_line_naming_it(tmp_path):
    from ablate.records import FolderBusy, folder_lock, lock_holder

    child = hold_in_child(tmp_path)
    try:
        holder = lock_holder(tmp_path)
        assert holder["pid"] == child.pid and holder["host"] == os.uname().nodename
        with pytest.raises(FolderBusy) as caught, folder_lock(tmp_path):
            pytest.fail("entered a folder that another process holds")
        message = str(caught.value)
        assert "\n" not in message and str(tmp_path) in message
        assert f"pid {child.pid} on {holder['host']} since {holder['since']}" in message
    finally:
        child.kill()
        child.wait()


def test_sigkill_of_a_lock_holder_leaves_no_stale_lock(tmp_path):
    from ablate.records import folder_lock, lock_holder

    child = hold_in_child(tmp_path)
    child.send_signal(signal.SIGKILL)
    assert child.wait() == -signal.SIGKILL
    assert (tmp_path / ".lock").exists()  # the file stays behind; the kernel dropped the flock (flock(2))
    assert lock_holder(tmp_path) is None
    with folder_lock(tmp_path) as holder:
        assert holder["pid"] == os.getpid() and lock_holder(tmp_path)["pid"] == os.getpid()
    assert lock_holder(tmp_path) is None and not (tmp_path / ".lock").exists()


@pytest.mark.e2e  # runs the real commands in a subprocess
def test_single_run_of_a_held_folder_exits_2_in_one_line_and_writes_nothing(tmp_path, cache):
    from ablate.records import folder_lock

    run_dir = tmp_path / "one"
    with folder_lock(run_dir) as holder:
        proc = h2h([*FAST, f"run_root={tmp_path}", f"hydra.run.dir={run_dir}"], cache, ROOT, timeout=120)
        assert sorted(p.name for p in run_dir.iterdir()) == [".lock"]
    assert proc.returncode == 2, proc.stderr[-2000:]
    (line,) = stderr_lines(proc.stderr)
    assert str(run_dir) in line and f"pid {os.getpid()} on {holder['host']} since {holder['since']}" in line


@pytest.mark.e2e  # runs the real commands in a subprocess
def test_two_concurrent_launches_of_one_run_train_once_and_refuse_once(tmp_path, cache):
    # 32 steps: the first run is still training when the second reaches its check
    args = [*FAST, "budget.tokens=32768", f"run_root={tmp_path}"]
    first, second = (h2h(args, cache, ROOT, popen=True) for _ in range(2))
    results = {p.pid: (p.wait(timeout=300), *p.communicate()) for p in (first, second)}
    codes = sorted(rc for rc, _, _ in results.values())
    assert codes == [0, 2], {pid: (rc, err[-1500:]) for pid, (rc, _, err) in results.items()}
    (winner,) = [pid for pid, (rc, _, _) in results.items() if rc == 0]
    ((_, _, refused_err),) = [r for r in results.values() if r[0] == 2]
    (line,) = stderr_lines(refused_err)
    assert f"in use by pid {winner} on " in line and " since " in line
    (run_dir,) = run_dirs(tmp_path)
    assert summary(run_dir)["status"] == "completed" and summary(run_dir)["step"] == 32
    assert not (run_dir / ".lock").exists()


def cell_folder(args):
    """The folder Hydra's sweep gives the job with these overrides (sweep dir / sweep subdir)."""
    from hydra.core.hydra_config import HydraConfig
    from omegaconf import OmegaConf

    from ablate.config import compose

    cfg = compose(args, return_hydra_config=True)
    HydraConfig.instance().set_config(cfg)
    return Path(OmegaConf.select(cfg, "hydra.sweep.dir")) / OmegaConf.select(cfg, "hydra.sweep.subdir")


@pytest.mark.e2e  # runs the real commands in a subprocess
def test_grid_skips_a_cell_held_elsewhere_and_lists_it(tmp_path, cache):
    from ablate.records import read_grid

    common = [
        *FAST,
        "budget.tokens=2048",
        "grid.name=g",
        "grid.baseline='attention=standard'",
        f"run_root={tmp_path}",
    ]
    args = ["-m", *common, "attention=standard,differential"]
    held = cell_folder([*common, "attention=standard"])
    assert held.parent == tmp_path / "g"
    child = hold_in_child(held)
    try:
        proc = h2h(args, cache, ROOT)
    finally:
        child.kill()
        child.wait()
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert f"running elsewhere: {held.name} (pid {child.pid} on " in proc.stdout
    assert "1 completed, 1 running elsewhere" in proc.stdout
    assert not (held / "summary.json").exists()
    (row,) = read_grid(tmp_path / "g").running_elsewhere
    assert row["run"] == held.name and row["pid"] == child.pid


# ----------------------------------------------------------------------------- 3. corpus cache
def tiny_data() -> dict:
    from omegaconf import OmegaConf

    cfg = OmegaConf.to_container(OmegaConf.load(ROOT / "conf" / "data" / "toy.yaml"))
    cfg["n_documents"], cfg["tokenizer"]["train_documents"] = 300, 300
    return cfg


CACHE_FILES = [
    "tokenizer.model",
    "train_ids.npy",
    "val_ids.npy",
    "train.txt",
    "val.txt",
    "train_kinds.txt",
    "probes.json",
    "data_config.json",
    "stats.json",
    "manifest.json",
]


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """A cache folder built once; each test works on a copy."""
    from toy_corpus import get_corpus

    root = tmp_path_factory.mktemp("tiny-cache")
    corpus = get_corpus(tiny_data(), 256, root)
    return corpus.cache_path


def damaged_copy(built, tmp_path, name, how):
    import shutil

    folder = tmp_path / built.name
    shutil.copytree(built, folder)
    path = folder / name
    if how == "truncated":
        path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    else:
        path.write_bytes(b"\x00garbage{[" * 3)
    return folder


def test_cache_files_all_carry_a_manifest_entry(built):
    from toy_corpus.cache import check_cache, file_sha256

    manifest = json.loads((built / "manifest.json").read_text())
    assert sorted(manifest["files"]) == sorted(n for n in CACHE_FILES if n != "manifest.json")
    for name, entry in manifest["files"].items():
        # hashlib's SHA-256 of the file as a whole, against our chunked reading of it
        import hashlib

        whole = hashlib.sha256((built / name).read_bytes()).hexdigest()
        assert entry["sha256"] == file_sha256(built / name) == whole
        assert entry["bytes"] == (built / name).stat().st_size
    assert check_cache(built, hashes=True) is None


@pytest.mark.parametrize("how", ["truncated", "garbage"])
@pytest.mark.parametrize("name", CACHE_FILES)
def test_damaged_cache_file_is_rebuilt_with_one_line(built, tmp_path, capsys, name, how):
    from toy_corpus import get_corpus
    from toy_corpus.cache import check_cache

    folder = damaged_copy(built, tmp_path, name, how)
    corpus = get_corpus(tiny_data(), 256, tmp_path)
    (line,) = stderr_lines(capsys.readouterr().err)
    assert line.startswith(f"corpus cache {folder}: {name} ") and line.endswith("; rebuilding it")
    assert corpus.cache_path == folder and check_cache(folder, hashes=True) is None
    for other in CACHE_FILES:
        if other not in ("manifest.json", "stats.json"):  # stats and manifest hold build times
            assert (folder / other).read_bytes() == (built / other).read_bytes(), other
    assert sorted(p.name for p in tmp_path.iterdir()) == [folder.name, f"{folder.name}.lock"]


def test_same_size_garbage_that_fails_to_load_is_found_by_its_hash(built, tmp_path, capsys):
    from toy_corpus import get_corpus

    folder = damaged_copy(built, tmp_path, "probes.json", "truncated")
    size = (built / "probes.json").stat().st_size
    (folder / "probes.json").write_bytes(b"x" * size)  # the size check passes; json.loads fails
    get_corpus(tiny_data(), 256, tmp_path)
    (line,) = stderr_lines(capsys.readouterr().err)
    assert "probes.json has other content than the manifest records (SHA-256 differs)" in line


@pytest.mark.e2e  # runs the real commands in a subprocess
def test_h2h_corpus_checks_hashes_and_rebuilds_a_changed_text_file(built, tmp_path):
    folder = damaged_copy(built, tmp_path, "train.txt", "truncated")
    text = (built / "train.txt").read_bytes()
    (folder / "train.txt").write_bytes(text[::-1])  # same size, other content: only the hash tells
    args = ["--cache-dir", str(tmp_path), "n_documents=300", "tokenizer.train_documents=300"]
    proc = h2h(args, tmp_path, ROOT, module="toy_corpus.cli", timeout=120)
    assert proc.returncode == 0, proc.stderr
    (line,) = stderr_lines(proc.stderr)
    assert line == (
        f"corpus cache {folder}: train.txt has other content than the manifest records "
        "(SHA-256 differs); rebuilding it"
    )
    assert (folder / "train.txt").read_bytes() == text


def test_two_processes_building_one_cache_end_with_one_good_copy(tmp_path):
    from toy_corpus.cache import check_cache

    args = ["--cache-dir", str(tmp_path), "n_documents=300", "tokenizer.train_documents=300"]
    procs = [h2h(args, tmp_path, ROOT, module="toy_corpus.cli", popen=True) for _ in range(2)]
    outs = [(p.wait(timeout=120), *p.communicate()) for p in procs]
    assert [rc for rc, _, _ in outs] == [0, 0], [err for _, _, err in outs]
    assert all(err.strip() == "" for _, _, err in outs)  # neither saw a damaged or half-built folder
    folders = sorted(p.name for p in tmp_path.iterdir())
    assert len(folders) == 2 and folders[1] == folders[0] + ".lock"  # one corpus, its lock file, no leftovers
    assert check_cache(tmp_path / folders[0], hashes=True) is None


# ----------------------------------------------------------------------------- 4. train.log
def test_runlog_lines_are_timestamped_and_appended_across_two_writers(tmp_path):
    import datetime

    from ablate.runlog import RunLog, read_log

    t0 = datetime.datetime.now().astimezone()
    first = RunLog(tmp_path)
    first.line("start", attention="standard", threads=1, device="cpu")
    first.line("eval", step=8, tokens=8192, val_loss=5.475123456789)
    first.line("diverged", step=9, loss=float("nan"), grad_norm=float("inf"), last_finite_loss=5.4)
    # a second writer in another process, as a resumed run would be
    code = (
        "import sys; from ablate.runlog import RunLog; "
        "RunLog(sys.argv[1]).line('resume', step=8, note='from the last checkpoint', "
        "extra={'a': [1, 2]})"
    )
    subprocess.run([sys.executable, "-c", code, str(tmp_path)], check=True, cwd=ROOT)
    t1 = datetime.datetime.now().astimezone()
    raw = (tmp_path / "train.log").read_text().splitlines()
    assert len(raw) == 4 and raw[1].split(" ", 1)[1] == "eval step=8 tokens=8192 val_loss=5.475123456789"
    lines = read_log(tmp_path)
    assert [ln["event"] for ln in lines] == ["start", "eval", "diverged", "resume"]
    # datetime.fromisoformat (Python docs) reads each stamp as ISO 8601 with a UTC offset
    stamps = [datetime.datetime.fromisoformat(r.split(" ", 1)[0]) for r in raw]
    assert all(s.utcoffset() is not None for s in stamps)
    slack = datetime.timedelta(seconds=1)
    assert t0 - slack <= stamps[0] and stamps == sorted(stamps) and stamps[-1] <= t1 + slack
    assert lines[1]["val_loss"] == 5.475123456789 and lines[0]["threads"] == 1
    assert math.isnan(lines[2]["loss"]) and lines[2]["grad_norm"] == math.inf
    assert lines[3]["note"] == "from the last checkpoint" and lines[3]["extra"] == {"a": [1, 2]}


def test_runlog_refuses_an_event_or_field_that_is_not_one_word(tmp_path):
    from ablate.runlog import RunLog

    with pytest.raises(ValueError, match="event='two words'"):
        RunLog(tmp_path).line("two words")
    with pytest.raises(ValueError, match="field 'a b'"):
        RunLog(tmp_path).line("eval", **{"a b": 1})
    assert not (tmp_path / "train.log").exists()


def test_hydra_writes_no_log_file_of_its_own():
    from ablate.config import compose

    handlers = compose([], return_hydra_config=True).hydra.job_logging.handlers
    assert [h["class"] for h in handlers.values()] == ["logging.StreamHandler"]


# ----------------------------------------------------------------------------- 5. full disk
def enospc(*args, **kwargs):
    raise OSError(errno.ENOSPC, ENOSPC_TEXT)


class FullFile:
    """The file object ``os.fdopen`` gives, whose write fails as on a full disk."""

    def __init__(self, f):
        self._f = f

    def write(self, data):
        self._f.write(data[: len(data) // 2])
        enospc()

    def __getattr__(self, name):
        return getattr(self._f, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self._f.close()


def _fail_write(monkeypatch):
    real = os.fdopen
    monkeypatch.setattr(os, "fdopen", lambda *a, **k: FullFile(real(*a, **k)))


def _fail_call(name):
    def patch(monkeypatch):
        import tempfile

        owner = tempfile if name == "mkstemp" else os
        monkeypatch.setattr(owner, name, enospc)

    return patch


WRITE_STEPS = {
    "mkstemp": _fail_call("mkstemp"),
    "write": _fail_write,
    "fsync": _fail_call("fsync"),
    "replace": _fail_call("replace"),
}


@pytest.mark.parametrize("step", WRITE_STEPS)
def test_full_disk_at_each_write_step_keeps_the_old_file_in_one_line(tmp_path, monkeypatch, step):
    from ablate import records

    target = tmp_path / "summary.json"
    old = b"old " * 5000
    target.write_bytes(old)
    WRITE_STEPS[step](monkeypatch)
    with pytest.raises(records.WriteError) as caught:
        records.atomic_write_bytes(target, b"new " * 6000)
    monkeypatch.undo()
    assert str(caught.value) == f"{target}: could not write ({ENOSPC_TEXT}); the previous file is unchanged"
    assert target.read_bytes() == old
    assert [p.name for p in tmp_path.iterdir()] == ["summary.json"]  # no partial file left


@pytest.mark.parametrize("step", ["torch.save", "write", "fsync"])
def test_full_disk_during_a_checkpoint_save_keeps_the_previous_checkpoint(tmp_path, monkeypatch, step):
    import torch

    from ablate import records

    path = tmp_path / "checkpoint.pt"
    records.save_checkpoint(path, {"fingerprint": "a" * 16, "step": 2, "model": {}, "optimizer": {}})
    old = path.read_bytes()
    if step == "torch.save":
        monkeypatch.setattr(torch, "save", enospc)
    else:
        WRITE_STEPS[step](monkeypatch)
    expected = f"^{path}: could not write \\({ENOSPC_TEXT}\\); the previous file is unchanged$"
    with pytest.raises(records.WriteError, match=expected):
        records.save_checkpoint(path, {"fingerprint": "a" * 16, "step": 4, "model": {}, "optimizer": {}})
    monkeypatch.undo()
    assert path.read_bytes() == old and records.load_checkpoint(path, "a" * 16)["step"] == 2
    assert [p.name for p in tmp_path.iterdir()] == ["checkpoint.pt"]


def test_runlog_on_a_full_device_fails_in_one_line_and_keeps_earlier_lines(tmp_path):
    """/dev/full: the Linux device whose every write fails with ENOSPC (null(4) man page)."""
    from ablate import records
    from ablate.runlog import RunLog

    if not os.path.exists("/dev/full"):
        pytest.skip("needs /dev/full (Linux)")
    (tmp_path / "train.log").symlink_to("/dev/full")
    with pytest.raises(records.WriteError, match=f"train.log: could not append a line \\({ENOSPC_TEXT}\\)"):
        RunLog(tmp_path).line("eval", step=1)


FULL_DISK = """
import os, sys
from ablate import records
d = sys.argv[1]
target = os.path.join(d, "summary.json")
with open(target, "wb") as f:
    f.write(b"old " * 4000)
try:
    records.atomic_write_bytes(target, b"new " * 40000)
except records.WriteError as exc:
    print(exc)
print(open(target, "rb").read() == b"old " * 4000, sorted(os.listdir(d)))
"""


def test_a_real_full_filesystem_keeps_the_old_file(tmp_path):
    """A 64 KiB tmpfs in a private mount namespace (unshare(1), tmpfs(5)): the kernel itself
    answers ENOSPC. Skipped where user namespaces or mounts are not allowed."""
    mnt = tmp_path / "tiny"
    mnt.mkdir()
    script = f"mount -t tmpfs -o size=64k tmpfs {mnt} && exec {sys.executable} -c '{FULL_DISK}' {mnt}"
    proc = subprocess.run(
        ["unshare", "-rm", "sh", "-c", script],
        capture_output=True,
        text=True,
        cwd=ROOT,
        env=dict(os.environ, PYTHONPATH=str(ROOT)),
        timeout=60,
    )
    if proc.returncode != 0 and ("mount" in proc.stderr or "unshare" in proc.stderr):
        pytest.skip(f"cannot mount a tmpfs here: {stderr_lines(proc.stderr)[-1]}")
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.splitlines() == [
        f"{mnt}/summary.json: could not write ({ENOSPC_TEXT}); the previous file is unchanged",
        "True ['summary.json']",
    ]


FAIL_SECOND_CHECKPOINT = """
import errno, os
_real, _seen = os.fsync, []
def _fsync(fd):
    name = os.readlink(f"/proc/self/fd/{fd}")
    if ".checkpoint.pt." in os.path.basename(name):
        _seen.append(name)
        if len(_seen) == 2:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
    return _real(fd)
os.fsync = _fsync
"""


@pytest.mark.e2e  # runs the real commands in a subprocess
def test_full_disk_at_a_checkpoint_ends_the_run_in_one_line_and_keeps_the_last_one(tmp_path, cache):
    """The real command with fsync failing (ENOSPC, as delayed allocation reports it) on the
    second checkpoint: sitecustomize (Python docs, site module) installs the failure."""
    import torch

    hook = tmp_path / "hook"
    hook.mkdir()
    (hook / "sitecustomize.py").write_text(FAIL_SECOND_CHECKPOINT)
    if not os.path.exists("/proc/self/fd"):
        pytest.skip("needs /proc/self/fd (Linux)")
    args = [*FAST, "budget.checkpoint_every_tokens=2048", f"run_root={tmp_path / 'runs'}"]
    proc = h2h(args, cache, ROOT, extra_env={"PYTHONPATH": f"{hook}{os.pathsep}{ROOT}"}, timeout=120)
    assert proc.returncode == 1, proc.stderr[-2000:]
    (line,) = stderr_lines(proc.stderr)
    run_dir = next((tmp_path / "runs").rglob("checkpoint.pt")).parent
    assert line == (
        f"h2h-train: error: {run_dir}/checkpoint.pt: could not write ({ENOSPC_TEXT}); "
        "the previous file is unchanged"
    )
    # torch.load weights_only=True: tensors and plain containers only (torch.load docs)
    assert torch.load(run_dir / "checkpoint.pt", map_location="cpu", weights_only=True)["step"] == 2
    assert not list(run_dir.glob(".*.partial")) and not (run_dir / "summary.json").exists()


def test_progress_label_is_short_and_tells_seeds_apart():
    from ablate.runner import progress_label

    assert progress_label("attention=differential", 3) == "differential seed 3"
    assert progress_label("attention=standard,data.n_keys=64", 0) == "standard 64 seed 0"
    cell = "attention=differential_no_head_norm,budget.tokens=4000000.0,data.query_sampling=replacement"
    label = progress_label(cell, 1)
    assert label == "differential_no_head_norm 4000000.0 r... seed 1"
