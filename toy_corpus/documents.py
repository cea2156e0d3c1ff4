"""Training documents: logbook narrative, fact-recall entries, classification episodes.

Each builder takes a ``random.Random`` and returns one document as a single line of text
(words separated by single spaces, no newlines). The sentence shapes used by the probe sets
(``fact_text``, ``question_text``, ``report_text``) live here too, so training and probes agree.
"""

from __future__ import annotations

import bisect
import itertools
import random
from typing import Mapping, Sequence

from . import world as W
from .world import World

DOCUMENT_KINDS = ("narrative", "facts", "classify", "copy")


# ----------------------------------------------------------------------------- shared shapes
FACT_LAYOUTS = ("key_first", "value_first")


def fact_text(attribute: str, isle: str, value: str, layout: str = "key_first") -> str:
    """One fact. ``key_first``: ``lamp Brelo 4 7`` (the isle right before the value, as in the
    question); ``value_first``: ``code 4 7 lamp Brelo`` (the value read before its key)."""
    if layout == "key_first":
        return f"{attribute} {isle} {value}"
    if layout == "value_first":
        return f"code {value} {attribute} {isle}"
    raise ValueError(f"data.facts.layout={layout!r}; allowed: {', '.join(FACT_LAYOUTS)}")


def question_text(attribute: str, isle: str) -> str:
    """The prompt of a question; its answer (the digits) follows it."""
    return f"check {attribute} {isle}"


def report_text(noise: Sequence[tuple[str, str]], sighting: str) -> str:
    """The features of one classification report; its label follows it."""
    return "report " + " ".join(f"{k} {v}" for k, v in noise) + f" {sighting}"


def draw_value(rng: random.Random, digits: int) -> str:
    """A code of ``digits`` digits written apart (``4 7``), so that every digit is one piece."""
    return " ".join(rng.choice("0123456789") for _ in range(digits))


class ZipfPicker:
    """Draw items with probability proportional to (rank + 1) ** -exponent (0 = flat)."""

    def __init__(self, items: Sequence[str], exponent: float):
        self.items = list(items)
        self.cum = list(itertools.accumulate((r + 1) ** -exponent for r in range(len(self.items))))

    def __call__(self, rng: random.Random, k: int = 1) -> list[str]:
        return rng.choices(self.items, cum_weights=self.cum, k=k)

    def distinct(self, rng: random.Random, k: int) -> list[str]:
        """``k`` different items, each drawn by the same weights among those not yet drawn."""
        if k > len(self.items):
            raise ValueError(f"cannot draw {k} distinct words from {len(self.items)}")
        weights = [b - a for a, b in zip([0.0] + self.cum[:-1], self.cum)]
        pool = list(range(len(self.items)))
        out = []
        for _ in range(k):
            j = rng.choices(range(len(pool)), weights=[weights[i] for i in pool])[0]
            out.append(self.items[pool.pop(j)])
        return out

    def one(self, rng: random.Random) -> str:
        return self.items[bisect.bisect(self.cum, rng.random() * self.cum[-1])]


# ----------------------------------------------------------------------------- narrative
class NarrativeGrammar:
    """A small probabilistic grammar of logbook sentences; word choice inside each slot is Zipf-like."""

    def __init__(self, world: World, zipf: float):
        self.world = world
        p = lambda items: ZipfPicker(items, zipf)  # noqa: E731
        self.wind, self.strength, self.sky, self.sea = (
            p(W.WEATHER_WIND),
            p(W.WEATHER_STRENGTH),
            p(W.WEATHER_SKY),
            p(W.SEA_STATE),
        )
        self.ship_kind, self.ship_action, self.bearing = p(W.SHIP_KIND), p(W.SHIP_ACTION), p(W.BEARING)
        self.part, self.repair, self.material = p(W.REPAIR_PART), p(W.REPAIR_ACT), p(W.MATERIAL)
        self.goods, self.units, self.count, self.time = p(W.GOODS), p(W.UNITS), p(W.COUNT_WORDS), p(W.TIMES)
        self.mood, self.isle, self.keeper = p(W.MOOD), p(world.isles), p(world.keepers)
        self.ship = p(world.ships)
        self.kinds = ["weather", "tide", "ship", "ship", "repair", "supply", "mood"]

    def sentence(self, rng: random.Random, ships: list[str]) -> str:
        kind = rng.choice(self.kinds)
        o = lambda picker: picker.one(rng)  # noqa: E731
        if kind == "weather":
            return f"wind {o(self.wind)} {o(self.strength)} , sky {o(self.sky)} , sea {o(self.sea)} ."
        if kind == "tide":
            return f"high water at {o(self.time)} , low water at {o(self.time)} ."
        if kind == "ship":
            ship = rng.choice(ships)
            if rng.random() < 0.5:
                kind_, action, bearing = o(self.ship_kind), o(self.ship_action), o(self.bearing)
                return f"the {kind_} {ship} {action} {bearing} at {o(self.time)} ."
            return f"{ship} {o(self.ship_action)} {o(self.bearing)} bound for {o(self.isle)} ."
        if kind == "repair":
            return f"{o(self.keeper)} {o(self.repair)} the {o(self.part)} with {o(self.material)} ."
        if kind == "supply":
            return f"{o(self.count)} {o(self.units)} of {o(self.goods)} landed from the {rng.choice(ships)} ."
        return f"{o(self.mood)} ."

    def entry(self, rng: random.Random, n_sentences: int) -> str:
        isle = self.isle.one(rng)
        ships = [self.ship.one(rng) for _ in range(rng.randint(1, 3))]
        head = f"log of {self.world.lighthouses[isle]} light on {isle} , keeper {self.keeper.one(rng)} ."
        return " ".join([head] + [self.sentence(rng, ships) for _ in range(n_sentences)])


# ----------------------------------------------------------------------------- facts
def pick_fact_keys(
    rng: random.Random, world: World, n_facts: int, p_same_isle: float, p_sibling: float
) -> list[tuple[str, str]]:
    """Choose ``n_facts`` distinct (attribute, isle) keys, with near misses mixed in on purpose:
    with probability ``p_same_isle`` a key reuses an earlier isle with another attribute, with
    probability ``p_sibling`` it uses the look-alike of an earlier isle with the same attribute."""
    keys: list[tuple[str, str]] = []
    for _ in range(100 * n_facts):
        if len(keys) == n_facts:
            break
        r = rng.random()
        if keys and r < p_same_isle:
            _, isle = rng.choice(keys)
            key = (rng.choice(W.FACT_ATTRIBUTES), isle)
        elif keys and r < p_same_isle + p_sibling:
            attr, isle = rng.choice(keys)
            key = (attr, world.isle_sibling[isle])
        else:
            key = (rng.choice(W.FACT_ATTRIBUTES), rng.choice(world.isles))
        if key not in keys:
            keys.append(key)
    if len(keys) != n_facts:
        raise RuntimeError("could not draw distinct fact keys")
    return keys


def facts_entry(rng: random.Random, world: World, filler: ZipfPicker, cfg: Mapping) -> str:
    """Facts scattered through filler, then a question for each fact (in a fresh order)."""
    n = rng.randint(*cfg["n_facts"])
    keys = pick_fact_keys(rng, world, n, cfg["p_same_isle"], cfg["p_sibling"])
    values = [draw_value(rng, cfg["value_digits"]) for _ in keys]
    parts = [f"log of {world.lighthouses[keys[0][1]]} light , codes ."]
    # each fact is written `mentions` times (drawn per fact); later mentions can be copied from
    # earlier ones, which gives the model more chances to learn to look a fact up by its key
    lo, hi = cfg.get("mentions", (1, 1))
    written = list(range(n))
    if hi > 1:
        written += [i for i in range(n) for _ in range(rng.randint(lo, hi) - 1)]
        rng.shuffle(written)
    for i in written:
        (attr, isle), value = keys[i], values[i]
        gap = rng.randint(*cfg["filler_words"])
        if gap:
            parts.append(" ".join(filler(rng, gap)))
        parts.append(fact_text(attr, isle, value, cfg.get("layout", "key_first")) + " .")
    tail = rng.randint(*cfg["filler_words"])
    if tail:
        parts.append(" ".join(filler(rng, tail)))
    order = list(range(n))
    rng.shuffle(order)
    n_questions = min(n, cfg["questions"]) if cfg["questions"] > 0 else n
    parts += [f"{question_text(*keys[i])} {values[i]} ." for i in order[:n_questions]]
    return " ".join(parts)


# ----------------------------------------------------------------------------- classification
def draw_episode(
    rng: random.Random, world: World, n_classes: int, n_demos: int, n_queries: int, n_noise: int
) -> dict:
    """One in-context classification episode.

    Each class is one sighting (the deciding feature); its label word is drawn afresh from the
    label pool, so the mapping can only be read from the demonstrations. Every class has at least
    one demonstration; the remaining demonstrations and all queries draw their class uniformly.
    """
    if n_demos < n_classes:
        raise ValueError(f"n_demos={n_demos} must be >= n_classes={n_classes}")
    sightings = rng.sample(W.SIGHTINGS, n_classes)
    labels = rng.sample(world.labels, n_classes)
    demo_classes = list(range(n_classes)) + [rng.randrange(n_classes) for _ in range(n_demos - n_classes)]
    rng.shuffle(demo_classes)
    query_classes = [rng.randrange(n_classes) for _ in range(n_queries)]

    def report(c: int) -> dict:
        feats = rng.sample(W.REPORT_FEATURES, n_noise)
        noise = [(name, rng.choice(values)) for name, values in feats]
        return {"cls": c, "text": report_text(noise, sightings[c]), "label": labels[c]}

    return {
        "sightings": sightings,
        "labels": labels,
        "demos": [report(c) for c in demo_classes],
        "queries": [report(c) for c in query_classes],
    }


def order_demos(rng: random.Random, demos: list[dict], ordering: str) -> list[dict]:
    """``random``: a fresh shuffle; ``grouped``: demonstrations of one class together, classes in "
    "random order."""
    if ordering == "random":
        out = list(demos)
        rng.shuffle(out)
        return out
    if ordering == "grouped":
        classes = sorted({d["cls"] for d in demos})
        rng.shuffle(classes)
        return [d for c in classes for d in demos if d["cls"] == c]
    raise ValueError(f"ordering={ordering!r}; allowed: random, grouped")


def classify_entry(rng: random.Random, world: World, cfg: Mapping) -> str:
    n_classes = rng.randint(*cfg["n_classes"])
    n_demos = n_classes * rng.randint(*cfg["demos_per_class"])
    ep = draw_episode(rng, world, n_classes, n_demos, cfg["queries"], cfg["noise_features"])
    ordering = "grouped" if rng.random() < cfg["p_grouped"] else "random"
    lines = order_demos(rng, ep["demos"], ordering) + ep["queries"]
    return " ".join(
        [f"sorting at {world.lighthouses[rng.choice(world.isles)]} light ."]
        + [f"{d['text']} {d['label']} ." for d in lines]
    )


# ----------------------------------------------------------------------------- fair copies
def copy_entry(rng: random.Random, world: World, words: ZipfPicker, cfg: Mapping) -> str:
    """A rough note and the keeper's fair copy of it: the same words twice (pure copying)."""
    k = rng.randint(*cfg["words"])
    note = " ".join(words.distinct(rng, k) if cfg.get("distinct", False) else words(rng, k))
    return f"rough note at {world.lighthouses[rng.choice(world.isles)]} light : {note} . fair copy : {note} ."


# ----------------------------------------------------------------------------- the stream
class DocumentMaker:
    """Builds documents of each kind from one data config (see conf/data/toy.yaml)."""

    def __init__(self, world: World, cfg: Mapping):
        self.world, self.cfg = world, cfg
        self.grammar = NarrativeGrammar(world, cfg["narrative"]["zipf"])
        self.filler = ZipfPicker(world.filler_words, cfg["facts"]["filler_zipf"])
        self.copy_words = ZipfPicker(world.filler_words, cfg["copy"]["zipf"]) if "copy" in cfg else None

    def make(self, kind: str, rng: random.Random) -> str:
        if kind == "narrative":
            return self.grammar.entry(rng, rng.randint(*self.cfg["narrative"]["sentences"]))
        if kind == "facts":
            return facts_entry(rng, self.world, self.filler, self.cfg["facts"])
        if kind == "classify":
            return classify_entry(rng, self.world, self.cfg["classify"])
        if kind == "copy":
            return copy_entry(rng, self.world, self.copy_words, self.cfg["copy"])
        raise ValueError(
            f"data.mixture: unknown document kind {kind!r}; allowed: {', '.join(DOCUMENT_KINDS)}"
        )


def generate_documents(
    world: World, cfg: Mapping, n_documents: int, seed_key: str
) -> tuple[list[str], list[str]]:
    """``n_documents`` documents; the kind of each drawn by the mixture weights. Returns (kinds, texts)."""
    rng = random.Random(seed_key)
    maker = DocumentMaker(world, cfg)
    names = list(cfg["mixture"])
    weights = [float(cfg["mixture"][k]) for k in names]
    kinds = rng.choices(names, weights=weights, k=n_documents)
    return kinds, [maker.make(k, rng) for k in kinds]
