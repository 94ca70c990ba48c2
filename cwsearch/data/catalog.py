"""Galaxy catalogues for the host crossmatch: reading, column mapping, validation.

A catalogue is an ECSV or CSV file with one row per galaxy:

=====================  =======  =====================================================
column                 unit     meaning
=====================  =======  =====================================================
``name``               —        unique galaxy name
``ra``, ``dec``        deg      position (ICRS/equatorial), ``|dec| ≤ 90``
``distance``           Mpc      luminosity distance, > 0 (or give ``redshift``)
``redshift``           —        used (Planck18) where ``distance`` is absent
``distance_err``       Mpc      optional; default a fraction of the distance
``k_abs_mag``          mag      optional K-band absolute magnitude
``log10_stellar_mass`` log Msun optional
``log10_bulge_mass``   log Msun optional
``log10_bh_mass``      log Msun optional black-hole (total binary) mass
``period``             d        optional claimed electromagnetic period (observed)
``period_err``         d        its 1σ error (required where ``period`` is given)
=====================  =======  =====================================================

ECSV units are honoured (e.g. a distance in kpc or a period in yr is
converted); CSV values are taken in the units above. Other names can be
mapped with ``columns={"ra": "RAJ2000", ...}`` (the ``--columns
ra=RAJ2000,dec=DEJ2000`` option). Empty or NaN values in optional columns
mean "unknown"; in required columns they are errors. Every problem is an
:class:`~cwsearch.core.errors.InputError` naming file, row (data rows from 1) and
column. Everything is vectorised: a million-row CSV or ECSV reads and
validates in a few seconds (the ECSV body goes through astropy's fast C
reader after the header is parsed).

Examples
--------
>>> import tempfile, pathlib
>>> p = pathlib.Path(tempfile.mkdtemp()) / "g.csv"
>>> _ = p.write_text("name,ra,dec,redshift\\nA,10,20,0.01\\nB,30,-5,0.02\\n")
>>> cat = read_catalog(p)
>>> len(cat), round(float(cat.distance[0]), 1)
(2, 44.6)
>>> _ = p.write_text("name,ra,dec,distance\\nA,10,95,40\\n")
>>> read_catalog(p)
Traceback (most recent call last):
...
cwsearch.core.errors.InputError: ...g.csv, row 1, column dec: declination must be within [-90, 90] deg (got 95)
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, field
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.io import ascii
from astropy.table import Table

from ..core.errors import InputError
from ..core.safeio import escape_text, read_input_bytes
from .cosmology import luminosity_distance, redshift_at_distance

#: mass-proxy columns a catalogue may carry, in order of preference
MASS_PROXIES = ("log10_bh_mass", "log10_bulge_mass", "log10_stellar_mass", "k_abs_mag")

#: canonical column -> (unit, required?)
COLUMNS = {
    "name": (None, True),
    "ra": ("deg", True),
    "dec": ("deg", True),
    "distance": ("Mpc", False),
    "redshift": (None, False),
    "distance_err": ("Mpc", False),
    "k_abs_mag": ("mag", False),
    "log10_stellar_mass": (None, False),
    "log10_bulge_mass": (None, False),
    "log10_bh_mass": (None, False),
    "period": ("d", False),
    "period_err": ("d", False),
}

#: plausible ranges of the mass proxies (catches linear masses or apparent magnitudes)
_PROXY_RANGES = {"k_abs_mag": (-35.0, -10.0), "log10_stellar_mass": (5.0, 14.0),
                 "log10_bulge_mass": (5.0, 14.0), "log10_bh_mass": (4.0, 12.0)}

#: default fractional distance error where the catalogue gives none
DEFAULT_DISTANCE_ERROR = 0.1


def parse_column_map(text):
    """``"ra=RAJ2000,dec=DEJ2000"`` -> ``{"ra": "RAJ2000", "dec": "DEJ2000"}`` (validated).

    >>> parse_column_map("ra=RAJ2000, distance=Dist")
    {'ra': 'RAJ2000', 'distance': 'Dist'}
    """
    if text is None or text == "":
        return {}
    if isinstance(text, dict):
        pairs = list(text.items())
    else:
        pairs = []
        for item in str(text).split(","):
            item = item.strip()
            if not item:
                continue
            if "=" not in item:
                raise InputError(f"--columns entry '{item}' is not of the form ours=theirs (e.g. ra=RAJ2000)")
            ours, theirs = (s.strip() for s in item.split("=", 1))
            pairs.append((ours, theirs))
    mapping = {}
    for ours, theirs in pairs:
        if ours not in COLUMNS:
            raise InputError(f"--columns: unknown column '{ours}' (known: {', '.join(COLUMNS)})")
        if not theirs:
            raise InputError(f"--columns: no file column given for '{ours}'")
        mapping[ours] = theirs
    return mapping


@dataclass
class Catalog:
    """A validated galaxy catalogue (plain arrays, one entry per galaxy).

    Angles in degrees, distances in Mpc, periods in days. ``redshift`` is
    the catalogued one or, where only a distance was given, the Planck18
    redshift at that luminosity distance. Optional quantities are NaN where
    unknown. ``row`` holds each galaxy's data-row number in the file.
    """

    path: str
    name: np.ndarray
    ra: np.ndarray
    dec: np.ndarray
    distance: np.ndarray
    distance_err: np.ndarray
    redshift: np.ndarray
    period: np.ndarray
    period_err: np.ndarray
    proxies: dict = field(default_factory=dict)
    row: np.ndarray = None

    def __len__(self):
        return int(self.name.size)

    def subset(self, index):
        """A catalogue with the selected rows (boolean mask or integer index)."""
        take = lambda a: a[index]  # noqa: E731
        return Catalog(self.path, take(self.name), take(self.ra), take(self.dec), take(self.distance),
                       take(self.distance_err), take(self.redshift), take(self.period),
                       take(self.period_err), {k: take(v) for k, v in self.proxies.items()}, take(self.row))

    def total_mass_prior(self, relation):
        """Per galaxy: mean and σ of log10 total black-hole mass [Msun], and the proxy used ("" if none).

        Each galaxy uses the first proxy it has, in the order of
        :data:`MASS_PROXIES` (black-hole mass, bulge mass,
        stellar mass, K-band magnitude).
        """
        n = len(self)
        mu = np.full(n, np.nan)
        sigma = np.full(n, np.nan)
        used = np.full(n, "", dtype=object)
        for proxy in MASS_PROXIES:
            values = self.proxies.get(proxy)
            if values is None:
                continue
            fill = np.isnan(mu) & np.isfinite(values)
            if fill.any():
                m, s = relation.total_mass_prior(proxy, values[fill])
                mu[fill], sigma[fill], used[fill] = m, s, proxy
        return mu, sigma, used.astype(str)


# ---------------------------------------------------------------- reading
def _check_bytes(path: Path, raw: bytes):
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        before = raw[: exc.start].split(b"\n")
        line = len(before)
        data_lines = sum(1 for ln in before[:-1] if ln.strip() and not ln.lstrip().startswith(b"#"))
        row = data_lines if data_lines >= 1 else None   # header line is not a data row
        raise InputError(f"not valid UTF-8 text: byte 0x{raw[exc.start]:02x} on line {line}",
                         file=path, row=row) from None


def _read_table(path: Path):
    """Astropy table of the file and a dict of column units from the ECSV header (if any).

    The bytes are read once, through :func:`cwsearch.core.safeio.read_input_bytes` (a regular file,
    size cap); a UTF-8 byte-order mark is dropped; astropy parses the text, never the path again.
    """
    raw = read_input_bytes(path, what="catalogue")
    _check_bytes(path, raw)
    if raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    text = raw.decode("utf-8")
    if not text.endswith("\n"):
        text += "\n"        # astropy reads a string holding a newline as the table itself, never as a file name
    is_ecsv = text[:200].lstrip().startswith("# %ECSV")
    try:
        if not is_ecsv:
            return ascii.read(text, format="csv", guess=False, fast_reader=True), {}
        lines = text.splitlines(keepends=True)
        header_lines = []
        for line in lines:
            header_lines.append(line)
            if not line.startswith("#"):
                break
        head = Table.read("".join(header_lines), format="ascii.ecsv")
        units = {c: head[c].unit for c in head.colnames}
        match = re.search(r"^#\s*delimiter:\s*'?(.)'?\s*$", "".join(header_lines), flags=re.M)
        delimiter = match.group(1) if match else " "
        try:
            table = ascii.read(text, format="fast_basic", delimiter=delimiter, comment="#",
                               guess=False)
        except Exception:  # unusual ECSV content: let astropy's full reader handle (or explain) it
            table = Table.read(text, format="ascii.ecsv")
        return table, units
    except InputError:
        raise
    except Exception as exc:
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"cannot read the catalogue as {'ECSV' if is_ecsv else 'CSV'}: {escape_text(msg[:300])}",
                         file=path) from None


def _numeric(table, file_col, ours, path, units, required):
    """Float array of a column (NaN where empty), converted to our unit; errors name row and column."""
    col = table[file_col]
    mask = np.asarray(getattr(col, "mask", np.zeros(len(col), bool)), dtype=bool)
    if mask.ndim == 0:
        mask = np.full(len(col), bool(mask))
    data = np.asarray(col.filled(0) if hasattr(col, "filled") else col)
    try:
        values = data.astype(float)
    except (ValueError, TypeError):
        for i, v in enumerate(data):
            if mask[i]:
                continue
            try:
                float(v)
            except (ValueError, TypeError):
                raise InputError(f"not a number: {str(v)!r}", file=path, row=i + 1, column=file_col) from None
        values = np.zeros(len(data))
    values = np.where(mask, np.nan, values)
    unit_ours = COLUMNS[ours][0]
    unit_file = units.get(file_col)
    if unit_ours is not None and unit_file is not None and str(unit_file) not in ("", "None"):

        try:
            values = (values * u.Unit(unit_file)).to_value(unit_ours)
        except Exception:
            raise InputError(f"unit '{unit_file}' cannot be converted to {unit_ours}", file=path,
                             column=file_col) from None
    bad = np.flatnonzero(np.isinf(values))
    if bad.size:
        raise InputError(f"value is {values[bad[0]]} (give a finite number, or leave the field empty for unknown)",
                         file=path, row=int(bad[0]) + 1, column=file_col)
    if required:
        bad = np.flatnonzero(mask)
        if bad.size:
            raise InputError("missing value", file=path, row=int(bad[0]) + 1, column=file_col)
        bad = np.flatnonzero(~np.isfinite(values))
        if bad.size:
            raise InputError(f"value is {values[bad[0]]} (a finite number is required)", file=path,
                             row=int(bad[0]) + 1, column=file_col)
    return values


def _first(mask):
    idx = np.flatnonzero(mask)
    return int(idx[0]) if idx.size else None


def read_catalog(path, columns=None, *, distance_error=DEFAULT_DISTANCE_ERROR):
    """Read and validate a galaxy catalogue (ECSV or CSV). Returns a :class:`Catalog`.

    Parameters
    ----------
    path : str or Path
        The file. ECSV is recognised by its ``# %ECSV`` first line.
    columns : dict or str, optional
        Map our column names to the file's: ``{"ra": "RAJ2000"}`` or
        ``"ra=RAJ2000,dec=DEJ2000"``.
    distance_error : float
        Fractional 1σ distance error used where there is no ``distance_err``
        column or value (default 0.1).
    """
    path = Path(path)
    if not os.path.lexists(path):
        raise InputError("catalogue file not found", file=path)
    mapping = parse_column_map(columns)
    table, units = _read_table(path)
    if len(table) == 0:
        raise InputError("the catalogue has no rows", file=path)
    present = list(table.colnames)
    file_name = {ours: mapping.get(ours, ours) for ours in COLUMNS}
    for ours, theirs in mapping.items():
        if theirs not in present:
            raise InputError(f"column '{theirs}' (mapped to {ours}) not found; the file has: {', '.join(present)}",
                             file=path, column=theirs)
    for ours in ("name", "ra", "dec"):
        if file_name[ours] not in present:
            raise InputError(f"missing required column '{file_name[ours]}' (the file has: {', '.join(present)}; "
                             f"map names with --columns {ours}=THEIRS)", file=path, column=file_name[ours])
    has_distance = file_name["distance"] in present
    has_redshift = file_name["redshift"] in present
    if not (has_distance or has_redshift):
        raise InputError("needs a 'distance' [Mpc] or 'redshift' column (the file has: "
                         f"{', '.join(present)})", file=path, column="distance")

    # names
    ncol = table[file_name["name"]]
    nmask = np.asarray(getattr(ncol, "mask", np.zeros(len(ncol), bool)), dtype=bool)
    if nmask.ndim == 0:
        nmask = np.full(len(ncol), bool(nmask))
    names = np.char.strip(np.asarray(ncol.filled("") if hasattr(ncol, "filled") else ncol).astype(str))
    bad = _first(nmask | (names == ""))
    if bad is not None:
        raise InputError("empty name", file=path, row=bad + 1, column=file_name["name"])
    order = np.argsort(names, kind="stable")
    sorted_names = names[order]
    dup = np.flatnonzero(sorted_names[1:] == sorted_names[:-1])
    if dup.size:
        rows_dup = order[dup + 1]
        i = int(rows_dup.min())
        first = int(np.flatnonzero(names == names[i])[0])
        raise InputError(f"duplicate name '{names[i]}' (first seen in row {first + 1})", file=path,
                         row=i + 1, column=file_name["name"])

    num = lambda ours, req: _numeric(table, file_name[ours], ours, path, units, req)  # noqa: E731
    ra = num("ra", True)
    dec = num("dec", True)
    bad = _first(np.abs(dec) > 90.0)
    if bad is not None:
        raise InputError(f"declination must be within [-90, 90] deg (got {dec[bad]:g})", file=path,
                         row=bad + 1, column=file_name["dec"])
    ra = np.remainder(ra, 360.0)   # any finite right ascension is wrapped into [0, 360) (720.5 -> 0.5)

    n = len(table)
    distance = num("distance", not has_redshift) if has_distance else np.full(n, np.nan)
    redshift = num("redshift", not has_distance) if has_redshift else np.full(n, np.nan)
    bad = _first(distance <= 0)
    if bad is not None:
        raise InputError(f"distance must be > 0 Mpc (got {distance[bad]:g})", file=path, row=bad + 1,
                         column=file_name["distance"])
    bad = _first(redshift < 0)
    if bad is not None:
        raise InputError(f"redshift must be >= 0 (got {redshift[bad]:g})", file=path, row=bad + 1,
                         column=file_name["redshift"])
    neither = ~np.isfinite(distance) & ~np.isfinite(redshift)
    bad = _first(neither)
    if bad is not None:
        raise InputError("neither distance nor redshift given", file=path, row=bad + 1,
                         column=file_name["distance"] if has_distance else file_name["redshift"])
    use_z = ~np.isfinite(distance)
    bad = _first(use_z & (redshift <= 0))
    if bad is not None:
        raise InputError("redshift 0 gives no distance (give a distance instead)", file=path, row=bad + 1,
                         column=file_name["redshift"])
    if use_z.any():
        distance[use_z] = luminosity_distance(redshift[use_z])
    no_z = ~np.isfinite(redshift)
    if no_z.any():
        redshift[no_z] = redshift_at_distance(distance[no_z])

    if file_name["distance_err"] in present:
        distance_err = num("distance_err", False)
        bad = _first(distance_err <= 0)
        if bad is not None:
            raise InputError(f"distance error must be > 0 Mpc (got {distance_err[bad]:g})", file=path,
                             row=bad + 1, column=file_name["distance_err"])
        distance_err = np.where(np.isfinite(distance_err), distance_err, distance_error * distance)
    else:
        distance_err = distance_error * distance

    proxies = {}
    for proxy in MASS_PROXIES:
        if file_name[proxy] in present:
            values = num(proxy, False)
            lo, hi = _PROXY_RANGES[proxy]
            bad = _first((values < lo) | (values > hi))
            if bad is not None:
                raise InputError(f"value {values[bad]:g} is outside the plausible range [{lo:g}, {hi:g}]",
                                 file=path, row=bad + 1, column=file_name[proxy])
            proxies[proxy] = values

    period = num("period", False) if file_name["period"] in present else np.full(n, np.nan)
    bad = _first(period <= 0)
    if bad is not None:
        raise InputError(f"period must be > 0 d (got {period[bad]:g})", file=path, row=bad + 1,
                         column=file_name["period"])
    if np.isfinite(period).any():
        if file_name["period_err"] not in present:
            raise InputError("a 'period' column needs a 'period_err' column [d]", file=path,
                             column=file_name["period_err"])
        period_err = num("period_err", False)
        bad = _first(np.isfinite(period) & ~(period_err > 0))
        if bad is not None:
            raise InputError("period error must be given and > 0 d where a period is given", file=path,
                             row=bad + 1, column=file_name["period_err"])
    else:
        period_err = np.full(n, np.nan)

    return Catalog(str(path), names, ra, dec, distance, distance_err, redshift, period, period_err,
                   proxies, np.arange(1, n + 1))


__all__ = [
    "MASS_PROXIES", "COLUMNS", "DEFAULT_DISTANCE_ERROR", "parse_column_map", "Catalog", "read_catalog",
]
