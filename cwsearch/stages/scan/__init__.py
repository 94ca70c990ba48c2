"""Stage 1, the all-sky Fe/Fp scan over frequency x sky: candidates and their false-alarm probabilities.

``Options`` is :class:`ScanOptions`, ``run`` is :func:`run_scan`; the computation is in
``stage.py``, the figures in ``plots.py``.
"""

from __future__ import annotations

from ..base import Stage
from . import stage
from .stage import *  # noqa: F401,F403  (the stage's public names, listed in stage.__all__)
from .stage import ScanOptions, run_scan

Options = ScanOptions
run = run_scan

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES`
STAGE = Stage("scan", ScanOptions, run_scan, upstream=(), products=('candidates.ecsv',))

__all__ = ["Options", "run", "STAGE", *stage.__all__]
