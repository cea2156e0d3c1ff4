"""Every named attention choice builds from its YAML; a user's own variant needs one YAML only."""

import pytest
import torch
from conftest import NAMED_ATTENTION
from hydra.utils import instantiate

from ablate.attention import AttentionBlock, check_block
from ablate.config import build_model, compose


@pytest.mark.parametrize("attention", NAMED_ATTENTION)
def test_named_choice_builds_and_runs(attention):
    cfg = compose([f"attention={attention}", "~data"])
    block = instantiate(cfg.attention, d_model=cfg.model.d_model, layer_index=0, n_layers=cfg.model.n_layers)
    check_block(block)
    assert isinstance(block, AttentionBlock)
    for name in ("q_proj", "k_proj", "v_proj", "out_proj"):
        assert getattr(block, name).bias is None
    x = torch.randn(2, 16, cfg.model.d_model)
    assert block(x).shape == x.shape
    assert block.attention_weights(x).shape == (2, block.n_heads, 16, 16)
    assert build_model(cfg, 256)(torch.randint(0, 256, (1, 8))).shape == (1, 8, 256)


def test_choice_options_reach_the_block():
    cfg = compose(
        ["attention=differential", "attention.head_norm=false", "attention.lambda_init=0.5", "~data"]
    )
    block = instantiate(cfg.attention, d_model=128, layer_index=3, n_layers=4)
    assert block.head_norm is None and block.lambda_init == 0.5
    wide = instantiate(
        compose(["attention=standard_wide_heads", "~data"]).attention, d_model=128, layer_index=0, n_layers=4
    )
    assert wide.head_dim == 64 and wide.n_heads == 2


def test_user_variant_is_one_class_plus_one_yaml(tmp_path):
    (tmp_path / "attention").mkdir()
    (tmp_path / "attention" / "gated.yaml").write_text(
        "_target_: examples.gated_attention.GatedAttention\nhead_dim: ${model.head_dim}\ngate_init: 0.5\n"
    )
    cfg = compose(["attention=gated", "~data", f"hydra.searchpath=[file://{tmp_path}]"])
    model = build_model(cfg, 256)
    assert type(model.blocks[0].attention).__name__ == "GatedAttention"
    assert model.blocks[0].attention.gate.item() == 0.5
    check_block(model.blocks[0].attention)
    assert model(torch.randint(0, 256, (1, 8))).shape == (1, 8, 256)


def test_a_block_without_the_contract_is_named_in_one_line():
    class Bare(torch.nn.Module):
        d_model = 8

        def forward(self, x):
            return x

    with pytest.raises(
        TypeError, match="lacks q_proj, k_proj, v_proj, out_proj, attention_weights, attention_logits"
    ):
        check_block(Bare())
    assert not isinstance(Bare(), AttentionBlock)
