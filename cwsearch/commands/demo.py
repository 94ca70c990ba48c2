"""``cwsearch demo``: the whole job on the bundled invented demo dataset and galaxy catalogue."""

from __future__ import annotations

from pathlib import Path

from ..core.errors import InputError
from .run import add_output_arguments, print_result, with_execution, with_noise_model, with_rounds

DESCRIPTION = """\
Run the whole job on the bundled INVENTED demo data: 20 pulsars (SIMPSR01..20)
over 12.5 years with one injected supermassive black-hole binary, and an
invented galaxy catalogue. Noise model (fitted from the residuals; every
later stage uses it) -> scan -> follow-up of every candidate below the
false-alarm threshold -> subtract and rescan (a candidate the detection
rule confirms is subtracted and the residuals scanned again) -> host
ranking -> upper limits on what is left -> targeted search of the
catalogue -> report.html, in about 10 minutes on a 2-core machine
(measured 10 min 0 s: the follow-up, capped at 1,800 iterations, 7 min; the
limits, computed on what is left and 8 more times for their subtraction
error, 2.3 min; a stop at the cap is a warning in the headline; the first
run also compiles the numba kernels). Prints where the report is and the headline.

The settings used are written to OUT/run.toml; edit a copy of it and run
'cwsearch run' to change anything. --quick uses a coarser sky, fewer
frequencies and a shorter sampler run (same code path, about 1 minute on an
idle 2-core machine, measured 50 s; the test suite runs it)."""

EXAMPLE = """\
  cwsearch demo
  cwsearch demo --quick --out /tmp/demo-quick
  cwsearch demo --json --quiet > demo_summary.json"""

#: demo settings per section (keys are the stage options; see runs/example.toml)
DEMO = {
    "noise": {},
    "scan": {"nside": 8, "oversample": 2, "fmax": 1.0e-7, "null_sims": 20},
    # the follow-up is capped at 1,800 iterations (about 10 minutes on 2 cores) so that the demo ends in
    # bounded time; an iteration cap rather than a time cap keeps the numbers the same on every machine. A
    # stop at the cap is a warning on the first screen (rerun `cwsearch followup` without it to converge)
    "followup": {"fap_threshold": 0.01, "max_candidates": 1, "ess": 250.0, "temperatures": 8, "walkers": 24,
                 "max_iterations": 1800},
    "hosts": {},
    # chirp-mass limits for two invented catalogue galaxies (a near one and a farther one)
    "limits": {"nside": 4, "select": ["SIMGAL-01187", "SIMGAL-00009"]},
    # every catalogue galaxy tested at its own sky position
    "targets": {"fmax": 1.0e-7, "null_sims": 50},
}
#: the demo's [rounds]: its 20 noise-only scans resolve empirical FAPs down to 1/21 = 0.048, so the detection
#: rule's FAP threshold is 0.05 (the default 0.01 needs 100); --quick runs no noise-only scans, so nothing is
#: confirmed there and the rounds step stops after round 1
ROUNDS = {"detection_fap": 0.05}
#: --quick overrides
QUICK = {
    "noise": {"red_components": 10, "starts": 1, "iterations": 0, "upper_limits": False, "contour_points": 8},
    "scan": {"nside": 4, "fmax": 5.0e-8, "null_sims": 0},
    "followup": {"ess": 100.0, "temperatures": 4, "walkers": 18, "adapt_iterations": 60, "max_iterations": 200,
                 "max_temperatures": 4},
    "hosts": {},
    "limits": {"nside": 2, "fmax": 5.0e-8, "quadrature": "fast"},
    "targets": {"fmax": 5.0e-8, "null_sims": 10, "no_limits": True},
}


def add_arguments(parser):
    parser.add_argument("--out", default=None, metavar="RUN_DIR",
                        help="run folder (default runs/demo, or runs/demo-quick with --quick)")
    parser.add_argument("--quick", action="store_true",
                        help="reduced settings (coarse sky, short sampling): same steps, much faster")
    parser.add_argument("--seed", type=int, default=0, help="random seed of the run (default 0)")
    add_output_arguments(parser)


def demo_paths():
    """Bundled demo dataset folder and galaxy catalogue (package data; repository copy as fallback)."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    import cwsearch

    package = Path(cwsearch.__file__).resolve().parent
    dataset = package / "data" / "demo"
    catalog = package / "data" / "demo_galaxies.ecsv"
    if not catalog.is_file():
        repo_copy = package.parent / "catalogs" / "demo_galaxies.ecsv"
        catalog = repo_copy if repo_copy.is_file() else None
    return dataset, catalog


def demo_settings(quick=False) -> dict:
    """The demo's stage settings (``DEMO`` with ``QUICK`` applied), only for installed stages."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..job.config import stage_options_class

    settings = {}
    for stage, values in DEMO.items():
        merged = dict(values)
        if quick:
            merged.update(QUICK.get(stage, {}))
        settings[stage] = merged
    # a stage not installed in this copy keeps its keys unchecked; the pipeline reports it as unavailable
    return {s: v for s, v in settings.items() if stage_options_class(s) is not None or v}


def demo_config(out, *, quick=False, seed=0):
    """The demo's :class:`~cwsearch.job.config.RunConfig` (validated like any run file)."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..job.config import parse_config, to_toml

    dataset, catalog = demo_paths()
    if not dataset.is_dir():
        raise InputError("the bundled demo dataset is missing from this installation", file=dataset)
    settings = demo_settings(quick)
    if catalog is not None:
        settings.setdefault("hosts", {})["catalog"] = str(catalog)
        if "targets" in settings:
            settings["targets"]["catalog"] = str(catalog)
        if settings.get("limits", {}).get("select"):
            settings["limits"]["catalog"] = str(catalog)
    else:
        settings.get("limits", {}).pop("select", None)
    data = {"title": "cwsearch demo (invented data)" + (", quick settings" if quick else ""),
            "dataset": str(dataset), "out": str(Path(out).resolve()), "seed": int(seed), **settings}
    data["rounds"] = dict(ROUNDS)
    if quick:  # the reduced limits grid is smaller than the cost of starting worker processes
        data["execution"] = {"workers": 1}
    return parse_config(to_toml(data), path=None, base=Path.cwd())


def run(args) -> int:
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..job.pipeline import run_pipeline

    out = args.out or ("runs/demo-quick" if args.quick else "runs/demo")
    config = with_rounds(with_execution(with_noise_model(demo_config(out, quick=args.quick, seed=args.seed),
                                                         args.noise_model), args.workers, args.scheduler), args)
    result = run_pipeline(config, force=args.force, quiet=args.quiet)
    print_result(result, args)
    if not args.json and not args.quiet:
        print(f"Settings used: {config.out / 'run.toml'}  (edit a copy, then: cwsearch run COPY.toml)")
    return 0


__all__ = [
    "DESCRIPTION", "EXAMPLE", "add_arguments", "run", "DEMO", "QUICK", "ROUNDS", "demo_paths", "demo_settings",
    "demo_config",
]
