"""Scale benchmark (issue 18): time and peak memory at the array sizes that are coming.

``python -m bench.scale`` measures, for

(a) 116 pulsars × 2,000 TOAs and (b) 100 pulsars × 10,000 TOAs
    (invented, 15 yr, red noise in every pulsar, a Hellings–Downs correlated
    common process simulated and included in the noise model):

* ``simulate``: building the array;
* ``noise``: the noise-model stage (:func:`cwsearch.stages.noise.stage.run_noise`,
  its defaults, the per-pulsar fits on the chosen runner; ``--no-noise`` skips it);
* ``scan``: :func:`cwsearch.stages.scan.stage.run_scan` at nside 16 on the
  default frequency grid (1/T_span to 1/(2 × median spacing), capped at
  1e-6 Hz), common process in each pulsar's noise model, no plots;
* ``scan_correlated``: the Fe sky scan with the Hellings–Downs correlated
  background (:func:`cwsearch.physics.correlated.correlated_fe`) on the same
  grid (skipped with ``--no-correlated``);
* ``likelihood``: follow-up likelihood evaluations per second (batches of
  160 walkers, full evolution, pulsar term);
* ``limits``: the Bayesian strain upper-limit map at nside 8 on the default
  grid (:func:`cwsearch.stages.limits.stage.compute_limits`), on the chosen
  runner (``--workers N`` local processes, ``--scheduler ADDRESS`` a Dask
  cluster, ``--local-cluster N`` a Dask LocalCluster of N workers started
  here); by default only for (a).

Every case runs in a fresh process; peak memory is the high-water mark of
the process's resident set sampled every 10 ms during each step, minus the
resident set before the step (``peak_extra_gib``), and the process's
overall peak (``peak_rss_gib``).

``--sweep`` also times the scan kernel (noise build + projections + sky,
nside 8, 200 frequencies) for N_psr = 10…80 at 1,000 TOAs and N_TOA =
500…4,000 at 20 pulsars and plots cost against N_psr and N_TOA (log–log,
with the expected slope 1 drawn) to bench/results/scale.png.

Targets on 2 cores: scan (b) ≤ 30 s and ≤ 3 GiB; limits (a) ≤ 5 min. The
machine is shared: the load average is printed beside every figure.
Results go to bench/results/scale.json.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import threading
import time
from pathlib import Path

RESULTS = Path(__file__).parent / "results"
CASES = {"a": (116, 2000), "b": (100, 10000)}
COMMON = -14.6


def _rss():
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


class _Peak:
    """High-water mark of the resident set while the block runs (sampled every 10 ms)."""

    def __enter__(self):
        self.base = self.peak = _rss()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._sample, daemon=True)
        self._thread.start()
        self.t0 = time.perf_counter()
        return self

    def _sample(self):
        while not self._stop.wait(0.01):
            self.peak = max(self.peak, _rss())

    def __exit__(self, *exc):
        self.seconds = time.perf_counter() - self.t0
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, _rss())
        return False

    def record(self, **extra):
        return {"seconds": round(self.seconds, 3), "peak_extra_gib": round((self.peak - self.base) / 2**30, 3),
                "load_average": round(os.getloadavg()[0], 2), **extra}


def _array(n_psr, n_toa, seed=2026):
    from bench._array import COMMON_INDEX, RED_COMPONENTS
    from cwsearch.physics.noise import NoiseSettings
    from cwsearch.physics.simulate import invented_array, simulated_array

    base = invented_array(n_pulsars=n_psr, years=15.0, seed=seed, toas_per_pulsar=n_toa, red_noise_fraction=1.0,
                          full_span=True)
    array = simulated_array(base, seed=seed + 1, background_log10_amplitude=COMMON,
                            background_index=COMMON_INDEX, background_components=RED_COMPONENTS)
    noise = NoiseSettings(red_components=RED_COMPONENTS, common_log10_amplitude=COMMON, common_index=COMMON_INDEX)
    return array, noise


def _runner_kwargs(args):
    if args.scheduler:
        return {"scheduler": args.scheduler}
    return {"workers": args.workers}


def run_case(args):
    """One case in this process; prints one JSON line."""
    import tempfile

    import numpy as np

    n_psr, n_toa = CASES[args.case] if args.case in CASES else map(int, args.case.split("x"))
    out = {"case": args.case, "n_pulsars": n_psr, "toas_per_pulsar": n_toa, "cpus": os.cpu_count()}
    with _Peak() as pk:
        array, noise = _array(n_psr, n_toa)
    out["simulate"] = pk.record()

    if args.no_noise:
        out["noise"] = {"status": "not measured (--no-noise)"}
    else:
        # the noise stage with its defaults (white noise per backend, red noise per pulsar, the common process
        # fitted with the Hellings-Downs likelihood), per-pulsar fits on the chosen runner
        import dataclasses
        import tempfile

        from cwsearch.stages.noise.stage import NoiseOptions, run_noise

        fields = {f.name for f in dataclasses.fields(NoiseOptions)}
        # --workers 1 (the bench's default) leaves the stage its own default: worker processes from 20,000 TOAs
        runner = {k: v for k, v in _runner_kwargs(args).items() if k in fields and v not in (None, 1)}
        options = NoiseOptions(**({"no_plots": True} if "no_plots" in fields else {}), **runner)
        with _Peak() as pk, tempfile.TemporaryDirectory() as run_dir:
            fit = run_noise(array, run_dir, options, noise=noise, progress=False)
        common = getattr(fit, "summary", {}).get("common", {}) if hasattr(fit, "summary") else {}
        out["noise"] = pk.record(runner=runner or "in process",
                                 common_log10_amplitude=common.get("log10_amplitude") if isinstance(common, dict)
                                 else None)
        del fit

    from cwsearch.physics.noise import NoiseWeighting
    from cwsearch.stages.scan.stage import ScanOptions, frequency_grid, run_scan, sky_grid

    frequencies = frequency_grid(array)
    with _Peak() as pk, tempfile.TemporaryDirectory() as run_dir:
        res = run_scan(array, run_dir, ScanOptions(nside=16, no_plots=True, **_scan_runner(args)), noise=noise,
                       progress=False)
    split = {k: res.summary.get(k) for k in ("noise_build_seconds", "kernel_seconds", "trials_seconds",
                                             "candidates_seconds", "write_seconds")}
    out["scan"] = pk.record(n_frequencies=int(frequencies.size), n_pixels=int(res.fe_map.shape[0]), split=split,
                            best_fe=float(np.max(res.spectrum["fe_max"])))
    del res

    if not args.no_correlated:
        from cwsearch.physics.correlated import ArrayWeighting, CommonProcess, correlated_fe
        from cwsearch.physics.noise import NoiseSettings

        _, _, fplus, fcross = sky_grid(array, 16)
        own = NoiseSettings(red_components=noise.red_components, common_log10_amplitude=None)
        with _Peak() as pk:
            weighting = ArrayWeighting(array, own, CommonProcess(COMMON, components=noise.red_components))
            sky = correlated_fe(weighting, frequencies, fplus, fcross, keep_map=False)
        out["scan_correlated"] = pk.record(best_fe=float(np.max(sky.fe_max)))
        del weighting, sky

    from cwsearch.inference.likelihood import Likelihood

    rng = np.random.default_rng(1)
    with _Peak() as pk:
        like = Likelihood(array, noise)
        theta = _theta(rng, 160)
        like.batch(theta[:4])
        like.batch(theta)
    setup = pk.seconds
    with _Peak() as pk:
        for _ in range(args.likelihood_repeats):
            like.batch(_theta(rng, 160))
    out["likelihood"] = pk.record(setup_seconds=round(setup, 3),
                                  evaluations_per_second=round(args.likelihood_repeats * 160 / pk.seconds, 1))
    del like

    if args.case in args.limits_cases:
        from cwsearch.physics import fstat, sky
        from cwsearch.stages.limits.stage import compute_limits

        engine = NoiseWeighting(array, noise)
        ra, dec = sky.pixel_centres(8)
        # a subset of the default grid, spread over the band; the cost is linear in the rows (pixel x
        # frequency), so the full-grid time is extrapolated from it (stated in the output)
        pick = np.unique(np.linspace(0, frequencies.size - 1, min(args.limits_frequencies, frequencies.size))
                         .round().astype(int))
        with _Peak() as pk:
            t = time.perf_counter()
            proj = fstat.project(engine, frequencies[pick])
            proj_seconds = time.perf_counter() - t
            lim = compute_limits(proj, ra, dec, method="bayes", progress=False, **_runner_kwargs(args))
        out["limits"] = pk.record(n_pixels=int(ra.size), n_frequencies=int(pick.size),
                                  n_frequencies_default_grid=int(frequencies.size),
                                  extrapolated_full_grid_seconds=round(
                                      pk.seconds * frequencies.size / pick.size, 1),
                                  runner=lim["runner"], median_h95=float(np.median(lim["bayes"])))
        if args.compare_serial and (args.scheduler or args.workers > 1):
            t = time.perf_counter()
            serial = compute_limits(proj, ra, dec, method="bayes", progress=False, workers=1)
            t_serial = time.perf_counter() - t
            want, got = serial["bayes"], lim["bayes"]
            out["limits"].update(serial_seconds=round(t_serial, 3),
                                 speedup=round(t_serial / (out["limits"]["seconds"] - proj_seconds), 3),
                                 max_relative_difference=float(np.max(np.abs(got - want) / np.abs(want))),
                                 load_average_serial=round(os.getloadavg()[0], 2))
        if args.save_limits:
            np.save(args.save_limits, lim["bayes"])
    out["peak_rss_gib"] = round(_max_rss() / 2**30, 3)
    print("RESULT " + json.dumps(out))


def _scan_runner(args):
    """Engine options of the scan stage if it has them (frequency chunks through the task runner)."""
    from dataclasses import fields

    from cwsearch.stages.scan.stage import ScanOptions

    names = {f.name for f in fields(ScanOptions)}
    out = {}
    if not args.scan_on_runner:      # the scan target is for this machine: kernels threaded in-process
        return out
    if "workers" in names and args.workers:
        out["workers"] = args.workers
    if "scheduler" in names and args.scheduler:
        out["scheduler"] = args.scheduler
    return out


def _max_rss():
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def _theta(rng, n, f_centre=2e-8):
    """Random unit-cube points for :meth:`Likelihood.batch` (as bench/likelihood.py)."""
    from bench.likelihood import _random_theta

    return _random_theta(rng, n, f_centre)


def sweep():
    """Scan kernel cost versus N_psr and N_TOA (nside 8, 200 frequencies)."""
    import numpy as np

    from cwsearch.physics import fstat
    from cwsearch.physics.noise import NoiseWeighting
    from cwsearch.stages.scan.stage import sky_grid

    def cost(n_psr, n_toa):
        array, noise = _array(n_psr, n_toa, seed=7)
        frequencies = 1 / array.span + np.arange(200) / (2 * array.span)
        _, _, fplus, fcross = sky_grid(array, 8)
        best = np.inf
        for _ in range(2):
            t = time.perf_counter()
            proj = fstat.project(NoiseWeighting(array, noise), frequencies)
            fstat.fe_sky(proj, fplus, fcross, keep_map=False)
            best = min(best, time.perf_counter() - t)
        return best

    cost(5, 200)                       # numba cache, imports
    by_psr = {n: cost(n, 1000) for n in (10, 20, 40, 80)}
    by_toa = {n: cost(20, n) for n in (500, 1000, 2000, 4000)}
    return {"by_pulsars_at_1000_toas": by_psr, "by_toas_at_20_pulsars": by_toa,
            "load_average": round(os.getloadavg()[0], 2)}


def plot_sweep(result, path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    fig, axes = plt.subplots(1, 2, figsize=(9, 3.6))
    for ax, key, label in ((axes[0], "by_pulsars_at_1000_toas", "pulsars (1,000 TOAs each)"),
                           (axes[1], "by_toas_at_20_pulsars", "TOAs per pulsar (20 pulsars)")):
        x = np.array(sorted(int(k) for k in result[key]))
        y = np.array([result[key][k if k in result[key] else str(k)] for k in x])
        ax.loglog(x, y, "o-", label="measured")
        ax.loglog(x, y[0] * (x / x[0]), "k--", lw=1, label="slope 1 (expected)")
        ax.set_xlabel(label)
        ax.set_ylabel("scan kernel [s]")
        ax.legend(fontsize=8)
        ax.grid(True, which="both", alpha=0.3)
    fig.suptitle(f"scan cost (nside 8, 200 frequencies), load average {result['load_average']}", fontsize=9)
    fig.tight_layout()
    from cwsearch.core.plotting import save_figure

    save_figure(fig, path)


def _local_cluster(n):
    from distributed import LocalCluster

    return LocalCluster(n_workers=n, threads_per_worker=1, processes=True, dashboard_address=":0",
                        silence_logs=40)


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m bench.scale", description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--cases", default="a,b",
                        help="which cases (a: 116 x 2000, b: 100 x 10000, or PULSARSxTOAS such as 8x200)")
    parser.add_argument("--limits-cases", default="a", help="cases that also run the limits map")
    parser.add_argument("--workers", type=int, default=1, help="local worker processes for the task loops")
    parser.add_argument("--scheduler", default=None, help="address of a running Dask scheduler")
    parser.add_argument("--local-cluster", type=int, default=0, metavar="N",
                        help="start a Dask LocalCluster of N workers here and use it")
    parser.add_argument("--no-correlated", action="store_true", help="skip the correlated-background scan")
    parser.add_argument("--no-noise", action="store_true", help="skip the noise stage (the longest step at these "
                                                                "sizes)")
    parser.add_argument("--likelihood-repeats", type=int, default=3)
    parser.add_argument("--limits-frequencies", type=int, default=8,
                        help="frequencies of the default grid in the limits map (spread over the band; the "
                             "full-grid time is extrapolated)")
    parser.add_argument("--scan-on-runner", "--scan-on-engine", dest="scan_on_runner", action="store_true",
                        help="also send the scan's frequency chunks to the runner (default: the scan runs in this "
                             "process with threaded kernels; the runner serves the limits map); --scan-on-engine "
                             "is its old name")
    parser.add_argument("--compare-serial", action="store_true",
                        help="with --workers/--scheduler/--local-cluster: also run the limits map serially, "
                             "report the speed-up and the largest relative difference")
    parser.add_argument("--sweep", action="store_true", help="cost vs N_psr and N_TOA, plotted")
    parser.add_argument("--json", default=str(RESULTS / "scale.json"))
    parser.add_argument("--case", help=argparse.SUPPRESS)
    parser.add_argument("--save-limits", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.case:
        return run_case(args)

    cluster = _local_cluster(args.local_cluster) if args.local_cluster else None
    scheduler = cluster.scheduler_address if cluster is not None else args.scheduler
    results = {"cpus": os.cpu_count(), "runner": f"dask {scheduler}" if scheduler else f"{args.workers} workers",
               "cases": {}}
    try:
        for case in args.cases.split(","):
            argv_case = [sys.executable, "-m", "bench.scale", "--case", case, "--workers", str(args.workers),
                         "--limits-cases", args.limits_cases, "--likelihood-repeats", str(args.likelihood_repeats),
                         "--limits-frequencies", str(args.limits_frequencies)]
            if scheduler:
                argv_case += ["--scheduler", scheduler]
            if args.no_correlated:
                argv_case.append("--no-correlated")
            if args.no_noise:
                argv_case.append("--no-noise")
            if args.compare_serial:
                argv_case.append("--compare-serial")
            if args.scan_on_runner:
                argv_case.append("--scan-on-runner")
            run = subprocess.run(argv_case, capture_output=True, text=True)
            lines = [ln for ln in run.stdout.splitlines() if ln.startswith("RESULT ")]
            if run.returncode or not lines:
                print(f"case {case} failed:\n{run.stderr[-3000:]}", file=sys.stderr)
                continue
            res = json.loads(lines[-1][len("RESULT "):])
            results["cases"][case] = res
            _print_case(res)
        if args.sweep:
            results["sweep"] = sweep()
            plot_sweep(results["sweep"], RESULTS / "scale.png")
            print(f"sweep: {results['sweep']} -> {RESULTS / 'scale.png'}")
    finally:
        if cluster is not None:
            cluster.close()
    if args.json:
        from cwsearch.core.fileio import write_json_atomic

        write_json_atomic(args.json, results)
    return results


def _print_case(res):
    print(f"case {res['case']}: {res['n_pulsars']} pulsars x {res['toas_per_pulsar']} TOAs "
          f"(process peak {res['peak_rss_gib']} GiB)")
    for key in ("simulate", "noise", "scan", "scan_correlated", "likelihood", "limits"):
        if key not in res:
            continue
        r = res[key]
        if "seconds" not in r:
            print(f"  {key:16s} {r.get('status')}")
            continue
        extra = ""
        if key == "likelihood":
            extra = f", {r['evaluations_per_second']:.0f} evaluations/s"
        if key == "scan":
            extra = f", {r['n_frequencies']} frequencies x {r['n_pixels']} pixels"
        if key == "limits":
            extra = (f", {r['n_pixels']} pixels x {r['n_frequencies']} frequencies on {r['runner']} "
                     f"(default grid {r['n_frequencies_default_grid']} frequencies: "
                     f"~{r['extrapolated_full_grid_seconds']:.0f} s extrapolated)")
            if "speedup" in r:
                extra += (f"; serial {r['serial_seconds']:.1f} s (load {r['load_average_serial']}), speed-up "
                          f"{r['speedup']:.2f}x, max relative difference {r['max_relative_difference']:.1e}")
        print(f"  {key:16s} {r['seconds']:8.2f} s, +{r['peak_extra_gib']:.2f} GiB{extra} (load {r['load_average']})")


if __name__ == "__main__":
    main()
