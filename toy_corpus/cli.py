"""``h2h-corpus``: build (or find) the toy corpus for a data config and show what is in it.

    h2h-corpus [--config conf/data/toy.yaml] [--seq-len 256] [--cache-dir DIR] [key=value ...]

Overrides use dotted keys of the data config, e.g. ``vocab_size=512 mixture.facts=0.6``.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from omegaconf import OmegaConf

from .cache import MANIFEST, CacheError
from .corpus import get_corpus

DEFAULT_CONFIG = Path(__file__).resolve().parent.parent / "conf" / "data" / "toy.yaml"


def _show_item(corpus, item: dict, spans: tuple[str, ...]) -> None:
    print(f"  meta: {item['meta']}  ({len(item['tokens'])} tokens)")
    print("  text: " + corpus.decode(item["tokens"]))
    for key in spans:
        pieces = [corpus.decode(item["tokens"][s:e]) for s, e in item.get(key, [])]
        print(f"  {key}: {pieces}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="h2h-corpus", description=__doc__.splitlines()[0])
    parser.add_argument(
        "--config", default=str(DEFAULT_CONFIG), help="data config YAML (default: %(default)s)"
    )
    parser.add_argument(
        "--seq-len", type=int, default=256, help="model window the probes must fit (default: 256)"
    )
    parser.add_argument(
        "--cache-dir", default=None, help="cache folder (default: $HEADTOHEAD_CACHE or ~/.cache/headtohead)"
    )
    parser.add_argument("overrides", nargs="*", help="key=value overrides of the data config")
    args = parser.parse_args(argv)
    try:
        cfg = OmegaConf.load(args.config)
        bad = [o for o in args.overrides if "=" not in o]
        if bad:
            raise ValueError(f"override {bad[0]!r}: must be key=value")
        cfg = OmegaConf.merge(cfg, OmegaConf.from_dotlist(args.overrides))
        data = OmegaConf.to_container(cfg, resolve=True)
        t0 = time.perf_counter()
        corpus = get_corpus(data, args.seq_len, args.cache_dir, verify=True)  # sizes and SHA-256 of each file
        seconds = time.perf_counter() - t0
    except (ValueError, FileNotFoundError, CacheError) as err:
        print(f"h2h-corpus: error: {err}", file=sys.stderr)
        return 2
    s = corpus.stats
    print(
        f"corpus: {corpus.cache_path}  (ready in {seconds:.2f} s; first build took "
        f"{s['build_seconds']['total']:.1f} s)"
    )
    print(f"checked: every file's size and SHA-256 against {MANIFEST}")
    print(f"vocabulary: {corpus.vocab_size} pieces")
    print(
        f"train: {s['train_documents']} documents, {s['train_tokens']:,} tokens, "
        f"{s['train_characters']:,} characters"
    )
    print(f"validation: {s['val_documents']} documents, {s['val_tokens']:,} tokens")
    print(f"tokens per document: mean {s['mean_document_tokens']:.1f}, max {s['max_document_tokens']}")
    print("share of training documents / tokens by kind:")
    for kind in s["document_share"]:
        print(f"  {kind:10s} {s['document_share'][kind]:6.1%} / {s['token_share'][kind]:6.1%}")
    kinds = (corpus.cache_path / "train_kinds.txt").read_text().split("\n")
    docs = corpus.documents("train")
    for kind in s["document_share"]:
        if kind in kinds:
            print(f"\nexample {kind} document:\n  {docs[kinds.index(kind)]}")
    for name, items in corpus.probe_sets.items():
        print(f"\nprobe set {name}: {len(items)} items; example:")
        spans = (
            ("answer_spans", "asked_spans", "distractor_spans") if name == "retrieval" else ("answer_spans",)
        )
        _show_item(corpus, items[len(items) // 2], spans)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
