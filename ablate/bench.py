"""``h2h-bench``: training-step speed of attention choices, measured side by side in one process.

For one model size and several attention choices, the bench builds each model exactly as
``h2h-train`` does, warms each up, then runs timed training steps in rounds: every round times
one step of every choice, and one float32 matrix product of each reference shape, in turn. Machine
noise therefore lands on all of them alike, and the ratios between them are what to read.

Figures per choice: median step time, tokens per second, achieved FLOP/s (training FLOPs per token
from :func:`ablate.compute.account` times tokens per step, over the median step time), that figure
as a share of the float32 matmul peak measured in the same rounds, and memory (see below).

Memory: before one extra, untimed step of a choice the process's peak resident set (Linux
``VmHWM``) is reset through ``/proc/self/clear_refs``; the peak read after the step is the whole
process's peak RSS during that step (the interpreter, torch and every model built so far
included). Where that reset is not available, the bench says so and reports
``resource.getrusage`` max RSS of the process so far instead.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import re
import resource
import statistics
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import torch
from hydra.errors import HydraException
from omegaconf.errors import OmegaConfBaseException

from .compute import account
from .config import CONF_DIR, build_model, compose
from .optim import build_optimizer, training_step

__all__ = [
    "main",
    "named_choices",
    "paired_ratio",
    "ratios_to",
    "time_rounds",
]

COMPILE_MODES = ("none", "block", "model")
MIB = 1024.0**2


def named_choices() -> list[str]:
    """The attention choices under conf/attention/, ``standard`` first."""
    names = sorted(p.stem for p in (CONF_DIR / "attention").glob("*.yaml"))
    return sorted(names, key=lambda n: (n != "standard", n))


# ---------------------------------------------------------------------------------------------
# memory


def _read_status_kib(key: str) -> int | None:
    try:
        text = Path("/proc/self/status").read_text()
    except OSError:
        return None
    match = re.search(rf"^{key}:\s+(\d+)\s+kB", text, re.MULTILINE)
    return int(match.group(1)) if match else None


def _reset_peak_rss() -> bool:
    try:
        Path("/proc/self/clear_refs").write_text("5")
    except OSError:
        return False
    return _read_status_kib("VmHWM") is not None


def process_max_rss_bytes() -> int:
    """``resource.getrusage`` max RSS of this process (Linux reports KiB, macOS bytes)."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak if sys.platform == "darwin" else peak * 1024)


# ---------------------------------------------------------------------------------------------
# matmul peak


def reference_shapes(
    d_model: int, ffn_hidden: int, vocab_size: int, tokens: int
) -> list[tuple[int, int, int]]:
    """(m, k, n) of the model's biggest training GEMMs plus two large squares."""
    shapes = [
        (tokens, d_model, ffn_hidden),  # SwiGLU gate / up
        (tokens, d_model, vocab_size),  # output head
        (1024, 1024, 1024),
        (2048, 2048, 2048),
    ]
    return list(dict.fromkeys(shapes))


class MatmulProbe:
    """Times ``torch.mm`` on one (m, k, n) shape; ``flops`` = 2 m k n."""

    def __init__(self, m: int, k: int, n: int, seed: int = 0):
        gen = torch.Generator().manual_seed(seed)
        self.shape = (m, k, n)
        self.a = torch.randn(m, k, generator=gen)
        self.b = torch.randn(k, n, generator=gen)
        self.out = torch.empty(m, n)
        self.flops = 2.0 * m * k * n
        self.times: list[float] = []

    def run(self, record: bool = True) -> None:
        start = time.perf_counter()
        torch.mm(self.a, self.b, out=self.out)
        elapsed = time.perf_counter() - start
        if record:
            self.times.append(elapsed)

    def flops_per_second(self) -> float:
        return self.flops / statistics.median(self.times)


# ---------------------------------------------------------------------------------------------
# one attention choice


@dataclass
class Contender:
    attention: str
    compile_mode: str
    model: torch.nn.Module
    optimizer: torch.optim.Optimizer
    flops_per_token: float
    params: int
    batches: list[torch.Tensor]
    lr: float
    grad_clip: float
    warmup_seconds: list[float] = field(default_factory=list)
    times: list[float] = field(default_factory=list)
    cpu_times: list[float] = field(default_factory=list)
    losses: list[float] = field(default_factory=list)
    memory: dict = field(default_factory=dict)
    _next: int = 0

    @property
    def name(self) -> str:
        return self.attention if self.compile_mode == "none" else f"{self.attention}@{self.compile_mode}"

    def step(self) -> tuple[float, float]:
        """One training step; (wall seconds, process CPU seconds)."""
        batch = self.batches[self._next % len(self.batches)]
        self._next += 1
        cpu_start, start = time.process_time(), time.perf_counter()
        loss, _ = training_step(self.model, self.optimizer, batch, self.lr, self.grad_clip)
        elapsed, cpu = time.perf_counter() - start, time.process_time() - cpu_start
        self.losses.append(float(loss))
        return elapsed, cpu


def build_contender(args, attention: str, compile_mode: str) -> Contender:
    overrides = [f"model={args.model}", f"attention={attention}", *args.override, "~data"]
    cfg = compose(overrides)
    torch.manual_seed(args.seed)
    model = build_model(cfg, args.vocab_size)
    acc = account(model)
    model.train()
    optimizer = build_optimizer(model, lr=args.lr)
    if compile_mode == "model":
        model.compile()
    elif compile_mode == "block":
        for block in model.blocks:
            block.compile()
    gen = torch.Generator().manual_seed(args.seed)
    batches = [
        torch.randint(0, args.vocab_size, (args.batch_size, model.seq_len + 1), generator=gen)
        for _ in range(4)
    ]
    return Contender(
        attention, compile_mode, model, optimizer, acc.flops_per_token, acc.params, batches, args.lr, 1.0
    )


def measure_memory(contender: Contender, can_reset: bool) -> dict:
    if can_reset:
        _reset_peak_rss()
        before = _read_status_kib("VmRSS") * 1024
        contender.step()
        peak = _read_status_kib("VmHWM") * 1024
        return {"method": "VmHWM reset before one step", "peak_rss_bytes": peak, "rss_before_bytes": before}
    contender.step()
    return {
        "method": "getrusage max RSS of the process so far",
        "peak_rss_bytes": process_max_rss_bytes(),
        "rss_before_bytes": None,
    }


# ---------------------------------------------------------------------------------------------
# report


def quartile_spread(times: list[float]) -> float:
    """Interquartile range over the median (0 for fewer than 4 samples)."""
    if len(times) < 4:
        return 0.0
    q = statistics.quantiles(times, n=4)
    return (q[2] - q[0]) / statistics.median(times)


def paired_ratio(times: list[float], base_times: list[float]) -> float:
    """Median over rounds of the ratio within a round (both saw the same machine load)."""
    return statistics.median(t / u for t, u in zip(times, base_times))


def ratios_to(c: Contender, base: Contender) -> dict:
    """Wall and CPU ratios of ``c`` over ``base``: of the medians, and paired round by round."""
    return {
        "baseline": base.name,
        "step_ratio": statistics.median(c.times) / statistics.median(base.times),
        "paired_step_ratio": paired_ratio(c.times, base.times),
        "cpu_ratio": statistics.median(c.cpu_times) / statistics.median(base.cpu_times),
        "paired_cpu_ratio": paired_ratio(c.cpu_times, base.cpu_times),
    }


def summarise(contenders: list[Contender], probes: list[MatmulProbe], args, tokens_per_step: int) -> dict:
    peak_by_shape = {"x".join(map(str, p.shape)): p.flops_per_second() for p in probes}
    peak = max(peak_by_shape.values())
    rows = {}
    for c in contenders:
        median = statistics.median(c.times)
        achieved = c.flops_per_token * tokens_per_step / median
        rows[c.name] = {
            "attention": c.attention,
            "compile": c.compile_mode,
            "params": c.params,
            "flops_per_token": c.flops_per_token,
            "median_step_seconds": median,
            "min_step_seconds": min(c.times),
            "step_spread": quartile_spread(c.times),
            "median_cpu_seconds": statistics.median(c.cpu_times),
            "tokens_per_second": tokens_per_step / median,
            "flops_per_second": achieved,
            "share_of_peak": achieved / peak,
            "warmup_seconds": c.warmup_seconds,
            "first_step_extra_seconds": (c.warmup_seconds[0] - median) if c.warmup_seconds else None,
            "final_loss": c.losses[-1],
            "memory": c.memory,
            "step_seconds": c.times,
            "cpu_seconds": c.cpu_times,
        }
    for c in contenders:
        base = next(
            b for b in contenders if b.attention == args.baseline and b.compile_mode == c.compile_mode
        )
        rows[c.name].update(ratios_to(c, base))
    return {
        "settings": {
            "model": args.model,
            "overrides": list(args.override),
            "batch_size": args.batch_size,
            "seq_len": contenders[0].model.seq_len,
            "d_model": contenders[0].model.d_model,
            "n_layers": contenders[0].model.n_layers,
            "vocab_size": args.vocab_size,
            "tokens_per_step": tokens_per_step,
            "steps": args.steps,
            "warmup": args.warmup,
            "threads": torch.get_num_threads(),
            "compile": list(args.compile),
            "baseline": args.baseline,
            "load_average": {"before": list(args.load_before), "after": list(os.getloadavg())},
            "torch": torch.__version__,
            "python": platform.python_version(),
        },
        "matmul_peak": {"flops_per_second": peak, "by_shape": peak_by_shape},
        "process_max_rss_bytes": process_max_rss_bytes(),
        "designs": rows,
    }


def format_table(result: dict) -> str:
    s = result["settings"]
    lines = [
        f"model {s['model']}: d_model {s['d_model']}, {s['n_layers']} layers, seq_len {s['seq_len']}, "
        f"batch {s['batch_size']}, vocab {s['vocab_size']}; torch {s['torch']}, {s['threads']} threads",
        f"timed steps {s['steps']} per design after {s['warmup']} warm-up, alternated round by round",
        "load average (1, 5, 15 min) before {} after {}".format(
            *(" ".join(f"{x:.2f}" for x in s["load_average"][k]) for k in ("before", "after"))
        ),
        "float32 matmul peak {:.1f} GFLOP/s (best median of {})".format(
            result["matmul_peak"]["flops_per_second"] / 1e9,
            ", ".join(f"{k} {v / 1e9:.1f}" for k, v in result["matmul_peak"]["by_shape"].items()),
        ),
        "",
    ]
    header = (
        f"{'design':<30}{'step ms':>9}{'spread':>8}{'ratio':>7}{'paired':>8}{'cpu ms':>8}{'cpu ratio':>10}{'paired':>8}"  # noqa: E501 (a table row or formula reads best on one line)
        f"{'tok/s':>8}{'GFLOP/s':>9}{'of peak':>9}{'peak MiB':>10}"
    )
    lines += [header, "-" * len(header)]
    for name, r in result["designs"].items():
        lines.append(
            f"{name:<30}{r['median_step_seconds'] * 1e3:>9.1f}{r['step_spread'] * 100:>7.0f}%{r['step_ratio']:>7.2f}"  # noqa: E501 (a table row or formula reads best on one line)
            f"{r['paired_step_ratio']:>8.2f}{r['median_cpu_seconds'] * 1e3:>8.0f}{r['cpu_ratio']:>10.2f}{r['paired_cpu_ratio']:>8.2f}"  # noqa: E501 (a table row or formula reads best on one line)
            f"{r['tokens_per_second']:>8.0f}{r['flops_per_second'] / 1e9:>9.1f}{r['share_of_peak'] * 100:>8.1f}%"  # noqa: E501 (a table row or formula reads best on one line)
            f"{r['memory']['peak_rss_bytes'] / MIB:>10.0f}"
        )
    methods = {r["memory"]["method"] for r in result["designs"].values()}
    lines += [
        "",
        f"ratio: median step time over the same-compile '{s['baseline']}' row; paired: median over "
        "rounds of the",
        "ratio within a round; cpu: process CPU time per step (all threads); spread: interquartile "
        "range / median",
        "GFLOP/s and of peak: training FLOPs per token (ablate.compute.account) x tokens / median step time",
        f"peak MiB: whole-process peak RSS during one step ({'; '.join(sorted(methods))}); "
        f"process max RSS {result['process_max_rss_bytes'] / MIB:.0f} MiB",
    ]
    compiled = [(n, r) for n, r in result["designs"].items() if r["compile"] != "none"]
    for name, r in compiled:
        lines.append(
            f"{name}: first warm-up step took {r['warmup_seconds'][0]:.1f} s "
            f"({r['first_step_extra_seconds']:.1f} s over a timed step)"
        )
    return "\n".join(lines)


# ---------------------------------------------------------------------------------------------
# entry point


def parse_args(argv=None):
    parser = argparse.ArgumentParser(prog="h2h-bench", description=__doc__.split("\n\n")[0])
    parser.add_argument("--model", default="tiny", help="model config under conf/model (default: tiny)")
    parser.add_argument(
        "--override",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="extra Hydra override (repeatable)",
    )
    parser.add_argument(
        "--attention", default=None, help="comma-separated choices (default: every one under conf/attention)"
    )
    parser.add_argument(
        "--baseline", default="standard", help="the choice every ratio is taken against (default: standard)"
    )
    parser.add_argument("--steps", type=int, default=10, help="timed steps per design (default: 10)")
    parser.add_argument("--warmup", type=int, default=2, help="untimed steps per design first (default: 2)")
    parser.add_argument("--batch-size", type=int, default=16)
    parser.add_argument("--vocab-size", type=int, default=1024)
    parser.add_argument("--lr", type=float, default=1e-3)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument(
        "--threads", type=int, default=None, help="torch intra-op threads (default: torch's own choice)"
    )
    parser.add_argument(
        "--compile",
        default="none",
        help=f"comma-separated, any of {', '.join(COMPILE_MODES)}: torch.compile per block or the "
        "whole model",
    )
    parser.add_argument("--json", type=Path, default=None, help="also write the numbers to this file")
    args = parser.parse_args(argv)
    args.attention = [a.strip() for a in args.attention.split(",")] if args.attention else named_choices()
    args.compile = [c.strip() for c in args.compile.split(",")]
    for mode in args.compile:
        if mode not in COMPILE_MODES:
            parser.error(f"--compile={mode!r} must be one of {', '.join(COMPILE_MODES)}")
    models = sorted(p.stem for p in (CONF_DIR / "model").glob("*.yaml"))
    if args.model not in models:
        parser.error(f"--model={args.model!r} must be one of {', '.join(models)}")
    known = set(named_choices())
    for name in args.attention:
        if name not in known:
            parser.error(f"--attention={name!r} must be one of {', '.join(sorted(known))}")
    if args.baseline not in known:
        parser.error(f"--baseline={args.baseline!r} must be one of {', '.join(sorted(known))}")
    if args.baseline not in args.attention:
        args.attention = [args.baseline, *args.attention]
    for flag in ("steps", "batch_size", "vocab_size"):
        if getattr(args, flag) <= 0:
            parser.error(f"--{flag.replace('_', '-')}={getattr(args, flag)} must be positive")
    if args.warmup < 0:
        parser.error(f"--warmup={args.warmup} must be 0 or more")
    if args.threads is not None and args.threads <= 0:
        parser.error(f"--threads={args.threads} must be positive")
    return args


def time_rounds(contenders, probes, rounds: int) -> None:
    """Each round: one timed step of every contender, then one run of every matmul probe."""
    for _ in range(rounds):
        for c in contenders:
            wall, cpu = c.step()
            c.times.append(wall)
            c.cpu_times.append(cpu)
        for probe in probes:
            probe.run()


def run(args) -> dict:
    args.load_before = os.getloadavg()
    if args.threads is not None:
        torch.set_num_threads(args.threads)
    contenders = [build_contender(args, a, mode) for mode in args.compile for a in args.attention]
    first = contenders[0].model
    tokens_per_step = args.batch_size * first.seq_len
    probes = [
        MatmulProbe(*shape)
        for shape in reference_shapes(first.d_model, first.ffn_hidden, args.vocab_size, tokens_per_step)
    ]
    for probe in probes:
        probe.run(record=False)
    for c in contenders:
        for _ in range(args.warmup):
            c.warmup_seconds.append(c.step()[0])
    can_reset = _reset_peak_rss()
    if not can_reset:
        print(
            "h2h-bench: /proc/self/clear_refs is not available; memory is the process-wide getrusage max RSS",
            file=sys.stderr,
        )
    for c in contenders:
        c.memory = measure_memory(c, can_reset)
    time_rounds(contenders, probes, args.steps)
    for c in contenders:
        if not all(math.isfinite(x) for x in c.losses):
            raise SystemExit(
                f"h2h-bench: {c.name} produced a non-finite loss; its timings are not meaningful"
            )
    return summarise(contenders, probes, args, tokens_per_step)


def main(argv=None) -> int:
    args = parse_args(argv)
    try:
        result = run(args)
    except (HydraException, OmegaConfBaseException) as err:
        print(f"h2h-bench: bad --override: {str(err).splitlines()[0]}", file=sys.stderr)
        return 2
    print(format_table(result))
    if args.json is not None:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
