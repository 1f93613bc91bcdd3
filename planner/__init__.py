"""ringplan: plan, blind, print and evaluate interlaboratory comparison rounds."""

__version__ = "0.1.0"
