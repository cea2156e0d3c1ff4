"""Drill probes: held-out accuracy and where each answer's query position looks.

``drill_accuracy``: the model's argmax at every input position of ``drill.held_out(n)``, scored by
``toy_corpus.drills.accuracy`` on the answer positions.

``drill_attention``: for every answer of every item, the query position is the target index ``t``
(the output at ``t`` predicts ``tokens[t + 1]``). Its attention row of layer ``i`` is bounded as in
the retrieval attention probe (``scan.bounded_rows``: each head's ``|A|`` row divided by its sum,
then the heads averaged), and split over the keys ``0..t`` into

- ``pair_share``: keys in the asked key's pair (``spans["pair"]``),
- ``lookalike_share``: keys in look-alike pairs (and not in the pair),
- ``filler_share``: keys in filler (and in neither of the above),
- ``other_share``: every other key.

The four are in [0, 1] and sum to 1; means over all answers of all items, keys
``drill_attention/layer{i}/{name}_share``. A kind without look-alikes or filler reports 0 for them.
"""

from __future__ import annotations

import time
from typing import Sequence

import numpy as np
import torch
from torch import nn

from toy_corpus.drills import accuracy

from .common import attention_modules, capture_attention_inputs, evaluating
from .outliers import outlier_probe
from .scan import bounded_rows
from .suite import check_config

SHARES = ("pair", "lookalike", "filler", "other")
BATCH = 256


def drill_accuracy(model: nn.Module, drill, n_items: int, device="cpu") -> float:
    """Held-out answer accuracy over ``n_items`` sequences (batched, eval mode, no grad)."""

    tokens, mask = drill.held_out(n_items)
    inputs = torch.as_tensor(tokens[:, :-1])
    with evaluating(model):
        pred = [
            model(inputs[i : i + BATCH].to(device)).argmax(-1).cpu().numpy()
            for i in range(0, len(inputs), BATCH)
        ]
    return accuracy(np.concatenate(pred), tokens, mask)


def key_categories(item: dict, width: int) -> np.ndarray:
    """``[answers, width]`` category index per key (0 pair, 1 look-alike, 2 filler, 3 other);
    a key in several spans takes the first category in that order."""
    out = np.full((len(item["answer_positions"]), width), 3, dtype=np.int64)
    for a, spans in enumerate(item["spans"]):
        for cat, ranges in (
            (2, spans.get("filler", [])),
            (1, spans.get("lookalike", [])),
            (0, [spans["pair"]]),
        ):
            for s, e in ranges:
                out[a, max(0, int(s)) : min(width, int(e))] = cat
    return out


def row_shares(row: np.ndarray, categories: np.ndarray, query: int) -> np.ndarray:
    """Shares of one bounded row (keys ``0..query``; normalised again to sum 1) per category."""
    visible = np.abs(row[: query + 1])
    visible = visible / visible.sum()
    return np.bincount(categories[: query + 1], weights=visible, minlength=len(SHARES))


def check_drill_items(items: Sequence[dict]) -> None:
    if not items:
        raise ValueError("drill attention probe: no items")
    for k, it in enumerate(items):
        for key in ("tokens", "answer_positions", "spans"):
            if key not in it:
                raise ValueError(f"drill attention probe: item {k} has no {key!r} (use Drill.items)")
        if len(it["answer_positions"]) != len(it["spans"]):
            raise ValueError(
                f"drill attention probe: item {k} has {len(it['answer_positions'])} answers but "
                f"{len(it['spans'])} span sets"
            )


def drill_attention(model: nn.Module, items: Sequence[dict], device="cpu") -> dict[str, float]:
    """Mean pair / look-alike / filler / other share of each layer's bounded attention row at the
    answers' query positions (module docstring)."""
    check_drill_items(items)
    width = {len(it["tokens"]) for it in items}
    if len(width) != 1:
        raise ValueError(f"drill attention probe: items must share one length, got {sorted(width)}")
    modules = attention_modules(model)
    totals, count = np.zeros((len(modules), len(SHARES))), 0
    inputs = torch.as_tensor([it["tokens"][:-1] for it in items], dtype=torch.long)
    with evaluating(model), capture_attention_inputs(model) as captured:
        for start in range(0, len(items), BATCH):
            chunk = items[start : start + BATCH]
            model(inputs[start : start + BATCH].to(device))
            rows = [
                bounded_rows(m.attention_weights(x)).double().cpu().numpy() for m, x in zip(modules, captured)
            ]
            for b, it in enumerate(chunk):
                cats = key_categories(it, inputs.shape[1])
                for a, t in enumerate(it["answer_positions"]):
                    for layer, r in enumerate(rows):
                        totals[layer] += row_shares(r[b, t], cats[a], int(t))
                    count += 1
    mean = totals / count
    return {
        f"drill_attention/layer{i}/{name}_share": float(mean[i, j])
        for i in range(len(modules))
        for j, name in enumerate(SHARES)
    }


DRILL_PROBES = ("drill_attention", "outliers")


def drill_probes(model: nn.Module, drill, probes_cfg: dict, device="cpu") -> dict[str, float]:
    """The enabled drill probes (``DRILL_PROBES``) on held-out drill sequences, each timed as
    ``probe_seconds/<name>``: attention shares on ``probes.max_items`` items (256 when null) and the
    outlier probe on ``probes.val_windows`` sequences."""

    cfg = check_config(probes_cfg)
    numbers: dict[str, float] = {}
    for name in cfg["enabled"]:
        t0 = time.perf_counter()
        if name == "drill_attention":
            numbers.update(drill_attention(model, drill.items(cfg["max_items"] or 256), device))
        elif name == "outliers":
            tokens, _ = drill.held_out(cfg["val_windows"])
            numbers.update(outlier_probe(model, tokens, device, cfg["batch_tokens"]))
        else:
            raise ValueError(
                f"probes.enabled: {name!r} does not run on drill data; allowed: {', '.join(DRILL_PROBES)}"
            )
        numbers[f"probe_seconds/{name}"] = time.perf_counter() - t0
    return numbers
