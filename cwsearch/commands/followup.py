"""``cwsearch followup``: parallel-tempered MCMC fit of scan candidates."""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

from ..core.errors import InputError
from ..core.options import add_options, argument_group, options_from_args as build_options
from ..stages.followup.options import FollowupOptions
from ._common import (add_dataset_arguments, add_noise_arguments, load_array, resolve_noise,
                      run_folder_guard, run_stage_with_noise)

DESCRIPTION = (
    "Fit one circular binary (Earth + pulsar term, pulsar phases marginalised) to the top candidate(s) of "
    "RUN_DIR/scan/candidates.ecsv, an explicit target, or the whole sky, with a parallel-tempered ensemble "
    "sampler. Writes RUN_DIR/followup/: posterior.ecsv, summary.json (log Bayes factor signal vs noise by "
    "thermodynamic integration), corner.png, sky.png, trace.png, residuals.png and a checkpoint for --resume."
)
EXAMPLE = (
    "  cwsearch followup mydata --out runs/first\n"
    "  cwsearch followup mydata --out runs/first --candidate 2 --ess 2000\n"
    "  cwsearch followup mydata --out runs/first --frequency 8e-9 --ra 150 --dec -20 --earth-term-only\n"
    "  cwsearch followup mydata --out runs/first --resume"
)


def add_arguments(parser):
    add_dataset_arguments(parser)
    add_options(parser, FollowupOptions)   # names, defaults and help: the fields of FollowupOptions
    g = argument_group(parser, "what to follow")   # the [followup] keys the pipeline reads (not options fields)
    g.add_argument("--fap-threshold", type=float, default=None, metavar="P",
                   help="follow the best candidates whose analytic false-alarm probability is below P (at most "
                        "--max-candidates); run-file key [followup] fap_threshold")
    g.add_argument("--max-candidates", type=int, default=None, metavar="N",
                   help="with --fap-threshold: at most N candidates (default 3); run-file key "
                        "[followup] max_candidates")
    add_noise_arguments(parser)


def options_from_args(args):
    """:class:`cwsearch.stages.followup.options.FollowupOptions` from parsed arguments."""
    return build_options(FollowupOptions, args)


def threshold_top(run_dir, fap_threshold, max_candidates) -> int:
    """How many of the best scan candidates have an analytic FAP below ``fap_threshold`` (at most
    ``max_candidates``; at least 1 is an error message, not a silent empty run)."""
    # lazy: the numerical code behind a command's run (keeps `cwsearch --help` fast)
    import numpy as np
    from ..job.runfolder import read_table as _read_table

    path = Path(run_dir) / "scan" / "candidates.ecsv"
    table = _read_table(path) if path.is_file() else None
    if table is None or "fap" not in table.colnames:
        raise InputError("--fap-threshold needs the scan's candidates.ecsv (run cwsearch scan first)", file=path)
    threshold = 0.01 if fap_threshold is None else float(fap_threshold)
    n = int(np.sum(np.asarray(table["fap"], dtype=float) < threshold))
    if n == 0:
        raise InputError(f"--fap-threshold {threshold:g}: no scan candidate is below it "
                         f"(best {float(np.min(table['fap'])):.2g})", file=path)
    return min(n, int(max_candidates))


def run(args) -> int:
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..stages.followup.stage import run_followup

    options = options_from_args(args)
    if args.fap_threshold is not None or args.max_candidates is not None:
        options = replace(options, top=threshold_top(args.out, args.fap_threshold,
                                                     3 if args.max_candidates is None else args.max_candidates))
    array = load_array(args)
    with run_folder_guard(args.out, array, args.dataset):
        resolved = resolve_noise(args, array)
        result = run_stage_with_noise(resolved, lambda: run_followup(resolved.array, args.out, options,
                                                                     noise=resolved.noise, seed=args.seed,
                                                                     progress=not args.quiet))
    if args.json:
        print(json.dumps(result.summary, indent=2, default=str))
    elif not args.quiet:
        runs = result.summary if "parameters" in result.summary else None
        for folder, summ in zip(result.folders, [runs] if runs else [None] * len(result.folders)):
            print(f"follow-up written to {folder}")
            if summ:
                par = summ["parameters"]
                print(f"  ln Bayes factor (signal vs noise) = {summ['log_bayes_factor']:.2f} "
                      f"± {summ['log_bayes_factor_error']:.2f}")
                for name in ("frequency", "ra", "dec", "strain", "chirp_mass"):
                    p = par[name]
                    print(f"  {name:<11} {p['median']:.4g}  [{p['interval_90'][0]:.4g}, {p['interval_90'][1]:.4g}] "
                          f"{p['unit']}")
                print(f"  ESS {summ['effective_sample_size']:.0f}, {summ['iterations']} iterations "
                      f"({summ['stopped_by']}), {summ['wall_time']:.0f} s")
        if not runs:
            for t, lb, e in zip(result.summary["targets"], result.summary["log_bayes_factor"],
                                result.summary["log_bayes_factor_error"]):
                print(f"  {t}: ln Bayes factor {lb:.2f} ± {e:.2f}")
    return 0


__all__ = ["DESCRIPTION", "EXAMPLE", "add_arguments", "run", "options_from_args", "threshold_top"]
