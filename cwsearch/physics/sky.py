"""HEALPix sky grids (Górski et al. 2005) via astropy-healpix, RING order, equatorial frame.

Every stage uses these helpers so that pixel numbers mean the same thing in
the scan, the limits and the host ranking.

Examples
--------
>>> from cwsearch.physics.sky import pixel_centres
>>> ra, dec = pixel_centres(2)
>>> ra.shape
(48,)
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
from astropy_healpix import HEALPix

ORDER = "ring"


def _healpix(nside):
    return HEALPix(nside=int(nside), order=ORDER)


def n_pixels(nside) -> int:
    """Number of pixels, 12 nside²."""
    return 12 * int(nside) ** 2


def pixel_area(nside) -> float:
    """Area of one pixel [sr], 4π / N_pix."""
    return 4 * np.pi / n_pixels(nside)


def pixel_centres(nside):
    """Right ascension and declination [rad] of every pixel centre (RING order)."""
    lon, lat = _healpix(nside).healpix_to_lonlat(np.arange(n_pixels(nside)))
    return np.asarray(lon.to_value("rad"), dtype=float), np.asarray(lat.to_value("rad"), dtype=float)


def pixel_of(nside, ra, dec):
    """Pixel index (RING order) containing each (ra, dec) [rad]."""
    return np.asarray(_healpix(nside).lonlat_to_healpix(np.asarray(ra) * u.rad, np.asarray(dec) * u.rad))


def angular_separation(ra1, dec1, ra2, dec2):
    """Great-circle separation [rad] (Vincenty form, stable at all angles)."""
    sd1, cd1, sd2, cd2 = np.sin(dec1), np.cos(dec1), np.sin(dec2), np.cos(dec2)
    dra = np.asarray(ra2) - np.asarray(ra1)
    num = np.hypot(cd2 * np.sin(dra), cd1 * sd2 - sd1 * cd2 * np.cos(dra))
    return np.arctan2(num, sd1 * sd2 + cd1 * cd2 * np.cos(dra))


def unit_vectors(ra, dec):
    """Unit vectors (..., 3) for (ra, dec) [rad]."""
    ra, dec = np.asarray(ra, dtype=float), np.asarray(dec, dtype=float)
    cd = np.cos(dec)
    return np.stack([cd * np.cos(ra), cd * np.sin(ra), np.sin(dec)], axis=-1)


def pixel_neighbours(nside):
    """The 8 neighbours of every pixel (RING order), shape (N_pix, 8); −1 where a pixel has only 7.

    >>> pixel_neighbours(1).shape
    (12, 8)
    """
    with np.errstate(invalid="ignore"):   # astropy-healpix flags the missing 8th neighbour at nside 1
        nb = _healpix(nside).neighbours(np.arange(n_pixels(nside)))
    return np.ascontiguousarray(np.asarray(nb, dtype=np.int64).T)


__all__ = [
    "ORDER", "n_pixels", "pixel_area", "pixel_centres", "pixel_of", "angular_separation",
    "unit_vectors", "pixel_neighbours",
]
