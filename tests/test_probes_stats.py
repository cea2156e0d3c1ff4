"""Attention shares on spans, outlier statistics, fake quantization and loss by position, each
checked against an outside reference or a value worked out by hand."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
import torch
from test_probes_items import retrieval_set

from ablate.attention import DifferentialAttention, StandardAttention
from ablate.model import Decoder
from ablate.probes.attention import allocation_summary, attention_probe, span_shares
from ablate.probes.outliers import causal_entries, excess_kurtosis, magnitude_stats, outlier_probe
from ablate.probes.position import bucket_means, position_probe
from ablate.probes.quantization import (
    fake_quantize_rows,
    fake_quantize_tensor,
    quantization_probe,
    weight_quantized_copy,
)

# ----------------------------------------------------------------------------- attention shares


def test_span_shares_on_a_hand_built_row():
    row = np.array([0.1, 0.2, 0.3, 0.15, 0.25, 0.9])  # key 5 is in the future of query 4
    asked, distractor, other = span_shares(row, 4, [[1, 3]], [[3, 4]])
    # by hand: the visible row sums to 1; asked = 0.2 + 0.3, distractor = 0.15, other = 0.1 + 0.25
    assert (asked, distractor, other) == pytest.approx((0.5, 0.15, 0.35))


def test_span_shares_of_a_difference_map_are_magnitudes_over_their_sum():
    row = np.array([0.5, -0.2, 0.3, -0.1])  # |row| sums to 1.1
    asked, distractor, other = span_shares(row, 3, [[1, 2]], [[3, 4]])
    assert (asked, distractor, other) == pytest.approx((0.2 / 1.1, 0.1 / 1.1, 0.8 / 1.1))  # by hand
    assert asked + distractor + other == pytest.approx(1.0)


def test_span_shares_stay_bounded_where_a_signed_distractor_mass_crosses_zero():
    # Signed distractor mass 0.1 - 0.1 = 0 would make asked / distractor infinite; the shares stay in [0, 1].
    row = np.array([0.2, 0.7, 0.1, -0.1, 0.1])
    shares = span_shares(row, 4, [[1, 2]], [[2, 4]])
    assert shares == pytest.approx((0.7 / 1.2, 0.2 / 1.2, 0.3 / 1.2))
    assert all(0.0 <= v <= 1.0 for v in shares)


def test_span_shares_count_an_overlap_once_as_asked():
    row = np.full(6, 1 / 6)
    asked, distractor, other = span_shares(row, 5, [[1, 3]], [[2, 5]])
    assert (asked, distractor, other) == pytest.approx((2 / 6, 2 / 6, 2 / 6))  # by hand


def test_an_all_zero_row_is_refused():
    with pytest.raises(ValueError, match="all zero"):
        span_shares(np.zeros(4), 3, [[1, 2]], [[2, 3]])


def test_allocation_summary_means_over_items():
    items = [
        {"answer_spans": [[5, 6]], "asked_spans": [[0, 2]], "distractor_spans": [[2, 4]]},
        {"answer_spans": [[5, 6]], "asked_spans": [[0, 2]], "distractor_spans": [[2, 4]]},
    ]
    # one layer; query position 4, rows over keys 0..4
    rows = [np.array([[0.3, 0.3, 0.1, 0.1, 0.2]]), np.array([[0.1, 0.1, 0.3, 0.3, 0.2]])]
    out = allocation_summary(items, rows)
    assert out["attention/layer0/asked_share"] == pytest.approx(0.4)  # (0.6 + 0.2) / 2
    assert out["attention/layer0/distractor_share"] == pytest.approx(0.4)
    assert out["attention/layer0/other_share"] == pytest.approx(0.2)
    assert not any(k.endswith("asked_to_distractor") for k in out)
    negative = [np.array([[0.6, 0.4, -0.1, -0.1, 0.2]])] * 2  # |row| sums to 1.4
    out = allocation_summary(items, negative)
    assert out["attention/layer0/distractor_share"] == pytest.approx(0.2 / 1.4)


class LookAtKey3(StandardAttention):
    """A block whose effective map puts all weight on key 3 for every query at or after it."""

    def attention_weights(self, x):
        b, t, _ = x.shape
        w = torch.zeros(b, self.n_heads, t, t)
        w[:, :, 3:, 3] = 1.0
        return w


def tiny_decoder(block=StandardAttention, vocab=50, d_model=32, n_layers=2, seq_len=64):
    return Decoder(
        vocab,
        d_model,
        n_layers,
        seq_len,
        lambda i: block(d_model, layer_index=i, n_layers=n_layers, head_dim=8),
    )


def test_attention_probe_reads_the_query_row_through_the_hooks():
    items = retrieval_set(50, [40], [0.0], [1], [1], per_cell=3, seed=4)
    model = tiny_decoder(LookAtKey3)
    for it in items:  # make key 3 part of the asked span, then part of a distractor
        it["asked_spans"], it["distractor_spans"] = [[2, 5]], [[20, 24]]
    out = attention_probe(model, items, batch_tokens=128)
    assert out["attention/layer1/asked_share"] == 1.0 and out["attention/layer1/distractor_share"] == 0.0
    for it in items:
        it["asked_spans"], it["distractor_spans"] = [[20, 24]], [[3, 4]]
    out = attention_probe(model, items, batch_tokens=128)
    assert out["attention/layer0/distractor_share"] == 1.0 and out["attention/layer0/asked_share"] == 0.0
    assert out["attention/n_items"] == 3


@pytest.mark.parametrize("block", [StandardAttention, DifferentialAttention])
def test_attention_shares_are_bounded_and_sum_to_one(block):
    # Shares of |A| per head normalised to 1 (our definition); checked against a direct computation
    # from the block's attention_weights at the query row of the first item.
    items = retrieval_set(50, [40, 64], [0.5], [2], [1, 2], per_cell=1, seed=5)
    model = tiny_decoder(block)
    out = attention_probe(model, items, batch_tokens=128)
    for layer in range(len(model.attention_blocks())):
        shares = [out[f"attention/layer{layer}/{k}_share"] for k in ("asked", "distractor", "other")]
        assert sum(shares) == pytest.approx(1.0, abs=1e-9) and all(0.0 <= v <= 1.0 for v in shares)


def test_attention_shares_equal_a_direct_computation_on_one_item():
    items = retrieval_set(50, [40], [0.5], [2], [1], per_cell=1, seed=6)[:1]
    model = tiny_decoder(DifferentialAttention)
    out = attention_probe(model, items, batch_tokens=128)
    item, captured = items[0], {}
    hook = model.blocks[0].attention.register_forward_hook(lambda m, i, o: captured.setdefault("x", i[0]))
    with torch.no_grad():
        model(torch.tensor([item["tokens"][:-1]]))
        weights = model.blocks[0].attention.attention_weights(captured["x"])[0]  # [heads, t, t]
    hook.remove()
    q = item["answer_spans"][0][0] - 1
    rows = weights[:, q, : q + 1].abs().double()
    row = (rows / rows.sum(-1, keepdim=True)).mean(0).numpy()
    s, e = item["asked_spans"][0]
    assert out["attention/layer0/asked_share"] == pytest.approx(row[s : min(e, q + 1)].sum(), abs=1e-6)


# ----------------------------------------------------------------------------- outliers


def test_magnitude_stats_match_numpy():
    rng = np.random.default_rng(0)
    x = rng.normal(size=5001)
    x[[7, 99, 1234]] = [40.0, -55.0, 12.0]
    got = magnitude_stats(torch.as_tensor(x, dtype=torch.float32))
    a = np.abs(x.astype(np.float32).astype(np.float64))
    top = np.sort(a)[::-1]
    median = np.median(a)  # reference: numpy.median
    assert got["max_abs"] == pytest.approx(55.0)
    assert got["median_abs"] == pytest.approx(median)
    assert got["top1_ratio"] == pytest.approx(top[0] / median)
    assert got["top10_ratio"] == pytest.approx(top[:10].mean() / median)


def test_excess_kurtosis_matches_scipy():
    rng = np.random.default_rng(1)
    for x in (rng.normal(size=4000), rng.laplace(size=4000), rng.uniform(size=4000)):
        t = torch.as_tensor(x)
        # Reference: scipy.stats.kurtosis, Fisher definition (excess), population moments.
        assert excess_kurtosis(t) == pytest.approx(scipy.stats.kurtosis(x, fisher=True, bias=True), rel=1e-9)
    # The Laplace distribution's excess kurtosis is 3 (a textbook closed form, e.g. Johnson, Kotz &
    # Balakrishnan, "Continuous Univariate Distributions", vol. 2; value from memory).
    assert excess_kurtosis(torch.as_tensor(rng.laplace(size=200000))) == pytest.approx(3.0, abs=0.2)


def test_causal_entries_keep_keys_at_or_before_the_query():
    scores = torch.arange(9.0).reshape(1, 1, 3, 3)
    # reference: numpy.tril_indices gives the (q, k <= q) entries in row order
    rows, cols = np.tril_indices(3)
    assert causal_entries(scores).tolist() == scores[0, 0].numpy()[rows, cols].tolist()


def windows_for(seq_len=64, n=4, vocab=50, seed=0):
    rng = np.random.default_rng(seed)
    return rng.integers(3, vocab, size=(n, seq_len + 1)).astype(np.int64)


def test_outlier_probe_hidden_stats_match_a_manual_forward():
    model = tiny_decoder(DifferentialAttention).eval()
    windows = windows_for()
    out = outlier_probe(model, windows, batch_tokens=128)
    with torch.no_grad():  # reference: blocks run one by one, outputs checked with numpy/scipy
        h = model.embed(torch.as_tensor(windows[:, :-1]))
        prev = h  # the residual stream entering each block
        for layer, block in enumerate(model.blocks):
            h = block(h)
            x = h.reshape(-1).double().numpy()
            a = np.abs(x)
            assert out[f"outliers/layer{layer}/hidden_max_abs"] == pytest.approx(a.max(), rel=1e-5)
            assert out[f"outliers/layer{layer}/hidden_top1_ratio"] == pytest.approx(
                a.max() / np.median(a), rel=1e-4
            )
            assert out[f"outliers/layer{layer}/hidden_kurtosis"] == pytest.approx(
                scipy.stats.kurtosis(x), rel=1e-4
            )
            logits = block.attention.attention_logits(block.attn_norm(prev))
            causal = np.abs(causal_entries(logits).double().numpy())
            assert out[f"outliers/layer{layer}/logit_top10_ratio"] == pytest.approx(
                np.sort(causal)[::-1][:10].mean() / np.median(causal), rel=1e-4
            )
            prev = h


def test_outlier_probe_sees_a_planted_outlier_channel():
    model = tiny_decoder()
    windows = windows_for()
    before = outlier_probe(model, windows)
    with torch.no_grad():
        model.blocks[0].ffn.down.weight[5] *= 200.0  # one residual channel becomes huge
    after = outlier_probe(model, windows)
    assert after["outliers/layer0/hidden_top1_ratio"] > 2 * before["outliers/layer0/hidden_top1_ratio"]
    assert after["outliers/layer0/hidden_kurtosis"] > before["outliers/layer0/hidden_kurtosis"] + 10


# ----------------------------------------------------------------------------- quantization


def test_int8_per_channel_round_trip_is_within_half_a_step():
    w = torch.randn(16, 40) * torch.linspace(0.01, 3.0, 16)[:, None]
    q = fake_quantize_rows(w, 8)
    scale = w.abs().amax(dim=1, keepdim=True) / 127
    assert torch.all(
        (q - w).abs() <= scale / 2 + 1e-6
    )  # round-to-nearest error bound, common practice, no source
    steps = q / scale
    assert torch.allclose(steps, steps.round(), atol=1e-4) and steps.abs().max() <= 127 + 1e-4
    # Reference: torch.fake_quantize_per_channel_affine (symmetric: zero point 0, range -127..127).
    ref = torch.fake_quantize_per_channel_affine(
        w, scale[:, 0], torch.zeros(16, dtype=torch.int32), 0, -127, 127
    )
    assert torch.allclose(q, ref, atol=1e-6)


def test_int4_error_is_larger_than_int8_and_zero_rows_stay_zero():
    w = torch.randn(32, 64)
    w[3] = 0.0
    err8 = (fake_quantize_rows(w, 8) - w).abs().mean()
    err4 = (fake_quantize_rows(w, 4) - w).abs().mean()
    assert err4 > 4 * err8
    assert torch.all(fake_quantize_rows(w, 4)[3] == 0)
    scale4 = w.abs().amax(dim=1, keepdim=True).clamp_min(1e-12) / 7
    assert torch.all((fake_quantize_rows(w, 4) - w).abs() <= scale4 / 2 + 1e-6)


def test_per_tensor_activation_quantization_matches_torch():
    x = torch.randn(4, 10, 32) * 3
    scale = float(x.abs().max()) / 127
    # Reference: torch.fake_quantize_per_tensor_affine with zero point 0, range -127..127.
    ref = torch.fake_quantize_per_tensor_affine(x, scale, 0, -127, 127)
    assert torch.allclose(fake_quantize_tensor(x, 8), ref, atol=1e-5)


def test_quantization_probe_leaves_the_model_untouched():
    model = tiny_decoder(DifferentialAttention)
    windows = windows_for()
    before = {k: v.clone() for k, v in model.state_dict().items()}
    with torch.no_grad():
        logits_before = model(torch.as_tensor(windows[:, :-1]))
    out = quantization_probe(model, windows, batch_tokens=128)
    assert all(torch.equal(before[k], v) for k, v in model.state_dict().items())
    with torch.no_grad():
        assert torch.equal(model(torch.as_tensor(windows[:, :-1])), logits_before)  # hooks removed
    assert all(np.isfinite(v) for v in out.values())
    assert out["quantization/loss_w4"] != out["quantization/loss_fp32"]
    assert abs(out["quantization/increase_w8"]) < abs(out["quantization/increase_w4"]) + 1e-3
    clone = weight_quantized_copy(model, 4)
    assert clone.head.weight is clone.embed.weight  # tying survives the copy
    assert not torch.equal(clone.blocks[0].attention.q_proj.weight, model.blocks[0].attention.q_proj.weight)


# ----------------------------------------------------------------------------- position


def test_bucket_means_by_hand():
    losses = np.tile(np.arange(8.0), (3, 1))
    assert [m for _s, _e, m in bucket_means(losses, 4)] == [0.5, 2.5, 4.5, 6.5]
    # uneven: numpy.array_split gives sizes 4, 3, 3
    assert [(s, e) for s, e, _m in bucket_means(np.zeros((1, 10)), 3)] == [(0, 4), (4, 7), (7, 10)]
    with pytest.raises(ValueError, match="position_buckets"):
        bucket_means(losses, 9)


def test_position_probe_agrees_with_torch_cross_entropy():
    model = tiny_decoder()
    windows = windows_for()
    out = position_probe(model, windows, buckets=4, batch_tokens=128)
    ids = torch.as_tensor(windows)
    with torch.no_grad():  # reference: torch.nn.functional.cross_entropy per token
        per_token = torch.nn.functional.cross_entropy(
            model(ids[:, :-1]).transpose(1, 2), ids[:, 1:], reduction="none"
        )
    assert out["position/loss"] == pytest.approx(float(per_token.mean()), rel=1e-5)
    assert out["position/loss_pos16_32"] == pytest.approx(float(per_token[:, 16:32].mean()), rel=1e-5)
    assert set(k for k in out if k.startswith("position/loss_pos")) == {
        "position/loss_pos0_16",
        "position/loss_pos16_32",
        "position/loss_pos32_48",
        "position/loss_pos48_64",
    }
