"""The decoder: norms, shapes, causality and the loss of a fresh model."""

import math

import pytest
import torch
from torch import nn

from ablate.attention import DifferentialAttention, StandardAttention
from ablate.model import Decoder, swiglu_hidden

VOCAB = 512


def make(cls=StandardAttention, **kw):
    return Decoder(
        VOCAB, 128, 4, 64, lambda i: cls(d_model=128, layer_index=i, n_layers=4, head_dim=32), **kw
    )


def test_block_norms_match_the_published_formula():
    # Zhang & Sennrich 2019: y = x / sqrt(mean(x^2) + eps) * g, applied before attention and SwiGLU.
    model = make()
    block = model.blocks[0]
    with torch.no_grad():
        block.attn_norm.weight.normal_()
    x = torch.randn(3, 5, 128)
    by_formula = x / torch.sqrt(x.pow(2).mean(-1, keepdim=True) + 1e-5) * block.attn_norm.weight
    assert (block.attn_norm(x) - by_formula).abs().max().item() <= 1e-5


def test_swiglu_hidden_is_about_eight_thirds():
    # Shazeer 2020: SwiGLU hidden size 8/3 d keeps the parameter count of a 4d two-matrix MLP.
    for d in (64, 128, 256, 384):
        h = swiglu_hidden(d)
        assert h % 8 == 0 and abs(h - 8 * d / 3) < 8


@pytest.mark.parametrize("cls", [StandardAttention, DifferentialAttention])
@pytest.mark.parametrize("tie", [True, False])
def test_fresh_model_loss_is_near_log_vocab(cls, tie):
    # A freshly initialised model predicts nearly uniformly: loss ~ ln(V) (common practice, no source).
    model = make(cls, tie_embeddings=tie)
    ids = torch.randint(0, VOCAB, (8, 65))
    logits = model(ids[:, :-1])
    loss = nn.functional.cross_entropy(logits.reshape(-1, VOCAB), ids[:, 1:].reshape(-1))
    assert abs(loss.item() - math.log(VOCAB)) < 0.1


@pytest.mark.parametrize("cls", [StandardAttention, DifferentialAttention])
def test_decoder_is_causal(cls):
    model = make(cls)
    ids = torch.randint(0, VOCAB, (2, 40))
    changed = ids.clone()
    changed[:, 21:] = (changed[:, 21:] + 1) % VOCAB
    a, b = model(ids), model(changed)
    assert torch.allclose(a[:, :21], b[:, :21], atol=1e-6)
    assert not torch.allclose(a[:, 21:], b[:, 21:], atol=1e-6)


def test_tied_head_shares_the_embedding():
    tied = make(tie_embeddings=True)
    assert tied.head.weight.data_ptr() == tied.embed.weight.data_ptr()
    untied = make(tie_embeddings=False)
    assert untied.head.weight.data_ptr() != untied.embed.weight.data_ptr()


def test_initialisation_scales():
    model = make()
    assert abs(model.embed.weight.std().item() - 0.02) < 0.002
    assert abs(model.blocks[0].ffn.gate.weight.std().item() - 0.02) < 0.002
    residual = 0.02 / math.sqrt(2 * 4)
    assert abs(model.blocks[0].attention.out_proj.weight.std().item() - residual) < 0.1 * residual


def test_same_seed_same_model():
    torch.manual_seed(3)
    a = make()
    torch.manual_seed(3)
    b = make()
    assert all(torch.equal(p, q) for p, q in zip(a.parameters(), b.parameters()))


@pytest.mark.parametrize(
    "kw, word", [(dict(vocab_size=0), "vocab_size=0"), (dict(n_layers=-1), "n_layers=-1")]
)
def test_bad_sizes_raise(kw, word):
    args = dict(
        vocab_size=VOCAB,
        d_model=128,
        n_layers=2,
        seq_len=16,
        attention_factory=lambda i: StandardAttention(128, i, 2),
    )
    args.update(kw)
    with pytest.raises(ValueError, match=word):
        Decoder(**args)


def keyed(cls, seed):
    return make(cls, init_seed=seed)


def test_two_designs_with_one_seed_share_every_matching_tensor():
    # Common random numbers (Law, "Simulation Modeling and Analysis"): same seed, same start
    # wherever name and shape agree, whatever the global generator did before.
    torch.manual_seed(0)
    standard = keyed(StandardAttention, 7)
    torch.manual_seed(99)
    differential = keyed(DifferentialAttention, 7)
    a, b = dict(standard.named_parameters()), dict(differential.named_parameters())
    shared = [n for n in a if n in b and a[n].shape == b[n].shape]
    assert len(shared) == len(a)  # every tensor of standard attention has a twin in the differential model
    assert all(torch.equal(a[n], b[n]) for n in shared)
    only_differential = set(b) - set(a)
    assert only_differential and all("lambda_" in n for n in only_differential)


def test_keyed_init_differs_across_seeds_and_keeps_the_scales():
    a, b = keyed(DifferentialAttention, 1), keyed(DifferentialAttention, 2)
    assert not torch.equal(a.embed.weight, b.embed.weight)
    assert not torch.equal(a.blocks[0].attention.lambda_q1, b.blocks[0].attention.lambda_q1)
    assert abs(a.embed.weight.std().item() - 0.02) < 0.002
    residual = 0.02 / math.sqrt(2 * 4)
    assert abs(a.blocks[1].ffn.down.weight.std().item() - residual) < 0.1 * residual
    assert abs(a.blocks[0].attention.lambda_q1.std().item() - 0.1) < 0.05  # 32 draws of N(0, 0.1^2)
    # tensors within one model are drawn from separate streams, not one stream reused
    assert not torch.equal(a.blocks[0].attention.q_proj.weight, a.blocks[0].attention.k_proj.weight)


def test_an_a_a_pair_trains_to_the_same_loss_exactly():
    # Two runs of one design with one seed: difference exactly 0 (a paired A/A comparison).
    losses = []
    for noise in (0, 1):
        torch.manual_seed(noise)  # the global generator must not matter
        model = keyed(DifferentialAttention, 3)
        opt = torch.optim.AdamW(model.parameters(), lr=1e-3)
        ids = torch.randint(0, VOCAB, (2, 33), generator=torch.Generator().manual_seed(5))
        for _ in range(3):
            loss = nn.functional.cross_entropy(model(ids[:, :-1]).reshape(-1, VOCAB), ids[:, 1:].reshape(-1))
            opt.zero_grad()
            loss.backward()
            opt.step()
        losses.append(loss.item())
    assert losses[0] == losses[1]


# --- the training loss: head and cross-entropy in one pass (ablate.loss) -----------------------
# Reference: torch's nn.functional.cross_entropy over the logits h @ W^T (an outside
# implementation of the same function), in float64 so only the summation order can differ.


@pytest.mark.parametrize("n, rows", [(37, 8), (64, 64), (5, 64)])
def test_head_loss_matches_torch_cross_entropy(n, rows):
    from ablate.loss import head_loss

    gen = torch.Generator().manual_seed(n)
    h = torch.randn(n, 12, generator=gen, dtype=torch.float64, requires_grad=True)
    w = torch.randn(50, 12, generator=gen, dtype=torch.float64, requires_grad=True)
    t = torch.randint(0, 50, (n,), generator=gen)
    ref = nn.functional.cross_entropy(h @ w.t(), t)
    (ref * 3.0).backward()  # an upstream factor must reach both gradients
    ref_h, ref_w = h.grad.clone(), w.grad.clone()
    h.grad = w.grad = None
    got = head_loss(h, w, t, rows=rows)
    (got * 3.0).backward()
    assert abs(got.item() - ref.item()) < 1e-12
    torch.testing.assert_close(h.grad, ref_h, rtol=1e-10, atol=1e-12)
    torch.testing.assert_close(w.grad, ref_w, rtol=1e-10, atol=1e-12)
    with torch.no_grad():  # the loss-only path gives the same number
        assert abs(head_loss(h, w, t, rows=rows).item() - ref.item()) < 1e-12


def test_head_loss_gradcheck_and_errors():
    from ablate.loss import head_loss

    gen = torch.Generator().manual_seed(1)
    h = torch.randn(7, 4, generator=gen, dtype=torch.float64, requires_grad=True)
    w = torch.randn(9, 4, generator=gen, dtype=torch.float64, requires_grad=True)
    t = torch.randint(0, 9, (7,), generator=gen)
    assert torch.autograd.gradcheck(lambda a, b: head_loss(a, b, t, rows=3), (h, w))
    with pytest.raises(ValueError, match="do not match"):
        head_loss(h, w[:, :3], t)
    with pytest.raises(ValueError, match="targets"):
        head_loss(h, w, t[:3])
    assert math.isnan(head_loss(h[:0], w, t[:0]).item())  # empty, as cross_entropy gives


@pytest.mark.parametrize("masked", [False, True])
def test_decoder_loss_equals_cross_entropy_of_its_logits(masked):
    model = make(StandardAttention).double()
    ids = torch.randint(0, VOCAB, (3, 17), generator=torch.Generator().manual_seed(2))
    mask = torch.rand(3, 16, generator=torch.Generator().manual_seed(3)) < 0.4 if masked else None
    logits = model(ids[:, :-1])
    targets = ids[:, 1:]
    ref = (
        nn.functional.cross_entropy(logits[mask], targets[mask])
        if masked
        else nn.functional.cross_entropy(logits.reshape(-1, VOCAB), targets.reshape(-1))
    )
    ref.backward()
    ref_grads = {k: p.grad.clone() for k, p in model.named_parameters()}
    model.zero_grad(set_to_none=True)
    got = model(ids[:, :-1], targets, mask)
    got.backward()
    assert abs(got.item() - ref.item()) < 1e-12
    for k, p in model.named_parameters():
        torch.testing.assert_close(p.grad, ref_grads[k], rtol=1e-9, atol=1e-12, msg=k)
    with pytest.raises(ValueError, match="needs targets"):
        model(ids[:, :-1], mask=torch.ones(3, 16, dtype=torch.bool))


def test_optimizer_step_is_the_adamw_update():
    # Loshchilov & Hutter 2019 ("Decoupled Weight Decay Regularization", Algorithm 2) as torch's
    # AdamW documentation writes it: theta <- theta (1 - lr wd); m, v moving averages;
    # theta <- theta - lr * (m / (1 - b1^t)) / (sqrt(v / (1 - b2^t)) + eps). Decay on 2-D tensors only.
    from ablate.optim import build_optimizer

    lr, (b1, b2), wd, eps = 1e-2, (0.9, 0.95), 0.1, 1e-8
    model = make(StandardAttention)
    opt = build_optimizer(model, lr, (b1, b2), wd, eps)
    params = [p for p in model.parameters()]
    theta = [p.detach().clone().double() for p in params]
    m = [torch.zeros_like(t) for t in theta]
    v = [torch.zeros_like(t) for t in theta]
    gen = torch.Generator().manual_seed(4)
    for step in range(1, 4):
        for i, p in enumerate(params):
            p.grad = torch.randn(p.shape, generator=gen)
            g = p.grad.double()
            decay = wd if p.dim() >= 2 else 0.0
            theta[i] = theta[i] * (1 - lr * decay)
            m[i] = b1 * m[i] + (1 - b1) * g
            v[i] = b2 * v[i] + (1 - b2) * g * g
            theta[i] = theta[i] - lr * (m[i] / (1 - b1**step)) / ((v[i] / (1 - b2**step)).sqrt() + eps)
        opt.step()
    for p, t in zip(params, theta):
        torch.testing.assert_close(p.detach().double(), t, rtol=1e-5, atol=1e-6)
