"""ablate: a bench for fair, small-scale ablations of attention layers."""

__version__ = "0.1.0"
