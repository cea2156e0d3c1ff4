"""RMSNorm (Zhang & Sennrich 2019) with a hand-written backward.

``y = x / sqrt(mean(x^2) + eps) * w`` over the last dimension. :class:`RMSNorm` is an
``nn.RMSNorm`` (same parameters, state dict and constructor) whose forward runs
:class:`RMSNormFunction`: on CPU torch's own path records the mean, rsqrt and products as
separate autograd nodes, and the backward through them takes about twice as long as the closed
form below (PERFORMANCE.md).
"""

from __future__ import annotations

import torch
from torch import nn


class RMSNormFunction(torch.autograd.Function):
    r"""``x * r * w`` with ``r = (mean(x^2) + eps)^{-1/2}``; ``w`` may be None (no gain).

    Backward, with :math:`\hat x = x r` and :math:`u = g w`:
    :math:`dx = r\,(u - \hat x\, \mathrm{mean}(u \hat x))`, :math:`dw = \sum g \hat x` over every
    dimension but the last.
    """

    @staticmethod
    def forward(ctx, x, weight, eps: float):
        r = torch.rsqrt(x.square().mean(dim=-1, keepdim=True).add_(eps))
        xhat = x * r
        ctx.save_for_backward(xhat, r, weight)
        return xhat * weight if weight is not None else xhat

    @staticmethod
    def backward(ctx, grad):
        xhat, r, weight = ctx.saved_tensors
        u = grad * weight if weight is not None else grad
        dx = (u - xhat * (u * xhat).mean(dim=-1, keepdim=True)).mul_(r)
        dw = None
        if weight is not None and ctx.needs_input_grad[1]:
            dw = (grad * xhat).sum(dim=tuple(range(grad.dim() - 1)))
        return dx, dw, None


class RMSNorm(nn.RMSNorm):
    """``nn.RMSNorm`` over the last dimension, computed by :class:`RMSNormFunction`."""

    def __init__(self, dim: int, eps: float = 1e-5, elementwise_affine: bool = True):
        super().__init__(dim, eps=eps, elementwise_affine=elementwise_affine)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return RMSNormFunction.apply(x, self.weight, self.eps)
