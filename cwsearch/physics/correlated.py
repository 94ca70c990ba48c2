r"""The array-level noise engine: a common background with inter-pulsar correlations.

The array covariance (docs/design.md §5b) is the block-diagonal per-pulsar
covariance K (white noise, per-pulsar red noise, timing model marginalised:
:class:`cwsearch.physics.noise.NoiseWeighting`) plus a common process that couples
the pulsars through the Fourier coefficients of its basis F:

.. code-block:: text

    C    = K + F Φ Fᵀ,            K = blockdiag(N_a + T_a B_a T_aᵀ),  F = blockdiag(F_a)
    Φ    = Γ ⊗ diag(φ),           φ_k = A²/(12π²) f_yr^(γ−3) f_k^(−γ) / T   (sine and cosine of each k)
    C⁻¹  = K⁻¹ − K⁻¹ F S⁻¹ Fᵀ K⁻¹,   S = Φ⁻¹ + Fᵀ K⁻¹ F   (size N_psr·2K)
    ln det C = ln det K + ln det Φ + ln det S
    numerically, with Φ = L Lᵀ, L = L_Γ ⊗ diag(√φ), Γ = L_Γ L_Γᵀ:
    S̃ = Lᵀ S L = I + Lᵀ (Fᵀ K⁻¹ F) L,   K⁻¹F S⁻¹FᵀK⁻¹ = K⁻¹F L S̃⁻¹ LᵀFᵀK⁻¹,   ln det Φ + ln det S = ln det S̃

Fᵀ K⁻¹ F is block-diagonal (one 2K × 2K block per pulsar, from the
per-pulsar Woodbury engine), so building S̃ costs one matrix product and
one Cholesky; no n_TOA × n_TOA matrix is ever formed. The factored form
S̃ needs no Γ⁻¹ and no Φ⁻¹: its eigenvalues are ≥ 1, and it stays valid for
a singular Γ (monopole: rank 1, dipole: rank 3), where L_Γ is the
eigen-factor of the non-zero eigenvalues (Cholesky of Γ otherwise).
K, G, the timing model: every K⁻¹ here is the timing-model-marginalised
one, so all products and determinants are those of the G-projected
covariance Gᵀ C G (van Haasteren & Vallisneri 2014, Phys. Rev. D 90, 104012).

What the module owns
--------------------
* :func:`correlation_matrix` — Γ for Hellings–Downs (Hellings & Downs 1983,
  ApJ 265, L39), monopole, dipole or uncorrelated pulsars.
* :class:`ArrayWeighting` — the one place that applies C⁻¹ for a correlated
  array. Its interface covers the per-pulsar case too (``correlation
  ='uncorrelated'`` reproduces :class:`~cwsearch.physics.noise.NoiseWeighting` with
  the common process in each pulsar's Fourier prior). The data enter once,
  as the *weighted data* ``d̃_p = d_p − F_p c_p`` (``c`` the conditional mean
  of the background's Fourier coefficients), with
  ``(d̃_p|x)_{K_p} = (d|x)_C`` for every x supported on pulsar p; stages
  keep using the per-pulsar engine on d̃ and add the cross-pulsar terms
  ``Ψ = L S̃⁻¹ Lᵀ = (Φ⁻¹ + FᵀK⁻¹F)⁻¹`` where signals meet signals.
* Fe scan (Ellis, Siemens & Creighton 2012, ApJ 756, 175): per frequency the
  cross-pulsar 2×2 blocks ``W_pq = u_pᵀ Ψ_pq u_q``, ``u_p = F_pᵀK_p⁻¹[sin, cos]``
  (:meth:`ArrayWeighting.scan_corrections`), and :func:`fe_sky_correlated`,
  which subtracts ``Σ_pq F_p F_q W_pq`` from M for all pixels with one
  matrix product ``[F+; F×] W`` per chunk of frequencies (W for p ≤ q only,
  the rest by W_ab(q, p) = W_ba(p, q); cost and fast paths: docs/design.md
  §5b). N comes from the projections of d̃, no
  correction needed. With the true C, 2Fe ~ χ²(4) stays exact in noise.
  :func:`fp_correlated` uses the diagonal blocks ``Z_p − W_pp``: each term
  2F_p is still χ²(2) in noise and the mean of 2Fp stays 2 N_psr, but the
  terms are correlated, so 2Fp is no longer χ²(2 N_psr).
* Likelihood (:class:`CorrelatedLikelihood`): Earth-term × Earth-term and
  Earth-term × pulsar-term cross-pulsar products enter exactly (they are
  linear in each pulsar's pulsar-term weights, so the per-pulsar phase
  integrals still factorise); pulsar-term × pulsar-term products of
  *different* pulsars couple the pulsar phases, and the phase integral is
  then taken in variational mean field (:func:`mean_field_log_likelihood`,
  a few coordinate-ascent sweeps of per-pulsar grid integrals). With the
  pulsar phases given explicitly (coherent model) everything is exact.
* :meth:`ArrayWeighting.draw_background` — a draw of the background with the
  same Φ (for Hellings–Downs it equals :func:`cwsearch.physics.simulate.correlated_background`).

Examples
--------
>>> import numpy as np
>>> from cwsearch.physics.simulate import invented_array, simulated_array
>>> from cwsearch.physics.noise import NoiseSettings
>>> arr = simulated_array(invented_array(n_pulsars=4, years=10, seed=1), seed=2,
...                       background_log10_amplitude=-14.0, background_components=10)
>>> aw = ArrayWeighting(arr, NoiseSettings(red_components=10), CommonProcess(-14.0, components=10))
>>> d_tilde = aw.weighted_data()
>>> x = np.sin(np.arange(arr[0].n_toas))
>>> only_first = [x] + [np.zeros(p.n_toas) for p in arr][1:]
>>> bool(np.isclose(aw.engine[0].inner(d_tilde[0], x), aw.inner([p.residuals for p in arr], only_first)))
True
"""

from __future__ import annotations

import copy
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace

import numpy as np
from numba import njit
from scipy.linalg import cho_solve, lapack, solve_triangular

from . import fstat
from .linalg import factor4, quad4
from .simulate import postfit, simulate_residuals
from .noise import NoiseSettings, NoiseWeighting, common_components, fourier_basis, fourier_frequencies, hellings_downs, \
    powerlaw_variance

CORRELATION_KINDS = ("hellings-downs", "uncorrelated", "monopole", "dipole")

#: eigenvalues of Γ below this times the largest are treated as zero (monopole, dipole)
GAMMA_RANK_TOLERANCE = 1e-10


def _cpu_count():
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


#: the array Woodbury matrix S̃ is factorised on every core from this size (N_psr · 2K) up
THREADED_CHOLESKY_SIZE = 2000

#: frequencies per chunk of the cross-pulsar blocks W_pq(f) (:meth:`ArrayWeighting.scan_corrections`)
TRIG_CHUNK = 128


# ---------------------------------------------------------------- correlations
def correlation_matrix(unit_vectors, kind="hellings-downs"):
    """Inter-pulsar correlation matrix Γ (N_psr × N_psr) of a common process.

    ``unit_vectors`` (N, 3): directions to the pulsars (normalised here).
    Conventions (ζ the angle between two pulsars, x = (1 − cos ζ)/2):

    * ``'hellings-downs'``: ``Γ_ab = 1/2 − x/4 + (3/2) x ln x`` for a ≠ b and
      ``Γ_aa = 1`` (Hellings & Downs 1983). In this normalisation two
      *distinct* pulsars at zero separation give 1/2 (Earth terms only) and
      the same pulsar 1 (its pulsar term adds the other 1/2); Γ(180°) = 1/4.
    * ``'uncorrelated'``: identity (a common spectrum, no correlation).
    * ``'monopole'``: ``Γ_ab = 1`` for all pairs (e.g. a clock error), rank 1.
    * ``'dipole'``: ``Γ_ab = cos ζ`` (autos 1; e.g. an ephemeris error), rank 3.

    >>> import numpy as np
    >>> pos = np.array([[1.0, 0, 0], [0, 1.0, 0], [-1.0, 0, 0]])
    >>> np.round(correlation_matrix(pos), 4)
    array([[ 1.    , -0.1449,  0.25  ],
           [-0.1449,  1.    , -0.1449],
           [ 0.25  , -0.1449,  1.    ]])
    """
    if kind not in CORRELATION_KINDS:
        raise ValueError(f"correlation kind must be one of {CORRELATION_KINDS}, not {kind!r}")
    pos = np.atleast_2d(np.asarray(unit_vectors, dtype=float))
    pos = pos / np.linalg.norm(pos, axis=1, keepdims=True)
    cos = np.clip(pos @ pos.T, -1.0, 1.0)
    if kind == "hellings-downs":
        gamma = hellings_downs(cos)
        np.fill_diagonal(gamma, 1.0)
    elif kind == "uncorrelated":
        gamma = np.eye(pos.shape[0])
    elif kind == "monopole":
        gamma = np.ones((pos.shape[0], pos.shape[0]))
    else:
        gamma = cos.copy()
        np.fill_diagonal(gamma, 1.0)
    return gamma


def correlation_factor(gamma):
    """A factor ``L_Γ`` (N × r) with ``L_Γ L_Γᵀ = Γ``: the Cholesky factor when Γ is
    positive definite, else the eigen-factor of the eigenvalues above
    :data:`GAMMA_RANK_TOLERANCE` times the largest (rank r < N)."""
    gamma = np.asarray(gamma, dtype=float)
    try:
        return np.linalg.cholesky(gamma)
    except np.linalg.LinAlgError:
        vals, vecs = np.linalg.eigh(gamma)
        keep = vals > GAMMA_RANK_TOLERANCE * vals.max()
        return vecs[:, keep] * np.sqrt(vals[keep])


@dataclass(frozen=True)
class CommonProcess:
    """A common power-law process: ``log10_amplitude``, spectral ``index`` γ (13/3 for a
    background of circular binaries, Phinney 2001), ``components`` Fourier
    frequencies k/T_span (k = 1..K) and the inter-pulsar ``correlation`` kind
    (see :func:`correlation_matrix`)."""

    log10_amplitude: float
    index: float = 13.0 / 3.0
    components: int = 30
    correlation: str = "hellings-downs"


def _engine_with_residuals(engine, residuals):
    """A shallow copy of a :class:`NoiseWeighting` whose pulsars carry other residuals
    (same factorisations; nothing is recomputed)."""
    new = object.__new__(type(engine))
    new.__dict__.update(engine.__dict__)
    new.array = engine.array.with_residuals(residuals)
    new.pulsars = []
    for w, p in zip(engine.pulsars, new.array):
        w2 = copy.copy(w)
        w2.pulsar = p
        new.pulsars.append(w2)
    return new


# ---------------------------------------------------------------- the engine
class ArrayWeighting:
    """Noise weighting of a whole array with a correlated common process (module docstring).

    Parameters
    ----------
    array : :class:`~cwsearch.model.Array`
    settings : :class:`~cwsearch.physics.noise.NoiseSettings` of the per-pulsar noise, *without*
        the common process (``common_log10_amplitude`` must be None).
    common : :class:`CommonProcess`

    Attributes
    ----------
    engine : the per-pulsar :class:`~cwsearch.physics.noise.NoiseWeighting` (the K part).
    correlation : Γ (N_psr × N_psr).
    fourier_variance : φ per sine/cosine coefficient (2K,).

    Vectors are passed per pulsar, as lists of (n_p,) or (n_p, m) arrays.
    :meth:`with_common` rebuilds for another (log10 A, γ) re-using everything
    that does not depend on them (one (N_psr·2K)² product and one Cholesky).
    """

    def __init__(self, array, settings: NoiseSettings | None, common: CommonProcess, *, _shared=None):
        self.array = array
        self.common = common
        settings = settings or NoiseSettings()
        if _shared is None and settings.common_log10_amplitude is not None:
            raise ValueError("ArrayWeighting takes the per-pulsar settings without the common process; "
                             "give the common process as CommonProcess")
        # one BLAS thread: many small products, and threaded BLAS stalls on a shared machine
        with fstat._blas_threads(1):
            if _shared is None:
                self.settings = settings
                self.engine = NoiseWeighting(array, settings)
                self._prepare()
            else:
                self.__dict__.update(_shared)
            self._factorise()

    # -- parts independent of (log10 A, γ)
    def _prepare(self):
        common, array = self.common, self.array
        self.correlation = correlation_matrix(array.positions, common.correlation)
        self._gamma_factor = correlation_factor(self.correlation)
        n_c = 2 * int(common.components)
        self.n_fourier = n_c
        self.fourier = []            # F_p (n_p, 2K)
        self._fourier_white = []     # U_p F_p (k_p, 2K): whitened-representation part of F_p
        self._kinv_fourier = None
        blocks = np.empty((len(array), n_c, n_c))
        data = np.empty((len(array), n_c))
        data_norm = 0.0
        logdet = 0.0
        for a, (w, p) in enumerate(zip(self.engine, array)):
            fb = fourier_basis(p.toas, array.start, array.span, common.components)
            wf, uf = w.whiten(fb)
            self.fourier.append(fb)
            self._fourier_white.append(np.ascontiguousarray(uf))
            blocks[a] = wf.T @ wf - uf.T @ uf
            blocks[a] = 0.5 * (blocks[a] + blocks[a].T)
            wd, ud = w.whiten(p.residuals)
            data[a] = wf.T @ wd - uf.T @ ud
            data_norm += float(wd @ wd - ud @ ud)
            logdet += w.logdet()
        # where F_p is a block of columns of the per-pulsar basis T_p (the same Fourier frequencies in the
        # per-pulsar red-noise prior): the offset, so that F_pᵀN⁻¹x is a row block of T_pᵀN⁻¹x; else None
        self._fourier_offset = []
        for w, fb in zip(self.engine, self.fourier):
            off = w.n_timing
            inside = w.basis.shape[1] >= off + n_c and np.array_equal(w.basis[:, off:off + n_c], fb)
            self._fourier_offset.append(off if inside else None)
        self._fourier_blocks = blocks      # F_pᵀ K_p⁻¹ F_p
        self._data_fourier = data          # F_pᵀ K_p⁻¹ d_p
        self._data_norm_k = data_norm      # Σ (d_p|d_p)_K
        self._logdet_k = logdet
        self.frequencies = fourier_frequencies(array.span, common.components)

    def _shared_parts(self):
        keep = ("settings", "engine", "correlation", "_gamma_factor", "n_fourier", "fourier", "_fourier_white",
                "_fourier_blocks", "_data_fourier", "_data_norm_k", "_logdet_k", "frequencies", "_kinv_fourier",
                "_fourier_offset")
        return {k: self.__dict__[k] for k in keep}

    # -- parts that depend on (log10 A, γ)
    def _factorise(self, chunk_elements=4_000_000):
        common = self.common
        self.fourier_variance = np.repeat(powerlaw_variance(self.frequencies, common.log10_amplitude, common.index,
                                                            self.array.span), 2)
        root = np.sqrt(self.fourier_variance)
        lg = self._gamma_factor
        n_psr, rank = lg.shape
        n_c = self.n_fourier
        scaled = self._fourier_blocks * root[None, :, None] * root[None, None, :]     # D E_a D
        flat = scaled.reshape(n_psr, n_c * n_c)
        size = rank * n_c
        s_tilde = np.empty((size, size), order="F")                               # I + Lᵀ E L
        # only the lower triangle is formed (dpotrf reads no more), column blocks r0..r1 against
        # rows s ≥ r0; with L_Γ lower triangular (Cholesky of Γ) L[a, r] L[a, s] vanishes for
        # a < max(r, s), so the sum over pulsars starts at a = r0: about a sixth of the full product
        triangular = not np.any(np.triu(lg, 1))
        rows = max(1, min(rank, chunk_elements // max(1, rank * n_c * n_c)))
        for r0 in range(0, rank, rows):
            r1 = min(rank, r0 + rows)
            a0 = r0 if triangular else 0
            pair = (lg[a0:, r0:r1, None] * lg[a0:, None, r0:]).reshape(n_psr - a0, -1)   # L[a,r] L[a,s]
            block = (pair.T @ flat[a0:]).reshape(r1 - r0, rank - r0, n_c, n_c).transpose(0, 2, 1, 3)
            # S̃ symmetric: block rows (r, i) are the columns (r, i) of the lower part (contiguous in F order)
            s_tilde[r0 * n_c:, r0 * n_c:r1 * n_c] = block.reshape((r1 - r0) * n_c, (rank - r0) * n_c).T
        s_tilde[np.diag_indices(size)] += 1.0
        # a large factorisation on every core: one 3000 x 3000 Cholesky took 0.26 s on one thread and 0.17 s
        # on two (idle 2-core machine); on a machine loaded far beyond its cores threaded BLAS was measured
        # slower, so small matrices (many per second in a fit) stay on one thread
        with fstat._blas_threads(_cpu_count() if size >= THREADED_CHOLESKY_SIZE else 1):
            chol, info = lapack.dpotrf(s_tilde, lower=1, clean=1, overwrite_a=1)
        if info != 0:
            raise np.linalg.LinAlgError(f"the array Woodbury matrix is not positive definite (info {info})")
        self._chol = chol
        self._logdet_s = 2.0 * float(np.sum(np.log(np.diag(chol))))
        self._psi = None
        z = self._solve(self._lowrank(self._data_fourier[:, :, None]))
        self._data_correction = z                     # S̃⁻¹ Lᵀ FᵀK⁻¹ d, (r·2K, 1)

    def with_common(self, log10_amplitude, index=None) -> ArrayWeighting:
        """The engine for another common amplitude/index (same Fourier basis and Γ): re-uses
        the per-pulsar engines and every product that does not depend on (A, γ)."""
        common = CommonProcess(float(log10_amplitude), self.common.index if index is None else float(index),
                               self.common.components, self.common.correlation)
        return ArrayWeighting(self.array, None, common, _shared=self._shared_parts())

    # -- linear algebra helpers
    @property
    def n_pulsars(self) -> int:
        return len(self.engine)

    @property
    def rank(self) -> int:
        """Size of S̃: rank(Γ) × 2K."""
        return self._gamma_factor.shape[1] * self.n_fourier

    def _lowrank(self, v):
        """Lᵀ v for stacked Fourier-space v (P, 2K, m): (r·2K, m)."""
        out = np.einsum("pr,pim->rim", self._gamma_factor, v) * np.sqrt(self.fourier_variance)[None, :, None]
        return out.reshape(self.rank, v.shape[2])

    def _from_lowrank(self, z):
        """L z for z (r·2K, m): (P, 2K, m)."""
        m = z.shape[1]
        z = z.reshape(self._gamma_factor.shape[1], self.n_fourier, m)
        return np.einsum("pr,rim->pim", self._gamma_factor, z) * np.sqrt(self.fourier_variance)[None, :, None]

    def _solve(self, v):
        return cho_solve((self._chol, True), v, check_finite=False)

    def _half_solve(self, v):
        """R⁻¹ v with S̃ = R Rᵀ, so that vᵀ S̃⁻¹ v = |R⁻¹ v|²."""
        return solve_triangular(self._chol, v, lower=True, check_finite=False)

    def fourier_products(self, x):
        """``F_pᵀ K_p⁻¹ x_p`` for a per-pulsar list of (n_p,) or (n_p, m): array (P, 2K, m)."""
        out = []
        for w, uf, fb, xp in zip(self.engine, self._fourier_white, self.fourier, x):
            xp = np.asarray(xp, dtype=float)
            xp = xp[:, None] if xp.ndim == 1 else xp
            wx, ux = w.whiten(xp)
            out.append((fb / w.white_sigmas[:, None]).T @ wx - uf.T @ ux)
        return np.stack(out)

    # -- the public products
    def weighted_data(self, residuals=None):
        """Per-pulsar weighted data ``d̃_p = d_p − F_p c_p`` with ``(d̃_p|x)_{K_p} = (d|x)_C``
        for any x supported on pulsar p. ``residuals`` (list of (n_p,) or (n_p, B)) replaces
        the dataset residuals (null simulations); C⁻¹d is computed once for all of them."""
        if residuals is None:
            residuals = [p.residuals for p in self.array]
            z = self._data_correction
        else:
            z = self._solve(self._lowrank(self.fourier_products(residuals)))
        coef = self._from_lowrank(z)                                     # (P, 2K, B)
        out = []
        for fb, r, c in zip(self.fourier, residuals, coef):
            r = np.asarray(r, dtype=float)
            out.append(r - fb @ (c[:, 0] if r.ndim == 1 else c))
        return out

    def background_estimate(self, residuals=None):
        """``F_p c_p`` per pulsar: the data minus :meth:`weighted_data` (the background's
        conditional mean given the data under C)."""
        res = [p.residuals for p in self.array] if residuals is None else residuals
        return [np.asarray(r, dtype=float) - d for r, d in zip(res, self.weighted_data(residuals))]

    def inner(self, x, y=None):
        """Array inner product ``(x|y)_C`` of two per-pulsar lists: scalar for (n_p,)
        entries, (m_x, m_y) matrix for (n_p, m) entries."""
        vec = np.asarray(x[0]).ndim == 1 and (y is None or np.asarray(y[0]).ndim == 1)
        xs = [np.asarray(v, dtype=float).reshape(np.shape(v)[0], -1) for v in x]
        ys = xs if y is None else [np.asarray(v, dtype=float).reshape(np.shape(v)[0], -1) for v in y]
        block = sum(w.inner(a, b) for w, a, b in zip(self.engine, xs, ys))
        hx = self._half_solve(self._lowrank(self.fourier_products(xs)))
        hy = hx if y is None else self._half_solve(self._lowrank(self.fourier_products(ys)))
        out = block - hx.T @ hy
        return float(out[0, 0]) if vec else out

    def gram(self, basis):
        """Cross-pulsar Gram matrix ``(b_pi|b_qj)_C`` of per-pulsar basis sets (list of (n_p, m)):
        shape (P·m, P·m), rows and columns ordered (pulsar, column)."""
        basis = [np.asarray(b, dtype=float).reshape(np.shape(b)[0], -1) for b in basis]
        m = basis[0].shape[1]
        n_psr = self.n_pulsars
        out = np.zeros((n_psr * m, n_psr * m))
        for p, (w, b) in enumerate(zip(self.engine, basis)):
            out[p * m:(p + 1) * m, p * m:(p + 1) * m] = w.inner(b)
        beta = self.fourier_products(basis)                                   # (P, 2K, m)
        spread = np.zeros((n_psr, self.n_fourier, n_psr * m))
        for p in range(n_psr):
            spread[p, :, p * m:(p + 1) * m] = beta[p]
        h = self._half_solve(self._lowrank(spread))
        return out - h.T @ h

    def data_products(self, basis):
        """``(d|b_pj)_C`` for per-pulsar basis sets (list of (n_p, m)): shape (P, m)."""
        return np.stack([w.inner(np.asarray(b, dtype=float).reshape(np.shape(b)[0], -1), d)
                         for w, b, d in zip(self.engine, basis, self.weighted_data())])

    def correction_matrix(self):
        """Ψ = L S̃⁻¹ Lᵀ = (Φ⁻¹ + FᵀK⁻¹F)⁻¹ (the cross-pulsar correction of C⁻¹ in the stacked
        Fourier space), shape (P·2K, P·2K), ordered (pulsar, coefficient). Cached."""
        if self._psi is None:
            # every core for a large inverse, as for its Cholesky (_factorise): at 3000 x 3000 dpotri took
            # 0.17 s on two threads against 0.32 s on one (idle 2-core machine, bench.correlated); forming it
            # on a background thread beside the projections instead gained nothing (the projections use
            # both cores), and threaded BLAS is slower only on a machine loaded far beyond its cores
            with fstat._blas_threads(_cpu_count() if self.rank >= THREADED_CHOLESKY_SIZE else 1):
                self._psi = self._correction_matrix()
        return self._psi

    def _correction_matrix(self):
        inv, info = lapack.dpotri(self._chol, lower=1)
        if info != 0:
            raise np.linalg.LinAlgError(f"inverting the array Woodbury matrix failed (info {info})")
        x = np.asfortranarray(inv).T      # C-ordered view of S̃⁻¹ (Fortran lower triangle = its upper one)
        _mirror_upper(x)
        n_c = self.n_fourier
        lg = self._gamma_factor
        n_psr, rank = lg.shape
        size = rank * n_c
        # Ψ = D̃ A S̃⁻¹ Aᵀ D̃ with A = L_Γ ⊗ I_2K and D̃ = I ⊗ diag(√φ): A acts on the slow (Γ-mode)
        # index, so A X is one (P × r) @ (r × ·) product and (A X) Aᵀ one batch of (P × r) @ (r × 2K)
        # products, one per row (p, i) of A X viewed as (r, 2K): no transpose of the large matrix
        y = (lg @ x.reshape(rank, n_c * size)).reshape(n_psr * n_c, rank, n_c)       # A X
        del x, inv
        psi = np.matmul(lg, y).reshape(n_psr * n_c, n_psr * n_c)                     # A X Aᵀ
        del y
        root = np.tile(np.sqrt(self.fourier_variance), n_psr)
        psi *= root[:, None]
        psi *= root[None, :]
        return psi

    def logdet(self) -> float:
        """ln det(Gᵀ C G), the covariance projected off every pulsar's timing model."""
        return float(self._logdet_k + self._logdet_s)

    def data_norm(self) -> float:
        """(d|d)_C."""
        h = self._half_solve(self._lowrank(self._data_fourier[:, :, None]))
        return float(self._data_norm_k - np.sum(h * h))

    def log_likelihood(self) -> float:
        """Gaussian log-likelihood of the residuals under C with the timing models marginalised:
        ``−½ (d|d)_C − ½ ln det(GᵀCG) − ½ n' ln 2π`` (n' = Σ (n_TOA − n_timing)), equal to
        the multivariate normal log-density of the G-projected residuals."""
        dof = sum(w.n_toas - w.n_timing for w in self.engine)
        return float(-0.5 * self.data_norm() - 0.5 * self.logdet() - 0.5 * dof * np.log(2 * np.pi))

    # -- scan
    def projections(self, frequencies, residuals=None, *, on_pulsar=None) -> fstat.Projections:
        """X, Y, Z of :func:`cwsearch.physics.fstat.project` with X, Y from the weighted data
        (so ``X_p = (d|sin_p)_C``) and Z the per-pulsar blocks (corrected by
        :func:`fe_sky_correlated`). A list of (n_p, B) ``residuals`` gives a batch."""
        tilde = self.weighted_data(residuals)
        if tilde[0].ndim == 2:
            return fstat.project_batch(self.engine, frequencies, tilde, on_pulsar=on_pulsar)
        # the same pass forms u_p = F_pᵀK_p⁻¹[sin | cos], kept for scan_corrections on these frequencies:
        # where F_p is a block of T_p's columns, u_p = (F_pᵀN⁻¹[sin | cos]) − (L⁻¹T_pᵀN⁻¹F_p)ᵀ (L⁻¹T_pᵀN⁻¹[sin | cos])
        # from the projection's own sums (a (2K × k) @ (k × 2F) product); elsewhere (K_p⁻¹F_p)ᵀ times each
        # block of sines and cosines
        frequencies = np.ascontiguousarray(frequencies, dtype=float)
        n_c = self.n_fourier
        u_t = np.zeros((self.n_pulsars, 2 * frequencies.size, n_c))
        offsets = self._fourier_offset
        kinv_fourier = self.weighted_fourier() if any(off is None for off in offsets) else None

        def on_basis(p, start, stop, basis):            # one block of TOAs of pulsar p
            if offsets[p] is None:
                u_t[p] += basis.T @ kinv_fourier[p][start:stop]

        def on_reduced(p, v, u_basis):
            off = offsets[p]
            if off is not None:
                u_t[p] = (v[off:off + n_c] - self._fourier_white[p].T @ u_basis).T

        # (Ψ is not formed beside the projection threads: with two more BLAS threads on the 2-core machine
        # the projections and Ψ together took 2-3.6 s against 1.2-1.5 s one after the other, at load 4)
        proj = fstat.project(self.engine, frequencies, tilde, on_pulsar=on_pulsar, on_basis=on_basis,
                             on_reduced=on_reduced)
        self._trig_products = (frequencies.tobytes(), u_t)
        return proj

    def weighted_fourier(self):
        """``K_p⁻¹ F_p`` per pulsar (n_p, 2K), cached: then ``F_pᵀK_p⁻¹ x = (K_p⁻¹F_p)ᵀ x``."""
        if getattr(self, "_kinv_fourier", None) is None:
            pairs = list(zip(self.engine, self.fourier))
            # one pulsar per thread with single-threaded BLAS: threaded BLAS on these small products
            # stalled (3 s instead of 0.1 s for 50 pulsars at load 5)
            with fstat._blas_threads(1), ThreadPoolExecutor(max_workers=int(max(1, min(_cpu_count(),
                                                                                       len(pairs))))) as pool:
                self._kinv_fourier = list(pool.map(lambda wf: np.ascontiguousarray(wf[0].apply_inverse(wf[1])),
                                                   pairs))
        return self._kinv_fourier

    def trig_fourier_products(self, frequencies):
        """``u_p = F_pᵀ K_p⁻¹ [sin | cos]`` of 2πf(t − t0) for every frequency: (P, 2K, 2F) (a view of
        :meth:`_trig_products_t`)."""
        return self._trig_products_t(frequencies).transpose(0, 2, 1)

    def _trig_products_t(self, frequencies):
        """``u_p`` transposed, (P, 2F, 2K): sines of every frequency, then cosines, each row one
        frequency's 2K coefficients. Those of the last :meth:`projections` are handed over (once)
        when the frequencies are the same."""
        frequencies = np.ascontiguousarray(frequencies, dtype=float)
        kept = self.__dict__.pop("_trig_products", None)
        if kept is not None and kept[0] == frequencies.tobytes():
            return kept[1]
        t0 = self.array.reference_time
        out = np.empty((self.n_pulsars, 2 * len(frequencies), self.n_fourier))
        pairs = list(zip(self.engine, self.weighted_fourier()))

        def one(p):                  # one pulsar per thread, single-threaded BLAS (as fstat.project)
            w, kf = pairs[p]
            np.matmul(fstat.sine_cosine_matrix(w.pulsar.toas, t0, frequencies).T, kf, out=out[p])

        with fstat._blas_threads(1), ThreadPoolExecutor(max_workers=int(max(1, min(_cpu_count(), len(pairs))))) as pool:
            list(pool.map(one, range(len(pairs))))
        return out

    def scan_corrections(self, frequencies):
        """Cross-pulsar 2×2 blocks ``W_pq(f) = u_pᵀ Ψ_pq u_q`` for every frequency, shape
        (F, 4, P, P) with the second axis (ss, sc, cs, cc): ``W[f, 1, p, q] = (sin_p u)ᵀ Ψ_pq (cos_q u)``.
        Then ``(sin_p|cos_q)_C = δ_pq Z_p,sc − W[f, 1, p, q]`` (sines, cosines of pulsar p). The array
        is a view of a (P, P, 4, F) one, contiguous in frequency."""
        frequencies = np.asarray(frequencies, dtype=float)
        n_freq, n_psr, n_c = frequencies.size, self.n_pulsars, self.n_fourier
        u_t = self._trig_products_t(frequencies)
        psi = self.correction_matrix()
        store = np.empty((n_psr, n_psr, 4, n_freq))

        # W_ab(q, p) = W_ba(p, q): the blocks p ≤ q give the rest, so for each q only the rows
        # p ≤ q of Ψ_{·q} u_q are formed (half the products). One q per job, a job per core, each
        # with single-threaded BLAS and a GIL-free kernel; jobs write disjoint blocks of ``store``.
        # Frequencies go in chunks of TRIG_CHUNK, so that each product (chunk, rows p ≤ q) stays in cache.
        chunks = [(f0, min(n_freq, f0 + TRIG_CHUNK)) for f0 in range(0, n_freq, TRIG_CHUNK)]

        def column(q):
            rows = psi[q * n_c:(q + 1) * n_c, :(q + 1) * n_c]                 # Ψ_{q, p ≤ q}
            for f0, f1 in chunks:
                uq = np.concatenate([u_t[q, f0:f1], u_t[q, n_freq + f0:n_freq + f1]])   # (2 fc, 2K)
                _pair_blocks(u_t, uq @ rows, q, f0, n_freq, store)

        workers = int(max(1, min(_cpu_count(), n_psr)))
        with fstat._blas_threads(1), ThreadPoolExecutor(max_workers=workers) as pool:
            list(pool.map(column, range(n_psr - 1, -1, -1)))          # largest first
        return store.transpose(3, 2, 0, 1)

    # -- simulation
    def draw_background(self, seed=0):
        """Residuals (per pulsar) of one draw of the common process with covariance ``F Φ Fᵀ``.

        Coefficients ``(ξ L_Γᵀ) · √φ`` with ξ standard normal (2K, r): for Hellings–Downs Γ
        (positive definite, L_Γ its Cholesky factor) the same draw as
        :func:`cwsearch.physics.simulate.correlated_background` with the same seed and components.
        """
        rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
        lg = self._gamma_factor
        coef = (rng.standard_normal((self.n_fourier, lg.shape[1])) @ lg.T) * np.sqrt(self.fourier_variance)[:, None]
        return [fb @ coef[:, p] for p, fb in enumerate(self.fourier)]

    def dense_covariance_blocks(self):
        """Φ as a dense (P·2K)² matrix (tests and diagnostics only)."""
        return np.kron(self.correlation, np.diag(self.fourier_variance))


@njit(cache=True)
def _mirror_upper(x):
    """Copy the upper triangle of the square C-ordered ``x`` onto its lower one, in place (blocked)."""
    n = x.shape[0]
    step = 64
    for i0 in range(0, n, step):
        for j0 in range(i0, n, step):
            for i in range(i0, min(i0 + step, n)):
                for j in range(max(j0, i + 1), min(j0 + step, n)):
                    x[j, i] = x[i, j]


@njit(cache=True, nogil=True, fastmath=True)
def _pair_blocks(u_t, v_t, q, f0, n_freq, store):
    """store[p, q, ab, f0 + f] = Σ_i u_t[p, a·F + f0 + f, i] v_t[b·fc + f, p·2K + i] for a, b ∈ (sin, cos)
    and p ≤ q (``v_t`` (2·fc, (q + 1)·2K) holds (Ψ_{p ≤ q, q} u_q)ᵀ on the fc frequencies from ``f0``),
    mirrored as store[q, p, ba, ·]. Serial and GIL-free: :meth:`ArrayWeighting.scan_corrections`
    runs one q per thread. ``fastmath``: the sums over the 2K coefficients are vectorised (their
    order of addition is free; rounding-level differences only)."""
    n_c = u_t.shape[2]
    fc = v_t.shape[0] // 2
    for p in range(q + 1):
        a = store[p, q]
        b = store[q, p]
        o = p * n_c
        for f in range(fc):
            us = u_t[p, f0 + f]
            uc = u_t[p, n_freq + f0 + f]
            vs = v_t[f]
            vc = v_t[fc + f]
            ss = 0.0
            sc = 0.0
            cs = 0.0
            cc = 0.0
            for i in range(n_c):
                ss += us[i] * vs[o + i]
                sc += us[i] * vc[o + i]
                cs += uc[i] * vs[o + i]
                cc += uc[i] * vc[o + i]
            g = f0 + f
            a[0, g] = ss
            a[1, g] = sc
            a[2, g] = cs
            a[3, g] = cc
            b[0, g] = ss
            b[1, g] = cs
            b[2, g] = sc
            b[3, g] = cc


# ---------------------------------------------------------------- Fe, Fp
def correlated_network(proj: fstat.Projections, corrections, fplus, fcross):
    """N (S, F, 4) and M (S, F, 4, 4) with the cross-pulsar correction (direct numpy form,
    for few pixels: starting amplitudes ``M⁻¹N`` and tests). Order (F+ sin, F+ cos, Fx sin, Fx cos)."""
    fplus, fcross = np.atleast_2d(fplus), np.atleast_2d(fcross)
    nvec, mmat = fstat.network_vectors(proj, fplus, fcross)
    w = corrections
    pats = (fplus, fcross)
    for i in range(2):
        for j in range(2):
            # block (i, j): Σ_pq F^i_p F^j_q W_pq(ab)
            blk = np.einsum("sp,fkpq,sq->sfk", pats[i], w, pats[j])
            mmat[..., 2 * i, 2 * j] -= blk[..., 0]
            mmat[..., 2 * i, 2 * j + 1] -= blk[..., 1]
            mmat[..., 2 * i + 1, 2 * j] -= blk[..., 2]
            mmat[..., 2 * i + 1, 2 * j + 1] -= blk[..., 3]
    return nvec, mmat


@njit(cache=True, nogil=True)
def _pattern_pairs(fplus, fcross, s0, s1, csym, canti):
    """Pattern products of pixels ``s0:s1`` for the pulsar pairs p ≤ q (``csym``, (3·b, P(P+1)/2), row
    blocks ++, +×, ××) and p < q (``canti``, (b, P(P−1)/2)), pairs in the order of
    ``numpy.triu_indices``: ``csym = (F^i_p F^j_q + F^i_q F^j_p)`` (halved for p = q) and
    ``canti = F+_p F×_q − F+_q F×_p``. Then ``Σ_pq F^i_p F^j_q X_pq = csym · X_{p≤q}`` for a symmetric
    X and ``Σ_pq F+_p F×_q A_pq = canti · A_{p<q}`` for an antisymmetric A. Serial, GIL-free."""
    n_psr = fplus.shape[1]
    b = s1 - s0
    for s in range(s0, s1):
        r = s - s0
        k = 0
        a = 0
        for p in range(n_psr):
            fp = fplus[s, p]
            fx = fcross[s, p]
            csym[r, k] = fp * fp
            csym[b + r, k] = fp * fx
            csym[2 * b + r, k] = fx * fx
            k += 1
            for q in range(p + 1, n_psr):
                gp = fplus[s, q]
                gx = fcross[s, q]
                csym[r, k] = 2.0 * fp * gp
                csym[b + r, k] = fp * gx + gp * fx
                csym[2 * b + r, k] = 2.0 * fx * gx
                canti[r, a] = fp * gx - gp * fx
                k += 1
                a += 1


@njit(cache=True, nogil=True)
def _pack_blocks(corrections, z, f0, f1, bsym, banti):
    """The per-pair right factors of the sky GEMM for the frequencies ``f0:f1``: ``bsym`` (P(P+1)/2, 3·Fc),
    columns (ss | sc | cc) × frequency, holds −W_pq (the sc block symmetrised) for p < q and
    Z_p − W_pp for p = q, so that ``csym @ bsym`` is the whole symmetric part of M; ``banti``
    (P(P−1)/2, Fc) the antisymmetric part ½(W_sc(p, q) − W_sc(q, p)). Serial; frequency innermost
    (contiguous in the layout of :meth:`ArrayWeighting.scan_corrections`)."""
    n_psr = z.shape[0]
    fc = f1 - f0
    k = 0
    a = 0
    for p in range(n_psr):
        for f in range(fc):
            g = f0 + f
            bsym[k, f] = z[p, g, 0] - corrections[g, 0, p, p]
            bsym[k, fc + f] = z[p, g, 1] - corrections[g, 1, p, p]
            bsym[k, 2 * fc + f] = z[p, g, 2] - corrections[g, 3, p, p]
        k += 1
        for q in range(p + 1, n_psr):
            for f in range(fc):
                g = f0 + f
                sc = corrections[g, 1, p, q]
                cs = corrections[g, 1, q, p]
                bsym[k, f] = -corrections[g, 0, p, q]
                bsym[k, fc + f] = -0.5 * (sc + cs)
                bsym[k, 2 * fc + f] = -corrections[g, 3, p, q]
                banti[a, f] = 0.5 * (sc - cs)
            k += 1
            a += 1


@njit(cache=True, nogil=True)
def _fe_pair_products(nq, g, ga, n_chunk, n_sets, fe_out):
    """Fe for a block of b pixels, every frequency of the chunk and residual set, from the GEMM products
    ``nq`` (2b, 2·B·Fc: rows F+ | F×, columns (set, X|Y, frequency)), ``g = csym @ bsym`` (3b, 3·Fc:
    rows ++ | +× | ××, columns ss | sc | cc) and ``ga = canti @ banti`` (b, Fc): M's (+×) sc entry is
    ``g − ga`` and its cs entry ``g + ga`` (:func:`_pattern_pairs`, :func:`_pack_blocks`). Serial, GIL-free."""
    b = ga.shape[0]
    for r in range(b):
        rp = b + r
        rx = 2 * b + r
        for f in range(n_chunk):
            sc = g[rp, n_chunk + f]
            anti = ga[r, f]
            fac = factor4(g[r, f], g[r, n_chunk + f], g[rp, f], sc - anti, g[r, 2 * n_chunk + f], sc + anti,
                          g[rp, 2 * n_chunk + f], g[rx, f], g[rx, n_chunk + f], g[rx, 2 * n_chunk + f])
            for k in range(n_sets):
                cx = 2 * k * n_chunk + f
                cy = cx + n_chunk
                fe_out[k, r, f] = 0.5 * quad4(fac, nq[r, cx], nq[r, cy], nq[rp, cx], nq[rp, cy])


@njit(cache=True, nogil=True)
def _fe_exact_at(fplus, fcross, s, f, fc, bsym, banti, data, k):
    """Fe of pixel ``s``, chunk frequency ``f`` and residual set ``k`` from the double-precision
    packed blocks (``bsym``, ``banti`` of :func:`_pack_blocks`) and the chunk's data (:func:`fstat.chunk_data`):
    the pair sums of :func:`_pattern_pairs` taken for one pixel, in float64."""
    n_psr = fplus.shape[1]
    m00 = m01 = m02 = msc = m11 = m13 = m22 = m23 = m33 = anti = 0.0
    n0 = n1 = n2 = n3 = 0.0
    cx = 2 * k * fc + f
    cy = cx + fc
    i = 0
    a = 0
    for p in range(n_psr):
        fp = fplus[s, p]
        fx = fcross[s, p]
        n0 += fp * data[p, cx]
        n1 += fp * data[p, cy]
        n2 += fx * data[p, cx]
        n3 += fx * data[p, cy]
        for q in range(p, n_psr):
            gp = fplus[s, q]
            gx = fcross[s, q]
            if q == p:
                cpp, cpx, cxx = fp * fp, fp * fx, fx * fx
            else:
                cpp, cpx, cxx = 2.0 * fp * gp, fp * gx + gp * fx, 2.0 * fx * gx
                anti += (fp * gx - gp * fx) * banti[a, f]
                a += 1
            bss = bsym[i, f]
            bsc = bsym[i, fc + f]
            bcc = bsym[i, 2 * fc + f]
            m00 += cpp * bss
            m01 += cpp * bsc
            m11 += cpp * bcc
            m02 += cpx * bss
            msc += cpx * bsc
            m13 += cpx * bcc
            m22 += cxx * bss
            m23 += cxx * bsc
            m33 += cxx * bcc
            i += 1
    fac = factor4(m00, m01, m02, msc - anti, m11, msc + anti, m13, m22, m23, m33)
    return 0.5 * quad4(fac, n0, n1, n2, n3)


@njit(cache=True, nogil=True)
def _refine_best(fplus, fcross, fe, bsym, banti, data, fc, n_sets):
    """Replace, per residual set and chunk frequency, the single-precision Fe of the loudest pixel by its
    double-precision value (:func:`_fe_exact_at`), until the loudest pixel is one already recomputed (at
    most 8 pixels): the kept maxima ``fe_max`` are then double-precision values."""
    n_sky = fe.shape[1]
    done = np.empty(8, dtype=np.int64)
    for k in range(n_sets):
        for f in range(fc):
            n_done = 0
            while n_done < 8:
                best = 0
                top = fe[k, 0, f]
                for s in range(1, n_sky):
                    if fe[k, s, f] > top:
                        top = fe[k, s, f]
                        best = s
                seen = False
                for j in range(n_done):
                    if done[j] == best:
                        seen = True
                if seen:
                    break
                fe[k, best, f] = _fe_exact_at(fplus, fcross, best, f, fc, bsym, banti, data, k)
                done[n_done] = best
                n_done += 1


#: at most this many pixels per block of the correlated sky kernel (one block per job)
SKY_PIXEL_BLOCK = 256

#: at most this many pattern-pair products per block (b · (3 P(P+1)/2 + P(P−1)/2) doubles, 16 MB): 256
#: pixels at 50 pulsars, 77 at 116
PAIR_BLOCK_ELEMENTS = 2**21


def fe_sky_correlated(proj: fstat.Projections, corrections, fplus, fcross, *, keep_map=True,
                      map_dtype=np.float64, on_chunk=None, chunk_elements=8_000_000,
                      on_block=None, single_precision=False) -> fstat.SkyScan:
    """Fe over sky × frequency (× residual sets) with the correlated inner product.

    ``proj`` from :meth:`ArrayWeighting.projections` (X, Y of the weighted data),
    ``corrections`` from :meth:`ArrayWeighting.scan_corrections` on the same frequencies.
    The ten distinct entries of each pixel's M = Σ_pq F^i_p F^j_q (δ_pq Z_p − W_pq) are sums over
    pulsar *pairs*: with the pair products of the patterns (:func:`_pattern_pairs`: p ≤ q for the
    symmetric parts, p < q for the antisymmetric part of the sc block) and the pairs' blocks of
    Z − W (:func:`_pack_blocks`), M of every pixel and frequency is two matrix products
    (pixels × P(P+1)/2) @ (P(P+1)/2 × 3 frequencies) and (pixels × P(P−1)/2) @ (P(P−1)/2 ×
    frequencies), about 5 P² multiply-adds per pixel and frequency in large GEMMs (docs/design.md
    §5b); a numba kernel factors each 4×4 M and evaluates ``Fe = ½ Nᵀ M⁺ N``. Pixel blocks of
    :data:`SKY_PIXEL_BLOCK` run on one thread per core, each with single-threaded BLAS.
    2Fe ~ χ²(4) in noise when C is the true covariance (Ellis, Siemens & Creighton 2012).
    ``on_block(f0, fe)`` as in :func:`cwsearch.physics.fstat.fe_sky`.

    ``single_precision``: the two pair GEMMs in float32 (half the time; the blocks Z − W are formed in
    float64 first, so the cancellation between Z and W at low frequencies is exact). The map's values are
    then accurate to about 1e-6 relative (measured: at most 8.7e-7 on the bench array of 50 pulsars, 3072
    pixels, 500 frequencies, docs/design.md §5b), and the loudest pixel of each frequency and residual set
    is recomputed in float64 (:func:`_refine_best`), so ``fe_max`` (candidates, null simulations) holds
    double-precision values.
    """
    fplus, fcross, x, y = fstat.sky_inputs(proj, fplus, fcross, keep_map)
    n_sky, n_psr = fplus.shape
    n_sets, _, n_freq = x.shape
    if corrections.shape != (n_freq, 4, n_psr, n_psr):
        raise ValueError("patterns, projections and corrections disagree in pulsars or frequencies")
    corrections = np.asarray(corrections, dtype=float)
    z = np.ascontiguousarray(proj.z, dtype=float)
    n_sym, n_anti = n_psr * (n_psr + 1) // 2, n_psr * (n_psr - 1) // 2
    size = int(min(n_sky, max(1, min(SKY_PIXEL_BLOCK, PAIR_BLOCK_ELEMENTS // (3 * n_sym + n_anti)))))
    edges = list(range(0, n_sky, size)) + [n_sky]
    blocks = list(zip(edges[:-1], edges[1:]))
    workers = int(max(1, min(_cpu_count(), len(blocks))))
    # per frequency: the packed blocks, the Fe values, the data and each running job's products (the jobs'
    # pattern pairs, at most PAIR_BLOCK_ELEMENTS each, come on top)
    per_freq = 3 * n_sym + n_anti + n_sets * (n_sky + 2 * n_psr) + workers * size * (10 + 4 * n_sets)
    n_chunk = int(max(1, min(n_freq, chunk_elements // per_freq)))
    fe_map, fe_max, best = fstat.sky_outputs(n_sky, n_sets, n_freq, keep_map, map_dtype)
    with fstat._blas_threads(1), ThreadPoolExecutor(max_workers=workers) as pool:
        for f0 in range(0, n_freq, n_chunk):
            f1 = min(n_freq, f0 + n_chunk)
            fc = f1 - f0
            data = fstat.chunk_data(x, y, f0, f1)
            bsym = np.empty((n_sym, 3 * fc))
            banti = np.empty((n_anti, fc))
            _pack_blocks(corrections, z, f0, f1, bsym, banti)
            rsym, ranti = (bsym.astype(np.float32), banti.astype(np.float32)) if single_precision else (bsym, banti)
            fe = np.empty((n_sets, n_sky, fc))

            def job(block):
                s0, s1 = block
                csym = np.empty((3 * (s1 - s0), n_sym), dtype=rsym.dtype)
                canti = np.empty((s1 - s0, n_anti), dtype=rsym.dtype)
                _pattern_pairs(fplus, fcross, s0, s1, csym, canti)
                nq = np.vstack([fplus[s0:s1], fcross[s0:s1]]) @ data
                g, ga = csym @ rsym, canti @ ranti
                if single_precision:
                    g, ga = g.astype(float), ga.astype(float)
                _fe_pair_products(nq, g, ga, fc, n_sets, fe[:, s0:s1])

            list(pool.map(job, blocks))
            if single_precision:
                _refine_best(fplus, fcross, fe, bsym, banti, data, fc, n_sets)
            fstat.store_sky_block(fe, f0, f1, best, fe_max, fe_map, on_block, on_chunk)
    return fstat.SkyScan(fe_map, fe_max, best)


def fp_correlated(proj: fstat.Projections, corrections):
    """Fp with the correlated inner product, from the diagonal blocks only:
    ``½ Σ_p [X̃ Ỹ] (Z_p − W_pp)⁻¹ [X̃ Ỹ]ᵀ`` with ``X̃_p = (d|sin_p)_C``. Each pulsar's 2F_p is
    χ²(2) in noise and the mean of 2Fp stays 2 N_psr, but with a common correlated
    process the terms are dependent, so 2Fp is *not* χ²(2 N_psr) distributed."""
    n_psr = proj.z.shape[0]
    idx = np.arange(n_psr)
    diag = corrections[:, :, idx, idx]                       # (F, 4, P)
    z = proj.z.copy()
    z[..., 0] -= diag[:, 0].T
    z[..., 1] -= diag[:, 1].T
    z[..., 2] -= diag[:, 3].T
    return fstat.fp_statistic(fstat.Projections(proj.frequencies, proj.x, proj.y, z, proj.positions,
                                                proj.z_scale))


def correlated_fe(weighting: ArrayWeighting, frequencies, fplus, fcross, **kwargs) -> fstat.SkyScan:
    """Convenience: projections of the weighted data, scan corrections and the sky scan."""
    proj = weighting.projections(frequencies)
    return fe_sky_correlated(proj, weighting.scan_corrections(proj.frequencies), fplus, fcross, **kwargs)


__all__ = ["CORRELATION_KINDS", "correlation_matrix", "correlation_factor", "CommonProcess", "ArrayWeighting",
           "correlated_network", "SKY_PIXEL_BLOCK", "fe_sky_correlated", "fp_correlated", "correlated_fe"]


# ---------------------------------------------------------------- the one engine choice
#: values of ``NoiseSettings.common_correlation`` (CLI ``--common-correlation``, run file ``[noise]``)
COMMON_CORRELATIONS = ("hellings-downs", "uncorrelated", "none")


def fp_moment_matched(proj: fstat.Projections, corrections=None):
    """Scaled χ² approximation ``2Fp ≈ c·χ²(ν)`` of the noise distribution of Fp, per frequency.

    2Fp = xᵀ A⁻¹ x with x the stacked (X_p, Y_p) of all pulsars (covariance Σ: diagonal blocks
    A_p = Z_p − W_pp, off-diagonal −W_pq) and A = blockdiag(A_p). Its exact distribution is a
    weighted sum of χ²(1) with the eigenvalues of A⁻¹Σ as weights; matching the mean
    ``tr(A⁻¹Σ)`` and variance ``2 tr((A⁻¹Σ)²)`` with ``c·χ²(ν)`` (Satterthwaite 1946,
    Biometrics Bull. 2, 110) gives ``ν = tr²/tr₂`` and ``c = tr/ν``. Without cross-pulsar
    terms (``corrections`` None) ``c = 1`` and ``ν`` is :func:`cwsearch.physics.fstat.fp_degrees_of_freedom`,
    the exact χ²(2N) law (Ellis, Siemens & Creighton 2012). Returns ``(ν (F,), c (F,))``.
    """
    dof = fstat.fp_degrees_of_freedom(proj).astype(float)
    if corrections is None:
        return dof, np.ones_like(dof)
    n_psr = proj.z.shape[0]
    idx = np.arange(n_psr)
    z = proj.z.copy()                                            # (P, F, 3)
    z[..., 0] -= corrections[:, 0, idx, idx].T
    z[..., 1] -= corrections[:, 1, idx, idx].T
    z[..., 2] -= corrections[:, 3, idx, idx].T
    rank = fstat._z_rank(z)
    zss, zsc, zcc = z[..., 0], z[..., 1], z[..., 2]
    det = np.where(rank == 2, zss * zcc - zsc**2, 1.0)
    # A_p⁻¹ (pseudo-inverse on rank 1), shape (F, P, 2, 2)
    inv = np.zeros(z.shape[:2] + (2, 2))
    full = rank == 2
    inv[..., 0, 0] = np.where(full, zcc / det, 0.0)
    inv[..., 1, 1] = np.where(full, zss / det, 0.0)
    inv[..., 0, 1] = inv[..., 1, 0] = np.where(full, -zsc / det, 0.0)
    one = rank == 1
    tr = np.where(one, zss + zcc, 1.0)
    for a, b, v in ((0, 0, zss), (1, 1, zcc), (0, 1, zsc), (1, 0, zsc)):
        inv[..., a, b] += np.where(one, v / tr**2, 0.0)
    inv = inv.transpose(1, 0, 2, 3)                              # (F, P, 2, 2)
    w = corrections.reshape(corrections.shape[0], 2, 2, n_psr, n_psr).transpose(0, 3, 4, 1, 2)  # (F, P, Q, 2, 2)
    off = w.copy()
    off[:, idx, idx] = 0.0
    # tr((A⁻¹Σ)²) = Σ_p rank_p + Σ_{p≠q} tr(A_p⁻¹ W_pq A_q⁻¹ W_qp)
    left = np.einsum("fpab,fpqbc->fpqac", inv, off)              # A_p⁻¹ W_pq
    tr2 = rank.sum(axis=0) + np.einsum("fpqac,fqpca->f", left, left)
    dof_eff = np.where(tr2 > 0, dof**2 / np.where(tr2 > 0, tr2, 1.0), dof)
    scale = np.where(dof_eff > 0, dof / np.where(dof_eff > 0, dof_eff, 1.0), 1.0)
    return dof_eff, scale


class ArrayNoise:
    """The run's noise model behind one interface, whatever the common process does.

    Built by :func:`array_noise` from the run's :class:`NoiseSettings`. ``kind`` is
    ``'none'`` (no common process), ``'uncorrelated'`` (a common spectrum in each pulsar's
    Fourier prior: the per-pulsar engine is exact) or a correlated kind of
    :data:`CORRELATION_KINDS` (the :class:`ArrayWeighting` of this module). Stages call
    these methods and never branch on the kind:

    * :meth:`projections`, :meth:`fe_sky`, :meth:`network`, :meth:`fe_with_amplitudes`,
      :meth:`fp`, :meth:`fp_distribution` — the scan statistics with the model's inner product;
    * :meth:`draw_projections` — Gaussian draws of the sufficient statistics (sky trials);
    * :meth:`simulate` — noise-only residuals drawn from the model (null simulations);
    * :meth:`inner`, :meth:`optimal_snr`, :meth:`log_likelihood`, :meth:`describe`.

    ``engine`` is the per-pulsar :class:`NoiseWeighting` (the K part when correlated),
    ``weighting`` the :class:`ArrayWeighting` or None.
    """

    def __init__(self, array, settings: NoiseSettings | None = None):
        settings = settings or NoiseSettings()
        choice = getattr(settings, "common_correlation", "hellings-downs")
        if choice not in COMMON_CORRELATIONS + CORRELATION_KINDS:
            raise ValueError(f"common_correlation must be one of {COMMON_CORRELATIONS}, not {choice!r}")
        has_common = settings.common_log10_amplitude is not None and common_components(settings) > 0
        self.array = array
        self.settings = settings
        self.kind = choice if has_common else "none"
        self.weighting = None
        self._corrections = {}
        if self.kind == "none":
            self.engine = NoiseWeighting(array, replace(settings, common_log10_amplitude=None))
        elif self.kind == "uncorrelated":
            self.engine = NoiseWeighting(array, settings)
        else:
            common = CommonProcess(settings.common_log10_amplitude, settings.common_index,
                                   common_components(settings), self.kind)
            self.weighting = ArrayWeighting(array, replace(settings, common_log10_amplitude=None), common)
            self.engine = self.weighting.engine

    @classmethod
    def from_engine(cls, engine: NoiseWeighting) -> ArrayNoise:
        """Wrap an existing per-pulsar engine (its common process, if any, stays uncorrelated)."""
        new = object.__new__(cls)
        new.array, new.settings, new.engine, new.weighting, new._corrections = (
            engine.array, engine.settings, engine, None, {})
        new.kind = "uncorrelated" if engine.settings.common_log10_amplitude is not None else "none"
        return new

    @property
    def correlated(self) -> bool:
        """True when cross-pulsar terms enter (a correlated common process)."""
        return self.weighting is not None

    def __len__(self):
        return len(self.engine)

    def describe(self) -> dict:
        """What the engine models, for summaries."""
        out = {"common_correlation": self.kind, "engine": "array (Woodbury over stacked Fourier coefficients)"
               if self.correlated else "per pulsar (block-diagonal)"}
        if self.kind != "none":
            out.update({"common_log10_amplitude": float(self.settings.common_log10_amplitude),
                        "common_index": float(self.settings.common_index),
                        "common_components": common_components(self.settings)})
        return out

    # -- scan statistics
    def projections(self, frequencies, residuals=None, *, on_pulsar=None) -> fstat.Projections:
        """X, Y (with the model's inner product) and the per-pulsar Z; a list of (n_p, B) residual
        sets gives a batch."""
        if self.correlated:
            return self.weighting.projections(frequencies, residuals, on_pulsar=on_pulsar)
        if residuals is not None and np.ndim(residuals[0]) == 2:
            return fstat.project_batch(self.engine, frequencies, residuals, on_pulsar=on_pulsar)
        return fstat.project(self.engine, frequencies, residuals, on_pulsar=on_pulsar)

    def corrections(self, frequencies):
        """Cross-pulsar blocks W (F, 4, P, P) of :meth:`ArrayWeighting.scan_corrections` (cached per
        frequency grid), or None for a per-pulsar model."""
        if not self.correlated:
            return None
        frequencies = np.ascontiguousarray(frequencies, dtype=float)
        key = frequencies.tobytes()
        if key not in self._corrections:
            if len(self._corrections) > 8:
                self._corrections.clear()
            self._corrections[key] = self.weighting.scan_corrections(frequencies)
        return self._corrections[key]

    def fe_sky(self, proj, fplus, fcross, *, single_precision=True, **kwargs) -> fstat.SkyScan:
        """Fe over sky × frequency (× residual sets): :func:`cwsearch.physics.fstat.fe_sky` or
        :func:`fe_sky_correlated`. With a correlated model the pixel sums run in single precision by
        default (``single_precision``: map values to ~1e-6 relative, the per-frequency maxima ``fe_max``
        recomputed in double precision; see :func:`fe_sky_correlated`); the per-pulsar kernel is always
        double precision."""
        if self.correlated:
            return fe_sky_correlated(proj, self.corrections(proj.frequencies), fplus, fcross,
                                     single_precision=single_precision, **kwargs)
        return fstat.fe_sky(proj, fplus, fcross, **kwargs)

    def network(self, proj, fplus, fcross):
        """N (S, F, 4) and M (S, F, 4, 4) with the model's inner product."""
        if self.correlated:
            return correlated_network(proj, self.corrections(proj.frequencies), fplus, fcross)
        return fstat.network_vectors(proj, fplus, fcross)

    def fe_with_amplitudes(self, proj, fplus, fcross):
        """Fe (S, F) and maximum-likelihood amplitudes M⁺N (S, F, 4)."""
        if not self.correlated:
            return fstat.fe_with_amplitudes(proj, fplus, fcross)
        nvec, mmat = self.network(proj, fplus, fcross)
        amp = np.einsum("...ij,...j->...i", np.linalg.pinv(mmat, hermitian=True, rcond=1e-12), nvec)
        return 0.5 * np.einsum("...i,...i->...", nvec, amp), amp

    def fp(self, proj):
        """Fp per frequency (F,) or (B, F)."""
        if self.correlated:
            return fp_correlated(proj, self.corrections(proj.frequencies))
        return fstat.fp_statistic(proj)

    def fp_distribution(self, proj):
        """``(ν, c)`` per frequency with ``2Fp ≈ c·χ²(ν)`` in noise (:func:`fp_moment_matched`;
        exact χ²(ν), c = 1, for a per-pulsar model)."""
        return fp_moment_matched(proj, self.corrections(proj.frequencies))

    def projection_covariance(self, proj, k):
        """Noise covariance of the stacked (X_p, Y_p) at frequency index ``k``: (2P, 2P), ordered
        (pulsar, sin/cos). Per pulsar it is Z_p; with a correlated common process
        ``(sin_p|sin_q)_C = δ_pq Z_p,ss − W_pq,ss`` etc."""
        z = proj.z[:, k]
        n_psr = z.shape[0]
        cov = np.zeros((n_psr, 2, n_psr, 2))
        idx = np.arange(n_psr)
        cov[idx, 0, idx, 0], cov[idx, 0, idx, 1] = z[:, 0], z[:, 1]
        cov[idx, 1, idx, 0], cov[idx, 1, idx, 1] = z[:, 1], z[:, 2]
        if self.correlated:
            w = self.corrections(proj.frequencies[k:k + 1])[0]            # (4, P, P)
            cov[:, 0, :, 0] -= w[0]
            cov[:, 0, :, 1] -= w[1]
            cov[:, 1, :, 0] -= w[2]
            cov[:, 1, :, 1] -= w[3]
        return cov.reshape(2 * n_psr, 2 * n_psr)

    def draw_projections(self, proj, k, draws, rng):
        """``draws`` Gaussian draws of (X, Y) at frequency index ``k`` with
        :meth:`projection_covariance`: arrays (draws, P) each."""
        cov = self.projection_covariance(proj, k)
        n_psr = cov.shape[0] // 2
        vals, vecs = np.linalg.eigh(0.5 * (cov + cov.T))
        root = vecs * np.sqrt(np.clip(vals, 0.0, None))
        xy = (rng.standard_normal((draws, 2 * n_psr)) @ root.T).reshape(draws, n_psr, 2)
        return xy[..., 0], xy[..., 1]

    # -- simulation
    def simulate(self, rng):
        """Noise-only post-fit residuals (list per pulsar) drawn from this model: white noise,
        per-pulsar red noise (as :func:`cwsearch.physics.simulate.simulate_residuals`) and the
        common process with the model's correlation (none, independent per pulsar, or Γ)."""
        s = self.settings
        total = simulate_residuals(self.array, rng, white=True, red=s.pulsar_red_noise and s.red_components > 0,
                                   fit_timing_model=False)
        if self.kind == "uncorrelated":
            k_common = common_components(s)
            freqs = fourier_frequencies(self.array.span, k_common)
            root = np.sqrt(np.repeat(powerlaw_variance(freqs, s.common_log10_amplitude, s.common_index,
                                                       self.array.span), 2))
            for r, p in zip(total, self.array):
                r += fourier_basis(p.toas, self.array.start, self.array.span, k_common) @ (
                    rng.standard_normal(root.size) * root)
        elif self.correlated:
            for r, b in zip(total, self.weighting.draw_background(rng)):
                r += b
        return [postfit(p, r) for p, r in zip(self.array, total)]

    # -- inner products
    def inner(self, x, y=None):
        """``(x|y)`` of per-pulsar lists with the model's covariance (scalar for (n_p,) entries)."""
        if self.correlated:
            return self.weighting.inner(x, y)
        y = x if y is None else y
        return float(sum(w.inner(a, b) for w, a, b in zip(self.engine, x, y)))

    def optimal_snr(self, signals) -> float:
        """``sqrt((s|s))``."""
        return float(np.sqrt(self.inner(signals)))

    def log_likelihood(self) -> float:
        """Gaussian log-likelihood of the data residuals (timing models marginalised)."""
        if self.correlated:
            return self.weighting.log_likelihood()
        return float(sum(w.log_likelihood() for w in self.engine))


def common_components_needed(array, settings: NoiseSettings, ratio=0.01) -> int:
    """The smallest K_common such that every dropped common-process component k > K_common has
    prior variance φ_k below ``ratio`` times the white-noise variance of a Fourier coefficient
    in the most sensitive pulsar, ``2 / Σ_i σ_i⁻²`` (the least-squares variance of a sinusoid's
    amplitude in white noise; common practice, no source). Above it the background is far below
    every pulsar's noise at those frequencies, so leaving them out changes the covariance by less
    than ``ratio`` of the noise there. Capped at ``red_components``.

    >>> from cwsearch.physics.simulate import invented_array
    >>> arr = invented_array(n_pulsars=5, years=12, seed=1)
    >>> k = common_components_needed(arr, NoiseSettings(common_log10_amplitude=-14.6))
    >>> 1 <= k <= 30
    True
    """
    if settings.common_log10_amplitude is None:
        return 0
    white = min(2.0 / float(np.sum(1.0 / np.asarray(p.effective_sigmas() if settings.white_noise_factors
                                                     else p.sigmas) ** 2)) for p in array)
    phi = powerlaw_variance(fourier_frequencies(array.span, settings.red_components),
                            settings.common_log10_amplitude, settings.common_index, array.span)
    above = np.flatnonzero(phi >= ratio * white)
    return int(min(settings.red_components, max(1, above.max() + 1 if above.size else 1)))


def array_noise(array, settings: NoiseSettings | None = None) -> ArrayNoise:
    """The one place that decides the noise engine of a run (:class:`ArrayNoise`).

    ``settings.common_correlation`` (default ``'hellings-downs'``) applies whenever
    ``settings.common_log10_amplitude`` is set; without a common process the per-pulsar
    engine is exact whatever the choice.

    >>> from cwsearch.physics.simulate import invented_array
    >>> arr = invented_array(n_pulsars=3, years=8, seed=1)
    >>> array_noise(arr, NoiseSettings(red_components=6, common_log10_amplitude=-14.5)).kind
    'hellings-downs'
    >>> array_noise(arr, NoiseSettings(red_components=6)).kind
    'none'
    """
    return ArrayNoise(array, settings)


# ---------------------------------------------------------------- measured correlations
@dataclass
class PairCorrelations:
    """Measured inter-pulsar correlations of the residuals (see :func:`pair_correlations`).

    Per pair (i < j): ``angle`` [rad], ``rho`` (estimate of Γ_ij), ``sigma`` (its noise-only
    standard deviation), ``expected`` (Γ_ij of Hellings & Downs 1983). ``bins``: dict of arrays
    ``centre`` [rad], ``rho``, ``sigma``, ``expected``, ``count`` (inverse-variance weighted
    means over pairs in angular bins of equal counts)."""

    angle: np.ndarray
    rho: np.ndarray
    sigma: np.ndarray
    expected: np.ndarray
    pairs: np.ndarray
    bins: dict
    log10_amplitude: float
    index: float


def pair_correlations(array, settings: NoiseSettings, n_bins=8, residuals=None) -> PairCorrelations:
    """Cross-correlation of every pulsar pair's whitened residuals, normalised to estimate Γ_ij.

    Each pulsar is whitened with its own full noise covariance ``C_i`` (white, red and the
    common process's auto-power: the per-pulsar engine with the common process in its prior).
    With ``X_i = F_iᵀ C_i⁻¹ r_i`` and ``Z_i = F_iᵀ C_i⁻¹ F_i`` (F the common process's Fourier
    basis, Φ = diag φ its spectrum at the settings' amplitude and index):

    ``ρ_ij = X_iᵀ Φ X_j / tr(Z_i Φ Z_j Φ)``,   ``σ_ij = tr(Z_i Φ Z_j Φ)^(−½)``

    (the optimal cross-correlation statistic of Anholm et al. 2009, Phys. Rev. D 79, 084030,
    per pair, in units of the assumed amplitude). If the data hold a common process with that
    spectrum and correlation Γ, ``E[ρ_ij] = Γ_ij`` exactly; σ_ij is its standard deviation
    without cross-correlation (weak-signal scatter); pairs sharing a pulsar are correlated.
    Needs ``settings.common_log10_amplitude`` (the spectrum's shape and size). ``residuals``:
    per-pulsar (n_p,) arrays (default the data) or (n_p, B) sets, then ``rho`` is (B, pairs)
    and ``bins`` empty.
    """
    if settings.common_log10_amplitude is None or settings.red_components < 1:
        raise ValueError("pair correlations need a common process (common_log10_amplitude and red_components)")
    with fstat._blas_threads(1):
        engine = NoiseWeighting(array, settings)
    span, start = array.span, array.start
    k_common = common_components(settings)
    phi = np.repeat(powerlaw_variance(fourier_frequencies(span, k_common),
                                      settings.common_log10_amplitude, settings.common_index, span), 2)
    res = [p.residuals for p in array] if residuals is None else residuals
    xs, ms = [], []
    with fstat._blas_threads(1):            # small products: threaded BLAS stalls on a shared machine
        for w, p, r in zip(engine, array, res):
            fb = fourier_basis(p.toas, start, span, k_common)
            xs.append(w.inner(fb, r))
            ms.append(w.inner(fb) * phi[None, :])             # Z_i Φ
    xs, ms = np.array(xs), np.array(ms)                 # (P, 2K) or (P, 2K, B)
    den = np.einsum("aij,bji->ab", ms, ms)
    i, j = np.triu_indices(len(array), 1)
    cos = np.clip(np.einsum("ik,ik->i", array.positions[i], array.positions[j]), -1, 1)
    angle = np.arccos(cos)
    if xs.ndim == 3:                                    # a batch of residual sets: rho (B, pairs), no bins
        rho = np.einsum("pib,pi,pib->bp", xs[i], np.broadcast_to(phi, (i.size, phi.size)), xs[j]) / den[i, j]
        return PairCorrelations(angle, rho, 1.0 / np.sqrt(den[i, j]), hellings_downs(cos), np.stack([i, j], 1),
                                {}, float(settings.common_log10_amplitude), float(settings.common_index))
    num = xs @ (phi[:, None] * xs.T)
    rho = num[i, j] / den[i, j]
    sigma = 1.0 / np.sqrt(den[i, j])
    expected = hellings_downs(cos)
    order = np.argsort(angle)
    n_bins = int(max(1, min(n_bins, order.size)))
    groups = np.array_split(order, n_bins)
    bins = {k: np.empty(len(groups)) for k in ("centre", "rho", "sigma", "expected", "count", "low", "high")}
    for b, g in enumerate(groups):
        wgt = 1.0 / sigma[g] ** 2
        bins["centre"][b] = np.sum(wgt * angle[g]) / wgt.sum()
        bins["rho"][b] = np.sum(wgt * rho[g]) / wgt.sum()
        bins["expected"][b] = np.sum(wgt * expected[g]) / wgt.sum()
        bins["sigma"][b] = 1.0 / np.sqrt(wgt.sum())
        bins["count"][b] = g.size
        bins["low"][b], bins["high"][b] = angle[g].min(), angle[g].max()
    return PairCorrelations(angle, rho, sigma, expected, np.stack([i, j], 1), bins,
                            float(settings.common_log10_amplitude), float(settings.common_index))


__all__ += ["COMMON_CORRELATIONS", "ArrayNoise", "array_noise", "common_components_needed", "fp_moment_matched",
            "PairCorrelations",
            "pair_correlations"]
