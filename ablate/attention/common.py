"""Pieces shared by the attention blocks: argument checks, the causal mask and causal query chunks."""

from __future__ import annotations

import contextlib
import contextvars

import torch

from ..checks import positive_int

_FULL_WINDOW = contextvars.ContextVar("full_window", default=False)


@contextlib.contextmanager
def full_window_products():
    """Inside this context :func:`causal_chunks` returns one range, so chunked blocks compute the
    full window as a dense kernel does: the counterpart of forcing the math SDPA backend, used
    where torch's FLOP counter must see the nominal products (``tests/test_compute.py``)."""
    token = _FULL_WINDOW.set(True)
    try:
        yield
    finally:
        _FULL_WINDOW.reset(token)


def require_divisible(name: str, value: int, divisor: int, what: str) -> None:
    if not isinstance(value, int) or value <= 0 or value % divisor:
        raise ValueError(f"{name}={value} must be a positive multiple of {divisor} ({what})")


def require_positive_int(name: str, value) -> None:
    positive_int(name, value)


def require_bool(name: str, value) -> None:
    if not isinstance(value, bool):
        raise ValueError(f"{name}={value!r} must be true or false")


def causal_mask(time: int, device=None) -> torch.Tensor:
    """Boolean ``[time, time]`` mask, True where a query may attend (key index <= query index)."""
    return torch.ones(time, time, dtype=torch.bool, device=device).tril()


def causal_softmax(scores: torch.Tensor) -> torch.Tensor:
    """Row-wise softmax of ``[..., time, time]`` scores with future positions removed."""
    mask = causal_mask(scores.shape[-1], scores.device)
    return scores.masked_fill(~mask, float("-inf")).softmax(dim=-1)


def future_bias(time: int, like: torch.Tensor) -> torch.Tensor:
    """``[time, time]`` additive mask: 0 where a query may attend, -inf on future keys."""
    return torch.full((time, time), float("-inf"), dtype=like.dtype, device=like.device).triu(1)


def causal_chunks(time: int, min_len: int = 32, max_chunks: int = 4) -> list[tuple[int, int]]:
    """Query ranges ``[start, end)`` covering ``0..time``: at most ``max_chunks`` ranges of at
    least ``min_len`` queries (the last may be shorter).

    A causal block needs, for the queries of one range, only the keys ``0..end``: the products
    over later keys are all masked. With ``c`` equal ranges the score and value products cover
    ``(c + 1) / (2c)`` of the full window (5/8 for 4 ranges); more ranges skip more but cost more
    calls, and ``min_len`` 32 / ``max_chunks`` 4 were the fastest on CPU at seq_len 64 and 256
    (PERFORMANCE.md). Inside :func:`full_window_products` it returns ``[(0, time)]``.
    """
    if _FULL_WINDOW.get():
        return [(0, time)]
    length = max(min_len, -(-time // max_chunks))
    return [(start, min(start + length, time)) for start in range(0, time, length)]
