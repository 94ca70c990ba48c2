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


def test_credible_levels_and_probability_at():
    """A pixel's credible level is the probability of all pixels at least as probable (the definition of
    the smallest credible region, common practice, no source), evaluated here by a direct double loop."""
    from cwsearch.data.healpix_fits import credible_levels, probability_at

    rng = np.random.default_rng(4)
    prob = rng.dirichlet(np.ones(48)) * (rng.uniform(size=48) > 0.3)
    prob /= prob.sum()
    want = np.array([prob[prob >= prob[i]].sum() if prob[i] > 0 else 1.0 for i in range(48)])
    np.testing.assert_allclose(credible_levels(prob), want, rtol=1e-12)
    from astropy_healpix import HEALPix
    import astropy.units as u

    lon, lat = HEALPix(nside=2, order="ring").healpix_to_lonlat([5, 17])
    np.testing.assert_allclose(probability_at(2, prob, lon.to_value(u.rad), lat.to_value(u.rad)), want[[5, 17]],
                               rtol=1e-12)


def test_sky_summary_areas_match_the_fisher_distribution():
    """50 % and 90 % credible areas of samples from a Fisher (von Mises–Fisher) distribution of
    concentration κ (scipy.stats.vonmises_fisher) against the closed form: P(separation < θ) =
    (1 − e^(−κ(1−cos θ)))/(1 − e^(−2κ)), so the X-region is a cap of solid angle −2π ln(1 − X)/κ
    (Fisher 1953, from memory). κ for σ ≈ 4°; 200,000 samples; tolerance 15 % (HEALPix pixels of
    ~0.84 deg² along the region's edge)."""
    from scipy import stats

    from cwsearch.stages.followup.stage import sky_summary

    kappa = 1.0 / np.radians(4.0) ** 2
    mu = np.array([np.cos(0.3) * np.cos(1.2), np.cos(0.3) * np.sin(1.2), np.sin(0.3)])
    v = stats.vonmises_fisher(mu, kappa).rvs(200_000, random_state=np.random.default_rng(8))
    ra = np.degrees(np.arctan2(v[:, 1], v[:, 0])) % 360
    dec = np.degrees(np.arcsin(np.clip(v[:, 2], -1, 1)))
    out = sky_summary(ra, dec)
    sr_to_deg2 = (180 / np.pi) ** 2
    for level, key in ((0.5, "credible_area_50_deg2"), (0.9, "credible_area_90_deg2")):
        want = -2 * np.pi * np.log(1 - level) / kappa * sr_to_deg2
        assert out[key] == pytest.approx(want, rel=0.15)
    assert out["credible_area_50_deg2"] < out["credible_area_90_deg2"]
