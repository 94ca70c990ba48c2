"""Targeted searches (issue 20): period convention, multiple-testing corrections, null calibration, a planted
binary in one catalogue galaxy, the stage's files and the command line.

Small invented arrays and catalogues only; the 1,000-target / 50-dataset and 10,000-target figures are in
``python -m bench.targets``.
"""

from __future__ import annotations

import json

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from scipy import stats

from cwsearch.cli import main
from cwsearch.core.constants import DAY_SECONDS, YEAR_SECONDS
from cwsearch.core.errors import InputError
from cwsearch.data.dataset import write_dataset
from cwsearch.inference import targeted
from cwsearch.physics import fstat
from cwsearch.physics.correlated import array_noise
from cwsearch.physics.noise import NoiseSettings
from cwsearch.physics.simulate import Binary, binary_residuals, invented_array, simulated_array
from cwsearch.stages.targets.stage import TargetsOptions, run_targets

NOISE = NoiseSettings(red_components=6, pulsar_red_noise=False)


def _catalogue(path, n, rng, *, period_fraction=0.3, span_years=8.0):
    """An invented catalogue: isotropic positions, 20-200 Mpc, periods (observed frame) for a fraction."""
    ra = rng.uniform(0, 360, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    period = np.full(n, np.nan)
    has = rng.random(n) < period_fraction
    # orbital periods whose f_gw = 2/P lies inside the band of an 8-yr array: 0.3-3 yr
    period[has] = rng.uniform(0.3, 3.0, has.sum()) * YEAR_SECONDS / DAY_SECONDS
    Table({"name": [f"SIMGAL-T{i:04d}" for i in range(n)], "ra": ra * u.deg, "dec": dec * u.deg,
           "distance": rng.uniform(20, 200, n) * u.Mpc, "period": period * u.day,
           "period_err": 0.02 * period * u.day}).write(path, format="ascii.ecsv", overwrite=True)
    return ra, dec, period


# ---------------------------------------------------------------- conventions
def test_period_to_frequency_against_astropy_cosmology_at_z_0_1():
    """f_gw = 2 f_orb and P_obs = (1 + z) P_rest (common practice, no source), with the redshift of a galaxy at
    the Planck18 luminosity distance of z = 0.1 (astropy.cosmology), through the catalogue reader."""
    from astropy.cosmology import Planck18

    from cwsearch.data.cosmology import redshift_at_distance

    distance = Planck18.luminosity_distance(0.1).to_value("Mpc")
    z = redshift_at_distance(distance)
    assert z == pytest.approx(0.1, rel=1e-5)                     # astropy's z back from the tool's table
    rest_orbital_period = 2.0 * YEAR_SECONDS                     # 2 yr in the source frame
    expected = 2.0 / ((1 + 0.1) * rest_orbital_period)           # observer-frame GW frequency [Hz]
    got = targeted.gw_frequency_from_period(rest_orbital_period / DAY_SECONDS, redshift=z, frame="rest")
    assert got == pytest.approx(expected, rel=1e-5)
    observed = targeted.gw_frequency_from_period((1 + 0.1) * rest_orbital_period / DAY_SECONDS)
    assert observed == pytest.approx(expected, rel=1e-12)        # an observed period needs no redshift
    # an EM period at half the orbital period (period_factor 0.5) means the orbit is twice as long
    assert targeted.gw_frequency_from_period(365.25, period_factor=0.5) == pytest.approx(
        1.0 / YEAR_SECONDS, rel=1e-12)


def test_rest_frame_catalogue_period_moves_the_window(tmp_path):
    """The stage's window for a rest-frame period sits at 2/((1+z) P) with the catalogue's redshift."""
    from astropy.cosmology import Planck18

    arr = simulated_array(invented_array(n_pulsars=5, years=8, seed=2, toas_per_pulsar=60), seed=3)
    d = Planck18.luminosity_distance(0.1).to_value("Mpc")
    p_rest = 1.5 * YEAR_SECONDS / DAY_SECONDS
    Table({"name": ["A"], "ra": [10.0] * u.deg, "dec": [5.0] * u.deg, "distance": [d] * u.Mpc,
           "period": [p_rest] * u.day, "period_err": [1.0] * u.day}).write(tmp_path / "c.ecsv")
    res = run_targets(arr, tmp_path / "run", TargetsOptions(catalog=str(tmp_path / "c.ecsv"), period_frame="rest",
                                                            null_sims=5, no_limits=True, no_plots=True),
                      noise=NOISE, progress=False)
    row = res.results[0]
    assert float(row["predicted_frequency"]) == pytest.approx(2 / (1.1 * p_rest * DAY_SECONDS), rel=1e-4)
    assert float(row["frequency_low"]) <= float(row["predicted_frequency"]) <= float(row["frequency_high"])


# ---------------------------------------------------------------- multiple testing
def test_fdr_corrections_against_scipy_and_holm_by_hand():
    """Benjamini–Hochberg and Benjamini–Yekutieli against scipy.stats.false_discovery_control (scipy >= 1.11);
    Holm (1979) step-down and Bonferroni from their published definitions, by hand."""
    rng = np.random.default_rng(4)
    p = np.concatenate([rng.uniform(size=60), rng.uniform(0, 1e-3, 5)])
    assert np.allclose(targeted.benjamini_hochberg(p), stats.false_discovery_control(p, method="bh"),
                       rtol=1e-12, atol=0)
    assert np.allclose(targeted.benjamini_yekutieli(p), stats.false_discovery_control(p, method="by"),
                       rtol=1e-12, atol=0)
    m = p.size
    order = np.argsort(p)
    by_hand = np.empty(m)
    running = 0.0
    for i, j in enumerate(order):                    # Holm: max over the first i of (m - i) p_(i), capped at 1
        running = max(running, min(1.0, (m - i) * p[j]))
        by_hand[j] = running
    assert np.allclose(targeted.holm(p), by_hand, rtol=1e-12, atol=0)
    assert np.allclose(targeted.bonferroni(p), np.minimum(1, m * p), rtol=1e-12, atol=0)
    # NaN (targets outside the band) are not counted as tests
    q = np.array([0.01, np.nan, 0.02])
    assert np.allclose(targeted.holm(q)[[0, 2]], [0.02, 0.02], rtol=1e-12)
    assert np.isnan(targeted.holm(q)[1])


# ---------------------------------------------------------------- calibration
def test_p_values_uniform_on_noise_only_data_and_family_wise_rate():
    """On noise-only data the per-target p-values are uniform (KS, scipy.stats.kstest, on one target per
    dataset so that the values are independent) and the smallest Holm family-wise p-value of a dataset is
    below 0.05 in no more datasets than binomial scatter allows (scipy.stats.binom, 99.9 % point): 100 invented
    noise-only datasets × 40 targets (band and period windows), against 200 independent simulations."""
    base = invented_array(n_pulsars=8, years=8, seed=11, toas_per_pulsar=70)
    engine = array_noise(base, NOISE)
    freqs = fstat.frequency_grid(base, fmax=4e-8, oversample=2)
    rng = np.random.default_rng(12)
    n_targets = 40
    ra, dec = targeted.random_sky(n_targets, rng)
    centre = np.where(rng.random(n_targets) < 0.5, rng.uniform(freqs[2], freqs[-3], n_targets), np.nan)
    lo, hi, inside = targeted.frequency_windows(freqs, centre, 0.02 * centre, n_sigma=3, min_half_width=0.5 / base.span)
    assert inside.all()
    null = targeted.simulated_window_maxima(engine, freqs, ra, dec, lo, hi, 200, 13)
    n_sets = 100
    one_each, p_all, family_hits = [], [], 0
    for i in range(n_sets):
        data = simulated_array(base, seed=1000 + i, red=False)
        eng = array_noise(data, NOISE)
        t, _ = targeted.target_statistics(eng, eng.projections(freqs), ra, dec, lo, hi)
        p, _, _ = targeted.calibrated_p_values(t, null, hi - lo + 1)
        one_each.append(p[i % n_targets])
        p_all.append(p)
        family_hits += int(targeted.holm(p).min() < 0.05)
    assert stats.kstest(one_each, "uniform").pvalue > 1e-3
    assert family_hits <= stats.binom.ppf(0.999, n_sets, 0.05)
    # all 4,000 values (correlated within a dataset): the fraction below 0.05 within a generous band
    assert 0.02 < np.mean(np.concatenate(p_all) < 0.05) < 0.09


@pytest.mark.parametrize("common", [None, -13.5])
def test_batch_window_maxima_equal_the_full_fe_maps(common):
    """The window maxima reduced from the sky kernel's chunks (one factorisation of M for a batch of residual
    sets) equal the maxima of each set's full Fe map, for the per-pulsar engine and for the Hellings–Downs
    array engine (to 1e-10 relative; the same arithmetic in another order)."""
    arr = invented_array(n_pulsars=6, years=8, seed=7, toas_per_pulsar=60)
    settings = NoiseSettings(red_components=6, pulsar_red_noise=False, common_log10_amplitude=common)
    engine = array_noise(arr, settings)
    assert engine.correlated == (common is not None)
    freqs = fstat.frequency_grid(arr, fmax=3e-8)
    rng = np.random.default_rng(8)
    ra, dec = targeted.random_sky(25, rng)
    lo = rng.integers(0, freqs.size // 2, 25)
    hi = lo + rng.integers(0, freqs.size // 2, 25)
    sims = [engine.simulate(np.random.default_rng(s)) for s in range(3)]
    batch = engine.projections(freqs, [np.stack([s[p] for s in sims], axis=1) for p in range(len(arr))])
    fplus, fcross = fstat.sky_patterns(batch, ra, dec)
    got, _ = targeted.batch_window_maxima(engine, batch, fplus, fcross, lo, hi)
    for b, sim in enumerate(sims):
        one = engine.projections(freqs, sim)
        full = engine.fe_sky(one, fplus, fcross).fe_map
        want, _ = targeted.window_maxima(full, lo, hi)
        assert np.allclose(got[b], want, rtol=1e-10, atol=0)


def test_tail_extension_is_continuous_and_below_the_union_bound():
    """Beyond the empirical range the p-value follows the extreme-value tail: it keeps decreasing and never
    exceeds the union bound over the window's bins by more than the empirical anchor allows; for one bin it
    is the single-template law (1 + F) e^{-F} (2Fe ~ χ²(4), Ellis, Siemens & Creighton 2012)."""
    rng = np.random.default_rng(3)
    draws = 0.5 * stats.chi2.rvs(4, size=(4000, 3), random_state=rng)      # one-bin windows: exact law
    t = np.array([5.0, 10.0, 20.0])
    p, method, n_pool = targeted.calibrated_p_values(t, draws, np.ones(3, int))
    assert list(n_pool) == [12000] * 3
    assert list(method) == ["empirical", "tail", "tail"]
    exact = (1 + t) * np.exp(-t)
    assert p[1:] == pytest.approx(exact[1:], rel=0.35)          # anchored at the 10th-largest of 12,000 draws
    assert np.all(np.diff(p) < 0)


def test_small_null_pools_fall_back_to_the_union_bound():
    """With fewer than 20 pooled draws there is no anchor: beyond the draws the p-value is the union bound
    over the window's bins, min(1, 1 − (1 − q)^n) with the single-template q (a bound, Bonferroni over bins)."""
    t = np.array([0.5, 30.0])
    p, method, n_pool = targeted.calibrated_p_values(t, np.full((9, 2), 1.0), np.array([4, 4]))
    assert list(n_pool) == [18, 18] and method[1] == "tail"
    assert p[1] == pytest.approx(-np.expm1(4 * np.log1p(-31 * np.exp(-30.0))), rel=1e-9)
    p, method, _ = targeted.calibrated_p_values(np.array([30.0]), np.full((10, 1), 1.0), np.array([7]))
    assert method[0] == "tail" and p[0] == pytest.approx(7 * 31 * np.exp(-30.0), rel=1e-6)


@pytest.mark.parametrize("null", ["simulations", "both"])
def test_planted_binary_in_one_galaxy_gets_the_smallest_corrected_p_value(tmp_path, null):
    """An Earth-term binary (optimal S/N 9) planted in one invented catalogue galaxy at the frequency of its
    catalogued period has the smallest family-wise and FDR corrected p-values and is handed to the
    follow-up; results.ecsv, the summary and both plots are written."""
    rng = np.random.default_rng(21)
    base = invented_array(n_pulsars=12, years=8, seed=22, toas_per_pulsar=80)
    ra, dec, period = _catalogue(tmp_path / "cat.ecsv", 120, rng)
    k = int(np.flatnonzero(np.isfinite(period))[3])
    binary = Binary(ra=np.radians(ra[k]), dec=np.radians(dec[k]), gw_frequency=2 / (period[k] * DAY_SECONDS),
                    chirp_mass=5e8, strain=1.0, evolution="monochromatic", pulsar_term=False)
    signal = binary_residuals(base, binary)
    scale = 9.0 / array_noise(base, NOISE).optimal_snr(signal)
    noisy = simulated_array(base, seed=23, red=False)
    data = noisy.with_residuals([p.residuals + scale * s for p, s in zip(noisy, signal)])
    res = run_targets(data, tmp_path / "run", TargetsOptions(catalog=str(tmp_path / "cat.ecsv"), null=null,
                                                             null_sims=30, scrambles=300, quadrature="fast"),
                      noise=NOISE, seed=4, progress=False)
    tab = res.results
    name = f"SIMGAL-T{k:04d}"
    assert tab["name"][0] == name                                     # rank 1: smallest p-value
    row = tab[tab["name"] == name][0]
    assert row["p_family"] == np.min(tab["p_family"])
    assert row["q_fdr"] == np.min(tab["q_fdr"])
    assert row["p_family"] < 0.01 and row["followed_up"]
    assert abs(float(row["best_frequency"]) - binary.gw_frequency) <= 1.0 / data.span
    assert name in [f["name"] for f in res.summary["followup"]]
    folder = tmp_path / "run" / "targets"
    for f in ("results.ecsv", "followup_targets.ecsv", "targets_summary.json", "pp_plot.png", "sky_targets.png"):
        assert (folder / f).is_file(), f
    back = Table.read(folder / "results.ecsv")
    assert len(back) == 120 and back["chirp_mass_95"].unit == u.solMass
    limits = np.asarray(back["chirp_mass_95"][back["status"] == "searched"])
    # no NaN; +inf only where the array is blind (a period at 1/yr, absorbed by the timing model's yearly terms)
    assert not np.any(np.isnan(limits)) and np.mean(np.isfinite(limits)) > 0.9
    blind = back[(back["status"] == "searched") & ~np.isfinite(back["chirp_mass_95"])]
    assert np.all(np.abs(np.asarray(blind["limit_frequency"]) * YEAR_SECONDS - 1) < 0.05)
    if null == "both":
        assert "p_value_scramble" in back.colnames


def test_chirp_mass_limit_equals_the_galaxy_limit(tmp_path):
    """The per-target limit is the limits stage's galaxy limit: the Bayesian h95 of the same N, M at the exact
    position, inverted with h0 = 2 (G Mc)^(5/3) (π f)^(2/3) / (c⁴ d_L) (Sesana & Vecchio 2010) — checked
    against a direct evaluation and the strain formula to 1e-9."""
    from cwsearch.inference.upper_limits import bayesian_limit
    from cwsearch.physics.waveform import strain_amplitude

    arr = simulated_array(invented_array(n_pulsars=6, years=8, seed=5, toas_per_pulsar=60), seed=6)
    engine = array_noise(arr, NOISE)
    freqs = fstat.frequency_grid(arr, fmax=3e-8)
    proj = engine.projections(freqs)
    ra, dec = np.array([1.0, 4.0]), np.array([0.2, -0.7])
    h, mc, idx = targeted.target_limits(engine, proj, ra, dec, np.array([5, -1]), np.array([50.0, 120.0]))
    fplus, fcross = fstat.sky_patterns(proj, ra, dec)
    nv, mm = engine.network(proj, fplus, fcross)
    for s in range(2):
        k = idx[s]
        assert h[s] == pytest.approx(bayesian_limit(nv[s, k], mm[s, k], freqs[k]), rel=1e-9)
        assert strain_amplitude(mc[s], freqs[k], [50.0, 120.0][s]) == pytest.approx(h[s], rel=1e-9)
    # the automatic choice: the most sensitive bin at the centre of the target's nside-4 HEALPix pixel
    from cwsearch.physics import sky

    pix = sky.pixel_of(targeted.SENSITIVITY_NSIDE, ra[1:], dec[1:])
    cra, cdec = sky.pixel_centres(targeted.SENSITIVITY_NSIDE)
    _, mc_centre = engine.network(proj, *fstat.sky_patterns(proj, cra[pix], cdec[pix]))
    assert idx[0] == 5 and idx[1] == targeted.most_sensitive_index(mc_centre, freqs)[0]


def test_outside_band_targets_are_kept_but_not_tested(tmp_path):
    """A period whose window misses the band is listed (status outside_band) and is not counted by the
    corrections."""
    arr = simulated_array(invented_array(n_pulsars=5, years=8, seed=2, toas_per_pulsar=60), seed=3)
    Table({"name": ["in", "out"], "ra": [10.0, 20.0] * u.deg, "dec": [5.0, -5.0] * u.deg,
           "distance": [30.0, 40.0] * u.Mpc, "period": [400.0, 2.0] * u.day,
           "period_err": [5.0, 0.01] * u.day}).write(tmp_path / "c.ecsv")
    res = run_targets(arr, tmp_path / "run", TargetsOptions(catalog=str(tmp_path / "c.ecsv"), null_sims=5,
                                                            no_limits=True, no_plots=True), noise=NOISE,
                      progress=False)
    tab = res.results
    out = tab[tab["name"] == "out"][0]
    assert out["status"] == "outside_band" and np.isnan(out["p_value"])
    inside = tab[tab["name"] == "in"][0]
    assert inside["p_family"] == pytest.approx(inside["p_value"], rel=1e-12)   # one test: no correction
    assert res.summary["n_searched"] == 1


def test_options_refused_with_one_line():
    with pytest.raises(InputError, match="--null"):
        TargetsOptions(catalog="x", null="bootstrap").validate()
    with pytest.raises(InputError, match="--null-sims"):
        TargetsOptions(catalog="x", null_sims=0).validate()
    with pytest.raises(InputError, match="--period-factor"):
        TargetsOptions(catalog="x", period_factor=0).validate()


def test_command_line(tmp_path, capsys):
    """``cwsearch targets DATASET --catalog FILE --out RUN`` runs the stage and prints the best target; a bad
    catalogue row is one line naming file, row and column, exit 2."""
    arr = simulated_array(invented_array(n_pulsars=5, years=8, seed=2, toas_per_pulsar=60), seed=3)
    write_dataset(arr, tmp_path / "data")
    _catalogue(tmp_path / "cat.ecsv", 10, np.random.default_rng(1))
    code = main(["targets", str(tmp_path / "data"), "--catalog", str(tmp_path / "cat.ecsv"), "--out",
                 str(tmp_path / "run"), "--noise-model", "dataset", "--null-sims", "5", "--no-plots", "--quiet",
                 "--json"])
    assert code == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["n_targets"] == 10
    (tmp_path / "bad.csv").write_text("name,ra,dec,distance\nA,10,95,30\n")
    code = main(["targets", str(tmp_path / "data"), "--catalog", str(tmp_path / "bad.csv"), "--out",
                 str(tmp_path / "run2"), "--noise-model", "dataset", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and "bad.csv" in err and "row 1" in err and "dec" in err and len(err.strip().splitlines()) == 1


# ---------------------------------------------------------------- the follow-up of a target, sky bounded
def test_follow_up_sky_cap_prior_is_uniform_on_the_cap():
    """`cwsearch followup --sky-radius R` (how a target is handed over): prior draws lie on the cap and are
    uniform on it — cos(separation) uniform in [cos R, 1], the area element of a sphere (common practice, no
    source; KS, scipy.stats.kstest) — and the prior density is zero outside it."""
    from cwsearch.inference.likelihood import Likelihood
    from cwsearch.physics.sky import angular_separation
    from cwsearch.stages.followup.stage import Prior

    arr = simulated_array(invented_array(n_pulsars=4, years=8, seed=2, toas_per_pulsar=40), seed=3)
    ra0, dec0, radius = 6.1, -1.2, np.radians(10.0)            # near ra = 0 and near the south pole
    prior = Prior(Likelihood(arr, NOISE), (np.log10(1e-8), np.log10(2e-8)), sky_cap=(ra0, dec0, radius))
    draws = prior.draw(np.random.default_rng(1), 3000)
    sep = angular_separation(draws[:, 0], np.arcsin(draws[:, 1]), ra0, dec0)
    assert np.all(sep <= radius * (1 + 1e-9))
    assert stats.kstest(np.cos(sep), "uniform", args=(np.cos(radius), 1 - np.cos(radius))).pvalue > 1e-3
    outside = draws[:5].copy()
    outside[:, 0] = np.remainder(ra0 + np.pi, 2 * np.pi)
    assert np.all(np.isneginf(prior(outside)))


def test_follow_up_of_a_target_stays_on_its_sky_cap(tmp_path):
    """A short follow-up with --sky-radius 8 at an invented target: every posterior sample within 8 deg of it,
    and the summary states the sky prior."""
    from cwsearch.physics.sky import angular_separation
    from cwsearch.stages.followup.stage import FollowupOptions, run_followup

    arr = simulated_array(invented_array(n_pulsars=6, years=10, seed=4, toas_per_pulsar=60), seed=5)
    options = FollowupOptions(frequency=1.2e-8, ra=40.0, dec=20.0, sky_radius=8.0, walkers=18, temperatures=3,
                              max_temperature=1e3, ess=50, max_iterations=120, adapt_iterations=40,
                              checkpoint_every=100, max_temperatures=3, no_plots=True)
    result = run_followup(arr, tmp_path, options, noise=NOISE, seed=1, progress=False)
    post = Table.read(tmp_path / "followup" / "posterior.ecsv")
    sep = np.degrees(angular_separation(np.radians(post["ra"]), np.radians(post["dec"]), np.radians(40.0),
                                        np.radians(20.0)))
    assert np.all(sep <= 8.0 + 1e-9)
    assert "cap of 8 deg" in result.summary["model"]["sky_prior"]
    with pytest.raises(InputError, match="--sky-radius"):
        FollowupOptions(sky_radius=5.0).validate()


def test_run_file_follows_up_the_handed_over_target(tmp_path):
    """``[targets] follow_up = true``: the pipeline follows up the target the stage hands over, sky bounded to
    its cap, into targets/followup_1, and records the Bayes factor in targets_summary.json."""
    from cwsearch.job.config import load_config
    from cwsearch.job.pipeline import run_pipeline
    from cwsearch.physics.sky import angular_separation

    rng = np.random.default_rng(31)
    base = invented_array(n_pulsars=10, years=8, seed=32, toas_per_pulsar=70)
    ra, dec, period = _catalogue(tmp_path / "cat.ecsv", 30, rng)
    k = int(np.flatnonzero(np.isfinite(period))[0])
    binary = Binary(ra=np.radians(ra[k]), dec=np.radians(dec[k]), gw_frequency=2 / (period[k] * DAY_SECONDS),
                    chirp_mass=5e8, strain=1.0, evolution="monochromatic", pulsar_term=False)
    signal = binary_residuals(base, binary)
    scale = 12.0 / array_noise(base, NOISE).optimal_snr(signal)
    noisy = simulated_array(base, seed=33, red=False)
    write_dataset(noisy.with_residuals([p.residuals + scale * s for p, s in zip(noisy, signal)]), tmp_path / "data")
    (tmp_path / "run.toml").write_text(f"""
dataset = "data"
out = "run"
stages = ["targets"]
[noise]
model = "dataset"
red_components = 6
pulsar_red_noise = false
[targets]
catalog = "cat.ecsv"
null_sims = 20
no_limits = true
no_plots = true
follow_up = true
followup_top = 1
[followup]
walkers = 18
temperatures = 3
max_temperature = 1000.0
ess = 50.0
max_iterations = 120
adapt_iterations = 40
max_temperatures = 3
no_plots = true
""")
    result = run_pipeline(load_config(tmp_path / "run.toml"), quiet=True)
    assert [s.status for s in result.stages if s.name == "targets"] == ["ran"]
    summary = json.loads((tmp_path / "run" / "targets" / "targets_summary.json").read_text())
    entry = summary["followup"][0]
    assert entry["name"] == f"SIMGAL-T{k:04d}" and entry["folder"] == "followup_1"
    assert isinstance(entry["log_bayes_factor"], float)
    post = Table.read(tmp_path / "run" / "targets" / "followup_1" / "posterior.ecsv")
    sep = np.degrees(angular_separation(np.radians(post["ra"]), np.radians(post["dec"]), np.radians(entry["ra"]),
                                        np.radians(entry["dec"])))
    assert np.all(sep <= entry["sky_radius"] + 1e-9)
