"""Run-file validation and the TOML writer.

External checks: the TOML reader is Python's standard ``tomllib`` (a TOML 1.0
parser we did not write); every written file must read back through it to
the same values. Error cases follow the issue text (unknown key, wrong type,
missing dataset, bad engine): common practice, no source.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from pathlib import Path

import pytest

from cwsearch.job.config import (STAGES, load_config, parse_config, section_keys, stage_options_class, to_toml,
                             toml_value)
from cwsearch.core.errors import InputError

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture
def dataset_dir(tmp_path):
    d = tmp_path / "data"
    d.mkdir()
    return d


def _parse(text, tmp_path):
    return parse_config(text, path=tmp_path / "myrun.toml")


def test_minimal_file_gets_defaults(tmp_path, dataset_dir):
    cfg = _parse('dataset = "data"\n', tmp_path)
    assert cfg.dataset == dataset_dir.resolve()
    assert cfg.out == (tmp_path / "runs" / "myrun").resolve()
    assert cfg.seed == 0
    assert cfg.stages == STAGES
    assert cfg.engine == {"kind": "local", "workers": 0, "address": ""}
    from cwsearch.physics.noise import NoiseSettings

    assert cfg.noise == NoiseSettings()


def test_relative_paths_are_relative_to_the_run_file(tmp_path, dataset_dir, monkeypatch):
    monkeypatch.chdir("/")
    cfg = _parse('dataset = "data"\nout = "results/a"\n', tmp_path)
    assert cfg.dataset == dataset_dir.resolve()
    assert cfg.out == (tmp_path / "results" / "a").resolve()


def test_unknown_top_level_key_names_key_and_line(tmp_path, dataset_dir):
    with pytest.raises(InputError) as err:
        _parse('dataset = "data"\n\nsed = 3\n', tmp_path)
    msg = str(err.value)
    assert "myrun.toml" in msg and "line 3" in msg and "sed" in msg and "unknown key" in msg


def test_unknown_key_in_section(tmp_path, dataset_dir):
    with pytest.raises(InputError) as err:
        _parse('dataset = "data"\n[noise]\nred_components = 10\nred_component = 3\n', tmp_path)
    msg = str(err.value)
    assert "line 4" in msg and "[noise] red_component" in msg and "red_components" in msg  # lists known keys


def test_unknown_section(tmp_path, dataset_dir):
    with pytest.raises(InputError, match=r"line 2: \[skan\]: unknown section"):
        _parse('dataset = "data"\n[skan]\nnside = 4\n', tmp_path)


@pytest.mark.parametrize("line, expected", [
    ('red_components = "ten"', "expected an integer, got string 'ten'"),
    ("red_components = 10.5", "expected an integer, got number 10.5"),
    ("red_components = true", "expected an integer, got boolean true"),   # a bool is not a number
    ('pulsar_red_noise = "yes"', "expected true or false"),
    ('common_index = "13/3"', "expected a number"),
])
def test_wrong_types(tmp_path, dataset_dir, line, expected):
    with pytest.raises(InputError) as err:
        _parse(f'dataset = "data"\n[noise]\n{line}\n', tmp_path)
    assert expected in str(err.value) and "line 3" in str(err.value)


def test_integer_accepted_where_a_number_is_expected(tmp_path, dataset_dir):
    cfg = _parse('dataset = "data"\n[noise]\ncommon_index = 4\ncommon_log10_amplitude = -15\n', tmp_path)
    assert cfg.noise.common_index == 4.0 and isinstance(cfg.noise.common_index, float)
    assert cfg.noise.common_log10_amplitude == -15.0


def test_missing_dataset_key(tmp_path):
    with pytest.raises(InputError, match="must name a dataset"):
        _parse("seed = 1\n", tmp_path)


def test_dataset_folder_not_found(tmp_path):
    with pytest.raises(InputError, match="dataset folder not found"):
        _parse('dataset = "nowhere"\n', tmp_path)


def test_dataset_must_be_a_folder(tmp_path):
    (tmp_path / "file.txt").write_text("x")
    with pytest.raises(InputError, match="must be a folder"):
        _parse('dataset = "file.txt"\n', tmp_path)


@pytest.mark.parametrize("engine, expected", [
    ('kind = "cluster"', "'cluster' is not one of 'local', 'dask'"),
    ('kind = "dask"', "needs the scheduler address"),
    ("workers = -1", "must be >= 0"),
    ('workers = "two"', "expected an integer"),
    ('adress = "tcp://x:1"', "unknown key"),
])
def test_bad_engine(tmp_path, dataset_dir, engine, expected):
    with pytest.raises(InputError) as err:
        _parse(f'dataset = "data"\n[engine]\n{engine}\n', tmp_path)
    assert expected in str(err.value) and "[engine]" in str(err.value)


def test_dask_engine_with_address(tmp_path, dataset_dir):
    cfg = _parse('dataset = "data"\n[engine]\nkind = "dask"\naddress = "tcp://10.0.0.5:8786"\n', tmp_path)
    assert cfg.engine["kind"] == "dask" and cfg.engine["address"] == "tcp://10.0.0.5:8786"


def test_bad_stage_list(tmp_path, dataset_dir):
    with pytest.raises(InputError, match="stages: 'scna' is not one of 'noise', 'scan'"):
        _parse('dataset = "data"\nstages = ["scna"]\n', tmp_path)
    cfg = _parse('dataset = "data"\nstages = ["limits", "scan"]\n', tmp_path)
    assert cfg.stages == ("scan", "limits")  # always pipeline order


def test_toml_syntax_error_is_an_input_error(tmp_path, dataset_dir):
    with pytest.raises(InputError, match="not valid TOML"):
        _parse('dataset = "data\n', tmp_path)


def test_missing_run_file(tmp_path):
    with pytest.raises(InputError, match="run file not found"):
        load_config(tmp_path / "none.toml")


def test_negative_seed(tmp_path, dataset_dir):
    with pytest.raises(InputError, match="seed: must be >= 0"):
        _parse('dataset = "data"\nseed = -4\n', tmp_path)


def test_nan_refused(tmp_path, dataset_dir):
    with pytest.raises(InputError, match="finite"):
        _parse('dataset = "data"\n[noise]\ncommon_index = nan\n', tmp_path)


@pytest.mark.parametrize("stage", STAGES)
def test_stage_section_schema_is_the_options_dataclass(stage):
    """One source of truth: the [stage] keys are the fields of <Stage>Options."""
    cls = stage_options_class(stage)
    keys = section_keys(stage)
    from cwsearch.job.config import PIPELINE_SET

    fields = {f.name for f in dataclasses.fields(cls) if f.init and f.name not in PIPELINE_SET[stage]}
    assert fields <= set(keys)
    for f in dataclasses.fields(cls):
        if f.name in keys and f.default is not dataclasses.MISSING:
            assert keys[f.name].default == f.default


@pytest.mark.parametrize("stage", STAGES)
def test_stage_section_rejects_unknown_key(tmp_path, dataset_dir, stage):
    with pytest.raises(InputError, match=rf"\[{stage}\] no_such_option: unknown key"):
        _parse(f'dataset = "data"\n[{stage}]\nno_such_option = 1\n', tmp_path)


def test_resolved_config_reads_back_identically(tmp_path, dataset_dir):
    cfg = _parse('dataset = "data"\nseed = 5\ntitle = "A \\"quoted\\" title"\n[noise]\ncommon_log10_amplitude = -14.5\n',
                 tmp_path)
    text = cfg.to_toml()
    tomllib.loads(text)  # valid TOML (stdlib parser)
    again = parse_config(text, path=tmp_path / "elsewhere" / "run.toml")
    assert again.to_dict() == cfg.to_dict()  # exact: values written and parsed back, nothing recomputed


def test_example_run_file_validates():
    example = REPO / "runs" / "example.toml"
    cfg = load_config(example)
    assert cfg.dataset.is_dir()
    # every key of every installed section is documented in the example (by name, in a comment or as a key)
    text = example.read_text()
    for section in ("execution", "rounds", "noise") + STAGES:
        keys = section_keys(section)
        if keys is None:
            continue
        assert f"[{section}]" in text
        for name in keys:
            assert name in text, f"[{section}] {name} is not documented in runs/example.toml"


# ---------------------------------------------------------------- TOML writer, checked by tomllib
def test_writer_round_trips_through_tomllib():
    data = {
        "dataset": "C:\\data\\my \"set\"",
        "unicode": "Ωμέγα\ttab\nnewline\x01",
        "seed": 12345678901234,
        "neg": -3,
        "tiny": 1.2356e-14,
        "third": 1 / 3,
        "big": 1e300,
        "whole": 3.0,
        "flag": False,
        "list": [1.5, 2, -0.0],
        "empty": [],
        "strs": ["a", "b c"],
        "not set": None,
        "section": {"a": 1, "nested": {"b": "x", "deep": {"c": [True, False]}}, "none": None},
        "weird key.with dot": {"k": 1},
    }
    back = tomllib.loads(to_toml(data))

    def drop_none(d):
        return {k: drop_none(v) if isinstance(v, dict) else v for k, v in d.items() if v is not None}

    assert back == drop_none(data)  # exact: a serialisation round trip (shortest repr), nothing recomputed
    assert math.copysign(1, back["list"][2]) == -1  # -0.0 keeps its sign


def test_writer_special_floats():
    assert tomllib.loads("x = " + toml_value(float("inf")))["x"] == math.inf
    assert math.isnan(tomllib.loads("x = " + toml_value(float("nan")))["x"])


def test_writer_property_based():
    """Random nested data round-trips exactly (hypothesis; reference parser: tomllib)."""
    from hypothesis import given, settings, strategies as st

    scalars = (st.booleans() | st.integers(min_value=-2**63, max_value=2**63 - 1)
               | st.floats(allow_nan=False) | st.text(max_size=12))
    values = scalars | st.lists(scalars, max_size=4)
    keys = st.text(min_size=1, max_size=8)
    tables = st.dictionaries(keys, values | st.dictionaries(keys, values, max_size=3), max_size=5)

    @settings(max_examples=40, deadline=None)
    @given(tables)
    def check(data):
        assert tomllib.loads(to_toml(data)) == data

    check()


def test_stage_own_checks_become_run_file_errors(tmp_path, dataset_dir):
    """A value of the right type that the stage refuses is reported against its run-file key."""
    with pytest.raises(InputError) as err:
        _parse('dataset = "data"\n[scan]\nnside = 6\n', tmp_path)
    assert "line 3: [scan] nside" in str(err.value) and "power of two" in str(err.value)


def test_limits_galaxies_array_of_arrays(tmp_path, dataset_dir):
    """[limits] galaxy: a TOML array of [name, ra, dec, distance] arrays becomes a tuple of tuples."""
    cfg = _parse('dataset = "data"\n[limits]\ngalaxy = [["G1", 10, -5.5, 20.0], ["G2", 1.0, 2.0, 3.0]]\n', tmp_path)
    assert cfg.options["limits"].galaxy == (("G1", 10.0, -5.5, 20.0), ("G2", 1.0, 2.0, 3.0))
    with pytest.raises(InputError, match=r"\[limits\] galaxy: expected a list"):
        _parse('dataset = "data"\n[limits]\ngalaxy = [["G1", "ten", -5.5, 20.0]]\n', tmp_path)
    with pytest.raises(InputError, match=r"\[limits\] galaxy"):
        _parse('dataset = "data"\n[limits]\ngalaxy = [["G1", 10.0, -5.5]]\n', tmp_path)


def test_engine_fills_workers_and_scheduler_but_not_the_hash(tmp_path, dataset_dir):
    from cwsearch.job.pipeline import engine_options

    local = _parse('dataset = "data"\n[engine]\nworkers = 3\n', tmp_path)
    dask = _parse('dataset = "data"\n[engine]\nkind = "dask"\naddress = "tcp://h:8786"\n', tmp_path)
    opts = engine_options(local.options["limits"], local.engine)
    assert (opts.workers, opts.scheduler) == (3, None)
    opts = engine_options(dask.options["limits"], dask.engine)
    assert opts.scheduler == "tcp://h:8786"
    assert local.stage_config("limits") == dask.stage_config("limits")  # where it runs is not an input
    with pytest.raises(InputError, match="set by the pipeline"):
        _parse('dataset = "data"\n[limits]\nworkers = 2\n', tmp_path)


def test_execution_section_and_the_old_engine_name(tmp_path, dataset_dir):
    """[execution] workers / scheduler (the stage commands' --workers / --scheduler); the old [engine]
    (kind, workers, address) is still read, with a deprecation warning, as the same thing; both at once
    is an error. Common practice, no source: a renamed setting stays readable for a while."""
    import warnings

    from cwsearch.job.config import RunFileDeprecationWarning
    from cwsearch.job.pipeline import runner_options

    with warnings.catch_warnings():
        warnings.simplefilter("error", RunFileDeprecationWarning)   # the new name is not deprecated
        new = _parse('dataset = "data"\n[execution]\nworkers = 3\nscheduler = "tcp://h:8786"\n', tmp_path)
    assert new.execution == {"workers": 3, "scheduler": "tcp://h:8786"}
    with pytest.warns(RunFileDeprecationWarning, match=r"\[engine\] section is now called \[execution\]"):
        old = _parse('dataset = "data"\n[engine]\nworkers = 3\nkind = "dask"\naddress = "tcp://h:8786"\n', tmp_path)
    assert old.execution == new.execution and old.to_dict() == new.to_dict()
    opts = runner_options(new.options["limits"], new.execution)
    assert (opts.workers, opts.scheduler) == (3, "tcp://h:8786")
    assert "[execution]" in new.to_toml() and "[engine]" not in new.to_toml()
    with pytest.raises(InputError, match=r"give \[execution\] only"):
        _parse('dataset = "data"\n[engine]\nworkers = 1\n[execution]\nworkers = 1\n', tmp_path)
    with pytest.raises(InputError, match=r"\[execution\] workers: must be >= 0"):
        _parse('dataset = "data"\n[execution]\nworkers = -1\n', tmp_path)
    with pytest.raises(InputError, match=r"set \[execution\] scheduler"):
        _parse('dataset = "data"\n[scan]\nscheduler = "tcp://h:8786"\n', tmp_path)


def test_run_command_line_overrides_execution(tmp_path, dataset_dir):
    """`cwsearch run --workers N --scheduler ADDRESS` (and `demo`) set [execution] as the run file would
    (issue 15: every run-file option a command-line option where it makes sense). Common practice, no source."""
    import argparse

    from cwsearch.commands import run as command

    parser = argparse.ArgumentParser()
    command.add_arguments(parser)
    cfg = _parse('dataset = "data"\n[execution]\nworkers = 2\n', tmp_path)
    args = parser.parse_args(["r.toml", "--scheduler", "tcp://h:8786"])
    got = command.with_execution(cfg, args.workers, args.scheduler)
    assert got.execution == {"workers": 2, "scheduler": "tcp://h:8786"}
    assert command.with_execution(cfg, 0, None).execution == {"workers": 0, "scheduler": ""}
    assert command.with_execution(cfg).execution == cfg.execution
    with pytest.raises(InputError, match="--workers"):
        command.with_execution(cfg, -1)


def test_old_engine_section_warns_on_the_command_line(tmp_path, dataset_dir, capsys):
    """`cwsearch run FILE --check` with the old [engine] section: one warning line on stderr (a FutureWarning,
    shown by default), and the resolved file says [execution]. Common practice, no source."""
    from cwsearch.cli import main

    path = tmp_path / "old.toml"
    path.write_text('dataset = "data"\n[engine]\nworkers = 2\n')
    assert main(["run", str(path), "--check"]) == 0
    captured = capsys.readouterr()
    assert "cwsearch: warning:" in captured.err and "now called [execution]" in captured.err
    assert "[execution]\nworkers = 2\n" in captured.out and "[engine]" not in captured.out
