"""Tests of the follow-up likelihood (cwsearch.inference.likelihood).

Check values come from outside the module: the signal rebuilt from scratch
with waveform.residuals and weighted through the noise engine (docs/design.md §7:
ln Λ = (d|s) − ½(s|s)), brute-force quadrature (scipy.integrate.quad), the
modified Bessel function (scipy.special), and numpy's sine and cosine.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, special

from cwsearch.physics import waveform
from cwsearch.inference.likelihood import Likelihood, marginal_log_factor, sincos
from cwsearch.physics.noise import NoiseSettings
from cwsearch.physics.simulate import Binary, invented_array, simulate_residuals


@pytest.fixture(scope="module")
def small_array():
    base = invented_array(n_pulsars=4, years=10, seed=21, toas_per_pulsar=60, red_noise_fraction=1.0)
    binary = Binary(ra=1.1, dec=-0.3, gw_frequency=1.3e-8, chirp_mass=8e8, strain=2e-14)
    return base.with_residuals(simulate_residuals(base, seed=22, binaries=[binary]))


NOISE = NoiseSettings(red_components=8, common_log10_amplitude=-14.5)


def _random_parameters(rng, n):
    return [dict(ra=rng.uniform(0, 2 * np.pi), dec=np.arcsin(rng.uniform(-1, 1)),
                 gw_frequency=10 ** rng.uniform(-8.5, -7.5), chirp_mass=10 ** rng.uniform(7.5, 9.5),
                 strain=10 ** rng.uniform(-14.5, -13.5), inclination=rng.uniform(0, np.pi),
                 polarization=rng.uniform(0, np.pi), phase=rng.uniform(0, np.pi)) for _ in range(n)]


def _chirp_mass_merging_after(gw_frequency, seconds):
    """Chirp mass [Msun] of a binary at ``gw_frequency`` that merges after ``seconds``: inverts
    τ = (5/256) (G Mc/c³)^(-5/3) (π f)^(-8/3) (Peters 1964 with the usual quadrupole chirp)."""
    from cwsearch.core.constants import SOLAR_MASS_SECONDS

    mc_time = (5.0 / 256.0 / seconds * (np.pi * gw_frequency) ** (-8 / 3)) ** (3 / 5)
    return mc_time / SOLAR_MASS_SECONDS


def _from_scratch(like, par, pulsar_phases):
    """(d|s) − ½(s|s) with s rebuilt by waveform.residuals, inner products from the noise engine."""
    ds = ss = 0.0
    for p, w, phi in zip(like.array, like.engine, pulsar_phases):
        s = waveform.residuals(p.toas, p.position, p.distance, reference_time=like.reference_time,
                               pulsar_phase=phi, evolution=like.evolution, pulsar_term=like.pulsar_term, **par)
        ds += w.inner(p.residuals, s)
        ss += w.inner(s, s)
    return ds - 0.5 * ss, ss


@pytest.mark.parametrize("evolution,pulsar_term", [("full", True), ("pulsar-frequency", True),
                                                   ("monochromatic", True), ("full", False)])
def test_projection_fast_path_equals_from_scratch(small_array, evolution, pulsar_term):
    # docs/design.md §7: the cached (d|b_j), (b_i|b_j) give the same ln Λ as rebuilding the signal.
    # Relative error measured against (s|s), the size of the terms that make up ln Λ
    # (common practice, no source: ln Λ itself may be near 0 by cancellation).
    like = Likelihood(small_array, NOISE, evolution=evolution, pulsar_term=pulsar_term)
    rng = np.random.default_rng(5)
    for par in _random_parameters(rng, 6):
        cache = like.shape_cache(par["ra"], par["dec"], par["gw_frequency"], par["chirp_mass"])
        phases = rng.uniform(0, 2 * np.pi, len(small_array))
        fast = like.projection(cache, par["strain"], par["inclination"], par["polarization"], par["phase"],
                               pulsar_phases=phases[None, :])[0]
        ref, scale = _from_scratch(like, par, phases)
        assert abs(fast - ref) <= 1e-10 * max(scale, abs(ref))


@pytest.mark.parametrize("shape_path", ["direct", "nodes"])
@pytest.mark.parametrize("evolution", ["full", "pulsar-frequency", "monochromatic"])
def test_batched_shape_path_equals_exact_cache(small_array, evolution, shape_path):
    # The numba/BLAS batch paths (series at every TOA, or at Chebyshev nodes with cached
    # interpolation products) against waveform.residual_basis + noise-engine inner products.
    # The last two shapes chirp hard (merging 2.4 and 0.5 spans after the last TOA).
    like = Likelihood(small_array, NOISE, evolution=evolution, shape_path=shape_path)
    rng = np.random.default_rng(6)
    pars = _random_parameters(rng, 5) + [dict(ra=0.3, dec=0.2, gw_frequency=3e-8, chirp_mass=1e10)]
    span = small_array.end - small_array.reference_time
    for to_merger in (2.4, 0.5):
        f = 2e-8
        pars.append(dict(ra=2.0, dec=-0.5, gw_frequency=f, chirp_mass=_chirp_mass_merging_after(
            f, (1 + to_merger) * span)))
    if shape_path == "nodes":
        f = np.array([p["gw_frequency"] for p in pars])
        chirp_rate = 1.0 / waveform.time_to_coalescence(np.array([p["chirp_mass"] for p in pars]), f)
        nodes = like._node_count(np.pi * f, chirp_rate if evolution == "full" else 0.0 * f)
        assert np.all(nodes > 0)           # the interpolated path is the one under test
    fplus, fcross, dvec, gmat = like.shape_batch([p["ra"] for p in pars], [p["dec"] for p in pars],
                                                 [p["gw_frequency"] for p in pars],
                                                 [p["chirp_mass"] for p in pars])
    for i, par in enumerate(pars):
        cache = like.shape_cache(par["ra"], par["dec"], par["gw_frequency"], par["chirp_mass"])
        np.testing.assert_allclose(fplus[i], cache.fplus, rtol=0, atol=1e-14)
        scale = np.sqrt(np.abs(np.einsum("pii->pi", cache.gmat)))         # |b_j| in the noise metric
        np.testing.assert_allclose(gmat[i] / scale[:, :, None] / scale[:, None, :],
                                   cache.gmat / scale[:, :, None] / scale[:, None, :], rtol=0, atol=1e-9)
        dscale = np.sqrt(np.abs(np.einsum("pii->pi", cache.gmat)))
        np.testing.assert_allclose(dvec[i] / dscale, cache.dvec / dscale, rtol=0, atol=1e-9 * np.abs(
            cache.dvec / dscale).max())


def test_mixed_paths_per_pulsar_equal_exact_cache(small_array):
    # With TOA counts that differ between pulsars, "auto" takes the node path for some pulsars and the
    # TOA-by-TOA path for others within one batch; here pulsars 0 and 2 use nodes, 1 and 3 not.
    like = Likelihood(small_array, NOISE, shape_path="nodes")
    like._node_limit = np.array([np.inf, 0.0, np.inf, 0.0])
    par = dict(ra=0.7, dec=0.4, gw_frequency=1.1e-8, chirp_mass=3e8)
    _, _, dvec, gmat = like.shape_batch([par["ra"]], [par["dec"]], [par["gw_frequency"]], [par["chirp_mass"]])
    cache = like.shape_cache(**par)
    scale = np.sqrt(np.abs(np.einsum("pii->pi", cache.gmat)))
    np.testing.assert_allclose(gmat[0] / scale[:, :, None] / scale[:, None, :],
                               cache.gmat / scale[:, :, None] / scale[:, None, :], rtol=0, atol=1e-9)
    np.testing.assert_allclose(dvec[0] / scale, cache.dvec / scale, rtol=0, atol=1e-9 * np.abs(cache.dvec / scale).max())


def test_batch_equals_marginal_projection(small_array):
    # The full sampler path (batch) and the cached projection path with marginalisation agree.
    like = Likelihood(small_array, NOISE)
    rng = np.random.default_rng(7)
    theta = np.array([[p["ra"], np.sin(p["dec"]), np.log10(p["gw_frequency"]), np.log10(p["chirp_mass"]),
                       np.log10(p["strain"]), np.cos(p["inclination"]), p["polarization"], p["phase"]]
                      for p in _random_parameters(rng, 4)])
    batch = like.batch(theta)
    for row, value in zip(theta, batch):
        par = like.physical(row[None])
        cache = like.shape_cache(par["ra"][0], par["dec"][0], par["gw_frequency"][0], par["chirp_mass"][0])
        ref = like.projection(cache, par["strain"], par["inclination"], par["polarization"], par["phase"])[0]
        scale = np.abs(cache.gmat).max() * par["strain"][0] ** 2 * 16 + 1.0
        assert abs(value - ref) <= 1e-9 * scale


def test_marginalisation_equals_brute_force_quadrature(small_array):
    # With block-diagonal noise ln Λ is a sum over pulsars (docs/design.md §7), so the marginal over
    # each pulsar phase is a 1-d integral; compare with scipy.integrate.quad of the coherent model.
    like = Likelihood(small_array, NOISE)
    rng = np.random.default_rng(8)
    for par in _random_parameters(rng, 3):
        par["strain"] *= 3.0                                   # loud enough for a peaked integrand
        cache = like.shape_cache(par["ra"], par["dec"], par["gw_frequency"], par["chirp_mass"])
        marg = like.projection(cache, par["strain"], par["inclination"], par["polarization"], par["phase"])[0]
        brute = 0.0
        for p in range(len(small_array)):
            def term(phi, p=p):
                c = waveform.basis_coefficients(par["strain"], par["inclination"], par["polarization"],
                                                par["phase"], phi, cache.fplus[p], cache.fcross[p])
                return c @ cache.dvec[p] - 0.5 * c @ cache.gmat[p] @ c
            peak = max(term(x) for x in np.linspace(0, 2 * np.pi, 64))
            val, _ = integrate.quad(lambda x: np.exp(term(x) - peak), 0, 2 * np.pi, epsabs=0, epsrel=1e-13,
                                    limit=200)
            brute += peak + np.log(val / (2 * np.pi))
        assert abs(marg - brute) <= 1e-9 * max(1.0, abs(brute))


@pytest.mark.parametrize("a,b", [(0.3, -0.2), (3.0, 4.0), (-20.0, 35.0), (400.0, 300.0), (3e4, 4e4)])
def test_bessel_case(a, b):
    # Abramowitz & Stegun 9.6.16: (1/2π)∫ exp(a cosφ + b sinφ) dφ = I0(sqrt(a² + b²)) (scipy.special).
    # Beyond 2e4 the Laplace approximation is used: relative error of ln I0 ~ 1/(8r) / r.
    r = np.hypot(a, b)
    expected = np.log(special.ive(0, r)) + r                   # log I0(r), overflow-safe
    tol = 1e-12 if r < 2e4 else 1.0 / (8 * r)
    assert marginal_log_factor(a, b, 0.0, 0.0, 0.0, 0) == pytest.approx(expected, rel=tol, abs=tol)


@pytest.mark.parametrize("size", [0.3, 8.0])        # small: Bessel-series path; large: grid path
def test_marginal_factor_with_second_harmonic_against_quad(size):
    # General case a cosφ + b sinφ + c cos2φ + d sin2φ + e versus scipy.integrate.quad.
    rng = np.random.default_rng(9)
    for _ in range(10):
        a, b, c, d, e = rng.normal(0, size, 5)
        f = lambda x: a * np.cos(x) + b * np.sin(x) + c * np.cos(2 * x) + d * np.sin(2 * x)  # noqa: E731
        peak = max(f(x) for x in np.linspace(0, 2 * np.pi, 200))
        val, _ = integrate.quad(lambda x: np.exp(f(x) - peak), 0, 2 * np.pi, epsabs=0, epsrel=1e-13, limit=200)
        expected = e + peak + np.log(val / (2 * np.pi))
        assert marginal_log_factor(a, b, c, d, e, 0) == pytest.approx(expected, rel=1e-11, abs=1e-11)


@pytest.mark.parametrize("a, b, c, d", [(-609.07, 2424.0, -2295.5, 5351.9), (-3884.6, -4631.2, -3769.7, 831.0),
                                        (2325.4, 411.9, -249.6, -501.7)])
def test_marginal_factor_finite_where_the_grid_sum_nearly_underflows(a, b, c, d):
    # Loud, misaligned harmonics (walkers drawn from the prior at the largest strains): the grid sum
    # shifted by |a,b| + |c,d| is subnormal; it once returned -inf instead of the (very negative) value.
    # Reference: scipy.integrate.quad around the maximum of f (found on a fine grid).
    f = lambda x: a * np.cos(x) + b * np.sin(x) + c * np.cos(2 * x) + d * np.sin(2 * x)  # noqa: E731
    grid = np.linspace(0, 2 * np.pi, 400_001)
    x0 = grid[np.argmax(f(grid))]
    peak = f(x0)
    val = sum(integrate.quad(lambda x: np.exp(f(x) - peak), lo, hi, epsabs=0, epsrel=1e-12, limit=400)[0]
              for lo, hi in ((x0 - np.pi, x0), (x0, x0 + np.pi)))
    expected = peak + np.log(val / (2 * np.pi))
    assert marginal_log_factor(a, b, c, d, 0.0, 0) == pytest.approx(expected, rel=1e-10, abs=1e-8)


def test_sincos_matches_numpy():
    # numpy's sin/cos as the reference, over the phase range of PTA signals (|x| ≲ 1e3 rad).
    x = np.linspace(-1500, 1500, 20_001)
    s, c = sincos(x)
    assert np.max(np.abs(s - np.sin(x))) < 5e-16 * 1500
    assert np.max(np.abs(c - np.cos(x))) < 5e-16 * 1500
