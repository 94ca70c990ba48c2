"""Fast likelihood of one circular binary, with pulsar phases marginalised (docs/design.md §7).

The log likelihood ratio against noise only is ``ln Λ = (d|s) − ½ (s|s)``.
Each pulsar's signal is ``s = Σ_j c_j b_j`` with the four basis series
``b_j`` of :func:`cwsearch.physics.waveform.residual_basis` (they depend on the
*shape* parameters: frequency, chirp mass, sky position, pulsar distance)
and the weights ``c_j`` of :func:`cwsearch.physics.waveform.basis_coefficients`
(the *projection* parameters: strain, inclination, polarisation, phase,
pulsar phase). Per pulsar we keep ``D_j = (d|b_j)`` and ``G_ij = (b_i|b_j)``;
then every projection evaluation costs O(N_psr).

Pulsar phases. For block-diagonal noise ``ln Λ`` is a sum over pulsars, and
in the pulsar-term phase ``χ`` each pulsar's term is
``a cosχ + b sinχ + c cos2χ + d sin2χ + e``. Each pulsar's factor
``exp(...)`` is averaged over a uniform phase on a periodic grid of K points
(trapezoid rule, which converges exponentially for smooth periodic
integrands). K is chosen per pulsar and evaluation from the sizes
``r1 = |(a, b)|`` and ``r2 = |(c, d)|`` so that the aliasing error, of order
``I_K(r)/I_0(r)``, stays below about 1e-13; a fixed K can be forced.

Full shape evaluations (every proposal of an ensemble sampler changes all
parameters) are batched over walkers: a numba kernel (parallel over
walkers) builds the basis series with a branch-free sine/cosine, then one
matrix product per pulsar applies the noise engine's whitening operator
to all walkers at once.

Sampler parameters (:data:`PARAMETER_NAMES`): ``ra`` [rad], ``sin_dec``,
``log10_frequency`` [Hz], ``log10_chirp_mass`` [Msun], ``log10_strain``
(or ``strain`` with a uniform strain prior), ``cos_inclination``,
``polarization`` [rad, 0..π), ``phase`` [rad, 0..π).

Examples
--------
>>> import numpy as np
>>> from cwsearch.physics.simulate import invented_array, simulated_array
>>> from cwsearch.physics.noise import NoiseSettings
>>> from cwsearch.inference.likelihood import Likelihood
>>> arr = simulated_array(invented_array(n_pulsars=4, years=10, seed=1), seed=2)
>>> like = Likelihood(arr, NoiseSettings(red_components=5))
>>> theta = np.array([[1.0, 0.2, np.log10(8e-9), 8.5, -14.5, 0.3, 0.4, 0.5]])
>>> bool(np.isfinite(like.batch(theta)[0]))
True
"""

from __future__ import annotations

import copy
from dataclasses import dataclass
from math import factorial

import numpy as np
from numba import njit, prange
from scipy.special import jv

from ..core.constants import KPC_SECONDS, SOLAR_MASS_SECONDS
from ..physics import waveform
from ..physics.noise import NoiseSettings, NoiseWeighting

PARAMETER_NAMES = ("ra", "sin_dec", "log10_frequency", "log10_chirp_mass", "log10_strain",
                   "cos_inclination", "polarization", "phase")
UNIFORM_STRAIN_NAMES = PARAMETER_NAMES[:4] + ("strain",) + PARAMETER_NAMES[5:]
#: how the follow-up treats pulsar distances (docs/design.md §7 "Pulsar distances"): each pulsar's
#: pulsar-term phase marginalised on a grid with the distance at its catalogue value (default), or the
#: distance sampled with its Gaussian prior and the pulsar-term phase coherent from it
PULSAR_DISTANCE_MODES = ("marginalise-phase", "sample-distance")

# Series for |u| < 1e-3 (u = κΔt, the fractional chirp): the phase factor
# g(u) = (1 − (1−u)^(5/8)) / (5u/8) and the envelope (1−u)^(1/8), truncated after u^6
# (remainder < 1e-19); global floats become compile-time constants in numba.
def _series(power, scale):
    out = [1.0]
    for k in range(1, 8):
        out.append(out[-1] * (k - power) / (k + 1) if scale else out[-1] * (k - 1 - power) / k)
    return out


_G0, _G1, _G2, _G3, _G4, _G5, _G6, _G7 = _series(5 / 8, True)
_E0, _E1, _E2, _E3, _E4, _E5, _E6, _E7 = _series(1 / 8, False)
_CHIRP_SERIES = np.array([_G0, _G1, _G2, _G3, _G4, _G5, _G6, _G7])
_SERIES_LIMIT = 1e-3
# batches smaller than these (walkers × TOAs, walkers × pulsars) run on one thread
_PARALLEL_BASIS = 200_000
_PARALLEL_PROJECTIONS = 20_000
_PARALLEL_NODES = 20_000
_LAPLACE_ABOVE = 2.0e4

_PIO2_HI = 1.57079632673412561417e+00   # π/2 split in two parts (Cody & Waite range reduction)
_PIO2_LO = 6.07710050650619224932e-11
_TWO_OVER_PI = 0.63661977236758134308


# ---------------------------------------------------------------- numba kernels
@njit(cache=True, inline="always")
def _sincos(x):
    """sin x and cos x without library calls, so loops over it vectorise: Cody–Waite
    reduction to |r| ≤ π/4, Taylor polynomials to r^17 / r^18 (truncation < 1e-19),
    quadrant chosen with selects."""
    k = np.floor(x * _TWO_OVER_PI + 0.5)
    r = (x - k * _PIO2_HI) - k * _PIO2_LO
    z = r * r
    s = r * (1.0 + z * (-1.0 / 6 + z * (1.0 / 120 + z * (-1.0 / 5040 + z * (1.0 / 362880 + z * (
        -1.0 / 39916800 + z * (1.0 / 6227020800 + z * (-1.0 / 1307674368000 + z * (
            1.0 / 355687428096000)))))))))
    c = 1.0 + z * (-0.5 + z * (1.0 / 24 + z * (-1.0 / 720 + z * (1.0 / 40320 + z * (
        -1.0 / 3628800 + z * (1.0 / 479001600 + z * (-1.0 / 87178291200 + z * (
            1.0 / 20922789888000 + z * (-1.0 / 6402373705728000)))))))))
    q = k - 4.0 * np.floor(k * 0.25)          # quadrant k mod 4, exact in floating point
    odd = q == 1.0 or q == 3.0
    ss = c if odd else s
    cc = s if odd else c
    ss = -ss if q >= 2.0 else ss
    cc = -cc if (q == 1.0 or q == 2.0) else cc
    return ss, cc


@njit(cache=True)
def sincos(x):
    """Vectorised :func:`_sincos` over a 1-d array (exposed for tests)."""
    s = np.empty_like(x)
    c = np.empty_like(x)
    for i in range(x.shape[0]):
        s[i], c[i] = _sincos(x[i])
    return s, c


@njit(cache=True, inline="always", error_model="numpy")
def _fill_term(dt, omega, kappa, amplitude, series, out_s, out_c):
    """One term's two basis series: env·sin(2ωΔt·g(u)), env·cos(...), u = κΔt,
    env = A (1−u)^(1/8), g(u) = (1 − (1−u)^(5/8)) / (5u/8) (series for small u)."""
    n = dt.shape[0]
    if series:
        for i in range(n):
            u = kappa * dt[i]
            g = _G0 + u * (_G1 + u * (_G2 + u * (_G3 + u * (_G4 + u * (_G5 + u * (_G6 + u * _G7))))))
            env = amplitude * (_E0 + u * (_E1 + u * (_E2 + u * (_E3 + u * (_E4 + u * (_E5 + u * (
                _E6 + u * _E7)))))))
            s, c = _sincos(2.0 * omega * dt[i] * g)
            out_s[i] = env * s
            out_c[i] = env * c
    else:
        for i in range(n):
            u = kappa * dt[i]
            y = np.sqrt(np.sqrt(np.sqrt(1.0 - u)))
            g = (1.0 - y * y * y * y * y) / (0.625 * u)
            g = 1.0 if u == 0.0 else g
            s, c = _sincos(2.0 * omega * dt[i] * g)
            out_s[i] = amplitude * y * s
            out_c[i] = amplitude * y * c


@njit(cache=True, error_model="numpy")
def _basis_one(w, dt, omega_e, kappa_e, amp_e, omega_p, kappa_p, amp_p, t_max, out):
    """Basis series of walker w: out[w, j, i] (2 columns: Earth only; 4: with pulsar term)."""
    _fill_term(dt, omega_e[w], kappa_e[w], amp_e[w], abs(kappa_e[w] * t_max) < _SERIES_LIMIT, out[w, 0], out[w, 1])
    if out.shape[1] == 4:
        _fill_term(dt, omega_p[w], kappa_p[w], amp_p[w], abs(kappa_p[w] * t_max) < _SERIES_LIMIT,
                   out[w, 2], out[w, 3])


@njit(cache=True, parallel=True)
def _basis_parallel(dt, omega_e, kappa_e, amp_e, omega_p, kappa_p, amp_p, t_max, out):
    for w in prange(out.shape[0]):
        _basis_one(w, dt, omega_e, kappa_e, amp_e, omega_p, kappa_p, amp_p, t_max, out)


@njit(cache=True)
def _basis_serial(dt, omega_e, kappa_e, amp_e, omega_p, kappa_p, amp_p, t_max, out):
    for w in range(out.shape[0]):
        _basis_one(w, dt, omega_e, kappa_e, amp_e, omega_p, kappa_p, amp_p, t_max, out)


@njit(cache=True, fastmath=True)
def _gram_one(w, basis, inv_var, whitened, out):
    """out[w] = B_w diag(1/σ²) B_wᵀ − U_w U_wᵀ: the matrix (b_i|b_j) of walker w."""
    n_w, ncol, n = basis.shape
    k = whitened.shape[2]
    acc = np.zeros((4, 4))
    for i in range(n):
        iv = inv_var[i]
        b0 = basis[w, 0, i] * iv
        b1 = basis[w, 1, i] * iv
        acc[0, 0] += b0 * basis[w, 0, i]
        acc[0, 1] += b0 * basis[w, 1, i]
        acc[1, 1] += b1 * basis[w, 1, i]
        if ncol == 4:
            acc[0, 2] += b0 * basis[w, 2, i]
            acc[0, 3] += b0 * basis[w, 3, i]
            acc[1, 2] += b1 * basis[w, 2, i]
            acc[1, 3] += b1 * basis[w, 3, i]
            acc[2, 2] += basis[w, 2, i] * basis[w, 2, i] * iv
            acc[2, 3] += basis[w, 2, i] * basis[w, 3, i] * iv
            acc[3, 3] += basis[w, 3, i] * basis[w, 3, i] * iv
    for a in range(ncol):
        for b in range(a, ncol):
            v = acc[a, b]
            for m in range(k):
                v -= whitened[w, a, m] * whitened[w, b, m]
            out[w, a, b] = v
            out[w, b, a] = v


@njit(cache=True, parallel=True)
def _gram_parallel(basis, inv_var, whitened, out):
    for w in prange(basis.shape[0]):
        _gram_one(w, basis, inv_var, whitened, out)


@njit(cache=True)
def _gram_serial(basis, inv_var, whitened, out):
    for w in range(basis.shape[0]):
        _gram_one(w, basis, inv_var, whitened, out)


@njit(cache=True, error_model="numpy")
def _earth_at_nodes(node_dt, t_max, omega0, kappa_e, amp0, out):
    """Earth-term series of every walker at the nodes, out (W, 2, m): the same for all pulsars."""
    for w in range(omega0.shape[0]):
        _fill_term(node_dt, omega0[w], kappa_e[w], amp0[w], abs(kappa_e[w] * t_max) < _SERIES_LIMIT,
                   out[w, 0], out[w, 1])


@njit(cache=True, fastmath=True, error_model="numpy")
def _nodes_one(p, earth, node_dt, t_max, omega_p, kappa_p, amp_p, data_products, gram_products, dvec, gmat):
    """Pulsar p, every walker: pulsar-term series at the nodes, then dvec = v·y and gmat = v K vᵀ
    with the cached y = Lᵀ C⁻¹ d and K = Lᵀ C⁻¹ L (K stays in cache across the walkers)."""
    ncol = dvec.shape[2]
    m = data_products.shape[1]
    values = np.empty((ncol, m))
    weighted = np.empty((ncol, m))
    gram = gram_products[p]
    data = data_products[p]
    for w in range(earth.shape[0]):
        values[0, :] = earth[w, 0]
        values[1, :] = earth[w, 1]
        if ncol == 4:
            _fill_term(node_dt, omega_p[w, p], kappa_p[w, p], amp_p[w, p],
                       abs(kappa_p[w, p] * t_max) < _SERIES_LIMIT, values[2], values[3])
        for n in range(m):
            row = gram[n]
            for i in range(ncol):
                acc = 0.0
                for k in range(m):
                    acc += row[k] * values[i, k]
                weighted[i, n] = acc
        for i in range(ncol):
            acc = 0.0
            for n in range(m):
                acc += values[i, n] * data[n]
            dvec[w, p, i] = acc
            for j in range(i, ncol):
                acc = 0.0
                for n in range(m):
                    acc += values[j, n] * weighted[i, n]
                gmat[w, p, i, j] = acc
                gmat[w, p, j, i] = acc


@njit(cache=True, parallel=True)
def _nodes_parallel(pulsars, earth, node_dt, t_max, omega_p, kappa_p, amp_p, data_products, gram_products,
                    dvec, gmat):
    for q in prange(pulsars.shape[0]):
        _nodes_one(pulsars[q], earth, node_dt, t_max, omega_p, kappa_p, amp_p, data_products, gram_products,
                   dvec, gmat)


@njit(cache=True)
def _nodes_serial(pulsars, earth, node_dt, t_max, omega_p, kappa_p, amp_p, data_products, gram_products,
                  dvec, gmat):
    for q in range(pulsars.shape[0]):
        _nodes_one(pulsars[q], earth, node_dt, t_max, omega_p, kappa_p, amp_p, data_products, gram_products,
                   dvec, gmat)


@njit(cache=True, inline="always")
def _grid_size(r):
    return int(np.ceil(7.0 + 7.0 * np.sqrt(r) + 0.03 * r))


# Series of I_k(z) = (z/2)^k Σ_j (z²/4)^j / (j! (j+k)!), k ≤ 16, j ≤ 14 (for z ≤ 2 the
# truncation is below 1e-20 relative): coefficients 1/(j!(j+k)!) as a table.
def _bessel_table(k_max=16, j_max=14):
    return np.array([[1.0 / (factorial(j) * factorial(j + k)) for j in range(j_max + 1)]
                     for k in range(k_max + 1)])


_BESSEL_TABLE = _bessel_table()
_BESSEL_BELOW = 2.0     # r1 + r2 below this: Bessel series instead of the grid


@njit(cache=True, inline="always")
def _bessel_sum(q, k):
    """Σ_j q^j / (j! (j+k)!) (so that I_k(z) = (z/2)^k times this at q = z²/4)."""
    coef = _BESSEL_TABLE[k]
    acc = coef[coef.shape[0] - 1]
    for j in range(coef.shape[0] - 2, -1, -1):
        acc = acc * q + coef[j]
    return acc


@njit(cache=True)
def _bessel_log_mean(a, b, c, d):
    """ln (1/2π)∫ exp(a cosχ + b sinχ + c cos2χ + d sin2χ) dχ for small amplitudes, by the
    Jacobi–Anger expansion: I0(r1) I0(r2) + 2 Σ_n I_2n(r1) I_n(r2) cos(n(2α − β)),
    (a, b) = r1 (cos α, sin α), (c, d) = r2 (cos β, sin β); terms up to n = 8, stopping once
    they fall below 1e-17 of the sum (error < 1e-18 for r1 + r2 < 2)."""
    r1sq = a * a + b * b
    r2sq = c * c + d * d
    q1, q2 = 0.25 * r1sq, 0.25 * r2sq
    total = _bessel_sum(q1, 0) * _bessel_sum(q2, 0)
    if r1sq > 0.0 and r2sq > 0.0:
        r2 = np.sqrt(r2sq)
        cos_t = ((a * a - b * b) * c + 2.0 * a * b * d) / (r1sq * r2)
        c_prev, c_now = 1.0, cos_t             # cos(nθ) by the Chebyshev recurrence
        h2 = 0.5 * r2
        power = 1.0                            # (r1/2)^(2n) (r2/2)^n
        for n in range(1, 9):
            power *= q1 * h2
            term = 2.0 * power * _bessel_sum(q1, 2 * n) * _bessel_sum(q2, n) * c_now
            total += term
            if abs(term) < 1e-17 * total:
                break
            c_prev, c_now = c_now, 2.0 * cos_t * c_now - c_prev
    return np.log(total)


@njit(cache=True)
def _laplace_log_mean(a, b, c, d):
    """ln (1/2π)∫ exp(f) dχ for very peaked f (amplitudes ≫ 1): Laplace's method summed over
    the (at most two) maxima of f, each refined by Newton steps from a 64-point grid."""
    n = 64
    step = 2.0 * np.pi / n
    vals = np.empty(n)
    for m in range(n):
        x = m * step
        vals[m] = a * np.cos(x) + b * np.sin(x) + c * np.cos(2 * x) + d * np.sin(2 * x)
    peaks = np.empty(n)
    n_peaks = 0
    for m in range(n):
        if vals[m] >= vals[(m - 1) % n] and vals[m] > vals[(m + 1) % n]:
            x = m * step
            for _ in range(30):
                d1 = -a * np.sin(x) + b * np.cos(x) - 2 * c * np.sin(2 * x) + 2 * d * np.cos(2 * x)
                d2 = -a * np.cos(x) - b * np.sin(x) - 4 * c * np.cos(2 * x) - 4 * d * np.sin(2 * x)
                if d2 >= 0:
                    break
                dx = -d1 / d2
                dx = max(-step, min(step, dx))
                x += dx
                if abs(dx) < 1e-15:
                    break
            f = a * np.cos(x) + b * np.sin(x) + c * np.cos(2 * x) + d * np.sin(2 * x)
            d2 = -a * np.cos(x) - b * np.sin(x) - 4 * c * np.cos(2 * x) - 4 * d * np.sin(2 * x)
            peaks[n_peaks] = f + 0.5 * np.log(2 * np.pi / max(-d2, 1e-300)) - np.log(2 * np.pi)
            n_peaks += 1
    top = peaks[:n_peaks].max()
    return top + np.log(np.sum(np.exp(peaks[:n_peaks] - top)))


@njit(cache=True)
def marginal_log_factor(a, b, c, d, e, n_grid):
    """ln of (1/2π)∫ exp(a cosχ + b sinχ + c cos2χ + d sin2χ + e) dχ on a periodic grid.

    ``n_grid`` ≤ 0 chooses the grid size from the amplitudes (aliasing error ≲ 1e-13); for small
    amplitudes (``r1 + r2 <`` :data:`_BESSEL_BELOW`, the usual case for one pulsar) the
    Bessel-function series of :func:`_bessel_log_mean` replaces the grid (no exponentials);
    above :data:`_LAPLACE_ABOVE` (likelihood terms of that many nats, far outside any
    posterior) Laplace's method does (relative error of order 1/amplitude).
    """
    r1 = np.sqrt(a * a + b * b)
    r2 = np.sqrt(c * c + d * d)
    if n_grid <= 0 and r1 + r2 > _LAPLACE_ABOVE:
        return e + _laplace_log_mean(a, b, c, d)
    if n_grid <= 0 and r1 + r2 < _BESSEL_BELOW:
        return e + _bessel_log_mean(a, b, c, d)
    k = n_grid if n_grid > 0 else _grid_size(r1) + 2 * _grid_size(r2)
    shift = r1 + r2
    step = 2.0 * np.pi / k
    cs, sn = np.cos(step), np.sin(step)
    cm, sm = 1.0, 0.0
    total = 0.0
    for m in range(k):
        f = a * cm + b * sm + c * (cm * cm - sm * sm) + d * (2.0 * cm * sm)
        total += np.exp(f - shift)
        if (m & 31) == 31:    # re-anchor the rotation to bound rounding growth
            cm, sm = np.cos((m + 1) * step), np.sin((m + 1) * step)
        else:
            cm, sm = cm * cs - sm * sn, sm * cs + cm * sn
    if total < 1e-250:     # (near) underflow, |amplitudes| ≳ 500: second pass with the exact maximum
        fmax = -np.inf
        for m in range(k):
            x = m * step
            f = a * np.cos(x) + b * np.sin(x) + c * np.cos(2 * x) + d * np.sin(2 * x)
            fmax = max(fmax, f)
        total = 0.0
        for m in range(k):
            x = m * step
            total += np.exp(a * np.cos(x) + b * np.sin(x) + c * np.cos(2 * x) + d * np.sin(2 * x) - fmax)
        shift = fmax
    return e + shift + np.log(total / k)


@njit(cache=True, inline="always")
def _earth_weights(fp, fx, h, ci, c2p, s2p, c0, s0):
    """Earth-term weights (e1, e2) of one source in one pulsar and the pulsar-term amplitude
    ``h √(P² + Q²)`` (as :func:`cwsearch.physics.waveform.basis_coefficients`)."""
    pa = (1 + ci * ci) * (fp * c2p + fx * s2p)
    qa = 2 * ci * (fp * s2p - fx * c2p)
    return h * (pa * c0 - qa * s0), h * (pa * s0 + qa * c0), h * np.sqrt(pa * pa + qa * qa)


@njit(cache=True, inline="always")
def _phase_coefficients(e1, e2, amp, dv, g, out):
    """One source in one pulsar: ln Λ_p = a cosχ + b sinχ + c cos2χ + d sin2χ + e in its pulsar-term
    phase χ (pulsar-term weights −amp (cos χ, sin χ)), from its Earth weights, ``dv`` = (d|b_j) and
    ``g`` = (b_i|b_j); (a, b, c, d, e) into ``out``; returns the Earth-only part of e."""
    earth = e1 * dv[0] + e2 * dv[1] - 0.5 * (e1 * e1 * g[0, 0] + 2 * e1 * e2 * g[0, 1] + e2 * e2 * g[1, 1])
    v3 = e1 * g[0, 2] + e2 * g[1, 2]
    v4 = e1 * g[0, 3] + e2 * g[1, 3]
    out[0] = amp * (v3 - dv[2])
    out[1] = amp * (v4 - dv[3])
    out[2] = -0.25 * amp * amp * (g[2, 2] - g[3, 3])
    out[3] = -0.5 * amp * amp * g[2, 3]
    out[4] = earth - 0.25 * amp * amp * (g[2, 2] + g[3, 3])
    return earth


@njit(cache=True)
def _projection_one(w, fplus, fcross, strain, cos_inclination, psi, phase, dvec, gmat, pulsar_term, n_grid, out):
    """ln Λ of walker w with pulsar phases marginalised (or Earth term only)."""
    n_p = fplus.shape[1]
    ci = cos_inclination[w]
    c2p, s2p = np.cos(2 * psi[w]), np.sin(2 * psi[w])
    c0, s0 = np.cos(2 * phase[w]), np.sin(2 * phase[w])
    h = strain[w]
    total = 0.0
    coef = np.empty(5)
    for p in range(n_p):
        e1, e2, amp = _earth_weights(fplus[w, p], fcross[w, p], h, ci, c2p, s2p, c0, s0)
        earth = _phase_coefficients(e1, e2, amp, dvec[w, p], gmat[w, p], coef)
        if not pulsar_term:
            total += earth
            continue
        total += marginal_log_factor(coef[0], coef[1], coef[2], coef[3], coef[4], n_grid)
    out[w] = total


@njit(cache=True, parallel=True)
def _projection_parallel(fplus, fcross, strain, cos_inclination, psi, phase, dvec, gmat, pulsar_term, n_grid, out):
    for w in prange(fplus.shape[0]):
        _projection_one(w, fplus, fcross, strain, cos_inclination, psi, phase, dvec, gmat, pulsar_term, n_grid, out)


@njit(cache=True)
def _projection_serial(fplus, fcross, strain, cos_inclination, psi, phase, dvec, gmat, pulsar_term, n_grid, out):
    for w in range(fplus.shape[0]):
        _projection_one(w, fplus, fcross, strain, cos_inclination, psi, phase, dvec, gmat, pulsar_term, n_grid, out)


def _projection_batch(fplus, *args):
    """Serial for small batches (thread start-up would dominate), parallel over walkers otherwise."""
    kernel = _projection_parallel if fplus.size >= _PARALLEL_PROJECTIONS else _projection_serial
    kernel(fplus, *args)


@njit(cache=True)
def _projection_coherent_one(w, fplus, fcross, strain, cos_inclination, psi, phase, pulsar_phase, coherent, dvec,
                             gmat, n_grid, out):
    """ln Λ of walker w: pulsars with ``coherent[p]`` at their pulsar-term phase ``pulsar_phase[w, p]``
    (from the sampled distance), the others with the phase marginalised as in :func:`_projection_one`."""
    n_p = fplus.shape[1]
    ci = cos_inclination[w]
    c2p, s2p = np.cos(2 * psi[w]), np.sin(2 * psi[w])
    c0, s0 = np.cos(2 * phase[w]), np.sin(2 * phase[w])
    h = strain[w]
    total = 0.0
    for p in range(n_p):
        fp, fx = fplus[w, p], fcross[w, p]
        pa = (1 + ci * ci) * (fp * c2p + fx * s2p)
        qa = 2 * ci * (fp * s2p - fx * c2p)
        e1 = h * (pa * c0 - qa * s0)
        e2 = h * (pa * s0 + qa * c0)
        g = gmat[w, p]
        dv = dvec[w, p]
        earth = e1 * dv[0] + e2 * dv[1] - 0.5 * (e1 * e1 * g[0, 0] + 2 * e1 * e2 * g[0, 1] + e2 * e2 * g[1, 1])
        if coherent[p]:
            cp, sp = np.cos(2 * pulsar_phase[w, p]), np.sin(2 * pulsar_phase[w, p])
            p1 = -h * (pa * cp - qa * sp)
            p2 = -h * (pa * sp + qa * cp)
            total += (earth + p1 * dv[2] + p2 * dv[3]
                      - (e1 * p1 * g[0, 2] + e1 * p2 * g[0, 3] + e2 * p1 * g[1, 2] + e2 * p2 * g[1, 3])
                      - 0.5 * (p1 * p1 * g[2, 2] + 2 * p1 * p2 * g[2, 3] + p2 * p2 * g[3, 3]))
            continue
        amp = h * np.sqrt(pa * pa + qa * qa)
        v3 = e1 * g[0, 2] + e2 * g[1, 2]
        v4 = e1 * g[0, 3] + e2 * g[1, 3]
        a = amp * (v3 - dv[2])
        b = amp * (v4 - dv[3])
        c = -0.25 * amp * amp * (g[2, 2] - g[3, 3])
        d = -0.5 * amp * amp * g[2, 3]
        e = earth - 0.25 * amp * amp * (g[2, 2] + g[3, 3])
        total += marginal_log_factor(a, b, c, d, e, n_grid)
    out[w] = total


@njit(cache=True, parallel=True)
def _projection_coherent_parallel(fplus, fcross, strain, cos_inclination, psi, phase, pulsar_phase, coherent, dvec,
                                  gmat, n_grid, out):
    for w in prange(fplus.shape[0]):
        _projection_coherent_one(w, fplus, fcross, strain, cos_inclination, psi, phase, pulsar_phase, coherent,
                                 dvec, gmat, n_grid, out)


@njit(cache=True)
def _projection_coherent_serial(fplus, fcross, strain, cos_inclination, psi, phase, pulsar_phase, coherent, dvec,
                                gmat, n_grid, out):
    for w in range(fplus.shape[0]):
        _projection_coherent_one(w, fplus, fcross, strain, cos_inclination, psi, phase, pulsar_phase, coherent,
                                 dvec, gmat, n_grid, out)


def free_pulsar_phases(distance_errors, omega_dot_p, gw_frequency):
    """The pulsars whose pulsar-term phase is free (uniform) even when distances are sampled
    (docs/design.md §7 "Pulsar distances"): ``σ_L (1 + Ω̂·p̂) > λ_gw = c / f``.

    ``distance_errors`` [kpc] (P,), ``omega_dot_p`` (P,) or scalar, ``gw_frequency`` [Hz]. Then the
    Gaussian distance prior spreads the pulsar term's GW phase ``2π f L (1+Ω̂·p̂)/c`` with a standard
    deviation of at least 2π, and the wrapped phase distribution differs from uniform by at most
    ``2 e^(−2π²) ≈ 5e-9`` (its first Fourier coefficient is ``e^(−σ²/2)``).

    >>> free_pulsar_phases(np.array([0.1, 1e-6]), 0.0, 1e-8).tolist()      # 0.1 kpc ≫ λ ≈ 1 pc
    [True, False]
    """
    spread = np.asarray(distance_errors, dtype=float) * KPC_SECONDS * (1.0 + np.asarray(omega_dot_p, dtype=float))
    return spread > 1.0 / float(gw_frequency)


def coherent_phase_offsets(gw_frequency, chirp_mass, delay, chirping=True):
    """Pulsar-term orbital phase at the reference time minus Φ0 [rad], ``Φ(t0 − delay) − Φ0`` of the
    leading-order chirp (docs/design.md §4), for arrays ``gw_frequency`` [Hz] (W,), ``chirp_mass``
    [Msun] (W,) and ``delay = L (1 + Ω̂·p̂)/c`` [s] (W, P); ``−ω0 delay`` without evolution.
    The vectorised form of :func:`cwsearch.physics.waveform.residual_basis`'s offset."""
    omega0 = np.pi * np.asarray(gw_frequency, dtype=float)[:, None]
    m53 = (np.asarray(chirp_mass, dtype=float) * SOLAR_MASS_SECONDS)[:, None] ** (5 / 3)
    delay = np.asarray(delay, dtype=float)
    if not chirping:
        return -omega0 * delay
    kd = 256.0 / 5.0 * m53 * omega0 ** (8 / 3) * delay
    with np.errstate(divide="ignore", invalid="ignore"):
        out = -omega0 ** (-5 / 3) * np.expm1(0.625 * np.log1p(kd)) / (32.0 * m53)
    return np.where(m53 > 0, out, -omega0 * delay)


# ---------------------------------------------------------------- interpolation nodes
#: node counts of the interpolated shape path (Chebyshev points on the array's span)
NODE_LEVELS = (16, 24, 32, 48, 64, 96, 128, 192, 256, 384, 512)
NODE_TOLERANCE = 1e-13
_LOG_NODE_TOLERANCE = 32.2        # −ln 1e-14: geometric decay needed near a merger's branch point


def chebyshev_points(m):
    """The m Chebyshev points of the first kind on [−1, 1], ``cos((2n+1)π/(2m))``."""
    return np.cos((2 * np.arange(m) + 1) * np.pi / (2 * m))


def interpolation_matrix(x, m):
    """Matrix L (len(x), m) with ``f(x) ≈ L @ f(chebyshev_points(m))``: the barycentric formula
    with the first-kind weights ``(−1)ⁿ sin((2n+1)π/(2m))`` (Trefethen, *Approximation Theory and
    Approximation Practice*, 2013, ch. 5; from memory).

    >>> x = np.linspace(-1, 1, 7)
    >>> bool(np.allclose(interpolation_matrix(x, 12) @ np.sin(3 * chebyshev_points(12)), np.sin(3 * x)))
    True
    """
    nodes = chebyshev_points(m)
    weights = (-1.0) ** np.arange(m) * np.sin((2 * np.arange(m) + 1) * np.pi / (2 * m))
    diff = np.asarray(x, dtype=float)[:, None] - nodes[None, :]
    exact = diff == 0.0
    diff[exact] = 1.0
    terms = weights / diff
    out = terms / terms.sum(axis=1, keepdims=True)
    rows = exact.any(axis=1)
    out[rows] = exact[rows]
    return out


def largest_bandwidth(m, tolerance=NODE_TOLERANCE):
    """Largest ``a`` (angular frequency × half the interval) for which interpolating ``exp(i a x)`` at m
    Chebyshev points errs by at most ``tolerance``. Its Chebyshev coefficients are ``2 iⁿ Jₙ(a)``
    (Jacobi–Anger expansion, Abramowitz & Stegun 9.1.44–45) and the interpolation error is at most
    twice the sum of the neglected coefficients (Trefethen 2013, thm 4.2; from memory)."""
    order = np.arange(m, m + 80)
    low, high = 0.0, float(m)
    for _ in range(50):
        a = 0.5 * (low + high)
        low, high = (a, high) if 4.0 * np.abs(jv(order, a)).sum() <= tolerance else (low, a)
    return low


# ---------------------------------------------------------------- public API
@dataclass
class ShapeCache:
    """Per-pulsar products for fixed shape parameters: ``dvec`` (P, 4) = (d|b_j),
    ``gmat`` (P, 4, 4) = (b_i|b_j), antenna patterns ``fplus``, ``fcross`` (P,),
    and the coherent pulsar-phase offsets (P,) [rad]."""

    fplus: np.ndarray
    fcross: np.ndarray
    dvec: np.ndarray
    gmat: np.ndarray
    pulsar_phase_offsets: np.ndarray


class Likelihood:
    """ln Λ of one circular binary for an :class:`~cwsearch.data.model.Array` and a noise model.

    Parameters
    ----------
    array : Array
    noise : NoiseSettings or NoiseWeighting
    pulsar_term : bool
        Earth + pulsar term with pulsar phases marginalised (default), or Earth term only.
    evolution : ``"full"``, ``"pulsar-frequency"`` or ``"monochromatic"``
    phase_grid : int
        Points of the pulsar-phase grid; 0 (default) picks them per pulsar.
    uniform_strain : bool
        Sampler coordinate is ``strain`` instead of ``log10_strain``.
    shape_path : ``"auto"``, ``"nodes"`` or ``"direct"``
        How :meth:`shape_batch` computes the basis products. ``"direct"``
        builds the four basis series at every TOA and whitens them.
        ``"nodes"`` builds them at m Chebyshev points of the array's span
        and uses per-pulsar products of the interpolation matrix cached per
        m (``Lᵀ C⁻¹ L``, ``Lᵀ C⁻¹ d``), with m chosen per walker from its
        highest frequency and distance to merger so that the interpolation
        error stays below :data:`NODE_TOLERANCE` of the amplitude; walkers
        that would need more than :data:`NODE_LEVELS` offers take the direct
        path. ``"auto"`` (default) uses nodes where they cost less than the
        direct path, pulsar by pulsar (m² below about N_TOA × rank of the
        pulsar's noise model).

    Pulsar distances are held at their catalogue values; with the pulsar
    phases free they only set the pulsar-term frequency and amplitude in the
    evolving modes, which the ~10 % distance errors change little.
    :meth:`with_sampled_distances` gives the same likelihood with some
    pulsars' distances as extra sampler coordinates ``distance_NAME`` [kpc]
    and their pulsar-term phases coherent from them (docs/design.md §7
    "Pulsar distances").
    """

    def __init__(self, array, noise=None, *, pulsar_term=True, evolution="full", phase_grid=0,
                 uniform_strain=False, shape_path="auto"):
        if evolution not in waveform.EVOLUTION_MODES:
            raise ValueError(f"evolution must be one of {waveform.EVOLUTION_MODES}")
        if shape_path not in ("auto", "nodes", "direct"):
            raise ValueError("shape_path must be 'auto', 'nodes' or 'direct'")
        self.shape_path = shape_path
        self.array = array
        self.engine = noise if isinstance(noise, NoiseWeighting) else NoiseWeighting(array, noise or NoiseSettings())
        self.pulsar_term = bool(pulsar_term)
        self.evolution = evolution
        self.phase_grid = int(phase_grid)
        self.uniform_strain = bool(uniform_strain)
        self.names = UNIFORM_STRAIN_NAMES if uniform_strain else PARAMETER_NAMES
        self.reference_time = array.reference_time
        self.positions = array.positions
        self.pulsar_distances = np.array([p.distance for p in array])
        self.pulsar_distance_errors = np.array([p.distance_err for p in array])
        #: indices of the pulsars whose distance is a sampler coordinate (none: every phase marginalised)
        self.sampled_distances = np.zeros(0, dtype=int)
        self.light_times = array.light_travel_times
        self.last_offset = array.end - array.reference_time
        self._dt, self._inv_var, self._weighted_data, self._operator = [], [], [], []
        for w in self.engine:
            toas = w.pulsar.toas
            inv_sigma, operator = w.whitening_operator()     # whitening operator of the noise engine
            wd, ud = w.whiten(w.pulsar.residuals)
            self._dt.append(np.ascontiguousarray(toas - self.reference_time))
            self._inv_var.append(np.ascontiguousarray(inv_sigma ** 2))
            # C⁻¹ d expressed through the whitened representation: (d|x) = y·x
            self._weighted_data.append(np.ascontiguousarray(wd * inv_sigma - operator.T @ ud))
            self._operator.append(np.ascontiguousarray(operator))
        self.n_pulsars = len(array)
        self._t_max = [float(np.max(np.abs(dt))) for dt in self._dt]
        self._mean_toas = float(np.mean([dt.shape[0] for dt in self._dt]))
        # interpolated shape path: node levels usable at all (cheaper than direct under "auto")
        first = min(float(dt.min()) for dt in self._dt)
        last = max(float(dt.max()) for dt in self._dt)
        self._node_centre, self._node_half = 0.5 * (first + last), max(0.5 * (last - first), 1.0)
        # per pulsar, the most nodes worth using: a walker costs about 8 m² flops at m nodes and
        # 8 N (rank + 19) on the TOA-by-TOA path (N TOAs; the 19 stands for the sines and cosines)
        worth = np.array([np.sqrt(dt.shape[0] * (op.shape[0] + 19.0)) for dt, op in zip(self._dt, self._operator)])
        self._node_limit = {"direct": 0.0 * worth, "nodes": np.full(self.n_pulsars, np.inf), "auto": worth}[shape_path]
        self._node_levels = np.array([m for m in NODE_LEVELS if m <= self._node_limit.max()], dtype=int)
        self._node_bandwidth = np.array([largest_bandwidth(m) for m in self._node_levels])
        self._node_products = {}

    # -------------------------------------------------------------- exact path
    def shape_cache(self, ra, dec, gw_frequency, chirp_mass) -> ShapeCache:
        """Basis products for one shape (ra, dec [rad], frequency [Hz], chirp mass [Msun]),
        from :func:`waveform.residual_basis` and the noise engine's inner products."""
        fplus, fcross, odp = waveform.antenna_pattern(ra, dec, self.positions)
        dvec = np.empty((self.n_pulsars, 4))
        gmat = np.empty((self.n_pulsars, 4, 4))
        offsets = np.empty(self.n_pulsars)
        for p, w in enumerate(self.engine):
            basis, offsets[p] = waveform.residual_basis(w.pulsar.toas, self.reference_time, gw_frequency,
                                                        chirp_mass, self.pulsar_distances[p], odp[p],
                                                        self.evolution)
            dvec[p] = w.inner(w.pulsar.residuals, basis)
            gmat[p] = w.inner(basis)
        return ShapeCache(fplus, fcross, dvec, gmat, offsets)

    def projection(self, cache: ShapeCache, strain, inclination, polarization, phase, pulsar_phases=None):
        """ln Λ at fixed shape for arrays of projection parameters (angles in rad).

        ``pulsar_phases`` (…, P): explicit pulsar-term phases (coherent
        model); ``None`` marginalises them (or ignores them for Earth term only).
        """
        strain, inclination, polarization, phase = np.broadcast_arrays(
            *(np.atleast_1d(np.asarray(x, dtype=float)) for x in (strain, inclination, polarization, phase)))
        if pulsar_phases is not None:
            coeffs = waveform.basis_coefficients(strain[:, None], inclination[:, None], polarization[:, None],
                                                 phase[:, None], np.asarray(pulsar_phases), cache.fplus,
                                                 cache.fcross, self.pulsar_term)
            ds = np.einsum("wpj,pj->w", coeffs, cache.dvec)
            ss = np.einsum("wpi,pij,wpj->w", coeffs, cache.gmat, coeffs)
            return ds - 0.5 * ss
        n_w = strain.shape[0]
        out = np.empty(n_w)
        fplus = np.ascontiguousarray(np.broadcast_to(cache.fplus, (n_w, self.n_pulsars)))
        fcross = np.ascontiguousarray(np.broadcast_to(cache.fcross, (n_w, self.n_pulsars)))
        dvec = np.broadcast_to(cache.dvec, (n_w,) + cache.dvec.shape)
        gmat = np.broadcast_to(cache.gmat, (n_w,) + cache.gmat.shape)
        _projection_batch(fplus, fcross, np.ascontiguousarray(strain), np.cos(inclination),
                          np.ascontiguousarray(polarization), np.ascontiguousarray(phase), dvec, gmat,
                          self.pulsar_term, self.phase_grid, out)
        return out

    # -------------------------------------------------------------- fast batched path
    def shape_batch(self, ra, dec, gw_frequency, chirp_mass, light_times=None):
        """Antenna patterns (W, P) and basis products ``dvec`` (W, P, 4), ``gmat`` (W, P, 4, 4)
        for W shapes at once (the numba/BLAS fast path; see ``shape_path``); ``light_times``
        (W, P) [s] replaces the catalogue distances' light-travel times."""
        fplus, fcross, terms = self.shape_terms(ra, dec, gw_frequency, chirp_mass, light_times)
        omega0, kappa_e, amp0, omega_p, kappa_p, amp_p = terms
        n_w = omega0.shape[0]
        # monochromatic: the pulsar-term series equal the Earth-term ones, compute two columns
        same = self.evolution == "monochromatic"
        ncol = 4 if (self.pulsar_term and not same) else 2
        dvec = np.zeros((n_w, self.n_pulsars, 4))
        gmat = np.zeros((n_w, self.n_pulsars, 4, 4))
        nodes = self._node_count(omega0, kappa_e)
        for m in np.unique(nodes):
            pick = np.flatnonzero(nodes == m)
            self._group = pick            # walkers of this node level (subclasses keep extra products per walker)
            terms = (omega0[pick], kappa_e[pick], amp0[pick], omega_p[pick], kappa_p[pick], amp_p[pick])
            sub_dvec = np.empty((pick.size, self.n_pulsars, ncol))
            sub_gmat = np.empty((pick.size, self.n_pulsars, ncol, ncol))
            at_nodes = self._node_limit >= m if m > 0 else np.zeros(self.n_pulsars, dtype=bool)
            if at_nodes.any():
                self._nodes_products(int(m), np.flatnonzero(at_nodes), *terms, sub_dvec, sub_gmat)
            if not at_nodes.all():
                self._direct_products(np.flatnonzero(~at_nodes), *terms, sub_dvec, sub_gmat)
            dvec[pick, :, :ncol], gmat[pick, :, :ncol, :ncol] = sub_dvec, sub_gmat
        if same and self.pulsar_term:
            dvec[:, :, 2:] = dvec[:, :, :2]
            gmat[:, :, 2:, 2:] = gmat[:, :, :2, :2]
            gmat[:, :, :2, 2:] = gmat[:, :, :2, :2]
            gmat[:, :, 2:, :2] = gmat[:, :, :2, :2]
        return fplus, fcross, dvec, gmat

    def shape_terms(self, ra, dec, gw_frequency, chirp_mass, light_times=None):
        """Antenna patterns (W, P) and the per-walker terms of the basis series: Earth-term
        ``omega0``, ``kappa_e``, ``amp0`` (W,) and pulsar-term ``omega_p``, ``kappa_p``, ``amp_p``
        (W, P) (angular orbital frequency [rad/s], chirp rate κ [1/s], envelope [s]) for the
        basis kernels, from (ra, dec [rad], frequency [Hz], chirp mass [Msun]); ``light_times``
        (W, P) [s] replaces the catalogue distances' light-travel times."""
        ra, dec, f, mc = (np.atleast_1d(np.asarray(x, dtype=float)) for x in (ra, dec, gw_frequency, chirp_mass))
        fplus, fcross, odp = waveform.antenna_pattern(ra, dec, self.positions)
        omega0 = np.pi * f
        mct = mc * SOLAR_MASS_SECONDS
        kappa = 256.0 / 5.0 * mct ** (5 / 3) * omega0 ** (8 / 3)
        if self.evolution == "monochromatic":
            kappa = np.zeros_like(kappa)
        delay = (self.light_times[None, :] if light_times is None else light_times) * (1.0 + odp)
        x_p0 = 1.0 + kappa[:, None] * delay
        omega_p = omega0[:, None] * x_p0 ** (-3 / 8)
        amp0 = 1.0 / (2.0 * omega0)
        amp_p = amp0[:, None] * x_p0 ** (1 / 8)
        kappa_e = kappa if self.evolution == "full" else np.zeros_like(kappa)
        kappa_p = kappa_e[:, None] / x_p0
        return fplus, fcross, (omega0, kappa_e, amp0, omega_p, kappa_p, amp_p)

    def _node_count(self, omega0, kappa_e):
        """Chebyshev nodes each walker needs (0: direct path): the highest GW angular frequency
        in the data times half the span must stay within :func:`largest_bandwidth`, and the
        merger's branch point at ``1/κ`` must lie far enough outside the span for the
        interpolation error to fall below 1e-14 (Bernstein-ellipse rate ρ⁻ᵐ with ln ρ =
        arccosh x_merge; Trefethen 2013, thm 8.2; from memory)."""
        out = np.zeros(omega0.shape, dtype=int)
        if self._node_levels.size == 0:
            return out
        last = self._node_centre + self._node_half
        left = 1.0 - kappa_e * last
        alive = left > 0.0
        bandwidth = 2.0 * omega0 * np.where(alive, left, 1.0) ** (-3 / 8) * self._node_half
        with np.errstate(divide="ignore"):
            merge = np.where(kappa_e > 0, (1.0 / np.where(kappa_e > 0, kappa_e, 1.0) - self._node_centre)
                             / self._node_half, np.inf)
        decay = np.where(np.isfinite(merge), np.arccosh(np.maximum(merge, 1.0)), np.inf)
        with np.errstate(divide="ignore"):
            needed = np.where(decay > 0, _LOG_NODE_TOLERANCE / decay, np.inf)
        for m, widest in zip(self._node_levels[::-1], self._node_bandwidth[::-1]):
            fits = alive & (bandwidth <= widest) & (needed <= m)
            out[fits] = m
        return out

    def _nodes_products(self, m, pulsars, omega0, kappa_e, amp0, omega_p, kappa_p, amp_p, dvec, gmat):
        """Fill ``dvec``, ``gmat`` of ``pulsars`` from the basis series at m Chebyshev nodes and the
        cached per-pulsar ``Lᵀ C⁻¹ d`` and ``Lᵀ C⁻¹ L`` (numba, parallel over pulsars: small
        matrix products inside threaded BLAS stall when other work shares the cores)."""
        node_dt, data_products, gram_products = self._interpolation_products(m)
        n_w = omega0.shape[0]
        t_max = float(np.max(np.abs(node_dt)))
        earth = np.empty((n_w, 2, m))
        _earth_at_nodes(node_dt, t_max, omega0, kappa_e, amp0, earth)
        kernel = _nodes_parallel if n_w * m * pulsars.size >= _PARALLEL_NODES else _nodes_serial
        kernel(pulsars, earth, node_dt, t_max, np.ascontiguousarray(omega_p), np.ascontiguousarray(kappa_p),
               np.ascontiguousarray(amp_p), data_products, gram_products, dvec, gmat)

    def _interpolation_products(self, m):
        """Node offsets from the reference time (m,) and per pulsar ``Lᵀ C⁻¹ d`` (m,) and
        ``Lᵀ C⁻¹ L`` (m, m) through the noise engine, L the pulsar's interpolation matrix
        (built once per m, for the pulsars where m nodes are worth using; zeros elsewhere)."""
        if m not in self._node_products:
            node_dt = self._node_centre + self._node_half * chebyshev_points(m)
            data_products = np.zeros((self.n_pulsars, m))
            gram_products = np.zeros((self.n_pulsars, m, m))
            for p, (w, dt) in enumerate(zip(self.engine, self._dt)):
                if self._node_limit[p] >= m:
                    interp = interpolation_matrix((dt - self._node_centre) / self._node_half, m)
                    gram = w.inner(interp)
                    gram_products[p] = 0.5 * (gram + gram.T)
                    data_products[p] = w.inner(interp, w.pulsar.residuals)
            self._node_products[m] = (node_dt, data_products, gram_products)
        return self._node_products[m]

    def _direct_products(self, pulsars, omega0, kappa_e, amp0, omega_p, kappa_p, amp_p, dvec, gmat):
        """Fill ``dvec``, ``gmat`` of ``pulsars`` from the basis series at every TOA, whitened by the
        noise engine's operator."""
        n_w, ncol = omega0.shape[0], dvec.shape[2]
        g = np.empty((n_w, ncol, ncol))
        parallel = n_w * self._mean_toas >= _PARALLEL_BASIS
        basis_kernel = _basis_parallel if parallel else _basis_serial
        gram_kernel = _gram_parallel if parallel else _gram_serial
        for p in pulsars:
            dt = self._dt[p]
            basis = np.empty((n_w, ncol, dt.shape[0]))
            basis_kernel(dt, omega0, kappa_e, amp0, np.ascontiguousarray(omega_p[:, p]),
                         np.ascontiguousarray(kappa_p[:, p]), np.ascontiguousarray(amp_p[:, p]),
                         self._t_max[p], basis)
            flat = basis.reshape(n_w * ncol, -1)
            dvec[:, p] = (flat @ self._weighted_data[p]).reshape(n_w, ncol)
            whitened = (flat @ self._operator[p].T).reshape(n_w, ncol, -1)
            gram_kernel(basis, self._inv_var[p], whitened, g)
            gmat[:, p] = g

    def physical(self, theta):
        """Sampler coordinates (W, 8 [+ sampled distances]) -> dict of physical arrays (rad, Hz, Msun,
        strain; ``pulsar_distance`` (W, P) [kpc]: the sampled ones, the catalogue value elsewhere)."""
        theta = np.atleast_2d(theta)
        strain = theta[:, 4] if self.uniform_strain else 10.0 ** theta[:, 4]
        distance = np.repeat(self.pulsar_distances[None, :], theta.shape[0], axis=0)
        if self.sampled_distances.size:
            distance[:, self.sampled_distances] = theta[:, 8:8 + self.sampled_distances.size]
        return {"ra": theta[:, 0], "dec": np.arcsin(np.clip(theta[:, 1], -1, 1)),
                "gw_frequency": 10.0 ** theta[:, 2], "chirp_mass": 10.0 ** theta[:, 3], "strain": strain,
                "inclination": np.arccos(np.clip(theta[:, 5], -1, 1)), "polarization": theta[:, 6],
                "phase": theta[:, 7], "pulsar_distance": distance}

    # -------------------------------------------------------------- pulsar distances
    @property
    def pulsar_distance_mode(self):
        return "sample-distance" if self.sampled_distances.size else "marginalise-phase"

    def with_sampled_distances(self, sampled):
        """A copy (sharing the noise engine and caches) in which the pulsars of the boolean mask
        ``sampled`` (P,) have their distance as a sampler coordinate ``distance_NAME`` [kpc] after the
        8 global ones, and a pulsar-term phase coherent from it; the others keep the catalogue
        distance and a marginalised phase. Needs the pulsar term."""
        idx = np.flatnonzero(np.asarray(sampled, dtype=bool))
        if idx.size and not self.pulsar_term:
            raise ValueError("sampled pulsar distances need the pulsar term")
        like = copy.copy(self)
        like.sampled_distances = idx
        base = UNIFORM_STRAIN_NAMES if self.uniform_strain else PARAMETER_NAMES
        like.names = base + tuple(f"distance_{self.array[int(p)].name}" for p in idx)
        return like

    def pulsar_phases(self, theta, par=None, products=None):
        """Coherent pulsar-term orbital phases Φ(t0 − L(1+Ω̂·p̂)) [rad] (W, P) of ``theta`` from the
        distances of :meth:`physical` (the model's value where a pulsar's distance is sampled)."""
        par = self.physical(theta) if par is None else par
        _, _, odp = waveform.antenna_pattern(par["ra"], par["dec"], self.positions)
        delay = par["pulsar_distance"] * KPC_SECONDS * (1.0 + odp)
        offsets = coherent_phase_offsets(par["gw_frequency"], par["chirp_mass"], delay,
                                         chirping=self.evolution != "monochromatic")
        return par["phase"][:, None] + offsets

    def draw_pulsar_phases(self, theta, rng, grid=256):
        """Pulsar-term orbital phases (W, P) [rad, in [0, π)] for posterior samples ``theta``: where
        the phase is marginalised, one draw per sample from its conditional posterior given the
        sample's other parameters, ``∝ exp ln Λ_p(Φ_p)`` on a ``grid``-point periodic grid over
        [0, π) with a uniform offset inside the drawn cell; where the distance is sampled, the
        coherent value. NaN without the pulsar term. ``rng``: a numpy Generator (seeded)."""
        theta = np.atleast_2d(theta)
        n_w = theta.shape[0]
        if not self.pulsar_term:
            return np.full((n_w, self.n_pulsars), np.nan)
        par = self.physical(theta)
        extra = {"light_times": par["pulsar_distance"] * KPC_SECONDS} if self.sampled_distances.size else {}
        fplus, fcross, dvec, gmat = self.shape_batch(par["ra"], par["dec"], par["gw_frequency"], par["chirp_mass"],
                                                     **extra)
        ci = np.cos(par["inclination"])[:, None]
        c2p, s2p = np.cos(2 * par["polarization"])[:, None], np.sin(2 * par["polarization"])[:, None]
        c0, s0 = np.cos(2 * par["phase"])[:, None], np.sin(2 * par["phase"])[:, None]
        h = par["strain"][:, None]
        pa = (1 + ci**2) * (fplus * c2p + fcross * s2p)
        qa = 2 * ci * (fplus * s2p - fcross * c2p)
        e1, e2 = h * (pa * c0 - qa * s0), h * (pa * s0 + qa * c0)          # (W, P)
        cells = (np.arange(grid) + 0.5) * (np.pi / grid)
        cg, sg = np.cos(2 * cells), np.sin(2 * cells)
        out = np.empty((n_w, self.n_pulsars))
        for p in range(self.n_pulsars):
            g, dv = gmat[:, p], dvec[:, p]
            p1 = -h[:, :1] * (pa[:, p:p + 1] * cg - qa[:, p:p + 1] * sg)       # (W, grid)
            p2 = -h[:, :1] * (pa[:, p:p + 1] * sg + qa[:, p:p + 1] * cg)
            a1, a2 = e1[:, p:p + 1], e2[:, p:p + 1]
            logl = (p1 * dv[:, 2:3] + p2 * dv[:, 3:4]
                    - (a1 * p1 * g[:, 0, 2:3] + a1 * p2 * g[:, 0, 3:4] + a2 * p1 * g[:, 1, 2:3] + a2 * p2 * g[:, 1, 3:4])
                    - 0.5 * (p1 * p1 * g[:, 2, 2:3] + 2 * p1 * p2 * g[:, 2, 3:4] + p2 * p2 * g[:, 3, 3:4]))
            weights = np.exp(logl - logl.max(axis=1, keepdims=True))
            cdf = np.cumsum(weights, axis=1)
            pick = np.minimum((cdf < rng.uniform(size=(n_w, 1)) * cdf[:, -1:]).sum(axis=1), grid - 1)
            out[:, p] = cells[pick] + (rng.uniform(size=n_w) - 0.5) * (np.pi / grid)
        if self.sampled_distances.size:
            out[:, self.sampled_distances] = self.pulsar_phases(theta, par)[:, self.sampled_distances]
        return np.remainder(out, np.pi)

    def batch(self, theta):
        """ln Λ for sampler coordinates ``theta`` (W, 8 [+ sampled distances]) — every shape parameter may
        differ."""
        if self.sampled_distances.size:
            return self._batch_sampled_distances(theta)
        par = self.physical(theta)
        fplus, fcross, dvec, gmat = self.shape_batch(par["ra"], par["dec"], par["gw_frequency"], par["chirp_mass"])
        out = np.empty(fplus.shape[0])
        _projection_batch(fplus, fcross, np.ascontiguousarray(par["strain"]),
                          np.ascontiguousarray(np.atleast_2d(theta)[:, 5]),
                          np.ascontiguousarray(par["polarization"]), np.ascontiguousarray(par["phase"]),
                          dvec, gmat, self.pulsar_term, self.phase_grid, out)
        return out

    def _batch_sampled_distances(self, theta):
        par = self.physical(theta)
        fplus, fcross, dvec, gmat = self.shape_batch(par["ra"], par["dec"], par["gw_frequency"], par["chirp_mass"],
                                                     light_times=par["pulsar_distance"] * KPC_SECONDS)
        coherent = np.zeros(self.n_pulsars, dtype=np.bool_)
        coherent[self.sampled_distances] = True
        out = np.empty(fplus.shape[0])
        kernel = _projection_coherent_parallel if fplus.size >= _PARALLEL_PROJECTIONS else _projection_coherent_serial
        kernel(fplus, fcross, np.ascontiguousarray(par["strain"]), np.ascontiguousarray(np.atleast_2d(theta)[:, 5]),
               np.ascontiguousarray(par["polarization"]), np.ascontiguousarray(par["phase"]),
               np.ascontiguousarray(self.pulsar_phases(theta, par)), coherent, dvec, gmat, self.phase_grid, out)
        return out

    def merges_within_data(self, gw_frequency, chirp_mass):
        """True where the binary would merge before the last TOA (excluded by the prior)."""
        if self.evolution == "monochromatic":
            return np.zeros(np.shape(gw_frequency), dtype=bool)
        return waveform.time_to_coalescence(chirp_mass, gw_frequency) <= self.last_offset

    def reference(self, theta):
        """Straightforward ln Λ (rebuilds every residual with :func:`waveform.residuals`
        and weights it through the noise engine) for one parameter vector; pulsar
        phases are then coherent (from the distances). Used by tests and benchmarks."""
        physical = self.physical(theta)
        distances = physical.pop("pulsar_distance")[0]
        par = {k: float(v[0]) for k, v in physical.items()}
        signals = [waveform.residuals(p.toas, p.position, float(d), reference_time=self.reference_time,
                                      evolution=self.evolution, pulsar_term=self.pulsar_term, **par)
                   for p, d in zip(self.array, distances)]
        ds, ss = self.engine.data_inner(signals)
        return ds - 0.5 * ss


__all__ = [
    "PARAMETER_NAMES", "UNIFORM_STRAIN_NAMES", "PULSAR_DISTANCE_MODES", "free_pulsar_phases",
    "coherent_phase_offsets", "sincos", "marginal_log_factor", "NODE_LEVELS",
    "NODE_TOLERANCE", "chebyshev_points", "interpolation_matrix", "largest_bandwidth", "ShapeCache",
    "Likelihood",
]
