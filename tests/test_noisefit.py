"""Noise estimation (cwsearch.inference.noisefit) against references outside the project.

* log-likelihood: ``scipy.stats.multivariate_normal.logpdf`` of ``Gᵀr`` under the dense
  ``GᵀCG`` (G from an SVD of the design matrix; van Haasteren & Vallisneri 2014, Phys. Rev. D 90,
  104012), C built here from the common-practice power law;
* white-only ML scale: the closed form ``scale² = rᵀ G(GᵀC₀G)⁻¹Gᵀ r / (n − m)`` (common practice,
  no source);
* goodness-of-fit p-values: uniform under the true model (``scipy.stats.kstest``);
* recovery on invented, seeded data: within the fit's own stated errors (the check is the
  simulation's input, drawn here, not a stored value).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from astropy import units as u
from astropy.table import Table
from scipy import stats

from cwsearch.core.errors import InputError
from cwsearch.data.model import Array, Pulsar, PulsarNoise
from cwsearch.physics.noise import NoiseSettings, NoiseWeighting, PulsarLikelihood, powerlaw_variance
from cwsearch.inference.noisefit import (FitBounds, FitSettings, NoiseFitWarning, UncorrelatedCommonLikelihood,
                               apply_noise_model, apply_noise_table, check_array, check_pulsar, fit_common,
                               fit_noise, ks_normal, read_noise_table, write_noise_table)
from cwsearch.physics.simulate import (invented_array, simulate_residuals, true_sigmas, wrong_white_noise)

YEAR_FREQ = 1 / (1 * u.yr).to_value(u.s)


def _pulsar(rng, n=40, backends=("A", "B"), sigma=1e-7, noise=None, years=10.0, name="T0", residuals=None):
    mjd = np.sort(rng.uniform(53000, 53000 + years * 365.25, n))
    back = np.array(backends)[rng.integers(0, len(backends), n)]
    back[: len(backends)] = backends            # every backend present
    sig = sigma * rng.uniform(0.7, 1.4, n)
    res = rng.normal(size=n) * sigma if residuals is None else residuals
    return Pulsar(name, ra=1.0, dec=0.2, distance=1.0, distance_err=0.1, mjd=mjd, residuals=res, sigmas=sig,
                  backends=back, noise=noise)


def _dense(psr, start, span, n_components, red=None, common=None):
    """(G, GᵀCG) for one pulsar, built from scratch with numpy: common-practice power law, white factors."""
    t = psr.mjd * 86400.0
    scale = np.array([psr.noise.sigma_scale.get(b, 1.0) for b in psr.backends])
    added = np.array([psr.noise.sigma_added.get(b, 0.0) for b in psr.backends])
    cov = np.diag((scale * psr.sigmas) ** 2 + added**2)
    freqs = np.arange(1, n_components + 1) / span
    phi = np.zeros(n_components)
    for params in (red, common):
        if params is not None:   # P(f) = A²/(12π²) (f/f_yr)^(−γ) f_yr^(−3), times 1/T per coefficient
            phi += 10 ** (2 * params[0]) / (12 * np.pi**2) * (freqs / YEAR_FREQ) ** (-params[1]) * YEAR_FREQ**-3 / span
    for f, var in zip(freqs, phi):
        for b in (np.sin(2 * np.pi * f * (t - start)), np.cos(2 * np.pi * f * (t - start))):
            cov += var * np.outer(b, b)
    design = psr.design_matrix
    uu, _, _ = np.linalg.svd(design, full_matrices=True)
    g = uu[:, design.shape[1]:]
    return g, g.T @ cov @ g


# ----------------------------------------------------------------- likelihood
@pytest.mark.parametrize("red,common", [(None, None), ((-13.4, 3.1), None), ((-13.6, 2.5), (-13.9, 13 / 3))])
def test_log_likelihood_equals_dense_multivariate_normal(red, common):
    # reference: scipy.stats.multivariate_normal.logpdf of G^T r, cov G^T C G (van Haasteren & Vallisneri 2014)
    rng = np.random.default_rng(11)
    noise = PulsarNoise(sigma_scale={"A": 1.3, "B": 0.8}, sigma_added={"B": 6e-8})
    if red is not None:
        noise.red_log10_amplitude, noise.red_index = red
    psr = _pulsar(rng, n=45, noise=noise)
    arr = Array([psr])
    k = 7
    g, cov = _dense(psr, arr.start, arr.span, k, red, common)
    expected = stats.multivariate_normal.logpdf(g.T @ psr.residuals, mean=np.zeros(cov.shape[0]), cov=cov)
    settings = NoiseSettings(red_components=k, common_log10_amplitude=None if common is None else common[0],
                             common_index=13 / 3 if common is None else common[1])
    got = NoiseWeighting(arr, settings)[0].log_likelihood()
    assert got == pytest.approx(expected, rel=1e-8)
    # the fitting path (PulsarLikelihood) gives the same number
    lk = PulsarLikelihood(psr, arr.start, arr.span, k)
    phi = np.zeros(2 * k)
    for params in (red, common):
        if params is not None:
            phi += np.repeat(powerlaw_variance(lk.frequencies, params[0], params[1], arr.span), 2)
    assert lk.evaluate(psr.effective_sigmas() ** 2, phi)[0] == pytest.approx(expected, rel=1e-8)


def test_likelihood_gradient_matches_finite_differences():
    # analytic gradient vs central differences of the same function (common practice, no source)
    rng = np.random.default_rng(3)
    psr = _pulsar(rng, n=50)
    arr = Array([psr])
    lk = PulsarLikelihood(psr, arr.start, arr.span, 6)
    nvar = psr.sigmas**2 * rng.uniform(0.5, 2.0, psr.n_toas)
    phi = np.repeat(powerlaw_variance(lk.frequencies, -13.5, 3.0, arr.span), 2)
    _, g_n, g_phi = lk.evaluate(nvar, phi, white_gradient=True, fourier_gradient=True)
    for i in (0, 17, 49):
        h = nvar[i] * 1e-5
        up, down = nvar.copy(), nvar.copy()
        up[i] += h
        down[i] -= h
        num = (lk.evaluate(up, phi)[0] - lk.evaluate(down, phi)[0]) / (2 * h)
        assert g_n[i] == pytest.approx(num, rel=1e-4)
    for j in (0, 5, 11):
        h = phi[j] * 1e-5
        up, down = phi.copy(), phi.copy()
        up[j] += h
        down[j] -= h
        num = (lk.evaluate(nvar, up)[0] - lk.evaluate(nvar, down)[0]) / (2 * h)
        assert g_phi[j] == pytest.approx(num, rel=1e-4, abs=1e-6 * np.abs(g_phi).max())


# ----------------------------------------------------------------- white noise
def test_white_scale_equals_closed_form():
    # scale² = r^T G (G^T C0 G)^-1 G^T r / (n − m), C0 = quoted-sigma covariance (common practice, no source)
    rng = np.random.default_rng(5)
    psr = _pulsar(rng, n=120, backends=("A",), sigma=2e-7)
    psr = psr.with_residuals(rng.normal(size=psr.n_toas) * psr.sigmas * 1.37)
    arr = Array([psr])
    g, c0 = _dense(psr, arr.start, arr.span, 1)
    gr = g.T @ psr.residuals
    expected = float(gr @ np.linalg.solve(c0, gr)) / (psr.n_toas - psr.design_matrix.shape[1])
    fit = fit_noise(arr, FitSettings(common=False, pulsar_red=False, upper_limits=False, tolerance=1e-15),
                    FitBounds(sigma_added_max=0.0))
    assert fit.pulsars[0].sigma_scale["A"] ** 2 == pytest.approx(expected, rel=1e-6)
    assert fit.pulsars[0].sigma_added["A"] == 0.0


def test_white_scale_and_added_recovered():
    # invented data: true scale 1.4 (single backend, no added term); recovered within 3 stated errors
    rng = np.random.default_rng(8)
    psr = _pulsar(rng, n=600, backends=("A",), sigma=1e-7)
    psr = psr.with_residuals(rng.normal(size=psr.n_toas) * psr.sigmas * 1.4)
    fit = fit_noise(Array([psr]), FitSettings(common=False, pulsar_red=False, upper_limits=False))
    f = fit.pulsars[0]
    assert abs(f.sigma_scale["A"] - 1.4) < 3 * f.sigma_scale_err["A"]
    assert f.sigma_scale_err["A"] < 0.15
    assert f.converged


# ----------------------------------------------------------------- red noise and model choice
def test_power_law_recovered_and_white_pulsars_not_claimed():
    base = invented_array(n_pulsars=4, years=15, seed=21, toas_per_pulsar=400, full_span=True)
    truth = (-13.3, 3.5)
    pulsars = list(base)
    pulsars[0] = pulsars[0].with_noise(PulsarNoise(red_log10_amplitude=truth[0], red_index=truth[1]))
    arr = Array(pulsars)
    arr = arr.with_residuals(simulate_residuals(arr, seed=22))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NoiseFitWarning)
        fit = fit_noise(arr, FitSettings(common=False, upper_limits=False))
    red = fit.pulsars[0]
    assert red.red_noise and red.red_statistic > 9.0
    assert red.red_log10_amplitude_low <= truth[0] <= red.red_log10_amplitude_high   # its own 2-sigma interval
    assert red.red_log10_amplitude_err == pytest.approx(
        0.25 * (red.red_log10_amplitude_high - red.red_log10_amplitude_low))
    assert abs(red.red_index - truth[1]) < 2 * red.red_index_err
    for f in fit.pulsars[1:]:
        assert not f.red_noise, f.name
    model = fit.model()
    assert model.pulsars[red.name].has_red_noise and not model.pulsars[fit.pulsars[1].name].has_red_noise


def test_common_process_recovered_within_errors():
    base = invented_array(n_pulsars=8, years=15, seed=31, toas_per_pulsar=150, full_span=True)
    arr = base.with_residuals(simulate_residuals(base, seed=32, background_log10_amplitude=-13.7))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NoiseFitWarning)
        fit = fit_noise(arr, FitSettings(red_components=10, common_index=13 / 3, upper_limits=False))
    c = fit.common
    assert c.index_fixed and c.index == pytest.approx(13 / 3)
    assert abs(c.log10_amplitude + 13.7) < 3 * c.log10_amplitude_err
    assert c.statistic > 25


def test_common_fit_takes_any_callable():
    # a plug-in log-likelihood without gradient: a Gaussian in (log10 A, γ) with known maximum and
    # curvature; the Hessian errors must equal its standard deviations (common practice, no source)
    mean, sd = np.array([-14.2, 3.9]), np.array([0.3, 0.5])
    calls = []

    def like(log10_amplitude, index):
        calls.append(1)
        return -0.5 * (((log10_amplitude - mean[0]) / sd[0]) ** 2 + ((index - mean[1]) / sd[1]) ** 2)

    c = fit_common(like)
    assert c.log10_amplitude == pytest.approx(mean[0], abs=1e-4)
    assert c.index == pytest.approx(mean[1], abs=1e-4)
    assert c.log10_amplitude_err == pytest.approx(sd[0], rel=1e-3)
    assert c.index_err == pytest.approx(sd[1], rel=1e-3)
    assert calls


def test_uncorrelated_common_gradient():
    base = invented_array(n_pulsars=3, years=10, seed=41, toas_per_pulsar=60)
    arr = base.with_residuals(simulate_residuals(base, seed=42, background_log10_amplitude=-13.8))
    like = UncorrelatedCommonLikelihood(arr, red_components=8)
    value, grad = like.value_and_gradient(-14.0, 3.7)
    assert value == pytest.approx(like(-14.0, 3.7), rel=1e-12)
    h = 1e-5
    assert grad[0] == pytest.approx((like(-14.0 + h, 3.7) - like(-14.0 - h, 3.7)) / (2 * h), rel=1e-4)
    assert grad[1] == pytest.approx((like(-14.0, 3.7 + h) - like(-14.0, 3.7 - h)) / (2 * h), rel=1e-4)


# ----------------------------------------------------------------- goodness of fit
def test_gof_pvalues_uniform_under_true_model():
    # under the true model both p-values are uniform: KS against U(0,1), loose threshold (scipy.stats.kstest)
    rng = np.random.default_rng(51)
    normal_p, lowfreq_p = [], []
    for i in range(50):
        psr = _pulsar(rng, n=80, noise=PulsarNoise(sigma_scale={"A": 1.2}, sigma_added={"B": 5e-8}))
        psr = psr.with_residuals(rng.normal(size=psr.n_toas) * psr.effective_sigmas())
        arr = Array([psr])
        c = check_pulsar(NoiseWeighting(arr, NoiseSettings(red_components=5))[0], lowfreq_components=4)
        normal_p.append(c.normality_pvalue)
        lowfreq_p.append(c.lowfreq_pvalue)
    assert stats.kstest(normal_p, "uniform").pvalue > 1e-3
    assert stats.kstest(lowfreq_p, "uniform").pvalue > 1e-3


@pytest.mark.parametrize("n", [20, 60, 1000, 3000])
def test_ks_normal_against_scipy_kstest(n):
    """The goodness-of-fit KS check without scipy.stats: the distance equals ``scipy.stats.kstest``'s and
    the p-value (Stephens 1970, JRSS B 32, 115: the modified statistic (√n + 0.12 + 0.11/√n) D under the
    Kolmogorov distribution, from memory) is within 7 % of its exact value wherever p > 1e-6, and
    both are below the 1e-3 warning threshold together except within that tolerance of it."""
    rng = np.random.default_rng(n)
    for scale in (1.0, 1.1, 1.25, 1.5):
        for _ in range(10):
            x = rng.normal(0.0, scale, n)
            ref = stats.kstest(x, "norm")
            distance, pvalue = ks_normal(x)
            assert distance == pytest.approx(ref.statistic, rel=1e-12)
            if ref.pvalue > 1e-6:
                assert pvalue == pytest.approx(ref.pvalue, rel=0.07)
            else:
                assert pvalue < 1.07e-6


def test_unmodelled_red_noise_flagged():
    rng = np.random.default_rng(61)
    psr = _pulsar(rng, n=200, sigma=1e-7, years=12)
    arr = Array([psr])
    red = simulate_residuals(Array([psr.with_noise(PulsarNoise(red_log10_amplitude=-13.0, red_index=4.0))]),
                             seed=62, white=False)[0]
    psr = psr.with_residuals(psr.residuals + red)
    arr = Array([psr])
    c = check_pulsar(NoiseWeighting(arr, NoiseSettings(red_components=10))[0])
    assert c.lowfreq_pvalue < 1e-3 and c.flagged
    # fitting the red noise removes the flag
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NoiseFitWarning)
        fit = fit_noise(arr, FitSettings(red_components=10, common=False, upper_limits=False))
    assert fit.pulsars[0].red_noise and not fit.pulsars[0].gof.flagged


def test_array_check_points_to_common_process():
    base = invented_array(n_pulsars=6, years=15, seed=71, toas_per_pulsar=150, full_span=True)
    arr = base.with_residuals(simulate_residuals(base, seed=72, background_log10_amplitude=-13.3))
    checks = [check_pulsar(w) for w in NoiseWeighting(arr, NoiseSettings(red_components=10))]
    assert check_array(checks).flagged


def test_goodness_of_fit_threads_give_the_serial_numbers():
    """One pulsar per thread runs each pulsar's same operations: serial and threaded results agree to
    1e-12 relative (never bit for bit; common practice, no source), and equal the per-pulsar
    check_pulsar values."""
    from cwsearch.inference.noisefit import goodness_of_fit

    base = invented_array(n_pulsars=5, years=12, seed=73, toas_per_pulsar=120, full_span=True)
    arr = base.with_residuals(simulate_residuals(base, seed=74, background_log10_amplitude=-13.6))
    settings = NoiseSettings(red_components=8)
    serial, comb1 = goodness_of_fit(arr, settings, workers=1)
    threaded, comb2 = goodness_of_fit(arr, settings, workers=3)
    direct = [check_pulsar(w) for w in NoiseWeighting(arr, settings)]
    for a, b, c in zip(serial, threaded, direct):
        for name in ("normality_pvalue", "lowfreq_statistic", "lowfreq_pvalue"):
            np.testing.assert_allclose(getattr(b, name), getattr(a, name), rtol=1e-12)
            np.testing.assert_allclose(getattr(c, name), getattr(a, name), rtol=1e-9)
    np.testing.assert_allclose(comb2.statistic, comb1.statistic, rtol=1e-12)


# ----------------------------------------------------------------- edge cases
def test_too_few_toas_white_only_with_warning_and_no_nan():
    rng = np.random.default_rng(81)
    short = _pulsar(rng, n=25, name="SHORT1")
    long = _pulsar(rng, n=80, name="LONG1")
    arr = Array([short, long])
    with pytest.warns(NoiseFitWarning, match="SHORT1"):
        fit = fit_noise(arr, FitSettings(red_components=6, common=False, upper_limits=False, min_toas_red=40))
    assert not fit["SHORT1"].red_fitted and not fit["SHORT1"].red_noise
    assert fit["LONG1"].red_fitted


def test_not_converged_warns_and_table_has_no_nan(tmp_path):
    rng = np.random.default_rng(82)
    arr = Array([_pulsar(rng, n=80, name="SLOW1")])
    with pytest.warns(NoiseFitWarning, match="SLOW1.*did not converge"):
        fit = fit_noise(arr, FitSettings(red_components=6, common=False, upper_limits=False, max_iterations=1))
    assert not fit.pulsars[0].converged
    write_noise_table(fit, tmp_path / "noise.ecsv")
    table = Table.read(tmp_path / "noise.ecsv", format="ascii.ecsv")
    for name in table.colnames:
        if table[name].dtype.kind == "f":
            assert np.all(np.isfinite(table[name])), name
    assert not table["converged"][0]


# ----------------------------------------------------------------- the table
@pytest.fixture(scope="module")
def fitted_dataset(tmp_path_factory):
    from cwsearch.data.dataset import dataset_checksum, read_dataset, write_dataset

    base = invented_array(n_pulsars=3, years=8, seed=91, toas_per_pulsar=70)
    arr = base.with_residuals(simulate_residuals(base, seed=92, background_log10_amplitude=-13.9))
    folder = tmp_path_factory.mktemp("nf") / "data"
    write_dataset(arr, folder)
    arr = read_dataset(folder)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NoiseFitWarning)
        fit = fit_noise(arr, FitSettings(red_components=6), dataset_checksum=dataset_checksum(folder))
    path = folder.parent / "noise_model.ecsv"
    write_noise_table(fit, path)
    return arr, fit, path, dataset_checksum(folder)


def test_table_round_trip(fitted_dataset):
    arr, fit, path, checksum = fitted_dataset
    model = read_noise_table(path, arr, dataset_checksum=checksum)
    expected = fit.model()
    assert model.common_log10_amplitude == pytest.approx(expected.common_log10_amplitude, rel=1e-12)
    assert model.common_index == pytest.approx(expected.common_index, rel=1e-12)
    for name, noise in expected.pulsars.items():
        got = model.pulsars[name]
        assert got.has_red_noise == noise.has_red_noise
        for b in noise.sigma_scale:
            assert got.sigma_scale[b] == pytest.approx(noise.sigma_scale[b], rel=1e-12)
            assert got.sigma_added[b] == pytest.approx(noise.sigma_added[b], rel=1e-12, abs=1e-30)
    applied, settings = apply_noise_table(arr, path, dataset_checksum=checksum)
    assert settings.common_log10_amplitude == pytest.approx(expected.common_log10_amplitude, rel=1e-12)
    for p, q in zip(arr, applied):
        assert np.allclose(q.effective_sigmas(), apply_noise_model(arr, expected)[p.name].effective_sigmas(),
                           rtol=1e-12)
    table = Table.read(path, format="ascii.ecsv")
    assert str(table["sigma_added"].unit) == "s"
    assert table.meta["dataset_checksum"] == checksum and "bounds" in table.meta


def _edited(path, tmp_path, changes):
    table = Table.read(path, format="ascii.ecsv")
    for (column, row), value in changes.items():
        table[column] = table[column].astype(object) if isinstance(value, str) else table[column]
        table[column][row] = value
        if isinstance(value, str):
            table[column] = table[column].astype(str)
    out = tmp_path / "edited.ecsv"
    table.write(out, format="ascii.ecsv", overwrite=True)
    return out


def test_unknown_pulsar_and_backend_refused(fitted_dataset, tmp_path):
    arr, _, path, checksum = fitted_dataset
    bad = _edited(path, tmp_path, {("pulsar", 1): "NOSUCHPSR"})
    with pytest.raises(InputError, match=r"row 2, column pulsar: unknown pulsar 'NOSUCHPSR'"):
        read_noise_table(bad, arr, dataset_checksum=checksum)
    bad = _edited(path, tmp_path, {("backend", 0): "NOSUCHRCVR"})
    with pytest.raises(InputError, match=r"row 1, column backend: .*NOSUCHRCVR"):
        read_noise_table(bad, arr, dataset_checksum=checksum)


def test_wrong_dataset_checksum_refused(fitted_dataset):
    arr, _, path, checksum = fitted_dataset
    with pytest.raises(InputError, match="fitted on another dataset"):
        read_noise_table(path, arr, dataset_checksum="0" * 64)


# ----------------------------------------------------------------- simulation support
def test_wrong_white_noise_truth_and_quoted_sigmas_kept():
    base = invented_array(n_pulsars=4, years=6, seed=101, toas_per_pulsar=500)
    truth = wrong_white_noise(base, seed=102, scale_range=(0.8, 1.6), added_fraction=(0.0, 0.5))
    quoted = [p.sigmas.copy() for p in base]
    res = simulate_residuals(base, seed=103, red=False, true_white=truth, fit_timing_model=False)
    for p, r, q in zip(base, res, quoted):
        assert np.array_equal(p.sigmas, q)
        for b, values in truth[p.name].items():
            assert 0.8 <= values["sigma_scale"] <= 1.6
            assert 0 <= values["sigma_added"] <= 0.5 * np.median(p.sigmas[p.backends == b])
        z = r / true_sigmas(p, truth)
        assert stats.kstest(z, "norm").pvalue > 1e-3      # drawn with the true sigmas (scipy.stats)


def test_amplitude_upper_limit_equals_truncated_normal_quantile():
    # A likelihood Gaussian in the amplitude A (mean mu, width s) with a prior uniform in A on [1e-18, 1e-11]
    # gives a truncated-normal posterior: its 95 % quantile from scipy.stats.truncnorm is the reference.
    from scipy import stats

    from cwsearch.inference.noisefit import amplitude_upper_limit

    # broad, reaching down to A = 0, narrow (a strongly detected process) and very narrow
    for mu, s in ((1.0e-15, 3.0e-16), (0.0, 4.0e-16), (3.0e-14, 1.0e-15), (3.0e-14, 3.0e-17)):
        lo, hi = 1e-18, 1e-11
        ref = stats.truncnorm.ppf(0.95, (lo - mu) / s, (hi - mu) / s, loc=mu, scale=s)
        got = amplitude_upper_limit(lambda la: -0.5 * ((10.0**la - mu) / s) ** 2, bounds=(-18.0, -11.0))
        assert abs(got - np.log10(ref)) < 0.01, (mu, s, got, np.log10(ref))
