"""Dataset folder: validation messages, exact round trip, the reader writes nothing, fuzzing.

The expectations are the input contract of docs/design.md §3 and common practice for
file readers (no source): every malformed input gives one specific message naming
file, data row and column; reading never modifies the folder; arbitrary bytes
either load or give that kind of message, never a crash.
"""

from __future__ import annotations

import os
import shutil
import warnings

import numpy as np
import pytest
from astropy.table import Table
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cwsearch.data.dataset import DatasetWarning, dataset_checksum, read_dataset, write_dataset
from cwsearch.core.errors import InputError

PSR = "residuals/SIMPSR01.ecsv"
PSR3 = "residuals/SIMPSR03.ecsv"


# ------------------------------------------------------------------ helpers
def _table(path):
    return Table.read(path, format="ascii.ecsv")


def _save(table, path):
    table.write(path, format="ascii.ecsv", overwrite=True)


def edit(rel, func):
    """Mutation: load ``rel`` as a Table, apply ``func(table)`` (may return a new table), save."""
    def mutate(folder):
        path = folder / rel
        table = _table(path)
        out = func(table)
        _save(table if out is None else out, path)
    return mutate


def edit_text(rel, func):
    def mutate(folder):
        path = folder / rel
        path.write_text(func(path.read_text(encoding="utf-8")), encoding="utf-8")
    return mutate


def setcell(column, row, value):
    def func(t):
        t[column][row] = value
    return func


def retype(column, values, unit=None):
    """Replace a column wholesale (e.g. text where numbers belong)."""
    def func(t):
        t.replace_column(column, Table({column: values})[column])
        if unit is not None:
            t[column].unit = unit
    return func


def setunit(column, unit):
    def func(t):
        t[column].unit = unit
    return func


def first_rows(n):
    return lambda t: t[:n]


def noise_rows(rows):
    def mutate(folder):
        t = Table(rows=rows, names=("pulsar", "backend", "sigma_scale", "sigma_added"),
                  dtype=(str, str, float, float))
        t["sigma_added"].unit = "s"
        _save(t, folder / "noise.ecsv")
    return mutate


def rename_pulsar(row, name):
    """Rename pulsar ``row`` in pulsars.ecsv (and its residual file when the name is a safe file name)."""
    def mutate(folder):
        t = _table(folder / "pulsars.ecsv")
        old = t["name"][row]
        t["name"] = t["name"].astype(object)
        t["name"][row] = name
        t["name"] = t["name"].astype(str)
        _save(t, folder / "pulsars.ecsv")
        if "/" not in name and ".." not in name:
            try:
                os.replace(folder / "residuals" / f"{old}.ecsv", folder / "residuals" / f"{name}.ecsv")
            except OSError:
                pass
    return mutate


def remove(rel):
    def mutate(folder):
        target = folder / rel
        shutil.rmtree(target) if target.is_dir() else target.unlink()
    return mutate


def write_bytes(rel, data):
    def mutate(folder):
        (folder / rel).write_bytes(data)
    return mutate


def _swap_rows(t):
    t[2], t[3] = tuple(t[3]), tuple(t[2])


def _dup_row(t):
    t["mjd"][4] = t["mjd"][3]


def _add_2d(t):
    t["design_two"] = np.ones((len(t), 2))


def _design_repeats_offset(t):
    t["design_const"] = np.full(len(t), 3.0)


# (id, mutation, expected message fragment, file (relative) or None, row, column)
CASES = [
    ("missing pulsars.ecsv", remove("pulsars.ecsv"), "has no pulsars.ecsv", "", None, None),
    ("missing residuals folder", remove("residuals"), "has no residuals/ folder", "", None, None),
    ("missing residual file", remove(PSR), "residual file for pulsar SIMPSR01 (row 1", PSR, None, None),
    ("missing column pulsars", edit("pulsars.ecsv", lambda t: t.remove_column("distance")),
     "missing required column 'distance'", "pulsars.ecsv", None, "distance"),
    ("missing column residuals", edit(PSR, lambda t: t.remove_column("sigma")),
     "missing required column 'sigma'", PSR, None, "sigma"),
    ("missing column backend", edit(PSR, lambda t: t.remove_column("backend")),
     "missing required column 'backend'", PSR, None, "backend"),
    ("missing unit", edit(PSR, setunit("sigma", None)), "no unit given; expected s", PSR, None, "sigma"),
    ("missing unit ra", edit("pulsars.ecsv", setunit("ra", None)), "no unit given; expected deg",
     "pulsars.ecsv", None, "ra"),
    ("incompatible unit", edit(PSR, setunit("sigma", "kpc")), "cannot be converted to s", PSR, None, "sigma"),
    ("incompatible unit distance", edit("pulsars.ecsv", setunit("distance", "s")), "cannot be converted to kpc",
     "pulsars.ecsv", None, "distance"),
    ("unknown unit", edit_text(PSR, lambda s: s.replace("{name: sigma, unit: s,", "{name: sigma, unit: furlongs,")),
     "unit 'furlongs' is not recognised", PSR, None, "sigma"),
    ("non-numeric", edit(PSR, lambda t: retype("residual", ["1e-7"] * 5 + ["abc"] + ["0"] * (len(t) - 6), "s")(t)),
     "value 'abc' is not a number", PSR, 6, "residual"),
    ("text column of numbers", edit(PSR, lambda t: retype("residual", ["1e-7"] * len(t), "s")(t)),
     "column holds text", PSR, None, "residual"),
    ("NaN residual", edit(PSR, setcell("residual", 4, np.nan)), "not finite", PSR, 5, "residual"),
    ("inf sigma", edit(PSR, setcell("sigma", 0, np.inf)), "not finite", PSR, 1, "sigma"),
    ("NaN distance", edit("pulsars.ecsv", setcell("distance", 1, np.nan)), "not finite", "pulsars.ecsv", 2,
     "distance"),
    ("empty value", edit_text(PSR, lambda s: s.replace("\n", "\n", 1)), None, None, None, None),
    ("empty residual table", edit(PSR, first_rows(0)), "no TOAs", PSR, None, None),
    ("empty pulsar table", edit("pulsars.ecsv", first_rows(0)), "no pulsars", "pulsars.ecsv", None, None),
    ("sigma zero", edit(PSR, setcell("sigma", 7, 0.0)), "sigma must be > 0", PSR, 8, "sigma"),
    ("sigma negative", edit(PSR, setcell("sigma", 2, -1e-7)), "sigma must be > 0", PSR, 3, "sigma"),
    ("unsorted TOAs", edit(PSR, _swap_rows), "not sorted", PSR, 4, "mjd"),
    ("duplicate TOA", edit(PSR, _dup_row), "duplicate TOA", PSR, 5, "mjd"),
    ("fewer TOAs than columns", edit(PSR3, first_rows(6)), "more TOAs than columns are needed", PSR3, None, None),
    ("singular design", edit(PSR, _design_repeats_offset), "timing model is singular", PSR, None, "design_const"),
    ("two-dimensional column", edit(PSR, _add_2d), "only plain one-dimensional columns", PSR, None, "design_two"),
    ("noise unknown backend", noise_rows([("SIMPSR01", "NOSUCH", 1.0, 0.0)]), "has no TOAs from backend 'NOSUCH'",
     "noise.ecsv", 1, "backend"),
    ("noise unknown pulsar", noise_rows([("SIMPSR01", "RCVR1", 1.0, 0.0), ("GHOST", "RCVR1", 1.0, 0.0)]),
     "unknown pulsar 'GHOST'", "noise.ecsv", 2, "pulsar"),
    ("sigma_scale zero", noise_rows([("SIMPSR01", "RCVR1", 0.0, 0.0)]), "sigma_scale must be > 0", "noise.ecsv",
     1, "sigma_scale"),
    ("sigma_added negative", noise_rows([("SIMPSR01", "RCVR1", 1.0, -1e-7)]), "sigma_added must be >= 0",
     "noise.ecsv", 1, "sigma_added"),
    ("noise duplicate row", noise_rows([("SIMPSR01", "RCVR1", 1.0, 0.0), ("SIMPSR01", "RCVR1", 2.0, 0.0)]),
     "repeats row 1", "noise.ecsv", 2, "backend"),
    ("noise missing column", edit("noise.ecsv", lambda t: t.remove_column("sigma_added")),
     "missing required column 'sigma_added'", "noise.ecsv", None, "sigma_added"),
    ("noise sigma_added unit", edit("noise.ecsv", setunit("sigma_added", "kpc")), "cannot be converted to s",
     "noise.ecsv", None, "sigma_added"),
    ("duplicate name", rename_pulsar(1, "SIMPSR01"), "repeats row 1", "pulsars.ecsv", 2, "name"),
    ("duplicate name other case", rename_pulsar(1, "simpsr01"), "repeats row 1", "pulsars.ecsv", 2, "name"),
    ("name with slash", rename_pulsar(0, "a/b"), "may only contain", "pulsars.ecsv", 1, "name"),
    ("name parent dir", rename_pulsar(0, "../evil"), "may only contain", "pulsars.ecsv", 1, "name"),
    ("name with ..", rename_pulsar(0, "a..b"), "must not start with '.' or contain '..'", "pulsars.ecsv", 1,
     "name"),
    ("name hidden", rename_pulsar(0, ".hidden"), "must not start with '.'", "pulsars.ecsv", 1, "name"),
    ("name with space", rename_pulsar(2, "J 1"), "may only contain", "pulsars.ecsv", 3, "name"),
    ("dec above 90", edit("pulsars.ecsv", setcell("dec", 2, 90.5)), "dec must be in [-90, 90]", "pulsars.ecsv",
     3, "dec"),
    ("dec below -90", edit("pulsars.ecsv", setcell("dec", 0, -91.0)), "dec must be in [-90, 90]",
     "pulsars.ecsv", 1, "dec"),
    ("ra 360", edit("pulsars.ecsv", setcell("ra", 1, 360.0)), "ra must be in [0, 360)", "pulsars.ecsv", 2, "ra"),
    ("ra negative", edit("pulsars.ecsv", setcell("ra", 0, -0.5)), "ra must be in [0, 360)", "pulsars.ecsv", 1,
     "ra"),
    ("distance zero", edit("pulsars.ecsv", setcell("distance", 2, 0.0)), "distance must be > 0", "pulsars.ecsv",
     3, "distance"),
    ("distance_err negative", edit("pulsars.ecsv", setcell("distance_err", 0, -0.1)), "distance_err must be >= 0",
     "pulsars.ecsv", 1, "distance_err"),
    ("red index column alone", edit("pulsars.ecsv", lambda t: t.remove_column("red_log10_amplitude")),
     "needs column 'red_log10_amplitude'", "pulsars.ecsv", None, "red_log10_amplitude"),
    ("non-UTF-8", write_bytes(PSR, b"# %ECSV 1.0\n# ---\n\xff\xfe bad\n"), "not UTF-8 text (byte 18 on line 3",
     PSR, None, None),
    ("not ECSV", write_bytes(PSR, b"mjd,residual,sigma,backend\n53000,0,1e-7,A\n"), "not an ECSV table", PSR,
     None, None),
    ("broken ECSV header", edit_text(PSR, lambda s: s.replace("# schema", "# schema: [unclosed\n# x")),
     "cannot parse ECSV table", PSR, None, None),
    ("ECSV row too short", edit_text(PSR, lambda s: s.rstrip("\n").rsplit(" ", 1)[0] + "\n"),
     "cannot parse ECSV table", PSR, 40, None),   # the last of the 40 data rows lost a field
]
# the placeholder "empty value" case above is replaced by concrete ones:
CASES = [c for c in CASES if c[0] != "empty value"] + [
    ("empty mjd", edit_text(PSR, lambda s: _blank_field(s, 3, 0)), "empty value", PSR, 3, "mjd"),
    ("empty backend", edit_text(PSR, lambda s: _blank_field(s, 2, 3)), "empty value", PSR, 2, "backend"),
    ("empty name", edit_text("pulsars.ecsv", lambda s: _blank_field(s, 1, 0)), "empty value", "pulsars.ecsv", 1,
     "name"),
]


def _blank_field(text, row, field):
    """Replace field ``field`` of data row ``row`` (1-based) with an empty ECSV value ("")."""
    lines = text.split("\n")
    header = next(i for i, line in enumerate(lines) if not line.startswith("#"))
    parts = lines[header + row].split(" ")
    parts[field] = '""'
    lines[header + row] = " ".join(parts)
    return "\n".join(lines)


@pytest.fixture
def noisy_dir(dataset_dir):
    """The dataset folder has a noise.ecsv for SIMPSR01 (see conftest) and red-noise columns."""
    assert (dataset_dir / "noise.ecsv").is_file()
    assert "red_index" in _table(dataset_dir / "pulsars.ecsv").colnames
    return dataset_dir


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_validation_message(noisy_dir, case):
    _, mutate, fragment, rel, row, column = case
    # make sure the noise table refers to a backend the pulsar really has
    mutate(noisy_dir)
    with pytest.raises(InputError) as info:
        read_dataset(noisy_dir)
    err = info.value
    assert fragment in err.message, str(err)
    if rel is not None:
        assert err.file is not None and err.file.endswith(rel if rel else noisy_dir.name), str(err)
    assert err.row == row, str(err)
    assert err.column == column, str(err)
    assert "\n" not in str(err)


def test_missing_folder(tmp_path):
    with pytest.raises(InputError, match="dataset folder not found"):
        read_dataset(tmp_path / "nothing")
    (tmp_path / "file").write_text("x")
    with pytest.raises(InputError, match="not a folder"):
        read_dataset(tmp_path / "file")


def test_conftest_backend_name(tiny_array):
    # the noise cases above name backend RCVR1 of SIMPSR01; the fixture must provide it
    assert "RCVR1" in tiny_array["SIMPSR01"].backend_names


@pytest.mark.parametrize("column, unit, factor", [
    ("sigma", "us", 1e6), ("residual", "ns", 1e9), ("mjd", "h", 24.0),
])
def test_convertible_units_residuals(dataset_dir, tiny_array, column, unit, factor):
    """Values in a convertible unit are converted (astropy units; common practice)."""
    path = dataset_dir / PSR
    t = _table(path)
    t[column] = t[column] * factor
    t[column].unit = unit
    _save(t, path)
    psr = read_dataset(dataset_dir)["SIMPSR01"]
    want = {"sigma": tiny_array["SIMPSR01"].sigmas, "residual": tiny_array["SIMPSR01"].residuals,
            "mjd": tiny_array["SIMPSR01"].mjd}[column]
    got = {"sigma": psr.sigmas, "residual": psr.residuals, "mjd": psr.mjd}[column]
    np.testing.assert_allclose(got, want, rtol=1e-14, atol=0)


def test_convertible_units_pulsars(dataset_dir, tiny_array):
    path = dataset_dir / "pulsars.ecsv"
    t = _table(path)
    t["ra"] = np.radians(t["ra"])
    t["ra"].unit = "rad"
    t["distance"] = t["distance"] * 1000
    t["distance"].unit = "pc"
    _save(t, path)
    arr = read_dataset(dataset_dir)
    for p, q in zip(arr, tiny_array):
        assert p.ra == pytest.approx(q.ra, rel=1e-14)
        assert p.distance == pytest.approx(q.distance, rel=1e-14)


def test_round_trip_exact(tmp_path, tiny_array):
    """write -> read gives the model back: bit for bit except ra/dec (at most one unit in the last place,
    degree <-> radian conversion); read -> write -> read is bit for bit in everything."""
    write_dataset(tiny_array, tmp_path / "a")
    first = read_dataset(tmp_path / "a")
    for p, q in zip(tiny_array, first):
        _assert_same_pulsar(p, q, angles_exact=False)
    write_dataset(first, tmp_path / "b")
    second = read_dataset(tmp_path / "b")
    for p, q in zip(first, second):
        _assert_same_pulsar(p, q, angles_exact=True)
    assert [p.name for p in second] == [p.name for p in tiny_array]
    assert second["SIMPSR03"].extra_design_names == ("design_dmx1",)


def _assert_same_pulsar(p, q, angles_exact):
    # exact on purpose: writing and reading a number is not recomputing it; the writer prints every float
    # at full precision (shortest round-trip form), so the file contract is bit for bit
    assert p.name == q.name
    for attr in ("mjd", "residuals", "sigmas", "extra_design"):
        a, b = getattr(p, attr), getattr(q, attr)
        assert a.shape == b.shape and np.array_equal(a, b), attr
    assert list(p.backends) == list(q.backends)
    assert p.distance == q.distance and p.distance_err == q.distance_err
    assert p.noise == q.noise
    for attr in ("ra", "dec"):
        a, b = getattr(p, attr), getattr(q, attr)
        if angles_exact:
            assert a == b, attr
        else:
            assert abs(a - b) <= np.spacing(abs(a)), attr


def test_reader_writes_nothing(dataset_dir):
    """Reading (valid or not) leaves the folder and its parent exactly as they were."""
    def snapshot():
        out = {}
        for root in (dataset_dir.parent,):
            for dirpath, dirnames, filenames in os.walk(root):
                for name in dirnames + filenames:
                    st_ = os.stat(os.path.join(dirpath, name))
                    out[os.path.join(dirpath, name)] = (st_.st_mtime_ns, st_.st_size, st_.st_mode)
        return out

    before = snapshot()
    read_dataset(dataset_dir)
    dataset_checksum(dataset_dir)
    assert snapshot() == before
    edit(PSR, setcell("sigma", 3, -1.0))(dataset_dir)
    before = snapshot()
    with pytest.raises(InputError):
        read_dataset(dataset_dir)
    assert snapshot() == before


def test_extra_residual_file_warns(dataset_dir, tiny_array):
    """Decision (README, Datasets section): residual files not listed in pulsars.ecsv are ignored with a
    warning naming them, so a pulsar can be dropped by deleting its row."""
    shutil.copy(dataset_dir / PSR, dataset_dir / "residuals" / "SIMPSR99.ecsv")
    (dataset_dir / "residuals" / ".DS_Store").write_bytes(b"\0")
    with pytest.warns(DatasetWarning, match=r"1 file\(s\) not named in pulsars.ecsv are ignored: SIMPSR99.ecsv"):
        arr = read_dataset(dataset_dir)
    assert arr.names == tiny_array.names


def test_unknown_column_warns(dataset_dir):
    edit(PSR, lambda t: t.add_column(np.zeros(len(t)), name="freq_mhz"))(dataset_dir)
    with pytest.warns(DatasetWarning, match="unknown column.*freq_mhz"):
        read_dataset(dataset_dir)


def test_red_noise_empty_fields_mean_none(dataset_dir, tiny_array):
    arr = read_dataset(dataset_dir)
    assert [p.noise.has_red_noise for p in arr] == [p.noise.has_red_noise for p in tiny_array]
    assert any(p.noise.has_red_noise for p in arr) and not all(p.noise.has_red_noise for p in arr)


def test_red_noise_half_given(dataset_dir, tiny_array):
    row = next(i for i, p in enumerate(tiny_array) if p.noise.has_red_noise)
    text = (dataset_dir / "pulsars.ecsv").read_text()
    (dataset_dir / "pulsars.ecsv").write_text(_blank_field(text, row + 1, 6))
    with pytest.raises(InputError, match="give both red_log10_amplitude and red_index") as info:
        read_dataset(dataset_dir)
    assert info.value.row == row + 1 and info.value.column == "red_index"


def test_noise_settings_read(dataset_dir, tiny_array):
    psr = read_dataset(dataset_dir)["SIMPSR01"]
    assert psr.noise.sigma_scale == tiny_array["SIMPSR01"].noise.sigma_scale
    assert psr.noise.sigma_added == tiny_array["SIMPSR01"].noise.sigma_added


def test_writer_refuses_nonempty_and_non_dataset(tmp_path, tiny_array):
    target = tmp_path / "out"
    target.mkdir()
    (target / "notes.txt").write_text("keep me")
    with pytest.raises(InputError, match="not empty"):
        write_dataset(tiny_array, target)
    with pytest.raises(InputError, match="not a dataset"):
        write_dataset(tiny_array, target, overwrite=True)
    assert (target / "notes.txt").read_text() == "keep me"
    write_dataset(tiny_array, tmp_path / "ds", injection={"binaries": []})
    write_dataset(tiny_array, tmp_path / "ds", overwrite=True)
    assert not (tmp_path / "ds" / "injection.json").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ds", "out"]   # no temporary folders left


def test_checksum_stable_and_sensitive(tmp_path, tiny_array):
    write_dataset(tiny_array, tmp_path / "a")
    write_dataset(tiny_array, tmp_path / "b")
    # exact on purpose: the same in-memory numbers written twice (nothing recomputed) give the same bytes
    assert dataset_checksum(tmp_path / "a") == dataset_checksum(tmp_path / "b")
    edit(PSR, setcell("residual", 0, 1e-6))(tmp_path / "b")
    assert dataset_checksum(tmp_path / "a") != dataset_checksum(tmp_path / "b")


# ------------------------------------------------------------------ fuzzing
def _mutated(good: bytes):
    """Strategy: the good file with a few bytes replaced, inserted or deleted, or truncated."""
    edits = st.lists(st.tuples(st.sampled_from(["replace", "insert", "delete", "truncate"]),
                               st.integers(0, len(good) - 1), st.binary(min_size=1, max_size=4)),
                     min_size=1, max_size=4)

    def apply(ops):
        data = bytearray(good)
        for op, pos, chunk in ops:
            pos = min(pos, max(len(data) - 1, 0))
            if op == "replace":
                data[pos:pos + len(chunk)] = chunk
            elif op == "insert":
                data[pos:pos] = chunk
            elif op == "delete":
                del data[pos:pos + len(chunk)]
            else:
                del data[pos:]
        return bytes(data)

    return edits.map(apply)


@pytest.fixture(scope="module")
def fuzz_dir(tmp_path_factory):
    from tests.conftest import make_tiny_array

    folder = tmp_path_factory.mktemp("fuzz") / "data"
    write_dataset(make_tiny_array(), folder)
    return folder


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_fuzz_residual_bytes(fuzz_dir, data):
    """Random bytes in a residual file either load or raise InputError, never anything else
    (common practice for input parsers, no source)."""
    path = fuzz_dir / PSR
    good = getattr(test_fuzz_residual_bytes, "_good", None)
    if good is None:
        good = test_fuzz_residual_bytes._good = path.read_bytes()
    blob = data.draw(st.one_of(st.binary(max_size=300), _mutated(good)))
    path.write_bytes(blob)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            read_dataset(fuzz_dir)
    except InputError as exc:
        assert str(exc)
    finally:
        path.write_bytes(good)
