"""Attention allocation on retrieval items: where the query that predicts the first answer token
looks.

For each item, take the query position ``q = s - 1`` of its first answer span ``[s, e)`` and the
effective attention row ``A[q, 0..q]`` of every layer (``attention_weights`` of the block, fed the
block's own input captured with a forward hook), averaged over heads. Its mass is split into:

- ``asked_mass``: keys inside the asked needle's span (``asked_spans[0]``, the needle of the first
  question);
- ``distractor_mass``: keys inside any ``distractor_spans`` entry (and not in the asked span);
- ``other_mass``: every other key ``0..q`` (header, filler, other asked needles, the question).

Mass is a signed sum of map entries. For softmax attention the three parts are >= 0 and add up to
1; for differential attention the map is a difference of two softmax maps, entries can be
negative and the three parts add up to ``1 - lambda``.

Keys per layer ``i`` (from 0): ``attention/layer<i>/asked_mass``, ``.../distractor_mass``,
``.../other_mass`` (means over items) and ``.../asked_to_distractor`` = mean asked mass /
max(mean distractor mass, 1e-3); the floor (our choice) keeps the ratio finite when the distractor
mass is about zero or negative. Only items with at least one distractor span are used
(``attention/n_items``).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from torch import nn

from .common import DEFAULT_BATCH_TOKENS, check_spans
from .scan import query_position, scan_items

RATIO_FLOOR = 1e-3


def span_mask(length: int, spans: Sequence[Sequence[int]]) -> np.ndarray:
    mask = np.zeros(length, dtype=bool)
    for s, e in spans:
        mask[max(0, int(s)) : min(length, int(e))] = True
    return mask


def span_masses(row: np.ndarray, query: int, asked: Sequence[Sequence[int]], distractors: Sequence[Sequence[int]]) -> tuple[float, float, float]:
    """Split ``row[0..query]`` (one attention row over keys) into (asked, distractor, other) mass.

    Keys after ``query`` are ignored (they are masked in a causal map). A key inside both an
    asked and a distractor span counts as asked.
    """
    row = np.asarray(row, dtype=np.float64)
    if not 0 <= query < row.shape[-1]:
        raise ValueError(f"span_masses: query {query} outside a row of {row.shape[-1]} keys")
    visible = row[: query + 1]
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
    """Mean (asked, distractor, other) mass per layer over the items that have a row."""
    used = [(it, row) for it, row in zip(items, rows) if row is not None]
    if not used:
        raise ValueError("attention probe: no attention rows to summarise")
    n_layers = used[0][1].shape[0]
    masses = np.zeros((len(used), n_layers, 3))
    for k, (it, row) in enumerate(used):
        q = query_position(it)
        for layer in range(n_layers):
            masses[k, layer] = span_masses(row[layer], q, it["asked_spans"][:1], it["distractor_spans"])
    mean = masses.mean(axis=0)
    out: dict[str, float] = {}
    for layer in range(n_layers):
        asked, distractor, other = (float(v) for v in mean[layer])
        p = f"attention/layer{layer}/"
        out[p + "asked_mass"] = asked
        out[p + "distractor_mass"] = distractor
        out[p + "other_mass"] = other
        out[p + "asked_to_distractor"] = asked / max(distractor, RATIO_FLOOR)
    out["attention/n_items"] = float(len(used))
    return out


def attention_probe(model: nn.Module, items: Sequence[dict], device="cpu", batch_tokens: int = DEFAULT_BATCH_TOKENS) -> dict[str, float]:
    check_items(items)
    scan = scan_items(model, items, batch_tokens, device, predictions=False, rows_for=eligible(items))
    return allocation_summary(items, scan.rows)
