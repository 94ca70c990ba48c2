"""Coverage of the follow-up posterior on invented injections: ``python -m bench.coverage``.

Prints measured figures (not a test). For each injection ``i`` (seeded from
``--seed`` and ``i`` only, so runs can be split, stopped and resumed):

* an invented array (``--pulsars`` pulsars, 12 years, ``--toas`` TOAs each,
  white noise only) — the same array for every injection;
* the truth drawn from the follow-up's own prior
  (:class:`cwsearch.stages.followup.stage.Prior`: isotropic sky, log-uniform frequency in
  the ±``frequency_window`` window of 1/T_span bins around ``--frequency``,
  log-uniform chirp mass excluding binaries that merge within the data,
  uniform cos ι, ψ, Φ0), then the strain set so that the optimal SNR
  ``sqrt((s|s))`` is log-uniform in [``--snr-min``, ``--snr-max``] (5–40);
* white-noise residuals with that signal (:func:`cwsearch.physics.simulate.simulate_residuals`);
* the follow-up sampler exactly as the stage runs it (same prior, walkers
  started from the prior by :func:`cwsearch.stages.followup.stage.initial_positions`,
  :func:`cwsearch.inference.sampling.run_sampler` with its stopping rule and ladder
  adaptation; ``--walkers``, ``--temperatures``, ``--ess`` as given).

Recorded per injection: the credible level of each true parameter (fraction
of posterior samples below it) in the sampler coordinates (log10 f, log10 Mc,
log10 h0, cos ι, ψ, Φ0, ra, sin dec), and for the sky the **searched
probability**: the posterior probability in HEALPix pixels (astropy-healpix)
denser than the truth's pixel, counted leave-one-out (each sample's pixel
count without itself, the truth's without it) with random tie-breaking, so
that the truth and the posterior samples are treated alike and a calibrated
posterior gives a uniform level (rank statistic of Talts et al. 2018, from
memory); the resolution is the finest at which the pixels holding the samples
carry on average at least 20 samples. Samples for the sky are thinned to one
per τ. Also ``--noise`` noise-only runs (same window and sampler) for the
distribution of ln B.

Summary (``bench/results/coverage.json``, ``coverage.ecsv``, P–P plot
``coverage_pp.png`` with 95 % binomial bands): for each parameter the fraction
of truths inside the central 50 % and 90 % intervals (sky: inside the 50 % /
90 % searched region) with binomial errors, and the KS p-value of the levels
against the uniform distribution (``scipy.stats.kstest``); the noise-only
ln B quantiles. Truths drawn from the prior give uniform levels for a
calibrated posterior (Cook, Gelman & Rubin 2006, from memory); the strain
is drawn through the SNR rather than from its log-uniform prior, so its
coverage is exact only approximately (the SNR range cuts the prior's tails).

Per-injection records are appended to ``coverage_runs.jsonl`` as they finish;
a rerun skips the ones already there (``--n`` can grow). ``--workers`` runs
injections in parallel processes. ``--summarise`` only rebuilds the summary.

Quick look: ``python -m bench.coverage --n 4 --noise 2 --out /tmp/cov``.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import time
from pathlib import Path

import numpy as np

RESULTS = Path(__file__).resolve().parent / "results"
PARAMETERS = ("ra", "sin_dec", "log10_frequency", "log10_chirp_mass", "log10_strain", "cos_inclination",
              "polarization", "phase")
ONE_D = ("log10_frequency", "log10_chirp_mass", "log10_strain", "cos_inclination", "polarization", "phase", "ra",
         "sin_dec")


# ------------------------------------------------------------------ set-up shared by every injection
def _setup(args):
    from cwsearch.stages.followup.stage import Prior
    from cwsearch.inference.likelihood import Likelihood
    from cwsearch.physics.noise import NoiseSettings
    from cwsearch.physics.simulate import invented_array

    array = invented_array(n_pulsars=args.pulsars, years=12, seed=args.array_seed, toas_per_pulsar=args.toas,
                           full_span=True)
    noise = NoiseSettings(red_components=0)
    span = array.span
    half = args.frequency_window / span
    band = (np.log10(max(args.frequency - half, 0.5 / span)), np.log10(args.frequency + half))
    template = Likelihood(array, noise)
    return array, noise, band, Prior(template, band)


def _sampler_settings(args):
    from cwsearch.inference import sampling

    return sampling.SamplerSettings(walkers=args.walkers, temperatures=args.temperatures,
                                    max_temperature=args.max_temperature, ess=args.ess,
                                    max_iterations=args.max_iterations, adapt_iterations=args.adapt_iterations,
                                    max_time=args.max_seconds, checkpoint_every=10**9)


def searched_probability(ra, dec, ra_true, dec_true, rng, min_count=20, max_order=8):
    """Searched probability of the truth on HEALPix pixels (leave-one-out, random ties); also the
    searched area [deg²] (pixels denser than the truth's) and the nside used."""
    import astropy.units as u
    from astropy_healpix import HEALPix

    n = ra.size
    order = 0
    for k in range(max_order + 1):
        hp = HEALPix(nside=2**k, order="nested")
        pix = hp.lonlat_to_healpix(ra * u.rad, dec * u.rad)
        counts = np.bincount(pix, minlength=hp.npix)
        if np.mean(counts[pix]) < min_count:      # sample-weighted mean count of the occupied pixels
            break
        order = k
    hp = HEALPix(nside=2**order, order="nested")
    pix = hp.lonlat_to_healpix(ra * u.rad, dec * u.rad)
    counts = np.bincount(pix, minlength=hp.npix)
    own = counts[pix] - 1                                         # each sample's pixel without itself
    truth_pix = int(hp.lonlat_to_healpix(np.array([ra_true]) * u.rad, np.array([dec_true]) * u.rad)[0])
    at_truth = counts[truth_pix]
    greater = int(np.sum(own > at_truth))
    equal = int(np.sum(own == at_truth))
    level = (greater + rng.uniform() * (equal + 1)) / (n + 1)
    area = float(np.sum(counts > at_truth) * hp.pixel_area.to_value(u.deg**2))
    plain = float(np.sum(counts[pix] > at_truth) / n)             # without leave-one-out, for reference
    return float(level), area, int(2**order), plain


def _one(task):
    """Run one injection (``("signal", i)``) or noise-only case (``("noise", j)``); returns a JSON-ready dict."""
    kind, index, args = task
    from cwsearch.inference import sampling
    from cwsearch.stages.followup import stage as followup
    from cwsearch.inference.likelihood import Likelihood
    from cwsearch.physics.noise import NoiseWeighting
    from cwsearch.physics.simulate import Binary, binary_residuals, simulate_residuals

    array, noise, band, prior0 = _setup(args)
    key = (0 if kind == "signal" else 1, index)
    draw_seq, snr_seq, sim_seq, init_seq, run_seq, tie_seq = np.random.SeedSequence(args.seed, spawn_key=key).spawn(6)
    record = {"kind": kind, "index": index}
    binaries = ()
    truth = None
    if kind == "signal":
        truth = prior0.draw(np.random.default_rng(draw_seq), 1)[0]
        binary = Binary(ra=float(truth[0]), dec=float(np.arcsin(truth[1])), gw_frequency=10 ** truth[2],
                        chirp_mass=10 ** truth[3], strain=1e-14, inclination=float(np.arccos(truth[5])),
                        polarization=float(truth[6]), phase=float(truth[7]))
        rho = NoiseWeighting(array, noise).optimal_snr(binary_residuals(array, binary))
        snr = float(np.exp(np.random.default_rng(snr_seq).uniform(np.log(args.snr_min), np.log(args.snr_max))))
        binary.strain *= snr / rho
        truth[4] = np.log10(binary.strain)
        binaries = (binary,)
        record.update({"snr": snr, "truth": dict(zip(PARAMETERS, map(float, truth)))})
    data = array.with_residuals(simulate_residuals(array, np.random.default_rng(sim_seq), binaries=binaries))
    likelihood = Likelihood(data, noise)
    prior = followup.Prior(likelihood, band)
    settings = _sampler_settings(args)
    t0 = time.time()
    scan_start = _scan_maps(data, noise, band, args) if (args.start == "scan" or args.mode_jumps) else None
    betas = (np.geomspace(1.0, 1.0 / settings.max_temperature, settings.temperatures) if settings.temperatures > 1
             else np.ones(1))
    initial = followup.initial_positions(prior, followup.Target("bench", None, None, None), array.span,
                                         (settings.temperatures, settings.walkers), np.random.default_rng(init_seq),
                                         scan_start=scan_start if args.start == "scan" else None, betas=betas)
    jump = followup.mode_jump_proposal(scan_start, prior) if args.mode_jumps else None
    result = sampling.run_sampler(prior, likelihood.batch, initial, settings, seed=run_seq, progress=False,
                                  mode_jump=jump)
    record.update({"log_bayes_factor": float(result.log_evidence), "log_bayes_factor_error":
                   float(result.log_evidence_error), "iterations": int(result.iterations),
                   "burn_in": int(result.burn_in), "converged": bool(result.converged),
                   "stopped_by": result.stopped_by, "ess": float(result.ess),
                   "max_tau": float(np.max(result.autocorrelation_time)),
                   "chain_over_tau": float(np.min(result.chain_taus())),
                   "temperatures": int(result.betas.size),
                   "min_swap_acceptance": float(np.nanmin(result.swap_acceptance)) if result.betas.size > 1 else None,
                   "warnings": list(result.warnings), "seconds": time.time() - t0,
                   "max_log_likelihood": float(result.log_likelihood.max())})
    if truth is not None:
        samples = result.samples()
        record["levels"] = {name: float(np.mean(samples[:, j] < truth[j])) for j, name in enumerate(PARAMETERS)}
        record["truth_log_likelihood"] = float(likelihood.batch(truth[None])[0])
        post = result.chain[result.burn_in: result.iterations]
        step = max(1, int(np.ceil(np.max(result.autocorrelation_time))))
        sky = post[::step].reshape(-1, post.shape[2])
        level, area, nside, plain = searched_probability(sky[:, 0], np.arcsin(np.clip(sky[:, 1], -1, 1)),
                                                         truth[0], np.arcsin(truth[1]),
                                                         np.random.default_rng(tie_seq))
        record.update({"sky_searched_probability": level, "sky_searched_area_deg2": area, "sky_nside": nside,
                       "sky_searched_probability_plain": plain, "sky_samples": int(sky.shape[0])})
    return record


def _scan_maps(data, noise, band, args):
    """What the follow-up stage takes from a finished scan (:class:`~cwsearch.stages.followup.stage.ScanStart`),
    computed on this injection's data with the scan stage's own Fe kernel at its default resolution
    (nside ``--scan-nside``, frequency step 1/(2 T_span)); only frequencies inside the follow-up band (and
    one step beyond each edge) are scanned, so the sky map is the Fe maximum over the band, where the
    stage's is the maximum over its whole scan (the same here, with one source and white noise, up to
    noise peaks elsewhere in the spectrum)."""
    from cwsearch.physics.fstat import frequency_grid
    from cwsearch.physics.noise import NoiseWeighting
    from cwsearch.stages.followup.stage import ScanStart
    from cwsearch.stages.scan.stage import fe_map, sky_grid

    step = 0.5 / data.span
    lo, hi = 10 ** band[0], 10 ** band[1]
    grid = frequency_grid(data, fmin=max(lo - step, 1.0 / data.span), fmax=hi + step, oversample=2)
    _, _, fplus, fcross = sky_grid(data, args.scan_nside)
    result, _ = fe_map(NoiseWeighting(data, noise), grid, fplus, fcross)
    fe = np.asarray(result.fe_map, dtype=float)
    return ScanStart(fe.max(axis=1), args.scan_nside, grid, fe.max(axis=0))


# ------------------------------------------------------------------ bookkeeping
def _read_records(path):
    out = {}
    if path.exists():
        for line in path.read_text().splitlines():
            try:
                r = json.loads(line)
            except json.JSONDecodeError:        # a line cut by a kill: that case is simply rerun
                continue
            out[(r["kind"], r["index"])] = r
    return out


def _append(path, record):
    with open(path, "a") as fh:
        fh.write(json.dumps(record) + "\n")
        fh.flush()
        os.fsync(fh.fileno())


def summarise(records, out_dir, args_dict):
    from scipy import stats

    signal = [r for r in sorted(records.values(), key=lambda r: r["index"]) if r["kind"] == "signal"]
    noise = [r for r in records.values() if r["kind"] == "noise"]
    n = len(signal)
    summary = {"n_injections": n, "n_noise": len(noise), "settings": args_dict, "parameters": {}}
    levels = {}
    if n:
        for name in ONE_D:
            v = np.array([r["levels"][name] for r in signal])
            levels[name] = v
            summary["parameters"][name] = {
                "inside_50": float(np.mean((v > 0.25) & (v < 0.75))),
                "inside_90": float(np.mean((v > 0.05) & (v < 0.95))),
                "ks_pvalue": float(stats.kstest(v, "uniform").pvalue), "mean_level": float(v.mean())}
        sky = np.array([r["sky_searched_probability"] for r in signal])
        levels["sky"] = sky
        summary["parameters"]["sky"] = {"inside_50": float(np.mean(sky < 0.5)), "inside_90": float(np.mean(sky < 0.9)),
                                        "ks_pvalue": float(stats.kstest(sky, "uniform").pvalue),
                                        "mean_level": float(sky.mean()),
                                        "median_searched_area_deg2": float(np.median([r["sky_searched_area_deg2"]
                                                                                      for r in signal]))}
        summary["binomial_error_50"] = math.sqrt(0.25 / n)
        summary["binomial_error_90"] = math.sqrt(0.09 / n)
        summary["runs"] = {"converged": int(sum(r["converged"] for r in signal)),
                           "median_iterations": float(np.median([r["iterations"] for r in signal])),
                           "median_seconds": float(np.median([r["seconds"] for r in signal])),
                           "with_warnings": int(sum(bool(r["warnings"]) for r in signal)),
                           "main_mode_missed": int(sum(r["max_log_likelihood"] < r["truth_log_likelihood"] - 2
                                                       for r in signal))}
    if noise:
        lnb = np.array([r["log_bayes_factor"] for r in noise])
        summary["noise_log_bayes_factor"] = {"quantiles_5_50_95": [float(q) for q in np.percentile(lnb, [5, 50, 95])],
                                             "max": float(lnb.max()), "fraction_above_0": float(np.mean(lnb > 0)),
                                             "fraction_above_3": float(np.mean(lnb > 3)), "values": lnb.tolist()}
    out_dir.mkdir(parents=True, exist_ok=True)
    (out_dir / "coverage.json").write_text(json.dumps(summary, indent=1))
    if n:
        from astropy.table import Table

        table = Table({"index": [r["index"] for r in signal], "snr": [r["snr"] for r in signal],
                       **{f"level_{k}": v for k, v in levels.items()},
                       "sky_searched_area_deg2": [r["sky_searched_area_deg2"] for r in signal],
                       "converged": [r["converged"] for r in signal], "iterations": [r["iterations"] for r in signal],
                       "log_bayes_factor": [r["log_bayes_factor"] for r in signal]})
        table.meta["description"] = "credible level of the truth per injection (bench.coverage)"
        table.write(out_dir / "coverage.ecsv", format="ascii.ecsv", overwrite=True)
        _pp_plot(levels, summary["parameters"], out_dir / "coverage_pp.png")
    return summary


def _pp_plot(levels, figures, path):
    from scipy import stats

    from cwsearch.core.plotting import pyplot, save_figure

    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6, 6))
    n = len(next(iter(levels.values())))
    grid = np.linspace(0, 1, 201)
    for q, shade in ((0.003, "0.92"), (0.05, "0.8")):     # 3σ and 95 % bands of the empirical CDF (binomial)
        ax.fill_between(grid, stats.binom.ppf(q / 2, n, grid) / n, stats.binom.ppf(1 - q / 2, n, grid) / n,
                        color=shade, lw=0)
    for name, v in levels.items():
        x = np.sort(v)
        ax.step(np.concatenate([[0], x, [1]]), np.concatenate([[0], np.arange(1, n + 1) / n, [1]]), where="post",
                lw=1.6 if name == "sky" else 1.0, label=f"{name} (KS p = {figures[name]['ks_pvalue']:.2f})")
    ax.plot([0, 1], [0, 1], "k--", lw=0.8)
    ax.set_xlabel("credible level of the truth (sky: searched probability)")
    ax.set_ylabel("fraction of injections")
    ax.set_title(f"Follow-up coverage, {n} injections (bands: 95 %, 99.7 % binomial)")
    ax.legend(loc="upper left", fontsize=7)
    save_figure(fig, path)


def print_summary(s):
    print(f"\n== Follow-up coverage: {s['n_injections']} injections, {s['n_noise']} noise-only runs")
    if s["n_injections"]:
        print(f"   binomial errors: 50 % ± {s['binomial_error_50']:.3f}, 90 % ± {s['binomial_error_90']:.3f}; runs: "
              f"{s['runs']['converged']} converged, median {s['runs']['median_iterations']:.0f} iterations, "
              f"{s['runs']['median_seconds']:.0f} s; main mode missed in {s['runs']['main_mode_missed']}")
        print("   parameter          inside 50 %   inside 90 %   KS p    mean level")
        for name, f in s["parameters"].items():
            print(f"   {name:18s} {f['inside_50']:10.3f}   {f['inside_90']:10.3f}   {f['ks_pvalue']:6.3f}   "
                  f"{f['mean_level']:.3f}")
        print(f"   sky: median searched area {s['parameters']['sky']['median_searched_area_deg2']:.0f} deg²")
    if "noise_log_bayes_factor" in s:
        q = s["noise_log_bayes_factor"]
        print(f"   noise only: ln B 5/50/95 % = {', '.join(f'{x:.2f}' for x in q['quantiles_5_50_95'])}, max "
              f"{q['max']:.2f}; ln B > 0 in {q['fraction_above_0']:.2f}, > 3 in {q['fraction_above_3']:.2f}")


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m bench.coverage", description=__doc__.split("\n\n")[0])
    parser.add_argument("--n", type=int, default=120, help="injections (default 120)")
    parser.add_argument("--noise", type=int, default=30, help="noise-only runs for the ln B distribution (default 30)")
    parser.add_argument("--workers", type=int, default=1, help="parallel processes (default 1)")
    parser.add_argument("--seed", type=int, default=2026)
    parser.add_argument("--out", type=Path, default=RESULTS, help="results folder (default bench/results)")
    parser.add_argument("--pulsars", type=int, default=8)
    parser.add_argument("--toas", type=int, default=100, help="TOAs per pulsar (default 100)")
    parser.add_argument("--array-seed", type=int, default=31)
    parser.add_argument("--frequency", type=float, default=2.0e-8, help="centre of the frequency window [Hz]")
    parser.add_argument("--frequency-window", type=float, default=5.0, help="bins of 1/T_span either side (5)")
    parser.add_argument("--snr-min", type=float, default=5.0)
    parser.add_argument("--snr-max", type=float, default=40.0)
    parser.add_argument("--walkers", type=int, default=24)
    parser.add_argument("--temperatures", type=int, default=8)
    parser.add_argument("--max-temperature", type=float, default=1e6)
    parser.add_argument("--ess", type=float, default=250.0)
    parser.add_argument("--adapt-iterations", type=int, default=500)
    parser.add_argument("--max-iterations", type=int, default=20000)
    parser.add_argument("--max-seconds", type=float, default=float("inf"), help="wall-time cap per run")
    parser.add_argument("--start", choices=("scan", "prior"), default="scan",
                        help="walkers' start as in the follow-up stage: 'scan' (default, the stage's default) draws "
                             "sky and frequency from the injection's Fe maps tempered per chain; 'prior' from the prior")
    parser.add_argument("--no-mode-jumps", dest="mode_jumps", action="store_false",
                        help="no mode-jump moves (on by default, as in the follow-up stage)")
    parser.add_argument("--scan-nside", type=int, default=16, help="HEALPix nside of the Fe maps (default 16)")
    parser.add_argument("--summarise", action="store_true", help="only rebuild the summary from the records")
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    runs = args.out / "coverage_runs.jsonl"
    records = _read_records(runs)
    settings = {k: (str(v) if isinstance(v, Path) else v) for k, v in vars(args).items()}
    if not args.summarise:
        tasks = [(kind, i, args) for i in range(max(args.n, args.noise)) for kind in ("signal", "noise")
                 if (kind == "signal" and i < args.n or kind == "noise" and i < args.noise)
                 and (kind, i) not in records]
        print(f"{len(records)} records in {runs}; {len(tasks)} to run with {args.workers} worker(s)", flush=True)
        if args.workers > 1:
            import multiprocessing

            with multiprocessing.get_context("spawn").Pool(args.workers) as pool:
                for rec in pool.imap_unordered(_one, tasks):
                    _report(rec, runs, records)
        else:
            for task in tasks:
                _report(_one(task), runs, records)
    print_summary(summarise(records, args.out, settings))
    return 0


def _report(rec, runs, records):
    _append(runs, rec)
    records[(rec["kind"], rec["index"])] = rec
    extra = (f"SNR {rec['snr']:.1f}, sky level {rec['sky_searched_probability']:.2f}, "
             f"{rec['sky_searched_area_deg2']:.0f} deg²" if rec["kind"] == "signal" else "")
    print(f"{rec['kind']} {rec['index']}: ln B {rec['log_bayes_factor']:.1f}, {rec['iterations']} iterations "
          f"({rec['stopped_by']}), tau {rec['max_tau']:.1f}, T {rec['temperatures']}, {rec['seconds']:.0f} s. {extra}",
          flush=True)


if __name__ == "__main__":
    raise SystemExit(main())
