"""Pieces shared by the probes: eval mode, batching items by length, teacher-forced predictions,
span checks, activation capture with hooks, and fixed validation windows.

A probe item is a dict with ``tokens`` (a list of ids, at most ``seq_len + 1`` long) and
``answer_spans`` (``[start, end)`` token indices). The model reads ``tokens[:-1]``; its output at
position ``p`` predicts ``tokens[p + 1]`` (teacher forcing).
"""

from __future__ import annotations

import contextlib
from typing import Iterator, Sequence

import numpy as np
import torch
from torch import nn

from toy_corpus.batches import validation_windows as corpus_windows

DEFAULT_BATCH_TOKENS = 8192


@contextlib.contextmanager
def evaluating(model: nn.Module):
    """``model.eval()`` and ``torch.no_grad()`` for the duration; the previous mode is restored."""
    was_training = model.training
    model.eval()
    try:
        with torch.no_grad():
            yield
    finally:
        model.train(was_training)


def check_spans(tokens: Sequence[int], spans: Sequence[Sequence[int]], what: str) -> None:
    """Each span ``[s, e)`` must satisfy ``1 <= s < e <= len(tokens)`` (position 0 has no prediction)."""
    for span in spans:
        s, e = int(span[0]), int(span[1])
        if not 1 <= s < e <= len(tokens):
            raise ValueError(
                f"{what}: span [{s}, {e}) must satisfy 1 <= start < end <= len(tokens) = {len(tokens)}"
            )


def spans_correct(
    predictions: np.ndarray, tokens: Sequence[int], spans: Sequence[Sequence[int]]
) -> list[bool]:
    """Exact match per span under teacher forcing.

    ``predictions[p]`` is the model's argmax at position ``p`` (a guess for ``tokens[p + 1]``).
    Span ``[s, e)`` is correct when ``predictions[s-1 : e-1] == tokens[s : e]`` everywhere; for exact
    match this equals greedy decoding, since greedy decoding stays on the reference tokens for as
    long as every earlier token of the span was right.
    """
    check_spans(tokens, spans, "answer_spans")
    target = np.asarray(tokens)
    out = []
    for s, e in spans:
        s, e = int(s), int(e)
        out.append(bool(np.array_equal(predictions[s - 1 : e - 1], target[s:e])))
    return out


def length_batches(lengths: Sequence[int], batch_tokens: int) -> list[list[int]]:
    """Indices grouped so that items of similar length share a batch of at most ``batch_tokens``
    padded tokens (a single item longer than that gets a batch of its own)."""
    if batch_tokens <= 0:
        raise ValueError(f"probes.batch_tokens={batch_tokens}: must be a positive integer")
    order = sorted(range(len(lengths)), key=lambda i: (lengths[i], i))
    batches: list[list[int]] = []
    current: list[int] = []
    for i in order:
        width = lengths[i]  # sorted ascending, so the newest item is the widest
        if current and (len(current) + 1) * width > batch_tokens:
            batches.append(current)
            current = []
        current.append(i)
    if current:
        batches.append(current)
    return batches


def padded_inputs(items: Sequence[dict], indices: Sequence[int], device) -> tuple[torch.Tensor, list[int]]:
    """``tokens[:-1]`` of the chosen items, right-padded with 0 to one width.

    Right padding is harmless: the model is causal, so positions before the padding never see it.
    """
    rows = [list(items[i]["tokens"][:-1]) for i in indices]
    width = max(len(r) for r in rows)
    ids = torch.zeros(len(rows), width, dtype=torch.long)
    for b, r in enumerate(rows):
        ids[b, : len(r)] = torch.as_tensor(r, dtype=torch.long)
    return ids.to(device), [len(r) for r in rows]


def check_item_lengths(items: Sequence[dict], seq_len: int, what: str) -> None:
    for k, item in enumerate(items):
        n = len(item["tokens"])
        if not 2 <= n <= seq_len + 1:
            raise ValueError(
                f"{what} item {k}: {n} tokens; must be between 2 and seq_len + 1 = {seq_len + 1}"
            )


def item_batches(
    items: Sequence[dict], batch_tokens: int, device
) -> Iterator[tuple[list[int], torch.Tensor, list[int]]]:
    """Yields ``(indices, ids [b, width], lengths)`` over all items, grouped by length."""
    for idx in length_batches([len(it["tokens"]) - 1 for it in items], batch_tokens):
        ids, lengths = padded_inputs(items, idx, device)
        yield idx, ids, lengths


def attention_modules(model: nn.Module) -> list[nn.Module]:
    blocks = getattr(model, "blocks", None)
    if blocks is None or not all(hasattr(b, "attention") for b in blocks):
        raise TypeError("probes need a decoder with model.blocks[i].attention (ablate.model.Decoder)")
    return [b.attention for b in blocks]


@contextlib.contextmanager
def capture(modules: Sequence[nn.Module], what: str = "input"):
    """Records the ``"input"`` (first positional) or ``"output"`` of each module during forward
    passes; yields the list (one slot per module, overwritten by each pass). Hooks go on exit."""
    store: list[torch.Tensor | None] = [None] * len(modules)

    def recorder(slot: int):
        def hook(_module, inputs, output):
            store[slot] = (inputs[0] if what == "input" else output).detach()

        return hook

    handles = [m.register_forward_hook(recorder(i)) for i, m in enumerate(modules)]
    try:
        yield store
    finally:
        for h in handles:
            h.remove()


def capture_attention_inputs(model: nn.Module):
    """The input of every ``model.blocks[i].attention`` (the normed hidden state)."""
    return capture(attention_modules(model), "input")


def capture_block_outputs(model: nn.Module):
    """The output of every ``model.blocks[i]`` (the residual stream after the block)."""
    attention_modules(model)
    return capture(list(model.blocks), "output")


def validation_windows(val_ids: np.ndarray, seq_len: int, n_windows: int) -> np.ndarray:
    """Fixed validation windows ``int64 [n, seq_len + 1]``, chosen by the corpus package (the same
    windows the trainer's validation loss reads)."""

    return corpus_windows(np.asarray(val_ids), seq_len, n_windows)


def window_token_losses(model: nn.Module, windows: np.ndarray, batch_tokens: int, device) -> torch.Tensor:
    """Cross-entropy (nats) of every next-token prediction, ``[n_windows, seq_len]`` (float64, CPU).
    Call inside :func:`evaluating`."""
    windows_t = torch.as_tensor(np.asarray(windows), dtype=torch.long)
    per_batch = max(1, batch_tokens // max(1, windows_t.shape[1] - 1))
    rows = []
    for start in range(0, windows_t.shape[0], per_batch):
        chunk = windows_t[start : start + per_batch].to(device)
        logits = model(chunk[:, :-1])
        loss = nn.functional.cross_entropy(logits.transpose(1, 2).float(), chunk[:, 1:], reduction="none")
        rows.append(loss.double().cpu())
    return torch.cat(rows)


def spread_select(items: Sequence[dict], max_items: int | None) -> list[dict]:
    """All items, or ``max_items`` of them at evenly spaced indices (so every cell of an ordered
    grid keeps a share)."""
    if max_items is None or max_items >= len(items):
        return list(items)
    if max_items <= 0:
        raise ValueError(f"probes.max_items={max_items}: must be a positive integer or null")
    picks = np.unique(np.linspace(0, len(items) - 1, max_items).round().astype(int))
    return [items[i] for i in picks]


def depth_label(depth: float) -> str:
    """``0.5 -> '0.5'``, ``1.0 -> '1'`` (shortest form, as used in key names)."""
    return f"{float(depth):g}"
