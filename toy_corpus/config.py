"""The logbook data config: its typed shape (:class:`LogbookSchema`, plain dataclasses that the
trainer registers as the Hydra structured-config schema of ``conf/data/toy.yaml``) and the range
checks beside it (:func:`check_config`), run before anything is generated.

The schema says which keys exist and their types (values come from the YAML only: every field is
required); the checks say what a type cannot (ranges, known names, sizes that fit). Every problem
raises ``ValueError`` with a one-line message naming the key and what is allowed.
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass
from typing import Any, Dict, List, Mapping

from omegaconf import MISSING

from . import world as W
from .documents import DOCUMENT_KINDS, FACT_LAYOUTS

UINT16_LIMIT = 65535
N_SPECIAL_TOKENS = 3  # <unk>, <s>, </s>
TOKENIZER_TYPES = ("bpe", "unigram")


# The schema: types only (Hydra refuses wrong types and unknown keys while composing). Typing's
# List/Dict spellings, because OmegaConf reads structured configs through them.
@dataclass
class WorldSchema:
    isle_pairs: int = MISSING
    keepers: int = MISSING
    ships: int = MISSING
    labels: int = MISSING


@dataclass
class NarrativeSchema:
    zipf: float = MISSING
    sentences: List[int] = MISSING


@dataclass
class FactsSchema:
    layout: str = MISSING
    n_facts: List[int] = MISSING
    value_digits: int = MISSING
    filler_words: List[int] = MISSING
    filler_zipf: float = MISSING
    p_same_isle: float = MISSING
    p_sibling: float = MISSING
    questions: int = MISSING
    mentions: List[int] = MISSING


@dataclass
class CopySchema:
    zipf: float = MISSING
    words: List[int] = MISSING
    distinct: bool = MISSING


@dataclass
class ClassifySchema:
    n_classes: List[int] = MISSING
    demos_per_class: List[int] = MISSING
    queries: int = MISSING
    noise_features: int = MISSING
    p_grouped: float = MISSING


@dataclass
class TokenizerSchema:
    model_type: str = MISSING
    train_documents: int = MISSING


@dataclass
class RetrievalSetSchema:
    context_lens: List[int] = MISSING
    depths: List[float] = MISSING
    n_needles: List[int] = MISSING
    n_asked: List[int] = MISSING
    items_per_cell: int = MISSING
    same_isle_distractors: int = MISSING
    sibling_distractors: int = MISSING


@dataclass
class ClassificationSetSchema:
    n_classes: List[int] = MISSING
    n_demos: List[int] = MISSING
    episodes: int = MISSING
    random_orders: int = MISSING
    grouped_orders: int = MISSING
    queries: int = MISSING
    noise_features: int = MISSING


@dataclass
class ProbeSetsSchema:
    retrieval: RetrievalSetSchema = MISSING
    classification: ClassificationSetSchema = MISSING


@dataclass
class LogbookSchema:
    seed: int = MISSING
    vocab_size: int = MISSING
    n_documents: int = MISSING
    val_fraction: float = MISSING
    world: WorldSchema = MISSING
    mixture: Dict[str, float] = MISSING
    narrative: NarrativeSchema = MISSING
    facts: FactsSchema = MISSING
    copy: CopySchema = MISSING
    classify: ClassifySchema = MISSING
    tokenizer: TokenizerSchema = MISSING
    probes: ProbeSetsSchema = MISSING


def _get(cfg: Mapping, path: str) -> Any:
    node: Any = cfg
    for part in path.split("."):
        if not isinstance(node, Mapping) or part not in node:
            raise ValueError(f"data.{path}: missing; see conf/data/toy.yaml for the expected keys")
        node = node[part]
    return node


def _int(cfg: Mapping, path: str, lo: int, hi: int | None = None) -> int:
    v = _get(cfg, path)
    if not isinstance(v, numbers.Integral) or isinstance(v, bool) or v < lo or (hi is not None and v > hi):
        allowed = f">= {lo}" if hi is None else f"in [{lo}, {hi}]"
        raise ValueError(f"data.{path}={v!r}: must be an integer {allowed}")
    return int(v)


def _real(cfg: Mapping, path: str, lo: float, hi: float) -> float:
    v = _get(cfg, path)
    if not isinstance(v, numbers.Real) or isinstance(v, bool) or not lo <= v <= hi:
        raise ValueError(f"data.{path}={v!r}: must be a number in [{lo}, {hi}]")
    return float(v)


def _range(cfg: Mapping, path: str, lo: int, hi: int | None = None) -> tuple[int, int]:
    v = _get(cfg, path)
    ok = (
        isinstance(v, (list, tuple))
        and len(v) == 2
        and all(isinstance(x, numbers.Integral) and not isinstance(x, bool) for x in v)
        and lo <= v[0] <= v[1]
        and (hi is None or v[1] <= hi)
    )
    if not ok:
        bound = f"{lo} <= low <= high" + ("" if hi is None else f" <= {hi}")
        raise ValueError(f"data.{path}={v!r}: must be an inclusive integer range [low, high] with {bound}")
    return int(v[0]), int(v[1])


def _int_list(cfg: Mapping, path: str, lo: int, hi: int | None = None) -> list[int]:
    v = _get(cfg, path)
    ok = (
        isinstance(v, (list, tuple))
        and len(v) > 0
        and all(
            isinstance(x, numbers.Integral)
            and not isinstance(x, bool)
            and x >= lo
            and (hi is None or x <= hi)
            for x in v
        )
    )
    if not ok:
        bound = f">= {lo}" + ("" if hi is None else f" and <= {hi}")
        raise ValueError(f"data.{path}={v!r}: must be a non-empty list of integers {bound}")
    return [int(x) for x in v]


def vocab_limits(cfg: Mapping) -> tuple[int, int]:
    """(smallest, largest) vocabulary the generated text supports.

    Smallest: every character needs its own piece, plus the special tokens and the word-start
    marker. Largest: pieces never cross a space and digits are split, so a word of L letters
    (written with its word-start marker) allows at most L merges; no more pieces can be formed
    than the characters plus those merges summed over every distinct word.
    """
    w = _get(cfg, "world")
    world = W.build_world(
        int(_get(cfg, "seed")), int(w["isle_pairs"]), int(w["keepers"]), int(w["ships"]), int(w["labels"])
    )
    words = set(W.all_words(world))
    chars = set("".join(words)) | set("0123456789")
    smallest = len(chars) + N_SPECIAL_TOKENS + 1
    largest = smallest + sum(len(x) for x in words)
    return smallest, min(UINT16_LIMIT, largest)


def check_config(cfg: Mapping, seq_len: int) -> None:
    """Raise ValueError (one line, naming the key) for any bad value; return None when all is well."""
    if not isinstance(cfg, Mapping):
        raise ValueError(f"data: must be a mapping (the conf/data group), got {type(cfg).__name__}")
    if not isinstance(seq_len, numbers.Integral) or isinstance(seq_len, bool) or seq_len < 16:
        raise ValueError(f"seq_len={seq_len!r}: must be an integer >= 16")
    _int(cfg, "seed", 0)
    _int(cfg, "n_documents", 10)
    _real(cfg, "val_fraction", 0.0, 0.5)
    _int(cfg, "world.isle_pairs", 4, 60)
    _int(cfg, "world.keepers", 2, 200)
    _int(cfg, "world.ships", 4, 400)
    _int(cfg, "world.labels", 16, 400)
    _check_mixture(cfg)
    _check_documents(cfg)
    _check_tokenizer(cfg)
    _check_probe_sets(cfg, seq_len)


def _check_mixture(cfg: Mapping) -> None:
    mixture = _get(cfg, "mixture")
    if not isinstance(mixture, Mapping) or not mixture:
        raise ValueError(
            f"data.mixture={mixture!r}: must map document kinds ({', '.join(DOCUMENT_KINDS)}) to weights"
        )
    for kind, weight in mixture.items():
        if kind not in DOCUMENT_KINDS:
            raise ValueError(
                f"data.mixture: unknown document kind {kind!r}; allowed: {', '.join(DOCUMENT_KINDS)}"
            )
        if not isinstance(weight, numbers.Real) or isinstance(weight, bool) or weight < 0:
            raise ValueError(f"data.mixture.{kind}={weight!r}: weights must be numbers >= 0")
    if sum(float(x) for x in mixture.values()) <= 0:
        raise ValueError(
            f"data.mixture: weights sum to {sum(float(x) for x in mixture.values())}; they must sum to "
            "a positive number"
        )


def _check_documents(cfg: Mapping) -> None:
    mixture = _get(cfg, "mixture")
    _real(cfg, "narrative.zipf", 0.0, 3.0)
    _range(cfg, "narrative.sentences", 1, 100)
    n_lo, n_hi = _range(cfg, "facts.n_facts", 1, 24)
    _int(cfg, "facts.value_digits", 1, 6)
    _range(cfg, "facts.filler_words", 0, 500)
    _real(cfg, "facts.filler_zipf", 0.0, 3.0)
    p1, p2 = _real(cfg, "facts.p_same_isle", 0.0, 1.0), _real(cfg, "facts.p_sibling", 0.0, 1.0)
    if p1 + p2 > 1.0:
        raise ValueError(f"data.facts.p_same_isle + data.facts.p_sibling = {p1 + p2}: must be <= 1")
    _int(cfg, "facts.questions", 0)
    if "mentions" in cfg["facts"]:
        _range(cfg, "facts.mentions", 1, 10)
    layout = cfg["facts"].get("layout", "key_first")
    if layout not in FACT_LAYOUTS:
        raise ValueError(f"data.facts.layout={layout!r}; allowed: {', '.join(FACT_LAYOUTS)}")
    _range(cfg, "classify.n_classes", 2, len(W.SIGHTINGS))
    _range(cfg, "classify.demos_per_class", 1, 20)
    _int(cfg, "classify.queries", 0, 100)
    _int(cfg, "classify.noise_features", 0, len(W.REPORT_FEATURES))
    _real(cfg, "classify.p_grouped", 0.0, 1.0)

    if "copy" in mixture:
        _real(cfg, "copy.zipf", 0.0, 3.0)
        w_lo, w_hi = _range(cfg, "copy.words", 1, 500)
        distinct = cfg["copy"].get("distinct", False)
        if not isinstance(distinct, bool):
            raise ValueError(f"data.copy.distinct={distinct!r}: must be true or false")
        if distinct:  # the lexicon's size does not depend on the seed, so any world of this shape tells it
            wc = cfg["world"]
            n_words = len(
                W.build_world(0, wc["isle_pairs"], wc["keepers"], wc["ships"], wc["labels"]).filler_words
            )
            if w_hi > n_words:
                raise ValueError(
                    f"data.copy.words={[w_lo, w_hi]}: with copy.distinct=true a note has at most {n_words} "
                    f"words (the filler lexicon); allowed: upper bound <= {n_words}"
                )


def _check_tokenizer(cfg: Mapping) -> None:
    model_type = _get(cfg, "tokenizer.model_type")
    if model_type not in TOKENIZER_TYPES:
        raise ValueError(f"data.tokenizer.model_type={model_type!r}; allowed: {', '.join(TOKENIZER_TYPES)}")
    _int(cfg, "tokenizer.train_documents", 10)
    lo, hi = vocab_limits(cfg)
    vocab = _get(cfg, "vocab_size")
    if not isinstance(vocab, numbers.Integral) or isinstance(vocab, bool) or not lo <= vocab <= hi:
        raise ValueError(
            f"data.vocab_size={vocab!r}: must be an integer in [{lo}, {hi}] for this text "
            f"(smaller cannot hold every character; larger has no pieces left to form)"
        )


def _check_probe_sets(cfg: Mapping, seq_len: int) -> None:
    lens = _int_list(cfg, "probes.retrieval.context_lens", 16)
    for n in lens:
        if n > seq_len + 1:
            raise ValueError(
                f"data.probes.retrieval.context_lens: {n} is longer than seq_len + 1 = {seq_len + 1}; "
                f"allowed: lengths <= {seq_len + 1}"
            )
    depths = _get(cfg, "probes.retrieval.depths")
    if (
        not isinstance(depths, (list, tuple))
        or not depths
        or not all(
            isinstance(d, numbers.Real) and not isinstance(d, bool) and 0.0 <= d <= 1.0 for d in depths
        )
    ):
        raise ValueError(
            f"data.probes.retrieval.depths={depths!r}: must be a non-empty list of numbers in [0, 1]"
        )
    needles = _int_list(cfg, "probes.retrieval.n_needles", 1, _get(cfg, "world.isle_pairs"))
    _int_list(cfg, "probes.retrieval.n_asked", 1, max(needles))
    _int(cfg, "probes.retrieval.items_per_cell", 1, 100)
    _int(cfg, "probes.retrieval.same_isle_distractors", 0, 10)
    _int(cfg, "probes.retrieval.sibling_distractors", 0, 10)
    classes = _int_list(cfg, "probes.classification.n_classes", 2, len(W.SIGHTINGS))
    demos = _int_list(cfg, "probes.classification.n_demos", 1, 200)
    if min(demos) < max(classes):
        raise ValueError(
            f"data.probes.classification.n_demos={demos}: each must be >= every n_classes (max "
            f"{max(classes)}), "
            f"so that every class has a demonstration"
        )
    _int(cfg, "probes.classification.episodes", 1, 100)
    r = _int(cfg, "probes.classification.random_orders", 0, 20)
    g = _int(cfg, "probes.classification.grouped_orders", 0, 20)
    if r + g == 0:
        raise ValueError("data.probes.classification: random_orders + grouped_orders must be >= 1")
    _int(cfg, "probes.classification.queries", 1, 100)
    _int(cfg, "probes.classification.noise_features", 0, len(W.REPORT_FEATURES))
