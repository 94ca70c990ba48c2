"""``cwsearch limits``: 95 % strain upper limits versus frequency and sky, chirp-mass limits for galaxies
(thin wrapper over :func:`cwsearch.stages.limits.stage.run_limits`)."""

from __future__ import annotations

import json

from ..core.safeio import escape_text
from ..core.options import add_options, options_from_args as build_options
from ..stages.limits.options import LimitsOptions
from ._common import (add_dataset_arguments, add_noise_arguments, load_array, resolve_noise, run_folder_guard,
                      run_stage_with_noise)

DESCRIPTION = """\
Compute 95 % upper limits on the strain amplitude h0 of a circular binary at
every GW frequency from 1/T_span (spacing 1/(oversample*T_span)) to --fmax
and every HEALPix sky pixel, and write RUN_DIR/limits/:
frequency_limits.ecsv (sky-averaged limit, best and worst sky position per
frequency), sky_limits.ecsv (per-pixel limit at --sky-frequency, default the
most sensitive bin), galaxy_limits.ecsv (chirp-mass limits at each galaxy's
position and distance, with --galaxy or --catalog/--select),
limits_summary.json and PNG plots.

Methods: 'bayes' (default) integrates the posterior of h0 (uniform prior)
over cos(inclination), polarization and phase by deterministic quadrature
and takes its 95 % point; 'frequentist' finds the h0 at which 95 % of
randomly oriented signals give 2Fe above the observed value. Both go into
the frequency table and the summary unless --method frequentist; --method
both also adds frequentist columns to the sky and galaxy tables. Pixel x frequency work runs in local worker processes (--workers) or on
a running Dask cluster (--scheduler); the numbers do not depend on either."""

EXAMPLE = """\
  cwsearch limits mydata --out runs/first
  cwsearch limits mydata --out runs/first --method both --nside 16 --fmax 5e-8
  cwsearch limits mydata --out runs/first --galaxy GAL0001 187.7 12.4 16.5 --galaxy GAL0002 10.7 41.3 0.8
  cwsearch limits mydata --out runs/first --catalog galaxies.ecsv --select GAL0001,GAL0007
  cwsearch limits mydata --out runs/first --scheduler tcp://10.0.0.5:8786
  cwsearch limits mydata --out runs/first --mcmc-check 300"""

def add_arguments(parser):
    add_dataset_arguments(parser)
    add_options(parser, LimitsOptions)   # names, defaults and help: the fields of LimitsOptions
    add_noise_arguments(parser)


def options_from_args(args):
    """:class:`cwsearch.stages.limits.options.LimitsOptions` from parsed arguments."""
    return build_options(LimitsOptions, args)


def _fmt(v):
    return "-" if v is None else f"{v:.3e}"


def method_lines(summary) -> list:
    """One line per limit method: the sky-averaged limit and the best sky position's limit.

    A frequentist limit of 0 at a pixel is empty (the observed Fe is below what noise alone gives 95 % of
    the time), not a best sky position: those pixels are counted, never quoted as the best limit.
    """
    lines = []
    for method in ("bayes", "frequentist"):
        if method not in summary:
            continue
        s = summary[method]
        best = s.get("best_pixel_strain_95")
        text = (f"  {method:<11} sky-averaged h95 = {_fmt(s['strain_95_at_best_frequency'])} at "
                f"{summary['best_frequency']:.3e} Hz (best sky position "
                + (_fmt(best) if best else "none with a positive limit"))
        empty = s.get("pixels_with_empty_limit") or 0
        if empty:
            text += (f"; {empty} of {summary.get('n_pixels', '?')} pixels have an empty limit: observed Fe below "
                     "the noise-only 95 % range")
        if method == "bayes":
            pt = summary.get("pulsar_term")
            if pt:
                err = pt.get("mc_error_relative_median")
                text += (f"; Earth + pulsar term, {pt['draws']} distance draws, Monte Carlo error median "
                         + (f"{100 * err:.1f} %" if err is not None else "n/a"))
                et = summary.get("bayes_earth_term", {}).get("strain_95_at_best_frequency")
                text += f"; Earth term only {_fmt(et)}"
            elif summary.get("limit"):
                text += f"; {summary['limit']}"
        lines.append(text + ")")
    return lines


def run(args) -> int:
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..stages.limits.stage import parse_galaxies, run_limits

    options = options_from_args(args)
    parse_galaxies(options.galaxy)  # number errors before the dataset is read
    options.validate()
    array = load_array(args)
    with run_folder_guard(args.out, array, args.dataset):
        resolved = resolve_noise(args, array)
        result = run_stage_with_noise(resolved, lambda: run_limits(resolved.array, args.out, options,
                                                                   noise=resolved.noise, seed=args.seed,
                                                                   progress=not args.quiet))
    summary = result.summary
    if args.json:
        print(json.dumps(summary, indent=2))
        return 0
    lo, hi = summary["frequency_range"]
    print(f"95 % strain upper limits at {summary['n_frequencies']} frequencies {lo:.3e}-{hi:.3e} Hz x "
          f"{summary['n_pixels']} sky pixels (nside {summary['nside']}) in {summary['wall_time']:.1f} s "
          f"on {summary['runner']}")
    if summary.get("fmax_note"):
        print(f"  note: {summary['fmax_note']}")
    for line in method_lines(summary):
        print(line)
    for name, g in summary.get("galaxies", {}).items():
        print(f"  galaxy {escape_text(name)} ({g['distance']:.3g} Mpc): chirp mass < {_fmt(g['chirp_mass_95_min'])} Msun "
              f"at {g['at_frequency']:.3e} Hz")
    check = summary.get("mcmc_check")
    if check:
        print(f"  check at pixel {check['pixel']}, {check['frequency']:.3e} Hz: quadrature h95 = "
              f"{check['quadrature']:.4e}, {check['sampler']} h95 = {check['sampled']:.4e} "
              f"+- {check['sampled_error']:.1e} ({check['difference_in_errors']:+.1f} sigma)")
    print(f"outputs in {result.files['frequency_limits'].rsplit('/', 1)[0]}")
    return 0


__all__ = ["DESCRIPTION", "EXAMPLE", "add_arguments", "run", "options_from_args"]
