"""Pulsar-term-inclusive Bayesian limits (cwsearch.inference.pulsar_term_limits) against exact algebra.

With the pulsar term at the Earth-term frequency, pulsar p's (sin, cos) pair is ``(I − R(Φ_p))`` times
the Earth term's (the geometric delay L(1 + Ω̂·p̂)/c, common practice, no source), so:

* Φ_p = π for every pulsar doubles every amplitude: N' = 2N, M' = 4M exactly, and under a prior uniform
  in h0 the 95 % point halves exactly (the likelihood is a function of 2x);
* Φ_p = π/3 for every pulsar: ``|1 − e^{−iπ/3}| = 1``, a common rotation of every pulsar's pair, the same
  as a shift of the signal phase Φ0, which the prior makes uniform: the limit equals the Earth-term one
  to the quadrature's accuracy.
"""

from __future__ import annotations

import numpy as np
import pytest

from cwsearch.core.constants import KPC_SECONDS
from cwsearch.inference.pulsar_term_limits import distance_draws, pulsar_term_rows, rotated_network
from cwsearch.inference.upper_limits import bayes_rows
from cwsearch.physics import fstat
from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
from cwsearch.physics.simulate import invented_array
from cwsearch.physics.waveform import antenna_pattern


@pytest.fixture(scope="module")
def setting():
    array = invented_array(n_pulsars=5, years=10, seed=11, toas_per_pulsar=60)
    engine = NoiseWeighting(array, NoiseSettings(red_components=0))
    frequencies = np.array([3.0, 7.0]) / array.span
    proj = fstat.project(engine, frequencies)
    ra, dec = np.array([0.7, 3.9]), np.array([0.3, -0.8])
    fplus, fcross, omega_dot_p = antenna_pattern(ra, dec, array.positions)
    return array, proj, frequencies, np.ascontiguousarray(fplus), np.ascontiguousarray(fcross), np.asarray(omega_dot_p)


def _distances_for_phase(frequency, omega_dot_p, phase, cycles=1000):
    """Distances [kpc] giving Φ_p = 2π f L (1 + Ω̂·p̂)/c = phase + 2π·cycles for every pulsar."""
    return (phase / (2 * np.pi) + cycles) / (frequency * (1.0 + omega_dot_p)) / KPC_SECONDS


def test_rotated_network_doubles_at_half_a_cycle(setting):
    _, proj, _, fplus, fcross, _ = setting
    nv, mm = fstat.network_vectors(proj, fplus[:1], fcross[:1])
    k = 0
    pnv, pmm = rotated_network(proj.x[:, k], proj.y[:, k], proj.z[:, k], fplus[0], fcross[0],
                               np.full(proj.x.shape[0], np.pi))
    np.testing.assert_allclose(pnv, 2 * nv[0, k], rtol=1e-12, atol=1e-12 * np.abs(nv).max())
    np.testing.assert_allclose(pmm, 4 * mm[0, k], rtol=1e-12, atol=1e-12 * np.abs(mm).max())


@pytest.mark.parametrize("phase, factor, rtol", [(np.pi, 0.5, 1e-6), (np.pi / 3, 1.0, 2e-2)])
def test_limit_against_the_earth_term_limit(setting, phase, factor, rtol):
    _, proj, frequencies, fplus, fcross, omega_dot_p = setting
    nv, mm = fstat.network_vectors(proj, fplus, fcross)
    earth, _, _ = bayes_rows(nv.reshape(-1, 4), mm.reshape(-1, 4, 4))
    earth = earth.reshape(fplus.shape[0], frequencies.size)
    n_psr = fplus.shape[1]
    for s in range(fplus.shape[0]):
        for k, f in enumerate(frequencies):
            dist = _distances_for_phase(f, omega_dot_p[s], phase)[None, :]
            x95, _, _, ess, _ = pulsar_term_rows(
                fstat.Projections(frequencies[k:k + 1], proj.x[:, k:k + 1], proj.y[:, k:k + 1],
                                  proj.z[:, k:k + 1], proj.positions, proj.z_scale),
                fplus[s:s + 1], fcross[s:s + 1], omega_dot_p[s:s + 1], dist, np.zeros((1, n_psr)),
                np.zeros(n_psr))
            assert x95[0, 0] == pytest.approx(factor * earth[s, k], rel=rtol)
            assert ess[0, 0] == pytest.approx(1.0)


def test_distance_draws_seeded_truncated_and_exact_without_error():
    # truncated at > 0 and a zero error gives the distance itself (the prior, common practice, no source)
    d1, u1 = distance_draws([1.0, 0.2, 3.0], [0.0, 0.5, 0.3], 400, seed=7)
    d2, u2 = distance_draws([1.0, 0.2, 3.0], [0.0, 0.5, 0.3], 400, seed=7)
    np.testing.assert_allclose(d1, d2, rtol=1e-12)
    np.testing.assert_allclose(u1, u2, rtol=1e-12)
    assert np.all(d1 > 0) and np.all(d1[:, 0] == 1.0)
    assert np.all((u1 >= 0) & (u1 < 1))
    # the mean of the untruncated pulsar within 4 standard errors (Gaussian, common practice)
    assert abs(d1[:, 2].mean() - 3.0) < 4 * 0.3 / np.sqrt(400)
