"""Recall drills: symbolic, answer-supervised sequences generated per training step.

Three kinds, each with its own vocabulary (no tokenizer) and a fixed sequence length:

- ``recall``: associative recall, many-query form (Ba et al., 2016): ``n_pairs`` pairs ``k v``
  (distinct keys, distinct values), a separator, then ``n_queries`` queries ``k v`` about context
  keys; the query value is the answer.
- ``noisy_recall``: the same with two-token keys ``p s`` (groups of ``lookalikes + 1`` keys share
  their first token ``p``), ``filler_len`` filler tokens after every pair (so before the queries
  too), and queries ``p s v``.
- ``induction``: induction copy (Olsson et al., 2022): a window of random symbols in which a span
  of ``span_len`` distinct symbols (that occur nowhere else) appears at a random offset and again
  later; every continuation token of the repeat (its tokens 2..span_len) is an answer.

A training batch for step ``s`` is a pure function of ``(seed, s)``: ``default_rng([seed, s])``.
The held-out set draws from ``SeedSequence(seed, spawn_key=(1,))``, a stream that no
``[seed, step]`` entropy reproduces (its assembled entropy has five words, training's two).

Copy level = exact accuracy of the best guesser that does not read the query (for noisy_recall: that
does not read the query's second token, below):

- query sampling ``replacement``: the answer is uniform over the n distinct context values, so 1/n;
- ``permutation`` (queries ask distinct keys): the guesser eliminates values already asked, so query
  j (from 0) scores 1/(n - j); mean over the q queries: (1/q) sum_{j<q} 1/(n - j) (= H_n / n for q = n);
- ``cycles`` (back-to-back permutations of the n keys): query j scores 1/(n - (j mod n)); mean over q;
- noisy_recall: a guesser that reads the query's first token knows its look-alike group of g =
  lookalikes + 1 keys, and scores 1/(g - r) with r the group's keys already asked (permutation,
  cycles), 1/g under replacement; r is hypergeometric, so the level has a closed form
  (``group_level``). It is at least the blind level (knowing the group only helps), and it is
  the level to beat: above it, the answer depends on the second token, the one that tells a key
  from its look-alikes. A reader of the second token alone does as well only where second tokens
  repeat across groups as often as first tokens repeat inside them (the look-alike recipe's setting,
  2 first x 2 second tokens, is that symmetric case); with many second-token symbols it does better,
  and that level is not computed.
- induction: a guesser that knows which symbols form the span and which the repeat has already
  shown, but not their order, scores 1/(m - j) on continuation j = 1..m-1: H_{m-1} / (m - 1).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields
from typing import Any

import numpy as np

DRILL_KINDS = ("recall", "noisy_recall", "induction")
QUERY_SAMPLINGS = ("permutation", "replacement", "cycles")
POOLS = ("separate", "shared")
LOSS_ON = ("answers", "all")
HELD_OUT_SPAWN_KEY = 1


@dataclass
class DrillConfig:
    kind: str
    seed: int = 0
    loss_on: str = "answers"  # "answers": loss on answer positions only; "all": every target
    n_pairs: int = 8  # recall, noisy_recall: key/value pairs in the context
    n_keys: int = 16  # recall: key symbols; noisy_recall: first-token symbols
    n_values: int = 16  # recall, noisy_recall: value symbols
    pools: str = "separate"  # recall: "separate" key and value symbols, or one "shared" pool of n_keys
    n_queries: int = 8  # recall, noisy_recall: queries after the separator
    min_pairs: int | None = None  # recall, noisy_recall: training sequences hold min_pairs..n_pairs pairs
    query_sampling: str = "permutation"  # permutation | replacement | cycles
    filler_len: int = 2  # noisy_recall: filler tokens after every pair
    n_filler: int = 16  # noisy_recall: filler symbols
    lookalikes: int = 1  # noisy_recall: other context keys sharing each key's first token
    n_suffixes: int = 16  # noisy_recall: second-token symbols
    span_len: int = 8  # induction: tokens in the repeated span
    window: int = 32  # induction: tokens per sequence (T + 1)
    n_symbols: int = 16  # induction: vocabulary

    def check(self) -> None:
        """Raises ``ValueError`` with one line naming ``data.<key>`` and what is allowed."""
        _check_choice("kind", self.kind, DRILL_KINDS)
        _check_choice("loss_on", self.loss_on, LOSS_ON)
        _check_choice("query_sampling", self.query_sampling, QUERY_SAMPLINGS)
        _check_choice("pools", self.pools, POOLS)
        _check_int("seed", self.seed, 0)
        for name in (
            "n_pairs",
            "n_keys",
            "n_values",
            "n_queries",
            "n_filler",
            "n_suffixes",
            "span_len",
            "window",
            "n_symbols",
        ):
            _check_int(name, getattr(self, name), 1)
        _check_int("filler_len", self.filler_len, 0)
        if self.min_pairs is not None:
            _check_int("min_pairs", self.min_pairs, 1)
        _check_int("lookalikes", self.lookalikes, 0)
        if self.kind in ("recall", "noisy_recall"):
            self._check_recall()
        if self.kind == "noisy_recall":
            self._check_noisy()
        if self.kind == "induction":
            self._check_induction()

    def _check_recall(self) -> None:
        n = self.n_pairs
        _check_int("n_values", self.n_values, n, f"data.n_pairs={n} (values are distinct)")
        if self.kind == "recall" and self.pools == "shared":
            _check_int("n_keys", self.n_keys, 2 * n, f"2 * data.n_pairs={2 * n} (keys and values distinct)")
        elif self.kind == "recall":
            _check_int("n_keys", self.n_keys, n, f"data.n_pairs={n} (keys are distinct)")
        if self.min_pairs is not None and self.min_pairs > n:
            raise ValueError(
                f"data.min_pairs={self.min_pairs}: must be <= data.n_pairs={n}; allowed: null (every "
                f"sequence holds n_pairs) or 1..{n}"
            )
        if self.query_sampling == "permutation" and self.n_queries > n:
            raise ValueError(
                f"data.n_queries={self.n_queries}: must be <= data.n_pairs={n} under "
                f"query_sampling=permutation; allowed: 1..{n} (or query_sampling=cycles)"
            )

    def _check_noisy(self) -> None:
        _check_int("lookalikes", self.lookalikes, 1, "one look-alike (else the first token finds the key)")
        g = self.lookalikes + 1
        n = self.n_pairs
        if n % g:
            raise ValueError(
                f"data.lookalikes={self.lookalikes}: lookalikes + 1 must divide data.n_pairs="
                f"{self.n_pairs}; allowed: {[d - 1 for d in range(1, n + 1) if n % d == 0]}"
            )
        if self.min_pairs is not None and self.min_pairs % g:
            raise ValueError(
                f"data.min_pairs={self.min_pairs}: lookalikes + 1 = {g} must divide it (whole groups); "
                f"allowed: null or {', '.join(str(k) for k in range(g, n + 1, g))}"
            )
        _check_int(
            "n_keys",
            self.n_keys,
            self.n_pairs // g,
            f"the {self.n_pairs // g} key groups (distinct first tokens)",
        )
        _check_int(
            "n_suffixes", self.n_suffixes, g, f"lookalikes + 1 = {g} (distinct second tokens in a group)"
        )

    def _check_induction(self) -> None:
        m = self.span_len
        _check_int("span_len", m, 2, "2 (one continuation token at least)")
        _check_int("window", self.window, 2 * m, f"2 * data.span_len = {2 * m} (two copies fit)")
        _check_int("n_symbols", self.n_symbols, m + 1, f"data.span_len + 1 = {m + 1} (noise needs a symbol)")


def _check_choice(name: str, value, allowed: tuple[str, ...]) -> None:
    if value not in allowed:
        raise ValueError(
            f"data.{name}={value!r}: must be one of the named choices; allowed: {', '.join(allowed)}"
        )


def _check_int(name: str, value, low: int, why: str | None = None) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        reason = f"must be an integer >= {low}" + (f", at least {why}" if why else "")
        raise ValueError(f"data.{name}={value!r}: {reason}; allowed: {low}, {low + 1}, ...")


# ----------------------------------------------------------------------------- sampling helpers


def distinct(rng: np.random.Generator, shape: tuple[int, ...], pool: int, k: int) -> np.ndarray:
    """``k`` distinct ids from ``range(pool)`` per row of ``shape``: ``[*shape, k]`` (random order)."""
    return rng.random((*shape, pool)).argsort(axis=-1)[..., :k]


def query_order(rng: np.random.Generator, batch: int, n: int, q: int, sampling: str) -> np.ndarray:
    """Indices ``[batch, q]`` of the context pairs the queries ask about."""
    if sampling == "replacement":
        return rng.integers(0, n, size=(batch, q))
    rounds = 1 if sampling == "permutation" else -(-q // n)
    return rng.random((batch, rounds, n)).argsort(axis=-1).reshape(batch, rounds * n)[:, :q]


def elimination_level(n: int, q: int, sampling: str) -> float:
    """Copy level of the query-blind guesser (module docstring): the group reader whose group is
    every key, so query j scores 1/(n - j) (``group_level`` with g = n)."""
    return group_level(n, q, n, sampling)


def group_level(n: int, q: int, g: int, sampling: str) -> float:
    """Copy level of a guesser that knows the query's group of ``g`` keys but not which of them it
    asks (noisy_recall: it reads the query's first token, not its second; module docstring): under
    replacement 1/g; under permutation query j scores 1/(g - r), r the earlier queries in its group,
    hypergeometric over the j earlier keys drawn from the other n - 1 (g - 1 of them in the group);
    cycles restart that count every n."""
    if sampling == "replacement":
        return 1.0 / g
    total = 0.0
    for j in range(q):
        j = j % n
        for r in range(min(j, g - 1) + 1):
            ways = math.comb(g - 1, r) * math.comb(n - g, j - r) / math.comb(n - 1, j)
            total += ways / (g - r)
    return total / q


def excluding(
    rng: np.random.Generator, shape: tuple[int, int], pool: int, excluded: np.ndarray
) -> np.ndarray:
    """Uniform ids from ``range(pool)`` minus each row's ``excluded`` ids: draw r in
    [0, pool - k) and step it past the excluded ids in ascending order."""
    x = rng.integers(0, pool - excluded.shape[1], size=shape)
    for col in np.sort(excluded, axis=1).T:
        x += x >= col[:, None]
    return x


# ----------------------------------------------------------------------------- the three kinds


def pair_counts(rng: np.random.Generator, batch: int, low: int, high: int, step: int) -> np.ndarray:
    """Pairs per sequence, uniform over ``low, low + step, ..., high`` (``[batch]``)."""
    return low + step * rng.integers(0, (high - low) // step + 1, size=batch)


def answer_targets(targets: np.ndarray) -> list[list[int]]:
    """Per row, the answer targets in order (``-1`` marks an unused query slot)."""
    return [[int(t) for t in row if t >= 0] for row in targets]


class _Pairs:
    """What recall and noisy_recall share: the layout length, the mixed pair counts of training
    sequences (``min_pairs``..``n_pairs``; the held-out set always holds ``n_pairs``), the padding
    symbol ``_`` that fills the front of a shorter sequence, and the copy levels."""

    key_len = 1
    step = 1  # pair counts move in whole look-alike groups

    def setup(self, cfg: DrillConfig, symbols: int, block: int) -> None:
        self.cfg = cfg
        self.n, self.q, self.block = cfg.n_pairs, cfg.n_queries, block
        self.low = self.n if cfg.min_pairs is None else cfg.min_pairs
        self.mixed = self.low < self.n
        self.sep = symbols
        self.pad = symbols + 1 if self.mixed else None
        self.vocab_size = symbols + 1 + int(self.mixed)
        self.length = self.used(self.n)
        self.copy_level = self.level(self.n, self.q)
        counts = range(self.low, self.n + 1, self.step)
        guessed = [self.queries(m) * self.level(m, self.queries(m)) for m in counts]
        self.training_copy_level = sum(guessed) / sum(self.queries(m) for m in counts)

    def level(self, m: int, q: int) -> float:
        """Copy level of a sequence with ``m`` pairs and ``q`` queries."""
        return elimination_level(m, q, self.cfg.query_sampling)

    def queries(self, m: int) -> int:
        """Queries of a sequence with ``m`` pairs: ``n_queries``, at most ``m`` under permutation."""
        return min(self.q, m) if self.cfg.query_sampling == "permutation" else self.q

    def used(self, m: int) -> int:
        """Tokens a sequence with ``m`` pairs fills (the rest of the fixed length is padding)."""
        return m * self.block + 1 + (self.key_len + 1) * self.queries(m)

    def counts(self, rng: np.random.Generator, batch: int, mixed: bool) -> np.ndarray:
        if not (mixed and self.mixed):
            return np.full(batch, self.n, dtype=np.int64)
        return pair_counts(rng, batch, self.low, self.n, self.step)

    def start(self, tokens: np.ndarray, rows: np.ndarray, m: int) -> int:
        """Offset of a sequence with ``m`` pairs; pads the front of ``tokens[rows]``."""
        start = self.length - self.used(m)
        if start:
            tokens[rows, :start] = self.pad
        return start

    def pad_name(self, tok: int) -> str | None:
        return {self.sep: "|", self.pad: "_"}.get(tok)


class _Recall(_Pairs):
    """``k1 v1 ... kn vn | k v k v ...``: keys ``[0, n_keys)``, values after them, the separator,
    then (when training sequences mix pair counts) the padding symbol."""

    def __init__(self, cfg: DrillConfig):
        self.shared = cfg.pools == "shared"
        self.value0 = 0 if self.shared else cfg.n_keys
        self.setup(cfg, cfg.n_keys if self.shared else cfg.n_keys + cfg.n_values, 2)

    def symbols(self, rng: np.random.Generator, batch: int) -> tuple[np.ndarray, np.ndarray]:
        """Keys and values ``[batch, n]``: distinct within each; with a shared pool, 2n distinct
        symbols of one pool (the first n are the keys)."""
        if self.shared:
            both = distinct(rng, (batch,), self.cfg.n_keys, 2 * self.n)
            return both[:, : self.n], both[:, self.n :]
        keys = distinct(rng, (batch,), self.cfg.n_keys, self.n)
        return keys, self.value0 + distinct(rng, (batch,), self.cfg.n_values, self.n)

    def generate(
        self, rng: np.random.Generator, batch: int, mixed: bool = True
    ) -> tuple[np.ndarray, np.ndarray, dict]:
        keys, values = self.symbols(rng, batch)
        counts = self.counts(rng, batch, mixed)
        tokens = np.empty((batch, self.length), dtype=np.int64)
        targets, order = np.full((2, batch, self.q), -1, dtype=np.int64)
        offset = np.zeros(batch, dtype=np.int64)
        for m in np.unique(counts):
            rows, qm = np.flatnonzero(counts == m), self.queries(m)
            o = query_order(rng, len(rows), m, qm, self.cfg.query_sampling)
            s = offset[rows] = self.start(tokens, rows, m)
            k, v = keys[rows, :m], values[rows, :m]
            tokens[rows[:, None], s + np.arange(0, 2 * m, 2)] = k
            tokens[rows[:, None], s + np.arange(1, 2 * m, 2)] = v
            tokens[rows, s + 2 * m] = self.sep
            asked = s + 2 * m + 1 + 2 * np.arange(qm)  # target t: tokens[t + 1] is a query value
            tokens[rows[:, None], asked] = np.take_along_axis(k, o, axis=1)
            tokens[rows[:, None], asked + 1] = np.take_along_axis(v, o, axis=1)
            targets[rows, :qm], order[rows, :qm] = asked, o
        return tokens, targets, {"order": order, "offset": offset}

    def spans(self, meta: dict, b: int, a: int) -> dict:
        j, s = int(meta["order"][b, a]), int(meta["offset"][b])
        return {"pair": [s + 2 * j, s + 2 * j + 2], "lookalike": [], "filler": []}

    def name(self, tok: int) -> str:
        special = self.pad_name(tok)
        if special:
            return special
        if self.shared:
            return f"t{tok}"
        return f"k{tok}" if tok < self.value0 else f"v{tok - self.value0}"


class _NoisyRecall(_Pairs):
    """``p s v ~ ~ ... | p s v ...``: first tokens, second tokens, values, filler, separator (and
    the padding symbol when training sequences mix pair counts, in whole look-alike groups)."""

    key_len = 2

    def __init__(self, cfg: DrillConfig):
        self.f = cfg.filler_len
        self.g = self.step = cfg.lookalikes + 1
        self.suffix0 = cfg.n_keys
        self.value0 = self.suffix0 + cfg.n_suffixes
        self.filler0 = self.value0 + cfg.n_values
        self.setup(cfg, self.filler0 + cfg.n_filler, 3 + cfg.filler_len)

    def level(self, m: int, q: int) -> float:
        """The first-token reader's level (``group_level`` with the look-alike group), not the
        blind guesser's."""
        return group_level(m, q, self.g, self.cfg.query_sampling)

    def keys(self, rng: np.random.Generator, batch: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """First tokens, second tokens and group ids ``[batch, n]``, pairs shuffled so look-alikes
        need not sit side by side."""
        n, g = self.n, self.g
        groups = n // g
        first = np.repeat(distinct(rng, (batch,), self.cfg.n_keys, groups), g, axis=1)
        second = self.suffix0 + distinct(rng, (batch, groups), self.cfg.n_suffixes, g).reshape(batch, n)
        group = np.repeat(np.arange(groups)[None, :], batch, axis=0).repeat(g, axis=1)
        shuffle = rng.random((batch, n)).argsort(axis=1)
        return tuple(np.take_along_axis(a, shuffle, axis=1) for a in (first, second, group))

    def generate(
        self, rng: np.random.Generator, batch: int, mixed: bool = True
    ) -> tuple[np.ndarray, np.ndarray, dict]:
        n = self.n
        first, second, group = self.keys(rng, batch)
        values = self.value0 + distinct(rng, (batch,), self.cfg.n_values, n)
        counts = self.counts(rng, batch, mixed)
        tokens = np.empty((batch, self.length), dtype=np.int64)
        targets, order = np.full((2, batch, self.q), -1, dtype=np.int64)
        kept, offset = np.full((batch, n), -1, dtype=np.int64), np.zeros(batch, dtype=np.int64)
        placed = []
        for m in np.unique(counts):
            rows, qm = np.flatnonzero(counts == m), self.queries(m)
            o = query_order(rng, len(rows), m, qm, self.cfg.query_sampling)
            keep = np.argsort(group[rows] >= m // self.g, axis=1, kind="stable")[:, :m]  # whole groups
            parts = [np.take_along_axis(a[rows], keep, axis=1) for a in (first, second, values, group)]
            kept[rows, :m] = parts[3]
            s = offset[rows] = self.start(tokens, rows, m)
            targets[rows, :qm], order[rows, :qm] = self.place(tokens, rows, s, parts[:3], o), o
            placed.append((rows, m, s))
        filler = self.filler0 + rng.integers(0, self.cfg.n_filler, size=(batch, n, self.f))
        for rows, m, s in placed:
            for i in range(m):
                cols = s + i * self.block + 3 + np.arange(self.f)
                tokens[rows[:, None], cols] = filler[rows, i]
        return tokens, targets, {"order": order, "group": kept, "offset": offset}

    def place(self, tokens: np.ndarray, rows: np.ndarray, s: int, parts: list, o: np.ndarray) -> np.ndarray:
        """Writes the pairs (filler comes later), the separator and the queries; returns the targets."""
        m, qm = parts[0].shape[1], o.shape[1]
        context = m * self.block
        asked = s + context + 1 + 3 * np.arange(qm)
        for k, part in enumerate(parts):
            tokens[rows[:, None], s + np.arange(m) * self.block + k] = part
            tokens[rows[:, None], asked + k] = np.take_along_axis(part, o, axis=1)
        tokens[rows, s + context] = self.sep
        return asked + 1  # target t: tokens[t + 1] is the query's value

    def spans(self, meta: dict, b: int, a: int) -> dict:
        j, s = int(meta["order"][b, a]), int(meta["offset"][b])
        groups = meta["group"][b]
        same = np.flatnonzero(groups == groups[j])
        m = int((groups >= 0).sum())
        filler = [[s + i * self.block + 3, s + (i + 1) * self.block] for i in range(m)] if self.f else []
        return {
            "pair": self._pair(s, j),
            "lookalike": [self._pair(s, i) for i in same if i != j],
            "filler": filler,
        }

    def _pair(self, s: int, i: int) -> list[int]:
        return [s + int(i) * self.block, s + int(i) * self.block + 3]

    def name(self, tok: int) -> str:
        special = self.pad_name(tok)
        if special:
            return special
        for start, label in ((self.filler0, "~"), (self.value0, "v"), (self.suffix0, "s"), (0, "k")):
            if tok >= start:
                return f"{label}{tok - start}"
        raise AssertionError(tok)


class _Induction:
    """A window of symbols with span S at offset a and again at offset b >= a + m."""

    def __init__(self, cfg: DrillConfig):
        self.cfg = cfg
        self.m, self.length, self.vocab_size = cfg.span_len, cfg.window, cfg.n_symbols
        self.copy_level = self.training_copy_level = float(
            np.mean([1.0 / (self.m - j) for j in range(1, self.m)])
        )

    def generate(
        self, rng: np.random.Generator, batch: int, mixed: bool = True
    ) -> tuple[np.ndarray, np.ndarray, dict]:
        m = self.m
        span = distinct(rng, (batch,), self.vocab_size, m)
        tokens = excluding(rng, (batch, self.length), self.vocab_size, span)
        u = np.sort(rng.integers(0, self.length - 2 * m + 1, size=(batch, 2)), axis=1)
        first, repeat = u[:, :1], u[:, 1:] + m  # two sorted uniform draws -> offsets a, b
        rows = np.arange(batch)[:, None]
        cols = np.arange(m)[None, :]
        tokens[rows, first + cols] = span
        tokens[rows, repeat + cols] = span
        targets = repeat + cols[:, :-1]  # target b + j - 1 predicts tokens[b + j], j = 1..m-1
        return tokens, targets, {"first": first[:, 0], "repeat": repeat[:, 0]}

    def spans(self, meta: dict, b: int, a: int) -> dict:
        first, repeat, m = int(meta["first"][b]), int(meta["repeat"][b]), self.m
        noise = [[s, e] for s, e in ((0, first), (first + m, repeat), (repeat + m, self.length)) if e > s]
        return {"pair": [first + a, first + a + 2], "lookalike": [], "filler": noise}

    def name(self, tok: int) -> str:
        return f"t{tok}"


_KINDS = {"recall": _Recall, "noisy_recall": _NoisyRecall, "induction": _Induction}


class Drill:
    """One drill: ``batch(step, batch_size)`` for training, ``held_out(n)`` / ``items(n)`` for
    evaluation, ``vocab_size``, ``length`` (T + 1) and ``copy_level``."""

    def __init__(self, cfg: DrillConfig):
        if not isinstance(cfg, DrillConfig):
            raise TypeError(f"Drill: expected a DrillConfig, got {type(cfg).__name__} (use Drill.from_dict)")
        cfg.check()
        self.cfg = cfg
        self._kind = _KINDS[cfg.kind](cfg)
        self.vocab_size: int = int(self._kind.vocab_size)
        self.length: int = int(self._kind.length)
        self.copy_level: float = float(self._kind.copy_level)
        self.training_copy_level: float = float(self._kind.training_copy_level)
        self._held_out: dict[int, tuple[np.ndarray, np.ndarray, dict]] = {}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Drill":
        known = {f.name for f in fields(DrillConfig)}
        unknown = sorted(set(d) - known)
        if unknown:
            raise ValueError(f"data.{unknown[0]}: unknown drill key; allowed: {', '.join(sorted(known))}")
        if "kind" not in d:
            raise ValueError(f"data.kind: missing; allowed: {', '.join(DRILL_KINDS)}")
        return cls(DrillConfig(**dict(d)))

    def config(self) -> dict[str, Any]:
        return asdict(self.cfg)

    def _mask(self, tokens: np.ndarray, targets: np.ndarray, loss_on: str) -> np.ndarray:
        """Answer targets (``-1`` marks an unused query slot of a shorter sequence) or, with
        ``all``, every target that is not the padding of a shorter sequence."""
        if loss_on == "all":
            pad = getattr(self._kind, "pad", None)
            return (
                np.ones((tokens.shape[0], self.length - 1), dtype=bool)
                if pad is None
                else tokens[:, 1:] != pad
            )
        mask = np.zeros((targets.shape[0], self.length - 1), dtype=bool)
        rows, slots = np.nonzero(targets >= 0)
        mask[rows, targets[rows, slots]] = True
        return mask

    def batch(self, step: int, batch_size: int) -> tuple[np.ndarray, np.ndarray]:
        """int64 tokens ``[B, T + 1]`` and bool mask ``[B, T]`` over target positions (tokens[:, 1:])."""
        _check_count("step", step, 0)
        _check_count("batch_size", batch_size, 1)
        tokens, targets, _ = self._kind.generate(
            np.random.default_rng([self.cfg.seed, int(step)]), int(batch_size)
        )
        return tokens, self._mask(tokens, targets, self.cfg.loss_on)

    def _held(self, n: int) -> tuple[np.ndarray, np.ndarray, dict]:
        _check_count("n", n, 1)
        if n not in self._held_out:
            seq = np.random.SeedSequence(self.cfg.seed, spawn_key=(HELD_OUT_SPAWN_KEY,))
            self._held_out[n] = self._kind.generate(np.random.default_rng(seq), int(n), mixed=False)
        return self._held_out[n]

    def held_out(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """A fixed evaluation set; the mask is always the answer positions."""
        tokens, targets, _ = self._held(n)
        return tokens.copy(), self._mask(tokens, targets, "answers")

    def items(self, n: int) -> list[dict]:
        """The held-out sequences as probe items (see the module docstring of ablate.probes.drill)."""
        tokens, targets, meta = self._held(n)
        out = []
        for b, t in enumerate(answer_targets(targets)):
            out.append(
                {
                    "tokens": tokens[b].tolist(),
                    "answer_positions": t,
                    "answer_spans": [[p + 1, p + 2] for p in t],
                    "spans": [self._kind.spans(meta, b, a) for a in range(len(t))],
                }
            )
        return out

    def describe(self, tokens) -> str:
        row = np.asarray(tokens)
        if row.ndim != 1 or len(row) != self.length:
            raise ValueError(
                f"describe: tokens must be one sequence of {self.length} ids, got shape {row.shape}"
            )
        return " ".join(self._kind.name(int(t)) for t in row)


def _check_count(name: str, value, low: int) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise ValueError(f"{name}={value!r}: must be an integer >= {low}")


def accuracy(predictions: np.ndarray, tokens: np.ndarray, mask: np.ndarray) -> float:
    """Share of masked target positions where ``predictions[b, t] == tokens[b, t + 1]``.

    ``predictions``: argmax at every input position ``[B, T]``; ``tokens``: ``[B, T + 1]``;
    ``mask``: bool ``[B, T]``.
    """
    predictions, tokens, mask = np.asarray(predictions), np.asarray(tokens), np.asarray(mask, dtype=bool)
    if (
        tokens.ndim != 2
        or predictions.shape != (tokens.shape[0], tokens.shape[1] - 1)
        or mask.shape != predictions.shape
    ):
        raise ValueError(
            f"accuracy: predictions {predictions.shape} and mask {mask.shape} must be [B, T] for tokens "
            f"{tokens.shape} = [B, T + 1]"
        )
    if not mask.any():
        raise ValueError("accuracy: the mask selects no position")
    return float((predictions == tokens[:, 1:])[mask].mean())
