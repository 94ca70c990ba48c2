"""The stages of the job, in pipeline order, and the registry the pipeline, run file and CLI loop over.

Each stage is a subpackage (``noise/``, ``scan/``, ``followup/``, ``hosts/``, ``limits/``, ``targets/``)
with ``stage.py`` (its computation and files), ``plots.py`` (its figures) and
an ``__init__`` exporting ``Options``, ``run``, ``STAGE`` and its public
names. A stage imports only from the floors below (core, data, physics,
inference), never another stage. Adding a stage is its subpackage plus one
line in :data:`STAGES`.
"""

from __future__ import annotations

from . import followup, hosts, limits, noise, scan, targets
from .base import Stage, StageResult

#: the registry: every stage, in pipeline order
STAGES = (noise.STAGE, scan.STAGE, followup.STAGE, hosts.STAGE, limits.STAGE, targets.STAGE)

#: stage name -> :class:`Stage`
BY_NAME = {s.name: s for s in STAGES}

__all__ = ["STAGES", "BY_NAME", "Stage", "StageResult"]
