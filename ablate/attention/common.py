"""Pieces shared by the attention blocks: the kernels switch, argument checks, the causal mask,
causal query chunks and the standard block's fast kernel."""

from __future__ import annotations

import contextlib
import contextvars

import torch

__all__ = [
    "KERNELS",
    "use_kernels",
    "reference_kernels",
    "CausalAttention",
    "causal_chunks",
    "causal_mask",
    "causal_softmax",
    "future_bias",
    "range_probabilities",
    "key_grad_buffers",
    "add_into",
    "add_score_grads",
]

KERNELS = ("fast", "reference")
_KERNELS = contextvars.ContextVar("kernels", default="fast")


@contextlib.contextmanager
def use_kernels(name: str):
    """Choose how the shipped blocks compute attention inside this context (``runtime.kernels``):

    - ``fast`` (default): causal query ranges with hand-written backwards
      (:class:`CausalAttention`, ``CausalDifference``), which skip most of the masked half;
    - ``reference``: the published equations under plain autograd over the full window (the
      products the FLOP accounting counts). Slower; the fast kernels are tested against it,
      and ``h2h-train runtime.kernels=reference`` trains with it end to end.
    """
    if name not in KERNELS:
        raise ValueError(f"kernels={name!r} must be one of {', '.join(KERNELS)}")
    token = _KERNELS.set(name)
    try:
        yield
    finally:
        _KERNELS.reset(token)


def reference_kernels() -> bool:
    """True inside ``use_kernels("reference")``."""
    return _KERNELS.get() == "reference"


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


def causal_chunks(time: int, min_len: int = 32, max_chunks: int = 8) -> tuple[tuple[int, int], ...]:
    """Query ranges ``[start, end)`` covering ``0..time``: at most ``max_chunks`` ranges of at
    least ``min_len`` queries (the last may be shorter).

    A causal block needs, for the queries of one range, only the keys ``0..end``: the products
    over later keys are all masked. With ``c`` equal ranges the score and value products cover
    ``(c + 1) / (2c)`` of the full window (9/16 for 8 ranges); more ranges skip more but cost more
    calls. Ranges of 32 queries (``min_len`` 32, ``max_chunks`` 8: 2 ranges at seq_len 64, 8 at
    256) were the fastest on CPU for both shipped blocks at both sizes (PERFORMANCE.md). The fast
    kernels write their outputs and query gradients into uninitialised buffers range by range,
    so the ranges must tile ``0..time`` exactly; that is checked here, where they are made.
    """
    length = max(min_len, -(-time // max_chunks))
    ranges = tuple((start, min(start + length, time)) for start in range(0, time, length))
    ends = [0] + [e for _, e in ranges]
    if not (time > 0 and all(s == ends[i] for i, (s, _) in enumerate(ranges)) and ends[-1] == time):
        raise AssertionError(f"causal ranges {ranges} do not tile 0..{time}")
    return ranges


def range_probabilities(q, k, bias, scale: float, start: int, end: int) -> torch.Tensor:
    """Softmax rows for the queries ``start..end`` over the keys ``0..end``: one ``baddbmm`` with
    the causal mask as a -inf bias, then one softmax. ``q, k`` are ``[G, time, d]``."""
    scores = torch.baddbmm(bias[start:end, :end], q[:, start:end], k[:, :end].transpose(1, 2), alpha=scale)
    return scores.softmax(dim=-1)


def key_grad_buffers(ranges, *like: torch.Tensor) -> tuple[bool, list[torch.Tensor]]:
    """Gradient buffers for the key-side inputs of a chunked backward that walks ``ranges`` last
    first. When the last range reaches the end of the window (as :func:`causal_chunks` ranges
    do), its products cover every key, so they are written into uninitialised buffers and the
    zero fill is skipped; returns (whether the first step writes, the buffers)."""
    full = ranges[-1][1] == like[0].shape[1]
    return full, [torch.empty_like(t) if full else torch.zeros_like(t) for t in like]


def add_into(buffer: torch.Tensor, a, b, end: int, write: bool, alpha=1.0) -> None:
    """``buffer[:, :end] (+)= alpha * a @ b``: written straight into ``buffer`` when ``write``
    (then ``end`` is the whole window), added otherwise."""
    if write:
        torch.baddbmm(buffer, a, b, beta=0, alpha=alpha, out=buffer)
    else:
        buffer[:, :end].add_(torch.bmm(a, b), alpha=alpha)


def add_score_grads(ds, q, k, scale: float, start: int, end: int, dq, dk, write: bool = False) -> None:
    """Write the query gradient of one range and add its key gradient into the shared buffer
    (or write it, see :func:`add_into`), from ``ds``, the gradient of that range's pre-softmax
    scores."""
    dq[:, start:end] = torch.bmm(ds, k[:, :end]).mul_(scale)
    add_into(dk, ds.transpose(1, 2), q[:, start:end], end, write, alpha=scale)


class CausalAttention(torch.autograd.Function):
    r"""``softmax(Q K^T / sqrt(d) + M) V`` over causal ranges of queries, with a hand-written backward.

    Inputs: ``q, k [G, time, d]``, ``v [G, time, dv]`` (G = batch * heads), ``ranges``: the
    ``(start, end)`` query ranges of :func:`causal_chunks`. Output ``[G, time, dv]``.

    Each range multiplies its queries only against the keys up to its end, so the products skip
    most of the masked half of the window. The backward is the chain rule of the softmax with the
    row term taken from the output (``dS = P * (dP - rowsum(dO * O))``, as fused kernels do), and
    it adds every range's key and value gradients into one buffer. On CPU this is faster than
    torch's fused ``scaled_dot_product_attention`` at the shipped sizes (PERFORMANCE.md);
    ``tests/test_attention.py`` checks output and gradients against the softmax equation.
    """

    @staticmethod
    def forward(ctx, q, k, v, ranges):
        scale = q.shape[2] ** -0.5
        bias = future_bias(q.shape[1], q)
        out = v.new_empty(v.shape)
        saved = []
        for s, e in ranges:
            p = range_probabilities(q, k, bias, scale, s, e)
            out[:, s:e] = torch.bmm(p, v[:, :e])
            saved.append(p)
        ctx.ranges = ranges
        ctx.save_for_backward(q, k, v, out, *saved)
        return out

    @staticmethod
    def backward(ctx, grad_out):
        q, k, v, out, *probs = ctx.saved_tensors
        scale = q.shape[2] ** -0.5
        dq = torch.empty_like(q)
        write, (dk, dv) = key_grad_buffers(ctx.ranges, k, v)
        row = (grad_out * out).sum(dim=-1, keepdim=True)
        for (s, e), p in reversed(list(zip(ctx.ranges, probs))):
            go = grad_out[:, s:e]
            add_into(dv, p.transpose(1, 2), go, e, write)
            ds = torch.bmm(go, v[:, :e].transpose(1, 2)).sub_(row[:, s:e]).mul_(p)
            add_score_grads(ds, q, k, scale, s, e, dq, dk, write)
            write = False
        return dq, dk, dv, None
