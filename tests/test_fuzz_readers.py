"""Property-based fuzzing of every reader of user files, and a check that nothing is executed or unpickled.

Property (issues 8 and 19; common practice for input validation, no source):
any byte string given as ``pulsars.ecsv``, ``residuals/NAME.ecsv``,
``noise.ecsv``, a galaxy catalogue (ECSV or CSV), a TOML run file, a scan
candidates table, a follow-up posterior or a fitted noise table either loads
or raises :class:`cwsearch.core.errors.InputError` — never any other exception.
Inputs are drawn five ways: arbitrary bytes, random Unicode text, a valid file
with random byte edits, a valid file with random fields replaced by tokens
that readers find hard (NaN, inf, quotes, YAML tags, huge numbers,
separators), and a valid file with a field replaced by a numeric extreme. Hypothesis
(``max_examples`` modest, no deadline) shrinks any failure to a small case.

YAML in ECSV headers: astropy reads the header with a safe YAML loader
(only plain data types); a ``!!python/...`` tag must be refused with an
InputError and must not run anything (PyYAML documentation: ``safe_load``
does not construct arbitrary Python objects).
"""

from __future__ import annotations

import re
import shutil
import warnings
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cwsearch.core.errors import InputError

_HEALTH = [HealthCheck.too_slow, HealthCheck.function_scoped_fixture, HealthCheck.data_too_large]
FUZZ = settings(max_examples=30, deadline=None, derandomize=True, suppress_health_check=_HEALTH)
#: a dataset read validates every file of the folder, so fewer examples there
FUZZ_DATASET = settings(max_examples=20, deadline=None, derandomize=True, suppress_health_check=_HEALTH)

HARD_TOKENS = ["nan", "-inf", "inf", "1e999", "-0", '""', "'", '"', "!!python/object/apply:os.system ['true']",
               "{", "}", "[", ",", "#", "# %ECSV 1.0", "# ---", "\t", "\\", "../x", "SIMPSR01", "1e-320",
               "# - {name: ra, unit: deg, datatype: float64}", "# delimiter: ','", "0x10", "True", "null",
               "\u00e9", "\ufeff", "9" * 400]


@pytest.fixture(scope="module")
def valid(tmp_path_factory):
    """Valid files to start from: a tiny dataset folder, a catalogue in ECSV and CSV, a run file."""
    from astropy.table import Table

    from cwsearch.data.dataset import write_dataset
    from tests.conftest import make_tiny_array

    root = tmp_path_factory.mktemp("fuzz_valid")
    write_dataset(make_tiny_array(), root / "data")
    (root / "data" / "injection.json").write_text(
        '{"binaries": [{"ra": 10.0, "dec": 20.0, "gw_frequency": 1e-08, "strain": 1e-14, "chirp_mass": 1e9, '
        '"pulsar_phases": {"SIMPSR01": 1.0}}], "reference_mjd": 53000.0, "background": null, '
        '"true_noise": {"SIMPSR01": {"white": {"A": {"sigma_scale": 1.0, "sigma_added": 0.0}}, "red": null}}}\n')
    (root / "galaxies.csv").write_text("name,ra,dec,distance,k_abs_mag\nGAL001,10.0,20.0,40.0,-24.1\n"
                                       "GAL002,200.0,-30.0,80.0,-25.0\n")
    table = Table({"name": ["GAL001", "GAL002"], "ra": [10.0, 200.0], "dec": [20.0, -30.0],
                   "redshift": [0.01, 0.02]})
    table["ra"].unit = "deg"
    table["dec"].unit = "deg"
    table.write(root / "galaxies.ecsv", format="ascii.ecsv")
    (root / "run.toml").write_text('dataset = "data"\nout = "run"\nseed = 3\nstages = ["scan"]\n\n'
                                   "[scan]\nnside = 2\nfmax = 3e-8\n\n[noise]\nred_components = 5\n")
    return root


def _mutations(base: bytes):
    """Strategies for inputs derived from ``base`` (valid bytes)."""
    lines = base.split(b"\n")

    @st.composite
    def byte_edits(draw):
        data = bytearray(base)
        for _ in range(draw(st.integers(1, 6))):
            kind = draw(st.sampled_from(["flip", "insert", "delete", "truncate"]))
            pos = draw(st.integers(0, max(len(data) - 1, 0)))
            if kind == "flip" and data:
                data[pos] = draw(st.integers(0, 255))
            elif kind == "insert":
                data[pos:pos] = draw(st.binary(min_size=1, max_size=8))
            elif kind == "delete" and data:
                del data[pos:pos + draw(st.integers(1, 20))]
            elif kind == "truncate":
                del data[pos:]
        return bytes(data)

    @st.composite
    def token_edits(draw):
        new = list(lines)
        for _ in range(draw(st.integers(1, 3))):
            i = draw(st.integers(0, len(new) - 1))
            fields = new[i].split(b" ")
            j = draw(st.integers(0, len(fields) - 1))
            fields[j] = draw(st.sampled_from(HARD_TOKENS)).encode("utf-8")
            new[i] = b" ".join(fields)
        return b"\n".join(new)

    @st.composite
    def number_edits(draw):
        """A data field replaced by a numeric extreme (issue 19): huge, tiny, subnormal, negative zero,
        non-finite, integers beyond 64 bits."""
        new = list(lines)
        data_rows = [k for k, ln in enumerate(new) if ln and not ln.startswith(b"#")][1:] or [len(new) - 1]
        i = draw(st.sampled_from(data_rows))
        fields = new[i].split(b" ") if b" " in new[i] else new[i].split(b",")
        j = draw(st.integers(0, len(fields) - 1))
        value = draw(st.one_of(st.floats(allow_nan=True, allow_infinity=True).map(repr),
                               st.integers(-(10 ** 30), 10 ** 30).map(str),
                               st.sampled_from(["1e308", "-1e308", "5e-324", "1e-200", "-0.0", "1e-45",
                                                "9" * 40, "-9e99", "1e15", "69999.999"])))
        fields[j] = value.encode()
        new[i] = (b" " if b" " in new[i] else b",").join(fields)
        return b"\n".join(new)

    unicode_text = st.text(max_size=300).map(lambda s: s.encode("utf-8", "surrogatepass"))
    return st.one_of(st.binary(max_size=600), byte_edits(), token_edits(), number_edits(), unicode_text)


def _loads_or_input_error(call):
    """The property: ``call()`` returns, or raises InputError; anything else fails the test."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            call()
        except InputError as exc:
            assert str(exc).strip() and "\n" not in str(exc).strip()  # one line


def _dataset_copy(valid, tmp):
    target = tmp / "data"
    if target.exists():
        shutil.rmtree(target)
    shutil.copytree(valid / "data", target)
    return target


def _first_residual(folder):
    return sorted((folder / "residuals").glob("*.ecsv"))[0]


@pytest.mark.parametrize("which", ["pulsars.ecsv", "residuals/NAME.ecsv", "noise.ecsv", "injection.json"])
def test_dataset_reader_fuzz(valid, tmp_path, which):
    from cwsearch.data.dataset import read_dataset

    source = {"pulsars.ecsv": valid / "data" / "pulsars.ecsv", "noise.ecsv": valid / "data" / "noise.ecsv",
              "residuals/NAME.ecsv": _first_residual(valid / "data"),
              "injection.json": valid / "data" / "injection.json"}[which]
    folder = _dataset_copy(valid, tmp_path)
    target = folder / source.relative_to(valid / "data")

    @FUZZ_DATASET
    @given(data=_mutations(source.read_bytes()))
    def check(data):
        target.write_bytes(data)
        _loads_or_input_error(lambda: read_dataset(folder))

    check()


@pytest.mark.parametrize("suffix", ["csv", "ecsv"])
def test_catalog_reader_fuzz(valid, tmp_path, suffix):
    from cwsearch.data.catalog import read_catalog

    source = valid / f"galaxies.{suffix}"
    target = tmp_path / f"fuzzed.{suffix}"

    @FUZZ
    @given(data=_mutations(source.read_bytes()))
    def check(data):
        target.write_bytes(data)
        _loads_or_input_error(lambda: read_catalog(target))

    check()


def test_run_file_fuzz(valid, tmp_path):
    from cwsearch.job.config import load_config

    shutil.copytree(valid / "data", tmp_path / "data")
    target = tmp_path / "run.toml"

    @FUZZ
    @given(data=_mutations((valid / "run.toml").read_bytes()))
    def check(data):
        target.write_bytes(data)
        _loads_or_input_error(lambda: load_config(target))

    check()


def _scan_and_posterior(root):
    """A finished-looking scan folder and follow-up folder (summaries present) under ``root``."""
    import numpy as np
    from astropy.table import Table

    t = Table({"frequency": [1e-8, 2e-8], "ra": [10.0, 20.0], "dec": [10.0, -5.0], "fe": [30.0, 20.0],
               "fap": [1e-4, 0.1], "fp": [1.0, 2.0], "strain": [1e-14, 2e-14], "inclination": [1.0, 0.5],
               "polarization": [0.5, 0.2], "phase": [1.0, 2.0]})
    t["frequency"].unit, t["ra"].unit, t["dec"].unit = "Hz", "deg", "deg"
    (root / "scan").mkdir(parents=True, exist_ok=True)
    t.write(root / "scan" / "candidates.ecsv", format="ascii.ecsv", overwrite=True)
    (root / "scan" / "scan_summary.json").write_text("{}\n")
    n = 12
    post = Table({"ra": np.linspace(9, 11, n), "dec": np.linspace(19, 21, n), "frequency": np.full(n, 1e-8),
                  "chirp_mass": np.full(n, 1e9), "strain": np.full(n, 1e-14)})
    post["ra"].unit = post["dec"].unit = "deg"
    post["frequency"].unit, post["chirp_mass"].unit = "Hz", "solMass"
    (root / "followup").mkdir(parents=True, exist_ok=True)
    post.write(root / "followup" / "posterior.ecsv", format="ascii.ecsv", overwrite=True)
    (root / "followup" / "summary.json").write_text('{"model": {"strain_prior": "log-uniform"}}\n')


@pytest.mark.parametrize("which", ["candidates", "posterior", "posterior-summary"])
def test_run_folder_reader_fuzz(tmp_path, which):
    """The readers of a run folder's files (scan candidates for the follow-up, the posterior and its summary
    for the host stage) see only InputError or success (issue 19)."""
    from cwsearch.stages.followup.stage import read_candidates
    from cwsearch.stages.hosts.stage import read_posterior

    run = tmp_path / "run"
    _scan_and_posterior(run)
    target = {"candidates": run / "scan" / "candidates.ecsv", "posterior": run / "followup" / "posterior.ecsv",
              "posterior-summary": run / "followup" / "summary.json"}[which]
    load = (lambda: read_candidates(run)) if which == "candidates" else \
        (lambda: read_posterior(run / "followup" / "posterior.ecsv"))

    @FUZZ
    @given(data=_mutations(target.read_bytes()))
    def check(data):
        target.write_bytes(data)
        _loads_or_input_error(load)

    check()


@pytest.mark.parametrize("which", ["posterior", "subtracted-signal"])
def test_rounds_reader_fuzz(tmp_path, which):
    """The readers of the subtract-and-rescan step (a round's follow-up posterior; rounds/subtracted_signal.ecsv,
    which the limits and targets stages subtract) see only InputError or success."""
    import numpy as np

    from cwsearch.job.rounds import _write_signal, read_posterior, read_subtracted_signal
    from cwsearch.physics.simulate import invented_array

    run = tmp_path / "run"
    _scan_and_posterior(run)
    post = run / "followup" / "posterior.ecsv"
    from astropy.table import Table

    table = Table.read(post, format="ascii.ecsv")
    for name in ("inclination", "polarization", "phase"):
        table[name] = np.linspace(0.1, 1.0, len(table))
    table.write(post, format="ascii.ecsv", overwrite=True)
    array = invented_array(n_pulsars=2, years=3, seed=1, toas_per_pulsar=8)
    signal = run / "rounds" / "subtracted_signal.ecsv"
    signal.parent.mkdir(parents=True)
    one = [np.full(p.n_toas, 1e-7) for p in array]
    _write_signal(signal, array, [one], [[np.stack([s, 2 * s]) for s in one]])
    assert read_subtracted_signal(signal, array, "draw_2")[0][0] == 2e-7 and len(read_posterior(post.parent)) == 12
    target, load = {"posterior": (post, lambda: read_posterior(post.parent)),
                    "subtracted-signal": (signal, lambda: (read_subtracted_signal(signal, array),
                                                           read_subtracted_signal(signal, array, "draw_1")))}[which]

    @FUZZ
    @given(data=_mutations(target.read_bytes()))
    def check(data):
        target.write_bytes(data)
        _loads_or_input_error(load)

    check()


def test_fe_sky_map_reader_fuzz(tmp_path):
    """The reader of a user's Fe sky map (`hosts --sky-map FILE`) sees only InputError or success."""
    import numpy as np
    from astropy.table import Table

    from cwsearch.stages.hosts.stage import _read_fe_map

    target = tmp_path / "fe_map.ecsv"
    table = Table({"pixel": np.arange(12), "fe": np.linspace(1.0, 12.0, 12), "frequency": np.full(12, 1e-8)})
    table.meta["nside"] = 1
    table.write(target, format="ascii.ecsv")
    assert _read_fe_map(target, 1, 1e-8, explicit=True)[0] == 1   # the seed itself is a usable map

    @FUZZ
    @given(data=_mutations(target.read_bytes()))
    def check(data):
        target.write_bytes(data)
        _loads_or_input_error(lambda: _read_fe_map(target, 1, 1e-8, explicit=True))

    check()


def test_noise_table_reader_fuzz(valid, tmp_path):
    """The fitted-noise-table reader (cwsearch.inference.noisefit.read_noise_table) sees only InputError or
    success (issue 19), whatever the bytes."""
    from cwsearch.data.dataset import read_dataset
    from cwsearch.inference import noisefit

    from astropy.table import Table

    array = read_dataset(valid / "data")
    target = tmp_path / "noise_model.ecsv"
    names = [c[0] for c in noisefit._TABLE_COLUMNS]
    dtypes = [str, str, int, float, float, float, float, bool, bool] + [float] * 8 + [bool, float, float]
    defaults = {str: "x", int: 10, float: 0.5, bool: False}
    rows = []
    for p in array:
        for b in p.backend_names:
            row = [defaults[t] for t in dtypes]
            row[0], row[1], row[3], row[5] = p.name, b, 1.0, 1e-8
            row[names.index("red_log10_amplitude")], row[names.index("red_index")] = -14.0, 3.0
            rows.append(tuple(row))
    table = Table(rows=rows, names=names, dtype=dtypes)
    for name, unit, _ in noisefit._TABLE_COLUMNS:
        if unit:
            table[name].unit = unit
    table.meta["format"] = noisefit.TABLE_FORMAT
    table.write(target, format="ascii.ecsv", overwrite=True)
    _loads_or_input_error(lambda: noisefit.read_noise_table(target, array))   # the seed itself is handled
    seed = target.read_bytes()

    @FUZZ
    @given(data=_mutations(seed))
    def check(data):
        target.write_bytes(data)
        _loads_or_input_error(lambda: noisefit.read_noise_table(target, array))

    check()


# ------------------------------------------------------------------ follow-up checkpoints

def _toy_sampler(folder, max_iterations, resume):
    """A 2-D Gaussian in a box, 3 temperatures x 8 walkers: the follow-up sampler at its cheapest."""
    import numpy as np

    from cwsearch.inference.sampling import SamplerSettings, run_sampler

    settings = SamplerSettings(walkers=8, temperatures=3, max_temperature=100, ess=1e9, max_iterations=max_iterations,
                               adapt_iterations=20, checkpoint_every=20, check_every=20)
    p0 = np.random.default_rng(6).uniform(-1, 1, (3, 8, 2))
    prior = lambda x: np.where(np.all(np.abs(x) <= 5, axis=1), 0.0, -np.inf)  # noqa: E731
    like = lambda x: -0.5 * np.sum(x ** 2, axis=1)  # noqa: E731
    return run_sampler(prior, like, p0, settings, seed=7, checkpoint=folder / "checkpoint.npz", resume=resume,
                       fingerprint={"toy": 1}, progress=False)


def _extreme_arrays():
    """Arrays a damaged or hostile checkpoint may hold in place of a field: other shapes and dtypes, NaN,
    ±inf, huge and negative integers, text, empty and 0-d arrays (issue 19: random numeric extremes)."""
    import numpy as np
    from hypothesis.extra import numpy as hnp

    dtypes = st.sampled_from([np.float64, np.float32, np.int64, np.int8, np.uint32, np.bool_, np.complex128])
    shapes = hnp.array_shapes(min_dims=0, max_dims=3, min_side=0, max_side=5)
    numeric = hnp.arrays(dtypes, shapes)
    special = st.sampled_from([np.array(np.nan), np.array(np.inf), np.array(-1), np.array(10 ** 18),
                               np.array(2 ** 62, dtype=np.int64), np.array(-(2 ** 63), dtype=np.int64),
                               np.array(1e308), np.array(5e-324), np.array("x" * 50), np.array([]),
                               np.array(["a", "b"]), np.full((3, 8, 2), np.nan), np.full((3,), 0.0),
                               np.full((3,), -1.0), np.full((20, 8, 2), np.inf)])
    text = st.text(max_size=60).map(lambda t: np.array(t))
    return st.one_of(numeric, special, text)


def test_checkpoint_reader_fuzz(tmp_path):
    """``run_sampler(..., resume=True)`` on a damaged ``checkpoint.npz`` (random bytes, random Unicode, byte
    edits of a real checkpoint, or one field replaced by an array of random shape, dtype or extreme values)
    either resumes or raises InputError, never another exception (issue 19)."""
    import io

    import numpy as np

    base = tmp_path / "base"
    base.mkdir()
    _toy_sampler(base, 20, resume=False)
    valid = (base / "checkpoint.npz").read_bytes()
    with np.load(io.BytesIO(valid), allow_pickle=False) as ck:
        fields = {k: np.array(ck[k]) for k in ck.files}
    target_dir = tmp_path / "fuzzed"
    target_dir.mkdir()
    target = target_dir / "checkpoint.npz"

    @st.composite
    def field_edits(draw):
        edited = dict(fields)
        for _ in range(draw(st.integers(1, 2))):
            key = draw(st.sampled_from(sorted(k for k in fields if k != "fingerprint")))
            edited[key] = draw(_extreme_arrays())
        buf = io.BytesIO()
        np.savez(buf, **edited)
        return buf.getvalue()

    @FUZZ
    @given(data=st.one_of(_mutations(valid), field_edits(), field_edits()))
    def check(data):
        target.write_bytes(data)
        _loads_or_input_error(lambda: _toy_sampler(target_dir, 24, resume=True))

    check()


# ------------------------------------------------------------------ nothing executed, nothing unpickled

YAML_ATTACKS = [
    "# meta: !!python/object/apply:os.system ['touch {marker}']",
    "# meta: !!python/object/apply:subprocess.call [['touch', '{marker}']]",
    "# meta: {{x: !!python/name:os.system }}",
    "# meta: !!python/object/new:pathlib.Path ['{marker}']",
]


def _inject_yaml(path: Path, line: str):
    text = path.read_text(encoding="utf-8")
    path.write_text(text.replace("# schema: astropy-2.0", line + "\n# schema: astropy-2.0"), encoding="utf-8")


@pytest.mark.parametrize("attack", YAML_ATTACKS, ids=["os.system", "subprocess", "python-name", "object-new"])
@pytest.mark.parametrize("which", ["pulsars", "residuals", "noise", "catalog"])
def test_yaml_python_tags_rejected_not_executed(valid, tmp_path, which, attack):
    from cwsearch.data.catalog import read_catalog
    from cwsearch.data.dataset import read_dataset

    marker = tmp_path / "EXECUTED"
    folder = _dataset_copy(valid, tmp_path)
    if which == "catalog":
        target = tmp_path / "galaxies.ecsv"
        shutil.copy(valid / "galaxies.ecsv", target)
        if "# schema: astropy-2.0" not in target.read_text():
            pytest.skip("catalogue ECSV written without a schema line")
        _inject_yaml(target, attack.format(marker=marker))
        load = lambda: read_catalog(target)  # noqa: E731
    else:
        target = {"pulsars": folder / "pulsars.ecsv", "noise": folder / "noise.ecsv",
                  "residuals": _first_residual(folder)}[which]
        _inject_yaml(target, attack.format(marker=marker))
        load = lambda: read_dataset(folder)  # noqa: E731
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(InputError) as info:
            load()
    assert target.name in str(info.value)
    assert not marker.exists()


# Calls that run or unpickle data: the readers of user files (and everything else in the package) must not
# use them on anything read from disk. Python documentation: pickle "is not secure", eval/exec run code;
# numpy.load(allow_pickle=True) unpickles object arrays; yaml.load without a safe loader builds objects.
FORBIDDEN = [
    (r"\bimport\s+pickle\b|\bfrom\s+pickle\b|\bpickle\.load", "pickle"),
    (r"\bcloudpickle\.load|\bdill\.load|\bmarshal\.load|\bshelve\.open", "unpickling"),
    (r"(?<![.\w])eval\s*\(", "eval"),
    (r"(?<![.\w])exec\s*\(", "exec"),
    (r"allow_pickle\s*=\s*True", "np.load(allow_pickle=True)"),
    (r"yaml\.(unsafe_load|load\s*\((?![^)]*SafeLoader))|yaml\.full_load|UnsafeLoader|FullLoader", "unsafe YAML"),
    (r"\bcompile\s*\([^)]*['\"]exec['\"]", "compile(..., 'exec')"),
    (r"__import__\s*\(|importlib\.import_module\s*\((?!f?['\"])", "dynamic import of a name from data"),
]
#: reviewed exceptions: (file, code fragment, why it is safe; a test below checks the why)
ALLOWED = {
    ("config.py", "importlib.import_module(module_name)"):
        "module_name comes from the fixed table config.STAGE_OPTIONS, never from the run file",
}


def _package_sources():
    import cwsearch

    root = Path(cwsearch.__file__).resolve().parent
    return sorted(root.rglob("*.py"))


def test_no_code_execution_or_unpickling_in_package():
    sources = _package_sources()
    assert len(sources) > 10
    hits = []
    for path in sources:
        for lineno, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            code = line.split("#", 1)[0]
            for pattern, what in FORBIDDEN:
                if re.search(pattern, code) and not any(
                        path.name == f and frag in code for f, frag in ALLOWED):
                    hits.append(f"{path.name}:{lineno}: {what}: {line.strip()}")
    assert not hits, "\n".join(hits)


def test_allowed_dynamic_import_is_a_fixed_table():
    from cwsearch.job import config

    assert all(module.startswith("cwsearch.") for module, _ in config.STAGE_OPTIONS.values())
    assert all(isinstance(v, tuple) for v in config.STAGE_OPTIONS.values())


def test_numpy_loads_refuse_pickles():
    """Every np.load in the package passes allow_pickle=False explicitly (checkpoints are our own files,
    but a run folder is user-writable)."""
    hits = []
    for path in _package_sources():
        text = path.read_text(encoding="utf-8")
        for m in re.finditer(r"np\.load\(([^)]*)\)", text):
            if "allow_pickle=False" not in m.group(1):
                hits.append(f"{path.name}: np.load({m.group(1)})")
    assert not hits, hits


def test_forbidden_patterns_do_catch_offenders():
    """The grep above is not vacuous: it flags each kind of offending line (common practice, no source)."""
    offenders = ["import pickle", "obj = pickle.loads(data)", "value = eval(text)", "exec(code)",
                 "np.load(path, allow_pickle=True)", "yaml.load(stream)", "yaml.unsafe_load(s)",
                 "__import__(name)"]
    for line in offenders:
        assert any(re.search(p, line) for p, _ in FORBIDDEN), line
    harmless = ["table.meta.get('x')", "x = evaluate(y)", "yaml.load(s, Loader=yaml.SafeLoader)",
                "importlib.import_module(f'cwsearch.commands.{name}')"]
    for line in harmless:
        assert not any(re.search(p, line) for p, _ in FORBIDDEN), line
