"""Simulator: Hellings-Downs correlated background, white-noise statistics, determinism, injection record.

Checks: Hellings & Downs 1983 (correlation values, formula written out below); chi-square and
Kolmogorov-Smirnov tests from scipy.stats; Fisher's z-transform of a sample correlation coefficient
(standard error 1/sqrt(M-3); common practice). Angles between pulsars from astropy.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord
from scipy import stats

from cwsearch.data.model import Array, Pulsar
from cwsearch.physics.noise import powerlaw_variance
from cwsearch.physics.simulate import correlated_background, invented_array, simulate_residuals

Z_LIMIT = 4.0   # two-sided p ≈ 6e-5 per pair; fixed seeds make the outcome deterministic


def _hd_from_paper(cos_zeta):
    """Hellings & Downs 1983: Γ = ½ − x/4 + (3/2) x ln x, x = (1 − cos ζ)/2 (written out independently)."""
    x = (1 - cos_zeta) / 2
    return 0.5 - x / 4 + 1.5 * x * np.log(x)


def _pair_angles(array):
    coords = SkyCoord(np.array([p.ra for p in array]) * u.rad, np.array([p.dec for p in array]) * u.rad)
    pairs = [(a, b) for a in range(len(array)) for b in range(a + 1, len(array))]
    zeta = np.array([coords[a].separation(coords[b]).to_value(u.rad) for a, b in pairs])
    return pairs, zeta


def _fisher_z(sample_r, expected, n_samples):
    return (np.arctanh(sample_r) - np.arctanh(expected)) * np.sqrt(n_samples - 3)


def test_background_coefficients_follow_hellings_downs():
    """Sample correlations of the background's Fourier coefficients between pulsar pairs equal the
    Hellings-Downs values within their statistical errors; each coefficient's variance equals the power-law
    prior (chi-square, scipy.stats)."""
    arr = invented_array(n_pulsars=7, years=10, seed=21, toas_per_pulsar=20)
    pairs, zeta = _pair_angles(arr)
    assert zeta.min() < np.radians(60) and zeta.max() > np.radians(120)   # pairs span the curve
    rng = np.random.default_rng(5)
    n_real, k = 400, 4
    coeffs = np.array([correlated_background(arr, -14.0, n_components=k, seed=rng, return_coefficients=True)[1]
                       for _ in range(n_real)])                               # (R, 2K, N)
    var = np.repeat(powerlaw_variance(np.arange(1, k + 1) / arr.span, -14.0, 13 / 3, arr.span), 2)
    z = coeffs / np.sqrt(var)[None, :, None]
    samples = z.reshape(-1, len(arr))                                          # R*2K samples per pulsar
    corr = np.corrcoef(samples.T)
    expected = _hd_from_paper(np.cos(zeta))
    fisher = np.array([_fisher_z(corr[a, b], e, samples.shape[0]) for (a, b), e in zip(pairs, expected)])
    assert np.abs(fisher).max() < Z_LIMIT, fisher
    # the statistic is sensitive: compared with zero correlation most pairs are far off
    null = np.array([_fisher_z(corr[a, b], 0.0, samples.shape[0]) for a, b in pairs])
    assert np.mean(np.abs(null) > Z_LIMIT) > 0.5
    # variance per coefficient: sum of squares over realisations ~ chi2(R)
    sums = (z**2).sum(axis=0)                                                  # (2K, N)
    p = stats.chi2.sf(sums, n_real)
    assert np.all((p > 1e-4) & (p < 1 - 1e-4)), p


def test_background_residual_correlations_follow_hellings_downs():
    """Pre-fit residuals at one common epoch: correlation between pulsars across realisations = Γ(ζ_ab)
    (Hellings & Downs 1983), within Fisher-z errors."""
    rng = np.random.default_rng(9)
    mjd = np.linspace(53000, 53000 + 10 * 365.25, 12)
    ra = np.radians([10.0, 40.0, 100.0, 200.0, 250.0, 330.0])
    dec = np.radians([-60.0, 20.0, 5.0, 45.0, -10.0, 70.0])
    pulsars = [Pulsar(f"T{i}", ra=ra[i], dec=dec[i], distance=1.0, distance_err=0.1, mjd=mjd,
                      residuals=np.zeros(mjd.size), sigmas=np.full(mjd.size, 1e-7), backends=["A"] * mjd.size)
               for i in range(len(ra))]
    arr = Array(pulsars)
    n_real = 1500
    epoch = 5
    values = np.array([[r[epoch] for r in simulate_residuals(arr, rng, white=False, red=False,
                                                             background_log10_amplitude=-14.5,
                                                             background_components=6, fit_timing_model=False)]
                       for _ in range(n_real)])
    corr = np.corrcoef(values.T)
    pairs, zeta = _pair_angles(arr)
    expected = _hd_from_paper(np.cos(zeta))
    fisher = np.array([_fisher_z(corr[a, b], e, n_real) for (a, b), e in zip(pairs, expected)])
    assert np.abs(fisher).max() < Z_LIMIT, fisher


def _effective_sigma(psr):
    scale = np.array([psr.noise.sigma_scale.get(b, 1.0) for b in psr.backends])
    added = np.array([psr.noise.sigma_added.get(b, 0.0) for b in psr.backends])
    return np.sqrt((scale * psr.sigmas) ** 2 + added**2)


@pytest.fixture(scope="module")
def white_array():
    arr = invented_array(n_pulsars=5, years=8, seed=33, toas_per_pulsar=150)
    for psr in arr:
        psr.noise.sigma_scale[psr.backend_names[0]] = 1.7
        psr.noise.sigma_added[psr.backend_names[-1]] = 4e-7
    return arr


def test_white_noise_matches_sigmas(white_array):
    """Normalised white noise: sum of squares ~ chi2(N) and values ~ N(0, 1) (scipy.stats chi2 and KS test),
    with σ_eff² = (scale σ)² + added² (DESIGN §5)."""
    res = simulate_residuals(white_array, seed=2, red=False, fit_timing_model=False)
    z = np.concatenate([r / _effective_sigma(p) for r, p in zip(res, white_array)])
    chi2 = float(np.sum(z**2))
    p = stats.chi2.sf(chi2, z.size)
    assert 1e-3 < p < 1 - 1e-3
    assert stats.kstest(z, "norm").pvalue > 1e-3
    # using the raw sigmas instead would be clearly wrong (the factors matter)
    z_raw = np.concatenate([r / p.sigmas for r, p in zip(res, white_array)])
    assert stats.chi2.sf(float(np.sum(z_raw**2)), z.size) < 1e-6


def test_postfit_residuals_chi_square(white_array):
    """After a weighted least-squares fit of k timing-model columns, Σ(r/σ)² ~ chi2(n − k) (common practice) and
    the residuals satisfy the normal equations Mᵀ W r = 0."""
    res = simulate_residuals(white_array, seed=3, red=False, fit_timing_model=True)
    chi2 = dof = 0.0
    for r, psr in zip(res, white_array):
        sig = _effective_sigma(psr)
        design = psr.design_matrix
        normal = design.T @ (r / sig**2)
        scale = np.abs(design).T @ (np.abs(r) / sig**2)
        assert np.all(np.abs(normal) <= 1e-9 * scale)
        chi2 += np.sum((r / sig) ** 2)
        dof += psr.n_toas - design.shape[1]
    p = stats.chi2.sf(chi2, dof)
    assert 1e-3 < p < 1 - 1e-3


def test_same_seed_same_residuals():
    """Same seed -> same numbers (DESIGN §11); another seed -> other numbers."""
    def draw(seed):
        arr = invented_array(n_pulsars=4, years=6, seed=seed, toas_per_pulsar=30, red_noise_fraction=0.5)
        return simulate_residuals(arr, seed=seed, background_log10_amplitude=-14.0, background_components=5)

    a, b, c = draw(7), draw(7), draw(8)
    # recomputed floats: equal to 1e-12 relative (plus 1e-12 of the largest value, residuals cross zero),
    # never bit for bit (common practice, no source)
    for x, y in zip(a, b):
        np.testing.assert_allclose(y, x, rtol=1e-12, atol=1e-12 * np.abs(x).max())
    # another seed: not even close
    assert not any(x.shape == y.shape and np.allclose(y, x, rtol=1e-6, atol=0) for x, y in zip(a, c))


def test_injection_json_describes_the_data(tmp_path):
    """The binary recorded in injection.json (degrees, pulsar-term phases) reproduces exactly the signal in the
    data: dataset(strain) − dataset(strain 0) with the same seed equals the post-fit waveform from the record.
    (Residuals through waveform.residuals; post-fit by weighted least squares written here, common practice.)"""
    from cwsearch.physics import waveform
    from cwsearch.commands.simulate import SimulateOptions, simulate_dataset
    from cwsearch.data.dataset import read_dataset

    base = dict(pulsars=4, years=8, toas_per_pulsar=60, inject_frequency=9e-9, inject_ra=150.0,
                inject_dec=-20.0, inject_chirp_mass=3e9, inject_inclination=1.0, inject_polarization=0.2,
                inject_phase=2.0)
    simulate_dataset(tmp_path / "with", SimulateOptions(inject_strain=3e-14, **base), seed=4)
    simulate_dataset(tmp_path / "zero", SimulateOptions(inject_strain=0.0, **base), seed=4)
    with_signal, without = read_dataset(tmp_path / "with"), read_dataset(tmp_path / "zero")
    record = json.loads((tmp_path / "with" / "injection.json").read_text())
    (binary,) = record["binaries"]
    # exact on purpose: the options are copied into the record, not recomputed
    assert binary["ra"] == 150.0 and binary["dec"] == -20.0 and binary["strain"] == 3e-14
    assert binary["optimal_snr"] > 0 and record["optimal_snr"] == pytest.approx(binary["optimal_snr"])
    t0 = record["reference_mjd"] * 86400.0
    for p, q in zip(with_signal, without):
        signal = waveform.residuals(
            p.toas, p.position, p.distance, ra=np.radians(binary["ra"]), dec=np.radians(binary["dec"]),
            gw_frequency=binary["gw_frequency"], chirp_mass=binary["chirp_mass"], strain=binary["strain"],
            inclination=binary["inclination"], polarization=binary["polarization"], phase=binary["phase"],
            reference_time=t0, pulsar_phase=binary["pulsar_phases"][p.name])
        coherent = waveform.residuals(
            p.toas, p.position, p.distance, ra=np.radians(binary["ra"]), dec=np.radians(binary["dec"]),
            gw_frequency=binary["gw_frequency"], chirp_mass=binary["chirp_mass"], strain=binary["strain"],
            inclination=binary["inclination"], polarization=binary["polarization"], phase=binary["phase"],
            reference_time=t0)
        np.testing.assert_allclose(signal, coherent, rtol=0, atol=1e-8 * np.abs(coherent).max())
        w = 1 / _effective_sigma(p)
        coef, *_ = np.linalg.lstsq(p.design_matrix * w[:, None], signal * w, rcond=None)
        postfit_signal = signal - p.design_matrix @ coef
        np.testing.assert_allclose(p.residuals - q.residuals, postfit_signal, rtol=0,
                                   atol=1e-8 * np.abs(postfit_signal).max())
