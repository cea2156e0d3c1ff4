"""Attention allocation on retrieval items: where the query that predicts the first answer token
looks.

For each item, take the query position ``q = s - 1`` of its first answer span ``[s, e)`` and the
attention row ``A[q, 0..q]`` of every layer (``attention_weights`` of the block, fed the block's
own input captured with a forward hook). The row is bounded: each head's ``|A|`` row is divided by
its sum, then the heads are averaged (``scan.bounded_rows``). Its weight is split into shares:

- ``asked_share``: keys inside the asked needle's span (``asked_spans[0]``, the needle of the first
  question);
- ``distractor_share``: keys inside any ``distractor_spans`` entry (and not in the asked span);
- ``other_share``: every other key ``0..q`` (header, filler, other asked needles, the question).

The three shares are in [0, 1] and sum to 1 for softmax and differential maps alike (the
differential map is a difference of two softmax maps, so its entries can be negative; taking
magnitudes keeps the shares bounded where a signed ratio would blow up as its denominator crosses 0).

Keys per layer ``i`` (from 0): ``attention/layer<i>/asked_share``, ``.../distractor_share``,
``.../other_share`` (means over items). Only items with at least one distractor span are used
(``attention/n_items``).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from torch import nn

from .common import DEFAULT_BATCH_TOKENS, check_spans
from .scan import query_position, scan_items

SHARES = ("asked", "distractor", "other")


def span_mask(length: int, spans: Sequence[Sequence[int]]) -> np.ndarray:
    mask = np.zeros(length, dtype=bool)
    for s, e in spans:
        mask[max(0, int(s)) : min(length, int(e))] = True
    return mask


def span_shares(
    row: np.ndarray, query: int, asked: Sequence[Sequence[int]], distractors: Sequence[Sequence[int]]
) -> tuple[float, float, float]:
    """Split ``|row[0..query]|`` (one attention row over keys, normalised to sum 1) into
    (asked, distractor, other) shares.

    Keys after ``query`` are ignored (they are masked in a causal map). A key inside both an
    asked and a distractor span counts as asked.
    """
    row = np.asarray(row, dtype=np.float64)
    if not 0 <= query < row.shape[-1]:
        raise ValueError(f"span_shares: query {query} outside a row of {row.shape[-1]} keys")
    visible = np.abs(row[: query + 1])
    total = visible.sum()
    if not total > 0:
        raise ValueError(f"span_shares: the attention row at query {query} is all zero")
    visible = visible / total
    asked_m = span_mask(query + 1, asked)
    distractor_m = span_mask(query + 1, distractors) & ~asked_m
    other_m = ~(asked_m | distractor_m)
    return float(visible[asked_m].sum()), float(visible[distractor_m].sum()), float(visible[other_m].sum())


def eligible(items: Sequence[dict]) -> list[bool]:
    """Items the probe uses: those with at least one distractor span."""
    return [bool(it.get("distractor_spans")) for it in items]


def check_items(items: Sequence[dict]) -> None:
    if not any(eligible(items)):
        raise ValueError("attention probe: no retrieval item has distractor_spans")
    for it in items:
        for key in ("answer_spans", "asked_spans", "distractor_spans"):
            check_spans(it["tokens"], it.get(key, []), key)
        if not it.get("asked_spans"):
            raise ValueError("attention probe: a retrieval item has no asked_spans")


def allocation_summary(items: Sequence[dict], rows: Sequence[np.ndarray | None]) -> dict[str, float]:
    """Mean (asked, distractor, other) share per layer over the items that have a row."""
    used = [(it, row) for it, row in zip(items, rows) if row is not None]
    if not used:
        raise ValueError("attention probe: no attention rows to summarise")
    n_layers = used[0][1].shape[0]
    shares = np.zeros((len(used), n_layers, 3))
    for k, (it, row) in enumerate(used):
        q = query_position(it)
        for layer in range(n_layers):
            shares[k, layer] = span_shares(row[layer], q, it["asked_spans"][:1], it["distractor_spans"])
    mean = shares.mean(axis=0)
    out: dict[str, float] = {}
    for layer in range(n_layers):
        for name, value in zip(SHARES, mean[layer]):
            out[f"attention/layer{layer}/{name}_share"] = float(value)
    out["attention/n_items"] = float(len(used))
    return out


def attention_probe(
    model: nn.Module, items: Sequence[dict], device="cpu", batch_tokens: int = DEFAULT_BATCH_TOKENS
) -> dict[str, float]:
    check_items(items)
    scan = scan_items(model, items, batch_tokens, device, predictions=False, rows_for=eligible(items))
    return allocation_summary(items, scan.rows)
