"""Kept so that ``fitter._blossom`` still imports: the engine lives in
:mod:`fitter.match._blossom`."""

from .match._blossom import BlossomMatching

__all__ = ["BlossomMatching"]
