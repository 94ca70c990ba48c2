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
from cwsearch.inference.sampling import (SamplerSettings, VectorisedPool, integrated_time, load_ptemcee, run_sampler,
                               stationary, thermodynamic_log_evidence)

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
    settings = SamplerSettings(walkers=16, temperatures=3, max_temperature=100, ess=50, max_iterations=2000,
                               adapt_iterations=200, check_every=50, checkpoint_every=10**6)
    p0 = np.random.default_rng(8).uniform(-BOX, BOX, (3, 16, DIM))
    result = run_sampler(box_prior, unit_gaussian, p0, settings, seed=9, progress=False)
    assert result.stopped_by == "converged"
    assert result.iterations > settings.adapt_iterations
    assert result.burn_in >= settings.adapt_iterations
