"""Parameter and FLOP accounting, steps from a budget, and the fairness comparison.

FLOPs count multiply-adds as 2 and cover matrix products only (the convention of Kaplan et al.
2020 and of ``torch.utils.flop_counter``): every linear map (2 * in * out per token, the output
head included) plus each attention block's score and value products over a full window of
``seq_len`` keys (dense kernels compute the masked half too). Training costs forward + backward
= 3 x forward per token (Kaplan et al. 2020, C = 6N). Non-embedding parameters exclude the token
embedding and an untied output head.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import torch
from torch import nn
from torch.utils.flop_counter import FlopCounterMode


@dataclass(frozen=True)
class Accounting:
    params: int
    non_embedding_params: int
    forward_flops_per_token: float
    flops_per_token: float  # training: forward + backward

    def as_dict(self) -> dict:
        return asdict(self)


def count_params(model: nn.Module) -> tuple[int, int]:
    """(total, non-embedding) parameter counts; tied weights counted once."""
    unique = {id(p): p for p in model.parameters()}
    total = sum(p.numel() for p in unique.values())
    embedding_ids = {id(model.embed.weight), id(model.head.weight)}
    embedding = sum(unique[i].numel() for i in embedding_ids if i in unique)
    return total, total - embedding


def linear_flops_per_token(module: nn.Module) -> float:
    return float(
        sum(2 * m.in_features * m.out_features for m in module.modules() if isinstance(m, nn.Linear))
    )


def attention_core_flops_per_token(block: nn.Module, seq_len: int) -> float:
    """Score and value products of one attention block, forward, per token.

    Blocks may declare ``core_flops_per_token(seq_len)``; for a block that does not, the figure
    is measured with torch's FLOP counter on one window, minus its linear maps.
    """
    if hasattr(block, "core_flops_per_token"):
        return float(block.core_flops_per_token(seq_len))

    x = torch.zeros(1, seq_len, block.d_model)
    with torch.no_grad(), FlopCounterMode(display=False) as counter:
        block(x)
    return counter.get_total_flops() / seq_len - linear_flops_per_token(block)


def account(model: nn.Module, seq_len: int | None = None) -> Accounting:
    seq_len = seq_len or model.seq_len
    total, non_embedding = count_params(model)
    forward = linear_flops_per_token(model) + sum(
        attention_core_flops_per_token(b, seq_len) for b in model.attention_blocks()
    )
    return Accounting(total, non_embedding, forward, 3.0 * forward)


def measure_flops_per_token(model: nn.Module, seq_len: int | None = None, batch: int = 1) -> float:
    """Training FLOPs per token measured by ``torch.utils.flop_counter.FlopCounterMode`` on one
    forward + backward pass (the outside reference for :func:`account`)."""

    seq_len = seq_len or model.seq_len
    ids = torch.randint(0, model.vocab_size, (batch, seq_len + 1))
    with FlopCounterMode(display=False) as counter:
        logits = model(ids[:, :-1])
        loss = nn.functional.cross_entropy(logits.reshape(-1, model.vocab_size), ids[:, 1:].reshape(-1))
        loss.backward()
    model.zero_grad(set_to_none=True)
    return counter.get_total_flops() / (batch * seq_len)


def ratios(candidate: Accounting, baseline: Accounting) -> dict:
    """Ratios candidate / baseline used by the fairness check of a grid."""
    return {
        "params_ratio": candidate.params / baseline.params,
        "non_embedding_params_ratio": candidate.non_embedding_params / baseline.non_embedding_params,
        "flops_ratio": candidate.flops_per_token / baseline.flops_per_token,
    }


def steps_from_budget(
    match: str,
    tokens_per_step: int,
    flops_per_token: float,
    tokens: float | None = None,
    flops: float | None = None,
) -> int:
    """Optimizer steps that spend the budget.

    ``match='tokens'``: ``tokens / tokens_per_step``. ``match='flops'``: ``flops /
    (flops_per_token * tokens_per_step)``, so a block that costs more per token gets fewer steps.
    """
    if match == "tokens":
        if not tokens or tokens <= 0:
            raise ValueError(f"budget.tokens={tokens!r} must be positive when budget.match=tokens")
        return max(1, math.floor(tokens / tokens_per_step))
    if match == "flops":
        if not flops or flops <= 0:
            raise ValueError(f"budget.flops={flops!r} must be positive when budget.match=flops")
        return max(1, math.floor(flops / (flops_per_token * tokens_per_step)))
    raise ValueError(f"budget.match={match!r} must be one of tokens, flops")
