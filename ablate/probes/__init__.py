"""Mechanism probes: each takes a model and a probe set (or validation windows) and returns a flat
``name -> float`` dict; :func:`run_probes` runs the enabled ones for the trainer. The single probes
live in their modules (``ablate.probes.retrieval``, ``.attention``, ``.outliers``, ...)."""

from .suite import PROBE_NAMES, check_config, run_probes

__all__ = ["run_probes", "check_config", "PROBE_NAMES"]
