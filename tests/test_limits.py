"""Upper limits: quadrature against Monte Carlo, frequentist calibration, Bayesian coverage,
chirp-mass inversion against published formulas, and the stage outputs.

Arrays here are small invented ones (code paths only); the checks are against
scipy.stats, astropy, published formulas and statements, and statistics.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats

from cwsearch.physics import fstat
from cwsearch.stages.limits import stage as limits
from cwsearch.core.errors import InputError
from cwsearch.physics.noise import NoiseWeighting
from cwsearch.physics.simulate import Binary, invented_array, simulate_residuals

FREQUENCY = 1e-8
FAST = limits.QUADRATURE["fast"]


@pytest.fixture(scope="module")
def network():
    """M (and the array) of a small white-noise array at one sky position and frequency."""
    arr = invented_array(n_pulsars=8, years=10, seed=4, toas_per_pulsar=120)
    engine = NoiseWeighting(arr)
    proj = fstat.project(engine, np.array([FREQUENCY]))
    fplus, fcross = fstat.sky_patterns(proj, np.array([1.0]), np.array([0.3]))
    _, mmat = fstat.network_vectors(proj, fplus, fcross)
    return arr, engine, mmat[0, 0]


def _gaussian_draws(mmat, strain, n, rng):
    """N ~ Normal(M b, M) for randomly oriented signals of amplitude ``strain`` (the exact Earth-term model)."""
    ci, psi, phase = rng.uniform(-1, 1, n), rng.uniform(0, np.pi, n), rng.uniform(0, np.pi, n)
    b = fstat.parameters_to_amplitudes(strain, ci, psi, phase, FREQUENCY)
    chol = np.linalg.cholesky(mmat)
    return b @ mmat + rng.standard_normal((n, 4)) @ chol.T


# ---------------------------------------------------------------- special functions
def test_noncentral_chi2_survival_matches_scipy():
    # check: scipy.stats.ncx2 / scipy.stats.chi2 (reference library)
    rng = np.random.default_rng(0)
    x = rng.uniform(0, 80, 400)
    lam = np.concatenate([np.zeros(50), rng.uniform(0, 120, 350)])
    ours = limits.ncx2_sf(x, 4, lam)
    ref = np.where(lam > 0, stats.ncx2.sf(x, 4, np.maximum(lam, 1e-300)), stats.chi2.sf(x, 4))
    assert np.max(np.abs(ours - ref)) < 1e-10
    # far tails and two degrees of freedom (single pulsar: M has rank 2)
    for xx, ll in [(1000.0, 900.0), (3.0, 2000.0), (200.0, 1.0)]:
        assert limits.ncx2_sf(xx, 4, ll) == pytest.approx(stats.ncx2.sf(xx, 4, ll), rel=1e-8, abs=1e-300)
    assert limits.ncx2_sf(7.0, 2, 5.0) == pytest.approx(stats.ncx2.sf(7.0, 2, 5.0), rel=1e-10)


# ---------------------------------------------------------------- quadrature versus Monte Carlo
@pytest.fixture(scope="module")
def loud_pixel(network):
    """Data N at one pixel with an SNR≈4 signal, so the posterior is not just the noise shape."""
    _, _, mmat = network
    rng = np.random.default_rng(7)
    b = fstat.parameters_to_amplitudes(1.0, 0.4, 0.7, 1.1, FREQUENCY)
    strain = 4.0 / np.sqrt(b @ mmat @ b)
    nvec = _gaussian_draws(mmat, strain, 1, rng)[0]
    return nvec, mmat


def test_quadrature_limit_equals_importance_sampling_limit(loud_pixel):
    # check: an independent Monte Carlo integral of the same posterior (common practice, no source);
    # tolerance = 3.5 x the Monte Carlo standard error from 20 independent batches
    nvec, mmat = loud_pixel
    quad = limits.bayesian_limit(nvec, mmat, FREQUENCY)
    sampled, err = limits.importance_sampled_limit(nvec, mmat, FREQUENCY, n_samples=400_000, seed=3)
    assert err < 0.02 * quad          # the comparison is informative
    assert abs(quad - sampled) < 3.5 * err


def test_quadrature_limit_equals_follow_up_sampler_limit(loud_pixel):
    # check: the ptemcee follow-up sampler (cwsearch.inference.sampling) on the same likelihood, uniform priors;
    # tolerance 4 x its Monte Carlo error sqrt(p(1-p)/ESS)/density (common practice, no source)
    nvec, mmat = loud_pixel
    quad = limits.bayesian_limit(nvec, mmat, FREQUENCY)
    sampled, err, details = limits.sampler_limit(nvec, mmat, FREQUENCY, seed=5, ess=1500)
    assert details["ess"] >= 1500
    assert abs(quad - sampled) < 4 * err


def test_quadrature_presets_agree(loud_pixel, network):
    # check: the deterministic quadrature converges (finer grid changes the limit by < 0.5 %) — common practice
    nvec, mmat = loud_pixel
    fine = limits.bayesian_limit(nvec, mmat, FREQUENCY, grid=limits.QUADRATURE["fine"])
    for name in ("fast", "standard"):
        assert limits.bayesian_limit(nvec, mmat, FREQUENCY, grid=limits.QUADRATURE[name]) == pytest.approx(fine, rel=5e-3)
    # the limit is the 95 % point of the posterior CDF evaluated independently with scipy.special
    assert limits.posterior_cdf(nvec, mmat, FREQUENCY, [limits.bayesian_limit(nvec, mmat, FREQUENCY)])[0] == \
        pytest.approx(0.95, abs=1e-9)


def test_sky_average_matches_direct_mixture(network):
    # check: the interpolated sky average against a direct root of the pixel-mixture CDF (scipy.optimize.brentq)
    from scipy.optimize import brentq
    from scipy.special import logsumexp

    from cwsearch.physics import sky

    _, engine, _ = network
    proj = fstat.project(engine, np.array([FREQUENCY]))
    ra, dec = sky.pixel_centres(1)
    fplus, fcross = fstat.sky_patterns(proj, ra, dec)
    _, mmat = fstat.network_vectors(proj, fplus, fcross)
    rng = np.random.default_rng(3)
    nvec = np.array([_gaussian_draws(m, 0.0, 1, rng)[0] for m in mmat[:, 0]])
    x95, logz, table = limits.bayes_rows(nvec, mmat[:, 0], grid=FAST)
    approx = limits.sky_averaged_bayes(x95, logz, table)
    weights = np.exp(logz - logsumexp(logz))

    def cdf(x):
        return sum(w * limits.posterior_cdf(n, m, 1 / (2 * np.pi), [x], grid=FAST)[0]
                   for w, n, m in zip(weights, nvec, mmat[:, 0]))

    exact = brentq(lambda x: cdf(x) - 0.95, x95.min() * 0.5, x95.max() * 2, xtol=1e-12 * x95.max())
    assert approx == pytest.approx(exact, rel=2e-3)
    assert x95.min() <= approx <= x95.max()


# ---------------------------------------------------------------- frequentist calibration
def test_frequentist_limit_calibration_gaussian_model(network):
    # check: 2Fe ~ non-central chi2(4, rho^2) (Ellis, Siemens & Creighton 2012) — signals of amplitude h95
    # at random orientation exceed the observed 2Fe in 95 % of noise realisations; two-sided 99.9 %
    # binomial interval (scipy.stats.binom)
    _, _, mmat = network
    rng = np.random.default_rng(11)
    observed_two_fe = 6.0
    h95 = limits.frequentist_limit(np.zeros(4), mmat, FREQUENCY, fe=observed_two_fe / 2)
    n = 20_000
    nvec = _gaussian_draws(mmat, h95, n, rng)
    two_fe = np.einsum("ni,ij,nj->n", nvec, np.linalg.inv(mmat), nvec)
    above = int(np.sum(two_fe > observed_two_fe))
    lo, hi = stats.binom.interval(0.999, n, 0.95)
    assert lo <= above <= hi


def test_frequentist_limit_calibration_time_domain(network):
    # check: as above with full time-domain simulations (noise + Earth-term binary through cwsearch.physics.waveform,
    # projected through the noise-weighting engine); at least 95 % above the threshold within a one-sided
    # 99.9 % binomial bound (scipy.stats.binom)
    arr, engine, mmat = network
    rng = np.random.default_rng(21)
    observed = fstat.project(engine, np.array([FREQUENCY]), simulate_residuals(arr, seed=rng))
    fplus, fcross = fstat.sky_patterns(observed, np.array([1.0]), np.array([0.3]))
    threshold = 2 * fstat.fe_statistic(observed, fplus, fcross)[0, 0]
    h95 = limits.frequentist_limit(np.zeros(4), mmat, FREQUENCY, fe=threshold / 2)
    n_sims = 300
    sets = [np.empty((p.n_toas, n_sims)) for p in arr]
    for k in range(n_sims):
        binary = Binary(ra=1.0, dec=0.3, gw_frequency=FREQUENCY, chirp_mass=1e8, strain=h95,
                        inclination=float(np.arccos(rng.uniform(-1, 1))), polarization=rng.uniform(0, np.pi),
                        phase=rng.uniform(0, 2 * np.pi), evolution="monochromatic", pulsar_term=False)
        for store, r in zip(sets, simulate_residuals(arr, seed=rng, binaries=[binary])):
            store[:, k] = r
    batch = fstat.project_batch(engine, np.array([FREQUENCY]), sets)
    above = 0
    for k in range(n_sims):
        one = fstat.Projections(batch.frequencies, batch.x[k], batch.y[k], batch.z, batch.positions, batch.z_scale)
        above += bool(2 * fstat.fe_statistic(one, fplus, fcross)[0, 0] > threshold)
    assert above >= stats.binom.ppf(0.001, n_sims, 0.95)
    assert above <= stats.binom.isf(0.001, n_sims, 0.95)


# ---------------------------------------------------------------- Bayesian behaviour
def test_bayesian_limit_noise_only_always_above_zero(network):
    # check: a 95 % upper limit of a non-negative amplitude is positive and finite (common practice, no source)
    _, _, mmat = network
    nvec = _gaussian_draws(mmat, 0.0, 300, np.random.default_rng(5))
    x95, _, _ = limits.bayes_rows(nvec, np.broadcast_to(mmat, (300, 4, 4)), grid=FAST)
    assert np.all(np.isfinite(x95)) and np.all(x95 > 0)


def test_bayesian_limit_covers_weak_injection(network):
    # check: frequentist coverage of the uniform-prior Bayesian limit — with an injection at the typical
    # noise-only limit, h95 exceeds the injected strain in >= 95 % of cases (one-sided 99.9 % binomial bound,
    # scipy.stats.binom); the measured fraction (~0.97) is documented in the README (Upper limits section)
    _, _, mmat = network
    rng = np.random.default_rng(6)
    stack = np.broadcast_to(mmat, (400, 4, 4))
    noise_only, _, _ = limits.bayes_rows(_gaussian_draws(mmat, 0.0, 400, rng), stack, grid=FAST)
    injected = float(np.median(noise_only)) * 2 * np.pi * FREQUENCY
    x95, _, _ = limits.bayes_rows(_gaussian_draws(mmat, injected, 400, rng), stack, grid=FAST)
    covered = int(np.sum(x95 * 2 * np.pi * FREQUENCY > injected))
    assert covered >= stats.binom.ppf(0.001, 400, 0.95)


# ---------------------------------------------------------------- chirp-mass inversion
def test_chirp_mass_limit_inverts_sesana_vecchio_strain():
    # check: h0 = 2 (G Mc)^(5/3) (pi f)^(2/3) / (c^4 d_L) — Sesana & Vecchio 2010, PRD 81, 104008;
    # Mc = 1e9 Msun, f = 10 nHz, d_L = 100 Mpc gives 2.76e-15 (Sesana & Vecchio 2010 form, computed with astropy)
    import astropy.constants as const
    import astropy.units as u

    assert limits.galaxy_chirp_mass_limit(2.76e-15, 1e-8, 100.0) == pytest.approx(1e9, rel=5e-3)
    strain = 3.3e-15
    mc = limits.galaxy_chirp_mass_limit(strain, 7e-9, 42.0) * u.solMass
    h = (2 * (const.G * mc) ** (5 / 3) * (np.pi * 7e-9 * u.Hz) ** (2 / 3) / (const.c**4 * 42.0 * u.Mpc)).decompose()
    assert float(h) == pytest.approx(strain, rel=1e-6)


def test_chirp_mass_limit_matches_published_strain_distance_statement():
    # check: Babak et al. 2016, MNRAS 455, 1665 (abstract): h0 ~ 1e-14 at f ~ 6 nHz corresponds to
    # Mc = 1e10 Msun out to ~1 Gpc and Mc = 1e9 Msun to ~20-25 Mpc; tolerance +-30 % in distance
    # (Mc scales as d^(3/5))
    for distance, chirp_mass in ((1000.0, 1e10), (22.5, 1e9)):
        mc = limits.galaxy_chirp_mass_limit(1e-14, 6e-9, distance)
        assert chirp_mass * 0.7**0.6 <= mc <= chirp_mass * 1.3**0.6


# ---------------------------------------------------------------- the stage
@pytest.fixture(scope="module")
def stage_run(tmp_path_factory):
    from cwsearch.physics.simulate import simulated_array

    arr = simulated_array(invented_array(n_pulsars=5, years=8, seed=8, toas_per_pulsar=60), seed=9)
    out = tmp_path_factory.mktemp("run")
    options = limits.LimitsOptions(nside=1, fmax=4.5e-9, method="both", workers=1, quadrature="fast",
                                   galaxy=(("GAL0001", 120.0, -20.0, 30.0),))
    return arr, out, limits.run_limits(arr, out, options, progress=False)


def test_stage_writes_tables_and_plots(stage_run):
    from astropy.table import Table

    arr, out, result = stage_run
    folder = out / "limits"
    for name in ("frequency_limits.ecsv", "sky_limits.ecsv", "galaxy_limits.ecsv", "limits_summary.json",
                 "strain_limits.png", "sky_limits.png", "galaxy_limits.png"):
        assert (folder / name).is_file(), name
    ftab = Table.read(folder / "frequency_limits.ecsv")
    assert str(ftab["frequency"].unit) == "Hz"
    for col in ("strain_95", "strain_95_best", "strain_95_worst", "strain_95_frequentist"):
        assert np.all(np.asarray(ftab[col]) > 0), col
    # the sky-averaged quantile lies between the per-pixel quantiles (mixture property; common practice)
    assert np.all(ftab["strain_95_best"] <= ftab["strain_95"]) and np.all(ftab["strain_95"] <= ftab["strain_95_worst"])
    stab = Table.read(folder / "sky_limits.ecsv")
    assert len(stab) == 12 and str(stab["ra"].unit) == "deg"  # HEALPix N_pix = 12 nside^2 (Górski et al. 2005)
    summary = json.loads((folder / "limits_summary.json").read_text())
    assert "bayes" in summary and "frequentist" in summary
    assert summary["sky_frequency"] == pytest.approx(float(ftab["frequency"][np.argmin(ftab["strain_95"])]))


def test_stage_galaxy_limits_follow_strain_formula(stage_run):
    # check: chirp_mass_95 and strain_95 at the galaxy satisfy h0(Mc, f, d) of Sesana & Vecchio 2010
    from astropy.table import Table

    from cwsearch.physics.waveform import strain_amplitude

    _, out, _ = stage_run
    gtab = Table.read(out / "limits" / "galaxy_limits.ecsv")
    for mass, strain in (("chirp_mass_95", "strain_95"), ("chirp_mass_95_frequentist", "strain_95_frequentist")):
        h = strain_amplitude(np.asarray(gtab[mass]), np.asarray(gtab["frequency"]), np.asarray(gtab["distance"]))
        np.testing.assert_allclose(h, np.asarray(gtab[strain]), rtol=1e-9)


def test_stage_same_answers_twice(stage_run):
    arr, _, first = stage_run
    import tempfile

    again = limits.run_limits(arr, tempfile.mkdtemp(), limits.LimitsOptions(
        nside=1, fmax=4.5e-9, method="both", workers=1, quadrature="fast",
        galaxy=(("GAL0001", 120.0, -20.0, 30.0),), no_plots=True), progress=False)
    # recomputed: the same numbers to 1e-12 relative, never bit for bit (common practice, no source)
    np.testing.assert_allclose(again.pixel_limits, first.pixel_limits, rtol=1e-12, atol=0)


def test_stage_pieces_compute_without_writing(stage_run, tmp_path):
    """run_limits = compute_stage_limits (no file) -> limits_tables -> write_limits / plot_limits ->
    limits_summary: the pieces on their own give what the stage wrote (recomputed: 1e-12 relative, never bit
    for bit; common practice, no source)."""
    from astropy.table import Table

    arr, out, first = stage_run
    options = limits.LimitsOptions(nside=1, fmax=4.5e-9, method="both", workers=1, quadrature="fast",
                                   galaxy=(("GAL0001", 120.0, -20.0, 30.0),), no_plots=True)
    before = sorted(tmp_path.rglob("*"))
    computation = limits.compute_stage_limits(arr, options, progress=False)
    assert sorted(tmp_path.rglob("*")) == before   # computing writes nothing
    np.testing.assert_allclose(computation.pixel_limits, first.pixel_limits, rtol=1e-12, atol=0)
    tables = limits.limits_tables(computation)
    written = Table.read(out / "limits" / "frequency_limits.ecsv")
    np.testing.assert_allclose(np.asarray(tables.frequency["strain_95"]), np.asarray(written["strain_95"]),
                               rtol=1e-12, atol=0)
    summary = limits.limits_summary(computation, tables)
    assert summary["sky_frequency"] == pytest.approx(first.summary["sky_frequency"], rel=1e-12)
    assert set(summary["galaxies"]) == {"GAL0001"}
    files = limits.write_limits(tmp_path / "limits", computation, tables)
    assert sorted(files) == ["frequency_limits", "galaxy_limits", "sky_limits", "sky_limits_map"]
    assert all((tmp_path / "limits" / name).is_file() for name in
               ("frequency_limits.ecsv", "sky_limits.ecsv", "sky_limits.fits", "galaxy_limits.ecsv"))


@pytest.mark.parametrize("kwargs, word", [
    ({"nside": 3}, "nside"), ({"method": "median"}, "method"), ({"oversample": 0}, "oversample"),
    ({"mcmc_check": 12, "nside": 1}, "mcmc-check"), ({"select": ("A",)}, "select"),
    ({"fmin": -1.0}, "fmin"), ({"quadrature": "huge"}, "quadrature"),
])
def test_options_rejected_with_one_clear_error(kwargs, word):
    with pytest.raises(InputError, match=word):
        limits.LimitsOptions(**kwargs).validate()


def test_bad_galaxy_values_are_input_errors():
    with pytest.raises(InputError, match="dec"):
        limits.parse_galaxies([("GAL0001", "10", "95", "20")])
    with pytest.raises(InputError, match="numbers"):
        limits.parse_galaxies([("GAL0001", "ten", "5", "20")])
    with pytest.raises(InputError, match="distance"):
        limits.parse_galaxies([("GAL0001", "10", "5", "-3")])


def test_catalog_selection(tmp_path):
    path = tmp_path / "g.csv"
    path.write_text("name,ra,dec,distance\nGAL0001,10,20,40\nGAL0002,30,-5,80\n")
    got = limits.read_catalog_galaxies(path, ["GAL0002"])
    assert got == [limits.Galaxy("GAL0002", 30.0, -5.0, 80.0)]
    with pytest.raises(InputError, match="GAL0009"):
        limits.read_catalog_galaxies(path, ["GAL0001,GAL0009"])


def test_command_defaults_equal_options_defaults():
    import argparse

    from cwsearch.commands import limits as command

    parser = argparse.ArgumentParser()
    command.add_arguments(parser)
    args = parser.parse_args(["data", "--out", "x"])
    assert command.options_from_args(args) == limits.LimitsOptions()


def test_command_line_run_with_sampler_check(dataset_dir, tmp_path, capsys):
    from cwsearch.cli import main

    out = tmp_path / "run"
    code = main(["limits", str(dataset_dir), "--out", str(out), "--nside", "1", "--fmax", "1.2e-8",
                 "--workers", "1", "--quadrature", "fast", "--mcmc-check", "3", "--quiet", "--no-plots",
                 "--galaxy", "GAL0001", "10", "20", "40"])
    text = capsys.readouterr().out
    assert code == 0
    assert "quadrature h95" in text and "h95 =" in text and "GAL0001" in text
    summary = json.loads((out / "limits" / "limits_summary.json").read_text())
    assert summary["mcmc_check"]["pixel"] == 3 and summary["mcmc_check"]["sampled"] > 0
    assert "bayes" in summary and "frequentist" in summary   # the default method reports both


def test_command_line_bad_values_exit_2(dataset_dir, tmp_path, capsys):
    from cwsearch.cli import main

    code = main(["limits", str(dataset_dir), "--out", str(tmp_path / "r"), "--galaxy", "GAL0001", "10", "95", "40"])
    err = capsys.readouterr().err
    assert code == 2 and "dec" in err and "Traceback" not in err
    assert not (tmp_path / "r" / "limits").exists()
    code = main(["limits", str(dataset_dir), "--out", str(tmp_path / "r"), "--sky-frequency", "1e-3"])
    assert code == 2 and "sky-frequency" in capsys.readouterr().err


def test_empty_frequentist_limit_is_not_the_best_sky_position(network):
    """An observed 2Fe below the 5 % point of χ²(4) (scipy.stats.chi2; Ellis, Siemens & Creighton 2012 null
    distribution) gives an empty frequentist limit (0): it must never be printed as the best sky position."""
    from cwsearch.commands.limits import method_lines

    _, _, mmat = network
    low = 0.5 * stats.chi2.ppf(0.05, 4)          # 2Fe = 0.36: noise alone exceeds it 97.5 % of the time
    high = stats.chi2.ppf(0.5, 4)
    x95, p0, _, _ = limits.frequentist_rows(np.stack([mmat, mmat]), np.array([low, high]))
    assert p0[0] == pytest.approx(stats.chi2.sf(low, 4), rel=1e-6)
    assert x95[0] == 0.0 and x95[1] > 0
    best = limits._best_pixel(x95)
    assert best == {"best_pixel_strain_95": pytest.approx(x95[1], rel=1e-12), "pixels_with_empty_limit": 1}
    assert np.allclose(limits._positive_min(x95[:, None]), [x95[1]], rtol=1e-12)
    summary = {"best_frequency": 1e-8, "n_pixels": 2,
               "frequentist": {"strain_95_at_best_frequency": 2e-15, **best}}
    (line,) = method_lines(summary)
    assert "0.000e+00" not in line and f"{x95[1]:.3e}" in line and "1 of 2 pixels have an empty limit" in line
    summary["frequentist"] = {"strain_95_at_best_frequency": 2e-15, "best_pixel_strain_95": None,
                              "pixels_with_empty_limit": 2}
    assert "none with a positive limit" in method_lines(summary)[0]


def test_command_line_pulsar_term_limit(dataset_dir, tmp_path, capsys):
    """``--pulsar-term``: the table and summary say which limit it is, the Earth-term limit stays beside
    it, and the pulsar-term limit is finite and positive wherever the Earth-term one is."""
    from astropy.table import Table

    from cwsearch.cli import main

    out = tmp_path / "run"
    code = main(["limits", str(dataset_dir), "--out", str(out), "--nside", "1", "--fmax", "1.2e-8",
                 "--workers", "1", "--quadrature", "fast", "--quiet", "--no-plots", "--pulsar-term",
                 "--pulsar-term-draws", "8", "--method", "bayes"])
    text = capsys.readouterr().out
    assert code == 0, text
    summary = json.loads((out / "limits" / "limits_summary.json").read_text())
    assert summary["pulsar_term"]
    rows = [p for p in (out / "limits").glob("*.ecsv")]
    assert rows
    for path in rows:
        table = Table.read(path, format="ascii.ecsv")
        if "strain_95_earth_term" in table.colnames:
            earth = np.asarray(table["strain_95_earth_term"], float)
            both = np.asarray(table["strain_95"], float)
            good = np.isfinite(earth) & (earth > 0)
            assert good.any() and np.all(np.isfinite(both[good]) & (both[good] > 0))
            break
    else:
        raise AssertionError("no limits table carries the Earth-term column beside the pulsar-term one")
