"""What an attention block must offer (:class:`AttentionBlock`) and the maps the shipped ones share.

A block is a plain ``torch.nn.Module`` built as ``Block(d_model=..., layer_index=...,
n_layers=..., **options)``. The trainer, the FLOP counter and the probes use only what the protocol
names; :func:`check_block` says in one line what a block lacks.
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable

import torch
from torch import nn

from .rotary import Rotary


@runtime_checkable
class AttentionBlock(Protocol):
    """The contract of an attention block.

    - ``d_model``: its width;
    - ``q_proj``, ``k_proj``, ``v_proj``, ``out_proj``: ``nn.Linear`` maps (the decoder scales the
      initialisation of ``out_proj``, the map that writes into the residual stream; the outlier
      probe reads what enters ``out_proj``);
    - ``forward(x)``: causal, ``[batch, time, d_model] -> [batch, time, d_model]``;
    - ``attention_weights(x)``: the map applied to the values, ``[batch, heads, time, time]``, zero
      on future keys (probes);
    - ``attention_logits(x)``: pre-softmax scores ``[batch, heads', time, time]`` (probes).

    Optional, looked up with ``getattr``:

    - ``core_flops_per_token(seq_len) -> float``: forward FLOPs per token of the score and value
      products over a full window (otherwise measured with torch's FLOP counter);
    - ``log_scalars() -> dict[str, float]``: numbers the trainer logs as ``<name>/layer_<i>``;
    - ``init_parameter(name, tensor, generator)``: initialises the block's own parameters that are
      not linear maps (e.g. lambda vectors) from the generator the decoder keys by (seed, name).
    """

    d_model: int
    q_proj: nn.Linear
    k_proj: nn.Linear
    v_proj: nn.Linear
    out_proj: nn.Linear

    def forward(self, x: torch.Tensor) -> torch.Tensor: ...

    def attention_weights(self, x: torch.Tensor) -> torch.Tensor: ...

    def attention_logits(self, x: torch.Tensor) -> torch.Tensor: ...


REQUIRED = (
    "d_model",
    "q_proj",
    "k_proj",
    "v_proj",
    "out_proj",
    "forward",
    "attention_weights",
    "attention_logits",
)


def check_block(block: nn.Module) -> None:
    """Raise TypeError naming what ``block`` lacks of :class:`AttentionBlock`."""
    missing = [name for name in REQUIRED if not hasattr(block, name)]
    if missing:
        raise TypeError(
            f"{type(block).__name__} is not an attention block: it lacks {', '.join(missing)} "
            "(see ablate.attention.AttentionBlock)"
        )
    for name in ("q_proj", "k_proj", "v_proj", "out_proj"):
        if not isinstance(getattr(block, name), nn.Linear):
            raise TypeError(f"{type(block).__name__}.{name} must be an nn.Linear")


class ProjectedAttention(nn.Module):
    """The maps every shipped block has: bias-free q/k/v/out maps of width ``d_model`` and rotary
    positions over ``head_dim`` channels."""

    def __init__(self, d_model: int, head_dim: int, rope_base: float, layer_index: int, n_layers: int):
        super().__init__()
        self.d_model, self.head_dim = d_model, head_dim
        self.layer_index, self.n_layers = layer_index, n_layers
        self.q_proj = nn.Linear(d_model, d_model, bias=False)
        self.k_proj = nn.Linear(d_model, d_model, bias=False)
        self.v_proj = nn.Linear(d_model, d_model, bias=False)
        self.out_proj = nn.Linear(d_model, d_model, bias=False)
        self.rotary = Rotary(head_dim, rope_base)
