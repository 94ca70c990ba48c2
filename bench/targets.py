"""Benchmark and calibration of the targets stage (issue 20): ``python -m bench.targets``.

Two parts, each printing its measured figures:

* ``speed`` — the bench array of docs/design.md §12 (50 pulsars × 1000 TOAs, red noise and a common process,
  modelled Hellings–Downs correlated unless ``--uncorrelated``), ``--targets`` band-searched targets
  (default 10,000, isotropic) on ``--frequencies`` bins: the statistic (projections + Fe at every target,
  maximised over the band), the null calibration with ``--null-sims`` noise-only simulations, and the
  per-target chirp-mass limits; the same statistic for a tenth of the targets is timed in the same run
  (the scaling with targets), and the null cost per simulation (the scaling with null draws).
* ``calibration`` — an invented array (``--cal-pulsars`` × ``--cal-toas``, white noise), an invented
  catalogue of ``--cal-targets`` (default 1,000) galaxies (a third with periods), ``--datasets`` (default
  1,000, at least the 50 of issue 20) noise-only datasets, each searched by the stage's functions against
  ``--cal-null-sims`` independent noise-only simulations: the number of datasets whose smallest Holm
  family-wise p-value is below 0.05 against the binomial expectation (also for the first 50 datasets alone);
  KS tests (scipy.stats.kstest) of the p-values against uniform — one target per dataset (target i of
  dataset i, so the values are independent) and, for information, all p-values pooled (targets of one
  dataset share its noise, so the pooled KS test overstates the evidence); then one
  dataset with a binary planted in one galaxy at its catalogued period through the whole stage
  (``run_targets``): its rank and whether it is handed to the follow-up.

Results go to ``bench/results/targets.json`` and the figures ``bench/results/targets_pp.png`` (p–p plot of
the noise-only p-values) and ``bench/results/targets_family.png`` (the datasets' smallest family-wise
p-values).

Examples
--------
>>> from bench.targets import parse_args
>>> parse_args(["--only", "speed", "--targets", "100"]).targets
100
"""

from __future__ import annotations

import argparse
import json
import os
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

RESULTS = Path(__file__).resolve().parent / "results"


def parse_args(argv=None):
    p = argparse.ArgumentParser(prog="python -m bench.targets", description=__doc__.split("\n\n")[0])
    p.add_argument("--only", choices=("speed", "calibration"), default=None)
    p.add_argument("--targets", type=int, default=10_000)
    p.add_argument("--frequencies", type=int, default=500)
    p.add_argument("--null-sims", type=int, default=32)
    p.add_argument("--uncorrelated", action="store_true", help="model the common process as uncorrelated")
    p.add_argument("--limits-quadrature", default="fast", choices=("fast", "standard", "fine"))
    p.add_argument("--cal-pulsars", type=int, default=20)
    p.add_argument("--cal-toas", type=int, default=150)
    p.add_argument("--cal-targets", type=int, default=1000)
    p.add_argument("--datasets", type=int, default=1000)
    p.add_argument("--cal-null-sims", type=int, default=100)
    p.add_argument("--seed", type=int, default=2026)
    return p.parse_args(argv)


def _load():
    return os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")


def speed(args):
    from bench._array import bench_array
    from cwsearch.inference import targeted
    from cwsearch.inference.execution import TaskRunner
    from cwsearch.physics import fstat
    from cwsearch.physics.correlated import array_noise

    array, noise = bench_array()
    if args.uncorrelated:
        noise = replace(noise, common_correlation="uncorrelated")
    out = {"load_average_start": _load(), "targets": args.targets, "pulsars": len(array),
           "common_correlation": noise.common_correlation}
    freqs = fstat.frequency_grid(array, oversample=2)[: args.frequencies]
    out["frequencies"] = int(freqs.size)
    rng = np.random.default_rng(args.seed)
    ra, dec = targeted.random_sky(args.targets, rng)
    lo, hi = np.zeros(args.targets, np.int64), np.full(args.targets, freqs.size - 1, np.int64)

    t = time.time()
    engine = array_noise(array, noise)
    out["engine_seconds"] = time.time() - t
    t = time.time()
    proj = engine.projections(freqs)
    out["projection_seconds"] = time.time() - t
    small = max(1, args.targets // 10)
    targeted.target_statistics(engine, proj, ra[:small], dec[:small], lo[:small], hi[:small])   # warm-up, compile
    t = time.time()
    targeted.target_statistics(engine, proj, ra[:small], dec[:small], lo[:small], hi[:small])
    out["statistic_seconds_tenth"] = time.time() - t
    t = time.time()
    stat, _ = targeted.target_statistics(engine, proj, ra, dec, lo, hi)
    out["statistic_seconds"] = time.time() - t
    out["band_search_seconds"] = out["projection_seconds"] + out["statistic_seconds"]
    t = time.time()
    null = targeted.simulated_window_maxima(engine, freqs, ra, dec, lo, hi, args.null_sims, args.seed + 1)
    out["null_seconds"] = time.time() - t
    out["null_seconds_per_simulation"] = out["null_seconds"] / max(args.null_sims, 1)
    p, method, n_pool = targeted.calibrated_p_values(stat, null, hi - lo + 1)
    out["pooled_null_draws"] = int(n_pool[0])
    out["tail_p_values"] = int(np.sum(method == "tail"))
    out["smallest_family_wise_p"] = float(np.nanmin(targeted.holm(p)))
    t = time.time()
    with TaskRunner(workers=None) as runner:
        h, mc, _ = targeted.target_limits(engine, proj, ra, dec, -np.ones(args.targets, np.int64),
                                          np.full(args.targets, 100.0), quadrature=args.limits_quadrature,
                                          runner=runner)
        out["limits_runner"] = runner.describe()
    out["limits_seconds"] = time.time() - t
    out["limits_quadrature"] = args.limits_quadrature
    out["median_chirp_mass_95_at_100_mpc"] = float(np.nanmedian(mc[np.isfinite(mc)]))
    out["load_average_end"] = _load()
    ratio = out["statistic_seconds"] / max(out["statistic_seconds_tenth"], 1e-9)
    print(f"bench array {len(array)} pulsars, {freqs.size} frequencies, {args.targets} band-searched targets, "
          f"common process {noise.common_correlation} (load average {out['load_average_start']:.1f})")
    print(f"  noise engine build           {out['engine_seconds']:8.1f} s")
    print(f"  projections (data)           {out['projection_seconds']:8.1f} s")
    print(f"  statistic, {args.targets:>6} targets     {out['statistic_seconds']:8.1f} s   "
          f"({small} targets: {out['statistic_seconds_tenth']:.2f} s; ratio {ratio:.1f} for "
          f"{args.targets / small:.0f}x the targets)")
    print(f"  band search total            {out['band_search_seconds']:8.1f} s   (target <= 120 s)")
    print(f"  null: {args.null_sims} simulations        {out['null_seconds']:8.1f} s   "
          f"({out['null_seconds_per_simulation']:.2f} s each; {out['pooled_null_draws']:,} pooled draws; "
          f"target <= 600 s)")
    print(f"  chirp-mass limits ({args.limits_quadrature})      {out['limits_seconds']:8.1f} s   on {out['limits_runner']}")
    print(f"  noise-only bench data: smallest family-wise p = {out['smallest_family_wise_p']:.3g}")
    return out


def calibration(args):
    from astropy.table import Table
    import astropy.units as u
    from scipy import stats

    from cwsearch.core.constants import DAY_SECONDS, YEAR_SECONDS
    from cwsearch.inference import targeted
    from cwsearch.physics import fstat
    from cwsearch.physics.correlated import array_noise
    from cwsearch.physics.noise import NoiseSettings
    from cwsearch.physics.simulate import Binary, binary_residuals, invented_array, simulated_array
    from cwsearch.stages.targets.stage import TargetsOptions, run_targets

    t0 = time.time()
    noise = NoiseSettings(red_components=10, pulsar_red_noise=False)
    base = invented_array(n_pulsars=args.cal_pulsars, years=10, seed=args.seed, toas_per_pulsar=args.cal_toas)
    engine = array_noise(base, noise)
    freqs = fstat.frequency_grid(base, fmax=1e-7, oversample=2)
    rng = np.random.default_rng(args.seed + 5)
    n = args.cal_targets
    ra, dec = targeted.random_sky(n, rng)
    period = np.where(rng.random(n) < 1 / 3, rng.uniform(0.4, 4.0, n) * YEAR_SECONDS / DAY_SECONDS, np.nan)
    centre = targeted.gw_frequency_from_period(period)
    lo, hi, inside = targeted.frequency_windows(freqs, centre, 0.02 * centre, n_sigma=3, min_half_width=0.5 / base.span)
    ok = np.flatnonzero(inside)
    widths = hi - lo + 1
    null = targeted.simulated_window_maxima(engine, freqs, ra[ok], dec[ok], lo[ok], hi[ok], args.cal_null_sims,
                                            args.seed + 6)
    p_all, family_min = [], []
    for i in range(args.datasets):
        data = simulated_array(base, seed=args.seed + 100 + i, red=False)
        eng = array_noise(data, noise)
        stat, _ = targeted.target_statistics(eng, eng.projections(freqs), ra[ok], dec[ok], lo[ok], hi[ok])
        p, _, _ = targeted.calibrated_p_values(stat, null, widths[ok])
        p_all.append(p)
        family_min.append(float(np.min(targeted.holm(p))))
    one_each = np.array([p_all[i][i % ok.size] for i in range(len(p_all))])
    ks_one = stats.kstest(one_each, "uniform")
    p_all = np.concatenate(p_all)
    family_min = np.array(family_min)
    hits = int(np.sum(family_min < 0.05))
    hits50 = int(np.sum(family_min[:50] < 0.05))
    ks = stats.kstest(p_all, "uniform")
    out = {"pulsars": args.cal_pulsars, "toas": args.cal_toas, "targets": n, "searched": int(ok.size),
           "period_targets": int(np.sum(np.isfinite(period) & inside)), "datasets": args.datasets,
           "null_sims": args.cal_null_sims, "ks_pvalue_one_per_dataset": float(ks_one.pvalue),
           "ks_pvalue": float(ks_one.pvalue),
           "ks_pooled_pvalue": float(ks.pvalue), "ks_pooled_statistic": float(ks.statistic),
           "family_wise_below_0.05": hits, "binomial_expected": 0.05 * args.datasets,
           "binomial_99.9": float(stats.binom.ppf(0.999, args.datasets, 0.05)),
           "family_wise_below_0.05_first_50": hits50, "binomial_99.9_first_50": float(stats.binom.ppf(0.999, 50, 0.05)),
           "fraction_p_below": {str(x): float(np.mean(p_all < x)) for x in (1e-3, 0.01, 0.05, 0.1, 0.5)},
           "noise_only_seconds": time.time() - t0}

    # one planted binary, whole stage
    t1 = time.time()
    k = int(np.flatnonzero(np.isfinite(period) & inside)[0])
    scratch = tempfile.TemporaryDirectory(prefix="cwsearch-bench-targets-")   # the stage's run folder: not kept
    work = Path(scratch.name)
    Table({"name": [f"SIMGAL-B{i:05d}" for i in range(n)], "ra": np.degrees(ra) * u.deg, "dec": np.degrees(dec) * u.deg,
           "distance": rng.uniform(20, 300, n) * u.Mpc, "period": period * u.day,
           "period_err": 0.02 * period * u.day}).write(work / "catalog.ecsv", format="ascii.ecsv", overwrite=True)
    binary = Binary(ra=float(ra[k]), dec=float(dec[k]), gw_frequency=2 / (period[k] * DAY_SECONDS), chirp_mass=5e8,
                    strain=1.0, evolution="monochromatic", pulsar_term=False)
    signal = binary_residuals(base, binary)
    snr = 8.0
    scale = snr / engine.optimal_snr(signal)
    noisy = simulated_array(base, seed=args.seed + 99, red=False)
    data = noisy.with_residuals([q.residuals + scale * s for q, s in zip(noisy, signal)])
    res = run_targets(data, work / "run", TargetsOptions(catalog=str(work / "catalog.ecsv"), fmax=1e-7,
                                                         null_sims=args.cal_null_sims, quadrature="fast"),
                      noise=noise, progress=False)
    tab = res.results
    name = f"SIMGAL-B{k:05d}"
    row = tab[tab["name"] == name][0]
    out["planted"] = {"snr": snr, "name": name, "rank": int(row["rank"]), "p_value": float(row["p_value"]),
                      "p_family": float(row["p_family"]), "q_fdr": float(row["q_fdr"]),
                      "followed_up": bool(row["followed_up"]),
                      "followup": [f["name"] for f in res.summary["followup"]],
                      "stage_seconds": time.time() - t1}
    scratch.cleanup()
    _plots(p_all, family_min, out)
    print(f"calibration: {args.datasets} noise-only datasets x {ok.size} targets ({out['period_targets']} with a "
          f"period window), {args.cal_null_sims} simulations as the null")
    print(f"  KS test, one target per dataset ({one_each.size} independent p-values): p = {ks_one.pvalue:.3f}")
    print(f"  KS test of all {p_all.size} p-values pooled (correlated within a dataset): p = {ks.pvalue:.2g} "
          f"(D = {ks.statistic:.4f})")
    print("  fraction below p: " + ", ".join(f"{x}: {v:.4f}" for x, v in out["fraction_p_below"].items()))
    print(f"  datasets with a family-wise p < 0.05: {hits} of {args.datasets} (expected {0.05 * args.datasets:.1f}, "
          f"binomial 99.9 % point {out['binomial_99.9']:.0f}); first 50: {hits50} (99.9 % point "
          f"{out['binomial_99.9_first_50']:.0f})")
    pl = out["planted"]
    print(f"  planted binary (S/N {snr}) in {name}: rank {pl['rank']}, p = {pl['p_value']:.3g}, "
          f"family-wise {pl['p_family']:.3g}, FDR {pl['q_fdr']:.3g}, followed up: {pl['followed_up']}")
    return out


def _plots(p_all, family_min, out):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from scipy.stats import beta

    p = np.sort(p_all)
    m = p.size
    k = np.arange(1, m + 1)
    fig, ax = plt.subplots(figsize=(5.5, 5))
    ax.fill_between(k / (m + 1), beta.ppf(0.025, k, m - k + 1), beta.ppf(0.975, k, m - k + 1), color="0.85",
                    label="95 % band (uniform)")
    ax.plot([1 / (m + 1), 1], [1 / (m + 1), 1], color="0.4", ls="--", lw=1)
    ax.plot(k / (m + 1), p, color="tab:blue", lw=1.2, label=f"{out['datasets']} noise-only datasets x "
                                                          f"{out['searched']} targets")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("expected p-value")
    ax.set_ylabel("observed p-value")
    ax.set_title(f"Targets on noise-only data (KS, one target per dataset: p = {out['ks_pvalue']:.2f})",
                 fontsize=10)
    ax.legend(fontsize=8)
    ax.grid(True, which="both", alpha=0.3)
    fig.savefig(RESULTS / "targets_pp.png", dpi=110, bbox_inches="tight")
    plt.close(fig)
    fig, ax = plt.subplots(figsize=(6, 4))
    ax.hist(np.log10(np.clip(family_min, 1e-6, 1)), bins=20, color="tab:blue")
    ax.axvline(np.log10(0.05), color="tab:red", ls="--", label="0.05")
    ax.set_xlabel("log10 smallest family-wise (Holm) p-value of a dataset")
    ax.set_ylabel("datasets")
    ax.set_title(f"{out['family_wise_below_0.05']} of {out['datasets']} datasets below 0.05 "
                 f"(expected {out['binomial_expected']:.1f})", fontsize=10)
    ax.legend(fontsize=8)
    fig.savefig(RESULTS / "targets_family.png", dpi=110, bbox_inches="tight")
    plt.close(fig)


def main(argv=None):
    args = parse_args(argv)
    RESULTS.mkdir(parents=True, exist_ok=True)
    path = RESULTS / "targets.json"
    try:
        result = json.loads(path.read_text())
    except (OSError, ValueError):
        result = {}
    if args.only in (None, "calibration"):
        result["calibration"] = calibration(args)
    if args.only in (None, "speed"):
        result["speed"] = speed(args)
    path.write_text(json.dumps(result, indent=2))
    print(f"results in {path}")


if __name__ == "__main__":
    main()
