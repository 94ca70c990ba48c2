"""What subtract-and-rescan leaves behind: ``python -m bench.rounds``.

Prints measured figures (not a test). An invented array (8 pulsars, 10 years, 60 TOAs each, white noise
only) holds two binaries (``--snr`` optimal S/N, 20 and 12 by default) at 5/T_span and 13/T_span; the
pipeline (scan with 30 noise-only scans, follow-up with ``--iterations`` iterations, the rounds step with
``[rounds] detection_fap = 0.05``) runs on it, as ``tests/test_rounds.py`` does (same seeds). For each
injected binary it prints:

* whether and in which round it was confirmed;
* the optimal S/N of the true signal, ρ = sqrt((s|s)), and of what the subtraction left of it,
  ρ_left = sqrt((s - ŝ | s - ŝ)) with ŝ the subtracted posterior-median signal (the run's noise weighting;
  both after the timing-model fit);
* the loudest Fe over the sky within one frequency bin of its frequency in the scan of each round;
* the wall time of the run and the load (``os.getloadavg``).

Options: ``--iterations N`` (4000), ``--snr A,B`` (20,12), ``--out DIR`` (a temporary folder).
"""

from __future__ import annotations

import argparse
import json
import os
import tempfile
import time
from pathlib import Path

import numpy as np
from astropy.table import Table

from cwsearch.data.dataset import write_dataset
from cwsearch.job.config import load_config
from cwsearch.job.pipeline import run_pipeline
from cwsearch.physics.correlated import array_noise
from cwsearch.physics.noise import NoiseSettings
from cwsearch.physics.simulate import Binary, binary_residuals, invented_array, postfit, simulated_array

NOISE = NoiseSettings(red_components=0, pulsar_red_noise=False)

RUN_FILE = """
dataset = "data"
out = "run"
stages = ["scan", "followup"]
seed = 5
[execution]
workers = 1
[noise]
model = "dataset"
red_components = 0
pulsar_red_noise = false
[scan]
nside = 4
fmax = 6.0e-8
null_sims = 30
no_plots = true
[followup]
walkers = 20
temperatures = 4
max_temperature = 1000.0
ess = 400.0
max_iterations = {iterations}
adapt_iterations = 60
max_temperatures = 4
max_candidates = 1
no_plots = true
[rounds]
detection_fap = 0.05
"""


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m bench.rounds", description=__doc__.splitlines()[0])
    parser.add_argument("--iterations", type=int, default=4000)
    parser.add_argument("--snr", default="20,12")
    parser.add_argument("--out", default=None)
    args = parser.parse_args(argv)
    snrs = [float(x) for x in args.snr.split(",")]
    out = Path(args.out or tempfile.mkdtemp(prefix="bench_rounds_"))
    base = invented_array(n_pulsars=8, years=10, seed=41, toas_per_pulsar=60, full_span=True)
    span = base.span
    binaries = [Binary(ra=2.0, dec=0.4, gw_frequency=5 / span, chirp_mass=3e8, strain=1e-14, inclination=0.8,
                       polarization=0.6, phase=1.0),
                Binary(ra=4.5, dec=-0.5, gw_frequency=13 / span, chirp_mass=2e8, strain=1e-14, inclination=1.2,
                       polarization=2.0, phase=2.0)]
    noise = array_noise(base, NOISE)
    signals = []
    for b, snr in zip(binaries, snrs):
        sig = binary_residuals(base, b)
        scale = snr / noise.optimal_snr(sig)
        b.strain *= scale
        signals.append([postfit(p, scale * s) for p, s in zip(base, sig)])
    noisy = simulated_array(base, seed=43, red=False)
    write_dataset(noisy.with_residuals([p.residuals + sum(s[i] for s in signals) for i, p in enumerate(noisy)]),
                  out / "data")
    (out / "run.toml").write_text(RUN_FILE.format(iterations=args.iterations))
    t0 = time.perf_counter()
    run_pipeline(load_config(out / "run.toml"), quiet=True)
    wall = time.perf_counter() - t0
    run = out / "run"
    rounds = json.loads((run / "rounds" / "rounds.json").read_text())
    print(f"rounds: {rounds['n_rounds']}, confirmed: {rounds['n_confirmed']} ({rounds['stopped']}); wall {wall:.1f} s, "
          f"load {os.getloadavg()[0]:.1f}")
    sub = Table.read(run / "rounds" / "subtracted_signal.ecsv", format="ascii.ecsv") \
        if (run / "rounds" / "subtracted_signal.ecsv").is_file() else None
    scans = ["scan"] + [e["scan"] for e in rounds["rounds"][1:]]
    for j, (b, sig) in enumerate(zip(binaries, signals)):
        match = [c for c in rounds["confirmed"] if abs(c["frequency"] - b.gw_frequency) <= 1 / span]
        line = f"binary {j + 1} (f = {b.gw_frequency:.4g} Hz, rho = {noise.optimal_snr(sig):.1f}): "
        if match and sub is not None:
            c = match[0]
            names = np.asarray(sub["pulsar"]).astype(str)
            fitted = [np.asarray(sub[f"source_{c['source']}"], dtype=float)[names == p.name] for p in base]
            left = noise.optimal_snr([s - f for s, f in zip(sig, fitted)])
            line += (f"confirmed in round {c['round']}; rho of what the subtraction left {left:.2f} "
                     f"({100 * left / noise.optimal_snr(sig):.0f} % of rho)")
        else:
            line += "not confirmed"
        fe = []
        for scan in scans:
            spec = Table.read(run / scan / "spectrum.ecsv", format="ascii.ecsv")
            near = np.abs(np.asarray(spec["frequency"]) - b.gw_frequency) <= 1 / span
            fe.append(f"{float(np.max(np.asarray(spec['fe_max'])[near])):.1f}")
        print(line + "; loudest Fe within one bin, round by round: " + ", ".join(fe))
    for scan in scans:
        spec = Table.read(run / scan / "spectrum.ecsv", format="ascii.ecsv")
        print(f"  {scan}: median over frequency of the loudest Fe over the sky {np.median(spec['fe_max']):.1f}")
    print(f"run folder: {run}")


if __name__ == "__main__":
    main()
