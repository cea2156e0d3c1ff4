"""Checks of the corpus cache: a manifest of every file's size and SHA-256, written last; a
lock so that one process builds a given cache folder at a time.

The cache is derived data, so a folder that fails its check is rebuilt, never repaired.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
from pathlib import Path

MANIFEST = "manifest.json"
MANIFEST_VERSION = 1


class CacheError(RuntimeError):
    """The cache could not be built (disk full, no permission); one line naming the folder."""


def file_sha256(path: Path, chunk: int = 1 << 20) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(chunk), b""):
            digest.update(block)
    return digest.hexdigest()


def write_manifest(folder: Path) -> dict:
    """Record every file of ``folder`` (bytes and SHA-256) in ``manifest.json``, through a
    temporary file and a rename so that a half-written manifest never exists."""
    folder = Path(folder)
    files = {
        p.name: {"bytes": p.stat().st_size, "sha256": file_sha256(p)}
        for p in sorted(folder.iterdir())
        if p.is_file() and p.name != MANIFEST
    }
    manifest = {"version": MANIFEST_VERSION, "files": files}
    tmp = folder / f".{MANIFEST}.partial"
    tmp.write_text(json.dumps(manifest, indent=1, sort_keys=True) + "\n")
    os.replace(tmp, folder / MANIFEST)
    return manifest


def read_manifest(folder: Path) -> tuple[dict | None, str | None]:
    """(manifest, None), or (None, what is wrong with it)."""
    path = Path(folder) / MANIFEST
    try:
        manifest = json.loads(path.read_text())
    except FileNotFoundError:
        return None, f"{MANIFEST} is missing (an unfinished build, or one by an older version)"
    except (OSError, ValueError) as exc:
        return None, f"{MANIFEST} is unreadable ({type(exc).__name__})"
    files = manifest.get("files") if isinstance(manifest, dict) else None
    entries_ok = isinstance(files, dict) and all(
        isinstance(v, dict) and {"bytes", "sha256"} <= set(v) for v in files.values()
    )
    if not entries_ok:
        return None, f"{MANIFEST} is not a manifest of this cache"
    return manifest, None


def check_cache(folder: Path, hashes: bool = False) -> str | None:
    """None when every file of the manifest is there with its size (and, with ``hashes``, its
    SHA-256); else one phrase naming the first file that is wrong and how."""
    manifest, problem = read_manifest(folder)
    if problem is not None:
        return problem
    for name, want in sorted(manifest["files"].items()):
        path = Path(folder) / name
        try:
            size = path.stat().st_size
        except FileNotFoundError:
            return f"{name} is missing"
        if size != want["bytes"]:
            return f"{name} has {size:,} bytes, the manifest says {want['bytes']:,}"
        if hashes and file_sha256(path) != want["sha256"]:
            return f"{name} has other content than the manifest records (SHA-256 differs)"
    return None


@contextlib.contextmanager
def build_lock(path: Path):
    """Wait for and hold an exclusive ``fcntl.flock`` on ``path`` (created if needed). The kernel
    releases it when the process ends, however it ends."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)
