"""``runs/example.toml``, generated from the option dataclasses (issue 15 §4).

Every key of every section is written with its default *taken from the
options dataclass of its stage* (:func:`cwsearch.job.config.section_keys`), so
the example can never claim a default the code does not have. The only
values that are not defaults are those in :data:`EXAMPLE_VALUES` (the demo
dataset, catalogue and galaxies, so the file runs as it is); each of them is
labelled "example value" with the default beside it. Keys whose default is
"not set" are written commented out, with a sample value from
:data:`SAMPLES` where one helps.

Regenerate with ``python scripts/make_example_run.py`` (``--check`` compares);
``tests/test_example_run.py`` checks that the file and the dataclasses agree.

Examples
--------
>>> import tomllib
>>> from cwsearch.job.example import example_toml
>>> from cwsearch.stages.scan.stage import ScanOptions
>>> tomllib.loads(example_toml())["scan"]["nside"] == ScanOptions().nside
True
"""

from __future__ import annotations

import textwrap

from .config import STAGES, TOP_KEYS, section_keys, toml_value

HEADER = """\
# cwsearch run file: every key, with its default, explained.
#
# GENERATED from the option dataclasses by `python scripts/make_example_run.py`: do not edit by hand.
# Every value below is the code's default, except the few marked "example value" (the bundled demo
# data, so that this file runs as it is).
#
#   cwsearch run runs/example.toml            run the whole job (this file runs on the bundled demo data)
#   cwsearch run runs/example.toml --check    only validate, and print the file fully resolved
#
# Relative paths are relative to the folder holding this file. Keys you leave out take the default shown
# here. Unknown keys and wrong types are errors before any work starts. A value of "not set" is written by
# leaving the key out (TOML has no null). Section keys are the options of the matching command, with
# dashes turned into underscores: [scan] nside is `cwsearch scan --nside`; a switch that is on by default
# is `--no-NAME` on the command line ([noise] upper_limits = false is `--no-upper-limits`). The comment
# above each key is the command's help text: both come from the same dataclass field.
"""

SECTION_TITLES = {"execution": "where the work runs (never changes a result)", "noise": "noise model (docs/design.md §5)",
                  "scan": "1. all-sky F-statistic scan", "followup": "2. follow-up of candidates",
                  "rounds": "2b. subtract and rescan: the detection rule, more than one source (docs/design.md §14)",
                  "hosts": "3. host galaxies", "limits": "4. upper limits",
                  "targets": "5. targeted searches of a catalogue (every row at its own sky position)"}

#: (section, key) -> explanation written above a key that is not an options field (the top-level keys and
#: the follow-up's selection keys); every options field's comment is its help text (cwsearch.core.options)
DOCS = {
    ('', 'dataset'): 'dataset folder: pulsars.ecsv, residuals/NAME.ecsv, optional noise.ecsv (required)',
    ('', 'out'): 'run folder; default: runs/<name of this file> next to this file',
    ('', 'seed'): 'random seed of the whole run; each stage gets its own seed derived from it (provenance.json '
                  'lists them)',
    ('', 'stages'): 'stages to run, any of "noise", "scan", "followup", "hosts", "limits", "targets" (always run in this '
                    'order). A stage left out keeps its earlier results in the run folder, and later stages may '
                    'use them.',
    ('', 'title'): 'title shown at the top of report.html',
    ('', 'mjd_range'): 'plausible TOA dates [LO, HI] in MJD; TOAs outside are refused as implausible (a unit '
                       "mix-up). Default: 40000-70000 (as the stage commands' --mjd-range)",
    ('followup', 'fap_threshold'): 'follow up every scan candidate whose trials-corrected analytic FAP '
                                   '(candidates.ecsv column fap) is below this; candidates within one frequency '
                                   'bin 1/T_span of a better one are the same source and are skipped '
                                   '(`cwsearch followup --fap-threshold`)',
    ('followup', 'max_candidates'): 'follow up at most this many candidates, best first (one sub-folder each when '
                                    'there are several; `cwsearch followup --max-candidates`)',
}

#: (section, key) -> a sample value (TOML text) for keys whose default is "not set"
SAMPLES = {("", "mjd_range"): "[30000.0, 80000.0]", ("scan", "fmax"): "1.0e-7", ('followup', 'max_time'): '3600.0',
 ('hosts', 'columns'): '"ra=RAJ2000,dec=DEJ2000"',
 ('hosts', 'distance_limit'): '300.0',
 ('hosts', 'observed_span'): '12.5',
 ('hosts', 'sky_bandwidth'): '2.0',
 ('hosts', 'sky_map'): '"my_fe_map.ecsv"',
 ('limits', 'fmax'): '1.0e-7',
 ('limits', 'fmin'): '2.5e-9',
 ('limits', 'mcmc_check'): '10',
 ('limits', 'sky_frequency'): '1.0e-8',
 ('noise', 'common_log10_amplitude'): '-14.7',
 ('scan', 'fmin'): '2.5e-9'}

#: (section, key) -> value that is NOT the default, so that the example runs on the bundled demo data
EXAMPLE_VALUES = {
    ("", "dataset"): "../cwsearch/data/demo",
    ("", "out"): "example",
    ("", "title"): "Example run on the invented demo data",
    ("hosts", "catalog"): "../catalogs/demo_galaxies.ecsv",
    ("limits", "galaxy"): [["MYGAL-1", 150.0, -20.0, 25.0]],
    ("limits", "catalog"): "../catalogs/demo_galaxies.ecsv",
    ("limits", "select"): ["SIMGAL-01187", "SIMGAL-00009"],
    ("targets", "catalog"): "../catalogs/demo_galaxies.ecsv",
}


def _rule(title):
    return f"# {'-' * 64} {title}"


def _comment_lines(text):
    return [f"# {line}" for line in textwrap.wrap(text, 104)] if text else []


def example_toml() -> str:
    """The text of ``runs/example.toml``: every key with its dataclass default (see the module docstring)."""
    lines = [HEADER.rstrip("\n"), "", _rule("the run")]

    def emit(section, name, default, help_text=""):
        doc = DOCS.get((section, name), help_text)
        if (section, name) in EXAMPLE_VALUES:
            value = EXAMPLE_VALUES[(section, name)]
            shown = "not set" if default is None or default == "" or default == () or default == [] else \
                toml_value(default)
            doc = (doc + " " if doc else "") + f"[example value; default: {shown}]"
            lines.extend(_comment_lines(doc))
            lines.append(f"{name} = {toml_value(value)}")
            return
        lines.extend(_comment_lines(doc))
        if default is None:
            sample = SAMPLES.get((section, name))
            lines.append(f"# {name} = {sample}" if sample else f"# {name} is not set by default")
        else:
            lines.append(f"{name} = {toml_value(default)}")

    for name, key in TOP_KEYS.items():
        default = None if key.required else key.default
        emit("", name, default)
    order = ("execution", "noise") + tuple(STAGES)
    order = order[:order.index("followup") + 1] + ("rounds",) + order[order.index("followup") + 1:]
    for section in dict.fromkeys(order):  # the noise stage shares [noise]; [rounds] follows [followup]
        keys = section_keys(section)
        if keys is None:
            continue
        lines += ["", _rule(SECTION_TITLES.get(section, section)), f"[{section}]"]
        for name, key in keys.items():
            emit(section, name, key.default, key.doc)
        if section in ("scan", "limits", "targets"):
            lines.append(f"# (the {section} stage's worker processes or Dask scheduler come from [execution])")
    return "\n".join(lines) + "\n"


__all__ = ["example_toml", "EXAMPLE_VALUES", "DOCS", "SAMPLES"]
