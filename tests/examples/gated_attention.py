"""A user's own attention variant, as a user would write it in their own module:
standard attention whose output is scaled by a learned per-layer gate."""

import torch
from torch import nn

from ablate.attention import StandardAttention


class GatedAttention(StandardAttention):
    def __init__(self, d_model, layer_index=0, n_layers=1, head_dim=32, gate_init=1.0):
        super().__init__(d_model, layer_index, n_layers, head_dim=head_dim)
        self.gate = nn.Parameter(torch.tensor(float(gate_init)))

    def forward(self, x):
        return self.gate * super().forward(x)
