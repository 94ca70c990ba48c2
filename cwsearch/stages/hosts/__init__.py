"""Stage 3, host galaxies: the catalogue's galaxies ranked as hosts of each followed-up candidate.

``Options`` is :class:`HostsOptions`, ``run`` is :func:`run_hosts`; the computation is in
``stage.py``, the figures in ``plots.py``.
"""

from __future__ import annotations

from ..base import Stage
from . import stage
from .stage import *  # noqa: F401,F403  (the stage's public names, listed in stage.__all__)
from .stage import HostsOptions, run_hosts

Options = HostsOptions
run = run_hosts

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES`
STAGE = Stage("hosts", HostsOptions, run_hosts, upstream=('followup',), products=())

__all__ = ["Options", "run", "STAGE", *stage.__all__]
