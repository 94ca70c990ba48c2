"""Estimating the noise model from the residuals alone (docs/design.md §5a).

Quoted TOA errors are often wrong by tens of per cent, some pulsars carry
red noise and all share a common red process; a search that takes the
noise model as given then reports absurd false-alarm probabilities. This
module fits the noise model, checks it, and writes it as one table that
every later stage reads.

What is fitted
--------------
* per pulsar and backend: ``sigma_scale`` and ``sigma_added`` (the meaning
  of noise.ecsv: ``σ_eff² = (scale σ)² + added²``);
* per pulsar: power-law red noise (log10 amplitude at 1/yr, spectral index)
  and whether the pulsar needs it at all;
* array-wide: a common red process (log10 amplitude, index), uncorrelated
  between pulsars by default. The common fit only sees a log-likelihood
  callable ``f(log10_amplitude, index) -> float`` (optionally with
  ``value_and_gradient``), so a Hellings–Downs-correlated array likelihood
  plugs in through ``fit_noise(common_likelihood=factory)``.

Method
------
The likelihood is the exact timing-model-marginalised Gaussian likelihood
through the Woodbury engine (:class:`cwsearch.noise.PulsarLikelihood`,
log-determinant included, analytic gradients). It is maximised with
``scipy.optimize.minimize(method="L-BFGS-B")`` (bounded quasi-Newton) from
several starts. White parameters are optimised as ``a = scale²`` and
``u = added² / median(σ_backend)²`` (the likelihood is smooth in both, also at
added = 0). Uncertainties are the square roots of the diagonal of the inverse
of the Hessian of −ln L at the maximum (central differences of the analytic
gradient), carried to ``sigma_scale``/``sigma_added`` by the delta method;
directions the data do not constrain (Hessian eigenvalue ≤ 0) get the width
of the allowed range as their uncertainty. The red log10 amplitude, whose
likelihood is far from Gaussian (flat towards zero amplitude, strongly
correlated with the index), gets a profile-likelihood interval instead: the
range where ``max_γ 2 ln L`` stays within 4 of its maximum (white noise at its
fit), reported as ``red_log10_amplitude_low/high`` (two sigma) and
``red_log10_amplitude_err`` = width / 4. Bounds (also written to the
table) are the priors' supports: see :class:`FitBounds`.

Sequence (``iterations = 1``): (0) every pulsar white-only; (1) the common
process with those white values and no per-pulsar red noise; (2) every
pulsar white + own red with the common process fixed; (3) the common process
again with the pulsar models of (2) fixed; (4) step (2) once more: the
final per-pulsar values. Without the common process, only step (2).

Red-noise model choice (per pulsar): the likelihood ratio statistic
``2 Δln L = 2 [ln L(white + red) − ln L(white)]`` (both maximised, common
process fixed), red noise claimed when it is ≥ :data:`RED_NOISE_THRESHOLD`
(9.0; the null distribution is non-standard because the amplitude sits on
its boundary and the index is undefined under the null; the bench measures
the false-claim rate on white pulsars). A pulsar with fewer than
``min_toas_red`` TOAs is fitted white only, with a :class:`NoiseFitWarning`.

Amplitude limits: a uniform prior in log10 amplitude makes red-noise upper
limits come out below the true amplitude about half the time (Hazboun et
al. 2020, ApJ 890, 108 — from memory). This module therefore never uses a
log-uniform prior: detection is a maximum-likelihood ratio, and the 95 %
upper limit reported for every pulsar (and the common process) is the
posterior quantile under a prior *uniform in amplitude*, at the fixed index
``upper_limit_index`` (13/3), white noise fixed at its fit.

Goodness of fit (always on), per pulsar under the chosen model:
* normality: exactly whitened residuals
  (:meth:`cwsearch.noise.PulsarWeighting.whitened_residuals`) against N(0, 1)
  by the Kolmogorov–Smirnov distance (tests the scale too), p-value from Stephens'
  finite-n form of the Kolmogorov distribution (:func:`ks_normal`);
* low-frequency excess: ``q = pᵀ G⁻¹ p`` with ``p_k = (f_k|r)`` over the
  lowest ``lowfreq_components`` sine/cosine pairs at k/T_pulsar and ``G``
  their Gram matrix under the model; ``q ~ χ²(2K)`` exactly under the model
  (upper tail ``scipy.special.chdtrc``);
* array level: ``Σ_p q_p ~ χ²(Σ_p dof_p)``: a small p-value points to an
  unmodelled common low-frequency process (fit or refit the common process).
A p-value below :data:`GOF_THRESHOLD` (1e-3) flags the pulsar (or the array).

Examples
--------
>>> from cwsearch.physics.simulate import invented_array, simulated_array
>>> arr = simulated_array(invented_array(n_pulsars=2, years=8, seed=1, toas_per_pulsar=80), seed=2)
>>> fit = fit_noise(arr, FitSettings(red_components=8, common=False, upper_limits=False))
>>> fit.pulsars[0].converged, fit.pulsars[0].red_noise
(True, False)
>>> model = fit.model()
>>> applied = apply_noise_model(arr, model)
>>> applied[0].noise is not arr[0].noise
True
"""

from __future__ import annotations

import hashlib
import math
import os
import warnings
from dataclasses import dataclass, field, asdict
from pathlib import Path

import numpy as np
from astropy.table import Table
from scipy import special
from threadpoolctl import threadpool_limits

from ..core.constants import YEAR_FREQUENCY
from ..core.errors import InputError
from ..core.fileio import write_table_atomic
from ..data.dataset import _numeric, _read_table, _require_columns, _text
from ..data.model import PulsarNoise
from ..physics.noise import (NoiseSettings, PulsarLikelihood, PulsarWeighting, fourier_basis, per_pulsar_threads,
                             powerlaw_variance)

#: Likelihood-ratio threshold 2 Δln L for claiming red noise in a pulsar.
RED_NOISE_THRESHOLD = 9.0
#: p-value below which a goodness-of-fit test flags a pulsar or the array.
GOF_THRESHOLD = 1e-3
#: Format tag written to (and required in) the noise table's header.
TABLE_FORMAT = "cwsearch noise model"
TABLE_VERSION = 1

_LN10 = np.log(10.0)


class NoiseFitWarning(UserWarning):
    """A pulsar fitted with a reduced model, a fit that did not converge, or a failed check."""


# ----------------------------------------------------------------- settings
@dataclass(frozen=True)
class FitBounds:
    """Allowed ranges (the supports of flat priors) of the fitted parameters.

    ``sigma_added`` runs from 0 to ``sigma_added_max`` × the backend's median
    quoted sigma. Amplitudes are log10 of the strain-like amplitude at 1/yr.
    """

    sigma_scale: tuple = (0.2, 5.0)
    sigma_added_max: float = 5.0
    red_log10_amplitude: tuple = (-18.0, -11.0)
    red_index: tuple = (0.5, 7.0)
    common_log10_amplitude: tuple = (-18.0, -11.0)
    common_index: tuple = (0.5, 7.0)

    def as_meta(self) -> dict:
        d = asdict(self)
        d = {k: list(v) if isinstance(v, tuple) else v for k, v in d.items()}
        d["sigma_added_max"] = f"{self.sigma_added_max} x median quoted sigma of the backend"
        return d


@dataclass(frozen=True)
class FitSettings:
    """Choices of a noise fit.

    Attributes
    ----------
    red_components : Fourier frequencies k/T_span, k = 1..K, of red processes.
    pulsar_red : fit per-pulsar red noise at all (False: white noise only, no warnings).
    red_noise_threshold : 2 Δln L needed to claim red noise in a pulsar.
    min_toas_red : pulsars with fewer TOAs are fitted white only (with a warning).
    n_starts : optimiser starts for the white + red fit of a pulsar (and the common fit).
    common : fit a common red process.
    common_index : None = fitted; a number = fixed at that index (13/3 for a binary background).
    iterations : extra rounds of (common fit, pulsar refit) after the first.
    lowfreq_components : sine/cosine pairs in the low-frequency excess test.
    gof_threshold : p-value below which a check flags.
    upper_limits : compute 95 % amplitude limits (uniform-in-amplitude prior).
    upper_limit_index : fixed spectral index of those limits.
    max_iterations : optimiser iteration limit per start.
    tolerance : L-BFGS-B relative tolerance on the change of −ln L (from its value at the first start).
    """

    red_components: int = 30
    pulsar_red: bool = True
    red_noise_threshold: float = RED_NOISE_THRESHOLD
    min_toas_red: int = 40
    n_starts: int = 3
    common: bool = True
    common_index: float | None = None
    iterations: int = 1
    lowfreq_components: int = 4
    gof_threshold: float = GOF_THRESHOLD
    upper_limits: bool = True
    upper_limit_index: float = 13.0 / 3.0
    max_iterations: int = 400
    tolerance: float = 1e-10


# ----------------------------------------------------------------- results
@dataclass
class GoodnessOfFit:
    """Checks of one whitened pulsar. p-values from scipy.stats (see the module docstring)."""

    name: str
    normality_statistic: float
    normality_pvalue: float
    lowfreq_statistic: float
    lowfreq_dof: int
    lowfreq_pvalue: float
    threshold: float = GOF_THRESHOLD

    @property
    def flagged(self) -> bool:
        return bool(self.normality_pvalue < self.threshold or self.lowfreq_pvalue < self.threshold)


@dataclass
class ArrayCheck:
    """Combined low-frequency excess over the array: ``Σ q_p ~ χ²(Σ dof_p)``."""

    statistic: float
    dof: int
    pvalue: float
    threshold: float = GOF_THRESHOLD

    @property
    def flagged(self) -> bool:
        return bool(self.pvalue < self.threshold)


@dataclass
class PulsarFit:
    """Fitted noise of one pulsar.

    Red values are those of the white + red fit whether or not red noise is
    claimed (``red_noise``); ``red_fitted`` is False for pulsars with too few
    TOAs (red values then sit at the lower amplitude bound with zero
    uncertainty and statistic 0).
    """

    name: str
    backends: tuple
    n_toas: dict
    sigma_scale: dict
    sigma_scale_err: dict
    sigma_added: dict
    sigma_added_err: dict
    red_fitted: bool
    red_noise: bool
    red_log10_amplitude: float
    red_log10_amplitude_err: float
    red_log10_amplitude_low: float
    red_log10_amplitude_high: float
    red_index: float
    red_index_err: float
    red_statistic: float
    white_log_likelihood: float
    red_log_likelihood: float
    converged: bool
    red_log10_amplitude_95: float = float("nan")
    gof: GoodnessOfFit | None = None
    message: str = ""

    def noise(self) -> PulsarNoise:
        """The chosen model as a :class:`~cwsearch.model.PulsarNoise`."""
        return PulsarNoise(sigma_scale=dict(self.sigma_scale), sigma_added=dict(self.sigma_added),
                           red_log10_amplitude=self.red_log10_amplitude if self.red_noise else None,
                           red_index=self.red_index if self.red_noise else None)


@dataclass
class CommonFit:
    """Fitted common red process. ``statistic`` = 2 [ln L(best) − ln L(amplitude at its lower bound)]."""

    log10_amplitude: float
    log10_amplitude_err: float
    index: float
    index_err: float
    index_fixed: bool
    log_likelihood: float
    statistic: float
    converged: bool
    log10_amplitude_95: float = float("nan")


@dataclass
class NoiseModel:
    """The noise model every later stage uses: per-pulsar noise plus the common process.

    ``pulsars`` maps name -> :class:`~cwsearch.model.PulsarNoise`;
    ``common_log10_amplitude`` is None without a common process.
    """

    pulsars: dict
    common_log10_amplitude: float | None
    common_index: float
    red_components: int
    dataset_checksum: str | None = None
    meta: dict = field(default_factory=dict)

    def noise_settings(self) -> NoiseSettings:
        """Engine settings matching this model (per-pulsar red noise on, common process as fitted)."""
        return NoiseSettings(red_components=self.red_components, pulsar_red_noise=True,
                             common_log10_amplitude=self.common_log10_amplitude,
                             common_index=self.common_index, white_noise_factors=True)


@dataclass
class NoiseFit:
    """Everything a fit produced; :meth:`model` gives what later stages use."""

    pulsars: list
    common: CommonFit | None
    array_check: ArrayCheck
    settings: FitSettings
    bounds: FitBounds
    dataset_checksum: str | None = None
    evaluations: int = 0
    #: correlation of the fitted common process between pulsars (set by the caller that chose the likelihood)
    common_correlation: str = "uncorrelated"

    def __getitem__(self, name) -> PulsarFit:
        for p in self.pulsars:
            if p.name == name:
                return p
        raise KeyError(name)

    def model(self) -> NoiseModel:
        common = self.common
        return NoiseModel({p.name: p.noise() for p in self.pulsars},
                          None if common is None else common.log10_amplitude,
                          13.0 / 3.0 if common is None else common.index,
                          self.settings.red_components, self.dataset_checksum, self.meta())

    def meta(self) -> dict:
        s = self.settings
        meta = {
            "format": TABLE_FORMAT, "version": TABLE_VERSION,
            "dataset_checksum": self.dataset_checksum,
            "red_components": int(s.red_components),
            "priors": "flat within bounds (maximum likelihood); limits: uniform in amplitude",
            "bounds": self.bounds.as_meta(),
            "method": ("exact timing-model-marginalised likelihood (Woodbury), maximised with "
                       "scipy.optimize L-BFGS-B from several starts"),
            "uncertainties": ("inverse Hessian of -ln L at the maximum (delta method for sigma_scale, sigma_added); "
                              "red log10 amplitude: profile likelihood over the index, white noise fixed, "
                              "2-sigma interval at 2 dlnL = 4, err = interval width / 4"),
            "red_noise_test": "likelihood ratio 2 dlnL (white+red vs white, common fixed)",
            "red_noise_threshold": float(s.red_noise_threshold),
            "min_toas_red": int(s.min_toas_red),
            "upper_limits": f"95% quantile, prior uniform in amplitude, index fixed at {s.upper_limit_index:.6g}",
            "normality_test": ("Kolmogorov-Smirnov distance of exactly whitened residuals from N(0,1), p-value from "
                               "Stephens' (1970) finite-n form of the Kolmogorov distribution"),
            "low_frequency_test": (f"q = p^T G^-1 p over the lowest {s.lowfreq_components} sine/cosine pairs at "
                                   "k/T_pulsar, chi2(2K) upper tail (scipy.special.chdtrc)"),
            "gof_threshold": float(s.gof_threshold),
            "array_low_frequency": {"statistic": float(self.array_check.statistic), "dof": int(self.array_check.dof),
                                    "pvalue": float(self.array_check.pvalue),
                                    "flagged": bool(self.array_check.flagged)},
        }
        c = self.common
        meta["common"] = None if c is None else {
            "log10_amplitude": float(c.log10_amplitude), "log10_amplitude_err": float(c.log10_amplitude_err),
            "index": float(c.index), "index_err": float(c.index_err), "index_fixed": bool(c.index_fixed),
            "statistic": float(c.statistic), "converged": bool(c.converged),
            "log10_amplitude_95": float(c.log10_amplitude_95),
            "correlation": self.common_correlation if s.common else None}
        return meta


# ----------------------------------------------------------------- optimisation helpers
def _minimise(fun, starts, bounds, max_iterations, tolerance=1e-10):
    """Best L-BFGS-B result over ``starts`` (fun returns value and gradient); retried once if not converged."""
    # lazy: the scan imports this module for its goodness of fit and needs no optimiser (0.1 s import)
    from scipy import optimize
    lo = [b[0] for b in bounds]
    hi = [b[1] for b in bounds]
    starts = [np.clip(np.asarray(x0, dtype=float), lo, hi) for x0 in starts]
    # the objective is shifted by its value at the first start, so that the relative
    # tolerance acts on the change of ln L, not on its large constant part
    ref = fun(starts[0])[0]
    ref = ref if np.isfinite(ref) and abs(ref) < 1e19 else 0.0

    def shifted(x):
        v, g = fun(x)
        return v - ref, g

    options = {"maxiter": max_iterations, "ftol": tolerance, "gtol": 1e-6}
    best = None
    for x0 in starts:
        res = optimize.minimize(shifted, x0, jac=True, method="L-BFGS-B", bounds=bounds, options=options)
        if np.isfinite(res.fun) and (best is None or res.fun < best.fun):
            best = res
    if best is not None and not best.success:
        again = optimize.minimize(shifted, best.x, jac=True, method="L-BFGS-B", bounds=bounds, options=options)
        if np.isfinite(again.fun) and again.fun <= best.fun + 1e-9:
            best = again
    if best is not None:
        best.fun = best.fun + ref
        best.success = bool(best.success) or _stationary(best.x, best.jac, lo, hi)
    return best


def _stationary(x, grad, lo, hi, tolerance=1e-2):
    """Projected gradient below ``tolerance`` per range width: converged although the line search gave up."""
    grad = np.asarray(grad, dtype=float)
    lo, hi = np.asarray(lo), np.asarray(hi)
    pg = np.where((x <= lo) & (grad > 0), 0.0, grad)
    pg = np.where((x >= hi) & (pg < 0), 0.0, pg)
    return bool(np.all(np.isfinite(pg)) and np.max(np.abs(pg) * (hi - lo), initial=0.0) < tolerance)


def _profile_interval(lnl, x_hat, lnl_hat, amp_bounds, idx_bounds, drop=4.0):
    """Interval of log10 amplitude where the profile ``max_γ lnl(A, γ)`` stays within ``drop``/2 of its maximum.

    ``drop = 4``: 2 Δln L = 4, the two-sigma profile-likelihood interval; it runs to a bound when the
    likelihood stays flat up to it.
    """
    # lazy: the scan imports this module for its goodness of fit and needs no optimiser (0.1 s import)
    from scipy import optimize
    def profile(la):
        res = optimize.minimize_scalar(lambda g: -lnl(la, g), bounds=idx_bounds, method="bounded",
                                       options={"xatol": 1e-3})
        return -res.fun

    top = max(lnl_hat, profile(x_hat))
    level = top - 0.5 * drop
    ends = []
    for direction, bound in ((-1, amp_bounds[0]), (1, amp_bounds[1])):
        inside, step = x_hat, 0.05
        end = bound
        while True:
            trial = x_hat + direction * step
            if (trial - bound) * direction >= 0:
                if profile(bound) < level:
                    end = optimize.brentq(lambda a: profile(a) - level, *sorted((inside, bound)), xtol=1e-3)
                break
            if profile(trial) < level:
                end = optimize.brentq(lambda a: profile(a) - level, *sorted((inside, trial)), xtol=1e-3)
                break
            inside, step = trial, 2 * step
        ends.append(float(end))
    return ends[0], ends[1]


def _hessian_errors(grad, x, bounds):
    """Uncertainties from the inverse Hessian of −ln L (central differences of ``grad``), capped at the range widths."""
    x = np.asarray(x, dtype=float)
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    width = hi - lo
    free = width > 0
    if not free.all():                       # parameters fixed by equal bounds: zero uncertainty
        err = np.zeros(x.size)
        if free.any():
            sub = [b for b, f in zip(bounds, free) if f]

            def sub_grad(y):
                full = x.copy()
                full[free] = y
                return grad(full)[free]
            err[free], ok = _hessian_errors(sub_grad, x[free], sub)
            return err, ok
        return err, True
    n = x.size
    hess = np.empty((n, n))
    for j in range(n):
        h = 1e-4 * width[j]
        up = min(x[j] + h, hi[j])
        down = max(x[j] - h, lo[j])
        xu, xd = x.copy(), x.copy()
        xu[j], xd[j] = up, down
        hess[:, j] = (grad(xu) - grad(xd)) / (up - down)
    hess = 0.5 * (hess + hess.T)
    if not np.all(np.isfinite(hess)):
        return width.copy(), False
    # whiten by the widths so that eigenvalues are comparable between parameters
    scaled = hess * np.outer(width, width)
    vals, vecs = np.linalg.eigh(scaled)
    ok = bool(np.all(vals > 1e-8 * max(vals.max(), 1.0)))
    floor = 1.0                      # an unconstrained direction: variance = (range width)²
    vals = np.where(vals > 1e-8 * max(vals.max(), 1.0), vals, floor)
    cov = (vecs / vals) @ vecs.T
    err = np.sqrt(np.clip(np.diag(cov), 0, None)) * width
    return np.minimum(err, width), ok


def _finite(value, fallback):
    value = float(value)
    return value if np.isfinite(value) else float(fallback)


# ----------------------------------------------------------------- one pulsar
class _PulsarProblem:
    """Parameter layout and likelihood of one pulsar: a_b, u_b per backend, then (log10 A, γ)."""

    def __init__(self, likelihood: PulsarLikelihood, span, bounds: FitBounds):
        self.lk = likelihood
        self.span = span
        self.n_back = len(likelihood.backend_names)
        bi = likelihood.backend_index
        self.bi = bi
        self.sig2 = likelihood.sigmas**2
        self.med2 = np.array([np.median(likelihood.sigmas[bi == b]) ** 2 for b in range(self.n_back)])
        self.counts = np.bincount(bi, minlength=self.n_back)
        self.log_f = np.repeat(np.log(likelihood.frequencies / YEAR_FREQUENCY), 2)
        self.bounds = bounds
        self.evaluations = 0

    def white_bounds(self):
        s_lo, s_hi = self.bounds.sigma_scale
        return ([(s_lo**2, s_hi**2)] * self.n_back + [(0.0, self.bounds.sigma_added_max**2)] * self.n_back)

    def red_phi(self, log10_amplitude, index):
        return np.repeat(powerlaw_variance(self.lk.frequencies, log10_amplitude, index, self.span), 2)

    def white_variance(self, x):
        a = x[: self.n_back]
        u = x[self.n_back: 2 * self.n_back]
        return a[self.bi] * self.sig2 + (u * self.med2)[self.bi]

    def objective(self, red, common_phi):
        nb = self.n_back
        base_phi = np.zeros(2 * len(self.lk.frequencies)) if common_phi is None else common_phi

        def fun(x):
            self.evaluations += 1
            nvar = self.white_variance(x)
            phi = base_phi + self.red_phi(x[2 * nb], x[2 * nb + 1]) if red else base_phi
            try:
                lnl, g_n, g_phi = self.lk.evaluate(nvar, phi, white_gradient=True, fourier_gradient=red)
            except np.linalg.LinAlgError:
                return 1e20, np.zeros_like(x)
            grad = np.empty_like(x)
            grad[:nb] = np.bincount(self.bi, g_n * self.sig2, minlength=nb)
            grad[nb:2 * nb] = np.bincount(self.bi, g_n, minlength=nb) * self.med2
            if red:
                phi_red = self.red_phi(x[2 * nb], x[2 * nb + 1])
                w = g_phi * phi_red
                grad[2 * nb] = 2 * _LN10 * np.sum(w)
                grad[2 * nb + 1] = -np.sum(w * self.log_f)
            if not (np.isfinite(lnl) and np.all(np.isfinite(grad))):
                return 1e20, np.zeros_like(x)
            return -lnl, -grad
        return fun


def _fit_one(problem: _PulsarProblem, settings: FitSettings, bounds: FitBounds, common_phi, red_allowed,
             rng, previous: PulsarFit | None = None, final=True) -> PulsarFit:
    """Fit one pulsar (white only, and white + red when allowed); uncertainties only when ``final``."""
    lk = problem.lk
    nb = problem.n_back
    wb = problem.white_bounds()
    # white only
    white_starts = [np.concatenate([np.ones(nb), np.full(nb, 0.1)])]
    if previous is not None:
        white_starts.insert(0, np.concatenate([[previous.sigma_scale[b] ** 2 for b in lk.backend_names],
                                               [(previous.sigma_added[b] ** 2) / m2 for b, m2 in
                                                zip(lk.backend_names, problem.med2)]]))
    f0 = problem.objective(False, common_phi)
    res0 = _minimise(f0, white_starts, wb, settings.max_iterations, settings.tolerance)
    x0 = res0.x if res0 is not None else white_starts[-1]
    lnl0 = -res0.fun if res0 is not None else -f0(x0)[0]
    converged0 = res0 is not None and bool(res0.success)

    red_fitted = bool(red_allowed)
    rb = wb + [tuple(bounds.red_log10_amplitude), tuple(bounds.red_index)]
    if red_fitted:
        red_starts = [(-14.0, 3.5), (-13.0, 5.0), (-15.0, 2.0)]
        n_starts = max(settings.n_starts, 1)
        if previous is not None and previous.red_fitted:
            # a refit: start from the previous optimum plus fewer fresh starts
            red_starts.insert(0, (previous.red_log10_amplitude, previous.red_index))
            n_starts = max(n_starts - 1, 1)
        while len(red_starts) < n_starts:
            red_starts.append((rng.uniform(-16, -12.5), rng.uniform(1.0, 6.0)))
        red_starts = red_starts[:n_starts]
        f1 = problem.objective(True, common_phi)
        res1 = _minimise(f1, [np.concatenate([x0, rs]) for rs in red_starts], rb,
                        settings.max_iterations, settings.tolerance)
        if res1 is None:
            x1 = np.concatenate([x0, [bounds.red_log10_amplitude[0], 3.0]])
            lnl1, converged1 = lnl0, False
        else:
            x1, lnl1, converged1 = res1.x, -res1.fun, bool(res1.success)
        statistic = max(0.0, 2.0 * (lnl1 - lnl0))
        red_noise = statistic >= settings.red_noise_threshold
        if not final:
            err1 = np.zeros(len(rb))
            amp_interval = (x1[2 * nb], x1[2 * nb])
        else:
            err1, amp_interval = _red_uncertainties(problem, f1, x1, lnl1, rb, common_phi, bounds)
    else:
        x1 = np.concatenate([x0, [bounds.red_log10_amplitude[0], 3.0]])
        lnl1, converged1, statistic, red_noise = lnl0, True, 0.0, False
        err1 = np.zeros(len(rb))
        amp_interval = (bounds.red_log10_amplitude[0], bounds.red_log10_amplitude[0])

    if red_noise:
        xw, errw, converged = x1[: 2 * nb], err1[: 2 * nb], converged0 and converged1
    else:
        errw_full = _hessian_errors(lambda x: f0(x)[1], x0, wb)[0] if final else np.zeros(len(wb))
        xw, errw, converged = x0, errw_full, converged0 and (converged1 or not red_fitted)
    return _pulsar_fit(problem, bounds, xw, errw, x1, err1, amp_interval, red_fitted, red_noise, statistic,
                       lnl0, lnl1, converged)


def _red_uncertainties(problem, f1, x1, lnl1, rb, common_phi, bounds):
    lk = problem.lk
    nb = problem.n_back
    err1, _ = _hessian_errors(lambda x: f1(x)[1], x1, rb)
    nvar1 = problem.white_variance(x1)
    base = np.zeros(2 * len(lk.frequencies)) if common_phi is None else common_phi

    def red_lnl(la, g):
        problem.evaluations += 1
        try:
            return lk.evaluate(nvar1, base + problem.red_phi(la, g))[0]
        except np.linalg.LinAlgError:
            return -1e20
    amp_interval = _profile_interval(red_lnl, x1[2 * nb], lnl1, bounds.red_log10_amplitude, bounds.red_index)
    err1[2 * nb] = 0.25 * (amp_interval[1] - amp_interval[0])
    return err1, amp_interval


def _pulsar_fit(problem, bounds, xw, errw, x1, err1, amp_interval, red_fitted, red_noise, statistic, lnl0, lnl1,
                converged) -> PulsarFit:
    lk = problem.lk
    nb = problem.n_back
    a, u = xw[:nb], xw[nb:2 * nb]
    ea, eu = errw[:nb], errw[nb:2 * nb]
    scale = np.sqrt(a)
    added = np.sqrt(u * problem.med2)
    scale_err = ea / (2 * scale)
    denom = 2 * np.sqrt(np.maximum(u, eu))
    added_err = np.sqrt(problem.med2) * np.divide(eu, denom, out=np.zeros_like(eu), where=denom > 0)
    names = lk.backend_names
    lo_amp = bounds.red_log10_amplitude[0]
    fit = PulsarFit(
        name=lk.name, backends=tuple(names),
        n_toas={b: int(c) for b, c in zip(names, problem.counts)},
        sigma_scale={b: _finite(v, 1.0) for b, v in zip(names, scale)},
        sigma_scale_err={b: _finite(v, 0.0) for b, v in zip(names, scale_err)},
        sigma_added={b: _finite(v, 0.0) for b, v in zip(names, added)},
        sigma_added_err={b: _finite(v, 0.0) for b, v in zip(names, added_err)},
        red_fitted=red_fitted, red_noise=bool(red_noise),
        red_log10_amplitude=_finite(x1[2 * nb], lo_amp), red_log10_amplitude_err=_finite(err1[2 * nb], 0.0),
        red_log10_amplitude_low=_finite(amp_interval[0], lo_amp),
        red_log10_amplitude_high=_finite(amp_interval[1], lo_amp),
        red_index=_finite(x1[2 * nb + 1], 3.0), red_index_err=_finite(err1[2 * nb + 1], 0.0),
        red_statistic=_finite(statistic, 0.0), white_log_likelihood=_finite(lnl0, 0.0),
        red_log_likelihood=_finite(lnl1, 0.0), converged=bool(converged))
    if not converged:
        fit.message = "optimiser did not converge"
    return fit


# ----------------------------------------------------------------- common process
class UncorrelatedCommonLikelihood:
    """Array log-likelihood of a common red process, uncorrelated between pulsars.

    Every pulsar's white and own red noise come from its
    :class:`~cwsearch.model.PulsarNoise` (as set by :func:`apply_noise_model`);
    ``self(log10_amplitude, index)`` returns ``Σ_p ln L_p`` with the common
    power law added to every pulsar's Fourier variances.
    :meth:`value_and_gradient` adds the analytic gradient. A
    Hellings–Downs-correlated likelihood with the same call signature can
    replace this class in :func:`fit_noise`.
    """

    def __init__(self, array, red_components=30, residuals=None):
        self.span = array.span
        self.parts = []
        for i, p in enumerate(array):
            lk = PulsarLikelihood(p, array.start, array.span, red_components,
                                  residuals=None if residuals is None else residuals[i])
            red = np.zeros(2 * red_components)
            if p.noise.has_red_noise:
                red = np.repeat(powerlaw_variance(lk.frequencies, p.noise.red_log10_amplitude, p.noise.red_index,
                                                  array.span), 2)
            self.parts.append((lk, p.effective_sigmas() ** 2, red))
        self.evaluations = 0

    def _common(self, lk, log10_amplitude, index):
        return np.repeat(powerlaw_variance(lk.frequencies, log10_amplitude, index, self.span), 2)

    def __call__(self, log10_amplitude, index) -> float:
        self.evaluations += 1
        total = 0.0
        for lk, nvar, red in self.parts:
            total += lk.evaluate(nvar, red + self._common(lk, log10_amplitude, index))[0]
        return float(total)

    def value_and_gradient(self, log10_amplitude, index):
        """``(ln L, [∂/∂log10 A, ∂/∂γ])``."""
        self.evaluations += 1
        total, grad = 0.0, np.zeros(2)
        for lk, nvar, red in self.parts:
            common = self._common(lk, log10_amplitude, index)
            lnl, _, g_phi = lk.evaluate(nvar, red + common, fourier_gradient=True)
            total += lnl
            w = g_phi * common
            grad[0] += 2 * _LN10 * np.sum(w)
            grad[1] -= np.sum(w * np.repeat(np.log(lk.frequencies / YEAR_FREQUENCY), 2))
        return float(total), grad


def fit_common(log_likelihood, bounds: FitBounds | None = None, *, index=None, starts=None,
               max_iterations=400, tolerance=1e-10) -> CommonFit:
    """Maximise a common-process log-likelihood ``log_likelihood(log10_amplitude, index)``.

    Uses ``log_likelihood.value_and_gradient`` when present (else finite
    differences). ``index`` fixes the spectral index. Uncertainties from the
    Hessian; ``statistic`` is 2 Δln L against the amplitude at its lower bound.
    """
    # lazy: the scan imports this module for its goodness of fit and needs no optimiser (0.1 s import)
    from scipy import optimize
    bounds = bounds or FitBounds()
    has_grad = hasattr(log_likelihood, "value_and_gradient")
    fixed = index is not None
    amp_b = tuple(bounds.common_log10_amplitude)
    idx_b = tuple(bounds.common_index)
    pb = [amp_b] if fixed else [amp_b, idx_b]

    def full(x):
        return (x[0], float(index)) if fixed else (x[0], x[1])

    def fun(x):
        la, g = full(x)
        try:
            if has_grad:
                v, grad = log_likelihood.value_and_gradient(la, g)
                grad = np.asarray(grad, dtype=float)[:1] if fixed else np.asarray(grad, dtype=float)
            else:
                v = log_likelihood(la, g)
                grad = optimize.approx_fprime(x, lambda y: log_likelihood(*full(y)), 1e-6)
        except np.linalg.LinAlgError:
            return 1e20, np.zeros_like(x)
        if not (np.isfinite(v) and np.all(np.isfinite(grad))):
            return 1e20, np.zeros_like(x)
        return -v, -grad

    if starts is None:
        starts = [(-14.5, 13 / 3), (-13.5, 3.0), (-15.5, 5.0)]
    starts = [np.asarray(s[:1] if fixed else s, dtype=float) for s in starts]
    if fixed and not has_grad:
        # one parameter and no analytic gradient (the correlated array likelihood, one Cholesky of
        # size N_psr·2K per value): bounded Brent search on values alone, ~15 evaluations, instead of
        # L-BFGS-B from several starts on finite-difference gradients (two values per step; measured
        # 82 evaluations over the three common fits of the 50-pulsar bench array)
        res = _brent_log10_amplitude(log_likelihood, float(index), amp_b, starts)
    else:
        res = _minimise(fun, starts, pb, max_iterations, tolerance)
    x = res.x if res is not None else starts[0]
    lnl = -res.fun if res is not None else -fun(x)[0]
    err, _ = _hessian_errors(lambda y: fun(y)[1], x, pb)
    la, g = full(x)
    lnl_zero = log_likelihood(amp_b[0], g)
    return CommonFit(log10_amplitude=_finite(la, amp_b[0]), log10_amplitude_err=_finite(err[0], 0.0),
                     index=_finite(g, 13 / 3), index_err=0.0 if fixed else _finite(err[1], 0.0),
                     index_fixed=fixed, log_likelihood=_finite(lnl, 0.0),
                     statistic=_finite(max(0.0, 2 * (lnl - lnl_zero)), 0.0),
                     converged=res is not None and bool(res.success))


def _brent_log10_amplitude(log_likelihood, index, amp_bounds, starts, xatol=1e-4):
    """Maximum of ``log_likelihood(log10 A, index)`` over ``amp_bounds`` by bounded Brent search
    (``scipy.optimize.minimize_scalar``); the starts are kept when one of them is better (a flat or
    multi-peaked profile). Returns an ``OptimizeResult`` with ``x`` (length 1), ``fun`` (−ln L), ``success``."""
    # lazy: the scan imports this module for its goodness of fit and needs no optimiser (0.1 s import)
    from scipy import optimize
    def neg(la):
        try:
            v = log_likelihood(float(la), index)
        except np.linalg.LinAlgError:
            return 1e20
        return -v if np.isfinite(v) else 1e20

    out = optimize.minimize_scalar(neg, bounds=amp_bounds, method="bounded",
                                   options={"xatol": xatol, "maxiter": 200})
    best_x, best_f = float(out.x), float(out.fun)
    for x0 in starts:
        la = float(np.clip(x0[0], *amp_bounds))
        f = neg(la)
        if f < best_f - 1e-9:
            best_x, best_f = la, f
    return optimize.OptimizeResult(x=np.array([best_x]), fun=best_f, success=bool(out.success) and best_f < 1e20,
                                   nfev=int(out.nfev) + len(starts))


def amplitude_upper_limit(log_likelihood_of_log10_amplitude, bounds=(-18.0, -11.0), confidence=0.95,
                          points=24, coarse_points=16) -> float:
    """``confidence`` quantile (log10) of the amplitude under a prior uniform in amplitude on ``10**bounds``.

    ``coarse_points`` on a log10 grid over the bounds (posterior density per unit log10 A ∝ L(A) · A) find
    where the posterior mass lies; then ``points`` on a grid *linear in A* over that range (where the
    posterior density is L(A) itself, so a broad posterior reaching down to A = 0 is resolved as well as
    a narrow one) give the quantile by trapezoidal quadrature. Checked against the truncated-normal
    quantile of ``scipy.stats.truncnorm`` (tests/test_noisefit.py).
    """
    lo, hi = bounds

    def lnl_of(grid):
        v = np.array([log_likelihood_of_log10_amplitude(x) for x in grid], dtype=float)
        return np.where(np.isfinite(v), v, -np.inf)

    coarse = np.linspace(lo, hi, coarse_points)
    logw = lnl_of(coarse) + coarse * _LN10
    if not np.isfinite(logw).any():
        return float(hi)
    keep = np.flatnonzero(logw - logw.max() > np.log(1e-8))
    bottom = lo if keep[0] == 0 else coarse[keep[0] - 1]
    top = hi if keep[-1] == coarse_points - 1 else coarse[keep[-1] + 1]
    amplitudes = np.linspace(10.0**bottom, 10.0**top, points)
    lnl = lnl_of(np.log10(amplitudes))
    w = np.exp(lnl - lnl.max())
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (w[1:] + w[:-1]) * np.diff(amplitudes))])
    if not cdf[-1] > 0:
        return float(top)
    cdf /= cdf[-1]
    # a narrow posterior (a strongly detected process) may sit in a few cells: refine once over them
    inside = np.flatnonzero((cdf > 1e-4) & (cdf < 1 - 1e-4))
    if inside.size < 20:
        first = max(int(inside[0]) - 2 if inside.size else 0, 0)
        last = min(int(inside[-1]) + 2 if inside.size else points - 1, points - 1)
        amplitudes = np.linspace(amplitudes[first], amplitudes[last], points)
        lnl = lnl_of(np.log10(np.maximum(amplitudes, 10.0**lo)))
        w = np.exp(lnl - lnl.max())
        cdf = np.concatenate([[0.0], np.cumsum(0.5 * (w[1:] + w[:-1]) * np.diff(amplitudes))])
        cdf /= cdf[-1]
    return float(np.log10(np.interp(confidence, cdf, amplitudes)))


# ----------------------------------------------------------------- goodness of fit
def ks_normal(values):
    """Kolmogorov–Smirnov distance of ``values`` from N(0, 1) and its p-value, without scipy.stats.

    The distance is the two-sided ``D = max |F_n − Φ|``; the p-value is Stephens' (1970) finite-sample
    form of the Kolmogorov distribution, ``Q_KS((√n + 0.12 + 0.11/√n) D)`` (``scipy.special.kolmogorov``),
    within 7 % of the exact ``scipy.stats.kstest`` value for p > 1e-6 and n ≥ 20 (tests/test_noisefit.py).
    The scan runs this check on every pulsar, and importing scipy.stats alone costs more than the check.
    """
    x = np.sort(np.asarray(values, dtype=float))
    n = x.size
    cdf = special.ndtr(x)
    upper = np.arange(1, n + 1) / n - cdf
    lower = cdf - np.arange(n) / n
    distance = float(max(upper.max(), lower.max()))
    root = math.sqrt(n)
    return distance, float(special.kolmogorov((root + 0.12 + 0.11 / root) * distance))


def check_pulsar(weighting: PulsarWeighting, lowfreq_components=4, threshold=GOF_THRESHOLD) -> GoodnessOfFit:
    """Normality (KS against N(0,1)) and low-frequency excess (χ²) of one pulsar under its weighting's model."""
    p = weighting.pulsar
    r = p.residuals
    eps = weighting.whitened_residuals(r)
    ks_statistic, ks_pvalue = ks_normal(eps)
    span = float(p.toas[-1] - p.toas[0])
    basis = fourier_basis(p.toas, p.toas[0], span, lowfreq_components)
    proj = weighting.inner(basis, r)
    gram = weighting.inner(basis, basis)
    vals, vecs = np.linalg.eigh(0.5 * (gram + gram.T))
    keep = vals > 1e-10 * vals.max()
    z = (vecs[:, keep].T @ proj) / np.sqrt(vals[keep])
    q = float(z @ z)
    dof = int(keep.sum())
    return GoodnessOfFit(p.name, ks_statistic, ks_pvalue, q, dof, float(special.chdtrc(dof, q)), threshold)


def check_array(checks, threshold=GOF_THRESHOLD) -> ArrayCheck:
    """Combined low-frequency excess ``Σ q_p`` against χ²(Σ dof_p) (pulsars independent under the model)."""
    q = float(sum(c.lowfreq_statistic for c in checks))
    dof = int(sum(c.lowfreq_dof for c in checks))
    return ArrayCheck(q, dof, float(special.chdtrc(dof, q)) if dof else 1.0, threshold)


def goodness_of_fit(array, noise_settings: NoiseSettings, lowfreq_components=4, threshold=GOF_THRESHOLD,
                    workers=None):
    """``(list of GoodnessOfFit, ArrayCheck)`` for an array whose pulsars carry their noise model.

    One pulsar per thread (``workers``: default one per CPU), each on single-threaded BLAS: the
    products are small (n × k, k ~ 65), and threaded BLAS on them, several pulsars at once, was
    measured 8× slower (an SVD of 1000 × 65 took 84 ms instead of ~10 ms in the bench scan, where this
    check was 70 % of the whole command). Each pulsar's check runs the same operations whatever the
    number of threads, so the numbers do not depend on it."""
    def one(pulsar):
        return check_pulsar(PulsarWeighting(pulsar, array.start, array.span, noise_settings), lowfreq_components,
                            threshold)

    checks = per_pulsar_threads(one, array, workers)
    return checks, check_array(checks, threshold)


# ----------------------------------------------------------------- the whole fit
def fit_noise(array, settings: FitSettings | None = None, bounds: FitBounds | None = None, *, seed=0,
              dataset_checksum=None, common_likelihood=None, runner=None) -> NoiseFit:
    """Fit white noise, per-pulsar red noise and (optionally) a common red process to ``array``.

    Parameters
    ----------
    array : :class:`~cwsearch.model.Array` (its quoted sigmas and residuals; its noise settings are ignored)
    settings, bounds : :class:`FitSettings`, :class:`FitBounds`
    seed : int or numpy Generator (extra random optimiser starts)
    dataset_checksum : stored in the table so that it is only applied to the same dataset
    common_likelihood : ``factory(array_with_noise, red_components) -> callable(log10_amplitude, index)``;
        default :class:`UncorrelatedCommonLikelihood`
    runner : :class:`cwsearch.inference.execution.TaskRunner` for the per-pulsar fits (one task per pulsar
        and round; None: in this process). Each task gets its own random stream, drawn in this process
        before the tasks are sent, so the numbers do not depend on where the tasks run.

    Warns (:class:`NoiseFitWarning`) for pulsars fitted white only, fits that
    did not converge, and failed checks. See the module docstring.
    """
    with _small_matrix_threads():
        return _fit_noise(array, settings, bounds, seed, dataset_checksum, common_likelihood, runner)


def _fit_pulsar_task(task):
    """One pulsar's fit (:func:`_fit_one`) as a task for a worker: returns ``(fit, evaluations used)``."""
    problem, settings, bounds, common_phi, red_allowed, seed, previous, final = task
    with _small_matrix_threads():
        before = problem.evaluations
        fit = _fit_one(problem, settings, bounds, common_phi, red_allowed, np.random.default_rng(seed),
                       previous=previous, final=final)
        return fit, problem.evaluations - before


def _fit_pulsars(problems, settings, bounds, common_phi, allowed, rng, runner, previous=None, final=True):
    """Every pulsar's fit, in this process or on ``runner``; the same numbers either way."""
    seeds = rng.integers(0, 2**63 - 1, size=len(problems))
    previous = previous or [None] * len(problems)
    tasks = [(pr, settings, bounds, common_phi, ok, int(sd), prev, final)
             for pr, ok, sd, prev in zip(problems, allowed, seeds, previous)]
    before = [pr.evaluations for pr in problems]
    results = runner.map(_fit_pulsar_task, tasks) if runner is not None else [_fit_pulsar_task(t) for t in tasks]
    for pr, start, (_, used) in zip(problems, before, results):
        pr.evaluations = start + used        # a worker counted on its copy of the problem
    return [fit for fit, _ in results]


def _small_matrix_threads():
    """Single-threaded BLAS for the fit: its matrices are small (n × k, k ≈ 65), and a threaded BLAS on a
    loaded machine is then up to 100× slower than one thread (measured: 22 ms vs 0.26 ms for 200 × 65)."""
    return threadpool_limits(1, user_api="blas")


def _fit_noise(array, settings, bounds, seed, dataset_checksum, common_likelihood, runner=None):
    settings = settings or FitSettings()
    bounds = bounds or FitBounds()
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    factory = common_likelihood or UncorrelatedCommonLikelihood
    K = settings.red_components
    problems = [_PulsarProblem(PulsarLikelihood(p, array.start, array.span, K), array.span, bounds) for p in array]
    red_allowed = [settings.pulsar_red and p.n_toas >= settings.min_toas_red and K > 0 for p in array]
    for p, ok in zip(array, red_allowed):
        if settings.pulsar_red and K > 0 and not ok:
            warnings.warn(f"pulsar {p.name}: {p.n_toas} TOAs (fewer than {settings.min_toas_red}); "
                          "fitted with white noise only", NoiseFitWarning, stacklevel=2)
    evaluations = 0

    def common_phi(c):
        if c is None:
            return None
        return np.repeat(powerlaw_variance(problems[0].lk.frequencies, c.log10_amplitude, c.index, array.span), 2)

    def model_of(fits, c):
        return NoiseModel({f.name: f.noise() for f in fits}, None if c is None else c.log10_amplitude,
                          13 / 3 if c is None else c.index, K)

    common = None
    fits = None
    if settings.common and K > 0:
        fits = _fit_pulsars(problems, settings, bounds, None, [False] * len(problems), rng, runner, final=False)
        rounds = 1 + max(int(settings.iterations), 0)
        for it in range(rounds):
            like = factory(apply_noise_model(array, model_of(fits, None), check=False), K)
            start = None if common is None else [(common.log10_amplitude, common.index), (-14.5, 13 / 3)]
            common = fit_common(like, bounds, index=settings.common_index, starts=start,
                                max_iterations=settings.max_iterations, tolerance=settings.tolerance)
            evaluations += getattr(like, "evaluations", 0)
            cphi = common_phi(common)
            fits = _fit_pulsars(problems, settings, bounds, cphi, red_allowed, rng, runner,
                                previous=fits if it else None, final=it == rounds - 1)
        final_like = factory(apply_noise_model(array, model_of(fits, None), check=False), K)
        common.log_likelihood = _finite(final_like(common.log10_amplitude, common.index), common.log_likelihood)
        common.statistic = _finite(max(0.0, 2 * (common.log_likelihood -
                                                 final_like(bounds.common_log10_amplitude[0], common.index))), 0.0)
        if settings.upper_limits:
            common.log10_amplitude_95 = amplitude_upper_limit(
                lambda la: final_like(la, settings.upper_limit_index), bounds.common_log10_amplitude)
        evaluations += getattr(final_like, "evaluations", 0)
        if not common.converged:
            warnings.warn("common red process: optimiser did not converge", NoiseFitWarning, stacklevel=2)
    else:
        fits = _fit_pulsars(problems, settings, bounds, None, red_allowed, rng, runner)

    cphi = common_phi(common)
    if settings.upper_limits:
        for pr, f in zip(problems, fits):
            nvar = pr.white_variance(np.concatenate([[f.sigma_scale[b] ** 2 for b in pr.lk.backend_names],
                                                     [f.sigma_added[b] ** 2 / m2 for b, m2 in
                                                      zip(pr.lk.backend_names, pr.med2)]]))
            base = np.zeros(2 * K) if cphi is None else cphi

            def red_lnl(la, pr=pr, nvar=nvar, base=base):
                pr.evaluations += 1
                return pr.lk.evaluate(nvar, base + pr.red_phi(la, settings.upper_limit_index))[0]
            f.red_log10_amplitude_95 = _finite(amplitude_upper_limit(red_lnl, bounds.red_log10_amplitude),
                                               bounds.red_log10_amplitude[1])
    else:
        for f in fits:
            f.red_log10_amplitude_95 = float(bounds.red_log10_amplitude[1])
    evaluations += sum(pr.evaluations for pr in problems)

    model = model_of(fits, common)
    applied = apply_noise_model(array, model, check=False)
    checks, array_check = goodness_of_fit(applied, model.noise_settings(), settings.lowfreq_components,
                                          settings.gof_threshold)
    for f, c in zip(fits, checks):
        f.gof = c
        if not f.converged:
            warnings.warn(f"pulsar {f.name}: noise fit did not converge (reported as not converged)",
                          NoiseFitWarning, stacklevel=2)
        if c.flagged:
            warnings.warn(f"pulsar {f.name}: whitened residuals fail a check under the fitted model "
                          f"(normality p = {c.normality_pvalue:.2g}, low-frequency excess p = {c.lowfreq_pvalue:.2g})",
                          NoiseFitWarning, stacklevel=2)
    if array_check.flagged:
        hint = "refit the common process" if common is not None else "fit a common red process"
        warnings.warn(f"array: combined low-frequency excess (p = {array_check.pvalue:.2g}) points to an "
                      f"unmodelled common process; {hint}", NoiseFitWarning, stacklevel=2)
    return NoiseFit(fits, common, array_check, settings, bounds, dataset_checksum, evaluations)


# ----------------------------------------------------------------- applying a model
def apply_noise_model(array, model: NoiseModel, *, check=True):
    """A new Array whose pulsars carry the model's :class:`~cwsearch.model.PulsarNoise` (the input is unchanged).

    With ``check``, every pulsar of the array must be in the model
    (else :class:`~cwsearch.errors.InputError`).
    """
    if check:
        missing = [p.name for p in array if p.name not in model.pulsars]
        if missing:
            raise InputError(f"the noise model has no entry for pulsar(s) {', '.join(missing)}")
    return array.with_noise({p.name: _copy_noise(model.pulsars.get(p.name, p.noise)) for p in array})


def _copy_noise(n: PulsarNoise) -> PulsarNoise:
    return PulsarNoise(dict(n.sigma_scale), dict(n.sigma_added), n.red_log10_amplitude, n.red_index)


# ----------------------------------------------------------------- describing a model
def _file_sha256(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def describe_noise_model(array, noise, source, *, table=None, dataset_checksum=None, table_dataset_checksum=None,
             reused=None, notes=(), common_correlation=None) -> dict:
    """The JSON-ready description of the noise model ``array`` carries with engine settings ``noise``.

    ``source``: ``estimate``, ``dataset`` or ``file``; every stage writes this into its summary (key
    ``noise_model``) and the report shows it. ``table_checksum`` is the SHA-256 of the table file.
    """
    pulsars = {}
    for p in array:
        n = p.noise
        pulsars[p.name] = {
            "sigma_scale": {b: float(n.sigma_scale.get(b, 1.0)) for b in p.backend_names},
            "sigma_added_s": {b: float(n.sigma_added.get(b, 0.0)) for b in p.backend_names},
            "red_log10_amplitude": (float(n.red_log10_amplitude) if n.has_red_noise and noise.pulsar_red_noise
                                    else None),
            "red_index": float(n.red_index) if n.has_red_noise and noise.pulsar_red_noise else None,
        }
    common = None
    if noise.common_log10_amplitude is not None:
        common = {"log10_amplitude": float(noise.common_log10_amplitude), "index": float(noise.common_index),
                  "correlation": common_correlation or getattr(noise, "common_correlation", None) or "uncorrelated"}
    text = {"estimate": "estimated from the residuals (noise stage)", "dataset": "values of the dataset files",
            "file": "noise table given by the user"}[source]
    return {
        "source": source,
        "meaning": text,
        "table": str(table) if table is not None else None,
        "table_checksum": _file_sha256(table) if table is not None else None,
        "dataset_checksum": dataset_checksum,
        "table_dataset_checksum": table_dataset_checksum,
        "reused": reused,
        "settings": asdict(noise),
        "n_red_noise": int(sum(v["red_log10_amplitude"] is not None for v in pulsars.values())),
        "common": common,
        "pulsars": pulsars,
        "notes": list(notes),
    }



def stage_noise_statement(array, noise) -> dict:
    """What a stage writes as its ``noise_model``: the description the array carries (set by
    :func:`cwsearch.job.noisemodel.resolve_noise_model`), else the dataset values with ``noise``."""
    desc = getattr(array, "noise_model", None)
    return desc if desc is not None else describe_noise_model(array, noise or NoiseSettings(), "dataset")


# ----------------------------------------------------------------- the table
_TABLE_COLUMNS = [
    # name, unit, description
    ("pulsar", None, "pulsar name"),
    ("backend", None, "backend name"),
    ("n_toas", None, "TOAs from this backend"),
    ("sigma_scale", "", "white-noise scale of the quoted sigmas"),
    ("sigma_scale_err", "", "1-sigma uncertainty of sigma_scale"),
    ("sigma_added", "s", "white noise added in quadrature"),
    ("sigma_added_err", "s", "1-sigma uncertainty of sigma_added"),
    ("red_noise", None, "model choice: power-law red noise claimed for this pulsar"),
    ("red_fitted", None, "a white+red model was fitted (False: too few TOAs)"),
    ("red_log10_amplitude", "", "log10 red-noise amplitude at 1/yr (white+red fit)"),
    ("red_log10_amplitude_err", "", "quarter of the 2-sigma profile-likelihood interval"),
    ("red_log10_amplitude_low", "", "2-sigma profile-likelihood interval (2 dlnL = 4), lower end"),
    ("red_log10_amplitude_high", "", "2-sigma profile-likelihood interval, upper end"),
    ("red_index", "", "red-noise spectral index (white+red fit)"),
    ("red_index_err", "", "1-sigma uncertainty"),
    ("red_noise_statistic", "", "likelihood ratio 2 dlnL, white+red vs white"),
    ("red_log10_amplitude_95", "", "95% upper limit, prior uniform in amplitude, fixed index"),
    ("converged", None, "the optimiser converged"),
    ("normality_pvalue", "", "KS test of whitened residuals against N(0,1)"),
    ("low_frequency_pvalue", "", "chi2 test for excess low-frequency power"),
]

def noise_table(fit: NoiseFit):
    """The fitted model as an astropy Table (one row per pulsar and backend; units and meta in the header)."""
    rows = []
    for f in fit.pulsars:
        g = f.gof
        for b in f.backends:
            rows.append((f.name, b, f.n_toas[b], f.sigma_scale[b], f.sigma_scale_err[b], f.sigma_added[b],
                         f.sigma_added_err[b], f.red_noise, f.red_fitted, f.red_log10_amplitude,
                         f.red_log10_amplitude_err, f.red_log10_amplitude_low, f.red_log10_amplitude_high, f.red_index, f.red_index_err, f.red_statistic,
                         f.red_log10_amplitude_95, f.converged,
                         1.0 if g is None else g.normality_pvalue, 1.0 if g is None else g.lowfreq_pvalue))
    names = [c[0] for c in _TABLE_COLUMNS]
    dtypes = [str, str, int, float, float, float, float, bool, bool] + [float] * 8 + [bool, float, float]
    table = Table(rows=rows, names=names, dtype=dtypes)
    for name, unit, desc in _TABLE_COLUMNS:
        if unit:
            table[name].unit = unit
        table[name].description = desc
        if table[name].dtype.kind == "f":
            values = np.asarray(table[name])
            values[~np.isfinite(values)] = 0.0     # never NaN in the table
            table[name] = values
            if unit:
                table[name].unit = unit
            table[name].description = desc
    table.meta.update(fit.meta())
    return table


def write_noise_table(fit: NoiseFit, path) -> None:
    """Write :func:`noise_table` as ECSV, atomically."""
    write_table_atomic(path, noise_table(fit))


def read_noise_table(path, array, *, dataset_checksum=None) -> NoiseModel:
    """Read and validate a noise table written by :func:`write_noise_table` for ``array``.

    Refuses (:class:`~cwsearch.errors.InputError`, naming file, row and
    column): a table of another format; a pulsar or backend the array does
    not have; a repeated row; a pulsar or backend of the array without a row;
    values out of range; a table fitted on another dataset (when
    ``dataset_checksum`` is given, it must equal the table's).
    """
    file = Path(path)
    if not os.path.lexists(file):   # anything else (a FIFO, a device, a folder) is refused by the safety layer
        raise InputError("noise table not found", file=file)
    table = _read_table(file)
    meta = dict(table.meta)
    if meta.get("format") != TABLE_FORMAT:
        raise InputError(f"not a noise table written by this tool (header has no 'format: {TABLE_FORMAT}')", file=file)
    if dataset_checksum is not None:
        stored = meta.get("dataset_checksum")
        if stored is None:
            raise InputError("the noise table records no dataset checksum, so it cannot be matched to this dataset",
                             file=file)
        if str(stored) != str(dataset_checksum):
            raise InputError(f"the noise table was fitted on another dataset (dataset checksum {str(stored)[:12]}... "
                             f"in the table, {str(dataset_checksum)[:12]}... for this dataset); refit the noise",
                             file=file)
    required = ("pulsar", "backend", "sigma_scale", "sigma_added", "red_noise", "red_log10_amplitude", "red_index")
    _require_columns(table, required, file)
    pulsars = _text(table, "pulsar", file)
    backends = _text(table, "backend", file)
    scale, _ = _numeric(table, "sigma_scale", "", file)
    added, _ = _numeric(table, "sigma_added", "s", file)
    amp, _ = _numeric(table, "red_log10_amplitude", "", file)
    index, _ = _numeric(table, "red_index", "", file)
    red = _bool_column(table, "red_noise", file)
    known = {p.name: p for p in array}
    model = {}
    seen = {}
    first_row = {}
    for i, (psr, b) in enumerate(zip(pulsars, backends)):
        row = i + 1
        if psr not in known:
            raise InputError(f"unknown pulsar {psr!r} (not in the dataset)", file=file, row=row, column="pulsar")
        if b not in known[psr].backend_names:
            raise InputError(f"pulsar {psr} has no TOAs from backend {b!r} (its backends: "
                             f"{', '.join(known[psr].backend_names)})", file=file, row=row, column="backend")
        if (psr, b) in seen:
            raise InputError(f"pulsar {psr}, backend {b} repeats row {seen[psr, b]}", file=file, row=row,
                             column="backend")
        seen[psr, b] = row
        if not scale[i] > 0:
            raise InputError(f"sigma_scale must be > 0 (got {float(scale[i])!r})", file=file, row=row,
                             column="sigma_scale")
        if added[i] < 0:
            raise InputError(f"sigma_added must be >= 0 (got {float(added[i])!r})", file=file, row=row,
                             column="sigma_added")
        if psr not in model:
            model[psr] = PulsarNoise(red_log10_amplitude=float(amp[i]) if red[i] else None,
                                     red_index=float(index[i]) if red[i] else None)
            first_row[psr] = i
        else:
            j = first_row[psr]
            for col, values in (("red_noise", red), ("red_log10_amplitude", amp), ("red_index", index)):
                if values[i] != values[j]:
                    raise InputError(f"{col} of pulsar {psr} differs from its row {j + 1} (one value per pulsar)",
                                     file=file, row=row, column=col)
        model[psr].sigma_scale[b] = float(scale[i])
        model[psr].sigma_added[b] = float(added[i])
    for name, p in known.items():
        if name not in model:
            raise InputError(f"no rows for pulsar {name} of the dataset", file=file, column="pulsar")
        missing = [b for b in p.backend_names if b not in model[name].sigma_scale]
        if missing:
            raise InputError(f"no row for pulsar {name}, backend(s) {', '.join(missing)}", file=file, column="backend")
    common = meta.get("common")
    try:
        red_components = int(meta.get("red_components", 30))
        c_amp = None if not common else float(common["log10_amplitude"])
        c_idx = 13 / 3 if not common else float(common["index"])
    except (TypeError, ValueError, KeyError):
        raise InputError("header entries 'red_components' or 'common' are malformed", file=file) from None
    if red_components < 0 or (c_amp is not None and not (np.isfinite(c_amp) and np.isfinite(c_idx))):
        raise InputError("header entries 'red_components' or 'common' are out of range", file=file)
    return NoiseModel(model, c_amp, c_idx, red_components, meta.get("dataset_checksum"), meta)


def _bool_column(table, name, file):
    col = table[name]
    if np.ma.getmaskarray(col).any():
        raise InputError("empty value", file=file, row=int(np.flatnonzero(np.ma.getmaskarray(col))[0]) + 1,
                         column=name)
    if col.dtype.kind == "b":
        return np.asarray(col, dtype=bool)
    values = [str(v).strip().lower() for v in np.asarray(col)]
    out = []
    for i, v in enumerate(values):
        if v not in ("true", "false"):
            raise InputError(f"value {v[:20]!r} is not True or False", file=file, row=i + 1, column=name)
        out.append(v == "true")
    return np.array(out)


def apply_noise_table(array, path, *, dataset_checksum=None):
    """Read a noise table and apply it: ``(Array with fitted PulsarNoise, NoiseSettings for the engine)``."""
    model = read_noise_table(path, array, dataset_checksum=dataset_checksum)
    return apply_noise_model(array, model), model.noise_settings()


__all__ = ["FitBounds", "FitSettings", "PulsarFit", "CommonFit", "NoiseModel", "NoiseFit", "GoodnessOfFit",
           "ArrayCheck", "NoiseFitWarning", "describe_noise_model", "stage_noise_statement", "UncorrelatedCommonLikelihood", "fit_noise", "fit_common",
           "amplitude_upper_limit", "check_pulsar", "check_array", "goodness_of_fit", "apply_noise_model",
           "noise_table", "write_noise_table", "read_noise_table", "apply_noise_table",
           "RED_NOISE_THRESHOLD", "GOF_THRESHOLD"]
