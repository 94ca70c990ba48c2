"""Stage 5, targeted searches: every catalogue galaxy or periodic-AGN candidate tested at its fixed sky
position, with calibrated p-values, family-wise and false-discovery-rate corrections, and a chirp-mass limit
per target.

``Options`` is :class:`TargetsOptions` (``options.py``, standard library only), ``run`` is
:func:`run_targets`; the computation is in ``stage.py`` (and :mod:`cwsearch.inference.targeted`), the
figures in ``plots.py``. Importing this package loads only the options; ``stage.py`` is imported at the
first use of ``run`` or of any other name.
"""

from __future__ import annotations

from ..base import Stage, lazy_module_getattr, lazy_run
from .options import TargetsOptions

Options = TargetsOptions
#: :func:`run_targets` of ``stage.py``, imported at the first call
run = lazy_run(__name__, "run_targets")

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES`
STAGE = Stage("targets", TargetsOptions, run, upstream=(), products=("results.ecsv",))

#: the stage's other public names (``stage.__all__``), from ``stage.py`` at their first use
__getattr__ = lazy_module_getattr(__name__)

__all__ = ["Options", "run", "STAGE", "TargetsOptions", "run_targets"]
