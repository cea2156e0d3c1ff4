"""One pass over retrieval items that serves both the retrieval and the attention probe.

A forward pass over a batch gives the argmax predictions (retrieval); forward hooks on
``model.blocks[i].attention`` record each block's input, from which ``attention_weights`` gives the
map whose query row at the first answer position the attention probe needs. Rows are bounded:
each head's |A| row is divided by its sum before the heads are averaged (:func:`bounded_rows`), so
the signed differential map gives shares in [0, 1] that sum to 1, as softmax maps do. Sharing the pass
saves a whole forward sweep over the probe set. The wall time is split: ``forward_seconds`` (the
forward passes) and ``rows_seconds`` (the extra ``attention_weights`` calls).
"""

from __future__ import annotations

import contextlib
import time
from dataclasses import dataclass
from typing import Sequence

import torch
from torch import nn

from .common import attention_modules, capture_attention_inputs, evaluating, item_batches


@dataclass
class ScanResult:
    predictions: list  # per item: argmax at every input position, or None when not asked for
    rows: list  # per item: bounded head-mean attention rows [layers, q + 1] at the query, or None
    forward_seconds: float = 0.0
    rows_seconds: float = 0.0


def bounded_rows(weights: torch.Tensor) -> torch.Tensor:
    """``[b, heads, ..., keys]`` attention rows -> ``[b, ..., keys]``: mean over heads of
    ``|A_h| / sum_keys |A_h|`` (each row sums to 1; a differential map's entries can be negative)."""
    magnitude = weights.abs()
    return (magnitude / magnitude.sum(dim=-1, keepdim=True)).mean(dim=1)


def query_position(item: dict) -> int:
    """The position whose output predicts the first answer token: ``s - 1`` of the first span."""
    return int(item["answer_spans"][0][0]) - 1


def scan_items(
    model: nn.Module,
    items: Sequence[dict],
    batch_tokens: int,
    device,
    predictions: bool = True,
    rows_for: Sequence[bool] | None = None,
) -> ScanResult:
    """Forward every item once (grouped by length); keep argmax predictions when ``predictions``
    and, for the items flagged in ``rows_for``, the bounded head-averaged attention row
    (:func:`bounded_rows`) of every layer at :func:`query_position`."""
    wanted = list(rows_for) if rows_for is not None else [False] * len(items)
    result = ScanResult([None] * len(items), [None] * len(items))
    modules = attention_modules(model) if any(wanted) else []
    capture = capture_attention_inputs(model) if modules else contextlib.nullcontext([])
    with evaluating(model), capture as inputs:
        for idx, ids, lengths in item_batches(items, batch_tokens, device):
            t0 = time.perf_counter()
            logits = model(ids)
            if predictions:
                pred = logits.argmax(dim=-1).cpu().numpy()
                for b, i in enumerate(idx):
                    result.predictions[i] = pred[b, : lengths[b]]
            t1 = time.perf_counter()
            result.forward_seconds += t1 - t0
            chosen = [b for b, i in enumerate(idx) if wanted[i]]
            if not chosen:
                continue
            sel = torch.as_tensor(chosen, device=ids.device)
            queries = torch.as_tensor([query_position(items[idx[b]]) for b in chosen], device=ids.device)
            batch = torch.arange(len(chosen), device=ids.device)
            per_layer = []
            for module, x in zip(modules, inputs):
                weights = module.attention_weights(x.index_select(0, sel))  # [b, heads, t, t]
                per_layer.append(bounded_rows(weights[batch, :, queries, :]).double().cpu())
            stacked = torch.stack(per_layer, dim=1).numpy()  # [b, layers, t]
            for j, b in enumerate(chosen):
                result.rows[idx[b]] = stacked[j, :, : int(queries[j]) + 1]
            result.rows_seconds += time.perf_counter() - t1
    return result
