"""Naming scan candidates the same way in every command (issue 15 §4).

A candidate is named by its row (rank) in ``scan/candidates.ecsv``, 1 = best,
or by the follow-up folder name the pipeline gives it, ``candidate_K``. Every
``--candidate`` option accepts either form (also ``#K``).

>>> candidate_row("candidate_3"), candidate_row("3"), candidate_row("#2"), candidate_row(4)
(3, 3, 2, 4)
>>> candidate_name(3)
'candidate_3'
"""

from __future__ import annotations

import re

_PATTERN = re.compile(r"^\s*(?:candidate[_\s-]?|#)?(\d+)\s*$", re.IGNORECASE)


def candidate_row(value) -> int:
    """The 1-based candidate row named by ``value`` (an int, ``"K"``, ``"#K"`` or ``"candidate_K"``).

    Raises ``ValueError`` for anything else.
    """
    if isinstance(value, bool):
        raise ValueError(f"not a candidate name: {value!r}")
    if isinstance(value, int):
        return value
    m = _PATTERN.match(str(value))
    if not m:
        raise ValueError(f"not a candidate name: {value!r} (give a row number K, or candidate_K)")
    return int(m.group(1))


def candidate_name(row: int) -> str:
    """The follow-up folder name of candidate row ``row``."""
    return f"candidate_{int(row)}"


__all__ = ["candidate_row", "candidate_name"]
