"""F-statistics for a circular binary: per-pulsar projections, Fe and Fp.

For each GW frequency f and pulsar p the data enter only through
``X = (r|sin 2πf(t−t0))``, ``Y = (r|cos 2πf(t−t0))`` and the 2×2 matrix Z of
the sine/cosine inner products (Ellis, Siemens & Creighton 2012, ApJ 756,
175). :func:`project` computes them once (batched through the
noise-weighting engine); everything sky-dependent then costs O(N_psr) per
pixel:

``N = [ΣF+X, ΣF+Y, ΣFxX, ΣFxY]``, ``M = Σ_p [[F+², F+Fx],[F+Fx, Fx²]] ⊗ Z_p``,
``Fe = ½ Nᵀ M⁻¹ N`` (2Fe ~ χ²(4) in noise), ``Fp = ½ Σ_p [X Y] Z_p⁻¹ [X Y]ᵀ``
(2Fp ~ χ²(2 N_psr) in noise).

The maximum-likelihood Earth-term amplitudes ``b = M⁻¹ N`` describe the
signal ``r = F+ (b1 sin + b2 cos) + Fx (b3 sin + b4 cos)``;
:func:`amplitudes_to_parameters` turns them into (h0, cos ι, ψ, Φ0).

Single pulsar: M is then rank 2 and the pseudo-inverse gives
``Fe = Fp`` of that pulsar (2Fe ~ χ²(2)).

Examples
--------
>>> import numpy as np
>>> from cwsearch.simulate import invented_array, simulated_array
>>> from cwsearch.noise import NoiseWeighting
>>> from cwsearch import fstat
>>> arr = simulated_array(invented_array(n_pulsars=6, years=10, seed=2), seed=3)
>>> proj = fstat.project(NoiseWeighting(arr), np.array([5e-9, 1e-8]))
>>> fe = fstat.fe_statistic(proj, np.array([1.0]), np.array([0.3]))
>>> fe.shape
(1, 2)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit, prange

from .waveform import antenna_pattern


@dataclass
class Projections:
    """Per-pulsar, per-frequency data projections (the scan's sufficient statistics).

    ``x``, ``y``: (P, F); ``z``: (P, F, 3) holding (sin|sin), (sin|cos), (cos|cos).
    """

    frequencies: np.ndarray
    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    positions: np.ndarray


def sine_cosine_basis(toas, reference_time, frequencies):
    """``sin`` and ``cos`` of ``2π f (t − t0)`` for all TOAs and frequencies: two (n, F) arrays."""
    arg = 2 * np.pi * np.outer(np.asarray(toas) - reference_time, frequencies)
    return np.sin(arg), np.cos(arg)


def project(engine, frequencies, residuals=None) -> Projections:
    """Compute X, Y, Z for every pulsar and frequency through the noise-weighting engine.

    ``residuals`` (list of arrays) replaces the dataset residuals, e.g. for
    null simulations with the same TOAs and noise model.
    """
    frequencies = np.asarray(frequencies, dtype=float)
    n_psr, n_freq = len(engine), frequencies.size
    x = np.empty((n_psr, n_freq))
    y = np.empty((n_psr, n_freq))
    z = np.empty((n_psr, n_freq, 3))
    t0 = engine.array.reference_time
    for i, w in enumerate(engine):
        r = w.pulsar.residuals if residuals is None else residuals[i]
        sin, cos = sine_cosine_basis(w.pulsar.toas, t0, frequencies)
        wr, ur = w.whiten(r)
        ws, us = w.whiten(sin)
        wc, uc = w.whiten(cos)
        x[i] = wr @ ws - ur @ us
        y[i] = wr @ wc - ur @ uc
        z[i, :, 0] = np.einsum("ij,ij->j", ws, ws) - np.einsum("ij,ij->j", us, us)
        z[i, :, 1] = np.einsum("ij,ij->j", ws, wc) - np.einsum("ij,ij->j", us, uc)
        z[i, :, 2] = np.einsum("ij,ij->j", wc, wc) - np.einsum("ij,ij->j", uc, uc)
    return Projections(frequencies, x, y, z, engine.array.positions)


@njit(cache=True)
def _solve_psd(m, v, out):
    """Solve m a = v for symmetric positive semi-definite 4×4 m (LDLᵀ, tiny pivots dropped).

    Dropping a pivot makes this the minimum-norm-like solution on the
    column space, which gives the pseudo-inverse quadratic form vᵀ m⁺ v.
    """
    n = 4
    lower = np.zeros((n, n))
    diag = np.zeros(n)
    scale = 0.0
    for i in range(n):
        scale = max(scale, m[i, i])
    tol = 1e-10 * scale
    for j in range(n):
        s = m[j, j]
        for k in range(j):
            s -= lower[j, k] ** 2 * diag[k]
        diag[j] = s if s > tol else 0.0
        lower[j, j] = 1.0
        for i in range(j + 1, n):
            s = m[i, j]
            for k in range(j):
                s -= lower[i, k] * lower[j, k] * diag[k]
            lower[i, j] = s / diag[j] if diag[j] > 0 else 0.0
    tmp = np.zeros(n)
    for i in range(n):
        s = v[i]
        for k in range(i):
            s -= lower[i, k] * tmp[k]
        tmp[i] = s
    for i in range(n):
        tmp[i] = tmp[i] / diag[i] if diag[i] > 0 else 0.0
    for i in range(n - 1, -1, -1):
        s = tmp[i]
        for k in range(i + 1, n):
            s -= lower[k, i] * out[k]
        out[i] = s


@njit(cache=True, parallel=True)
def _sky_kernel(x, y, z, fplus, fcross, fe_out, amp_out, n_out, m_out, want_amp, want_nm):
    n_sky, n_psr = fplus.shape
    n_freq = x.shape[1]
    for s in prange(n_sky):
        nv = np.zeros(4)
        mm = np.zeros((4, 4))
        sol = np.zeros(4)
        for f in range(n_freq):
            nv[:] = 0.0
            mm[:, :] = 0.0
            for p in range(n_psr):
                fp = fplus[s, p]
                fc = fcross[s, p]
                xx = x[p, f]
                yy = y[p, f]
                zss = z[p, f, 0]
                zsc = z[p, f, 1]
                zcc = z[p, f, 2]
                nv[0] += fp * xx
                nv[1] += fp * yy
                nv[2] += fc * xx
                nv[3] += fc * yy
                pp, pc, cc = fp * fp, fp * fc, fc * fc
                mm[0, 0] += pp * zss
                mm[0, 1] += pp * zsc
                mm[1, 1] += pp * zcc
                mm[0, 2] += pc * zss
                mm[0, 3] += pc * zsc
                mm[1, 2] += pc * zsc
                mm[1, 3] += pc * zcc
                mm[2, 2] += cc * zss
                mm[2, 3] += cc * zsc
                mm[3, 3] += cc * zcc
            for i in range(4):
                for j in range(i):
                    mm[i, j] = mm[j, i]
            _solve_psd(mm, nv, sol)
            fe = 0.0
            for i in range(4):
                fe += nv[i] * sol[i]
            fe_out[s, f] = 0.5 * fe
            if want_amp:
                for i in range(4):
                    amp_out[s, f, i] = sol[i]
            if want_nm:
                for i in range(4):
                    n_out[s, f, i] = nv[i]
                    for j in range(4):
                        m_out[s, f, i, j] = mm[i, j]


def _run_kernel(proj, fplus, fcross, want_amp=False, want_nm=False):
    fplus = np.ascontiguousarray(np.atleast_2d(fplus), dtype=float)
    fcross = np.ascontiguousarray(np.atleast_2d(fcross), dtype=float)
    n_sky, n_freq = fplus.shape[0], proj.frequencies.size
    fe = np.empty((n_sky, n_freq))
    amp = np.empty((n_sky, n_freq, 4) if want_amp else (1, 1, 4))
    nvec = np.empty((n_sky, n_freq, 4) if want_nm else (1, 1, 4))
    mmat = np.empty((n_sky, n_freq, 4, 4) if want_nm else (1, 1, 4, 4))
    _sky_kernel(np.ascontiguousarray(proj.x), np.ascontiguousarray(proj.y), np.ascontiguousarray(proj.z),
                fplus, fcross, fe, amp, nvec, mmat, want_amp, want_nm)
    return fe, amp, nvec, mmat


def fe_statistic(proj: Projections, fplus, fcross):
    """Fe for each sky position (rows of ``fplus``/``fcross``, shape (S, P)) and frequency: (S, F)."""
    return _run_kernel(proj, fplus, fcross)[0]


def fe_with_amplitudes(proj: Projections, fplus, fcross):
    """Fe (S, F) and maximum-likelihood amplitudes ``b = M⁻¹N`` (S, F, 4)."""
    fe, amp, _, _ = _run_kernel(proj, fplus, fcross, want_amp=True)
    return fe, amp


def network_vectors(proj: Projections, fplus, fcross):
    """The 4-vector N (S, F, 4) and 4×4 matrix M (S, F, 4, 4) for each sky position and frequency."""
    _, _, nvec, mmat = _run_kernel(proj, fplus, fcross, want_nm=True)
    return nvec, mmat


def sky_patterns(proj: Projections, ra, dec):
    """Antenna patterns (S, P) for sky positions ``ra``, ``dec`` [rad] and the projections' pulsars."""
    fplus, fcross, _ = antenna_pattern(np.atleast_1d(ra), np.atleast_1d(dec), proj.positions)
    return fplus, fcross


def fp_statistic(proj: Projections):
    """Fp per frequency: ``½ Σ_p [X Y] Z_p⁻¹ [X Y]ᵀ`` (F,)."""
    zss, zsc, zcc = proj.z[..., 0], proj.z[..., 1], proj.z[..., 2]
    det = zss * zcc - zsc**2
    quad = (zcc * proj.x**2 - 2 * zsc * proj.x * proj.y + zss * proj.y**2) / det
    return 0.5 * quad.sum(axis=0)


def amplitudes_to_parameters(amplitudes, gw_frequency):
    """(h0, cos ι, ψ, Φ0) from Earth-term amplitudes ``b`` (..., 4) at ``gw_frequency`` [Hz].

    Inverts ``b1 + i b2 = e^{2iΦ0}(A+ cos2ψ + i Ax sin2ψ)``,
    ``b3 + i b4 = e^{2iΦ0}(A+ sin2ψ − i Ax cos2ψ)`` with
    ``A+ = h0 (1+cos²ι)/(2ω0)``, ``Ax = h0 cosι/ω0``, ``ω0 = π f``. ψ in [0, π/2),
    Φ0 in [0, π) (the usual two-fold degeneracies).
    """
    b = np.asarray(amplitudes, dtype=float)
    u = b[..., 0] + 1j * b[..., 1]
    v = b[..., 2] + 1j * b[..., 3]
    plus, minus = u + 1j * v, u - 1j * v
    r1, r2 = np.sqrt(np.abs(plus)), np.sqrt(np.abs(minus))
    scaled = ((r1 + r2) / 2) ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        cos_inc = np.where(r1 + r2 > 0, (r1 - r2) / (r1 + r2), 0.0)
    a1, a2 = np.angle(plus), np.angle(minus)
    phase = np.mod((a1 + a2) / 4, np.pi / 2)
    psi = np.mod((a1 - a2) / 4, np.pi / 2)
    # (a1 + a2)/4 is defined modulo π/2; fix Φ0 modulo π by the sign of b1 reconstruction
    strain = scaled * 2 * np.pi * np.asarray(gw_frequency)
    recon = parameters_to_amplitudes(strain, cos_inc, psi, phase, gw_frequency)
    flip = np.sum(recon * b, axis=-1) < 0
    phase = np.where(flip, phase + np.pi / 2, phase)
    return strain, cos_inc, psi, phase


def parameters_to_amplitudes(strain, cos_inclination, polarization, phase, gw_frequency):
    """Earth-term amplitudes ``b`` (..., 4) for (h0, cos ι, ψ, Φ0) at ``gw_frequency`` [Hz]."""
    scale = np.asarray(strain) / (2 * np.pi * np.asarray(gw_frequency))
    c = np.asarray(cos_inclination)
    a_plus, a_cross = scale * (1 + c**2), scale * 2 * c
    c2p, s2p = np.cos(2 * polarization), np.sin(2 * polarization)
    c2f, s2f = np.cos(2 * phase), np.sin(2 * phase)
    return np.stack([a_plus * c2p * c2f - a_cross * s2p * s2f,
                     a_plus * c2p * s2f + a_cross * s2p * c2f,
                     a_plus * s2p * c2f + a_cross * c2p * s2f,
                     a_plus * s2p * s2f - a_cross * c2p * c2f], axis=-1)
