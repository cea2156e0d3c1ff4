"""Multi-needle retrieval: exact match of every asked value, scored by teacher forcing.

An item is correct when all of its answer spans are reproduced by the model's argmax (see
:func:`ablate.probes.common.spans_correct`). Accuracies are item means over a group of items.

Keys (``L`` context length, ``D`` depth in shortest form, ``N`` needles, ``R`` asked needles):
``retrieval/acc`` (all items), ``retrieval/answer_acc`` (share of answer spans right),
``retrieval/copy_level`` (what copying a random fact's value from the context scores),
``retrieval/acc_len<L>``, ``retrieval/acc_depth<D>``, ``retrieval/acc_n<N>``, ``retrieval/acc_r<R>``,
``retrieval/acc_len<L>_depth<D>`` (the length x depth grid), ``retrieval/acc_len<L>_depth<D>_n<N>_r<R>``
(every cell) and ``retrieval/n_items``.
"""

from __future__ import annotations

from collections import defaultdict
from typing import Sequence

import numpy as np
from torch import nn

from .common import DEFAULT_BATCH_TOKENS, depth_label, spans_correct
from .scan import scan_items

META_KEYS = ("context_len", "depth", "n_needles", "n_asked")


def check_meta(items: Sequence[dict], keys: Sequence[str], what: str) -> None:
    for k, item in enumerate(items):
        missing = [m for m in keys if m not in item.get("meta", {})]
        if missing:
            raise ValueError(f"{what} item {k}: meta lacks {', '.join(missing)} (needs {', '.join(keys)})")


def results_from_predictions(items: Sequence[dict], predictions: Sequence[np.ndarray]) -> list[list[bool]]:
    """Per item, whether each answer span is reproduced exactly by the argmax predictions."""
    return [spans_correct(p, it["tokens"], it["answer_spans"]) for p, it in zip(predictions, items)]


def item_results(model: nn.Module, items: Sequence[dict], batch_tokens: int, device) -> list[list[bool]]:
    """Per item, whether each answer span is reproduced exactly (one teacher-forced pass)."""
    return results_from_predictions(items, scan_items(model, items, batch_tokens, device).predictions)


def cell_keys(meta: dict) -> list[str]:
    L, D = int(meta["context_len"]), depth_label(meta["depth"])
    N, R = int(meta["n_needles"]), int(meta["n_asked"])
    return [
        f"acc_len{L}",
        f"acc_depth{D}",
        f"acc_n{N}",
        f"acc_r{R}",
        f"acc_len{L}_depth{D}",
        f"acc_len{L}_depth{D}_n{N}_r{R}",
    ]


def summarize(items: Sequence[dict], results: Sequence[Sequence[bool]]) -> dict[str, float]:
    """Accuracy overall and per group, from per-span results."""
    if not items:
        raise ValueError("retrieval probe: the probe set has no items")
    groups: dict[str, list[float]] = defaultdict(list)
    spans_right = spans_total = 0
    for item, res in zip(items, results):
        if not res:
            raise ValueError("retrieval probe: an item has no answer_spans")
        ok = float(all(res))
        groups["acc"].append(ok)
        for key in cell_keys(item["meta"]):
            groups[key].append(ok)
        spans_right += sum(res)
        spans_total += len(res)
    out = {f"retrieval/{k}": float(np.mean(v)) for k, v in sorted(groups.items())}
    out["retrieval/answer_acc"] = spans_right / spans_total
    # what copying the value of a random fact in the context (asked, other needle or near miss)
    # scores: (1 / facts) per asked value, all of them right; needs the items' fact spans
    if all(it.get("asked_spans") for it in items):
        out["retrieval/copy_level"] = float(
            np.mean(
                [
                    (1.0 / (len(it["asked_spans"]) + len(it.get("distractor_spans", []))))
                    ** len(it["answer_spans"])
                    for it in items
                ]
            )
        )
    out["retrieval/n_items"] = float(len(items))
    return out


def retrieval_probe(
    model: nn.Module, items: Sequence[dict], device="cpu", batch_tokens: int = DEFAULT_BATCH_TOKENS
) -> dict[str, float]:
    check_meta(items, META_KEYS, "retrieval")
    return summarize(items, item_results(model, items, batch_tokens, device))
