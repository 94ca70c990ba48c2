"""Statistical calibration of the scan, the follow-up posterior and the upper limits.

``python -m bench.calibration`` prints measured figures (not a test). It works
on the bundled invented demo array (``cwsearch/data/demo``) with its
residuals replaced by simulations from :func:`cwsearch.physics.simulate.simulate_residuals`
(same TOAs, sigmas and noise model), and checks three promises:

1. **Scan false-alarm probability.** ``--scan-sims`` (default 200) noise-only
   scans on the demo scan grid (nside 8, oversample 2, up to 1e-7 Hz, as
   ``cwsearch demo``). For each, the best candidate (maximum Fe over
   sky × frequency) gets an *empirical* FAP from an independent reference
   set of ``--null-sims`` (default 1000) noise-only scans, ``(1+k)/(1+N)``,
   and the *analytic* FAP ``1 − (1 − (1+F)e^−F)^N_eff`` of :mod:`cwsearch.stages.scan.stage`.
   For p = 0.01, 0.05, 0.1, 0.5 it prints the fraction of scans with FAP < p
   and the binomial error ``sqrt(p(1−p)/n)`` (a calibrated FAP is uniform
   in noise: the fraction equals p). The analytic FAP's bias is the
   difference from p.
2. **Posterior coverage** (``--posterior-injections``, default 50): injections
   drawn from the sampling prior, each followed up with the tempered sampler
   (:mod:`cwsearch.inference.sampling`, with the follow-up stage's default walkers,
   temperature ladder and adaptation, walkers started from the prior, ESS
   target 300, ``--sampler-seconds`` cap) on the fast likelihood
   (:mod:`cwsearch.inference.likelihood`); the credible level of the true value
   (fraction of posterior samples below it) must be uniform: P–P plot for
   frequency, sky position (credible level of the sky region more probable
   than the truth, by a kernel estimate) and strain, KS test against the
   uniform distribution (``scipy.stats.kstest``). Plot:
   ``bench/output/pp_plot.png``.
3. **Upper-limit coverage** (``--limit-cases``, default 200), at one GW
   frequency and random sky positions, Earth-term monochromatic injections
   (the limits' model) with random orientation:
   (a) Bayesian: strain drawn from a uniform prior on [0, h_max]; the
   posterior credible level of the true strain under that prior is uniform
   (KS test), the fraction with level ≤ 0.95 is 0.95, and the fraction
   with the tool's h95 (uniform prior on h0 ≥ 0) above the truth is printed;
   (b) weak injection (strain = half the median noise-only h95): fraction
   of cases with h95 above the injected strain (issue 5 asks "about 95 %");
   (c) frequentist: signals of strain equal to the frequentist h95 of an
   observed value, random orientation: the fraction with 2Fe above the
   observed 2Fe must be ≥ 0.95 within binomial error.

``--realistic`` runs :mod:`bench.realistic` instead: the scan FAP on invented arrays with wrong quoted
errors, red noise in half the pulsars and a Hellings–Downs background, with the default noise model
(estimated by the noise stage); its options follow ``--realistic``.

Quick run: ``python -m bench.calibration --scan-sims 20 --null-sims 50
--posterior-injections 0 --limit-cases 40``.

References: 2Fe ~ χ²(4) in noise and non-central χ²(4, ρ²) with a signal
(Ellis, Siemens & Creighton 2012, ApJ 756, 175); coverage of Bayesian
credible intervals for truths drawn from the prior and the P–P test
(Cook, Gelman & Rubin 2006, J. Comput. Graph. Stat. 15, 675 — from memory);
binomial standard error (common practice, no source).
"""

from __future__ import annotations

import argparse
import json
import math
import time
from pathlib import Path

import numpy as np

DEMO = Path(__file__).resolve().parents[1] / "cwsearch" / "data" / "demo"
OUTPUT = Path(__file__).resolve().parent / "output"
LEVELS = (0.01, 0.05, 0.1, 0.5)
#: the scan grid of ``cwsearch demo`` (cwsearch/commands/demo.py)
DEMO_SCAN = {"nside": 8, "oversample": 2, "fmax": 1.0e-7}


def demo_array():
    from cwsearch.data.dataset import read_dataset

    return read_dataset(DEMO)


def _binomial(fraction, p, n):
    err = math.sqrt(p * (1 - p) / n)
    return err, (fraction - p) / err


# ------------------------------------------------------------------ scan FAP
def scan_calibration(n_sims=200, n_null=1000, seed=1, progress=True):
    from cwsearch.physics import fstat
    from cwsearch.stages.scan import stage as scan
    from cwsearch.physics.noise import NoiseSettings, NoiseWeighting

    array = demo_array()
    noise = NoiseSettings()
    engine = NoiseWeighting(array, noise)
    frequencies = scan.frequency_grid(array, None, DEMO_SCAN["fmax"], DEMO_SCAN["oversample"])
    _, _, fplus, fcross = scan.sky_grid(array, DEMO_SCAN["nside"])
    proj = fstat.project(engine, frequencies)
    root = np.random.SeedSequence(seed)
    sky_seed, trial_seed, null_seed = root.spawn(3)
    # the scan's own look-elsewhere correction (cwsearch.stages.scan.stage.Trials: N_eff(F) = N_freq x N_sky(F))
    trials = scan.Trials(frequencies.size, scan.effective_sky_templates(proj, fplus, fcross, sky_seed))

    t0 = time.time()
    trial_fe, _ = scan.null_maxima(array, engine, noise, frequencies, fplus, fcross, n_sims, trial_seed,
                                   progress=progress)
    null_fe, _ = scan.null_maxima(array, engine, noise, frequencies, fplus, fcross, n_null, null_seed,
                                  progress=progress)
    seconds = time.time() - t0
    fap_emp = scan.empirical_fap(trial_fe, null_fe)
    fap_ana = trials.fe_fap(trial_fe)
    n_sky_eff = float(trials.sky.n_sky(np.median(null_fe)))
    n_eff = float(trials.n_eff(np.median(null_fe)))
    from scipy import stats

    rows = []
    for p in LEVELS:
        # binomial error of the fraction, plus the spread of the reference set's own quantile
        err = math.sqrt(p * (1 - p) / n_sims + p * (1 - p) / n_null)
        fe_, fa_ = float(np.mean(fap_emp < p)), float(np.mean(fap_ana < p))
        rows.append({"p": p, "empirical_fraction": fe_, "analytic_fraction": fa_, "binomial_error": err,
                     "empirical_z": (fe_ - p) / err, "analytic_z": (fa_ - p) / err,
                     "analytic_bias": fa_ - p})
    # the analytic FAP's bias seen from the larger reference set as well
    fap_ana_null = trials.fe_fap(null_fe)
    ref = [{"p": p, "analytic_fraction": float(np.mean(fap_ana_null < p)),
            "binomial_error": math.sqrt(p * (1 - p) / n_null)} for p in LEVELS]
    return {"n_scans": n_sims, "n_reference_null_scans": n_null, "n_frequencies": int(frequencies.size),
            "n_pixels": int(fplus.shape[0]), "n_sky_eff": n_sky_eff, "n_eff": n_eff,
            "n_eff_fitted_from_null": _fitted_n_eff(null_fe), "rows": rows,
            "analytic_on_reference_set": ref, "seconds": seconds,
            "ks_2samp_pvalue_trial_vs_reference": float(stats.ks_2samp(trial_fe, null_fe).pvalue),
            "trial_max_fe": trial_fe.tolist(), "reference_max_fe": null_fe.tolist()}


def _fitted_n_eff(null_max_fe):
    """N for which 1 - (1 - (1+F)e^-F)^N puts the median null maximum at probability 1/2."""
    from cwsearch.stages.scan import stage as scan

    single = float(scan.fe_single_fap(np.median(null_max_fe)))
    return float(np.log(0.5) / np.log1p(-single)) if 0 < single < 1 else float("nan")


def print_scan(res):
    print(f"\n== Scan false-alarm calibration: {res['n_scans']} noise-only scans of the demo array "
          f"({res['n_frequencies']} frequencies x {res['n_pixels']} pixels); empirical FAP from "
          f"{res['n_reference_null_scans']} independent null scans; {res['seconds']:.0f} s")
    print(f"   analytic N_eff at the median null maximum = {res['n_eff']:.0f} (N_sky = {res['n_sky_eff']:.1f}); "
          f"N_eff fitted to the null maxima = {res['n_eff_fitted_from_null']:.0f}")
    print(f"   two-sample KS p-value, calibration vs reference maxima (same distribution expected): "
          f"{res['ks_2samp_pvalue_trial_vs_reference']:.3f}")
    print("   error = sqrt(p(1-p)/n_scans + p(1-p)/n_reference) (binomial, plus the reference quantile's spread)")
    print("      p   frac(FAP_emp<p)   frac(FAP_analytic<p)   binomial err   z_emp   z_analytic   analytic bias")
    for r in res["rows"]:
        print(f"   {r['p']:5.2f}   {r['empirical_fraction']:14.3f}   {r['analytic_fraction']:19.3f}   "
              f"{r['binomial_error']:12.3f}   {r['empirical_z']:+5.2f}   {r['analytic_z']:+10.2f}   "
              f"{r['analytic_bias']:+12.3f}")
    print("   analytic FAP on the reference null set: " + ", ".join(
        f"p={r['p']:g}: {r['analytic_fraction']:.3f}±{r['binomial_error']:.3f}" for r in res["analytic_on_reference_set"]))


# ------------------------------------------------------------------ upper limits
def _earth_binary(rng, ra, dec, frequency, strain):
    from cwsearch.physics.simulate import Binary

    return Binary(ra=ra, dec=dec, gw_frequency=frequency, chirp_mass=1e8, strain=strain,
                  inclination=float(np.arccos(rng.uniform(-1, 1))), polarization=float(rng.uniform(0, np.pi)),
                  phase=float(rng.uniform(0, 2 * np.pi)), evolution="monochromatic", pulsar_term=False)


def _random_sky(rng):
    return float(rng.uniform(0, 2 * np.pi)), float(np.arcsin(rng.uniform(-1, 1)))


def _vectors(engine, frequency, residual_sets, skies):
    """N (4,) and M (4, 4) for each residual set at its own sky position (one batched projection)."""
    from cwsearch.physics import fstat

    n_psr = len(residual_sets[0])
    sets = [np.stack([res[p] for res in residual_sets], axis=1) for p in range(n_psr)]
    batch = fstat.project_batch(engine, np.array([frequency]), sets)
    out = []
    for b, (ra, dec) in enumerate(skies):
        proj = fstat.Projections(batch.frequencies, batch.x[b], batch.y[b], batch.z, batch.positions,
                                 batch.z_scale)
        fplus, fcross = fstat.sky_patterns(proj, ra, dec)
        nvec, mmat = fstat.network_vectors(proj, fplus, fcross)
        out.append((nvec[0, 0], mmat[0, 0]))
    return out


def _cases(array, engine, frequency, rng, n, make, chunk=50):
    """Run ``n`` simulated cases in chunks: ``make(rng) -> (ra, dec, binary or None, info)``.

    Yields ``(nvec, mmat, info)`` per case.
    """
    from cwsearch.physics.simulate import simulate_residuals

    for start in range(0, n, chunk):
        specs = [make(rng) for _ in range(min(chunk, n - start))]
        residual_sets = [simulate_residuals(array, rng, binaries=() if b is None else (b,)) for _, _, b, _ in specs]
        vectors = _vectors(engine, frequency, residual_sets, [(ra, dec) for ra, dec, _, _ in specs])
        for (nvec, mmat), spec in zip(vectors, specs):
            yield nvec, mmat, spec[3]


def limit_calibration(n_cases=200, frequency=1.0e-8, seed=2, progress=True):
    from scipy import stats

    from cwsearch.stages.limits import stage as limits
    from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
    from cwsearch.core.progress import progress as bar
    array = demo_array()
    noise = NoiseSettings()
    engine = NoiseWeighting(array, noise)
    root = np.random.SeedSequence(seed)
    scale_seed, bayes_seed, weak_seed, freq_seed = root.spawn(4)
    t0 = time.time()

    # noise-only h95 scale at this frequency (median over random skies)
    rng = np.random.default_rng(scale_seed)

    def noise_case(rng):
        ra, dec = _random_sky(rng)
        return ra, dec, None, None

    scale = [limits.bayesian_limit(n, m, frequency) for n, m, _ in _cases(array, engine, frequency, rng, 20, noise_case)]
    h_noise = float(np.median(scale))
    h_max = 3.0 * h_noise

    # (a) Bayesian, truth from a uniform prior on [0, h_max]
    def prior_case(rng):
        ra, dec = _random_sky(rng)
        strain = float(rng.uniform(0, h_max))
        return ra, dec, _earth_binary(rng, ra, dec, frequency, strain), strain

    rng = np.random.default_rng(bayes_seed)
    levels, above = [], []
    with bar(total=n_cases, desc="limits: prior draws", enabled=progress) as pb:
        for n, m, strain in _cases(array, engine, frequency, rng, n_cases, prior_case):
            cdf_true, cdf_max = limits.posterior_cdf(n, m, frequency, np.array([strain, h_max]))
            levels.append(float(cdf_true / cdf_max))
            above.append(limits.bayesian_limit(n, m, frequency) >= strain)
            pb.update(1)
    levels = np.array(levels)
    ks = stats.kstest(levels, "uniform")

    # (b) weak injection at half the noise-only median h95
    weak = 0.5 * h_noise

    def weak_case(rng):
        ra, dec = _random_sky(rng)
        return ra, dec, _earth_binary(rng, ra, dec, frequency, weak), None

    rng = np.random.default_rng(weak_seed)
    weak_above = []
    with bar(total=n_cases, desc="limits: weak injections", enabled=progress) as pb:
        for n, m, _ in _cases(array, engine, frequency, rng, n_cases, weak_case):
            weak_above.append(limits.bayesian_limit(n, m, frequency) >= weak)
            pb.update(1)

    # (c) frequentist: observed 2Fe = the median of chi2(4) (a typical noise-only value; scipy.stats),
    # inject at the frequentist h95 for that value at a fixed pixel, count 2Fe >= observed
    rng = np.random.default_rng(freq_seed)
    ra, dec = _random_sky(rng)
    two_fe_obs = float(stats.chi2(4).median())
    (_, m_obs, _), = _cases(array, engine, frequency, rng, 1, lambda r: (ra, dec, None, None))
    h_freq = limits.frequentist_limit(np.zeros(4), m_obs, frequency, fe=two_fe_obs / 2)

    def freq_case(rng):
        return ra, dec, _earth_binary(rng, ra, dec, frequency, h_freq), None

    detected = []
    with bar(total=n_cases, desc="limits: frequentist", enabled=progress) as pb:
        for n, m, _ in _cases(array, engine, frequency, rng, n_cases, freq_case):
            two_fe = float(n @ np.linalg.pinv(m) @ n)
            detected.append(two_fe >= two_fe_obs)
            pb.update(1)
    return {"n_cases": n_cases, "frequency": frequency, "h95_noise_median": h_noise, "h_max": h_max,
            "bayes_level_le_095": float(np.mean(levels <= 0.95)), "bayes_ks_pvalue": float(ks.pvalue),
            "bayes_h95_above_truth_prior_draws": float(np.mean(above)),
            "weak_strain": weak, "weak_h95_above_truth": float(np.mean(weak_above)),
            "frequentist_strain": h_freq, "frequentist_observed_2fe": two_fe_obs,
            "frequentist_detected": float(np.mean(detected)),
            "binomial_error_095": math.sqrt(0.95 * 0.05 / n_cases), "levels": levels.tolist(),
            "seconds": time.time() - t0}


def print_limits(res):
    e = res["binomial_error_095"]
    print(f"\n== Upper-limit coverage: {res['n_cases']} cases per test at f = {res['frequency']:.3g} Hz, random sky, "
          f"Earth-term injections with random orientation; {res['seconds']:.0f} s")
    print(f"   noise-only median h95 = {res['h95_noise_median']:.3g}; prior draws uniform in [0, {res['h_max']:.3g}]")
    print(f"   (a) Bayesian, truth from the prior: fraction with credible level <= 0.95 = "
          f"{res['bayes_level_le_095']:.3f} (expect 0.95 ± {e:.3f}); KS p-value of levels vs uniform = "
          f"{res['bayes_ks_pvalue']:.3f}; h95 (prior h0 >= 0) above truth: {res['bayes_h95_above_truth_prior_draws']:.3f}")
    print(f"   (b) weak injection h0 = {res['weak_strain']:.3g}: h95 above it in {res['weak_h95_above_truth']:.3f} of cases")
    print(f"   (c) frequentist: injected h0 = h95_freq = {res['frequentist_strain']:.3g} (observed 2Fe = "
          f"{res['frequentist_observed_2fe']:.2f}); 2Fe above observed in {res['frequentist_detected']:.3f} "
          f"(expect >= 0.95 - {e:.3f})")


# ------------------------------------------------------------------ posterior coverage
#: prior of the coverage test in sampler coordinates (ra, sin dec, log10 f, log10 Mc, log10 h0, cos i, psi, phi0):
#: the follow-up prior (cwsearch.stages.followup.stage.Prior) with the frequency limited to a window of +-5 bins of
#: 1/T_span around 2.5e-8 Hz (the follow-up's own window) and the strain to the decade where the demo array
#: goes from blind to clear detection, so that the test covers the regime a scientist meets
POSTERIOR_WINDOW_HZ = 2.5e-8
POSTERIOR_LOG10_STRAIN = (-14.7, -13.7)


def _sky_level(sample_ra, sample_dec, ra, dec, max_samples=2000):
    """Credible level of the true sky position: the fraction of posterior samples where the posterior
    density is higher than at the truth. Density by a Fisher (von Mises-Fisher) kernel on the sphere,
    bandwidth from the samples' angular spread with a Scott-like n^(-1/6) factor, kept in [2, 20] deg
    (common practice, no source)."""
    from cwsearch.physics import sky

    if sample_ra.size > max_samples:
        pick = np.linspace(0, sample_ra.size - 1, max_samples).round().astype(int)
        sample_ra, sample_dec = sample_ra[pick], sample_dec[pick]
    vec = sky.unit_vectors(sample_ra, sample_dec)            # (N, 3)
    truth = sky.unit_vectors(ra, dec)                        # (3,)
    mean = vec.mean(axis=0)
    mean /= np.linalg.norm(mean) or 1.0
    spread = np.sqrt(np.mean(np.arccos(np.clip(vec @ mean, -1, 1)) ** 2) / 2)
    sigma = float(np.clip(spread * vec.shape[0] ** (-1 / 6), np.radians(2), np.radians(20)))
    kappa = 1.0 / sigma**2
    kernel = np.exp(kappa * (vec @ vec.T - 1))
    density = (kernel.sum(axis=1) - 1.0) / (vec.shape[0] - 1)  # leave-one-out: a sample does not count itself
    at_truth = np.exp(kappa * (vec @ truth - 1)).mean()
    return float(np.mean(density > at_truth))


def posterior_calibration(n_injections=50, seed=3, *, ess=300.0, walkers=None, temperatures=None, progress=True,
                          max_time=90.0, partial=None):
    """P-P test of the follow-up posterior (see the module docstring).

    The sampler runs with the follow-up stage's own ladder and adaptation (walkers, temperatures,
    maximum temperature and adaptation iterations of :class:`cwsearch.stages.followup.stage.FollowupOptions`,
    unless ``walkers``/``temperatures`` are given), so the test calibrates what a user runs.
    """
    from scipy import stats

    from cwsearch.stages.followup import stage as followup
    from cwsearch.inference import sampling
    from cwsearch.inference.likelihood import Likelihood
    from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
    from cwsearch.physics.simulate import Binary, simulate_residuals

    defaults = followup.FollowupOptions()
    walkers = defaults.walkers if walkers is None else walkers
    temperatures = defaults.temperatures if temperatures is None else temperatures
    array = demo_array()
    noise = NoiseSettings()
    engine = NoiseWeighting(array, noise)
    span = array.span
    band = (np.log10(POSTERIOR_WINDOW_HZ - 5 / span), np.log10(POSTERIOR_WINDOW_HZ + 5 / span))
    root = np.random.SeedSequence(seed)
    levels = {"frequency": [], "sky": [], "strain": []}
    diagnostics = []
    t0 = time.time()
    for i, child in enumerate(root.spawn(n_injections)):
        draw_seq, sim_seq, init_seq, run_seq = child.spawn(4)
        like_template = Likelihood(array, engine)
        prior = followup.Prior(like_template, band)
        prior.lower[4], prior.upper[4] = POSTERIOR_LOG10_STRAIN
        truth = prior.draw(np.random.default_rng(draw_seq), 1)[0]
        ra, dec = float(truth[0]), float(np.arcsin(truth[1]))
        binary = Binary(ra=ra, dec=dec, gw_frequency=10 ** truth[2], chirp_mass=10 ** truth[3],
                        strain=10 ** truth[4], inclination=float(np.arccos(truth[5])), polarization=float(truth[6]),
                        phase=float(truth[7]))
        data = array.with_residuals(simulate_residuals(array, np.random.default_rng(sim_seq), binaries=(binary,)))
        likelihood = Likelihood(data, noise)
        prior = followup.Prior(likelihood, band)
        prior.lower[4], prior.upper[4] = POSTERIOR_LOG10_STRAIN
        settings = sampling.SamplerSettings(walkers=walkers, temperatures=temperatures, ess=ess, max_time=max_time,
                                            max_temperature=defaults.max_temperature, max_iterations=20000,
                                            adapt_iterations=defaults.adapt_iterations)
        initial = prior.draw(np.random.default_rng(init_seq), walkers * temperatures).reshape(temperatures, walkers, 8)
        result = sampling.run_sampler(prior, likelihood.batch, initial, settings, seed=run_seq, progress=False)
        samples = result.samples()
        levels["frequency"].append(float(np.mean(samples[:, 2] < truth[2])))
        levels["strain"].append(float(np.mean(samples[:, 4] < truth[4])))
        levels["sky"].append(_sky_level(samples[:, 0], np.arcsin(samples[:, 1]), ra, dec))
        # a chain whose best point stays well below the truth's likelihood never found the main mode
        diagnostics.append({"ess": float(result.ess), "iterations": int(result.iterations),
                            "stopped_by": result.stopped_by, "seconds": float(result.wall_time),
                            "max_log_likelihood": float(result.log_likelihood.max()),
                            "truth_log_likelihood": float(likelihood.batch(truth[None])[0])})
        if partial is not None:  # figures so far, in case a long run is stopped
            Path(partial).parent.mkdir(parents=True, exist_ok=True)
            Path(partial).write_text(json.dumps({"levels": levels, "diagnostics": diagnostics}))
        if progress:
            print(f"   injection {i + 1}/{n_injections}: log10 h0 = {truth[4]:.2f}, ESS = {result.ess:.0f}, "
                  f"{result.wall_time:.0f} s, levels f/sky/h0 = {levels['frequency'][-1]:.2f}/"
                  f"{levels['sky'][-1]:.2f}/{levels['strain'][-1]:.2f}", flush=True)
    ks = {k: float(stats.kstest(v, "uniform").pvalue) for k, v in levels.items()}
    plot = OUTPUT / "pp_plot.png"
    _pp_plot(levels, ks, plot)
    return {"n_injections": n_injections, "levels": levels, "ks_pvalues": ks, "plot": str(plot),
            "diagnostics": diagnostics, "band_hz": [10 ** band[0], 10 ** band[1]],
            "log10_strain_range": list(POSTERIOR_LOG10_STRAIN), "seconds": time.time() - t0,
            "ess_target": ess, "stopped_by_time": sum(d["stopped_by"] != "ess" for d in diagnostics),
            "below_truth": sum(d["max_log_likelihood"] < d["truth_log_likelihood"] - 2.0 for d in diagnostics)}


def _pp_plot(levels, ks, path):
    from scipy import stats

    from cwsearch.core.plotting import pyplot, save_figure

    plt = pyplot()
    fig, ax = plt.subplots(figsize=(5, 5))
    n = len(next(iter(levels.values())))
    grid = np.linspace(0, 1, 201)
    # 95 % band of the empirical CDF of n uniform draws (binomial quantiles; scipy.stats)
    lo = stats.binom.ppf(0.025, n, grid) / n
    hi = stats.binom.ppf(0.975, n, grid) / n
    ax.fill_between(grid, lo, hi, color="0.85", label="95 % band for n draws")
    for name, values in levels.items():
        x = np.sort(values)
        ax.step(np.concatenate([[0], x, [1]]), np.concatenate([[0], np.arange(1, n + 1) / n, [1]]), where="post",
                label=f"{name} (KS p = {ks[name]:.2f})")
    ax.plot([0, 1], [0, 1], "k--", lw=0.8)
    ax.set_xlabel("credible level of the true value")
    ax.set_ylabel("fraction of injections")
    ax.set_title(f"Follow-up posterior P-P plot, {n} injections")
    ax.legend(loc="upper left", fontsize=8)
    path.parent.mkdir(parents=True, exist_ok=True)
    save_figure(fig, path)


def print_posterior(res):
    print(f"\n== Posterior coverage: {res['n_injections']} injections drawn from the prior (f in "
          f"{res['band_hz'][0]:.3g}-{res['band_hz'][1]:.3g} Hz, log10 h0 in {res['log10_strain_range']}); "
          f"{res['seconds']:.0f} s; {res['stopped_by_time']} runs stopped before the ESS target {res['ess_target']:g}")
    print(f"   runs whose best log-likelihood stayed > 2 below the truth's (main mode not found): "
          f"{res.get('below_truth', 'n/a')}")
    for name, p in res["ks_pvalues"].items():
        v = np.array(res["levels"][name])
        print(f"   {name:9s}: KS p-value vs uniform = {p:.3f}; fraction of truths inside the 90 % central "
              f"interval = {np.mean((v > 0.05) & (v < 0.95)):.2f}" if name != "sky" else
              f"   {name:9s}: KS p-value vs uniform = {p:.3f}; truth inside the 90 % credible region in "
              f"{np.mean(v < 0.9):.2f} of injections")
    print(f"   P-P plot: {res['plot']}")


# ------------------------------------------------------------------ main
def main(argv=None):
    import sys

    argv = list(sys.argv[1:] if argv is None else argv)
    if "--realistic" in argv:   # realistic noise, default noise model (estimate): bench/realistic.py
        from . import realistic

        return realistic.main([a for a in argv if a != "--realistic"])
    parser = argparse.ArgumentParser(prog="python -m bench.calibration", description=__doc__.split("\n\n")[0])
    parser.add_argument("--scan-sims", type=int, default=200, help="noise-only scans to calibrate (default 200)")
    parser.add_argument("--null-sims", type=int, default=1000,
                        help="independent null scans for the empirical FAP (default 1000)")
    parser.add_argument("--posterior-injections", type=int, default=50, help="injections for the P-P test (default 50)")
    parser.add_argument("--sampler-seconds", type=float, default=90.0,
                        help="time cap per follow-up run in the posterior test (default 90)")
    parser.add_argument("--limit-cases", type=int, default=200, help="cases per upper-limit test (default 200)")
    parser.add_argument("--only", choices=("scan", "posterior", "limits"), action="append",
                        help="run only these parts (repeatable)")
    parser.add_argument("--seed", type=int, default=2026)
    parser.add_argument("--quiet", action="store_true", help="no progress bars")
    parser.add_argument("--json", default=None, help="also write all figures to this JSON file")
    args = parser.parse_args(argv)
    parts = args.only or ["scan", "limits", "posterior"]
    progress = not args.quiet
    seeds = np.random.SeedSequence(args.seed).generate_state(3)
    out = {}
    if "scan" in parts and args.scan_sims > 0:
        out["scan"] = scan_calibration(args.scan_sims, args.null_sims, int(seeds[0]), progress)
        print_scan(out["scan"])
    if "limits" in parts and args.limit_cases > 0:
        out["limits"] = limit_calibration(args.limit_cases, seed=int(seeds[1]), progress=progress)
        print_limits(out["limits"])
    if "posterior" in parts and args.posterior_injections > 0:
        out["posterior"] = posterior_calibration(args.posterior_injections, int(seeds[2]), progress=progress,
                                                 max_time=args.sampler_seconds,
                                                 partial=OUTPUT / "posterior_partial.json")
        print_posterior(out["posterior"])
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(json.dumps(out, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
