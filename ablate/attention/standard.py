"""Standard causal multi-head self-attention."""

from __future__ import annotations

import math

import torch
from torch import nn

from ..checks import check_bool, check_multiple, check_positive_int
from ..norm import RMSNorm
from .base import ProjectedAttention
from .common import (
    CausalAttention,
    causal_chunks,
    causal_softmax,
    reference_kernels,
)


class StandardAttention(ProjectedAttention):
    r"""Causal multi-head self-attention with rotary positions.

    For each head :math:`i` with queries, keys and values :math:`Q_i, K_i, V_i`
    (``[time, head_dim]``, rotary positions applied to :math:`Q_i, K_i`):

    .. math::
        O_i = \mathrm{softmax}\!\left(\frac{Q_i K_i^\top}{\sqrt{d}} + M\right) V_i,
        \qquad \mathrm{out} = [\,\mathrm{norm}(O_1); \dots; \mathrm{norm}(O_h)\,]\, W_O

    where :math:`d` = ``head_dim``, :math:`M` masks future positions, :math:`h` = ``d_model / head_dim``,
    and ``norm`` is a per-head RMSNorm when ``head_norm`` is on (identity otherwise).

    Args:
        d_model: model width.
        layer_index: position of the block in the stack, from 0 (unused here; kept so every block
            is built with the same arguments).
        n_layers: depth of the stack (unused here, as above).
        head_dim: channels per head; ``d_model`` must be a multiple of it.
        head_norm: normalise each head's output with RMSNorm (the control for the normalisation
            that differential attention uses).
        rope_base: wavelength base of the rotary positions.

    Shapes: ``forward``: ``[batch, time, d_model] -> [batch, time, d_model]``;
    ``attention_weights``: ``[batch, time, d_model] -> [batch, heads, time, time]``.
    """

    def __init__(
        self,
        d_model: int,
        layer_index: int = 0,
        n_layers: int = 1,
        head_dim: int = 32,
        head_norm: bool = False,
        rope_base: float = 10000.0,
    ):
        check_positive_int("head_dim", head_dim)
        check_bool("head_norm", head_norm)
        check_multiple("d_model", d_model, head_dim, f"head_dim={head_dim}")
        super().__init__(d_model, head_dim, rope_base, layer_index, n_layers)
        self.n_heads = d_model // head_dim
        self.head_norm = RMSNorm(head_dim, eps=1e-5, elementwise_affine=False) if head_norm else nn.Identity()

    def _split(self, t: torch.Tensor) -> torch.Tensor:
        b, n, _ = t.shape
        return t.view(b, n, self.n_heads, self.head_dim).transpose(1, 2)

    def _queries_keys(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        return self.rotary(self._split(self.q_proj(x))), self.rotary(self._split(self.k_proj(x)))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        b, n, _ = x.shape
        q, k = (t.reshape(b * self.n_heads, n, self.head_dim) for t in self._queries_keys(x))
        v = self._split(self.v_proj(x)).reshape(q.shape)
        if reference_kernels():  # the equation under autograd, full window (runtime.kernels=reference)
            o = causal_softmax(torch.bmm(q, k.transpose(1, 2)) * self.head_dim**-0.5) @ v
        else:
            o = CausalAttention.apply(q, k, v, causal_chunks(n))
        o = self.head_norm(o.view(b, self.n_heads, n, self.head_dim))
        return self.out_proj(o.transpose(1, 2).reshape(x.shape))

    def attention_weights(self, x: torch.Tensor) -> torch.Tensor:
        q, k = self._queries_keys(x)
        return causal_softmax(q @ k.transpose(-2, -1) / math.sqrt(self.head_dim))

    def attention_logits(self, x: torch.Tensor) -> torch.Tensor:
        """Pre-softmax scores ``[batch, heads, time, time]`` (future positions not masked)."""
        q, k = self._queries_keys(x)
        return q @ k.transpose(-2, -1) / math.sqrt(self.head_dim)

    def core_flops_per_token(self, seq_len: int) -> float:
        """Forward FLOPs per token of the score and value products over a full window.

        Counted over all ``seq_len`` keys, as dense kernels and torch's FLOP counter do.
        """
        return 2.0 * seq_len * self.d_model * 2
