"""Kept for today's imports: the distortion analysis lives in :mod:`fitter.stage.distortion`.

``from fitter.distortion import analyse`` and ``from fitter import distortion`` keep working;
new code imports :mod:`fitter.stage.distortion`.
"""

from .stage.distortion import *  # noqa: F401,F403
from .stage.distortion import __all__  # noqa: F401
