"""Stage 4, upper limits: 95 % strain limits versus frequency and sky, chirp-mass limits for galaxies.

``Options`` is :class:`LimitsOptions`, ``run`` is :func:`run_limits`; the computation is in
``stage.py``, the figures in ``plots.py``.
"""

from __future__ import annotations

from ..base import Stage
from . import stage
from .stage import *  # noqa: F401,F403  (the stage's public names, listed in stage.__all__)
from .stage import LimitsOptions, run_limits

Options = LimitsOptions
run = run_limits

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES`
STAGE = Stage("limits", LimitsOptions, run_limits, upstream=(), products=())

__all__ = ["Options", "run", "STAGE", *stage.__all__]
