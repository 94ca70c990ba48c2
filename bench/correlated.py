"""Benchmark of the correlated-background engine (docs/design.md §5b, §12): ``python -m bench.correlated``.

Prints, all measured in this run:

(a) build time and peak memory of :class:`cwsearch.physics.correlated.ArrayWeighting` on
    116 pulsars × 2,000 TOAs with K = 30 Fourier pairs (Hellings–Downs), against the
    build of the per-pulsar engine alone (the part it cannot avoid). Peak memory:
    ``tracemalloc`` (numpy allocations, in a second build) and the growth of the
    process's maximum resident set (``resource.ru_maxrss``).
(b) all-sky Fe scan of the bench array (50 pulsars × 1,000 TOAs, 3072 pixels,
    500 frequencies): the per-pulsar scan without a common process (reference) and
    the correlated scan (weighted data, projections, Ψ and the cross-pulsar corrections,
    sky kernel, with the pixel sums in single precision as the scan stage runs it; the double-precision
    kernel and the difference are printed beside), and their ratio (target ≤ 3), in wall time and in CPU seconds
    of the process; ``--rounds`` interleaved rounds (default 2), best of each.
(c) full-shape ln-likelihood evaluations/s of :class:`CorrelatedLikelihood` on a
    20-pulsar × 200-TOA array (batches of 160 walkers), against the uncorrelated
    :class:`cwsearch.inference.likelihood.Likelihood` on the same array and batches, on the
    default shape path (``auto``: Chebyshev nodes) and on the direct path (every TOA); the
    engines take turns over three rounds and each keeps its best round.

Writes the figures to ``bench/results/correlated.json`` (``--json PATH``; ``--json ''`` skips).

Options: ``--skip-build``, ``--skip-scan``, ``--skip-likelihood``, ``--components``
(K of the likelihood array's common process, default 30), ``--common-components`` (K of the
common process in (a) and (b), default 30; 0: 14 for (a) and, for (b),
:func:`cwsearch.physics.correlated.common_components_needed` of the bench array). The machine has 2 cores
shared with other jobs: every figure is slowed alike, and the load average is printed.
"""

from __future__ import annotations

import argparse
import gc
import os
import resource
import time
import tracemalloc
from pathlib import Path

import numpy as np


def _header():
    try:
        load = os.getloadavg()[0]
    except OSError:
        load = float("nan")
    a = np.random.default_rng(0).standard_normal((1500, 1500))
    a @ a
    t = time.perf_counter()
    a @ a
    rate = 2 * 1500**3 / (time.perf_counter() - t) / 1e9
    print(f"machine: {os.cpu_count()} CPUs, load average {load:.1f} — shared with other jobs, figures are noisy; "
          f"numpy matrix multiply now {rate:.0f} GFLOP/s")
    return {"cpus": os.cpu_count(), "load_average_start": load, "matmul_gflops": rate}


def bench_build(k_common=30):
    from cwsearch.physics.correlated import ArrayWeighting, CommonProcess
    from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
    from cwsearch.physics.simulate import invented_array, simulated_array

    base = invented_array(n_pulsars=116, years=15.0, seed=7, toas_per_pulsar=2000, red_noise_fraction=1.0,
                          full_span=True)
    array = simulated_array(base, seed=8, red=False, fit_timing_model=False)
    settings = NoiseSettings(red_components=30)
    common = CommonProcess(-14.6, 13 / 3, k_common, "hellings-downs")
    gc.collect()
    t = time.perf_counter()
    NoiseWeighting(array, settings)
    t_pulsar = time.perf_counter() - t
    gc.collect()
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t = time.perf_counter()
    aw = ArrayWeighting(array, settings, common)
    t_build = time.perf_counter() - t
    rss1 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t = time.perf_counter()
    aw.with_common(-14.3, 4.0)
    t_rebuild = time.perf_counter() - t
    del aw
    gc.collect()
    tracemalloc.start()
    aw = ArrayWeighting(array, settings, common)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"(a) engine build, 116 pulsars x 2000 TOAs, per-pulsar K = 30, common K = {k_common} (S~ of size {aw.rank}):")
    print(f"    build {t_build:.2f} s (target <= 10 s); per-pulsar engines alone {t_pulsar:.2f} s "
          f"(ratio {t_build / t_pulsar:.1f}); rebuild for new (log10 A, gamma) {t_rebuild:.2f} s")
    print(f"    peak numpy memory (tracemalloc) {peak / 2**30:.2f} GiB (target <= 2 GiB); "
          f"max-RSS growth {(rss1 - rss0) / 2**20:.2f} GiB")
    return {"common_components": k_common, "woodbury_size": aw.rank, "build_seconds": t_build,
            "per_pulsar_build_seconds": t_pulsar, "ratio_to_per_pulsar": t_build / t_pulsar,
            "rebuild_seconds": t_rebuild, "peak_numpy_gib": peak / 2**30, "max_rss_growth_gib": (rss1 - rss0) / 2**20,
            "load_average": os.getloadavg()[0]}


def bench_scan(k_common=None, rounds=2):
    from bench._array import COMMON_INDEX, COMMON_LOG10_AMPLITUDE, RED_COMPONENTS, bench_array
    from cwsearch.physics import fstat
    from cwsearch.stages.scan import stage as scan
    from cwsearch.physics.correlated import ArrayWeighting, CommonProcess, fe_sky_correlated
    from cwsearch.physics.noise import NoiseSettings, NoiseWeighting

    array, _ = bench_array()
    settings = NoiseSettings(red_components=RED_COMPONENTS)
    frequencies = 1 / array.span + np.arange(500) / (2 * array.span)
    ra, dec, fplus, fcross = scan.sky_grid(array, 16)
    engine = NoiseWeighting(array, settings)
    from cwsearch.physics.correlated import common_components_needed

    needed = common_components_needed(array, NoiseSettings(red_components=RED_COMPONENTS,
                                                           common_log10_amplitude=COMMON_LOG10_AMPLITUDE,
                                                           common_index=COMMON_INDEX))
    k_common = RED_COMPONENTS if k_common is None else (needed if k_common == 0 else k_common)
    common = CommonProcess(COMMON_LOG10_AMPLITUDE, COMMON_INDEX, k_common, "hellings-downs")
    aw = ArrayWeighting(array, settings, common)
    # warm-up (numba compilation or cache load)
    small = aw.projections(frequencies[:4])
    for single in (True, False):
        fe_sky_correlated(small, aw.scan_corrections(frequencies[:4]), fplus[:8], fcross[:8], single_precision=single)
    fstat.fe_sky(fstat.project(engine, frequencies[:4]), fplus[:8], fcross[:8])

    # interleaved rounds (reference, then correlated), each figure its best round: the load of the shared
    # machine changes within seconds. CPU seconds of the process (all threads) beside the wall times: on a
    # machine loaded past its cores their ratio says more than the wall-time ratio
    t_plain = t_build = t_proj = t_corr = t_sky = t_sky_double = c_plain = c_corr = np.inf
    for _ in range(rounds):
        t, c = time.perf_counter(), time.process_time()
        proj = fstat.project(engine, frequencies)
        fstat.fe_sky(proj, fplus, fcross, map_dtype=np.float32)
        t_plain = min(t_plain, time.perf_counter() - t)
        c_plain = min(c_plain, time.process_time() - c)

        t = time.perf_counter()
        aw2 = ArrayWeighting(array, settings, common)
        t_build = min(t_build, time.perf_counter() - t)
        c = time.process_time()
        t = time.perf_counter()
        proj_c = aw2.projections(frequencies)
        t_proj = min(t_proj, time.perf_counter() - t)
        t = time.perf_counter()
        corr = aw2.scan_corrections(frequencies)
        t_corr = min(t_corr, time.perf_counter() - t)
        t = time.perf_counter()
        # the scan stage's path (ArrayNoise.fe_sky): pair sums in single precision, maxima in double
        single = fe_sky_correlated(proj_c, corr, fplus, fcross, map_dtype=np.float32, single_precision=True)
        t_sky = min(t_sky, time.perf_counter() - t)
        c_corr = min(c_corr, time.process_time() - c)
        t = time.perf_counter()
        double = fe_sky_correlated(proj_c, corr, fplus, fcross, map_dtype=np.float32)
        t_sky_double = min(t_sky_double, time.perf_counter() - t)
        del aw2, proj_c, corr
    kept = double.fe_map > 0
    map_error = float(np.max(np.abs(single.fe_map.astype(float) - double.fe_map)[kept] / double.fe_map[kept]))
    kept = double.fe_max > 0
    max_error = float(np.max(np.abs(single.fe_max - double.fe_max)[kept] / double.fe_max[kept]))
    t_corr_total = t_proj + t_corr + t_sky
    print(f"(b) Fe sky scan, {len(array)} pulsars x {array[0].n_toas} TOAs, {ra.size} pixels x "
          f"{frequencies.size} frequencies:")
    print(f"    per-pulsar noise, no common process: {t_plain:.2f} s (reference)")
    print(f"    correlated (Hellings-Downs, common K = {k_common}; K where the background falls below 1 % of the "
          f"best pulsar's white level: {needed}): {t_corr_total:.2f} s = projections of d~ "
          f"{t_proj:.2f} + Psi and cross-pulsar blocks W_pq(f) {t_corr:.2f} + sky kernel {t_sky:.2f}; "
          f"engine build {t_build:.2f} s")
    print(f"    sky kernel in double precision throughout: {t_sky_double:.2f} s; single-precision pair sums: map "
          f"values within {map_error:.1e} relative of it, per-frequency maxima within {max_error:.1e}")
    print(f"    ratio correlated / reference: {t_corr_total / t_plain:.2f} (target <= 3); "
          f"including the engine build {(t_corr_total + t_build) / t_plain:.2f}")
    print(f"    CPU seconds (all threads, best of {rounds} rounds): correlated {c_corr:.2f} against {c_plain:.2f} "
          f"(ratio {c_corr / c_plain:.2f})")
    return {"common_components": k_common, "components_needed": needed, "reference_seconds": t_plain,
            "correlated_seconds": t_corr_total, "projections_seconds": t_proj, "corrections_seconds": t_corr,
            "sky_kernel_seconds": t_sky, "sky_kernel_double_seconds": t_sky_double,
            "single_precision_map_relative_error": map_error, "single_precision_max_relative_error": max_error,
            "engine_build_seconds": t_build, "ratio": t_corr_total / t_plain,
            "ratio_with_build": (t_corr_total + t_build) / t_plain, "reference_cpu_seconds": c_plain,
            "correlated_cpu_seconds": c_corr, "cpu_ratio": c_corr / c_plain, "rounds": rounds,
            "load_average": os.getloadavg()[0]}


def bench_likelihood(components=30, walkers=160, repeats=5, rounds=3):
    from cwsearch.inference.correlated_likelihood import CorrelatedLikelihood
    from cwsearch.physics.correlated import ArrayWeighting, CommonProcess
    from cwsearch.inference.likelihood import Likelihood
    from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
    from cwsearch.physics.simulate import invented_array, simulated_array

    base = invented_array(n_pulsars=20, years=15.0, seed=11, toas_per_pulsar=200, red_noise_fraction=0.3,
                          full_span=True)
    array = simulated_array(base, seed=12, background_log10_amplitude=-14.4, background_components=components)
    settings = NoiseSettings(red_components=components)
    aw = ArrayWeighting(array, settings, CommonProcess(-14.4, 13 / 3, components, "hellings-downs"))
    per_pulsar = NoiseWeighting(array, NoiseSettings(red_components=components, common_log10_amplitude=-14.4))
    likes = {(path, kind): (CorrelatedLikelihood(array, aw, shape_path=path) if kind == "correlated"
                            else Likelihood(array, per_pulsar, shape_path=path))
             for path in ("auto", "direct") for kind in ("correlated", "uncorrelated")}
    rng = np.random.default_rng(1)

    def theta(n):
        return np.column_stack([rng.uniform(0, 2 * np.pi, n), rng.uniform(-1, 1, n),
                                np.log10(2e-8) + rng.uniform(-0.02, 0.02, n), rng.uniform(7, 9.5, n),
                                rng.uniform(-14.5, -13.5, n), rng.uniform(-1, 1, n), rng.uniform(0, np.pi, n),
                                rng.uniform(0, np.pi, n)])

    batches = [theta(walkers) for _ in range(repeats)]
    for obj in likes.values():
        obj.batch(theta(4))
        obj.batch(theta(walkers))
    # interleaved rounds, best round per engine: the load of the shared machine changes within seconds
    seconds = {key: np.inf for key in likes}
    for _ in range(rounds):
        for key, obj in likes.items():
            t = time.perf_counter()
            for th in batches:
                obj.batch(th)
            seconds[key] = min(seconds[key], time.perf_counter() - t)
    rates = {key: repeats * walkers / sec for key, sec in seconds.items()}
    print(f"(c) full-shape ln-likelihood, 20 pulsars x 200 TOAs, K = {components}, batches of {walkers} "
          f"(best of {rounds} interleaved rounds of {repeats} batches):")
    for path in ("auto", "direct"):
        c, u = rates[(path, "correlated")], rates[(path, "uncorrelated")]
        label = "default shape path (auto: Chebyshev nodes)" if path == "auto" else "direct path (every TOA)"
        print(f"    {label}: correlated (HD, mean-field pulsar phases) {c:.0f} evaluations/s (target >= 2000); "
              f"uncorrelated {u:.0f}/s (ratio {u / c:.1f})")
    return {"components": components, "walkers": walkers,
            "correlated_per_second": rates[("auto", "correlated")],
            "uncorrelated_per_second": rates[("auto", "uncorrelated")],
            "ratio_uncorrelated_to_correlated": rates[("auto", "uncorrelated")] / rates[("auto", "correlated")],
            "direct_correlated_per_second": rates[("direct", "correlated")],
            "direct_uncorrelated_per_second": rates[("direct", "uncorrelated")],
            "load_average": os.getloadavg()[0]}


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m bench.correlated", description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--skip-build", action="store_true")
    parser.add_argument("--skip-scan", action="store_true")
    parser.add_argument("--skip-likelihood", action="store_true")
    parser.add_argument("--components", type=int, default=30)
    parser.add_argument("--rounds", type=int, default=2, help="interleaved rounds of the scan figures (best kept)")
    parser.add_argument("--common-components", type=int, default=30,
                        help="K of the common process for (a) and (b); 0: (b) takes the K where the background "
                             "falls below 1 %% of the best pulsar's white level (common_components_needed), (a) 14")
    parser.add_argument("--json", default=str(Path(__file__).parent / "results" / "correlated.json"),
                        help="write the figures here ('' to skip)")
    args = parser.parse_args(argv)
    out = {"machine": _header()}
    if not args.skip_build:
        out["build"] = bench_build(args.common_components or 14)
    if not args.skip_scan:
        out["scan"] = bench_scan(args.common_components, args.rounds)
    if not args.skip_likelihood:
        out["likelihood"] = bench_likelihood(args.components)
    if args.json:
        from cwsearch.core.fileio import write_json_atomic

        write_json_atomic(args.json, out)


if __name__ == "__main__":
    main()
