r"""One likelihood for several circular binaries at once (docs/design.md §7a).

The model is the sum of K binaries, each with its Earth and pulsar terms, in
the run's one noise model. Per pulsar the signal is ``s_p = Σ_k Σ_j c_kpj b_kpj``
with the four basis series of each source (:mod:`cwsearch.inference.likelihood`)
and ``ln Λ = (d|s) − ½ (s|s)``; the products are the single-source ones of
every source (``(d|b_k)``, ``(b_k|b_k)``: the single-source fast path, Chebyshev
nodes or TOA by TOA) plus the cross products ``(b_k|b_l)`` of two sources in the
same pulsar, from the same basis kernels and the same cached node products.

Pulsar phases (K per pulsar, uniform, marginalised):

* **Per-pulsar (block-diagonal) noise.** ln Λ is a sum over pulsars, and
  each pulsar's factor depends on its K phases only, through
  ``Σ_k f_k(χ_k) + Σ_{k<l} u_kᵀ J_kl u_l`` (u = (cos χ, sin χ); ``f_k`` the
  single-source form ``a cosχ + b sinχ + c cos2χ + d sin2χ``, its ``a, b``
  shifted by the other sources' Earth terms). The K-dimensional integral is
  done exactly: the strongest source's phase innermost by the single-source
  :func:`~cwsearch.inference.likelihood.marginal_log_factor` (Bessel series,
  grid or Laplace), the others on periodic trapezoid grids (exponential
  convergence for smooth periodic integrands) sized by the single-source
  rule from their amplitudes plus couplings. For K = 2 that is one
  single-source marginal per outer grid point (points that cannot come
  within :data:`PRUNE_NATS` of the largest term are skipped). When every
  source's amplitude in the pulsar exceeds :data:`LAPLACE_AMPLITUDE` nats
  (loud trial signals of hot chains) Laplace's method summed over the local
  maxima replaces the grids, where the first neglected term of its
  expansion (2 amplitude/λ², λ the smallest curvature at a peak) is below
  :data:`LAPLACE_ERROR` nats or :data:`LAPLACE_RELATIVE_ERROR` of the
  amplitude; flat peaks stay on the grids.
* **Correlated background.** The cross-pulsar products couple the phases of
  every (source, pulsar) pair; as in the single-source
  :class:`~cwsearch.inference.correlated_likelihood.CorrelatedLikelihood`
  they are marginalised in variational mean field (a lower bound, exact when
  the couplings vanish), the units being the K·P (source, pulsar) pairs:
  the cross-source couplings inside one pulsar join the mean field too.
  The cross-pulsar algebra is the single-source one, with the correction
  matrix Ψ spread over the K·P units.

Sampler coordinates: K blocks of the 8 single-source coordinates
(:data:`~cwsearch.inference.likelihood.PARAMETER_NAMES`), source k's block
named with the prefix ``s{k}_`` (``s1_ra``, …, ``s2_phase``).

Examples
--------
>>> import numpy as np
>>> from cwsearch.physics.simulate import invented_array, simulated_array
>>> from cwsearch.physics.noise import NoiseSettings
>>> from cwsearch.inference.likelihood import Likelihood
>>> arr = simulated_array(invented_array(n_pulsars=3, years=10, seed=1), seed=2)
>>> joint = MultiSourceLikelihood(Likelihood(arr, NoiseSettings(red_components=4)), 2)
>>> joint.names[:2], joint.names[8]
(('s1_ra', 's1_sin_dec'), 's2_ra')
>>> theta = np.array([[1.0, 0.2, np.log10(8e-9), 8.5, -14.5, 0.3, 0.4, 0.5,
...                    2.0, -0.3, np.log10(2e-8), 8.7, -14.6, -0.2, 1.0, 2.5]])
>>> bool(np.isfinite(joint.batch(theta)[0]))
True
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from ..physics import fstat, waveform
from .correlated_likelihood import (MEAN_FIELD_MAX_SWEEPS, MEAN_FIELD_TOLERANCE, CorrelatedLikelihood,
                                    _mean_field_core, correlated_terms, earth_coefficients)
from .likelihood import (_PARALLEL_BASIS, Likelihood, _basis_parallel, _basis_serial, _grid_size,
                         _phase_coefficients, marginal_log_factor)

#: amplitude [nats] (linear + coupling + quadratic terms) above which, for every source of a pulsar, the
#: K-phase integral may be done by Laplace's method (trial signals thousands of nats from any posterior) ...
LAPLACE_AMPLITUDE = 1000.0
#: ... and only where the first neglected term of Laplace's expansion, 2 amplitude / λ² (λ the smallest
#: curvature at a peak), is below this many nats; a flat peak goes to the grids
LAPLACE_ERROR = 0.02
#: ... or below this fraction of the amplitude (1e5 nats and more from any posterior: 1 nat at 1e5 nats
#: changes a hot chain's tempered likelihood by less than its own Monte-Carlo noise)
LAPLACE_RELATIVE_ERROR = 1e-5
#: walkers × pulsars from which the marginalisation kernel runs on every core
_PARALLEL_UNITS = 200


def source_names(names, n_sources):
    """Sampler coordinate names of K sources: ``s1_ra``, … (source k's block prefixed ``s{k}_``)."""
    return tuple(f"s{k + 1}_{name}" for k in range(n_sources) for name in names)


# ---------------------------------------------------------------- the K-phase integral of one pulsar
@njit(cache=True, inline="always")
def _coupling_field(k, chi_c, chi_s, coup, n, out):
    """Σ_{m≠k} C_km u_m into ``out`` (2,), C_km = coup[k, m] for k < m and coup[m, k]ᵀ for m < k."""
    out[0] = 0.0
    out[1] = 0.0
    for m in range(n):
        if m < k:
            x = coup[m, k]
            out[0] += x[0, 0] * chi_c[m] + x[1, 0] * chi_s[m]
            out[1] += x[0, 1] * chi_c[m] + x[1, 1] * chi_s[m]
        elif m > k:
            x = coup[k, m]
            out[0] += x[0, 0] * chi_c[m] + x[0, 1] * chi_s[m]
            out[1] += x[1, 0] * chi_c[m] + x[1, 1] * chi_s[m]


@njit(cache=True)
def _phase_maxima(a, b, c, d, out):
    """The (at most two) local maxima of a cosχ + b sinχ + c cos2χ + d sin2χ, from a 64-point grid
    refined by Newton steps, into ``out``; returns how many."""
    n = 64
    step = 2.0 * np.pi / n
    vals = np.empty(n)
    for m in range(n):
        t = m * step
        vals[m] = a * np.cos(t) + b * np.sin(t) + c * np.cos(2 * t) + d * np.sin(2 * t)
    found = 0
    for m in range(n):
        if vals[m] >= vals[(m - 1) % n] and vals[m] > vals[(m + 1) % n] and found < out.shape[0]:
            t1 = m * step
            x = t1
            for _ in range(40):
                d1 = -a * np.sin(x) + b * np.cos(x) - 2 * c * np.sin(2 * x) + 2 * d * np.cos(2 * x)
                d2 = -a * np.cos(x) - b * np.sin(x) - 4 * c * np.cos(2 * x) - 4 * d * np.sin(2 * x)
                if d2 >= 0:
                    break
                dx = max(-step, min(step, -d1 / d2))
                x += dx
                if abs(dx) < 1e-14:
                    break
            out[found] = x
            found += 1
    if found == 0:               # a constant function
        out[0] = 0.0
        found = 1
    return found


@njit(cache=True)
def _best_phase(a, b, c, d):
    """The global maximum of a cosχ + b sinχ + c cos2χ + d sin2χ."""
    cand = np.empty(2)
    n = _phase_maxima(a, b, c, d, cand)
    best, x = -np.inf, 0.0
    for i in range(n):
        t = cand[i]
        f = a * np.cos(t) + b * np.sin(t) + c * np.cos(2 * t) + d * np.sin(2 * t)
        if f > best:
            best, x = f, t
    return x


@njit(cache=True)
def _laplace_at(chi, lin, quad, const, coup, tmp_c, tmp_s, field):
    """Coordinate ascent of F from ``chi`` (changed in place) to a local maximum; returns ln of Laplace's
    (2π)^-K ∫ exp(F) dχ over that peak."""
    n = lin.shape[0]
    for k in range(n):
        tmp_c[k], tmp_s[k] = np.cos(chi[k]), np.sin(chi[k])
    grad = np.empty(n)
    hess = np.zeros((n, n))
    for sweep in range(100):
        if sweep < 3:            # coordinate ascent into a basin, then Newton steps on all phases at once
            for k in range(n):
                _coupling_field(k, tmp_c, tmp_s, coup, n, field)
                x = _best_phase(lin[k, 0] + field[0], lin[k, 1] + field[1], quad[k, 0], quad[k, 1])
                chi[k], tmp_c[k], tmp_s[k] = x, np.cos(x), np.sin(x)
            continue
        _gradient_hessian(chi, tmp_c, tmp_s, lin, quad, coup, field, grad, hess)
        if np.all(np.linalg.eigvalsh(hess) < 0):
            step = -np.linalg.solve(hess, grad)
        else:                    # not concave here: a gradient step of bounded size
            step = grad / max(1.0, np.abs(grad).max()) * 0.1
        biggest = np.abs(step).max()
        if biggest > 0.3:
            step *= 0.3 / biggest
        for k in range(n):
            chi[k] += step[k]
            tmp_c[k], tmp_s[k] = np.cos(chi[k]), np.sin(chi[k])
        if biggest < 1e-11:
            break
    _gradient_hessian(chi, tmp_c, tmp_s, lin, quad, coup, field, grad, hess)
    value = const
    for k in range(n):
        _coupling_field(k, tmp_c, tmp_s, coup, n, field)
        c2, s2 = np.cos(2 * chi[k]), np.sin(2 * chi[k])
        value += lin[k, 0] * tmp_c[k] + lin[k, 1] * tmp_s[k] + quad[k, 0] * c2 + quad[k, 1] * s2 \
            + 0.5 * (field[0] * tmp_c[k] + field[1] * tmp_s[k])
    curvature = np.linalg.eigvalsh(-hess).min()
    if curvature <= 0:     # not a strict maximum (a flat direction): no Laplace value
        return value - n * np.log(2 * np.pi), 0.0
    sign, logdet = np.linalg.slogdet(-hess)
    return value - 0.5 * n * np.log(2 * np.pi) - 0.5 * logdet, curvature


@njit(cache=True)
def _gradient_hessian(chi, tmp_c, tmp_s, lin, quad, coup, field, grad, hess):
    """Gradient and Hessian of F in the phases at ``chi`` (cos, sin in ``tmp_c``, ``tmp_s``)."""
    n = lin.shape[0]
    for k in range(n):
        _coupling_field(k, tmp_c, tmp_s, coup, n, field)
        c2, s2 = np.cos(2 * chi[k]), np.sin(2 * chi[k])
        a, b = lin[k, 0] + field[0], lin[k, 1] + field[1]
        grad[k] = -a * tmp_s[k] + b * tmp_c[k] - 2 * quad[k, 0] * s2 + 2 * quad[k, 1] * c2
        hess[k, k] = -a * tmp_c[k] - b * tmp_s[k] - 4 * quad[k, 0] * c2 - 4 * quad[k, 1] * s2
        for m in range(k + 1, n):
            x = coup[k, m]       # ∂²/∂χ_k∂χ_m of u_kᵀ C u_m = u_k'ᵀ C u_m', u' = (−sin, cos)
            v = (tmp_s[k] * (x[0, 0] * tmp_s[m] - x[0, 1] * tmp_c[m])
                 - tmp_c[k] * (x[1, 0] * tmp_s[m] - x[1, 1] * tmp_c[m]))
            hess[k, m] = v
            hess[m, k] = v


@njit(cache=True)
def _joint_laplace(lin, quad, const, coup, amplitude):
    """ln (2π)^-K ∫ exp(F) dχ by Laplace's method summed over the distinct local maxima of F, found by
    coordinate ascent from every combination of the sources' own maxima (at most 2^K starts),
    F = const + Σ_k [lin_k·u_k + quad_k·(cos2χ_k, sin2χ_k)] + Σ_{k<l} u_kᵀ coup[k, l] u_l; and the
    size of the first neglected term of the expansion, ``2 amplitude / λ²`` (λ the smallest curvature
    −H at a peak; F's fourth derivatives are at most 16 × amplitude), the largest over the peaks."""
    n = lin.shape[0]
    own = np.empty((n, 2))
    n_own = np.empty(n, dtype=np.int64)
    for k in range(n):
        n_own[k] = _phase_maxima(lin[k, 0], lin[k, 1], quad[k, 0], quad[k, 1], own[k])
    n_start = 1
    for k in range(n):
        n_start *= n_own[k]
    peaks = np.empty((n_start, n))
    logs = np.empty(n_start)
    chi = np.empty(n)
    tmp_c, tmp_s, field = np.empty(n), np.empty(n), np.empty(2)
    found = 0
    worst = 0.0
    for start in range(n_start):
        rest = start
        for k in range(n):
            chi[k] = own[k, rest % n_own[k]]
            rest //= n_own[k]
        lap, curvature = _laplace_at(chi, lin, quad, const, coup, tmp_c, tmp_s, field)
        worst = max(worst, 2.0 * amplitude / curvature ** 2 if curvature > 0 else np.inf)
        same = False
        for j in range(found):
            dist = 0.0
            for k in range(n):
                dist = max(dist, abs(np.sin(0.5 * (chi[k] - peaks[j, k]))))
            if dist < 1e-6:
                same = True
                break
        if not same:
            peaks[found] = chi
            logs[found] = lap
            found += 1
    top = logs[:found].max()
    return top + np.log(np.sum(np.exp(logs[:found] - top))), worst


@njit(cache=True, inline="always")
def _outer_point(point, inner, counts, lin, quad, coup, cc, ss, field):
    """Outer grid point ``point`` (an odometer over the outer sources' grids): sets their (cos, sin),
    returns the outer part of F and leaves the inner source's coupling field in ``field``."""
    n = lin.shape[0]
    rest = point
    for k in range(n):
        if k != inner:
            t = 2.0 * np.pi * (rest % counts[k]) / counts[k]
            rest //= counts[k]
            cc[k], ss[k] = np.cos(t), np.sin(t)
    value = 0.0
    for k in range(n):
        if k == inner:
            continue
        value += lin[k, 0] * cc[k] + lin[k, 1] * ss[k] + quad[k, 0] * (cc[k] * cc[k] - ss[k] * ss[k]) \
            + quad[k, 1] * (2.0 * cc[k] * ss[k])
        for m in range(k + 1, n):
            if m != inner:
                x = coup[k, m]
                value += cc[k] * (x[0, 0] * cc[m] + x[0, 1] * ss[m]) + ss[k] * (x[1, 0] * cc[m] + x[1, 1] * ss[m])
    _coupling_field(inner, cc, ss, coup, n, field)
    return value


#: outer grid points whose upper bound (outer part + |inner linear| + |inner quadratic|) lies this many
#: nats below a value already found are left out (each below e^-40 of the sum)
PRUNE_NATS = 40.0


@njit(cache=True)
def joint_log_factor(lin, quad, const, coup, n_grid):
    """ln of (2π)^-K ∫ exp(F(χ_1..χ_K)) dχ over K uniform pulsar-term phases of one pulsar, with
    ``F = const + Σ_k [lin[k]·(cosχ_k, sinχ_k) + quad[k]·(cos2χ_k, sin2χ_k)] + Σ_{k<l} u_kᵀ coup[k, l] u_l``.

    K = 1 is :func:`~cwsearch.inference.likelihood.marginal_log_factor`. Otherwise the source with
    the largest amplitude is integrated innermost by that function and the others on periodic
    trapezoid grids, each sized by the single-source rule from ``|lin_k| + Σ_m |coup_km|`` and
    ``|quad_k|`` (or ``n_grid`` points when > 0); outer points that cannot come within
    :data:`PRUNE_NATS` of a value already found are skipped. When every source's amplitude exceeds
    :data:`LAPLACE_AMPLITUDE` (and ``n_grid`` ≤ 0), Laplace's method over all local maxima
    (:func:`_joint_laplace`) replaces the grids where its estimated error is below
    :data:`LAPLACE_ERROR` nats.
    """
    n = lin.shape[0]
    if n == 1:
        return marginal_log_factor(lin[0, 0], lin[0, 1], quad[0, 0], quad[0, 1], const, n_grid)
    size = np.empty(n)
    for k in range(n):
        r1 = np.sqrt(lin[k, 0] ** 2 + lin[k, 1] ** 2)
        for m in range(n):
            if m != k:
                x = coup[min(k, m), max(k, m)]
                r1 += np.sqrt(x[0, 0] ** 2 + x[0, 1] ** 2 + x[1, 0] ** 2 + x[1, 1] ** 2)
        size[k] = r1 + np.sqrt(quad[k, 0] ** 2 + quad[k, 1] ** 2)
    if n_grid <= 0 and size.min() > LAPLACE_AMPLITUDE:
        value, error = _joint_laplace(lin, quad, const, coup, size.max())
        if error <= max(LAPLACE_ERROR, LAPLACE_RELATIVE_ERROR * size.max()):
            return value
    inner = int(np.argmax(size))
    counts = np.empty(n, dtype=np.int64)
    n_points = 1
    for k in range(n):
        if k == inner:
            counts[k] = 1
        else:
            r2 = np.sqrt(quad[k, 0] ** 2 + quad[k, 1] ** 2)
            counts[k] = n_grid if n_grid > 0 else _grid_size(size[k] - r2) + 2 * _grid_size(r2)
        n_points *= counts[k]
    cc, ss = np.zeros(n), np.zeros(n)
    field = np.empty(2)
    q_in = np.sqrt(quad[inner, 0] ** 2 + quad[inner, 1] ** 2)
    # pass 1: the point of the largest upper bound; its value is a floor for the sum's largest term
    best_bound, best_point = -np.inf, 0
    for point in range(n_points):
        outer = _outer_point(point, inner, counts, lin, quad, coup, cc, ss, field)
        bound = outer + np.sqrt((lin[inner, 0] + field[0]) ** 2 + (lin[inner, 1] + field[1]) ** 2) + q_in
        if bound > best_bound:
            best_bound, best_point = bound, point
    outer = _outer_point(best_point, inner, counts, lin, quad, coup, cc, ss, field)
    floor = outer + marginal_log_factor(lin[inner, 0] + field[0], lin[inner, 1] + field[1], quad[inner, 0],
                                        quad[inner, 1], 0.0, n_grid) - PRUNE_NATS
    # pass 2: every point that can reach above the floor (streaming log-sum-exp)
    total, top = 0.0, -np.inf
    for point in range(n_points):
        outer = _outer_point(point, inner, counts, lin, quad, coup, cc, ss, field)
        lin0, lin1 = lin[inner, 0] + field[0], lin[inner, 1] + field[1]
        if outer + np.sqrt(lin0 * lin0 + lin1 * lin1) + q_in < floor:
            continue
        value = outer + marginal_log_factor(lin0, lin1, quad[inner, 0], quad[inner, 1], 0.0, n_grid)
        if value > top:
            total = total * np.exp(top - value) + 1.0
            top = value
        else:
            total += np.exp(value - top)
    return const + top + np.log(total / n_points)


@njit(cache=True, inline="always")
def _pulsar_terms(w, p, earth, amp, dvec, gself, gcross, pairs, pulsar_term, lin, quad, coup):
    """Pulsar p of walker w: the coefficients of :func:`joint_log_factor` from every source's
    single-source form (:func:`~cwsearch.inference.likelihood._phase_coefficients`) and the cross
    products ``gcross`` (b_k|b_l) of each source pair; returns the constant."""
    n_src = earth.shape[1]
    coef = np.empty(5)
    const = 0.0
    for k in range(n_src):
        e1, e2 = earth[w, k, p, 0], earth[w, k, p, 1]
        value = _phase_coefficients(e1, e2, amp[w, k, p], dvec[w, k, p], gself[w, k, p], coef)
        if pulsar_term:
            lin[k, 0], lin[k, 1], quad[k, 0], quad[k, 1] = coef[0], coef[1], coef[2], coef[3]
            const += coef[4]
        else:
            const += value
    for q in range(pairs.shape[0]):
        k, m = pairs[q, 0], pairs[q, 1]
        g = gcross[w, q, p]
        ek0, ek1 = earth[w, k, p, 0], earth[w, k, p, 1]
        em0, em1 = earth[w, m, p, 0], earth[w, m, p, 1]
        # −c_kᵀ G c_m with c = (e, −amp u): Earth × Earth, Earth × pulsar (both ways), pulsar × pulsar
        const -= ek0 * (g[0, 0] * em0 + g[0, 1] * em1) + ek1 * (g[1, 0] * em0 + g[1, 1] * em1)
        if pulsar_term:
            ak, am = amp[w, k, p], amp[w, m, p]
            lin[m, 0] += am * (ek0 * g[0, 2] + ek1 * g[1, 2])
            lin[m, 1] += am * (ek0 * g[0, 3] + ek1 * g[1, 3])
            lin[k, 0] += ak * (g[2, 0] * em0 + g[2, 1] * em1)
            lin[k, 1] += ak * (g[3, 0] * em0 + g[3, 1] * em1)
            for i in range(2):
                for j in range(2):
                    coup[k, m, i, j] = -ak * am * g[2 + i, 2 + j]
    return const


@njit(cache=True)
def _joint_one(w, earth, amp, dvec, gself, gcross, pairs, pulsar_term, n_grid, out):
    n_src, n_p = earth.shape[1], earth.shape[2]
    lin = np.zeros((n_src, 2))
    quad = np.zeros((n_src, 2))
    coup = np.zeros((n_src, n_src, 2, 2))
    total = 0.0
    for p in range(n_p):
        const = _pulsar_terms(w, p, earth, amp, dvec, gself, gcross, pairs, pulsar_term, lin, quad, coup)
        total += joint_log_factor(lin, quad, const, coup, n_grid) if pulsar_term else const
    out[w] = total


@njit(cache=True, parallel=True)
def _joint_parallel(earth, amp, dvec, gself, gcross, pairs, pulsar_term, n_grid, out):
    for w in prange(earth.shape[0]):
        _joint_one(w, earth, amp, dvec, gself, gcross, pairs, pulsar_term, n_grid, out)


@njit(cache=True)
def _joint_serial(earth, amp, dvec, gself, gcross, pairs, pulsar_term, n_grid, out):
    for w in range(earth.shape[0]):
        _joint_one(w, earth, amp, dvec, gself, gcross, pairs, pulsar_term, n_grid, out)


@njit(cache=True)
def _joint_mean_field_one(w, earth, amp, dvec, gmat, gcross, pairs, cross, max_sweeps, tol, out):
    """Correlated background: units (source k, pulsar p) = k·P + p; ``dvec``/``gmat`` (W, U, …) already
    corrected by :func:`correlated_terms`, ``cross`` (W, U, U, 2, 2) holding every coupling."""
    n_src, n_p = earth.shape[1], earth.shape[2]
    n_u = n_src * n_p
    coef = np.empty((n_u, 5))
    amp_u = np.empty(n_u)
    const = 0.0
    for k in range(n_src):
        for p in range(n_p):
            i = k * n_p + p
            amp_u[i] = amp[w, k, p]
            _phase_coefficients(earth[w, k, p, 0], earth[w, k, p, 1], amp_u[i], dvec[w, i], gmat[w, i], coef[i])
            const += coef[i, 4]
            coef[i, 4] = 0.0
    for q in range(pairs.shape[0]):
        k, m = pairs[q, 0], pairs[q, 1]
        for p in range(n_p):
            g = gcross[w, q, p]
            ek0, ek1 = earth[w, k, p, 0], earth[w, k, p, 1]
            em0, em1 = earth[w, m, p, 0], earth[w, m, p, 1]
            const -= ek0 * (g[0, 0] * em0 + g[0, 1] * em1) + ek1 * (g[1, 0] * em0 + g[1, 1] * em1)
            i, j = k * n_p + p, m * n_p + p
            coef[j, 0] += amp_u[j] * (ek0 * g[0, 2] + ek1 * g[1, 2])
            coef[j, 1] += amp_u[j] * (ek0 * g[0, 3] + ek1 * g[1, 3])
            coef[i, 0] += amp_u[i] * (g[2, 0] * em0 + g[2, 1] * em1)
            coef[i, 1] += amp_u[i] * (g[3, 0] * em0 + g[3, 1] * em1)
    value, _ = _mean_field_core(coef, amp_u, cross[w], max_sweeps, tol)
    out[w] = value + const


@njit(cache=True, parallel=True)
def _joint_mean_field_parallel(earth, amp, dvec, gmat, gcross, pairs, cross, max_sweeps, tol, out):
    for w in prange(earth.shape[0]):
        _joint_mean_field_one(w, earth, amp, dvec, gmat, gcross, pairs, cross, max_sweeps, tol, out)


@njit(cache=True)
def _joint_mean_field_serial(earth, amp, dvec, gmat, gcross, pairs, cross, max_sweeps, tol, out):
    for w in range(earth.shape[0]):
        _joint_mean_field_one(w, earth, amp, dvec, gmat, gcross, pairs, cross, max_sweeps, tol, out)


# ---------------------------------------------------------------- the likelihood
class MultiSourceLikelihood:
    """ln Λ of K circular binaries in one noise model, pulsar phases marginalised (module docstring).

    ``base`` is the run's single-source likelihood (:class:`~cwsearch.inference.likelihood.Likelihood`
    or :class:`~cwsearch.inference.correlated_likelihood.CorrelatedLikelihood`, e.g. from
    :func:`~cwsearch.inference.correlated_likelihood.likelihood_for`): its model switches (pulsar
    term, evolution, strain coordinate, phase grid) and its noise engine are used for every source.
    """

    def __init__(self, base: Likelihood, n_sources: int):
        if n_sources < 1:
            raise ValueError("at least one source")
        if getattr(base, "sampled_distances", np.zeros(0)).size:
            raise ValueError("the joint likelihood marginalises every pulsar-term phase (distances at their "
                             "catalogue values); sampled distances are for the single-source follow-up")
        self.base = base
        self.n_sources = int(n_sources)
        self.single_names = tuple(base.names)
        self.names = source_names(base.names, self.n_sources)
        self.correlated = isinstance(base, CorrelatedLikelihood)
        self.pulsar_term = base.pulsar_term
        self.evolution = base.evolution
        self.phase_grid = base.phase_grid
        self.uniform_strain = base.uniform_strain
        self.n_pulsars = base.n_pulsars
        self.noise_model = getattr(base, "noise_model", None)
        self.pairs = np.array([(k, m) for k in range(self.n_sources) for m in range(k + 1, self.n_sources)],
                              dtype=np.int64).reshape(-1, 2)
        self._psi_units = None
        if self.correlated:
            # Ψ over the K·P units (source k, pulsar p) = k·P + p: block (i, j) is Ψ of their pulsars
            psi, n_c = base._psi, base._n_fourier
            blocks = psi.reshape(self.n_pulsars, n_c, self.n_pulsars, n_c)
            tiled = np.tile(blocks, (self.n_sources, 1, self.n_sources, 1))
            self._psi_units = np.ascontiguousarray(tiled.reshape(self.n_sources * self.n_pulsars * n_c, -1))

    def split(self, theta):
        """Sampler coordinates (W, 8K) -> the K blocks (W, 8)."""
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        return [theta[:, 8 * k: 8 * (k + 1)] for k in range(self.n_sources)]

    def physical(self, theta):
        """Sampler coordinates (W, 8K) -> one dict of physical arrays per source (as ``base.physical``)."""
        return [self.base.physical(block) for block in self.split(theta)]

    def merges_within_data(self, gw_frequency, chirp_mass):
        return self.base.merges_within_data(gw_frequency, chirp_mass)

    # -------------------------------------------------------------- cross products of two sources
    def cross_products(self, terms_k, terms_l):
        """(b_k,i | b_l,j) per walker and pulsar (W, P, 4, 4) for two sources' basis terms
        (:meth:`Likelihood.shape_terms`): at the Chebyshev nodes of the larger of the two node
        counts where both take the node path and the pulsar allows it, else from the basis series
        at every TOA (the kernels and cached products of ``base``)."""
        base = self.base
        n_w = terms_k[0].shape[0]
        ncol = 4 if self.pulsar_term else 2
        out = np.zeros((n_w, self.n_pulsars, 4, 4))
        nodes_k = base._node_count(terms_k[0], terms_k[1])
        nodes_l = base._node_count(terms_l[0], terms_l[1])
        level = np.where((nodes_k > 0) & (nodes_l > 0), np.maximum(nodes_k, nodes_l), 0)
        for m in np.unique(level):
            pick = np.flatnonzero(level == m)
            tk = [np.ascontiguousarray(x[pick]) for x in terms_k]
            tl = [np.ascontiguousarray(x[pick]) for x in terms_l]
            at_nodes = base._node_limit >= m if m > 0 else np.zeros(self.n_pulsars, dtype=bool)
            if at_nodes.any():
                node_dt, _, gram_products = base._interpolation_products(int(m))
                t_max = float(np.max(np.abs(node_dt)))
                for p in np.flatnonzero(at_nodes):
                    vk = self._series(node_dt, t_max, tk, p, ncol)
                    vl = self._series(node_dt, t_max, tl, p, ncol)
                    weighted = (vk.reshape(-1, vk.shape[2]) @ gram_products[p]).reshape(vk.shape)
                    out[pick, p, :ncol, :ncol] = np.matmul(weighted, vl.transpose(0, 2, 1))
            for p in np.flatnonzero(~at_nodes):
                dt = base._dt[p]
                bk = self._series(dt, base._t_max[p], tk, p, ncol)
                bl = self._series(dt, base._t_max[p], tl, p, ncol)
                op = base._operator[p].T
                uk = (bk.reshape(-1, dt.shape[0]) @ op).reshape(pick.size, ncol, -1)
                ul = (bl.reshape(-1, dt.shape[0]) @ op).reshape(pick.size, ncol, -1)
                out[pick, p, :ncol, :ncol] = (np.matmul(bk * base._inv_var[p], bl.transpose(0, 2, 1))
                                              - np.matmul(uk, ul.transpose(0, 2, 1)))
        return out

    @staticmethod
    def _series(dt, t_max, terms, p, ncol):
        omega0, kappa_e, amp0, omega_p, kappa_p, amp_p = terms
        out = np.empty((omega0.shape[0], ncol, dt.shape[0]))
        kernel = _basis_parallel if omega0.shape[0] * dt.shape[0] >= _PARALLEL_BASIS else _basis_serial
        kernel(dt, omega0, kappa_e, amp0, np.ascontiguousarray(omega_p[:, p]), np.ascontiguousarray(kappa_p[:, p]),
               np.ascontiguousarray(amp_p[:, p]), t_max, out)
        return out

    # -------------------------------------------------------------- evaluation
    def batch(self, theta):
        """ln Λ for sampler coordinates ``theta`` (W, 8K), pulsar phases marginalised."""
        with fstat._blas_threads(1):
            return self._batch(theta)

    def _batch(self, theta):
        base = self.base
        blocks = self.split(theta)
        n_w, n_p, n_src = blocks[0].shape[0], self.n_pulsars, self.n_sources
        earth = np.empty((n_w, n_src, n_p, 2))
        dvec = np.empty((n_w, n_src, n_p, 4))
        gself = np.empty((n_w, n_src, n_p, 4, 4))
        beta = [None] * n_src
        terms = []
        for k, block in enumerate(blocks):
            par = base.physical(block)
            shape = (par["ra"], par["dec"], par["gw_frequency"], par["chirp_mass"])
            if self.correlated:
                fplus, fcross, dvec[:, k], gself[:, k], beta[k] = base.correlated_shape_batch(*shape)
            else:
                fplus, fcross, dvec[:, k], gself[:, k] = base.shape_batch(*shape)
            earth[:, k] = earth_coefficients(par["strain"], np.ascontiguousarray(block[:, 5]), par["polarization"],
                                             par["phase"], fplus, fcross)
            if n_src > 1:
                terms.append(base.shape_terms(*shape)[2])
        amp = np.ascontiguousarray(np.hypot(earth[..., 0], earth[..., 1]))
        gcross = np.zeros((n_w, max(len(self.pairs), 1), n_p, 4, 4))
        for q, (k, m) in enumerate(self.pairs):
            gcross[:, q] = self.cross_products(terms[k], terms[m])
        out = np.empty(n_w)
        if not self.correlated:
            kernel = _joint_parallel if n_w * n_p >= _PARALLEL_UNITS else _joint_serial
            kernel(earth, amp, dvec, gself, gcross, self.pairs, self.pulsar_term, self.phase_grid, out)
            return out
        return self._correlated(earth, amp, dvec, gself, gcross, beta, out)

    def _correlated(self, earth, amp, dvec, gself, gcross, beta, out):
        """Correlated background: the single-source cross-pulsar algebra over the K·P units, then mean field."""
        n_w, n_src, n_p = earth.shape[:3]
        units = n_src * n_p
        earth_u = earth.reshape(n_w, units, 2)
        beta_u = np.concatenate(beta, axis=1)                       # (W, K·P, 2K_f, 4), unit k·P + p
        d_u, g_u, earth_corr, cross = correlated_terms(self._psi_units, earth_u, dvec.reshape(n_w, units, 4),
                                                       gself.reshape(n_w, units, 4, 4), beta_u, self.pulsar_term)
        if not self.pulsar_term:
            total = np.einsum("wui,wui->w", earth_u, d_u[..., :2]) - 0.5 * np.einsum(
                "wui,wuij,wuj->w", earth_u, g_u[..., :2, :2], earth_u)
            for q, (k, m) in enumerate(self.pairs):
                total -= np.einsum("wpi,wpij,wpj->w", earth[:, k], gcross[:, q, :, :2, :2], earth[:, m])
            return total + earth_corr
        for q, (k, m) in enumerate(self.pairs):          # the cross-source couplings inside each pulsar
            idx = np.arange(n_p)
            cross[:, k * n_p + idx, m * n_p + idx] -= gcross[:, q, :, 2:, 2:]
            cross[:, m * n_p + idx, k * n_p + idx] -= gcross[:, q, :, 2:, 2:].transpose(0, 1, 3, 2)
        # walkers are independent: the threaded kernel gives the same numbers (as the single-source one)
        kernel = _joint_mean_field_parallel if n_w >= 16 else _joint_mean_field_serial
        kernel(earth, amp, np.ascontiguousarray(d_u), np.ascontiguousarray(g_u), gcross, self.pairs,
               np.ascontiguousarray(cross), MEAN_FIELD_MAX_SWEEPS, MEAN_FIELD_TOLERANCE, out)
        return out + earth_corr

    def reference(self, theta, pulsar_phases=None):
        """Straightforward ln Λ for one parameter vector (W = 1): every source's residuals rebuilt with
        :func:`waveform.residuals` (coherent pulsar phases from the distances, or ``pulsar_phases``
        (K, P) [rad]), summed, weighted through the noise engine. Tests and benchmarks."""
        base = self.base
        signals = [np.zeros(p.n_toas) for p in base.array]
        for k, block in enumerate(self.split(theta)):
            par = {name: float(v[0]) for name, v in base.physical(block).items() if name != "pulsar_distance"}
            for i, p in enumerate(base.array):
                phase = None if pulsar_phases is None else float(pulsar_phases[k][i])
                signals[i] = signals[i] + waveform.residuals(
                    p.toas, p.position, p.distance, reference_time=base.reference_time, evolution=base.evolution,
                    pulsar_term=base.pulsar_term, pulsar_phase=phase, **par)
        if self.correlated:
            data = [p.residuals for p in base.array]
            return base.weighting.inner(data, signals) - 0.5 * base.weighting.inner(signals)
        ds, ss = base.engine.data_inner(signals)
        return ds - 0.5 * ss


__all__ = ["LAPLACE_AMPLITUDE", "LAPLACE_ERROR", "PRUNE_NATS", "source_names", "joint_log_factor", "MultiSourceLikelihood"]
