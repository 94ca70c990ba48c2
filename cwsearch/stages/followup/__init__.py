"""Stage 2, the follow-up: parallel-tempered MCMC fit of the candidates (Earth and pulsar terms) and the Bayes factor.

``Options`` is :class:`FollowupOptions` (``options.py``, standard library only), ``run`` is :func:`run_followup`; the computation is in
``stage.py``, the figures in ``plots.py``.
Importing this package loads only the options; ``stage.py`` is imported at the first use of ``run``
or of any other name, so the registry and ``cwsearch COMMAND --help`` stay fast.
"""

from __future__ import annotations

from ..base import Stage, lazy_module_getattr, lazy_run
from .options import FollowupOptions

Options = FollowupOptions
#: :func:`run_followup` of ``stage.py``, imported at the first call
run = lazy_run(__name__, "run_followup")

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES`
STAGE = Stage("followup", FollowupOptions, run, upstream=('scan',), products=('posterior.ecsv', '*/posterior.ecsv'))

#: the stage's other public names (``stage.__all__``), from ``stage.py`` at their first use
__getattr__ = lazy_module_getattr(__name__)

__all__ = ["Options", "run", "STAGE", "FollowupOptions", "run_followup"]
