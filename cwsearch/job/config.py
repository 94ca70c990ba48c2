"""TOML run files: read, validate against the stage options, write back fully resolved.

A run file names the dataset, the run folder, the seed, the stages to run,
where the work runs (``[execution]``; the old name ``[engine]`` is still read,
with a :class:`RunFileDeprecationWarning`) and one section per stage. The
keys of a stage section are the field names of that stage's frozen options
dataclass (``cwsearch.stages.scan.options.ScanOptions`` for ``[scan]`` and so
on), which are also the stage command's option names with dashes turned into
underscores. The schema is *built from those dataclasses* (their fields'
option metadata, :func:`cwsearch.core.options.option_specs`, and type hints),
so a new option in a stage is automatically a valid run-file key, with the
same default and help; a field marked command-line only is not a key.

Every problem (TOML syntax, unknown section or key, wrong type, missing
dataset, bad [execution] section, a value the stage rejects) raises
:class:`~cwsearch.core.errors.InputError` naming the file, the key and its line,
before any work starts.

Relative paths in a run file are relative to the folder holding the run
file, so a run file works from any working directory. The resolved copy
written into the run folder (``run.toml``) has every key, defaults filled in
and absolute paths, so ``cwsearch run RUN_DIR/run.toml`` repeats the run.

Examples
--------
>>> import pathlib, tempfile
>>> from cwsearch.job.config import parse_config, to_toml
>>> d = pathlib.Path(tempfile.mkdtemp())
>>> (d / "data").mkdir()
>>> cfg = parse_config('dataset = "data"\\nseed = 7\\n[noise]\\nred_components = 12\\n', path=d / "r.toml")
>>> cfg.seed, cfg.noise.red_components, cfg.out.name
(7, 12, 'r')
>>> print(to_toml({"seed": 7, "noise": {"common_index": 13 / 3, "pulsar_red_noise": True}}), end="")
seed = 7
<BLANKLINE>
[noise]
common_index = 4.333333333333333
pulsar_red_noise = true
"""

from __future__ import annotations

import dataclasses
import math
import os
import re
import tomllib
import types
import typing
import warnings
from dataclasses import dataclass, field
from pathlib import Path

from ..core.errors import InputError
from ..core.safeio import read_input_text
from ..core.fileio import write_text_atomic
from ..core.options import choices_of, option_specs
from ..physics.noise_settings import NoiseSettings
from ..stages import BY_NAME, STAGES as REGISTRY

#: stage name -> (module, options class), in pipeline order (from the registry cwsearch.stages.STAGES)
STAGE_OPTIONS = {stage.name: (stage.options.__module__, stage.options.__name__) for stage in REGISTRY}
STAGES = tuple(STAGE_OPTIONS)

#: options the pipeline fills in itself (never run-file keys), per stage: the fields marked command-line only
#: (``only="cli"``, with the reason, in the stage's options; workers and scheduler come from [execution])
PIPELINE_SET = {stage.name: frozenset(spec.name for spec in option_specs(stage.options) if not spec.in_file)
                for stage in REGISTRY}

ENGINE_KINDS = ("local", "dask")


class RunFileDeprecationWarning(FutureWarning):
    """A run file uses an old spelling that is still read (e.g. the ``[engine]`` section, now ``[execution]``).

    A ``FutureWarning``, which Python shows by default: it is meant for the user who wrote the file."""

#: largest run file read [bytes] (a run file is a few hundred bytes; this refuses a device or a data file)
RUN_FILE_MAX_BYTES = 1 << 20

_PIPELINE_HINTS = {
    "workers": "set [execution] workers",
    "scheduler": "set [execution] scheduler",
    "candidate": "the pipeline follows every candidate below [followup] fap_threshold",
    "top": "use [followup] max_candidates",
    "resume": "an interrupted run resumes by itself",
}


# ---------------------------------------------------------------- schema
class _Required:
    def __repr__(self):
        return "REQUIRED"


REQUIRED = _Required()


@dataclass(frozen=True)
class Key:
    """One run-file key: name, type hint, default (``MISSING`` when required), help text."""

    name: str
    hint: object
    default: object = REQUIRED
    doc: str = ""
    choices: tuple = ()

    @property
    def required(self) -> bool:
        return self.default is REQUIRED


#: top-level keys (not in a section)
TOP_KEYS = {
    "dataset": Key("dataset", str, REQUIRED, doc="dataset folder (pulsars.ecsv, residuals/, optional noise.ecsv)"),
    "out": Key("out", str, None, "run folder (default: runs/<run file name> next to the run file)"),
    "seed": Key("seed", int, 0, "random seed of the whole run"),
    "title": Key("title", str, "", "title shown on the report"),
    "stages": Key("stages", list[str], list(STAGES), "stages to run, in pipeline order", STAGES),
    "mjd_range": Key("mjd_range", list[float], None,
                     "plausible TOA dates [LO, HI] in MJD (default 40000-70000; as --mjd-range)"),
}

#: keys the pipeline adds to a stage section (they select what the stage sees)
PIPELINE_KEYS = {
    "followup": {
        "fap_threshold": Key("fap_threshold", float, 0.01,
                             "follow up every scan candidate whose false-alarm probability is below this"),
        "max_candidates": Key("max_candidates", int, 3, "follow up at most this many candidates (best first)"),
    },
}

#: keys holding file paths (relative paths are relative to the run file's folder)
PATH_KEYS = {"hosts": ("catalog", "sky_map"), "limits": ("catalog", "galaxies", "galaxy_catalog"),
             "targets": ("catalog",)}

#: [execution]: where the work runs (the task runner, cwsearch.inference.execution), the same keys as the
#: stage commands' --workers and --scheduler; never part of a stage's input hash
EXECUTION_KEYS = {
    "workers": Key("workers", int, 0, "local worker processes (0: one per CPU); the --workers of the stage commands"),
    "scheduler": Key("scheduler", str, "", "address of a running Dask scheduler, e.g. \"tcp://10.0.0.5:8786\" (not "
                                           "set: worker processes on this machine); the --scheduler of the stage "
                                           "commands"),
}

#: [rounds]: subtract and rescan (cwsearch/job/rounds.py, docs/design.md §14): the detection rule that confirms a
#: followed-up candidate and how many sources the pipeline confirms before it stops rescanning
ROUNDS_KEYS = {
    "max_sources": Key("max_sources", int, 3,
                       "confirm at most this many sources: after each confirmed one its posterior-median signal is "
                       "subtracted and the scan runs again on what is left (1: confirm and subtract one, no rescan)"),
    "detection_fap": Key("detection_fap", float, 0.01,
                         "detection rule, part 1: a followed-up candidate is confirmed only when its empirical "
                         "false-alarm probability (from the scan's noise-only scans, [scan] null_sims) is below "
                         "this; N noise-only scans resolve FAPs down to 1/(N + 1), so 0.01 needs null_sims >= 100"),
    "detection_log_bayes_factor": Key("detection_log_bayes_factor", float, 5.0,
                                      "detection rule, part 2: ... and its follow-up ln Bayes factor (binary + "
                                      "background versus background) is above this (5: 'very strong' on the Kass "
                                      "& Raftery 1995 scale, 2 ln B > 10)"),
    "joint_followup": Key("joint_followup", bool, True,
                          "with two or more confirmed sources, sample them all at once (the joint follow-up, "
                          "rounds/joint/; the [followup] sampler settings; 8 parameters per source)"),
    "subtraction_draws": Key("subtraction_draws", int, 8,
                             "single posterior draws of the subtracted signal kept for the limits' stated "
                             "subtraction error: the limits are recomputed with each subtracted instead of the "
                             "median (each costs one more limits computation; 0 or 1: no subtraction error)"),
}

#: the old [engine] section (read, with a RunFileDeprecationWarning, as [execution])
ENGINE_KEYS = {
    "kind": Key("kind", str, "local", "'local' (worker processes on this machine) or 'dask' (a running scheduler)",
                ENGINE_KINDS),
    "workers": Key("workers", int, 0, "local worker processes (0: one per CPU)"),
    "address": Key("address", str, "", "Dask scheduler address, e.g. 'tcp://10.0.0.5:8786' (kind = 'dask')"),
}


def stage_options_class(stage):
    """The options dataclass of ``stage`` (its ``Options`` in the stage registry)."""
    return BY_NAME[stage].options


def dataclass_keys(cls, exclude=frozenset()):
    """Run-file keys from the fields of an options dataclass (:func:`cwsearch.core.options.option_specs`: the
    same names, defaults and help as the command line), without the command-line-only fields."""
    keys = {}
    for spec in option_specs(cls):
        if spec.name in exclude or not spec.in_file:
            continue
        default = REQUIRED if spec.default is dataclasses.MISSING else spec.default
        keys[spec.name] = Key(spec.name, spec.hint, default, spec.help, tuple(choices_of(spec.hint)))
    return keys


def section_keys(section):
    """All keys of a section, or ``None`` if its stage is not installed (then the section is not checked)."""
    if section == "execution":
        return dict(EXECUTION_KEYS)
    if section == "rounds":
        return dict(ROUNDS_KEYS)
    if section == "engine":   # the old name of [execution]
        return dict(ENGINE_KEYS)
    if section == "noise":
        # [noise] holds the engine's noise settings and the noise stage's options (model, fit choices)

        keys = dataclass_keys(NoiseSettings)
        cls = stage_options_class("noise")
        if cls is not None:
            keys.update(dataclass_keys(cls))
        return keys
    cls = stage_options_class(section)
    if cls is None:
        return None
    keys = dataclass_keys(cls, PIPELINE_SET.get(section, frozenset()))
    for name, key in PIPELINE_KEYS.get(section, {}).items():
        keys.setdefault(name, key)
    return keys


SECTIONS = ("execution", "rounds") + tuple(dict.fromkeys(("noise",) + STAGES))
#: old section names still read (with a RunFileDeprecationWarning) -> the section they now are
OLD_SECTIONS = {"engine": "execution"}


# ---------------------------------------------------------------- type checking
def _type_name(hint) -> str:
    origin = typing.get_origin(hint)
    if hint is bool:
        return "true or false"
    if hint is int:
        return "an integer"
    if hint is float:
        return "a number"
    if hint is str or hint is Path:
        return "a string"
    if origin is typing.Literal:
        return "one of " + ", ".join(repr(c) for c in typing.get_args(hint))
    if origin in (typing.Union, types.UnionType):
        names = [_type_name(a) for a in typing.get_args(hint) if a is not type(None)]
        return " or ".join(names)
    if origin in (list, tuple) or hint in (list, tuple):
        args = [a for a in typing.get_args(hint) if a is not Ellipsis]
        inner = _type_name(args[0]) if args else "values"
        return f"a list of {inner.removeprefix('an ').removeprefix('a ')}s" if args else "a list"
    if origin is dict or hint is dict:
        return "a table"
    return getattr(hint, "__name__", str(hint))


class _Mismatch(Exception):
    pass


def _toml_kind(value) -> str:
    if isinstance(value, bool):
        return f"boolean {str(value).lower()}"
    if isinstance(value, int):
        return f"integer {value}"
    if isinstance(value, float):
        return f"number {value!r}"
    if isinstance(value, str):
        return f"string {value!r}"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    return type(value).__name__


def coerce(value, hint):
    """Check ``value`` (as read from TOML) against a type hint and return it converted.

    ints are accepted where floats are expected; booleans are never numbers;
    TOML arrays become tuples where the field is a tuple. Raises
    ``_Mismatch`` on a wrong type.
    """
    origin = typing.get_origin(hint)
    if hint is object or hint is typing.Any:
        return value
    if hint is bool:
        if isinstance(value, bool):
            return value
        raise _Mismatch
    if hint is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
        raise _Mismatch
    if hint is float:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return float(value)
        raise _Mismatch
    if hint is str:
        if isinstance(value, str):
            return value
        raise _Mismatch
    if hint is Path:
        if isinstance(value, str):
            return Path(value)
        raise _Mismatch
    if origin is typing.Literal:
        if value in typing.get_args(hint) and type(value) in {type(a) for a in typing.get_args(hint)}:
            return value
        raise _Mismatch
    if origin in (typing.Union, types.UnionType):
        for arg in typing.get_args(hint):
            if arg is type(None):
                continue
            try:
                return coerce(value, arg)
            except _Mismatch:
                pass
        raise _Mismatch
    if origin in (list, tuple) or hint in (list, tuple):
        if not isinstance(value, list):
            raise _Mismatch
        args = typing.get_args(hint)
        if origin is tuple and args and args[-1] is not Ellipsis:
            if len(args) != len(value):
                raise _Mismatch
            items = [coerce(v, a) for v, a in zip(value, args)]
        else:
            item_hint = args[0] if args else object
            items = [coerce(v, item_hint) for v in value]
        return tuple(items) if (origin is tuple or hint is tuple) else items
    if origin is dict or hint is dict:
        if not isinstance(value, dict):
            raise _Mismatch
        args = typing.get_args(hint)
        if args:
            return {coerce(k, args[0]): coerce(v, args[1]) for k, v in value.items()}
        return dict(value)
    if isinstance(hint, type):
        if isinstance(value, hint):
            return value
        raise _Mismatch
    return value


# ---------------------------------------------------------------- the resolved configuration
@dataclass
class RunConfig:
    """A validated, fully resolved run configuration.

    Attributes
    ----------
    path : Path or None, the run file
    dataset, out : Path (absolute)
    seed : int
    title : str
    stages : tuple of stage names to run, in pipeline order
    execution : dict with ``workers`` (0: one per CPU) and ``scheduler`` ("" : this machine), the
        ``[execution]`` section (``engine`` gives it in the old ``[engine]`` shape)
    noise : :class:`~cwsearch.physics.noise.NoiseSettings`
    options : dict stage -> options dataclass instance (``None`` if the stage is not installed)
    extra : dict stage -> dict of pipeline keys (``fap_threshold``, ``catalog``, ...)
    raw : dict stage -> dict of keys exactly as given (for stages not installed)
    """

    path: Path | None
    dataset: Path
    out: Path
    seed: int = 0
    title: str = ""
    stages: tuple = STAGES
    execution: dict = field(default_factory=lambda: {"workers": 0, "scheduler": ""})
    #: the ``[rounds]`` section: ``max_sources``, ``detection_fap``, ``detection_log_bayes_factor``
    rounds: dict = field(default_factory=lambda: {k: key.default for k, key in ROUNDS_KEYS.items()})
    noise: object = None
    options: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)
    raw: dict = field(default_factory=dict)
    #: (LO, HI) plausible TOA dates [MJD] (run-file key ``mjd_range``); None: the default 40000-70000
    mjd_range: tuple | None = None

    @property
    def engine(self) -> dict:
        """:attr:`execution` in the shape of the old ``[engine]`` section: ``kind``, ``workers``, ``address``."""
        scheduler = self.execution.get("scheduler") or ""
        return {"kind": "dask" if scheduler else "local", "workers": int(self.execution.get("workers") or 0),
                "address": scheduler}

    def stage_config(self, stage) -> dict:
        """Everything that determines a stage's result (for hashing): its options plus pipeline keys."""
        opts = self.options.get(stage)
        values = _dataclass_values(opts) if opts is not None else dict(self.raw.get(stage, {}))
        for name in PIPELINE_SET.get(stage, ()):  # filled in by the pipeline at run time
            values.pop(name, None)
        values.update(self.extra.get(stage, {}))
        return values

    def to_dict(self) -> dict:
        """Nested dict of every key (defaults filled in; ``None`` means 'not set')."""
        out = {
            "dataset": str(self.dataset),
            "out": str(self.out),
            "seed": self.seed,
            "title": self.title,
            "stages": list(self.stages),
            "mjd_range": None if self.mjd_range is None else list(self.mjd_range),
            "execution": dict(self.execution),
            "rounds": dict(self.rounds),
            "noise": _dataclass_values(self.noise),
        }
        for stage in STAGES:
            if stage == "noise":   # one [noise] section: the noise settings and the noise stage's options
                out["noise"].update(self.stage_config("noise"))
                continue
            out[stage] = self.stage_config(stage)
        return out

    def to_toml(self) -> str:
        """The fully resolved run file (see :func:`to_toml`)."""
        header = ("# cwsearch run file, fully resolved: every key with its value (defaults filled in,\n"
                  "# paths absolute). Repeat the run with:  cwsearch run THIS_FILE\n")
        return header + to_toml(self.to_dict())

    def write(self, path) -> None:
        """Write :meth:`to_toml` to ``path`` atomically."""
        write_text_atomic(path, self.to_toml())


def _dataclass_values(obj) -> dict:
    if obj is None:
        return {}
    values = {}
    for f in dataclasses.fields(obj):
        if f.name.startswith("_"):
            continue
        v = getattr(obj, f.name)
        values[f.name] = _plain(v)
    return values


def _plain(v):
    if isinstance(v, Path):
        return str(v)
    if isinstance(v, tuple):
        return [_plain(x) for x in v]
    if isinstance(v, list):
        return [_plain(x) for x in v]
    if isinstance(v, dict):
        return {str(k): _plain(x) for k, x in v.items()}
    if hasattr(v, "item") and not isinstance(v, (str, bytes)):  # numpy scalar
        try:
            return v.item()
        except Exception:
            return v
    return v


# ---------------------------------------------------------------- reading
def _line_of(text: str, section: str | None, key: str | None):
    """Line number (from 1) of ``key`` in ``[section]`` (or of the section header), else None."""
    current = None
    header = re.compile(r"^\s*\[\s*([A-Za-z0-9_.\-]+)\s*\]")
    for number, line in enumerate(text.splitlines(), start=1):
        m = header.match(line)
        if m:
            current = m.group(1)
            if key is None and current == section:
                return number
            continue
        if key is not None and current == section:
            if re.match(r"^\s*[\"']?" + re.escape(key) + r"[\"']?\s*=", line):
                return number
    return None


def _where(text, section, key):
    line = _line_of(text, section, key)
    name = key if section is None else (f"[{section}] {key}" if key else f"[{section}]")
    return f"line {line}: {name}" if line else name


def load_config(path) -> RunConfig:
    """Read and validate a TOML run file.

    Raises :class:`~cwsearch.core.errors.InputError` for a missing file, bad TOML
    syntax, unknown sections or keys, wrong types, a missing dataset folder,
    a bad engine, or an option value that a stage rejects.
    """
    path = Path(path)
    if not os.path.lexists(path):
        raise InputError("run file not found", file=path)
    text = read_input_text(path, what="run file", max_bytes=RUN_FILE_MAX_BYTES)
    return parse_config(text, path=path)


def parse_config(text: str, path=None, *, base=None, check_dataset=True) -> RunConfig:
    """Validate run-file ``text``; relative paths are relative to ``base`` (default: the run file's folder)."""
    path = Path(path) if path is not None else None
    fname = path if path is not None else "run file"
    base = Path(base) if base is not None else (path.parent if path is not None else Path.cwd())
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", file=fname) from None

    def fail(message, section=None, key=None):
        raise InputError(f"{_where(text, section, key)}: {message}", file=fname)

    # ---- top level
    values = {}
    for name, value in data.items():
        if isinstance(value, dict):
            if name not in SECTIONS and name not in OLD_SECTIONS:
                fail(f"unknown section (known sections: {', '.join(SECTIONS)})", name)
            continue
        key = TOP_KEYS.get(name)
        if key is None:
            hint = f"; did you mean [{name}]?" if name in SECTIONS else ""
            fail(f"unknown key (known top-level keys: {', '.join(TOP_KEYS)}){hint}", None, name)
        values[name] = _check(key, value, fail, None)
    if "dataset" not in values:
        raise InputError("the run file must name a dataset: add  dataset = \"path/to/dataset\"  at the top",
                         file=fname)
    for key in TOP_KEYS.values():
        if key.name not in values and not key.required:
            values[key.name] = _copy(key.default)
    stages = tuple(values["stages"])
    if not stages:
        fail(f"names no stage; list at least one of {', '.join(STAGES)} (or leave the key out for all)",
             None, "stages")
    for s in stages:
        if s not in STAGES:
            fail(f"unknown stage {s!r} (choose from {', '.join(STAGES)})", None, "stages")
    if len(set(stages)) != len(stages):
        fail("a stage is listed twice", None, "stages")
    stages = tuple(s for s in STAGES if s in stages)

    dataset = _resolve(base, values["dataset"])
    if check_dataset and not dataset.is_dir():
        if dataset.exists():
            fail(f"the dataset must be a folder, got the file {dataset}", None, "dataset")
        fail(f"dataset folder not found: {dataset}", None, "dataset")
    if values["out"]:
        out = _resolve(base, values["out"])
    else:
        stem = path.stem if path is not None else "run"
        out = (base / "runs" / stem).resolve() if base.name != "runs" else (base / stem).resolve()
    if values["seed"] < 0:
        fail("must be >= 0", None, "seed")
    mjd_range = values["mjd_range"]
    if mjd_range is not None:
        if len(mjd_range) != 2 or not all(math.isfinite(v) for v in mjd_range) or not mjd_range[0] < mjd_range[1]:
            fail(f"needs two finite numbers [LO, HI] with LO < HI (MJD), got {list(mjd_range)}", None, "mjd_range")
        mjd_range = (float(mjd_range[0]), float(mjd_range[1]))

    # ---- sections
    execution = _execution_section(data, fname, fail)
    rounds = _rounds_section(data, fail)

    noise_values = _check_section("noise", data.get("noise", {}), section_keys("noise"), fail)
    settings_names = {f.name for f in dataclasses.fields(NoiseSettings)}
    noise = _build(NoiseSettings, {k: v for k, v in noise_values.items() if k in settings_names}, "noise", fail)

    options, extra, raw = {}, {}, {}
    noise_cls = stage_options_class("noise")
    if noise_cls is not None:
        stage_values = {k: v for k, v in noise_values.items() if k not in settings_names}
        model = stage_values.get("model")
        if isinstance(model, str) and model not in ("estimate", "dataset"):
            table = _resolve(base, model)
            if not table.is_file():
                fail(f"noise table not found: {table} (model is 'estimate', 'dataset' or a noise table)",
                     "noise", "model")
            stage_values["model"] = str(table)
        options["noise"] = _build(noise_cls, stage_values, "noise", fail)
        extra["noise"] = {}
    for stage in STAGES:
        if stage == "noise":
            continue
        given = data.get(stage, {})
        keys = section_keys(stage)
        if keys is None:  # stage not installed: keep the section as given, unchecked
            options[stage] = None
            raw[stage] = dict(given)
            continue
        checked = _check_section(stage, given, keys, fail)
        for name in PATH_KEYS.get(stage, ()):
            if isinstance(checked.get(name), (str, Path)) and str(checked[name]):
                path_value = _resolve(base, checked[name])
                if stage in stages and not path_value.is_file():
                    fail(f"file not found: {path_value}", stage, name)
                checked[name] = str(path_value) if isinstance(checked[name], str) else path_value
        pipeline_names = set(PIPELINE_KEYS.get(stage, {})) - _field_names(stage)
        extra[stage] = {k: checked.pop(k) for k in list(checked) if k in pipeline_names}
        cls = stage_options_class(stage)
        options[stage] = _build(cls, checked, stage, fail)
    if "followup" in extra:
        thr = extra["followup"].get("fap_threshold")
        if thr is not None and not 0 < thr <= 1:
            fail("must be in (0, 1]", "followup", "fap_threshold")
        if extra["followup"].get("max_candidates", 1) < 1:
            fail("must be >= 1", "followup", "max_candidates")

    # after every key is known to be valid, so that a misspelt key is reported first
    if out == dataset or dataset in out.parents:
        fail(f"the run folder {out} is {'the' if out == dataset else 'inside the'} dataset folder: results must not "
             "be mixed with the data; choose another out", None, "out" if values["out"] else "dataset")
    return RunConfig(path=path, dataset=dataset, out=out, seed=values["seed"], title=values["title"],
                     stages=stages, execution=execution, rounds=rounds, noise=noise, options=options, extra=extra, raw=raw,
                     mjd_range=mjd_range)


def _execution_section(data, fname, fail) -> dict:
    """The ``[execution]`` section, or the old ``[engine]`` one (kind, workers, address; read with a
    :class:`RunFileDeprecationWarning`): ``{"workers": int, "scheduler": str}``."""
    if "engine" in data:
        if "execution" in data:
            fail("give [execution] only ([engine] is its old name)", "engine")
        warnings.warn(f"{fname}: the [engine] section is now called [execution] (with workers = N and scheduler = "
                      "\"ADDRESS\" instead of kind and address); [engine] is still read for now",
                      RunFileDeprecationWarning, stacklevel=3)
        engine = _check_section("engine", data["engine"], section_keys("engine"), fail)
        if engine["kind"] == "dask" and not engine["address"]:
            fail("kind = 'dask' needs the scheduler address, e.g. address = \"tcp://10.0.0.5:8786\"", "engine",
                 "kind")
        if engine["workers"] < 0:
            fail("must be >= 0 (0: one per CPU)", "engine", "workers")
        return {"workers": engine["workers"], "scheduler": engine["address"] if engine["kind"] == "dask" else ""}
    execution = _check_section("execution", data.get("execution", {}), section_keys("execution"), fail)
    if execution["workers"] < 0:
        fail("must be >= 0 (0: one per CPU)", "execution", "workers")
    return execution


def _rounds_section(data, fail) -> dict:
    """The ``[rounds]`` section, defaults filled in, values checked."""
    rounds = _check_section("rounds", data.get("rounds", {}), section_keys("rounds"), fail)
    if not 1 <= rounds["max_sources"] <= 20:
        fail("must be within 1-20", "rounds", "max_sources")
    if not 0 < rounds["detection_fap"] <= 1:
        fail("must be in (0, 1]", "rounds", "detection_fap")
    if not 0 <= rounds["subtraction_draws"] <= 100:
        fail("must be within 0-100", "rounds", "subtraction_draws")
    return rounds


def _field_names(stage):
    cls = stage_options_class(stage)
    return {f.name for f in dataclasses.fields(cls)} if cls is not None else set()


def _copy(v):
    return list(v) if isinstance(v, list) else dict(v) if isinstance(v, dict) else v


def _resolve(base: Path, value) -> Path:
    p = Path(str(value)).expanduser()
    return (p if p.is_absolute() else base / p).resolve()


def _check(key: Key, value, fail, section):
    try:
        result = coerce(value, key.hint)
    except _Mismatch:
        fail(f"expected {_type_name(key.hint)}, got {_toml_kind(value)}", section, key.name)
    if isinstance(result, float) and not math.isfinite(result):
        fail(f"must be a finite number, got {value!r}", section, key.name)
    if key.choices:
        items = result if isinstance(result, (list, tuple)) else [result]
        for item in items:
            if item not in key.choices:
                fail(f"{item!r} is not one of {', '.join(repr(c) for c in key.choices)}", section, key.name)
    return result


def _check_section(section, given, keys, fail) -> dict:
    if not isinstance(given, dict):
        fail("must be a table", None, section)
    for name, value in given.items():
        if name not in keys:
            known = ", ".join(sorted(keys)) or "(none)"
            if name in PIPELINE_SET.get(section, ()):
                hint = _PIPELINE_HINTS.get(name, "")
                fail(f"{name!r} is set by the pipeline, not in the run file" + (f"; {hint}" if hint else ""),
                     section, name)
            fail(f"unknown key (known keys of [{section}]: {known})", section, name)
    values = {}
    for name, key in keys.items():
        if name in given:
            values[name] = _check(key, given[name], fail, section)
        elif key.required:
            fail(f"missing required key {name!r}", section)
        else:
            values[name] = _copy(key.default)
    return values


_OPTION_IN_MESSAGE = re.compile(r"^(?:option\s+)?--([a-z0-9][a-z0-9-]*)\s*:?\s*")


def _build(cls, values, section, fail):
    """Instantiate an options dataclass and run its own checks (``__post_init__``, ``validate()``).

    Their errors become InputErrors naming the run-file key (an option name
    ``--some-option`` in a stage's message is mapped to the key ``some_option``).
    """
    try:
        obj = cls(**values)
        if callable(getattr(obj, "validate", None)):  # every stage's Options has it; NoiseSettings checks itself
            obj.validate()
        return obj
    except InputError as exc:
        message, key = exc.message, exc.column if exc.column in values else None
        m = _OPTION_IN_MESSAGE.match(message)
        if m and m.group(1).replace("-", "_") in values:
            key = m.group(1).replace("-", "_")
            message = message[m.end():]
        fail(message, section, key)
    except (TypeError, ValueError) as exc:
        fail(str(exc), section)


# ---------------------------------------------------------------- TOML writing
_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def _toml_key(key: str) -> str:
    return key if _BARE_KEY.fullmatch(key) else _toml_string(key)


def _toml_string(s: str) -> str:
    out = ['"']
    for ch in s:
        if ch == '"':
            out.append('\\"')
        elif ch == "\\":
            out.append("\\\\")
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\t":
            out.append("\\t")
        elif ch == "\r":
            out.append("\\r")
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    out.append('"')
    return "".join(out)


def toml_value(v) -> str:
    """One TOML value: string, boolean, integer, float (shortest exact repr), or array of these."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        text = repr(v)
        return text if any(c in text for c in ".en") else text + ".0"
    if isinstance(v, (str, Path)):
        return _toml_string(str(v))
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_toml_key(str(k))} = {toml_value(x)}" for k, x in v.items()
                               if x is not None) + "}"
    v = _plain(v)
    if isinstance(v, (bool, int, float, str, list, tuple, dict)):
        return toml_value(v)
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def to_toml(data: dict, comments: dict | None = None) -> str:
    """Write a nested dict of scalars, lists and tables as TOML.

    Top-level scalars come first, then one ``[section]`` per dict (nested
    dicts inside a section become ``[section.sub]``). ``None`` is written as
    a comment (TOML has no null), so reading the text back gives the input
    without its ``None`` values. ``comments`` maps ``"key"`` or
    ``"section.key"`` to a comment written above the key.
    """
    comments = comments or {}
    lines = []

    def emit_table(table, prefix):
        scalars = [(k, v) for k, v in table.items() if not isinstance(v, dict)]
        tables = [(k, v) for k, v in table.items() if isinstance(v, dict)]
        for k, v in scalars:
            full = f"{prefix}.{k}" if prefix else k
            if full in comments:
                lines.extend("# " + c for c in comments[full].splitlines())
            if v is None:
                lines.append(f"# {_toml_key(str(k))} is not set")
            else:
                lines.append(f"{_toml_key(str(k))} = {toml_value(v)}")
        for k, v in tables:
            name = f"{prefix}.{_toml_key(str(k))}" if prefix else _toml_key(str(k))
            if lines:
                lines.append("")
            if name in comments:
                lines.extend("# " + c for c in comments[name].splitlines())
            lines.append(f"[{name}]")
            emit_table(v, name)

    emit_table(data, "")
    return "\n".join(lines) + "\n"


__all__ = ["RunConfig", "load_config", "parse_config", "to_toml", "toml_value", "section_keys",
           "STAGES", "SECTIONS", "OLD_SECTIONS", "Key", "RunFileDeprecationWarning", "EXECUTION_KEYS",
           "ROUNDS_KEYS"]
