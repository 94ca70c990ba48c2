"""Noise weighting: Woodbury inner products and log-determinant against the dense G-projection form.

van Haasteren & Vallisneri 2014 (Phys. Rev. D 90, 104012): marginalising the timing model with a flat
prior equals projecting with G (orthonormal complement of the design matrix M, from its SVD):
(x|y) = x^T G (G^T C G)^-1 G^T y. The dense reference below builds C = N + F φ F^T itself (white noise
per backend, power-law Fourier prior written out (power-law form common practice)) and uses numpy only.
"""

from __future__ import annotations

import numpy as np
import pytest
from astropy import units as u

from cwsearch.data.model import Array, Pulsar, PulsarNoise
from cwsearch.physics.noise import NoiseSettings, NoiseWeighting, hellings_downs, powerlaw_variance

YEAR_FREQ = 1 / (1 * u.yr).to_value(u.s)


def _random_array(rng, n_pulsars=2, n_toas=(35, 48), red=True, design=False):
    pulsars = []
    for i in range(n_pulsars):
        n = n_toas[i % len(n_toas)]
        mjd = np.sort(rng.uniform(53000 + 200 * i, 57000, n))
        backends = np.where(rng.uniform(size=n) < 0.5, "A", "B")
        noise = PulsarNoise(sigma_scale={"A": 1.4}, sigma_added={"B": 3e-7})
        if red:
            noise.red_log10_amplitude, noise.red_index = -13.5, 3.3
        extra = rng.normal(size=(n, 2)) if design else None
        pulsars.append(Pulsar(f"T{i}", ra=1.0 + i, dec=0.1 * i, distance=1.0, distance_err=0.1, mjd=mjd,
                              residuals=rng.normal(size=n) * 1e-6, sigmas=rng.uniform(1e-7, 1e-6, n),
                              backends=backends, extra_design=extra,
                              extra_design_names=("design_a", "design_b") if design else ()))
    return Array(pulsars)


def _dense_reference(psr, start, span, settings):
    """Projected covariance G^T C G and G for one pulsar, built from scratch (numpy only)."""
    t = psr.mjd * 86400.0
    scale = np.array([psr.noise.sigma_scale.get(b, 1.0) for b in psr.backends])
    added = np.array([psr.noise.sigma_added.get(b, 0.0) for b in psr.backends])
    cov = np.diag((scale * psr.sigmas) ** 2 + added**2)
    k = np.arange(1, settings.red_components + 1)
    freqs = k / span

    def psd(log10_amplitude, gamma):   # P(f) = A²/(12π²) (f/f_yr)^(−γ) f_yr^(−3)  (power-law form, common practice)
        return 10 ** (2 * log10_amplitude) / (12 * np.pi**2) * (freqs / YEAR_FREQ) ** (-gamma) * YEAR_FREQ**-3

    phi = np.zeros(len(freqs))
    if settings.pulsar_red_noise and psr.noise.has_red_noise:
        phi += psd(psr.noise.red_log10_amplitude, psr.noise.red_index) / span
    if settings.common_log10_amplitude is not None:
        phi += psd(settings.common_log10_amplitude, settings.common_index) / span
    for f, var in zip(freqs, phi):
        for basis in (np.sin(2 * np.pi * f * (t - start)), np.cos(2 * np.pi * f * (t - start))):
            cov += var * np.outer(basis, basis)
    design = psr.design_matrix
    u_, _, _ = np.linalg.svd(design, full_matrices=True)
    g = u_[:, design.shape[1]:]
    return g, g.T @ cov @ g


SETTINGS = [
    pytest.param(NoiseSettings(red_components=6, pulsar_red_noise=False), False, False, id="white only"),
    pytest.param(NoiseSettings(red_components=6), True, False, id="pulsar red noise"),
    pytest.param(NoiseSettings(red_components=6, common_log10_amplitude=-14.0), True, False, id="red + common"),
    pytest.param(NoiseSettings(red_components=4, pulsar_red_noise=False, common_log10_amplitude=-13.8,
                               common_index=13 / 3), False, True, id="common + design columns"),
]


@pytest.mark.parametrize("settings, red, design", SETTINGS)
def test_woodbury_equals_g_projection(settings, red, design):
    """Inner products and log-determinant: Woodbury (cwsearch.physics.noise) vs dense G-projection
    (van Haasteren & Vallisneri 2014) on small random problems."""
    rng = np.random.default_rng(17)
    arr = _random_array(rng, red=red, design=design)
    engine = NoiseWeighting(arr, settings)
    for w, psr in zip(engine, arr):
        g, gcg = _dense_reference(psr, arr.start, arr.span, settings)
        x = rng.normal(size=(psr.n_toas, 3)) * 1e-6
        y = rng.normal(size=(psr.n_toas, 2)) * 1e-6
        dense = (g.T @ x).T @ np.linalg.solve(gcg, g.T @ y)
        got = w.inner(x, y)
        np.testing.assert_allclose(got, dense, rtol=1e-7, atol=1e-9 * np.abs(dense).max())
        # vectors, scalars and column-wise products agree with the matrix form
        assert w.inner(x[:, 0], y[:, 1]) == pytest.approx(dense[0, 1], rel=1e-7)
        cols = w.inner_columns(x[:, :2], y)
        np.testing.assert_allclose(cols, np.diag(dense[:2, :2]), rtol=1e-7)
        # the timing model is projected out: adding design-matrix columns changes nothing
        shifted = x[:, 0] + psr.design_matrix @ rng.normal(size=psr.design_matrix.shape[1]) * 1e-5
        assert w.inner(shifted, y[:, 0]) == pytest.approx(w.inner(x[:, 0], y[:, 0]), rel=1e-6)
        # log det(G^T C G) (numpy.linalg.slogdet)
        sign, logdet = np.linalg.slogdet(gcg)
        assert sign > 0
        assert w.logdet() == pytest.approx(logdet, abs=1e-6)


def test_inner_product_positive_definite():
    rng = np.random.default_rng(4)
    arr = _random_array(rng)
    w = NoiseWeighting(arr, NoiseSettings(red_components=5))[0]
    x = rng.normal(size=(arr[0].n_toas, 6))
    eig = np.linalg.eigvalsh(w.inner(x))
    assert eig.min() > 0


def test_powerlaw_variance_formula():
    """φ_k = P(f_k)/T with P(f) = A²/(12π²) (f/f_yr)^(−γ) f_yr^(−3) (power-law form common practice);
    f_yr = 1/yr from astropy."""
    span = 12.3 * (1 * u.yr).to_value(u.s)
    freqs = np.arange(1, 11) / span
    for log10_amplitude, gamma in [(-14.0, 13 / 3), (-13.2, 2.5), (-15.0, 6.0)]:
        psd = 10 ** (2 * log10_amplitude) / (12 * np.pi**2) * (freqs / YEAR_FREQ) ** (-gamma) / YEAR_FREQ**3
        np.testing.assert_allclose(powerlaw_variance(freqs, log10_amplitude, gamma, span), psd / span, rtol=1e-12)


def test_default_common_index_is_13_over_3():
    """SMBHB background spectral index γ = 13/3 (Phinney 2001)."""
    assert NoiseSettings().common_index == pytest.approx(13 / 3, rel=1e-15)


@pytest.mark.parametrize("angle_deg, value, tol", [
    (1e-6, 0.5, 1e-6),       # Γ(0+) = 0.5
    (90.0, -0.1449, 5e-5),   # Γ(90°)
    (180.0, 0.25, 1e-12),    # Γ(180°)
])
def test_hellings_downs_values(angle_deg, value, tol):
    """Hellings & Downs 1983 (ApJ 265, L39) values."""
    assert hellings_downs(np.cos(np.radians(angle_deg))) == pytest.approx(value, abs=tol)


def test_hellings_downs_minimum():
    """Minimum −0.1519 at 82.5° (Hellings & Downs 1983)."""
    angles = np.linspace(0.01, 180, 179991)
    gamma = hellings_downs(np.cos(np.radians(angles)))
    i = np.argmin(gamma)
    assert gamma[i] == pytest.approx(-0.1519, abs=5e-5)
    assert angles[i] == pytest.approx(82.5, abs=0.1)
