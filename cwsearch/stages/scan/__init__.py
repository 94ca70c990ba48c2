"""Stage 1, the all-sky Fe/Fp scan over frequency x sky: candidates and their false-alarm probabilities.

``Options`` is :class:`ScanOptions` (``options.py``, standard library only), ``run`` is :func:`run_scan`;
the computation is in ``stage.py``, the figures in ``plots.py``. Importing this package loads only the
options; ``stage.py`` (numpy, numba) is imported at the first use of any other name or of ``run``, so
the registry and ``cwsearch COMMAND --help`` stay fast.
"""

from __future__ import annotations


from ..base import Stage, lazy_module_getattr, lazy_run
from .options import ScanOptions

Options = ScanOptions
#: :func:`cwsearch.stages.scan.stage.run_scan`, imported at the first call
run = lazy_run(__name__, "run_scan")

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES`
STAGE = Stage("scan", ScanOptions, run, upstream=(), products=('candidates.ecsv',))

#: the stage's other public names (``stage.__all__``), from ``stage.py`` at their first use
__getattr__ = lazy_module_getattr(__name__)

__all__ = ["Options", "run", "STAGE", "ScanOptions", "run_scan"]
