"""The contract every stage keeps: a descriptor (:class:`Stage`) and the shape of its result (:class:`StageResult`).

A stage is a subpackage of :mod:`cwsearch.stages` whose ``__init__`` exports
``Options`` (a frozen dataclass: defaults, ``validate()``, field names =
run-file keys = command-line options with dashes), ``run(array, run_dir,
options, *, noise=None, seed=0, progress=True)`` returning a
:class:`StageResult`, and ``STAGE``, its :class:`Stage` entry for the
registry :data:`cwsearch.stages.STAGES`.

Examples
--------
>>> from cwsearch.stages import STAGES
>>> [s.name for s in STAGES]
['noise', 'scan', 'followup', 'hosts', 'limits', 'targets']
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Protocol


class StageResult(Protocol):
    """What every stage's ``run`` returns: at least ``summary``, a JSON-ready dict (also written to the stage
    folder), which the pipeline records in ``.stage.json``. Each stage's result class adds its own tables."""

    summary: dict


@dataclass(frozen=True)
class Stage:
    """One registry entry: the stage's name, options class, run function, the stages whose outputs it reads
    (``upstream``) and the files later stages read from its folder (``products``, globs)."""

    name: str
    options: type
    run: Callable
    upstream: tuple = ()
    products: tuple = ()


__all__ = ["Stage", "StageResult"]
