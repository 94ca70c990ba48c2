"""Tests of the joint likelihood of several binaries (cwsearch.inference.multisource, docs/design.md §7a).

Check values come from outside the module: the single-source likelihood of
cwsearch.inference.likelihood (itself checked against scipy in tests/test_likelihood.py) for K = 1;
for K = 2 a dense evaluation built here from scratch, the covariance C = N + F φ Fᵀ written out,
the timing model projected out with G (van Haasteren & Vallisneri 2014, Phys. Rev. D 90, 104012),
solved with scipy.linalg, the signal rebuilt with waveform.residuals at explicit pulsar phases, and
each pulsar's two pulsar-term phases integrated by scipy.integrate.dblquad (the reference).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, linalg

from cwsearch.core.constants import YEAR_SECONDS
from cwsearch.inference.correlated_likelihood import CorrelatedLikelihood
from cwsearch.inference.likelihood import Likelihood
from cwsearch.inference.multisource import MultiSourceLikelihood, joint_log_factor
from cwsearch.physics import waveform
from cwsearch.physics.correlated import CommonProcess
from cwsearch.physics.noise import NoiseSettings
from cwsearch.physics.simulate import Binary, invented_array, simulate_residuals

NOISE = NoiseSettings(red_components=6)
SOURCES = [Binary(ra=1.1, dec=-0.3, gw_frequency=1.3e-8, chirp_mass=8e8, strain=3e-14, inclination=0.7,
                  polarization=0.4, phase=1.1),
           Binary(ra=4.0, dec=0.6, gw_frequency=2.2e-8, chirp_mass=5e8, strain=2.5e-14, inclination=2.0,
                  polarization=2.2, phase=0.3)]


@pytest.fixture(scope="module")
def small_array():
    base = invented_array(n_pulsars=5, years=10, seed=31, toas_per_pulsar=60, red_noise_fraction=1.0)
    return base.with_residuals(simulate_residuals(base, seed=32, binaries=SOURCES))


def _theta(binary):
    return [binary.ra, np.sin(binary.dec), np.log10(binary.gw_frequency), np.log10(binary.chirp_mass),
            np.log10(binary.strain), np.cos(binary.inclination), binary.polarization, binary.phase]


def _random_theta(rng, n):
    return np.column_stack([rng.uniform(0, 2 * np.pi, n), rng.uniform(-1, 1, n),
                            np.log10(rng.uniform(5e-9, 3e-8, n)), rng.uniform(7.5, 9.2, n),
                            rng.uniform(-14.8, -13.6, n), rng.uniform(-1, 1, n), rng.uniform(0, np.pi, n),
                            rng.uniform(0, np.pi, n)])


@pytest.mark.parametrize("correlated", [False, True], ids=["per-pulsar noise", "Hellings-Downs"])
def test_one_source_equals_single_source_likelihood(small_array, correlated):
    """K = 1: the joint likelihood is the single-source one (same kernels) to 1e-10 relative."""
    base = (CorrelatedLikelihood(small_array, NOISE, CommonProcess(-14.3, components=6)) if correlated
            else Likelihood(small_array, NOISE))
    theta = _random_theta(np.random.default_rng(1), 48)
    want = base.batch(theta)
    got = MultiSourceLikelihood(base, 1).batch(theta)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=0)


def _dense_weight(psr, start, span, settings):
    """W = G (Gᵀ C G)⁻¹ Gᵀ of one pulsar from scratch: C = white (per-backend scale and added term) +
    power-law red noise on the first ``red_components`` harmonics of 1/span (power-law form common
    practice), G the orthonormal complement of the design matrix (numpy SVD), solved with scipy."""
    t = psr.mjd * 86400.0
    scale = np.array([psr.noise.sigma_scale.get(b, 1.0) for b in psr.backends])
    added = np.array([psr.noise.sigma_added.get(b, 0.0) for b in psr.backends])
    cov = np.diag((scale * psr.sigmas) ** 2 + added ** 2)
    f_yr = 1.0 / YEAR_SECONDS
    freqs = np.arange(1, settings.red_components + 1) / span
    if settings.pulsar_red_noise and psr.noise.has_red_noise:
        phi = (10 ** (2 * psr.noise.red_log10_amplitude) / (12 * np.pi ** 2)
               * (freqs / f_yr) ** (-psr.noise.red_index) * f_yr ** -3 / span)
        for f, var in zip(freqs, phi):
            for col in (np.sin(2 * np.pi * f * (t - start)), np.cos(2 * np.pi * f * (t - start))):
                cov += var * np.outer(col, col)
    u_, _, _ = np.linalg.svd(psr.design_matrix, full_matrices=True)
    g = u_[:, psr.design_matrix.shape[1]:]
    return g @ linalg.cho_solve(linalg.cho_factor(g.T @ cov @ g), g.T)


def _pulsar_phase_series(psr, array, binary):
    """Earth term E and the pulsar-term series P_c, P_s of one source in one pulsar, so that the
    residual at pulsar phase Φp is E + cos(2Φp) P_c + sin(2Φp) P_s (waveform.residuals at Φp = 0, π/4)."""
    kwargs = dict(ra=binary.ra, dec=binary.dec, gw_frequency=binary.gw_frequency, chirp_mass=binary.chirp_mass,
                  strain=binary.strain, inclination=binary.inclination, polarization=binary.polarization,
                  phase=binary.phase, reference_time=array.reference_time)
    earth = waveform.residuals(psr.toas, psr.position, psr.distance, pulsar_term=False, **kwargs)
    at0 = waveform.residuals(psr.toas, psr.position, psr.distance, pulsar_phase=0.0, **kwargs) - earth
    at45 = waveform.residuals(psr.toas, psr.position, psr.distance, pulsar_phase=np.pi / 4, **kwargs) - earth
    return earth, at0, at45


def test_two_sources_equal_dense_quadrature(small_array):
    """K = 2, per-pulsar noise: ln Λ = Σ_p ln (1/π²) ∫∫ exp((d|s) − ½(s|s)) dΦ1 dΦ2 with the dense
    covariance (scipy.linalg) and scipy.integrate.dblquad over both pulsar phases, to 1e-6."""
    arr = small_array
    binaries = [Binary(**{**SOURCES[0].__dict__, "strain": 4e-14}),
                Binary(**{**SOURCES[1].__dict__, "gw_frequency": 1.55e-8, "strain": 3e-14})]
    joint = MultiSourceLikelihood(Likelihood(arr, NOISE), 2)
    theta = np.array([_theta(binaries[0]) + _theta(binaries[1])])
    got = float(joint.batch(theta)[0])
    want = 0.0
    for psr in arr:
        weight = _dense_weight(psr, arr.start, arr.span, NOISE)
        series = [_pulsar_phase_series(psr, arr, b) for b in binaries]
        d = psr.residuals

        def log_like(phi1, phi2):
            s = sum(e + np.cos(2 * f) * c + np.sin(2 * f) * q for (e, c, q), f in zip(series, (phi1, phi2)))
            ws = weight @ s
            return d @ ws - 0.5 * s @ ws

        grid = np.linspace(0, np.pi, 33)
        top = max(log_like(a, b) for a in grid for b in grid)
        value, err = integrate.dblquad(lambda y, x: np.exp(log_like(x, y) - top), 0, np.pi, 0, np.pi,
                                       epsabs=0, epsrel=1e-11)
        want += top + np.log(value / np.pi ** 2)
    assert got == pytest.approx(want, rel=1e-6)


def test_joint_log_factor_against_brute_force_grid():
    """joint_log_factor with strong couplings (K = 2 and 3) against a dense product trapezoid grid
    (exponentially convergent for periodic integrands; numpy only), to 1e-9."""
    rng = np.random.default_rng(5)
    for k in (2, 3):
        lin = rng.normal(0, 3, (k, 2))
        quad = rng.normal(0, 1, (k, 2))
        coup = np.zeros((k, k, 2, 2))
        for a in range(k):
            for b in range(a + 1, k):
                coup[a, b] = rng.normal(0, 1.5, (2, 2))
        n = 160 if k == 2 else 72
        x = 2 * np.pi * np.arange(n) / n
        grids = np.meshgrid(*([x] * k), indexing="ij")
        f = np.zeros_like(grids[0]) + 0.7
        for a in range(k):
            c, s = np.cos(grids[a]), np.sin(grids[a])
            f += lin[a, 0] * c + lin[a, 1] * s + quad[a, 0] * np.cos(2 * grids[a]) + quad[a, 1] * np.sin(2 * grids[a])
            for b in range(a + 1, k):
                cb, sb = np.cos(grids[b]), np.sin(grids[b])
                f += c * (coup[a, b, 0, 0] * cb + coup[a, b, 0, 1] * sb) + s * (coup[a, b, 1, 0] * cb
                                                                              + coup[a, b, 1, 1] * sb)
        top = f.max()
        want = top + np.log(np.mean(np.exp(f - top)))
        assert joint_log_factor(lin, quad, 0.7, coup, 0) == pytest.approx(want, rel=1e-9, abs=1e-9)


def _grid_log_mean(lin, quad, const, coup, n):
    """ln of the mean of exp(F) on an n × n periodic grid (numpy, row by row)."""
    x = 2 * np.pi * np.arange(n) / n
    cb, sb = np.cos(x), np.sin(x)
    own_b = lin[1, 0] * cb + lin[1, 1] * sb + quad[1, 0] * np.cos(2 * x) + quad[1, 1] * np.sin(2 * x)
    rows = []
    for a in x:
        ca, sa = np.cos(a), np.sin(a)
        f = (const + lin[0, 0] * ca + lin[0, 1] * sa + quad[0, 0] * np.cos(2 * a) + quad[0, 1] * np.sin(2 * a)
             + own_b + ca * (coup[0, 1, 0, 0] * cb + coup[0, 1, 0, 1] * sb)
             + sa * (coup[0, 1, 1, 0] * cb + coup[0, 1, 1, 1] * sb))
        top = f.max()
        rows.append((top, np.log(np.mean(np.exp(f - top)))))
    tops = np.array([r[0] for r in rows])
    logs = np.array([r[1] for r in rows])
    top = tops.max()
    return top + np.log(np.mean(np.exp(tops - top + logs)))


def test_joint_laplace_regime_close_to_grid():
    """Very peaked integrand (amplitudes of ~3e4 nats, beyond LAPLACE_AMPLITUDE): Laplace's method over
    the local maxima against a fine brute-force grid (numpy; 4000 points per phase, about four per peak
    width 1/√amplitude), to 1e-4 relative of the amplitude."""
    lin = 10 * np.array([[2500.0, -1500.0], [900.0, 2000.0]])
    quad = 10 * np.array([[-300.0, 100.0], [50.0, -200.0]])
    coup = np.zeros((2, 2, 2, 2))
    coup[0, 1] = 10 * np.array([[400.0, -100.0], [50.0, 300.0]])
    want = _grid_log_mean(lin, quad, 0.0, coup, 4000)
    got = joint_log_factor(lin, quad, 0.0, coup, 0)
    assert abs(got - want) < 1e-4 * np.abs(lin).sum()


def test_flat_peak_of_a_moderate_amplitude():
    """A pulsar of the demo bench where the loud source's linear and quadratic terms nearly cancel at the
    peak (amplitude ~175 nats, a flat maximum): an earlier Laplace shortcut gave 342 nats instead of 0.2.
    Against the dense grid (numpy), to 1e-9."""
    lin = np.array([[-64.43040474668541, -120.94051644448248], [1.8894474879793761, -2.166515229708859]])
    quad = np.array([[20.520437425566904, -30.06441858995222], [0.01296469995384619, 0.0633181921649516]])
    coup = np.zeros((2, 2, 2, 2))
    coup[0, 1] = [[-0.1372720969313973, 0.7357797348976823], [-0.6748906383583679, 0.543862957260382]]
    want = _grid_log_mean(lin, quad, -1.0, coup, 600)
    assert joint_log_factor(lin, quad, -1.0, coup, 0) == pytest.approx(want, rel=1e-9, abs=1e-9)


@pytest.mark.parametrize("path", ["nodes", "direct"])
def test_cross_products_equal_dense_inner_products(small_array, path):
    """The cross products (b_k|b_l) of two sources, on the node path and the TOA-by-TOA path, equal the
    dense inner products dᵀ W s of the basis series from waveform.residual_basis (scipy.linalg), 1e-7."""
    arr = small_array
    base = Likelihood(arr, NOISE, shape_path=path)
    joint = MultiSourceLikelihood(base, 2)
    terms = []
    for b in SOURCES:
        terms.append(base.shape_terms(np.array([b.ra]), np.array([b.dec]), np.array([b.gw_frequency]),
                                      np.array([b.chirp_mass]))[2])
    got = joint.cross_products(*terms)[0]
    for p, psr in enumerate(arr):
        weight = _dense_weight(psr, arr.start, arr.span, NOISE)
        bases = []
        for b in SOURCES:
            _, _, odp = waveform.antenna_pattern(b.ra, b.dec, arr.positions)
            bases.append(waveform.residual_basis(psr.toas, arr.reference_time, b.gw_frequency, b.chirp_mass,
                                                 psr.distance, odp[p])[0])
        want = bases[0].T @ weight @ bases[1]
        np.testing.assert_allclose(got[p], want, rtol=1e-7, atol=1e-7 * np.abs(want).max())


def test_correlated_earth_term_equals_dense_array_inner(small_array):
    """Hellings–Downs background, Earth term only (no phases to marginalise): ln Λ of two sources equals
    (d|s) − ½(s|s) through the array covariance's own dense inner product (ArrayWeighting.inner, checked
    against a dense array covariance in tests/test_correlated.py), to 1e-8."""
    base = CorrelatedLikelihood(small_array, NOISE, CommonProcess(-14.3, components=6), pulsar_term=False)
    joint = MultiSourceLikelihood(base, 2)
    theta = np.array([_theta(SOURCES[0]) + _theta(SOURCES[1])])
    assert float(joint.batch(theta)[0]) == pytest.approx(joint.reference(theta), rel=1e-8)


def test_correlated_mean_field_is_a_close_lower_bound():
    """Hellings–Downs background, pulsar terms, 2 pulsars x 2 sources: the mean-field value is a lower
    bound of the exact 4-phase integral (Gibbs–Bogoliubov; Wainwright & Jordan 2008 §5) within 0.1 nats.
    The exact value: the signal at explicit pulsar phases is E + Σ (cos 2Φ P_c + sin 2Φ P_s) (series from
    waveform.residuals), so ln Λ is a quadratic form in (1, cos 2Φ, sin 2Φ) with the products of the array
    covariance's dense inner product (ArrayWeighting.inner); exp of it summed on a 28⁴ periodic grid."""
    base = invented_array(n_pulsars=2, years=10, seed=41, toas_per_pulsar=40, red_noise_fraction=0.0)
    arr = base.with_residuals(simulate_residuals(base, seed=42, binaries=SOURCES))
    settings = NoiseSettings(red_components=4, pulsar_red_noise=False)
    like = CorrelatedLikelihood(arr, settings, CommonProcess(-14.0, components=4))
    joint = MultiSourceLikelihood(like, 2)
    theta = np.array([_theta(SOURCES[0]) + _theta(SOURCES[1])])
    got = float(joint.batch(theta)[0])
    zero = [np.zeros(p.n_toas) for p in arr]
    vectors = [[sum(_pulsar_phase_series(psr, arr, b)[0] for b in SOURCES) for psr in arr]]
    for b in SOURCES:
        for i, psr in enumerate(arr):
            _, pc, ps = _pulsar_phase_series(psr, arr, b)
            for series in (pc, ps):
                vectors.append([series if j == i else zero[j] for j in range(len(arr))])
    data = [p.residuals for p in arr]
    dvec = np.array([like.weighting.inner(data, v) for v in vectors])
    gram = np.array([[like.weighting.inner(a, b) for b in vectors] for a in vectors])
    n = 28
    x = np.pi * np.arange(n) / n                 # the pulsar phase Φp enters as 2Φp: period π
    grids = np.meshgrid(*([x] * 4), indexing="ij")
    coef = [np.ones_like(grids[0])]
    for g in grids:                              # unit order as the vectors: source 1 (pulsars 1, 2), source 2
        coef += [np.cos(2 * g), np.sin(2 * g)]
    coef = np.stack(coef, axis=-1)
    values = coef @ dvec - 0.5 * np.einsum("...i,ij,...j->...", coef, gram, coef)
    top = values.max()
    exact = top + np.log(np.mean(np.exp(values - top)))
    assert got <= exact + 1e-6
    assert exact - got < 0.1
