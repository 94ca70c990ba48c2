"""``cwsearch hosts``: rank catalogue galaxies as possible hosts of the run's candidate(s)."""

from __future__ import annotations

import sys

from ..core.errors import InputError
from ..core.options import add_options, options_from_args as build_options
from ..stages.hosts.options import HostsOptions
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
    add_options(parser, HostsOptions)   # names, defaults and help: the fields of HostsOptions
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar or table")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")


def options_from_args(args):
    """:class:`cwsearch.stages.hosts.options.HostsOptions` from parsed arguments."""
    return build_options(HostsOptions, args)


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
    from ..stages.hosts.stage import format_table, run_hosts, summary_json

    options = options_from_args(args)
    run_dir = run_folder(args)
    with run_folder_guard(run_dir):
        result = run_hosts(None, run_dir, options, seed=args.seed, progress=not (args.quiet or args.json))
    if args.json:
        print(summary_json(result))
    elif not args.quiet:
        print(format_table(result, args.top))
        print(f"wrote {result.out_dir}/ranking.ecsv, hosts_summary.json" + ("" if args.no_plots else " and plots"))
    return 0


__all__ = ["DESCRIPTION", "EXAMPLE", "add_arguments", "run", "options_from_args", "run_folder"]
