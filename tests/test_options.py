"""One source for every option (issue 15 §4, issue 16): each field of every stage's Options (and of the run-level
NoiseSettings) is reachable from its command line and from the run file, with the same name and default, or says
why only one of them sets it. Common practice, no source: these check the interface contract in the README
("Options and run files") and DEVELOPERS.md ("Adding an option")."""

from __future__ import annotations

import argparse
import dataclasses
import importlib

import pytest

from cwsearch.core.options import add_options, option_specs, options_from_args
from cwsearch.job.config import EXECUTION_KEYS, PIPELINE_KEYS, section_keys
from cwsearch.physics.noise_settings import NoiseSettings
from cwsearch.stages import STAGES

#: (options class, field) -> why its command-line option is not --NAME / --no-NAME
RENAMED = {("NoiseOptions", "model"): "--noise-model: beside the other stage options it names what it is; in the "
                                      "[noise] section the key is simply model"}

#: options class name -> the commands whose command line must carry its fields (all of them unless listed)
CARRIERS = {
    "ScanOptions": {"scan": None},
    "FollowupOptions": {"followup": None},
    "HostsOptions": {"hosts": None},
    "LimitsOptions": {"limits": None},
    "TargetsOptions": {"targets": None},
    # the noise command always fits (model 'estimate'); --noise-model is on every command that uses a model
    "NoiseOptions": {"noise": {"exclude": {"model"}}, "scan": {"only": {"model"}}, "followup": {"only": {"model"}},
                     "limits": {"only": {"model"}}, "targets": {"only": {"model"}}},
    # the noise settings: on every command that uses a noise model; the noise command fits all but the basis
    "NoiseSettings": {"scan": None, "followup": None, "limits": None, "targets": None,
                      "noise": {"only": {"red_components"}}},
}


def _parser(command):
    module = importlib.import_module(f"cwsearch.commands.{command}")
    parser = argparse.ArgumentParser(prog=f"cwsearch {command}")
    module.add_arguments(parser)
    return parser


def _actions(parser):
    return {a.dest: a for a in parser._actions if a.option_strings}


def _classes():
    return [(stage.name, stage.options) for stage in STAGES] + [("noise", NoiseSettings)]


def _cases():
    for section, cls in _classes():
        for command, rule in CARRIERS[cls.__name__].items():
            yield pytest.param(section, cls, command, rule or {}, id=f"{cls.__name__}-{command}")


@pytest.mark.parametrize("section, cls, command, rule", list(_cases()))
def test_every_field_is_on_the_command_line_with_its_name_and_default(section, cls, command, rule):
    actions = _actions(_parser(command))
    for spec in option_specs(cls):
        if spec.name in rule.get("exclude", ()) or ("only" in rule and spec.name not in rule["only"]):
            continue
        if not spec.on_cli:
            assert spec.why, f"{cls.__name__}.{spec.name} is file-only without a reason"
            assert spec.dest not in actions
            continue
        action = actions.get(spec.dest)
        assert action is not None, f"{cls.__name__}.{spec.name} is not an option of cwsearch {command}"
        dashed = spec.name.replace("_", "-")
        expected = f"--no-{dashed}" if spec.default is True else f"--{dashed}"
        if (cls.__name__, spec.name) in RENAMED:
            assert spec.flag != expected and RENAMED[(cls.__name__, spec.name)].startswith(spec.flag)
        else:
            assert spec.flag == expected
        assert spec.flag in action.option_strings
        if isinstance(spec.default, tuple):   # repeatable options start empty
            assert action.default is None and spec.default == ()
        else:
            assert action.default == spec.default, (cls.__name__, spec.name, action.default, spec.default)
        assert action.help and spec.help, f"{cls.__name__}.{spec.name} has no help text"


@pytest.mark.parametrize("section, cls", _classes(), ids=lambda v: getattr(v, "__name__", v))
def test_every_field_is_a_run_file_key_with_its_name_and_default(section, cls):
    keys = section_keys(section)
    for spec in option_specs(cls):
        if spec.in_file:
            key = keys.get(spec.name)
            assert key is not None, f"{cls.__name__}.{spec.name} is not a [{section}] key"
            assert key.default == spec.default and key.doc == spec.help
        else:
            assert spec.why, f"{cls.__name__}.{spec.name} is command-line only without a reason"
            assert spec.name not in keys


@pytest.mark.parametrize("section", [s.name for s in STAGES])
def test_every_run_file_key_is_a_field(section):
    """The other way round: a [section] key is a field of the stage's options (or of NoiseSettings in [noise]),
    or one of the few keys the pipeline reads itself, which are command-line options too."""
    names = {spec.name for spec in option_specs(dict(_classes()[:-1])[section])}
    if section == "noise":
        names |= {spec.name for spec in option_specs(NoiseSettings)}
    extra = set(section_keys(section)) - names
    assert extra == set(PIPELINE_KEYS.get(section, {}))
    actions = _actions(_parser(section))
    for name in extra:
        assert name in actions, f"[{section}] {name} is not an option of cwsearch {section}"


def test_execution_keys_are_the_stage_commands_runner_options():
    """[execution] workers / scheduler are --workers / --scheduler of the commands whose stages use the runner;
    unset in both (the file writes 0 and "" for 'not set', the command line None)."""
    for command in ("scan", "limits"):
        actions = _actions(_parser(command))
        for name, key in EXECUTION_KEYS.items():
            assert f"--{name}" in actions[name].option_strings
            assert actions[name].default is None and not key.default


@pytest.mark.parametrize("section, cls", _classes(), ids=lambda v: getattr(v, "__name__", v))
def test_an_empty_command_line_gives_the_dataclass_defaults(section, cls):
    parser = argparse.ArgumentParser()
    add_options(parser, cls)
    needs_catalog = cls.__name__ in ("HostsOptions", "TargetsOptions")   # required on the command line
    built = options_from_args(cls, parser.parse_args(["--catalog", "x.ecsv"] if needs_catalog else []))
    expected = cls(catalog="x.ecsv") if needs_catalog else cls()
    assert built == expected
    assert built.validate() == expected   # one contract: validate() returns the options


def test_switches_old_spellings_and_repeated_options():
    from cwsearch.stages.limits.options import LimitsOptions, parse_galaxies
    from cwsearch.stages.noise.options import NoiseOptions

    parser = argparse.ArgumentParser()
    add_options(parser, NoiseOptions)
    for flag in ("--no-fit-common", "--no-common"):   # the old spelling still works
        assert options_from_args(NoiseOptions, parser.parse_args([flag])).fit_common is False
    assert options_from_args(NoiseOptions, parser.parse_args(["--no-upper-limits"])).upper_limits is False
    parser = argparse.ArgumentParser()
    add_options(parser, LimitsOptions)
    args = parser.parse_args(["--galaxy", "G1", "10", "-5", "20", "--galaxy", "G2", "1", "2", "3",
                              "--catalog", "c.ecsv", "--select", "A,B", "--select", "C"])
    built = options_from_args(LimitsOptions, args)
    assert built.galaxy == (("G1", "10", "-5", "20"), ("G2", "1", "2", "3")) and built.select == ("A,B", "C")
    assert [g.distance for g in parse_galaxies(built.galaxy)] == [20.0, 3.0]   # exact: text parsed, not computed


def test_one_contract_for_every_stage():
    """Every registry entry: a frozen Options dataclass whose fields all carry option metadata, validate() -> self,
    and a command of the same name (the CLI and the pipeline are loops over the registry)."""
    from cwsearch.cli import COMMANDS

    for stage in STAGES:
        cls = stage.options
        assert dataclasses.is_dataclass(cls) and cls.__dataclass_params__.frozen
        assert all("option" in f.metadata for f in dataclasses.fields(cls)), stage.name
        assert cls().validate() == cls()
        assert stage.name in COMMANDS
        assert cls.__module__ == f"cwsearch.stages.{stage.name}.options"


def test_choice_lists_agree_with_the_numerical_code():
    """The options modules spell out the choices (standard library only); the numerical code's own lists agree."""
    import typing

    from cwsearch.core.options import type_hints
    from cwsearch.physics.relations import RELATIONS
    from cwsearch.physics.waveform import EVOLUTION_MODES
    from cwsearch.stages.followup.options import FollowupOptions
    from cwsearch.stages.hosts.options import RELATION_NAMES
    from cwsearch.stages.limits.options import QUADRATURE_NAMES
    from cwsearch.stages.limits.stage import QUADRATURE

    assert typing.get_args(type_hints(FollowupOptions)["evolution"]) == tuple(EVOLUTION_MODES)
    assert tuple(QUADRATURE) == QUADRATURE_NAMES
    assert set(RELATIONS) == set(RELATION_NAMES)


#: top-level run-file keys that no command line sets, and why
TOP_FILE_ONLY = {
    "dataset": "the stage commands take it as their first argument (DATASET), not as an option",
    "title": "a label of report.html, which only `cwsearch run` writes from the run file",
    "stages": "which stages a run file runs; on the command line each stage is its own command",
}


def test_top_level_keys_are_stage_command_options():
    """out, seed, mjd_range are --out, --seed, --mjd-range of every command that reads a dataset; the others
    say why not (issue 15 §4: every run-file option is a command-line option where it makes sense)."""
    from cwsearch.job.config import TOP_KEYS

    for command in ("noise", "scan", "followup", "limits"):
        actions = _actions(_parser(command))
        for name in TOP_KEYS:
            if name in TOP_FILE_ONLY:
                assert name not in actions
                continue
            assert f"--{name.replace('_', '-')}" in actions[name].option_strings, (command, name)
