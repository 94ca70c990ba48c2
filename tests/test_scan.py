"""The scan stage: grid, outputs, candidates, FAPs, CLI, atomic writes.

Check values come from outside the project: the Wilks/χ² confidence
region for the sky position (χ²₃ quantile from scipy.stats), the
frequency-grid definition of docs/design.md §6 / issue 3, ECSV read back with
astropy. Arrays are small invented ones.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from astropy.table import Table
from scipy import stats

from cwsearch.stages.scan import stage as scan
from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
from cwsearch.stages.scan.stage import ScanOptions, run_scan
from cwsearch.physics.simulate import Binary, binary_residuals, invented_array, simulate_residuals

FAST = dict(nside=2, fmax=3e-8, no_plots=True)


@pytest.fixture(scope="module")
def noise_array():
    arr = invented_array(n_pulsars=6, years=8, seed=31, toas_per_pulsar=80, red_noise_fraction=0.5)
    return arr.with_residuals(simulate_residuals(arr, 32))


# ---------------------------------------------------------------- grid and options
def test_frequency_grid_definition():
    # docs/design.md §6 / issue 3: from 1/T_span, spacing 1/(oversample T_span); default top = the
    # Nyquist-like limit 1/(2 x median spacing) capped at 1e-6 Hz (common practice, no source)
    arr = invented_array(n_pulsars=3, years=10, seed=2, cadence_days=14.0)
    f = scan.frequency_grid(arr, oversample=3)
    span = arr.span
    assert f[0] == pytest.approx(1 / span, rel=1e-12)
    np.testing.assert_allclose(np.diff(f), 1 / (3 * span), rtol=1e-9)
    spacing = np.median([np.median(np.diff(p.toas)) for p in arr])
    top = min(0.5 / spacing, 1e-6)
    assert top - 1 / (3 * span) < f[-1] <= top
    dense = invented_array(n_pulsars=2, years=2, seed=2, cadence_days=1.0)
    assert scan.default_max_frequency(dense) == 1e-6  # exact: the cap itself is returned


@pytest.mark.parametrize("field, value", [("nside", 3), ("oversample", 0), ("fmin", -1.0), ("statistic", "fx"),
                                          ("null_sims", -2), ("fap_threshold", 0.0), ("max_candidates", 0)])
def test_bad_options_are_input_errors(field, value):
    from cwsearch.core.errors import InputError

    with pytest.raises(InputError, match=field.replace("_", "-")):
        ScanOptions(**{field: value}).validate()


def test_command_defaults_match_options():
    # the command's options are built from ScanOptions' fields (cwsearch.core.options): an empty command
    # line gives the dataclass defaults
    import argparse

    from cwsearch.commands import scan as command

    parser = argparse.ArgumentParser()
    command.add_arguments(parser)
    assert command.options_from_args(parser.parse_args(["data", "--out", "x"])) == ScanOptions()


# ---------------------------------------------------------------- peaks
def test_local_maxima_and_merging():
    # a smooth bump on a flat map has one local maximum; two peaks one bin apart merge (common practice)
    from cwsearch.physics import sky

    nside = 4
    ra, dec = sky.pixel_centres(nside)
    centre = sky.angular_separation(ra, dec, 1.0, 0.2)
    freqs = np.arange(10.0)
    fe = np.exp(-centre[:, None] ** 2) * np.exp(-0.5 * (freqs[None, :] - 4) ** 2)
    pix, fidx = scan.local_maxima(fe.astype(np.float32), sky.pixel_neighbours(nside))
    assert pix.size == 1 and fidx[0] == 4 and centre[pix[0]] == centre.min()
    keep = scan.merge_peaks(np.array([5.0, 4.0, 3.0]), np.array([1.0, 1.4, 3.0]), np.zeros(3), np.zeros(3),
                            frequency_window=0.5, merge_angle=np.pi, limit=10)
    assert list(keep) == [0, 2]


def test_local_maxima_equal_the_definition_with_ties_and_threshold():
    """Against the definition, pair by pair (a point is a maximum when no HEALPix neighbour, astropy-healpix,
    at the same or an adjacent frequency bin, and no adjacent bin of its own pixel, is larger; common
    practice, no source), on a coarse integer map full of ties, with and without a threshold."""
    from cwsearch.physics import sky

    nside = 2
    neighbours = sky.pixel_neighbours(nside)
    fe = np.random.default_rng(3).integers(0, 4, size=(sky.n_pixels(nside), 7)).astype(float)
    for threshold in (-np.inf, 2.0):
        expected = []
        for s in range(fe.shape[0]):
            for f in range(fe.shape[1]):
                if fe[s, f] < threshold:
                    continue
                around = [(s, g) for g in (f - 1, f + 1)] + [(int(n), g) for n in neighbours[s] if n >= 0
                                                              for g in (f - 1, f, f + 1)]
                if all(not (0 <= g < fe.shape[1]) or fe[n, g] <= fe[s, f] for n, g in around):
                    expected.append((s, f))
        pix, fidx = scan.local_maxima(fe, neighbours, threshold)
        assert list(zip(pix.tolist(), fidx.tolist())) == expected


def test_empirical_fap_estimator():
    # (1 + #{null >= x}) / (1 + N) (common practice for Monte Carlo p-values, no source)
    null = np.array([1.0, 2.0, 3.0, 4.0])
    np.testing.assert_allclose(scan.empirical_fap([0.5, 2.0, 10.0], null), [1.0, 4 / 5, 1 / 5])


# ---------------------------------------------------------------- the stage
def test_run_scan_outputs_and_reproducibility(tmp_path, noise_array):
    opts = ScanOptions(null_sims=3, **FAST)
    res = run_scan(noise_array, tmp_path / "a", opts, seed=4, progress=False)
    scan_dir = tmp_path / "a" / "scan"
    cands = Table.read(scan_dir / "candidates.ecsv", format="ascii.ecsv")
    spec = Table.read(scan_dir / "spectrum.ecsv", format="ascii.ecsv")
    summary = json.loads((scan_dir / "scan_summary.json").read_text())
    for col in ("frequency", "ra", "dec", "fe", "fap", "fap_empirical", "fp", "strain", "inclination",
                "polarization", "phase", "pixel"):
        assert col in cands.colnames
    assert str(cands["frequency"].unit) == "Hz" and str(cands["ra"].unit) == "deg"
    assert np.all(np.diff(cands["fe"]) <= 0)
    assert len(cands) >= 1
    assert np.all((cands["fap"] >= 0) & (cands["fap"] <= 1))
    assert np.all(cands["fap_empirical"] >= 1 / 4)
    for col in ("frequency", "fe_max", "fp", "fe_max_fap_single", "fp_fap_single"):
        assert col in spec.colnames
    assert len(spec) == summary["n_frequencies"]
    assert "fap_empirical_meaning" in summary and "fap_meaning" in summary
    # the candidate's Fe equals the spectrum maximum at its frequency (float32 map, so ~1e-6)
    k = int(cands["frequency_index"][0])
    assert float(cands["fe"][0]) == pytest.approx(float(spec["fe_max"][k]), rel=1e-5)
    # same seed -> same numbers, to 1e-12 relative (recomputed floats are never compared bit for bit;
    # common practice, no source)
    res2 = run_scan(noise_array, tmp_path / "b", opts, seed=4, progress=False)
    np.testing.assert_allclose(res2.null_fe_max, res.null_fe_max, rtol=1e-12, atol=0)
    np.testing.assert_allclose(np.asarray(res2.candidates["fe"]), np.asarray(res.candidates["fe"]), rtol=1e-12,
                               atol=0)
    assert res2.summary["n_eff_sky_slope"] == pytest.approx(res.summary["n_eff_sky_slope"], rel=1e-12)


def test_fp_only_scan(tmp_path, noise_array):
    res = run_scan(noise_array, tmp_path, ScanOptions(statistic="fp", **FAST), progress=False)
    assert res.fe_map is None
    assert np.all(np.isnan(res.candidates["ra"]))
    assert np.all(res.candidates["fap"] <= 1)
    assert res.summary["n_pixels"] == 0


def test_interrupted_scan_leaves_no_partial_files(tmp_path, noise_array, monkeypatch):
    # Ctrl-C while plotting: tables already written are whole, nothing half-written, no summary yet
    from cwsearch.stages.scan import plots as scan_plots

    def interrupt(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(scan_plots, "spectrum_plot", interrupt)
    with pytest.raises(KeyboardInterrupt):
        run_scan(noise_array, tmp_path, ScanOptions(nside=2, fmax=3e-8), progress=False)
    files = sorted(p.name for p in (tmp_path / "scan").iterdir())
    assert not [f for f in files if f.endswith(".part")]
    assert "scan_summary.json" not in files
    Table.read(tmp_path / "scan" / "candidates.ecsv", format="ascii.ecsv")


def test_loud_injection_is_recovered(tmp_path):
    # rho ~ 15 binary (Earth + pulsar term): best frequency within one bin, sky position inside the
    # 99 % region of the noiseless Fe map for 3 parameters (sky + frequency): Fe >= max - chi2_3(0.99)/2
    # (Wilks' theorem; quantile from scipy.stats.chi2); empirical FAP at its floor 1/(1 + N_sims)
    arr = invented_array(n_pulsars=12, years=10, seed=17, toas_per_pulsar=120, full_span=True)
    span = arr.span
    f_true = 9.3 / span
    binary = Binary(ra=4.0, dec=-0.5, gw_frequency=f_true, chirp_mass=3e8, strain=1.0)
    engine = NoiseWeighting(arr, NoiseSettings())
    unit = binary_residuals(arr, binary)
    strain = 15.0 / engine.optimal_snr(unit)
    binary.strain = strain
    signal = [s * strain for s in unit]
    noise = simulate_residuals(arr, 18)
    data = arr.with_residuals([n + s for n, s in zip(noise, signal)])
    opts = ScanOptions(nside=8, fmin=5 / span, fmax=14 / span, null_sims=4, no_plots=False)
    res = run_scan(data, tmp_path, opts, seed=1, progress=False)
    best = res.candidates[0]
    step = res.frequencies[1] - res.frequencies[0]
    assert abs(best["frequency"] - f_true) <= step

    ra, dec, fplus, fcross = scan.sky_grid(arr, 8)
    clean, _ = scan.fe_map(engine, res.frequencies, fplus, fcross, residuals=signal)
    k = int(np.argmax(clean.fe_max[0]))
    region = clean.fe_map[:, k] >= clean.fe_max[0, k] - stats.chi2(3).ppf(0.99) / 2
    from cwsearch.physics import sky

    near = region | np.any(region[sky.pixel_neighbours(8)] & (sky.pixel_neighbours(8) >= 0), axis=1)
    assert near[int(best["pixel"])]
    assert best["fap"] < 1e-6
    assert best["fap_empirical"] == pytest.approx(1 / 5)
    assert (tmp_path / "scan" / "spectrum.png").stat().st_size > 0
    assert (tmp_path / "scan" / "sky_fe.png").stat().st_size > 0


# ---------------------------------------------------------------- command line
def test_cli_scan(dataset_dir, tmp_path, capsys):
    from cwsearch.cli import main

    out = tmp_path / "run"
    code = main(["scan", str(dataset_dir), "--out", str(out), "--nside", "2", "--fmax", "4e-8", "--no-plots",
                 "--null-sims", "2", "--statistic", "both"])
    text = capsys.readouterr().out
    assert code == 0
    assert (out / "scan" / "candidates.ecsv").is_file()
    assert "fap_emp" in text and "empirical" in text and "analytic" in text
    code = main(["scan", str(dataset_dir), "--out", str(out), "--nside", "3"])
    err = capsys.readouterr().err
    assert code == 2 and "nside" in err and "Traceback" not in err
