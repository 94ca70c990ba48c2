"""Array-level correlated-background engine against dense linear algebra and published formulas.

Dense reference (numpy.linalg / scipy.linalg / scipy.stats only): the array covariance
C = blockdiag(N_a + F_a φ_a F_aᵀ) + F (Γ ⊗ diag φ_c) Fᵀ is written out as an n_TOA × n_TOA
matrix from the power-law form (common practice: P(f) = A²/(12π²) (f/f_yr)^(−γ) f_yr^(−3)), and the
timing models are projected out with G, the orthonormal complement of each design matrix
(van Haasteren & Vallisneri 2014, Phys. Rev. D 90, 104012): (x|y) = xᵀ G (GᵀCG)⁻¹ Gᵀ y.
Fe and Fp follow Ellis, Siemens & Creighton 2012 (ApJ 756, 175) with that inner product.
Hellings–Downs values: Hellings & Downs 1983 (ApJ 265, L39).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import scipy.special
import scipy.stats
from astropy import units as u

from cwsearch.physics import fstat, waveform
from cwsearch.inference.correlated_likelihood import CorrelatedLikelihood
from cwsearch.physics.correlated import (ArrayWeighting, CommonProcess, correlated_network, correlation_factor,
                                         correlation_matrix, fe_sky_correlated, fp_correlated)
from cwsearch.data.model import Array, Pulsar, PulsarNoise
from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
from cwsearch.physics.simulate import correlated_background

YEAR_FREQ = 1 / (1 * u.yr).to_value(u.s)
RTOL = 1e-8


def _closed_form_hd(zeta):
    """Hellings & Downs 1983 for distinct pulsars, normalised to 1/2 at zero separation."""
    x = (1 - np.cos(zeta)) / 2
    return 0.5 - x / 4 + 1.5 * x * np.log(np.where(x > 0, x, 1.0))


def _array(seed=3, n_pulsars=4, n_toas=(44, 52, 38, 57, 48), red=True, design=True, sigma=2e-7):
    rng = np.random.default_rng(seed)
    pulsars = []
    for i in range(n_pulsars):
        n = n_toas[i % len(n_toas)]
        mjd = np.sort(rng.uniform(53000 + 150 * i, 57400, n))
        backends = np.where(rng.uniform(size=n) < 0.5, "A", "B")
        noise = PulsarNoise(sigma_scale={"A": 1.3}, sigma_added={"B": 1e-7})
        if red and i % 2 == 0:
            noise.red_log10_amplitude, noise.red_index = -14.0, 3.0
        extra = rng.normal(size=(n, 1)) if design and i == 1 else None
        ra, dec = rng.uniform(0, 2 * np.pi), np.arcsin(rng.uniform(-1, 1))
        pulsars.append(Pulsar(f"T{i}", ra=ra, dec=dec, distance=rng.uniform(0.5, 2.0), distance_err=0.1, mjd=mjd,
                              residuals=rng.normal(size=n) * 3e-7, sigmas=rng.uniform(0.5, 1.5, n) * sigma,
                              backends=backends, noise=noise, extra_design=extra,
                              extra_design_names=("design_a",) if extra is not None else ()))
    return Array(pulsars)


def _psd(freqs, log10_amplitude, gamma):     # P(f) = A²/(12π²) (f/f_yr)^(−γ) f_yr^(−3)  (power-law form, common practice)
    return 10 ** (2 * log10_amplitude) / (12 * np.pi**2) * (freqs / YEAR_FREQ) ** (-gamma) * YEAR_FREQ**-3


def _dense(arr, settings, common, gamma):
    """Dense C, block-diagonal G and the projected covariance GᵀCG (numpy only)."""
    span, start = arr.span, arr.start
    blocks, fouriers, gs = [], [], []
    for psr in arr:
        t = psr.mjd * 86400.0
        scale = np.array([psr.noise.sigma_scale.get(b, 1.0) for b in psr.backends])
        added = np.array([psr.noise.sigma_added.get(b, 0.0) for b in psr.backends])
        cov = np.diag((scale * psr.sigmas) ** 2 + added**2)
        if psr.noise.has_red_noise:
            freqs = np.arange(1, settings.red_components + 1) / span
            for f, var in zip(freqs, _psd(freqs, psr.noise.red_log10_amplitude, psr.noise.red_index) / span):
                for b in (np.sin(2 * np.pi * f * (t - start)), np.cos(2 * np.pi * f * (t - start))):
                    cov += var * np.outer(b, b)
        blocks.append(cov)
        freqs = np.arange(1, common.components + 1) / span
        cols = []
        for f in freqs:
            cols += [np.sin(2 * np.pi * f * (t - start)), np.cos(2 * np.pi * f * (t - start))]
        fouriers.append(np.column_stack(cols))
        u_, _, _ = np.linalg.svd(psr.design_matrix, full_matrices=True)
        gs.append(u_[:, psr.design_matrix.shape[1]:])
    freqs = np.arange(1, common.components + 1) / span
    phi = np.repeat(_psd(freqs, common.log10_amplitude, common.index) / span, 2)
    big_f = scipy.linalg.block_diag(*fouriers)
    cov = scipy.linalg.block_diag(*blocks) + big_f @ np.kron(gamma, np.diag(phi)) @ big_f.T
    g = scipy.linalg.block_diag(*gs)
    return cov, g, g.T @ cov @ g


class _Dense:
    def __init__(self, arr, settings, common, gamma):
        self.cov, self.g, self.gcg = _dense(arr, settings, common, gamma)
        self.sizes = [p.n_toas for p in arr]
        self.offsets = np.concatenate([[0], np.cumsum(self.sizes)])
        self.inv = self.g @ np.linalg.solve(self.gcg, self.g.T)       # G (GᵀCG)⁻¹ Gᵀ

    def stack(self, per_pulsar):
        per_pulsar = [np.asarray(v, dtype=float).reshape(np.shape(v)[0], -1) for v in per_pulsar]
        return np.concatenate(per_pulsar, axis=0)

    def on(self, p, x):
        """Array vector (n_TOA, m) that is x on pulsar p and zero elsewhere."""
        x = np.asarray(x, dtype=float).reshape(self.sizes[p], -1)
        out = np.zeros((self.offsets[-1], x.shape[1]))
        out[self.offsets[p]:self.offsets[p + 1]] = x
        return out

    def inner(self, x, y):
        return x.T @ self.inv @ y


SETTINGS = NoiseSettings(red_components=5)
KINDS = ["hellings-downs", "monopole", "dipole", "uncorrelated"]


@pytest.mark.parametrize("kind", KINDS)
def test_products_logdet_and_likelihood_equal_dense(kind):
    """Inner products, Gram matrix, weighted data, log det(GᵀCG) and the log-likelihood equal the
    dense G-projected evaluation (van Haasteren & Vallisneri 2014; numpy.linalg.slogdet,
    scipy.stats.multivariate_normal) to 1e-8 relative, for every correlation kind."""
    arr = _array()
    common = CommonProcess(-13.7, 13 / 3, 6, kind)
    aw = ArrayWeighting(arr, SETTINGS, common)
    gamma = {"hellings-downs": None, "monopole": np.ones((4, 4)), "uncorrelated": np.eye(4)}.get(kind)
    if kind == "hellings-downs":
        pos = arr.positions
        gamma = _closed_form_hd(np.arccos(np.clip(pos @ pos.T, -1, 1)))
        np.fill_diagonal(gamma, 1.0)
    elif kind == "dipole":
        gamma = arr.positions @ arr.positions.T
    np.testing.assert_allclose(aw.correlation, gamma, rtol=1e-12, atol=1e-14)
    dense = _Dense(arr, SETTINGS, common, gamma)
    rng = np.random.default_rng(8)
    xs = [rng.normal(size=(p.n_toas, 3)) * 1e-6 for p in arr]
    ys = [rng.normal(size=(p.n_toas, 2)) * 1e-6 for p in arr]
    want = dense.inner(dense.stack(xs), dense.stack(ys))
    np.testing.assert_allclose(aw.inner(xs, ys), want, rtol=RTOL, atol=RTOL * np.abs(want).max())
    # Gram matrix of per-pulsar basis sets (pulsar, column) ordering
    big = np.hstack([dense.on(p, xs[p]) for p in range(4)])
    want_gram = dense.inner(big, big)
    np.testing.assert_allclose(aw.gram(xs), want_gram, rtol=RTOL, atol=RTOL * np.abs(want_gram).max())
    # weighted data: (d̃_p|x)_{K_p} = (d|x)_C for x on pulsar p; data products
    data = dense.stack([p.residuals for p in arr])
    tilde = aw.weighted_data()
    products = aw.data_products(xs)
    for p, w in enumerate(aw.engine):
        want_p = dense.inner(data, dense.on(p, xs[p]))[0]
        np.testing.assert_allclose(w.inner(tilde[p], xs[p]), want_p, rtol=RTOL, atol=RTOL * np.abs(want_p).max())
        np.testing.assert_allclose(products[p], want_p, rtol=RTOL, atol=RTOL * np.abs(want_p).max())
    sign, logdet = np.linalg.slogdet(dense.gcg)
    assert sign > 0
    assert aw.logdet() == pytest.approx(logdet, rel=RTOL)
    gd = dense.g.T @ data[:, 0]
    assert aw.data_norm() == pytest.approx(float(gd @ np.linalg.solve(dense.gcg, gd)), rel=RTOL)
    logpdf = scipy.stats.multivariate_normal(mean=np.zeros(gd.size), cov=dense.gcg).logpdf(gd)
    assert aw.log_likelihood() == pytest.approx(logpdf, rel=RTOL)


def test_rebuild_for_new_amplitude_equals_dense():
    """with_common (re-using the amplitude-free parts) equals the dense log-likelihood at the new
    (log10 A, γ) (scipy.stats.multivariate_normal) and a fresh build."""
    arr = _array(seed=5)
    aw = ArrayWeighting(arr, SETTINGS, CommonProcess(-14.5, 13 / 3, 6))
    new = aw.with_common(-13.6, 3.5)
    common = CommonProcess(-13.6, 3.5, 6)
    fresh = ArrayWeighting(arr, SETTINGS, common)
    dense = _Dense(arr, SETTINGS, common, fresh.correlation)
    gd = dense.g.T @ dense.stack([p.residuals for p in arr])[:, 0]
    logpdf = scipy.stats.multivariate_normal(mean=np.zeros(gd.size), cov=dense.gcg).logpdf(gd)
    assert new.log_likelihood() == pytest.approx(logpdf, rel=RTOL)
    assert new.log_likelihood() == pytest.approx(fresh.log_likelihood(), rel=1e-10)
    assert new.engine is aw.engine


def _scan_setup(seed=11, n_pulsars=4):
    arr = _array(seed=seed, n_pulsars=n_pulsars)
    common = CommonProcess(-13.5, 13 / 3, 6)
    aw = ArrayWeighting(arr, SETTINGS, common)
    freqs = np.array([3.1e-9, 7.7e-9, 1.93e-8])
    ra = np.array([0.3, 2.0, 4.1, 5.5, 1.2])
    dec = np.array([0.1, -0.7, 0.9, -0.2, 0.5])
    fplus, fcross, _ = waveform.antenna_pattern(ra, dec, arr.positions)
    return arr, common, aw, freqs, fplus, fcross


def test_fe_and_fp_equal_dense():
    """Fe = ½ NᵀM⁻¹N and Fp with the dense correlated inner product (Ellis, Siemens &
    Creighton 2012 with the G-projected C; numpy.linalg.solve) equal the engine's sky kernel,
    its N and M, and fp_correlated to 1e-8 relative."""
    arr, common, aw, freqs, fplus, fcross = _scan_setup()
    dense = _Dense(arr, SETTINGS, common, aw.correlation)
    data = dense.stack([p.residuals for p in arr])
    proj = aw.projections(freqs)
    corr = aw.scan_corrections(freqs)
    scan = fe_sky_correlated(proj, corr, fplus, fcross)
    nvec, mmat = correlated_network(proj, corr, fplus, fcross)
    fp = fp_correlated(proj, corr)
    t0 = arr.reference_time
    for k, f in enumerate(freqs):
        sines = [np.sin(2 * np.pi * f * (p.toas - t0)) for p in arr]
        cosines = [np.cos(2 * np.pi * f * (p.toas - t0)) for p in arr]
        fp_want = 0.0
        for p in range(len(arr)):
            tc = np.hstack([dense.on(p, sines[p]), dense.on(p, cosines[p])])
            z = dense.inner(tc, tc)
            xy = dense.inner(data, tc)[0]
            fp_want += 0.5 * xy @ np.linalg.solve(z, xy)
        assert fp[k] == pytest.approx(fp_want, rel=RTOL)
        for s in range(fplus.shape[0]):
            templates = np.column_stack([
                dense.stack([fplus[s, p] * sines[p] for p in range(len(arr))])[:, 0],
                dense.stack([fplus[s, p] * cosines[p] for p in range(len(arr))])[:, 0],
                dense.stack([fcross[s, p] * sines[p] for p in range(len(arr))])[:, 0],
                dense.stack([fcross[s, p] * cosines[p] for p in range(len(arr))])[:, 0]])
            m_want = dense.inner(templates, templates)
            n_want = dense.inner(templates, data)[:, 0]
            fe_want = 0.5 * n_want @ np.linalg.solve(m_want, n_want)
            np.testing.assert_allclose(mmat[s, k], m_want, rtol=RTOL, atol=RTOL * np.abs(m_want).max())
            np.testing.assert_allclose(nvec[s, k], n_want, rtol=RTOL, atol=RTOL * np.abs(n_want).max())
            assert scan.fe_map[s, k] == pytest.approx(fe_want, rel=RTOL)


def test_identity_correlation_reproduces_per_pulsar_engine():
    """Γ = identity equals the per-pulsar engine with the common process in every pulsar's
    Fourier prior: inner products, log-determinant, weighted data, Fe map and Fp
    (strong consistency check: two independent code paths, same covariance)."""
    arr = _array(seed=21)
    k = SETTINGS.red_components
    aw = ArrayWeighting(arr, SETTINGS, CommonProcess(-13.8, 13 / 3, k, "uncorrelated"))
    per = NoiseWeighting(arr, NoiseSettings(red_components=k, common_log10_amplitude=-13.8, common_index=13 / 3))
    rng = np.random.default_rng(2)
    xs = [rng.normal(size=(p.n_toas, 2)) for p in arr]
    want = sum(w.inner(x) for w, x in zip(per, xs))
    np.testing.assert_allclose(aw.inner(xs), want, rtol=1e-9, atol=1e-9 * np.abs(want).max())
    assert aw.logdet() == pytest.approx(sum(w.logdet() for w in per), rel=1e-10)
    for w_k, w_c, d_t, x, p in zip(aw.engine, per, aw.weighted_data(), xs, arr):
        np.testing.assert_allclose(w_k.inner(d_t, x), w_c.inner(p.residuals, x), rtol=1e-9)
    freqs = np.array([4e-9, 9e-9, 1.6e-8, 2.5e-8])
    fplus, fcross, _ = waveform.antenna_pattern(np.array([0.5, 3.0]), np.array([0.2, -0.9]), arr.positions)
    proj_c = aw.projections(freqs)
    corr = aw.scan_corrections(freqs)
    proj_p = fstat.project(per, freqs)
    np.testing.assert_allclose(fe_sky_correlated(proj_c, corr, fplus, fcross).fe_map,
                               fstat.fe_sky(proj_p, fplus, fcross).fe_map, rtol=1e-8)
    np.testing.assert_allclose(fp_correlated(proj_c, corr), fstat.fp_statistic(proj_p), rtol=1e-8)
    # off-diagonal (cross-pulsar) corrections vanish without correlations
    off = corr.copy()
    off[:, :, np.arange(4), np.arange(4)] = 0
    assert np.abs(off).max() <= 1e-12 * np.abs(corr).max()


def test_pair_gemm_sky_kernel_equals_the_direct_quadratic_forms(monkeypatch):
    """Regression guard of the scan kernel's algebra (docs/design.md §5b), 9 pulsars so that every pair
    sum has many terms: W_pq(f) of scan_corrections (frequency chunks, one q per thread, u_p from the
    projection pass) against u_pᵀ Ψ_pq u_q written out with numpy.einsum from Ψ and u_p = (K_p⁻¹F_p)ᵀ[sin | cos]; the pulsar-pair GEMM sky kernel
    (several pixel blocks, frequency chunks and residual sets) against ½ Nᵀ M⁻¹ N with M and N of the
    direct per-pixel einsum form (correlated_network) and numpy.linalg.solve, to 1e-10 relative
    (rounding only; common practice, no source)."""
    from cwsearch.physics import correlated

    monkeypatch.setattr(correlated, "TRIG_CHUNK", 3)
    monkeypatch.setattr(correlated, "SKY_PIXEL_BLOCK", 7)
    arr = _array(seed=17, n_pulsars=9)
    aw = ArrayWeighting(arr, SETTINGS, CommonProcess(-13.6, 13 / 3, 5))
    # pulsars with red noise on the common frequencies take u_p from the projection's own sums, the others
    # from K_p⁻¹F_p; both kinds are here (trig_fourier_products below always takes the second)
    assert {off is None for off in aw._fourier_offset} == {True, False}
    freqs = np.linspace(2.6e-9, 2.9e-8, 8)
    rng = np.random.default_rng(5)
    ra, dec = rng.uniform(0, 2 * np.pi, 23), np.arcsin(rng.uniform(-1, 1, 23))
    fplus, fcross, _ = waveform.antenna_pattern(ra, dec, arr.positions)
    proj = aw.projections(freqs)
    corr = aw.scan_corrections(freqs)
    u_ = aw.trig_fourier_products(freqs)                                  # (P, 2K, 2F)
    n_psr, n_c = len(arr), aw.n_fourier
    psi = aw.correction_matrix().reshape(n_psr, n_c, n_psr, n_c)
    n_f = freqs.size
    for ab, (a, b) in enumerate([(0, 0), (0, 1), (1, 0), (1, 1)]):
        want = np.einsum("pif,piqj,qjf->fpq", u_[:, :, a * n_f:(a + 1) * n_f], psi, u_[:, :, b * n_f:(b + 1) * n_f])
        np.testing.assert_allclose(corr[:, ab], want, rtol=1e-10, atol=1e-10 * np.abs(want).max())
    nvec, mmat = correlated_network(proj, corr, fplus, fcross)
    want = 0.5 * np.einsum("sfi,sfi->sf", nvec, np.linalg.solve(mmat, nvec[..., None])[..., 0])
    got = fe_sky_correlated(proj, corr, fplus, fcross, chunk_elements=2000)
    np.testing.assert_allclose(got.fe_map, want, rtol=1e-10)
    np.testing.assert_array_equal(got.best_pixel[0], np.argmax(want, axis=0))
    # a batch of residual sets shares M: each set's Fe equals the same direct form with its own N
    sets = [np.column_stack([p.residuals, rng.normal(size=p.n_toas) * 3e-7]) for p in arr]
    batch = aw.projections(freqs, sets)
    scan = fe_sky_correlated(batch, corr, fplus, fcross, keep_map=False, chunk_elements=2000)
    for k in range(2):
        one = fstat.Projections(freqs, batch.x[k], batch.y[k], batch.z, batch.positions, batch.z_scale)
        n_k, m_k = correlated_network(one, corr, fplus, fcross)
        fe_k = 0.5 * np.einsum("sfi,sfi->sf", n_k, np.linalg.solve(m_k, n_k[..., None])[..., 0])
        np.testing.assert_allclose(scan.fe_max[k], fe_k.max(axis=0), rtol=1e-10)


def test_single_precision_sky_sums_and_exact_maxima(monkeypatch):
    """The scan stage's default path (ArrayNoise.fe_sky): the pixel sums in float32. Float32 carries 24
    significand bits (IEEE 754: unit roundoff 6e-8), so sums of a few hundred pair terms stay within
    ~1e-5 relative (the bound asserted; a rounding-error fact, common practice, no source); the per-frequency
    maxima are recomputed in float64 and must equal the double-precision kernel's to 1e-10 relative, at the
    same pixel. Several pixel blocks, frequency chunks and two residual sets."""
    from cwsearch.physics import correlated

    monkeypatch.setattr(correlated, "SKY_PIXEL_BLOCK", 7)
    arr = _array(seed=17, n_pulsars=9)
    aw = ArrayWeighting(arr, SETTINGS, CommonProcess(-13.6, 13 / 3, 5))
    freqs = np.linspace(2.6e-9, 2.9e-8, 8)
    rng = np.random.default_rng(6)
    ra, dec = rng.uniform(0, 2 * np.pi, 40), np.arcsin(rng.uniform(-1, 1, 40))
    fplus, fcross, _ = waveform.antenna_pattern(ra, dec, arr.positions)
    proj = aw.projections(freqs)
    corr = aw.scan_corrections(freqs)
    double = fe_sky_correlated(proj, corr, fplus, fcross, chunk_elements=3000)
    single = fe_sky_correlated(proj, corr, fplus, fcross, chunk_elements=3000, single_precision=True)
    np.testing.assert_allclose(single.fe_map, double.fe_map, rtol=1e-5)
    assert np.abs(single.fe_map - double.fe_map).max() > 0          # the float32 path did run
    np.testing.assert_allclose(single.fe_max, double.fe_max, rtol=1e-10)
    np.testing.assert_array_equal(single.best_pixel, double.best_pixel)
    sets = [np.column_stack([p.residuals, rng.normal(size=p.n_toas) * 3e-7]) for p in arr]
    batch = aw.projections(freqs, sets)
    want = fe_sky_correlated(batch, corr, fplus, fcross, keep_map=False, chunk_elements=3000)
    got = fe_sky_correlated(batch, corr, fplus, fcross, keep_map=False, chunk_elements=3000, single_precision=True)
    np.testing.assert_allclose(got.fe_max, want.fe_max, rtol=1e-10)
    # the BLAS thread counts are restored once every overlapping thread-count context has closed,
    # also when the contexts are opened and closed on different threads (common practice, no source)
    import threading

    from cwsearch.physics import fstat

    before = [int(get()) for get, _ in fstat._blas_functions()]
    opened, release = threading.Event(), threading.Event()

    def hold():
        with fstat._blas_threads(1):
            opened.set()
            release.wait(10)

    worker = threading.Thread(target=hold)
    worker.start()
    opened.wait(10)
    with fstat._blas_threads(1):
        release.set()
        worker.join()
    assert [int(get()) for get, _ in fstat._blas_functions()] == before


def test_fe_null_distribution_chi2_4():
    """2Fe ~ χ²(4) in noise drawn from the true correlated C (Ellis, Siemens & Creighton 2012);
    Kolmogorov–Smirnov test against scipy.stats.chi2(4), fixed seed."""
    arr, common, aw, freqs, fplus, fcross = _scan_setup(seed=4)
    dense = _Dense(arr, SETTINGS, common, aw.correlation)
    rng = np.random.default_rng(99)
    n_sims = 600
    draws = np.linalg.cholesky(dense.cov) @ rng.standard_normal((dense.cov.shape[0], n_sims))
    sets = [draws[dense.offsets[p]:dense.offsets[p + 1]] for p in range(len(arr))]
    proj = aw.projections(freqs[1:2], sets)
    corr = aw.scan_corrections(freqs[1:2])
    scan = fe_sky_correlated(proj, corr, fplus[:1], fcross[:1], keep_map=False)
    stat = 2 * scan.fe_max[:, 0]
    assert scipy.stats.kstest(stat, scipy.stats.chi2(4).cdf).pvalue > 1e-3


@pytest.mark.parametrize("degrees, value, tol", [
    (1e-6, 0.5, 1e-6),        # two distinct pulsars at zero separation: 1/2
    (90.0, -0.1449, 5e-5),
    (180.0, 0.25, 1e-12),
])
def test_hellings_downs_values(degrees, value, tol):
    """Hellings & Downs 1983 values, normalisation Γ(0⁺) = 1/2 for distinct pulsars, autos 1."""
    zeta = np.radians(degrees)
    pos = np.array([[0.0, 0.0, 1.0], [np.sin(zeta), 0.0, np.cos(zeta)]])
    gamma = correlation_matrix(pos, "hellings-downs")
    assert gamma[0, 1] == pytest.approx(value, abs=tol)
    assert gamma[0, 0] == gamma[1, 1] == 1.0


def test_hellings_downs_zero_crossings_and_minimum():
    """Zero crossings at 49.3° and 121.8°, minimum −0.152 (−0.1519) at 82.5° (Hellings & Downs 1983)."""
    zeta = np.radians(np.linspace(0.01, 180.0, 17992))
    pos = np.column_stack([np.sin(zeta), np.zeros_like(zeta), np.cos(zeta)])
    curve = np.concatenate([correlation_matrix(np.vstack([[0.0, 0.0, 1.0], chunk]), "hellings-downs")[0, 1:]
                            for chunk in np.array_split(pos, 90)])
    np.testing.assert_allclose(curve, _closed_form_hd(zeta), rtol=1e-12, atol=1e-15)
    deg = np.degrees(zeta)
    crossings = deg[np.flatnonzero(np.diff(np.sign(curve)) != 0)]
    np.testing.assert_allclose(crossings, [49.3, 121.8], atol=0.05)
    i = np.argmin(curve)
    assert curve[i] == pytest.approx(-0.1519, abs=5e-5)
    assert deg[i] == pytest.approx(82.5, abs=0.1)


def test_monopole_dipole_factors():
    """Monopole Γ = 1 (rank 1) and dipole Γ = cos ζ (rank 3); the factor reproduces Γ
    (numpy.linalg.matrix_rank, common practice, no source)."""
    rng = np.random.default_rng(1)
    pos = rng.normal(size=(7, 3))
    pos /= np.linalg.norm(pos, axis=1, keepdims=True)
    for kind, rank in (("monopole", 1), ("dipole", 3), ("hellings-downs", 7), ("uncorrelated", 7)):
        gamma = correlation_matrix(pos, kind)
        factor = correlation_factor(gamma)
        assert factor.shape[1] == rank == np.linalg.matrix_rank(gamma)
        np.testing.assert_allclose(factor @ factor.T, gamma, atol=1e-12)
    np.testing.assert_allclose(correlation_matrix(pos, "dipole"), pos @ pos.T, atol=1e-15)
    with pytest.raises(ValueError, match="correlation kind"):
        correlation_matrix(pos, "quadrupole")


def test_background_draw_matches_simulate_and_covariance():
    """The engine's draw equals simulate.correlated_background for Hellings–Downs (same seed), and
    the sample covariance of many draws approaches F Φ Fᵀ (common practice, no source)."""
    arr = _array(seed=6, n_pulsars=3, n_toas=(30, 25, 28))
    aw = ArrayWeighting(arr, SETTINGS, CommonProcess(-14.0, 13 / 3, 4))
    mine = aw.draw_background(seed=12)
    theirs = correlated_background(arr, -14.0, 13 / 3, 4, seed=12)
    for a, b in zip(mine, theirs):
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-12 * np.abs(b).max())
    rng = np.random.default_rng(5)
    draws = np.array([np.concatenate(aw.draw_background(rng)) for _ in range(4000)])
    big_f = scipy.linalg.block_diag(*aw.fourier)
    want = big_f @ aw.dense_covariance_blocks() @ big_f.T
    got = draws.T @ draws / draws.shape[0]
    assert np.abs(got - want).max() < 0.1 * np.abs(want).max()


# ---------------------------------------------------------------- likelihood
def _likelihood_setup(evolution="full", seed=31, log10_amplitude=-13.3, n_pulsars=3, snr=10.0):
    arr = _array(seed=seed, n_pulsars=n_pulsars, n_toas=(60, 55, 58, 50), design=False, sigma=1e-7)
    common = CommonProcess(log10_amplitude, 13 / 3, 5)
    aw0 = ArrayWeighting(arr, SETTINGS, common)
    rng = np.random.default_rng(seed)
    noise = [a + b for a, b in zip(aw0.draw_background(rng),
                                   [rng.normal(size=p.n_toas) * p.effective_sigmas() for p in arr])]
    shape = dict(ra=1.3, dec=0.4, gw_frequency=1.1e-8, chirp_mass=8e8)
    proj = dict(inclination=0.7, polarization=0.4, phase=1.1)
    unit = [waveform.residuals(p.toas, p.position, p.distance, strain=1.0, reference_time=arr.reference_time,
                               evolution=evolution, **shape, **proj) for p in arr]
    strain = snr / np.sqrt(aw0.inner(unit))
    data = [n + strain * s for n, s in zip(noise, unit)]
    arr = arr.with_residuals(data)
    aw = ArrayWeighting(arr, SETTINGS, common)
    return arr, common, aw, shape, proj, strain


def test_likelihood_with_explicit_pulsar_phases_equals_dense():
    """ln Λ = (d|s)_C − ½(s|s)_C with the dense G-projected C, at explicit pulsar phases (exact path)."""
    arr, common, aw, shape, proj, strain = _likelihood_setup()
    like = CorrelatedLikelihood(arr, aw, evolution="full")
    cache = like.shape_cache(shape["ra"], shape["dec"], shape["gw_frequency"], shape["chirp_mass"])
    dense = _Dense(arr, SETTINGS, common, aw.correlation)
    data = dense.stack([p.residuals for p in arr])
    phases = np.array([[0.3, 1.9, 2.8], [1.0, 0.1, 2.2]])
    got = like.projection(cache, strain, proj["inclination"], proj["polarization"], proj["phase"], phases)
    for row, phase_set in zip(got, phases):
        sig = dense.stack([waveform.residuals(p.toas, p.position, p.distance, strain=strain,
                                              reference_time=arr.reference_time, evolution="full",
                                              pulsar_phase=phase_set[i], **shape, **proj)
                           for i, p in enumerate(arr)])
        want = (dense.inner(data, sig) - 0.5 * dense.inner(sig, sig))[0, 0]
        assert row == pytest.approx(want, rel=RTOL, abs=RTOL * abs(want))
    # the cross-pulsar Gram of the basis sets equals dense too
    bases = [waveform.residual_basis(p.toas, arr.reference_time, shape["gw_frequency"], shape["chirp_mass"],
                                     p.distance, odp, "full")[0]
             for p, odp in zip(arr, waveform.antenna_pattern(shape["ra"], shape["dec"], arr.positions)[2])]
    big = np.hstack([dense.on(p, b) for p, b in enumerate(bases)])
    want_gram = dense.inner(big, big)
    np.testing.assert_allclose(aw.gram(bases), want_gram, rtol=RTOL, atol=RTOL * np.abs(want_gram).max())


def _brute_force_marginal(arr, aw, shape, proj, strain, evolution, n_grid=64):
    """ln of the average of exp(ln Λ) over independent uniform pulsar phases on a full grid,
    ln Λ from the exact cross-pulsar Gram matrix (equal to dense, test above)."""
    odp = waveform.antenna_pattern(shape["ra"], shape["dec"], arr.positions)[2]
    fplus, fcross, _ = waveform.antenna_pattern(shape["ra"], shape["dec"], arr.positions)
    bases = [waveform.residual_basis(p.toas, arr.reference_time, shape["gw_frequency"], shape["chirp_mass"],
                                     p.distance, o, evolution)[0] for p, o in zip(arr, odp)]
    gram = aw.gram(bases)
    dvec = aw.data_products(bases).ravel()
    grid = np.arange(n_grid) * np.pi / n_grid           # pulsar phase enters as 2φ: period π
    mesh = np.stack(np.meshgrid(*([grid] * len(arr)), indexing="ij"), axis=-1).reshape(-1, len(arr))
    coeffs = waveform.basis_coefficients(strain, proj["inclination"], proj["polarization"], proj["phase"],
                                         mesh, fplus, fcross, True).reshape(mesh.shape[0], -1)
    ln_l = coeffs @ dvec - 0.5 * np.einsum("wi,ij,wj->w", coeffs, gram, coeffs)
    top = ln_l.max()
    return top + np.log(np.mean(np.exp(ln_l - top)))


@pytest.mark.parametrize("evolution", ["full", "monochromatic"])
def test_marginalised_likelihood_error_against_exact_integral(evolution):
    """Pulsar phases marginalised in mean field against the exact 3-pulsar phase integral
    (64³-point periodic grid of the exact, dense-equal ln Λ) at SNR 10 with a background above
    the white noise at low frequencies. Mean field is a lower bound (Gibbs–Bogoliubov–Feynman);
    measured error 0.004–0.095 nats over 3 seeds × 2 amplitudes × 2 evolution modes (0.006–0.012
    for this seed), asserted < 0.05 here; neglecting the pulsar × pulsar cross terms instead
    errs by 0.3–4 nats on the same cases. batch() equals projection()."""
    arr, common, aw, shape, proj, strain = _likelihood_setup(evolution)
    like = CorrelatedLikelihood(arr, aw, evolution=evolution)
    cache = like.shape_cache(shape["ra"], shape["dec"], shape["gw_frequency"], shape["chirp_mass"])
    approx = like.projection(cache, strain, proj["inclination"], proj["polarization"], proj["phase"])[0]
    exact = _brute_force_marginal(arr, aw, shape, proj, strain, evolution)
    assert abs(approx - exact) < 0.05
    assert approx <= exact + 1e-8
    theta = np.array([[shape["ra"], np.sin(shape["dec"]), np.log10(shape["gw_frequency"]),
                       np.log10(shape["chirp_mass"]), np.log10(strain), np.cos(proj["inclination"]),
                       proj["polarization"], proj["phase"]]])
    assert like.batch(np.repeat(theta, 3, axis=0)) == pytest.approx(np.full(3, approx), rel=1e-9, abs=1e-9)


def test_mean_field_stays_a_bound_when_the_sweeps_do_not_converge():
    """The mean-field value must stay below the exact phase integral even when its sweeps stop early
    (the regime of huge strains, where the couplings are enormous and the fixed-point iteration need
    not converge): Jensen's inequality holds for any product distribution (Gibbs–Bogoliubov–Feynman,
    common practice, no source). Three strongly coupled invented units, 0–3 sweeps and the default,
    against the exact integral on a 40³ periodic grid (exponentially convergent for these smooth
    factors). The fixed-point formula evaluated off the fixed point (the code before this test)
    exceeds the exact value on this case by 2.7 nats after 2 sweeps: checked here as well, so the
    case keeps discriminating."""
    import itertools

    from cwsearch.inference.correlated_likelihood import _mean_field_core

    n, grid = 3, 40
    rng = np.random.default_rng(29)
    coef = np.column_stack([rng.normal(0, 2, n), rng.normal(0, 2, n), rng.normal(0, 1, n), rng.normal(0, 1, n),
                            np.zeros(n)])
    amp = rng.uniform(1, 3, n)
    cross = np.zeros((n, n, 2, 2))
    for p, q in itertools.combinations(range(n), 2):
        cross[p, q] = rng.normal(0, 1, (2, 2))
        cross[q, p] = cross[p, q].T
    chi = np.arange(grid) * 2 * np.pi / grid

    def own(c, x):
        return c[0] * np.cos(x) + c[1] * np.sin(x) + c[2] * np.cos(2 * x) + c[3] * np.sin(2 * x) + c[4]

    mesh = np.meshgrid(*([chi] * n), indexing="ij")
    total = sum(own(coef[p], mesh[p]) for p in range(n))
    for p, q in itertools.combinations(range(n), 2):
        up = np.stack([np.cos(mesh[p]), np.sin(mesh[p])])
        uq = np.stack([np.cos(mesh[q]), np.sin(mesh[q])])
        total = total + amp[p] * amp[q] * np.einsum("i...,ij,j...->...", up, cross[p, q], uq)
    exact = float(scipy.special.logsumexp(total) - np.log(total.size))

    def moments(c):
        f = own(c, chi)
        w = np.exp(f - f.max())
        return f.max() + np.log(w.mean()), np.array([(w * np.cos(chi)).mean(), (w * np.sin(chi)).mean()]) / w.mean()

    def fixed_point_formula(sweeps):
        lnz, mu = np.zeros(n), np.zeros((n, 2))
        for p in range(n):
            lnz[p], mu[p] = moments(coef[p])
        for _ in range(sweeps):
            for p in range(n):
                field = sum(amp[p] * amp[q] * cross[p, q] @ mu[q] for q in range(n) if q != p)
                lnz[p], mu[p] = moments(coef[p] + np.concatenate([field, [0, 0, 0]]))
        return lnz.sum() - 0.5 * sum(amp[p] * amp[q] * mu[p] @ cross[p, q] @ mu[q]
                                     for p in range(n) for q in range(n) if q != p)

    assert fixed_point_formula(2) > exact + 1.0
    for sweeps in (0, 1, 2, 3, 100):
        value, _ = _mean_field_core(coef, amp, cross, sweeps, 1e-12)
        assert value <= exact + 1e-9, (sweeps, value, exact)
    assert _mean_field_core(coef, amp, cross, 100, 1e-12)[0] > exact - 1.0     # and still a useful bound


def test_phase_integral_and_moments_at_large_amplitudes():
    """The one-pulsar phase integral ``(1/2π)∫ exp(a cosχ + b sinχ + c cos2χ + d sin2χ + e) dχ`` and the
    mean of (cos χ, sin χ), which the mean-field sweeps use, at the amplitudes of hot chains (up to 3e6,
    where the kernel sums the grid only where the integrand matters). Checks: (1) first harmonic only,
    the closed forms ln I0(r) and the mean I1(r)/I0(r) along (a, b) (Abramowitz & Stegun 9.6.19 and
    9.6.18, from memory), with ``scipy.special.i0e``/``i1e``; (2) both harmonics, with conflicting
    maxima, a plain numpy sum over the same periodic grid shifted by its own maximum."""
    from cwsearch.inference.correlated_likelihood import _grid_moments
    from cwsearch.inference.likelihood import _grid_size

    rng = np.random.default_rng(41)
    out = np.empty(2)
    for r in (0.5, 3.0, 40.0, 300.0, 4e3, 5e4, 7e5, 3e6):
        angle = rng.uniform(0, 2 * np.pi)
        value = _grid_moments(r * np.cos(angle), r * np.sin(angle), 0.0, 0.0, 0.7, out)
        assert value == pytest.approx(0.7 + r + np.log(scipy.special.i0e(r)), rel=1e-12, abs=1e-12)
        mean = scipy.special.i1e(r) / scipy.special.i0e(r)
        assert out == pytest.approx([mean * np.cos(angle), mean * np.sin(angle)], abs=1e-11)
    for _ in range(400):
        scale = 10 ** rng.uniform(0, 6.5)
        a, b = rng.normal(size=2) * scale
        c, d = rng.normal(size=2) * scale * 10 ** rng.uniform(-3, 0.5)
        k = _grid_size(np.hypot(a, b)) + 2 * _grid_size(np.hypot(c, d))
        chi = 2 * np.pi * np.arange(k) / k
        f = a * np.cos(chi) + b * np.sin(chi) + c * np.cos(2 * chi) + d * np.sin(2 * chi)
        w = np.exp(f - f.max())
        value = _grid_moments(a, b, c, d, -1.3, out)
        assert value == pytest.approx(-1.3 + f.max() + np.log(w.mean()), rel=1e-13, abs=1e-10)
        assert out == pytest.approx([(w * np.cos(chi)).sum() / w.sum(), (w * np.sin(chi)).sum() / w.sum()],
                                    abs=1e-10)


def test_uncorrelated_likelihood_reproduces_per_pulsar_likelihood():
    """Γ = identity: the correlated likelihood (mean field with zero coupling) equals the existing
    per-pulsar likelihood with the common process in each Fourier prior (consistency check)."""
    from cwsearch.inference.likelihood import Likelihood

    arr = _array(seed=41, n_pulsars=4, design=False, sigma=1e-7)
    k = SETTINGS.red_components
    aw = ArrayWeighting(arr, SETTINGS, CommonProcess(-13.6, 13 / 3, k, "uncorrelated"))
    per = Likelihood(arr, NoiseWeighting(arr, NoiseSettings(red_components=k, common_log10_amplitude=-13.6)),
                     shape_path="direct")
    mine = CorrelatedLikelihood(arr, aw)
    rng = np.random.default_rng(3)
    theta = np.column_stack([rng.uniform(0, 6, 6), rng.uniform(-1, 1, 6), rng.uniform(-8.5, -7.7, 6),
                             np.full(6, 8.7), np.full(6, -13.2), rng.uniform(-1, 1, 6), rng.uniform(0, 3, 6),
                             rng.uniform(0, 3, 6)])
    np.testing.assert_allclose(mine.batch(theta), per.batch(theta), rtol=1e-8, atol=1e-8)


def test_correlated_terms_equal_the_dense_cross_products():
    """The half-triangle products of ``correlated_terms`` (Ω_pq for p ≤ q, mirrored) against the
    full dense form written from its definition: Ω = Bᵀ Ψ B with B the block-diagonal stack of
    β_p, ε = Σ_j earth_j β_j; corrections ½ εᵀΨε, β_Pᵀ(Ψε), Ω_pp[PP] and Ω_pq[PP] (p ≠ q)."""
    from cwsearch.inference.correlated_likelihood import correlated_terms

    rng = np.random.default_rng(5)
    n_w, n_psr, n_c = 7, 6, 8
    root = rng.normal(size=(n_psr * n_c, n_psr * n_c))
    psi = root @ root.T / (n_psr * n_c)
    earth = rng.normal(size=(n_w, n_psr, 2))
    dvec = rng.normal(size=(n_w, n_psr, 4))
    gmat = rng.normal(size=(n_w, n_psr, 4, 4))
    beta = rng.normal(size=(n_w, n_psr, n_c, 4))
    got_d, got_g, got_e, got_x = correlated_terms(psi, earth, dvec, gmat, beta)
    for w in range(n_w):
        spread = scipy.linalg.block_diag(*beta[w])                      # (P·2K, P·4)
        omega = (spread.T @ psi @ spread).reshape(n_psr, 4, n_psr, 4)
        eps = np.concatenate([beta[w, p, :, :2] @ earth[w, p] for p in range(n_psr)])
        psi_eps = (psi @ eps).reshape(n_psr, n_c)
        assert got_e[w] == pytest.approx(0.5 * eps @ psi @ eps, rel=1e-12)
        for p in range(n_psr):
            np.testing.assert_allclose(got_d[w, p, 2:], dvec[w, p, 2:] + beta[w, p, :, 2:].T @ psi_eps[p], rtol=1e-12)
            np.testing.assert_allclose(got_g[w, p, 2:, 2:], gmat[w, p, 2:, 2:] - omega[p, 2:, p, 2:], rtol=1e-12,
                                       atol=1e-12)
            for q in range(n_psr):
                want = np.zeros((2, 2)) if p == q else omega[p, 2:, q, 2:]
                np.testing.assert_allclose(got_x[w, p, q], want, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("evolution", ["full", "monochromatic"])
def test_node_shape_path_equals_direct_path(evolution):
    """Basis products at Chebyshev nodes (with the cached Lᵀ K⁻¹ F) against the TOA-by-TOA
    path: ln Λ and β = Fᵀ K⁻¹ b agree to 1e-8 relative (interpolation error bound 1e-13 of the
    amplitude, docs/design.md §7); walkers spread over frequencies so that several node
    levels (and the direct path for the highest) occur in one batch."""
    arr, common, aw, *_ = _likelihood_setup(evolution)
    direct = CorrelatedLikelihood(arr, aw, evolution=evolution, shape_path="direct")
    nodes = CorrelatedLikelihood(arr, aw, evolution=evolution, shape_path="nodes")
    rng = np.random.default_rng(8)
    n = 12
    theta = np.column_stack([rng.uniform(0, 6, n), rng.uniform(-1, 1, n), np.linspace(-8.9, -7.0, n),
                             rng.uniform(8.0, 9.3, n), np.full(n, -14.0), rng.uniform(-1, 1, n),
                             rng.uniform(0, 3, n), rng.uniform(0, 3, n)])
    par = direct.physical(theta)
    levels = nodes._node_count(np.pi * par["gw_frequency"], np.zeros(n))
    assert np.unique(levels).size >= 3
    want = direct.batch(theta)
    got = nodes.batch(theta)
    np.testing.assert_allclose(got, want, rtol=1e-8, atol=1e-8 * np.abs(want).max())
    args = (par["ra"], par["dec"], par["gw_frequency"], par["chirp_mass"])
    beta_d = direct.correlated_shape_batch(*args)[4]
    beta_n = nodes.correlated_shape_batch(*args)[4]
    np.testing.assert_allclose(beta_n, beta_d, rtol=1e-8, atol=1e-8 * np.abs(beta_d).max())


@pytest.mark.parametrize("kind", ["hellings-downs", "dipole"])
def test_woodbury_matrix_built_in_small_chunks_equals_dense(kind):
    """S̃ formed one Γ-mode column block at a time (so the sums over pulsars start at the first
    non-zero row of the triangular Cholesky factor of Γ; dipole: its eigen-factor, not
    triangular) gives the dense log det(GᵀCG) (numpy.linalg.slogdet) and (d|d)_C to 1e-8."""
    arr = _array(seed=9, n_pulsars=5)
    common = CommonProcess(-13.7, 13 / 3, 6, kind)
    aw = ArrayWeighting(arr, SETTINGS, common)
    aw._factorise(chunk_elements=1)
    dense = _Dense(arr, SETTINGS, common, aw.correlation)
    sign, logdet = np.linalg.slogdet(dense.gcg)
    assert sign > 0
    assert aw.logdet() == pytest.approx(logdet, rel=RTOL)
    gd = dense.g.T @ dense.stack([p.residuals for p in arr])[:, 0]
    assert aw.data_norm() == pytest.approx(float(gd @ np.linalg.solve(dense.gcg, gd)), rel=RTOL)


@pytest.mark.parametrize("kind", ["hellings-downs", "monopole"])
def test_correction_matrix_equals_dense_inverse(kind):
    """Ψ = (Φ⁻¹ + E)⁻¹, E = FᵀK⁻¹F (Woodbury identity, docs/design.md §5b), from numpy.linalg.inv
    of the dense matrices; for the singular monopole Γ the equivalent Φ (I + E Φ)⁻¹ (push-through
    identity). E block-diagonal from the per-pulsar engine's inner products of each Fourier basis."""
    arr = _array(seed=12, n_pulsars=5)
    aw = ArrayWeighting(arr, SETTINGS, CommonProcess(-13.8, 13 / 3, 4, kind))
    phi = aw.dense_covariance_blocks()
    e = scipy.linalg.block_diag(*[w.inner(fb) for w, fb in zip(aw.engine, aw.fourier)])
    if kind == "hellings-downs":
        want = np.linalg.inv(np.linalg.inv(phi) + e)
    else:
        want = phi @ np.linalg.inv(np.eye(phi.shape[0]) + e @ phi)
    got = aw.correction_matrix()
    np.testing.assert_allclose(got, want, rtol=1e-8, atol=1e-8 * np.abs(want).max())


def test_weighted_fourier_equals_dense():
    """K_p⁻¹ F_p of the scan corrections and the likelihood against the dense G-projected inverse
    G (GᵀKG)⁻¹ Gᵀ of each pulsar's own covariance (van Haasteren & Vallisneri 2014), K written out
    by ``_dense`` with the common process switched off (log10 A = −30: φ below 1e-50 s²)."""
    arr = _array(seed=4)
    aw = ArrayWeighting(arr, SETTINGS, CommonProcess(-13.7, 13 / 3, 6))
    dense = _Dense(arr, SETTINGS, CommonProcess(-30.0, 13 / 3, 6), np.eye(len(arr)))
    for p, got in enumerate(aw.weighted_fourier()):
        lo, hi = dense.offsets[p], dense.offsets[p + 1]
        want = dense.inv[lo:hi, lo:hi] @ aw.fourier[p]
        np.testing.assert_allclose(got, want, rtol=RTOL, atol=RTOL * np.abs(want).max())


def test_large_factorisation_on_every_core_gives_the_same_numbers(monkeypatch):
    # From THREADED_CHOLESKY_SIZE on, S~ is factorised with threaded BLAS; the numbers must not depend on it
    # (common practice, no source): log det and (d|d)_C against the one-thread factorisation, 1e-12 relative.
    from cwsearch.physics import correlated
    from cwsearch.physics.correlated import ArrayWeighting, CommonProcess
    from cwsearch.physics.noise import NoiseSettings
    from cwsearch.physics.simulate import invented_array, simulated_array

    arr = simulated_array(invented_array(n_pulsars=36, years=10, seed=8, toas_per_pulsar=40), seed=9,
                          background_log10_amplitude=-14.0, background_components=30)
    common = CommonProcess(-14.0, 13 / 3, 30, "hellings-downs")
    threaded = ArrayWeighting(arr, NoiseSettings(red_components=30), common)
    assert 36 * 60 >= correlated.THREADED_CHOLESKY_SIZE
    monkeypatch.setattr(correlated, "THREADED_CHOLESKY_SIZE", 10**9)
    single = ArrayWeighting(arr, NoiseSettings(red_components=30), common)
    np.testing.assert_allclose(threaded.logdet(), single.logdet(), rtol=1e-12)
    np.testing.assert_allclose(threaded.data_norm(), single.data_norm(), rtol=1e-12)


@pytest.mark.parametrize("evolution", ["full", "monochromatic"])
def test_polarisation_phase_symmetry_is_exact_for_both_likelihoods(evolution):
    """(ψ, Φ0) → (ψ + π/2, Φ0 + π/2) leaves a circular binary's signal unchanged: both polarisations
    change sign twice (antenna patterns rotate by 2ψ, the GW phase is 2Φ; standard quadrupole
    waveform, common practice, no source). The follow-up's exact symmetry move relies on it: the
    marginalised likelihood, plain and correlated, must agree to 1e-9."""
    from cwsearch.inference.likelihood import Likelihood
    from cwsearch.stages.followup.stage import Prior

    arr, common, aw, shape, proj, strain = _likelihood_setup(evolution=evolution)
    rng = np.random.default_rng(5)
    theta = np.column_stack([rng.uniform(0, 6, 8), rng.uniform(-1, 1, 8), rng.uniform(-8.2, -7.8, 8),
                             rng.uniform(8, 9.3, 8), np.full(8, np.log10(strain)), rng.uniform(-1, 1, 8),
                             rng.uniform(0, np.pi, 8), rng.uniform(0, np.pi, 8)])
    for like in (CorrelatedLikelihood(arr, aw, evolution=evolution),
                 Likelihood(arr, NoiseWeighting(arr, NoiseSettings(red_components=SETTINGS.red_components)),
                            evolution=evolution)):
        moved = theta.copy()
        Prior(like, (-8.3, -7.7)).exact_symmetry(moved, np.random.default_rng(1))
        assert np.sum(moved[:, 6] != theta[:, 6]) >= 2          # the move did act on some walkers
        assert np.all((moved[:, 6:] >= 0) & (moved[:, 6:] < np.pi))
        np.testing.assert_allclose(like.batch(moved), like.batch(theta), rtol=1e-9, atol=1e-9)
