"""``cwsearch hosts``: rank catalogue galaxies as possible hosts of the run's candidate(s)."""

from __future__ import annotations

import sys

from ..core.errors import InputError
from ._common import run_folder_guard

DESCRIPTION = (
    "Rank the galaxies of a catalogue as possible hosts of the run's candidate binary. Uses the follow-up "
    "posterior (RUN_DIR/followup/) when there is one, otherwise the best scan candidate with a coarse sky "
    "localisation (Fe sky map, or a Fisher blob of --resolution degrees), and says which. Per galaxy: a Bayes "
    "factor from sky position, distance, black-hole-mass relation, EM period and coalescence time; "
    "probabilities include 'host not in the catalogue' (--completeness). Writes RUN_DIR/hosts/ranking.ecsv, "
    "hosts_summary.json and plots. A host association is a probability, not an identification."
)

EXAMPLE = """  cwsearch hosts --out runs/first --catalog catalogs/demo_galaxies.ecsv
  cwsearch hosts --out runs/first --catalog my.csv --columns ra=RAJ2000,dec=DEJ2000,distance=Dist --completeness 0.3
  cwsearch hosts --out runs/first --catalog catalogs/demo_galaxies.ecsv --candidate candidate_2 --json"""


def add_arguments(parser):
    parser.add_argument("--out", metavar="RUN_DIR", default=None,
                        help="run folder with followup/ or scan/ results (as in every other command)")
    parser.add_argument("run_dir", metavar="RUN_DIR", nargs="?", default=None,
                        help="deprecated spelling of --out RUN_DIR (still accepted, with a note)")
    parser.add_argument("--catalog", required=True, metavar="FILE", help="galaxy catalogue (ECSV or CSV)")
    parser.add_argument("--columns", metavar="MAP", default=None,
                        help="map our column names to the file's, e.g. ra=RAJ2000,dec=DEJ2000,distance=Dist")
    parser.add_argument("--completeness", type=float, default=0.5, metavar="C",
                        help="prior probability that the host is in the catalogue, given it lies within the "
                             "catalogue's distance limit (default 0.5)")
    parser.add_argument("--relation", choices=("mcconnell-ma", "kormendy-ho"), default="mcconnell-ma",
                        help="black-hole mass - bulge mass relation (default mcconnell-ma: McConnell & Ma 2013; "
                             "kormendy-ho: Kormendy & Ho 2013)")
    parser.add_argument("--top", type=int, default=10, metavar="N", help="rows in the printed table (default 10)")
    g = parser.add_argument_group("host model")
    g.add_argument("--distance-limit", type=float, default=None, metavar="MPC",
                   help="catalogue distance limit (default: its largest distance)")
    g.add_argument("--distance-error", type=float, default=0.1, metavar="FRAC",
                   help="fractional distance error where the catalogue has no distance_err (default 0.1)")
    g.add_argument("--mass-ratio-min", type=float, default=0.1, metavar="Q",
                   help="mass ratio prior: log-uniform in [Q, 1] (default 0.1)")
    g.add_argument("--period-factor", type=float, default=1.0, metavar="X",
                   help="EM period = X times the orbital period 2/f_gw (default 1)")
    g.add_argument("--observed-span", type=float, default=None, metavar="YEARS",
                   help="observed span for the coalescence check (default 15 yr)")
    g = parser.add_argument_group("localisation")
    g.add_argument("--candidate", default=None, metavar="NAME",
                   help="candidate name candidate_K or row K (1 = best): its follow-up posterior, or the scan "
                        "candidate when there is no posterior")
    g.add_argument("--sky-bandwidth", type=float, default=None, metavar="DEG",
                   help="sky kernel bandwidth (default: Scott's rule from the samples)")
    g.add_argument("--resolution", type=float, default=10.0, metavar="DEG",
                   help="1-sigma sky resolution for a scan candidate without an Fe map (default 10)")
    g.add_argument("--sky-map", default=None, metavar="FILE",
                   help="Fe sky map (ECSV with pixel, fe) for a scan candidate (default: looked for in scan/)")
    g.add_argument("--max-samples", type=int, default=20000, metavar="N",
                   help="use at most N posterior samples (default 20000)")
    parser.add_argument("--no-plots", action="store_true", help="skip the PNG plots")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar or table")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")


def run_folder(args):
    """The run folder: ``--out RUN_DIR`` (the convention of every command) or the old positional form."""
    if args.out and args.run_dir and args.out != args.run_dir:
        raise InputError(f"two run folders given ({args.run_dir} and --out {args.out}); give only --out")
    if args.out:
        return args.out
    if args.run_dir:
        print(f"cwsearch hosts: note: the positional run folder is deprecated; write --out {args.run_dir} "
              "(the same as every other command)", file=sys.stderr)
        return args.run_dir
    raise InputError("give the run folder with --out RUN_DIR")


def run(args) -> int:
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..stages.hosts.stage import HostsOptions, format_table, run_hosts, summary_json

    options = HostsOptions(catalog=args.catalog, columns=args.columns, completeness=args.completeness,
                           relation=args.relation, top=args.top, distance_limit=args.distance_limit,
                           distance_error=args.distance_error, mass_ratio_min=args.mass_ratio_min,
                           period_factor=args.period_factor, sky_bandwidth=args.sky_bandwidth,
                           resolution=args.resolution, sky_map=args.sky_map, candidate=args.candidate,
                           observed_span=args.observed_span, max_samples=args.max_samples,
                           no_plots=args.no_plots)
    run_dir = run_folder(args)
    with run_folder_guard(run_dir):
        result = run_hosts(None, run_dir, options, seed=args.seed, progress=not (args.quiet or args.json))
    if args.json:
        print(summary_json(result))
    elif not args.quiet:
        print(format_table(result, args.top))
        print(f"wrote {result.out_dir}/ranking.ecsv, hosts_summary.json" + ("" if args.no_plots else " and plots"))
    return 0


__all__ = ["DESCRIPTION", "EXAMPLE", "add_arguments", "run"]
