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
from .model import default_design_matrix, Array, DEFAULT_DESIGN_COLUMNS, Pulsar, PulsarNoise

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
def read_dataset(path) -> Array:
    """Read and validate a dataset folder; return an :class:`~cwsearch.data.model.Array`.

    Pulsars keep the order of ``pulsars.ecsv``. Angles are converted to
    radians, distances to kpc, residuals and sigmas to seconds, TOAs to MJD
    days. Raises :class:`~cwsearch.core.errors.InputError` (file, row, column)
    on any problem; see the module docstring for the format.
    """
    folder = Path(path)
    if not folder.exists():
        raise InputError("dataset folder not found", file=folder)
    if not folder.is_dir():
        raise InputError("not a folder (a dataset is a folder with pulsars.ecsv and residuals/)", file=folder)
    pulsar_file = folder / PULSARS_FILE
    if not pulsar_file.is_file():
        raise InputError(f"dataset folder has no {PULSARS_FILE}", file=folder)
    rows = _read_pulsar_table(pulsar_file)

    res_dir = folder / RESIDUALS_DIR
    if not res_dir.is_dir():
        raise InputError(f"dataset folder has no {RESIDUALS_DIR}/ folder", file=folder)
    expected = {f"{row['name']}.ecsv" for row in rows}
    unused = sorted(e.name for e in res_dir.iterdir() if not e.name.startswith(".") and e.name not in expected)
    if unused:
        shown = ", ".join(unused[:5]) + (" ..." if len(unused) > 5 else "")
        warnings.warn(f"{res_dir}: {len(unused)} file(s) not named in {PULSARS_FILE} are ignored: {shown}",
                      DatasetWarning, stacklevel=2)

    residual_data = {}
    for i, row in enumerate(rows):
        rfile = res_dir / f"{row['name']}.ecsv"
        if not rfile.is_file():
            raise InputError(f"residual file for pulsar {row['name']} (row {i + 1} of {PULSARS_FILE}) "
                             "is missing", file=rfile)
        residual_data[row["name"]] = _read_residual_table(rfile)

    noise_file = folder / NOISE_FILE
    noise = {row["name"]: PulsarNoise(red_log10_amplitude=row["red_log10_amplitude"],
                                      red_index=row["red_index"]) for row in rows}
    if noise_file.exists():
        _read_noise_table(noise_file, noise, residual_data)

    pulsars = []
    for row in rows:
        data = residual_data[row["name"]]
        pulsars.append(Pulsar(row["name"], ra=row["ra"], dec=row["dec"], distance=row["distance"],
                              distance_err=row["distance_err"], mjd=data["mjd"], residuals=data["residual"],
                              sigmas=data["sigma"], backends=data["backend"],
                              extra_design=data["design"], extra_design_names=data["design_names"],
                              noise=noise[row["name"]]))
    return Array(pulsars)


def _read_table(file: Path):
    """Parse one ECSV file into an astropy Table; every failure becomes an InputError."""
    try:
        raw = file.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read ({exc.strerror})", file=file) from None
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
    values = [str(v) for v in np.ma.getdata(col)]
    for i, v in enumerate(values):
        if not v.strip():
            raise InputError("empty value", file=file, row=i + 1, column=name)
        if v != v.strip():
            raise InputError(f"value {v!r} has leading or trailing spaces", file=file, row=i + 1, column=name)
    return values


def _check_name(name, file, row):
    if not NAME_PATTERN.fullmatch(name):
        raise InputError(f"pulsar name {name[:40]!r} may only contain letters, digits and _ + . - "
                         "(it becomes a file name)", file=file, row=row, column="name")
    if ".." in name or name.startswith("."):
        raise InputError(f"pulsar name {name!r} must not start with '.' or contain '..' "
                         "(it becomes a file name)", file=file, row=row, column="name")


def _read_pulsar_table(file):
    table = _read_table(file)
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
        warnings.warn(f"{file}: unknown column(s) ignored: {', '.join(unknown)}", DatasetWarning, stacklevel=4)


def _read_residual_table(file):
    table = _read_table(file)
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


def _read_noise_table(file, noise, residual_data):
    table = _read_table(file)
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
    if (folder / NOISE_FILE).is_file():
        files.append(NOISE_FILE)
    res_dir = folder / RESIDUALS_DIR
    if res_dir.is_dir():
        files += sorted(f"{RESIDUALS_DIR}/{p.name}" for p in res_dir.iterdir()
                        if p.is_file() and p.suffix == ".ecsv" and not p.name.startswith("."))
    return files


def dataset_checksum(path) -> str:
    """SHA-256 (hex) over the dataset files (names and contents) in :func:`dataset_files` order.

    Identical datasets give identical checksums on every machine; used in
    run provenance.
    """
    folder = Path(path)
    digest = hashlib.sha256()
    for rel in dataset_files(folder):
        try:
            data = (folder / rel).read_bytes()
        except OSError as exc:
            raise InputError(f"cannot read ({exc.strerror})", file=folder / rel) from None
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


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


__all__ = ["read_dataset", "write_dataset", "dataset_checksum", "dataset_files", "DatasetWarning",
           "NAME_PATTERN"]
