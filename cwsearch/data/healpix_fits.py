"""Sky maps as HEALPix FITS files (HEALPix FITS convention, Górski et al. 2005).

Every sky map the stages draw (scan Fe maximum, strain limits, candidate
posterior) is also written as a FITS binary table following the HEALPix
convention, so any HEALPix tool reads it: one map per column, one row per
pixel, header keywords ``PIXTYPE = 'HEALPIX'``, ``ORDERING = 'RING'``,
``NSIDE``, ``FIRSTPIX``/``LASTPIX``, ``INDXSCHM = 'IMPLICIT'``,
``OBJECT = 'FULLSKY'`` and ``COORDSYS = 'C'`` (celestial, equatorial: our
pixels are in right ascension and declination, :mod:`cwsearch.physics.sky`).

Examples
--------
>>> import tempfile, pathlib, numpy as np
>>> from cwsearch.data.healpix_fits import write_healpix_map, read_healpix_map
>>> path = pathlib.Path(tempfile.mkdtemp()) / "map.fits"
>>> write_healpix_map(path, {"FE_MAX": np.arange(48.0)}, nside=2, description="test")
>>> maps, header = read_healpix_map(path)
>>> header["NSIDE"], header["ORDERING"], float(maps["FE_MAX"][47])
(2, 'RING', 47.0)
"""

from __future__ import annotations

import io
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.io import fits
from astropy_healpix import HEALPix

from ..core.fileio import write_bytes_atomic


def write_healpix_map(path, columns: dict, *, nside: int, units: dict | None = None, description: str = "",
                      extra: dict | None = None) -> None:
    """Write ``columns`` ({name: array of 12 nside² values}) to ``path`` as a HEALPix FITS table (atomic).

    ``units`` gives each column's unit string (FITS ``TUNITn``); ``extra``
    adds header keywords (e.g. the frequency of a limits map).
    """
    nside = int(nside)
    n_pix = 12 * nside ** 2
    cols = []
    for name, values in columns.items():
        values = np.asarray(values, dtype=np.float64)
        if values.shape != (n_pix,):
            raise ValueError(f"map {name} has {values.size} values, nside {nside} needs {n_pix}")
        unit = (units or {}).get(name)
        cols.append(fits.Column(name=str(name), format="D", array=values, unit=unit or None))
    hdu = fits.BinTableHDU.from_columns(cols)
    h = hdu.header
    h["PIXTYPE"] = ("HEALPIX", "HEALPix pixelisation")
    h["ORDERING"] = ("RING", "pixel ordering scheme, RING or NESTED")
    h["NSIDE"] = (nside, "resolution parameter of the HEALPix map")
    h["FIRSTPIX"] = (0, "first pixel number (0 based)")
    h["LASTPIX"] = (n_pix - 1, "last pixel number (0 based)")
    h["INDXSCHM"] = ("IMPLICIT", "indexing: implicit (one row per pixel)")
    h["OBJECT"] = ("FULLSKY", "sky coverage")
    h["COORDSYS"] = ("C", "celestial (equatorial) coordinates, ICRS")
    h["CREATOR"] = ("cwsearch", "program that wrote the map")
    if description:
        h["EXTNAME"] = ("SKYMAP", "")
        h["COMMENT"] = description
    for key, value in (extra or {}).items():
        h[str(key)[:8].upper()] = value
    buf = io.BytesIO()
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(buf)
    write_bytes_atomic(path, buf.getvalue())


def read_healpix_map(path):
    """``({column: array}, header)`` of a HEALPix FITS table written by :func:`write_healpix_map`."""
    with fits.open(path) as hdul:
        hdu = hdul[1]
        maps = {name: np.array(hdu.data[name], dtype=float) for name in hdu.columns.names}
        return maps, dict(hdu.header)


def posterior_sky_map(ra, dec, nside: int, weights=None):
    """Posterior probability per HEALPix pixel (RING) from samples ``ra``, ``dec`` [rad]; sums to 1."""
    # the RING lookup straight from astropy-healpix (as physics.sky.pixel_of; this floor may not import physics)
    pix = np.asarray(HEALPix(nside=int(nside), order="ring").lonlat_to_healpix(
        np.asarray(ra, dtype=float) * u.rad, np.asarray(dec, dtype=float) * u.rad))
    counts = np.bincount(pix, weights=weights, minlength=12 * int(nside) ** 2).astype(float)
    total = counts.sum()
    return counts / total if total > 0 else counts


def credible_area(probability, level=0.9) -> float:
    """Area [deg²] of the smallest set of pixels holding ``level`` of the probability (equal-area pixels)."""
    p = np.sort(np.asarray(probability, dtype=float))[::-1]
    if p.sum() <= 0:
        return float("nan")
    cum = np.cumsum(p) / p.sum()
    n = int(np.searchsorted(cum, level, side="left")) + 1
    return float(n * 4 * np.pi / p.size * (180 / np.pi) ** 2)


def credible_levels(probability):
    """Per pixel, the probability of the smallest credible region that contains it (the pixel's own and
    every pixel at least as probable; 1 for empty pixels): a position is inside the X % region where
    this is ≤ X/100."""
    p = np.asarray(probability, dtype=float)
    if p.sum() <= 0:
        return np.ones_like(p)
    ranked = np.sort(p)[::-1]
    cum = np.cumsum(ranked) / p.sum()
    # ties count together: the last position of the pixel's value in the ranking
    out = cum[np.searchsorted(-ranked, -p, side="right") - 1]
    return np.where(p > 0, out, 1.0)


def read_probability_map(path):
    """``(nside, probability per pixel summing to 1)`` of a posterior map written by the follow-up
    (column ``PROB``), or None when ``path`` is not a regular file or not a usable map."""
    path = Path(path)
    if not path.is_file() or path.is_symlink() or path.stat().st_size > 512 * 2**20:
        return None
    try:
        maps, header = read_healpix_map(path)
        prob = np.asarray(maps["PROB"], dtype=float)
        nside = int(header.get("NSIDE") or round(np.sqrt(prob.size / 12)))
    except (OSError, KeyError, ValueError, TypeError):
        return None
    if prob.size != 12 * nside ** 2 or not np.all(np.isfinite(prob)) or prob.min() < 0 or not prob.sum() > 0:
        return None
    return nside, prob / prob.sum()


def probability_at(nside, probability, ra, dec):
    """Credible level (:func:`credible_levels`) of the pixels holding positions ``ra``, ``dec`` [rad]."""
    pix = np.asarray(HEALPix(nside=int(nside), order="ring").lonlat_to_healpix(
        np.asarray(ra, dtype=float) * u.rad, np.asarray(dec, dtype=float) * u.rad))
    return credible_levels(probability)[pix]


__all__ = ["write_healpix_map", "read_healpix_map", "posterior_sky_map", "credible_area", "credible_levels",
           "read_probability_map", "probability_at"]
