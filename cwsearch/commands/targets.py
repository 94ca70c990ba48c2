"""``cwsearch targets``: test every galaxy or periodic-AGN candidate of a catalogue at its fixed sky position
(thin wrapper over :func:`cwsearch.stages.targets.stage.run_targets`)."""

from __future__ import annotations

import json

from ..core.options import add_options, options_from_args as build_options
from ..core.safeio import escape_text
from ..stages.targets.options import TargetsOptions
from ._common import (add_dataset_arguments, add_noise_arguments, load_array, resolve_noise, run_folder_guard,
                      run_stage_with_noise)

DESCRIPTION = """\
Test every row of a target catalogue (galaxies, AGN with a claimed period) for a continuous wave from its
own sky position. Per target: the Earth-term Fe-statistic at the fixed position, maximised over the whole
band or, for a row with a period, over a window around f_gw = 2 x period-factor / P (observer frame;
--period-frame rest redshifts a source-frame period, P_obs = (1+z) P), with the run's noise model.
p-values from noise-only simulations (default) and/or sky scrambles (the data's statistic at random sky
positions); Holm family-wise and Benjamini-Hochberg false-discovery-rate corrections over all targets,
both reported; a 95 % chirp-mass upper limit per target at its catalogue distance. Targets whose
family-wise p-value is below --followup-threshold are listed for the follow-up.
Writes RUN_DIR/targets/: results.ecsv, followup_targets.ecsv, targets_summary.json, pp_plot.png,
sky_targets.png.

Cautions: the p-values are only as good as the noise model; a catalogue misses galaxies (a null result
covers the listed targets only); a loud binary makes the targets around it significant too."""

EXAMPLE = """\
  cwsearch targets mydata --catalog catalogs/demo_galaxies.ecsv --out runs/first
  cwsearch targets mydata --catalog agn.csv --columns ra=RAJ2000,dec=DEJ2000 --period-frame rest --out runs/agn
  cwsearch targets mydata --catalog galaxies.ecsv --out runs/t --null both --null-sims 200 --scrambles 2000"""


def add_arguments(parser):
    add_dataset_arguments(parser)
    add_options(parser, TargetsOptions)   # names, defaults and help: the fields of TargetsOptions
    add_noise_arguments(parser)


def options_from_args(args):
    """:class:`cwsearch.stages.targets.options.TargetsOptions` from parsed arguments."""
    return build_options(TargetsOptions, args)


def _g(v):
    return "-" if v is None else f"{v:.3g}"


def run(args) -> int:
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..stages.targets.stage import run_targets

    options = options_from_args(args).validate()
    array = load_array(args)
    with run_folder_guard(args.out, array, args.dataset):
        resolved = resolve_noise(args, array)
        result = run_stage_with_noise(resolved, lambda: run_targets(resolved.array, args.out, options,
                                                                    noise=resolved.noise, seed=args.seed,
                                                                    progress=not args.quiet))
    s = result.summary
    if args.json:
        print(json.dumps(s, indent=2))
        return 0
    if args.quiet:
        return 0
    lo, hi = s["frequency_range"]
    print(f"{s['n_searched']} of {s['n_targets']} targets searched ({s['n_period_targets']} in a period window, "
          f"{s['n_band_targets']} over the band {lo:.3e}-{hi:.3e} Hz; {s['n_outside_band']} outside the band)")
    print(f"p-values from {s['p_value_from']} ({s['null_sims'] or s['scrambles']} draws); corrections: Holm "
          f"(family-wise) and {s['fdr_method'].upper()} (false-discovery rate)")
    tab = result.results
    print(f"{'rank':>4} {'name':<20} {'window':<6} {'Fe':>7} {'f_best [Hz]':>11} {'p':>9} {'p_family':>9} "
          f"{'q_fdr':>9} {'Mc95 [Msun]':>11}")
    for row in tab[:10]:
        if row["status"] != "searched":
            continue
        print(f"{row['rank']:>4} {escape_text(str(row['name']))[:20]:<20} {row['window']:<6} {row['fe']:7.2f} "
              f"{row['best_frequency']:11.4e} {row['p_value']:9.2e} {row['p_family']:9.2e} {row['q_fdr']:9.2e} "
              f"{_g(row['chirp_mass_95']):>11}")
    print(f"family-wise p < 0.05: {s['n_family_below_0.05']}; FDR q < 0.05: {s['n_fdr_below_0.05']}")
    for k, f in enumerate(s["followup"], start=1):
        print(f"follow up {escape_text(f['name'])}: cwsearch followup {escape_text(args.dataset)} --out "
              f"{escape_text(str(args.out))}/targets/followup_{k} --frequency {f['frequency']:.6e} --ra {f['ra']:.4f} --dec {f['dec']:.4f} "
              f"--sky-radius {f['sky_radius']:g}")
    if not s["followup"]:
        print(f"no target below the follow-up threshold (family-wise p < {s['followup_threshold']:g})")
    print(f"outputs in {result.files['results'].rsplit('/', 1)[0]}")
    return 0


__all__ = ["DESCRIPTION", "EXAMPLE", "add_arguments", "run", "options_from_args"]
