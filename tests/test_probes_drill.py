"""Drill probes: a hand-built lookup head scores accuracy 1.0 and puts all its weight on the asked
pair; shares of real blocks are bounded and sum to 1; a signed two-head map gives the shares worked
out by hand."""

from __future__ import annotations

import pytest
import torch
from torch import nn

from ablate.attention import DifferentialAttention, StandardAttention
from ablate.model import Decoder
from ablate.probes.drill import drill_accuracy, drill_attention
from toy_corpus.drills import Drill

KEY_LEN = {"recall": 1, "noisy_recall": 2, "induction": 1}
SETTINGS = {
    "recall": {"kind": "recall"},
    "noisy_recall": {"kind": "noisy_recall", "n_pairs": 6, "n_queries": 6, "lookalikes": 2},
    "induction": {"kind": "induction"},
}


class LookupHead(nn.Module):
    """Hard lookup set by hand on one-hot inputs: query t attends, with equal weight, to every key s <= t
    whose ``key_len`` preceding tokens equal tokens ``t - key_len + 1 .. t``; the output is the
    one-hot of token s. A row without a match attends to itself."""

    def __init__(self, key_len: int):
        super().__init__()
        self.key_len = key_len

    def attention_weights(self, x: torch.Tensor) -> torch.Tensor:
        tokens = x.argmax(-1)  # [b, t]
        b, t = tokens.shape
        match = torch.ones(b, t, t, dtype=torch.bool).tril()
        for lag in range(self.key_len):
            query = torch.full((b, t), -1)
            query[:, lag:] = tokens[:, : t - lag]
            key = torch.full((b, t), -2)
            key[:, lag + 1 :] = tokens[:, : t - lag - 1]
            match &= query[:, :, None] == key[:, None, :]
        match |= ~match.any(-1, keepdim=True) & torch.eye(t, dtype=torch.bool)
        w = match.float()
        return (w / w.sum(-1, keepdim=True))[:, None]  # [b, 1 head, t, t]

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.attention_weights(x)[:, 0] @ x


class Holder(nn.Module):
    def __init__(self, attention: nn.Module):
        super().__init__()
        self.attention = attention


class LookupModel(nn.Module):
    """``model.blocks[0].attention`` is the lookup head; logits = 30 * its output."""

    def __init__(self, vocab: int, key_len: int):
        super().__init__()
        self.vocab = vocab
        self.blocks = nn.ModuleList([Holder(LookupHead(key_len))])

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        return 30.0 * self.blocks[0].attention(nn.functional.one_hot(ids, self.vocab).float())


@pytest.mark.parametrize("kind", list(SETTINGS))
def test_a_hand_built_lookup_scores_one_and_puts_all_weight_on_the_pair(kind):
    drill = Drill.from_dict(SETTINGS[kind])
    model = LookupModel(drill.vocab_size, KEY_LEN[kind])
    assert drill_accuracy(model, drill, 300, "cpu") == 1.0  # 300 > one batch of 256
    out = drill_attention(model, drill.items(40), "cpu")
    assert out["drill_attention/layer0/pair_share"] == pytest.approx(1.0)
    for name in ("lookalike", "filler", "other"):
        assert out[f"drill_attention/layer0/{name}_share"] == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("block", [StandardAttention, DifferentialAttention])
def test_shares_of_a_real_decoder_are_bounded_and_sum_to_one(block):
    drill = Drill.from_dict(SETTINGS["noisy_recall"])
    model = Decoder(
        drill.vocab_size, 32, 2, drill.length - 1, lambda i: block(32, layer_index=i, n_layers=2, head_dim=8)
    )
    out = drill_attention(model, drill.items(20), "cpu")
    assert model.training  # mode restored
    for layer in range(2):
        shares = [
            out[f"drill_attention/layer{layer}/{k}_share"] for k in ("pair", "lookalike", "filler", "other")
        ]
        assert sum(shares) == pytest.approx(1.0, abs=1e-9) and all(0.0 <= v <= 1.0 for v in shares)
        assert min(shares) > 0.0  # an untrained map spreads weight over every category
    assert 0.0 <= drill_accuracy(model, drill, 64) <= 1.0


def row_sum_over_abs_sum(block: nn.Module, model: nn.Module, items: list[dict]) -> torch.Tensor:
    """``sum_k A_k / sum_k |A_k|`` per head at every answer's query position, averaged over the
    answers: read from the block's own ``attention_weights`` on its captured input."""
    seen = []
    handle = block.register_forward_pre_hook(lambda module, args: seen.append(args[0].detach()))
    with torch.no_grad():
        model(torch.tensor([it["tokens"][:-1] for it in items]))
    handle.remove()
    with torch.no_grad():
        w = block.attention_weights(seen[0]).double()  # [b, heads, t, t]
    per_answer = [
        w[b, :, t, :].sum(-1) / w[b, :, t, :].abs().sum(-1)
        for b, it in enumerate(items)
        for t in it["answer_positions"]
    ]
    return torch.stack(per_answer).mean(0)


BLOCKS = {
    "standard": lambda i: StandardAttention(32, head_dim=8),
    # lambda fixed at 0.8 and the query/key maps scaled up so the two softmax maps differ: the
    # difference map then has negative entries
    "differential": lambda i: DifferentialAttention(32, head_dim=8, lambda_mode="fixed", lambda_init=0.8),
}


@pytest.mark.parametrize("name", list(BLOCKS))
def test_per_head_signed_shares_add_up_to_the_rows_signed_mass(name):
    drill = Drill.from_dict(SETTINGS["noisy_recall"])
    model = Decoder(drill.vocab_size, 32, 1, drill.length - 1, BLOCKS[name])
    with torch.no_grad():
        for proj in (model.blocks[0].attention.q_proj, model.blocks[0].attention.k_proj):
            proj.weight.mul_(40.0)
    items = drill.items(12)
    out = drill_attention(model, items, "cpu")
    attention = model.blocks[0].attention
    expected = row_sum_over_abs_sum(attention, model, items)
    for h in range(len(expected)):
        signed = [
            out[f"drill_attention/layer0/head{h}/{k}_signed"]
            for k in ("pair", "lookalike", "filler", "other")
        ]
        shares = [
            out[f"drill_attention/layer0/head{h}/{k}_share"] for k in ("pair", "lookalike", "filler", "other")
        ]
        assert sum(signed) == pytest.approx(float(expected[h]), abs=1e-9)
        if name == "standard":
            # softmax rows are non-negative (its definition), so signed and absolute shares agree
            assert signed == pytest.approx(shares, abs=1e-12)
            assert sum(signed) == pytest.approx(1.0, abs=1e-9)
        else:
            # A1 - lambda A2, two softmax rows each summing to 1, sums to 1 - lambda = 0.2 (published
            # Eq. 1) while its absolute mass exceeds that where entries are negative
            assert 0.0 < sum(signed) < 0.99 and min(signed) < max(signed)
    for share in ("pair", "lookalike", "filler", "other"):
        per_head = [out[f"drill_attention/layer0/head{h}/{share}_share"] for h in range(len(expected))]
        assert out[f"drill_attention/layer0/{share}_share"] == pytest.approx(sum(per_head) / len(per_head))


def test_a_kind_without_lookalikes_or_filler_reports_zero_for_them():
    drill = Drill.from_dict(SETTINGS["recall"])
    model = Decoder(drill.vocab_size, 32, 1, drill.length - 1, lambda i: StandardAttention(32, head_dim=8))
    out = drill_attention(model, drill.items(8), "cpu")
    assert (
        out["drill_attention/layer0/lookalike_share"] == 0.0
        and out["drill_attention/layer0/filler_share"] == 0.0
    )


class FixedMap(nn.Module):
    """Two heads; query row 4 is signed in head 0 and unnormalised in head 1 (set by hand)."""

    def attention_weights(self, x: torch.Tensor) -> torch.Tensor:
        w = torch.eye(x.shape[1]).repeat(x.shape[0], 2, 1, 1)
        w[:, 0, 4, :5] = torch.tensor([0.1, -0.2, 0.3, -0.3, 0.1])
        w[:, 1, 4, :5] = torch.tensor([0.0, 0.0, 0.0, 0.0, 2.0])
        return w

    def forward(self, x):
        return x


class FixedModel(nn.Module):
    def __init__(self):
        super().__init__()
        self.blocks = nn.ModuleList([Holder(FixedMap())])

    def forward(self, ids):
        return self.blocks[0].attention(torch.zeros(ids.shape[0], ids.shape[1], 3))


def test_a_signed_two_head_map_gives_the_shares_worked_out_by_hand():
    item = {
        "tokens": [0, 1, 2, 0, 1, 2],
        "answer_positions": [4],
        "spans": [{"pair": [1, 3], "lookalike": [[3, 4]], "filler": [[0, 1]]}],
    }
    out = drill_attention(FixedModel(), [item, item])
    # By hand. Head 0's row [0.1, -0.2, 0.3, -0.3, 0.1] has |row| sum 1.0: keys 1-2 pair, 3 look-alike,
    # 0 filler, 4 other. Shares |A|: pair 0.5, look-alike 0.3, filler 0.1, other 0.1; signed A:
    # pair -0.2 + 0.3 = 0.1, look-alike -0.3, filler 0.1, other 0.1. Head 1's row puts 2.0 on key 4:
    # other 1.0 both ways. The layer figures are the two heads' means.
    heads = {
        0: {"pair": (0.5, 0.1), "lookalike": (0.3, -0.3), "filler": (0.1, 0.1), "other": (0.1, 0.1)},
        1: {"pair": (0.0, 0.0), "lookalike": (0.0, 0.0), "filler": (0.0, 0.0), "other": (1.0, 1.0)},
    }
    layer = {"pair": (0.25, 0.05), "lookalike": (0.15, -0.15), "filler": (0.05, 0.05), "other": (0.55, 0.55)}
    for prefix, expected in [("", layer)] + [(f"head{h}/", heads[h]) for h in heads]:
        for name, (share, signed) in expected.items():
            assert out[f"drill_attention/layer0/{prefix}{name}_share"] == pytest.approx(share, abs=1e-7)
            assert out[f"drill_attention/layer0/{prefix}{name}_signed"] == pytest.approx(signed, abs=1e-7)
    assert not any("head2" in key for key in out)  # one key set per head the block has


def test_items_without_spans_are_refused():
    with pytest.raises(ValueError, match="spans"):
        drill_attention(FixedModel(), [{"tokens": [0, 1, 2], "answer_positions": [1]}])
