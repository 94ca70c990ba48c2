"""Errors a user can cause, reported as one clear line (exit status 2).

Every problem with a user's files, options or run configuration is raised as
:class:`InputError`. The command line turns it into a single message on
standard error and exit status 2, with no traceback. Anything else escaping
to the command line is an internal error (exit status 1).

Examples
--------
>>> from cwsearch.core.errors import InputError
>>> str(InputError("sigma must be > 0", file="residuals/P1.ecsv", row=4, column="sigma"))
'residuals/P1.ecsv, row 4, column sigma: sigma must be > 0'
"""

from __future__ import annotations


class InputError(ValueError):
    """A problem with user input, located by file, row and column.

    Parameters
    ----------
    message : str
        What is wrong, in plain words.
    file, row, column : optional
        Where it is wrong. ``row`` counts data rows from 1 (the first row
        after the header).
    """

    def __init__(self, message: str, *, file=None, row=None, column=None):
        self.message = message
        self.file = None if file is None else str(file)
        self.row = row
        self.column = column
        super().__init__(self._format())

    def _format(self) -> str:
        where = []
        if self.file:
            where.append(self.file)
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.column is not None:
            where.append(f"column {self.column}")
        return (", ".join(where) + ": " + self.message) if where else self.message


class CoalescenceError(InputError):
    """The binary would merge before the end of the observation."""


__all__ = ["InputError", "CoalescenceError"]
