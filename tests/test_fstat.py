"""F-statistics: null and signal distributions, fast kernels against references, degenerate geometry.

Check values come from outside the project: the χ² / non-central χ²
distributions of Fe and Fp (Ellis, Siemens & Creighton 2012, ApJ 756, 175)
tested with scipy.stats; numpy's sin/cos; a dense explicit-inverse
reference using the G-projection form of the timing-model-marginalised
covariance (van Haasteren & Vallisneri 2014, Phys. Rev. D 90, 104012).
Arrays are small invented ones (never check values themselves).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import linalg, stats

from cwsearch.physics import fstat
from cwsearch.physics.noise import NoiseSettings, NoiseWeighting, fourier_basis, powerlaw_variance
from cwsearch.physics.simulate import Binary, binary_residuals, invented_array, simulate_residuals

KS_P_MIN = 1e-3   # fixed seeds; a correct distribution fails this one time in a thousand


def _small_array(n_pulsars=6, toas=100, seed=5, red=0.5):
    return invented_array(n_pulsars=n_pulsars, years=10, seed=seed, toas_per_pulsar=toas,
                          red_noise_fraction=red, full_span=True)


def _null_projections(arr, frequencies, n_sims, seed, signals=None):
    """Projections of ``n_sims`` noise-only (plus optional fixed signal) residual sets."""
    rng = np.random.default_rng(seed)
    sims = []
    for _ in range(n_sims):
        res = simulate_residuals(arr, rng)
        if signals is not None:
            res = [r + s for r, s in zip(res, signals)]
        sims.append(res)
    sets = [np.stack([s[p] for s in sims], axis=1) for p in range(len(arr))]
    engine = NoiseWeighting(arr, NoiseSettings())
    return engine, fstat.project_batch(engine, frequencies, sets)


# ---------------------------------------------------------------- kernels vs references
def test_rotation_stepped_sines_match_numpy():
    # reference: numpy sin/cos of the exact argument; realistic TOAs (MJD ~ 55000 in seconds), 500 bins
    rng = np.random.default_rng(1)
    toas = np.sort(rng.uniform(53000, 58500, 300)) * 86400.0
    t0 = toas[0]
    span = toas[-1] - t0
    freqs = 1 / span + np.arange(500) / (2 * span)
    fast = fstat.sine_cosine_matrix(toas, t0, freqs)
    sin, cos = fstat.sine_cosine_basis(toas, t0, freqs)
    assert np.max(np.abs(fast[:, :500] - sin)) < 1e-9
    assert np.max(np.abs(fast[:, 500:] - cos)) < 1e-9
    # a non-uniform grid takes the exact path
    odd = np.array([3e-9, 4e-9, 7e-9])
    fast = fstat.sine_cosine_matrix(toas, t0, odd)
    sin, cos = fstat.sine_cosine_basis(toas, t0, odd)
    assert np.allclose(fast, np.hstack([sin, cos]), rtol=0, atol=1e-12)


def _dense_inverse(engine, w):
    """Explicit C⁻¹ restricted off the timing model: G (Gᵀ C G)⁻¹ Gᵀ (van Haasteren & Vallisneri 2014)."""
    psr = w.pulsar
    arr = engine.array
    settings = engine.settings
    sig = psr.effective_sigmas()
    cov = np.diag(sig**2)
    k = settings.red_components
    freqs = np.arange(1, k + 1) / arr.span
    phi = np.zeros(k)
    if psr.noise.has_red_noise:
        phi += powerlaw_variance(freqs, psr.noise.red_log10_amplitude, psr.noise.red_index, arr.span)
    if settings.common_log10_amplitude is not None:
        phi += powerlaw_variance(freqs, settings.common_log10_amplitude, settings.common_index, arr.span)
    basis = fourier_basis(psr.toas, arr.start, arr.span, k)
    cov += basis @ np.diag(np.repeat(phi, 2)) @ basis.T
    g = linalg.null_space(psr.design_matrix.T)
    return g @ np.linalg.inv(g.T @ cov @ g) @ g.T


@pytest.mark.parametrize("toa_block", [512, 7])
def test_fast_scan_equals_dense_reference(toa_block, monkeypatch):
    # reference: dense explicit inverse, every inner product and the 4x4 solve recomputed per pixel;
    # toa_block 7: the projections summed over several blocks of TOAs (40 TOAs: 6 blocks, a short last one)
    monkeypatch.setattr(fstat, "PROJECTION_TOA_BLOCK", toa_block)
    arr = invented_array(n_pulsars=3, years=8, seed=7, toas_per_pulsar=40, red_noise_fraction=1.0)
    arr = arr.with_residuals(simulate_residuals(arr, 8))
    settings = NoiseSettings(red_components=8, common_log10_amplitude=-14.3)
    engine = NoiseWeighting(arr, settings)
    freqs = 1 / arr.span + np.arange(5) / (2 * arr.span)
    ra = np.array([0.3, 2.5, 4.0])
    dec = np.array([0.1, -0.9, 1.2])
    proj = fstat.project(engine, freqs)
    fplus, fcross = fstat.sky_patterns(proj, ra, dec)
    fast = fstat.fe_statistic(proj, fplus, fcross)
    fast_fp = fstat.fp_statistic(proj)

    inverses = [_dense_inverse(engine, w) for w in engine]
    t0 = arr.reference_time
    for s in range(ra.size):
        for j, f in enumerate(freqs):
            nvec = np.zeros(4)
            mmat = np.zeros((4, 4))
            fp_ref = 0.0
            for p, (psr, cinv) in enumerate(zip(arr, inverses)):
                arg = 2 * np.pi * f * (psr.toas - t0)
                sin, cos = np.sin(arg), np.cos(arg)
                x, y = psr.residuals @ cinv @ sin, psr.residuals @ cinv @ cos
                z = np.array([[sin @ cinv @ sin, sin @ cinv @ cos], [cos @ cinv @ sin, cos @ cinv @ cos]])
                a, b = fplus[s, p], fcross[s, p]
                nvec += np.array([a * x, a * y, b * x, b * y])
                mmat += np.kron(np.array([[a * a, a * b], [a * b, b * b]]), z)
                fp_ref += 0.5 * np.array([x, y]) @ np.linalg.solve(z, np.array([x, y]))
            fe_ref = 0.5 * nvec @ np.linalg.solve(mmat, nvec)
            assert fast[s, j] == pytest.approx(fe_ref, rel=1e-6)
            if s == 0:
                assert fast_fp[j] == pytest.approx(fp_ref, rel=1e-6)


def test_batched_sky_kernel_equals_per_pixel_kernel():
    # the GEMM + LDL path against the direct per-pixel loop kept for amplitudes (same model, other code path)
    arr = _small_array(n_pulsars=5, toas=60)
    arr = arr.with_residuals(simulate_residuals(arr, 3))
    engine = NoiseWeighting(arr, NoiseSettings())
    proj = fstat.project(engine, 1 / arr.span + np.arange(40) / (2 * arr.span))
    ra, dec = np.random.default_rng(2).uniform(0, 2 * np.pi, 30), np.random.default_rng(3).uniform(-1.5, 1.5, 30)
    fplus, fcross = fstat.sky_patterns(proj, ra, dec)
    fe_fast = fstat.fe_statistic(proj, fplus, fcross)
    fe_loop, _ = fstat.fe_with_amplitudes(proj, fplus, fcross)
    np.testing.assert_allclose(fe_fast, fe_loop, rtol=1e-9, atol=1e-12)


# ---------------------------------------------------------------- distributions (Ellis, Siemens & Creighton 2012)
@pytest.fixture(scope="module")
def null_batch():
    arr = _small_array()
    freqs = 1 / arr.span + np.arange(12) / arr.span
    engine, proj = _null_projections(arr, freqs, 500, seed=21)
    return arr, engine, proj


def test_fe_null_is_chi2_4_at_fixed_template(null_batch):
    # 2Fe ~ chi2(4) in noise (Ellis, Siemens & Creighton 2012), KS test against scipy.stats.chi2
    arr, _, proj = null_batch
    fplus, fcross = fstat.sky_patterns(proj, np.array([1.1]), np.array([0.4]))
    k = 5
    sub = fstat.Projections(proj.frequencies[k:k + 1], proj.x[:, :, k:k + 1], proj.y[:, :, k:k + 1],
                            proj.z[:, k:k + 1], proj.positions, proj.z_scale)
    fe = fstat.fe_sky(sub, fplus, fcross, keep_map=False).fe_max[:, 0]
    assert stats.kstest(2 * fe, stats.chi2(4).cdf).pvalue > KS_P_MIN


def test_fp_null_is_chi2_2n(null_batch):
    # 2Fp ~ chi2(2 N_psr) in noise (Ellis, Siemens & Creighton 2012), KS test against scipy.stats.chi2
    arr, _, proj = null_batch
    fp = fstat.fp_statistic(proj)                      # (B, F)
    k = 7
    assert fstat.fp_degrees_of_freedom(proj)[k] == 2 * len(arr)
    assert stats.kstest(2 * fp[:, k], stats.chi2(2 * len(arr)).cdf).pvalue > KS_P_MIN


def test_fe_with_signal_is_noncentral_chi2():
    # mean of 2Fe at the true template = 4 + rho^2, rho^2 = sum_p (s|s) from the noise engine;
    # distribution ncx2(4, rho^2) (Ellis, Siemens & Creighton 2012; scipy.stats.ncx2)
    arr = _small_array(seed=9)
    f = 6 / arr.span
    binary = Binary(ra=2.2, dec=0.5, gw_frequency=f, chirp_mass=1e7, strain=1.0, inclination=1.0,
                    polarization=0.2, phase=0.7, evolution="monochromatic", pulsar_term=False)
    unit = binary_residuals(arr, binary)
    engine = NoiseWeighting(arr, NoiseSettings())
    rho_unit = engine.optimal_snr(unit)
    signals = [s * (3.0 / rho_unit) for s in unit]          # rho = 3
    rho2 = engine.optimal_snr(signals) ** 2
    n = 400
    _, proj = _null_projections(arr, np.array([f]), n, seed=33, signals=signals)
    fplus, fcross = fstat.sky_patterns(proj, binary.ra, binary.dec)
    two_fe = 2 * fstat.fe_sky(proj, fplus, fcross, keep_map=False).fe_max[:, 0]
    expected_mean = 4 + rho2
    sd_mean = np.sqrt(2 * (4 + 2 * rho2) / n)              # variance of ncx2(k, lam) is 2(k + 2 lam)
    assert abs(two_fe.mean() - expected_mean) < 4 * sd_mean
    assert stats.kstest(two_fe, stats.ncx2(4, rho2).cdf).pvalue > KS_P_MIN


def test_single_pulsar_fe_is_that_pulsars_fp():
    # one pulsar: M = K^T Z K has rank 2, the pseudo-inverse gives Fe = Fp of that pulsar, so 2Fe ~ chi2(2)
    # (algebra of the definitions in Ellis, Siemens & Creighton 2012; scipy.stats.chi2 for the KS test)
    arr = _small_array(n_pulsars=1, red=0.0)
    freqs = 1 / arr.span + np.arange(6) / arr.span
    _, proj = _null_projections(arr, freqs, 400, seed=4)
    fplus, fcross = fstat.sky_patterns(proj, np.array([0.5, 3.0]), np.array([0.2, -1.0]))
    fe = np.stack([fstat.fe_sky(proj, fplus[i:i + 1], fcross[i:i + 1], keep_map=False).fe_max for i in range(2)])
    fp = fstat.fp_statistic(proj)
    np.testing.assert_allclose(fe[0], fp, rtol=1e-7)
    np.testing.assert_allclose(fe[1], fp, rtol=1e-7)
    assert stats.kstest(2 * fe[0][:, 3], stats.chi2(2).cdf).pvalue > KS_P_MIN


def test_pulsar_aligned_with_or_opposite_to_source_gives_no_nan():
    # a pulsar exactly in the source direction (1 + Omega.p = 0) and one exactly opposite: finite Fe,
    # and the aligned pulsar contributes nothing (its full response vanishes, docs/design.md §4)
    src_ra, src_dec = 1.0, 0.3
    positions = (np.array([src_ra, src_ra + np.pi, 2.0, 4.0]), np.array([src_dec, -src_dec, -0.5, 0.9]))
    arr = invented_array(n_pulsars=4, years=8, seed=3, toas_per_pulsar=60, positions=positions)
    arr = arr.with_residuals(simulate_residuals(arr, 5))
    engine = NoiseWeighting(arr, NoiseSettings())
    proj = fstat.project(engine, 1 / arr.span + np.arange(4) / arr.span)
    fplus, fcross = fstat.sky_patterns(proj, np.array([src_ra]), np.array([src_dec]))
    assert fplus[0, 0] == 0 and fcross[0, 0] == 0
    assert abs(fplus[0, 1]) < 1e-12 and abs(fcross[0, 1]) < 1e-12
    fe = fstat.fe_statistic(proj, fplus, fcross)
    fe_amp, amp = fstat.fe_with_amplitudes(proj, fplus, fcross)
    assert np.all(np.isfinite(fe)) and np.all(np.isfinite(amp)) and np.all(fe >= 0)
    # without the two unhelpful pulsars the statistic is the same
    keep = fstat.Projections(proj.frequencies, proj.x[2:], proj.y[2:], proj.z[2:], proj.positions[2:],
                             proj.z_scale[2:])
    np.testing.assert_allclose(fe, fstat.fe_statistic(keep, fplus[:, 2:], fcross[:, 2:]), rtol=1e-9)
    # a one-pulsar array looking straight at the source: M = 0, Fe = 0 (not NaN)
    alone = fstat.Projections(proj.frequencies, proj.x[:1], proj.y[:1], proj.z[:1], proj.positions[:1],
                              proj.z_scale[:1])
    assert np.all(fstat.fe_statistic(alone, fplus[:, :1], fcross[:, :1]) == 0)


def test_timing_model_frequency_is_dropped_not_divided_by_zero():
    # at exactly 1/yr the yearly timing-model columns absorb the sinusoid: Z is rounding noise.
    # Fe, Fp stay finite and the degrees of freedom of 2Fp drop (common practice, no source)
    from cwsearch.core.constants import YEAR_FREQUENCY

    arr = _small_array(n_pulsars=3, red=0.0)
    arr = arr.with_residuals(simulate_residuals(arr, 2))
    engine = NoiseWeighting(arr, NoiseSettings())
    proj = fstat.project(engine, np.array([YEAR_FREQUENCY, 1.5 * YEAR_FREQUENCY]))
    assert fstat.fp_degrees_of_freedom(proj)[0] < 2 * len(arr)
    assert fstat.fp_degrees_of_freedom(proj)[1] == 2 * len(arr)
    fplus, fcross = fstat.sky_patterns(proj, np.array([0.4]), np.array([0.1]))
    assert np.all(np.isfinite(fstat.fe_statistic(proj, fplus, fcross)))
    assert np.all(np.isfinite(fstat.fp_statistic(proj)))
    assert fstat.fp_statistic(proj)[0] < 1.0


# ---------------------------------------------------------------- amplitudes
def test_amplitude_parameter_round_trip():
    # (h0, cos i, psi, Phi0) -> b -> back, on the fundamental domain psi in [0, pi/2), Phi0 in [0, pi)
    # (algebraic identity; common practice, no source)
    rng = np.random.default_rng(12)
    n = 200
    f = rng.uniform(2e-9, 1e-7, n)
    h0 = 10 ** rng.uniform(-16, -13, n)
    cos_inclination = rng.uniform(-0.98, 0.98, n)
    psi = rng.uniform(0, np.pi / 2, n)
    phase = rng.uniform(0, np.pi, n)
    b = fstat.parameters_to_amplitudes(h0, cos_inclination, psi, phase, f)
    h0_b, cos_b, psi_b, phase_b = fstat.amplitudes_to_parameters(b, f)
    np.testing.assert_allclose(h0_b, h0, rtol=1e-9)
    np.testing.assert_allclose(cos_b, cos_inclination, atol=1e-9)
    np.testing.assert_allclose(psi_b, psi, atol=1e-7)
    np.testing.assert_allclose(phase_b, phase, atol=1e-7)


def test_noiseless_injection_gives_true_parameters_and_rho2():
    # Earth-term-only monochromatic injection at the true template: 2Fe = rho^2 = (s|s) exactly and
    # M^-1 N gives back the injected (h0, cos i, psi, Phi0) (residual model of docs/design.md §4,
    # Ellis, Siemens & Creighton 2012)
    arr = invented_array(n_pulsars=8, years=10, seed=4, toas_per_pulsar=150)
    f = 7 / arr.span
    binary = Binary(ra=1.3, dec=-0.4, gw_frequency=f, chirp_mass=1e7, strain=1e-14, inclination=0.7,
                    polarization=0.4, phase=2.2, evolution="monochromatic", pulsar_term=False)
    signal = binary_residuals(arr, binary)
    engine = NoiseWeighting(arr, NoiseSettings())
    proj = fstat.project(engine, np.array([f]), signal)
    fplus, fcross = fstat.sky_patterns(proj, binary.ra, binary.dec)
    fe, amp = fstat.fe_with_amplitudes(proj, fplus, fcross)
    assert 2 * fe[0, 0] == pytest.approx(engine.optimal_snr(signal) ** 2, rel=1e-8)
    h0, cos_inclination, psi, phase = fstat.amplitudes_to_parameters(amp[0, 0], f)
    assert h0 == pytest.approx(binary.strain, rel=1e-8)
    assert cos_inclination == pytest.approx(np.cos(binary.inclination), abs=1e-8)
    assert psi == pytest.approx(binary.polarization, abs=1e-7)
    assert phase == pytest.approx(binary.phase, abs=1e-7)
