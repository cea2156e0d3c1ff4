"""Recall drills: determinism, answers recoverable by an independent brute-force solver, copy levels
against closed forms and a simulated query-blind guesser, the loss mask, a hand-built lookup model
and one-line refusals of bad config values."""

from __future__ import annotations

import itertools
import math
import time
from dataclasses import replace

import numpy as np
import pytest
import torch

from toy_corpus.drills import (
    DRILL_KINDS,
    Drill,
    DrillConfig,
    accuracy,
    elimination_level,
    group_level,
)

# A small setting per kind, so brute-force loops stay quick; the defaults are checked too.
SMALL = {
    "recall": dict(kind="recall", n_pairs=6, n_keys=20, n_values=20, n_queries=6),
    "noisy_recall": dict(
        kind="noisy_recall",
        n_pairs=6,
        lookalikes=2,
        n_keys=8,
        n_suffixes=4,
        n_values=12,
        n_queries=6,
        filler_len=1,
        n_filler=5,
    ),
    "induction": dict(kind="induction", span_len=5, window=24, n_symbols=16),
}
# The look-alike recipe's data (conf/data/noisy_recall.yaml): 2 first x 2 second tokens, 4 pairs.
LOOKALIKE = dict(kind="noisy_recall", n_pairs=4, n_queries=4, n_keys=2, n_suffixes=2, filler_len=2)
SETTINGS = (
    [pytest.param(SMALL[k], id=k) for k in DRILL_KINDS]
    + [pytest.param({"kind": k}, id=f"{k}-defaults") for k in DRILL_KINDS]
    + [
        pytest.param(
            {**SMALL["recall"], "query_sampling": "replacement", "n_queries": 10}, id="recall-replacement"
        ),
        pytest.param({**SMALL["recall"], "query_sampling": "cycles", "n_queries": 15}, id="recall-cycles"),
        pytest.param({**SMALL["noisy_recall"], "query_sampling": "replacement"}, id="noisy-replacement"),
        pytest.param({**SMALL["recall"], "min_pairs": 1}, id="recall-mixed"),
        pytest.param(
            {**SMALL["recall"], "min_pairs": 2, "query_sampling": "cycles", "n_queries": 9},
            id="recall-mixed-cycles",
        ),
        pytest.param(
            {**SMALL["recall"], "min_pairs": 3, "query_sampling": "replacement"}, id="recall-mixed-repl"
        ),
        pytest.param({**SMALL["noisy_recall"], "min_pairs": 3}, id="noisy-mixed"),
        pytest.param(LOOKALIKE, id="noisy-lookalike-recipe"),
        pytest.param(
            {**SMALL["noisy_recall"], "query_sampling": "cycles", "n_queries": 8}, id="noisy-cycles"
        ),
        pytest.param({**SMALL["recall"], "pools": "shared"}, id="recall-shared"),
        pytest.param({**SMALL["recall"], "pools": "shared", "min_pairs": 2}, id="recall-shared-mixed"),
    ]
)
MIXED = [p for p in SETTINGS if "mixed" in p.id]


def harmonic(n: int) -> float:
    return sum(1.0 / i for i in range(1, n + 1))


def answer_targets(mask_row: np.ndarray) -> list[int]:
    return [int(t) for t in np.flatnonzero(mask_row)]


# ----------------------------------------------------------------------------- determinism


@pytest.mark.parametrize("settings", SETTINGS)
def test_a_batch_is_a_pure_function_of_seed_and_step(settings):
    drill = Drill.from_dict({**settings, "seed": 3})
    later = [drill.batch(s, 16) for s in (7, 0, 7)]
    again = Drill.from_dict({**settings, "seed": 3}).batch(7, 16)
    for a, b in ((later[0], later[2]), (later[0], again)):
        assert np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1])
    assert not np.array_equal(later[0][0], later[1][0])  # another step
    assert not np.array_equal(
        later[0][0], Drill.from_dict({**settings, "seed": 4}).batch(7, 16)[0]
    )  # another seed
    assert later[0][0].dtype == np.int64 and later[0][1].dtype == bool
    assert later[0][0].shape == (16, drill.length) and later[0][1].shape == (16, drill.length - 1)
    assert later[0][0].min() >= 0 and later[0][0].max() < drill.vocab_size


@pytest.mark.parametrize("settings", SETTINGS)
def test_held_out_is_fixed_and_not_a_training_batch(settings):
    drill = Drill.from_dict(settings)
    tokens, _ = drill.held_out(64)
    assert np.array_equal(tokens, Drill.from_dict(settings).held_out(64)[0])
    train = {tuple(row) for s in range(200) for row in drill.batch(s, 64)[0]}
    assert not any(tuple(row) in train for row in tokens)


# ----------------------------------------------------------------------------- answers recoverable


def brute_force_answer(tokens: list[int], t: int, key_len: int) -> set[int]:
    """Every token that follows an earlier occurrence of the last ``key_len`` tokens up to ``t``:
    a lookup by exhaustive search, written apart from the generator."""
    key = tokens[t - key_len + 1 : t + 1]
    return {tokens[i + key_len] for i in range(0, t - key_len + 1) if tokens[i : i + key_len] == key}


KEY_LEN = {"recall": 1, "noisy_recall": 2, "induction": 1}


@pytest.mark.parametrize("settings", SETTINGS)
def test_every_answer_is_the_unique_continuation_of_its_key_in_the_context(settings):
    drill = Drill.from_dict(settings)
    tokens, mask = drill.batch(11, 48)
    for row, m in zip(tokens.tolist(), mask):
        for t in answer_targets(m):
            assert brute_force_answer(row, t, KEY_LEN[settings["kind"]]) == {row[t + 1]}


def test_noisy_recall_first_token_alone_leaves_as_many_candidates_as_the_look_alike_group():
    drill = Drill.from_dict(SMALL["noisy_recall"])
    tokens, mask = drill.held_out(48)
    context_end = drill.cfg.n_pairs * (3 + drill.cfg.filler_len)
    for row, m in zip(tokens.tolist(), mask):
        for t in answer_targets(m):
            first = row[t - 1]
            seconds = {row[i + 1] for i in range(0, context_end, 3 + drill.cfg.filler_len) if row[i] == first}
            assert len(seconds) == drill.cfg.lookalikes + 1


# ----------------------------------------------------------------------------- loss mask


def value_places(drill: Drill, words: list[str]) -> list[int]:
    """Positions of the values in a rendered sequence, from the layout alone: every word after
    the separator (and, before it, after the padding) that ends a pair (``k v`` or ``p s v ~..``)."""
    sep = words.index("|")
    start = next(i for i, w in enumerate(words) if w != "_")
    if drill.cfg.kind == "recall":
        return list(range(start + 1, sep, 2)) + list(range(sep + 2, len(words), 2))
    block = 3 + drill.cfg.filler_len
    return list(range(start + 2, sep, block)) + list(range(sep + 3, len(words), 3))


def recall_answers_by_layout(drill: Drill, row: list[int]) -> set[int]:
    """Answer targets found from the rendering alone: the query values after the separator."""
    words = drill.describe(np.asarray(row)).split()
    sep = words.index("|")
    return {p - 1 for p in value_places(drill, words) if p > sep}


def check_induction_mask(row: list[int], targets: list[int], m: int) -> None:
    """The masked targets are the continuation of a second copy of an m-span: m - 1 consecutive
    targets after the repeat's first token, over m distinct symbols that each occur exactly twice,
    first as the same span earlier in the window."""
    t0 = targets[0]
    assert targets == list(range(t0, t0 + m - 1))
    block = row[t0 : t0 + m]
    assert len(set(block)) == m and all(row.count(x) == 2 for x in block)
    i0 = row.index(block[0])
    assert i0 + m <= t0 and row[i0 : i0 + m] == block


@pytest.mark.parametrize("settings", SETTINGS)
def test_the_loss_mask_covers_exactly_the_answer_positions(settings):
    drill = Drill.from_dict(settings)
    tokens, mask = drill.batch(2, 32)
    for row, m in zip(tokens.tolist(), mask):
        if drill.cfg.kind == "induction":
            check_induction_mask(row, answer_targets(m), drill.cfg.span_len)
        else:
            assert set(answer_targets(m)) == recall_answers_by_layout(drill, row)
    everything = Drill.from_dict({**settings, "loss_on": "all"})
    all_tokens, all_mask = everything.batch(2, 32)
    assert np.array_equal(all_tokens, tokens)
    for row, m in zip(all_tokens, all_mask):  # every target but the padding of a shorter sequence
        assert m.tolist() == [w != "_" for w in drill.describe(row).split()[1:]]
    _, held_mask = everything.held_out(16)  # held-out accuracy is on answers, whatever the loss
    assert np.array_equal(held_mask, drill.held_out(16)[1])
    assert expected_answers(drill) * 16 == held_mask.sum()


def expected_answers(drill: Drill) -> int:
    return drill.cfg.span_len - 1 if drill.cfg.kind == "induction" else drill.cfg.n_queries


# ----------------------------------------------------------------------------- copy levels


def closed_form(cfg: DrillConfig) -> float:
    """Best query-blind accuracy: 1/n per replacement query; 1/(n - j) for the j-th query of a
    permutation (elimination of values asked before); H_{m-1}/(m-1) for induction (by hand);
    noisy_recall: the first-token reader, by enumeration (``first_token_enumerated``)."""
    if cfg.kind == "induction":
        return harmonic(cfg.span_len - 1) / (cfg.span_len - 1)
    if cfg.kind == "noisy_recall":
        return first_token_enumerated(cfg.n_pairs, cfg.n_queries, cfg.lookalikes + 1, cfg.query_sampling)
    n, q = cfg.n_pairs, cfg.n_queries
    if cfg.query_sampling == "replacement":
        return 1.0 / n
    return sum(1.0 / (n - j % n) for j in range(q)) / q


def first_token_enumerated(n: int, q: int, g: int, sampling: str) -> float:
    """The first-token reader's mean score over every equally likely query order, enumerated (no
    formula): keys 0..n-1 in groups of g; a query scores 1/(g - r), r its group's keys asked earlier
    in the round (a round is the whole order under permutation, n queries under cycles)."""
    if sampling == "replacement":
        return 1.0 / g
    rounds = [(q // n) * [n] + ([q % n] if q % n else []), [q]][sampling == "permutation"]
    total = 0.0
    for length in rounds:
        orders = list(itertools.permutations(range(n), length))
        scores = [1 / (g - sum(k // g == key // g for k in o[:j])) for o in orders for j, key in enumerate(o)]
        total += math.fsum(scores) / len(orders)
    return total / q


def test_in_the_lookalike_setting_a_second_token_reader_scores_the_first_token_level():
    # 2 first x 2 second tokens: each second token is shared by two keys, as each first token is,
    # so the reader of either token alone sits at the copy level (DRILLS.md "Copy levels").
    drill = Drill.from_dict(LOOKALIKE)
    tokens, mask = drill.held_out(1500)
    rng = np.random.default_rng(5)
    hits = []
    for row, m in zip(tokens.tolist(), mask):
        words = drill.describe(np.asarray(row)).split()
        places = [p for p in value_places(drill, words) if p < words.index("|")]
        asked = []
        for t in answer_targets(m):
            pool = [row[p] for p in places if row[p - 1] == row[t] and row[p] not in asked]
            hits.append(pool[rng.integers(len(pool))] == row[t + 1])
            asked.append(row[t + 1])
    se = math.sqrt(drill.copy_level * (1 - drill.copy_level) / len(hits))  # binomial standard error
    assert abs(np.mean(hits) - drill.copy_level) < 3 * se, (np.mean(hits), drill.copy_level)


def test_first_token_level_by_hand():
    # g = 2, every key asked once: the first of a group scores 1/2, the second 1 -> 3/4 (= H_2 / 2).
    assert Drill.from_dict(LOOKALIKE).copy_level == pytest.approx(0.75, abs=1e-12)
    # 4 pairs in groups of 2, 2 permuted queries: the second query is in the first one's group with
    # probability 1/3 (one of the 3 other keys), so (1/2 + (1/3 * 1 + 2/3 * 1/2)) / 2 = 7/12.
    two = Drill.from_dict({**LOOKALIKE, "n_queries": 2})
    assert two.copy_level == pytest.approx(7 / 12, abs=1e-12)
    # it is never below the blind guesser's level (knowing the group only helps)
    for g, n in ((2, 8), (3, 6), (4, 8)):
        assert group_level(n, n, g, "permutation") >= elimination_level(n, n, "permutation")


def test_closed_forms_match_the_harmonic_numbers():
    # H_n / n for the elimination guesser over a full permutation (a sum by hand: H_8 = 761/280).
    full = Drill.from_dict({"kind": "recall", "n_pairs": 8, "n_queries": 8})
    assert full.copy_level == pytest.approx(761 / 280 / 8, abs=1e-12)
    assert Drill.from_dict({"kind": "recall", "query_sampling": "replacement"}).copy_level == pytest.approx(
        1 / 8
    )
    assert Drill.from_dict({"kind": "induction", "span_len": 5}).copy_level == pytest.approx(
        (1 + 1 / 2 + 1 / 3 + 1 / 4) / 4
    )
    cycles = Drill.from_dict({"kind": "recall", "n_pairs": 4, "n_queries": 6, "query_sampling": "cycles"})
    assert cycles.copy_level == pytest.approx((1 / 4 + 1 / 3 + 1 / 2 + 1 + 1 / 4 + 1 / 3) / 6)


def blind_guesses(drill: Drill, tokens: np.ndarray, mask: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """A query-blind guesser: at each answer it picks uniformly among the candidate values without
    reading the query key. Candidates: recall, the context's values minus (permutation/cycles) those
    already answered in the current round; noisy_recall, the same among the pairs that share the
    query's first token (it reads that one, not the second); induction, the span's tokens the repeat
    has not shown."""
    cfg = drill.cfg
    pred = np.full(mask.shape, -1, dtype=np.int64)
    for b, (row, m) in enumerate(zip(tokens.tolist(), mask)):
        targets = answer_targets(m)
        if cfg.kind == "induction":
            start = targets[0]
            span = row[start : start + cfg.span_len]
            pools = [[v for v in span if v not in row[start : t + 1]] for t in targets]
        else:
            words = drill.describe(np.asarray(row)).split()
            places = [p for p in value_places(drill, words) if p < words.index("|")]
            pools = []
            for j, t in enumerate(targets):
                # noisy_recall: read the query's first token (tokens[t - 1]), keep its group's values
                reads = cfg.kind == "noisy_recall"
                values = [row[p] for p in places if not reads or row[p - 2] == row[t - 1]]
                round_start = 0 if cfg.query_sampling == "permutation" else j - j % len(places)
                asked = (
                    []
                    if cfg.query_sampling == "replacement"
                    else [row[targets[i] + 1] for i in range(round_start, j)]
                )
                pools.append([v for v in values if v not in asked])
        for t, pool in zip(targets, pools):
            pred[b, t] = pool[rng.integers(len(pool))]
    return pred


@pytest.mark.parametrize("settings", SETTINGS)
def test_copy_level_matches_the_closed_form_and_a_simulated_blind_guesser(settings):
    drill = Drill.from_dict(settings)
    assert drill.copy_level == pytest.approx(closed_form(drill.cfg), abs=1e-12)
    tokens, mask = drill.held_out(1500)
    acc = accuracy(blind_guesses(drill, tokens, mask, np.random.default_rng(0)), tokens, mask)
    n = int(mask.sum())
    se = math.sqrt(drill.copy_level * (1 - drill.copy_level) / n)  # binomial standard error
    assert abs(acc - drill.copy_level) < 3 * se, (acc, drill.copy_level, se)


# ----------------------------------------------------------------------------- mixed pair counts


def pairs_in(drill: Drill, row) -> int:
    """Pairs in a rendered sequence: the values before the separator."""
    words = drill.describe(np.asarray(row)).split()
    return sum(p < words.index("|") for p in value_places(drill, words))


def training_closed_form(cfg: DrillConfig) -> float:
    """Copy level of training sequences whose pair count m is uniform over min_pairs..n_pairs (in
    steps of the look-alike group): the m-pair closed form weighted by the answers a sequence holds
    (q, at most m under permutation)."""
    step = cfg.lookalikes + 1 if cfg.kind == "noisy_recall" else 1
    levels, answers = [], []
    for m in range(cfg.min_pairs, cfg.n_pairs + 1, step):
        q = min(cfg.n_queries, m) if cfg.query_sampling == "permutation" else cfg.n_queries
        levels.append(closed_form(replace(cfg, n_pairs=m, n_queries=q, min_pairs=None)))
        answers.append(q)
    return float(np.dot(levels, answers) / sum(answers))


def test_training_copy_level_of_one_to_eight_pairs_by_hand():
    # m pairs, m permuted queries: the blind guesser scores H_m / m on each of m answers, so the level
    # is sum_m H_m / sum_m m = ((n + 1) H_n - n) / (n (n + 1) / 2) for m = 1..n (sum of harmonic
    # numbers: Graham, Knuth & Patashnik, Concrete Mathematics, eq. 2.36, from memory); n = 8, H_8 = 761/280.
    drill = Drill.from_dict({"kind": "recall", "n_pairs": 8, "n_queries": 8, "min_pairs": 1})
    assert drill.training_copy_level == pytest.approx((9 * 761 / 280 - 8) / 36, abs=1e-12)
    assert drill.copy_level == pytest.approx(761 / 280 / 8, abs=1e-12)  # held out: always 8 pairs


@pytest.mark.parametrize("settings", MIXED)
def test_training_copy_level_matches_the_closed_form_and_a_simulated_blind_guesser(settings):
    drill = Drill.from_dict(settings)
    level = training_closed_form(drill.cfg)
    assert drill.training_copy_level == pytest.approx(level, abs=1e-12)
    batches = [drill.batch(s, 100) for s in range(15)]
    tokens, mask = np.concatenate([b[0] for b in batches]), np.concatenate([b[1] for b in batches])
    acc = accuracy(blind_guesses(drill, tokens, mask, np.random.default_rng(2)), tokens, mask)
    se = math.sqrt(level * (1 - level) / mask.sum())  # binomial standard error
    assert abs(acc - level) < 3 * se, (acc, level, se)


@pytest.mark.parametrize("settings", MIXED)
def test_pair_counts_are_uniform_over_the_allowed_counts_and_held_out_holds_all(settings):
    drill = Drill.from_dict(settings)
    cfg = drill.cfg
    allowed = list(
        range(cfg.min_pairs, cfg.n_pairs + 1, cfg.lookalikes + 1 if cfg.kind == "noisy_recall" else 1)
    )
    counts = [pairs_in(drill, row) for s in range(20) for row in drill.batch(s, 100)[0]]
    assert sorted(set(counts)) == allowed
    p = 1 / len(allowed)
    for m in allowed:  # each count's frequency within 4 binomial standard errors of uniform
        assert abs(counts.count(m) / len(counts) - p) < 4 * math.sqrt(p * (1 - p) / len(counts))
    assert {pairs_in(drill, row) for row in drill.held_out(64)[0]} == {cfg.n_pairs}


@pytest.mark.parametrize("settings", MIXED)
def test_a_shorter_sequence_is_padded_in_front_and_otherwise_a_whole_sequence(settings):
    drill = Drill.from_dict(settings)
    full = Drill.from_dict({**settings, "min_pairs": None})
    assert drill.vocab_size == full.vocab_size + 1 and drill.length == full.length
    tokens, mask = drill.batch(5, 64)
    for row, m in zip(tokens, mask):
        words = drill.describe(row).split()
        pads = next(i for i, w in enumerate(words) if w != "_")
        assert "_" not in words[pads:]  # padding only in front
        n = pairs_in(drill, row)
        q = min(drill.cfg.n_queries, n) if drill.cfg.query_sampling == "permutation" else drill.cfg.n_queries
        key_len = KEY_LEN[drill.cfg.kind]
        block = 2 if key_len == 1 else 3 + drill.cfg.filler_len
        assert len(words) - pads == n * block + 1 + (key_len + 1) * q  # pairs, separator, queries
        assert m.sum() == q and not m[:pads].any()
    # the held-out set is the fixed drill's: same sequences, no padding
    assert np.array_equal(drill.held_out(32)[0], full.held_out(32)[0])


def test_shared_pools_draw_keys_and_values_as_distinct_symbols_of_one_pool():
    drill = Drill.from_dict({**SMALL["recall"], "pools": "shared"})
    assert drill.vocab_size == SMALL["recall"]["n_keys"] + 1  # the pool and the separator
    tokens, _ = drill.batch(0, 200)
    as_key, as_value = set(), set()
    for row in tokens.tolist():
        words = drill.describe(np.asarray(row)).split()
        values = [row[p] for p in value_places(drill, words) if p < words.index("|")]
        keys = [row[p - 1] for p in value_places(drill, words) if p < words.index("|")]
        assert len(set(keys) | set(values)) == 2 * drill.cfg.n_pairs  # 2n distinct symbols
        as_key |= set(keys)
        as_value |= set(values)
    assert as_key == as_value == set(range(SMALL["recall"]["n_keys"]))  # every symbol plays both roles


def test_min_pairs_equal_to_n_pairs_gives_the_fixed_drill():
    fixed = Drill.from_dict({"kind": "recall"})
    same = Drill.from_dict({"kind": "recall", "min_pairs": 8})
    assert same.vocab_size == fixed.vocab_size and same.training_copy_level == fixed.copy_level
    for a, b in zip(fixed.batch(3, 32), same.batch(3, 32)):
        assert np.array_equal(a, b)


# ----------------------------------------------------------------------------- hand-built lookup model


def lookup_logits(tokens: torch.Tensor, vocab: int, key_len: int, beta: float = 30.0) -> torch.Tensor:
    """One attention head set by hand on one-hot embeddings: the query at t is the one-hot of its
    last ``key_len`` tokens, the key at s the one-hot of the ``key_len`` tokens before s, the value at
    s the one-hot of token s; causal softmax of ``beta * q.k`` over s <= t; logits = ``beta *`` output.
    An exact key match scores key_len, a look-alike key_len - 1, so with beta = 30 the match wins."""
    onehot = torch.nn.functional.one_hot(tokens, vocab).float()  # [B, T, V]
    b, t, _ = onehot.shape
    q = torch.zeros(b, t, key_len * vocab)
    k = torch.zeros(b, t, key_len * vocab)
    for lag in range(key_len):
        q[:, lag:, lag * vocab : (lag + 1) * vocab] = onehot[:, : t - lag]
        k[:, lag + 1 :, lag * vocab : (lag + 1) * vocab] = onehot[:, : t - lag - 1]
    scores = beta * q @ k.transpose(1, 2)
    scores = scores.masked_fill(~torch.ones(t, t, dtype=torch.bool).tril(), float("-inf"))
    return beta * scores.softmax(-1) @ onehot


@pytest.mark.parametrize("settings", SETTINGS)
def test_a_hand_built_lookup_head_scores_one_and_a_blind_guesser_its_copy_level(settings):
    drill = Drill.from_dict(settings)
    tokens, mask = drill.held_out(256)
    logits = lookup_logits(torch.as_tensor(tokens[:, :-1]), drill.vocab_size, KEY_LEN[settings["kind"]])
    assert accuracy(logits.argmax(-1).numpy(), tokens, mask) == 1.0
    guess = blind_guesses(drill, tokens, mask, np.random.default_rng(1))
    se = math.sqrt(drill.copy_level * (1 - drill.copy_level) / mask.sum())
    assert abs(accuracy(guess, tokens, mask) - drill.copy_level) < 3 * se


def test_accuracy_counts_masked_targets_only():
    tokens = np.array([[1, 2, 3, 4]])
    pred = np.array([[2, 9, 4]])  # right at target 0 and 2, wrong at 1
    assert accuracy(pred, tokens, np.array([[True, True, True]])) == pytest.approx(2 / 3)
    assert accuracy(pred, tokens, np.array([[False, True, False]])) == 0.0
    with pytest.raises(ValueError, match="selects no position"):
        accuracy(pred, tokens, np.zeros((1, 3), dtype=bool))
    with pytest.raises(ValueError, match=r"\[B, T\]"):
        accuracy(pred[:, :2], tokens, np.ones((1, 2), dtype=bool))


# ----------------------------------------------------------------------------- items


@pytest.mark.parametrize("settings", SETTINGS)
def test_items_are_the_held_out_sequences_with_their_spans(settings):
    drill = Drill.from_dict(settings)
    tokens, mask = drill.held_out(20)
    items = drill.items(20)
    kind, lookalikes = settings["kind"], drill.cfg.lookalikes
    for row, m, item in zip(tokens.tolist(), mask, items):
        assert item["tokens"] == row and item["answer_positions"] == answer_targets(m)
        for t, spans in zip(item["answer_positions"], item["spans"]):
            s, e = spans["pair"]
            assert e <= t and row[e - 1] == row[t + 1]  # the pair ends with the answer, before the query
            assert row[s : s + KEY_LEN[kind]] == row[t - KEY_LEN[kind] + 1 : t + 1]
            if kind == "noisy_recall":
                assert len(spans["lookalike"]) == lookalikes
                assert all(row[ls] == row[s] and row[ls + 1] != row[s + 1] for ls, _ in spans["lookalike"])
                words = drill.describe(np.asarray(row)).split()
                assert all(w.startswith("~") for fs, fe in spans["filler"] for w in words[fs:fe])
            else:
                assert spans["lookalike"] == []


def test_describe_renders_one_word_per_token():
    drill = Drill.from_dict(SMALL["noisy_recall"])
    row = drill.batch(0, 1)[0][0]
    words = drill.describe(row).split()
    assert len(words) == drill.length and words.count("|") == 1
    with pytest.raises(ValueError, match="one sequence"):
        drill.describe(row[:-1])


# ----------------------------------------------------------------------------- refusals


@pytest.mark.parametrize(
    "overrides, key",
    [
        ({"kind": "recal"}, "kind"),
        ({"kind": "recall", "loss_on": "queries"}, "loss_on"),
        ({"kind": "recall", "query_sampling": "random"}, "query_sampling"),
        ({"kind": "recall", "seed": -1}, "seed"),
        ({"kind": "recall", "n_pairs": 0}, "n_pairs"),
        ({"kind": "recall", "n_pairs": 2.5}, "n_pairs"),
        ({"kind": "recall", "n_pairs": True}, "n_pairs"),
        ({"kind": "recall", "n_keys": 4}, "n_keys"),
        ({"kind": "recall", "n_values": 4}, "n_values"),
        ({"kind": "recall", "n_queries": 9}, "n_queries"),
        ({"kind": "recall", "min_pairs": 0}, "min_pairs"),
        ({"kind": "recall", "pools": "mixed"}, "pools"),
        ({"kind": "recall", "pools": "shared", "n_keys": 15}, "n_keys"),
        ({"kind": "recall", "min_pairs": 9}, "min_pairs"),
        ({"kind": "noisy_recall", "min_pairs": 3}, "min_pairs"),
        ({"kind": "noisy_recall", "lookalikes": 2}, "lookalikes"),
        ({"kind": "noisy_recall", "filler_len": -1}, "filler_len"),
        ({"kind": "noisy_recall", "n_suffixes": 1}, "n_suffixes"),
        ({"kind": "noisy_recall", "lookalikes": 0}, "lookalikes"),
        ({"kind": "noisy_recall", "lookalikes": 1, "n_keys": 3}, "n_keys"),
        ({"kind": "induction", "span_len": 1}, "span_len"),
        ({"kind": "induction", "span_len": 40}, "window"),
        ({"kind": "induction", "n_symbols": 8}, "n_symbols"),
        ({"kind": "recall", "colour": 3}, "colour"),
        ({"n_pairs": 3}, "kind"),
    ],
)
def test_bad_values_are_refused_in_one_line_naming_the_key(overrides, key):
    with pytest.raises(ValueError) as err:
        Drill.from_dict(overrides)
    message = str(err.value)
    assert message.startswith(f"data.{key}") and "\n" not in message and "allowed:" in message


def test_a_batch_of_64_is_generated_in_a_few_milliseconds():
    # Loose ceiling (the machine is shared): the trainer calls this every step.
    for kind in DRILL_KINDS:
        drill = Drill.from_dict({"kind": kind})
        drill.batch(0, 64)
        t0 = time.perf_counter()
        for step in range(50):
            drill.batch(step, 64)
        assert (time.perf_counter() - t0) / 50 < 5e-3


# ----------------------------------------------------------------------------- config files


@pytest.mark.parametrize("kind", DRILL_KINDS)
def test_each_config_file_lists_its_kinds_fields_and_builds(kind):
    from dataclasses import fields
    from pathlib import Path

    from omegaconf import OmegaConf

    from ablate.config import compose

    path = Path(__file__).resolve().parents[1] / "conf" / "data" / f"{kind}.yaml"
    raw = OmegaConf.to_container(OmegaConf.load(path))
    assert raw.pop("defaults") == ["drill_schema", "_self_"]
    order = [f.name for f in fields(DrillConfig)]
    assert raw["kind"] == kind and set(raw) <= set(order)
    assert list(raw) == [name for name in order if name in raw]  # in the schema's order
    unused = {
        "induction": {"n_pairs", "n_queries", "lookalikes", "filler_len"},
        "recall": {"span_len", "filler_len"},
    }
    assert not unused.get(kind, {"span_len", "window"}) & set(raw)  # another kind's keys are not listed
    d = OmegaConf.to_container(compose([f"data={kind}", "seed=3"]).data, resolve=True)
    assert list(d) == order  # the schema fills every other key with its default
    assert d["seed"] == 3  # the drill follows the run's seed
    drill = Drill.from_dict(d)
    assert drill.length <= 65  # fits conf/model/drill.yaml (seq_len 64 = T)
