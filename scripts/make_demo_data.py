"""Write the bundled invented demo dataset, cwsearch/data/demo/ (seeded and reproducible).

Scenario (fixed; the demo galaxy catalogue is built around it):

- 20 invented pulsars SIMPSR01..SIMPSR20, 12.5 yr, 200 TOAs each, one to
  three backends each, a few with power-law red noise;
- one invented circular binary at ra = 141.0 deg, dec = -27.5 deg,
  f_gw = 1.2e-8 Hz, chirp mass 2.0e9 Msun, luminosity distance 80 Mpc
  (strain = cwsearch.physics.waveform.strain_amplitude(2e9, 1.2e-8, 80) = 1.236e-14),
  inclination 1.0, polarization 0.6, phase 2.0 rad, full frequency
  evolution with the pulsar term;
- the TOA uncertainty scale is solved for so that the binary's optimal
  signal-to-noise ratio (NoiseWeighting.optimal_snr of binary_residuals,
  as recorded by ``cwsearch simulate``) is 15.

Everything goes through ``cwsearch.commands.simulate.simulate_dataset``
(the library behind ``cwsearch simulate``), so the demo is exactly what a
user gets from that command with these options. ``injection.json`` records
the true parameters, the optimal SNR and this scenario.

Usage::

    python scripts/make_demo_data.py            # (re)write cwsearch/data/demo/
    python scripts/make_demo_data.py --check    # regenerate in a temporary folder and compare the numbers

``--check`` compares the regenerated tables with the bundled ones column by
column (``cwsearch.data.compare.compare_datasets``): names, backends, units and
other text exactly, floating-point values to 1e-12 relative (plus 1e-12 of
each column's largest magnitude, for values near zero), and prints the
worst difference. It does not compare checksums: another CPU or BLAS
changes the last bits of recomputed floats, and that is not a different
dataset.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
from dataclasses import replace
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
TARGET = REPO / "cwsearch" / "data" / "demo"

SEED = 1
TARGET_SNR = 15.0
START_SIGMA = 3e-7  # s; first guess of the typical TOA uncertainty
BINARY = dict(ra=141.0, dec=-27.5, gw_frequency=1.2e-8, chirp_mass=2.0e9, luminosity_distance=80.0,
              inclination=1.0, polarization=0.6, phase=2.0)


def demo_options(sigma):
    from cwsearch.commands.simulate import SimulateOptions
    from cwsearch.physics.waveform import strain_amplitude

    strain = float(strain_amplitude(BINARY["chirp_mass"], BINARY["gw_frequency"], BINARY["luminosity_distance"]))
    return SimulateOptions(pulsars=20, years=12.5, toas_per_pulsar=200, sigma=sigma, red_noise_fraction=0.1,
                           inject_strain=strain, inject_frequency=BINARY["gw_frequency"], inject_ra=BINARY["ra"],
                           inject_dec=BINARY["dec"], inject_chirp_mass=BINARY["chirp_mass"],
                           inject_inclination=BINARY["inclination"], inject_polarization=BINARY["polarization"],
                           inject_phase=BINARY["phase"], evolution="full", earth_term_only=False,
                           noise_in_files=True)  # the demo keeps its noise values in the files (dataset model)


def make(folder: Path) -> dict:
    """Write the demo dataset into ``folder``; return its injection record."""
    from cwsearch.commands.simulate import simulate_dataset

    sigma = START_SIGMA
    for _ in range(8):  # SNR ∝ 1/sigma for white noise; red noise makes it slightly nonlinear
        summary = simulate_dataset(folder, demo_options(sigma), seed=SEED, overwrite=True)
        snr = summary["optimal_snr"]
        if abs(snr - TARGET_SNR) < 0.05:
            break
        sigma *= snr / TARGET_SNR
    # the TOA uncertainty scale is rounded so the scenario is easy to repeat by hand
    sigma = float(f"{sigma:.4g}")
    simulate_dataset(folder, replace(demo_options(sigma)), seed=SEED, overwrite=True)
    inj_path = folder / "injection.json"
    injection = json.loads(inj_path.read_text())
    injection["description"] = ("true parameters of the bundled INVENTED demo dataset "
                                "(scripts/make_demo_data.py; pulsars and binary are invented)")
    injection["scenario"] = {"luminosity_distance_mpc": BINARY["luminosity_distance"],
                             "target_optimal_snr": TARGET_SNR, "sigma": sigma,
                             "command": (f"cwsearch simulate DIR --pulsars 20 --years 12.5 --toas-per-pulsar 200 "
                                         f"--sigma {sigma:g} --red-noise-fraction 0.1 --inject-strain "
                                         f"{demo_options(sigma).inject_strain!r} --inject-frequency 1.2e-8 "
                                         "--inject-ra 141 --inject-dec -27.5 --inject-chirp-mass 2e9 "
                                         "--inject-inclination 1.0 --inject-polarization 0.6 --inject-phase 2.0 "
                                         f"--seed {SEED}")}
    inj_path.write_text(json.dumps(injection, indent=2) + "\n")
    return injection


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--check", action="store_true",
                        help="regenerate into a temporary folder and compare with the bundled copy "
                             "(text exactly, floats to 1e-12 relative)")
    args = parser.parse_args(argv)
    from cwsearch.data.compare import RTOL, compare_datasets
    from cwsearch.data.dataset import dataset_checksum

    if args.check:
        with tempfile.TemporaryDirectory() as tmp:
            make(Path(tmp) / "demo")
            result = compare_datasets(Path(tmp) / "demo", TARGET)
        verdict = f"matches (to rtol {RTOL:g})" if result.ok else "DIFFERS FROM"
        print(f"regenerated demo dataset {verdict} {TARGET}: {result.describe()}")
        return 0 if result.ok else 1
    with tempfile.TemporaryDirectory() as tmp:
        injection = make(Path(tmp) / "demo")
        if TARGET.exists():
            shutil.rmtree(TARGET)
        shutil.copytree(Path(tmp) / "demo", TARGET)
    print(f"wrote {TARGET}: optimal SNR {injection['optimal_snr']:.2f}, TOA sigma scale "
          f"{injection['scenario']['sigma']:.4g} s, checksum {dataset_checksum(TARGET)[:12]}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
