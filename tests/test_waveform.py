"""Waveform: frequency evolution, conversions, antenna patterns and the residual model against outside checks.

Sources are named beside each check (published papers, astropy, or common practice). Reference numbers are
computed in the tests from astropy.constants / astropy.units, independently of
cwsearch.core.constants.
"""

from __future__ import annotations

import numpy as np
import pytest
from astropy import constants as const
from astropy import units as u
from astropy.coordinates import SkyCoord
from scipy.integrate import solve_ivp

from cwsearch.core import constants
from cwsearch.physics import waveform
from cwsearch.core.errors import CoalescenceError, InputError

YEAR = (1 * u.yr).to_value(u.s)                       # Julian year (astropy)
MSUN_SECONDS = (const.G * const.M_sun / const.c**3).to_value(u.s)


def _chirp_time(chirp_mass_msun):
    return chirp_mass_msun * MSUN_SECONDS


# ------------------------------------------------------------------ frequency evolution
def _peters_mathews(chirp_mass_msun, f0, t_end, t_eval):
    """Integrate df/dt = (96/5) π^(8/3) (G Mc/c^3)^(5/3) f^(11/3) (Peters & Mathews 1963) and the orbital phase
    dΦ/dt = ω = π f with scipy.integrate.solve_ivp."""
    m53 = _chirp_time(chirp_mass_msun) ** (5 / 3)

    def rhs(t, y):
        f = y[0]
        return [96 / 5 * np.pi ** (8 / 3) * m53 * f ** (11 / 3), np.pi * f]

    sol = solve_ivp(rhs, (0.0, t_end), [f0, 0.0], method="DOP853", t_eval=t_eval, rtol=1e-12, atol=[1e-30, 1e-9])
    assert sol.success
    return sol.y[0], sol.y[1]


CHIRP_CASE = dict(chirp_mass=1e10, gw_frequency=2e-8)    # t_c ≈ 150 yr: a strong chirp over 100 yr


def test_closed_form_kernels_vs_peters_mathews_ode():
    """Closed-form ω(t), Φ(t) (DESIGN §4) vs numerical integration of Peters & Mathews (1963)."""
    mc, f0 = CHIRP_CASE["chirp_mass"], CHIRP_CASE["gw_frequency"]
    t = np.linspace(0, 100 * YEAR, 401)
    f_ode, phase_ode = _peters_mathews(mc, f0, t[-1], t)
    assert f_ode[-1] / f0 > 1.3   # the case really chirps
    m = _chirp_time(mc)
    omega0 = np.pi * f0
    omega = np.array([waveform._orbital_frequency(dt, m, omega0) for dt in t])
    phase = np.array([waveform._phase_since(omega0, w, m) for w in omega])
    phase_direct = np.array([waveform._phase_at(dt, m, omega0) for dt in t])
    np.testing.assert_allclose(omega, np.pi * f_ode, rtol=1e-9)
    np.testing.assert_allclose(phase, phase_ode, rtol=0, atol=1e-6)
    np.testing.assert_allclose(phase_direct, phase_ode, rtol=0, atol=1e-6)


def test_residual_basis_envelope_and_phase_vs_ode():
    """The Earth-term basis series carry the Peters-Mathews frequency and phase: envelope
    e(t) = (ω0/ω)^(1/3)/(2ω0) and phase 2ΔΦ(t) (DESIGN §4; ODE of Peters & Mathews 1963)."""
    mc, f0 = CHIRP_CASE["chirp_mass"], CHIRP_CASE["gw_frequency"]
    t = np.linspace(0, 100 * YEAR, 40001)          # dense enough to unwrap the phase (> 20 samples per cycle)
    basis, _ = waveform.residual_basis(t, 0.0, f0, mc, 1.0, 0.0, "full")
    f_ode, phase_ode = _peters_mathews(mc, f0, t[-1], t)
    omega0 = np.pi * f0
    envelope = np.hypot(basis[:, 0], basis[:, 1])
    np.testing.assert_allclose(envelope, (omega0 / (np.pi * f_ode)) ** (1 / 3) / (2 * omega0), rtol=1e-9)
    two_phase = np.unwrap(np.arctan2(basis[:, 0], basis[:, 1]))
    np.testing.assert_allclose(two_phase, 2 * phase_ode, rtol=0, atol=1e-5)


def test_frequency_derivative_formula():
    """gw_frequency_derivative is the Peters & Mathews (1963) df/dt, evaluated with astropy constants."""
    mc, f = 1e9 * u.M_sun, 1e-8 * u.Hz
    want = (96 / 5 * np.pi ** (8 / 3) * (const.G * mc / const.c**3) ** (5 / 3) * f ** (11 / 3)).to_value(u.Hz / u.s)
    assert waveform.gw_frequency_derivative(1e9, 1e-8) == pytest.approx(want, rel=1e-10)


# ------------------------------------------------------------------ worked numbers
@pytest.mark.parametrize("chirp_mass, years, rel", [
    (1e9, 4.42e4, 5e-3),    # Peters & Mathews 1963; Peters 1964, number computed with astropy (3 digits)
    (1e10, 952.0, 1e-3),
])
def test_time_to_coalescence_numbers(chirp_mass, years, rel):
    assert waveform.time_to_coalescence(chirp_mass, 10e-9) / YEAR == pytest.approx(years, rel=rel)
    mc, f = chirp_mass * u.M_sun, 10e-9 * u.Hz
    exact = (5 / 256 * (const.G * mc / const.c**3) ** (-5 / 3) * (np.pi * f) ** (-8 / 3)).to_value(u.s)
    assert waveform.time_to_coalescence(chirp_mass * u.M_sun, 10 * u.nHz) == pytest.approx(exact, rel=1e-10)


def test_strain_amplitude_number():
    """h0 = 2 (G Mc)^(5/3) (π f)^(2/3) / (c^4 d_L): 1e9 Msun, 10 nHz, 100 Mpc -> 2.76e-15
    (Sesana & Vecchio 2010 form; number computed with astropy)."""
    assert waveform.strain_amplitude(1e9, 10e-9, 100.0) == pytest.approx(2.76e-15, rel=2e-3)
    mc, f, d = 1e9 * u.M_sun, 10 * u.nHz, 100 * u.Mpc
    exact = (2 * (const.G * mc) ** (5 / 3) * (np.pi * f) ** (2 / 3) / (const.c**4 * d)).to_value(u.dimensionless_unscaled)
    assert waveform.strain_amplitude(mc, f, d) == pytest.approx(exact, rel=1e-10)


@pytest.mark.parametrize("chirp_mass, low, high", [
    (1e10, 1000.0, 1000.0),   # "out to about 1 Gpc"
    (1e9, 20.0, 25.0),        # "about 20-25 Mpc"
])
def test_babak_2016_strain_distance_statement(chirp_mass, low, high):
    """Babak et al. 2016 (MNRAS 455, 1665, abstract): h0 ≈ 1e-14 at ≈ 6 nHz reaches Mc = 1e10 Msun to ≈ 1 Gpc and
    1e9 Msun to ≈ 20-25 Mpc; tolerance ±30 % (Babak et al. 2016, MNRAS 455, 1665, abstract)."""
    d = waveform.luminosity_distance_for_strain(1e-14, chirp_mass, 6e-9)
    assert 0.7 * low <= d <= 1.3 * high
    # the inverse conversions agree
    assert waveform.strain_amplitude(chirp_mass, 6e-9, d) == pytest.approx(1e-14, rel=1e-12)
    assert waveform.chirp_mass_for_strain(1e-14, 6e-9, d) == pytest.approx(chirp_mass, rel=1e-12)


def test_chirp_mass_definition():
    """Mc = (m1 m2)^(3/5) / (m1 + m2)^(1/5): 1e9 + 1e9 Msun -> 8.706e8 Msun (definition, common practice)."""
    assert waveform.chirp_mass_from_masses(1e9, 1e9) == pytest.approx(8.706e8, rel=1e-4)
    assert waveform.chirp_mass_from_masses(1e9 * u.M_sun, 1e9 * u.M_sun) == pytest.approx(8.706e8, rel=1e-4)


def test_orbital_period_fact():
    """Orbital periods of years <-> nHz GW frequencies, f_gw = 2 / P_orb (fact of the trade)."""
    assert waveform.orbital_period(2 / YEAR) == pytest.approx(YEAR, rel=1e-15)
    assert waveform.orbital_period(10 * u.nHz) / YEAR == pytest.approx(6.34, rel=1e-3)


# ------------------------------------------------------------------ constants
def test_constants_match_astropy():
    """IAU 2015 / CODATA constants via astropy.constants."""
    assert constants.SOLAR_MASS_SECONDS == pytest.approx(MSUN_SECONDS, rel=1e-9)
    assert constants.SOLAR_MASS_SECONDS == pytest.approx(4.925491e-6, rel=1e-7)
    assert constants.KPC_SECONDS == pytest.approx((1 * u.kpc / const.c).to_value(u.s), rel=1e-14)
    assert constants.MPC_SECONDS == pytest.approx((1 * u.Mpc / const.c).to_value(u.s), rel=1e-14)
    # exact on purpose: defined values (SI speed of light, Julian year, 86400-s day), copied rather than computed
    assert constants.SPEED_OF_LIGHT == const.c.to_value(u.m / u.s)
    assert constants.YEAR_SECONDS == YEAR
    assert constants.DAY_SECONDS == (1 * u.day).to_value(u.s)
    # 1 kpc = 3261.6 light years (IAU 2015 constants via astropy.constants)
    assert constants.KPC_SECONDS / constants.YEAR_SECONDS == pytest.approx(3261.6, abs=0.05)
    assert (1 * u.kpc).to_value(u.lyr) == pytest.approx(3261.6, abs=0.05)


def test_fact_strain_times_distance():
    """Strain 1e-15 over 2035 ly is about 19.3 km (fact of the trade, common practice, no source), with our constants."""
    stretch_km = 1e-15 * 2035 * constants.YEAR_SECONDS * constants.SPEED_OF_LIGHT / 1e3
    assert stretch_km == pytest.approx(19.3, abs=0.05)


def test_fact_residual_amplitude_31_8_ns():
    """Residual amplitude h0/(2π f): 31.8 ns for h0 = 1e-15 at 5 nHz (fact of the trade, common practice, no source):
    the Earth-term basis envelope of a monochromatic source is 1/(2π f)."""
    t = np.linspace(0, 10 * YEAR, 500)
    basis, _ = waveform.residual_basis(t, 0.0, 5e-9, 1e9, 1.0, 0.0, "monochromatic")
    envelope = np.hypot(basis[:, 0], basis[:, 1])
    np.testing.assert_allclose(1e-15 * envelope, 31.8e-9, rtol=2e-3)


# ------------------------------------------------------------------ antenna patterns
def _independent_patterns(ra, dec, pulsar):
    """F+, Fx from the polarisation tensors e+ = m m^T - n n^T, ex = m n^T + n m^T (Ellis, Siemens & Creighton
    2012), with the source direction from astropy and m, n any right-handed transverse pair."""
    source = SkyCoord(ra * u.rad, dec * u.rad).cartesian.xyz.value
    omega = -source
    # transverse pair from a cross product (not the θ/φ formulas of the code)
    ref = np.array([0.0, 0.0, 1.0]) if abs(source[2]) < 0.9 else np.array([1.0, 0.0, 0.0])
    m = np.cross(ref, omega)
    m /= np.linalg.norm(m)
    n = np.cross(omega, m)
    e_plus = np.outer(m, m) - np.outer(n, n)
    e_cross = np.outer(m, n) + np.outer(n, m)
    denom = 1 + omega @ pulsar
    return 0.5 * pulsar @ e_plus @ pulsar / denom, 0.5 * pulsar @ e_cross @ pulsar / denom, omega @ pulsar


def test_antenna_pattern_vs_tensor_construction():
    rng = np.random.default_rng(5)
    ras = rng.uniform(0, 2 * np.pi, 30)
    decs = np.arcsin(rng.uniform(-1, 1, 30))
    pulsars = rng.normal(size=(7, 3))
    pulsars /= np.linalg.norm(pulsars, axis=1)[:, None]
    fp, fx, odp = waveform.antenna_pattern(ras, decs, pulsars)
    assert fp.shape == (30, 7)
    for i in range(30):
        for j in range(7):
            ip, ix, iodp = _independent_patterns(ras[i], decs[i], pulsars[j])
            # the pair (m, n) differs from the code's by a rotation (polarisation convention), under which
            # F+^2 + Fx^2 is invariant
            assert fp[i, j] ** 2 + fx[i, j] ** 2 == pytest.approx(ip**2 + ix**2, rel=1e-9, abs=1e-14)
            assert odp[i, j] == pytest.approx(iodp, abs=1e-12)
    # with the code's own m, n (DESIGN §4) the tensor contraction gives the code's values exactly
    omega, m, n = waveform.source_frame(ras[0], decs[0])
    for j in range(7):
        p = pulsars[j]
        e_plus = np.outer(m, m) - np.outer(n, n)
        e_cross = np.outer(m, n) + np.outer(n, m)
        assert fp[0, j] == pytest.approx(0.5 * p @ e_plus @ p / (1 + omega @ p), rel=1e-12, abs=1e-15)
        assert fx[0, j] == pytest.approx(0.5 * p @ e_cross @ p / (1 + omega @ p), rel=1e-12, abs=1e-15)
    # m, n, Ω orthonormal
    frame = np.array([omega, m, n])
    np.testing.assert_allclose(frame @ frame.T, np.eye(3), atol=1e-15)


def test_antenna_pattern_total_response_vs_angle():
    """F+^2 + Fx^2 = ¼ (1 - Ω·p)^2 = ¼ (1 + cos ζ)^2 with ζ the source-pulsar angle (follows from the tensor
    construction; angle from astropy's SkyCoord.separation)."""
    rng = np.random.default_rng(8)
    src = SkyCoord(150 * u.deg, -20 * u.deg)
    ras, decs = rng.uniform(0, 360, 20), np.degrees(np.arcsin(rng.uniform(-1, 1, 20)))
    psr = SkyCoord(ras * u.deg, decs * u.deg)
    fp, fx, _ = waveform.antenna_pattern(np.radians(150), np.radians(-20), psr.cartesian.xyz.value.T)
    zeta = src.separation(psr).to_value(u.rad)
    np.testing.assert_allclose(fp**2 + fx**2, 0.25 * (1 + np.cos(zeta)) ** 2, rtol=1e-9)


def test_pulsar_in_source_direction_gives_no_nan():
    """Guard at 1 + Ω·p -> 0: the full response vanishes (DESIGN §4); no NaN or infinity anywhere."""
    ra, dec = 1.1, 0.4
    p = SkyCoord(ra * u.rad, dec * u.rad).cartesian.xyz.value
    fp, fx, odp = waveform.antenna_pattern(ra, dec, p[None, :])
    assert odp[0] == pytest.approx(-1.0, abs=1e-12)
    assert np.isfinite(fp).all() and np.isfinite(fx).all()
    t = np.linspace(0, 10 * YEAR, 100)
    r = waveform.residuals(t, p, 1.0, ra=ra, dec=dec, gw_frequency=8e-9, chirp_mass=1e9, strain=1e-14,
                           inclination=0.3, polarization=0.2, phase=0.1, reference_time=0.0)
    assert np.isfinite(r).all() and np.abs(r).max() < 1e-12
    # a pulsar very close to the source direction: finite and bounded by F+^2 + Fx^2 <= 1
    q = p + 1e-9 * np.array([1.0, -1.0, 0.5])
    q /= np.linalg.norm(q)
    fp, fx, _ = waveform.antenna_pattern(ra, dec, q[None, :])
    assert np.isfinite(fp).all() and fp[0] ** 2 + fx[0] ** 2 <= 1.0


# ------------------------------------------------------------------ residual model
def _direct_residual(t, p, distance_kpc, *, ra, dec, f0, mc, h0, iota, psi, phi0, t0):
    """DESIGN §4 written out directly (Ellis, Siemens & Creighton 2012): s+, sx at t and t_p, r = F+Δs+ + FxΔsx.

    Uses astropy for the source direction and the pulsar light-travel time, and the test's own tensor
    construction with the DESIGN's m, n for F+, Fx."""
    theta, phi = np.pi / 2 - dec, ra
    omega_vec = -np.array([np.sin(theta) * np.cos(phi), np.sin(theta) * np.sin(phi), np.cos(theta)])
    m = np.array([np.sin(phi), -np.cos(phi), 0.0])
    n = np.array([-np.cos(theta) * np.cos(phi), -np.cos(theta) * np.sin(phi), np.sin(theta)])
    denom = 1 + omega_vec @ p
    fplus = 0.5 * p @ (np.outer(m, m) - np.outer(n, n)) @ p / denom
    fcross = 0.5 * p @ (np.outer(m, n) + np.outer(n, m)) @ p / denom
    M = mc * MSUN_SECONDS
    w0 = np.pi * f0
    D = 2 * M ** (5 / 3) * w0 ** (2 / 3) / h0            # from h0 = 2 M^(5/3) (π f)^(2/3) / D
    L = (distance_kpc * u.kpc / const.c).to_value(u.s)

    def s_plus_cross(time):
        w = w0 * (1 - 256 / 5 * M ** (5 / 3) * w0 ** (8 / 3) * (time - t0)) ** (-3 / 8)
        big_phi = phi0 + (w0 ** (-5 / 3) - w ** (-5 / 3)) / (32 * M ** (5 / 3))
        alpha = M ** (5 / 3) / (D * w ** (1 / 3))
        ci = np.cos(iota)
        sp = alpha * (-np.sin(2 * big_phi) * (1 + ci**2) * np.cos(2 * psi) - 2 * np.cos(2 * big_phi) * ci * np.sin(2 * psi))
        sx = alpha * (-np.sin(2 * big_phi) * (1 + ci**2) * np.sin(2 * psi) + 2 * np.cos(2 * big_phi) * ci * np.cos(2 * psi))
        return sp, sx

    tp = t - L * (1 + omega_vec @ p)
    sp_e, sx_e = s_plus_cross(t)
    sp_p, sx_p = s_plus_cross(tp)
    return fplus * (sp_p - sp_e) + fcross * (sx_p - sx_e)


@pytest.mark.parametrize("mc, f0", [(1e9, 8e-9), (5e9, 2e-8)])
def test_basis_split_equals_direct_formula(mc, f0):
    """residuals() (basis series x coefficients) equals the DESIGN §4 formula written out in the test."""
    rng = np.random.default_rng(3)
    t0 = 53000 * 86400.0
    t = t0 + np.sort(rng.uniform(0, 15 * YEAR, 300))
    kw = dict(ra=2.1, dec=-0.4, f0=f0, mc=mc, h0=1e-14, iota=0.7, psi=0.4, phi0=1.3, t0=t0)
    for _ in range(4):
        p = rng.normal(size=3)
        p /= np.linalg.norm(p)
        dist = rng.uniform(0.5, 2.5)
        want = _direct_residual(t, p, dist, **kw)
        got = waveform.residuals(t, p, dist, ra=kw["ra"], dec=kw["dec"], gw_frequency=f0, chirp_mass=mc,
                                 strain=1e-14, inclination=0.7, polarization=0.4, phase=1.3, reference_time=t0)
        scale = np.abs(want).max()
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-7 * scale)


def test_monochromatic_earth_term_amplitude():
    """Earth term alone, monochromatic: amplitude h0/(2π f) sqrt(P² + Q²) with
    P = (1+cos²ι)(F+ cos2ψ + Fx sin2ψ), Q = 2cosι(F+ sin2ψ − Fx cos2ψ) (follows from DESIGN §4 s+, sx)."""
    f0, h0, iota, psi = 6e-9, 1e-14, 0.9, 0.35
    p = np.array([0.3, -0.5, 0.812])
    p /= np.linalg.norm(p)
    fp, fx, _ = waveform.antenna_pattern(1.0, 0.2, p[None, :])
    P = (1 + np.cos(iota) ** 2) * (fp[0] * np.cos(2 * psi) + fx[0] * np.sin(2 * psi))
    Q = 2 * np.cos(iota) * (fp[0] * np.sin(2 * psi) - fx[0] * np.cos(2 * psi))
    t = np.linspace(0, 1 / f0 * 20, 20001)     # 20 full GW cycles
    r = waveform.residuals(t, p, 1.0, ra=1.0, dec=0.2, gw_frequency=f0, chirp_mass=1e9, strain=h0,
                           inclination=iota, polarization=psi, phase=0.4, reference_time=0.0,
                           evolution="monochromatic", pulsar_term=False)
    amplitude = h0 / (2 * np.pi * f0) * np.hypot(P, Q)
    assert np.abs(r).max() == pytest.approx(amplitude, rel=1e-6)
    assert np.sqrt(2 * np.mean(r[:-1] ** 2)) == pytest.approx(amplitude, rel=1e-6)


def test_evolution_modes_agree_for_small_chirp_mass():
    """With negligible frequency evolution the three modes (full, pulsar-frequency, monochromatic) coincide
    (DESIGN §4). Mc = 1e3 Msun: fractional ω change over the pulsar delay ~1e-12, phase differences ~1e-8 rad
    (estimate from the closed form; common practice, no source). This also guards against cancellation in
    the chirp phase for small chirp masses."""
    t0 = 0.0
    t = np.linspace(0, 15 * YEAR, 400)
    p = np.array([0.1, 0.7, -0.2])
    p /= np.linalg.norm(p)
    out = {mode: waveform.residuals(t, p, 1.5, ra=0.5, dec=0.9, gw_frequency=8e-9, chirp_mass=1e3, strain=1e-14,
                                    inclination=0.4, polarization=1.1, phase=0.2, reference_time=t0, evolution=mode)
           for mode in waveform.EVOLUTION_MODES}
    scale = np.abs(out["monochromatic"]).max()
    np.testing.assert_allclose(out["full"], out["monochromatic"], rtol=0, atol=1e-6 * scale)
    np.testing.assert_allclose(out["pulsar-frequency"], out["monochromatic"], rtol=0, atol=1e-6 * scale)


def test_modes_differ_for_heavy_chirping_binary():
    """Sanity of the switch: for a strongly chirping binary the pulsar term's frequency differs from ω0, so the
    monochromatic mode differs from the full one (DESIGN §4)."""
    t = np.linspace(0, 15 * YEAR, 400)
    p = np.array([0.0, 0.0, 1.0])
    kw = dict(ra=0.5, dec=-0.9, gw_frequency=2e-8, chirp_mass=5e9, strain=1e-14, inclination=0.4,
              polarization=1.1, phase=0.2, reference_time=0.0)
    full = waveform.residuals(t, p, 1.5, evolution="full", **kw)
    mono = waveform.residuals(t, p, 1.5, evolution="monochromatic", **kw)
    assert np.abs(full - mono).max() > 0.1 * np.abs(full).max()


def test_coalescence_inside_data_raises():
    """t − t0 ≥ t_c is refused with a clear error (DESIGN §4); it is a user error (exit status 2)."""
    tc = waveform.time_to_coalescence(1e10, 1e-7)
    t = np.linspace(0, 1.5 * tc, 50)
    with pytest.raises(CoalescenceError, match="merges"):
        waveform.residual_basis(t, 0.0, 1e-7, 1e10, 1.0, 0.0, "full")
    assert issubclass(CoalescenceError, InputError)
    # just before coalescence the series are finite
    basis, _ = waveform.residual_basis(np.linspace(0, 0.9 * tc, 50), 0.0, 1e-7, 1e10, 1.0, 0.0, "full")
    assert np.isfinite(basis).all()


# ------------------------------------------------------------------ pulsar term at the retarded time
def _peters_state(chirp_mass_msun, f0, times):
    """GW frequency and orbital phase (relative to t = 0, where f = f0) at ``times`` [s], integrating
    df/dt = (96/5) π^(8/3) (G Mc/c³)^(5/3) f^(11/3) (Peters 1964, leading-order quadrupole) and
    dΦ/dt = π f with scipy.integrate.solve_ivp, forward and backward from t = 0."""
    m53 = _chirp_time(chirp_mass_msun) ** (5 / 3)

    def rhs(t, y):
        return [96 / 5 * np.pi ** (8 / 3) * m53 * y[0] ** (11 / 3), np.pi * y[0]]

    times = np.asarray(times, dtype=float)
    f_out, phi_out = np.empty_like(times), np.empty_like(times)
    for side in (times < 0, times >= 0):
        if not side.any():
            continue
        t_side = times[side]
        end = t_side.min() if t_side.min() < 0 else t_side.max()
        order = np.argsort(t_side) if end > 0 else np.argsort(-t_side)
        sol = solve_ivp(rhs, (0.0, end), [f0, 0.0], method="DOP853", t_eval=t_side[order], rtol=1e-13,
                        atol=[1e-30, 1e-10])
        assert sol.success
        f_side, phi_side = np.empty_like(t_side), np.empty_like(t_side)
        f_side[order], phi_side[order] = sol.y[0], sol.y[1]
        f_out[side], phi_out[side] = f_side, phi_side
    return f_out, phi_out


@pytest.mark.parametrize("distance_kpc", [0.05, 0.5, 1.3, 4.0])
def test_pulsar_term_at_retarded_time(distance_kpc):
    """Earth + pulsar term against an independent evaluation of both terms: the pulsar term is the Earth
    term's formula at the retarded time t_p = t − L(1 + Ω̂·p̂)/c (geometric delay; common practice, no
    source), Ω̂ the propagation direction (minus the source direction, built with astropy SkyCoord) and
    L the pulsar distance (astropy units); frequency and phase from integrating the Peters (1964)
    chirp with scipy; amplitudes s+, sx of Ellis, Siemens & Creighton (2012) with the
    (ω0/ω)^(1/3)/(2ω0) envelope; F+, Fx from the polarisation tensors. Several distances, a chirping
    binary (the pulsar-term frequency at 4 kpc is several frequency bins below the Earth term's).
    Tolerance 1e-6 of the peak residual (ODE tolerance 1e-13 over ~1e4-rad phases)."""
    mc, f0, h0, iota, psi, phi0 = 3e9, 2e-8, 1e-14, 0.8, 0.45, 0.9
    t = np.linspace(0, 12 * YEAR, 600)
    src = SkyCoord(ra=137.0 * u.deg, dec=-23.0 * u.deg)
    ra, dec = src.ra.rad, src.dec.rad
    omega_hat = -np.asarray(src.cartesian.xyz.value)                    # propagation direction
    psr = SkyCoord(ra=300.0 * u.deg, dec=41.0 * u.deg)
    p = np.asarray(psr.cartesian.xyz.value)
    # polarisation basis ⊥ Ω̂: m = (sin ra, −cos ra, 0), n = Ω̂ × m (equals DESIGN §4 n)
    m_vec = np.array([np.sin(ra), -np.cos(ra), 0.0])
    n_vec = np.cross(omega_hat, m_vec)
    e_plus = np.outer(m_vec, m_vec) - np.outer(n_vec, n_vec)
    e_cross = np.outer(m_vec, n_vec) + np.outer(n_vec, m_vec)
    denom = 2 * (1 + omega_hat @ p)
    fplus, fcross = p @ e_plus @ p / denom, p @ e_cross @ p / denom
    delay = (distance_kpc * u.kpc / const.c).to_value(u.s) * (1 + omega_hat @ p)
    f_e, phi_e = _peters_state(mc, f0, t)
    f_p, phi_p = _peters_state(mc, f0, t - delay)
    # sanity of the case: the pulsar term sits at a lower frequency, measurably so at the larger distances
    span = t[-1] - t[0]
    if distance_kpc >= 1.0:
        assert (f0 - f_p[0]) * span > 1.0          # more than one frequency bin 1/T below
    ci = np.cos(iota)

    def term(f, phase):
        big_phi = phi0 + phase
        env = (f0 / f) ** (1 / 3) / (2 * np.pi * f0)       # (ω0/ω)^(1/3) / (2 ω0), ω = π f
        a_plus = -np.sin(2 * big_phi) * (1 + ci**2) * np.cos(2 * psi) - 2 * np.cos(2 * big_phi) * ci * np.sin(2 * psi)
        a_cross = -np.sin(2 * big_phi) * (1 + ci**2) * np.sin(2 * psi) + 2 * np.cos(2 * big_phi) * ci * np.cos(2 * psi)
        return h0 * env * (fplus * a_plus + fcross * a_cross)

    earth_want = -term(f_e, phi_e)
    pulsar_want = term(f_p, phi_p)
    kw = dict(ra=ra, dec=dec, gw_frequency=f0, chirp_mass=mc, strain=h0, inclination=iota, polarization=psi,
              phase=phi0, reference_time=0.0)
    both = waveform.residuals(t, p, distance_kpc, **kw)
    earth = waveform.residuals(t, p, distance_kpc, pulsar_term=False, **kw)
    scale = np.abs(earth_want).max()
    np.testing.assert_allclose(earth, earth_want, rtol=0, atol=1e-6 * scale)
    np.testing.assert_allclose(both - earth, pulsar_want, rtol=0, atol=1e-6 * scale)
    np.testing.assert_allclose(both, earth_want + pulsar_want, rtol=0, atol=1e-6 * scale)
