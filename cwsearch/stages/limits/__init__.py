"""Stage 4, upper limits: 95 % strain limits versus frequency and sky, chirp-mass limits for galaxies.

``Options`` is :class:`LimitsOptions` (``options.py``, standard library only), ``run`` is :func:`run_limits`; the computation is in
``stage.py``, the figures in ``plots.py``.
Importing this package loads only the options; ``stage.py`` is imported at the first use of ``run``
or of any other name, so the registry and ``cwsearch COMMAND --help`` stay fast.
"""

from __future__ import annotations

from ..base import Stage, lazy_module_getattr, lazy_run
from .options import LimitsOptions

Options = LimitsOptions
#: :func:`run_limits` of ``stage.py``, imported at the first call
run = lazy_run(__name__, "run_limits")

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES`
STAGE = Stage("limits", LimitsOptions, run, upstream=(), products=())

#: the stage's other public names (``stage.__all__``), from ``stage.py`` at their first use
__getattr__ = lazy_module_getattr(__name__)

__all__ = ["Options", "run", "STAGE", "LimitsOptions", "run_limits"]
