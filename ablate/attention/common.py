"""Pieces shared by the attention blocks: argument checks and the causal mask."""

from __future__ import annotations

import torch

from ..checks import positive_int


def require_divisible(name: str, value: int, divisor: int, what: str) -> None:
    if not isinstance(value, int) or value <= 0 or value % divisor:
        raise ValueError(f"{name}={value} must be a positive multiple of {divisor} ({what})")


def require_positive_int(name: str, value) -> None:
    positive_int(name, value)


def require_bool(name: str, value) -> None:
    if not isinstance(value, bool):
        raise ValueError(f"{name}={value!r} must be true or false")


def causal_mask(time: int, device=None) -> torch.Tensor:
    """Boolean ``[time, time]`` mask, True where a query may attend (key index <= query index)."""
    return torch.ones(time, time, dtype=torch.bool, device=device).tril()


def causal_softmax(scores: torch.Tensor) -> torch.Tensor:
    """Row-wise softmax of ``[..., time, time]`` scores with future positions removed."""
    mask = causal_mask(scores.shape[-1], scores.device)
    return scores.masked_fill(~mask, float("-inf")).softmax(dim=-1)
