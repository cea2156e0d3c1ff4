"""SentencePiece tokenizer trained on the generated text, with options fixed for determinism."""

from __future__ import annotations

import io
from typing import Sequence

import sentencepiece as spm

UNK_ID, DOC_START_ID, DOC_END_ID = 0, 1, 2


def train_tokenizer(texts: Sequence[str], vocab_size: int, model_type: str) -> bytes:
    """Train on ``texts`` (one document per item) and return the serialized model.

    Deterministic: no input sampling or shuffling, one thread, identity normalisation (the text
    is plain ASCII), pieces never cross a space (the generator writes
    code digits apart, so each digit is one piece).
    """
    model = io.BytesIO()
    try:
        spm.SentencePieceTrainer.train(
            sentence_iterator=iter(texts),
            model_writer=model,
            vocab_size=vocab_size,
            model_type=model_type,
            character_coverage=1.0,
            normalization_rule_name="identity",
            split_digits=False,
            split_by_whitespace=True,
            input_sentence_size=0,
            shuffle_input_sentence=False,
            max_sentence_length=1 << 16,
            num_threads=1,
            unk_id=UNK_ID,
            bos_id=DOC_START_ID,
            eos_id=DOC_END_ID,
            pad_id=-1,
            minloglevel=2,
        )
    except RuntimeError as err:  # e.g. "Vocabulary size too high"
        first = str(err).strip().splitlines()[-1] if str(err).strip() else type(err).__name__
        raise ValueError(
            f"data.vocab_size={vocab_size}: SentencePiece cannot build this vocabulary from the text "
            f"({first})"
        ) from None
    return model.getvalue()


def load_tokenizer(model_bytes: bytes) -> spm.SentencePieceProcessor:
    return spm.SentencePieceProcessor(model_proto=model_bytes)
