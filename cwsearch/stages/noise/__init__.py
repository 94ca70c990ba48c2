"""Stage 0, the noise model: fitted from the residuals and used by every later stage by default.

``Options`` is :class:`NoiseOptions` (``options.py``, standard library only), ``run`` is :func:`run_noise`; the computation is in
``stage.py``, the figures in ``plots.py``. Which noise model a stage uses is resolved in one place,
:func:`cwsearch.job.noisemodel.resolve_noise_model`.
Importing this package loads only the options; ``stage.py`` is imported at the first use of ``run``
or of any other name, so the registry and ``cwsearch COMMAND --help`` stay fast.
"""

from __future__ import annotations

from ..base import Stage, lazy_module_getattr, lazy_run
from .options import NoiseOptions

Options = NoiseOptions
#: :func:`run_noise` of ``stage.py``, imported at the first call
run = lazy_run(__name__, "run_noise")

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES` (first: every later stage uses its model)
STAGE = Stage("noise", NoiseOptions, run, upstream=(), products=("noise_model.ecsv",))

#: the stage's other public names (``stage.__all__``), from ``stage.py`` at their first use
__getattr__ = lazy_module_getattr(__name__)

__all__ = ["Options", "run", "STAGE", "NoiseOptions", "run_noise"]
