"""Compare recomputed results to a stated tolerance (reproducibility is never bit for bit).

The same seed must give the same numbers on any machine, but only to
floating-point rounding: another CPU, BLAS build or numba target can change
the last bits of a sum. So results that were *recomputed* are compared
number by number:

- text, integers, booleans, units, column names, masks and NaN positions:
  exactly;
- floating-point values: ``|a − b| ≤ atol + rtol·|b|`` with ``rtol`` =
  :data:`RTOL` (1e-12) and ``atol`` = :data:`ATOL_SCALE` × the largest
  ``|b|`` of the column (or array), so values that pass through zero
  (residuals, phases, correlations) are judged against the column's scale;
  for columns stored in single precision ``rtol`` is raised to two units of
  that precision.

Checksums and byte comparisons stay for files that are *copied* or must not
be rewritten at all; :func:`compare_files` falls back to bytes only for
files it cannot read as numbers.

Example
-------
>>> import numpy as np
>>> from cwsearch.data.compare import compare_arrays
>>> a = np.array([1.0, 2.0, 0.0])
>>> compare_arrays(a, a * (1 + 3e-16), where="x").ok
True
>>> result = compare_arrays(a, a + [0.0, 1e-9, 0.0], where="x")
>>> result.ok, result.problems[0].startswith("x: 1 value")
(False, True)
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .dataset import _read_table, dataset_files  # the project's safe ECSV reader

#: relative tolerance for recomputed float64 values
RTOL = 1e-12
#: absolute tolerance as a fraction of the largest magnitude in the column / array
ATOL_SCALE = 1e-12


@dataclass
class Comparison:
    """Outcome of a comparison: what differs, and the largest float difference seen."""

    problems: list = field(default_factory=list)
    #: (where, absolute difference, difference / tolerance) of the worst float value, or None
    worst: tuple | None = None

    @property
    def ok(self) -> bool:
        return not self.problems

    def merge(self, other: "Comparison") -> "Comparison":
        self.problems.extend(other.problems)
        if other.worst is not None and (self.worst is None or other.worst[2] > self.worst[2]):
            self.worst = other.worst
        return self

    def _note(self, where, diff, ratio):
        if self.worst is None or ratio > self.worst[2]:
            self.worst = (where, float(diff), float(ratio))

    def describe(self) -> str:
        """One line on the worst float difference (and the first few problems)."""
        if self.worst is None:
            head = "no floating-point values compared"
        else:
            where, diff, ratio = self.worst
            head = f"worst float difference {diff:.3g} at {where} ({ratio:.3g} of the tolerance)"
        if self.ok:
            return head
        more = f" (+{len(self.problems) - 5} more)" if len(self.problems) > 5 else ""
        return head + "; " + "; ".join(self.problems[:5]) + more


def compare_arrays(a, b, *, where: str, rtol: float = RTOL, atol_scale: float = ATOL_SCALE) -> Comparison:
    """Compare two arrays: non-floats exactly, floats to ``atol + rtol·|b|`` (see the module notes)."""
    out = Comparison()
    masked_a, masked_b = np.ma.getmaskarray(a), np.ma.getmaskarray(b)
    a, b = np.asarray(np.ma.getdata(a)), np.asarray(np.ma.getdata(b))
    if a.shape != b.shape:
        out.problems.append(f"{where}: shape {a.shape} vs {b.shape}")
        return out
    if not np.array_equal(masked_a, masked_b):   # masks are flags: exact
        out.problems.append(f"{where}: masked entries differ")
        return out
    a, b = a[~masked_a], b[~masked_b]
    floating = np.issubdtype(a.dtype, np.floating) or np.issubdtype(b.dtype, np.floating)
    if not floating:
        if a.dtype.kind != b.dtype.kind or not np.array_equal(a, b):   # text, integers, booleans: exact
            bad = int(np.sum(a != b)) if a.dtype.kind == b.dtype.kind else a.size
            out.problems.append(f"{where}: {bad} non-float value(s) differ")
        return out
    precision = max(np.finfo(x.dtype).eps if np.issubdtype(x.dtype, np.floating) else 0.0 for x in (a, b))
    rtol = max(rtol, 2 * precision)   # a column stored in single precision cannot agree better than that
    a, b = a.astype(np.float64), b.astype(np.float64)
    nan_a, nan_b = np.isnan(a), np.isnan(b)
    if not np.array_equal(nan_a, nan_b):
        out.problems.append(f"{where}: NaN positions differ")
        return out
    a, b = a[~nan_a], b[~nan_b]
    if not np.array_equal(np.isinf(a), np.isinf(b)) or not np.array_equal(a[np.isinf(a)], b[np.isinf(b)]):
        out.problems.append(f"{where}: infinite values differ")
        return out
    finite = np.isfinite(a)
    a, b = a[finite], b[finite]
    if a.size == 0:
        return out
    atol = atol_scale * float(np.max(np.abs(b)))
    diff = np.abs(a - b)
    tol = atol + rtol * np.abs(b)
    ratio = np.divide(diff, tol, out=np.where(diff > 0, np.inf, 0.0), where=tol > 0)
    k = int(np.argmax(ratio))
    out._note(f"{where}[{k}]", diff[k], ratio[k])
    bad = int(np.sum(ratio > 1))
    if bad:
        out.problems.append(f"{where}: {bad} value(s) beyond rtol {rtol:g} (worst {a[k]!r} vs {b[k]!r})")
    return out


def compare_tables(a, b, *, where: str = "table", rtol: float = RTOL, atol_scale: float = ATOL_SCALE) -> Comparison:
    """Compare two astropy Tables column by column (names, units, dtype kind, values) and their meta."""
    out = Comparison()
    if list(a.colnames) != list(b.colnames):
        out.problems.append(f"{where}: columns {list(a.colnames)} vs {list(b.colnames)}")
        return out
    if len(a) != len(b):
        out.problems.append(f"{where}: {len(a)} rows vs {len(b)}")
        return out
    for name in a.colnames:
        ca, cb = a[name], b[name]
        if str(getattr(ca, "unit", None)) != str(getattr(cb, "unit", None)):
            out.problems.append(f"{where} column {name}: unit {ca.unit} vs {cb.unit}")
            continue
        values_a = np.ma.MaskedArray(np.asarray(ca), mask=np.ma.getmaskarray(ca)) if hasattr(ca, "mask") \
            else np.asarray(ca)
        values_b = np.ma.MaskedArray(np.asarray(cb), mask=np.ma.getmaskarray(cb)) if hasattr(cb, "mask") \
            else np.asarray(cb)
        out.merge(compare_arrays(values_a, values_b, where=f"{where} column {name}", rtol=rtol,
                                 atol_scale=atol_scale))
    out.merge(compare_json(dict(a.meta), dict(b.meta), where=f"{where} meta", rtol=rtol))
    return out


def compare_json(a, b, *, where: str = "json", rtol: float = RTOL) -> Comparison:
    """Compare JSON-like structures: keys, text, integers, booleans and null exactly; floats to ``rtol``.

    Single numbers have no column to set a scale, so there is no absolute
    tolerance: a recomputed value that should be 0 must come out 0.
    """
    out = Comparison()
    if isinstance(a, dict) and isinstance(b, dict):
        if sorted(map(str, a)) != sorted(map(str, b)):
            out.problems.append(f"{where}: keys {sorted(map(str, a))} vs {sorted(map(str, b))}")
            return out
        for key in a:
            out.merge(compare_json(a[key], b[key], where=f"{where}.{key}", rtol=rtol))
        return out
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        if len(a) != len(b):
            out.problems.append(f"{where}: {len(a)} items vs {len(b)}")
            return out
        for i, (x, y) in enumerate(zip(a, b)):
            out.merge(compare_json(x, y, where=f"{where}[{i}]", rtol=rtol))
        return out
    if isinstance(a, float) or isinstance(b, float):
        if isinstance(a, bool) or isinstance(b, bool) or not isinstance(a, (int, float)) \
                or not isinstance(b, (int, float)):
            out.problems.append(f"{where}: {a!r} vs {b!r}")
            return out
        a, b = float(a), float(b)
        if math.isnan(a) or math.isnan(b) or math.isinf(a) or math.isinf(b):
            if not (a == b or (math.isnan(a) and math.isnan(b))):   # non-finite markers: exact
                out.problems.append(f"{where}: {a!r} vs {b!r}")
            return out
        diff, tol = abs(a - b), rtol * abs(b)
        ratio = diff / tol if tol > 0 else (math.inf if diff > 0 else 0.0)
        out._note(where, diff, ratio)
        if ratio > 1:
            out.problems.append(f"{where}: {a!r} vs {b!r} (beyond rtol {rtol:g})")
        return out
    if type(a) is not type(b) or a != b:   # text, integers, booleans, null: exact
        out.problems.append(f"{where}: {a!r} vs {b!r}")
    return out


def compare_files(path_a, path_b, *, where: str | None = None, rtol: float = RTOL,
                  atol_scale: float = ATOL_SCALE) -> Comparison:
    """Compare two files by content: ECSV as tables, JSON as structures, anything else byte for byte."""
    path_a, path_b = Path(path_a), Path(path_b)
    where = where or path_b.name
    out = Comparison()
    for p in (path_a, path_b):
        if not p.is_file():
            out.problems.append(f"{where}: {p} is missing")
    if not out.ok:
        return out
    if path_b.suffix == ".ecsv":
        return compare_tables(_read_table(path_a), _read_table(path_b), where=where, rtol=rtol,
                              atol_scale=atol_scale)
    if path_b.suffix == ".json":
        return compare_json(json.loads(path_a.read_text(encoding="utf-8")),
                            json.loads(path_b.read_text(encoding="utf-8")), where=where, rtol=rtol)
    if path_a.read_bytes() != path_b.read_bytes():   # no numbers to read: only bytes can be compared
        out.problems.append(f"{where}: contents differ")
    return out


def compare_folders(folder_a, folder_b, files, *, rtol: float = RTOL, atol_scale: float = ATOL_SCALE) -> Comparison:
    """Compare the named files (paths relative to both folders) with :func:`compare_files`."""
    out = Comparison()
    for rel in files:
        out.merge(compare_files(Path(folder_a) / rel, Path(folder_b) / rel, where=str(rel), rtol=rtol,
                                atol_scale=atol_scale))
    return out


def compare_datasets(folder_a, folder_b, *, injection: bool = True, rtol: float = RTOL,
                     atol_scale: float = ATOL_SCALE) -> Comparison:
    """Compare two dataset folders table by table (and ``injection.json`` unless ``injection=False``).

    The file lists must agree exactly; then every column as in :func:`compare_tables`.
    """
    out = Comparison()
    files_a, files_b = dataset_files(folder_a), dataset_files(folder_b)
    if files_a != files_b:
        out.problems.append(f"dataset files differ: {sorted(set(files_a) ^ set(files_b))}")
        return out
    files = list(files_b)
    if injection and any((Path(f) / "injection.json").is_file() for f in (folder_a, folder_b)):
        files.append("injection.json")
    return out.merge(compare_folders(folder_a, folder_b, files, rtol=rtol, atol_scale=atol_scale))


__all__ = ["RTOL", "ATOL_SCALE", "Comparison", "compare_arrays", "compare_tables", "compare_json",
           "compare_files", "compare_folders", "compare_datasets"]
