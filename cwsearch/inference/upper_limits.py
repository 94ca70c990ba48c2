"""Upper-limit kernels at one sky position and frequency: the Bayesian and frequentist 95 % strain limits
from the Earth-term N and M of the F-statistic (docs/design.md §9).

Shared by the limits stage (strain limits over frequency × sky, galaxy chirp-mass limits) and the targets
stage (a chirp-mass limit per catalogue target); the method is described in
:mod:`cwsearch.stages.limits.stage` and README "Upper limits".

``ln Λ(b) = b·N − ½ bᵀ M b`` with ``b = x u(cos ι, ψ, Φ0)``, ``x = h0 / (2π f)``: for fixed angles a
Gaussian in x, so the posterior of h0 under a uniform prior is a mixture of truncated normals over a
deterministic angle grid (:func:`bayes_rows`); the frequentist limit uses ``2Fe ~ χ'²(4, ρ²)``
(Ellis, Siemens & Creighton 2012; :func:`frequentist_rows`).

Examples
--------
>>> import numpy as np
>>> from cwsearch.inference.upper_limits import bayesian_limit
>>> m = np.diag([4.0, 4.0, 3.0, 3.0]) * 1e16      # sensitive 4×4 M (s⁻²)
>>> f"{bayesian_limit(np.zeros(4), m, 1e-8):.2e}"
'5.19e-16'
"""

from __future__ import annotations

import functools
import math

import numpy as np
from numba import njit
from scipy.special import log_ndtr, logsumexp

from ..physics.fstat import parameters_to_amplitudes

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
def _solve_components(mu, sd, logq0, logw, lz, level, rel_grid, weight, inv_sd, coef, active, table_row):
    """The ``level`` quantile (in x) of the truncated-normal mixture of components ``mu, sd, logq0, logw``
    (log evidence ``lz`` = logsumexp(logw)); fills ``table_row`` (K, 2) with the CDF at ``x95 × rel_grid``
    and its derivative in log x. ``weight``, ``inv_sd``, ``coef`` (normalised weights, 1/sd, weight/Q0)
    and ``active`` (the components kept, their count returned) are left for the caller.
    Returns ``(x95, n_active, density at x95)``."""
    n_nodes = mu.shape[0]
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
    density = 0.0
    for _ in range(200):
        cdf, pdf = _mixture_cdf(x, mu, inv_sd, logq0, coef, weight, active, n_active)
        density = pdf
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
    for k in range(rel_grid.shape[0]):
        h = x * rel_grid[k]
        cdf, pdf = _mixture_cdf(h, mu, inv_sd, logq0, coef, weight, active, n_active)
        table_row[k, 0] = min(max(cdf, 0.0), 1.0)
        table_row[k, 1] = h * pdf
    return x, n_active, density


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
        x95[r], _, _ = _solve_components(mu, sd, logq0, logw, lz, level, rel_grid, weight, inv_sd, coef, active,
                                         table[r])


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


__all__ = [
    "LEVEL",
    "RELATIVE_GRID",
    "QUADRATURE",
    "FREQUENTIST_GRID",
    "COS_PANELS",
    "angle_grid",
    "ncx2_sf",
    "bayes_rows",
    "frequentist_rows",
    "bayesian_limit",
    "frequentist_limit",
    "posterior_cdf",
]
