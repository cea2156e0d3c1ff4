"""The tiny decoder that every ablation trains.

``logits = W_head * RMSNorm(h_L)``, where ``h_0 = E[ids]`` and each of the L pre-norm blocks computes

    h' = h + attention(RMSNorm(h))
    h_next = h' + W_down (silu(W_gate RMSNorm(h')) * W_up RMSNorm(h'))      (SwiGLU, Shazeer 2020)

Initialisation: every linear map and the embedding ~ N(0, 0.02^2); the two maps that write into
the residual stream (attention ``out_proj`` and SwiGLU ``down``) use 0.02 / sqrt(2 L) so the
residual variance does not grow with depth (common practice, no source). Norm gains start at 1;
a block's other parameters are initialised by its optional ``init_parameter`` (else they keep the
block's own initialisation). With ``init_seed`` every tensor is drawn from its own generator keyed by
(seed, parameter name): two designs built with one seed start with identical tensors wherever
name and shape agree (common random numbers, a variance-reduction technique of simulation
practice; Law, "Simulation Modeling and Analysis"), so their paired difference is not blurred by
unrelated starting weights. The model knows nothing of configs: it takes an attention factory.
"""

from __future__ import annotations

import hashlib
import math
from typing import Callable

import torch
from torch import nn

from .checks import check_positive_int
from .loss import head_loss
from .norm import RMSNorm

AttentionFactory = Callable[[int], nn.Module]


def swiglu_hidden(d_model: int, multiple_of: int = 8) -> int:
    """About 8/3 d_model, rounded up to a multiple of ``multiple_of``."""
    hidden = int(math.ceil(8 * d_model / 3))
    return multiple_of * int(math.ceil(hidden / multiple_of))


def keyed_generator(seed: int, name: str) -> torch.Generator:
    """A CPU generator seeded from SHA-256 of ``"<seed>/<name>"``: one independent stream per tensor."""
    digest = hashlib.sha256(f"{seed}/{name}".encode()).digest()
    return torch.Generator().manual_seed(int.from_bytes(digest[:8], "little") & (2**63 - 1))


class SwiGLU(nn.Module):
    def __init__(self, d_model: int, hidden: int):
        super().__init__()
        self.gate = nn.Linear(d_model, hidden, bias=False)
        self.up = nn.Linear(d_model, hidden, bias=False)
        self.down = nn.Linear(hidden, d_model, bias=False)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.down(nn.functional.silu(self.gate(x)) * self.up(x))


class Block(nn.Module):
    def __init__(self, d_model: int, attention: nn.Module, ffn_hidden: int, norm_eps: float = 1e-5):
        super().__init__()
        self.attn_norm = RMSNorm(d_model, eps=norm_eps)
        self.attention = attention
        self.ffn_norm = RMSNorm(d_model, eps=norm_eps)
        self.ffn = SwiGLU(d_model, ffn_hidden)

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        h = h + self.attention(self.attn_norm(h))
        return h + self.ffn(self.ffn_norm(h))


class Decoder(nn.Module):
    """Token embedding, ``n_layers`` pre-norm blocks, final RMSNorm, output head.

    Args:
        vocab_size: number of token ids.
        d_model: residual width.
        n_layers: number of blocks.
        seq_len: the longest window the model is trained on (recorded, used by accounting).
        attention_factory: ``layer_index -> attention module`` (layer_index from 0).
        ffn_hidden: SwiGLU hidden size; default about 8/3 d_model.
        tie_embeddings: share the output head with the token embedding.
        init_std: standard deviation of the normal initialisation.
        init_seed: key every parameter's generator by (init_seed, name); None draws from torch's
            global generator in construction order.

    Shapes: ``ids [batch, time]`` (int64) -> ``logits [batch, time, vocab_size]``.
    """

    def __init__(
        self,
        vocab_size: int,
        d_model: int,
        n_layers: int,
        seq_len: int,
        attention_factory: AttentionFactory,
        ffn_hidden: int | None = None,
        tie_embeddings: bool = True,
        init_std: float = 0.02,
        init_seed: int | None = None,
    ):
        super().__init__()
        for name, value in (
            ("vocab_size", vocab_size),
            ("d_model", d_model),
            ("n_layers", n_layers),
            ("seq_len", seq_len),
        ):
            check_positive_int(name, value)
        self.vocab_size, self.d_model, self.n_layers, self.seq_len = vocab_size, d_model, n_layers, seq_len
        self.ffn_hidden = ffn_hidden or swiglu_hidden(d_model)
        self.tie_embeddings = tie_embeddings
        self.embed = nn.Embedding(vocab_size, d_model)
        self.blocks = nn.ModuleList(
            Block(d_model, attention_factory(i), self.ffn_hidden) for i in range(n_layers)
        )
        self.final_norm = RMSNorm(d_model, eps=1e-5)
        self.head = nn.Linear(d_model, vocab_size, bias=False)
        if tie_embeddings:
            self.head.weight = self.embed.weight
        self._init_weights(init_std, init_seed)

    def _init_weights(self, std: float, seed: int | None) -> None:
        residual_std = std / math.sqrt(2 * self.n_layers)
        residual = {id(b.attention.out_proj.weight) for b in self.blocks} | {
            id(b.ffn.down.weight) for b in self.blocks
        }
        linear = {id(m.weight) for m in self.modules() if isinstance(m, nn.Linear)} | {id(self.embed.weight)}
        owners = {
            id(p): (block.attention, local)
            for block in self.blocks
            for local, p in block.attention.named_parameters(recurse=False)
        }
        for name, p in self.named_parameters():  # tied weights appear once, under the embedding's name
            if p.is_meta:
                continue
            generator = keyed_generator(seed, name) if seed is not None else None
            if id(p) in linear:
                nn.init.normal_(p, 0.0, residual_std if id(p) in residual else std, generator=generator)
            elif id(p) in owners and hasattr(owners[id(p)][0], "init_parameter") and generator is not None:
                owners[id(p)][0].init_parameter(owners[id(p)][1], p, generator)

    def forward(
        self, ids: torch.Tensor, targets: torch.Tensor | None = None, mask: torch.Tensor | None = None
    ) -> torch.Tensor:
        """``ids [batch, time]`` -> logits ``[batch, time, vocab]``; with ``targets [batch, time]``
        instead the mean cross-entropy over the targets (over those where ``mask``, bool
        ``[batch, time]``, is true), computed with the head by :func:`ablate.loss.head_loss`
        without storing the logits."""
        h = self.embed(ids)
        for block in self.blocks:
            h = block(h)
        h = self.final_norm(h)
        if targets is None:
            if mask is not None:
                raise ValueError("a loss mask needs targets")
            return self.head(h)
        if mask is not None:
            return head_loss(h[mask], self.head.weight, targets[mask])
        return head_loss(h.reshape(-1, self.d_model), self.head.weight, targets.reshape(-1))

    def attention_blocks(self) -> list[nn.Module]:
        return [block.attention for block in self.blocks]
