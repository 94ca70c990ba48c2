"""Stage 2, the follow-up: parallel-tempered MCMC fit of the candidates (Earth and pulsar terms) and the Bayes factor.

``Options`` is :class:`FollowupOptions`, ``run`` is :func:`run_followup`; the computation is in
``stage.py``, the figures in ``plots.py``.
"""

from __future__ import annotations

from ..base import Stage
from . import stage
from .stage import *  # noqa: F401,F403  (the stage's public names, listed in stage.__all__)
from .stage import FollowupOptions, run_followup

Options = FollowupOptions
run = run_followup

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES`
STAGE = Stage("followup", FollowupOptions, run_followup, upstream=('scan',), products=('posterior.ecsv', '*/posterior.ecsv'))

__all__ = ["Options", "run", "STAGE", *stage.__all__]
