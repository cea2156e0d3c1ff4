"""Mechanism probes: each takes a model and a probe set (or validation windows) and returns a flat
``name -> float`` dict; :func:`run_probes` runs the enabled ones for the trainer."""

from .attention import attention_probe, span_shares
from .classification import classification_probe
from .outliers import excess_kurtosis, magnitude_stats, outlier_probe
from .pictures import attention_pictures
from .position import position_probe
from .quantization import fake_quantize_rows, fake_quantize_tensor, quantization_probe
from .retrieval import retrieval_probe
from .runner import PROBE_NAMES, resolve_config, run_probes

__all__ = [
    "run_probes",
    "resolve_config",
    "PROBE_NAMES",
    "retrieval_probe",
    "attention_probe",
    "span_shares",
    "outlier_probe",
    "magnitude_stats",
    "excess_kurtosis",
    "classification_probe",
    "quantization_probe",
    "fake_quantize_rows",
    "fake_quantize_tensor",
    "position_probe",
    "attention_pictures",
]
