"""``cwsearch followup``: parallel-tempered MCMC fit of scan candidates."""

from __future__ import annotations

import json
from dataclasses import fields

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
    g.add_argument("--candidate", type=int, default=None, metavar="K",
                   help="follow row K (1-based) of scan/candidates.ecsv")
    g.add_argument("--top", type=int, default=1, metavar="N",
                   help="follow the N best candidates (default 1; a subfolder each when N > 1)")
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


def run(args) -> int:
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..stages.followup.stage import FollowupOptions, run_followup

    options = FollowupOptions(**{f.name: getattr(args, f.name) for f in fields(FollowupOptions)})
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
