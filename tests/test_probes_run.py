"""``run_probes`` end to end on real tiny decoders (standard and differential attention) with
hand-made probe items, plus the config group and its errors."""

from __future__ import annotations

import math
import types

import numpy as np
import pytest
import torch
from omegaconf import OmegaConf
from test_probes_items import DOC_START, classification_set, retrieval_set

from ablate.attention import DifferentialAttention, StandardAttention
from ablate.config import compose
from ablate.model import Decoder
from ablate.probes import PROBE_NAMES, check_config, run_probes
from ablate.probes.pictures import picture_items

VOCAB, SEQ_LEN = 64, 64


def probes_group(name: str) -> dict:
    """The probes group as Hydra composes it (schema defaults applied)."""
    return OmegaConf.to_container(compose([f"probes={name}", "~data"]).probes, resolve=True)


def corpus():
    rng = np.random.default_rng(0)
    val = rng.integers(3, VOCAB, size=3000).astype(np.uint16)
    val[::100] = DOC_START  # document starts, where the corpus package places windows
    return types.SimpleNamespace(
        probe_sets={
            "retrieval": retrieval_set(VOCAB, [40, 65], [0.0, 0.5, 1.0], [1, 2], [1, 2], per_cell=1, seed=7),
            "classification": classification_set(VOCAB, [2, 3], [1, 2], episodes=2, queries=3, seed=8),
        },
        val_ids=val,
    )


def decoder(block):
    torch.manual_seed(0)
    return Decoder(VOCAB, 32, 2, SEQ_LEN, lambda i: block(32, layer_index=i, n_layers=2, head_dim=8))


def default_cfg():
    return probes_group("default")


@pytest.mark.parametrize("block", [StandardAttention, DifferentialAttention])
def test_every_probe_key_is_produced_and_finite(block):
    model = decoder(block)
    model.train()
    cfg = {**default_cfg(), "val_windows": 4, "position_buckets": 4, "batch_tokens": 1024}
    numbers, images = run_probes(model, corpus(), cfg)
    assert model.training  # mode restored
    assert all(isinstance(v, float) and math.isfinite(v) for v in numbers.values())
    expected = {
        "retrieval/acc",
        "retrieval/answer_acc",
        "retrieval/acc_len65_depth0.5",
        "retrieval/acc_depth1",
        "retrieval/acc_len40_depth0_n2_r2",
        "classification/acc",
        "classification/acc_classes3_demos6",
        "classification/order_std_random",
        "classification/order_range_all",
        "position/loss",
        "position/loss_pos0_16",
        "position/loss_pos48_64",
        "quantization/loss_fp32",
        "quantization/increase_w4",
        "quantization/increase_a8",
        "attention/n_items",
        "probe_seconds/total",
        "probe_seconds/images",
    }
    for layer in range(2):
        for k in ("asked_share", "distractor_share", "other_share"):
            expected.add(f"attention/layer{layer}/{k}")
        for k in (
            "logit_top1_ratio",
            "logit_top10_ratio",
            "hidden_top1_ratio",
            "hidden_top10_ratio",
            "hidden_kurtosis",
        ):
            expected.add(f"outliers/layer{layer}/{k}")
    expected |= {f"probe_seconds/{n}" for n in PROBE_NAMES}
    assert expected <= set(numbers), sorted(expected - set(numbers))
    assert numbers["quantization/loss_fp32"] == pytest.approx(numbers["position/loss"])  # same windows
    assert set(images) == {"retrieval_attention/item0", "retrieval_attention/item1"}
    for img in images.values():
        assert img.dtype == np.uint8 and img.ndim == 3 and img.shape[2] == 3
        assert img.std() > 0  # something was drawn


def test_picture_items_are_the_first_of_the_longest_length_with_two_needles():
    items = corpus().probe_sets["retrieval"]
    chosen = picture_items(items, 2)
    expected = [it for it in items if it["meta"]["context_len"] == 65 and it["meta"]["n_needles"] >= 2][:2]
    assert chosen == expected and len(chosen) == 2


def test_off_config_runs_nothing():
    cfg = probes_group("off")
    numbers, images = run_probes(decoder(StandardAttention), types.SimpleNamespace(), cfg)
    assert images == {} and set(numbers) == {"probe_seconds/total"}


def test_max_items_keeps_every_length():
    cfg = {"enabled": ["retrieval"], "images": False, "max_items": 6}
    numbers, _ = run_probes(decoder(StandardAttention), corpus(), cfg)
    assert numbers["retrieval/n_items"] == 6
    assert "retrieval/acc_len40" in numbers and "retrieval/acc_len65" in numbers


@pytest.mark.parametrize(
    "cfg, message",
    [
        ({"enabled": ["retrieval", "speed"]}, "not a probe; allowed: retrieval"),
        ({"enabeld": []}, "probes.enabeld: unknown key"),
        ({"position_buckets": 0}, "probes.position_buckets=0"),
        ({"images": "yes"}, "probes.images='yes'"),
        ({"max_items": -3}, "probes.max_items=-3"),
    ],
)
def test_bad_config_fails_in_one_line(cfg, message):
    with pytest.raises(ValueError, match=message) as err:
        check_config(cfg)
    assert "\n" not in str(err.value)


def test_missing_probe_set_is_a_clear_error():
    c = corpus()
    del c.probe_sets["classification"]
    with pytest.raises(ValueError, match="no probe set 'classification'"):
        run_probes(decoder(StandardAttention), c, {"enabled": ["classification"], "images": False})


def test_item_longer_than_the_window_is_refused():
    c = corpus()
    c.probe_sets["retrieval"][0]["tokens"] = list(range(1, SEQ_LEN + 3))
    with pytest.raises(ValueError, match="seq_len \\+ 1 = 65"):
        run_probes(decoder(StandardAttention), c, {"enabled": ["retrieval"], "images": False})


def test_config_group_files_resolve_to_the_documented_defaults():
    default = check_config(compose(["probes=default", "~data"]).probes)  # a DictConfig, as Hydra gives
    assert default["enabled"] == list(PROBE_NAMES) and default["images"] is True
    assert (default["n_images"], default["val_windows"], default["position_buckets"]) == (2, 8, 8)
    assert default["max_items"] is None and default["every_tokens"] is None
    off = check_config(compose(["probes=off", "~data"]).probes)
    assert off["enabled"] == [] and off["images"] is False
