"""Stage 0, the noise model: fitted from the residuals and used by every later stage by default.

``Options`` is :class:`NoiseOptions`, ``run`` is :func:`run_noise`; the computation is in
``stage.py``, the figures in ``plots.py``. Which noise model a stage uses is resolved in one place,
:func:`cwsearch.job.noisemodel.resolve_noise_model`.
"""

from __future__ import annotations

from ..base import Stage
from . import stage
from .stage import *  # noqa: F401,F403  (the stage's public names, listed in stage.__all__)
from .stage import NoiseOptions, run_noise

Options = NoiseOptions
run = run_noise

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES` (first: every later stage uses its model)
STAGE = Stage("noise", NoiseOptions, run_noise, upstream=(), products=("noise_model.ecsv",))

__all__ = ["Options", "run", "STAGE", *stage.__all__]
