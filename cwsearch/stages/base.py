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

import functools
from dataclasses import dataclass
from importlib import import_module
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


def lazy_run(package: str, name: str) -> Callable:
    """The stage's ``run``: ``package.stage.<name>``, imported at the first call (so that importing the
    registry and the options stays cheap: ``cwsearch COMMAND --help`` loads no numpy, numba or matplotlib)."""

    def run(array, run_dir, options, **kwargs):
        return getattr(import_module(f"{package}.stage"), name)(array, run_dir, options, **kwargs)

    run.__name__ = run.__qualname__ = name
    run.__doc__ = f"Run the stage: :func:`{package}.stage.{name}` (imported at the first call)."
    return run


def lazy_module_getattr(package: str) -> Callable:
    """A module ``__getattr__`` (PEP 562) for a stage package: its submodules, and the public names of
    its ``stage.py``, imported at their first use."""

    @functools.lru_cache(maxsize=None)
    def _stage():
        return import_module(f"{package}.stage")

    def __getattr__(name):
        if name in ("stage", "plots", "options"):
            return import_module(f"{package}.{name}")
        if name.startswith("__"):
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        try:
            return getattr(_stage(), name)
        except AttributeError:
            raise AttributeError(f"module {package!r} has no attribute {name!r}") from None

    return __getattr__


__all__ = ["Stage", "StageResult", "lazy_run", "lazy_module_getattr"]
