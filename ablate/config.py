"""Config helpers shared by the entry points and tests: the conf/ folder, resolvers, compose."""

from __future__ import annotations

from pathlib import Path

from omegaconf import OmegaConf

CONF_DIR = Path(__file__).resolve().parents[1] / "conf"

if not OmegaConf.has_resolver("multiply"):
    OmegaConf.register_new_resolver("multiply", lambda a, b: a * b)


def compose(overrides: list[str] | None = None, config_name: str = "config"):
    """The config ``ablate-train`` would see for these overrides (no run folder, no logging)."""
    from hydra import compose as hydra_compose
    from hydra import initialize_config_dir

    with initialize_config_dir(config_dir=str(CONF_DIR), version_base="1.3"):
        return hydra_compose(config_name=config_name, overrides=list(overrides or []))


def build_attention_factory(cfg):
    """``layer_index -> block`` built with ``hydra.utils.instantiate(cfg.attention, ...)``."""
    from hydra.utils import instantiate

    n_layers = cfg.model.n_layers

    def factory(layer_index: int):
        return instantiate(cfg.attention, d_model=cfg.model.d_model, layer_index=layer_index, n_layers=n_layers)

    return factory


def build_model(cfg, vocab_size: int):
    from .model import Decoder

    m = cfg.model
    return Decoder(
        vocab_size=vocab_size,
        d_model=m.d_model,
        n_layers=m.n_layers,
        seq_len=m.seq_len,
        attention_factory=build_attention_factory(cfg),
        ffn_hidden=m.ffn_hidden,
        tie_embeddings=m.tie_embeddings,
        init_std=m.init_std,
    )
