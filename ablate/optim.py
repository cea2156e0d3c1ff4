"""AdamW with decoupled weight decay on matrices only, and the warmup-then-cosine schedule."""

from __future__ import annotations

import math

import torch
from torch import nn


def build_optimizer(
    model: nn.Module, lr: float, betas=(0.9, 0.95), weight_decay: float = 0.1, eps: float = 1e-8
):
    """AdamW (Loshchilov & Hutter 2019). Weight decay applies to 2-D weights (linear maps and the
    embedding); norms' gains and the lambda vectors are not decayed (common practice, no source).
    ``fused=True``: torch's one-kernel AdamW, the same update as the per-tensor loop
    (``tests/test_model.py`` checks it against the published algorithm) in about a quarter of the
    time on CPU (PERFORMANCE.md)."""
    decay, no_decay = [], []
    seen = set()
    for p in model.parameters():
        if id(p) in seen or not p.requires_grad:
            continue
        seen.add(id(p))
        (decay if p.dim() >= 2 else no_decay).append(p)
    groups = [{"params": decay, "weight_decay": weight_decay}, {"params": no_decay, "weight_decay": 0.0}]
    return torch.optim.AdamW(groups, lr=lr, betas=tuple(betas), eps=eps, fused=True)


def lr_at(step: int, total_steps: int, lr: float, warmup_steps: int, min_lr_ratio: float = 0.1) -> float:
    """Linear warmup to ``lr`` over ``warmup_steps``, then cosine decay to ``min_lr_ratio * lr``
    at ``total_steps``."""
    if warmup_steps > 0 and step < warmup_steps:
        return lr * (step + 1) / warmup_steps
    span = max(1, total_steps - warmup_steps)
    progress = min(1.0, (step - warmup_steps) / span)
    floor = lr * min_lr_ratio
    return floor + (lr - floor) * 0.5 * (1.0 + math.cos(math.pi * progress))


def training_step(
    model: nn.Module,
    optimizer,
    batch: torch.Tensor,
    lr: float,
    grad_clip: float,
    mask: torch.Tensor | None = None,
) -> tuple[torch.Tensor, torch.Tensor]:
    """One optimizer step on ``batch`` (``[B, T+1]`` token ids). The loss is the mean cross-entropy
    over the targets ``batch[:, 1:]``, or over those where ``mask`` (bool ``[B, T]``) is true, as
    the model returns it from ``model(inputs, targets, mask)`` (:meth:`ablate.model.Decoder.forward`).
    Returns (loss, grad_norm) as tensors, so callers decide when to synchronise; non-finite values
    are left for them to check."""
    for group in optimizer.param_groups:
        group["lr"] = lr
    loss = model(batch[:, :-1], batch[:, 1:], mask)
    optimizer.zero_grad(set_to_none=True)
    loss.backward()
    grad_norm = torch.nn.utils.clip_grad_norm_(
        model.parameters(), grad_clip if grad_clip > 0 else float("inf")
    )
    if torch.isfinite(grad_norm):
        optimizer.step()
    return loss.detach(), grad_norm.detach()
