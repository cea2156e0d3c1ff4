"""Quantization sensitivity: validation loss after fake quantization.

Weights (per output channel, symmetric, ``b`` bits): for each row ``w`` of a linear weight,
``scale = max|w| / (2^(b-1) - 1)``, ``w_q = clamp(round(w / scale), -(2^(b-1) - 1), 2^(b-1) - 1) * scale``
(a row of zeros stays zero). Applied to every ``nn.Linear`` weight of a deep copy of the model;
with tied embeddings the output head shares its weight with the embedding table, so the table is
quantized too (row by row, the same grid).

Activations (int8, per tensor, symmetric, dynamic): the input ``x`` of every ``nn.Linear`` is
replaced by its fake-quantized copy with ``scale = max|x| / 127`` by a forward pre-hook.

Keys: ``quantization/loss_fp32``, ``quantization/loss_w8``, ``quantization/loss_w4``,
``quantization/loss_a8`` and ``quantization/increase_<w8|w4|a8>`` (loss minus ``loss_fp32``), all in
nats per token on the validation windows.
"""

from __future__ import annotations

import copy

import numpy as np
import torch
from torch import nn

from .common import DEFAULT_BATCH_TOKENS, evaluating, window_token_losses


def levels(bits: int) -> int:
    if not isinstance(bits, int) or bits < 2:
        raise ValueError(f"bits={bits!r}: must be an integer >= 2")
    return 2 ** (bits - 1) - 1


def fake_quantize_rows(weight: torch.Tensor, bits: int) -> torch.Tensor:
    """Symmetric per-output-channel (per row) fake quantization of a 2-D weight."""
    if weight.ndim != 2:
        raise ValueError(f"fake_quantize_rows: expects a 2-D weight, got shape {tuple(weight.shape)}")
    q = levels(bits)
    scale = weight.abs().amax(dim=1, keepdim=True) / q
    safe = torch.where(scale > 0, scale, torch.ones_like(scale))
    return torch.clamp(torch.round(weight / safe), -q, q) * scale


def fake_quantize_tensor(x: torch.Tensor, bits: int) -> torch.Tensor:
    """Symmetric per-tensor fake quantization (one scale ``max|x| / (2^(b-1) - 1)``)."""
    q = levels(bits)
    scale = x.abs().amax() / q
    if float(scale) == 0.0:
        return x
    return torch.clamp(torch.round(x / scale), -q, q) * scale


def weight_quantized_copy(model: nn.Module, bits: int) -> nn.Module:
    """A deep copy whose every ``nn.Linear`` weight is fake-quantized (each tensor once)."""
    clone = copy.deepcopy(model)
    seen: set[int] = set()
    with torch.no_grad():
        for module in clone.modules():
            if isinstance(module, nn.Linear) and id(module.weight) not in seen:
                seen.add(id(module.weight))
                module.weight.copy_(fake_quantize_rows(module.weight, bits))
    return clone


def mean_loss(model: nn.Module, windows: np.ndarray, batch_tokens: int, device) -> float:
    with evaluating(model):
        return float(window_token_losses(model, windows, batch_tokens, device).mean())


def activation_quantized_loss(
    model: nn.Module, windows: np.ndarray, bits: int, batch_tokens: int, device
) -> float:
    handles = [
        m.register_forward_pre_hook(lambda _m, args: (fake_quantize_tensor(args[0], bits),) + tuple(args[1:]))
        for m in model.modules()
        if isinstance(m, nn.Linear)
    ]
    try:
        return mean_loss(model, windows, batch_tokens, device)
    finally:
        for h in handles:
            h.remove()


def quantization_probe(
    model: nn.Module, windows: np.ndarray, device="cpu", batch_tokens: int = DEFAULT_BATCH_TOKENS
) -> dict[str, float]:
    losses = {"fp32": mean_loss(model, windows, batch_tokens, device)}
    for bits in (8, 4):
        losses[f"w{bits}"] = mean_loss(weight_quantized_copy(model, bits), windows, batch_tokens, device)
    losses["a8"] = activation_quantized_loss(model, windows, 8, batch_tokens, device)
    out = {f"quantization/loss_{k}": v for k, v in losses.items()}
    for k in ("w8", "w4", "a8"):
        out[f"quantization/increase_{k}"] = losses[k] - losses["fp32"]
    return out
