"""``cwsearch run``: the whole job from a TOML run file."""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

from ..core.errors import InputError
from ..stages import STAGES

DESCRIPTION = """\
Run the whole job from a TOML run file: noise model -> scan -> follow-up of
every candidate below the false-alarm threshold -> subtract and rescan
(rounds: each source the detection rule confirms is subtracted and the scan
runs again on what is left, up to --max-sources) -> host ranking -> upper
limits on what is left -> report.html. Every stage uses one noise model ([noise] model or
--noise-model: 'estimate', the default, fits it from the residuals in the
noise stage; 'dataset' uses the dataset files' values; or a noise table).

The run file names the dataset, the run folder, the seed, where the work runs
([execution]: --workers, --scheduler override it) and one section per stage
([noise], [scan], [followup], [hosts], [limits]); runs/example.toml documents
every key (each is the matching command's option, dashes -> underscores). The whole file is checked before any
work starts: unknown keys and wrong types are errors (exit status 2).

Finished stages whose inputs have not changed (dataset checksum, resolved
options, seed, upstream results) are skipped, so re-running after an edit
redoes only what the edit affects, and a killed run resumes where it
stopped. --force STAGE recomputes a stage from an empty folder.

The run folder gets run.toml (fully resolved), provenance.json, summary.json,
one folder per stage and report.html (one self-contained page)."""

EXAMPLE = """\
  cwsearch run runs/example.toml
  cwsearch run runs/myrun.toml --force followup --quiet
  cwsearch run runs/myrun.toml --check            (validate and print the resolved file; no work)
  cwsearch run runs/myrun.toml --json > summary.json"""

#: --force choices: every stage of the registry (cheap to import: options only), the pipeline's rounds step
#: (subtract and rescan), and "all"
STAGE_CHOICES = tuple(stage.name for stage in STAGES) + ("rounds", "all")


def add_output_arguments(parser):
    """--force, --quiet, --json (shared with ``cwsearch demo``)."""
    parser.add_argument("--force", action="append", default=[], choices=STAGE_CHOICES, metavar="STAGE",
                        help="recompute STAGE (noise, scan, followup, rounds, hosts, limits, targets or all) even if "
                             "it is up to date; may be given more than once")
    parser.add_argument("--quiet", action="store_true", help="no progress bars or stage log; print only the result")
    parser.add_argument("--json", action="store_true",
                        help="print the summary (headline, stage statuses, report path) as JSON on stdout")
    parser.add_argument("--noise-model", default=None, metavar="estimate|dataset|FILE",
                        help="noise model of every stage, overriding the run file's [noise] model: 'estimate' "
                             "(fit it in the noise stage, or reuse RUN_DIR/noise/ fitted on the same dataset), "
                             "'dataset' (the dataset files' values, fixed) or the path of a noise table")
    r = parser.add_argument_group("subtract and rescan (overrides the run file's [rounds])")
    r.add_argument("--max-sources", type=int, default=None, metavar="N",
                   help="confirm at most N sources, subtracting each and rescanning what is left (default 3); "
                        "run-file key [rounds] max_sources")
    r.add_argument("--detection-fap", type=float, default=None, metavar="P",
                   help="detection rule: empirical false-alarm probability below P (default 0.01; needs [scan] "
                        "null_sims >= 1/P - 1); run-file key [rounds] detection_fap")
    r.add_argument("--detection-log-bayes-factor", type=float, default=None, metavar="LNB",
                   help="detection rule: ... and follow-up ln Bayes factor above LNB (default 5); run-file key "
                        "[rounds] detection_log_bayes_factor")
    g = parser.add_argument_group("execution (overrides the run file's [execution]; never changes a result)")
    g.add_argument("--workers", type=int, default=None, metavar="N",
                   help="local worker processes of the scan and limits stages (0: one per CPU); run-file key "
                        "[execution] workers")
    g.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="address of a running Dask scheduler, e.g. tcp://10.0.0.5:8786; run-file key [execution] "
                        "scheduler")


def with_noise_model(config, model):
    """``config`` with its [noise] model replaced by ``model`` (a FILE relative to the working directory)."""
    if model is None:
        return config
    if model not in ("estimate", "dataset"):
        path = Path(model).expanduser().resolve()
        if not path.is_file():
            raise InputError("noise table not found (--noise-model takes estimate, dataset or a noise table)",
                             file=path)
        model = str(path)
    options = dict(config.options)
    options["noise"] = replace(options["noise"], model=model)
    return replace(config, options=options)


def with_execution(config, workers=None, scheduler=None):
    """``config`` with its ``[execution]`` workers / scheduler replaced by the command line's (when given)."""
    if workers is None and scheduler is None:
        return config
    if workers is not None and workers < 0:
        raise InputError(f"option --workers: must be >= 0 (0: one per CPU), not {workers}")
    execution = dict(config.execution)
    if workers is not None:
        execution["workers"] = int(workers)
    if scheduler is not None:
        execution["scheduler"] = str(scheduler)
    return replace(config, execution=execution)


def with_rounds(config, args):
    """``config`` with the command line's --max-sources, --detection-fap, --detection-log-bayes-factor (when
    given) in its ``[rounds]`` section, checked as the run file's keys are."""
    given = {"max_sources": getattr(args, "max_sources", None), "detection_fap": getattr(args, "detection_fap", None),
             "detection_log_bayes_factor": getattr(args, "detection_log_bayes_factor", None)}
    given = {k: v for k, v in given.items() if v is not None}
    if not given:
        return config
    if "max_sources" in given and not 1 <= given["max_sources"] <= 20:
        raise InputError(f"option --max-sources: must be within 1-20, not {given['max_sources']}")
    if "detection_fap" in given and not 0 < given["detection_fap"] <= 1:
        raise InputError(f"option --detection-fap: must be in (0, 1], not {given['detection_fap']}")
    if "detection_log_bayes_factor" in given and given["detection_log_bayes_factor"] != \
            given["detection_log_bayes_factor"]:
        raise InputError("option --detection-log-bayes-factor: must be a number")
    return replace(config, rounds={**config.rounds, **given})


def add_arguments(parser):
    parser.add_argument("runfile", help="TOML run file (see runs/example.toml)")
    add_output_arguments(parser)
    parser.add_argument("--check", action="store_true",
                        help="only validate the run file and print it fully resolved")


def print_result(result, args) -> None:
    """The end-of-run message: report path and headline (or JSON)."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..job.pipeline import format_headline

    if args.json:
        print(json.dumps(result.summary, indent=2, default=str))
        return
    problems = [s for s in result.stages if s.status in ("unavailable", "blocked")]
    for s in problems:
        print(f"note: {s.name} stage {s.status}: {s.reason}")
    if result.report:
        print(f"Report: {result.report}")
    print(format_headline(result.headline))


def run(args) -> int:
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..job.config import load_config
    from ..job.pipeline import run_pipeline

    config = with_rounds(with_execution(with_noise_model(load_config(args.runfile), args.noise_model), args.workers,
                                        args.scheduler), args)
    if args.check:
        print(config.to_toml(), end="")
        return 0
    result = run_pipeline(config, force=args.force, quiet=args.quiet)
    print_result(result, args)
    return 0


__all__ = [
    "DESCRIPTION", "EXAMPLE", "add_arguments", "run", "STAGE_CHOICES", "add_output_arguments", "with_execution",
    "with_rounds",
    "print_result",
]
