"""The toy corpus: determinism, tokenizer round trip, probe-set integrity, batches, bad input."""

from __future__ import annotations

import copy
import math
import random
import re
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from omegaconf import OmegaConf

import toy_corpus
from toy_corpus import DOC_START_ID, WindowBatches, get_corpus, validation_windows
from toy_corpus.documents import DOCUMENT_KINDS, draw_episode, generate_documents
from toy_corpus.world import FACT_ATTRIBUTES, all_words, build_world

ROOT = Path(__file__).resolve().parent.parent
SEQ_LEN = 256
FACT = re.compile(r"(?<!check )\b(lamp|bell|horn|flag) ([A-Z][a-z]+) (\d(?: \d)*) \.")
QUESTION = re.compile(r"check (lamp|bell|horn|flag) ([A-Z][a-z]+) (\d(?: \d)*) \.")


def small_config(**changes) -> dict:
    cfg = OmegaConf.to_container(OmegaConf.load(ROOT / "conf" / "data" / "toy.yaml"))
    cfg["n_documents"] = 800
    cfg["tokenizer"]["train_documents"] = 800
    cfg["vocab_size"] = 1024
    for key, value in changes.items():
        node = cfg
        *head, last = key.split(".")
        for part in head:
            node = node[part]
        node[last] = value
    return cfg


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    return get_corpus(small_config(), SEQ_LEN, tmp_path_factory.mktemp("cache"))


def world_of(cfg):
    w = cfg["world"]
    return build_world(cfg["seed"], w["isle_pairs"], w["keepers"], w["ships"], w["labels"])


# ----------------------------------------------------------------------------- determinism and cache
def test_same_seed_gives_identical_text_and_ids_and_other_seed_differs(tmp_path, corpus):
    again = get_corpus(small_config(), SEQ_LEN, tmp_path / "a")
    assert again.cache_path != corpus.cache_path
    assert (again.cache_path / "train.txt").read_bytes() == (corpus.cache_path / "train.txt").read_bytes()
    assert (again.cache_path / "tokenizer.model").read_bytes() == (
        corpus.cache_path / "tokenizer.model"
    ).read_bytes()
    assert np.array_equal(again.train_ids, corpus.train_ids) and np.array_equal(again.val_ids, corpus.val_ids)
    assert again.probe_sets == corpus.probe_sets
    other = get_corpus(small_config(seed=99), SEQ_LEN, tmp_path / "b")
    assert (other.cache_path / "train.txt").read_bytes() != (corpus.cache_path / "train.txt").read_bytes()
    assert other.probe_sets["retrieval"][0]["tokens"] != corpus.probe_sets["retrieval"][0]["tokens"]


def test_generator_alone_is_deterministic_per_seed():
    cfg = small_config()
    world = world_of(cfg)
    a = generate_documents(world, cfg, 50, "train-1")
    b = generate_documents(world, cfg, 50, "train-1")
    c = generate_documents(world, cfg, 50, "train-2")
    assert a == b and a[1] != c[1]


def test_second_call_loads_from_cache_without_building(tmp_path, monkeypatch):
    cfg = small_config()
    first = get_corpus(cfg, SEQ_LEN, tmp_path)

    def no_build(*args, **kwargs):
        raise AssertionError("built again although the cache holds this config")

    monkeypatch.setattr(toy_corpus.corpus, "build_corpus", no_build)
    t0 = time.perf_counter()
    second = get_corpus(cfg, SEQ_LEN, tmp_path)
    assert time.perf_counter() - t0 < 2.0  # target from the issue: from cache <= 2 s
    assert second.cache_path == first.cache_path and np.array_equal(second.train_ids, first.train_ids)


def test_cache_dir_defaults_to_env_var(tmp_path, monkeypatch):
    monkeypatch.setenv("HEADTOHEAD_CACHE", str(tmp_path / "env"))
    assert toy_corpus.default_cache_dir() == tmp_path / "env"
    monkeypatch.delenv("HEADTOHEAD_CACHE")
    assert toy_corpus.default_cache_dir() == Path.home() / ".cache" / "headtohead"


# ----------------------------------------------------------------------------- text and tokenizer
def test_ids_are_uint16_and_every_document_starts_with_doc_start(corpus):
    assert corpus.train_ids.dtype == np.uint16 and corpus.val_ids.dtype == np.uint16
    assert corpus.train_ids[0] == DOC_START_ID
    assert int((corpus.train_ids == DOC_START_ID).sum()) == corpus.stats["train_documents"]
    assert int(corpus.train_ids.max()) < corpus.vocab_size == 1024


def test_sentencepiece_round_trip_on_generated_text(corpus):
    docs = corpus.documents("train")[:200] + corpus.documents("val")
    for doc in docs:
        assert corpus.decode(corpus.encode(doc)) == doc


def test_ids_decode_back_to_the_documents(corpus):
    starts = list(np.flatnonzero(corpus.train_ids == DOC_START_ID)) + [len(corpus.train_ids)]
    docs = corpus.documents("train")
    for i in range(0, len(docs), 37):
        assert corpus.decode(corpus.train_ids[starts[i] + 1 : starts[i + 1]]) == docs[i]


def test_text_uses_only_words_known_to_the_vocabulary_check(corpus):
    known = set(all_words(world_of(corpus.config)))
    words = set(" ".join(corpus.documents("train")).split())
    unknown = {w for w in words if not w.isdigit()} - known
    assert not unknown


def test_document_shares_follow_mixture_weights(corpus):
    share = corpus.stats["document_share"]
    weights = corpus.config["mixture"]
    n = corpus.stats["train_documents"]
    total = sum(weights.values())
    for kind in DOCUMENT_KINDS:
        p = weights[kind] / total
        assert abs(share[kind] - p) <= 4 * math.sqrt(p * (1 - p) / n)  # binomial, 4 standard deviations


# ----------------------------------------------------------------------------- probes: retrieval
def _split_item(corpus, item):
    text = corpus.decode(item["tokens"])
    first_q = text.index("check ")
    return text, text[:first_q], text[first_q:]


def test_retrieval_grid_is_complete(corpus):
    p = corpus.config["probes"]["retrieval"]
    cells = Counter(
        (it["meta"]["context_len"], it["meta"]["depth"], it["meta"]["n_needles"], it["meta"]["n_asked"])
        for it in corpus.probe_sets["retrieval"]
    )
    expected = {
        (L, float(d), n, r)
        for L in p["context_lens"]
        for d in p["depths"]
        for n in p["n_needles"]
        for r in p["n_asked"]
        if r <= n
    }
    assert set(cells) == expected and set(cells.values()) == {p["items_per_cell"]}


def test_retrieval_answers_are_in_context_and_unique(corpus):
    for item in corpus.probe_sets["retrieval"]:
        text, context, questions = _split_item(corpus, item)
        facts = FACT.findall(context)
        asked = QUESTION.findall(questions)
        assert len(asked) == item["meta"]["n_asked"] == len(item["answer_spans"])
        meta = item["meta"]
        assert len(facts) == meta["n_needles"] + len(item["distractor_spans"]) - (
            meta["n_needles"] - meta["n_asked"]
        )
        for attr, isle, value in asked:
            matching = [f for f in facts if (f[0], f[1]) == (attr, isle)]
            assert len(matching) == 1, (attr, isle, text)
            assert matching[0][2] == value  # the answer is recoverable from the context
        assert len(item["tokens"]) <= meta["context_len"] <= SEQ_LEN + 1


def test_retrieval_spans_decode_to_what_they_claim(corpus):
    for item in corpus.probe_sets["retrieval"]:
        toks = item["tokens"]
        dec = lambda span: corpus.decode(toks[span[0] : span[1]])  # noqa: E731, B023
        asked_keys = []
        for a, b in zip(item["asked_spans"], item["answer_spans"]):
            attr, isle, value = dec(a).split(" ", 2)
            assert attr in FACT_ATTRIBUTES and value.replace(" ", "").isdigit()
            assert dec(b) == value
            assert corpus.decode(toks[: b[0]]).endswith(f" check {attr} {isle}")
            asked_keys.append((attr, isle))
        for span in item["distractor_spans"]:
            attr, isle, value = dec(span).split(" ", 2)
            assert (attr, isle) not in asked_keys  # every distractor differs from the asked keys
        spans = sorted(item["asked_spans"] + item["distractor_spans"])
        assert all(e <= s for (_, e), (s, _) in zip(spans, spans[1:]))  # facts never overlap


def test_retrieval_has_near_miss_distractors(corpus):
    world = world_of(corpus.config)
    n_same = n_sib = 0
    for item in corpus.probe_sets["retrieval"]:
        toks = item["tokens"]
        asked = [tuple(corpus.decode(toks[s:e]).split(" ")[:2]) for s, e in item["asked_spans"]]
        for s, e in item["distractor_spans"]:
            attr, isle, _ = corpus.decode(toks[s:e]).split(" ", 2)
            n_same += any(isle == i and attr != a for a, i in asked)
            n_sib += any(isle == world.isle_sibling[i] and attr == a for a, i in asked)
    p = corpus.config["probes"]["retrieval"]
    n = len(corpus.probe_sets["retrieval"])
    assert n_same == n * p["same_isle_distractors"] and n_sib == n * p["sibling_distractors"]


def test_retrieval_needle_sits_at_its_depth(corpus):
    """Depth 0: the asked facts follow the header; depth 1: they end right before the questions;
    in between, the mean relative position grows with depth."""
    rel = {}
    for item in corpus.probe_sets["retrieval"]:
        toks, depth = item["tokens"], item["meta"]["depth"]
        first_asked = min(s for s, _ in item["asked_spans"])
        last_asked_end = max(e for _, e in item["asked_spans"])
        first_question = corpus.decode(toks).index(" check ")
        if depth == 0.0:
            assert corpus.decode(toks[:first_asked]).endswith("light , codes .")
        if depth == 1.0:
            between = corpus.decode(toks[last_asked_end : item["answer_spans"][0][0]])
            assert between.startswith(". check ") and len(between.split()) == 4, (
                between
            )  # ". check <attr> <isle>"
        rel.setdefault(depth, []).append(len(corpus.decode(toks[:first_asked])) / first_question)
    means = [np.mean(rel[d]) for d in sorted(rel)]
    assert all(a < b for a, b in zip(means, means[1:])), means


def test_probe_items_encode_like_whole_text(corpus):
    for item in corpus.probe_sets["retrieval"][::7] + corpus.probe_sets["classification"][::5]:
        assert item["tokens"][0] == DOC_START_ID
        assert corpus.encode(corpus.decode(item["tokens"])) == item["tokens"][1:]


def test_probe_items_never_appear_in_training_text(corpus):
    train = "\n".join(corpus.documents("train"))
    for item in corpus.probe_sets["retrieval"] + corpus.probe_sets["classification"]:
        text = corpus.decode(item["tokens"])
        body = text.split(" . ", 1)[1]  # everything after the header line
        assert body not in train
        # a stretch of 12 words from the middle of the item is already unique content
        words = body.split(" ")
        mid = len(words) // 2
        assert " ".join(words[mid : mid + 12]) not in train


# ----------------------------------------------------------------------------- probes: classification
def test_classification_labels_follow_demonstrations(corpus):
    for item in corpus.probe_sets["classification"]:
        toks = item["tokens"]
        text = corpus.decode(toks)
        reports = re.findall(r"report (?:\w+ \w+ )*?(\w+) (\w+) \.", text)
        n_demos = item["meta"]["n_demos"]
        assert len(reports) == n_demos + len(item["answer_spans"])
        mapping = {}
        for sighting, label in reports[:n_demos]:
            assert mapping.setdefault(sighting, label) == label  # one label per class in an episode
        assert len(mapping) == item["meta"]["n_classes"]
        assert len(set(mapping.values())) == item["meta"]["n_classes"]
        for (s, e), (sighting, label) in zip(item["answer_spans"], reports[n_demos:]):
            assert corpus.decode(toks[s:e]) == label == mapping[sighting]
        for (s, e), (_, label) in zip(item["demo_label_spans"], reports[:n_demos]):
            assert corpus.decode(toks[s:e]) == label


def test_classification_orderings_share_demonstrations_and_grouped_is_grouped(corpus):
    by_episode: dict[int, list[dict]] = {}
    for item in corpus.probe_sets["classification"]:
        by_episode.setdefault(item["meta"]["episode"], []).append(item)
    p = corpus.config["probes"]["classification"]
    assert len(by_episode) == len(p["n_classes"]) * len(p["n_demos"]) * p["episodes"]
    for items in by_episode.values():
        assert [it["meta"]["ordering"] for it in items] == ["random"] * p["random_orders"] + ["grouped"] * p[
            "grouped_orders"
        ]
        labels = [sorted(corpus.decode(it["tokens"][s:e]) for s, e in it["demo_label_spans"]) for it in items]
        assert all(lab == labels[0] for lab in labels)
        queries = [corpus.decode(it["tokens"][it["answer_spans"][0][0] :]) for it in items]
        assert all(q == queries[0] for q in queries)
        for it in items:
            if it["meta"]["ordering"] == "grouped":
                seq = [corpus.decode(it["tokens"][s:e]) for s, e in it["demo_label_spans"]]
                runs = [lab for i, lab in enumerate(seq) if i == 0 or seq[i - 1] != lab]
                assert len(runs) == len(set(runs)) == it["meta"]["n_classes"]


def test_classification_class_balance_within_binomial_tolerance():
    """Query classes are uniform: each class count lies within 4 binomial standard deviations of
    n/k (binomial mean and variance: common practice, no source; 4 sd -> false alarm < 1e-4 per class)."""
    cfg = small_config()
    world = world_of(cfg)
    rng = random.Random("balance")
    for k in (4, 8, 16):
        counts = Counter()
        n = 0
        for _ in range(300):
            ep = draw_episode(rng, world, k, 2 * k, 8, 1)
            counts.update(q["cls"] for q in ep["queries"])
            n += 8
        p = 1 / k
        sd = math.sqrt(n * p * (1 - p))
        assert len(counts) == k
        assert all(abs(c - n * p) <= 4 * sd for c in counts.values()), (k, counts)


# ----------------------------------------------------------------------------- batches
def test_batch_is_a_pure_function_of_seed_and_step(corpus):
    fresh = WindowBatches(corpus.train_ids, 64, 8, seed=3)
    first_run = [fresh.get(s) for s in range(10)]
    resumed = WindowBatches(corpus.train_ids, 64, 8, seed=3)  # a new process resuming at step 6
    for s in range(6, 10):
        assert np.array_equal(resumed.get(s), first_run[s])
    b = first_run[0]
    assert b.dtype == np.int64 and b.shape == (8, 65)
    assert (b[:, 0] == DOC_START_ID).all()  # windows start at document starts
    assert not np.array_equal(first_run[0], first_run[1])
    assert not np.array_equal(WindowBatches(corpus.train_ids, 64, 8, seed=4).get(0), first_run[0])


def test_validation_windows_are_fixed(corpus):
    a = validation_windows(corpus.val_ids, 32, 5)
    b = validation_windows(corpus.val_ids, 32, 5)
    assert a.dtype == np.int64 and a.shape == (5, 33) and np.array_equal(a, b)
    assert len({tuple(r) for r in a}) == 5


def test_windows_reject_impossible_requests(corpus):
    with pytest.raises(ValueError, match="n_windows"):
        validation_windows(corpus.val_ids, 32, 10**6)
    with pytest.raises(ValueError, match="no document start"):
        WindowBatches(corpus.val_ids[:50], 64, 2, seed=0)


# ----------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "changes, key",
    [
        ({"mixture": {"narrative": 1.0, "poems": 1.0}}, "data.mixture: unknown document kind 'poems'"),
        ({"mixture": {"narrative": 0.0, "facts": 0.0}}, "data.mixture: weights sum to 0.0"),
        ({"mixture": {"narrative": -1.0, "facts": 0.5}}, "data.mixture.narrative=-1.0"),
        ({"vocab_size": 20}, "data.vocab_size=20"),
        ({"vocab_size": 60000}, "data.vocab_size=60000"),
        ({"probes.retrieval.context_lens": [96, 300]}, "data.probes.retrieval.context_lens: 300"),
        ({"tokenizer.model_type": "words"}, "data.tokenizer.model_type='words'"),
        ({"facts.n_facts": [5, 2]}, "data.facts.n_facts=[5, 2]"),
        ({"facts.layout": "sideways"}, "data.facts.layout='sideways'"),
        ({"facts.mentions": [0, 2]}, "data.facts.mentions=[0, 2]"),
        ({"copy.distinct": "yes"}, "data.copy.distinct='yes'"),
        (
            {"copy.distinct": True, "copy.words": [8, 500]},
            "data.copy.words=[8, 500]: with copy.distinct=true",
        ),
    ],
)
def test_bad_config_fails_before_generating(tmp_path, changes, key):
    cfg = small_config()
    for k, v in changes.items():
        node = cfg
        *head, last = k.split(".")
        for part in head:
            node = node[part]
        node[last] = copy.deepcopy(v)
    with pytest.raises(ValueError) as err:
        get_corpus(cfg, SEQ_LEN, tmp_path)
    message = str(err.value)
    assert message.startswith(key) and "\n" not in message
    assert not any(tmp_path.iterdir())  # nothing was generated


def test_vocabulary_bounds_are_real():
    """The bounds of the vocabulary check are tight enough to matter: the smallest allowed size
    builds, and SentencePiece itself refuses sizes far above the largest allowed one."""
    from toy_corpus.config import vocab_limits
    from toy_corpus.tokenizer import train_tokenizer

    cfg = small_config()
    lo, hi = vocab_limits(cfg)
    texts = generate_documents(world_of(cfg), cfg, 300, "train-x")[1]
    assert len(train_tokenizer(texts, lo, "bpe")) > 0
    with pytest.raises(ValueError, match="data.vocab_size"):
        train_tokenizer(texts, lo - 2, "unigram")


# ----------------------------------------------------------------------------- other document shapes
def test_copy_entries_repeat_their_note_exactly():
    cfg = small_config()
    world = world_of(cfg)
    kinds, texts = generate_documents(world, cfg, 200, "train-copy")
    copies = [t for k, t in zip(kinds, texts) if k == "copy"]
    assert copies
    for t in copies:
        note = re.fullmatch(r"rough note at \w+ light : (.+) \. fair copy : (.+) \.", t)
        assert note and note.group(1) == note.group(2)


def test_distinct_notes_never_repeat_a_word():
    cfg = small_config(**{"copy.distinct": True, "copy.words": [30, 60]})
    kinds, texts = generate_documents(world_of(cfg), cfg, 300, "train-distinct")
    notes = [
        re.fullmatch(r"rough note at \w+ light : (.+) \. fair copy : \1 \.", t)
        for k, t in zip(kinds, texts)
        if k == "copy"
    ]
    assert notes and all(notes)
    for note in notes:
        words = note.group(1).split()
        assert 30 <= len(words) <= 60 and len(set(words)) == len(words)
    # the default (with replacement) does repeat words in notes this long: the knob changes something
    plain = small_config(**{"copy.words": [30, 60]})
    kinds, texts = generate_documents(world_of(plain), plain, 300, "train-distinct")
    assert any(
        len(set(t.split(" : ")[1].split())) < len(t.split(" : ")[1].split())
        for k, t in zip(kinds, texts)
        if k == "copy"
    )


def test_fact_mentions_repeat_each_fact_within_range_before_its_question():
    cfg = small_config(**{"facts.mentions": [2, 3]})
    kinds, texts = generate_documents(world_of(cfg), cfg, 300, "train-mentions")
    entries = [t for k, t in zip(kinds, texts) if k == "facts"]
    assert entries
    for t in entries:
        body, _, asked = t.partition(" check ")
        counts = Counter(m.group(0) for m in FACT.finditer(body))
        assert counts and all(2 <= c <= 3 for c in counts.values())
        for q in QUESTION.finditer("check " + asked):  # every asked fact was written with the same value
            assert f"{q.group(1)} {q.group(2)} {q.group(3)} ." in counts


def test_value_first_layout_probes_keep_their_spans(tmp_path):
    c = get_corpus(small_config(**{"facts.layout": "value_first"}), SEQ_LEN, tmp_path)
    for item in c.probe_sets["retrieval"][::5]:
        toks = item["tokens"]
        for a, b in zip(item["asked_spans"], item["answer_spans"]):
            m = re.fullmatch(
                r"code (\d(?: \d)*) (lamp|bell|horn|flag) ([A-Z][a-z]+)", c.decode(toks[a[0] : a[1]])
            )
            assert m and c.decode(toks[b[0] : b[1]]) == m.group(1)
            assert c.decode(toks[: b[0]]).endswith(f" check {m.group(2)} {m.group(3)}")
    assert "code" in c.documents("train")[0] or any(" code " in d for d in c.documents("train")[:50])


def test_copy_levels_match_a_simulated_random_copier(corpus):
    """The probes' copy levels equal what query-blind guessers score, simulated on the actual
    items: copying a random fact's value (retrieval); the episode's most frequent or last label,
    whichever scores better (classification)."""
    from ablate.probes.classification import summarize as class_summary
    from ablate.probes.retrieval import summarize as retrieval_summary

    rng = random.Random(0)
    items = corpus.probe_sets["retrieval"]
    level = retrieval_summary(items, [[False] * len(it["answer_spans"]) for it in items])[
        "retrieval/copy_level"
    ]
    hits = []
    for _ in range(40):
        for it in items:
            facts = it["asked_spans"] + it["distractor_spans"]
            ok = True
            for s, e in it["answer_spans"]:
                fs, fe = rng.choice(facts)
                ok &= (
                    it["tokens"][fe - (e - s) : fe] == it["tokens"][s:e]
                )  # a fact's value is its last tokens
            hits.append(ok)
    assert abs(np.mean(hits) - level) < 3 * math.sqrt(level * (1 - level) / len(hits))

    items = corpus.probe_sets["classification"]
    level = class_summary(items, [[False] * len(it["answer_spans"]) for it in items])[
        "classification/copy_level"
    ]
    majority, last, uniform = [], [], []
    for _ in range(40):
        for it in items:
            labels = [tuple(it["tokens"][s:e]) for s, e in it["demo_label_spans"]]
            counts = Counter(labels)
            best = [label for label in sorted(counts) if counts[label] == max(counts.values())]
            for s, e in it["answer_spans"]:
                answer = tuple(it["tokens"][s:e])
                majority.append(rng.choice(best) == answer)
                last.append(labels[-1] == answer)
                uniform.append(rng.choice(sorted(counts)) == answer)
    simulated = max(np.mean(majority), np.mean(last))
    assert abs(simulated - level) < 3 * math.sqrt(level * (1 - level) / len(majority))
    # counting or repeating labels beats copying a random one: the level is the stricter bar
    assert level > np.mean(uniform)
