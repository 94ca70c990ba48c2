"""Follow-up wall time on the docs/design.md §12 bench array for an SNR ≈ 15 injection.

``python -m bench.followup`` injects one binary (full evolution, Earth and
pulsar terms, optimal SNR 15 measured with the noise engine) into the bench
array, runs the follow-up stage from a start point slightly off the truth
(as a scan candidate would give), and prints the wall time to the effective
sample size target (default 1000; target ≤ 10 min on 2 cores), the iteration
count, likelihood evaluations per second, whether the 90 % intervals contain
the truth, and the log Bayes factor. ``--max-time`` caps the run; if the cap
is hit, the ESS reached and the time extrapolated to the target at the
measured ESS rate are printed instead. The reference figure measured in the
same run is the cost of one straightforward likelihood evaluation (signal
rebuilt with ``waveform.residuals`` and weighted each call), giving the time
the same number of evaluations would have taken that way.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time

import numpy as np


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ess", type=float, default=1000)
    parser.add_argument("--max-time", type=float, default=3600.0)
    parser.add_argument("--walkers", type=int, default=32)
    parser.add_argument("--temperatures", type=int, default=10)
    parser.add_argument("--snr", type=float, default=15.0)
    parser.add_argument("--out", default=None, help="run folder (default: a temporary folder)")
    args = parser.parse_args(argv)

    from bench._array import bench_array
    from cwsearch.physics import simulate
    from cwsearch.stages.followup.stage import FollowupOptions, run_followup
    from cwsearch.inference.likelihood import Likelihood
    from cwsearch.physics.noise import NoiseWeighting

    array, noise = bench_array()
    binary = simulate.Binary(ra=2.2, dec=-0.5, gw_frequency=1.5e-8, chirp_mass=6e8, strain=1e-14,
                             inclination=1.0, polarization=0.4, phase=0.9)
    engine = NoiseWeighting(array, noise)
    binary.strain *= args.snr / engine.optimal_snr(simulate.binary_residuals(array, binary))
    signal = simulate.binary_residuals(array, binary)
    data = array.with_residuals([simulate.postfit(p, p.residuals + s) for p, s in zip(array, signal)])
    options = FollowupOptions(frequency=binary.gw_frequency * 1.005, ra=np.degrees(binary.ra) + 1.5,
                              dec=np.degrees(binary.dec) - 1.5, ess=args.ess, max_time=args.max_time,
                              walkers=args.walkers, temperatures=args.temperatures, no_plots=True)
    out = args.out or tempfile.mkdtemp(prefix="cwsearch-bench-followup-")
    t = time.perf_counter()
    result = run_followup(data, out, options, noise=noise, seed=1, progress=True)
    wall = time.perf_counter() - t
    s = result.summary
    run = result.runs[0]

    like = Likelihood(data, noise)
    theta = np.array([[binary.ra, np.sin(binary.dec), np.log10(binary.gw_frequency), np.log10(binary.chirp_mass),
                       np.log10(binary.strain), np.cos(binary.inclination), binary.polarization, binary.phase]])
    like.reference(theta)
    t = time.perf_counter()
    for _ in range(5):
        like.reference(theta)
    ref_cost = (time.perf_counter() - t) / 5

    truth = {"frequency": binary.gw_frequency, "ra": np.degrees(binary.ra), "dec": np.degrees(binary.dec),
             "strain": binary.strain}
    inside = {k: s["parameters"][k]["interval_90"][0] <= v <= s["parameters"][k]["interval_90"][1]
              for k, v in truth.items()}
    print(f"bench array {len(array)} pulsars x {array[0].n_toas} TOAs; injection SNR {args.snr:g}; "
          f"{args.temperatures} temperatures x {args.walkers} walkers; load average {os.getloadavg()[0]:.1f} "
          f"on {os.cpu_count()} cores")
    print(f"stopped by {s['stopped_by']} after {s['iterations']} iterations, {wall:.0f} s wall "
          f"(sampler {s['wall_time']:.0f} s), ESS {s['effective_sample_size']:.0f}")
    if s["effective_sample_size"] < args.ess and s["effective_sample_size"] > 0:
        rate = s["effective_sample_size"] / max(s["iterations"] - s["burn_in"], 1)
        est = s["wall_time"] / s["iterations"] * (args.ess / rate) * 2
        print(f"time to ESS {args.ess:g} extrapolated at the measured rate (burn-in = half): {est:.0f} s")
    print(f"likelihood evaluations {run.evaluations}, {run.evaluations / s['wall_time']:.0f}/s; "
          f"straightforward evaluation {ref_cost * 1e3:.0f} ms each -> the same evaluations would take "
          f"{run.evaluations * ref_cost:.0f} s (x{run.evaluations * ref_cost / s['wall_time']:.0f})")
    print(f"90% intervals contain the truth: {inside}; ln B = {s['log_bayes_factor']:.1f} "
          f"± {s['log_bayes_factor_error']:.1f}; swap acceptance {np.round(s['swap_acceptance'], 2).tolist()}")
    print(f"output: {out}")


if __name__ == "__main__":
    main()
