"""Noise-model fit: speed and recovery on invented arrays.

``python -m bench.noise`` fits (white per backend, per-pulsar red noise with
model choice, common process; :func:`cwsearch.inference.noisefit.fit_noise`) two
invented arrays and prints, for each:

* the fit time; targets: demo array (20 pulsars × 200 TOAs) ≤ 30 s, bench
  array (50 pulsars × 1000 TOAs, 30 red components, docs/design.md §12) ≤ 90 s
  on 2 cores;
* a reference measured in the same run: the time of one per-pulsar
  likelihood evaluation with gradient × the evaluations the fit used (the
  fit's overhead on top of its likelihood work; an upper bound, since many of
  the fit's evaluations reuse cached white-noise products and cost one k × k
  Cholesky, so the ratio can be below 1), and the time of one dense
  evaluation (``scipy.stats.multivariate_normal.logpdf`` of the
  G-projected covariance, built per call) on one pulsar, as the cost the
  Woodbury path avoids;
* recovery: fraction of backends whose fitted ``sigma_scale`` is within 5 % of
  the truth and within 2 stated errors, fraction whose effective white level
  (rms of σ_eff over the backend) is within 5 %; fraction of red-noise
  pulsars whose fitted red log10 amplitude is within 2 of its own errors;
  fraction of pulsars without red noise for which none is claimed.

The arrays carry wrong quoted errors (``simulate.wrong_white_noise``: true
scale 0.8–1.6, added up to half the quoted error per backend), red noise in
half of the pulsars (log10 A in −14.6…−13.8, γ in 2…5, as
``invented_array``) and a Hellings–Downs-correlated background
(log10 A = −14.6, γ = 13/3). The noise *stage* is timed as a run executes it by default: plots,
likelihood contour and upper limits included, the common process fitted Hellings–Downs correlated with
its index fixed at 13/3.
The machine's load average is printed: it is shared with other processes,
which slow every figure alike. ``--quick`` fits the demo array only.
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np


def _array(n_pulsars, toas, seed):
    from cwsearch.physics.simulate import invented_array, simulate_residuals, wrong_white_noise

    base = invented_array(n_pulsars=n_pulsars, years=15.0, seed=seed, toas_per_pulsar=toas,
                          red_noise_fraction=0.5, full_span=True)
    truth = wrong_white_noise(base, seed=seed + 1)
    res = simulate_residuals(base, seed=seed + 2, true_white=truth, background_log10_amplitude=-14.6,
                             background_index=13 / 3, background_components=30)
    return base.with_residuals(res), truth


def _reference_times(array, red_components, repeats=20):
    from cwsearch.inference.noisefit import _small_matrix_threads

    with _small_matrix_threads():             # the same BLAS threading as the fit
        return _reference_times_inner(array, red_components, repeats)


def _reference_times_inner(array, red_components, repeats):
    from scipy import stats

    from cwsearch.physics.noise import PulsarLikelihood, powerlaw_variance

    p = array[0]
    lk = PulsarLikelihood(p, array.start, array.span, red_components)
    phi = np.repeat(powerlaw_variance(lk.frequencies, -14.0, 3.5, array.span), 2)
    rng = np.random.default_rng(0)
    t = time.perf_counter()
    for _ in range(repeats):
        nvar = p.sigmas**2 * rng.uniform(0.9, 1.1)          # new white variances every call
        lk.evaluate(nvar, phi, white_gradient=True, fourier_gradient=True)
    woodbury = (time.perf_counter() - t) / repeats
    # dense: C = N + F φ Fᵀ, G from the SVD of the design matrix, logpdf of Gᵀr
    from cwsearch.physics.noise import fourier_basis

    f = fourier_basis(p.toas, array.start, array.span, red_components)
    u_, _, _ = np.linalg.svd(p.design_matrix, full_matrices=True)
    g = u_[:, p.design_matrix.shape[1]:]
    t = time.perf_counter()
    dense_repeats = 3
    for _ in range(dense_repeats):
        cov = np.diag(p.sigmas**2) + (f * phi) @ f.T
        stats.multivariate_normal.logpdf(g.T @ p.residuals, cov=g.T @ cov @ g)
    dense = (time.perf_counter() - t) / dense_repeats
    return woodbury, dense


def _recovery(array, truth, fit):
    scale_5 = scale_2s = level_5 = n_back = 0
    red_ok = n_red = white_ok = n_white = 0
    for p, f in zip(array, fit.pulsars):
        for b, name in enumerate(p.backend_names):
            t = truth[p.name][name]
            sel = p.backend_index == b
            n_back += 1
            scale_5 += abs(f.sigma_scale[name] / t["sigma_scale"] - 1) < 0.05
            scale_2s += abs(f.sigma_scale[name] - t["sigma_scale"]) < 2 * f.sigma_scale_err[name]
            true_level = np.sqrt(np.mean((t["sigma_scale"] * p.sigmas[sel]) ** 2 + t["sigma_added"] ** 2))
            fit_level = np.sqrt(np.mean((f.sigma_scale[name] * p.sigmas[sel]) ** 2 + f.sigma_added[name] ** 2))
            level_5 += abs(fit_level / true_level - 1) < 0.05
        if p.noise.has_red_noise:
            n_red += 1
            red_ok += f.red_log10_amplitude_low <= p.noise.red_log10_amplitude <= f.red_log10_amplitude_high
        else:
            n_white += 1
            white_ok += not f.red_noise
    return {"scale within 5%": scale_5 / n_back, "scale within 2 errors": scale_2s / n_back,
            "white level within 5%": level_5 / n_back,
            "red log10 A in its 2-sigma interval": red_ok / max(n_red, 1),
            "no red claimed (white pulsars)": white_ok / max(n_white, 1),
            "_counts": (n_back, n_red, n_white)}


def run(label, n_pulsars, toas, seed, target):
    """The noise *stage* as a run executes it by default (plots, contour and upper limits included; common
    process Hellings–Downs correlated, index fixed at 13/3), timed in wall and CPU seconds."""
    import tempfile

    from cwsearch.inference.noisefit import NoiseFitWarning
    from cwsearch.physics.noise import NoiseSettings
    from cwsearch.stages.noise.stage import NoiseOptions, run_noise

    array, truth = _array(n_pulsars, toas, seed)
    noise = NoiseSettings(red_components=30)
    with warnings.catch_warnings(record=True) as caught, tempfile.TemporaryDirectory() as run_dir:
        warnings.simplefilter("always", NoiseFitWarning)
        t, cpu = time.perf_counter(), time.process_time()
        result = run_noise(array, run_dir, NoiseOptions(), noise=noise, seed=seed, progress=False,
                           correlation="hellings-downs")
        elapsed, cpu = time.perf_counter() - t, time.process_time() - cpu
    fit = result.fit

    class settings:                      # the reference below needs only the number of red components
        red_components = noise.red_components

    woodbury, dense = _reference_times(array, settings.red_components)
    rec = _recovery(array, truth, fit)
    n_back, n_red, n_white = rec.pop("_counts")
    print(f"\n{label}: {n_pulsars} pulsars x {toas} TOAs, 30 red components")
    print(f"  stage time                    {elapsed:8.1f} s wall, {cpu:.1f} s CPU of this process "
          f"(target <= {target} s on 2 cores; load average now {os.getloadavg()[0]:.1f})")
    print(f"  likelihood evaluations        {fit.evaluations:8d}   (per-pulsar or array)")
    lower = fit.evaluations * woodbury
    print(f"  reference: 1 evaluation x evaluations = {lower:.1f} s (one eval {woodbury * 1e3:.2f} ms); "
          f"fit / reference = {elapsed / lower:.2f}")
    print(f"  dense reference: one logpdf on one pulsar {dense * 1e3:.1f} ms = {dense / woodbury:.0f}x a Woodbury "
          f"evaluation; the fit done densely would take ~{fit.evaluations * dense:.0f} s")
    c = fit.common
    print(f"  common process: log10 A = {c.log10_amplitude:.2f} +- {c.log10_amplitude_err:.2f}, "
          f"gamma = {c.index:.2f} +- {c.index_err:.2f} (injected -14.60, 4.33, HD-correlated), "
          f"2dlnL = {c.statistic:.1f}, 95% limit log10 A = {c.log10_amplitude_95:.2f}")
    print(f"  recovery ({n_back} backends, {n_red} red pulsars, {n_white} white pulsars):")
    for k, v in rec.items():
        print(f"    {k:32s} {100 * v:5.1f} %")
    claimed = sum(f.red_noise for f in fit.pulsars)
    flagged = sum(f.gof.flagged for f in fit.pulsars)
    print(f"  red noise claimed in {claimed} pulsars; checks flag {flagged} pulsars; array low-frequency "
          f"p = {fit.array_check.pvalue:.3g}; not converged: {sum(not f.converged for f in fit.pulsars)}; "
          f"warnings: {len(caught)}")
    return elapsed


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="demo array only")
    args = parser.parse_args(argv)
    print(f"load average before: {os.getloadavg()[0]:.2f} (2 cores, shared)")
    run("demo array", 20, 200, 7, 30)
    if not args.quick:
        run("bench array", 50, 1000, 2026, 90)
    print(f"\nload average after: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
