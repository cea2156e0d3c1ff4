"""What a run leaves on disk: atomic JSON and checkpoint writes, checkpoint checks, versions."""

from __future__ import annotations

import hashlib
import json
import os
import platform
import subprocess
import tempfile
from pathlib import Path

import torch

import ablate

CHECKPOINT = "checkpoint.pt"
SUMMARY = "summary.json"


class CheckpointError(RuntimeError):
    """A checkpoint that must not be loaded (truncated, corrupt, or from another config)."""


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write to a temporary file in the same folder, then rename over ``path``: a kill at any
    moment leaves either the old file or the new one, never half of one."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


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


def load_checkpoint(path: Path, fingerprint: str) -> dict:
    """Load with ``weights_only=True``; refuse a file that is damaged or from another config."""
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # torch raises several types for damaged files
        raise CheckpointError(
            f"checkpoint {path} cannot be read ({type(exc).__name__}); delete it to start the run afresh"
        ) from None
    if not isinstance(state, dict) or "fingerprint" not in state:
        raise CheckpointError(f"checkpoint {path} is not an ablate checkpoint; delete it to start afresh")
    if state["fingerprint"] != fingerprint:
        raise CheckpointError(
            f"checkpoint {path} was written by another config (fingerprint {state['fingerprint']}, "
            f"this run {fingerprint}); use another run folder or delete it"
        )
    return state


def git_commit() -> str | None:
    root = Path(ablate.__file__).resolve().parents[1]
    if not (root / ".git").exists():
        return None
    try:
        out = subprocess.run(["git", "-C", str(root), "rev-parse", "HEAD"], capture_output=True, text=True, timeout=5)
        return out.stdout.strip() or None if out.returncode == 0 else None
    except (OSError, subprocess.SubprocessError):
        return None


def environment(device: str) -> dict:
    return {
        "ablate_version": ablate.__version__,
        "git_commit": git_commit(),
        "torch_version": torch.__version__,
        "python_version": platform.python_version(),
        "threads": torch.get_num_threads(),
        "device": device,
        "platform": platform.platform(),
    }
