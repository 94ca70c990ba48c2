"""Pulsar distances in the follow-up: ``--pulsar-distances sample-distance`` against the default
``marginalise-phase`` (docs/design.md §7 "Pulsar distances").

Checks: (1) the likelihood with one pulsar's distance sampled, integrated over that distance's Gaussian
prior (scipy.stats.norm, scipy.integrate.simpson), equals the likelihood with that pulsar's phase
marginalised, when σ_L (1 + Ω̂·p̂) is a GW wavelength or more (the wrapped phase distribution is then
uniform to e^(−2π²); the first Fourier coefficient of a wrapped normal is e^(−σ²/2), common practice, no
source); (2) the two modes of the follow-up give the same posterior on chirp mass and frequency within
Monte-Carlo error on a small invented array; (3) the free-phase rule. Datasets are invented (seeded):
inputs, never check values.
"""

from __future__ import annotations

import numpy as np
import pytest
from astropy import constants as const
from astropy import units as u
from scipy import integrate, stats

from cwsearch.inference import sampling
from cwsearch.inference.likelihood import Likelihood, free_pulsar_phases
from cwsearch.physics import simulate
from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
from cwsearch.physics.simulate import Binary, invented_array, simulate_residuals
from cwsearch.physics.waveform import antenna_pattern

WHITE = NoiseSettings(red_components=0)
BINARY = dict(ra=2.0, dec=0.4, gw_frequency=2.0e-8, chirp_mass=3e8, strain=1e-14, inclination=0.8,
              polarization=0.6, phase=1.0)
#: λ_gw = c / f in kpc (astropy constants)
WAVELENGTH_KPC = (const.c / (BINARY["gw_frequency"] * u.Hz)).to_value(u.kpc)


def _array(snr, spread):
    """Three invented pulsars (seeded) holding a binary of optimal SNR ``snr``; each distance error set so
    that σ_L (1 + Ω̂·p̂) = ``spread`` × λ_gw at the binary's position and frequency."""
    base = invented_array(n_pulsars=3, years=10, seed=41, toas_per_pulsar=80, full_span=True)
    binary = Binary(**BINARY)
    rho = NoiseWeighting(base, WHITE).optimal_snr(simulate.binary_residuals(base, binary))
    binary.strain *= snr / rho
    _, _, odp = antenna_pattern(binary.ra, binary.dec, base.positions)
    for p, o in zip(base, np.ravel(odp)):
        p.distance_err = spread * WAVELENGTH_KPC / (1 + o)
    return base.with_residuals(simulate_residuals(base, seed=42, binaries=[binary])), binary


def test_free_phase_rule():
    """σ_L (1 + Ω̂·p̂) > λ_gw frees the phase (the rule as stated in docs/design.md §7); a typical
    catalogue error of 0.1 kpc is ~2e5 wavelengths at 20 nHz (λ = c/f, astropy)."""
    lam = WAVELENGTH_KPC
    free = free_pulsar_phases(np.array([0.1, 0.9 * lam, 1.1 * lam, 0.6 * lam]), np.array([0.0, 0.0, 0.0, 1.0]),
                              BINARY["gw_frequency"])
    assert free.tolist() == [True, False, True, True]


@pytest.mark.parametrize("evolution, log10_chirp_mass, tolerance", [("monochromatic", (8.0, 9.3), 1e-8),
                                                                      ("full", (7.0, 8.0), 1e-6)])
def test_distance_integral_equals_marginalised_phase(evolution, log10_chirp_mass, tolerance):
    """exp ln Λ with pulsar k's distance sampled, averaged over N(distance, distance_err) (Simpson's rule on
    ±8σ, scipy), equals exp ln Λ with its phase marginalised, at random parameter points, for each pulsar.
    σ_L (1 + Ω̂·p̂) = 1.2 λ_gw: the wrapped GW-phase spread is 7.5 rad, non-uniformity ~e^(−28); the sky
    points stay within 0.3 rad of the source so the spread stays above a wavelength. Monochromatic: the
    distance only sets the phase, tolerance 1e-8 in ln Λ (Simpson with ~100 points per phase cycle; 1e-12 to 1e-9
    seen). Full evolution: the distance also moves the pulsar-term frequency along the chirp (a 4 pc
    change at 1.7 kpc), which the marginalised mode holds at the catalogue distance; for Mc ≤ 1e8 Msun
    that stays below 1e-8 (seen), tolerance 1e-6 (at 1e9 Msun it reaches 1e-4)."""
    array, binary = _array(snr=12.0, spread=1.2)
    like = Likelihood(array, WHITE, evolution=evolution)
    rng = np.random.default_rng(7)
    mean = np.array([p.distance for p in array])
    sigma = np.array([p.distance_err for p in array])
    for _ in range(4):
        theta = np.array([BINARY["ra"] + rng.normal(0, 0.1), np.sin(BINARY["dec"]) + rng.normal(0, 0.05),
                          np.log10(BINARY["gw_frequency"]) + rng.normal(0, 0.003), rng.uniform(*log10_chirp_mass),
                          np.log10(binary.strain) + rng.normal(0, 0.1), rng.uniform(-1, 1),
                          rng.uniform(0, np.pi), rng.uniform(0, np.pi)])
        marginal = like.batch(theta[None])[0]
        for k in range(len(array)):
            mask = np.zeros(len(array), dtype=bool)
            mask[k] = True
            sampled = like.with_sampled_distances(mask)
            grid = mean[k] + sigma[k] * np.linspace(-8, 8, 4001)
            thetas = np.hstack([np.repeat(theta[None], grid.size, axis=0), grid[:, None]])
            logl = sampled.batch(thetas)
            top = logl.max()
            weight = stats.norm.pdf(grid, mean[k], sigma[k])
            integral = np.log(integrate.simpson(weight * np.exp(logl - top), x=grid)) + top
            assert integral == pytest.approx(marginal, abs=tolerance)
            # and the integrand really depends on the distance (the check is not empty)
            assert logl.max() - logl.min() > 0.05


def _quantile_error(x, q, ess):
    """Monte-Carlo standard error of the q-quantile of samples ``x`` worth ``ess`` independent draws:
    sqrt(q (1 − q) / ess) / p(x_q) (the asymptotic variance of a sample quantile; Stuart & Ord, Kendall's
    Advanced Theory of Statistics, from memory), p from scipy.stats.gaussian_kde."""
    xq = np.quantile(x, q)
    return np.sqrt(q * (1 - q) / ess) / float(stats.gaussian_kde(x)(xq)[0])


@pytest.mark.parametrize("seed", [5])
def test_both_modes_give_the_same_frequency_and_chirp_mass_posterior(seed):
    """Posterior of (log10 f, log10 Mc) with the other six parameters held at the injected values:
    ptemcee (cwsearch.inference.sampling) with every pulsar phase marginalised against ptemcee with the
    three distances sampled (Gaussian priors; σ_L (1 + Ω̂·p̂) = 0.6 λ_gw, so the wrapped-phase prior is
    uniform to e^(−(1.2π)²/2) ≈ 8e-4 and every distance is sampled by the free-phase rule). The 10, 50 and
    90 % quantiles agree within 4 combined Monte-Carlo errors (:func:`_quantile_error` with each run's
    effective sample size). Optimal SNR 6, 3 pulsars, 80 TOAs each (invented, seeded)."""
    array, binary = _array(snr=6.0, spread=0.6)
    like = Likelihood(array, WHITE)
    span = array.span
    lower = np.array([np.log10(binary.gw_frequency - 1 / span), 7.0])
    upper = np.array([np.log10(binary.gw_frequency + 1 / span), 9.0])
    fixed = np.array([binary.ra, np.sin(binary.dec), 0.0, 0.0, np.log10(binary.strain), np.cos(binary.inclination),
                      binary.polarization, binary.phase])
    mean = np.array([p.distance for p in array])
    sigma = np.array([p.distance_err for p in array])
    _, _, odp = antenna_pattern(binary.ra, binary.dec, array.positions)
    assert not free_pulsar_phases(sigma, np.ravel(odp), 10 ** upper[0]).any()

    def log_prior(x):
        out = np.where(np.all((x[:, :2] > lower) & (x[:, :2] < upper), axis=1), 0.0, -np.inf)
        if x.shape[1] > 2:
            out = out + stats.norm.logpdf(x[:, 2:], mean, sigma).sum(axis=1)
        return out

    runs = {}
    for name, model, dim in (("marginalise-phase", like, 2),
                             ("sample-distance", like.with_sampled_distances(np.ones(3, dtype=bool)), 5)):
        def log_likelihood(x, model=model):
            theta = np.repeat(fixed[None], x.shape[0], axis=0)
            theta[:, 2:4] = x[:, :2]
            return model.batch(np.hstack([theta, x[:, 2:]]))

        settings = sampling.SamplerSettings(walkers=16, temperatures=4, max_temperature=100.0, ess=400.0,
                                            max_iterations=20000, adapt_iterations=200, max_temperatures=4,
                                            checkpoint_every=10**6)
        rng = np.random.default_rng(seed)
        start = np.empty((4, 16, dim))
        start[..., :2] = rng.uniform(lower, upper, (4, 16, 2))
        if dim > 2:
            start[..., 2:] = rng.normal(mean, sigma, (4, 16, 3))
        result = sampling.run_sampler(log_prior, log_likelihood, start, settings, seed=seed, progress=False,
                                      symmetry=None)
        runs[name] = (result.sample_details()["samples"], float(result.ess))
    (a, ess_a), (b, ess_b) = runs["marginalise-phase"], runs["sample-distance"]
    for j in (0, 1):                     # log10 frequency, log10 chirp mass
        for q in (0.1, 0.5, 0.9):
            error = np.hypot(_quantile_error(a[:, j], q, ess_a), _quantile_error(b[:, j], q, ess_b))
            assert abs(np.quantile(a[:, j], q) - np.quantile(b[:, j], q)) < 4 * error
