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

Speed (docs/design.md §6): on a uniform frequency grid the sines and cosines are
stepped by one complex rotation per bin (:func:`sine_cosine_matrix`); all
frequencies of a pulsar are whitened in one matrix product, one pulsar per
thread (:func:`project`, :func:`project_batch` for many residual sets);
:func:`fe_sky` forms the pulsar sums for all pixels as two matrix products
per block of frequencies and a parallel numba kernel does the 4×4 algebra
(:func:`fe_with_amplitudes` and :func:`network_vectors` keep the direct
per-pixel loop, which also returns N, M and M⁻¹N).

Examples
--------
>>> import numpy as np
>>> from cwsearch.physics.simulate import invented_array, simulated_array
>>> from cwsearch.physics.noise import NoiseWeighting
>>> from cwsearch.physics import fstat
>>> arr = simulated_array(invented_array(n_pulsars=6, years=10, seed=2), seed=3)
>>> proj = fstat.project(NoiseWeighting(arr), np.array([5e-9, 1e-8]))
>>> fplus, fcross = fstat.sky_patterns(proj, np.array([1.0, 2.0, 3.0]), np.array([0.3, -0.2, 0.0]))
>>> fe = fstat.fe_statistic(proj, fplus, fcross)
>>> fe.shape
(3, 2)
"""

from __future__ import annotations

import contextlib
import ctypes
import re
import sys
import threading
from concurrent.futures import as_completed, ThreadPoolExecutor
from dataclasses import dataclass

import numba
import numpy as np
from numba import njit, prange

from ..core.errors import InputError
from .linalg import factor4, quad4, solve_psd4
from .waveform import antenna_pattern


@dataclass
class Projections:
    """Per-pulsar, per-frequency data projections (the scan's sufficient statistics).

    ``x``, ``y``: (P, F); ``z``: (P, F, 3) holding (sin|sin), (sin|cos), (cos|cos).
    From :func:`project_batch`, ``x`` and ``y`` have a leading batch axis (B, P, F)
    (one row per residual set, e.g. null simulations) sharing one ``z``.
    ``z_scale`` (P,) is each pulsar's white-noise scale ``½ Σ 1/σ²``, the size of
    Z without timing model or red noise; directions of Z below
    :data:`Z_RELATIVE_TOLERANCE` times it are dropped (see :func:`project`).
    """

    frequencies: np.ndarray
    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    positions: np.ndarray
    z_scale: np.ndarray | None = None


#: directions of a pulsar's 2×2 Z smaller than this times its white-noise
#: scale are treated as absent (frequencies the timing model absorbs, such as
#: exactly 1/yr, where Z is pure rounding noise)
Z_RELATIVE_TOLERANCE = 1e-10

#: the rotation-stepped sines and cosines are re-anchored with exact values every this many bins
ANCHOR_EVERY = 100


def sine_cosine_basis(toas, reference_time, frequencies):
    """``sin`` and ``cos`` of ``2π f (t − t0)`` for all TOAs and frequencies: two (n, F) arrays."""
    arg = 2 * np.pi * np.outer(np.asarray(toas) - reference_time, frequencies)
    return np.sin(arg), np.cos(arg)


@njit(cache=True, nogil=True)
def _rotation_trig(times, first_frequency, step, n_freq, anchor_every, out):
    """Fill ``out`` (n, 2F) with sin (columns :F) and cos (columns F:) of 2π f_k t,
    f_k = first_frequency + k·step, by complex rotation exp(i 2π step t) per bin.
    Serial and GIL-free: :func:`project` runs one pulsar per thread."""
    n = times.shape[0]
    two_pi = 2.0 * np.pi
    for i in range(n):
        t = times[i]
        rot_c = np.cos(two_pi * step * t)
        rot_s = np.sin(two_pi * step * t)
        c = 1.0
        s = 0.0
        for k in range(n_freq):
            if k % anchor_every == 0:
                arg = two_pi * (first_frequency + k * step) * t
                c = np.cos(arg)
                s = np.sin(arg)
            else:
                c, s = c * rot_c - s * rot_s, s * rot_c + c * rot_s
            out[i, k] = s
            out[i, n_freq + k] = c


@njit(cache=True, nogil=True)
def _exact_trig(times, frequencies, out):
    n = times.shape[0]
    n_freq = frequencies.shape[0]
    for i in range(n):
        for k in range(n_freq):
            arg = 2.0 * np.pi * frequencies[k] * times[i]
            out[i, k] = np.sin(arg)
            out[i, n_freq + k] = np.cos(arg)


def uniform_step(frequencies):
    """The spacing of ``frequencies`` if they form a uniform grid (relative 1e-9), else None."""
    f = np.asarray(frequencies, dtype=float)
    if f.size < 3:
        return None
    d = np.diff(f)
    step = (f[-1] - f[0]) / (f.size - 1)
    if step > 0 and np.all(np.abs(d - step) <= 1e-9 * step):
        return step
    return None


def sine_cosine_matrix(toas, reference_time, frequencies, anchor_every=ANCHOR_EVERY, step=None):
    """``[sin | cos]`` of ``2π f (t − t0)``: one (n, 2F) array, sines first.

    On a uniform grid each bin is reached from the previous one by one
    complex rotation ``exp(i 2π Δf t)`` (a multiply instead of a sine and a
    cosine), re-anchored with exact values every ``anchor_every`` bins so the
    rounding error stays ~1e-13; other grids use exact sines and cosines.

    >>> import numpy as np
    >>> t = np.linspace(0, 4.7e8, 50)
    >>> f = 2e-9 + 1e-9 * np.arange(300)
    >>> sc = sine_cosine_matrix(t, 0.0, f)
    >>> s, c = sine_cosine_basis(t, 0.0, f)
    >>> bool(np.abs(sc[:, :300] - s).max() < 1e-10 and np.abs(sc[:, 300:] - c).max() < 1e-10)
    True
    """
    times = np.ascontiguousarray(np.asarray(toas, dtype=float) - reference_time)
    frequencies = np.ascontiguousarray(frequencies, dtype=float)
    out = np.empty((times.size, 2 * frequencies.size))
    step = uniform_step(frequencies) if step is None else float(step)   # a chunk of a grid passes the grid's step
    if step is None:
        _exact_trig(times, frequencies, out)
    else:
        _rotation_trig(times, float(frequencies[0]), float(step), frequencies.size, int(anchor_every), out)
    return out


def _drop_null_directions(x, y, z, z_scale):
    """Zero the directions of Z below tolerance (and the X, Y components along them), in place."""
    tol = Z_RELATIVE_TOLERANCE * z_scale[:, None]
    zss, zsc, zcc = z[..., 0], z[..., 1], z[..., 2]
    half_trace = 0.5 * (zss + zcc)
    radius = np.hypot(0.5 * (zss - zcc), zsc)
    small = half_trace - radius < tol
    for p, f in zip(*np.nonzero(small)):
        mat = np.array([[zss[p, f], zsc[p, f]], [zsc[p, f], zcc[p, f]]])
        vals, vecs = np.linalg.eigh(mat)
        keep = vals > tol[p, 0]
        vecs = vecs[:, keep]
        vals = vals[keep]
        kept = (vecs * vals) @ vecs.T
        z[p, f] = (kept[0, 0], kept[0, 1], kept[1, 1])
        proj = vecs @ vecs.T
        xy = np.stack([x[..., p, f], y[..., p, f]], axis=-1) @ proj.T
        x[..., p, f], y[..., p, f] = xy[..., 0], xy[..., 1]


#: (number of imported modules, [(get, set) thread-count functions]) of the last scan of the loaded
#: OpenBLAS libraries: scanning /proc/self/maps costs milliseconds, the likelihood calls this per batch
_BLAS_LIBRARIES = (-1, [])


def _blas_functions():
    """The (get, set) thread-count functions of every loaded OpenBLAS, found again only after new
    imports (which may load another BLAS)."""
    global _BLAS_LIBRARIES
    n_modules = len(sys.modules)
    if _BLAS_LIBRARIES[0] == n_modules:
        return _BLAS_LIBRARIES[1]
    found = []
    try:
        with open("/proc/self/maps") as fh:
            paths = sorted(set(re.findall(r"(/\S*openblas\S*\.so\S*)", fh.read())))
        for path in paths:
            lib = ctypes.CDLL(path)
            for prefix in ("scipy_openblas_", "openblas_"):
                for suffix in ("64_", ""):
                    get = getattr(lib, f"{prefix}get_num_threads{suffix}", None)
                    put = getattr(lib, f"{prefix}set_num_threads{suffix}", None)
                    if get is not None and put is not None:
                        found.append((get, put))
                        break
                else:
                    continue
                break
    except (OSError, AttributeError, ValueError):
        pass
    _BLAS_LIBRARIES = (n_modules, found)
    return found


#: [contexts open, the thread counts to restore when the last one closes] of :func:`_blas_threads`
_BLAS_STATE = [0, []]
_BLAS_LOCK = threading.Lock()


@contextlib.contextmanager
def _blas_threads(n):
    """Temporarily set the OpenBLAS thread count of numpy/scipy (no-op where it cannot be found).

    :func:`project` runs one pulsar per thread; letting each skinny whitening
    product spawn BLAS threads as well oversubscribes the cores, which costs
    a factor of several on a busy machine (measured in bench.scan).

    The count is global to each library, so contexts may overlap in time (contexts opened on
    several threads, such as a job pool's beside its caller's):
    the counts before the first open context are restored when the last one closes, and while
    several are open the most recent request holds.
    """
    with _BLAS_LOCK:
        functions = _blas_functions()
        if _BLAS_STATE[0] == 0:
            _BLAS_STATE[1] = [(put, int(get())) for get, put in functions]
        _BLAS_STATE[0] += 1
        for _, put in functions:
            put(int(n))
    try:
        yield
    finally:
        with _BLAS_LOCK:
            _BLAS_STATE[0] -= 1
            if _BLAS_STATE[0] == 0:
                for put, old in _BLAS_STATE[1]:
                    put(old)


@njit(cache=True, nogil=True)
def _weighted_trig_sums(basis, inverse_variance, n_freq, acc):
    """acc[k] += Σ_i w_i (s_ik², s_ik c_ik, c_ik²) over the rows of one TOA block of ``basis`` (m, 2F)."""
    for i in range(basis.shape[0]):
        wi = inverse_variance[i]
        for k in range(n_freq):
            s = basis[i, k]
            c = basis[i, n_freq + k]
            acc[k, 0] += wi * s * s
            acc[k, 1] += wi * s * c
            acc[k, 2] += wi * c * c


@njit(cache=True, nogil=True)
def _subtract_low_rank(u, n_freq, z):
    """z[k] −= Σ_r (u_rk², u_rk u_r,F+k, u_r,F+k²): the noise model's part of Z from the whitened basis u (r, 2F)."""
    for r in range(u.shape[0]):
        for k in range(n_freq):
            s = u[r, k]
            c = u[r, n_freq + k]
            z[k, 0] -= s * s
            z[k, 1] -= s * c
            z[k, 2] -= c * c


#: TOAs per block of the projections: the sines and cosines of one block of TOAs at every frequency
#: (block × 2F doubles, 7.7 MB at 945 frequencies) are made, used and dropped, never all n × 2F at once
PROJECTION_TOA_BLOCK = 512


def _project_pulsar(w, t0, frequencies, residual_set, x, y, z, z_scale, i, step=None, on_basis=None, on_reduced=None):
    """X, Y, Z of one pulsar at every frequency, in blocks of TOAs.

    With the Woodbury form of the inner product (physics/noise.py) every term is a sum over TOAs:
    ``Tᵀ N⁻¹ B`` (one GEMM per block), ``rᵀ N⁻¹ B`` and the weighted squares of B; the rank-r
    correction ``(L⁻¹ Tᵀ N⁻¹ r)ᵀ (L⁻¹ Tᵀ N⁻¹ B)`` is applied once at the end
    (:meth:`~cwsearch.physics.noise.PulsarWeighting.reduce`). The same sums as whitening the whole
    n × 2F basis at once, in another order (equal to rounding; the scan's regression tests hold it to
    1e-10), at a fraction of the memory and without streaming a large array through the caches twice."""
    n_freq = frequencies.size
    toas = w.pulsar.toas
    inverse_variance = w.inverse_variance
    weighted_t = w.weighted_basis_t                        # Tᵀ N⁻¹, shape (k, n)
    rw = residual_set * inverse_variance[:, None]          # N⁻¹ r, (n, B)
    v = np.zeros((weighted_t.shape[0], 2 * n_freq))
    xy = np.zeros((residual_set.shape[1], 2 * n_freq))
    zi = np.zeros((n_freq, 3))
    if step is None:
        step = uniform_step(frequencies)
    for a in range(0, toas.size, PROJECTION_TOA_BLOCK):
        b = min(toas.size, a + PROJECTION_TOA_BLOCK)
        basis = sine_cosine_matrix(toas[a:b], t0, frequencies, step=step)
        if on_basis is not None:
            on_basis(i, a, b, basis)
        v += weighted_t[:, a:b] @ basis
        xy += rw[a:b].T @ basis
        _weighted_trig_sums(basis, inverse_variance[a:b], n_freq, zi)
    ub = w.reduce(v)                                       # L⁻¹ Tᵀ N⁻¹ B, (r, 2F)
    if on_reduced is not None:
        on_reduced(i, v, ub)
    ur = w.reduce(weighted_t @ residual_set)               # L⁻¹ Tᵀ N⁻¹ r, (r, B)
    xy -= ur.T @ ub
    x[:, i] = xy[:, :n_freq]
    y[:, i] = xy[:, n_freq:]
    z_white = zi[0, 0] + zi[0, 2]                          # Σ w (s² + c²) of the first frequency
    _subtract_low_rank(np.ascontiguousarray(ub), n_freq, zi)
    z[i] = zi
    z_scale[i] = 0.5 * float(z_white)


def _project_core(engine, frequencies, residual_sets, on_pulsar=None, workers=None, step=None, z_scale_of=None,
                  on_basis=None, on_reduced=None):
    frequencies = np.ascontiguousarray(frequencies, dtype=float)
    n_psr, n_freq = len(engine), frequencies.size
    n_sets = residual_sets[0].shape[1]
    x = np.empty((n_sets, n_psr, n_freq))
    y = np.empty((n_sets, n_psr, n_freq))
    z = np.empty((n_psr, n_freq, 3))
    z_scale = np.empty(n_psr)
    t0 = engine.array.reference_time
    workers = min(n_psr, numba.get_num_threads() if workers is None else int(workers))
    if workers <= 1:
        for i, w in enumerate(engine):
            _project_pulsar(w, t0, frequencies, residual_sets[i], x, y, z, z_scale, i, step, on_basis, on_reduced)
            if on_pulsar is not None:
                on_pulsar(i)
    else:
        with _blas_threads(1), ThreadPoolExecutor(max_workers=workers) as pool:
            jobs = {pool.submit(_project_pulsar, w, t0, frequencies, residual_sets[i], x, y, z, z_scale, i, step,
                                on_basis, on_reduced): i for i, w in enumerate(engine)}
            for job in as_completed(jobs):
                job.result()
                if on_pulsar is not None:
                    on_pulsar(jobs[job])
    if z_scale_of is not None:           # a chunk of a grid: the whole grid's scale (its first frequency)
        z_scale[:] = z_scale_of
    _drop_null_directions(x, y, z, z_scale)
    return frequencies, x, y, z, z_scale


def project(engine, frequencies, residuals=None, *, on_pulsar=None, step=None, z_scale=None,
            on_basis=None, on_reduced=None) -> Projections:
    """Compute X, Y, Z for every pulsar and frequency through the noise-weighting engine.

    ``residuals`` (list of arrays) replaces the dataset residuals, e.g. for
    null simulations with the same TOAs and noise model. Per pulsar, the
    sines and cosines of all frequencies are whitened in one matrix product
    (:meth:`~cwsearch.physics.noise.PulsarWeighting.whiten`); on a uniform grid they
    are generated by rotation (:func:`sine_cosine_matrix`). Directions of
    a pulsar's Z that the timing model removes entirely (Z at rounding
    level, e.g. exactly 1/yr) are dropped together with the matching X, Y
    part, so they neither divide by zero nor add noise. ``on_pulsar(i)`` is
    called after each pulsar (progress bars). Pulsars run in parallel, one
    per thread (as many threads as numba uses), each single-threaded.
    ``step`` and ``z_scale``: the spacing of the whole uniform grid and its
    white-noise scales (``project(engine, grid[:1]).z_scale``) when
    ``frequencies`` is a chunk of it, so that the chunk's numbers are those
    of the whole grid. ``on_basis(i, start, stop, basis)`` receives each block of pulsar i's
    ``[sin | cos]`` matrix (TOAs ``start:stop``, shape (stop − start, 2F), see
    :data:`PROJECTION_TOA_BLOCK`) in its worker thread (with single-threaded BLAS), so that a caller
    can contract other vectors with the same sines and cosines in the same pass; ``on_reduced(i, v, u)``
    receives pulsar i's sums ``v = Tᵀ N⁻¹ [sin | cos]`` (k, 2F) over all TOAs and their reduction
    ``u = L⁻¹ v`` (:meth:`~cwsearch.physics.noise.PulsarWeighting.reduce`), so that
    ``(b|sin, cos) = bᵀN⁻¹[sin | cos] − u_bᵀ u`` for any b, and for a column b of T the first term
    is a row of v.
    """
    sets = [np.asarray(w.pulsar.residuals if residuals is None else residuals[i], dtype=float)[:, None]
            for i, w in enumerate(engine)]
    freqs, x, y, z, z_scale = _project_core(engine, frequencies, sets, on_pulsar, step=step, z_scale_of=z_scale,
                                            on_basis=on_basis, on_reduced=on_reduced)
    return Projections(freqs, x[0], y[0], z, engine.array.positions, z_scale)


def project_batch(engine, frequencies, residual_sets, *, on_pulsar=None, on_basis=None) -> Projections:
    """Projections of B residual sets at once: ``residual_sets[p]`` is an (n_p, B) array.

    Z is shared; ``x`` and ``y`` have shape (B, P, F). Used by null
    simulations (same TOAs and noise model, new residuals). ``on_basis`` as in :func:`project`.
    """
    sets = [np.asarray(r, dtype=float).reshape(w.n_toas, -1) for w, r in zip(engine, residual_sets)]
    freqs, x, y, z, z_scale = _project_core(engine, frequencies, sets, on_pulsar, on_basis=on_basis)
    return Projections(freqs, x, y, z, engine.array.positions, z_scale)


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
            solve_psd4(mm, nv, sol)
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


@njit(cache=True, parallel=True)
def _fe_from_products(nq, mq, n_sky, n_chunk, n_sets, fe_out):
    """Fe for every sky pixel, frequency of the chunk and residual set from the GEMM products.

    ``nq`` (2S, 2·B·Fc): rows (F+ | Fx) × pixel, columns (set, X|Y, frequency);
    ``mq`` (3S, 3·Fc): rows (F+² | F+Fx | Fx²) × pixel, columns (ss|sc|cc, frequency).
    """
    for s in prange(n_sky):
        sp = n_sky + s
        sx = 2 * n_sky + s
        for f in range(n_chunk):
            m00 = mq[s, f]
            m01 = mq[s, n_chunk + f]
            m11 = mq[s, 2 * n_chunk + f]
            m02 = mq[sp, f]
            m03 = mq[sp, n_chunk + f]
            m13 = mq[sp, 2 * n_chunk + f]
            m22 = mq[sx, f]
            m23 = mq[sx, n_chunk + f]
            m33 = mq[sx, 2 * n_chunk + f]
            fac = factor4(m00, m01, m02, m03, m11, m03, m13, m22, m23, m33)   # m12 = m03 = Σ F+Fx Zsc
            for b in range(n_sets):
                cx = 2 * b * n_chunk + f
                cy = cx + n_chunk
                fe_out[b, s, f] = 0.5 * quad4(fac, nq[s, cx], nq[s, cy], nq[sp, cx], nq[sp, cy])


@dataclass
class SkyScan:
    """Result of :func:`fe_sky`.

    ``fe_map`` (S, F) or None; ``fe_max`` and ``best_pixel`` (B, F): the
    maximum of Fe over the sky and the pixel (row of the patterns) where it occurs.
    """

    fe_map: np.ndarray | None
    fe_max: np.ndarray
    best_pixel: np.ndarray


def fe_sky(proj: Projections, fplus, fcross, *, keep_map=True, map_dtype=np.float64, on_chunk=None,
           chunk_elements=4_000_000, on_block=None) -> SkyScan:
    """Fe over sky × frequency (and over residual sets of :func:`project_batch`).

    The sums over pulsars for N (4 numbers) and M (9 distinct numbers) are
    two matrix products per chunk of frequencies (pattern products (S, P)
    times per-pulsar X, Y, Z (P, ·)); a parallel numba kernel then factors
    each 4×4 M once and evaluates ``Fe = ½ Nᵀ M⁺ N`` for every residual set.
    ``keep_map`` returns the full (S, F) map (single residual set only);
    ``on_chunk(n)`` is called with the number of frequencies finished; ``on_block(f0, fe)`` receives each
    chunk's Fe of every residual set, (B, S, n) from frequency index ``f0`` (the targets stage reduces the
    maps of a batch of null simulations this way, with M factored once for all of them).
    """
    fplus, fcross, x, y = sky_inputs(proj, fplus, fcross, keep_map)
    n_sky, n_psr = fplus.shape
    n_sets, _, n_freq = x.shape
    pn = np.vstack([fplus, fcross])
    pm = np.vstack([fplus * fplus, fplus * fcross, fcross * fcross])
    n_chunk = int(max(1, min(n_freq, chunk_elements // (n_sky * (4 * n_sets + 9)))))
    fe_map, fe_max, best = sky_outputs(n_sky, n_sets, n_freq, keep_map, map_dtype)
    for f0 in range(0, n_freq, n_chunk):
        f1 = min(n_freq, f0 + n_chunk)
        fc = f1 - f0
        zc = np.ascontiguousarray(proj.z[:, f0:f1, :].transpose(0, 2, 1)).reshape(n_psr, 3 * fc)
        nq = pn @ chunk_data(x, y, f0, f1)
        mq = pm @ zc
        fe = np.empty((n_sets, n_sky, fc))
        _fe_from_products(nq, mq, n_sky, fc, n_sets, fe)
        store_sky_block(fe, f0, f1, best, fe_max, fe_map, on_block, on_chunk)
    return SkyScan(fe_map, fe_max, best)


def sky_inputs(proj: Projections, fplus, fcross, keep_map):
    """The checked inputs of an Fe sky kernel: C-contiguous patterns (S, P) and X, Y with a leading
    residual-set axis (B, P, F). Shared by every Fe sky kernel."""
    fplus = np.ascontiguousarray(np.atleast_2d(fplus), dtype=float)
    fcross = np.ascontiguousarray(np.atleast_2d(fcross), dtype=float)
    n_psr = fplus.shape[1]
    x, y = proj.x, proj.y
    if x.ndim == 2:
        x, y = x[None], y[None]
    if x.shape[1] != n_psr:
        raise ValueError(f"antenna patterns have {n_psr} pulsars, the projections {x.shape[1]}")
    if keep_map and x.shape[0] != 1:
        raise ValueError("keep_map needs a single residual set")
    return fplus, fcross, x, y


def sky_outputs(n_sky, n_sets, n_freq, keep_map, map_dtype):
    """Empty ``(fe_map or None, fe_max, best_pixel)`` of a sky scan (see :class:`SkyScan`)."""
    fe_map = np.empty((n_sky, n_freq), dtype=map_dtype) if keep_map else None
    return fe_map, np.empty((n_sets, n_freq)), np.empty((n_sets, n_freq), dtype=np.int64)


def chunk_data(x, y, f0, f1):
    """X, Y (B, P, F) of the frequencies ``f0:f1`` as one (P, 2·B·Fc) matrix, columns (set, X|Y,
    frequency): the right factor of the pattern product ``[F+; Fx] @ data`` that gives N."""
    data = np.stack([x[:, :, f0:f1], y[:, :, f0:f1]], axis=1)          # (B, 2, P, Fc)
    return np.ascontiguousarray(data.transpose(2, 0, 1, 3)).reshape(x.shape[1], -1)


def store_sky_block(fe, f0, f1, best, fe_max, fe_map=None, on_block=None, on_chunk=None):
    """Keep one frequency block ``f0:f1`` of an Fe sky scan ``fe`` (sets, pixels, frequencies): the best
    pixel and its Fe per set and frequency, the first set's map when ``fe_map`` is given, then the
    callbacks ``on_block(f0, fe)`` and ``on_chunk(n_frequencies)``. Shared by every Fe sky kernel."""
    idx = np.argmax(fe, axis=1)
    best[:, f0:f1] = idx
    fe_max[:, f0:f1] = np.take_along_axis(fe, idx[:, None, :], axis=1)[:, 0, :]
    if fe_map is not None:
        fe_map[:, f0:f1] = fe[0]
    if on_block is not None:
        on_block(f0, fe)
    if on_chunk is not None:
        on_chunk(f1 - f0)


def fe_statistic(proj: Projections, fplus, fcross):
    """Fe for each sky position (rows of ``fplus``/``fcross``, shape (S, P)) and frequency: (S, F)."""
    return fe_sky(proj, fplus, fcross).fe_map


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


def _z_rank(z):
    """Rank (0, 1 or 2) of each 2×2 Z (..., 3) after :func:`project` dropped null directions."""
    zss, zsc, zcc = z[..., 0], z[..., 1], z[..., 2]
    trace = zss + zcc
    det = zss * zcc - zsc**2
    return np.where(trace <= 0, 0, np.where(det <= 1e-12 * trace**2, 1, 2))


def fp_statistic(proj: Projections):
    """Fp per frequency: ``½ Σ_p [X Y] Z_p⁻¹ [X Y]ᵀ`` (F,), or (B, F) for a batch.

    Where a pulsar's Z has rank < 2 (directions removed by the timing model)
    the pseudo-inverse is used, and :func:`fp_degrees_of_freedom` counts
    only the remaining directions.
    """
    zss, zsc, zcc = proj.z[..., 0], proj.z[..., 1], proj.z[..., 2]
    rank = _z_rank(proj.z)
    det = np.where(rank == 2, zss * zcc - zsc**2, 1.0)
    trace = np.where(rank >= 1, zss + zcc, 1.0)
    x, y = proj.x, proj.y
    full = (zcc * x**2 - 2 * zsc * x * y + zss * y**2) / det
    single = (x**2 + y**2) / trace
    quad = np.where(rank == 2, full, np.where(rank == 1, single, 0.0))
    return 0.5 * quad.sum(axis=-2)


def fp_degrees_of_freedom(proj: Projections):
    """Degrees of freedom of 2Fp per frequency (F,): ``2 N_psr`` minus directions the timing model removed."""
    return _z_rank(proj.z).sum(axis=0)


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
        cos_inclination = np.where(r1 + r2 > 0, (r1 - r2) / (r1 + r2), 0.0)
    a1, a2 = np.angle(plus), np.angle(minus)
    phase = np.mod((a1 + a2) / 4, np.pi / 2)
    psi = np.mod((a1 - a2) / 4, np.pi / 2)
    # (a1 + a2)/4 is defined modulo π/2; fix Φ0 modulo π by the sign of b1 reconstruction
    strain = scaled * 2 * np.pi * np.asarray(gw_frequency)
    recon = parameters_to_amplitudes(strain, cos_inclination, psi, phase, gw_frequency)
    flip = np.sum(recon * b, axis=-1) < 0
    phase = np.where(flip, phase + np.pi / 2, phase)
    return strain, cos_inclination, psi, phase


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


# ---------------------------------------------------------------- frequency grid
#: cap of the default maximum frequency [Hz]
MAX_DEFAULT_FREQUENCY = 1e-6


def default_max_frequency(array) -> float:
    """Nyquist-like limit ``1 / (2 × median TOA spacing)`` capped at 1e-6 Hz [Hz]."""
    spacing = np.median([np.median(np.diff(p.toas)) for p in array if p.n_toas > 1])
    return float(min(0.5 / spacing, MAX_DEFAULT_FREQUENCY))


def frequency_grid(array, fmin=None, fmax=None, oversample=2):
    """Uniform GW-frequency grid [Hz]: from ``fmin`` (default 1/T_span) to ``fmax``, step 1/(oversample·T_span).

    >>> from cwsearch.physics.simulate import invented_array
    >>> arr = invented_array(n_pulsars=2, years=10, seed=0)
    >>> f = frequency_grid(arr, fmax=2e-8, oversample=2)
    >>> bool(abs(f[0] * arr.span - 1) < 1e-12 and abs((f[1] - f[0]) * arr.span - 0.5) < 1e-12)
    True
    """
    span = array.span
    fmin = 1.0 / span if fmin is None else float(fmin)
    fmax = default_max_frequency(array) if fmax is None else float(fmax)
    if fmin < (1.0 - 1e-9) / span:
        raise InputError(f"option --fmin: {fmin:.4g} Hz is below 1/T_span = {1.0 / span:.4g} Hz "
                         "(less than one GW period fits in the data span)")
    spacing = np.median([np.median(np.diff(p.toas)) for p in array if p.n_toas > 1])
    if fmax > (1.0 + 1e-9) * 0.5 / spacing:
        raise InputError(f"option --fmax: {fmax:.4g} Hz is above the Nyquist-like limit 1/(2 x median TOA "
                         f"spacing) = {0.5 / spacing:.4g} Hz")
    if not fmax > fmin:
        raise InputError(f"option --fmax: the band is empty ({fmax:.4g} Hz <= fmin {fmin:.4g} Hz)")
    step = 1.0 / (oversample * span)
    n = int(np.floor((fmax - fmin) / step * (1 + 1e-12))) + 1
    return fmin + step * np.arange(n)


__all__ = [
    "Projections", "Z_RELATIVE_TOLERANCE", "ANCHOR_EVERY", "sine_cosine_basis", "uniform_step", "store_sky_block",
    "sky_inputs", "sky_outputs", "chunk_data",
    "sine_cosine_matrix", "project", "project_batch", "SkyScan", "fe_sky", "fe_statistic",
    "fe_with_amplitudes", "network_vectors", "sky_patterns", "fp_statistic", "fp_degrees_of_freedom",
    "amplitudes_to_parameters", "parameters_to_amplitudes", "MAX_DEFAULT_FREQUENCY",
    "default_max_frequency", "frequency_grid",
]
