"""Config helpers shared by the entry points and tests: the conf/ folder, resolvers, compose."""

from __future__ import annotations

from pathlib import Path

from hydra import compose as hydra_compose
from hydra import initialize_config_dir
from hydra.core.global_hydra import GlobalHydra
from hydra.core.singleton import Singleton
from hydra.utils import instantiate
from omegaconf import OmegaConf

from .model import Decoder
from .schema import register as _register_schema

CONF_DIR = Path(__file__).resolve().parents[1] / "conf"

CHECKOUT = CONF_DIR.parent


def _checkout_path(path: str) -> str:
    """Relative paths are taken from the checkout root, so runs land in one place whatever the
    current folder."""
    p = Path(path).expanduser()
    return str(p if p.is_absolute() else CHECKOUT / p)


def _run_name(override_dirname: str) -> str:
    return override_dirname or "default"


for _name, _fn in (
    ("multiply", lambda a, b: a * b),
    ("checkout_path", _checkout_path),
    ("run_name", _run_name),
):
    if not OmegaConf.has_resolver(_name):
        OmegaConf.register_new_resolver(_name, _fn)

_register_schema()


def compose(
    overrides: list[str] | None = None, config_name: str = "config", return_hydra_config: bool = False
):
    """The config ``h2h-train`` would see for these overrides (no run folder, no logging)."""

    GlobalHydra.instance().clear()
    with initialize_config_dir(config_dir=str(CONF_DIR), version_base="1.3"):
        return hydra_compose(
            config_name=config_name, overrides=list(overrides or []), return_hydra_config=return_hydra_config
        )


def compose_isolated(overrides: list[str]):
    """:func:`compose`, callable inside a running Hydra job: Hydra's global state (the job's own
    config search path and HydraConfig) is saved before and put back after."""

    saved = Singleton.get_state()
    try:
        cfg = compose(overrides)
        OmegaConf.resolve(cfg)
        return cfg
    finally:
        Singleton.set_state(saved)


def build_attention_factory(cfg):
    """``layer_index -> block`` built with ``hydra.utils.instantiate(cfg.attention, ...)``."""

    n_layers = cfg.model.n_layers

    def factory(layer_index: int):
        return instantiate(
            cfg.attention, d_model=cfg.model.d_model, layer_index=layer_index, n_layers=n_layers
        )

    return factory


def build_model(cfg, vocab_size: int):
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
        init_seed=int(cfg.seed) if cfg.model.get("keyed_init", True) else None,
    )
