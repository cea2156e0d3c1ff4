"""Attention blocks. Each is a plain ``torch.nn.Module`` built as
``Block(d_model=..., layer_index=..., n_layers=..., **options)`` and offers what
:class:`AttentionBlock` names."""

from .base import AttentionBlock, ProjectedAttention, check_block
from .differential import DifferentialAttention, depth_lambda_init
from .rotary import Rotary
from .standard import StandardAttention

__all__ = [
    "AttentionBlock",
    "ProjectedAttention",
    "check_block",
    "StandardAttention",
    "DifferentialAttention",
    "Rotary",
    "depth_lambda_init",
]
