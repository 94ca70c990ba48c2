"""The run-level choice of the common process's correlation and its use in the scan stage.

References: dense linear algebra (numpy.linalg / scipy.linalg) of the G-projected array
covariance, as in test_correlated.py (van Haasteren & Vallisneri 2014, Phys. Rev. D 90,
104012); Fe and Fp of Ellis, Siemens & Creighton 2012 (ApJ 756, 175); the moments of a
Gaussian quadratic form xᵀQx, mean tr(QΣ) and variance 2 tr((QΣ)²) (common practice, no
source) and the scaled-χ² match of Satterthwaite 1946 (Biometrics Bull. 2, 110); binomial
errors (common practice, no source); scipy.stats.chi2 for the χ² laws.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
import scipy.stats

from cwsearch.core.errors import InputError
from cwsearch.physics import fstat, waveform
from cwsearch.physics.correlated import ArrayNoise, CommonProcess, array_noise, fp_moment_matched
from cwsearch.physics.noise import NoiseSettings, NoiseWeighting

from test_correlated import SETTINGS, _array, _Dense

LOG10_A = -13.5
HD = replace(SETTINGS, common_log10_amplitude=LOG10_A, common_index=13 / 3)


def test_factory_picks_the_engine_from_the_settings():
    """Default Hellings–Downs with a common process; 'uncorrelated' is the per-pulsar engine with the
    common process in each prior; 'none' (or no amplitude) leaves it out (log-likelihoods compared
    with the per-pulsar engine built directly)."""
    arr = _array(seed=5)
    assert NoiseSettings().common_correlation == "hellings-downs"
    hd = array_noise(arr, HD)
    assert hd.kind == "hellings-downs" and hd.correlated
    unc = array_noise(arr, replace(HD, common_correlation="uncorrelated"))
    none = array_noise(arr, replace(HD, common_correlation="none"))
    assert (unc.kind, none.kind, array_noise(arr, SETTINGS).kind) == ("uncorrelated", "none", "none")
    assert not unc.correlated and not none.correlated
    want_unc = sum(w.log_likelihood() for w in NoiseWeighting(arr, HD))
    want_none = sum(w.log_likelihood() for w in NoiseWeighting(arr, SETTINGS))
    assert unc.log_likelihood() == pytest.approx(want_unc, rel=1e-12)
    assert none.log_likelihood() == pytest.approx(want_none, rel=1e-12)
    assert hd.log_likelihood() != pytest.approx(want_unc, rel=1e-6)
    with pytest.raises(ValueError):
        array_noise(arr, replace(HD, common_correlation="sideways"))


def test_projection_covariance_and_amplitudes_equal_dense():
    """The (X, Y) noise covariance used for the sky trials, and Fe with M⁺N amplitudes at a candidate,
    equal the dense correlated inner products to 1e-8 relative."""
    arr = _array(seed=11)
    noise = array_noise(arr, HD)
    aw = noise.weighting
    dense = _Dense(arr, SETTINGS, aw.common, aw.correlation)
    freqs = np.array([7.7e-9])
    proj = noise.projections(freqs)
    cov = noise.projection_covariance(proj, 0)
    t0 = arr.reference_time
    cols = []
    for p, psr in enumerate(arr):
        for fn in (np.sin, np.cos):
            cols.append(dense.on(p, fn(2 * np.pi * freqs[0] * (psr.toas - t0)))[:, 0])
    cols = np.column_stack(cols)
    want = dense.inner(cols, cols)
    np.testing.assert_allclose(cov, want, rtol=1e-8, atol=1e-8 * np.abs(want).max())
    fplus, fcross, _ = waveform.antenna_pattern(np.array([2.0]), np.array([-0.4]), arr.positions)
    fe, amp = noise.fe_with_amplitudes(proj, fplus, fcross)
    templates = np.column_stack([cols[:, 0::2] @ fplus[0], cols[:, 1::2] @ fplus[0],
                                 cols[:, 0::2] @ fcross[0], cols[:, 1::2] @ fcross[0]])
    data = dense.stack([p.residuals for p in arr])
    m = dense.inner(templates, templates)
    n = dense.inner(templates, data)[:, 0]
    np.testing.assert_allclose(amp[0, 0], np.linalg.solve(m, n), rtol=1e-7)
    assert fe[0, 0] == pytest.approx(0.5 * n @ np.linalg.solve(m, n), rel=1e-8)
    assert fe[0, 0] == pytest.approx(noise.fe_sky(proj, fplus, fcross).fe_map[0, 0], rel=1e-8)


def test_fp_moment_match_and_null_calibration():
    """ν and c of the scaled-χ² law of 2Fp equal the exact moments of the quadratic form
    (tr(A⁻¹Σ), tr((A⁻¹Σ)²) from the dense Σ); and in 2000 draws from the dense correlated C the
    fraction of Fp FAPs ≤ P stays within 4 binomial errors of P (P = 0.05, 0.2, 0.5)."""
    arr = _array(seed=4, n_pulsars=5)
    settings = replace(HD, common_log10_amplitude=-13.2)
    noise = array_noise(arr, settings)
    aw = noise.weighting
    dense = _Dense(arr, SETTINGS, aw.common, aw.correlation)
    freqs = np.array([3.3e-9, 1.1e-8])
    proj = noise.projections(freqs)
    dof, scale = noise.fp_distribution(proj)
    for k in range(freqs.size):
        sigma = noise.projection_covariance(proj, k)
        a_inv = np.zeros_like(sigma)
        for p in range(len(arr)):
            sl = slice(2 * p, 2 * p + 2)
            a_inv[sl, sl] = np.linalg.pinv(sigma[sl, sl], rcond=1e-10)
        q = a_inv @ sigma
        tr, tr2 = np.trace(q), np.trace(q @ q)
        assert dof[k] == pytest.approx(tr**2 / tr2, rel=1e-8)
        assert scale[k] == pytest.approx(tr2 / tr, rel=1e-8)
    assert np.all(scale > 1.0)            # positive HD correlations widen the law
    rng = np.random.default_rng(7)
    n_sims = 2000
    draws = np.linalg.cholesky(dense.cov) @ rng.standard_normal((dense.cov.shape[0], n_sims))
    sets = [draws[dense.offsets[p]:dense.offsets[p + 1]] for p in range(len(arr))]
    fp = noise.fp(noise.projections(freqs, sets))
    from cwsearch.stages.scan.stage import fp_fap

    for k in range(freqs.size):
        faps = fp_fap(fp[:, k], dof[k], scale[k])
        for level in (0.05, 0.2, 0.5):
            err = np.sqrt(level * (1 - level) / n_sims)
            assert abs(np.mean(faps <= level) - level) <= 4 * err


def test_no_cross_terms_keeps_the_exact_chi2():
    """Without a correlated common process the Fp law is χ²(2N) exactly: c = 1 and ν the rank count."""
    arr = _array(seed=8)
    noise = array_noise(arr, replace(HD, common_correlation="uncorrelated"))
    proj = noise.projections(np.array([5e-9, 1.2e-8]))
    dof, scale = fp_moment_matched(proj)
    np.testing.assert_array_equal(dof, fstat.fp_degrees_of_freedom(proj))
    np.testing.assert_array_equal(scale, 1.0)
    assert ArrayNoise.from_engine(noise.engine).kind == "uncorrelated"


def test_simulated_common_process_follows_the_model():
    """Null-simulation draws: Hellings–Downs background coefficients are correlated by Γ, the
    uncorrelated model's are independent (sample correlation of the lowest-frequency sine
    coefficient of the most correlated pair over 300 draws, against Γ; loose: 4 standard errors)."""
    arr = _array(seed=3, n_pulsars=4, design=False, red=False)
    hd = array_noise(arr, replace(HD, common_log10_amplitude=-12.5))
    unc = array_noise(arr, replace(HD, common_log10_amplitude=-12.5, common_correlation="uncorrelated"))
    gamma = hd.weighting.correlation
    off = gamma - np.eye(len(arr))
    p, q = np.unravel_index(np.argmax(np.abs(off)), off.shape)
    n = 300

    def coefficient_correlation(noise, seed):
        rng = np.random.default_rng(seed)
        a, b = [], []
        basis = [hd.weighting.fourier[i][:, :2] for i in (p, q)]
        for _ in range(n):
            sims = noise.simulate(rng)
            a.append(np.linalg.lstsq(basis[0], sims[p], rcond=None)[0][0])
            b.append(np.linalg.lstsq(basis[1], sims[q], rcond=None)[0][0])
        return np.corrcoef(a, b)[0, 1]

    err = 1 / np.sqrt(n)
    assert abs(coefficient_correlation(hd, 1) - gamma[p, q]) < 4 * err
    assert abs(coefficient_correlation(unc, 2)) < 4 * err


def test_cli_and_run_file_option(tmp_path):
    """--common-correlation on the stage commands and common_correlation in [noise]."""
    import argparse

    from cwsearch.commands._common import add_noise_arguments, noise_settings
    from cwsearch.job.config import parse_config

    parser = argparse.ArgumentParser()
    add_noise_arguments(parser)
    args = parser.parse_args(["--common-log10-amplitude", "-14", "--common-correlation", "uncorrelated"])
    assert noise_settings(args).common_correlation == "uncorrelated"
    assert noise_settings(parser.parse_args([])).common_correlation == "hellings-downs"
    (tmp_path / "data").mkdir()
    cfg = parse_config('dataset = "data"\n[noise]\ncommon_correlation = "none"\n', path=tmp_path / "r.toml")
    assert cfg.noise.common_correlation == "none"
    with pytest.raises(InputError, match="common_correlation"):
        parse_config('dataset = "data"\n[noise]\ncommon_correlation = "diagonal"\n', path=tmp_path / "r.toml")


def test_scan_stage_with_correlated_background(tmp_path):
    """The scan stage runs the correlated engine end to end: correlated Fe at the candidate equals
    the engine's Fe, the summary names the model and what stays valid, and the null simulations run."""
    from cwsearch.physics.simulate import invented_array, simulated_array
    from cwsearch.stages.scan.stage import ScanOptions, run_scan

    arr = simulated_array(invented_array(n_pulsars=5, years=8, seed=1, toas_per_pulsar=60), seed=2,
                          background_log10_amplitude=-14.0, background_components=6)
    settings = NoiseSettings(red_components=6, common_log10_amplitude=-14.0)
    res = run_scan(arr, tmp_path, ScanOptions(nside=2, fmax=2e-8, no_plots=True, null_sims=8), noise=settings,
                   progress=False)
    assert res.summary["noise_model"]["common_correlation"] == "hellings-downs"
    assert "chi2(4)" in res.summary["fap_validity"]
    assert np.all(res.spectrum["fp_scale"] > 1.0)
    best = res.candidates[0]
    noise = array_noise(arr, settings)
    proj = noise.projections(res.frequencies[int(best["frequency_index"]):int(best["frequency_index"]) + 1])
    fplus, fcross = fstat.sky_patterns(proj, np.radians([best["ra"]]), np.radians([best["dec"]]))
    assert float(best["fe"]) == pytest.approx(float(noise.fe_with_amplitudes(proj, fplus, fcross)[0][0, 0]),
                                              rel=1e-6)
    assert np.isfinite(res.summary["best_fap_empirical"])


def test_limits_stage_uses_the_correlated_network(tmp_path):
    """Galaxy strain limits of the limits stage equal :func:`bayesian_limit` of the correlated N, M at
    the galaxy (1e-6 relative: the quadrature and the stage use the same grid), and differ from the
    per-pulsar (uncorrelated) ones."""
    from cwsearch.physics.simulate import invented_array, simulated_array
    from cwsearch.stages.limits import stage as limits

    arr = simulated_array(invented_array(n_pulsars=5, years=8, seed=3, toas_per_pulsar=50), seed=4,
                          background_log10_amplitude=-13.8, background_components=6)
    settings = NoiseSettings(red_components=6, common_log10_amplitude=-13.8)
    options = limits.LimitsOptions(nside=1, fmax=8e-9, method="bayes", workers=1, quadrature="fast",
                                   galaxy=(("GAL0001", 120.0, -20.0, 30.0),), no_plots=True)
    res = limits.run_limits(arr, tmp_path / "hd", options, noise=settings, progress=False)
    assert res.summary["noise_model"]["common_correlation"] == "hellings-downs"
    noise = array_noise(arr, settings)
    proj = noise.projections(res.frequencies)
    fplus, fcross = fstat.sky_patterns(proj, np.radians([120.0]), np.radians([-20.0]))
    nvec, mmat = noise.network(proj, fplus, fcross)
    k = 0
    want = limits.bayesian_limit(nvec[0, k], mmat[0, k], res.frequencies[k], grid=limits.QUADRATURE["fast"])
    got = float(res.galaxy_limits["strain_95"][k])
    assert got == pytest.approx(want, rel=1e-6)
    unc = limits.run_limits(arr, tmp_path / "unc", options, noise=replace(settings, common_correlation="uncorrelated"),
                            progress=False)
    assert float(unc.galaxy_limits["strain_95"][k]) != pytest.approx(got, rel=1e-4, abs=0)


def test_importance_reweighted_bayes_factor_on_gaussians():
    """ln B_other − ln B from reweighting equals the closed form for Gaussian likelihoods under a wide
    flat prior: ∫exp(−θ²/2s²)dθ / ∫exp(−θ²/2)dθ = s (Gaussian integral, common practice), within
    4 of the stated errors; the importance ESS is n for identical models."""
    from cwsearch.inference.correlated_likelihood import reweighted_log_bayes_factor

    class Gauss:
        def __init__(self, width):
            self.width = width

        def batch(self, theta):
            return -0.5 * (theta[:, 0] / self.width) ** 2

    rng = np.random.default_rng(3)
    samples = rng.standard_normal((4000, 1))
    base = Gauss(1.0).batch(samples)
    same = reweighted_log_bayes_factor(2.0, samples, base, Gauss(1.0))
    assert same["log_bayes_factor"] == pytest.approx(2.0, rel=1e-12)
    assert same["importance_ess"] == pytest.approx(4000, rel=1e-9)
    other = reweighted_log_bayes_factor(2.0, samples, base, Gauss(0.8))
    assert abs(other["log_bayes_factor"] - (2.0 + np.log(0.8))) < 4 * other["error"]
    assert 0 < other["importance_ess"] < 4000


def test_followup_reports_both_backgrounds(tmp_path):
    """A short follow-up with a Hellings–Downs background: the Bayes factor meaning, the noise model
    and the side-by-side comparison (uncorrelated by reweighting, with its ESS) are in the summary.
    (Plumbing only: a short chain, no convergence claimed.)"""
    from cwsearch.physics.simulate import invented_array, simulated_array
    from cwsearch.stages.followup.stage import FollowupOptions, run_followup

    arr = simulated_array(invented_array(n_pulsars=4, years=8, seed=5, toas_per_pulsar=40, full_span=True), seed=6,
                          background_log10_amplitude=-14.0, background_components=5)
    settings = NoiseSettings(red_components=5, common_log10_amplitude=-14.0)
    options = FollowupOptions(frequency=1.2e-8, ra=110.0, dec=20.0, walkers=18, temperatures=2, max_iterations=40,
                              adapt_iterations=10, checkpoint_every=20, ess=50, earth_term_only=True, no_plots=True)
    summary = run_followup(arr, tmp_path, options, noise=settings, seed=1, progress=False).summary
    comparison = summary["background_comparison"]
    assert summary["noise_model"]["common_correlation"] == "hellings-downs"
    assert "Hellings-Downs correlated background alone" in summary["bayes_factor_meaning"]
    assert set(comparison["log_bayes_factor"]) == {"hellings-downs", "uncorrelated"}
    assert comparison["log_bayes_factor"]["hellings-downs"] == pytest.approx(summary["log_bayes_factor"], rel=1e-12)
    assert "importance reweighting" in comparison["method"]
    assert 0 < comparison["importance_effective_sample_size"] <= comparison["n_samples"]


def test_pair_correlations_are_unbiased_estimates_of_gamma(tmp_path):
    """ρ_ij estimates Γ_ij without bias when the data hold the modelled common process: E[ρ] = Γ
    (Hellings–Downs draws) and E[ρ] = 0 with variance σ² (uncorrelated draws: the exact noise-only
    variance of the bilinear statistic); 300 draws, 4 standard errors. The plot is written."""
    from cwsearch.data.plots import correlation_plot
    from cwsearch.physics.correlated import pair_correlations

    arr = _array(seed=3, n_pulsars=4, design=False, red=False)
    settings = replace(HD, common_log10_amplitude=-13.0)
    hd = array_noise(arr, settings)
    unc = array_noise(arr, replace(settings, common_correlation="uncorrelated"))
    rng = np.random.default_rng(12)
    n = 300
    def batch(noise):
        sims = [noise.simulate(rng) for _ in range(n)]
        return pair_correlations(arr, settings, residuals=[np.stack([s[p] for s in sims], 1) for p in range(len(arr))])

    rho_hd = batch(hd).rho
    pc = batch(unc)
    rho_unc, sig = pc.rho, pc.sigma
    want = pc.expected
    err = rho_hd.std(axis=0) / np.sqrt(n)
    assert np.all(np.abs(rho_hd.mean(axis=0) - want) < 4 * err)
    assert np.all(np.abs(rho_unc.mean(axis=0)) < 4 * sig / np.sqrt(n))
    ratio = rho_unc.var(axis=0) / sig**2
    assert np.all(np.abs(ratio - 1) < 4 * np.sqrt(2 / n) * 1.5)     # loose: var of a variance estimate
    out = correlation_plot(tmp_path / "hd.png", pair_correlations(arr, settings))
    assert out.stat().st_size > 1000



def test_fewer_common_components_same_model_in_both_engines():
    """K_common < K: the per-pulsar engine ('uncorrelated') and the array engine with an identity Γ
    give the same log-likelihood (two code paths, one covariance), and the Hellings–Downs engine
    matches the dense covariance built with K_common components (numpy.linalg.slogdet / solve)."""
    from cwsearch.physics.correlated import ArrayWeighting, common_components_needed

    arr = _array(seed=21)
    settings = replace(HD, common_components=3)
    unc = array_noise(arr, replace(settings, common_correlation="uncorrelated"))
    ident = ArrayWeighting(arr, SETTINGS, CommonProcess(LOG10_A, 13 / 3, 3, "uncorrelated"))
    assert unc.log_likelihood() == pytest.approx(ident.log_likelihood(), rel=1e-10)
    hd = array_noise(arr, settings)
    assert hd.weighting.n_fourier == 6
    dense = _Dense(arr, SETTINGS, hd.weighting.common, hd.weighting.correlation)
    data = dense.stack([p.residuals for p in arr])[:, 0]
    r = dense.g.T @ data
    want = -0.5 * r @ np.linalg.solve(dense.gcg, r) - 0.5 * np.linalg.slogdet(dense.gcg)[1] - 0.5 * r.size * np.log(
        2 * np.pi)
    assert hd.log_likelihood() == pytest.approx(want, rel=1e-8)
    k = common_components_needed(arr, settings, ratio=0.01)
    assert 1 <= k <= settings.red_components


def test_frequentist_limit_calibrated_in_data_with_a_correlated_background():
    """The frequentist limit of the correlated network, checked in the time domain: injections at its h95
    (random orientation, Earth term) into data that hold a Hellings–Downs background exceed the observed
    2Fe in 95 % of realisations; 2Fe ~ non-central χ²(4, ρ²) (Ellis, Siemens & Creighton 2012) with N, M of
    the correlated inner product; two-sided 99.9 % binomial interval (scipy.stats.binom)."""
    from cwsearch.inference.upper_limits import frequentist_limit
    from cwsearch.physics.simulate import Binary, invented_array, simulate_residuals

    arr = invented_array(n_pulsars=5, years=8, seed=3, toas_per_pulsar=50)
    log10_a, components = -13.8, 6
    settings = NoiseSettings(red_components=components, common_log10_amplitude=log10_a)
    noise = array_noise(arr, settings)
    assert noise.correlated
    frequency = np.array([2.5 / arr.span])         # inside the band of the background's components
    ra, dec = 1.0, 0.3
    rng = np.random.default_rng(17)

    def two_fe(residual_sets):
        batch = noise.projections(frequency, [np.column_stack(r) for r in zip(*residual_sets)])
        out = []
        for k in range(len(residual_sets)):
            proj = fstat.Projections(batch.frequencies, batch.x[k], batch.y[k], batch.z, batch.positions,
                                     batch.z_scale)
            fplus, fcross = fstat.sky_patterns(proj, np.array([ra]), np.array([dec]))
            nvec, mmat = noise.network(proj, fplus, fcross)
            out.append(float(nvec[0, 0] @ np.linalg.solve(mmat[0, 0], nvec[0, 0])))
        return np.array(out), mmat[0, 0]

    def background(binaries=()):
        return simulate_residuals(arr, seed=rng, background_log10_amplitude=log10_a,
                                  background_components=components, binaries=binaries)

    observed, mmat = two_fe([background(), background()])
    threshold = float(observed[0])
    h95 = frequentist_limit(np.zeros(4), mmat, float(frequency[0]), fe=threshold / 2)
    n_sims = 300
    sets = []
    for _ in range(n_sims):
        binary = Binary(ra=ra, dec=dec, gw_frequency=float(frequency[0]), chirp_mass=1e8, strain=h95,
                        inclination=float(np.arccos(rng.uniform(-1, 1))), polarization=rng.uniform(0, np.pi),
                        phase=rng.uniform(0, 2 * np.pi), evolution="monochromatic", pulsar_term=False)
        sets.append(background([binary]))
    values, _ = two_fe(sets)
    above = int(np.sum(values > threshold))
    lo, hi = scipy.stats.binom.interval(0.999, n_sims, 0.95)
    assert lo <= above <= hi, (above, n_sims)
