"""Platebook's engine: fit published triode models to measured plate curves, and use them."""

__version__ = "0.1.0"
