"""Activation outliers on a few validation windows.

Per layer ``i`` (from 0):

- attention logits (``attention_logits`` of the block on its captured input; causal entries
  only, every head and window pooled): ``outliers/layer<i>/logit_top1_ratio`` (largest |logit| /
  median |logit|), ``.../logit_top10_ratio`` (mean of the 10 largest |logit| / median |logit|),
  ``.../logit_max_abs``;
- hidden states (the block's output, every window, position and channel pooled):
  ``.../hidden_top1_ratio``, ``.../hidden_top10_ratio``, ``.../hidden_max_abs`` and
  ``.../hidden_kurtosis``: Fisher's (excess) kurtosis ``m4 / m2^2 - 3`` with population central
  moments (as ``scipy.stats.kurtosis(x, fisher=True, bias=True)``); 0 for a normal distribution.

A median of exactly 0 is replaced by the smallest positive float32 in the ratios.
"""

from __future__ import annotations

import numpy as np
import torch
from torch import nn

from .common import (
    DEFAULT_BATCH_TOKENS,
    attention_modules,
    capture_attention_inputs,
    capture_block_outputs,
    evaluating,
)

TOP_K = 10


def magnitude_stats(values: torch.Tensor, top_k: int = TOP_K) -> dict[str, float]:
    """Largest |value|, mean of the ``top_k`` largest |value| and median |value| of a flat tensor,
    with the two ratios to the median."""
    a = np.abs(values.detach().reshape(-1).double().cpu().numpy())
    if a.size < top_k:
        raise ValueError(f"magnitude_stats: needs at least {top_k} values, got {a.size}")
    top = np.sort(np.partition(a, a.size - top_k)[a.size - top_k :])[::-1]
    median = float(np.median(a))  # the mean of the two middle values for an even count
    floor = max(median, float(np.finfo(np.float32).tiny))
    return {
        "max_abs": float(top[0]),
        "top1_ratio": float(top[0]) / floor,
        "top10_ratio": float(top.mean()) / floor,
        "median_abs": median,
    }


def excess_kurtosis(values: torch.Tensor) -> float:
    """Fisher (excess) kurtosis with population moments: ``m4 / m2**2 - 3``."""
    x = values.detach().reshape(-1).double()
    d = x - x.mean()
    m2 = (d**2).mean()
    m4 = (d**4).mean()
    if float(m2) == 0.0:
        raise ValueError("excess_kurtosis: all values are equal (zero variance)")
    return float(m4 / m2**2 - 3.0)


def causal_entries(logits: torch.Tensor) -> torch.Tensor:
    """Entries ``[..., q, k]`` with ``k <= q`` of a ``[..., time, time]`` score tensor, flattened."""
    t = logits.shape[-1]
    mask = torch.ones(t, t, dtype=torch.bool, device=logits.device).tril()
    return logits[..., mask].reshape(-1)


def outlier_probe(
    model: nn.Module, windows: np.ndarray, device="cpu", batch_tokens: int = DEFAULT_BATCH_TOKENS
) -> dict[str, float]:
    modules = attention_modules(model)
    windows_t = torch.as_tensor(np.asarray(windows), dtype=torch.long)
    per_batch = max(1, batch_tokens // max(1, windows_t.shape[1] - 1))
    logits_per_layer: list[list[torch.Tensor]] = [[] for _ in modules]
    hidden_per_layer: list[list[torch.Tensor]] = [[] for _ in modules]
    with (
        evaluating(model),
        capture_attention_inputs(model) as inputs,
        capture_block_outputs(model) as outputs,
    ):
        for start in range(0, windows_t.shape[0], per_batch):
            model(windows_t[start : start + per_batch, :-1].to(device))
            for layer, module in enumerate(modules):
                logits_per_layer[layer].append(
                    causal_entries(module.attention_logits(inputs[layer])).float().cpu()
                )
                hidden_per_layer[layer].append(outputs[layer].reshape(-1).float().cpu())
    out: dict[str, float] = {}
    for layer in range(len(modules)):
        p = f"outliers/layer{layer}/"
        logit_stats = magnitude_stats(torch.cat(logits_per_layer[layer]))
        hidden = torch.cat(hidden_per_layer[layer])
        hidden_stats = magnitude_stats(hidden)
        for name in ("top1_ratio", "top10_ratio", "max_abs"):
            out[p + "logit_" + name] = logit_stats[name]
            out[p + "hidden_" + name] = hidden_stats[name]
        out[p + "hidden_kurtosis"] = excess_kurtosis(hidden)
    return out
