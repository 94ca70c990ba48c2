"""Stage 5, targeted searches: every catalogue galaxy or periodic-AGN candidate tested at its fixed sky
position, with calibrated p-values, family-wise and false-discovery-rate corrections, and a chirp-mass limit
per target.

``Options`` is :class:`TargetsOptions`, ``run`` is :func:`run_targets`; the computation is in ``stage.py``
(and :mod:`cwsearch.inference.targeted`), the figures in ``plots.py``.
"""

from __future__ import annotations

from ..base import Stage
from . import stage
from .stage import *  # noqa: F401,F403  (the stage's public names, listed in stage.__all__)
from .stage import TargetsOptions, run_targets

Options = TargetsOptions
run = run_targets

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES`
STAGE = Stage("targets", TargetsOptions, run_targets, upstream=(), products=("results.ecsv",))

__all__ = ["Options", "run", "STAGE", *stage.__all__]
