"""Pulsar-term-inclusive Bayesian strain limits: pulsar distances marginalised by Monte Carlo over their
priors, each draw exact (docs/design.md §9 "Pulsar term").

Approximation: no frequency evolution over the data span and the pulsar term at the Earth-term
frequency, valid when the chirp-mass-driven change of the GW frequency over the geometric delay
``τ_p = L_p (1 + Ω̂·p̂) / c`` is below a frequency bin, ``ḟ τ_p < 1 / T_span``
(:func:`cwsearch.physics.waveform.gw_frequency_derivative`). Then the residual of pulsar p is the
Earth-term signal minus itself delayed by τ_p (:func:`cwsearch.physics.waveform.residuals`), in complex
form ``C (1 − e^{−iΦ_p}) e^{2πi f t}`` with ``Φ_p = 2π f τ_p``: each pulsar's (sin, cos) coefficient pair
is ``(I − R(Φ_p))`` times the Earth term's, ``R(Φ) = [[cos Φ, sin Φ], [−sin Φ, cos Φ]]``. For fixed
distances the signal is still linear in the four Earth-term amplitudes b, so with ``A_p = I − R(Φ_p)``
and the Earth-term per-pulsar products (X_p, Y_p, Z_p of :func:`cwsearch.physics.fstat.project`, and
the cross-pulsar blocks W_pq of a correlated background, :meth:`cwsearch.physics.correlated.ArrayNoise.corrections`)

``N' = Σ_p G_pᵀ A_pᵀ (X_p, Y_p)``, ``M' = Σ_p G_pᵀ A_pᵀ Z_p A_p G_p − Σ_pq G_pᵀ A_pᵀ W_pq A_q G_q``,

``G_p = [[F+, 0, Fx, 0], [0, F+, 0, Fx]]``: no new likelihood and no new C⁻¹. Per draw s of the distances
the Earth-term machinery (:func:`cwsearch.inference.upper_limits.bayes_rows`) gives the posterior of h0
and its evidence Z_s; the marginal posterior is ``Σ_s Z_s p_s(h | d) / Σ_s Z_s``, itself one
truncated-normal mixture (all draws' angle nodes together), whose 95 % point is the limit. Its Monte
Carlo error comes from the delta method for the self-normalised weights:
``σ_x = √(Σ_s ω_s² (F_s(x95) − 0.95)²) / p(x95)``, ``ω_s = Z_s / Σ Z``.

Distances: Gaussian from ``distance``, ``distance_err`` truncated at > 0, from one seeded stream; a
pulsar whose distance error exceeds the GW wavelength, ``σ_L (1 + Ω̂·p̂) > c / f``, gets a uniform
phase instead (:func:`cwsearch.inference.likelihood.free_pulsar_phases`, as the follow-up does).

Examples
--------
>>> import numpy as np
>>> from cwsearch.inference.pulsar_term_limits import rotated_network
>>> nv, mm = rotated_network(np.ones(2), np.zeros(2), np.tile([1.0, 0.0, 1.0], (2, 1)),
...                          np.array([0.5, -0.2]), np.array([0.1, 0.4]), np.full(2, np.pi))
>>> bool(np.allclose(mm, 4 * np.kron(np.outer([0.5, 0.1], [0.5, 0.1]) + np.outer([-0.2, 0.4], [-0.2, 0.4]),
...                                   np.eye(2))))
True
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit
from scipy.special import ndtr, ndtri

from ..core.constants import KPC_SECONDS
from ..physics.waveform import gw_frequency_derivative
from .upper_limits import LEVEL, QUADRATURE, RELATIVE_GRID, _mixture_cdf, _mixture_components, \
    _solve_components, angle_grid

#: default number of distance draws (docs/design.md §9: Monte Carlo error of the limit below ~2 %)
DEFAULT_DRAWS = 256


# ----------------------------------------------------------------------------- distance draws
def distance_draws(distances, distance_errors, n_draws, seed=0):
    """Pulsar-term delays' raw material from one seeded stream: ``(distances (D, P) [kpc], uniform (D, P))``.

    Distances are Gaussian (``distance``, ``distance_err`` [kpc]) truncated at > 0 (inverse CDF; an
    error of 0 gives the distance itself); ``uniform`` in [0, 1) is the phase (/2π) used for the
    pulsars whose distance error exceeds the GW wavelength (see :func:`draw_phases`).

    >>> d, _ = distance_draws([1.0, 2.0], [0.0, 0.1], 3, seed=1)
    >>> d.shape, bool(np.all(d[:, 0] == 1.0)), bool(np.all(d > 0))
    ((3, 2), True, True)
    """
    mean = np.asarray(distances, dtype=float)
    err = np.asarray(distance_errors, dtype=float)
    rng = np.random.default_rng(seed)
    raw = rng.uniform(size=(int(n_draws), mean.size))
    uniform = rng.uniform(size=(int(n_draws), mean.size))
    with np.errstate(divide="ignore", invalid="ignore"):
        lower = np.where(err > 0, ndtr(-mean / np.where(err > 0, err, 1.0)), 0.0)
        out = mean + err * ndtri(lower + (1.0 - lower) * raw)
    out = np.where(err > 0, out, mean)
    return np.maximum(out, 1e-300), uniform


@njit(cache=True)
def _phase(frequency, light_time, uniform, spread, op):
    """Φ_p = 2π f L (1 + Ω̂·p̂)/c, or 2π × uniform where the distance error exceeds the wavelength."""
    if spread * (1.0 + op) > 1.0 / frequency:
        return 2.0 * math.pi * uniform
    return 2.0 * math.pi * frequency * light_time * (1.0 + op)


def draw_phases(frequency, omega_dot_p, distances, uniform, distance_errors):
    """Pulsar-term phases Φ (D, P) at one frequency [Hz] and sky position (``omega_dot_p`` (P,)) from
    :func:`distance_draws`; uniform phases where ``σ_L (1 + Ω̂·p̂) > c / f``."""
    light = np.asarray(distances, dtype=float) * KPC_SECONDS
    spread = np.asarray(distance_errors, dtype=float) * KPC_SECONDS
    op = np.asarray(omega_dot_p, dtype=float)
    free = spread * (1.0 + op) > 1.0 / float(frequency)
    return np.where(free[None, :], 2 * np.pi * np.asarray(uniform), 2 * np.pi * float(frequency) * light * (1.0 + op))


# ----------------------------------------------------------------------------- rotated N and M
@njit(cache=True)
def _rotated_network(x, y, z, fplus, fcross, phase, w, corr, nv, mm, g):
    """N (4,) and M (4, 4) of the Earth + pulsar term for pulsar phases ``phase`` (P,) from the Earth-term
    per-pulsar products x, y (P,), z (P, 3) and, if ``corr``, the cross-pulsar blocks w (4, P, P)
    (ss, sc, cs, cc). ``g`` (P, 2, 4) is scratch: the rotated pattern rows ``A_p G_p``."""
    n_psr = x.shape[0]
    for i in range(4):
        nv[i] = 0.0
        for j in range(4):
            mm[i, j] = 0.0
    for p in range(n_psr):
        c = 1.0 - math.cos(phase[p])
        s = math.sin(phase[p])
        fp = fplus[p]
        fx = fcross[p]
        g[p, 0, 0] = c * fp
        g[p, 0, 1] = -s * fp
        g[p, 0, 2] = c * fx
        g[p, 0, 3] = -s * fx
        g[p, 1, 0] = s * fp
        g[p, 1, 1] = c * fp
        g[p, 1, 2] = s * fx
        g[p, 1, 3] = c * fx
        zss, zsc, zcc = z[p, 0], z[p, 1], z[p, 2]
        for i in range(4):
            a0 = g[p, 0, i]
            a1 = g[p, 1, i]
            nv[i] += a0 * x[p] + a1 * y[p]
            t0 = a0 * zss + a1 * zsc
            t1 = a0 * zsc + a1 * zcc
            for j in range(i, 4):
                mm[i, j] += t0 * g[p, 0, j] + t1 * g[p, 1, j]
    if corr:
        for p in range(n_psr):
            for q in range(n_psr):
                w0 = w[0, p, q]
                w1 = w[1, p, q]
                w2 = w[2, p, q]
                w3 = w[3, p, q]
                for i in range(4):
                    a0 = g[p, 0, i]
                    a1 = g[p, 1, i]
                    t0 = a0 * w0 + a1 * w2
                    t1 = a0 * w1 + a1 * w3
                    for j in range(i, 4):
                        mm[i, j] -= t0 * g[q, 0, j] + t1 * g[q, 1, j]
    for i in range(4):
        for j in range(i):
            mm[i, j] = mm[j, i]


def rotated_network(x, y, z, fplus, fcross, phases, corrections=None):
    """N (D, 4) and M (D, 4, 4) of the Earth + pulsar term at one sky position and frequency for phase
    draws ``phases`` (D, P) (or (P,): one draw, N (4,), M (4, 4)); ``x``, ``y`` (P,), ``z`` (P, 3) the
    Earth-term per-pulsar products, ``corrections`` the cross-pulsar blocks (4, P, P) or None."""
    phases = np.asarray(phases, dtype=float)
    single = phases.ndim == 1
    phases = np.atleast_2d(phases)
    n_psr = phases.shape[1]
    corr = corrections is not None
    w = np.ascontiguousarray(corrections if corr else np.zeros((4, 1, 1)), dtype=float)
    nv = np.empty((phases.shape[0], 4))
    mm = np.empty((phases.shape[0], 4, 4))
    g = np.empty((n_psr, 2, 4))
    args = [np.ascontiguousarray(a, dtype=float) for a in (x, y, z, fplus, fcross)]
    for d in range(phases.shape[0]):
        _rotated_network(*args, np.ascontiguousarray(phases[d]), w, corr, nv[d], mm[d], g)
    return (nv[0], mm[0]) if single else (nv, mm)


# ----------------------------------------------------------------------------- the limit
@njit(cache=True)
def _pulsar_term_rows(x, y, z, w, corr, frequencies, fplus, fcross, odp, light, uniform, spread, u, wq, level,
                      rel_grid, x95, logz, mc_error, ess, table):
    """Pulsar-term limit (in x = h0/(2πf)) for every sky position s (rows of the patterns) and frequency f.

    x, y (P, F), z (P, F, 3), w (F, 4, P, P) if ``corr``; fplus, fcross, odp (S, P); light, uniform (D, P)
    (light-travel times [s] and uniform phases of the draws), spread (P,) distance errors [s].
    Outputs (S, F): x95, log mean evidence, Monte Carlo error of x95, effective number of draws;
    table (S, F, K, 2) as in ``_bayes_rows``.
    """
    n_sky, n_psr = fplus.shape
    n_freq = frequencies.shape[0]
    n_draws = light.shape[0]
    n_nodes = u.shape[0]
    total_nodes = n_draws * n_nodes
    mu = np.empty(total_nodes)
    sd = np.empty(total_nodes)
    inv_sd = np.empty(total_nodes)
    logq0 = np.empty(total_nodes)
    logw = np.empty(total_nodes)
    weight = np.empty(total_nodes)
    coef = np.empty(total_nodes)
    active = np.empty(total_nodes, dtype=np.int64)
    lz_draw = np.empty(n_draws)
    draw_cdf = np.empty(n_draws)
    draw_weight = np.empty(n_draws)
    phase = np.empty(n_psr)
    nv = np.empty(4)
    mm = np.empty((4, 4))
    g = np.empty((n_psr, 2, 4))
    xf = np.empty(n_psr)
    yf = np.empty(n_psr)
    zf = np.empty((n_psr, 3))
    wf = np.zeros((4, 1, 1)) if not corr else np.empty((4, n_psr, n_psr))
    one = np.empty(1, dtype=np.int64)
    for f in range(n_freq):
        for p in range(n_psr):
            xf[p] = x[p, f]
            yf[p] = y[p, f]
            for k in range(3):
                zf[p, k] = z[p, f, k]
        if corr:
            wf[:, :, :] = w[f]
        for s in range(n_sky):
            proper = True
            best = -np.inf
            for d in range(n_draws):
                for p in range(n_psr):
                    phase[p] = _phase(frequencies[f], light[d, p], uniform[d, p], spread[p], odp[s, p])
                _rotated_network(xf, yf, zf, fplus[s], fcross[s], phase, wf, corr, nv, mm, g)
                lo = d * n_nodes
                hi = lo + n_nodes
                lz, ok = _mixture_components(nv, mm, u, wq, mu[lo:hi], sd[lo:hi], logq0[lo:hi], logw[lo:hi])
                lz_draw[d] = lz
                if not ok:
                    proper = False
                if lz > best:
                    best = lz
            if not proper:
                x95[s, f] = np.inf
                logz[s, f] = np.inf
                mc_error[s, f] = np.nan
                ess[s, f] = 0.0
                for k in range(rel_grid.shape[0]):
                    table[s, f, k, 0] = 0.0
                    table[s, f, k, 1] = 0.0
                continue
            acc = 0.0
            for d in range(n_draws):
                acc += math.exp(lz_draw[d] - best)
            lz_all = best + math.log(acc)
            logz[s, f] = lz_all - math.log(n_draws)
            xs, n_active, density = _solve_components(mu, sd, logq0, logw, lz_all, level, rel_grid, weight,
                                                      inv_sd, coef, active, table[s, f])
            x95[s, f] = xs
            # delta method: per-draw CDF at the limit and the draws' normalised evidences
            sum_w2 = 0.0
            for d in range(n_draws):
                draw_weight[d] = math.exp(lz_draw[d] - lz_all)
                sum_w2 += draw_weight[d] * draw_weight[d]
                draw_cdf[d] = 0.0
            for k in range(n_active):
                j = active[k]
                d = j // n_nodes
                one[0] = j
                c, _ = _mixture_cdf(xs, mu, inv_sd, logq0, coef, weight, one, 1)
                draw_cdf[d] += c
            var = 0.0
            for d in range(n_draws):
                if draw_weight[d] > 0.0:
                    dev = draw_cdf[d] / draw_weight[d] - level
                    var += draw_weight[d] * draw_weight[d] * dev * dev
            mc_error[s, f] = math.sqrt(var) / density if density > 0.0 else np.inf
            ess[s, f] = 1.0 / sum_w2 if sum_w2 > 0.0 else 0.0


def pulsar_term_rows(proj, fplus, fcross, omega_dot_p, distances, uniform, distance_errors, *,
                     corrections=None, level=LEVEL, grid=QUADRATURE["standard"]):
    """Pulsar-term Bayesian 95 % limits at every sky position (rows of ``fplus``, ``fcross``,
    ``omega_dot_p``: (S, P)) and frequency of ``proj`` (:class:`cwsearch.physics.fstat.Projections`).

    ``distances``, ``uniform`` (D, P) from :func:`distance_draws`, ``distance_errors`` (P,) [kpc];
    ``corrections`` (F, 4, P, P) the cross-pulsar blocks of a correlated background or None.
    Returns ``(x95, log_evidence, mc_error, ess, table)``: (S, F) arrays in units of ``x = h0/(2πf)``
    (``log_evidence`` the log of the mean evidence over draws, comparable with the Earth-term
    :func:`cwsearch.inference.upper_limits.bayes_rows` one), the effective number of draws
    ``1/Σ ω_s²``, and ``table`` (S, F, K, 2) the marginal CDF at ``x95 × RELATIVE_GRID``.
    """
    u, wq = angle_grid(*grid)
    fplus = np.ascontiguousarray(np.atleast_2d(fplus), dtype=float)
    fcross = np.ascontiguousarray(np.atleast_2d(fcross), dtype=float)
    odp = np.ascontiguousarray(np.atleast_2d(omega_dot_p), dtype=float)
    n_sky, n_freq = fplus.shape[0], proj.frequencies.size
    corr = corrections is not None
    w = np.ascontiguousarray(corrections if corr else np.zeros((1, 4, 1, 1)), dtype=float)
    light = np.ascontiguousarray(np.asarray(distances, dtype=float) * KPC_SECONDS)
    spread = np.ascontiguousarray(np.asarray(distance_errors, dtype=float) * KPC_SECONDS)
    out = [np.empty((n_sky, n_freq)) for _ in range(4)]
    table = np.empty((n_sky, n_freq, RELATIVE_GRID.size, 2))
    _pulsar_term_rows(np.ascontiguousarray(proj.x, dtype=float), np.ascontiguousarray(proj.y, dtype=float),
                      np.ascontiguousarray(proj.z, dtype=float), w, corr,
                      np.ascontiguousarray(proj.frequencies, dtype=float), fplus, fcross, odp, light,
                      np.ascontiguousarray(uniform, dtype=float), spread, u, wq, float(level), RELATIVE_GRID,
                      *out, table)
    return (*out, table)


def frequency_evolution_ok(chirp_mass, gw_frequency, delay, span):
    """Whether the approximation holds: ``ḟ τ < 1 / T_span`` for chirp mass [Msun], frequency [Hz],
    geometric delay ``τ = L (1 + Ω̂·p̂)/c`` [s] and data span [s].

    >>> bool(frequency_evolution_ok(1e8, 1e-8, 3e11, 4.7e8)), bool(frequency_evolution_ok(1e10, 1e-8, 3e11, 4.7e8))
    (True, False)
    """
    return bool(np.all(gw_frequency_derivative(chirp_mass, gw_frequency) * np.asarray(delay) < 1.0 / span))


__all__ = ["DEFAULT_DRAWS", "distance_draws", "draw_phases", "rotated_network", "pulsar_term_rows",
           "frequency_evolution_ok"]
