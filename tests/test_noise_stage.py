"""The noise stage, the one noise model per run (``--noise-model``), goodness of fit in the scan,
and ``cwsearch simulate --wrong-sigmas``.

Check values come from outside the project: ``scipy.stats`` (chi-squared interval of a sample
variance, Kolmogorov–Smirnov), or are marked common practice (no source). Arrays are invented and
seeded; they exercise code paths and are never check values themselves.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from scipy import stats

from cwsearch import cli
from cwsearch.core.errors import InputError
from cwsearch.data.dataset import dataset_checksum, read_dataset, write_dataset
from cwsearch.data.model import PulsarNoise
from cwsearch.inference.noisefit import NoiseFitWarning, UncorrelatedCommonLikelihood
from cwsearch.job.noisemodel import NoiseModelWarning, resolve_noise_model
from cwsearch.physics.noise import NoiseSettings
from cwsearch.physics.simulate import invented_array, simulate_residuals, wrong_white_noise
from cwsearch.stages.noise.stage import CorrelatedCommonLikelihood, NoiseOptions, run_noise

FAST = NoiseOptions(starts=1, iterations=0, upper_limits=False, no_plots=True)
K = 6


def _array(seed=5, n=3, toas=60, scale=None, short=None):
    """Invented array, residuals drawn from wrong white noise (true scale ``scale`` on every backend if given)."""
    base = invented_array(n_pulsars=n, years=8, seed=seed, toas_per_pulsar=toas, full_span=True)
    truth = wrong_white_noise(base, seed=seed + 1)
    if scale is not None:
        for own in truth.values():
            for b in own.values():
                b["sigma_scale"], b["sigma_added"] = scale, 0.0
    arr = base.with_residuals(simulate_residuals(base, seed=seed + 2, true_white=truth, red=False))
    arr = arr.with_noise({p.name: PulsarNoise() for p in arr})
    return arr


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    """A dataset folder and a run folder with a fitted noise model (fitted once for the module)."""
    root = tmp_path_factory.mktemp("noisestage")
    data = root / "data"
    write_dataset(_array(), data)
    run = root / "run"
    arr = read_dataset(data)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = run_noise(arr, run, NoiseOptions(starts=1, iterations=0, upper_limits=False, contour_points=4),
                           noise=NoiseSettings(red_components=K), dataset_checksum=dataset_checksum(data))
    return data, run, result


def test_stage_outputs_state_values_errors_bounds_and_choices(dataset):
    data, run, result = dataset
    folder = run / "noise"
    assert {"noise_model.ecsv", "summary.json", "spectra.png", "common_likelihood.png"} <= {
        p.name for p in folder.iterdir()}
    s = json.loads((folder / "summary.json").read_text())
    assert s["dataset_checksum"] == dataset_checksum(data)
    assert s["bounds"]["sigma_scale"] == [0.2, 5.0] and s["red_noise_threshold"] == 9.0
    for p in s["pulsars"]:
        red = p["red_noise"]
        # the model choice follows the stated figure and threshold
        assert red["claimed"] == (red["statistic"] >= red["threshold"])
        for w in p["white"].values():
            assert w["sigma_scale_err"] > 0 and np.isfinite(w["sigma_added_s"])
        assert p["goodness_of_fit"]["normality_pvalue"] is not None
    # the run's default common_correlation is Hellings-Downs: the fit used the correlated array likelihood
    # and states its likelihood ratio against the uncorrelated fit
    assert s["common"]["statistic"] >= 0 and s["common"]["correlation"] == NoiseSettings().common_correlation
    if s["common"]["correlation"] == "hellings-downs":
        assert s["common"]["correlated_vs_uncorrelated"]["statistic"] is not None
    assert s["common"]["contour"]["delta_2lnL"]


def test_estimate_reuses_the_fit_of_the_same_dataset_and_refits_another(dataset, tmp_path):
    data, run, _ = dataset
    arr = read_dataset(data)
    table = run / "noise" / "noise_model.ecsv"
    before = table.stat().st_mtime_ns
    r = resolve_noise_model(arr, run, "estimate", noise=NoiseSettings(red_components=K),
                            dataset_checksum=dataset_checksum(data))
    assert r.description["reused"] and table.stat().st_mtime_ns == before
    assert r.description["source"] == "estimate" and r.array.noise_model is r.description
    # the model applied is the one in the table: white scales per backend equal (common practice, no source)
    fitted = json.loads((run / "noise" / "summary.json").read_text())
    for p in fitted["pulsars"]:
        for b, w in p["white"].items():
            assert r.array[p["name"]].noise.sigma_scale[b] == pytest.approx(w["sigma_scale"], rel=1e-12)
    # another dataset (other checksum): fitted again, in its own run folder
    other = tmp_path / "run2"
    (other / "noise").mkdir(parents=True)
    (other / "noise" / "noise_model.ecsv").write_bytes(table.read_bytes())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        again = resolve_noise_model(arr, other, "estimate", noise=NoiseSettings(red_components=K),
                                    dataset_checksum="0" * 64, options=FAST)
    assert not again.description["reused"] and again.description["table_dataset_checksum"] == "0" * 64


def test_estimate_refits_an_interrupted_fit_or_one_with_other_options_or_seed(dataset, tmp_path):
    """A run's numbers must not depend on what an earlier run left in RUN_DIR/noise/ (issue 19: a resumed
    scan-only run): a fit is reused only when finished (summary.json, written last, is there) and, for a
    run that states its options (a run file), made with the same options and seed (common practice for
    resumable batch jobs, no source)."""
    from cwsearch.job.noisemodel import reusable_fit

    data, _, _ = dataset
    arr, checksum = read_dataset(data), dataset_checksum(data)
    run = tmp_path / "run"
    table, summary = run / "noise" / "noise_model.ecsv", run / "noise" / "summary.json"

    def resolve(options=FAST, seed=0):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return resolve_noise_model(arr, run, "estimate", noise=NoiseSettings(red_components=K),
                                       dataset_checksum=checksum, options=options, seed=seed).description["reused"]

    assert not resolve() and resolve()                 # fitted, then reused
    assert not resolve(seed=1) and resolve(seed=1)     # another seed: fitted again
    assert not resolve(options=NoiseOptions(starts=2, iterations=0, upper_limits=False, no_plots=True))
    summary.unlink()                                   # as a kill between the table and the summary leaves it
    assert not reusable_fit(table, checksum)
    assert not resolve() and summary.is_file()
    # a stage command states no fit options: any finished fit of this dataset is reused (`cwsearch noise` sets them)
    assert resolve(options=None, seed=7)
    assert not reusable_fit(table, "0" * 64)


def test_dataset_model_is_todays_behaviour_and_ignored_settings_are_not_silent(dataset):
    data, run, _ = dataset
    arr = read_dataset(data)
    noise = NoiseSettings(red_components=K, common_log10_amplitude=-14.0)
    r = resolve_noise_model(arr, None, "dataset", noise=noise)
    assert r.array is arr and r.noise is noise and r.description["common"]["log10_amplitude"] == -14.0
    with pytest.warns(NoiseModelWarning, match="common_log10_amplitude"):
        r = resolve_noise_model(arr, run, "estimate", noise=noise, dataset_checksum=dataset_checksum(data))
    assert r.noise.common_log10_amplitude != -14.0 and r.description["notes"]


def test_noise_table_of_another_dataset_exits_2_naming_the_mismatch(dataset, tmp_path, capsys):
    data, run, _ = dataset
    other = tmp_path / "other"
    write_dataset(_array(seed=9), other)
    code = cli.main(["scan", str(other), "--out", str(tmp_path / "r"), "--noise-model",
                     str(run / "noise" / "noise_model.ecsv"), "--quiet", "--nside", "1", "--fmax", "3e-8"])
    err = capsys.readouterr().err
    assert code == 2 and "another dataset" in err and "noise_model.ecsv" in err and "Traceback" not in err


def test_noise_table_with_unknown_pulsar_exits_2_with_row_and_column(dataset, tmp_path, capsys):
    data, run, _ = dataset
    text = (run / "noise" / "noise_model.ecsv").read_text()
    first = read_dataset(data)[0].name
    bad = tmp_path / "bad.ecsv"
    lines = text.splitlines()
    row = next(i for i, line in enumerate(lines) if line.startswith(first))
    lines[row] = lines[row].replace(first, "NOSUCHPSR", 1)
    bad.write_text("\n".join(lines) + "\n")
    code = cli.main(["scan", str(data), "--out", str(tmp_path / "r"), "--noise-model", str(bad), "--quiet",
                     "--nside", "1", "--fmax", "3e-8"])
    err = capsys.readouterr().err
    assert code == 2 and "NOSUCHPSR" in err and "row 1" in err and "pulsar" in err


def test_scan_with_estimated_model_states_it_and_counts_failed_pulsars(dataset, tmp_path):
    data, run, _ = dataset
    code = cli.main(["scan", str(data), "--out", str(run), "--quiet", "--nside", "1", "--fmax", "3e-8",
                     "--red-components", str(K), "--no-plots"])
    assert code == 0
    s = json.loads((run / "scan" / "scan_summary.json").read_text())
    assert s["noise_model"]["source"] == "estimate" and s["noise_model"]["reused"]
    assert s["noise_model"]["table_checksum"] and s["noise_model"]["dataset_checksum"] == dataset_checksum(data)
    assert s["goodness_of_fit"]["n_failed"] == len(s["goodness_of_fit"]["failed"])


def test_scan_goodness_of_fit_names_a_pulsar_with_wrong_quoted_errors():
    """Quoted errors 3x too small: the KS p-value (scipy.stats.kstest) is tiny and the scan warns by name."""
    from cwsearch.stages.scan.stage import scan_goodness_of_fit

    arr = _array(seed=21, n=2, toas=80, scale=3.0)
    with pytest.warns(NoiseFitWarning, match=arr[0].name):
        gof = scan_goodness_of_fit(arr, NoiseSettings(red_components=K))
    assert gof["n_failed"] == 2 and gof["failed"] == arr.names
    # the reference: the raw normalised residuals r/σ of a 3x scale fail a KS test against N(0, 1) too
    assert stats.kstest(arr[0].residuals / arr[0].sigmas, "norm").pvalue < 1e-3


def test_too_few_toas_white_only_with_warning_naming_it(tmp_path):
    arr = _array(seed=31, n=2, toas=60)
    with pytest.warns(NoiseFitWarning, match=f"{arr[1].name}.*fewer than 100"):
        res = run_noise(arr, tmp_path, NoiseOptions(starts=1, iterations=0, upper_limits=False, no_plots=True,
                                                     min_toas_red=100, fit_common=False),
                        noise=NoiseSettings(red_components=K))
    assert all(not p["red_noise"]["fitted"] for p in res.summary["pulsars"])
    assert any(arr[1].name in w for w in res.summary["warnings"])
    assert "nan" not in (tmp_path / "noise" / "noise_model.ecsv").read_text().lower()


def test_run_file_noise_model_key(tmp_path):
    from cwsearch.job.config import parse_config

    (tmp_path / "data").mkdir()
    cfg = parse_config('dataset = "data"\n[noise]\nmodel = "dataset"\nred_components = 8\n', path=tmp_path / "r.toml")
    assert cfg.options["noise"].model == "dataset" and cfg.noise.red_components == 8
    assert cfg.stages[0] == "noise"
    assert 'model = "dataset"' in cfg.to_toml()
    (tmp_path / "t.ecsv").write_text("x\n")
    cfg = parse_config('dataset = "data"\n[noise]\nmodel = "t.ecsv"\n', path=tmp_path / "r.toml")
    assert cfg.options["noise"].model == str((tmp_path / "t.ecsv").resolve())
    with pytest.raises(InputError, match=r"line 3: \[noise\] model.*not found"):
        parse_config('dataset = "data"\n[noise]\nmodel = "missing.ecsv"\n', path=tmp_path / "r.toml")


def test_correlated_factory_reduces_to_the_uncorrelated_likelihood():
    """With correlation 'uncorrelated' the array engine's likelihood equals the sum of per-pulsar
    likelihoods (two independent implementations; common practice, no source), to 1e-8 relative."""
    arr = _array(seed=41, n=3, toas=50)
    a = CorrelatedCommonLikelihood(arr, K, "uncorrelated")
    b = UncorrelatedCommonLikelihood(arr, K)
    for la, g in ((-14.0, 13 / 3), (-13.5, 3.0)):
        assert a(la, g) == pytest.approx(b(la, g), rel=1e-8)


def test_simulate_wrong_sigmas_truth_only_in_injection(tmp_path):
    out = tmp_path / "sim"
    assert cli.main(["simulate", str(out), "--pulsars", "3", "--years", "6", "--toas-per-pulsar", "120",
                     "--wrong-sigmas", "--sigma-scale-range", "1.5", "1.5", "--sigma-added-range", "0", "0",
                     "--quiet", "--seed", "3"]) == 0
    injection = json.loads((out / "injection.json").read_text())
    arr = read_dataset(out)
    assert not (out / "noise.ecsv").exists()
    for p in arr:
        assert all(w["sigma_scale"] == 1.5 for w in injection["true_noise"][p.name]["white"].values())
        # quoted errors kept wrong: sum (r/σ_quoted)² / 1.5² ~ χ² with n − m ... n degrees of freedom (the
        # timing fit removes m); interval from scipy.stats.chi2 at 1e-4 on each side
        q = float(np.sum((p.residuals / p.sigmas) ** 2)) / 1.5**2
        m = p.design_matrix.shape[1]
        assert stats.chi2.ppf(1e-4, p.n_toas - m) < q < stats.chi2.ppf(1 - 1e-4, p.n_toas)
    red = tmp_path / "red"
    assert cli.main(["simulate", str(red), "--pulsars", "3", "--years", "6", "--toas-per-pulsar", "30",
                     "--red-noise-fraction", "1", "--quiet"]) == 0
    truth = json.loads((red / "injection.json").read_text())["true_noise"]
    arr = read_dataset(red)
    assert not any(p.noise.has_red_noise for p in arr)           # red noise not in the files read
    assert all(truth[p.name]["red"]["log10_amplitude"] < -11 for p in arr)


def test_noise_command_help_and_registry():
    from cwsearch.job.config import STAGES

    assert STAGES[0] == "noise" and "noise" in cli.COMMANDS
    assert cli.main(["noise", "--help"]) == 0
