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
* **Stopping.** Until the effective sample size of the T=1 chain after
  burn-in reaches a target, or an iteration or wall-time cap. The target
  only counts once the ladder adaptation is over and the burn-in covers it
  (the walkers start from the prior or a rough guess; before that the
  chain is not stationary and its autocorrelation time is underestimated),
  and once the T=1 log-likelihood after burn-in shows no drift between
  its two halves (:func:`stationary`).
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
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy

from ..core import fileio  # fileio.atomic_path is looked up at each call (the fault tests replace it)
from ..core.errors import InputError
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
    with ``M ≥ window_factor · τ(M)`` (Sokal's automatic window; Goodman &
    Weare 2010 for ensembles).
    """
    x = np.asarray(chain, dtype=float)
    n = x.shape[0]
    if n < 4:
        return np.full(x.shape[2], np.inf)
    x = x - x.mean(axis=0)
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
@dataclass(frozen=True)
class SamplerSettings:
    """How to run the tempered sampler (see :func:`run_sampler`)."""

    walkers: int = 32
    temperatures: int = 8
    max_temperature: float = 1e4
    ess: float = 1000.0
    max_iterations: int = 100_000
    max_time: float = float("inf")       # seconds, counted over all sessions of a resumed run
    checkpoint_every: int = 100
    adapt_iterations: int = 500          # the ladder adapts during these first iterations only
    check_every: int = 50

    def fingerprint(self):
        """Settings that a resumed run must share with its checkpoint."""
        return {"walkers": self.walkers, "temperatures": self.temperatures,
                "max_temperature": self.max_temperature, "adapt_iterations": self.adapt_end()}

    def adapt_end(self) -> int:
        return int(self.adapt_iterations)


@dataclass
class SamplerResult:
    """Outcome of :func:`run_sampler` (arrays over all finished iterations)."""

    chain: np.ndarray              # (iterations, walkers, dim) at T = 1
    log_likelihood: np.ndarray     # (iterations, walkers) at T = 1
    mean_log_likelihood: np.ndarray  # (iterations, temperatures), walker means
    betas: np.ndarray              # final ladder, β = 1 first
    iterations: int
    burn_in: int
    autocorrelation_time: np.ndarray
    ess: float
    swap_acceptance: np.ndarray
    acceptance: np.ndarray
    log_evidence: float
    log_evidence_error: float
    wall_time: float
    stopped_by: str
    evaluations: int = 0
    extra: dict = field(default_factory=dict)

    def samples(self):
        """Equally weighted T=1 samples after burn-in, thinned by about τ/2: array (N, dim)."""
        post = self.chain[self.burn_in: self.iterations]
        tau = float(np.max(self.autocorrelation_time))
        thin = max(1, int(np.ceil(tau / 2))) if np.isfinite(tau) else 1
        return post[::thin].reshape(-1, post.shape[2])


def _burn_in(n, adapt_end):
    """Burn-in: the first half of the run, and at least the ladder-adaptation phase when that
    leaves enough iterations (otherwise just the first half)."""
    burn = max(adapt_end, n // 2)
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


def _converged(n, burn, adapt_end, tau, ess, target, log_likelihood):
    """The stopping rule: the ESS target is reached on a chain that (1) is past the ladder-adaptation
    phase, which the burn-in then covers entirely (samples from an adapting, not yet stationary
    ensemble do not count), (2) is at least 10 autocorrelation times long after burn-in
    (shorter chains underestimate τ; Sokal 1997, Goodman & Weare 2010), and (3) shows no drift
    of its log-likelihood after burn-in (:func:`stationary`)."""
    return bool(n > adapt_end and burn >= adapt_end and ess >= target and (n - burn) >= 10 * np.max(tau)
                and stationary(log_likelihood[burn:n]))


def _diagnostics(chain_t1, mean_logl, n, burn, betas):
    post = chain_t1[burn:n]
    if post.shape[0] < 8:
        return np.full(chain_t1.shape[2], np.inf), 0.0, np.nan, np.inf
    tau = integrated_time(post)
    ess = post.shape[0] * post.shape[1] / float(np.max(tau))
    err = _batch_stderr(mean_logl[burn:n])
    ln_z, ln_z_err = thermodynamic_log_evidence(betas, mean_logl[burn:n].mean(axis=0), err)
    return tau, ess, ln_z, ln_z_err


def _save_checkpoint(path, state):
    with fileio.atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, **state)


def run_sampler(log_prior, log_likelihood, initial, settings: SamplerSettings, *, seed=0,
                checkpoint=None, resume=False, fingerprint=None, progress=True, callback=None,
                label="follow-up"):
    """Run ptemcee until the ESS target or a cap; returns a :class:`SamplerResult`.

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
    """
    pt = load_ptemcee()
    initial = np.asarray(initial, dtype=float)
    ntemps, nwalkers, dim = initial.shape
    if (ntemps, nwalkers) != (settings.temperatures, settings.walkers):
        raise ValueError("initial positions do not match the sampler settings")
    ident = json.dumps({"sampler": settings.fingerprint(), "dim": dim, "model": fingerprint}, sort_keys=True,
                       default=str)
    seq = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    random = np.random.RandomState(np.random.MT19937(seq))
    betas = np.geomspace(1.0, 1.0 / settings.max_temperature, ntemps) if ntemps > 1 else np.ones(1)
    pool = VectorisedPool(log_prior, log_likelihood)
    sampler = pt.Sampler(nwalkers, dim, _unused, _unused, betas=betas, pool=pool, random=random,
                         adaptation_lag=max(settings.adapt_end(), 1), adaptation_time=100)
    capacity = 1024
    chain = np.zeros((capacity, nwalkers, dim))
    logl_t1 = np.zeros((capacity, nwalkers))
    mean_logl = np.zeros((capacity, ntemps))
    n = 0
    elapsed_before = 0.0
    p0 = initial
    if resume and checkpoint is not None and _exists(checkpoint):
        with np.load(checkpoint, allow_pickle=False) as ck:
            if str(ck["fingerprint"]) != ident:
                raise InputError("the checkpoint was made with another model or other sampler settings; "
                                 "run without --resume to start afresh", file=checkpoint)
            n = int(ck["iterations"])
            capacity = max(capacity, 2 * n)
            chain = np.zeros((capacity, nwalkers, dim))
            logl_t1 = np.zeros((capacity, nwalkers))
            mean_logl = np.zeros((capacity, ntemps))
            chain[:n], logl_t1[:n], mean_logl[:n] = ck["chain"], ck["log_likelihood"], ck["mean_log_likelihood"]
            sampler._p0 = np.array(ck["positions"])
            sampler._logposterior0 = np.array(ck["log_posterior"])
            sampler._loglikelihood0 = np.array(ck["log_likelihood_all"])
            sampler._betas = np.array(ck["betas"])
            sampler._time = n
            sampler.nswap = np.array(ck["nswap"])
            sampler.nswap_accepted = np.array(ck["nswap_accepted"])
            sampler.nprop = np.array(ck["nprop"])
            sampler.nprop_accepted = np.array(ck["nprop_accepted"])
            random.set_state(("MT19937", np.array(ck["rng_key"], dtype=np.uint32), int(ck["rng_pos"]),
                              int(ck["rng_has_gauss"]), float(ck["rng_gauss"])))
            elapsed_before = float(ck["wall_time"])
            pool.evaluations = int(ck["evaluations"])
        p0 = None

    def state():
        key = random.get_state()
        return {"fingerprint": np.array(ident), "iterations": np.array(n), "chain": chain[:n],
                "log_likelihood": logl_t1[:n], "mean_log_likelihood": mean_logl[:n],
                "positions": sampler._p0, "log_posterior": sampler._logposterior0,
                "log_likelihood_all": sampler._loglikelihood0, "betas": sampler._betas,
                "nswap": sampler.nswap, "nswap_accepted": sampler.nswap_accepted, "nprop": sampler.nprop,
                "nprop_accepted": sampler.nprop_accepted, "rng_key": key[1], "rng_pos": np.array(key[2]),
                "rng_has_gauss": np.array(key[3]), "rng_gauss": np.array(key[4]),
                "wall_time": np.array(elapsed_before + time.monotonic() - start),
                "evaluations": np.array(pool.evaluations)}

    start = time.monotonic()
    adapt_end = settings.adapt_end()
    tau, ess, stopped_by = np.full(dim, np.inf), 0.0, "iterations"
    total = settings.max_iterations if np.isfinite(settings.max_iterations) else None
    with progress_bar(total=total, desc=label, enabled=progress) as bar:
        bar.update(n)
        while n < settings.max_iterations:
            if elapsed_before + time.monotonic() - start >= settings.max_time:
                stopped_by = "time"
                break
            step = settings.check_every - n % settings.check_every
            step = min(step, settings.checkpoint_every - n % settings.checkpoint_every,
                       settings.max_iterations - n)
            adapt = n < adapt_end
            if adapt:
                step = min(step, adapt_end - n)
            for p, _, logl in sampler.sample(p0, iterations=step, storechain=False, adapt=adapt):
                p0 = None
                if n >= chain.shape[0]:
                    grow = chain.shape[0]
                    chain = np.concatenate([chain, np.zeros((grow, nwalkers, dim))])
                    logl_t1 = np.concatenate([logl_t1, np.zeros((grow, nwalkers))])
                    mean_logl = np.concatenate([mean_logl, np.zeros((grow, ntemps))])
                chain[n] = p[0]
                logl_t1[n] = logl[0]
                mean_logl[n] = logl.mean(axis=1)
                n += 1
                bar.update(1)
                if callback is not None:
                    callback(n)
            if checkpoint is not None and n % settings.checkpoint_every == 0:
                _save_checkpoint(checkpoint, state())
            if n % settings.check_every == 0 or n >= settings.max_iterations:
                burn = _burn_in(n, adapt_end)
                tau, ess, _, _ = _diagnostics(chain, mean_logl, n, burn, sampler.betas)
                swap = float(np.mean(sampler.tswap_acceptance_fraction)) if ntemps > 1 else float("nan")
                done = _converged(n, burn, adapt_end, tau, ess, settings.ess, logl_t1)
                wait = "" if done or ess < settings.ess else (
                    "  (ladder adapting)" if n <= adapt_end else "  (not yet stationary)")
                bar.set_postfix_str(f"ESS {ess:.0f}/{settings.ess:.0f}  swap {swap:.2f}  "
                                    f"max lnL {logl_t1[:n].max():.1f}{wait}")
                if done:
                    stopped_by = "ess"
                    break
    if checkpoint is not None and n > 0:
        _save_checkpoint(checkpoint, state())
    burn = _burn_in(n, adapt_end)
    tau, ess, ln_z, ln_z_err = _diagnostics(chain, mean_logl, n, burn, sampler.betas)
    with np.errstate(invalid="ignore", divide="ignore"):
        swap = sampler.tswap_acceptance_fraction
        acc = sampler.acceptance_fraction.mean(axis=1)
    return SamplerResult(chain=chain[:n], log_likelihood=logl_t1[:n], mean_log_likelihood=mean_logl[:n],
                         betas=np.array(sampler.betas), iterations=n, burn_in=burn, autocorrelation_time=tau,
                         ess=float(ess), swap_acceptance=swap, acceptance=acc, log_evidence=ln_z,
                         log_evidence_error=ln_z_err, wall_time=elapsed_before + time.monotonic() - start,
                         stopped_by=stopped_by, evaluations=pool.evaluations)


def _unused(x):  # ptemcee wants per-walker functions; the vectorised pool never calls them
    raise RuntimeError("evaluated through VectorisedPool.map only")


def _exists(path):
    return Path(path).exists()


__all__ = ["load_ptemcee", "VectorisedPool", "integrated_time", "stationary", "thermodynamic_log_evidence",
           "SamplerSettings", "SamplerResult", "run_sampler"]
