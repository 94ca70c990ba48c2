"""The noise-weighting engine: the one place that inverts a covariance.

For each pulsar the covariance is ``C = N + T B T^T`` (docs/design.md §5):
``N`` diagonal white noise per backend, ``T = [design matrix | Fourier
basis]`` and ``B`` the prior variances, infinite on the timing-model columns
(analytic marginalisation) and a power law on the Fourier columns
(per-pulsar red noise plus an optional common red process). With the
Woodbury identity and ``Σ = B^-1 + T^T N^-1 T`` the inner product is

``(x|y) = x^T N^-1 y − (T^T N^-1 x)^T Σ^-1 (T^T N^-1 y)``.

Σ is Cholesky-factored once per pulsar (after Jacobi scaling), so every
inner product costs O(n k) for n TOAs and k basis columns. Stages never
form ``C^-1``: they call :meth:`PulsarWeighting.inner`,
:meth:`PulsarWeighting.inner_columns`, or take the *whitened*
representation of :meth:`PulsarWeighting.whiten`, in which
``(x|y) = wx·wy − ux·uy``.

Examples
--------
>>> import numpy as np
>>> from cwsearch.physics.simulate import invented_array, simulated_array
>>> from cwsearch.physics.noise import NoiseWeighting, NoiseSettings
>>> arr = simulated_array(invented_array(n_pulsars=3, years=10, seed=1), seed=2)
>>> engine = NoiseWeighting(arr, NoiseSettings(red_components=10))
>>> w = engine[0]
>>> r = arr[0].residuals
>>> bool(w.inner(r, r) > 0)
True
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from scipy.linalg import cho_factor, lapack, qr, solve_triangular

from threadpoolctl import threadpool_limits

from ..core.constants import YEAR_FREQUENCY
from .noise_settings import MAX_RED_COMPONENTS, NoiseSettings  # re-exported: the engine's settings


def common_components(settings: NoiseSettings) -> int:
    """Fourier frequencies k/T_span (k = 1..K_common) of the common process: ``settings.common_components``,
    or ``red_components`` when None, never more than ``red_components``."""
    k = settings.red_components if settings.common_components is None else int(settings.common_components)
    return max(0, min(k, settings.red_components))


def fourier_frequencies(span, n_components):
    """Frequencies k / span, k = 1..n_components [Hz]."""
    return np.arange(1, n_components + 1) / float(span)


def fourier_basis(toas, start, span, n_components):
    """Sine and cosine columns at k/span: shape (n, 2K), ordered sin f1, cos f1, sin f2, ..."""
    freqs = fourier_frequencies(span, n_components)
    arg = 2 * np.pi * np.outer(np.asarray(toas) - start, freqs)
    basis = np.empty((arg.shape[0], 2 * n_components))
    basis[:, 0::2] = np.sin(arg)
    basis[:, 1::2] = np.cos(arg)
    return basis


def powerlaw_variance(frequencies, log10_amplitude, index, span):
    """Prior variance of each sine and cosine coefficient of a power-law process [s²].

    ``φ_k = A² / (12π²) · f_yr^(γ−3) · f_k^(−γ) / T_span``, i.e. the power
    spectral density ``A²/(12π²) (f/f_yr)^(−γ) f_yr^(−3)`` times the
    frequency resolution 1/T_span.
    """
    amp2 = 10.0 ** (2 * log10_amplitude)
    f = np.asarray(frequencies, dtype=float)
    return amp2 / (12 * np.pi**2) * YEAR_FREQUENCY ** (index - 3) * f ** (-index) / span


def hellings_downs(cos_angle):
    """Hellings & Downs (1983) correlation for pulsar pairs at angular separation ζ.

    ``Γ = 1/2 − x/4 + (3/2) x ln x`` with ``x = (1 − cos ζ)/2``; the
    auto-correlation term (ζ = 0, same pulsar) is not included.
    """
    x = 0.5 * (1.0 - np.asarray(cos_angle, dtype=float))
    xlogx = np.where(x > 0, x * np.log(np.where(x > 0, x, 1.0)), 0.0)
    return 0.5 - 0.25 * x + 1.5 * xlogx


class PulsarWeighting:
    """Noise weighting of one pulsar: inner products, whitening and log-determinant.

    Built by :class:`NoiseWeighting`; see the module docstring for the maths.
    """

    def __init__(self, pulsar, start, span, settings: NoiseSettings):
        self.pulsar = pulsar
        sig = pulsar.effective_sigmas() if settings.white_noise_factors else pulsar.sigmas
        self.white_sigmas = sig
        self.inverse_variance = 1.0 / sig**2
        design = pulsar.design_matrix
        norms = np.linalg.norm(design, axis=0)
        norms[norms == 0] = 1.0
        self.design = design / norms
        n_timing = design.shape[1]
        red_var = np.zeros(settings.red_components)
        freqs = fourier_frequencies(span, settings.red_components)
        if settings.pulsar_red_noise and pulsar.noise.has_red_noise and settings.red_components:
            red_var = red_var + powerlaw_variance(freqs, pulsar.noise.red_log10_amplitude,
                                                  pulsar.noise.red_index, span)
        if settings.common_log10_amplitude is not None and settings.red_components:
            common_var = powerlaw_variance(freqs, settings.common_log10_amplitude, settings.common_index, span)
            common_var[common_components(settings):] = 0.0
            red_var = red_var + common_var
        if np.any(red_var > 0):
            n_used = int(np.flatnonzero(red_var > 0).max()) + 1       # red noise: all K; common alone: K_common
            red_var = red_var[:n_used]
            fourier = fourier_basis(pulsar.toas, start, span, n_used)
            self.fourier_variance = np.repeat(red_var, 2)
            self.basis = np.hstack([self.design, fourier])
        else:
            self.fourier_variance = np.zeros(0)
            self.basis = self.design
        self.n_timing = n_timing
        prior_inverse = np.concatenate([np.zeros(n_timing), 1.0 / self.fourier_variance])
        weighted_basis = self.basis * self.inverse_variance[:, None]
        sigma = weighted_basis.T @ self.basis
        sigma[np.diag_indices_from(sigma)] += prior_inverse
        scale = np.sqrt(np.diag(sigma))
        self._scale = scale
        chol, _ = cho_factor(sigma / np.outer(scale, scale), lower=True)
        self._chol = np.tril(chol)
        self._weighted_basis_t = np.ascontiguousarray(weighted_basis.T)
        self._logdet_sigma = 2 * np.sum(np.log(np.diag(self._chol))) + 2 * np.sum(np.log(scale))

    @property
    def n_toas(self) -> int:
        return self.inverse_variance.shape[0]

    @property
    def rank(self) -> int:
        """Number of basis columns k (timing model plus Fourier)."""
        return self.basis.shape[1]

    def whiten(self, x):
        """Whitened representation ``(w, u)`` of ``x`` (shape (n,) or (n, b)).

        ``w = x / σ`` and ``u = L^-1 T^T N^-1 x`` with ``Σ = L L^T``, so that
        ``(x|y) = w_x·w_y − u_x·u_y`` for any two vectors.
        """
        x = np.asarray(x, dtype=float)
        sig = self.white_sigmas if x.ndim == 1 else self.white_sigmas[:, None]
        return x / sig, self.reduce(self._weighted_basis_t @ x)

    @property
    def weighted_basis_t(self):
        """``Tᵀ N⁻¹`` (k, n): the basis weighted by the white noise, as :meth:`reduce` expects its input."""
        return self._weighted_basis_t

    def reduce(self, weighted_products):
        """``u = L⁻¹ (Tᵀ N⁻¹ x)`` from ``Tᵀ N⁻¹ x`` (k,) or (k, b) summed by the caller (e.g. over blocks of
        TOAs), so that ``(x|y) = xᵀ N⁻¹ y − u_x·u_y`` as in :meth:`whiten`."""
        v = np.asarray(weighted_products, dtype=float)
        v = v / (self._scale if v.ndim == 1 else self._scale[:, None])
        return solve_triangular(self._chol, v, lower=True, check_finite=False)

    def whitening_operator(self):
        """The linear maps of :meth:`whiten` as arrays: ``(1/σ (n,), U (k, n))`` with
        ``whiten(x) = (x/σ, U @ x)``, built without an n × n matrix.

        >>> import numpy as np
        >>> from cwsearch.physics.simulate import invented_array
        >>> w = NoiseWeighting(invented_array(n_pulsars=1, years=5, seed=1))[0]
        >>> inv_sigma, op = w.whitening_operator()
        >>> x = np.sin(np.arange(w.n_toas))
        >>> wx, ux = w.whiten(x)
        >>> bool(np.allclose(op @ x, ux) and np.allclose(inv_sigma * x, wx))
        True
        """
        operator = solve_triangular(self._chol, self._weighted_basis_t / self._scale[:, None], lower=True,
                                    check_finite=False)
        return 1.0 / self.white_sigmas, operator

    def apply_inverse(self, x):
        """``C⁻¹ x`` (timing model marginalised) for x of shape (n,) or (n, b), through Σ:
        ``N⁻¹ (x − T Σ⁻¹ Tᵀ N⁻¹ x)``, so that ``(x|y) = xᵀ C⁻¹ y``; no n × n or k × n matrix.

        >>> import numpy as np
        >>> from cwsearch.physics.simulate import invented_array
        >>> w = NoiseWeighting(invented_array(n_pulsars=1, years=5, seed=1))[0]
        >>> x, y = np.sin(np.arange(w.n_toas)), np.cos(np.arange(w.n_toas) / 7)
        >>> bool(np.isclose(x @ w.apply_inverse(y), w.inner(x, y)))
        True
        """
        x = np.asarray(x, dtype=float)
        _, u = self.whiten(x)
        scale = self._scale if x.ndim == 1 else self._scale[:, None]
        coef = solve_triangular(self._chol, u, lower=True, trans="T", check_finite=False) / scale
        inv_var = self.inverse_variance if x.ndim == 1 else self.inverse_variance[:, None]
        return (x - self.basis @ coef) * inv_var

    def inner(self, x, y=None):
        """Noise-weighted inner products ``(x_i|y_j)``: scalar, vector or matrix by input shapes."""
        wx, ux = self.whiten(x)
        if y is None:
            wy, uy = wx, ux
        else:
            wy, uy = self.whiten(y)
        return wx.T @ wy - ux.T @ uy

    def inner_columns(self, x, y):
        """Column-by-column products ``(x_i|y_i)`` for two (n, b) arrays: shape (b,)."""
        wx, ux = self.whiten(x)
        wy, uy = self.whiten(y)
        return np.einsum("ij,ij->j", wx, wy) - np.einsum("ij,ij->j", ux, uy)

    def logdet(self) -> float:
        """log det(Gᵀ C G) of the covariance projected off the timing model (G orthonormal).

        Uses log det N + log det φ + log det Σ − log det(Mᵀ M) (van Haasteren &
        Vallisneri 2014).
        """
        logdet_n = -np.sum(np.log(self.inverse_variance))
        logdet_phi = np.sum(np.log(self.fourier_variance))
        _, logdet_mm = np.linalg.slogdet(self.design.T @ self.design)
        return float(logdet_n + logdet_phi + self._logdet_sigma - logdet_mm)

    # -- additions for noise estimation (cwsearch.inference.noisefit) --------------------
    def log_likelihood(self, x=None) -> float:
        """Timing-model-marginalised Gaussian log-likelihood of ``x`` (default: the residuals).

        ``ln L = −½ (x|x) − ½ ln det(GᵀCG) − ½ (n − m) ln 2π``: the log density
        of ``Gᵀx`` under ``N(0, GᵀCG)`` (van Haasteren & Vallisneri 2014).
        """
        x = self.pulsar.residuals if x is None else np.asarray(x, dtype=float)
        dof = self.n_toas - self.n_timing
        return float(-0.5 * self.inner(x, x) - 0.5 * self.logdet() - 0.5 * dof * np.log(2 * np.pi))

    def whitened_residuals(self, x=None, per_toa=False):
        """Exactly whitened residuals: under the model, independent N(0, 1) values.

        With ``V = N^-½ T L^-ᵀ`` (Σ = L Lᵀ) and its thin SVD ``V = U S Qᵀ``,
        ``ε = (I − VVᵀ)^½ N^-½ x`` has covariance ``I − U_t U_tᵀ``, where
        ``U_t`` are the m columns with S = 1 (the timing-model directions).
        Default: the n − m coordinates of ε in an orthonormal basis of the
        complement of ``U_t`` (Householder, LAPACK ``dormqr``): exactly
        i.i.d. N(0, 1) under the model, for normality tests. ``per_toa``:
        the n values ``ε_i / sqrt(1 − |U_t,i|²)`` in TOA order, each exactly
        N(0, 1) but correlated at O(m/n) (for plots against time). No n × n
        matrix is formed.
        """
        x = self.pulsar.residuals if x is None else np.asarray(x, dtype=float)
        inv_sigma, operator = self.whitening_operator()
        v = (operator / inv_sigma[None, :]).T                       # N^-½ T L^-ᵀ, shape (n, k)
        u, s, _ = np.linalg.svd(v, full_matrices=False)
        w = x * inv_sigma
        root = np.sqrt(np.clip(1.0 - s**2, 0.0, None))
        eps = w - u @ ((1.0 - root) * (u.T @ w))
        timing = u[:, np.argsort(s)[::-1][: self.n_timing]]
        if per_toa:
            variance = 1.0 - np.sum(timing**2, axis=1)
            return eps / np.sqrt(np.clip(variance, 1e-12, None))
        (householder, tau), _ = qr(timing, mode="raw")
        rotated, _, info = lapack.dormqr("L", "T", householder, tau, eps[:, None].copy(), max(1, eps.size))
        if info != 0:  # pragma: no cover - LAPACK argument error
            raise np.linalg.LinAlgError(f"dormqr failed (info={info})")
        return rotated[self.n_timing:, 0].copy()


class NoiseWeighting:
    """Noise weighting for a whole :class:`~cwsearch.data.model.Array` (one :class:`PulsarWeighting` per pulsar).

    Pulsars are independent (block-diagonal covariance); a common red
    process enters each pulsar's Fourier prior.
    """

    def __init__(self, array, settings: NoiseSettings | None = None):
        self.array = array
        self.settings = settings or NoiseSettings()
        self.pulsars = _build_pulsars(array, self.settings)

    def __getitem__(self, i) -> PulsarWeighting:
        return self.pulsars[i]

    def __len__(self):
        return len(self.pulsars)

    def __iter__(self):
        return iter(self.pulsars)

    def data_inner(self, signals):
        """``Σ_p (d_p|s_p)`` and ``Σ_p (s_p|s_p)`` for a list of per-pulsar signals."""
        ds = ss = 0.0
        for w, s in zip(self.pulsars, signals):
            ds += w.inner(w.pulsar.residuals, s)
            ss += w.inner(s, s)
        return float(ds), float(ss)

    def optimal_snr(self, signals) -> float:
        """Optimal signal-to-noise ratio ``sqrt(Σ_p (s_p|s_p))``."""
        return float(np.sqrt(sum(w.inner(s, s) for w, s in zip(self.pulsars, signals))))


def single_threaded_blas():
    """Context manager: numpy/scipy BLAS on one thread (no-op without threadpoolctl).

    The per-pulsar products are small (n × k with k ~ 65); threaded BLAS on
    them oversubscribes the cores and was measured 9× slower on the shared
    2-core machine (bench/command.py). Parallelism comes from one pulsar per
    thread instead.
    """
    return threadpool_limits(1, user_api="blas")


def per_pulsar_threads(func, pulsars, workers=None):
    """``[func(p) for p in pulsars]``, one pulsar per thread (``workers``: default one per CPU), each on
    single-threaded BLAS (:func:`single_threaded_blas`).

    Each call is independent and runs the same operations whatever the number of threads, so the
    results do not depend on it.
    """
    pulsars = list(pulsars)
    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    workers = min(len(pulsars), cpus if workers is None else int(workers))
    with single_threaded_blas():
        if workers <= 1:
            return [func(p) for p in pulsars]
        with ThreadPoolExecutor(max_workers=workers) as pool:
            return list(pool.map(func, pulsars))


def _build_pulsars(array, settings, workers=None):
    """One :class:`PulsarWeighting` per pulsar, built by :func:`per_pulsar_threads`."""
    return per_pulsar_threads(lambda p: PulsarWeighting(p, array.start, array.span, settings), array, workers)


# ----------------------------------------------------------------- noise estimation
class PulsarLikelihood:
    """Marginal likelihood of one pulsar's residuals as a function of its noise parameters.

    For fitting (:mod:`cwsearch.inference.noisefit`): the basis ``T = [normalised design
    | Fourier columns at k/span, k = 1..K]`` is built once; every call takes
    new white variances ``N_i`` [s²] and Fourier variances ``φ_j`` [s²] (one
    per column, 0 = column absent) and returns ``ln L`` (same value as
    :meth:`PulsarWeighting.log_likelihood`) and, on request, its analytic
    gradient:

    ``∂lnL/∂N_i = ½ (P r)_i² − ½ P_ii`` with ``P = N⁻¹ − N⁻¹ T Σ⁻¹ Tᵀ N⁻¹``,
    ``∂lnL/∂φ_j = ½ [(Σ⁻¹d)_j² + (Σ⁻¹)_jj] / φ_j² − ½ / φ_j``, ``d = Tᵀ N⁻¹ r``.

    The products ``Tᵀ N⁻¹ T`` are cached for the last white variances, so a
    change of the Fourier variances alone costs one k × k Cholesky.
    """

    def __init__(self, pulsar, start, span, n_components, residuals=None):
        self.name = pulsar.name
        design = pulsar.design_matrix
        norms = np.linalg.norm(design, axis=0)
        norms[norms == 0] = 1.0
        design = design / norms
        self.n_timing = design.shape[1]
        self.frequencies = fourier_frequencies(span, n_components)
        fourier = fourier_basis(pulsar.toas, start, span, n_components) if n_components else np.empty((pulsar.n_toas, 0))
        self.basis = np.ascontiguousarray(np.hstack([design, fourier]))
        self.residuals = np.asarray(pulsar.residuals if residuals is None else residuals, dtype=float)
        self.sigmas = pulsar.sigmas
        self.backend_names = pulsar.backend_names
        self.backend_index = pulsar.backend_index
        self.n_toas = pulsar.n_toas
        self._logdet_mm = float(np.linalg.slogdet(design.T @ design)[1])
        self._cache_key = None

    def _white_products(self, white_variance):
        key = white_variance.tobytes()
        if key != self._cache_key:
            inv = 1.0 / white_variance
            weighted = self.basis * inv[:, None]
            self._cache = (inv, weighted.T @ self.basis, weighted.T @ self.residuals,
                           float(self.residuals @ (inv * self.residuals)), float(np.sum(np.log(white_variance))))
            self._cache_key = key
        return self._cache

    def evaluate(self, white_variance, fourier_variance, white_gradient=False, fourier_gradient=False):
        """``(ln L, ∂lnL/∂N (n,) or None, ∂lnL/∂φ (2K,) or None)``.

        Raises ``numpy.linalg.LinAlgError`` if Σ is not positive definite.
        """
        white_variance = np.ascontiguousarray(white_variance, dtype=float)
        phi = np.asarray(fourier_variance, dtype=float)
        inv, ttnt, d, rnr, logdet_n = self._white_products(white_variance)
        m = self.n_timing
        keep = np.concatenate([np.ones(m, dtype=bool), phi > 0])
        idx = np.flatnonzero(keep)
        sigma = ttnt[np.ix_(idx, idx)].copy()
        phi_kept = phi[phi > 0]
        diag = np.arange(m, len(idx))
        sigma[diag, diag] += 1.0 / phi_kept
        scale = np.sqrt(np.diag(sigma))
        chol = np.linalg.cholesky(sigma / np.outer(scale, scale))
        dk = d[idx] / scale
        y = solve_triangular(chol, dk, lower=True, check_finite=False)
        logdet_sigma = 2 * np.sum(np.log(np.diag(chol))) + 2 * np.sum(np.log(scale))
        dof = self.n_toas - m
        lnl = (-0.5 * (rnr - y @ y) - 0.5 * (logdet_n + np.sum(np.log(phi_kept)) + logdet_sigma - self._logdet_mm)
               - 0.5 * dof * np.log(2 * np.pi))
        grad_n = grad_phi = None
        if white_gradient or fourier_gradient:
            linv = solve_triangular(chol, np.eye(len(idx)), lower=True, check_finite=False)
            sigma_inv = (linv.T @ linv) / np.outer(scale, scale)
            alpha = sigma_inv @ d[idx]
            if fourier_gradient:
                grad_phi = np.zeros(phi.shape)
                a_f = alpha[m:]
                grad_phi[phi > 0] = 0.5 * (a_f**2 + np.diag(sigma_inv)[m:]) / phi_kept**2 - 0.5 / phi_kept
            if white_gradient:
                basis = self.basis[:, idx]
                pr = inv * (self.residuals - basis @ alpha)
                quad = np.einsum("ij,ij->i", basis @ sigma_inv, basis)
                p_diag = inv - inv**2 * quad
                grad_n = 0.5 * pr**2 - 0.5 * p_diag
        return float(lnl), grad_n, grad_phi


__all__ = [
    "NoiseSettings", "MAX_RED_COMPONENTS", "fourier_frequencies", "fourier_basis", "powerlaw_variance", "hellings_downs",
    "PulsarWeighting", "NoiseWeighting", "PulsarLikelihood", "per_pulsar_threads",
]
