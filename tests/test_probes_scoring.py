"""Retrieval and classification scoring on hand-built models whose predictions are known.

Scoring rule under test: an answer span [s, e) is right when the argmax at positions s-1 .. e-2
reproduces tokens[s:e] (teacher forcing; for exact match this equals greedy decoding — common
practice, no source), and a retrieval item is right when all of its spans are.
"""

from __future__ import annotations

import math
import statistics

import pytest
import torch
from test_probes_items import classification_set, retrieval_set
from torch import nn

from ablate.probes.classification import classification_probe, order_spread
from ablate.probes.common import length_batches, spans_correct
from ablate.probes.retrieval import retrieval_probe

VOCAB = 50


class CopyNext(nn.Module):
    """Puts all mass on the next input token (an oracle under teacher forcing), or, with
    ``shift=1``, on a token that is always wrong."""

    def __init__(self, vocab: int, shift: int = 0):
        super().__init__()
        self.vocab, self.shift = vocab, shift

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        nxt = torch.roll(ids, -1, dims=1)
        return nn.functional.one_hot((nxt + self.shift) % self.vocab, self.vocab).float()


class Table(nn.Module):
    """Knows every item: predicts ``tokens[p + 1]`` except at the (item, position) pairs in
    ``wrong``, where it predicts a different token. Rows are found by their unpadded prefix
    (item ids are >= 1, padding is 0)."""

    def __init__(self, items, vocab: int, wrong: set[tuple[int, int]]):
        super().__init__()
        self.vocab = vocab
        self.rows = {}
        for k, it in enumerate(items):
            target = list(it["tokens"][1:])
            for i, p in wrong:
                if i == k:
                    target[p] = (target[p] + 1) % vocab
            self.rows[tuple(it["tokens"][:-1])] = target

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        out = torch.zeros(ids.shape[0], ids.shape[1], self.vocab)
        for b, row in enumerate(ids.tolist()):
            while row and row[-1] == 0:
                row.pop()
            target = self.rows[tuple(row)]
            out[b, torch.arange(len(target)), torch.as_tensor(target)] = 1.0
        return out


@pytest.fixture(scope="module")
def retrieval_items():
    return retrieval_set(VOCAB, [40, 64], [0.0, 0.5, 1.0], [1, 2], [1, 2], per_cell=2, seed=1)


@pytest.fixture(scope="module")
def class_items():
    return classification_set(
        VOCAB, [2, 3], [1, 2], episodes=2, random_orders=2, grouped_orders=1, queries=3, seed=2
    )


def test_spans_correct_needs_every_token_of_the_span():
    tokens = [1, 5, 6, 7, 8]
    right = [5, 6, 7, 8]  # predictions[p] guesses tokens[p + 1]
    assert spans_correct(right, tokens, [[2, 4]]) == [True]
    assert spans_correct([5, 6, 0, 8], tokens, [[2, 4]]) == [False]  # second token wrong
    assert spans_correct([5, 0, 7, 8], tokens, [[2, 4]]) == [False]  # first token wrong
    assert spans_correct([0, 6, 7, 0], tokens, [[2, 4]]) == [True]  # outside the span does not count
    with pytest.raises(ValueError, match="span"):
        spans_correct(right, tokens, [[0, 2]])  # position 0 has no prediction


def test_length_batches_cover_every_item_once_within_the_token_budget():
    lengths = [5, 40, 7, 40, 33, 12, 64]
    batches = length_batches(lengths, batch_tokens=80)
    assert sorted(i for b in batches for i in b) == list(range(len(lengths)))
    for b in batches:
        assert len(b) == 1 or len(b) * max(lengths[i] for i in b) <= 80


def test_retrieval_oracle_scores_one_everywhere(retrieval_items):
    out = retrieval_probe(CopyNext(VOCAB), retrieval_items, batch_tokens=256)
    acc = {k: v for k, v in out.items() if "/acc" in k or k.endswith("answer_acc")}
    assert acc and all(v == 1.0 for v in acc.values())
    assert out["retrieval/n_items"] == len(retrieval_items)


def test_retrieval_wrong_model_scores_zero_everywhere(retrieval_items):
    out = retrieval_probe(CopyNext(VOCAB, shift=1), retrieval_items, batch_tokens=256)
    acc = {k: v for k, v in out.items() if "/acc" in k or k.endswith("answer_acc")}
    assert acc and all(v == 0.0 for v in acc.values())


def test_retrieval_keys_cover_every_cell_and_margin(retrieval_items):
    out = retrieval_probe(CopyNext(VOCAB), retrieval_items, batch_tokens=256)
    for L in (40, 64):
        assert f"retrieval/acc_len{L}" in out
        for D in ("0", "0.5", "1"):
            assert f"retrieval/acc_len{L}_depth{D}" in out
            for n, r in ((1, 1), (2, 1), (2, 2)):
                assert f"retrieval/acc_len{L}_depth{D}_n{n}_r{r}" in out
    assert {
        "retrieval/acc_depth0",
        "retrieval/acc_depth0.5",
        "retrieval/acc_n1",
        "retrieval/acc_n2",
        "retrieval/acc_r1",
        "retrieval/acc_r2",
    } <= set(out)
    assert "retrieval/acc_len40_depth0.5_n1_r2" not in out  # no such cell in the set


def test_retrieval_item_needs_all_spans_and_each_token(retrieval_items):
    assert len({tuple(it["tokens"]) for it in retrieval_items}) == len(
        retrieval_items
    )  # Table needs distinct items
    # Break the second token of the last answer of every two-question item, and a filler position
    # of every other item: only the two-question items fail, and half of their spans stay right.
    wrong = set()
    for k, it in enumerate(retrieval_items):
        if it["meta"]["n_asked"] == 2:
            s, e = it["answer_spans"][-1]
            wrong.add((k, e - 2))  # the prediction of tokens[e - 1]
        else:
            wrong.add((k, 3))  # inside the filler / first needle, never an answer
    out = retrieval_probe(Table(retrieval_items, VOCAB, wrong), retrieval_items, batch_tokens=256)
    n2 = sum(it["meta"]["n_asked"] == 2 for it in retrieval_items)
    assert out["retrieval/acc_r2"] == 0.0
    assert out["retrieval/acc_r1"] == 1.0
    assert out["retrieval/acc"] == pytest.approx(1 - n2 / len(retrieval_items))
    spans = sum(len(it["answer_spans"]) for it in retrieval_items)
    assert out["retrieval/answer_acc"] == pytest.approx(1 - n2 / spans)
    assert out["retrieval/acc_n1"] == 1.0  # one-needle items are all single-question
    assert out["retrieval/acc_n2"] == pytest.approx(0.5)  # n=2 cells: r=1 right, r=2 wrong


def test_classification_oracle_and_wrong_model(class_items):
    right = classification_probe(CopyNext(VOCAB), class_items, batch_tokens=256)
    wrong = classification_probe(CopyNext(VOCAB, shift=1), class_items, batch_tokens=256)
    acc_keys = [k for k in right if "/acc" in k]
    assert {
        "classification/acc_classes2_demos2",
        "classification/acc_classes3_demos6",
        "classification/acc_random",
        "classification/acc_grouped",
    } <= set(acc_keys)
    assert all(right[k] == 1.0 for k in acc_keys)
    assert all(wrong[k] == 0.0 for k in acc_keys)
    assert right["classification/order_std_random"] == 0.0 and right["classification/order_range_all"] == 0.0
    assert "classification/order_std_grouped" not in right  # one grouped ordering: no spread


def test_classification_order_spread_matches_stdlib():
    class_items = classification_set(
        VOCAB, [3, 4], [2], episodes=2, random_orders=2, grouped_orders=1, queries=3, seed=2
    )
    assert len({tuple(it["tokens"]) for it in class_items}) == len(class_items)  # Table needs distinct items
    # Wrong on every query of the first random ordering only: per episode, random orderings score
    # [0, 1] and all orderings [0, 1, 1].
    wrong = {
        (k, s - 1)
        for k, it in enumerate(class_items)
        if it["meta"]["order_index"] == 0
        for s, _e in it["answer_spans"]
    }
    out = classification_probe(Table(class_items, VOCAB, wrong), class_items, batch_tokens=256)
    # Reference: Python's statistics.stdev (sample standard deviation, n - 1).
    assert out["classification/order_std_random"] == pytest.approx(statistics.stdev([0.0, 1.0]))
    assert out["classification/order_std_all"] == pytest.approx(statistics.stdev([0.0, 1.0, 1.0]))
    assert out["classification/order_range_random"] == 1.0 and out["classification/order_range_all"] == 1.0
    assert out["classification/classes3/order_std_random"] == pytest.approx(math.sqrt(0.5))  # by hand
    assert out["classification/acc_grouped"] == 1.0
    assert out["classification/acc_random"] == pytest.approx(0.5)


def test_order_spread_refuses_a_single_ordering():
    with pytest.raises(ValueError, match="two orderings"):
        order_spread([0.5])
