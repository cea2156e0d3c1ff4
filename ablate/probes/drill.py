"""Drill probes: held-out accuracy and where each answer's query position looks.

``drill_accuracy``: the model's argmax at every input position of ``drill.held_out(n)``, scored by
``toy_corpus.drills.accuracy`` on the answer positions.

``drill_attention``: for every answer of every item, the query position is the target index ``t``
(the output at ``t`` predicts ``tokens[t + 1]``). Its attention row ``A`` in each head ``h`` of layer
``i`` (the block's ``attention_weights``: for differential attention the difference map, whose
entries can be negative) is split over the visible keys ``0..t`` into

- ``pair``: keys in the asked key's pair (``spans["pair"]``),
- ``lookalike``: keys in look-alike pairs (and not in the pair),
- ``filler``: keys in filler (and in neither of the above),
- ``other``: every other key,

and read two ways, both divided by the row's absolute mass ``sum_k |A_k|``:

- ``{name}_share`` = ``sum_{k in name} |A_k| / sum_k |A_k|``: in [0, 1], the four sum to 1 (the
  same normalisation as the retrieval probe's ``scan.bounded_rows``);
- ``{name}_signed`` = ``sum_{k in name} A_k / sum_k |A_k|``: in [-1, 1]; equal to the share for a
  map without negative entries (softmax); for a difference map a negative value means the head
  subtracts more weight there than it adds.

Means over all answers of all items, per head (``drill_attention/layer{i}/head{h}/{name}_share``,
``.../{name}_signed``) and averaged over the heads of the layer (``drill_attention/layer{i}/
{name}_share``, ``.../{name}_signed``). A kind without look-alikes or filler reports 0 for them.
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


def head_shares(weights: np.ndarray, categories: np.ndarray, positions: Sequence[int]) -> np.ndarray:
    """One item, one layer: ``weights`` ``[heads, T, T]``, ``categories`` ``[answers, T]``, the
    answers' query positions -> ``[answers, heads, 2, 4]``: (share, signed) per category, each row
    over its visible keys ``0..t`` divided by its absolute mass (module docstring)."""
    at = np.asarray(positions, dtype=np.int64)
    rows = weights[:, at, :]  # [heads, answers, T]
    visible = np.arange(weights.shape[-1])[None, :] <= at[:, None]
    rows = np.where(visible[None], rows, 0.0)
    rows = rows / np.abs(rows).sum(-1, keepdims=True)
    onehot = np.eye(len(SHARES))[categories]  # [answers, T, 4]
    return np.stack(
        [np.einsum("hak,akc->ahc", np.abs(rows), onehot), np.einsum("hak,akc->ahc", rows, onehot)], axis=2
    )


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
    """Pair / look-alike / filler / other shares (absolute and signed) of every head's attention
    row at the answers' query positions, per head and head-averaged per layer (module docstring)."""
    check_drill_items(items)
    width = {len(it["tokens"]) for it in items}
    if len(width) != 1:
        raise ValueError(f"drill attention probe: items must share one length, got {sorted(width)}")
    modules = attention_modules(model)
    totals: list[np.ndarray | float] = [0.0] * len(modules)  # per layer: [heads, 2, 4] summed over answers
    count = 0
    inputs = torch.as_tensor([it["tokens"][:-1] for it in items], dtype=torch.long)
    with evaluating(model), capture_attention_inputs(model) as captured:
        for start in range(0, len(items), BATCH):
            chunk = items[start : start + BATCH]
            model(inputs[start : start + BATCH].to(device))
            maps = [m.attention_weights(x).double().cpu().numpy() for m, x in zip(modules, captured)]
            for b, it in enumerate(chunk):
                cats = key_categories(it, inputs.shape[1])
                for layer, w in enumerate(maps):
                    totals[layer] = totals[layer] + head_shares(w[b], cats, it["answer_positions"]).sum(0)
                count += len(it["answer_positions"])
    return share_names([t / count for t in totals])


def share_names(means: list[np.ndarray]) -> dict[str, float]:
    """``[heads, 2, 4]`` means per layer -> the flat keys: layer (head average) then each head."""
    out: dict[str, float] = {}
    for i, mean in enumerate(means):
        for label, values in [("", mean.mean(0))] + [(f"head{h}/", mean[h]) for h in range(len(mean))]:
            for j, name in enumerate(SHARES):
                out[f"drill_attention/layer{i}/{label}{name}_share"] = float(values[0, j])
                out[f"drill_attention/layer{i}/{label}{name}_signed"] = float(values[1, j])
    return out


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
