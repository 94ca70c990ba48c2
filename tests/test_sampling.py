"""Tests of the tempered-sampler wrapper (cwsearch.inference.sampling).

Check values: closed-form evidences of Gaussian problems (Gaussian integrals,
common practice), the autocorrelation time of an AR(1) process
τ = (1 + ρ)/(1 − ρ) (Sokal 1997 lecture notes, from memory), normal tail probabilities
(scipy.stats.norm) for the drift check, numpy's own
attribute set, and a run without interruption as the reference for a resumed one.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from cwsearch.core.errors import InputError
from cwsearch.inference.sampling import (SamplerSettings, VectorisedPool, ensemble_time, extended_ladder,
                                         integrated_time, load_ptemcee, run_sampler, stationary, tau_change,
                                         thermodynamic_log_evidence)

BOX = 5.0
DIM = 2


def box_prior(x):
    return np.where(np.all(np.abs(x) <= BOX, axis=1), 0.0, -np.inf)


def unit_gaussian(x):
    return -0.5 * np.sum(x**2, axis=1) - 0.5 * DIM * np.log(2 * np.pi)


def test_numpy_untouched_by_compatibility_namespace():
    # NumPy 2 has neither `float` nor `trapz`; loading ptemcee must not add them (fresh interpreter).
    code = ("import numpy; before = set(dir(numpy)); from cwsearch.inference.sampling import load_ptemcee; "
            "s = load_ptemcee(); import ptemcee.util as u; "
            "assert set(dir(numpy)) == before; assert not hasattr(numpy, 'float'); "
            "assert not hasattr(numpy, 'trapz'); assert s.np.float is float; "
            "assert abs(u.np.trapz([1.0, 1.0], [0.0, 2.0]) - 2.0) < 1e-12; assert s.np.zeros is numpy.zeros; print('ok')")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "ok"


def test_ptemcee_uses_the_vectorised_pool_in_one_call_per_batch():
    # ptemcee hands every batch (temperatures × half the walkers) to pool.map: one vectorised call each.
    calls = []

    def like(x):
        calls.append(len(x))
        return unit_gaussian(x)

    pt = load_ptemcee()
    rng = np.random.RandomState(1)
    sampler = pt.Sampler(8, DIM, None, None, ntemps=3, pool=VectorisedPool(box_prior, like), random=rng)
    p0 = np.random.default_rng(2).uniform(-1, 1, (3, 8, DIM))
    for _ in sampler.sample(p0, iterations=5):
        pass
    assert calls[0] == 24 and all(n <= 12 for n in calls[1:]) and len(calls) == 1 + 5 * 2


def test_thermodynamic_integration_of_closed_form_ladder():
    # Gaussian likelihood N(0, σ²) and Gaussian prior N(0, s²) in d dims:
    # ⟨ln L⟩_β = −d v_β / (2σ²) − (d/2) ln(2πσ²), v_β = 1/(1/s² + β/σ²); Z = N(0; 0, σ² + s²).
    sigma, s, d = 0.1, 3.0, 3
    betas = np.geomspace(1e-7, 1.0, 40)
    v = 1.0 / (1 / s**2 + betas / sigma**2)
    mean_logl = -d * v / (2 * sigma**2) - 0.5 * d * np.log(2 * np.pi * sigma**2)
    ln_z, err = thermodynamic_log_evidence(betas, mean_logl)
    exact = -0.5 * d * np.log(2 * np.pi * (sigma**2 + s**2))
    assert abs(ln_z - exact) < max(err, 1e-6) * 2
    assert err < 0.2


def test_evidence_of_gaussian_toy_by_sampling():
    # Unit Gaussian likelihood, uniform prior on [−5, 5]²: Z = (1/10)² (mass outside the box < 1e-6).
    settings = SamplerSettings(walkers=16, temperatures=10, max_temperature=1e4, ess=1500, max_iterations=1500,
                               adapt_iterations=150, check_every=100, checkpoint_every=10**6)
    p0 = np.random.default_rng(3).uniform(-BOX, BOX, (10, 16, DIM))
    result = run_sampler(box_prior, unit_gaussian, p0, settings, seed=4, progress=False)
    exact = -DIM * np.log(2 * BOX)
    assert result.log_evidence_error < 1.0
    assert abs(result.log_evidence - exact) < 3 * result.log_evidence_error
    # posterior of each coordinate: unit variance (truncation at 5σ negligible)
    samples = result.samples()
    assert np.all(np.abs(samples.std(axis=0) - 1) < 0.15)


def test_integrated_time_of_ar1_process():
    # AR(1) with coefficient ρ: τ_int = (1 + ρ)/(1 − ρ) (Sokal 1997, from memory) = 9 for ρ = 0.8.
    rng = np.random.default_rng(5)
    rho, n, walkers = 0.8, 20000, 4
    x = np.zeros((n, walkers, 1))
    noise = rng.standard_normal((n, walkers)) * np.sqrt(1 - rho**2)
    for i in range(1, n):
        x[i, :, 0] = rho * x[i - 1, :, 0] + noise[i]
    tau = integrated_time(x)[0]
    assert tau == pytest.approx(9.0, rel=0.15)


def _toy_run(tmp_path, max_iterations, callback=None, resume=False, walkers=16):
    settings = SamplerSettings(walkers=walkers, temperatures=3, max_temperature=100, ess=1e9,
                               max_iterations=max_iterations, adapt_iterations=40, checkpoint_every=50,
                               check_every=50)
    p0 = np.random.default_rng(6).uniform(-1, 1, (3, walkers, DIM))
    return run_sampler(box_prior, unit_gaussian, p0, settings, seed=7, checkpoint=tmp_path / "ck.npz",
                       resume=resume, fingerprint={"toy": 1}, progress=False, callback=callback)


def test_resume_after_interruption_repeats_the_uninterrupted_run(tmp_path):
    # Reference: the same run without interruption (same seed). A crash at iteration 130 loses the
    # 30 iterations after the checkpoint at 100; resuming must reach the same count and chain.
    reference = _toy_run(tmp_path / "ref", 200)

    class Crash(Exception):
        pass

    def crash(n):
        if n == 130:
            raise Crash

    with pytest.raises(Crash):
        _toy_run(tmp_path / "cut", 200, callback=crash)
    ck = np.load(tmp_path / "cut" / "ck.npz", allow_pickle=False)
    assert int(ck["iterations"]) == 100
    resumed = _toy_run(tmp_path / "cut", 200, resume=True)
    assert resumed.iterations == reference.iterations == 200
    # the resumed iterations are recomputed: same chain to 1e-12 (never bit for bit; common practice)
    np.testing.assert_allclose(resumed.chain, reference.chain, rtol=1e-12, atol=1e-12 * np.abs(reference.chain).max())
    assert np.isfinite(resumed.log_evidence)
    samples = resumed.samples()
    assert samples.shape[0] > 0 and np.all(np.abs(samples) <= BOX)


def test_resume_refuses_a_checkpoint_from_other_settings(tmp_path):
    _toy_run(tmp_path, 50)
    with pytest.raises(InputError, match="checkpoint"):
        _toy_run(tmp_path, 50, resume=True, walkers=18)


def _ar1_ensemble(rng, iterations, walkers, rho):
    x = np.empty((iterations, walkers))
    x[0] = rng.standard_normal(walkers)
    noise = rng.standard_normal((iterations, walkers)) * np.sqrt(1 - rho**2)
    for i in range(1, iterations):
        x[i] = rho * x[i - 1] + noise[i]
    return x


def test_drift_check_flags_a_climbing_chain_and_rarely_a_stationary_one():
    from scipy import stats

    # Stationary AR(1) ensembles (ρ = 0.8, τ = 9; Sokal 1997, from memory), halves of 200 iterations ≈ 22 τ.
    # The check compares the halves' means at 3 standard errors (nominal false-alarm rate 2Φ(−3) = 0.27 %);
    # the windowed τ of a finite half is biased low (Sokal), which raises the rate. A false alarm only delays
    # stopping by one check; the check must stay at least as permissive as a 2-sigma rule (2Φ(−2) = 4.6 %).
    rng = np.random.default_rng(21)
    n = 200
    flagged = sum(not stationary(_ar1_ensemble(rng, 400, 16, 0.8)) for _ in range(n))
    assert flagged / n < 2 * stats.norm.sf(2.0)
    # The same ensemble climbing by 1.5 of its standard deviations over the run (a chain still leaving a
    # secondary mode): the halves differ by 0.75 σ, ~16 standard errors of the difference for 16 walkers.
    x = _ar1_ensemble(rng, 400, 16, 0.8) + np.linspace(0.0, 1.5, 400)[:, None]
    assert not stationary(x)


def test_sampler_does_not_stop_before_the_adaptation_is_over():
    # The ESS target (50) is met by a short chain long before the 200 adaptation iterations end; samples from
    # the adapting phase must not count (burn-in covers the adaptation; common practice, no source).
    # The 50-tau rule needs ~2,200 iterations here; the cap is far above it so that a machine whose floats
    # differ in the last bits cannot turn this into an iteration-cap stop.
    settings = SamplerSettings(walkers=16, temperatures=3, max_temperature=100, ess=50, max_iterations=20000,
                               adapt_iterations=200, check_every=50, checkpoint_every=10**6)
    p0 = np.random.default_rng(8).uniform(-BOX, BOX, (3, 16, DIM))
    result = run_sampler(box_prior, unit_gaussian, p0, settings, seed=9, progress=False)
    assert result.stopped_by == "converged"
    assert result.iterations > settings.adapt_iterations
    assert result.burn_in >= settings.adapt_iterations


def test_integrated_time_of_ar1_chains_of_50_tau():
    # AR(1) with coefficient ρ: τ_int = (1 + ρ)/(1 − ρ) in closed form (Sokal 1997, from memory). The stopping
    # rule asks for chains of 50 τ: there the estimator (automatic window, deviations from the pooled mean)
    # must be unbiased within 10 %. Mean over 20 independent ensembles of 32 walkers (the scatter of one
    # estimate is ≈ 9 %, that of the mean ≈ 2 %).
    rng = np.random.default_rng(51)
    for rho in (0.5, 0.8, 0.9):
        tau = (1 + rho) / (1 - rho)
        n = int(round(50 * tau))
        estimates = [integrated_time(_ar1_ensemble(rng, n, 32, rho)[:, :, None])[0] for _ in range(20)]
        assert np.mean(estimates) == pytest.approx(tau, rel=0.10)
        # and the ensemble estimate (independent walkers: the same τ; it only ever raises the τ used)
        ens = [ensemble_time(_ar1_ensemble(rng, n, 32, rho)[:, :, None])[0] for _ in range(30)]
        assert np.mean(ens) == pytest.approx(tau, rel=0.2)    # one series: scatter ≈ 60 %, skewed


def test_ensemble_time_sees_walkers_moving_together():
    # 32 walkers sharing one AR(1) fluctuation (ρ = 0.95, τ = 39) plus independent white noise of the same
    # variance: each walker's own autocorrelation hides half of the shared part, the walker mean shows it.
    # With Var(shared) = Var(noise) = 1: ensemble τ = 32 · (1 + 1/32) / 2 · τ_shared ≈ 20 τ_shared
    # (closed form from the variances; common practice, no source).
    rng = np.random.default_rng(52)
    shared = _ar1_ensemble(rng, 4000, 1, 0.95)
    x = shared + rng.standard_normal((4000, 32))
    walkers_tau = integrated_time(x[:, :, None])[0]
    ens = ensemble_time(x[:, :, None])[0]
    assert walkers_tau < 25
    assert ens == pytest.approx(32 * (1 + 1 / 32) / 2 * 39.0, rel=0.35)


def test_tau_change_and_extended_ladder():
    # τ per check: 10 % growth over 4 checks is 2.5 %/check (arithmetic, no source).
    history = [np.array([10.0]), np.array([10.0]), np.array([10.5]), np.array([10.8]), np.array([11.0])]
    assert tau_change(history, 4) == pytest.approx((11.0 - 10.0) / 11.0 / 4)
    assert tau_change(history[:3], 4) == np.inf
    # a pair swapping in 0.5 % of proposals is split into ceil(erfcinv(0.005)/erfcinv(0.25)) = 3 steps
    # (scipy.special.erfcinv); pairs above the threshold are left alone; the limit is respected
    from scipy.special import erfcinv

    betas = np.array([1.0, 0.1, 0.01])
    new, source = extended_ladder(betas, [0.005, 0.3], 0.05, limit=10)
    k = int(np.ceil(erfcinv(0.005) / erfcinv(0.25)))
    assert new.size == 3 + (k - 1)
    np.testing.assert_allclose(new[: k + 1], np.geomspace(1.0, 0.1, k + 1), rtol=1e-12)
    assert list(source) == [0] * k + [1, 2]
    assert extended_ladder(betas, [0.005, 0.3], 0.05, limit=4)[0].size == 4


def test_iteration_cap_is_reported_with_a_warning_not_as_converged():
    settings = SamplerSettings(walkers=16, temperatures=3, max_temperature=100, ess=1e6, max_iterations=120,
                               adapt_iterations=40, check_every=50, checkpoint_every=10**6)
    p0 = np.random.default_rng(10).uniform(-BOX, BOX, (3, 16, DIM))
    result = run_sampler(box_prior, unit_gaussian, p0, settings, seed=11, progress=False)
    assert result.stopped_by == "iterations" and not result.converged
    assert any("iteration cap" in w for w in result.warnings)
    assert result.swap_acceptance.shape == (result.betas.size - 1,)


# ---------------------------------------------------------------- bimodal sky toy
KAPPA = 50.0                                     # Fisher concentration: modes of ≈ 8° (1/sqrt(κ) rad)
MODES = ((1.0, 0.5), (4.0, -0.6))                # (ra, dec) [rad], invented


def _unit(ra, dec):
    return np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], axis=-1)


def _sky_prior(x):
    ok = (x[:, 0] >= 0) & (x[:, 0] < 2 * np.pi) & (np.abs(x[:, 1]) <= 1)
    return np.where(ok, 0.0, -np.inf)


def _two_fisher_modes(x):
    # equal mixture of two von Mises-Fisher densities on the sphere (per steradian), each normalised as
    # κ / (2π (1 − e^(−2κ))) exp(κ (μ·n − 1)) (Fisher 1953, from memory)
    n = _unit(x[:, 0], np.arcsin(np.clip(x[:, 1], -1, 1)))
    norm = np.log(KAPPA / (2 * np.pi * (1 - np.exp(-2 * KAPPA))))
    a, b = (KAPPA * (n @ _unit(*m) - 1) for m in MODES)
    return norm + np.logaddexp(a, b) + np.log(0.5)


@pytest.mark.parametrize("start", [0, 1])
def test_bimodal_sky_both_modes_with_equal_weights_from_either_start(start):
    # All walkers start in a tight ball in one mode; the sampler must find the other one (through the
    # temperature ladder) and give each mode half the posterior within the Monte-Carlo error of its own
    # effective sample size (4 σ). The prior is uniform on the sphere (uniform in ra and sin dec) and the
    # likelihood a normalised density per steradian, so Z = 1/(4π) exactly.
    rng = np.random.default_rng(60 + start)
    ra, dec = MODES[start]
    p0 = np.stack([ra + 0.01 * rng.standard_normal((8, 16)), np.sin(dec) + 0.01 * rng.standard_normal((8, 16))],
                  axis=-1)
    settings = SamplerSettings(walkers=16, temperatures=8, max_temperature=1e3, ess=500, max_iterations=20000,
                               adapt_iterations=150, check_every=50, checkpoint_every=10**6)
    result = run_sampler(_sky_prior, _two_fisher_modes, p0, settings, seed=70 + start, progress=False)
    assert result.converged and not result.warnings
    s = result.samples()
    n = _unit(s[:, 0], np.arcsin(s[:, 1]))
    share = float(np.mean(n @ _unit(*MODES[0]) > n @ _unit(*MODES[1])))
    se = np.sqrt(0.25 / result.ess)
    assert se < 0.03
    assert abs(share - 0.5) < 4 * se, (share, se)
    assert abs(result.log_evidence + np.log(4 * np.pi)) < 3 * result.log_evidence_error + 0.05


def test_exact_symmetry_move_joins_the_copies_of_a_mode():
    """A density with two exact copies (x → x + 2.5 mod 5 on [0, 5), narrow Gaussian modes at 1 and
    3.5): stretch moves alone cross between the copies very rarely, so the walkers keep the split
    they started with (all in the first copy here); with the symmetry move each copy holds half
    the samples, within binomial error over the effective samples (exact result by symmetry;
    common practice, no source). The move must not change the shape of a mode (its width stays
    0.1 within 10 %)."""
    period, shift, width = 5.0, 2.5, 0.1

    class Prior:
        def __call__(self, x):
            return np.where(np.all((x >= 0) & (x < period), axis=1), 0.0, -np.inf)

        def exact_symmetry(self, positions, rng):
            flip = rng.random(positions.shape[:-1]) < 0.5
            positions[..., 0] = np.where(flip, (positions[..., 0] + shift) % period, positions[..., 0])

    def two_copies(x):
        d = np.minimum(np.abs(x[:, 0] - 1.0), np.abs(x[:, 0] - 3.5))
        return -0.5 * (d / width) ** 2 - 0.5 * ((x[:, 1] - 2.5) / 1.0) ** 2

    settings = SamplerSettings(walkers=16, temperatures=1, ess=1e9, max_iterations=1500, adapt_iterations=100,
                               check_every=100)
    p0 = np.column_stack([np.random.default_rng(2).normal(1.0, 0.05, 16),
                          np.random.default_rng(3).uniform(2, 3, 16)])[None]
    plain = run_sampler(Prior(), two_copies, p0, settings, seed=4, progress=False, symmetry=None)
    moved = run_sampler(Prior(), two_copies, p0, settings, seed=4, progress=False)
    first_plain = np.mean(plain.samples()[:, 0] < shift)
    first = np.mean(moved.samples()[:, 0] < shift)
    assert first_plain > 0.99                     # without the move: stuck in the starting copy
    n_eff = max(moved.ess, 10.0)
    assert abs(first - 0.5) < 4 * np.sqrt(0.25 / n_eff)
    x = moved.samples()[:, 0]
    folded = np.where(x < shift, x, x - shift)
    assert abs(np.std(folded) / width - 1) < 0.1
