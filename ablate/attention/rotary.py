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
        self._cache_key, self._cache = None, ()

    def angles(self, time: int, device=None) -> tuple[torch.Tensor, torch.Tensor]:
        """``cos, sin`` of the angles ``m * theta_i``, ``[time, head_dim / 2]`` (channel pairs
        ``(i, i + head_dim / 2)`` share an angle)."""
        pos = torch.arange(time, device=device or self.inv_freq.device, dtype=torch.float32)
        freqs = torch.outer(pos, self.inv_freq.to(pos.device))
        return freqs.cos(), freqs.sin()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Rotated ``x``, contiguous whatever the layout of ``x`` (so heads can be merged into the
        batch dimension without a copy)."""
        key = (x.shape[-2], x.dtype, x.device)
        if self._cache_key != key:
            cos, sin = self.angles(x.shape[-2], x.device)
            self._cache = (cos.to(x.dtype), sin.to(x.dtype))
            self._cache_key = key
        return RotaryFunction.apply(x, *self._cache)


class RotaryFunction(torch.autograd.Function):
    r"""With ``x = [x_1, x_2]`` (the two halves of the channels) and the half-width ``c, s``:
    ``y = [x_1 c - x_2 s,\; x_2 c + x_1 s]``; the backward is the rotation by the opposite angle,
    ``dx = [g_1 c + g_2 s,\; g_2 c - g_1 s]``. Written out so that each direction is four
    fused multiply-adds into one buffer, with no concatenated copies: contiguous in the forward,
    in the layout of ``x`` in the backward."""

    @staticmethod
    def forward(ctx, x, cos, sin):
        ctx.save_for_backward(cos, sin)
        # The gradient is written in the layout of x (a head split of a projection's output is a
        # transposed view): the projection's backward then takes it without a copy. torch's own
        # rule for empty_like picks that layout (x's stride order, dense), read off a meta tensor.
        ctx.layout = torch.empty_like(x, device="meta").stride()
        return _rotate(x, cos, sin, 1.0)

    @staticmethod
    def backward(ctx, grad):
        cos, sin = ctx.saved_tensors
        return _rotate(grad, cos, sin, -1.0, ctx.layout), None, None


def _rotate(x: torch.Tensor, cos: torch.Tensor, sin: torch.Tensor, sign: float, layout=None) -> torch.Tensor:
    half = x.shape[-1] // 2
    x1, x2 = x[..., :half], x[..., half:]
    if layout is None:
        out = torch.empty(x.shape, dtype=x.dtype, device=x.device)
    else:
        out = torch.empty_strided(x.shape, layout, dtype=x.dtype, device=x.device)
    torch.mul(x1, cos, out=out[..., :half])
    torch.mul(x2, cos, out=out[..., half:])
    out[..., :half].addcmul_(x2, sin, value=-sign)
    out[..., half:].addcmul_(x1, sin, value=sign)
    return out
