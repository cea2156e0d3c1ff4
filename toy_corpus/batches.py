"""Training windows: a batch for step s is a pure function of (seed, s), so resuming is exact.

Windows start at document starts (the ``<s>`` token, id ``DOC_START_ID``): a fact entry or a
classification episode is then always read from its beginning, never cut so that its questions
lose their facts. A window of ``seq_len + 1`` tokens may run on into the following documents.
"""

from __future__ import annotations

import numpy as np

from .tokenizer import DOC_START_ID


def document_starts(ids: np.ndarray, seq_len: int) -> np.ndarray:
    """Offsets of every document start from which a full window of ``seq_len + 1`` tokens fits."""
    if ids.ndim != 1:
        raise ValueError(f"ids: must be a 1-D array, got shape {ids.shape}")
    starts = np.flatnonzero(ids == DOC_START_ID)
    starts = starts[starts + seq_len + 1 <= len(ids)]
    if len(starts) == 0:
        raise ValueError(
            f"ids: no document start (id {DOC_START_ID}) leaves room for a window of seq_len + 1 = "
            f"{seq_len + 1} "
            f"tokens in {len(ids)} tokens"
        )
    return starts.astype(np.int64)


class WindowBatches:
    """``get(step)`` -> int64 ``[batch_size, seq_len + 1]``: windows at document starts drawn with
    ``numpy.random.default_rng([seed, step])`` (with replacement)."""

    def __init__(self, ids: np.ndarray, seq_len: int, batch_size: int, seed: int):
        for name, v in (("seq_len", seq_len), ("batch_size", batch_size)):
            if not isinstance(v, (int, np.integer)) or v <= 0:
                raise ValueError(f"{name}={v!r}: must be a positive integer")
        if not isinstance(seed, (int, np.integer)) or seed < 0:
            raise ValueError(f"seed={seed!r}: must be an integer >= 0")
        self.ids, self.seq_len, self.batch_size, self.seed = ids, int(seq_len), int(batch_size), int(seed)
        self.starts = document_starts(ids, self.seq_len)
        self._offsets = np.arange(self.seq_len + 1)

    def get(self, step: int) -> np.ndarray:
        if step < 0:
            raise ValueError(f"step={step}: must be >= 0")
        rng = np.random.default_rng([self.seed, int(step)])
        picks = self.starts[rng.integers(0, len(self.starts), size=self.batch_size)]
        return self.ids[picks[:, None] + self._offsets].astype(np.int64)


def validation_windows(ids: np.ndarray, seq_len: int, n_windows: int) -> np.ndarray:
    """``n_windows`` fixed windows (int64 ``[n, seq_len + 1]``) at evenly spaced document starts."""
    starts = document_starts(ids, seq_len)
    if n_windows <= 0:
        raise ValueError(f"n_windows={n_windows}: must be >= 1")
    if n_windows > len(starts):
        raise ValueError(
            f"n_windows={n_windows}: only {len(starts)} document starts leave room for a window of "
            "seq_len + 1"
        )
    chosen = starts[np.linspace(0, len(starts) - 1, n_windows).round().astype(np.int64)]
    return ids[chosen[:, None] + np.arange(seq_len + 1)].astype(np.int64)
