"""What a run leaves on disk: atomic JSON and checkpoint writes, checkpoint checks, versions."""

from __future__ import annotations

import hashlib
import json
import os
import pickle
import platform
import subprocess
import tempfile
from pathlib import Path

import torch

import ablate

CHECKPOINT = "checkpoint.pt"
SUMMARY = "summary.json"
TEMP_SUFFIX = ".partial"


class CheckpointError(RuntimeError):
    """A checkpoint that must not be loaded (truncated, corrupt, or from another config)."""


def _default_mode() -> int:
    """Permission bits an ordinary new file gets under the current umask (mkstemp would leave
    the file readable by its owner only)."""
    umask = os.umask(0)
    os.umask(umask)
    return 0o666 & ~umask


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write to a temporary file in the same folder, then rename over ``path``: a kill at any
    moment leaves either the old file or the new one, never half of one (``os.replace`` is an
    atomic rename on POSIX, Python docs). A kill can leave the temporary file behind;
    :func:`remove_stale_temp_files` clears those."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=TEMP_SUFFIX)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, _default_mode())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    if os.name == "posix":  # make the rename itself durable (common practice)
        dir_fd = os.open(path.parent, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)


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
    """Hash of the parts of a resolved config that decide a run's numbers (runtime settings
    such as progress bars, threads and the early-stop switch excluded)."""
    keep = {k: v for k, v in resolved.items() if k not in ("runtime", "run_root", "grid")}
    return hashlib.sha256(json.dumps(keep, sort_keys=True, default=str).encode()).hexdigest()[:16]


def save_checkpoint(path: Path, state: dict) -> None:
    import io

    buffer = io.BytesIO()
    torch.save(state, buffer)
    atomic_write_bytes(path, buffer.getvalue())


def _first_line(exc: BaseException) -> str:
    """The first sentence of an exception's message, for a one-line error."""
    text = str(exc).strip()
    if not text:
        return type(exc).__name__
    return text.splitlines()[0].split(". ")[0].rstrip(".")[:160]


def load_checkpoint(path: Path, fingerprint: str) -> dict:
    """Load with ``weights_only=True`` (tensors and plain containers only, no pickled code:
    torch.load docs); refuse a file that is damaged, truncated or from another config."""
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as exc:
        if "weights only" not in str(exc).lower():
            raise CheckpointError(f"checkpoint {path} is damaged or truncated and was not loaded ({_first_line(exc)}); "
                                  "delete it to start the run afresh") from None
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
        raise CheckpointError(f"checkpoint {path} is not a headtohead checkpoint and was not loaded; delete it to start afresh")
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
