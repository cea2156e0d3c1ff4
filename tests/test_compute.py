"""Parameter and FLOP accounting against Kaplan et al. 2020 and torch's FLOP counter."""

import pytest
from conftest import NAMED_ATTENTION
from torch.nn.attention import SDPBackend, sdpa_kernel

from ablate.attention.common import use_kernels
from ablate.compute import (
    account,
    count_params,
    measure_flops_per_token,
    ratios,
    steps_from_budget,
)
from ablate.config import build_model, compose

VOCAB = 1024


def tiny(attention, *more):
    # The data group is dropped so these tests do not need the corpus.
    return build_model(compose([f"attention={attention}", "~data", *more]), VOCAB)


def test_standard_and_differential_parameter_counts_match():
    std, diff = count_params(tiny("standard"))[0], count_params(tiny("differential"))[0]
    assert abs(diff / std - 1) <= 0.005


@pytest.mark.parametrize("attention", ["standard", "differential"])
def test_non_embedding_params_closed_form_and_kaplan(attention):
    model = tiny(attention)
    L, d, h = model.n_layers, model.d_model, model.ffn_hidden
    norms = 2 * L * d + d  # two RMSNorm gains per block and the final one
    lam = 4 * model.blocks[0].attention.head_dim * L if attention == "differential" else 0
    _, non_embedding = count_params(model)
    assert non_embedding == L * (4 * d * d + 3 * d * h) + norms + lam
    # Kaplan et al. 2020, Eq. 2.1: N ~ 12 L d^2 (d_ff = 4d, here SwiGLU at 8/3 d with 3 matrices).
    assert abs(non_embedding / (12 * L * d**2) - 1) <= 0.05


@pytest.mark.parametrize("attention", NAMED_ATTENTION)
def test_flops_per_token_match_torch_flop_counter(attention):
    # Reference: torch.utils.flop_counter.FlopCounterMode on one forward+backward pass. With the
    # reference kernels the shipped blocks compute the products their accounting counts (the
    # equation over the full window: no causal ranges; differential's one value product of the
    # difference map); the math SDPA backend is forced for a user block that calls SDPA, since the
    # counter does not see inside the fused kernel.
    model = tiny(attention, "model.seq_len=128")
    with sdpa_kernel(SDPBackend.MATH), use_kernels("reference"):
        measured = measure_flops_per_token(model)
    assert abs(account(model).flops_per_token / measured - 1) <= 0.02


def test_training_flops_are_about_six_n_plus_attention():
    # Kaplan et al. 2020: C ~ 6N per token (forward 2N, backward 4N), plus the attention term;
    # Hoffmann et al. 2022, appendix F (from memory): forward logits 2 n_ctx d_attn and value
    # reduction 2 n_ctx d_attn per token and layer.
    model = tiny("standard")
    acc = account(model)
    n = acc.non_embedding_params
    six_n = 6 * n
    attention = 3 * model.n_layers * (2 + 2) * model.seq_len * model.d_model
    head = 6 * model.d_model * VOCAB
    assert abs(acc.flops_per_token / (six_n + attention + head) - 1) < 0.01


def test_ratios_against_closed_forms():
    # Closed forms: the differential model adds 4 lambda vectors of head_dim per layer; per token and
    # layer its score and value products cost 4 T d (scores of 2h groups of width d: 2 T d; one
    # value product of the difference map, 2h d wide: 2 T d), as standard attention's 4 T d; linear
    # maps cost 2 x their weights (Kaplan et al. 2020).
    diff_model, std_model = tiny("differential"), tiny("standard")
    r = ratios(account(diff_model), account(std_model))
    L, d, T = std_model.n_layers, std_model.d_model, std_model.seq_len
    params = count_params(std_model)[0]
    assert r["params_ratio"] == pytest.approx(
        (params + 4 * diff_model.blocks[0].attention.head_dim * L) / params
    )
    linear = 2 * (L * (4 * d * d + 3 * d * std_model.ffn_hidden) + d * VOCAB)
    assert r["flops_ratio"] == pytest.approx((linear + L * 4 * T * d) / (linear + L * 4 * T * d))


def test_user_variant_without_declared_flops_is_measured():
    from examples.gated_attention import GatedAttention

    from ablate.model import Decoder

    model = Decoder(VOCAB, 128, 2, 64, lambda i: GatedAttention(128, i, 2, 32))
    declared = Decoder(
        VOCAB, 128, 2, 64, lambda i: __import__("ablate").attention.StandardAttention(128, i, 2, 32)
    )
    with sdpa_kernel(SDPBackend.MATH):
        assert account(model).flops_per_token == pytest.approx(account(declared).flops_per_token, rel=0.01)


def test_steps_from_budget():
    assert steps_from_budget("tokens", 4096, 1e6, tokens=1e6) == 244
    # matching FLOPs: a block twice as expensive per token gets half the steps
    assert steps_from_budget("flops", 4096, 2e6, flops=2e12) == 244  # floor(2e12 / (2e6 * 4096))
    assert steps_from_budget("flops", 4096, 2e6, flops=1e12) == 122
    with pytest.raises(ValueError, match="budget.match='both'"):
        steps_from_budget("both", 4096, 1e6, tokens=1)
    with pytest.raises(ValueError, match="budget.tokens"):
        steps_from_budget("tokens", 4096, 1e6, tokens=-5)
