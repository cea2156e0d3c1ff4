"""Validation loss by position in the window.

The ``seq_len`` predicting positions ``0 .. seq_len - 1`` are cut into ``buckets`` contiguous
ranges of (nearly) equal size (``numpy.array_split``); each key is the mean cross-entropy (nats)
over the windows and the positions of one range: ``position/loss_pos<start>_<end>`` with ``end``
exclusive, plus ``position/loss`` over all positions.
"""

from __future__ import annotations

import numpy as np
from torch import nn

from .common import DEFAULT_BATCH_TOKENS, evaluating, window_token_losses


def bucket_means(token_losses: np.ndarray, buckets: int) -> list[tuple[int, int, float]]:
    """``(start, end, mean)`` of ``token_losses [windows, positions]`` over position ranges."""
    losses = np.asarray(token_losses, dtype=np.float64)
    n_pos = losses.shape[1]
    if not isinstance(buckets, int) or isinstance(buckets, bool) or not 1 <= buckets <= n_pos:
        raise ValueError(
            f"probes.position_buckets={buckets!r}: must be an integer between 1 and seq_len = {n_pos}"
        )
    out = []
    for chunk in np.array_split(np.arange(n_pos), buckets):
        out.append((int(chunk[0]), int(chunk[-1]) + 1, float(losses[:, chunk].mean())))
    return out


def position_probe(
    model: nn.Module,
    windows: np.ndarray,
    buckets: int = 8,
    device="cpu",
    batch_tokens: int = DEFAULT_BATCH_TOKENS,
) -> dict[str, float]:
    with evaluating(model):
        losses = window_token_losses(model, windows, batch_tokens, device).numpy()
    out = {f"position/loss_pos{s}_{e}": v for s, e, v in bucket_means(losses, buckets)}
    out["position/loss"] = float(losses.mean())
    return out
