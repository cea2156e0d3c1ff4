"""Build (or load from the cache) the corpus for one data config: text, tokenizer, ids, probes.

Cache folder: ``<cache_dir>/toy-<key>`` where key hashes the data config and the generator
version. It is built in a temporary folder, its manifest (sizes and SHA-256, ``cache.py``) is
written last, and the folder is renamed into place, all under a lock on ``toy-<key>.lock``, so
two processes building the same corpus at once end with one good copy. On load the sizes are
checked (and the hashes, when asked or when a file fails to load); a folder that fails is
rebuilt, with one line on stderr naming the file and what was wrong.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import os
import random
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping

import numpy as np
import sentencepiece as spm

from .cache import CacheError, build_lock, check_cache, write_manifest
from .config import check_config
from .documents import generate_documents
from .probes import classification_set, retrieval_set
from .tokenizer import DOC_START_ID, load_tokenizer, train_tokenizer
from .world import build_world

# Bump when generated content changes for the same config (2: names in common use are redrawn;
# 3: classification items no longer carry query_classes).
GENERATOR_VERSION = 3


def default_cache_dir() -> Path:
    return Path(os.environ.get("HEADTOHEAD_CACHE") or Path.home() / ".cache" / "headtohead")


def cache_key(data_cfg: Mapping) -> str:
    blob = json.dumps({"version": GENERATOR_VERSION, "data": data_cfg}, sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


@dataclass
class Corpus:
    vocab_size: int
    tokenizer: spm.SentencePieceProcessor
    train_ids: np.ndarray
    val_ids: np.ndarray
    probe_sets: dict[str, list[dict]]
    stats: dict
    cache_path: Path
    config: dict = field(default_factory=dict)

    def decode(self, ids) -> str:
        return self.tokenizer.decode([int(i) for i in ids])

    def encode(self, text: str) -> list[int]:
        return self.tokenizer.encode(text)

    def documents(self, split: str = "train") -> list[str]:
        """The generated text of one split (``train`` or ``val``), one document per item."""
        if split not in ("train", "val"):
            raise ValueError(f"split={split!r}; allowed: train, val")
        return (self.cache_path / f"{split}.txt").read_text().split("\n")


def _encode_documents(sp: spm.SentencePieceProcessor, texts: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Concatenate ``<s> doc`` for every document; returns (ids as uint16, tokens per document)."""
    encoded = sp.encode(texts)
    lengths = np.fromiter((len(e) + 1 for e in encoded), dtype=np.int64, count=len(encoded))
    flat = itertools.chain.from_iterable([DOC_START_ID] + e for e in encoded)
    return np.fromiter(flat, dtype=np.uint16, count=int(lengths.sum())), lengths


def _split(texts: list[str], kinds: list[str], val_fraction: float, seed: int):
    """Training texts, validation texts and the training texts' kinds, split by document."""
    split_rng = random.Random(f"split-{seed}")
    is_val = [split_rng.random() < val_fraction for _ in texts]
    if val_fraction > 0 and not any(is_val):
        is_val[-1] = True  # tiny configs: keep at least one validation document (documented in README)
    train_texts = [t for t, v in zip(texts, is_val) if not v]
    val_texts = [t for t, v in zip(texts, is_val) if v]
    return train_texts, val_texts, [k for k, v in zip(kinds, is_val) if not v]


def build_corpus(data_cfg: Mapping, seq_len: int, out: Path, key: str = "") -> dict:
    """Generate everything into folder ``out``; returns the stats."""
    t0 = time.perf_counter()
    cfg = data_cfg
    seed = int(cfg["seed"])
    w = cfg["world"]
    world = build_world(seed, w["isle_pairs"], w["keepers"], w["ships"], w["labels"])
    kinds, texts = generate_documents(world, cfg, int(cfg["n_documents"]), f"train-{seed}")
    t_text = time.perf_counter()

    train_texts, val_texts, train_kinds = _split(texts, kinds, float(cfg["val_fraction"]), seed)

    n_tok_docs = min(int(cfg["tokenizer"]["train_documents"]), len(train_texts))
    pick = np.linspace(0, len(train_texts) - 1, n_tok_docs).round().astype(int)
    model_bytes = train_tokenizer(
        [train_texts[i] for i in pick], int(cfg["vocab_size"]), cfg["tokenizer"]["model_type"]
    )
    sp = load_tokenizer(model_bytes)
    if sp.get_piece_size() != int(cfg["vocab_size"]):
        raise ValueError(
            f"data.vocab_size={cfg['vocab_size']}: SentencePiece built only {sp.get_piece_size()} "
            "pieces from this text"
        )
    t_tok = time.perf_counter()

    train_ids, train_lens = _encode_documents(sp, train_texts)
    val_ids, val_lens = (
        _encode_documents(sp, val_texts) if val_texts else (np.zeros(0, np.uint16), np.zeros(0, np.int64))
    )
    t_ids = time.perf_counter()

    encode_cache: dict[str, list[int]] = {}

    def encode(text: str) -> list[int]:
        if text not in encode_cache:
            encode_cache[text] = sp.encode(text)
        return encode_cache[text]

    probes = {
        "retrieval": retrieval_set(world, encode, cfg, seed),
        "classification": classification_set(world, encode, cfg, seed, seq_len),
    }
    t_probe = time.perf_counter()
    times = {
        "text": t_text - t0,
        "tokenizer": t_tok - t_text,
        "encode": t_ids - t_tok,
        "probes": t_probe - t_ids,
    }
    stats = _stats(
        cfg, key, sp, train_texts, val_texts, train_kinds, train_ids, train_lens, val_ids, probes, times
    )
    _write(out, model_bytes, train_ids, val_ids, train_texts, val_texts, train_kinds, probes, cfg)
    stats["build_seconds"]["total"] = time.perf_counter() - t0
    (out / "stats.json").write_text(json.dumps(stats, indent=1))
    return stats


def _stats(
    cfg, key, sp, train_texts, val_texts, train_kinds, train_ids, train_lens, val_ids, probes, times
) -> dict:
    """Sizes and shares of a built corpus (``stats.json``)."""
    tokens_by_kind = {k: 0 for k in cfg["mixture"]}
    docs_by_kind = {k: 0 for k in cfg["mixture"]}
    for k, n in zip(train_kinds, train_lens.tolist()):
        tokens_by_kind[k] += n
        docs_by_kind[k] += 1
    n_train_tokens = int(len(train_ids))
    stats = {
        "cache_key": key,
        "vocab_size": int(sp.get_piece_size()),
        "train_documents": len(train_texts),
        "val_documents": len(val_texts),
        "train_tokens": n_train_tokens,
        "val_tokens": int(len(val_ids)),
        "train_characters": sum(len(t) for t in train_texts),
        "mean_document_tokens": float(train_lens.mean()),
        "max_document_tokens": int(train_lens.max()),
        "document_share": {k: docs_by_kind[k] / len(train_texts) for k in docs_by_kind},
        "token_share": {k: tokens_by_kind[k] / n_train_tokens for k in tokens_by_kind},
        "probe_items": {name: len(items) for name, items in probes.items()},
        "build_seconds": dict(times),
    }
    return stats


def _write(
    out: Path, model_bytes, train_ids, val_ids, train_texts, val_texts, train_kinds, probes, cfg
) -> None:
    (out / "tokenizer.model").write_bytes(model_bytes)
    np.save(out / "train_ids.npy", train_ids)
    np.save(out / "val_ids.npy", val_ids)
    (out / "train.txt").write_text("\n".join(train_texts))
    (out / "val.txt").write_text("\n".join(val_texts))
    (out / "train_kinds.txt").write_text("\n".join(train_kinds))
    (out / "probes.json").write_text(json.dumps(probes))
    (out / "data_config.json").write_text(json.dumps(cfg, sort_keys=True, indent=1))


def _load(path: Path, cfg: dict) -> Corpus:
    sp = load_tokenizer((path / "tokenizer.model").read_bytes())
    return Corpus(
        vocab_size=int(sp.get_piece_size()),
        tokenizer=sp,
        train_ids=np.load(path / "train_ids.npy"),
        val_ids=np.load(path / "val_ids.npy"),
        probe_sets=json.loads((path / "probes.json").read_text()),
        stats=json.loads((path / "stats.json").read_text()),
        cache_path=path,
        config=cfg,
    )


def _check_probe_lengths(probe_sets: Mapping[str, list[dict]], seq_len: int) -> None:
    for name, items in probe_sets.items():
        longest = max((len(it["tokens"]) for it in items), default=0)
        if longest > seq_len + 1:
            raise ValueError(
                f"data.probes.{name}: items of up to {longest} tokens do not fit seq_len + 1 = "
                f"{seq_len + 1}; "
                f"allowed: items of at most seq_len + 1 tokens"
            )


# what numpy, json and sentencepiece raise on a damaged file
LOAD_ERRORS = (OSError, ValueError, EOFError, RuntimeError, KeyError)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0][:120]}" if text else type(exc).__name__


def _checked_load(path: Path, cfg: dict, hashes: bool) -> tuple[Corpus | None, str | None]:
    """(corpus, None) when the folder passes its check and loads; else (None, what is wrong).
    A file that fails to load although its size is right is named by the hash check."""
    problem = check_cache(path, hashes=hashes)
    if problem is not None:
        return None, problem
    try:
        return _load(path, cfg), None
    except LOAD_ERRORS as exc:
        return None, check_cache(path, hashes=True) or f"a file could not be loaded ({_first_line(exc)})"


def _build_into_place(cfg: dict, seq_len: int, root: Path, path: Path) -> None:
    """Build into a temporary folder, write the manifest last, and rename it over ``path`` (a
    damaged folder is moved aside first and removed). The caller holds the build lock."""
    for stale in root.glob(f"{path.name}.building-*"):  # left by a killed build of this key
        shutil.rmtree(stale, ignore_errors=True)
    tmp = Path(tempfile.mkdtemp(prefix=path.name + ".building-", dir=root))
    try:
        build_corpus(cfg, seq_len, tmp, key=path.name)
        write_manifest(tmp)
        os.chmod(tmp, 0o755)  # mkdtemp makes it owner-only
        if path.exists():
            aside = Path(tempfile.mkdtemp(prefix=path.name + ".building-", dir=root)) / "damaged"
            os.rename(path, aside)
        os.replace(tmp, path)
    except OSError as exc:
        raise CacheError(
            f"{root}: could not build the corpus cache ({exc.strerror or _first_line(exc)}); "
            "nothing there was replaced"
        ) from None
    finally:
        for leftover in root.glob(f"{path.name}.building-*"):
            shutil.rmtree(leftover, ignore_errors=True)


def get_corpus(
    data_cfg: Mapping, seq_len: int, cache_dir: str | os.PathLike | None = None, verify: bool = False
) -> Corpus:
    """The corpus for ``data_cfg`` (the plain dict of the data config group), built once and
    cached. ``verify`` checks every file's SHA-256 against the manifest (sizes are always checked)."""
    cfg = json.loads(json.dumps(dict(data_cfg)))  # plain, detached copy
    check_config(cfg, seq_len)
    root = Path(cache_dir) if cache_dir is not None else default_cache_dir()
    path = root / f"toy-{cache_key(cfg)}"
    corpus, problem = _checked_load(path, cfg, verify) if path.exists() else (None, None)
    if corpus is None:
        with build_lock(root / f"{path.name}.lock"):
            # another process may have built it while this one waited
            corpus, again = _checked_load(path, cfg, verify) if path.exists() else (None, None)
            if corpus is None:
                if path.exists():
                    print(
                        f"corpus cache {path}: {again or problem}; rebuilding it", file=sys.stderr, flush=True
                    )
                _build_into_place(cfg, seq_len, root, path)
                corpus, problem = _checked_load(path, cfg, True)
                if corpus is None:
                    raise CacheError(f"corpus cache {path}: {problem} right after it was built")
    _check_probe_lengths(corpus.probe_sets, seq_len)
    return corpus
