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

from dataclasses import dataclass

import numpy as np
from scipy.linalg import cho_factor, solve_triangular

from ..core.constants import YEAR_FREQUENCY


@dataclass(frozen=True)
class NoiseSettings:
    """Run-level noise-model choices (per-pulsar values come from the dataset).

    Attributes
    ----------
    red_components : int
        Number of Fourier frequencies k/T_span, k = 1..K, for red processes.
    pulsar_red_noise : bool
        Use the per-pulsar red noise given in the dataset.
    common_log10_amplitude : float or None
        log10 amplitude of a common red process added to every pulsar (None: off).
    common_index : float
        Spectral index γ of the common process (13/3 for a background of
        circular binaries, Phinney 2001).
    white_noise_factors : bool
        Apply ``sigma_scale``/``sigma_added`` from the dataset.
    """

    red_components: int = 30
    pulsar_red_noise: bool = True
    common_log10_amplitude: float | None = None
    common_index: float = 13.0 / 3.0
    white_noise_factors: bool = True


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
            red_var = red_var + powerlaw_variance(freqs, settings.common_log10_amplitude,
                                                  settings.common_index, span)
        if np.any(red_var > 0):
            fourier = fourier_basis(pulsar.toas, start, span, settings.red_components)
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
        v = self._weighted_basis_t @ x
        v = v / (self._scale if x.ndim == 1 else self._scale[:, None])
        u = solve_triangular(self._chol, v, lower=True, check_finite=False)
        return x / sig, u

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


class NoiseWeighting:
    """Noise weighting for a whole :class:`~cwsearch.data.model.Array` (one :class:`PulsarWeighting` per pulsar).

    Pulsars are independent (block-diagonal covariance); a common red
    process enters each pulsar's Fourier prior.
    """

    def __init__(self, array, settings: NoiseSettings | None = None):
        self.array = array
        self.settings = settings or NoiseSettings()
        self.pulsars = [PulsarWeighting(p, array.start, array.span, self.settings) for p in array]

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


__all__ = [
    "NoiseSettings", "fourier_frequencies", "fourier_basis", "powerlaw_variance", "hellings_downs",
    "PulsarWeighting", "NoiseWeighting",
]
