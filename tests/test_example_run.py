"""runs/example.toml states the code's defaults (issue 15 §4): every value equals the default of its
options dataclass (read through cwsearch.job.config.section_keys, i.e. dataclasses.fields) except the
listed example values, and the file is exactly what the generator writes (text, not floats)."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from cwsearch.job.config import STAGES, TOP_KEYS, parse_config, section_keys
from cwsearch.job.example import EXAMPLE_VALUES, example_toml

EXAMPLE = Path(__file__).resolve().parent.parent / "runs" / "example.toml"


def test_example_file_is_generated():
    assert EXAMPLE.read_text(encoding="utf-8") == example_toml(), \
        "runs/example.toml is out of date: python scripts/make_example_run.py"


@pytest.mark.parametrize("section", ("", "execution", "rounds", "noise") + tuple(STAGES))
def test_every_value_is_the_dataclass_default(section):
    data = tomllib.loads(EXAMPLE.read_text(encoding="utf-8"))
    keys = TOP_KEYS if section == "" else section_keys(section)
    assert keys is not None, f"the run file has no keys for stage {section}"
    table = data if section == "" else data[section]
    for name, key in keys.items():
        if (section, name) in EXAMPLE_VALUES:
            assert table[name] == EXAMPLE_VALUES[(section, name)]
            continue
        default = None if key.required else key.default
        if default is None:
            assert name not in table, f"[{section}] {name} has no default but the example sets it"
            continue
        value = table[name]
        if isinstance(default, tuple):
            default = list(default)
        if isinstance(default, float):
            assert value == pytest.approx(default, rel=1e-15), (section, name)
        else:
            assert value == default, (section, name, value, default)
    extra = set(k for k, v in table.items() if not isinstance(v, dict)) - set(keys)
    assert not extra, f"[{section}] keys the code does not know: {extra}"


def test_example_is_a_valid_run_file():
    config = parse_config(EXAMPLE.read_text(encoding="utf-8"), path=EXAMPLE, base=EXAMPLE.parent)
    assert config.dataset.name == "demo"
