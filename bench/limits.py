"""Benchmark of the upper-limits stage (docs/design.md §12): ``python -m bench.limits``.

On the bench array (50 pulsars × 1000 TOAs, 15 yr, red noise + common
process; :mod:`bench._array`) it measures

1. the per-pixel Bayesian h95 map, 768 pixels (nside 8) × 1 frequency, with
   local worker processes (``--workers``, default 2): target ≤ 60 s on 2 cores
   (projection + sky vectors + quadrature, worker start-up included);
2. the same map on a ``dask.distributed.LocalCluster`` with 1 and with 2
   single-threaded worker processes (each cluster warmed up first, so numba's
   cache is loaded): target speed-up ≥ 1.7×;
3. that all three engines give the same numbers (to 1e-12 relative, ``cwsearch.data.compare``;
   recomputed floats are never compared bit for bit), with the worst difference;
4. on the bundled demo dataset (31 pulsars; dataset noise model), the cost of the
   pulsar-term-inclusive Bayesian limit (``--pulsar-term``, distances marginalised by
   Monte Carlo, docs/design.md §9) against the Earth-term limit on the same pixels and
   frequencies, measured in the same run: both timings and their ratio (target <= 3x to
   make it the default), the ratio of the two limits over the pixels and the limit's
   Monte Carlo error (``--pt-only`` runs only this part).

Prints each figure with its target and the ratio; the machine's load average
is printed too, because other processes on the same cores slow every figure.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np


def _limits_map(proj, ra, dec, quadrature, **engine):
    from cwsearch.stages.limits.stage import compute_limits

    t = time.perf_counter()
    res = compute_limits(proj, ra, dec, method="bayes", quadrature=quadrature, progress=False, **engine)
    return res, time.perf_counter() - t


def _warm_worker(quadrature):
    """Import the limits kernels and load numba's cache in a worker (run on every worker before timing)."""
    import numpy as np

    from cwsearch.stages.limits import stage as limits

    limits.bayes_rows(np.zeros((1, 4)), np.eye(4)[None] * 1e16, grid=limits.QUADRATURE[quadrature])
    limits.frequentist_rows(np.eye(4)[None] * 1e16, 5.0)
    return True


def _dask_run(n_workers, proj, ra, dec, quadrature):
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, dashboard_address=":0",
                      silence_logs=40) as cluster:
        with Client(cluster.scheduler_address) as client:
            client.wait_for_workers(n_workers)
            client.run(_warm_worker, quadrature)
        return _limits_map(proj, ra, dec, quadrature, scheduler=cluster.scheduler_address)


def pulsar_term_cost(nside=2, n_frequencies=6, draws=None, quadrature="standard", seed=0):
    """Part 4: Earth-term versus pulsar-term limit on the demo (same rows, one process, numba warm)."""
    from cwsearch.commands.demo import demo_paths
    from cwsearch.data.dataset import read_dataset
    from cwsearch.inference.pulsar_term_limits import DEFAULT_DRAWS
    from cwsearch.physics import fstat, sky
    from cwsearch.physics.correlated import array_noise
    from cwsearch.physics.noise import NoiseSettings
    from cwsearch.stages.limits.stage import compute_limits

    draws = DEFAULT_DRAWS if draws is None else int(draws)
    array = read_dataset(demo_paths()[0])
    frequencies = fstat.frequency_grid(array, fmax=1e-7)[:n_frequencies]
    engine = array_noise(array, NoiseSettings())
    proj = engine.projections(frequencies)
    ra, dec = sky.pixel_centres(nside)
    common = dict(method="bayes", quadrature=quadrature, workers=1, progress=False, noise=engine)
    pt = dict(pulsar_term=True, pulsar_term_draws=draws, seed=seed, array=array)
    compute_limits(proj, ra[:1], dec[:1], **common)                       # numba warm-up
    compute_limits(proj, ra[:1], dec[:1], **common, **pt)
    t = time.perf_counter()
    earth = compute_limits(proj, ra, dec, **common)
    t_earth = time.perf_counter() - t
    t = time.perf_counter()
    both = compute_limits(proj, ra, dec, **common, **pt)
    t_pt = time.perf_counter() - t
    rows = ra.size * frequencies.size
    ratio = t_pt / t_earth
    print(f"[4] demo ({len(array)} pulsars), {ra.size} pixels x {frequencies.size} frequencies "
          f"({frequencies[0]:.2e}-{frequencies[-1]:.2e} Hz), quadrature '{quadrature}', one process:")
    print(f"    Earth-term limit {t_earth:.2f} s ({1e3 * t_earth / rows:.2f} ms per pixel x frequency); "
          f"Earth + pulsar term, {draws} distance draws {t_pt:.2f} s ({1e3 * t_pt / rows:.1f} ms); "
          f"cost ratio {ratio:.1f}x  target <= 3x (default)  ratio to target {ratio / 3:.1f}")
    lim = both["bayes"] / earth["bayes"]
    err = both["bayes_mc_error"] / both["bayes"]
    print(f"    pulsar-term / Earth-term limit over pixels x frequencies: median {np.median(lim):.3f}, "
          f"range {lim.min():.3f}-{lim.max():.3f}")
    print(f"    Monte Carlo error of the pulsar-term limit (delta method): median {100 * np.median(err):.2f} %, "
          f"largest {100 * err.max():.2f} %; effective draws median {np.median(both['bayes_ess']):.1f} of {draws}")
    return {"t_earth": t_earth, "t_pulsar_term": t_pt, "ratio": ratio, "limit_ratio": lim, "mc_error": err}


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m bench.limits", description=__doc__.split("\n\n")[0])
    parser.add_argument("--nside", type=int, default=8)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--quadrature", default="standard", choices=("fast", "standard", "fine"))
    parser.add_argument("--frequency", type=float, default=None, help="GW frequency [Hz] (default 5/T_span)")
    parser.add_argument("--no-dask", action="store_true")
    parser.add_argument("--pt-only", action="store_true", help="run only part 4 (pulsar-term cost on the demo)")
    parser.add_argument("--pt-draws", type=int, default=None, help="distance draws of part 4 (default: the stage's)")
    args = parser.parse_args(argv)
    if args.pt_only:
        pulsar_term_cost(draws=args.pt_draws)
        return

    from bench._array import bench_array
    from cwsearch.physics import fstat, sky
    from cwsearch.physics.noise import NoiseWeighting

    print(f"load average before: {os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs")
    array, noise = bench_array()
    frequency = args.frequency or 5.0 / array.span
    ra, dec = sky.pixel_centres(args.nside)
    print(f"bench array: {len(array)} pulsars x {array[0].n_toas} TOAs; {ra.size} pixels x 1 frequency "
          f"({frequency:.3e} Hz), quadrature '{args.quadrature}'")

    t0 = time.perf_counter()
    proj = fstat.project(NoiseWeighting(array, noise), np.array([frequency]))
    t_proj = time.perf_counter() - t0
    # warm numba's cache in this process (compilation is not what we measure)
    _limits_map(proj, ra[:2], dec[:2], args.quadrature, workers=1)

    local, t_local = _limits_map(proj, ra, dec, args.quadrature, workers=args.workers)
    total = t_proj + t_local
    print(f"[1] local, {args.workers} worker processes: {total:.2f} s (noise weighting + projection "
          f"{t_proj:.2f} s, limits {t_local:.2f} s incl. worker start-up)  target <= 60 s  "
          f"ratio to target {total / 60:.2f}")
    h95 = local["bayes"][:, 0]
    print(f"    h95 per pixel: best {h95.min():.3e}, median {np.median(h95):.3e}, worst {h95.max():.3e}")

    if not args.no_dask:
        one, t_one = _dask_run(1, proj, ra, dec, args.quadrature)
        two, t_two = _dask_run(2, proj, ra, dec, args.quadrature)
        speedup = t_one / t_two
        print(f"[2] Dask LocalCluster: 1 worker {t_one:.2f} s, 2 workers {t_two:.2f} s, speed-up "
              f"{speedup:.2f}x  target >= 1.7x  ratio to target {speedup / 1.7:.2f}")
        from cwsearch.data.compare import RTOL, Comparison, compare_arrays

        same = Comparison()
        for label, r in (("Dask 1 worker", one), ("Dask 2 workers", two)):
            for k in ("bayes", "bayes_log_evidence"):
                same.merge(compare_arrays(r[k], local[k], where=f"{label} {k}"))
        print(f"[3] same results (rtol {RTOL:g}) on local processes, Dask 1 worker and Dask 2 workers: "
              f"{same.ok}; {same.describe()}")
    pulsar_term_cost(draws=args.pt_draws)
    print(f"load average after: {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
