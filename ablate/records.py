"""What a run and a grid leave on disk: the record types (:class:`RunSummary`, :class:`GridRecord`),
atomic JSON and checkpoint writes, checkpoint checks, versions.

A run folder holds ``config.yaml``, ``summary.json`` (:class:`RunSummary`), ``train.log``,
TensorBoard event files and ``checkpoint.pt``; a grid folder holds ``grid.json``
(:class:`GridRecord`) and one run folder per job. Every reader and writer of those files uses the
names and types below.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime
import errno
import fcntl
import hashlib
import io
import json
import os
import pickle
import platform
import socket
import subprocess
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import torch

import ablate

from .checks import one_line

__all__ = [
    "RunSummary",
    "GridRecord",
    "CheckpointError",
    "FolderBusy",
    "WriteError",
    "CHECKPOINT",
    "CONFIG",
    "GRID",
    "LOG",
    "SUMMARY",
    "LOCK",
    "atomic_write_bytes",
    "config_fingerprint",
    "environment",
    "folder_lock",
    "load_checkpoint",
    "lock_holder",
    "read_grid",
    "read_json",
    "read_summary",
    "remove_stale_temp_files",
    "save_checkpoint",
    "write_grid",
    "write_json",
    "write_summary",
    "git_commit",
    "git_dirty",
]

CHECKPOINT = "checkpoint.pt"
SUMMARY = "summary.json"
GRID = "grid.json"
CONFIG = "config.yaml"
LOG = "train.log"
LOCK = ".lock"
TEMP_SUFFIX = ".partial"


@dataclass
class RunSummary:
    """``summary.json``: what one run did and how it ended.

    ``status`` is ``completed``, ``failed``, ``diverged`` or ``stopped`` (stopped early on request,
    never written to disk). ``probes`` is a flat ``name -> number`` dict of the probes' results;
    ``curve_metrics`` holds what the run computes from its own evaluation curve (a drill's
    ``drill/auc``, final ``drill/acc``, ``drill/tokens_to_*`` and ``drill/*_reached``). Fields a
    run did not reach stay ``None`` (a failed run has no losses). Unknown keys of an older or
    hand-written file are kept in ``extra`` and written back unchanged.
    """

    status: str
    attention: str | None = None
    seed: int | None = None
    cell: str | None = None
    choices: dict = field(default_factory=dict)
    overrides: list = field(default_factory=list)
    data_kind: str | None = None
    params: int | None = None
    non_embedding_params: int | None = None
    flops_per_token: float | None = None
    budget_match: str | None = None
    total_steps: int | None = None
    tokens_per_step: int | None = None
    step: int | None = None
    tokens: int | None = None
    train_flops: float | None = None
    final_train_loss: float | None = None
    final_val_loss: float | None = None
    wall_seconds: float | None = None
    compiled: bool | None = None
    fingerprint: str | None = None
    environment: dict = field(default_factory=dict)
    probes: dict = field(default_factory=dict)
    curve_metrics: dict = field(default_factory=dict)
    error: str | None = None
    diverged_at_step: int | None = None
    diverged_at_tokens: int | None = None
    diverged_on: str | None = None
    diverged_loss: float | str | None = None
    diverged_grad_norm: float | str | None = None
    last_finite_loss: float | None = None
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self) if f.name != "extra"}
        return {**self.extra, **out}

    @classmethod
    def from_dict(cls, data: dict) -> "RunSummary":
        names = {f.name for f in dataclasses.fields(cls)} - {"extra"}
        known = {k: v for k, v in data.items() if k in names}
        known.setdefault("status", "missing")
        return cls(**known, extra={k: v for k, v in data.items() if k not in names})


@dataclass
class GridRecord:
    """``grid.json``: what a grid launch asked for, written by the pre-flight before any run.

    ``baseline`` is the cell every comparison is made against; ``primary_metric`` is the one number
    the verdict is about and ``resolution`` the interval half-width (in its units) that counts as
    resolved; ``max_seeds`` caps the seed rounds (``rounds`` ran so far). ``varied`` lists the
    design keys the grid sweeps (a cell is its values of those keys; ``ablate.cells.Cell``);
    ``factors`` the factors of a factorial grid (``ablate.factors.Factor.to_dict``), empty for a
    pairwise grid. ``fairness`` holds one row per cell (parameters and FLOPs against the
    baseline).
    """

    name: str
    dir: str
    baseline: str
    recipe: str | None = None
    primary_metric: str = "final_val_loss"
    resolution: float = 0.01
    max_seeds: int | None = None
    rounds: int = 1
    first_stage: list = field(default_factory=list)  # seed rounds: the first round's seeds (Stein)
    varied: list = field(default_factory=list)
    factors: list = field(default_factory=list)
    branches: list = field(default_factory=lambda: [[]])  # extra overrides per launch (nested factors)
    unequal_axes: list = field(default_factory=list)
    tolerance: float = 0.02
    sweep: dict | None = None
    jobs: int = 0
    parallel: int = 1  # runs at a time under the chosen launcher
    budget_flops: dict = field(default_factory=dict)  # cell -> FLOPs budget priced by the pre-flight
    seeds: list = field(default_factory=list)
    fairness: list = field(default_factory=list)
    running_elsewhere: list = field(default_factory=list)
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self) if f.name != "extra"}
        return {**self.extra, **out}

    @classmethod
    def from_dict(cls, data: dict) -> "GridRecord":
        names = {f.name for f in dataclasses.fields(cls)} - {"extra"}
        known = {k: v for k, v in data.items() if k in names}
        return cls(**known, extra={k: v for k, v in data.items() if k not in names})


def read_summary(folder: Path) -> RunSummary | None:
    """The run folder's summary, or None when it has none (or an unreadable one)."""
    data = read_json(Path(folder) / SUMMARY)
    return RunSummary.from_dict(data) if isinstance(data, dict) else None


def write_summary(folder: Path, summary: RunSummary) -> None:
    write_json(Path(folder) / SUMMARY, summary.to_dict())


def read_grid(folder: Path) -> GridRecord | None:
    data = read_json(Path(folder) / GRID)
    return GridRecord.from_dict(data) if isinstance(data, dict) else None


def write_grid(record: GridRecord) -> None:
    write_json(Path(record.dir) / GRID, record.to_dict())


class CheckpointError(RuntimeError):
    """A checkpoint that must not be loaded (truncated, corrupt, or from another config)."""


def _default_mode() -> int:
    """Permission bits an ordinary new file gets under the current umask (mkstemp would leave
    the file readable by its owner only)."""
    umask = os.umask(0)
    os.umask(umask)
    return 0o666 & ~umask


class WriteError(RuntimeError):
    """A file that could not be written (disk full, no permission, ...); the message is one line
    naming the file and the reason, and the file that was there before is left as it was."""


def _write_error(path: Path, exc: OSError, existed: bool) -> WriteError:
    reason = exc.strerror or errno.errorcode.get(exc.errno or 0) or type(exc).__name__
    after = "the previous file is unchanged" if existed else "no file was written"
    return WriteError(f"{path}: could not write ({reason}); {after}")


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write to a temporary file in the same folder, then rename over ``path``: a kill at any
    moment leaves either the old file or the new one, never half of one (``os.replace`` is an
    atomic rename on POSIX, Python docs). A kill can leave the temporary file behind;
    :func:`remove_stale_temp_files` clears those. An ``OSError`` on the way (ENOSPC, EACCES, ...)
    removes the temporary file and raises :class:`WriteError`; the old file stays whole."""
    path = Path(path)
    existed = path.exists()
    tmp = None
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=TEMP_SUFFIX)
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, _default_mode())
        os.replace(tmp, path)
    except BaseException as exc:
        if tmp is not None and os.path.exists(tmp):
            os.unlink(tmp)
        if isinstance(exc, OSError):
            raise _write_error(path, exc, existed) from None
        raise
    if os.name == "posix":  # make the rename itself durable (common practice)
        try:
            dir_fd = os.open(path.parent, os.O_RDONLY)
            try:
                os.fsync(dir_fd)
            finally:
                os.close(dir_fd)
        except OSError as exc:
            raise WriteError(
                f"{path}: written, but its folder could not be synced ({exc.strerror}); "
                "the new file may not survive a power cut"
            ) from None


class FolderBusy(RuntimeError):
    """Another process holds the run folder's lock; the message is one line naming the folder and
    the holder (pid, host, since)."""

    def __init__(self, folder: Path, holder: dict | None):
        self.folder, self.holder = Path(folder), holder or {}
        who = (
            f"pid {self.holder.get('pid')} on {self.holder.get('host')} since {self.holder.get('since')}"
            if self.holder.get("pid") is not None
            else "a process that has not yet written its name"
        )
        super().__init__(f"{self.folder}: in use by {who}; wait for it to finish or stop that process")


def _now_iso() -> str:
    return datetime.datetime.now().astimezone().isoformat(timespec="seconds")


def _read_holder(fd: int) -> dict | None:
    try:
        data = json.loads(os.pread(fd, 4096, 0).decode() or "null")
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def _try_lock(fd: int) -> bool:
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    return True


_HELD: dict[str, tuple[int, int, dict]] = {}  # folder -> (pid, depth, holder) of this process's locks


def _open_locked(path: Path, attempts: int) -> int:
    """An open descriptor of ``path`` holding its lock. After locking, the path must still name
    the locked file: a holder that was releasing may have removed it meanwhile, and a lock on a
    removed file guards nothing (then open the new file and try again)."""
    for _ in range(attempts):
        fd = os.open(path, os.O_RDWR | os.O_CREAT, _default_mode())
        try:
            if not _try_lock(fd):
                holder = _read_holder(fd)
                if holder is not None:
                    raise FolderBusy(path.parent, holder)
            else:
                try:
                    if os.fstat(fd).st_ino == os.stat(path).st_ino:
                        return fd
                except FileNotFoundError:
                    pass
        except BaseException:
            os.close(fd)
            raise
        os.close(fd)
        time.sleep(0.01)
    raise FolderBusy(path.parent, None)


@contextlib.contextmanager
def folder_lock(folder: Path, attempts: int = 50):
    """Hold ``<folder>/.lock`` (``fcntl.flock`` with ``LOCK_EX | LOCK_NB``, Linux flock(2)) while
    the block runs; the holder ``{pid, host, since}`` is written into the file as JSON and the
    file is removed on release.

    The kernel drops the lock when its descriptor is closed, so a SIGKILLed holder leaves at most
    the file, never a held lock. Raises :class:`FolderBusy` when another process holds it. Nested
    calls for the same folder in one process share the outer lock. A holder that has locked but
    not yet written its name (or a :func:`lock_holder` probe) is retried for ``attempts`` x 10 ms.
    """
    folder = Path(folder)
    key = os.path.abspath(folder)
    held = _HELD.get(key)
    if held is not None and held[0] == os.getpid():
        _HELD[key] = (held[0], held[1] + 1, held[2])
        try:
            yield held[2]
        finally:
            pid, depth, holder = _HELD[key]
            _HELD[key] = (pid, depth - 1, holder)
        return
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / LOCK
    fd = _open_locked(path, attempts)
    try:
        holder = {"pid": os.getpid(), "host": socket.gethostname(), "since": _now_iso()}
        os.ftruncate(fd, 0)
        os.pwrite(fd, (json.dumps(holder) + "\n").encode(), 0)
        _HELD[key] = (os.getpid(), 1, holder)
        try:
            yield holder
        finally:
            _HELD.pop(key, None)
            with contextlib.suppress(FileNotFoundError):
                os.unlink(path)  # still held here, so no other process has locked this file
    finally:
        os.close(fd)  # releases the lock


def lock_holder(folder: Path) -> dict | None:
    """Who holds ``<folder>/.lock`` now (``{pid, host, since}``), or None when nobody does.
    Probes with a non-blocking lock that it drops at once."""
    path = Path(folder) / LOCK
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        return None
    try:
        if _try_lock(fd):
            fcntl.flock(fd, fcntl.LOCK_UN)
            return None
        return _read_holder(fd) or {"pid": None, "host": None, "since": None}
    finally:
        os.close(fd)


def remove_stale_temp_files(folder: Path) -> list[Path]:
    """Delete temporary files that a killed writer left in ``folder``; returns them."""
    stale = [p for p in Path(folder).glob(f".*{TEMP_SUFFIX}") if p.is_file()]
    for p in stale:
        p.unlink()
    return stale


def write_json(path: Path, obj: dict) -> None:
    atomic_write_bytes(path, (json.dumps(obj, indent=2, sort_keys=True) + "\n").encode())


def read_json(path: Path) -> dict | None:
    try:
        return json.loads(Path(path).read_text())
    except (FileNotFoundError, json.JSONDecodeError):
        return None


def config_fingerprint(resolved: dict) -> str:
    """Hash of the resolved config without the ``runtime`` group, ``run_root`` and ``grid``: the
    experiment, not where or how fast it runs. The runtime group is left out on purpose (threads,
    progress, the early-stop switch, but also the device and the kernels, which change float
    rounding, not the experiment), so a run resumed on another device or with the other kernels
    continues from its checkpoint; ``summary.json`` records the device it ran on."""
    keep = {k: v for k, v in resolved.items() if k not in ("runtime", "run_root", "grid")}
    return hashlib.sha256(json.dumps(keep, sort_keys=True, default=str).encode()).hexdigest()[:16]


def save_checkpoint(path: Path, state: dict) -> None:
    """Serialise in memory, then :func:`atomic_write_bytes`: a full disk raises
    :class:`WriteError` and leaves the previous checkpoint whole."""

    buffer = io.BytesIO()
    try:
        torch.save(state, buffer)
    except OSError as exc:
        raise _write_error(Path(path), exc, Path(path).exists()) from None
    atomic_write_bytes(path, buffer.getvalue())


def _first_line(exc: BaseException) -> str:
    """The first sentence of an exception's message, for a one-line error."""
    return one_line(exc).split(". ")[0].rstrip(".")


def load_checkpoint(path: Path, fingerprint: str) -> dict:
    """Load with ``weights_only=True`` (tensors and plain containers only, no pickled code:
    torch.load docs); refuse a file that is damaged, truncated or from another config."""
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as exc:
        if "weights only" not in str(exc).lower():
            raise CheckpointError(
                f"checkpoint {path} is damaged or truncated and was not loaded ({_first_line(exc)}); "
                "delete it to start the run afresh"
            ) from None
        raise CheckpointError(
            f"checkpoint {path} holds objects other than tensors and plain containers, which "
            "torch.load(weights_only=True) refuses, so it was not loaded; delete it to start the run afresh"
        ) from None
    except Exception as exc:  # torch raises several types for damaged files
        reason = _first_line(exc)
        raise CheckpointError(
            f"checkpoint {path} is damaged or truncated and was not loaded ({reason}); "
            "delete it to start the run afresh"
        ) from None
    if not isinstance(state, dict) or not {"fingerprint", "step", "model", "optimizer"} <= set(state):
        raise CheckpointError(
            f"checkpoint {path} is not a headtohead checkpoint and was not loaded; delete it to start afresh"
        )
    if state["fingerprint"] != fingerprint:
        raise CheckpointError(
            f"checkpoint {path} was written by another config (fingerprint {state['fingerprint']}, "
            f"this run {fingerprint}) and was not loaded; use another run folder or delete it"
        )
    return state


def _git(*args: str) -> str | None:
    """Output of a git command in the checkout this package runs from; None outside a checkout
    or without git."""
    root = Path(ablate.__file__).resolve().parents[1]
    if not (root / ".git").exists():
        return None
    try:
        out = subprocess.run(["git", "-C", str(root), *args], capture_output=True, text=True, timeout=10)
    except (OSError, subprocess.SubprocessError):
        return None
    return out.stdout if out.returncode == 0 else None


def git_commit() -> str | None:
    out = _git("rev-parse", "HEAD")
    return out.strip() or None if out is not None else None


def git_dirty() -> bool | None:
    """Whether the checkout differs from its commit: changed tracked files or untracked files
    that are not ignored (so the commit alone would not rebuild this tree). None when unknown."""
    out = _git("status", "--porcelain")
    return bool(out.strip()) if out is not None else None


def environment(device: str) -> dict:
    return {
        "headtohead_version": ablate.__version__,
        "git_commit": git_commit(),
        "git_dirty": git_dirty(),
        "torch_version": torch.__version__,
        "python_version": platform.python_version(),
        "threads": torch.get_num_threads(),
        "device": device,
        "platform": platform.platform(),
    }
