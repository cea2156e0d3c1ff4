"""In-context classification: accuracy against the number of demonstrations, and how much it
moves when the same demonstrations are shown in another order.

Each query label is one answer span, scored by teacher-forced exact match. An item (one ordering
of one episode) scores the share of its query labels that are right.

Keys (``C`` classes, ``K`` demonstrations):
``classification/acc`` (all queries), ``classification/acc_classes<C>``,
``classification/acc_classes<C>_demos<K>``, ``classification/acc_random``, ``classification/acc_grouped``,
and the order spread ``classification/order_std_<kind>`` and ``classification/order_range_<kind>``
(also per class count: ``classification/classes<C>/order_std_<kind>``) for ``kind`` in
``random``, ``grouped`` and ``all`` (every ordering of the episode). For one episode the spread is
the sample standard deviation (ddof=1) and the best minus the worst item accuracy over its
orderings of that kind; the key is the mean over episodes. A kind with fewer than two orderings in
every episode has no spread and its keys are left out. ``classification/copy_level`` is what
the better of two query-blind guesses scores (the episode's most frequent label, or its last one).
"""

from __future__ import annotations

from collections import Counter, defaultdict
from typing import Sequence

import numpy as np
from torch import nn

from .common import DEFAULT_BATCH_TOKENS
from .retrieval import check_meta, item_results

META_KEYS = ("n_classes", "n_demos", "ordering", "episode", "order_index")
ORDERINGS = ("random", "grouped")


def order_spread(accuracies: Sequence[float]) -> tuple[float, float]:
    """(sample standard deviation with ddof=1, best minus worst) of accuracies over orderings."""
    a = np.asarray(accuracies, dtype=np.float64)
    if a.size < 2:
        raise ValueError(f"order_spread: needs at least two orderings, got {a.size}")
    return float(a.std(ddof=1)), float(a.max() - a.min())


def context_only_level(items: Sequence[dict]) -> float | None:
    """What the better of two guesses that ignore the query scores over all queries: the episode's
    most frequent demonstration label (ties shared), or its last one. A model above this level
    reads the sighting-to-label mapping; one at it may only count or repeat labels. None when the
    items do not record ``demo_label_spans``."""
    if not all(it.get("demo_label_spans") for it in items):
        return None
    majority, last = [], []
    for it in items:
        tokens = list(it["tokens"])
        labels = [tuple(tokens[s:e]) for s, e in it["demo_label_spans"]]
        counts = Counter(labels)
        top = max(counts.values())
        best = {label for label, n in counts.items() if n == top}
        for s, e in it["answer_spans"]:
            answer = tuple(tokens[s:e])
            majority.append((answer in best) / len(best))
            last.append(float(answer == labels[-1]))
    return float(max(np.mean(majority), np.mean(last)))


def summarize(items: Sequence[dict], results: Sequence[Sequence[bool]]) -> dict[str, float]:
    if not items:
        raise ValueError("classification probe: the probe set has no items")
    queries: dict[str, list[float]] = defaultdict(list)
    # episode key -> kind -> list of item accuracies
    episodes: dict[tuple, dict[str, list[float]]] = defaultdict(lambda: defaultdict(list))
    for item, res in zip(items, results):
        if not res:
            raise ValueError("classification probe: an item has no answer_spans")
        m = item["meta"]
        if m["ordering"] not in ORDERINGS:
            raise ValueError(
                f"classification item: meta.ordering={m['ordering']!r} must be one of {', '.join(ORDERINGS)}"
            )
        C, K = int(m["n_classes"]), int(m["n_demos"])
        hits = [float(r) for r in res]
        for key in ("acc", f"acc_classes{C}", f"acc_classes{C}_demos{K}", f"acc_{m['ordering']}"):
            queries[key].extend(hits)
        episode = (C, K, m["episode"])
        acc = float(np.mean(hits))
        episodes[episode][m["ordering"]].append(acc)
        episodes[episode]["all"].append(acc)
    out = {f"classification/{k}": float(np.mean(v)) for k, v in sorted(queries.items())}

    spreads: dict[str, list[tuple[float, float]]] = defaultdict(list)
    for (C, _K, _e), kinds in episodes.items():
        for kind, accs in kinds.items():
            if len(accs) >= 2:
                spread = order_spread(accs)
                spreads[kind].append(spread)
                spreads[f"classes{C}/{kind}"].append(spread)
    for name, values in sorted(spreads.items()):
        prefix, kind = name.rsplit("/", 1) if "/" in name else ("", name)
        base = f"classification/{prefix}/" if prefix else "classification/"
        out[f"{base}order_std_{kind}"] = float(np.mean([v[0] for v in values]))
        out[f"{base}order_range_{kind}"] = float(np.mean([v[1] for v in values]))
    level = context_only_level(items)
    if level is not None:
        out["classification/copy_level"] = level
    out["classification/n_items"] = float(len(items))
    return out


def classification_probe(
    model: nn.Module, items: Sequence[dict], device="cpu", batch_tokens: int = DEFAULT_BATCH_TOKENS
) -> dict[str, float]:
    check_meta(items, META_KEYS, "classification")
    return summarize(items, item_results(model, items, batch_tokens, device))
