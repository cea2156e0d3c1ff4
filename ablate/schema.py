"""Structured-config schemas (registered in Hydra's ConfigStore) and the range checks beside them.

Hydra rejects wrong types and unknown keys against these dataclasses while composing; the
checks in :func:`check_ranges` cover what a type cannot say (ranges, divisibility, known names).
Every failure is a :class:`ConfigError` whose message is one line naming key, value and what is
allowed.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional

import torch
from hydra.core.config_store import ConfigStore

from toy_corpus.config import LogbookSchema
from toy_corpus.drills import DrillConfig

from .attention.common import KERNELS
from .checks import check_positive_int, check_positive_number
from .probes.suite import ProbesSchema


class ConfigError(ValueError):
    """A user mistake in the configuration; reported as one line, exit code 2."""


@dataclass
class ModelSchema:
    d_model: int = 128
    n_layers: int = 4
    head_dim: int = 32
    seq_len: int = 256
    ffn_hidden: Optional[int] = None
    tie_embeddings: bool = True
    init_std: float = 0.02
    keyed_init: bool = True


@dataclass
class OptimSchema:
    name: str = "adamw"
    lr: float = 2e-3
    betas: List[float] = field(default_factory=lambda: [0.9, 0.95])
    eps: float = 1e-8
    weight_decay: float = 0.1
    warmup_fraction: float = 0.05
    min_lr_ratio: float = 0.1
    grad_clip: float = 1.0


@dataclass
class BudgetSchema:
    match: str = "tokens"
    tokens: Optional[float] = None
    flops: Optional[float] = None
    batch_size: int = 16
    eval_every_tokens: float = 2.5e5
    eval_windows: int = 16
    checkpoint_every_tokens: float = 5e5
    log_every_steps: int = 10


@dataclass
class RuntimeSchema:
    device: str = "cpu"
    threads: Optional[int] = None
    compile: bool = False
    kernels: str = "fast"
    progress: bool = True
    cache_dir: Optional[str] = None
    stop_after_steps: Optional[int] = None  # stop early as if interrupted (tests, dry runs)


@dataclass
class GridSchema:
    name: str = "single"
    baseline: Optional[str] = None
    tolerance: float = 0.02
    unequal_axes: List[str] = field(default_factory=list)
    primary_metric: str = "final_val_loss"
    resolution: float = 0.01
    max_seeds: Optional[int] = None
    sweep: Optional[Dict[str, Any]] = None
    # design key -> reference level, or {reference, within, name}; see ablate/factors.py
    factors: Optional[Dict[str, Any]] = None


@dataclass
class RunSchema:
    model: ModelSchema = field(default_factory=ModelSchema)
    attention: Any = None
    data: Any = None
    optim: OptimSchema = field(default_factory=OptimSchema)
    budget: BudgetSchema = field(default_factory=BudgetSchema)
    runtime: RuntimeSchema = field(default_factory=RuntimeSchema)
    probes: Any = None
    recipe: Any = None
    grid: GridSchema = field(default_factory=GridSchema)
    seed: int = 0
    run_root: str = "runs"


def register() -> None:
    """The run's schema, and one schema per option group whose options name it in their defaults
    list (``conf/probes/*.yaml``: ``defaults: [probes_schema, _self_]``; ``conf/data/toy.yaml``:
    ``logbook_schema``, defined beside its range checks in ``toy_corpus/config.py``)."""
    store = ConfigStore.instance()
    store.store(name="run_schema", node=RunSchema)
    store.store(group="probes", name="probes_schema", node=ProbesSchema)  # ablate/probes/suite.py
    store.store(group="data", name="logbook_schema", node=LogbookSchema)
    store.store(group="data", name="drill_schema", node=DrillConfig)


def check_ranges(cfg) -> None:
    """Range and divisibility checks that types cannot express. Raises ConfigError."""
    m, o, b, r = cfg.model, cfg.optim, cfg.budget, cfg.runtime
    if cfg.seed < 0:
        raise ConfigError(f"seed={cfg.seed!r}: must be an integer >= 0")
    for key in ("d_model", "n_layers", "head_dim", "seq_len"):
        check_positive_int(f"model.{key}", m[key], error=ConfigError)
    if m.ffn_hidden is not None:
        check_positive_int("model.ffn_hidden", m.ffn_hidden, error=ConfigError)
    if o.name != "adamw":
        raise ConfigError(f"optim.name={o.name!r}: allowed: adamw")
    check_positive_number("optim.lr", o.lr, error=ConfigError)
    if not 0.0 <= o.warmup_fraction < 1.0:
        raise ConfigError(f"optim.warmup_fraction={o.warmup_fraction!r}: must be in [0, 1)")
    if o.weight_decay < 0:
        raise ConfigError(f"optim.weight_decay={o.weight_decay!r}: must be >= 0")
    if len(o.betas) != 2 or not all(0.0 <= x < 1.0 for x in o.betas):
        raise ConfigError(f"optim.betas={list(o.betas)!r}: must be two numbers in [0, 1)")
    if b.match not in ("tokens", "flops"):
        raise ConfigError(f"budget.match={b.match!r}: allowed: tokens, flops")
    if b.match == "tokens" or b.flops is None:
        check_positive_number("budget.tokens", b.tokens, error=ConfigError)
    if b.match == "flops" and b.flops is not None:
        check_positive_number("budget.flops", b.flops, error=ConfigError)
    check_positive_int("budget.batch_size", b.batch_size, error=ConfigError)
    check_positive_number("budget.eval_every_tokens", b.eval_every_tokens, error=ConfigError)
    check_positive_int("budget.eval_windows", b.eval_windows, error=ConfigError)
    check_positive_number("budget.checkpoint_every_tokens", b.checkpoint_every_tokens, error=ConfigError)
    check_positive_int("budget.log_every_steps", b.log_every_steps, error=ConfigError)
    if r.device not in ("cpu", "cuda") and not str(r.device).startswith("cuda:"):
        raise ConfigError(f"runtime.device={r.device!r}: allowed: cpu, cuda, cuda:<index>")
    if str(r.device).startswith("cuda") and not torch.cuda.is_available():
        raise ConfigError(
            f"runtime.device={r.device!r}: CUDA is not available on this machine; use runtime.device=cpu"
        )
    if r.threads is not None:
        check_positive_int("runtime.threads", r.threads, error=ConfigError)
    if r.kernels not in KERNELS:
        raise ConfigError(f"runtime.kernels={r.kernels!r}: allowed: {', '.join(KERNELS)}")
    if r.stop_after_steps is not None:
        check_positive_int("runtime.stop_after_steps", r.stop_after_steps, error=ConfigError)
    if cfg.attention is None:
        raise ConfigError("attention: no attention block chosen; pick one with attention=<name>")
    if "_target_" not in cfg.attention:
        raise ConfigError("attention._target_: missing; an attention YAML must name its class")
    check_grid(cfg.grid)


def check_grid(grid) -> None:
    if not 0.0 <= grid.tolerance < 1.0:
        raise ConfigError(f"grid.tolerance={grid.tolerance!r}: must be in [0, 1)")
    check_positive_number("grid.resolution", grid.resolution, error=ConfigError)
    if grid.max_seeds is not None:
        check_positive_int("grid.max_seeds", grid.max_seeds, error=ConfigError)
