"""Held-out probe sets, built directly in tokens so that every span is exact.

Each item is assembled from text segments that are encoded one by one; because pieces never
cross a space, the concatenated ids equal the encoding of the whole text (a test pins this).
Random streams are keyed ``probe-...`` and never meet the training stream ``train-...``.

Retrieval item: ``tokens``, ``answer_spans`` (the digits of each asked question, in order),
``asked_spans`` (the asked facts, same order), ``distractor_spans`` (unasked facts and near misses),
``meta``. Classification item: ``tokens``, ``answer_spans`` (each query's label), ``demo_label_spans``,
``meta``. Spans are ``[start, end)`` token indices; the model is scored by teacher forcing.
"""

from __future__ import annotations

import random
from typing import Callable, Mapping

from . import world as W
from .documents import ZipfPicker, draw_episode, draw_value, fact_text, order_demos, question_text
from .tokenizer import DOC_START_ID
from .world import World

Encode = Callable[[str], list[int]]


class TokenWriter:
    """Appends encoded segments to a token list (starting with ``<s>``) and returns their spans."""

    def __init__(self, encode: Encode):
        self.encode, self.tokens = encode, [DOC_START_ID]

    def add(self, text: str) -> list[int]:
        ids = self.encode(text)
        start = len(self.tokens)
        self.tokens += ids
        return [start, len(self.tokens)]


def _needle_keys(rng: random.Random, world: World, n_needles: int, n_asked: int, n_same: int, n_sibling: int):
    """Needles on isles of distinct look-alike pairs, and near-miss keys built from the asked ones."""
    pairs = rng.sample(range(len(world.isles) // 2), n_needles)
    needles = [(rng.choice(W.FACT_ATTRIBUTES), world.isles[2 * p + rng.randrange(2)]) for p in pairs]
    asked = rng.sample(range(n_needles), n_asked)
    near: list[tuple[str, str]] = []
    keys = set(needles)
    for kind, count in (("same_isle", n_same), ("sibling", n_sibling)):
        for _ in range(count):
            for _ in range(1000):
                attr, isle = needles[rng.choice(asked)]
                if kind == "same_isle":
                    key = (rng.choice([a for a in W.FACT_ATTRIBUTES if a != attr]), isle)
                else:
                    key = (attr, world.isle_sibling[isle])
                if key not in keys:
                    break
            else:
                raise ValueError(
                    f"data.probes.retrieval.{kind}_distractors={count}: too many distinct near misses "
                    "for the attributes"
                )
            keys.add(key)
            near.append(key)
    return needles, asked, near


def _haystack(
    rng: random.Random, encode: Encode, filler: ZipfPicker, budget: int
) -> tuple[list[str], list[int], int]:
    """Filler words up to ``budget`` tokens: the words, each one's token offset, the tokens used."""
    words, word_tokens, used = [], [], 0
    for _ in range(10 * budget + 10):
        w = filler.one(rng)
        n = len(encode(w))
        if used + n > budget:
            break
        words.append(w)
        word_tokens.append(used)
        used += n
    return words, word_tokens, used


def _gaps(
    rng: random.Random,
    words: list[str],
    word_tokens: list[int],
    used: int,
    depth: float,
    n_needles: int,
    asked: list[int],
    n_near: int,
) -> dict[int, list[tuple[str, int]]]:
    """Which facts go into which gap: the asked ones at the gap nearest ``depth``, the rest at random.
    Gap g sits before filler word g (g = len(words) is the end of the haystack)."""
    target = depth * used
    asked_gap = min(
        range(len(words) + 1), key=lambda g: abs((word_tokens[g] if g < len(words) else used) - target)
    )
    others = [i for i in range(n_needles) if i not in asked]
    gap_of: dict[int, list[tuple[str, int]]] = {}
    gap_of.setdefault(asked_gap, []).extend(("asked", i) for i in asked)
    free_gaps = [g for g in range(len(words) + 1) if g != asked_gap] or [asked_gap]
    for item in [("needle", i) for i in others] + [("near", j) for j in range(n_near)]:
        gap_of.setdefault(rng.choice(free_gaps), []).append(item)
    return gap_of


def _values(rng: random.Random, digits: int, n_needles: int, asked: list[int], n_near: int):
    """Values of the needles, then of the near misses; a near miss never carries an asked answer,
    so copying it is always wrong."""
    values = [draw_value(rng, digits) for _ in range(n_needles)]
    asked_values = {values[i] for i in asked}
    near_values = []
    for _ in range(n_near):
        v = draw_value(rng, digits)
        while v in asked_values:
            v = draw_value(rng, digits)
        near_values.append(v)
    return values, near_values


def _fixed_tokens(encode: Encode, header: str, facts: list[str], questions: list[tuple[str, str]]) -> int:
    """Tokens of everything but the filler: start token, header, facts and questions with their stops."""
    fixed = 1 + len(encode(header)) + sum(len(encode(f)) + len(encode(".")) for f in facts)
    return fixed + sum(len(encode(q)) + len(encode(v)) + len(encode(".")) for q, v in questions)


def _haystack_with_facts(
    encode: Encode, header: str, words: list[str], gap_of: dict, facts: list[str], near_facts: list[str]
):
    """The header, then filler words with each fact written into its gap; the spans of the asked
    facts (by needle) and of the distractors."""
    out = TokenWriter(encode)
    out.add(header)
    asked_span: dict[int, list[int]] = {}
    distractor_spans: list[list[int]] = []
    for g in range(len(words) + 1):
        for what, i in gap_of.get(g, []):
            text = near_facts[i] if what == "near" else facts[i]
            span = out.add(text)
            out.add(".")
            if what == "asked":
                asked_span[i] = span
            else:
                distractor_spans.append(span)
        if g < len(words):
            out.add(words[g])
    return out, asked_span, distractor_spans


def retrieval_item(
    rng: random.Random,
    world: World,
    encode: Encode,
    filler: ZipfPicker,
    context_len: int,
    depth: float,
    n_needles: int,
    n_asked: int,
    n_same: int,
    n_sibling: int,
    digits: int,
    layout: str = "key_first",
) -> dict:
    needles, asked, near = _needle_keys(rng, world, n_needles, n_asked, n_same, n_sibling)
    values, near_values = _values(rng, digits, len(needles), asked, len(near))
    header = f"log of {world.lighthouses[rng.choice(world.isles)]} light , codes ."
    facts = [fact_text(a, i, v, layout) for (a, i), v in zip(needles, values)]
    near_facts = [fact_text(a, i, v, layout) for (a, i), v in zip(near, near_values)]
    questions = [(question_text(*needles[i]), values[i]) for i in asked]

    fixed = _fixed_tokens(encode, header, facts + near_facts, questions)
    budget = context_len - fixed
    if budget < 0:
        raise ValueError(
            f"data.probes.retrieval.context_lens: {context_len} is too short for n_needles={n_needles}, "
            f"n_asked={n_asked} with the distractors (needs >= {fixed} tokens)"
        )
    words, word_tokens, used = _haystack(rng, encode, filler, budget)
    gap_of = _gaps(rng, words, word_tokens, used, depth, n_needles, asked, len(near))
    out, asked_span, distractor_spans = _haystack_with_facts(encode, header, words, gap_of, facts, near_facts)
    answer_spans = []
    for q, v in questions:
        out.add(q)
        answer_spans.append(out.add(v))
        out.add(".")
    if len(out.tokens) > context_len:
        raise AssertionError(f"retrieval item has {len(out.tokens)} tokens > context_len {context_len}")
    return {
        "tokens": out.tokens,
        "answer_spans": answer_spans,
        "asked_spans": [asked_span[i] for i in asked],
        "distractor_spans": distractor_spans,
        "meta": {
            "context_len": context_len,
            "depth": float(depth),
            "n_needles": n_needles,
            "n_asked": n_asked,
        },
    }


def retrieval_set(world: World, encode: Encode, cfg: Mapping, seed: int) -> list[dict]:
    p = cfg["probes"]["retrieval"]
    filler = ZipfPicker(world.filler_words, cfg["facts"]["filler_zipf"])
    items = []
    for L in p["context_lens"]:
        for depth in p["depths"]:
            for n in p["n_needles"]:
                for r in p["n_asked"]:
                    if r > n:
                        continue
                    for k in range(p["items_per_cell"]):
                        rng = random.Random(f"probe-retrieval-{seed}-{L}-{depth}-{n}-{r}-{k}")
                        items.append(
                            retrieval_item(
                                rng,
                                world,
                                encode,
                                filler,
                                L,
                                depth,
                                n,
                                r,
                                p["same_isle_distractors"],
                                p["sibling_distractors"],
                                cfg["facts"]["value_digits"],
                                cfg["facts"].get("layout", "key_first"),
                            )
                        )
    return items


def classification_set(world: World, encode: Encode, cfg: Mapping, seed: int, seq_len: int) -> list[dict]:
    p = cfg["probes"]["classification"]
    items, episode = [], 0
    for n_classes in p["n_classes"]:
        for n_demos in p["n_demos"]:
            for e in range(p["episodes"]):
                rng = random.Random(f"probe-classify-{seed}-{n_classes}-{n_demos}-{e}")
                ep = draw_episode(rng, world, n_classes, n_demos, p["queries"], p["noise_features"])
                header = f"sorting at {world.lighthouses[rng.choice(world.isles)]} light ."
                orders = ["random"] * p["random_orders"] + ["grouped"] * p["grouped_orders"]
                for order_index, ordering in enumerate(orders):
                    out = TokenWriter(encode)
                    out.add(header)
                    demo_spans, answer_spans = [], []
                    for d in order_demos(rng, ep["demos"], ordering):
                        out.add(d["text"])
                        demo_spans.append(out.add(d["label"]))
                        out.add(".")
                    for q in ep["queries"]:
                        out.add(q["text"])
                        answer_spans.append(out.add(q["label"]))
                        out.add(".")
                    if len(out.tokens) > seq_len + 1:
                        raise ValueError(
                            f"data.probes.classification: n_classes={n_classes}, n_demos={n_demos} "
                            f"needs {len(out.tokens)} tokens > seq_len + 1 = {seq_len + 1}; allowed: "
                            "fewer classes, "
                            f"demonstrations, queries or noise_features"
                        )
                    items.append(
                        {
                            "tokens": out.tokens,
                            "answer_spans": answer_spans,
                            "demo_label_spans": demo_spans,
                            "meta": {
                                "n_classes": n_classes,
                                "n_demos": n_demos,
                                "ordering": ordering,
                                "episode": episode,
                                "order_index": order_index,
                            },
                        }
                    )
                episode += 1
    return items
