"""Timing residuals of a circular supermassive black-hole binary.

Physics of ``docs/design.md`` §4 (Ellis, Siemens & Creighton 2012; Peters
& Mathews 1963): leading-order chirp, Earth term and pulsar term, three
evolution modes.

Units
-----
Public functions take astropy Quantities, or plain floats in the documented
unit: chirp mass in solar masses, frequency in Hz, luminosity distance in
Mpc, pulsar distance in kpc, times in seconds, angles in radians. Kernels
work in seconds with G = c = 1.

The residual of one pulsar is a linear combination of four *basis series*
(:func:`residual_basis`): the Earth term's ``e(t) sin 2ΔΦ(t)`` and
``e(t) cos 2ΔΦ(t)``, then the same for the pulsar term, where ``ΔΦ`` is the
orbital phase accumulated since the reference time and
``e(t) = (ω0/ω(t))^(1/3) / (2 ω0)`` the amplitude envelope. The weights
(:func:`basis_coefficients`) depend only on strain, inclination,
polarisation, phases and antenna patterns. Simulation, likelihood and
F-statistics all build on this split.

Examples
--------
>>> from cwsearch.physics import waveform
>>> h0 = waveform.strain_amplitude(1e9, 10e-9, 100.0)   # Msun, Hz, Mpc
>>> f"{h0:.3g}"
'2.76e-15'
>>> years = waveform.time_to_coalescence(1e10, 10e-9) / 3.15576e7
>>> round(years)
952
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..core.constants import KPC_SECONDS, MPC_SECONDS, SOLAR_MASS_SECONDS
from ..core.errors import CoalescenceError

EVOLUTION_MODES = ("full", "pulsar-frequency", "monochromatic")
_MODE_CODE = {name: i for i, name in enumerate(EVOLUTION_MODES)}


def _value(x, unit: str):
    """Plain float array from a Quantity (converted to ``unit``) or a number in ``unit``."""
    if hasattr(x, "unit"):
        return np.asarray(x.to_value(unit), dtype=float)
    return np.asarray(x, dtype=float)


def _scalar(x):
    return x.item() if np.ndim(x) == 0 else x


# ---------------------------------------------------------------- conversions
def chirp_mass_from_masses(mass1, mass2):
    """Chirp mass ``(m1 m2)^(3/5) / (m1 + m2)^(1/5)`` in the units of the inputs.

    >>> f"{chirp_mass_from_masses(1e9, 1e9):.4g}"
    '8.706e+08'
    """
    m1, m2 = _value(mass1, "solMass"), _value(mass2, "solMass")
    return _scalar((m1 * m2) ** 0.6 / (m1 + m2) ** 0.2)


def strain_amplitude(chirp_mass, gw_frequency, luminosity_distance):
    """Strain amplitude ``h0 = 2 (G Mc)^(5/3) (π f)^(2/3) / (c^4 d_L)``.

    Parameters: chirp mass [Msun], GW frequency [Hz], luminosity distance [Mpc].
    """
    mc = _value(chirp_mass, "solMass") * SOLAR_MASS_SECONDS
    f = _value(gw_frequency, "Hz")
    d = _value(luminosity_distance, "Mpc") * MPC_SECONDS
    return _scalar(2.0 * mc ** (5 / 3) * (np.pi * f) ** (2 / 3) / d)


def luminosity_distance_for_strain(strain, chirp_mass, gw_frequency):
    """Luminosity distance [Mpc] at which a binary has strain amplitude ``strain``."""
    mc = _value(chirp_mass, "solMass") * SOLAR_MASS_SECONDS
    f = _value(gw_frequency, "Hz")
    h = np.asarray(strain, dtype=float)
    return _scalar(2.0 * mc ** (5 / 3) * (np.pi * f) ** (2 / 3) / h / MPC_SECONDS)


def chirp_mass_for_strain(strain, gw_frequency, luminosity_distance):
    """Chirp mass [Msun] giving strain amplitude ``strain`` at ``gw_frequency`` [Hz], distance [Mpc]."""
    f = _value(gw_frequency, "Hz")
    d = _value(luminosity_distance, "Mpc") * MPC_SECONDS
    h = np.asarray(strain, dtype=float)
    mc53 = h * d / (2.0 * (np.pi * f) ** (2 / 3))
    return _scalar(mc53 ** 0.6 / SOLAR_MASS_SECONDS)


def time_to_coalescence(chirp_mass, gw_frequency):
    """Time to coalescence [s]: ``t_c = (5/256) (G Mc/c^3)^(-5/3) (π f)^(-8/3)``."""
    mc = _value(chirp_mass, "solMass") * SOLAR_MASS_SECONDS
    f = _value(gw_frequency, "Hz")
    return _scalar(5.0 / 256.0 * mc ** (-5 / 3) * (np.pi * f) ** (-8 / 3))


def gw_frequency_derivative(chirp_mass, gw_frequency):
    """``df/dt = (96/5) π^(8/3) (G Mc/c^3)^(5/3) f^(11/3)`` [Hz/s]."""
    mc = _value(chirp_mass, "solMass") * SOLAR_MASS_SECONDS
    f = _value(gw_frequency, "Hz")
    return _scalar(96.0 / 5.0 * np.pi ** (8 / 3) * mc ** (5 / 3) * f ** (11 / 3))


def orbital_period(gw_frequency):
    """Observed orbital period [s] of a circular binary: ``P = 2 / f_gw``."""
    return _scalar(2.0 / _value(gw_frequency, "Hz"))


# ---------------------------------------------------------------- geometry
def source_frame(ra, dec):
    """Propagation direction Ω and polarisation vectors m, n for a source at (ra, dec) [rad].

    Returns three arrays of shape ``(..., 3)``. θ = π/2 − dec, φ = ra;
    Ω = −(sinθ cosφ, sinθ sinφ, cosθ), m = (sinφ, −cosφ, 0),
    n = (−cosθ cosφ, −cosθ sinφ, sinθ).
    """
    theta = np.pi / 2 - np.asarray(dec, dtype=float)
    phi = np.asarray(ra, dtype=float)
    st, ct, sp, cp = np.sin(theta), np.cos(theta), np.sin(phi), np.cos(phi)
    omega = -np.stack([st * cp, st * sp, ct], axis=-1)
    m = np.stack([sp, -cp, np.zeros_like(sp)], axis=-1)
    n = np.stack([-ct * cp, -ct * sp, st], axis=-1)
    return omega, m, n


def antenna_pattern(ra, dec, pulsar_positions):
    """Antenna patterns F+, Fx and Ω·p for sources at (ra, dec) [rad] and unit pulsar vectors.

    ``ra``, ``dec`` may be arrays of shape ``S``; ``pulsar_positions`` has
    shape ``(P, 3)``. Returns three arrays of shape ``S + (P,)``. Where the
    pulsar lies in the source direction (1 + Ω·p → 0) the full response
    (Earth minus pulsar term) vanishes, and both patterns are set to 0.
    """
    omega, m, n = source_frame(ra, dec)
    p = np.asarray(pulsar_positions, dtype=float)
    mp = m @ p.T
    np_ = n @ p.T
    op = omega @ p.T
    denom = 1.0 + op
    safe = denom > 1e-12
    denom = np.where(safe, denom, 1.0)
    fplus = np.where(safe, 0.5 * (mp**2 - np_**2) / denom, 0.0)
    fcross = np.where(safe, mp * np_ / denom, 0.0)
    return fplus, fcross, op


# ---------------------------------------------------------------- evolution
@njit(cache=True)
def _orbital_frequency(dt, chirp_mass_time, omega0):
    """Closed-form ω(t) for t − t0 = dt (s); nan where the binary has merged."""
    x = 1.0 - 256.0 / 5.0 * chirp_mass_time ** (5 / 3) * omega0 ** (8 / 3) * dt
    if x <= 0.0:
        return np.nan
    return omega0 * x ** (-3.0 / 8.0)


@njit(cache=True)
def _phase_since(omega_start, omega_end, chirp_mass_time):
    """Orbital phase accumulated between angular frequencies (leading-order chirp)."""
    return (omega_start ** (-5 / 3) - omega_end ** (-5 / 3)) / (32.0 * chirp_mass_time ** (5 / 3))


@njit(cache=True)
def _phase_at(dt, chirp_mass_time, omega0):
    """Orbital phase Φ(t0 + dt) − Φ0 (leading-order chirp), free of cancellation for small chirp masses.

    Same value as ``_phase_since(omega0, ω(t0 + dt))``, written as
    ``−ω0^(−5/3) expm1(⅝ log1p(−k dt)) / (32 M^(5/3))`` with
    ``k = (256/5) M^(5/3) ω0^(8/3)``; tends to ``ω0 dt`` as M → 0.
    """
    m53 = chirp_mass_time ** (5 / 3)
    kdt = 256.0 / 5.0 * m53 * omega0 ** (8 / 3) * dt
    if kdt >= 1.0:
        return np.nan
    return -omega0 ** (-5 / 3) * math.expm1(0.625 * math.log1p(-kdt)) / (32.0 * m53)


@njit(cache=True)
def _basis_kernel(times, reference_time, chirp_mass_time, omega0, light_time, omega_dot_p, mode, out):
    """Fill ``out`` (n, 4) with the Earth and pulsar basis series; return the pulsar term's
    coherent phase offset ΔΦ_p0 = Φ(t0 − L(1+Ω·p)) − Φ0."""
    delay = light_time * (1.0 + omega_dot_p)
    chirping = chirp_mass_time > 0.0 and mode != 2
    if chirping:
        omega_p0 = _orbital_frequency(-delay, chirp_mass_time, omega0)
        pulsar_phase0 = _phase_at(-delay, chirp_mass_time, omega0)
    else:
        omega_p0 = omega0
        pulsar_phase0 = -omega0 * delay
    amp0 = 1.0 / (2.0 * omega0)
    amp_p = amp0 * (omega0 / omega_p0) ** (1.0 / 3.0)
    for i in range(times.shape[0]):
        dt = times[i] - reference_time
        if mode == 0 and chirping:
            w = _orbital_frequency(dt, chirp_mass_time, omega0)
            dphi = _phase_at(dt, chirp_mass_time, omega0)
            env = amp0 * (omega0 / w) ** (1.0 / 3.0)
            wp = _orbital_frequency(dt - delay, chirp_mass_time, omega0)
            dphi_p = _phase_at(dt - delay, chirp_mass_time, omega0) - pulsar_phase0
            env_p = amp0 * (omega0 / wp) ** (1.0 / 3.0)
        else:
            dphi = omega0 * dt
            env = amp0
            dphi_p = omega_p0 * dt
            env_p = amp_p
        out[i, 0] = env * np.sin(2.0 * dphi)
        out[i, 1] = env * np.cos(2.0 * dphi)
        out[i, 2] = env_p * np.sin(2.0 * dphi_p)
        out[i, 3] = env_p * np.cos(2.0 * dphi_p)
    return pulsar_phase0


def check_before_coalescence(chirp_mass, gw_frequency, last_time_after_reference):
    """Raise :class:`~cwsearch.core.errors.CoalescenceError` if the binary merges within the data.

    ``last_time_after_reference`` [s] is the latest TOA minus the reference time.
    """
    tc = time_to_coalescence(chirp_mass, gw_frequency)
    if np.any(np.asarray(last_time_after_reference) >= tc):
        raise CoalescenceError(
            f"a binary of chirp mass {float(np.max(_value(chirp_mass, 'solMass'))):.3g} Msun at "
            f"{float(np.max(_value(gw_frequency, 'Hz'))):.3g} Hz merges {float(np.min(tc)) / 3.15576e7:.3g} yr "
            "after the reference time, inside the data span; lower the chirp mass or frequency"
        )


def residual_basis(toas, reference_time, gw_frequency, chirp_mass, pulsar_distance, omega_dot_p,
                   evolution="full"):
    """The four basis series of one pulsar's residual and the pulsar term's coherent phase offset.

    Parameters
    ----------
    toas : array (n,), s
    reference_time : float, s (same clock as ``toas``; t0 of docs/design.md §4)
    gw_frequency : float, Hz (at the reference time, Earth term)
    chirp_mass : float, Msun (0 gives no evolution)
    pulsar_distance : float, kpc
    omega_dot_p : float, Ω·p from :func:`antenna_pattern`
    evolution : one of :data:`EVOLUTION_MODES`

    Returns
    -------
    basis : array (n, 4)
        Earth ``e sin2ΔΦ``, ``e cos2ΔΦ``, pulsar ``e_p sin2ΔΦ_p``, ``e_p cos2ΔΦ_p`` [s].
    pulsar_phase_offset : float
        Orbital phase of the pulsar term at the reference time minus Φ0 [rad],
        the value the fully coherent model uses.
    """
    if evolution not in _MODE_CODE:
        raise ValueError(f"evolution must be one of {EVOLUTION_MODES}, not {evolution!r}")
    toas = np.ascontiguousarray(toas, dtype=float)
    mc_time = float(_value(chirp_mass, "solMass")) * SOLAR_MASS_SECONDS
    omega0 = np.pi * float(_value(gw_frequency, "Hz"))
    light_time = float(_value(pulsar_distance, "kpc")) * KPC_SECONDS
    if mc_time > 0 and evolution != "monochromatic":
        check_before_coalescence(chirp_mass, gw_frequency, toas.max() - reference_time)
    out = np.empty((toas.shape[0], 4))
    offset = _basis_kernel(toas, float(reference_time), mc_time, omega0, light_time,
                           float(omega_dot_p), _MODE_CODE[evolution], out)
    return out, offset


def basis_coefficients(strain, inclination, polarization, phase, pulsar_phase, fplus, fcross,
                       pulsar_term=True):
    """Weights of the four basis series (docs/design.md §4 rewritten as a linear combination).

    With ``P = (1+cos²ι)(F+ cos2ψ + Fx sin2ψ)`` and ``Q = 2 cosι (F+ sin2ψ − Fx cos2ψ)``
    the Earth term is ``h0 e(t) [P sin2Φ + Q cos2Φ]`` and the pulsar term the
    same with a minus sign at the pulsar-term phase. ``pulsar_phase`` is the
    pulsar term's orbital phase at the reference time [rad]. Inputs broadcast;
    returns an array of shape ``(..., 4)``.
    """
    ci = np.cos(inclination)
    c2p, s2p = np.cos(2 * polarization), np.sin(2 * polarization)
    p_amp = (1 + ci**2) * (fplus * c2p + fcross * s2p)
    q_amp = 2 * ci * (fplus * s2p - fcross * c2p)
    c0, s0 = np.cos(2 * phase), np.sin(2 * phase)
    earth1 = strain * (p_amp * c0 - q_amp * s0)
    earth2 = strain * (p_amp * s0 + q_amp * c0)
    if pulsar_term:
        cp, sp = np.cos(2 * pulsar_phase), np.sin(2 * pulsar_phase)
        psr1 = -strain * (p_amp * cp - q_amp * sp)
        psr2 = -strain * (p_amp * sp + q_amp * cp)
    else:
        psr1 = psr2 = np.zeros_like(earth1)
    return np.stack(np.broadcast_arrays(earth1, earth2, psr1, psr2), axis=-1)


def residuals(toas, pulsar_position, pulsar_distance, *, ra, dec, gw_frequency, chirp_mass, strain,
              inclination, polarization, phase, reference_time, pulsar_phase=None,
              evolution="full", pulsar_term=True):
    """Timing residuals [s] of one pulsar for one circular binary.

    Parameters
    ----------
    toas : array (n,) [s]; pulsar_position : unit 3-vector; pulsar_distance [kpc]
    ra, dec : source position [rad]; gw_frequency [Hz] at ``reference_time`` [s]
    chirp_mass [Msun]; strain : h0; inclination, polarization, phase (Φ0) [rad]
    pulsar_phase : pulsar-term orbital phase at the reference time [rad];
        ``None`` uses the coherent value from the pulsar distance.
    evolution : ``"full"``, ``"pulsar-frequency"`` or ``"monochromatic"``
    pulsar_term : include the pulsar term (default) or Earth term only

    Examples
    --------
    >>> import numpy as np
    >>> t = np.linspace(0, 15 * 3.15576e7, 200)
    >>> r = residuals(t, [1, 0, 0], 1.0, ra=1.0, dec=0.3, gw_frequency=8e-9, chirp_mass=1e9,
    ...               strain=1e-14, inclination=0.5, polarization=0.2, phase=0.1,
    ...               reference_time=0.0)
    >>> bool(np.abs(r).max() < 1e-14 / (2 * np.pi * 8e-9) * 4)
    True
    """
    fplus, fcross, odp = antenna_pattern(ra, dec, np.atleast_2d(pulsar_position))
    basis, offset = residual_basis(toas, reference_time, gw_frequency, chirp_mass, pulsar_distance,
                                   odp[0], evolution)
    if pulsar_phase is None:
        pulsar_phase = phase + offset
    coeffs = basis_coefficients(strain, inclination, polarization, phase, pulsar_phase,
                                fplus[0], fcross[0], pulsar_term)
    return basis @ coeffs


__all__ = [
    "EVOLUTION_MODES", "chirp_mass_from_masses", "strain_amplitude", "luminosity_distance_for_strain",
    "chirp_mass_for_strain", "time_to_coalescence", "gw_frequency_derivative", "orbital_period",
    "source_frame", "antenna_pattern", "check_before_coalescence", "residual_basis",
    "basis_coefficients", "residuals",
]
