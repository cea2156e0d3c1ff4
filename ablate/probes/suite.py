"""``run_probes``: every enabled probe on one model, timed, as flat numbers and images.

``probes_cfg`` keys and their defaults: :class:`ProbesSchema` (the probes group's schema, registered
in Hydra's ConfigStore; its rules are :func:`check_config`, beside it).

Each probe's wall time is reported as ``probe_seconds/<name>`` (``probe_seconds/images`` for the
pictures, ``probe_seconds/total`` for everything). When both ``retrieval`` and ``attention`` are
enabled they share one forward sweep over the retrieval items: its forward passes count as
``retrieval``, the extra ``attention_weights`` calls as ``attention``.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass, field
from typing import Callable, List, Mapping, Optional

import numpy as np
from torch import nn

from ..checks import check_positive_int
from . import attention as attention_mod
from . import retrieval as retrieval_mod
from .attention import attention_probe
from .classification import classification_probe
from .common import DEFAULT_BATCH_TOKENS, check_item_lengths, spread_select, validation_windows
from .outliers import outlier_probe
from .pictures import attention_pictures
from .position import position_probe
from .quantization import quantization_probe
from .retrieval import retrieval_probe
from .scan import scan_items

LOGBOOK_PROBES = ("retrieval", "attention", "outliers", "classification", "quantization", "position")
PROBE_NAMES = LOGBOOK_PROBES  # the probes of the logbook corpus, run by run_probes
KNOWN_PROBES = LOGBOOK_PROBES + ("drill_attention",)  # check_config also accepts the drill-only probe


@dataclass
class ProbesSchema:
    """The probes group: its keys and their defaults, written once (``conf/probes/*.yaml`` set
    only what they choose)."""

    enabled: List[str] = field(default_factory=lambda: list(LOGBOOK_PROBES))  # drawn from KNOWN_PROBES
    images: bool = True  # the retrieval attention pictures (TensorBoard image tab and PNG)
    n_images: int = 2  # how many fixed retrieval items to draw
    image_layers: int = 2  # the last this many layers, one panel each
    val_windows: int = 8  # validation windows for outliers, quantization and position
    position_buckets: int = 8  # position ranges of the loss-by-position probe
    max_items: Optional[int] = None  # cap on items per probe set (evenly spaced); None = all
    batch_tokens: int = DEFAULT_BATCH_TOKENS  # padded tokens per forward pass
    every_tokens: Optional[float] = None  # also probe every this many training tokens (the trainer)


DEFAULTS = asdict(ProbesSchema())
WINDOW_PROBES = ("outliers", "quantization", "position")


def check_config(probes_cfg: Mapping) -> dict:
    """Defaults merged with ``probes_cfg``; unknown keys and bad values raise one-line errors."""
    unknown = sorted(set(probes_cfg) - set(DEFAULTS))
    if unknown:
        raise ValueError(f"probes.{unknown[0]}: unknown key; allowed: {', '.join(DEFAULTS)}")
    cfg = {**DEFAULTS, **dict(probes_cfg)}
    enabled = cfg["enabled"]
    if isinstance(enabled, str) or not all(isinstance(n, str) for n in enabled):
        raise ValueError(f"probes.enabled={enabled!r}: must be a list drawn from {', '.join(KNOWN_PROBES)}")
    for name in enabled:
        if name not in KNOWN_PROBES:
            raise ValueError(f"probes.enabled: {name!r} is not a probe; allowed: {', '.join(KNOWN_PROBES)}")
    cfg["enabled"] = list(enabled)
    if not isinstance(cfg["images"], bool):
        raise ValueError(f"probes.images={cfg['images']!r}: must be true or false")
    for name in ("n_images", "image_layers", "val_windows", "position_buckets", "batch_tokens"):
        check_positive_int(f"probes.{name}", cfg[name])
    check_positive_int("probes.max_items", cfg["max_items"], allow_none=True)
    if isinstance(cfg["every_tokens"], float) and cfg["every_tokens"].is_integer():
        cfg["every_tokens"] = int(cfg["every_tokens"])  # 5e5 on the command line arrives as a float
    check_positive_int("probes.every_tokens", cfg["every_tokens"], allow_none=True)
    return cfg


def _probe_set(corpus, name: str, max_items, seq_len: int) -> list[dict]:
    sets = getattr(corpus, "probe_sets", None)
    if sets is None or name not in sets:
        raise ValueError(f"probes: the corpus has no probe set {name!r} (corpus.probe_sets)")
    items = spread_select(list(sets[name]), max_items)
    if not items:
        raise ValueError(f"probes: the probe set {name!r} is empty")
    check_item_lengths(items, seq_len, name)
    return items


def retrieval_and_attention(
    model: nn.Module, items: list[dict], device, batch_tokens: int
) -> dict[str, float]:
    """Both probes from one forward sweep (:mod:`ablate.probes.scan`). The forward passes are timed
    as ``retrieval``; the extra ``attention_weights`` calls as ``attention``."""
    retrieval_mod.check_meta(items, retrieval_mod.META_KEYS, "retrieval")
    attention_mod.check_items(items)
    scan = scan_items(
        model, items, batch_tokens, device, predictions=True, rows_for=attention_mod.eligible(items)
    )
    t0 = time.perf_counter()
    out = retrieval_mod.summarize(items, retrieval_mod.results_from_predictions(items, scan.predictions))
    t1 = time.perf_counter()
    out.update(attention_mod.allocation_summary(items, scan.rows))
    t2 = time.perf_counter()
    out["probe_seconds/retrieval"] = scan.forward_seconds + (t1 - t0)
    out["probe_seconds/attention"] = scan.rows_seconds + (t2 - t1)
    return out


def run_probes(
    model: nn.Module, corpus, probes_cfg: Mapping, device="cpu"
) -> tuple[dict[str, float], dict[str, np.ndarray]]:
    """Runs the enabled probes under ``torch.no_grad()`` in eval mode (the model's mode is restored).

    Returns ``(numbers, images)``: a flat ``name -> float`` dict and ``name -> uint8 [H, W, 3]``.
    """
    cfg = check_config(probes_cfg)
    seq_len = int(model.seq_len)
    bt = cfg["batch_tokens"]
    numbers: dict[str, float] = {}
    images: dict[str, np.ndarray] = {}
    started = time.perf_counter()

    def timed(name: str, fn: Callable[[], dict]) -> dict:
        t0 = time.perf_counter()
        result = fn()
        numbers[f"probe_seconds/{name}"] = time.perf_counter() - t0
        return result

    needs_retrieval = any(n in cfg["enabled"] for n in ("retrieval", "attention")) or cfg["images"]
    retrieval_items = _probe_set(corpus, "retrieval", cfg["max_items"], seq_len) if needs_retrieval else []
    windows = None
    if any(n in cfg["enabled"] for n in WINDOW_PROBES):
        val_ids = getattr(corpus, "val_ids", None)
        if val_ids is None:
            raise ValueError("probes: the corpus has no val_ids for the window probes")
        windows = validation_windows(np.asarray(val_ids), seq_len, cfg["val_windows"])

    if "retrieval" in cfg["enabled"] and "attention" in cfg["enabled"]:
        numbers.update(retrieval_and_attention(model, retrieval_items, device, bt))
    for name in cfg["enabled"]:
        if name == "retrieval" and "attention" not in cfg["enabled"]:
            numbers.update(timed(name, lambda: retrieval_probe(model, retrieval_items, device, bt)))
        elif name == "attention" and "retrieval" not in cfg["enabled"]:
            numbers.update(timed(name, lambda: attention_probe(model, retrieval_items, device, bt)))
        elif name == "classification":
            items = _probe_set(corpus, "classification", cfg["max_items"], seq_len)
            numbers.update(timed(name, lambda: classification_probe(model, items, device, bt)))  # noqa: B023 (called at once)
        elif name == "outliers":
            numbers.update(timed(name, lambda: outlier_probe(model, windows, device, bt)))
        elif name == "quantization":
            numbers.update(timed(name, lambda: quantization_probe(model, windows, device, bt)))
        elif name == "position":
            numbers.update(
                timed(name, lambda: position_probe(model, windows, cfg["position_buckets"], device, bt))
            )
    if cfg["images"]:
        t0 = time.perf_counter()
        images = attention_pictures(model, retrieval_items, cfg["n_images"], cfg["image_layers"], device)
        numbers["probe_seconds/images"] = time.perf_counter() - t0
    numbers["probe_seconds/total"] = time.perf_counter() - started
    return numbers, images
