"""The noise stage's spectrum figure compares each pulsar's residual power with its expectation.

Check: the expectation of a quadratic form of a Gaussian vector, E[xᵀAx] = tr(AΣ) (common practice, no
source), evaluated by :func:`cwsearch.stages.noise.plots.residual_power` as
½ tr G_kk⁻¹ + ½ tr(G_kk⁻¹ (GΦG)_kk G_kk⁻¹), against the average over simulated residuals of white noise
plus a steep red process drawn in the same Fourier basis. The invented pulsar is an input, not a check value.
"""

from __future__ import annotations

import numpy as np

from cwsearch.physics.noise import fourier_basis, fourier_frequencies, powerlaw_variance
from cwsearch.physics.simulate import invented_array
from cwsearch.stages.noise.plots import residual_power


def test_expected_power_includes_the_leakage_of_red_noise():
    array = invented_array(n_pulsars=1, years=12, seed=5, toas_per_pulsar=150, full_span=True)
    pulsar = array[0]
    components = 12
    variance = np.repeat(powerlaw_variance(fourier_frequencies(array.span, components), -13.5, 5.0, array.span), 2)
    basis = fourier_basis(pulsar.toas, array.start, array.span, components)
    rng = np.random.default_rng(11)
    draws = 600
    total = np.zeros(components)
    for _ in range(draws):
        residuals = pulsar.sigmas * rng.standard_normal(pulsar.n_toas) + basis @ (np.sqrt(variance) *
                                                                                    rng.standard_normal(2 * components))
        _, power, _, _ = residual_power(pulsar.with_residuals(residuals), array.start, array.span, components)
        total += power
    _, _, white_level, expected = residual_power(pulsar, array.start, array.span, components, variance)
    ok = np.isfinite(expected)
    assert ok.sum() >= components - 2
    mean = total[ok] / draws
    # power_k is a sum of two correlated squared Gaussians: its standard deviation is at most its mean,
    # so the average of 600 draws is within 4 / sqrt(600) = 16 % of the expectation
    np.testing.assert_allclose(mean, expected[ok], rtol=4 / np.sqrt(draws))
    # and the leakage is real: at the highest frequencies the expectation is far above white + φ_k alone
    naive = white_level[ok] + 0.5 * (variance[0::2] + variance[1::2])[ok]
    assert expected[ok][-1] > 3 * naive[-1]
