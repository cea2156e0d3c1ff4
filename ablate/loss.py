"""The training loss: mean next-token cross-entropy of the output head, head and loss in one pass.

``loss = mean_i ( logsumexp(z_i) - z_i[t_i] )`` with ``z_i = W h_i`` (``W [vocab, d_model]``, the
head's weight). Its gradient is ``dz_i = (softmax(z_i) - onehot(t_i)) / N``, ``dh = dz W`` and
``dW = dz^T h``.

:func:`head_loss` computes the logits in chunks of rows (at most 16 MiB of float32 logits at a
time, so a large vocabulary does not need a full ``[N, vocab]`` block) and turns each chunk's
logits into ``dz`` in place and then into ``dh`` and ``dW`` right away: no log-probabilities are
stored, no zero-filled gradient of the logits is made, and the backward only scales the saved
``dh, dW`` by the incoming gradient. It is the same function as
``cross_entropy(h @ W.T, t)`` (``tests/test_model.py`` checks loss and gradients against torch's
``nn.functional.cross_entropy``); on CPU the head and loss take less time this way
(PERFORMANCE.md).
"""

from __future__ import annotations

import torch


def chunk_rows(vocab: int, target_bytes: int = 16 << 20, element_bytes: int = 4) -> int:
    """Rows per chunk: a ``[rows, vocab]`` float32 block of at most 16 MiB, at least 64 rows.
    Smaller chunks (2-4 MiB) were slower in the training step at both shipped sizes
    (PERFORMANCE.md)."""
    return max(64, target_bytes // (element_bytes * vocab))


def head_loss(
    h: torch.Tensor, weight: torch.Tensor, targets: torch.Tensor, rows: int | None = None
) -> torch.Tensor:
    """Mean cross-entropy of ``h [N, d] @ weight[V, d]^T`` against ``targets [N]`` (int64 ids).

    Where autograd needs a gradient (grad mode on and ``h`` or ``weight`` requiring one) the
    gradient is formed in the forward (:class:`HeadLoss`); otherwise only the loss is computed.
    ``N == 0`` gives NaN, as ``cross_entropy`` does for an empty batch."""
    if h.dim() != 2 or weight.dim() != 2 or h.shape[1] != weight.shape[1]:
        raise ValueError(f"head_loss: h {tuple(h.shape)} and weight {tuple(weight.shape)} do not match")
    if targets.shape != h.shape[:1]:
        raise ValueError(f"head_loss: targets {tuple(targets.shape)} must be [{h.shape[0]}]")
    rows = rows or chunk_rows(weight.shape[0])
    if torch.is_grad_enabled() and (h.requires_grad or weight.requires_grad):
        return HeadLoss.apply(h, weight, targets, rows)
    with torch.no_grad():
        return _chunked(h, weight, targets, rows, None, None)


def _chunked(h, weight, targets, rows, dh, dw) -> torch.Tensor:
    """The summed-then-averaged loss; with ``dh, dw`` buffers also the mean loss's gradients."""
    n = h.shape[0]
    total = h.new_zeros(())
    for start in range(0, n, rows):
        end = min(start + rows, n)
        t = targets[start:end, None]
        z = h[start:end] @ weight.t()
        picked = z.gather(1, t)
        top = z.amax(dim=1, keepdim=True)
        z.sub_(top).exp_()
        sums = z.sum(dim=1, keepdim=True)
        total += (sums.log() + top - picked).sum()
        if dh is None:
            continue
        z.mul_(sums.reciprocal_().mul_(1.0 / n))  # softmax / N
        z.scatter_add_(1, t, z.new_full(t.shape, -1.0 / n))  # - onehot / N
        torch.mm(z, weight, out=dh[start:end])
        if start == 0:
            torch.mm(z.t(), h[start:end], out=dw)
        else:
            dw.addmm_(z.t(), h[start:end])
    return total / n


class HeadLoss(torch.autograd.Function):
    """:func:`head_loss` with the gradient formed in the forward; the backward scales it."""

    @staticmethod
    def forward(ctx, h, weight, targets, rows: int):
        dh, dw = torch.empty_like(h), torch.empty_like(weight)
        if h.shape[0] == 0:  # no chunk writes them
            dh.zero_()
            dw.zero_()
        loss = _chunked(h, weight, targets, rows, dh, dw)
        ctx.save_for_backward(dh, dw)
        return loss

    @staticmethod
    def backward(ctx, grad):
        dh, dw = ctx.saved_tensors
        return (
            dh * grad if ctx.needs_input_grad[0] else None,
            dw * grad if ctx.needs_input_grad[1] else None,
            None,
            None,
        )
