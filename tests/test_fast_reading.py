"""The fast dataset-reading path gives exactly what the strict (astropy) path gives (issue 18).

Check (common practice for an optimised parser, no source): on every dataset
the suite builds — valid ones, every damaged one of tests/test_bad_input.py,
and hypothesis-mutated files — reading with the fast path
(``cwsearch.data.dataset.FAST_READING = True``) and with astropy's ECSV
reader for every file (``False``) gives the same outcome: identical arrays
(values read from text by the same conversion, so exact equality is the right
check here), the same warnings, or an :class:`InputError` with the same
message.
"""

from __future__ import annotations

import shutil
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings

from cwsearch.core.errors import InputError
from cwsearch.data import dataset as ds


def _summary(array):
    out = []
    for p in array:
        out.append((p.name, p.ra, p.dec, p.distance, p.distance_err, p.mjd, p.residuals, p.sigmas,
                    np.asarray(p.backends), p.extra_design, tuple(p.extra_design_names),
                    p.noise.red_log10_amplitude, p.noise.red_index, dict(p.noise.sigma_scale),
                    dict(p.noise.sigma_added)))
    return out


def _outcome(folder, fast):
    old = ds.FAST_READING
    ds.FAST_READING = fast
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                result = ("ok", _summary(ds.read_dataset(folder)))
            except InputError as exc:
                result = ("error", str(exc))
        return result, sorted(str(w.message) for w in caught if issubclass(w.category, ds.DatasetWarning))
    finally:
        ds.FAST_READING = old


def _same(a, b):
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        a, b = np.asarray(a), np.asarray(b)
        return a.dtype == b.dtype and a.shape == b.shape and np.array_equal(a, b)
    if isinstance(a, (list, tuple)):
        return type(a) is type(b) and len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    return a == b or (isinstance(a, float) and isinstance(b, float) and np.isnan(a) and np.isnan(b))


def assert_paths_agree(folder):
    fast, fast_warnings = _outcome(folder, True)
    strict, strict_warnings = _outcome(folder, False)
    assert fast[0] == strict[0], (fast if fast[0] == "error" else strict)
    if fast[0] == "error":
        assert fast[1] == strict[1]
    else:
        assert _same(fast[1], strict[1])
    assert fast_warnings == strict_warnings
    return fast


@pytest.fixture(scope="module")
def datasets(tmp_path_factory):
    """Valid datasets of the suite: the tiny array (red noise, noise.ecsv, a design column), the bench
    array's shape at small size, and the bundled demo data."""
    from pathlib import Path

    from cwsearch.physics.simulate import invented_array, simulated_array
    from tests.conftest import make_tiny_array

    root = tmp_path_factory.mktemp("fast_reading")
    ds.write_dataset(make_tiny_array(), root / "tiny")
    ds.write_dataset(simulated_array(invented_array(n_pulsars=4, years=8, seed=5, toas_per_pulsar=60,
                                                    red_noise_fraction=1.0), seed=6), root / "red")
    demo = Path(ds.__file__).parent / "demo"
    return [root / "tiny", root / "red"] + ([demo] if (demo / "pulsars.ecsv").is_file() else [])


def test_valid_datasets_identical(datasets):
    for folder in datasets:
        kind, _ = assert_paths_agree(folder)
        assert kind == "ok", folder


def test_fast_path_is_taken_for_plain_files(datasets):
    """The fast path must actually handle files written by the writer (else it would only be slow)."""
    lines = (datasets[0] / "residuals" / "SIMPSR01.ecsv").read_text().splitlines()
    table = ds._fast_table(lines)
    assert table is not None and table.colnames[:4] == ["mjd", "residual", "sigma", "backend"]


@pytest.mark.parametrize("edit", [
    lambda t: t.replace(" RCVR", "  RCVR", 1),          # a double space (astropy's splitter merges it)
    lambda t: t.replace(" RCVR", "\tRCVR", 1),          # a tab
    lambda t: t + "# a trailing comment line\n",
    lambda t: t + "\n\n",                                # blank lines
    lambda t: t.replace(" RCVR1\n", ' "RCVR1"\n', 1),   # a quoted field
    lambda t: t.replace(" RCVR1\n", " RCVR1 \n", 1),    # a trailing space
    lambda t: t.replace(" RCVR1\n", " RCV\u00e91\n", 1),  # non-ASCII text
    lambda t: t.replace(" RCVR1\n", " RCVR1 extra\n", 1),
], ids=["double-space", "tab", "comment", "blank", "quoted", "trailing-space", "non-ascii", "extra-field"])
def test_irregular_lines_agree(datasets, tmp_path, edit):
    folder = tmp_path / "d"
    shutil.copytree(datasets[0], folder)
    target = folder / "residuals" / "SIMPSR01.ecsv"
    text = target.read_text()
    changed = edit(text)
    assert changed != text
    target.write_text(changed)
    assert ds._fast_table(changed.splitlines()) is None      # irregular lines go to the strict reader
    assert_paths_agree(folder)


def test_every_bad_input_case_agrees(tmp_path):
    """Every damaged dataset of tests/test_bad_input.py: the same message from both paths."""
    from tests.conftest import make_tiny_array
    from tests.test_bad_input import DATASET_CASES

    template = tmp_path / "template"
    ds.write_dataset(make_tiny_array(), template / "data")
    refused = 0
    for name, damage, _expect in DATASET_CASES:
        work = tmp_path / name
        shutil.copytree(template, work)
        damage(work)
        kind, _ = assert_paths_agree(work / "data")
        refused += kind == "error"
    assert refused == len(DATASET_CASES)


_HEALTH = [HealthCheck.too_slow, HealthCheck.function_scoped_fixture, HealthCheck.data_too_large]


@pytest.mark.parametrize("which", ["pulsars.ecsv", "residuals/SIMPSR01.ecsv", "noise.ecsv"])
def test_mutated_files_agree(datasets, tmp_path, which):
    from tests.test_fuzz_readers import _mutations

    folder = tmp_path / "d"
    shutil.copytree(datasets[0], folder)
    target = folder / which
    source = target.read_bytes()

    @settings(max_examples=25, deadline=None, derandomize=True, suppress_health_check=_HEALTH)
    @given(data=_mutations(source))
    def check(data):
        target.write_bytes(data)
        assert_paths_agree(folder)

    check()
