"""Parallel-tempered ensemble sampling (ptemcee) with checkpoints, stopping rule and evidence.

* **Compatibility namespace.** ptemcee 1.0.0 calls ``np.float`` and
  ``np.trapz``, which NumPy 2 removed. :func:`load_ptemcee` gives ptemcee's
  own modules a module-level ``np`` object that forwards every attribute to
  numpy and adds just those two names; numpy itself is never modified.
* **Vectorised pool.** ptemcee hands each batch of proposals (all
  temperatures × half the walkers) to ``pool.map``; :class:`VectorisedPool`
  evaluates the whole batch in one call of a vectorised prior and likelihood.
* **Checkpoints.** :func:`run_sampler` writes the complete sampler state
  (walker positions, likelihoods, ladder, swap counters, the random state,
  and the stored T=1 chain) to an ``.npz`` file every N iterations, atomically
  (temporary file + rename, no pickled objects). Resuming after any kill,
  including ``kill -9``, repeats exactly the iterations after the last
  checkpoint, with the same random numbers.
* **Stopping** (:func:`_converged`). All of: the ladder adaptation is over
  and the burn-in (the first quarter of the run, at least the adaptation)
  covers it; the chain after burn-in is at least ``min_chain_taus`` (50)
  autocorrelation times τ long (guidance of the emcee documentation); the
  effective sample size ``walkers × length / τ`` reaches the target; τ has
  stopped changing (relative change below ``tau_tolerance`` = 1 % per check,
  over the last quarter of the checks and at least ``tau_checks``); the
  T=1 log-likelihood and every parameter show no drift between the two
  halves of the chain (:func:`stationary`, :func:`drift_free`). τ is, per
  parameter, the worse of the walker-averaged estimate
  (:func:`integrated_time`, automatic window; Sokal 1997, Goodman & Weare
  2010) and the ensemble estimate (:func:`ensemble_time`), which also sees
  walkers moving together (temperature swaps make each walker's own series
  decorrelate fast while the ensemble as a whole moves slowly); the stopping
  rule uses the worst parameter. An iteration or wall-time cap stops the run
  as well, but is reported as such (``stopped_by``) with a warning, never as
  converged.
* **Exact symmetry moves.** A prior may declare a map of the parameter space
  that leaves prior and likelihood exactly unchanged (``exact_symmetry``;
  the follow-up's: ψ → ψ + π/2 with Φ0 → Φ0 + π/2, see
  :meth:`cwsearch.stages.followup.stage.Prior.exact_symmetry`). After every
  iteration each walker, at every temperature, takes that map with
  probability 1/2. The move is always accepted (the density does not change)
  and costs no likelihood call; it joins the exact copies of a posterior mode
  that stretch moves would cross only rarely, which otherwise sets the
  autocorrelation time of the parameters involved (measured: τ of ψ 450
  iterations without, see docs/design.md §8). Its random numbers come from
  the run's seed and the iteration number, so a resumed run repeats them.
* **Mode-jump moves** (:func:`mode_jump_step`). With a ``mode_jump`` proposal (for the follow-up: a
  :class:`cwsearch.inference.modejump.SkyFrequencyProposal` built from the scan's Fe maps), every
  ``mode_jump_every`` iterations every walker at every temperature proposes new values of the proposal's
  columns (sky position and frequency) drawn from q independently of where it is, the other parameters
  held fixed, and accepts with the independence Metropolis–Hastings probability ``min(1, exp(β ΔlnL + Δlnπ)
  q(x) / q(x'))`` (Hastings 1970; Tierney 1994; from memory): one vectorised likelihood call for all
  walkers. It joins sky and frequency modes that stretch moves and swaps cross only rarely. Its random
  numbers come from the run's seed and the iteration number (own stream), so a resumed run repeats them;
  the acceptance per temperature (since the last ladder change) is reported (docs/design.md §8).
* **Ladder.** ptemcee adapts the temperatures during the adaptation phase
  towards equal swap acceptance of adjacent pairs (Vousden, Farr & Mandel
  2016). At its end, every adjacent pair whose swap acceptance (over the
  last quarter of the phase) is below ``min_swap_acceptance`` (0.05) gets
  new temperatures inserted (geometrically, walkers copied from the colder
  neighbour) and the ladder adapts again, up to ``ladder_rounds`` times and
  ``max_temperatures`` temperatures. The swap acceptance of every adjacent
  pair after the final adaptation is reported; a pair still below the
  threshold gives a warning saying why.
* **Evidence.** Thermodynamic integration ``ln Z = ∫₀¹ ⟨ln L⟩_β dβ`` over the
  final ladder (trapezoid), with an error from the ladder discretisation
  (full versus every-other temperature) and the Monte-Carlo error of each
  ⟨ln L⟩_β (batch means), added in quadrature.

Examples
--------
>>> import numpy as np
>>> from cwsearch.inference.sampling import thermodynamic_log_evidence
>>> betas = np.geomspace(1e-6, 1, 60)
>>> # Gaussian likelihood N(0, 1) with Gaussian prior N(0, 3²), d = 1: ⟨ln L⟩_β in closed form
>>> mean_logl = -0.5 / (1 / 9 + betas) - 0.5 * np.log(2 * np.pi)
>>> ln_z, err = thermodynamic_log_evidence(betas, mean_logl)
>>> bool(abs(ln_z - (-0.5 * np.log(2 * np.pi * 10))) < max(err, 1e-3))
True
"""

from __future__ import annotations

import json
import os
import time
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy
from scipy.special import erfcinv

from ..core import fileio  # fileio.atomic_path is looked up at each call (the fault tests replace it)
from ..core.errors import InputError
from ..core.safeio import open_regular
from ..core.progress import progress as progress_bar

np = numpy


# ---------------------------------------------------------------- ptemcee compatibility
class _NumpyForPtemcee:
    """A stand-in for the ``np`` name inside ptemcee's modules only.

    Forwards every attribute to numpy and adds the aliases ptemcee 1.0.0 uses
    that NumPy 2 removed (``float`` = builtin float, ``trapz`` = ``numpy.trapezoid``).
    """

    float = float

    def __getattr__(self, name):
        return getattr(numpy, name)

    @staticmethod
    def trapz(y, x=None, dx=1.0, axis=-1):
        return numpy.trapezoid(y, x=x, dx=dx, axis=axis)


_COMPAT = _NumpyForPtemcee()


def load_ptemcee():
    """Import ptemcee and give its modules the compatibility namespace; returns ``ptemcee.sampler``."""
    # lazy: a heavy import, loaded only when this runs
    import ptemcee.sampler
    import ptemcee.util

    for module in (ptemcee.sampler, ptemcee.util):
        if module.np is numpy:
            module.np = _COMPAT
    return ptemcee.sampler


class VectorisedPool:
    """A pool for ptemcee whose ``map`` evaluates a whole batch in one vectorised call.

    ``log_prior(x)`` and ``log_likelihood(x)`` take an array (N, dim) and
    return (N,). The likelihood is evaluated only inside the prior support;
    outside it ptemcee gets (0, −inf) as from its own evaluator.
    """

    def __init__(self, log_prior, log_likelihood):
        self.log_prior = log_prior
        self.log_likelihood = log_likelihood
        self.evaluations = 0

    def map(self, func, positions):  # func: ptemcee's per-walker evaluator, replaced by the batch call
        x = np.asarray(positions, dtype=float)
        x = x.reshape(x.shape[0], -1)
        logp = np.asarray(self.log_prior(x), dtype=float)
        logl = np.zeros(x.shape[0])
        inside = np.isfinite(logp)
        if inside.any():
            logl[inside] = self.log_likelihood(x[inside])
            self.evaluations += int(inside.sum())
        if np.isnan(logl).any() or np.isnan(logp).any():
            raise ValueError("the likelihood or prior returned NaN")
        return list(zip(logl.tolist(), logp.tolist()))


# ---------------------------------------------------------------- diagnostics
def integrated_time(chain, window_factor=5.0):
    """Integrated autocorrelation time [iterations] of each parameter of an ensemble chain.

    ``chain`` has shape (iterations, walkers, dim). The autocorrelation
    function is averaged over walkers (FFT), summed up to the first lag M
    with ``M ≥ window_factor · τ(M)`` (Sokal's automatic window, Sokal 1997;
    Goodman & Weare 2010 for ensembles). Deviations are taken from the mean
    over all walkers and iterations, not each walker's own mean: a walker's
    own mean removes ≈ τ/N of the autocorrelation at every lag, which biases
    τ low by ≈ 2Mτ/N (≈ 20 % for a chain of 50 τ); the pooled mean removes
    only τ/(N·walkers), and walkers that have not mixed (stuck in different
    modes) show up as a long τ instead of being hidden (the between-chain
    part of a multi-chain ESS, as in Vehtari et al. 2021, from memory).
    """
    x = np.asarray(chain, dtype=float)
    n = x.shape[0]
    if n < 4:
        return np.full(x.shape[2], np.inf)
    x = x - x.mean(axis=(0, 1))
    size = 1 << int(np.ceil(np.log2(2 * n)))
    f = np.fft.rfft(x, n=size, axis=0)
    acf = np.fft.irfft(f * np.conj(f), n=size, axis=0)[:n].mean(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        acf = acf / acf[0]
    acf = np.where(np.isfinite(acf), acf, 0.0)
    taus = 2.0 * np.cumsum(acf, axis=0) - 1.0
    out = np.empty(x.shape[2])
    lags = np.arange(n)
    for j in range(x.shape[2]):
        ok = lags >= window_factor * taus[:, j]
        m = int(np.argmax(ok)) if ok.any() else n - 1
        out[j] = max(taus[m, j], 1.0)
    return out


def ensemble_time(chain, window_factor=5.0):
    """Autocorrelation time [iterations] of each parameter including the correlation *between*
    walkers: ``walkers · Var(x̄) / Var(x) · τ(x̄)``, x̄(t) the walker mean at each iteration and
    τ(x̄) its integrated time (:func:`integrated_time` of that one series). Equal to τ for
    independent walkers; larger when the ensemble moves collectively (for example the share of
    walkers in each of two modes, which only temperature swaps change), which the walker-averaged
    autocorrelation of :func:`integrated_time` does not see. Its Monte-Carlo error is that of a
    single chain (large: about ``sqrt(4 window_factor τ / N)`` relative)."""
    x = np.asarray(chain, dtype=float)
    if x.shape[0] < 4:
        return np.full(x.shape[2], np.inf)
    mean = x.mean(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = x.shape[1] * mean.var(axis=0) / x.reshape(-1, x.shape[2]).var(axis=0)
    tau = integrated_time(mean[:, None, :], window_factor)
    return np.where(np.isfinite(ratio), ratio, 1.0) * tau


def _batch_stderr(series, n_batches=20):
    """Standard error of the mean of each column of ``series`` (n, T) by batch means."""
    n = series.shape[0]
    b = max(min(n_batches, n // 2), 1)
    if b < 2:
        return np.full(series.shape[1], np.inf)
    size = n // b
    means = series[: b * size].reshape(b, size, -1).mean(axis=1)
    return means.std(axis=0, ddof=1) / np.sqrt(b)


def _ti_integral(b, m):
    """∫ ⟨ln L⟩ dβ over ascending β with ⟨ln L⟩ = A_i + B_i/β on each interval (exact both for a
    flat stretch and for the 1/β growth of hot chains), plus β_min·⟨ln L⟩(β_min) from 0 to β_min."""
    b0, b1, m0, m1 = b[:-1], b[1:], m[:-1], m[1:]
    slope = (m0 - m1) / (1.0 / b0 - 1.0 / b1)
    const = m0 - slope / b0
    return float(np.sum(const * (b1 - b0) + slope * np.log(b1 / b0)) + b[0] * m[0])


def thermodynamic_log_evidence(betas, mean_logl, stderr=None):
    """ln Z = ∫₀¹ ⟨ln L⟩_β dβ over a temperature ladder, and its error.

    Between neighbouring temperatures ⟨ln L⟩_β is interpolated as A + B/β,
    which is exact where it is flat (near a peak) and where it grows like 1/β
    (hot chains under a broad prior); from 0 to the smallest β it is taken
    as constant. The error adds in quadrature the discretisation error
    (difference to the estimate from every other temperature) and, when
    ``stderr`` (the standard errors of ``mean_logl``) is given, the
    Monte-Carlo error propagated with the trapezoid weights.
    """
    betas = np.asarray(betas, dtype=float)
    mean_logl = np.asarray(mean_logl, dtype=float)
    order = np.argsort(betas)
    b, m = betas[order], mean_logl[order]
    s = np.zeros_like(b) if stderr is None else np.asarray(stderr, dtype=float)[order]
    if b[0] <= 0 or np.any(np.diff(b) <= 0):
        raise ValueError("the ladder must have distinct β > 0")
    ln_z = _ti_integral(b, m)
    keep = np.unique(np.concatenate([np.arange(0, b.size, 2), [b.size - 1]]))
    coarse = _ti_integral(b[keep], m[keep]) if b.size > 2 else ln_z
    weights = np.zeros_like(b)
    db = np.diff(b)
    weights[:-1] += db / 2
    weights[1:] += db / 2
    weights[0] += b[0]
    mc = float(np.sqrt(np.sum((weights * s) ** 2)))
    return ln_z, float(np.hypot(ln_z - coarse, mc))


# ---------------------------------------------------------------- run driver
CHECKPOINT_FORMAT = 4   # checkpoints of other formats are refused on resume (3: exact symmetry moves, 4: mode jumps)


@dataclass(frozen=True)
class SamplerSettings:
    """How to run the tempered sampler (see :func:`run_sampler` and the module docstring)."""

    walkers: int = 32
    temperatures: int = 8
    max_temperature: float = 1e4
    ess: float = 1000.0
    max_iterations: int = 100_000
    max_time: float = float("inf")       # seconds, counted over all sessions of a resumed run
    checkpoint_every: int = 100
    adapt_iterations: int = 500          # length of each ladder-adaptation round
    check_every: int = 50
    min_chain_taus: float = 50.0         # chain after burn-in at least this many τ
    tau_tolerance: float = 0.01          # τ's relative change per check, averaged over `tau_checks` checks
    tau_checks: int = 4
    min_swap_acceptance: float = 0.05    # adjacent pairs below this get temperatures inserted
    ladder_rounds: int = 3               # at most this many insertion rounds after the first adaptation
    max_temperatures: int | None = None  # None: 3 x temperatures, at most 40
    mode_jump_every: int = 10            # a mode-jump move after every this many iterations (with a proposal)

    def fingerprint(self):
        """Settings that a resumed run must share with its checkpoint."""
        return {"walkers": self.walkers, "temperatures": self.temperatures,
                "max_temperature": self.max_temperature, "adapt_iterations": self.adapt_end(),
                "min_swap_acceptance": self.min_swap_acceptance, "ladder_rounds": self.ladder_rounds,
                "max_temperatures": self.temperature_limit(), "mode_jump_every": int(self.mode_jump_every),
                "format": CHECKPOINT_FORMAT}

    def adapt_end(self) -> int:
        return int(self.adapt_iterations)

    def temperature_limit(self) -> int:
        if self.max_temperatures is not None:
            return max(int(self.max_temperatures), self.temperatures)
        return max(min(3 * self.temperatures, 40), self.temperatures)


@dataclass
class SamplerResult:
    """Outcome of :func:`run_sampler` (arrays over all finished iterations)."""

    chain: np.ndarray              # (iterations, walkers, dim) at T = 1
    log_likelihood: np.ndarray     # (iterations, walkers) at T = 1
    mean_log_likelihood: np.ndarray  # (iterations, temperatures), walker means (NaN before a ladder change)
    betas: np.ndarray              # final ladder, β = 1 first
    iterations: int
    burn_in: int
    autocorrelation_time: np.ndarray
    ess: float
    swap_acceptance: np.ndarray    # per adjacent pair (coldest pair first), after the final adaptation
    acceptance: np.ndarray
    log_evidence: float
    log_evidence_error: float
    wall_time: float
    stopped_by: str                # "converged", "iterations" (cap) or "time" (cap)
    evaluations: int = 0
    extra: dict = field(default_factory=dict)
    log_prior: np.ndarray | None = None   # (iterations, walkers) at T = 1
    converged: bool = False
    warnings: list = field(default_factory=list)
    adaptation_end: int = 0        # iteration at which the final ladder adaptation ended
    ladder_history: list = field(default_factory=list)
    waiting_for: str = ""          # the unmet part of the stopping rule at the last check ("" when converged)
    # per temperature (β = 1 first), over the moves since the last ladder change; None without mode jumps
    mode_jump_acceptance: np.ndarray | None = None
    mode_jump_proposals: np.ndarray | None = None  # per temperature, proposals counted in the acceptance

    def chain_taus(self):
        """Length of the chain after burn-in in units of each parameter's τ."""
        return (self.iterations - self.burn_in) / np.asarray(self.autocorrelation_time, dtype=float)

    def _thin(self):
        tau = float(np.max(self.autocorrelation_time))
        return max(1, int(np.ceil(tau / 2))) if np.isfinite(tau) else 1

    def samples(self):
        """Equally weighted T=1 samples after burn-in, thinned by about τ/2: array (N, dim)."""
        post = self.chain[self.burn_in: self.iterations]
        return post[::self._thin()].reshape(-1, post.shape[2])

    def sample_details(self):
        """The samples of :meth:`samples` with, in the same order, their T=1 ``log_likelihood``,
        ``log_prior``, ``iteration`` (0-based index in the chain) and ``walker`` index: a dict."""
        thin = self._thin()
        rows = np.arange(self.burn_in, self.iterations)[::thin]
        walkers = self.chain.shape[1]
        logp = self.log_prior if self.log_prior is not None else np.zeros_like(self.log_likelihood)
        return {"samples": self.samples(), "log_likelihood": self.log_likelihood[rows].reshape(-1),
                "log_prior": logp[rows].reshape(-1), "iteration": np.repeat(rows, walkers),
                "walker": np.tile(np.arange(walkers), rows.size)}


def _burn_in(n, adapt_end):
    """Burn-in: the first quarter of the run, and at least the ladder-adaptation phase when that
    leaves enough iterations (otherwise just the first half)."""
    burn = max(adapt_end, n // 4)
    return burn if n - burn >= 8 else n // 2


def stationary(log_likelihood, z_max=3.0):
    """Whether the T=1 log-likelihood (iterations, walkers) has no drift: the means of the first
    and second halves agree within ``z_max`` standard errors (a split-chain form of Geweke's 1992
    diagnostic, from memory). Each half's standard error is ``sqrt(var · τ / size)`` with τ its
    integrated autocorrelation time (:func:`integrated_time`), so correlated samples are not
    over-counted. Catches an ensemble that is still climbing towards the posterior's bulk
    (for example from a secondary mode) although its autocorrelation time already looks short."""
    x = np.asarray(log_likelihood, dtype=float)
    half = x.shape[0] // 2
    if half < 4:
        return False
    a, b = x[:half], x[x.shape[0] - half:]
    tau_a = float(integrated_time(a[:, :, None])[0])
    tau_b = float(integrated_time(b[:, :, None])[0])
    se2 = a.var() * tau_a / a.size + b.var() * tau_b / b.size
    return bool(abs(a.mean() - b.mean()) <= z_max * np.sqrt(se2))


def drift_free(chain, z_max=3.0):
    """Whether no parameter of the chain (iterations, walkers, dim) drifts: for each, the means of the
    first and second halves agree within ``z_max`` standard errors, each ``sqrt(var · τ / size)`` with
    τ the worse of :func:`integrated_time` and :func:`ensemble_time` of that half (split-chain Geweke
    check as in :func:`stationary`, from memory). Catches an ensemble whose walkers share a slow
    collective fluctuation, such as the split between two modes, before its τ shows it."""
    x = np.asarray(chain, dtype=float)
    half = x.shape[0] // 2
    if half < 4:
        return False
    a, b = x[:half], x[x.shape[0] - half:]
    tau_a = np.maximum(integrated_time(a), ensemble_time(a))
    tau_b = np.maximum(integrated_time(b), ensemble_time(b))
    size = a.shape[0] * a.shape[1]
    se2 = a.reshape(-1, x.shape[2]).var(axis=0) * tau_a / size + b.reshape(-1, x.shape[2]).var(axis=0) * tau_b / size
    with np.errstate(invalid="ignore"):
        ok = np.abs(a.mean(axis=(0, 1)) - b.mean(axis=(0, 1))) <= z_max * np.sqrt(se2)
    return bool(np.all(ok | (se2 == 0)))


def tau_change(history, checks, grow_only=False):
    """Relative change of τ per check over the last ``checks`` checks: ``max_j |τ_j(now) −
    τ_j(checks ago)| / (checks · τ_j(now))`` (with ``grow_only``: the growth, ``τ_j(now) − τ_j(then)``,
    not its absolute value); inf with fewer checks. ``history`` is a list of τ arrays."""
    if len(history) < checks + 1:
        return float("inf")
    now, then = np.asarray(history[-1], dtype=float), np.asarray(history[-1 - checks], dtype=float)
    if not (np.all(np.isfinite(now)) and np.all(np.isfinite(then))):
        return float("inf")
    diff = now - then if grow_only else np.abs(now - then)
    return float(np.max(diff / now) / checks)


def _converged(n, burn, adapt_end, tau, ess, settings, log_likelihood, tau_history, chain=None):
    """The stopping rule (see the module docstring): ``(True, "")`` when met, else ``(False, what is
    missing)``. The parts, in order: (1) past the ladder adaptation, which the burn-in covers (samples
    from an adapting, not yet stationary ensemble do not count); (2) the chain after burn-in is at least
    ``min_chain_taus`` autocorrelation times long (shorter chains underestimate τ: Sokal 1997; the
    emcee documentation asks for 50 τ); (3) ESS target; (4) τ has stopped changing (:func:`tau_change`
    below ``tau_tolerance``: a τ that still grows with the chain is underestimated); (5) no drift of
    the log-likelihood after burn-in (:func:`stationary`)."""
    if n <= adapt_end or burn < adapt_end:
        return False, "ladder adapting"
    worst = float(np.max(tau))
    length = n - burn
    if not np.isfinite(worst) or length < settings.min_chain_taus * worst:
        have = length / worst if np.isfinite(worst) else 0.0
        return False, f"chain {have:.0f}/{settings.min_chain_taus:g} tau"
    if ess < settings.ess:
        return False, "ESS below target"
    # history rows: walker-averaged τ, then the τ used (the worse of walker-averaged and ensemble). The
    # change is taken over the last quarter of the checks (at least `tau_checks`): the ensemble part
    # scatters like a single chain, and over a longer baseline its scatter per check is smaller while a
    # real growth of τ with the chain stays visible
    worst_part = [np.asarray(h)[len(tau):] for h in tau_history]
    change = tau_change(worst_part, max(settings.tau_checks, len(worst_part) // 4))
    if not change < settings.tau_tolerance:
        return False, "tau still changing" + (f" ({100 * change:.1f} %/check)" if np.isfinite(change) else "")
    if not stationary(log_likelihood[burn:n]):
        return False, "not yet stationary"
    if chain is not None and not drift_free(chain[burn:n]):
        return False, "parameters drifting"
    return True, ""


def _diagnostics(chain_t1, mean_logl, n, burn, betas, ladder_from=0):
    """(τ, walker-averaged τ, ESS, ln Z, its error) of the T=1 chain after burn-in; τ per parameter is
    the worse of :func:`integrated_time` and :func:`ensemble_time`."""
    post = chain_t1[burn:n]
    if post.shape[0] < 8:
        return np.full(chain_t1.shape[2], np.inf), np.full(chain_t1.shape[2], np.inf), 0.0, np.nan, np.inf
    tau_walkers = integrated_time(post)
    tau = np.maximum(tau_walkers, ensemble_time(post))    # the worse of the two, per parameter
    ess = post.shape[0] * post.shape[1] / float(np.max(tau))
    rows = mean_logl[max(burn, ladder_from):n]      # only rows with the final ladder
    if rows.shape[0] < 2:
        return tau, tau_walkers, ess, np.nan, np.inf
    err = _batch_stderr(rows)
    ln_z, ln_z_err = thermodynamic_log_evidence(betas, rows.mean(axis=0), err)
    return tau, tau_walkers, ess, ln_z, ln_z_err


def extended_ladder(betas, acceptance, threshold, limit, target=0.25):
    """Insert temperatures into the adjacent pairs whose swap acceptance is below ``threshold``.

    A pair with acceptance ``a`` is split into ``k = ceil(erfcinv(a) / erfcinv(target))`` geometric
    steps (for overlapping Gaussian energy distributions the acceptance falls like ``erfc`` of the
    step in ln β; common practice, no source), the lowest pairs first, until the ladder has ``limit``
    temperatures. Returns ``(new_betas, source)``, ``source[i]`` the old temperature whose walkers
    start the new temperature ``i`` (itself, or the colder neighbour of an inserted one)."""
    betas = np.asarray(betas, dtype=float)
    acceptance = np.asarray(acceptance, dtype=float)
    need = np.zeros(acceptance.size, dtype=int)
    low = acceptance < threshold
    need[low] = np.maximum(np.ceil(erfcinv(np.clip(acceptance[low], 1e-6, 1.0)) / erfcinv(target)), 2) - 1
    alloc = np.zeros_like(need)
    room = limit - betas.size
    order = np.argsort(acceptance, kind="stable")
    while room > 0 and np.any(alloc < need):
        for i in order:
            if alloc[i] < need[i] and room > 0:
                alloc[i] += 1
                room -= 1
    new, source = [], []
    for i, b in enumerate(betas):
        new.append(b)
        source.append(i)
        if i < alloc.size and alloc[i]:
            inner = np.geomspace(b, betas[i + 1], alloc[i] + 2)[1:-1]
            new.extend(inner)
            source.extend([i] * inner.size)
    return np.array(new), np.array(source, dtype=int)


def _save_checkpoint(path, state):
    with fileio.atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, **state)


def _resized(array, rows, width=None, fill=0.0):
    """``array`` grown to ``rows`` rows (and, for 2-D, ``width`` columns, old columns dropped and NaN-filled)."""
    shape = (rows,) + array.shape[1:] if width is None else (rows, width)
    out = np.full(shape, fill)
    if width is None or width == array.shape[1]:
        out[: array.shape[0]] = array
    return out


def mode_jump_step(positions, log_posterior, log_likelihood, betas, proposal, pool, rng):
    """One independence Metropolis–Hastings move of every walker, in place; returns the accepted (T, W) mask.

    ``positions`` (T, W, dim), ``log_posterior`` = β lnL + ln π and ``log_likelihood`` (T, W) are the
    sampler's own state arrays (updated where accepted); ``betas`` (T,) the ladder; ``proposal`` has
    ``columns``, ``draw(rng, n)`` and ``log_density(values)``; ``pool`` a :class:`VectorisedPool` (one
    call for all T·W proposals). Walker k at temperature t proposes x' = x with the proposal's columns
    replaced by a draw from q, and accepts with probability
    ``min(1, exp(β_t [lnL(x') − lnL(x)] + ln π(x') − ln π(x)) · q(x) / q(x'))`` (independence sampler:
    Hastings 1970, Tierney 1994; from memory), which keeps the tempered posterior L^β π invariant."""
    ntemps, nwalkers, dim = positions.shape
    cols = list(proposal.columns)
    current = positions.reshape(-1, dim)
    trial = current.copy()
    trial[:, cols] = proposal.draw(rng, current.shape[0])
    log_u = np.log(rng.random(current.shape[0]))
    evaluated = pool.map(None, trial)
    new_logl = np.fromiter((r[0] for r in evaluated), float, count=len(evaluated))
    new_logp = np.fromiter((r[1] for r in evaluated), float, count=len(evaluated))
    beta = np.repeat(np.asarray(betas, dtype=float), nwalkers)
    old_logl = log_likelihood.reshape(-1)
    old_logp = log_posterior.reshape(-1) - beta * old_logl
    with np.errstate(invalid="ignore", over="ignore"):
        log_ratio = (beta * (new_logl - old_logl) + new_logp - old_logp
                     + proposal.log_density(current[:, cols]) - proposal.log_density(trial[:, cols]))
    accept = np.isfinite(new_logp) & (log_u < np.nan_to_num(log_ratio, nan=-np.inf))
    accept = accept.reshape(ntemps, nwalkers)
    positions[accept] = trial.reshape(ntemps, nwalkers, dim)[accept]
    log_likelihood[accept] = new_logl.reshape(ntemps, nwalkers)[accept]
    log_posterior[accept] = (beta * new_logl + new_logp).reshape(ntemps, nwalkers)[accept]
    return accept


def run_sampler(log_prior, log_likelihood, initial, settings: SamplerSettings, *, seed=0,
                checkpoint=None, resume=False, fingerprint=None, progress=True, callback=None,
                label="follow-up", symmetry="prior", mode_jump=None):
    """Run ptemcee until the stopping rule is met or a cap; returns a :class:`SamplerResult`.

    Parameters
    ----------
    log_prior, log_likelihood : callables on arrays (N, dim) -> (N,)
    initial : array (temperatures, walkers, dim), starting positions inside the prior
    seed : int or numpy SeedSequence for the sampler's random numbers
    checkpoint : path of the ``.npz`` checkpoint (None: no checkpoints)
    resume : continue from ``checkpoint`` if it exists
    fingerprint : JSON-serialisable description of the model; a checkpoint made
        with another model or other sampler settings is refused on resume
    callback : called as ``callback(iteration)`` after each iteration (tests use it
        to interrupt a run)
    symmetry : ``"prior"`` (default: the prior's ``exact_symmetry`` method if it has one), None, or a
        callable ``symmetry(positions, rng)`` that maps, in place, the walkers of ``positions``
        (temperatures, walkers, dim) chosen with ``rng`` by a map leaving prior and likelihood exactly
        unchanged (see the module docstring)
    mode_jump : None, or a proposal (``columns``, ``draw(rng, n)``, ``log_density(values)``, ``describe()``,
        e.g. :class:`cwsearch.inference.modejump.SkyFrequencyProposal`) for the mode-jump move
        (:func:`mode_jump_step`) after every ``settings.mode_jump_every`` iterations
    """
    pt = load_ptemcee()
    initial = np.asarray(initial, dtype=float)
    ntemps, nwalkers, dim = initial.shape
    if (ntemps, nwalkers) != (settings.temperatures, settings.walkers):
        raise ValueError("initial positions do not match the sampler settings")
    ident = json.dumps({"sampler": settings.fingerprint(), "dim": dim, "model": fingerprint,
                        "mode_jump": None if mode_jump is None else mode_jump.describe()}, sort_keys=True,
                       default=str)
    seq = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    random = np.random.RandomState(np.random.MT19937(seq))
    pool = VectorisedPool(log_prior, log_likelihood)
    if isinstance(symmetry, str) and symmetry == "prior":
        symmetry = getattr(log_prior, "exact_symmetry", None)
    symmetry_key = tuple(seq.spawn_key) + (0x5933,)     # the moves' own stream: seed + iteration number
    jump_key = tuple(seq.spawn_key) + (0x4A4D,)         # the mode jumps' own stream, likewise
    jump_every = max(int(settings.mode_jump_every), 1)

    def make_sampler(ladder):
        return pt.Sampler(nwalkers, dim, _unused, _unused, betas=ladder, pool=pool, random=random,
                          adaptation_lag=max(settings.adapt_end(), 1), adaptation_time=100)

    betas = np.geomspace(1.0, 1.0 / settings.max_temperature, ntemps) if ntemps > 1 else np.ones(1)
    capacity = 1024
    chain = np.zeros((capacity, nwalkers, dim))
    logl_t1 = np.zeros((capacity, nwalkers))
    logp_t1 = np.zeros((capacity, nwalkers))
    mean_logl = np.zeros((capacity, ntemps))
    ratios = np.full((capacity, max(ntemps - 1, 0)), np.nan)
    jump_proposed, jump_accepted = np.zeros(ntemps), np.zeros(ntemps)   # since the last ladder change
    n = 0
    elapsed_before = 0.0
    p0 = initial
    adapt_start, adapt_end = 0, settings.adapt_end()
    rounds, ladder_done, ladder_from = 0, ntemps < 2, 0
    ladder_history = [{"iteration": 0, "temperatures": int(ntemps), "reason": "initial geometric ladder"}]
    ladder_note = ""
    tau_history = []
    sampler = make_sampler(betas)
    if resume and checkpoint is not None and _exists(checkpoint):
        try:
            with _checkpoint_file(checkpoint) as fh, np.load(fh, allow_pickle=False) as npz:
                ck = _checked_checkpoint(npz, ident, nwalkers, dim, settings.temperature_limit(), checkpoint)
        except InputError:
            raise
        except (OSError, EOFError, ValueError, KeyError, TypeError, IndexError, OverflowError,
                zipfile.BadZipFile) as exc:
            raise InputError(f"checkpoint damaged ({type(exc).__name__}); run again without --resume to start "
                             "afresh", file=checkpoint) from None
        n = ck["iterations"]
        capacity = max(capacity, 2 * n)
        betas = ck["betas"]
        ntemps = betas.size
        chain = _resized(ck["chain"], capacity)
        logl_t1 = _resized(ck["log_likelihood"], capacity)
        logp_t1 = _resized(ck["log_prior"], capacity)
        mean_logl = _resized(ck["mean_log_likelihood"], capacity)
        ratios = _resized(ck["swap_ratios"], capacity, fill=np.nan)
        sampler = make_sampler(betas)
        sampler._p0 = ck["positions"]
        sampler._logposterior0 = ck["log_posterior"]
        sampler._loglikelihood0 = ck["log_likelihood_all"]
        sampler._betas = betas.copy()
        sampler.nswap = ck["nswap"]
        sampler.nswap_accepted = ck["nswap_accepted"]
        sampler.nprop = ck["nprop"]
        sampler.nprop_accepted = ck["nprop_accepted"]
        random.set_state(("MT19937", ck["rng_key"], ck["rng_pos"], ck["rng_has_gauss"], ck["rng_gauss"]))
        elapsed_before = ck["wall_time"]
        pool.evaluations = ck["evaluations"]
        adapt_start, adapt_end = ck["adapt_start"], ck["adapt_end"]
        rounds, ladder_done, ladder_from = ck["ladder_rounds"], ck["ladder_done"], ck["ladder_from"]
        ladder_history = ck["ladder_history"]
        ladder_note = ck["ladder_note"]
        tau_history = [row for row in ck["tau_history"]]
        jump_proposed, jump_accepted = ck["mode_jump_proposed"], ck["mode_jump_accepted"]
        p0 = None

    def state():
        key = random.get_state()
        return {"fingerprint": np.array(ident), "iterations": np.array(n), "chain": chain[:n],
                "log_likelihood": logl_t1[:n], "log_prior": logp_t1[:n], "mean_log_likelihood": mean_logl[:n],
                "swap_ratios": ratios[:n], "positions": sampler._p0, "log_posterior": sampler._logposterior0,
                "log_likelihood_all": sampler._loglikelihood0, "betas": sampler._betas,
                "nswap": sampler.nswap, "nswap_accepted": sampler.nswap_accepted, "nprop": sampler.nprop,
                "nprop_accepted": sampler.nprop_accepted, "rng_key": key[1], "rng_pos": np.array(key[2]),
                "rng_has_gauss": np.array(key[3]), "rng_gauss": np.array(key[4]),
                "wall_time": np.array(elapsed_before + time.monotonic() - start),
                "evaluations": np.array(pool.evaluations), "adapt_start": np.array(adapt_start),
                "adapt_end": np.array(adapt_end), "ladder_rounds": np.array(rounds),
                "ladder_done": np.array(ladder_done), "ladder_from": np.array(ladder_from),
                "ladder_history": np.array(json.dumps(ladder_history)), "ladder_note": np.array(ladder_note),
                "tau_history": np.array(tau_history, dtype=float).reshape(len(tau_history), 2 * dim),
                "mode_jump_proposed": jump_proposed, "mode_jump_accepted": jump_accepted}

    def pair_acceptance(lo, hi):
        rows = ratios[max(lo, 0):hi]
        if rows.shape[0] == 0 or rows.shape[1] == 0:
            return np.full(rows.shape[1], np.nan)
        with np.errstate(invalid="ignore"):
            return np.nanmean(rows, axis=0) if np.isfinite(rows).any() else np.full(rows.shape[1], np.nan)

    start = time.monotonic()
    tau, ess, stopped_by, waiting = np.full(dim, np.inf), 0.0, "iterations", "not checked yet"
    # the bar counts the stopping rule's progress (the least advanced of ESS / target and chain length /
    # (min_chain_taus τ)), in per cent, not iterations towards the cap (a run normally stops long before it)
    with progress_bar(total=100, desc=label, enabled=progress, unit="%") as bar:
        while n < settings.max_iterations:
            # the wall-time cap counts only once there are samples: a run always makes its first block
            if n > 0 and elapsed_before + time.monotonic() - start >= settings.max_time:
                stopped_by = "time"
                break
            step = settings.check_every - n % settings.check_every
            step = min(step, settings.checkpoint_every - n % settings.checkpoint_every,
                       settings.max_iterations - n)
            adapt = n < adapt_end
            if adapt:
                step = min(step, adapt_end - n)
            sampler._time = n - adapt_start     # ptemcee's adaptation decays with the time since the round began
            for p, logpost, logl, swaps in sampler.sample(p0, iterations=step, storechain=False, adapt=adapt,
                                                          swap_ratios=True):
                p0 = None
                if symmetry is not None:
                    # p is the sampler's own state array (ptemcee updates it in place): mapping walkers here
                    # moves them; their stored likelihoods and priors stay right because the map is exact
                    symmetry(p, np.random.default_rng(np.random.SeedSequence(seq.entropy,
                                                                             spawn_key=symmetry_key + (n,))))
                if mode_jump is not None and (n + 1) % jump_every == 0:
                    # likewise in place, on the state arrays (positions, log posterior, log likelihood)
                    moved = mode_jump_step(p, logpost, logl, sampler.betas, mode_jump, pool, np.random.default_rng(
                        np.random.SeedSequence(seq.entropy, spawn_key=jump_key + (n,))))
                    jump_proposed += nwalkers
                    jump_accepted += moved.sum(axis=1)
                if n >= chain.shape[0]:
                    grow = 2 * chain.shape[0]
                    chain, logl_t1, logp_t1 = _resized(chain, grow), _resized(logl_t1, grow), _resized(logp_t1, grow)
                    mean_logl, ratios = _resized(mean_logl, grow), _resized(ratios, grow, fill=np.nan)
                chain[n] = p[0]
                logl_t1[n] = logl[0]
                logp_t1[n] = logpost[0] - sampler.betas[0] * logl[0]
                mean_logl[n] = logl.mean(axis=1)
                ratios[n] = swaps
                n += 1
                if callback is not None:
                    callback(n)
            if n == adapt_end and not ladder_done:
                # end of an adaptation round: insert temperatures where adjacent pairs rarely swap
                quarter = max(settings.adapt_end() // 4, 1)
                acc = pair_acceptance(n - quarter, n)
                low = acc < settings.min_swap_acceptance
                limit = settings.temperature_limit()
                if not low.any():
                    ladder_done = True
                elif rounds >= settings.ladder_rounds:
                    ladder_done = True
                    ladder_note = f"after {rounds} rounds of inserting temperatures (ladder_rounds)"
                elif ntemps >= limit:
                    ladder_done = True
                    ladder_note = f"the ladder has reached its limit of {limit} temperatures (max_temperatures)"
                else:
                    new_betas, source = extended_ladder(sampler.betas, acc, settings.min_swap_acceptance, limit)
                    old_betas = np.array(sampler.betas)
                    old_logl = np.array(sampler._loglikelihood0)
                    old_logp = np.array(sampler._logposterior0) - old_betas[:, None] * old_logl
                    positions = np.array(sampler._p0)[source]
                    sampler = make_sampler(new_betas)
                    sampler._p0 = positions.copy()
                    sampler._loglikelihood0 = old_logl[source].copy()
                    sampler._logposterior0 = new_betas[:, None] * old_logl[source] + old_logp[source]
                    ntemps = new_betas.size
                    mean_logl = _resized(mean_logl, mean_logl.shape[0], ntemps, fill=np.nan)
                    ratios = _resized(ratios, ratios.shape[0], ntemps - 1, fill=np.nan)
                    jump_proposed, jump_accepted = np.zeros(ntemps), np.zeros(ntemps)
                    rounds += 1
                    adapt_start, adapt_end, ladder_from = n, n + settings.adapt_end(), n
                    tau_history = []
                    worst = int(np.nanargmin(acc))
                    ladder_history.append({"iteration": int(n), "temperatures": int(ntemps),
                                           "reason": f"lowest swap acceptance {acc[worst]:.3f} (pair {worst + 1})"})
            if checkpoint is not None and n % settings.checkpoint_every == 0:
                _save_checkpoint(checkpoint, state())
            if n % settings.check_every == 0 or n >= settings.max_iterations:
                burn = _burn_in(n, adapt_end)
                tau, tau_walkers, ess, _, _ = _diagnostics(chain, mean_logl, n, burn, sampler.betas, ladder_from)
                if n > adapt_end:
                    tau_history.append(np.concatenate([tau_walkers, tau]).astype(float))
                done, waiting = _converged(n, burn, adapt_end, tau, ess, settings, logl_t1, tau_history, chain)
                acc = pair_acceptance(max(adapt_end, ladder_from) if n > adapt_end else n - settings.check_every, n)
                swap = f"{np.nanmin(acc):.2f}" if acc.size and np.isfinite(acc).any() else "-"
                bar.n = 100 if done else int(100 * rule_progress(ess, tau, n, burn, settings))
                bar.set_postfix_str(f"ESS {ess:.0f}/{settings.ess:.0f}  iteration {n}  min swap {swap}  "
                                    f"T {ntemps}  max lnL {logl_t1[:n].max():.1f}"
                                    + (f"  ({waiting})" if waiting else ""))
                if done:
                    stopped_by = "converged"
                    break
    if checkpoint is not None and n > 0:
        _save_checkpoint(checkpoint, state())
    burn = _burn_in(n, adapt_end)
    tau, _, ess, ln_z, ln_z_err = _diagnostics(chain, mean_logl, n, burn, sampler.betas, ladder_from)
    converged = stopped_by == "converged"
    if not converged and n > 0:
        # the rule as it stands at the end (a cap can fall between checks)
        done, waiting = _converged(n, burn, adapt_end, tau, ess, settings, logl_t1, tau_history, chain)
    swap = pair_acceptance(max(adapt_end, ladder_from) if n > adapt_end else ladder_from, n)
    warnings = []
    if not converged:
        cap = {"iterations": f"iteration cap ({settings.max_iterations})", "time": "wall-time cap"}[stopped_by]
        warnings.append(f"the sampler stopped at its {cap} after {n} iterations before its stopping rule was met "
                        f"({waiting or 'no check yet'}); ESS {ess:.0f} of {settings.ess:g}, chain "
                        f"{(n - burn) / float(np.max(tau)) if np.isfinite(np.max(tau)) else 0:.0f} "
                        f"autocorrelation times of {settings.min_chain_taus:g}: the posterior and the Bayes factor "
                        "may not be converged")
    temps = 1.0 / np.asarray(sampler.betas)
    for i, a in enumerate(swap):
        if np.isfinite(a) and a < settings.min_swap_acceptance:
            why = ladder_note or ("the run ended during the ladder adaptation" if n <= adapt_end else
                                  "the ladder adapted above the threshold but the acceptance dropped afterwards")
            warnings.append(f"temperature swaps between T = {temps[i]:.3g} and T = {temps[i + 1]:.3g} were "
                            f"accepted in {a:.3f} of proposals (< {settings.min_swap_acceptance:g}): {why}; the "
                            "chains mix poorly there and the Bayes-factor error may be underestimated "
                            "(raise the number of temperatures or lower the maximum temperature)")
    with np.errstate(invalid="ignore", divide="ignore"):
        acc = sampler.acceptance_fraction.mean(axis=1)
    return SamplerResult(chain=chain[:n], log_likelihood=logl_t1[:n], mean_log_likelihood=mean_logl[:n],
                         betas=np.array(sampler.betas), iterations=n, burn_in=burn, autocorrelation_time=tau,
                         ess=float(ess), swap_acceptance=swap, acceptance=acc, log_evidence=ln_z,
                         log_evidence_error=ln_z_err, wall_time=elapsed_before + time.monotonic() - start,
                         stopped_by=stopped_by, evaluations=pool.evaluations, log_prior=logp_t1[:n],
                         converged=converged, warnings=warnings, adaptation_end=int(adapt_end),
                         ladder_history=ladder_history, waiting_for="" if converged else waiting,
                         mode_jump_acceptance=None if mode_jump is None else jump_accepted / np.maximum(jump_proposed, 1),
                         mode_jump_proposals=None if mode_jump is None else jump_proposed.copy())


def rule_progress(ess, tau, n, burn, settings) -> float:
    """How far the stopping rule has come, 0 to 1: the least advanced of ESS / target and of the chain
    length after burn-in over ``min_chain_taus`` autocorrelation times (the stable-τ check is not counted:
    it is a yes/no, reported beside the bar).

    >>> rule_progress(125.0, [10.0, 20.0], 1200, 200, SamplerSettings(ess=250.0))
    0.5
    """
    tau_max = float(np.max(tau)) if np.size(tau) else float("inf")
    chain_taus = (n - burn) / tau_max if np.isfinite(tau_max) and tau_max > 0 else 0.0
    frac = min(float(ess) / float(settings.ess), chain_taus / float(settings.min_chain_taus))
    return float(min(max(frac, 0.0), 1.0))


def _unused(x):  # ptemcee wants per-walker functions; the vectorised pool never calls them
    raise RuntimeError("evaluated through VectorisedPool.map only")


def _checked_checkpoint(npz, ident, nwalkers, dim, max_temps, path) -> dict:
    """The fields of a checkpoint (an open ``np.load`` of ``checkpoint.npz``), checked before any is used:
    every field present, of its kind (number, integer, text), with the shapes that the walkers, the
    dimension and the stored ladder imply, finite where the sampler needs it (a damaged or hand-made file
    must not reach ptemcee, nor ask for an array of 10^18 rows). Raises InputError ("checkpoint damaged").
    Returns plain Python numbers and arrays."""
    def bad(what):
        raise InputError(f"checkpoint damaged ({what}); run again without --resume to start afresh", file=path)

    if "fingerprint" not in npz.files or npz["fingerprint"].dtype.kind != "U" or str(npz["fingerprint"]) != ident:
        raise InputError("the checkpoint was made with another model or other sampler settings; "
                         "run without --resume to start afresh", file=path)

    def field(name):
        if name not in npz.files:
            bad(f"no {name!r}")
        return np.array(npz[name])

    def text(name):
        value = field(name)
        if value.dtype.kind != "U" or value.ndim != 0:
            bad(f"{name!r} is not text")
        return str(value)

    def integer(name, lo=0, hi=10 ** 9):
        value = field(name)
        if value.ndim != 0 or value.dtype.kind not in "iub" or not lo <= int(value) <= hi:
            bad(f"{name!r} is not an integer in [{lo}, {hi}]")
        return int(value)

    def numbers(name, shape, *, finite=True, nan=False):
        value = field(name)
        if value.dtype.kind not in "fiu" or value.shape != tuple(shape):
            bad(f"{name!r} has shape {value.shape} and type {value.dtype}, expected {tuple(shape)} numbers")
        value = value.astype(float)
        if finite and not np.all(np.isfinite(value) | (nan & np.isnan(value))):
            bad(f"{name!r} holds values that are not finite")
        if not finite and (np.any(np.isnan(value)) and not nan or np.any(value == np.inf)):
            bad(f"{name!r} holds NaN or +inf")
        return value

    out = {"iterations": integer("iterations")}
    n = out["iterations"]
    betas = field("betas")
    if betas.dtype.kind != "f" or betas.ndim != 1 or not 1 <= betas.size <= max_temps:
        bad(f"'betas' is not a ladder of 1 to {max_temps} temperatures")
    if not (np.all(np.isfinite(betas)) and np.all(betas > 0) and np.all(betas <= 1) and np.all(np.diff(betas) <= 0)):
        bad("'betas' is not a decreasing ladder in (0, 1]")
    out["betas"] = betas.astype(float)
    t = betas.size
    out["chain"] = numbers("chain", (n, nwalkers, dim))
    out["log_likelihood"] = numbers("log_likelihood", (n, nwalkers), finite=False)
    out["log_prior"] = numbers("log_prior", (n, nwalkers), finite=False)
    out["mean_log_likelihood"] = numbers("mean_log_likelihood", (n, t), finite=False, nan=True)
    out["swap_ratios"] = numbers("swap_ratios", (n, t - 1), nan=True)
    out["positions"] = numbers("positions", (t, nwalkers, dim))
    out["log_posterior"] = numbers("log_posterior", (t, nwalkers), finite=False)
    out["log_likelihood_all"] = numbers("log_likelihood_all", (t, nwalkers), finite=False)
    for name, shape in (("nswap", (t,)), ("nswap_accepted", (t,)), ("nprop", (t, nwalkers)),
                        ("nprop_accepted", (t, nwalkers))):
        out[name] = numbers(name, shape)
        if np.any(out[name] < 0):
            bad(f"{name!r} holds negative counts")
    key = field("rng_key")
    if key.dtype.kind not in "iu" or key.shape != (624,) or np.any(key < 0) or np.any(key > 2 ** 32 - 1):
        bad("'rng_key' is not a generator state")
    out["rng_key"] = key.astype(np.uint32)
    out["rng_pos"] = integer("rng_pos", 0, 624)
    out["rng_has_gauss"] = integer("rng_has_gauss", 0, 1)
    out["rng_gauss"] = float(numbers("rng_gauss", ()))
    out["wall_time"] = float(numbers("wall_time", ()))
    if out["wall_time"] < 0:
        bad("'wall_time' is negative")
    out["evaluations"] = integer("evaluations", 0, 10 ** 15)
    for name in ("adapt_start", "adapt_end", "ladder_rounds", "ladder_from"):
        out[name] = integer(name)
    out["ladder_done"] = bool(integer("ladder_done", 0, 1))
    try:
        history = json.loads(text("ladder_history"))
    except ValueError:
        bad("'ladder_history' is not JSON")
    if not isinstance(history, list) or not all(isinstance(h, dict) for h in history):
        bad("'ladder_history' is not a list of records")
    out["ladder_history"] = history
    out["ladder_note"] = text("ladder_note")
    tau = field("tau_history")
    if tau.dtype.kind not in "fiu" or tau.ndim != 2 or tau.shape[1] != 2 * dim or tau.shape[0] > 10 ** 6:
        bad("'tau_history' has the wrong shape")
    out["tau_history"] = tau.astype(float)
    for name in ("mode_jump_proposed", "mode_jump_accepted"):
        out[name] = numbers(name, (t,))
        if np.any(out[name] < 0):
            bad(f"{name!r} holds negative counts")
    if np.any(out["mode_jump_accepted"] > out["mode_jump_proposed"]):
        bad("'mode_jump_accepted' exceeds 'mode_jump_proposed'")
    return out


def _exists(path):
    return os.path.lexists(path)


def _checkpoint_file(path):
    """The checkpoint opened through :mod:`cwsearch.core.safeio` (a regular file inside its folder, size
    cap): a FIFO, a device or a symlink elsewhere is refused before numpy reads anything."""
    fh, _ = open_regular(path, Path(path).parent, what="checkpoint")
    return fh


__all__ = ["rule_progress", "load_ptemcee", "VectorisedPool", "mode_jump_step", "integrated_time", "ensemble_time", "stationary", "drift_free", "tau_change", "extended_ladder",
           "thermodynamic_log_evidence", "SamplerSettings", "SamplerResult", "run_sampler"]
