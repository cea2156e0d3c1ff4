"""Hand-made probe items for the probe tests (invented data: random ids, no corpus needed), and
checks that the builders lay out their spans as documented."""

from __future__ import annotations

import random

import numpy as np

DOC_START = 1
STOP = 2  # the "." after every fact and answer


def retrieval_item(
    rng: random.Random, vocab: int, context_len: int, depth: float, n_needles: int, n_asked: int
) -> dict:
    """A copy task: needles are ``key key value value`` spans in random filler; each question
    repeats an asked needle's two key tokens and is answered by its two value tokens.
    One near miss (an unasked needle) is always added, so every item has a distractor span."""
    word = lambda: rng.randrange(3, vocab)
    needles = [[word(), word(), word(), word()] for _ in range(n_needles + 1)]
    asked = rng.sample(range(n_needles), n_asked)
    fixed = 1 + 5 * len(needles) + 5 * n_asked  # <s>, needles + stops, questions + answers + stops
    filler = context_len - fixed
    if filler < 1:
        raise ValueError(f"context_len {context_len} too short for {n_needles} needles")
    tokens = [DOC_START]
    asked_gap = int(round(depth * filler))
    gaps = {asked_gap: [i for i in asked]}
    for i in range(len(needles)):
        if i not in asked:
            gaps.setdefault(rng.randrange(filler + 1), []).append(i)
    spans: dict[int, list[int]] = {}
    for g in range(filler + 1):
        for i in gaps.get(g, []):
            spans[i] = [len(tokens), len(tokens) + 4]
            tokens += needles[i] + [STOP]
        if g < filler:
            tokens.append(word())
    answers = []
    for i in asked:
        tokens += needles[i][:2]
        answers.append([len(tokens), len(tokens) + 2])
        tokens += needles[i][2:] + [STOP]
    return {
        "tokens": tokens,
        "answer_spans": answers,
        "asked_spans": [spans[i] for i in asked],
        "distractor_spans": [spans[i] for i in range(len(needles)) if i not in asked],
        "meta": {
            "context_len": context_len,
            "depth": float(depth),
            "n_needles": n_needles,
            "n_asked": n_asked,
        },
    }


def retrieval_set(
    vocab: int, context_lens, depths, n_needles, n_asked, per_cell: int = 1, seed: int = 0
) -> list[dict]:
    rng = random.Random(seed)
    return [
        retrieval_item(rng, vocab, L, d, n, r)
        for L in context_lens
        for d in depths
        for n in n_needles
        for r in n_asked
        if r <= n
        for _ in range(per_cell)
    ]


def classification_set(
    vocab: int,
    n_classes_list,
    per_class_list,
    episodes: int = 2,
    random_orders: int = 2,
    grouped_orders: int = 1,
    queries: int = 3,
    seed: int = 0,
) -> list[dict]:
    """Episodes of ``feature feature label .`` demonstrations, then queries answered by a label."""
    rng = random.Random(seed)
    items = []
    for C in n_classes_list:
        for per_class in per_class_list:
            for e in range(episodes):
                labels = rng.sample(range(3, vocab), C)
                demos = [
                    (c, [rng.randrange(3, vocab), rng.randrange(3, vocab)])
                    for c in range(C)
                    for _ in range(per_class)
                ]
                qs = [
                    (c, [rng.randrange(3, vocab), rng.randrange(3, vocab)])
                    for c in rng.choices(range(C), k=queries)
                ]
                orders = ["random"] * random_orders + ["grouped"] * grouped_orders
                for order_index, ordering in enumerate(orders):
                    shown = list(demos)
                    if ordering == "random":
                        rng.shuffle(shown)
                    tokens, answers = [DOC_START], []
                    for c, feats in shown:
                        tokens += feats + [labels[c], STOP]
                    for c, feats in qs:
                        tokens += feats
                        answers.append([len(tokens), len(tokens) + 1])
                        tokens += [labels[c], STOP]
                    items.append(
                        {
                            "tokens": tokens,
                            "answer_spans": answers,
                            "meta": {
                                "n_classes": C,
                                "n_demos": C * per_class,
                                "ordering": ordering,
                                "episode": e,
                                "order_index": order_index,
                            },
                        }
                    )
    return items


def test_retrieval_builder_spans_hold_what_they_claim():
    items = retrieval_set(50, [40, 64], [0.0, 0.5, 1.0], [1, 2], [1, 2], seed=3)
    assert len(items) == 2 * 3 * 3
    for it in items:
        t = it["tokens"]
        assert len(t) <= it["meta"]["context_len"]
        assert len(it["answer_spans"]) == len(it["asked_spans"]) == it["meta"]["n_asked"]
        for (s, e), (a, b) in zip(it["answer_spans"], it["asked_spans"]):
            assert t[s:e] == t[a + 2 : b]  # the answer is the asked needle's value
            assert t[s - 2 : s] == t[a : a + 2]  # the question repeats its keys
        assert len(it["distractor_spans"]) == it["meta"]["n_needles"] - it["meta"]["n_asked"] + 1


def test_classification_builder_orderings_share_demonstrations():
    items = classification_set(40, [3], [2], episodes=1)
    assert [it["meta"]["ordering"] for it in items] == ["random", "random", "grouped"]
    assert sorted(items[0]["tokens"]) == sorted(items[2]["tokens"])
    assert np.all([len(it["answer_spans"]) == 3 for it in items])
