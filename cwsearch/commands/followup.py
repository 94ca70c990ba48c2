"""``cwsearch followup``: parallel-tempered MCMC fit of scan candidates."""

from __future__ import annotations

import json
from dataclasses import fields, replace
from pathlib import Path

from ..core.errors import InputError

from ._common import (add_dataset_arguments, add_noise_arguments, load_array, resolve_noise,
                      run_folder_guard, run_stage_with_noise)

DESCRIPTION = (
    "Fit one circular binary (Earth + pulsar term, pulsar phases marginalised) to the top candidate(s) of "
    "RUN_DIR/scan/candidates.ecsv, an explicit target, or the whole sky, with a parallel-tempered ensemble "
    "sampler. Writes RUN_DIR/followup/: posterior.ecsv, summary.json (log Bayes factor signal vs noise by "
    "thermodynamic integration), corner.png, sky.png, trace.png and a checkpoint for --resume."
)
EXAMPLE = (
    "  cwsearch followup mydata --out runs/first\n"
    "  cwsearch followup mydata --out runs/first --candidate 2 --ess 2000\n"
    "  cwsearch followup mydata --out runs/first --frequency 8e-9 --ra 150 --dec -20 --earth-term-only\n"
    "  cwsearch followup mydata --out runs/first --resume"
)


def add_arguments(parser):
    add_dataset_arguments(parser)
    g = parser.add_argument_group("what to follow")
    g.add_argument("--candidate", default=None, metavar="K|candidate_K",
                   help="follow row K (1 = best) of scan/candidates.ecsv; its name candidate_K works too")
    g.add_argument("--top", type=int, default=1, metavar="N",
                   help="follow the N best candidates (default 1; a subfolder each when N > 1)")
    g.add_argument("--fap-threshold", type=float, default=None, metavar="P",
                   help="follow the best candidates whose analytic false-alarm probability is below P (at most "
                        "--max-candidates); run-file key [followup] fap_threshold")
    g.add_argument("--max-candidates", type=int, default=None, metavar="N",
                   help="with --fap-threshold: at most N candidates (default 3); run-file key "
                        "[followup] max_candidates")
    g.add_argument("--frequency", type=float, default=None, metavar="HZ", help="explicit target frequency [Hz]")
    g.add_argument("--ra", type=float, default=None, metavar="DEG", help="explicit target right ascension [deg]")
    g.add_argument("--dec", type=float, default=None, metavar="DEG", help="explicit target declination [deg]")
    g.add_argument("--all-sky", action="store_true", help="no target: start from the prior over the whole band")
    g.add_argument("--frequency-window", type=float, default=5.0, metavar="BINS",
                   help="frequency prior: this many bins of 1/T_span either side of the target (default 5)")
    g.add_argument("--max-frequency", type=float, default=1e-7, metavar="HZ",
                   help="upper edge of the --all-sky frequency band (default 1e-7 Hz)")
    m = parser.add_argument_group("signal model")
    m.add_argument("--earth-term-only", action="store_true", help="drop the pulsar term")
    m.add_argument("--evolution", default="full", choices=("full", "pulsar-frequency", "monochromatic"),
                   help="frequency evolution (default full)")
    m.add_argument("--strain-prior", default="log-uniform", choices=("log-uniform", "uniform"),
                   help="log-uniform for detection (default), uniform for upper limits")
    m.add_argument("--phase-grid", type=int, default=0, metavar="K",
                   help="points of the pulsar-phase grid (default 0: chosen per pulsar, error < 1e-13)")
    s = parser.add_argument_group("sampler")
    s.add_argument("--ess", type=float, default=1000, help="stop at this effective sample size (default 1000)")
    s.add_argument("--max-iterations", type=int, default=20000, metavar="N", help="iteration cap (default 20000)")
    s.add_argument("--max-time", type=float, default=None, metavar="SECONDS", help="wall-time cap (default none)")
    s.add_argument("--temperatures", type=int, default=10, metavar="N", help="temperatures (default 10)")
    s.add_argument("--max-temperature", type=float, default=1e6, metavar="T",
                   help="hottest temperature (default 1e6; raise it if the evidence error is large)")
    s.add_argument("--walkers", type=int, default=32, metavar="N", help="walkers per temperature (default 32)")
    s.add_argument("--checkpoint-every", type=int, default=100, metavar="N",
                   help="write the checkpoint every N iterations (default 100)")
    s.add_argument("--adapt-iterations", type=int, default=500, metavar="N",
                   help="adapt the temperature ladder during the first N iterations (default 500)")
    s.add_argument("--max-temperatures", type=int, default=None, metavar="N",
                   help="the ladder may grow to N temperatures where neighbours rarely swap (default 3 x "
                        "--temperatures, at most 40; --max-temperatures equal to --temperatures keeps it fixed)")
    s.add_argument("--resume", action="store_true", help="continue from the checkpoint in the output folder")
    parser.add_argument("--no-plots", action="store_true", help="skip the PNG plots")
    add_noise_arguments(parser)


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
    from ..stages.followup.stage import FollowupOptions, run_followup

    options = FollowupOptions(**{f.name: getattr(args, f.name) for f in fields(FollowupOptions)})
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


__all__ = ["DESCRIPTION", "EXAMPLE", "add_arguments", "run"]
