"""``cwsearch scan``: all-sky F-statistic scan over frequency × sky (thin wrapper over :func:`cwsearch.stages.scan.stage.run_scan`)."""

from __future__ import annotations

import json
import math
import time

from ..core.options import add_options, options_from_args as build_options
from ..stages.scan.options import ScanOptions
from ._common import (add_dataset_arguments, add_noise_arguments, load_array, resolve_noise, run_folder_guard,
                      run_stage_with_noise)

DESCRIPTION = """\
Scan every GW frequency from 1/T_span (spacing 1/(oversample*T_span)) up to
--fmax on a HEALPix sky grid with the Earth-term Fe-statistic and/or the
pulsar-term Fp-statistic, and write RUN_DIR/scan/: candidates.ecsv (distinct
peaks, best first, with false-alarm probabilities and maximum-likelihood
strain, inclination, polarization, phase), spectrum.ecsv (Fe sky maximum and
Fp per frequency), scan_summary.json and PNG plots.

Two false-alarm probabilities are given: 'fap' is analytic, (1+Fe)exp(-Fe)
corrected for an effective number of independent templates (stated in the
summary); 'fap_empirical' (only with --null-sims N) is the fraction of N
noise-only scans of the same array and noise model whose maximum reaches the
candidate's value - prefer it when available."""

EXAMPLE = """\
  cwsearch scan mydata --out runs/first
  cwsearch scan mydata --out runs/deep --fmax 2e-7 --oversample 4 --nside 32 --null-sims 100
  cwsearch scan mydata --out runs/fp --statistic fp --common-log10-amplitude -14.6"""

def add_arguments(parser):
    add_dataset_arguments(parser)
    add_options(parser, ScanOptions)   # names, defaults and help: the fields of ScanOptions
    add_noise_arguments(parser)


def options_from_args(args):
    """:class:`cwsearch.stages.scan.options.ScanOptions` from parsed arguments."""
    return build_options(ScanOptions, args)


def format_candidates(table, n=10):
    """The top candidates as a plain-text table."""
    lines = [f"{'#':>3} {'f_gw [Hz]':>11} {'ra[deg]':>8} {'dec[deg]':>8} {'Fe':>8} {'SNR':>6} "
             f"{'fap':>9} {'fap_emp':>9} {'Fp':>8} {'h0':>9}"]

    def num(v, fmt):
        v = float(v)
        return format(v, fmt) if math.isfinite(v) else "-"

    for row in table[:n]:
        lines.append(f"{int(row['rank']):>3} {float(row['frequency']):>11.4e} {num(row['ra'], '8.1f')} "
                     f"{num(row['dec'], '8.1f')} {num(row['fe'], '8.2f')} {num(row['snr'], '6.2f')} "
                     f"{num(row['fap'], '9.2e')} {num(row['fap_empirical'], '9.2e')} {num(row['fp'], '8.2f')} "
                     f"{num(row['strain'], '9.2e')}")
    return "\n".join(lines)


def run(args) -> int:
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..stages.scan.stage import run_scan

    options = options_from_args(args).validate()
    t = time.time()
    array = load_array(args)
    read_seconds = time.time() - t
    with run_folder_guard(args.out, array, args.dataset):
        resolved = resolve_noise(args, array)
        result = run_stage_with_noise(resolved, lambda: run_scan(resolved.array, args.out, options,
                                                                 noise=resolved.noise, seed=args.seed,
                                                                 progress=not args.quiet,
                                                                 timings={"read_seconds": read_seconds}))
    summary = result.summary
    if args.json:
        print(json.dumps(summary, indent=2))
        return 0
    if not args.quiet:
        print(f"scanned {summary['n_frequencies']} frequencies {summary['fmin']:.3e}-{summary['fmax']:.3e} Hz"
              + (f" x {summary['n_pixels']} sky pixels (nside {summary['nside']})" if summary["n_pixels"] else "")
              + f" with {summary['n_pulsars']} pulsars in {summary['seconds']:.1f} s")
        if "n_eff_sky_slope" in summary:
            print(f"effective independent templates N_eff(Fe) = {summary['n_eff_frequencies']} frequencies x "
                  f"max(1, {summary['n_eff_sky_intercept']:.1f} + {summary['n_eff_sky_slope']:.2f} Fe) sky")
        print()
        print(format_candidates(result.candidates))
        print()
        print("fap     = analytic: single-template (1+Fe)exp(-Fe) corrected for N_eff(Fe) independent templates"
              + (" (Fp: chi-squared, corrected for the frequency bins)" if options.statistic == "fp" else ""))
        if options.null_sims:
            print(f"fap_emp = empirical: fraction (1+k)/(1+N) of N = {options.null_sims} noise-only scans whose "
                  "maximum reaches the candidate's value (prefer this one)")
        else:
            print("fap_emp = empirical FAP, not computed (use --null-sims N)")
        gof = summary["goodness_of_fit"]
        print(f"goodness of fit: {gof['n_failed']} of {summary['n_pulsars']} pulsars fail (p < {gof['threshold']:g})"
              + (f": {', '.join(gof['failed'])}" if gof["failed"] else ""))
        print(f"outputs in {result.files['candidates'].parent}")
    return 0


__all__ = ["DESCRIPTION", "EXAMPLE", "add_arguments", "run", "options_from_args", "format_candidates"]
