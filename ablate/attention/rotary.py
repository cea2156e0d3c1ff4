"""Rotary position embedding (Su et al. 2021, RoFormer).

Each pair of channels (i, i + D/2) of a query or key at position m is rotated by the angle
m * theta_i, with theta_i = base^(-2i / D). The dot product of a rotated query at position m
and a rotated key at position n then depends on m - n only.
"""

from __future__ import annotations

import torch
from torch import nn


class Rotary(nn.Module):
    """Applies rotary positions to tensors shaped ``[..., time, head_dim]``.

    Args:
        head_dim: channels per head (even).
        base: the wavelength base of the angles.
    """

    def __init__(self, head_dim: int, base: float = 10000.0):
        super().__init__()
        if head_dim % 2:
            raise ValueError(f"head_dim={head_dim} must be even for rotary positions")
        inv_freq = base ** (-torch.arange(0, head_dim, 2, dtype=torch.float32) / head_dim)
        self.register_buffer("inv_freq", inv_freq, persistent=False)

    def angles(self, time: int, device=None) -> tuple[torch.Tensor, torch.Tensor]:
        pos = torch.arange(time, device=device or self.inv_freq.device, dtype=torch.float32)
        freqs = torch.outer(pos, self.inv_freq.to(pos.device))
        freqs = torch.cat([freqs, freqs], dim=-1)
        return freqs.cos(), freqs.sin()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        cos, sin = self.angles(x.shape[-2], x.device)
        cos, sin = cos.to(x.dtype), sin.to(x.dtype)
        half = x.shape[-1] // 2
        rotated = torch.cat([-x[..., half:], x[..., :half]], dim=-1)
        return x * cos + rotated * sin
