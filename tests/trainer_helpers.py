"""Running the real h2h-train command in a subprocess, as a user would."""

import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
# A smaller corpus than the default keeps the tests' one-time build short; the generator and
# the tokenizer are the same code.
SMALL_DATA = ["data.n_documents=3000", "data.tokenizer.train_documents=1500"]


def train(args, run_root, cache, timeout=600, extra_env=None):
    env = dict(os.environ, HEADTOHEAD_CACHE=str(cache), PYTHONHASHSEED="0")
    env.update(extra_env or {})
    # One torch thread: on a shared or busy machine, two threads per run can be several times slower.
    cmd = [
        sys.executable,
        "-m",
        "ablate.train",
        f"run_root={run_root}",
        "runtime.progress=false",
        "runtime.threads=1",
        *args,
    ]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=env, cwd=ROOT)


def run_dirs(run_root):
    return sorted(p.parent for p in Path(run_root).rglob("summary.json"))


def summary(run_dir):
    return json.loads((Path(run_dir) / "summary.json").read_text())


def scalars(run_dir, tag):
    """(step, value) pairs read with tensorboard's own event reader."""
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    acc = EventAccumulator(str(run_dir), size_guidance={"scalars": 0})
    acc.Reload()
    if tag not in acc.Tags()["scalars"]:
        return None
    return [(e.step, e.value) for e in acc.Scalars(tag)]


def tags(run_dir):
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    acc = EventAccumulator(str(run_dir), size_guidance={"scalars": 0})
    acc.Reload()
    return set(acc.Tags()["scalars"])
