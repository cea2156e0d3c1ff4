"""Attention blocks against the published equations and torch's reference implementations."""

import math

import pytest
import torch
from torch import nn

from ablate.attention import DifferentialAttention, StandardAttention, depth_lambda_init
from ablate.attention.rotary import Rotary

D_MODEL, HEAD_DIM, T = 128, 32, 24


def reference_rotary(x):
    """RoFormer rotation (Su et al. 2021) written with complex numbers: channel pairs
    (i, i + D/2) form z = a + ib, rotated by exp(i m theta_i), theta_i = 10000^(-2i/D)."""
    d = x.shape[-1]
    half = d // 2
    theta = 10000.0 ** (-torch.arange(half, dtype=torch.float64) * 2 / d)
    m = torch.arange(x.shape[-2], dtype=torch.float64)
    rot = torch.polar(torch.ones(len(m), half, dtype=torch.float64), torch.outer(m, theta))
    z = torch.complex(x[..., :half].double(), x[..., half:].double()) * rot
    return torch.cat([z.real, z.imag], -1).to(x.dtype)


def reference_differential(block: DifferentialAttention, x: torch.Tensor) -> torch.Tensor:
    """Ye et al., ICLR 2025 (arXiv:2410.05258), Eq. 1 and the multi-head form, computed head by
    head with explicit softmax from the block's own weights."""
    b, t, _ = x.shape
    h, d = block.n_heads, block.head_dim
    q = reference_rotary((x @ block.q_proj.weight.T).view(b, t, 2 * h, d).transpose(1, 2))
    k = reference_rotary((x @ block.k_proj.weight.T).view(b, t, 2 * h, d).transpose(1, 2))
    v = (x @ block.v_proj.weight.T).view(b, t, h, 2 * d).transpose(1, 2)
    if block.lambda_mode == "learned":
        lam = (
            torch.exp(block.lambda_q1 @ block.lambda_k1)
            - torch.exp(block.lambda_q2 @ block.lambda_k2)
            + block.lambda_init
        )
    else:
        lam = torch.tensor(block.lambda_init)
    future = torch.ones(t, t).triu(1).bool()
    heads = []
    for i in range(h):
        s1 = q[:, i] @ k[:, i].transpose(-1, -2) / math.sqrt(d)
        s2 = q[:, h + i] @ k[:, h + i].transpose(-1, -2) / math.sqrt(d)
        a1 = torch.softmax(s1.masked_fill(future, -math.inf), -1)
        a2 = torch.softmax(s2.masked_fill(future, -math.inf), -1)
        o = (a1 - lam * a2) @ v[:, i]
        if block.head_norm is not None:
            o = o / torch.sqrt(o.pow(2).mean(-1, keepdim=True) + 1e-5) * (1 - block.lambda_init)
        heads.append(o)
    return torch.cat(heads, -1) @ block.out_proj.weight.T


def _randomise_lambda(block):
    if block.lambda_mode == "learned":
        with torch.no_grad():
            for p in (block.lambda_q1, block.lambda_k1, block.lambda_q2, block.lambda_k2):
                p.normal_(0, 0.3)


@pytest.mark.parametrize("head_norm", [True, False])
@pytest.mark.parametrize("lambda_mode", ["learned", "fixed"])
@pytest.mark.parametrize("layer_index", [0, 1, 3, 7])
def test_differential_matches_published_equations(head_norm, lambda_mode, layer_index):
    block = DifferentialAttention(
        D_MODEL, layer_index, 8, HEAD_DIM, head_norm=head_norm, lambda_mode=lambda_mode
    )
    _randomise_lambda(block)
    x = torch.randn(3, T, D_MODEL)
    expected = reference_differential(block, x)
    got = block(x)
    assert (got - expected).abs().max().item() <= 1e-5


@pytest.mark.parametrize("layer, expected", [(1, 0.2), (2, 0.3555), (3, 0.4707), (4, 0.5561)])
def test_lambda_init_depth_schedule(layer, expected):
    # Ye et al. 2025: lambda_init = 0.8 - 0.6 exp(-0.3 (l - 1)); values rounded to 4 decimals.
    assert round(depth_lambda_init(layer), 4) == expected
    block = DifferentialAttention(D_MODEL, layer_index=layer - 1, n_layers=4, head_dim=HEAD_DIM)
    assert round(block.lambda_init, 4) == expected


def test_fixed_lambda_has_no_parameters_and_stays_at_init():
    block = DifferentialAttention(D_MODEL, 2, 4, HEAD_DIM, lambda_mode="fixed", lambda_init=0.5)
    names = [n for n, _ in block.named_parameters()]
    assert not any(n.startswith("lambda") for n in names)
    assert block.lambda_value().item() == pytest.approx(0.5)


def test_differential_heads_and_value_width():
    # Ye et al. 2025: h = d_model / (2 d); values are 2d wide per head.
    block = DifferentialAttention(D_MODEL, 0, 4, HEAD_DIM)
    assert block.n_heads == D_MODEL // (2 * HEAD_DIM)
    assert block.v_proj.weight.shape == (block.n_heads * 2 * HEAD_DIM, D_MODEL)


def test_standard_matches_torch_multihead_attention():
    # Reference: torch.nn.MultiheadAttention with copied weights, causal mask, positions off.
    block = StandardAttention(D_MODEL, 0, 1, HEAD_DIM)
    block.rotary = nn.Identity()
    mha = nn.MultiheadAttention(D_MODEL, D_MODEL // HEAD_DIM, bias=False, batch_first=True)
    with torch.no_grad():
        mha.in_proj_weight.copy_(torch.cat([block.q_proj.weight, block.k_proj.weight, block.v_proj.weight]))
        mha.out_proj.weight.copy_(block.out_proj.weight)
    x = torch.randn(2, T, D_MODEL)
    future = torch.ones(T, T).triu(1).bool()  # True = not allowed, in MultiheadAttention's convention
    expected, _ = mha(x, x, x, attn_mask=future, need_weights=False)
    assert (block(x) - expected).abs().max().item() <= 1e-5


def test_standard_weights_reproduce_the_block_output():
    # attention_weights @ V (the explicit softmax map) reproduces the block's chunked output.
    block = StandardAttention(D_MODEL, 0, 1, HEAD_DIM)
    x = torch.randn(2, T, D_MODEL)
    a = block.attention_weights(x)
    v = block._split(block.v_proj(x))
    o = (a @ v).transpose(1, 2).reshape(x.shape)
    assert (block.out_proj(o) - block(x)).abs().max().item() <= 1e-5


def test_rotary_matches_complex_form_and_depends_on_offset_only():
    # Su et al. 2021: <R_m q, R_n k> depends only on m - n.
    rot = Rotary(HEAD_DIM)
    x = torch.randn(2, 4, 40, HEAD_DIM)
    assert (rot(x) - reference_rotary(x)).abs().max().item() <= 1e-5
    q, k = torch.randn(HEAD_DIM), torch.randn(HEAD_DIM)
    qs = rot(q.expand(40, HEAD_DIM).clone())
    ks = rot(k.expand(40, HEAD_DIM).clone())
    for offset in (0, 3, 11):
        dots = torch.stack([qs[m] @ ks[m - offset] for m in range(offset, 40)])
        assert (dots - dots[0]).abs().max().item() < 1e-4
    assert abs((qs[5] @ ks[2]) - (qs[5] @ ks[4])) > 1e-4  # a different offset does change it


@pytest.mark.parametrize(
    "make",
    [
        lambda: StandardAttention(D_MODEL, 0, 4, HEAD_DIM),
        lambda: StandardAttention(D_MODEL, 0, 4, HEAD_DIM, head_norm=True),
        lambda: StandardAttention(D_MODEL, 0, 4, 2 * HEAD_DIM),
        lambda: DifferentialAttention(D_MODEL, 0, 4, HEAD_DIM),
        lambda: DifferentialAttention(D_MODEL, 2, 4, HEAD_DIM, head_norm=False),
        lambda: DifferentialAttention(D_MODEL, 1, 4, HEAD_DIM, lambda_mode="fixed"),
    ],
)
def test_blocks_are_causal(make):
    block = make()
    x = torch.randn(1, T, D_MODEL)
    for t in (0, 7, T - 2):
        changed = x.clone()
        changed[:, t + 1 :] = torch.randn_like(changed[:, t + 1 :])
        before, after = block(x), block(changed)
        assert torch.allclose(before[:, : t + 1], after[:, : t + 1], atol=1e-6)
        assert not torch.allclose(before[:, t + 1 :], after[:, t + 1 :], atol=1e-6)


def test_attention_rows_sum_to_one_minus_lambda():
    x = torch.randn(2, T, D_MODEL)
    std = StandardAttention(D_MODEL, 0, 4, HEAD_DIM).attention_weights(x)
    assert std.shape == (2, D_MODEL // HEAD_DIM, T, T)
    assert torch.allclose(std.sum(-1), torch.ones(()), atol=1e-5)
    diff = DifferentialAttention(D_MODEL, 2, 4, HEAD_DIM)
    _randomise_lambda(diff)
    w = diff.attention_weights(x)
    assert w.shape == (2, diff.n_heads, T, T)
    lam = diff.lambda_value().item()
    assert torch.allclose(w.sum(-1), torch.full((), 1 - lam), atol=1e-5)
    assert torch.all(w.triu(1) == 0)  # nothing on future positions


@pytest.mark.parametrize(
    "kwargs, words",
    [
        (dict(d_model=100, head_dim=32), ["d_model=100", "32"]),
        (dict(d_model=96, head_dim=32, cls=DifferentialAttention), ["d_model=96", "64"]),
        (
            dict(d_model=128, head_dim=32, cls=DifferentialAttention, lambda_mode="learnt"),
            ["lambda_mode='learnt'", "learned", "fixed"],
        ),
        (
            dict(d_model=128, head_dim=32, cls=DifferentialAttention, lambda_init=1.2),
            ["lambda_init=1.2", "(0, 1)"],
        ),
        (
            dict(d_model=128, head_dim=32, cls=DifferentialAttention, lambda_init=0.0),
            ["lambda_init=0.0", "(0, 1)"],
        ),
        (
            dict(d_model=128, head_dim=32, cls=DifferentialAttention, lambda_init="deep"),
            ["lambda_init='deep'", "depth"],
        ),
    ],
)
def test_bad_arguments_name_the_argument(kwargs, words):
    cls = kwargs.pop("cls", StandardAttention)
    with pytest.raises(ValueError) as err:
        cls(**kwargs)
    for word in words:
        assert word in str(err.value)


def naive_full_window_differential(block: DifferentialAttention, x: torch.Tensor) -> torch.Tensor:
    """The full-window form: (A1 - lambda A2) V with both [time, time] maps from the block's own
    attention_weights (explicit products over every key, future ones masked)."""
    b, t, _ = x.shape
    v = block._values(x)
    o = block.attention_weights(x) @ v
    if block.head_norm is not None:
        o = o / torch.sqrt(o.pow(2).mean(-1, keepdim=True) + 1e-5) * (1 - block.lambda_init)
    return block.out_proj(o.transpose(1, 2).reshape(b, t, -1))


@pytest.mark.parametrize("time", [130, 200])
def test_differential_over_several_causal_chunks_matches_published_equations(time):
    # Ye et al., ICLR 2025, Eq. 1 (reference_differential above); 130 and 200 keys split into
    # 5 and 7 query chunks (the last one shorter), so every off-diagonal block is exercised.
    from ablate.attention.common import causal_chunks

    assert len(causal_chunks(time)) == {130: 5, 200: 7}[time]
    block = DifferentialAttention(D_MODEL, 2, 4, HEAD_DIM)
    _randomise_lambda(block)
    x = torch.randn(2, time, D_MODEL)
    assert (block(x) - reference_differential(block, x)).abs().max().item() <= 1e-5


@pytest.mark.parametrize("time", [40, 130])
def test_differential_gradients_match_autograd_on_the_published_equations(time):
    # The hand-written backward of CausalDifference against autograd through reference_differential
    # (Ye et al., ICLR 2025, Eq. 1): gradients of the input and of every parameter, lambda vectors
    # included, in float64. Tolerance 1e-6 relative to the largest gradient entry: the block's
    # rotary angles come from a float32 buffer, so even the float64 forwards differ by ~1e-8.
    torch.manual_seed(1)
    block = DifferentialAttention(D_MODEL, 2, 4, HEAD_DIM).double()
    _randomise_lambda(block)
    x = torch.randn(2, time, D_MODEL, dtype=torch.float64, requires_grad=True)
    weight = torch.randn(2, time, D_MODEL, dtype=torch.float64)
    inputs = [x, *block.parameters()]
    ours = torch.autograd.grad((block(x) * weight).sum(), inputs)
    theirs = torch.autograd.grad((reference_differential(block, x) * weight).sum(), inputs)
    for a, b in zip(ours, theirs):
        assert (a - b).abs().max().item() <= 1e-6 * b.abs().max().item()


def test_causal_difference_backward_passes_torch_gradcheck():
    # torch.autograd.gradcheck: the analytic backward against finite differences (torch's own
    # reference), over three uneven query ranges.
    from ablate.attention.differential import CausalDifference

    gen = torch.Generator().manual_seed(0)
    q, k = (torch.randn(4, 40, 8, dtype=torch.float64, generator=gen, requires_grad=True) for _ in "qk")
    v = torch.randn(2, 40, 16, dtype=torch.float64, generator=gen, requires_grad=True)
    lam = torch.tensor(0.4, dtype=torch.float64, requires_grad=True)
    ranges = ((0, 16), (16, 32), (32, 40))
    assert torch.autograd.gradcheck(lambda *t: CausalDifference.apply(*t, ranges), (q, k, v, lam))


def test_causal_chunks_cover_the_window_once_in_order():
    from ablate.attention.common import causal_chunks

    for time in (1, 24, 31, 64, 130, 256, 1000):
        chunks = causal_chunks(time)
        assert chunks[0][0] == 0 and chunks[-1][1] == time
        assert all(a[1] == b[0] for a, b in zip(chunks, chunks[1:]))
        assert len(chunks) <= 8 and all(e > s for s, e in chunks)


@pytest.mark.parametrize("head_norm", [True, False])
def test_differential_gradients_match_naive_full_window_form(head_norm):
    # The chunked forward and the full-window form are the same function, so autograd must give
    # the same gradients for every parameter (lambda vectors included) and for the input.
    block = DifferentialAttention(D_MODEL, 1, 4, HEAD_DIM, head_norm=head_norm).double()
    _randomise_lambda(block)
    x = torch.randn(2, 150, D_MODEL, dtype=torch.float64, requires_grad=True)
    target = torch.randn(2, 150, D_MODEL, dtype=torch.float64)
    grads = []
    for forward in (block, lambda t: naive_full_window_differential(block, t)):
        block.zero_grad(set_to_none=True)
        x.grad = None
        (forward(x) * target).sum().backward()
        grads.append([x.grad.clone()] + [p.grad.clone() for p in block.parameters()])
    for fast, naive in zip(*grads):
        assert (fast - naive).abs().max().item() <= 1e-10 * max(1.0, naive.abs().max().item())


def test_differential_declared_flops_count_one_value_product():
    # Ye et al. 2025 shapes: 2h query groups of width d, values 2d wide. The equation needs the
    # scores of both groups and one value product of the difference map: over a full window of
    # seq_len keys, forward FLOPs per token = 2 n (2 h d) + 2 n (h 2d) = 8 n h d.
    block = DifferentialAttention(D_MODEL, 0, 4, HEAD_DIM)
    h, d = block.n_heads, block.head_dim
    for seq_len in (64, 256):
        assert block.core_flops_per_token(seq_len) == 8 * seq_len * h * d


@pytest.mark.parametrize(
    "make",
    [
        lambda: DifferentialAttention(D_MODEL, 1, 4, HEAD_DIM),
        lambda: StandardAttention(D_MODEL, 0, 4, HEAD_DIM, head_norm=True),
    ],
)
def test_fast_kernels_match_the_reference_path_output_and_gradients(make):
    # The reference kernels are the published equations under plain autograd over the full window;
    # the fast ones (causal ranges, hand-written backwards) must give the same output and the same
    # gradients of the input and every parameter, in float64. Standard attention with its head norm
    # on is included (the MultiheadAttention check turns the head norm off).
    from ablate.attention.common import use_kernels

    torch.manual_seed(3)
    block = make().double()
    x = torch.randn(2, 130, D_MODEL, dtype=torch.float64, requires_grad=True)
    results = []
    for kernels in ("fast", "reference"):
        block.zero_grad()
        x.grad = None
        with use_kernels(kernels):
            out = block(x)
        out.pow(2).sum().backward()
        grads = [x.grad.clone()] + [p.grad.clone() for p in block.parameters()]
        results.append((out.detach(), grads))
    (fast, fast_grads), (ref, ref_grads) = results
    assert (fast - ref).abs().max().item() <= 1e-10
    for a, b in zip(fast_grads, ref_grads):
        assert (a - b).abs().max().item() <= 1e-9 * max(1.0, b.abs().max().item())


def test_causal_ranges_tile_every_window():
    from ablate.attention.common import causal_chunks

    for time in list(range(1, 300)) + [1000, 4097]:
        ranges = causal_chunks(time)
        assert ranges[0][0] == 0 and ranges[-1][1] == time
        assert all(a[1] == b[0] for a, b in zip(ranges, ranges[1:]))


@pytest.mark.parametrize("time", [40, 130, 256])
def test_causal_attention_matches_torch_sdpa_output_and_gradients(time):
    # Reference: torch.nn.functional.scaled_dot_product_attention(is_causal=True), torch's own
    # implementation of softmax(Q K^T / sqrt(d) + M) V, against CausalAttention over the shipped
    # causal ranges (5 at 130 keys, the last one shorter, and 8 at 256): output to 1e-5, and the
    # hand-written backward against autograd through SDPA in float64 to 1e-10.
    from ablate.attention.common import CausalAttention, causal_chunks

    ranges = tuple(causal_chunks(time))
    gen = torch.Generator().manual_seed(time)
    shape = (6, time, 16)
    q, k, v = (torch.randn(shape, dtype=torch.float64, generator=gen, requires_grad=True) for _ in "qkv")
    grad = torch.randn(shape, dtype=torch.float64, generator=gen)
    ours = CausalAttention.apply(q, k, v, ranges)
    theirs = nn.functional.scaled_dot_product_attention(q, k, v, is_causal=True)
    assert (ours.float() - theirs.float()).abs().max().item() <= 1e-5
    g_ours = torch.autograd.grad(ours, (q, k, v), grad)
    g_theirs = torch.autograd.grad(theirs, (q, k, v), grad)
    for a, b in zip(g_ours, g_theirs):
        assert (a - b).abs().max().item() <= 1e-10 * b.abs().max().item()


def test_causal_attention_backward_passes_torch_gradcheck():
    # torch.autograd.gradcheck: the analytic backward against finite differences, uneven ranges.
    from ablate.attention.common import CausalAttention

    gen = torch.Generator().manual_seed(0)
    q, k, v = (torch.randn(3, 40, 8, dtype=torch.float64, generator=gen, requires_grad=True) for _ in "qkv")
    ranges = ((0, 16), (16, 32), (32, 40))
    assert torch.autograd.gradcheck(lambda *t: CausalAttention.apply(*t, ranges), (q, k, v))


def test_rotary_backward_matches_autograd_on_the_complex_form():
    # Su et al. 2021 (reference_rotary above, complex numbers under autograd) against the
    # hand-written rotation backward, on a transposed (non-contiguous) input as the blocks pass it.
    rot = Rotary(HEAD_DIM).double()
    base = torch.randn(2, 40, 4, HEAD_DIM, dtype=torch.float64, requires_grad=True)
    grad = torch.randn(2, 4, 40, HEAD_DIM, dtype=torch.float64)
    ours = rot(base.transpose(1, 2))
    assert ours.is_contiguous()
    (g_ours,) = torch.autograd.grad(ours, base, grad)
    (g_ref,) = torch.autograd.grad(reference_rotary(base.transpose(1, 2)), base, grad)
    # the angles come from a float32 buffer, so float64 results agree to ~1e-7, not 1e-12
    assert (g_ours - g_ref).abs().max().item() <= 1e-6
    assert g_ours.is_contiguous()  # the gradient came back in the input's layout: no copy on the way
    assert torch.autograd.gradcheck(lambda t: rot(t), (base.detach()[:1, :6].clone().requires_grad_(),))


@pytest.mark.parametrize("affine", [True, False])
def test_rmsnorm_matches_torch_rms_norm_output_and_gradients(affine):
    # Reference: torch.nn.functional.rms_norm (torch's own RMSNorm, Zhang & Sennrich 2019) under
    # autograd, against the hand-written backward of ablate.norm.RMSNorm; plus gradcheck.
    from ablate.norm import RMSNorm

    torch.manual_seed(0)
    norm = RMSNorm(24, eps=1e-5, elementwise_affine=affine).double()
    if affine:
        with torch.no_grad():
            norm.weight.copy_(torch.randn(24))
    x = torch.randn(3, 7, 24, dtype=torch.float64, requires_grad=True)
    grad = torch.randn(3, 7, 24, dtype=torch.float64)
    inputs = [x, *norm.parameters()]
    ours = norm(x)
    theirs = nn.functional.rms_norm(x, (24,), norm.weight, 1e-5)
    assert (ours - theirs).abs().max().item() <= 1e-12
    for a, b in zip(torch.autograd.grad(ours, inputs, grad), torch.autograd.grad(theirs, inputs, grad)):
        assert (a - b).abs().max().item() <= 1e-12 * max(1.0, b.abs().max().item())
    assert torch.autograd.gradcheck(lambda t: norm(t), (x[:1, :2].detach().clone().requires_grad_(),))
    assert isinstance(norm, nn.RMSNorm) and set(norm.state_dict()) == ({"weight"} if affine else set())
