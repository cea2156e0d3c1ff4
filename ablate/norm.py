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
    :math:`dx = r\,(u - \hat x\, \mathrm{mean}(u \hat x)) = r u - x\, r^3 \mathrm{mean}(u x)`,
    :math:`dw = \sum g \hat x` over every dimension but the last.

    Written for few passes over memory: ``r`` from one norm reduction, ``y`` in two passes, ``x``
    (already alive in the residual stream) saved rather than ``x_hat``, and ``dx`` formed in place
    in ``u``.
    """

    @staticmethod
    def forward(ctx, x, weight, eps: float):
        dim = x.shape[-1]
        r = torch.linalg.vector_norm(x, dim=-1, keepdim=True).square_().div_(dim).add_(eps).rsqrt_()
        y = torch.mul(x, r)
        if weight is not None:
            y.mul_(weight)
        ctx.save_for_backward(x, r, weight)
        return y

    @staticmethod
    def backward(ctx, grad):
        x, r, weight = ctx.saved_tensors
        u = grad * weight if weight is not None else grad.clone()
        coef = torch.linalg.vecdot(u, x, dim=-1).unsqueeze(-1).mul_(r.pow(3)).div_(x.shape[-1])
        dx = u.mul_(r).addcmul_(x, coef, value=-1.0)
        dw = None
        if weight is not None and ctx.needs_input_grad[1]:
            dw = torch.einsum("...d,...d,...->d", grad, x, r.squeeze(-1))
        return dx, dw, None


class RMSNorm(nn.RMSNorm):
    """``nn.RMSNorm`` over the last dimension, computed by :class:`RMSNormFunction`."""

    def __init__(self, dim: int, eps: float = 1e-5, elementwise_affine: bool = True):
        super().__init__(dim, eps=eps, elementwise_affine=elementwise_affine)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return RMSNormFunction.apply(x, self.weight, self.eps)
