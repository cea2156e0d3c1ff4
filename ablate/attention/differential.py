"""Differential attention: the difference of two softmax maps, scaled by lambda."""

from __future__ import annotations

import math

import torch
from torch import nn

from ..checks import check_bool, check_multiple, check_positive_int
from ..norm import RMSNorm
from .base import ProjectedAttention
from .common import (
    add_into,
    add_score_grads,
    causal_chunks,
    causal_softmax,
    future_bias,
    key_grad_buffers,
    range_probabilities,
    reference_kernels,
)

LAMBDA_MODES = ("learned", "fixed")


def depth_lambda_init(layer: int) -> float:
    """lambda_init = 0.8 - 0.6 * exp(-0.3 * (layer - 1)) for ``layer`` counted from 1."""
    return 0.8 - 0.6 * math.exp(-0.3 * (layer - 1))


def resolve_lambda_init(lambda_init, layer_index: int) -> float:
    if lambda_init == "depth":
        return depth_lambda_init(layer_index + 1)
    if isinstance(lambda_init, bool) or not isinstance(lambda_init, (int, float)):
        raise ValueError(f"lambda_init={lambda_init!r} must be 'depth' or a number in (0, 1)")
    if not 0.0 < float(lambda_init) < 1.0:
        raise ValueError(f"lambda_init={lambda_init!r} must be 'depth' or a number in (0, 1)")
    return float(lambda_init)


class DifferentialAttention(ProjectedAttention):
    r"""Causal differential attention with rotary positions.

    Each of the :math:`h = d_{model} / (2d)` heads has two query/key groups of width :math:`d`
    (= ``head_dim``) and values of width :math:`2d`:

    .. math::
        O_i = \left(\mathrm{softmax}\!\left(\frac{Q_{i,1} K_{i,1}^\top}{\sqrt{d}}\right)
              - \lambda\, \mathrm{softmax}\!\left(\frac{Q_{i,2} K_{i,2}^\top}{\sqrt{d}}\right)\right) V_i

        \lambda = \exp(\lambda_{q1} \cdot \lambda_{k1}) - \exp(\lambda_{q2} \cdot \lambda_{k2})
                  + \lambda_{init}

        \mathrm{out} = [\,(1 - \lambda_{init})\,\mathrm{RMSNorm}(O_1); \dots;
                        (1 - \lambda_{init})\,\mathrm{RMSNorm}(O_h)\,]\, W_O

    with causal masks on both maps. The four lambda vectors (length ``head_dim``) are shared by
    the heads of a layer. With ``lambda_init='depth'``,
    :math:`\lambda_{init} = 0.8 - 0.6\exp(-0.3(l - 1))` for layer :math:`l` counted from 1.
    The q/k/v/out maps have the same shapes as standard attention at the same ``d_model``, so the
    parameter counts match up to the lambda vectors.

    Args:
        d_model: model width; a multiple of ``2 * head_dim``.
        layer_index: position of the block in the stack, from 0 (sets the depth schedule).
        n_layers: depth of the stack.
        head_dim: width of each query/key group; values are ``2 * head_dim`` wide.
        head_norm: per-head RMSNorm followed by the ``(1 - lambda_init)`` multiplier; when off,
            both are skipped and the head outputs are concatenated as they are.
        lambda_mode: ``'learned'`` (the re-parameterisation above) or ``'fixed'`` (lambda stays at
            lambda_init; no lambda parameters).
        lambda_init: ``'depth'`` for the schedule above, or a number in (0, 1).
        lambda_std: standard deviation of the normal init of the lambda vectors (our choice).
        rope_base: wavelength base of the rotary positions.

    Shapes: ``forward``: ``[batch, time, d_model] -> [batch, time, d_model]``;
    ``attention_weights``: ``[batch, time, d_model] -> [batch, heads, time, time]`` (the
    difference map, whose rows sum to ``1 - lambda``).
    """

    def __init__(
        self,
        d_model: int,
        layer_index: int = 0,
        n_layers: int = 1,
        head_dim: int = 32,
        head_norm: bool = True,
        lambda_mode: str = "learned",
        lambda_init="depth",
        lambda_std: float = 0.1,
        rope_base: float = 10000.0,
    ):
        check_positive_int("head_dim", head_dim)
        check_bool("head_norm", head_norm)
        check_multiple("d_model", d_model, 2 * head_dim, f"2 * head_dim = {2 * head_dim}")
        if lambda_mode not in LAMBDA_MODES:
            raise ValueError(f"lambda_mode={lambda_mode!r} must be one of {', '.join(LAMBDA_MODES)}")
        super().__init__(d_model, head_dim, rope_base, layer_index, n_layers)
        self.n_heads = d_model // (2 * head_dim)
        self.lambda_mode = lambda_mode
        self.lambda_init = resolve_lambda_init(lambda_init, layer_index)
        self.lambda_std = lambda_std
        self.head_norm = RMSNorm(2 * head_dim, eps=1e-5, elementwise_affine=False) if head_norm else None
        if lambda_mode == "learned":
            self.lambda_q1 = nn.Parameter(torch.randn(head_dim) * lambda_std)
            self.lambda_k1 = nn.Parameter(torch.randn(head_dim) * lambda_std)
            self.lambda_q2 = nn.Parameter(torch.randn(head_dim) * lambda_std)
            self.lambda_k2 = nn.Parameter(torch.randn(head_dim) * lambda_std)

    def init_parameter(self, name: str, tensor: torch.Tensor, generator: torch.Generator) -> None:
        """The lambda vectors ~ N(0, lambda_std^2), drawn from the decoder's keyed generator."""
        if name.startswith("lambda_"):
            with torch.no_grad():
                tensor.copy_(torch.randn(tensor.shape, generator=generator) * self.lambda_std)

    def log_scalars(self) -> dict[str, float]:
        """The current lambda, logged by the trainer as ``lambda/layer_<i>``."""
        return {"lambda": float(self.lambda_value().detach())}

    def lambda_value(self) -> torch.Tensor:
        """The current lambda as a 0-d tensor."""
        if self.lambda_mode == "fixed":
            return torch.tensor(self.lambda_init)
        return (
            torch.exp(torch.dot(self.lambda_q1, self.lambda_k1))
            - torch.exp(torch.dot(self.lambda_q2, self.lambda_k2))
            + self.lambda_init
        )

    def _rotated_queries_keys(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Rotated queries and keys ``[batch, 2 * heads, time, head_dim]``: group 1's heads, then
        group 2's."""
        b, n, _ = x.shape
        q = self.rotary(self.q_proj(x).view(b, n, 2 * self.n_heads, self.head_dim).transpose(1, 2))
        k = self.rotary(self.k_proj(x).view(b, n, 2 * self.n_heads, self.head_dim).transpose(1, 2))
        return q, k

    def _queries_keys(self, x: torch.Tensor) -> tuple[torch.Tensor, ...]:
        """Rotated queries and keys of both groups, each ``[batch, heads, time, head_dim]``."""
        q, k = self._rotated_queries_keys(x)
        h = self.n_heads
        return q[:, :h], k[:, :h], q[:, h:], k[:, h:]

    def _values(self, x: torch.Tensor) -> torch.Tensor:
        b, n, _ = x.shape
        return self.v_proj(x).view(b, n, self.n_heads, 2 * self.head_dim).transpose(1, 2)

    def _finish(self, o: torch.Tensor, shape) -> torch.Tensor:
        if self.head_norm is not None:
            o = self.head_norm(o) * (1.0 - self.lambda_init)
        return self.out_proj(o.transpose(1, 2).reshape(shape))

    def _grouped_queries_keys(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Rotated queries and keys ``[batch * heads * 2, time, head_dim]``, each head's two groups
        next to each other, so that one head's two maps stack into one ``[2 * rows, keys]`` matrix."""
        b, n, _ = x.shape
        shape, order = (b, n, 2, self.n_heads, self.head_dim), (0, 3, 2, 1, 4)
        q = self.rotary(self.q_proj(x).view(shape).permute(order))
        k = self.rotary(self.k_proj(x).view(shape).permute(order))
        return q.reshape(-1, n, self.head_dim), k.reshape(-1, n, self.head_dim)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        b, n, _ = x.shape
        q, k = self._grouped_queries_keys(x)
        v = self._values(x).reshape(b * self.n_heads, n, 2 * self.head_dim)
        lam = self.lambda_value().to(x.dtype)
        if reference_kernels():  # the equation under autograd, full window (runtime.kernels=reference)
            o = self._difference_map(q, k, lam) @ v
        else:
            o = CausalDifference.apply(q, k, v, lam, causal_chunks(n))
        return self._finish(o.view(b, self.n_heads, n, 2 * self.head_dim), x.shape)

    def _difference_map(self, q, k, lam) -> torch.Tensor:
        """``A1 - lambda A2`` per head, ``[batch * heads, time, time]``, from the grouped queries and
        keys (each head's two groups next to each other)."""
        p = causal_softmax(torch.bmm(q, k.transpose(1, 2)) * self.head_dim**-0.5)
        p = p.view(-1, 2, p.shape[-2], p.shape[-1])
        return p[:, 0] - lam * p[:, 1]

    def attention_weights(self, x: torch.Tensor) -> torch.Tensor:
        q1, k1, q2, k2 = self._queries_keys(x)
        scale = 1.0 / math.sqrt(self.head_dim)
        a1 = causal_softmax(q1 @ k1.transpose(-2, -1) * scale)
        a2 = causal_softmax(q2 @ k2.transpose(-2, -1) * scale)
        return a1 - self.lambda_value().to(a1.dtype) * a2

    def attention_logits(self, x: torch.Tensor) -> torch.Tensor:
        """Pre-softmax scores of both groups, ``[batch, 2 * heads, time, time]``."""
        q1, k1, q2, k2 = self._queries_keys(x)
        q, k = torch.cat([q1, q2], 1), torch.cat([k1, k2], 1)
        return q @ k.transpose(-2, -1) / math.sqrt(self.head_dim)

    def core_flops_per_token(self, seq_len: int) -> float:
        """Forward FLOPs per token of the products the equation needs over a full window: scores
        for 2h query groups of width d, and one value product of width 2d per head (the
        difference map ``A1 - lambda A2`` is formed first, so ``V`` is multiplied once)."""
        scores = 2.0 * seq_len * (2 * self.n_heads * self.head_dim)
        values = 2.0 * seq_len * (self.n_heads * 2 * self.head_dim)
        return scores + values


class CausalDifference(torch.autograd.Function):
    r"""``(A1 - lambda A2) V`` over causal ranges of queries, with a hand-written backward.

    Inputs: ``q, k [2G, time, d]`` (G = batch * heads; each head's two groups next to each other),
    ``v [G, time, 2d]``, ``lam`` (0-d), ``ranges``: the ``(start, end)`` query ranges of
    :func:`~ablate.attention.common.causal_chunks`. Output ``[G, time, 2d]``.

    For the queries of one range only the keys up to its end are used: one ``baddbmm`` for the
    scores of both groups (the causal mask as a -inf bias) and one softmax give ``A1, A2``; the
    difference map ``D = A1 - lambda A2`` is formed once and multiplied with V in one ``bmm``
    (the same numbers as ``A1 V - lambda A2 V`` in half the value products; the FLOP accounting
    counts this one product, as the equation needs). The backward is the chain rule written
    out with the same saving: ``dV = D^T dO``; one product ``dP = dO V^T`` serves both maps
    (``dA1 = dP``, ``dA2 = -lambda dP``); the softmax step ``dS = A * (dA - rowsum(dA * A))``
    takes ``s = rowsum(dP * A2)`` and ``rowsum(dO * O) + lambda s`` as its row terms, and
    ``dlambda = -sum(s)``. Every range's key and value gradients are added into one buffer (under
    autograd each range's slice would allocate, zero and copy a full-window gradient of its own).
    ``tests/test_attention.py`` checks output and gradients against autograd on the published
    equations.
    """

    @staticmethod
    def forward(ctx, q, k, v, lam, ranges):
        g, n, d = v.shape[0], q.shape[1], q.shape[2]
        scale = d**-0.5
        bias = future_bias(n, q)
        out = v.new_empty(v.shape)
        saved = []
        for s, e in ranges:
            p = range_probabilities(q, k, bias, scale, s, e).view(g, 2, e - s, e)
            dmap = torch.addcmul(p[:, 0], p[:, 1], -lam)
            out[:, s:e] = torch.bmm(dmap, v[:, :e])
            saved += [p, dmap]
        ctx.ranges = ranges
        ctx.save_for_backward(q, k, v, lam, out, *saved)
        return out

    @staticmethod
    def backward(ctx, grad_out):
        q, k, v, lam, out, *saved = ctx.saved_tensors
        g, d = v.shape[0], q.shape[2]
        scale = d**-0.5
        dq = torch.empty_like(q)
        write, (dk, dv) = key_grad_buffers(ctx.ranges, k, v)
        row = (grad_out * out).sum(dim=-1, keepdim=True)
        dlam = torch.zeros((), dtype=grad_out.dtype, device=grad_out.device)
        for (s, e), p, dmap in reversed(list(zip(ctx.ranges, saved[0::2], saved[1::2]))):
            go = grad_out[:, s:e]
            add_into(dv, dmap.transpose(1, 2), go, e, write)
            dp = torch.bmm(go, v[:, :e].transpose(1, 2))
            s2 = (dp * p[:, 1]).sum(dim=-1, keepdim=True)
            dlam -= s2.sum()
            ds = torch.empty_like(p)
            torch.sub(dp, row[:, s:e] + lam * s2, out=ds[:, 0]).mul_(p[:, 0])
            torch.sub(dp, s2, out=ds[:, 1]).mul_(p[:, 1]).mul_(-lam)
            add_score_grads(ds.view(2 * g, e - s, e), q, k, scale, s, e, dq, dk, write)
            write = False
        return dq, dk, dv, dlam.to(lam.dtype).reshape(lam.shape), None
