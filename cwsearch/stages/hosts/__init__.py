"""Stage 3, host galaxies: the catalogue's galaxies ranked as hosts of each followed-up candidate.

``Options`` is :class:`HostsOptions` (``options.py``, standard library only), ``run`` is :func:`run_hosts`; the computation is in
``stage.py``, the figures in ``plots.py``.
Importing this package loads only the options; ``stage.py`` is imported at the first use of ``run``
or of any other name, so the registry and ``cwsearch COMMAND --help`` stay fast.
"""

from __future__ import annotations

from ..base import Stage, lazy_module_getattr, lazy_run
from .options import HostsOptions

Options = HostsOptions
#: :func:`run_hosts` of ``stage.py``, imported at the first call
run = lazy_run(__name__, "run_hosts")

#: this stage's entry in the registry :data:`cwsearch.stages.STAGES`
STAGE = Stage("hosts", HostsOptions, run, upstream=('followup',), products=())

#: the stage's other public names (``stage.__all__``), from ``stage.py`` at their first use
__getattr__ = lazy_module_getattr(__name__)

__all__ = ["Options", "run", "STAGE", "HostsOptions", "run_hosts"]
