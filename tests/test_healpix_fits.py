"""Sky maps as HEALPix FITS files: read back with astropy-healpix (``HEALPix.from_header``) and
astropy.io.fits; header keywords of the HEALPix FITS convention (Górski et al. 2005 and the HEALPix
documentation: PIXTYPE = 'HEALPIX', ORDERING, NSIDE, COORDSYS = 'C' for equatorial)."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.io import fits

from cwsearch.data.healpix_fits import credible_area, posterior_sky_map, read_healpix_map, write_healpix_map


def test_map_reads_back_with_astropy_healpix(tmp_path):
    from astropy_healpix import HEALPix

    nside = 4
    values = np.random.default_rng(1).standard_normal(12 * nside ** 2)
    path = tmp_path / "m.fits"
    write_healpix_map(path, {"FE_MAX": values, "OTHER": 2 * values}, nside=nside, units={"FE_MAX": "1"},
                      extra={"FREQ": 1e-8})
    hp = HEALPix.from_header(str(path))
    assert hp.nside == nside and hp.order == "ring" and hp.npix == values.size
    assert hp.frame.name == "icrs"          # COORDSYS 'C' is read as celestial
    with fits.open(path) as hdul:
        h = hdul[1].header
        assert (h["PIXTYPE"], h["ORDERING"], h["NSIDE"], h["COORDSYS"]) == ("HEALPIX", "RING", nside, "C")
        assert h["FIRSTPIX"] == 0 and h["LASTPIX"] == values.size - 1 and h["INDXSCHM"] == "IMPLICIT"
        assert h["FREQ"] == pytest.approx(1e-8, rel=1e-12)
    maps, _ = read_healpix_map(path)
    np.testing.assert_allclose(maps["FE_MAX"], values, rtol=1e-15)
    np.testing.assert_allclose(maps["OTHER"], 2 * values, rtol=1e-15)
    with pytest.raises(ValueError):
        write_healpix_map(tmp_path / "bad.fits", {"X": values[:-1]}, nside=nside)


def test_posterior_map_and_credible_area():
    """Samples all in one pixel: the 90 % area is one pixel, 4π/N_pix sr (Górski et al. 2005), in deg²;
    samples spread uniformly over the sky: 90 % of 41253 deg² (whole sky, 4π sr in deg²) to a few pixels."""
    nside = 8
    npix = 12 * nside ** 2
    one = posterior_sky_map(np.full(50, 1.0), np.full(50, 0.3), nside)
    assert one.sum() == pytest.approx(1.0) and np.count_nonzero(one) == 1
    whole_sky = 4 * np.pi * (180 / np.pi) ** 2
    assert credible_area(one) == pytest.approx(whole_sky / npix, rel=1e-12)
    rng = np.random.default_rng(2)
    ra, dec = rng.uniform(0, 2 * np.pi, 200_000), np.arcsin(rng.uniform(-1, 1, 200_000))
    area = credible_area(posterior_sky_map(ra, dec, nside))
    assert area == pytest.approx(0.9 * whole_sky, rel=0.03)
