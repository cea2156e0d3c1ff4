"""Attention blocks. Each is a plain ``torch.nn.Module`` built as
``Block(d_model=..., layer_index=..., n_layers=..., **options)``."""

from .differential import DifferentialAttention, depth_lambda_init
from .rotary import Rotary
from .standard import StandardAttention

__all__ = ["StandardAttention", "DifferentialAttention", "Rotary", "depth_lambda_init"]
