"""Scan false-alarm calibration on realistic invented noise, with the default noise model (estimate).

``python -m bench.calibration --realistic`` (or ``python -m bench.realistic``) prints measured figures
(not a test). Each of ``--datasets`` (default 100) noise-only datasets is a new invented array
(``--pulsars`` 12 × ``--toas`` 150 TOAs over 10 years, full span) whose residuals are drawn from noise the
analysis is not told about:

* wrong quoted TOA errors per backend: true σ² = (scale σ_quoted)² + added², scale uniform in 0.8–1.6,
  added uniform in 0–0.5 × the backend's median quoted error (:func:`cwsearch.physics.simulate.wrong_white_noise`);
* power-law red noise in half of the pulsars (``invented_array(red_noise_fraction=0.5)``);
* a Hellings–Downs-correlated background, log10 A = ``--background`` (−14.5), γ = 13/3.

The analysis reads only the residuals and the quoted errors (no noise values, as ``cwsearch simulate``
writes by default). Per dataset, the noise model is resolved exactly as a run with the default
``--noise-model estimate`` does (:func:`cwsearch.job.noisemodel.resolve_noise_model`: noise stage fit,
default options except no plots and no upper limits), then the scan (nside ``--nside`` 4, oversample 2,
up to ``--fmax`` 5e-8 Hz) runs with ``--null-sims`` (50) noise-only simulations drawn from the fitted
model. Recorded: the loudest peak's analytic FAP, its empirical FAP (1 + k)/(1 + N), and for contrast the
analytic FAP of the same scan with the ``dataset`` noise model (quoted errors taken at face value, no red
or common noise).

For the levels 0.01, 0.02, 0.05, 0.1, 0.2, 0.5 the fraction of datasets with FAP < p is printed with its
binomial standard error sqrt(p(1−p)/n) and the 95 % binomial band (``scipy.stats.binom.ppf``), the count
below 1e-3, and a P–P plot (fraction below p against p, with the 95 % band) is written to
``bench/results/realistic_pp.png`` and the figures to ``bench/results/realistic.json``.
Reference (same run): the wall time of the noise fit per dataset against that of the scan.
The machine is shared: wall times are noisy.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

RESULTS = Path(__file__).resolve().parent / "results"
LEVELS = (0.01, 0.02, 0.05, 0.1, 0.2, 0.5)


def one_dataset(i, args):
    """The figures of dataset ``i`` (dict)."""
    from cwsearch.data.model import PulsarNoise
    from cwsearch.job.noisemodel import resolve_noise_model
    from cwsearch.physics.noise import NoiseSettings
    from cwsearch.physics.simulate import invented_array, simulate_residuals, wrong_white_noise
    from cwsearch.stages.noise.stage import NoiseOptions
    from cwsearch.stages.scan.stage import ScanOptions, run_scan

    seeds = np.random.SeedSequence([args.seed, i]).spawn(5)
    truth_array = invented_array(n_pulsars=args.pulsars, years=10.0, seed=np.random.default_rng(seeds[0]),
                                 toas_per_pulsar=args.toas, red_noise_fraction=0.5, full_span=True)
    white = wrong_white_noise(truth_array, np.random.default_rng(seeds[1]))
    residuals = simulate_residuals(truth_array, np.random.default_rng(seeds[2]), true_white=white,
                                   background_log10_amplitude=args.background, background_index=13 / 3,
                                   background_components=30)
    # what the analysis reads: residuals and quoted errors, no noise values
    array = truth_array.with_residuals(residuals).with_noise({p.name: PulsarNoise() for p in truth_array})
    scan_options = ScanOptions(nside=args.nside, oversample=2, fmax=args.fmax, null_sims=args.null_sims,
                               no_plots=True, max_candidates=1)
    out = {"dataset": i, "n_red_true": int(sum(p.noise.has_red_noise for p in truth_array))}
    with tempfile.TemporaryDirectory(prefix="cw-realistic-") as tmp, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = time.perf_counter()
        resolved = resolve_noise_model(array, tmp, "estimate", noise=NoiseSettings(red_components=args.red_components),
                                       dataset_checksum=f"realistic-{args.seed}-{i}",
                                       options=NoiseOptions(no_plots=True, upper_limits=False),
                                       seed=int(seeds[3].generate_state(1)[0]))
        out["fit_seconds"] = time.perf_counter() - t
        desc = resolved.description
        out["n_red_claimed"] = desc["n_red_noise"]
        out["common_log10_amplitude"] = desc["common"]["log10_amplitude"] if desc["common"] else None
        t = time.perf_counter()
        result = run_scan(resolved.array, tmp, scan_options, noise=resolved.noise,
                          seed=int(seeds[4].generate_state(1)[0]), progress=False)
        out["scan_seconds"] = time.perf_counter() - t
        best = result.candidates[0]
        out["fap"] = float(best["fap"])
        out["fap_empirical"] = float(best["fap_empirical"])
        out["gof_failed"] = result.summary["goodness_of_fit"]["n_failed"]
        plain = run_scan(array, tmp + "/plain", ScanOptions(nside=args.nside, oversample=2, fmax=args.fmax,
                                                            null_sims=0, no_plots=True, max_candidates=1),
                         noise=NoiseSettings(red_components=args.red_components), seed=0, progress=False)
        out["fap_dataset_model"] = float(plain.candidates[0]["fap"])
    return out


def summarise(rows, n_null):
    from scipy import stats

    n = len(rows)
    res = {"n": n, "levels": list(LEVELS), "null_sims": n_null}
    for key in ("fap", "fap_empirical", "fap_dataset_model"):
        values = np.array([r[key] for r in rows], dtype=float)
        fr = {}
        for p in LEVELS:
            k = int(np.sum(values < p))
            lo, hi = stats.binom.ppf([0.025, 0.975], n, p)
            fr[str(p)] = {"fraction": k / n, "count": k, "expected": p * n, "binomial_err": math.sqrt(p * (1 - p) / n),
                          "band95": [float(lo) / n, float(hi) / n], "inside_band": bool(lo <= k <= hi)}
        res[key] = {"below": fr, "below_1e-3": int(np.sum(values < 1e-3)), "min": float(values.min()),
                    "median": float(np.median(values)),
                    "ks_uniform_pvalue": float(stats.kstest(values, "uniform").pvalue)}
    res["fit_seconds_median"] = float(np.median([r["fit_seconds"] for r in rows]))
    res["scan_seconds_median"] = float(np.median([r["scan_seconds"] for r in rows]))
    res["red_claimed_over_true"] = [int(sum(r["n_red_claimed"] for r in rows)), int(sum(r["n_red_true"] for r in rows))]
    res["gof_failed_total"] = int(sum(r["gof_failed"] for r in rows))
    return res


def pp_plot(rows, path, n_null):
    from scipy import stats

    from cwsearch.core.plotting import pyplot, save_figure

    plt = pyplot()
    n = len(rows)
    # linear and logarithmic spacing together: the log panel needs resolution down to 1e-3
    grid = np.unique(np.concatenate([np.linspace(0.0, 1.0, 201), np.logspace(-3, 0, 301)]))
    lo = stats.binom.ppf(0.025, n, grid) / n
    hi = stats.binom.ppf(0.975, n, grid) / n
    fig, axes = plt.subplots(1, 2, figsize=(10, 4.4))
    for ax, log in zip(axes, (False, True)):
        ax.fill_between(grid, lo, hi, color="0.85", label="95 % binomial band")
        ax.plot(grid, grid, "k:", lw=1)
        for key, label, style in (("fap", "analytic FAP, estimated noise", "-"),
                                  ("fap_empirical", f"empirical FAP ({n_null} sims of the fitted model)", "--"),
                                  ("fap_dataset_model", "analytic FAP, dataset noise (quoted errors)", "-.")):
            v = np.sort(np.array([r[key] for r in rows], dtype=float))
            frac = np.searchsorted(v, grid, side="right") / n
            ax.step(grid, frac, style, where="post", label=label)
        ax.set_xlabel("FAP level p")
        ax.set_ylabel("fraction of noise-only datasets with FAP < p")
        if log:
            ax.set_xscale("log")
            ax.set_yscale("symlog", linthresh=1.0 / n)
            ax.set_xlim(1e-3, 1)
            ax.set_ylim(0.0, 1.05)
    axes[0].legend(fontsize=7, loc="upper left")
    fig.suptitle(f"Loudest scan peak in {n} realistic noise-only datasets (wrong quoted errors, red noise in half "
                 "the pulsars, Hellings–Downs background)", fontsize=9)
    fig.tight_layout()
    save_figure(fig, path)


def print_summary(res):
    print(f"datasets: {res['n']}  (median noise fit {res['fit_seconds_median']:.1f} s, "
          f"scan with {res['null_sims']} null sims {res['scan_seconds_median']:.1f} s: "
          f"fit/scan = {res['fit_seconds_median'] / max(res['scan_seconds_median'], 1e-9):.2f})")
    print(f"red noise claimed in {res['red_claimed_over_true'][0]} pulsars (true: {res['red_claimed_over_true'][1]}); "
          f"goodness-of-fit failures under the fitted model: {res['gof_failed_total']}")
    for key, label in (("fap", "analytic, estimated noise"), ("fap_empirical", "empirical, estimated noise"),
                       ("fap_dataset_model", "analytic, dataset noise")):
        r = res[key]
        cells = "  ".join(f"p={p:g}: {r['below'][str(p)]['fraction']:.2f}"
                          f"{'' if r['below'][str(p)]['inside_band'] else '*'}" for p in res["levels"])
        print(f"{label:<28} {cells}   <1e-3: {r['below_1e-3']}  min {r['min']:.2g}  KS p {r['ks_uniform_pvalue']:.2g}")
    print("(* = outside the 95 % binomial band)")


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m bench.realistic", description=__doc__.split("\n\n")[0])
    parser.add_argument("--datasets", type=int, default=100)
    parser.add_argument("--pulsars", type=int, default=12)
    parser.add_argument("--toas", type=int, default=150)
    parser.add_argument("--background", type=float, default=-14.5)
    parser.add_argument("--red-components", type=int, default=30)
    parser.add_argument("--nside", type=int, default=4)
    parser.add_argument("--fmax", type=float, default=5e-8)
    parser.add_argument("--null-sims", type=int, default=50)
    parser.add_argument("--seed", type=int, default=2026)
    parser.add_argument("--out", default=str(RESULTS))
    args = parser.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    rows = []
    partial = out / "realistic_rows.jsonl"
    if partial.exists():
        rows = [json.loads(line) for line in partial.read_text().splitlines() if line.strip()]
        rows = [r for r in rows if r["dataset"] < args.datasets]
    done = {r["dataset"] for r in rows}
    print(f"load average {os.getloadavg()[0]:.1f}; {len(done)} datasets already done", flush=True)
    for i in range(args.datasets):
        if i in done:
            continue
        r = one_dataset(i, args)
        rows.append(r)
        with open(partial, "a") as fh:
            fh.write(json.dumps(r) + "\n")
        print(f"[{len(rows)}/{args.datasets}] fap {r['fap']:.3g}  empirical {r['fap_empirical']:.3g}  "
              f"dataset-model {r['fap_dataset_model']:.3g}  fit {r['fit_seconds']:.1f} s  scan {r['scan_seconds']:.1f} s",
              flush=True)
    res = summarise(rows, args.null_sims)
    res["settings"] = vars(args)
    (out / "realistic.json").write_text(json.dumps(res, indent=2) + "\n")
    pp_plot(rows, out / "realistic_pp.png", args.null_sims)
    print_summary(res)
    return res


if __name__ == "__main__":
    main()
