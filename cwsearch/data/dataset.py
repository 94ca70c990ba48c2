"""Reading, validating and writing a dataset folder (the input contract).

A dataset is a folder (docs/design.md §3)::

    mydata/
      pulsars.ecsv          one row per pulsar
      residuals/NAME.ecsv   one file per pulsar, NAME from pulsars.ecsv
      noise.ecsv            optional white-noise settings per pulsar and backend
      injection.json        optional, written by ``cwsearch simulate`` (not read here)

ECSV (astropy's enhanced CSV) is plain text with the units in its header.

``pulsars.ecsv``
    required ``name`` (``[A-Za-z0-9_+.-]+``), ``ra`` [deg], ``dec`` [deg],
    ``distance`` [kpc], ``distance_err`` [kpc]; optional ``red_log10_amplitude``
    and ``red_index`` (power-law red noise; leave both fields empty for a
    pulsar without red noise).
``residuals/NAME.ecsv``
    required ``mjd`` [d], ``residual`` [s], ``sigma`` [s], ``backend`` (text);
    optional ``design_*`` or ``dm_*`` columns: extra timing-model columns
    (any unit) added to the default offset, spin frequency, spin-down and
    yearly sine/cosine.
``noise.ecsv``
    ``pulsar``, ``backend``, ``sigma_scale`` (dimensionless), ``sigma_added``
    [s]: the effective uncertainty is ``sqrt((sigma_scale σ)² + sigma_added²)``.

Any unit convertible to the stated one is accepted and converted (``us``
for sigma, ``pc`` for distance, ``rad`` for angles...). Every problem raises
:class:`~cwsearch.core.errors.InputError` naming file, data row (from 1) and
column. Files in ``residuals/`` that no pulsar uses are ignored with a
:class:`DatasetWarning`. Reading never writes anything and never executes or
unpickles anything from the files.

Round trip: :func:`write_dataset` writes every float at full precision, so
``read_dataset(write_dataset(read_dataset(d)))`` equals ``read_dataset(d)``
bit for bit. Angles are stored in degrees; the writer picks the degree value
whose conversion gives back the model's radians exactly when one exists
(otherwise the nearest, one unit in the last place away).

Examples
--------
>>> import tempfile, pathlib
>>> from cwsearch.physics.simulate import invented_array
>>> from cwsearch.data.dataset import read_dataset, write_dataset
>>> arr = invented_array(n_pulsars=3, years=5, seed=2)
>>> folder = pathlib.Path(tempfile.mkdtemp()) / "mydata"
>>> write_dataset(arr, folder)
>>> back = read_dataset(folder)
>>> back.names
['SIMPSR01', 'SIMPSR02', 'SIMPSR03']
>>> bool((back[1].mjd == arr[1].mjd).all())
True
"""

from __future__ import annotations

import hashlib
import math
import os
import re
import shutil
import tempfile
import warnings
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.io import ascii as astropy_ascii
from astropy.table import Column, MaskedColumn, Table
from astropy.units import UnitsWarning

from ..core.constants import DAY_SECONDS
from ..core.errors import InputError
from ..core.fileio import write_json_atomic, write_table_atomic
from ..core.safeio import (MAX_RESIDUAL_OVER_SIGMA, MAX_RESIDUAL_SECONDS, MJD_RANGE, SIGMA_RANGE, check_folder,
                           escape_text, is_regular_file, read_input_bytes)
from .model import default_design_matrix, Array, DEFAULT_DESIGN_COLUMNS, Pulsar, PulsarNoise
from .truth import INJECTION_FILE, read_injection_file

PULSARS_FILE = "pulsars.ecsv"
NOISE_FILE = "noise.ecsv"
RESIDUALS_DIR = "residuals"
INJECTION_FILE = "injection.json"

#: Allowed pulsar names (they become file names).
NAME_PATTERN = re.compile(r"[A-Za-z0-9_+.-]+")
#: Prefixes of optional timing-model columns in residual files.
DESIGN_PREFIXES = ("design_", "dm_")

_PULSAR_COLUMNS = {"name": None, "ra": "deg", "dec": "deg", "distance": "kpc", "distance_err": "kpc"}
_RED_COLUMNS = ("red_log10_amplitude", "red_index")
_RESIDUAL_COLUMNS = {"mjd": "d", "residual": "s", "sigma": "s", "backend": None}
_NOISE_COLUMNS = {"pulsar": None, "backend": None, "sigma_scale": "", "sigma_added": "s"}


class DatasetWarning(UserWarning):
    """Something in a dataset is ignored (an unused residual file, an unknown column)."""


# ----------------------------------------------------------------- reading
def read_dataset(path, *, mjd_range=None) -> Array:
    """Read and validate a dataset folder; return an :class:`~cwsearch.data.model.Array`.

    Pulsars keep the order of ``pulsars.ecsv``. Angles are converted to
    radians, distances to kpc, residuals and sigmas to seconds, TOAs to MJD
    days. Raises :class:`~cwsearch.core.errors.InputError` (file, row, column)
    on any problem; see the module docstring for the format.

    Every file is read through :mod:`cwsearch.core.safeio`: regular files
    only (never a FIFO or a device), symlinks only to places inside the
    dataset folder, a size cap. Values must be plausible: TOAs within
    ``mjd_range`` (default :data:`~cwsearch.core.safeio.MJD_RANGE`, MJD
    40000-70000), sigmas within :data:`~cwsearch.core.safeio.SIGMA_RANGE`,
    ``|residual|`` at most 1 s and at most 10^6 sigma.
    """
    folder = Path(path)
    if not os.path.lexists(folder):
        raise InputError("dataset folder not found", file=folder)
    if not folder.is_dir():
        raise InputError("not a folder (a dataset is a folder with pulsars.ecsv and residuals/)", file=folder)
    mjd_range = _mjd_range(mjd_range)
    pulsar_file = folder / PULSARS_FILE
    if not os.path.lexists(pulsar_file):
        raise InputError(f"dataset folder has no {PULSARS_FILE}", file=folder)
    rows = _read_pulsar_table(pulsar_file, folder)

    res_dir = folder / RESIDUALS_DIR
    if not res_dir.is_dir():
        raise InputError(f"dataset folder has no {RESIDUALS_DIR}/ folder", file=folder)
    check_folder(res_dir)
    expected = {f"{row['name']}.ecsv" for row in rows}
    unused = sorted(e.name for e in res_dir.iterdir() if not e.name.startswith(".") and e.name not in expected)
    if unused:
        shown = escape_text(", ".join(unused[:5]) + (" ..." if len(unused) > 5 else ""))
        warnings.warn(f"{res_dir}: {len(unused)} file(s) not named in {PULSARS_FILE} are ignored: {shown}",
                      DatasetWarning, stacklevel=2)

    residual_data = {}
    for i, row in enumerate(rows):
        rfile = res_dir / f"{row['name']}.ecsv"
        if not os.path.lexists(rfile):
            raise InputError(f"residual file for pulsar {row['name']} (row {i + 1} of {PULSARS_FILE}) "
                             "is missing", file=rfile)
        residual_data[row["name"]] = _read_residual_table(rfile, folder, mjd_range)

    injection = folder / INJECTION_FILE
    if os.path.lexists(injection):   # the truth of a simulated dataset: checked now, not when a plot reads it
        read_injection_file(injection, folder)

    noise_file = folder / NOISE_FILE
    noise = {row["name"]: PulsarNoise(red_log10_amplitude=row["red_log10_amplitude"],
                                      red_index=row["red_index"]) for row in rows}
    if os.path.lexists(noise_file):
        _read_noise_table(noise_file, noise, residual_data, folder)

    pulsars = []
    for row in rows:
        data = residual_data[row["name"]]
        pulsars.append(Pulsar(row["name"], ra=row["ra"], dec=row["dec"], distance=row["distance"],
                              distance_err=row["distance_err"], mjd=data["mjd"], residuals=data["residual"],
                              sigmas=data["sigma"], backends=data["backend"],
                              extra_design=data["design"], extra_design_names=data["design_names"],
                              noise=noise[row["name"]]))
    array = Array(pulsars)
    array.source = folder  # the dataset folder (plots read its injection.json, when present, for the truth)
    return array


def _mjd_range(mjd_range):
    """The plausible TOA range (lo, hi) [MJD] in force: ``mjd_range`` or :data:`MJD_RANGE`."""
    if mjd_range is None:
        return MJD_RANGE
    try:
        lo, hi = (float(v) for v in mjd_range)
    except (TypeError, ValueError):
        raise InputError(f"--mjd-range needs two numbers LO HI, not {mjd_range!r}") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise InputError(f"--mjd-range: need finite LO < HI, got {lo} {hi}")
    return lo, hi


def _read_table(file: Path, root=None):
    """Parse one ECSV file into an astropy Table; every failure becomes an InputError.

    The bytes come from :func:`cwsearch.core.safeio.read_input_bytes` (regular file, symlink inside
    ``root``, size cap), for both paths. Plain files take the fast path (:func:`_fast_table`), anything
    else astropy's reader (:func:`_strict_table`); both give identical tables, and the plausibility checks
    after parsing (:func:`check_residual_values`) are the same for both.
    """
    raw = read_input_bytes(file, root, what="file")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(f"not UTF-8 text (byte {exc.start} on line {line} of the file); "
                         "save it as UTF-8", file=file) from None
    if text.startswith("\ufeff"):
        text = text[1:]
    lines = text.splitlines()
    if not lines or not lines[0].startswith("# %ECSV"):
        raise InputError("not an ECSV table (the first line must start with '# %ECSV'); "
                         "write it with astropy: Table.write(path, format='ascii.ecsv')", file=file)
    if FAST_READING:
        table = _fast_table(lines)
        if table is not None:
            return table
    return _strict_table(lines, file)


def _strict_table(lines, file):
    """The reference parse: astropy's ECSV reader on the whole file (every failure an InputError)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UnitsWarning)
            table = Table.read(lines, format="ascii.ecsv", guess=False)
    except Exception as exc:  # any parser failure is a problem with the user's file
        msg = " ".join(str(exc).split()) or type(exc).__name__
        if len(msg) > 300:
            msg = msg[:300] + "..."
        bad = re.search(r"column '([^']+)' failed to convert", msg)
        located = _locate_unconvertible(lines, bad.group(1)) if bad else None
        if located is not None:
            row, value = located
            raise InputError(f"value {value[:40]!r} is not a number (the header declares a numeric column)",
                             file=file, row=row, column=bad.group(1)) from None
        line = re.search(r"at data line (\d+)", msg)
        raise InputError(f"cannot parse ECSV table ({msg})", file=file,
                         row=int(line.group(1)) + 1 if line else None) from None
    for name in table.colnames:
        col = table[name]
        if not isinstance(col, Column) or col.ndim != 1:
            raise InputError("only plain one-dimensional columns are allowed "
                             f"(found {type(col).__name__} with shape {col.shape})", file=file, column=name)
    return table


#: read plain data lines with the fast path (:func:`_fast_table`); False forces astropy's reader for every file
FAST_READING = True

#: characters the fast path accepts in data lines: printable ASCII except the quote '"' and the backslash
_FAST_UNSAFE = re.compile(r'[^ !#-\[\]-~\n]')
#: parsed ECSV headers (header text -> column template or None), shared by files with the same header
_HEADER_CACHE: dict = {}
_HEADER_CACHE_SIZE = 64


def _header_template(header_lines):
    """(names, dtypes, units, meta) of an ECSV header, parsed by astropy once per distinct header text.

    None when the header asks for anything the fast path does not do (a
    delimiter other than one space, mixin or multi-dimensional columns, a
    datatype other than float/int/string, any warning from astropy, any
    parse error): such files always go through :func:`_strict_table`.
    """
    key = "\n".join(header_lines)
    if key in _HEADER_CACHE:
        return _HEADER_CACHE[key]
    template = None
    if not any("delimiter" in ln or "__serialized_columns__" in ln for ln in header_lines[:-1]):
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                table = Table.read(list(header_lines), format="ascii.ecsv", guess=False)
            others = [w for w in caught if not issubclass(w.category, UnitsWarning)]
            plain = all(isinstance(table[c], Column) and table[c].ndim == 1 and table[c].dtype.kind in "fiU"
                        for c in table.colnames)
            if not others and plain and len(table) == 0 and header_lines[-1].split(" ") == table.colnames:
                template = (tuple(table.colnames),
                            tuple(str if table[c].dtype.kind == "U" else table[c].dtype for c in table.colnames),
                            tuple(table[c].unit for c in table.colnames), dict(table.meta))
        except Exception:  # the strict path reports it
            template = None
    if len(_HEADER_CACHE) >= _HEADER_CACHE_SIZE:
        _HEADER_CACHE.clear()
    _HEADER_CACHE[key] = template
    return template


def _fast_table(lines):
    """The table of an ECSV file whose data lines are plain, or None to use :func:`_strict_table`.

    Fast path of issue 18 (docs/design.md §12): astropy parses the header
    (cached per distinct header text: the residual files of a dataset share
    one), and the data lines are split here and converted with the same
    numpy call astropy's ECSV reader makes (``np.array(values, dtype)``), so
    the values are identical. It only takes data lines that astropy's
    splitter reads the same way: printable ASCII without quotes or
    backslashes, fields separated by exactly one space, the declared
    number of fields on every line, no comment or blank lines. Anything
    else, and any conversion failure, returns None and the file is read by
    the strict path, which gives the located error messages; the validation
    after parsing is the same for both.
    """
    n_header = 0
    for ln in lines:
        if not ln.startswith("#"):
            break
        n_header += 1
    if n_header + 1 >= len(lines):
        return None           # no data rows: the strict path and the validators say what is wrong
    template = _header_template(lines[: n_header + 1])
    if template is None:
        return None
    names, dtypes, units, meta = template
    data = lines[n_header + 1:]
    body = "\n".join(data)
    try:
        codes = np.frombuffer(body.encode("ascii"), dtype=np.uint8)
    except UnicodeEncodeError:
        return None
    # printable ASCII and newlines only, no quote (34) or backslash (92), no comment line
    if (np.any((codes < 32) & (codes != 10)) or np.any(codes > 126) or np.any(codes == 34) or np.any(codes == 92)
            or body.startswith("#") or "\n#" in body):
        return None
    n_col, n_row = len(names), len(data)
    # exactly n_col - 1 spaces on every line, and no empty field
    newlines = np.flatnonzero(codes == 10)
    spaces = np.flatnonzero(codes == 32)
    per_line = np.diff(np.searchsorted(spaces, np.concatenate([[-1], newlines, [codes.size]])))
    if per_line.size != n_row or np.any(per_line != n_col - 1):
        return None
    tokens = body.split()
    if len(tokens) != n_row * n_col:
        return None
    try:
        values = [np.array(tokens[j::n_col], dtype) for j, dtype in enumerate(dtypes)]
    except Exception:  # a value astropy's converter refuses: the strict path names it
        return None
    return _PlainTable(names, values, units, meta)


class _PlainColumn(np.ndarray):
    """A plain column of :func:`_fast_table`: a 1-D numpy array with the ``unit`` of its ECSV header."""

    unit = None


class _PlainTable:
    """What the validators use of an astropy Table (``colnames``, ``len``, ``table[name]``, ``meta``),
    without building astropy columns: the result of :func:`_fast_table`."""

    def __init__(self, names, values, units, meta):
        self.colnames = list(names)
        self.meta = dict(meta)
        self._columns = {}
        for name, value, unit in zip(names, values, units):
            column = value.view(_PlainColumn)
            column.unit = unit
            self._columns[name] = column
        self._length = len(values[0]) if values else 0

    def __len__(self):
        return self._length

    def __getitem__(self, name):
        return self._columns[name]


def _locate_unconvertible(lines, column):
    """(data row from 1, text) of the first value of ``column`` that is not a number, or None.

    Used only to name the row when astropy refuses a numeric column; the
    data lines are re-read as text with the ECSV header's delimiter.
    """
    try:
        delimiter = "," if any(re.match(r"#\s*delimiter:\s*['\"]?,", ln) for ln in lines) else " "
        body = [ln for ln in lines if not ln.startswith("#")]
        table = astropy_ascii.read(body, format="basic", delimiter=delimiter, guess=False, fast_reader=False,
                                   converters={"*": [astropy_ascii.convert_numpy(str)]})
        for i, value in enumerate(table[column]):
            if np.ma.is_masked(value):
                continue
            try:
                float(value)
            except ValueError:
                return i + 1, str(value)
    except Exception:  # only a better message is lost
        return None
    return None


def _require_columns(table, required, file):
    for name in required:
        if name not in table.colnames:
            raise InputError(f"missing required column '{name}' (columns found: {', '.join(table.colnames) or 'none'})",
                             file=file, column=name)


def _first_bad(mask):
    """1-based data row of the first True in ``mask``."""
    return int(np.flatnonzero(mask)[0]) + 1


def _numeric(table, name, unit, file, *, allow_masked=False):
    """Column ``name`` as float64 in ``unit`` ('' = dimensionless, None = any unit kept as is).

    Returns ``(values, mask)``; masked (empty) fields raise unless ``allow_masked``.
    """
    col = table[name]
    mask = np.asarray(np.ma.getmaskarray(col), dtype=bool)
    if mask.any() and not allow_masked:
        raise InputError("empty value", file=file, row=_first_bad(mask), column=name)
    if col.dtype.kind not in "iuf":
        if col.dtype.kind == "b":
            raise InputError("values must be numbers, not true/false", file=file, row=1, column=name)
        values = np.asarray(col).astype(str)
        for i, v in enumerate(values):
            if mask[i]:
                continue
            try:
                float(v)
            except ValueError:
                raise InputError(f"value {v[:40]!r} is not a number", file=file, row=i + 1, column=name) from None
        raise InputError("column holds text; declare it as a number (datatype float64) in the ECSV header",
                         file=file, column=name)
    values = np.asarray(np.ma.getdata(col), dtype=np.float64).copy()
    if unit is not None:
        values = _convert(values, col.unit, unit, file, name, u)
    bad = ~np.isfinite(values) & ~mask
    if bad.any():
        row = _first_bad(bad)
        raise InputError(f"value {float(values[row - 1])} is not finite (NaN or infinity)", file=file, row=row, column=name)
    return values, mask


def _convert(values, have, want, file, name, u):
    if want == "":
        if have is None or have == u.dimensionless_unscaled:
            return values
        raise InputError(f"must be dimensionless, not in '{have}'", file=file, column=name)
    if have is None:
        raise InputError(f"no unit given; expected {want} (add 'unit: {want}' to the column in the ECSV header)",
                         file=file, column=name)
    if isinstance(have, u.UnrecognizedUnit):
        raise InputError(f"unit '{have}' is not recognised; expected {want}", file=file, column=name)
    if have == u.Unit(want):
        return values
    try:
        factor = have.to(want)
    except u.UnitConversionError:
        raise InputError(f"unit '{have}' cannot be converted to {want}", file=file, column=name) from None
    return values * factor


def _text(table, name, file):
    """Column ``name`` as a list of non-empty strings."""
    col = table[name]
    mask = np.asarray(np.ma.getmaskarray(col), dtype=bool)
    if mask.any():
        raise InputError("empty value", file=file, row=_first_bad(mask), column=name)
    values = [str(v) for v in np.ma.getdata(col).tolist()]
    if all(v.strip() and v == v.strip() for v in set(values)):
        return values
    for i, v in enumerate(values):
        if not v.strip():
            raise InputError("empty value", file=file, row=i + 1, column=name)
        if v != v.strip():
            raise InputError(f"value {v!r} has leading or trailing spaces", file=file, row=i + 1, column=name)
    return values


#: longest pulsar name (it becomes a file name; file systems allow 255 bytes)
MAX_NAME_LENGTH = 100


def _check_name(name, file, row):
    if len(name) > MAX_NAME_LENGTH:
        raise InputError(f"pulsar name {name[:40]!r}... is {len(name)} characters long; at most {MAX_NAME_LENGTH} "
                         "(it becomes a file name)", file=file, row=row, column="name")
    if not NAME_PATTERN.fullmatch(name):
        raise InputError(f"pulsar name {name[:40]!r} may only contain letters, digits and _ + . - "
                         "(it becomes a file name)", file=file, row=row, column="name")
    if ".." in name or name.startswith("."):
        raise InputError(f"pulsar name {name!r} must not start with '.' or contain '..' "
                         "(it becomes a file name)", file=file, row=row, column="name")


def _read_pulsar_table(file, root=None):
    table = _read_table(file, root)
    _require_columns(table, _PULSAR_COLUMNS, file)
    if len(table) == 0:
        raise InputError("no pulsars (the table has no data rows)", file=file)
    names = _text(table, "name", file)
    seen = {}
    for i, name in enumerate(names):
        _check_name(name, file, i + 1)
        key = name.lower()
        if key in seen:
            raise InputError(f"pulsar name {name!r} repeats row {seen[key]} (names must differ, "
                             "also in upper/lower case)", file=file, row=i + 1, column="name")
        seen[key] = i + 1
    ra, _ = _numeric(table, "ra", "deg", file)
    dec, _ = _numeric(table, "dec", "deg", file)
    distance, _ = _numeric(table, "distance", "kpc", file)
    distance_err, _ = _numeric(table, "distance_err", "kpc", file)
    checks = [
        (ra, (ra < 0) | (ra >= 360), "ra", "ra must be in [0, 360) degrees"),
        (dec, np.abs(dec) > 90, "dec", "dec must be in [-90, 90] degrees"),
        (distance, distance <= 0, "distance", "distance must be > 0"),
        (distance_err, distance_err < 0, "distance_err", "distance_err must be >= 0"),
    ]
    for values, bad, column, message in checks:
        if bad.any():
            row = _first_bad(bad)
            raise InputError(f"{message} (got {float(values[row - 1])!r})", file=file, row=row, column=column)

    present = [c for c in _RED_COLUMNS if c in table.colnames]
    if len(present) == 1:
        missing = (set(_RED_COLUMNS) - set(present)).pop()
        raise InputError(f"column '{present[0]}' needs column '{missing}' as well", file=file, column=missing)
    red_amp = red_idx = None
    if present:
        red_amp, amp_mask = _numeric(table, "red_log10_amplitude", "", file, allow_masked=True)
        red_idx, idx_mask = _numeric(table, "red_index", "", file, allow_masked=True)
        half = amp_mask != idx_mask
        if half.any():
            row = _first_bad(half)
            col = "red_index" if idx_mask[row - 1] else "red_log10_amplitude"
            raise InputError("give both red_log10_amplitude and red_index, or leave both empty (no red noise)",
                             file=file, row=row, column=col)
    known = set(_PULSAR_COLUMNS) | set(_RED_COLUMNS)
    _warn_unknown_columns(table, known, file)

    rows = []
    for i, name in enumerate(names):
        has_red = red_amp is not None and not amp_mask[i]
        rows.append({
            "name": name,
            "ra": float(np.deg2rad(ra[i])),
            "dec": float(np.deg2rad(dec[i])),
            "distance": float(distance[i]),
            "distance_err": float(distance_err[i]),
            "red_log10_amplitude": float(red_amp[i]) if has_red else None,
            "red_index": float(red_idx[i]) if has_red else None,
        })
    return rows


def _warn_unknown_columns(table, known, file, prefixes=()):
    unknown = [c for c in table.colnames if c not in known and not c.startswith(prefixes or ("\0",))]
    if unknown:
        warnings.warn(f"{file}: unknown column(s) ignored: {escape_text(', '.join(unknown))}", DatasetWarning,
                      stacklevel=4)


def _read_residual_table(file, root=None, mjd_range=None):
    table = _read_table(file, root)
    _require_columns(table, _RESIDUAL_COLUMNS, file)
    if len(table) == 0:
        raise InputError("no TOAs (the table has no data rows)", file=file)
    mjd, _ = _numeric(table, "mjd", "d", file)
    residual, _ = _numeric(table, "residual", "s", file)
    sigma, _ = _numeric(table, "sigma", "s", file)
    backend = _text(table, "backend", file)
    if (sigma <= 0).any():
        row = _first_bad(sigma <= 0)
        raise InputError(f"sigma must be > 0 (got {float(sigma[row - 1])!r})", file=file, row=row, column="sigma")
    check_residual_values(mjd, residual, sigma, file, mjd_range, mjd_unit=table["mjd"].unit)
    step = np.diff(mjd)
    if (step < 0).any():
        row = _first_bad(step < 0) + 1
        raise InputError(f"TOAs are not sorted by time (mjd {float(mjd[row - 1])!r} comes after {float(mjd[row - 2])!r}); "
                         "sort the rows by mjd", file=file, row=row, column="mjd")
    if (step == 0).any():
        row = _first_bad(step == 0) + 1
        raise InputError(f"duplicate TOA (mjd {float(mjd[row - 1])!r} repeats the previous row)",
                         file=file, row=row, column="mjd")
    design_names = [c for c in table.colnames if c.startswith(DESIGN_PREFIXES)]
    design = np.empty((len(table), len(design_names)))
    for j, name in enumerate(design_names):
        design[:, j], _ = _numeric(table, name, None, file)
    _warn_unknown_columns(table, set(_RESIDUAL_COLUMNS), file, DESIGN_PREFIXES)

    n_columns = len(DEFAULT_DESIGN_COLUMNS) + len(design_names)
    if len(mjd) <= n_columns:
        raise InputError(f"{len(mjd)} TOAs, but the timing model has {n_columns} columns "
                         f"({len(DEFAULT_DESIGN_COLUMNS)} default + {len(design_names)} design_*); "
                         "more TOAs than columns are needed", file=file)
    _check_design_rank(mjd, design, design_names, file)
    return {"mjd": mjd, "residual": residual, "sigma": sigma, "backend": np.array(backend),
            "design": design, "design_names": tuple(design_names)}


def _check_design_rank(mjd, design, design_names, file):
    """Refuse a timing model whose columns are linearly dependent (the fit would be singular)."""
    full = np.hstack([default_design_matrix(mjd * DAY_SECONDS), design])
    norms = np.linalg.norm(full, axis=0)
    names = list(DEFAULT_DESIGN_COLUMNS) + list(design_names)
    if (norms == 0).any():
        j = int(np.flatnonzero(norms == 0)[0])
        raise InputError("timing-model column is all zeros", file=file, column=names[j])
    full = full / norms
    if np.linalg.matrix_rank(full) == full.shape[1]:
        return
    for j in range(1, full.shape[1] + 1):
        if np.linalg.matrix_rank(full[:, :j]) < j:
            where = names[j - 1]
            what = (f"column {where} repeats a combination of the earlier timing-model columns"
                    if where in design_names else
                    f"the default timing-model column '{where}' is degenerate (too short a span or too few TOAs)")
            raise InputError(f"timing model is singular: {what}", file=file,
                             column=where if where in design_names else None)


def check_residual_values(mjd, residual, sigma, file, mjd_range=None, *, mjd_unit=None):
    """Refuse implausible TOAs, sigmas and residuals (the ranges of :mod:`cwsearch.core.safeio`).

    Every reading path (the strict one and any faster one) calls this after parsing, so the
    plausibility rules live in one place.
    """
    lo, hi = _mjd_range(mjd_range)
    bad = (mjd < lo) | (mjd > hi)
    if bad.any():
        row = _first_bad(bad)
        hint = ""
        if mjd_unit is not None and str(mjd_unit) not in ("d", "day"):
            hint = f"; the column's unit is '{mjd_unit}', but an MJD is a date counted in days (unit: d)"
        raise InputError(f"mjd {float(mjd[row - 1])!r} is outside the plausible range {lo:g}-{hi:g} "
                         f"(widen it with --mjd-range LO HI){hint}", file=file, row=row, column="mjd")
    smin, smax = SIGMA_RANGE
    bad = (sigma < smin) | (sigma > smax)
    if bad.any():
        row = _first_bad(bad)
        raise InputError(f"sigma {float(sigma[row - 1])!r} s is outside the plausible range {smin:g}-{smax:g} s "
                         "(check the column's unit)", file=file, row=row, column="sigma")
    size = np.abs(residual)
    bad = (size > MAX_RESIDUAL_SECONDS) | (size > MAX_RESIDUAL_OVER_SIGMA * sigma)
    if bad.any():
        row = _first_bad(bad)
        raise InputError(f"|residual| {float(size[row - 1])!r} s is implausible (at most {MAX_RESIDUAL_SECONDS:g} s "
                         f"and {MAX_RESIDUAL_OVER_SIGMA:g} x sigma; check the column's unit)", file=file, row=row,
                         column="residual")


def _read_noise_table(file, noise, residual_data, root=None):
    table = _read_table(file, root)
    _require_columns(table, _NOISE_COLUMNS, file)
    if len(table) == 0:
        return  # an empty noise table means: defaults for everyone
    pulsars = _text(table, "pulsar", file)
    backends = _text(table, "backend", file)
    scale, _ = _numeric(table, "sigma_scale", "", file)
    added, _ = _numeric(table, "sigma_added", "s", file)
    _warn_unknown_columns(table, set(_NOISE_COLUMNS), file)
    seen = {}
    for i, (psr, backend) in enumerate(zip(pulsars, backends)):
        row = i + 1
        if psr not in noise:
            raise InputError(f"unknown pulsar {psr!r} (not in {PULSARS_FILE})", file=file, row=row, column="pulsar")
        used = sorted(set(residual_data[psr]["backend"].tolist()))
        if backend not in used:
            raise InputError(f"pulsar {psr} has no TOAs from backend {backend!r} (its backends: {', '.join(used)})",
                             file=file, row=row, column="backend")
        if (psr, backend) in seen:
            raise InputError(f"pulsar {psr}, backend {backend} repeats row {seen[psr, backend]}",
                             file=file, row=row, column="backend")
        seen[psr, backend] = row
        if scale[i] <= 0:
            raise InputError(f"sigma_scale must be > 0 (got {float(scale[i])!r})", file=file, row=row, column="sigma_scale")
        if added[i] < 0:
            raise InputError(f"sigma_added must be >= 0 (got {float(added[i])!r})", file=file, row=row, column="sigma_added")
        noise[psr].sigma_scale[backend] = float(scale[i])
        noise[psr].sigma_added[backend] = float(added[i])


# ----------------------------------------------------------------- checksum
def dataset_files(path):
    """The files that make up a dataset, as paths relative to the folder, in a stable order.

    ``pulsars.ecsv``, ``noise.ecsv`` (if present) and every ``residuals/*.ecsv``.
    """
    folder = Path(path)
    files = [PULSARS_FILE]
    if is_regular_file(folder / NOISE_FILE):
        files.append(NOISE_FILE)
    res_dir = folder / RESIDUALS_DIR
    if res_dir.is_dir():
        files += sorted(f"{RESIDUALS_DIR}/{p.name}" for p in res_dir.iterdir()
                        if is_regular_file(p) and p.suffix == ".ecsv" and not p.name.startswith("."))
    return files


def dataset_checksum(path) -> str:
    """SHA-256 (hex) over the dataset files (names and contents) in :func:`dataset_files` order.

    Identical datasets give identical checksums on every machine; used in
    run provenance.
    """
    folder = Path(path)
    digest = hashlib.sha256()
    for rel in dataset_files(folder):
        data = read_input_bytes(folder / rel, folder)
        digest.update(rel.encode("utf-8") + b"\0" + str(len(data)).encode() + b"\0")
        digest.update(data)
    return digest.hexdigest()


# ----------------------------------------------------------------- writing
def _degrees_exact(radians: float) -> float:
    """Degree value that :func:`numpy.deg2rad` maps back to ``radians`` exactly (if any).

    Among the exact candidates the one with the shortest decimal form wins
    (so 150.0 stays 150.0); if there is none, the plain conversion.
    """
    plain = float(np.rad2deg(radians))
    candidates = [plain]
    lo = hi = plain
    for _ in range(4):
        lo, hi = float(np.nextafter(lo, -np.inf)), float(np.nextafter(hi, np.inf))
        candidates += [lo, hi]
    exact = [c for c in candidates if float(np.deg2rad(c)) == radians]
    if not exact:
        return plain
    return min(exact, key=lambda c: (len(repr(c)), abs(c - plain)))


def _pulsar_table(array):
    table = Table()
    table["name"] = [p.name for p in array]
    ra = []
    for p in array:
        d = _degrees_exact(p.ra % (2 * math.pi) if not 0 <= p.ra < 2 * math.pi else p.ra)
        ra.append(math.nextafter(360.0, 0.0) if d >= 360.0 else d)
    table["ra"] = np.array(ra)
    table["ra"].unit = "deg"
    table["dec"] = np.array([_degrees_exact(p.dec) for p in array])
    table["dec"].unit = "deg"
    table["distance"] = np.array([p.distance for p in array])
    table["distance"].unit = "kpc"
    table["distance_err"] = np.array([p.distance_err for p in array])
    table["distance_err"].unit = "kpc"
    if any(p.noise.has_red_noise for p in array):
        mask = [not p.noise.has_red_noise for p in array]
        table["red_log10_amplitude"] = MaskedColumn(
            [p.noise.red_log10_amplitude if p.noise.has_red_noise else 0.0 for p in array], mask=mask, dtype=float)
        table["red_index"] = MaskedColumn(
            [p.noise.red_index if p.noise.has_red_noise else 0.0 for p in array], mask=mask, dtype=float)
    return table


def _residual_table(pulsar):
    table = Table()
    table["mjd"] = np.asarray(pulsar.mjd, dtype=float)
    table["mjd"].unit = "d"
    table["residual"] = np.asarray(pulsar.residuals, dtype=float)
    table["residual"].unit = "s"
    table["sigma"] = np.asarray(pulsar.sigmas, dtype=float)
    table["sigma"].unit = "s"
    table["backend"] = np.asarray(pulsar.backends, dtype=str)
    for j, name in enumerate(pulsar.extra_design_names):
        column = name if name.startswith(DESIGN_PREFIXES) else f"design_{name}"
        table[column] = np.asarray(pulsar.extra_design[:, j], dtype=float)
    return table


def _noise_table(array):
    rows = []
    for p in array:
        keys = set(p.noise.sigma_scale) | set(p.noise.sigma_added)
        unused = keys - set(p.backend_names)
        if unused:
            raise ValueError(f"pulsar {p.name}: noise settings for backends without TOAs: {sorted(unused)}")
        for backend in sorted(keys):
            rows.append((p.name, backend, float(p.noise.sigma_scale.get(backend, 1.0)),
                         float(p.noise.sigma_added.get(backend, 0.0))))
    if not rows:
        return None
    table = Table(rows=rows, names=("pulsar", "backend", "sigma_scale", "sigma_added"),
                  dtype=(str, str, float, float))
    table["sigma_added"].unit = "s"
    return table


def write_dataset(array, path, injection=None, *, overwrite=False) -> None:
    """Write ``array`` as a dataset folder at ``path`` (and ``injection`` as injection.json).

    The folder is assembled next to ``path`` under a temporary name (each
    file written atomically through :mod:`cwsearch.core.fileio`) and renamed into
    place at the end, so ``path`` appears complete or not at all. ``path``
    must not exist or be an empty folder; with ``overwrite=True`` an existing
    *dataset* folder (one holding pulsars.ecsv) is replaced, anything else
    is refused (:class:`~cwsearch.core.errors.InputError`).

    Parameters
    ----------
    array : :class:`~cwsearch.data.model.Array`
    path : folder to create
    injection : dict or None
        JSON-serialisable description of injected signals (``injection.json``).
    overwrite : bool
    """
    target = Path(path)
    names = [p.name for p in array]
    for i, name in enumerate(names):
        _check_name(name, "array", i + 1)
    if len({n.lower() for n in names}) != len(names):
        raise InputError("pulsar names must differ (also in upper/lower case)", file=target)
    replace = False
    if target.exists():
        if not target.is_dir():
            raise InputError("exists and is not a folder", file=target)
        if any(target.iterdir()):
            if not overwrite:
                raise InputError("folder exists and is not empty (choose another name, or allow overwriting: --overwrite)",
                                 file=target)
            if not (target / PULSARS_FILE).is_file():
                raise InputError(f"refusing to overwrite a folder that is not a dataset (no {PULSARS_FILE})",
                                 file=target)
            foreign = _non_dataset_entries(target)
            if foreign:
                shown = ", ".join(foreign[:3]) + (" ..." if len(foreign) > 3 else "")
                raise InputError(f"refusing to overwrite: the folder holds more than a dataset ({shown}); "
                                 "move those files away or choose another folder", file=target)
        replace = True
    noise_table = _noise_table(array)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix="." + target.name + ".", suffix=".part", dir=target.parent))
    except OSError as exc:
        raise InputError(f"cannot write here ({exc.strerror})", file=target.parent) from None
    try:
        write_table_atomic(tmp / PULSARS_FILE, _pulsar_table(array))
        for p in array:
            write_table_atomic(tmp / RESIDUALS_DIR / f"{p.name}.ecsv", _residual_table(p))
        if noise_table is not None:
            write_table_atomic(tmp / NOISE_FILE, noise_table)
        if injection is not None:
            write_json_atomic(tmp / INJECTION_FILE, injection)
        os.chmod(tmp, 0o777 & ~_umask())
        if replace:
            old = target.with_name("." + target.name + ".old")
            if old.exists():
                shutil.rmtree(old)
            os.replace(target, old)
            os.replace(tmp, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, target)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise InputError(f"cannot write dataset ({exc.strerror})", file=target) from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _non_dataset_entries(folder: Path) -> list:
    """Entries of ``folder`` that are not part of a dataset (what ``--overwrite`` would destroy besides it).

    A dataset holds only pulsars.ecsv, noise.ecsv, injection.json and residuals/ with ``*.ecsv`` files
    (regular files, no symlinks).
    """
    allowed = {PULSARS_FILE, NOISE_FILE, INJECTION_FILE}
    foreign = []
    for entry in sorted(folder.iterdir()):
        if entry.name == RESIDUALS_DIR and entry.is_dir() and not entry.is_symlink():
            foreign += [f"{RESIDUALS_DIR}/{p.name}" for p in sorted(entry.iterdir())
                        if p.is_symlink() or not p.is_file() or p.suffix != ".ecsv"]
        elif entry.name not in allowed or entry.is_symlink() or not entry.is_file():
            foreign.append(entry.name)
    return foreign


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


__all__ = ["read_dataset", "write_dataset", "dataset_checksum", "dataset_files", "DatasetWarning",
           "NAME_PATTERN", "check_residual_values", "MAX_NAME_LENGTH"]
