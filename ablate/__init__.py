"""headtohead: a bench for fair, small-scale ablations of attention layers (Python package `ablate`)."""

__version__ = "0.1.0"
