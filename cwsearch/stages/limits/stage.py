"""95 % strain upper limits versus frequency and sky position; chirp-mass limits for galaxies.

At one sky position and GW frequency the Earth-term data enter only through
the 4-vector N and the 4×4 matrix M of :func:`cwsearch.physics.fstat.network_vectors`
(Ellis, Siemens & Creighton 2012). With the amplitude vector ``b`` of
:func:`cwsearch.physics.fstat.parameters_to_amplitudes` the log likelihood ratio is

``ln Λ(b) = b·N − ½ bᵀ M b``.

``b`` is linear in the strain: ``b = x u(cos ι, ψ, Φ0)`` with
``x = h0 / (2π f)``. For fixed angles ``ln Λ = x a − ½ x² c`` with
``a = u·N`` and ``c = uᵀ M u``, a Gaussian in x. So the posterior of h0
under a uniform prior on h0 ≥ 0, marginalised over cos ι, ψ, Φ0, is a
*mixture of truncated normals*, one per node of a deterministic angle grid
(Gauss–Legendre in cos ι, uniform periodic grids in ψ and Φ0): the h0
integral is done exactly (error functions), only the three angles are
quadrature. :func:`bayesian_limit` takes the 95 % quantile of that mixture.

The frequentist limit (:func:`frequentist_limit`) is the h0 at which 95 %
of Earth-term signals with random orientation give 2Fe above the observed
value, using ``2Fe ~ χ'²(4, ρ²)``, ``ρ² = bᵀ M b`` (non-central χ²,
Ellis, Siemens & Creighton 2012), averaged over the same kind of angle grid.

Noise model: the run's (:func:`cwsearch.physics.correlated.array_noise`). With a
Hellings–Downs (or other correlated) common process N and M use the array
inner product (:func:`cwsearch.physics.correlated.correlated_network`: X, Y
of the weighted data, M minus the cross-pulsar blocks), so both limits and
the galaxies' chirp-mass limits are conditional on the correlated background;
``2Fe ~ χ'²(4, ρ²)`` still holds exactly with the true covariance.

Sky averages treat the source position as uniform over the sky (HEALPix
pixels have equal areas): the Bayesian sky-averaged limit is the 95 %
quantile of the posterior marginalised over pixels (each pixel weighted by
its evidence under the common uniform h0 prior); the frequentist one is the
h0 at which the detection probability averaged over pixels and orientation
reaches 95 %. Both come from each pixel's CDF tabulated on a relative grid
around its own limit and interpolated (relative accuracy ~1e-3).

:func:`run_limits` is the stage entry point (``cwsearch limits``); the
pixel × frequency work is fanned out by :mod:`cwsearch.inference.execution`.

Examples
--------
>>> import numpy as np
>>> from cwsearch.stages.limits.stage import bayesian_limit, frequentist_limit
>>> m = np.diag([4.0, 4.0, 3.0, 3.0]) * 1e16      # sensitive 4×4 M (s⁻²)
>>> n = np.zeros(4)                               # data with nothing in it
>>> h95 = bayesian_limit(n, m, 1e-8)
>>> f"{h95:.2e}"
'5.19e-16'
>>> hf = frequentist_limit(n, m, 1e-8, fe=2.0)
>>> bool(hf > 0)
True
"""

from __future__ import annotations

import functools
import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.table import Table
from numba import njit
from scipy.special import log_ndtr, logsumexp

from ...core.errors import InputError
from ...core.fileio import write_json_atomic, write_table_atomic
from ...core.progress import progress as progress_bar
from ...data.catalog import read_catalog
from ...data.healpix_fits import write_healpix_map
from ...inference.execution import TaskRunner
from ...inference.sampling import run_sampler, SamplerSettings
from ...inference.noisefit import stage_noise_statement
from ...physics import fstat, sky
from ...physics.fstat import default_max_frequency, frequency_grid, parameters_to_amplitudes
from ...physics.correlated import array_noise
from ...physics.noise import NoiseSettings
from ...physics.waveform import chirp_mass_for_strain
from .options import Galaxy, LimitsOptions, METHODS, parse_galaxies  # the options live beside (standard library)

#: credibility / confidence level of every limit
LEVEL = 0.95
#: relative strain grid (times each pixel's own limit) on which pixel CDFs are tabulated for sky averages
RELATIVE_GRID = np.geomspace(0.1, 10.0, 11)
_SQRT2 = math.sqrt(2.0)
_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)


# ----------------------------------------------------------------------------- angle grids
#: quadrature presets: (Gauss–Legendre nodes per cos ι panel, nodes in α, nodes in β); see :func:`angle_grid`
QUADRATURE = {
    "fast": (5, 14, 14),
    "standard": (6, 18, 18),
    "fine": (8, 24, 24),
}
#: angle grid of the frequentist detection probability (it depends on the angles only through ρ²)
FREQUENTIST_GRID = (6, 12, 12)
#: cos ι panels: the 95 % tail of the posterior is dominated by near edge-on orientations
COS_PANELS = (-1.0, -0.4, 0.0, 0.4, 1.0)


@functools.lru_cache(maxsize=16)
def angle_grid(nodes_per_panel, n_alpha, n_beta):
    """Unit amplitude vectors and weights on the (cos ι, ψ, Φ0) quadrature grid.

    cos ι ∈ [−1, 1] by Gauss–Legendre with ``nodes_per_panel`` nodes on each
    of the panels :data:`COS_PANELS` (at the 95 % point the posterior is
    dominated by a narrow band of near edge-on orientations, so nodes are
    packed near cos ι = 0). ψ and Φ0 enter the amplitudes only through the
    phases of the two circular components, ``α = 2(Φ0 + ψ)`` and
    ``β = 2(Φ0 − ψ)``; uniform ψ, Φ0 make α, β independent and uniform on
    [0, 2π), and the integrand is periodic in each, so uniform grids of
    ``n_alpha`` and ``n_beta`` nodes (the trapezoid rule) converge
    exponentially. Returns ``u`` (J, 4) — the amplitude vector for
    ``h0 / (2π f) = 1`` — and weights (J,) summing to 1.

    >>> u, w = angle_grid(2, 4, 4)
    >>> u.shape, round(float(w.sum()), 12)
    ((128, 4), 1.0)
    """
    x, wx = np.polynomial.legendre.leggauss(int(nodes_per_panel))
    cos_nodes, cos_weights = [], []
    for lo, hi in zip(COS_PANELS[:-1], COS_PANELS[1:]):
        cos_nodes.append(0.5 * (lo + hi) + 0.5 * (hi - lo) * x)
        cos_weights.append(0.5 * (hi - lo) * wx)
    nodes, weights = np.concatenate(cos_nodes), np.concatenate(cos_weights)
    alpha = (np.arange(n_alpha) + 0.5) * (2 * np.pi / n_alpha)
    beta = (np.arange(n_beta) + 0.25) * (2 * np.pi / n_beta)
    c, a, b = np.meshgrid(nodes, alpha, beta, indexing="ij")
    psi, phase = (a - b) / 4, (a + b) / 4
    u = parameters_to_amplitudes(2 * np.pi, c.ravel(), psi.ravel(), phase.ravel(), 1.0)
    w = np.broadcast_to((weights / 2.0)[:, None, None], c.shape).ravel() / (n_alpha * n_beta)
    u = np.ascontiguousarray(u)
    w = np.ascontiguousarray(w)
    u.setflags(write=False)
    w.setflags(write=False)
    return u, w


# ----------------------------------------------------------------------------- special functions
@njit(cache=True)
def _log_upper_tail(z):
    """log P(Z > z) for a standard normal Z, accurate in both tails."""
    if z < 30.0:
        return math.log(0.5 * math.erfc(z / _SQRT2))
    z2 = z * z
    return -0.5 * z2 - math.log(z) - _HALF_LOG_2PI + math.log(1.0 - 1.0 / z2 + 3.0 / (z2 * z2) - 15.0 / (z2 * z2 * z2))


@njit(cache=True)
def _poisson_cdf_below(m, y):
    """P(Poisson(y) < m) = Q(m, y), the regularised upper incomplete gamma of integer m."""
    if m <= 0:
        return 0.0
    if y <= 0.0:
        return 1.0
    ly = math.log(y)
    sd = math.sqrt(y)
    if m - 1 > y + 14.0 * sd + 14.0:
        # complement: the upper tail from m on (terms fall off fast)
        t = math.exp(-y + m * ly - math.lgamma(m + 1.0))
        tail = 0.0
        i = m
        while t > 1e-18 * (tail + 1e-300) and i < m + 100000:
            tail += t
            i += 1
            t *= y / i
        return max(0.0, 1.0 - tail)
    lo = max(0, int(y - 14.0 * sd - 14.0))
    t = math.exp(-y + lo * ly - math.lgamma(lo + 1.0))
    s = 0.0
    for i in range(lo, m):
        s += t
        t *= y / (i + 1)
    return min(s, 1.0)


@njit(cache=True)
def _ncx2_sf_slope(x, dof, lam):
    """Survival function of the non-central χ² (even ``dof``) and its derivative in ``lam``.

    Poisson mixture of central χ² with ``dof + 2j`` degrees of freedom
    (central χ²(2m) survival = Q(m, x/2)); only the Poisson terms within
    ±12 σ of the mean are summed, by recurrences. The derivative uses
    ``∂ sf_k / ∂λ = ½ (sf_{k+2} − sf_k)``, summed in the same loop.
    """
    if x <= 0.0:
        return 1.0, 0.0
    half = dof // 2
    y = 0.5 * x
    if lam <= 0.0:
        q = _poisson_cdf_below(half, y)
        q2 = q + math.exp(-y + half * math.log(y) - math.lgamma(half + 1.0))
        return q, 0.5 * (min(q2, 1.0) - q)
    if math.sqrt(lam) - math.sqrt(x) > 12.0:
        return 1.0, 0.0
    mu = 0.5 * lam
    sd = math.sqrt(mu)
    jlo = max(0, int(mu - 12.0 * sd - 12.0))
    jhi = int(mu + 12.0 * sd + 12.0)
    m = half + jlo
    q = _poisson_cdf_below(m, y)
    pois = math.exp(-mu + jlo * math.log(mu) - math.lgamma(jlo + 1.0))
    gterm = math.exp(-y + m * math.log(y) - math.lgamma(m + 1.0))   # Q(m+1) − Q(m)
    total = 0.0
    diff = 0.0
    for j in range(jlo, jhi + 1):
        total += pois * q
        diff += pois * gterm
        q += gterm
        m += 1
        gterm *= y / m
        pois *= mu / (j + 1)
    return min(total, 1.0), 0.5 * diff


def ncx2_sf(x, dof, noncentrality):
    """Vectorised survival function of the non-central χ² for even ``dof`` (checked against scipy).

    >>> round(float(ncx2_sf(10.0, 4, 3.0)), 6)      # scipy.stats.ncx2.sf(10, 4, 3) = 0.216237
    0.216237
    """
    x, lam = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(noncentrality, dtype=float))
    out = np.empty(x.shape)
    flat_x, flat_l, flat_o = x.ravel(), lam.ravel(), out.reshape(-1)
    for i in range(flat_x.size):
        flat_o[i] = _ncx2_sf_slope(flat_x[i], int(dof), flat_l[i])[0]
    return out


# ----------------------------------------------------------------------------- Bayesian kernel
@njit(cache=True)
def _mixture_components(nvec, mmat, u, w, mu, sd, logq0, logw):
    """Per angle node: mean and width of the Gaussian in x, log P(x > 0), log evidence weight.

    Returns the log evidence (log Σ_j w_j ∫_0^∞ Λ_j dx, without the common
    constant) and a flag that is False when some node has c ≤ 0 (improper).
    """
    n_nodes = u.shape[0]
    best = -np.inf
    proper = True
    for j in range(n_nodes):
        u0, u1, u2, u3 = u[j, 0], u[j, 1], u[j, 2], u[j, 3]
        a = u0 * nvec[0] + u1 * nvec[1] + u2 * nvec[2] + u3 * nvec[3]
        c = (u0 * u0 * mmat[0, 0] + u1 * u1 * mmat[1, 1] + u2 * u2 * mmat[2, 2] + u3 * u3 * mmat[3, 3]
             + 2.0 * (u0 * u1 * mmat[0, 1] + u0 * u2 * mmat[0, 2] + u0 * u3 * mmat[0, 3]
                      + u1 * u2 * mmat[1, 2] + u1 * u3 * mmat[1, 3] + u2 * u3 * mmat[2, 3]))
        if not c > 0.0:
            proper = False
            mu[j] = 0.0
            sd[j] = 1.0
            logq0[j] = 0.0
            logw[j] = -np.inf
            continue
        m = a / c
        s = 1.0 / math.sqrt(c)
        lq = _log_upper_tail(-m / s)
        mu[j] = m
        sd[j] = s
        logq0[j] = lq
        logw[j] = math.log(w[j]) + 0.5 * a * m + math.log(s) + lq
        if logw[j] > best:
            best = logw[j]
    total = 0.0
    for j in range(n_nodes):
        total += math.exp(logw[j] - best)
    return best + math.log(total), proper


@njit(cache=True)
def _mixture_cdf(h, mu, inv_sd, logq0, coef, weight, active, n_active):
    """CDF and density at h of the truncated-normal mixture (weights already normalised).

    ``coef = weight / Q0`` where it is representable (else 0: the log path
    is taken for that node).
    """
    cdf = 0.0
    pdf = 0.0
    for k in range(n_active):
        j = active[k]
        z = (h - mu[j]) * inv_sd[j]
        if z > 8.5 and logq0[j] > -7.0:
            cdf += weight[j]   # this component's CDF is 1 to < 1e-14
        elif coef[j] > 0.0:
            cdf += weight[j] - coef[j] * 0.5 * math.erfc(z / _SQRT2)
            pdf += coef[j] * inv_sd[j] * math.exp(-0.5 * z * z - _HALF_LOG_2PI)
        else:
            cdf += weight[j] * (1.0 - math.exp(_log_upper_tail(z) - logq0[j]))
            pdf += weight[j] * inv_sd[j] * math.exp(-0.5 * z * z - _HALF_LOG_2PI - logq0[j])
    return cdf, pdf


@njit(cache=True)
def _bayes_rows(nvec, mmat, u, w, level, rel_grid, x95, logz, table):
    """Bayesian limit (in x = h0/(2πf)) per row of (N, M).

    ``table[r, k]`` holds the posterior CDF at ``x95 × rel_grid[k]`` and its
    derivative with respect to log strain (for Hermite interpolation).
    """
    n_rows = nvec.shape[0]
    n_nodes = u.shape[0]
    mu = np.empty(n_nodes)
    sd = np.empty(n_nodes)
    inv_sd = np.empty(n_nodes)
    logq0 = np.empty(n_nodes)
    logw = np.empty(n_nodes)
    weight = np.empty(n_nodes)
    coef = np.empty(n_nodes)
    active = np.empty(n_nodes, dtype=np.int64)
    for r in range(n_rows):
        lz, proper = _mixture_components(nvec[r], mmat[r], u, w, mu, sd, logq0, logw)
        logz[r] = lz
        if not proper:
            x95[r] = np.inf
            logz[r] = np.inf
            for k in range(rel_grid.shape[0]):
                table[r, k, 0] = 0.0
                table[r, k, 1] = 0.0
            continue
        n_active = 0
        hi = 0.0
        total = 0.0
        for j in range(n_nodes):
            weight[j] = math.exp(logw[j] - lz)
            if weight[j] > 1e-14:
                active[n_active] = j
                n_active += 1
                total += weight[j]
                top = mu[j] + 9.0 * sd[j]
                if top > hi:
                    hi = top
        for k in range(n_active):
            j = active[k]
            weight[j] /= total
            inv_sd[j] = 1.0 / sd[j]
            coef[j] = weight[j] * math.exp(-logq0[j]) if logq0[j] > -600.0 else 0.0
        lo = 0.0
        # safeguarded Newton on CDF(x) = level, started below the root (monotone convergence)
        x = 0.0
        for k in range(n_active):
            j = active[k]
            x += weight[j] * (max(mu[j], 0.0) + 1.645 * sd[j])
        x = min(max(x, 1e-3 * hi), 0.5 * hi)
        for _ in range(200):
            cdf, pdf = _mixture_cdf(x, mu, inv_sd, logq0, coef, weight, active, n_active)
            g = cdf - level
            if g > 0.0:
                hi = x
            else:
                lo = x
            new = x - g / pdf if pdf > 0.0 else 0.5 * (lo + hi)
            if not (new > lo and new < hi):
                new = 0.5 * (lo + hi)
            if abs(new - x) <= 1e-11 * abs(x) or hi - lo <= 1e-12 * hi:
                x = new
                break
            x = new
        x95[r] = x
        for k in range(rel_grid.shape[0]):
            h = x * rel_grid[k]
            cdf, pdf = _mixture_cdf(h, mu, inv_sd, logq0, coef, weight, active, n_active)
            table[r, k, 0] = min(max(cdf, 0.0), 1.0)
            table[r, k, 1] = h * pdf


# ----------------------------------------------------------------------------- frequentist kernel
#: points of the per-row table in log c over which the detection probability is interpolated
_C_TABLE = 32


@njit(cache=True)
def _detection_probability(x, threshold, dof, c, w):
    """Orientation-averaged detection probability Σ_j w_j P(χ'²(dof, x² c_j) > threshold)
    and its derivative with respect to log x, summed node by node (reference implementation)."""
    p = 0.0
    slope = 0.0
    for j in range(c.shape[0]):
        lam = x * x * c[j]
        sf, dsf = _ncx2_sf_slope(threshold, dof, lam)
        p += w[j] * sf
        slope += w[j] * dsf * 2.0 * lam
    return p, slope


@njit(cache=True)
def _aggregate_nodes(c, w, log_c, wv, ws, wl):
    """Fold the angle nodes into weights on a uniform table in log c (cubic Hermite in log c).

    Then ``Σ_j w_j g(x² c_j) ≈ Σ_k wv_k g(x² c_k) + ws_k (dg/dlog λ)(x² c_k)`` for any
    smooth g, and ``wl`` gives the derivative by linear interpolation. Returns
    (number of table points, weight of nodes with c = 0).
    """
    k_max = log_c.shape[0]
    lo = np.inf
    hi = -np.inf
    blind = 0.0
    for j in range(c.shape[0]):
        if c[j] > 0.0:
            v = math.log(c[j])
            lo = min(lo, v)
            hi = max(hi, v)
        else:
            blind += w[j]
    for k in range(k_max):
        wv[k] = 0.0
        ws[k] = 0.0
        wl[k] = 0.0
    if not lo < np.inf:
        return 0, blind
    if hi - lo < 1e-12:
        log_c[0] = lo
        for j in range(c.shape[0]):
            if c[j] > 0.0:
                wv[0] += w[j]
                wl[0] += w[j]
        return 1, blind
    step = (hi - lo) / (k_max - 1)
    for k in range(k_max):
        log_c[k] = lo + k * step
    for j in range(c.shape[0]):
        if not c[j] > 0.0:
            continue
        s = (math.log(c[j]) - lo) / step
        k = min(int(s), k_max - 2)
        t = s - k
        t2 = t * t
        t3 = t2 * t
        wv[k] += w[j] * (2.0 * t3 - 3.0 * t2 + 1.0)
        wv[k + 1] += w[j] * (-2.0 * t3 + 3.0 * t2)
        ws[k] += w[j] * (t3 - 2.0 * t2 + t) * step
        ws[k + 1] += w[j] * (t3 - t2) * step
        wl[k] += w[j] * (1.0 - t)
        wl[k + 1] += w[j] * t
    return k_max, blind


@njit(cache=True)
def _tabled_probability(x, threshold, dof, log_c, n_table, wv, ws, wl, blind, base):
    """Detection probability and its derivative in log x from the aggregated table."""
    p = blind * base
    slope = 0.0
    x2 = x * x
    for k in range(n_table):
        lam = x2 * math.exp(log_c[k])
        sf, dsf = _ncx2_sf_slope(threshold, dof, lam)
        g_log = lam * dsf
        p += wv[k] * sf + ws[k] * g_log
        slope += 2.0 * wl[k] * g_log
    return min(max(p, 0.0), 1.0), slope


@njit(cache=True)
def _frequentist_rows(mmat, threshold, dof, u, w, level, rel_grid, x95, p0, scale, table):
    """Frequentist limit (in x = h0/(2πf)) per row.

    ``table[r, k]`` holds the detection probability at ``scale × rel_grid[k]``
    and its derivative with respect to log strain; ``scale`` is the limit,
    or a natural strain scale where the limit is 0 or infinite. The angle
    nodes enter only through ρ²/x² = c_j = u_jᵀ M u_j, so they are folded
    into a 32-point table in log c (:func:`_aggregate_nodes`) and each
    evaluation costs 32 non-central χ² evaluations whatever the grid size.
    """
    n_rows = mmat.shape[0]
    n_nodes = u.shape[0]
    c = np.empty(n_nodes)
    log_c = np.empty(_C_TABLE)
    wv = np.empty(_C_TABLE)
    ws = np.empty(_C_TABLE)
    wl = np.empty(_C_TABLE)
    for r in range(n_rows):
        m = mmat[r]
        cmean = 0.0
        for j in range(n_nodes):
            u0, u1, u2, u3 = u[j, 0], u[j, 1], u[j, 2], u[j, 3]
            c[j] = (u0 * u0 * m[0, 0] + u1 * u1 * m[1, 1] + u2 * u2 * m[2, 2] + u3 * u3 * m[3, 3]
                    + 2.0 * (u0 * u1 * m[0, 1] + u0 * u2 * m[0, 2] + u0 * u3 * m[0, 3]
                             + u1 * u2 * m[1, 2] + u1 * u3 * m[1, 3] + u2 * u3 * m[2, 3]))
            if c[j] <= 1e-14 * abs(m[0, 0] + m[1, 1] + m[2, 2] + m[3, 3]):
                c[j] = 0.0
            cmean += w[j] * c[j]
        n_table, blind = _aggregate_nodes(c, w, log_c, wv, ws, wl)
        thr = threshold[r]
        k = dof[r]
        base, _ = _ncx2_sf_slope(thr, k, 0.0)
        p0[r] = base
        if cmean <= 0.0 or (1.0 - blind < level and base < level):
            x95[r] = np.inf
            scale[r] = np.inf
            for i in range(rel_grid.shape[0]):
                table[r, i, 0] = base
                table[r, i, 1] = 0.0
            continue
        if base >= level:
            # the observed value is so low that noise alone exceeds it 95 % of the time
            x95[r] = 0.0
            x = math.sqrt((thr + 4.0) / cmean)
            scale[r] = x
            for i in range(rel_grid.shape[0]):
                p, s = _tabled_probability(x * rel_grid[i], thr, k, log_c, n_table, wv, ws, wl, blind, base)
                table[r, i, 0] = p
                table[r, i, 1] = s
            continue
        # bracket in log x, then safeguarded Newton in log x
        hi = math.sqrt((thr + 4.0) / cmean)
        p, s = _tabled_probability(hi, thr, k, log_c, n_table, wv, ws, wl, blind, base)
        while p < level:
            hi *= 2.0
            p, s = _tabled_probability(hi, thr, k, log_c, n_table, wv, ws, wl, blind, base)
        lo = 0.5 * hi
        p, s = _tabled_probability(lo, thr, k, log_c, n_table, wv, ws, wl, blind, base)
        while p >= level:
            hi = lo
            lo *= 0.5
            p, s = _tabled_probability(lo, thr, k, log_c, n_table, wv, ws, wl, blind, base)
        t = math.log(lo)
        tlo, thi = math.log(lo), math.log(hi)
        for _ in range(100):
            g = p - level
            if g > 0.0:
                thi = t
            else:
                tlo = t
            new = t - g / s if s > 0.0 else 0.5 * (tlo + thi)
            if not (new > tlo and new < thi):
                new = 0.5 * (tlo + thi)
            if abs(new - t) < 1e-11 or thi - tlo < 1e-11:
                t = new
                break
            t = new
            p, s = _tabled_probability(math.exp(t), thr, k, log_c, n_table, wv, ws, wl, blind, base)
        x = math.exp(t)
        x95[r] = x
        scale[r] = x
        for i in range(rel_grid.shape[0]):
            p, s = _tabled_probability(x * rel_grid[i], thr, k, log_c, n_table, wv, ws, wl, blind, base)
            table[r, i, 0] = p
            table[r, i, 1] = s


# ----------------------------------------------------------------------------- public per-point API
def _as_rows(nvec, mmat):
    nvec = np.ascontiguousarray(np.asarray(nvec, dtype=float).reshape(-1, 4))
    mmat = np.ascontiguousarray(np.asarray(mmat, dtype=float).reshape(-1, 4, 4))
    return nvec, mmat


def bayes_rows(nvec, mmat, *, level=LEVEL, grid=QUADRATURE["standard"]):
    """Bayesian 95 % limits for rows of N (R, 4) and M (R, 4, 4), in units of ``x = h0 / (2π f)``.

    Returns ``(x95, log_evidence, table)`` with ``table`` (R, K, 2) the
    posterior CDF at ``x95 × RELATIVE_GRID`` and its derivative in log x.
    """
    nvec, mmat = _as_rows(nvec, mmat)
    u, w = angle_grid(*grid)
    n = nvec.shape[0]
    x95, logz = np.empty(n), np.empty(n)
    table = np.empty((n, RELATIVE_GRID.size, 2))
    _bayes_rows(nvec, mmat, u, w, float(level), RELATIVE_GRID, x95, logz, table)
    return x95, logz, table


def frequentist_rows(mmat, two_fe, dof=4, *, level=LEVEL, grid=FREQUENTIST_GRID):
    """Frequentist 95 % limits for rows of M (R, 4, 4) and observed 2Fe (R,), in units of ``h0/(2πf)``.

    Returns ``(x95, p_at_zero, scale, table)``: the limit, the detection
    probability of a zero signal (the false-alarm probability of the
    observed value), the tabulation scale (the limit where it is positive)
    and (R, K, 2) the detection probability at ``scale × RELATIVE_GRID``
    with its derivative in log x.
    """
    _, mmat = _as_rows(np.zeros(4), mmat)
    n = mmat.shape[0]
    thr = np.ascontiguousarray(np.broadcast_to(np.asarray(two_fe, dtype=float), (n,)))
    dof = np.ascontiguousarray(np.broadcast_to(np.asarray(dof, dtype=np.int64), (n,)))
    u, w = angle_grid(*grid)
    x95, p0, scale = np.empty(n), np.empty(n), np.empty(n)
    table = np.empty((n, RELATIVE_GRID.size, 2))
    _frequentist_rows(mmat, thr, dof, u, w, float(level), RELATIVE_GRID, x95, p0, scale, table)
    return x95, p0, scale, table


def bayesian_limit(nvec, mmat, gw_frequency, *, level=LEVEL, grid=QUADRATURE["standard"]):
    """95 % Bayesian strain limit (uniform h0 prior) at one point from N (4,) and M (4, 4).

    ``gw_frequency`` in Hz; returns h0 (dimensionless).
    """
    x95, _, _ = bayes_rows(nvec, mmat, level=level, grid=grid)
    return float(x95[0] * 2 * np.pi * gw_frequency)


def frequentist_limit(nvec, mmat, gw_frequency, *, fe=None, dof=4, level=LEVEL, grid=FREQUENTIST_GRID):
    """95 % frequentist strain limit at one point; ``fe`` is the observed Fe (default from N, M)."""
    if fe is None:
        fe = 0.5 * float(np.asarray(nvec) @ np.linalg.pinv(np.asarray(mmat)) @ np.asarray(nvec))
    x95, _, _, _ = frequentist_rows(mmat, 2.0 * fe, dof, level=level, grid=grid)
    return float(x95[0] * 2 * np.pi * gw_frequency)


def posterior_cdf(nvec, mmat, gw_frequency, strains, *, grid=QUADRATURE["standard"]):
    """Posterior CDF of h0 at ``strains`` (uniform prior, angles marginalised) at one point.

    A plain numpy/scipy evaluation of the same mixture (used for checks).
    """
    u, w = angle_grid(*grid)
    a = u @ np.asarray(nvec, dtype=float)
    c = np.einsum("ji,ik,jk->j", u, np.asarray(mmat, dtype=float), u)
    mu, sd = a / c, 1 / np.sqrt(c)
    logq0 = log_ndtr(mu / sd)
    logw = np.log(w) + 0.5 * a * mu + np.log(sd) + logq0
    weight = np.exp(logw - logsumexp(logw))
    x = np.atleast_1d(np.asarray(strains, dtype=float)) / (2 * np.pi * gw_frequency)
    z = (x[:, None] - mu) / sd
    return np.sum(weight * (1 - np.exp(log_ndtr(-z) - logq0)), axis=1)


# ----------------------------------------------------------------------------- sky averages
def _interp_on_relative_grid(h, limits, table, at_zero):
    """Per-pixel probability at absolute strain ``h`` (scalar) from the tabulated values; (S,).

    Between grid points: cubic Hermite in log strain with the tabulated
    derivatives. Below the grid: linear in strain from the value at zero.
    Above: the last grid value (≈ 1).
    """
    rel = h / limits
    logr = np.log(RELATIVE_GRID)
    out = np.empty(limits.shape)
    low = rel <= RELATIVE_GRID[0]
    high = rel >= RELATIVE_GRID[-1]
    mid = ~(low | high)
    if np.any(mid):
        lr = np.log(rel[mid])
        idx = np.clip(np.searchsorted(logr, lr) - 1, 0, logr.size - 2)
        step = logr[idx + 1] - logr[idx]
        t = (lr - logr[idx]) / step
        v = table[mid]
        rows = np.arange(v.shape[0])
        v0, d0 = v[rows, idx, 0], v[rows, idx, 1]
        v1, d1 = v[rows, idx + 1, 0], v[rows, idx + 1, 1]
        t2, t3 = t * t, t * t * t
        out[mid] = ((2 * t3 - 3 * t2 + 1) * v0 + (t3 - 2 * t2 + t) * step * d0
                    + (-2 * t3 + 3 * t2) * v1 + (t3 - t2) * step * d1)
    if np.any(low):
        t = rel[low] / RELATIVE_GRID[0]
        out[low] = (1 - t) * at_zero[low] + t * table[low, 0, 0]
    if np.any(high):
        out[high] = table[high, -1, 0]
    return np.clip(out, 0.0, 1.0)


def _solve_mixture(scales, weights, table, at_zero, level):
    """Strain at which Σ_s weights_s value_s(h) = level (bisection in log h).

    ``scales`` are the per-pixel tabulation scales (see :data:`RELATIVE_GRID`).
    """
    scales, weights = np.asarray(scales, dtype=float), np.asarray(weights, dtype=float)
    at_zero = np.asarray(at_zero, dtype=float)
    used = weights > 0
    if not np.all(np.isfinite(scales[used])):
        return np.inf
    scales, weights, table, at_zero = scales[used], weights[used], table[used], at_zero[used]
    if scales.size == 0:
        return np.inf
    weights = weights / weights.sum()

    def total(h):
        return float(weights @ _interp_on_relative_grid(h, scales, table, at_zero))

    if float(weights @ at_zero) >= level:
        return 0.0
    lo = float(scales.min() * RELATIVE_GRID[0])
    hi = float(scales.max() * RELATIVE_GRID[-1])
    if total(lo) >= level:
        return lo
    if total(hi) < level:
        return np.inf
    for _ in range(200):
        mid = math.sqrt(lo * hi)
        if total(mid) >= level:
            hi = mid
        else:
            lo = mid
        if hi / lo - 1 < 1e-10:
            break
    return hi


def sky_averaged_bayes(x95, logz, table, level=LEVEL):
    """Sky-marginalised Bayesian limit from per-pixel results (equal-area pixels, uniform sky).

    Each pixel's posterior enters with weight ∝ its evidence under the
    common uniform strain prior.
    """
    x95, logz = np.asarray(x95), np.asarray(logz)
    if np.any(~np.isfinite(logz)):
        return np.inf
    weights = np.exp(logz - logz.max())
    return _solve_mixture(x95, weights, np.asarray(table), np.zeros(x95.size), level)


def sky_averaged_frequentist(scale, p0, table, level=LEVEL):
    """Frequentist limit with the detection probability averaged over pixels and orientation.

    ``scale``, ``p0``, ``table`` as returned by :func:`frequentist_rows`.
    """
    scale = np.asarray(scale)
    return _solve_mixture(scale, np.ones(scale.size), np.asarray(table), np.asarray(p0), level)


# ----------------------------------------------------------------------------- galaxies
def galaxy_chirp_mass_limit(strain_limit, gw_frequency, distance_mpc):
    """Chirp mass [Msun] at which a binary at ``distance_mpc`` would have strain ``strain_limit``.

    Inverts ``h0 = 2 (G Mc)^(5/3) (π f)^(2/3) / (c⁴ d_L)`` (Sesana & Vecchio
    2010) through :func:`cwsearch.physics.waveform.chirp_mass_for_strain`.

    >>> f"{galaxy_chirp_mass_limit(2.76e-15, 1e-8, 100.0):.3g}"
    '1e+09'
    """
    return chirp_mass_for_strain(strain_limit, gw_frequency, distance_mpc)


def read_catalog_galaxies(path, select):
    """Galaxies named in ``select`` from a catalogue (ECSV or CSV, read by :func:`cwsearch.data.catalog.read_catalog`).

    ``select``: names, each item may hold several separated by commas.
    Distances come from the ``distance`` column [Mpc] or, where only a
    redshift is given, from Planck18 (as in the hosts stage).
    """
    names = [s.strip() for item in (select or ()) for s in str(item).split(",") if s.strip()]
    if not names:
        raise InputError("--catalog needs --select NAME[,NAME..] naming the galaxies to use")
    catalog = read_catalog(path)
    index = {str(n): i for i, n in enumerate(catalog.name)}
    out = []
    for name in names:
        if name not in index:
            raise InputError(f"galaxy {name!r} (from --select) is not in the catalogue", file=path, column="name")
        i = index[name]
        out.append(Galaxy(name, float(catalog.ra[i]), float(catalog.dec[i]), float(catalog.distance[i])))
    return out


# ----------------------------------------------------------------------------- Monte Carlo cross-checks
def _unit_amplitudes(cos_inclination, polarization, phase):
    return parameters_to_amplitudes(2 * np.pi, cos_inclination, polarization, phase, 1.0)


def log_likelihood_ratio(nvec, mmat, gw_frequency, strain, cos_inclination, polarization, phase):
    """Earth-term ``ln Λ = b·N − ½ bᵀ M b`` for parameter arrays (broadcast), b from
    :func:`cwsearch.physics.fstat.parameters_to_amplitudes`."""
    b = parameters_to_amplitudes(strain, cos_inclination, polarization, phase, gw_frequency)
    return b @ np.asarray(nvec, dtype=float) - 0.5 * np.einsum("...i,ij,...j->...", b, np.asarray(mmat), b)


def importance_sampled_limit(nvec, mmat, gw_frequency, *, n_samples=400_000, n_batches=20, seed=0,
                             level=LEVEL):
    """95 % strain limit by importance sampling over (h0, cos ι, ψ, Φ0); returns ``(h95, error)``.

    An independent Monte Carlo evaluation of the same posterior as
    :func:`bayesian_limit` (uniform h0, cos ι, ψ, Φ0): angles are drawn from
    their prior, h0 uniformly below a cap where ``ln Λ < −40``, each draw is
    weighted by Λ times the proposal width. The error is the spread of the
    quantile over ``n_batches`` independent batches divided by √n_batches.
    """
    rng = np.random.default_rng(seed)
    nvec = np.asarray(nvec, dtype=float)
    mmat = np.asarray(mmat, dtype=float)
    scale = 2 * np.pi * gw_frequency
    per_batch = int(n_samples) // int(n_batches)
    all_x, all_logw, quantiles = [], [], []
    for _ in range(int(n_batches)):
        ci = rng.uniform(-1, 1, per_batch)
        psi = rng.uniform(0, np.pi, per_batch)
        phase = rng.uniform(0, np.pi, per_batch)
        u = _unit_amplitudes(ci, psi, phase)
        a = u @ nvec
        c = np.einsum("ni,ij,nj->n", u, mmat, u)
        cap = (a + np.sqrt(a * a + 80.0 * c)) / c
        x = rng.uniform(0, 1, per_batch) * cap
        logw = x * a - 0.5 * x * x * c + np.log(cap)
        quantiles.append(_weighted_quantile(x, logw, level))
        all_x.append(x)
        all_logw.append(logw)
    q = _weighted_quantile(np.concatenate(all_x), np.concatenate(all_logw), level)
    err = np.std(quantiles, ddof=1) / np.sqrt(len(quantiles))
    return float(q * scale), float(err * scale)


def _weighted_quantile(x, logw, level):
    order = np.argsort(x)
    w = np.exp(logw[order] - logw.max())
    cum = np.cumsum(w)
    return float(x[order][np.searchsorted(cum, level * cum[-1])])


def sampler_limit(nvec, mmat, gw_frequency, *, seed=0, ess=2000.0, progress=False, level=LEVEL):
    """95 % strain limit from the follow-up sampler (:func:`cwsearch.inference.sampling.run_sampler`, ptemcee)
    run on the Earth-term ``ln Λ`` with uniform priors on h0, cos ι, ψ, Φ0.

    Returns ``(h95, error, details)``; the error is ``√(p(1−p)/ESS)`` divided
    by the posterior density at the quantile (estimated from the samples).
    """
    nvec = np.asarray(nvec, dtype=float)
    mmat = np.asarray(mmat, dtype=float)
    u, _ = angle_grid(*QUADRATURE["fast"])
    a = u @ nvec
    c = np.einsum("ni,ij,nj->n", u, mmat, u)
    x_cap = float(np.max((a + np.sqrt(a * a + 80.0 * c)) / c))
    lower = np.array([0.0, -1.0, 0.0, 0.0])
    upper = np.array([x_cap, 1.0, np.pi, np.pi])

    def log_prior(p):
        inside = np.all((p >= lower) & (p <= upper), axis=1)
        return np.where(inside, 0.0, -np.inf)

    def log_likelihood(p):
        b = _unit_amplitudes(p[:, 1], p[:, 2], p[:, 3]) * p[:, :1]
        return b @ nvec - 0.5 * np.einsum("ni,ij,nj->n", b, mmat, b)

    settings = SamplerSettings(walkers=32, temperatures=4, max_temperature=50.0, ess=float(ess),
                               max_iterations=20_000, adapt_iterations=200, check_every=50)
    rng = np.random.default_rng(seed)
    initial = rng.uniform(lower, upper, size=(settings.temperatures, settings.walkers, 4))
    initial[..., 0] *= 0.2
    result = run_sampler(log_prior, log_likelihood, initial, settings, seed=seed, progress=progress,
                         label="limits check")
    x = result.samples()[:, 0]
    q = float(np.quantile(x, level))
    density = 0.02 / max(float(np.quantile(x, level + 0.01) - np.quantile(x, level - 0.01)), 1e-300)
    err = np.sqrt(level * (1 - level) / max(result.ess, 1.0)) / density
    scale = 2 * np.pi * gw_frequency
    details = {"ess": float(result.ess), "iterations": int(result.iterations), "stopped_by": result.stopped_by}
    return q * scale, float(err * scale), details


# ----------------------------------------------------------------------------- the stage
#: default highest frequency of the limits stage [Hz] (below the scan's Nyquist-like cap)
DEFAULT_FMAX = 1e-7
#: pixel × frequency rows per task
ROWS_PER_TASK = 48


@dataclass
class LimitsResult:
    """What :func:`run_limits` returns; every table is also written to ``run_dir/limits/``."""

    frequencies: np.ndarray
    pixel_limits: np.ndarray              # (N_pix, N_freq) strain_95 of the primary method
    frequency_limits: object              # astropy Table
    sky_limits: object                    # astropy Table
    galaxy_limits: object | None          # astropy Table or None
    summary: dict
    files: dict = field(default_factory=dict)
    pixel_limits_frequentist: np.ndarray | None = None


def _limits_task(task):
    """Worker entry point: limits for a chunk of (N, M) rows. Pure function of its input."""
    out = {}
    if task["bayes"]:
        x95, logz, table = bayes_rows(task["nvec"], task["mmat"], level=task["level"], grid=task["grid"])
        out["bayes"] = (x95, logz, table)
    if task["frequentist"]:
        out["frequentist"] = frequentist_rows(task["mmat"], task["two_fe"], task["dof"], level=task["level"])
    return out


def _network_dof(mmat):
    """Degrees of freedom of 2Fe per row: the rank of M (4, or 2 for a single pulsar)."""
    eig = np.linalg.eigvalsh(mmat)
    top = np.max(eig, axis=-1, keepdims=True)
    return np.sum(eig > 1e-10 * np.maximum(top, 1e-300), axis=-1).astype(np.int64)


def compute_limits(proj, ra, dec, *, method="bayes", quadrature="standard", workers=1, scheduler=None,
                   progress=False, level=LEVEL, noise=None):
    """Per-position limits from projections at every frequency of ``proj``.

    Parameters
    ----------
    proj : :class:`cwsearch.physics.fstat.Projections`
    ra, dec : arrays (S,) [rad] of sky positions (pixel centres, galaxies)
    method, quadrature : as in :class:`LimitsOptions`
    noise : the run's :class:`cwsearch.physics.correlated.ArrayNoise` that made ``proj``
        (None: per-pulsar projections); with a correlated common process N and M carry
        the cross-pulsar terms (:func:`cwsearch.physics.correlated.correlated_network`).
    workers, scheduler : the task runner (:class:`cwsearch.inference.execution.TaskRunner`)

    Returns a dict of (S, F) arrays in strain: ``bayes`` (h95), ``bayes_log_evidence``,
    ``bayes_table`` (S, F, K, 2) in units of x; ``frequentist``, ``frequentist_p0``,
    ``frequentist_scale``, ``frequentist_table``; and ``fe`` (S, F); plus the task runner's description (key ``engine``, kept for old run folders).
    """
    want_bayes = method in ("bayes", "both")
    want_freq = method in ("frequentist", "both")
    fplus, fcross = fstat.sky_patterns(proj, np.asarray(ra), np.asarray(dec))
    if noise is None:
        nvec, mmat = fstat.network_vectors(proj, fplus, fcross)
        fe = fstat.fe_statistic(proj, fplus, fcross)
    else:
        nvec, mmat = noise.network(proj, fplus, fcross)
        fe = noise.fe_sky(proj, fplus, fcross).fe_map
    n_pos, n_freq = fe.shape
    rows_n = nvec.reshape(-1, 4)
    rows_m = mmat.reshape(-1, 4, 4)
    rows_fe = fe.reshape(-1)
    rows_dof = _network_dof(rows_m)
    n_rows = rows_n.shape[0]
    tasks, weights = [], []
    for start in range(0, n_rows, ROWS_PER_TASK):
        sl = slice(start, min(start + ROWS_PER_TASK, n_rows))
        tasks.append({"nvec": rows_n[sl].copy(), "mmat": rows_m[sl].copy(), "two_fe": 2.0 * rows_fe[sl],
                      "dof": rows_dof[sl].copy(), "bayes": want_bayes, "frequentist": want_freq,
                      "grid": QUADRATURE[quadrature], "level": float(level)})
        weights.append(sl.stop - sl.start)
    with TaskRunner(workers=workers, scheduler=scheduler) as runner:
        engine = runner.describe()
        with progress_bar(total=n_rows, desc="limits (pixel x frequency)", enabled=progress, unit="px") as bar:
            results = runner.map(_limits_task, tasks, weights=weights, on_done=bar.update)
    scale = 2 * np.pi * proj.frequencies[None, :]
    out = {"fe": fe, "engine": engine}
    if want_bayes:
        x95 = np.concatenate([r["bayes"][0] for r in results]).reshape(n_pos, n_freq)
        out["bayes"] = x95 * scale
        out["bayes_x"] = x95
        out["bayes_log_evidence"] = np.concatenate([r["bayes"][1] for r in results]).reshape(n_pos, n_freq)
        out["bayes_table"] = np.concatenate([r["bayes"][2] for r in results]).reshape(n_pos, n_freq, -1, 2)
    if want_freq:
        x95 = np.concatenate([r["frequentist"][0] for r in results]).reshape(n_pos, n_freq)
        out["frequentist"] = x95 * scale
        out["frequentist_p0"] = np.concatenate([r["frequentist"][1] for r in results]).reshape(n_pos, n_freq)
        out["frequentist_scale"] = np.concatenate([r["frequentist"][2] for r in results]).reshape(n_pos, n_freq)
        out["frequentist_table"] = np.concatenate([r["frequentist"][3] for r in results]).reshape(
            n_pos, n_freq, -1, 2)
    return out


def _sky_averages(res, frequencies, n_pix, level=LEVEL):
    """Sky-averaged limits per frequency (first ``n_pix`` positions are the HEALPix pixels)."""
    out = {}
    scale = 2 * np.pi * np.asarray(frequencies)
    if "bayes" in res:
        out["bayes"] = np.array([
            sky_averaged_bayes(res["bayes_x"][:n_pix, f], res["bayes_log_evidence"][:n_pix, f],
                               res["bayes_table"][:n_pix, f], level) for f in range(len(frequencies))]) * scale
    if "frequentist" in res:
        out["frequentist"] = np.array([
            sky_averaged_frequentist(res["frequentist_scale"][:n_pix, f], res["frequentist_p0"][:n_pix, f],
                                     res["frequentist_table"][:n_pix, f], level)
            for f in range(len(frequencies))]) * scale
    return out


def _positive_min(pixel_limits):
    """Per column (frequency), the lowest positive per-pixel limit (NaN if none): an empty frequentist
    limit (0, see :func:`_best_pixel`) is not a best sky position."""
    x = np.asarray(pixel_limits, dtype=float)
    m = np.where(x > 0, x, np.inf).min(axis=0)
    return np.where(np.isfinite(m), m, np.nan)


def _best_pixel(pixel_limits):
    """Best (lowest) per-pixel limit among pixels with a positive, finite limit, and how many pixels have
    an empty limit (0: the observed Fe is below what noise alone gives 95 % of the time, so the frequentist
    construction excludes every strain; such a pixel has no informative limit, and is not "best")."""
    x = np.asarray(pixel_limits, dtype=float)
    ok = np.isfinite(x) & (x > 0)
    return {"best_pixel_strain_95": float(x[ok].min()) if ok.any() else None,
            "pixels_with_empty_limit": int(np.sum(x == 0))}


def _finite_or_none(v):
    v = float(v)
    return v if math.isfinite(v) else None


def run_limits(array, run_dir, options: LimitsOptions = LimitsOptions(), *, noise=None, seed=0, progress=True):
    """The limits stage: write ``run_dir/limits/`` and return a :class:`LimitsResult`.

    Files: ``frequency_limits.ecsv``, ``sky_limits.ecsv``, ``galaxy_limits.ecsv``
    (with galaxies), ``limits_summary.json`` and PNG plots.
    """
    options.validate()
    noise = NoiseSettings() if noise is None else noise
    started = time.time()
    folder = Path(run_dir) / "limits"
    galaxies = parse_galaxies(options.galaxy)
    if options.catalog:
        galaxies += read_catalog_galaxies(options.catalog, options.select)
    names = [g.name for g in galaxies]
    if len(set(names)) != len(names):
        raise InputError("option --galaxy/--select: galaxy names must be unique")
    fmax = options.fmax if options.fmax is not None else min(DEFAULT_FMAX, default_max_frequency(array))
    fmin = options.fmin
    if fmin is not None and options.fmax is None and not fmax > fmin:
        fmax = default_max_frequency(array)
    frequencies = frequency_grid(array, fmin=fmin, fmax=fmax, oversample=int(options.oversample))
    fmax_note = None
    if options.fmax is None and fmax < default_max_frequency(array):
        fmax_note = (f"highest frequency {fmax:.3g} Hz by default, lower than the scan's default "
                     f"{default_max_frequency(array):.3g} Hz (1/(2 x median TOA spacing), at most 1e-6 Hz): every "
                     "limit frequency costs a quadrature over every sky pixel, and limits matter most where the "
                     "array is sensitive; set fmax (--fmax) to go higher")
    workers = None if not options.workers else int(options.workers)
    requested_sky_index = None
    if options.sky_frequency is not None:
        requested_sky_index = int(np.argmin(np.abs(frequencies - options.sky_frequency)))
        step = frequencies[1] - frequencies[0] if len(frequencies) > 1 else 1.0 / array.span
        if abs(frequencies[requested_sky_index] - options.sky_frequency) > step:
            raise InputError(f"option --sky-frequency: {options.sky_frequency:.4g} Hz is outside the band "
                             f"{frequencies[0]:.4g}-{frequencies[-1]:.4g} Hz")

    engine = array_noise(array, noise)
    proj = engine.projections(frequencies)
    nside = int(options.nside)
    n_pix = sky.n_pixels(nside)
    ra_pix, dec_pix = sky.pixel_centres(nside)
    ra = np.concatenate([ra_pix, np.radians([g.ra for g in galaxies])])
    dec = np.concatenate([dec_pix, np.radians([g.dec for g in galaxies])])
    # the frequentist limit costs ~5 % of the Bayesian one, so "bayes" reports it too
    computed = "frequentist" if options.method == "frequentist" else "both"
    res = compute_limits(proj, ra, dec, method=computed, quadrature=options.quadrature, workers=workers,
                         scheduler=options.scheduler or None, progress=progress, noise=engine)
    averages = _sky_averages(res, frequencies, n_pix)
    primary = "frequentist" if options.method == "frequentist" else "bayes"
    pixel_limits = res[primary][:n_pix]

    # ------------------------------------------------ frequency table
    ftab = Table()
    ftab["frequency"] = frequencies * u.Hz
    ftab["strain_95"] = averages[primary]
    ftab["strain_95_best"] = _positive_min(pixel_limits)
    ftab["strain_95_worst"] = pixel_limits.max(axis=0)
    ftab["strain_95_median"] = np.median(pixel_limits, axis=0)
    ftab["best_pixel"] = np.argmin(pixel_limits, axis=0)
    ftab["worst_pixel"] = np.argmax(pixel_limits, axis=0)
    if primary == "bayes":
        pf = res["frequentist"][:n_pix]
        ftab["strain_95_frequentist"] = averages["frequentist"]
        ftab["strain_95_frequentist_best"] = _positive_min(pf)
        ftab["strain_95_frequentist_worst"] = pf.max(axis=0)
    ftab["fe_max"] = res["fe"][:n_pix].max(axis=0)
    ftab.meta.update({"method": primary, "level": LEVEL, "nside": nside,
                      "sky_average": "posterior (bayes) or detection probability (frequentist) averaged over "
                                    "equal-area pixels, i.e. a uniformly distributed sky position"})

    # ------------------------------------------------ sky table
    finite = np.isfinite(averages[primary])
    if options.sky_frequency is not None:
        sky_index = requested_sky_index
    else:
        sky_index = int(np.nanargmin(np.where(finite, averages[primary], np.inf))) if finite.any() else 0
    sky_frequency = float(frequencies[sky_index])
    stab = Table()
    stab["pixel"] = np.arange(n_pix)
    stab["ra"] = np.degrees(ra_pix) * u.deg
    stab["dec"] = np.degrees(dec_pix) * u.deg
    stab["strain_95"] = pixel_limits[:, sky_index]
    if options.method == "both":
        stab["strain_95_frequentist"] = res["frequentist"][:n_pix, sky_index]
    stab["fe"] = res["fe"][:n_pix, sky_index]
    stab.meta.update({"frequency": sky_frequency, "frequency_unit": "Hz", "method": primary, "nside": nside,
                      "order": "ring"})

    # ------------------------------------------------ galaxies
    gtab = None
    if galaxies:
        rows = []
        for k, g in enumerate(galaxies):
            strain = res[primary][n_pix + k]
            mc = np.asarray(galaxy_chirp_mass_limit(strain, frequencies, g.distance), dtype=float)
            extra = [[]] * len(frequencies)
            if options.method == "both":
                hf = res["frequentist"][n_pix + k]
                mf = np.atleast_1d(np.asarray(galaxy_chirp_mass_limit(hf, frequencies, g.distance), dtype=float))
                extra = [[a, b] for a, b in zip(hf, mf)]
            for f, h, m, e in zip(frequencies, strain, np.atleast_1d(mc), extra):
                rows.append((g.name, g.ra, g.dec, g.distance, f, h, m, *e))
        names = ["name", "ra", "dec", "distance", "frequency", "strain_95", "chirp_mass_95"]
        if options.method == "both":
            names += ["strain_95_frequentist", "chirp_mass_95_frequentist"]
        gtab = Table(rows=rows, names=names)
        if options.method == "both":
            gtab["chirp_mass_95_frequentist"].unit = u.solMass
        gtab["ra"].unit, gtab["dec"].unit, gtab["distance"].unit = u.deg, u.deg, u.Mpc
        gtab["frequency"].unit, gtab["chirp_mass_95"].unit = u.Hz, u.solMass
        gtab.meta.update({"method": primary, "position": "exact galaxy position"})

    # ------------------------------------------------ optional sampler check
    check = None
    if options.mcmc_check is not None:
        pix = int(options.mcmc_check)
        fplus, fcross = fstat.sky_patterns(proj, ra_pix[pix:pix + 1], dec_pix[pix:pix + 1])
        nv, mm = engine.network(proj, fplus, fcross)
        nv, mm = nv[0, sky_index], mm[0, sky_index]
        quad = bayesian_limit(nv, mm, sky_frequency, grid=QUADRATURE[options.quadrature])
        check = {"pixel": pix, "frequency": sky_frequency, "quadrature": quad}
        try:
            h, err, details = sampler_limit(nv, mm, sky_frequency, seed=seed, progress=progress)
            check.update({"sampled": h, "sampled_error": err, "sampler": "cwsearch.inference.sampling (ptemcee)", **details})
        except ImportError:
            h, err = importance_sampled_limit(nv, mm, sky_frequency, seed=seed)
            check.update({"sampled": h, "sampled_error": err, "sampler": "importance sampling"})
        check["difference_in_errors"] = (check["sampled"] - quad) / max(check["sampled_error"], 1e-300)

    # ------------------------------------------------ write
    files = {}
    write_table_atomic(folder / "frequency_limits.ecsv", ftab)
    files["frequency_limits"] = str(folder / "frequency_limits.ecsv")
    write_table_atomic(folder / "sky_limits.ecsv", stab)
    files["sky_limits"] = str(folder / "sky_limits.ecsv")
    write_healpix_map(folder / "sky_limits.fits", {"STRAIN_95": np.asarray(stab["strain_95"], dtype=float)},
                      nside=nside, extra={"FREQ": sky_frequency, "METHOD": primary, "LEVEL": LEVEL},
                      description=f"95 % strain upper limit ({primary}) per pixel at FREQ Hz")
    files["sky_limits_map"] = str(folder / "sky_limits.fits")
    if gtab is not None:
        write_table_atomic(folder / "galaxy_limits.ecsv", gtab)
        files["galaxy_limits"] = str(folder / "galaxy_limits.ecsv")
    best = int(sky_index)
    summary = {
        "method": options.method,
        "level": LEVEL,
        "n_frequencies": int(len(frequencies)),
        "frequency_range": [float(frequencies[0]), float(frequencies[-1])],
        "nside": nside,
        "n_pixels": int(n_pix),
        "quadrature": options.quadrature,
        "sky_frequency": sky_frequency,
        "best_frequency": float(frequencies[best]),
        "engine": res["engine"],
        "noise_model": engine.describe(),
        "wall_time": round(time.time() - started, 3),
    }
    if fmax_note:
        summary["fmax_note"] = fmax_note
    if "bayes" in averages:
        summary["bayes"] = {"strain_95_at_best_frequency": _finite_or_none(averages["bayes"][best]),
                            "strain_95_min": _finite_or_none(np.nanmin(averages["bayes"])),
                            **_best_pixel(res["bayes"][:n_pix, best])}
    if "frequentist" in averages:
        summary["frequentist"] = {"strain_95_at_best_frequency": _finite_or_none(averages["frequentist"][best]),
                                  "strain_95_min": _finite_or_none(np.nanmin(averages["frequentist"])),
                                  **_best_pixel(res["frequentist"][:n_pix, best])}
    summary["strain_95"] = summary[primary]["strain_95_at_best_frequency"]
    if galaxies:
        summary["galaxies"] = {g.name: {"distance": g.distance,
                                        "chirp_mass_95_min": _finite_or_none(
                                            np.nanmin(gtab["chirp_mass_95"][gtab["name"] == g.name])),
                                        "at_frequency": float(frequencies[int(np.nanargmin(
                                            res[primary][n_pix + k]))])}
                               for k, g in enumerate(galaxies)}
    if check is not None:
        summary["mcmc_check"] = check
    if not options.no_plots:
        # lazy: matplotlib is loaded only when plots are drawn
        from .plots import make_plots

        files.update(make_plots(folder, frequencies, ftab, stab, gtab, array, nside, primary))
    summary["files"] = sorted(Path(p).name for p in files.values())
    summary["noise_model"] = {**stage_noise_statement(array, noise), **summary.get("noise_model", {})}
    write_json_atomic(folder / "limits_summary.json", summary)
    files["summary"] = str(folder / "limits_summary.json")
    return LimitsResult(frequencies, pixel_limits, ftab, stab, gtab, summary, files,
                        res["frequentist"][:n_pix] if "frequentist" in res else None)


__all__ = [
    "LEVEL", "RELATIVE_GRID", "METHODS", "QUADRATURE", "FREQUENTIST_GRID", "COS_PANELS", "angle_grid",
    "ncx2_sf", "bayes_rows", "frequentist_rows", "bayesian_limit", "frequentist_limit", "posterior_cdf",
    "sky_averaged_bayes", "sky_averaged_frequentist", "galaxy_chirp_mass_limit", "Galaxy",
    "parse_galaxies", "read_catalog_galaxies", "log_likelihood_ratio", "importance_sampled_limit",
    "sampler_limit", "DEFAULT_FMAX", "ROWS_PER_TASK", "LimitsOptions", "LimitsResult", "compute_limits",
    "run_limits",
]
