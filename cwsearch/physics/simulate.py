"""Invented pulsar-timing arrays and their residuals.

Builds arrays of invented pulsars (names ``SIMPSR01``, ...) with irregular
cadence, gaps and one to three backends per pulsar, then draws post-fit
residuals: white noise, per-pulsar red noise, a common background with
Hellings–Downs correlations, and any number of binaries with Earth and
pulsar terms. Everything is deterministic given a seed.

Examples
--------
>>> from cwsearch.physics.simulate import invented_array, simulate_residuals, Binary
>>> arr = invented_array(n_pulsars=5, years=12, seed=3)
>>> binary = Binary(ra=2.0, dec=-0.3, gw_frequency=8e-9, chirp_mass=1e9, strain=1e-14)
>>> res = simulate_residuals(arr, seed=4, binaries=[binary])
>>> len(res) == len(arr)
True
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from ..data.model import Array, Pulsar, PulsarNoise
from . import waveform
from .noise import fourier_basis, hellings_downs, powerlaw_variance


@dataclass
class Binary:
    """One circular binary to inject. Angles in radians, frequency in Hz, chirp mass in Msun.

    ``pulsar_phases`` (one per pulsar, radians) override the coherent
    pulsar-term phases; ``None`` uses the pulsar distances.
    """

    ra: float
    dec: float
    gw_frequency: float
    chirp_mass: float
    strain: float
    inclination: float = 0.5
    polarization: float = 0.3
    phase: float = 1.0
    pulsar_phases: list | None = None
    evolution: str = "full"
    pulsar_term: bool = True

    def as_dict(self):
        return asdict(self)


def _rng(seed):
    return seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)


def invented_array(n_pulsars=20, years=15.0, seed=0, *, positions=None, distances=None,
                   cadence_days=14.0, toas_per_pulsar=None, sigma_median=3e-7,
                   red_noise_fraction=0.0, start_mjd=53000.0, full_span=False):
    """An invented array with noise settings but zero residuals (see :func:`simulate_residuals`).

    Parameters
    ----------
    n_pulsars : int
    years : float, total span
    seed : int or numpy Generator
    positions : optional (ra, dec) arrays [rad]; default isotropic
    distances : optional array [kpc]; default uniform in 0.3–3 kpc, 10–25 % errors
    cadence_days : mean spacing of observations
    toas_per_pulsar : fixed number of TOAs per pulsar (overrides the cadence)
    sigma_median : typical TOA uncertainty [s] (log-normal spread per backend)
    red_noise_fraction : fraction of pulsars given power-law red noise
    full_span : every pulsar observed over the whole span (else late starts)
    """
    rng = _rng(seed)
    if positions is None:
        ra = rng.uniform(0, 2 * np.pi, n_pulsars)
        dec = np.arcsin(rng.uniform(-1, 1, n_pulsars))
    else:
        ra, dec = (np.asarray(v, dtype=float) for v in positions)
    if distances is None:
        distances = rng.uniform(0.3, 3.0, n_pulsars)
    distances = np.asarray(distances, dtype=float)
    dist_err = distances * rng.uniform(0.1, 0.25, n_pulsars)
    span_days = years * 365.25
    end = start_mjd + span_days
    pulsars = []
    for i in range(n_pulsars):
        own_start = start_mjd if (full_span or i == 0) else start_mjd + rng.uniform(0, 0.4) * span_days
        if toas_per_pulsar is None:
            n = max(int((end - own_start) / cadence_days), 20)
        else:
            n = int(toas_per_pulsar)
        # irregular cadence: uniform epochs with jitter, then two gaps removed
        mjd = np.sort(rng.uniform(own_start, end, int(n * 1.15) + 4))
        mjd[0], mjd[-1] = own_start, end
        for _ in range(2):
            g0 = rng.uniform(own_start, end)
            gap = rng.uniform(30, 150)
            keep = (mjd < g0) | (mjd > g0 + gap)
            keep[0] = keep[-1] = True
            mjd = mjd[keep]
        if mjd.size > n:
            idx = np.sort(rng.choice(np.arange(1, mjd.size - 1), n - 2, replace=False))
            mjd = np.concatenate([[mjd[0]], mjd[idx], [mjd[-1]]])
        mjd = np.unique(mjd)
        n_back = int(rng.integers(1, 4))
        switch = np.sort(rng.uniform(mjd[0], mjd[-1], n_back - 1))
        backend_idx = np.searchsorted(switch, mjd)
        names = np.array([f"RCVR{k + 1}" for k in range(n_back)])
        backend_sigma = sigma_median * np.exp(rng.normal(0, 0.4, n_back))
        sigmas = backend_sigma[backend_idx] * np.exp(rng.normal(0, 0.15, mjd.size))
        noise = PulsarNoise()
        if rng.uniform() < red_noise_fraction:
            noise.red_log10_amplitude = float(rng.uniform(-14.6, -13.8))
            noise.red_index = float(rng.uniform(2.0, 5.0))
        pulsars.append(Pulsar(f"SIMPSR{i + 1:02d}", ra=ra[i], dec=dec[i], distance=distances[i],
                              distance_err=dist_err[i], mjd=mjd, residuals=np.zeros(mjd.size),
                              sigmas=sigmas, backends=names[backend_idx], noise=noise))
    return Array(pulsars)


def postfit(pulsar, residuals):
    """Residuals after a weighted least-squares fit of the pulsar's timing model."""
    design = pulsar.design_matrix
    w = 1.0 / pulsar.effective_sigmas()
    coef, *_ = np.linalg.lstsq(design * w[:, None], residuals * w, rcond=None)
    return residuals - design @ coef


def correlated_background(array, log10_amplitude, index=13 / 3, n_components=30, seed=0,
                          return_coefficients=False):
    """Pre-fit residuals of a Hellings–Downs-correlated power-law background (per pulsar list).

    Fourier coefficients at k/T_span are drawn with covariance
    ``φ_k Γ_ab`` where ``Γ_aa = 1`` and ``Γ_ab`` is the Hellings–Downs value
    (Hellings & Downs 1983). With ``return_coefficients`` also returns the
    (2K, N) coefficient array.
    """
    rng = _rng(seed)
    pos = array.positions
    orf = hellings_downs(np.clip(pos @ pos.T, -1, 1))
    np.fill_diagonal(orf, 1.0)
    chol = np.linalg.cholesky(orf)
    freqs = np.arange(1, n_components + 1) / array.span
    var = np.repeat(powerlaw_variance(freqs, log10_amplitude, index, array.span), 2)
    coeffs = (rng.standard_normal((2 * n_components, len(array))) @ chol.T) * np.sqrt(var)[:, None]
    out = [fourier_basis(p.toas, array.start, array.span, n_components) @ coeffs[:, i]
           for i, p in enumerate(array)]
    return (out, coeffs) if return_coefficients else out


def binary_residuals(array, binary: Binary):
    """Pre-fit residuals of one binary in every pulsar of the array (list of arrays)."""
    out = []
    for i, p in enumerate(array):
        phase_p = None if binary.pulsar_phases is None else binary.pulsar_phases[i]
        out.append(waveform.residuals(
            p.toas, p.position, p.distance, ra=binary.ra, dec=binary.dec,
            gw_frequency=binary.gw_frequency, chirp_mass=binary.chirp_mass, strain=binary.strain,
            inclination=binary.inclination, polarization=binary.polarization, phase=binary.phase,
            reference_time=array.reference_time, pulsar_phase=phase_p, evolution=binary.evolution,
            pulsar_term=binary.pulsar_term))
    return out


def wrong_white_noise(array, seed=0, *, scale_range=(0.8, 1.6), added_fraction=(0.0, 0.5)):
    """Draw the TRUE white noise of every backend for quoted errors that are wrong.

    Per pulsar and backend, a scale uniform in ``scale_range`` and an added
    term uniform in ``added_fraction`` × the backend's median quoted sigma,
    so that ``σ_true² = (scale σ_quoted)² + added²``. Returns
    ``{pulsar: {backend: {"sigma_scale": s, "sigma_added": q [s]}}}``
    (JSON-serialisable, for injection.json); pass it to
    :func:`simulate_residuals` as ``true_white``. The quoted sigmas of the
    array (and so of any dataset written from it) stay the wrong ones.
    """
    rng = _rng(seed)
    truth = {}
    for p in array:
        truth[p.name] = {}
        for b, name in enumerate(p.backend_names):
            median = float(np.median(p.sigmas[p.backend_index == b]))
            truth[p.name][name] = {"sigma_scale": float(rng.uniform(*scale_range)),
                                   "sigma_added": float(rng.uniform(*added_fraction) * median)}
    return truth


def true_sigmas(pulsar, true_white):
    """Per-TOA white-noise standard deviation [s] of ``pulsar`` under ``true_white`` (see :func:`wrong_white_noise`)."""
    own = true_white[pulsar.name]
    scale = np.array([own[b]["sigma_scale"] for b in pulsar.backend_names])[pulsar.backend_index]
    added = np.array([own[b]["sigma_added"] for b in pulsar.backend_names])[pulsar.backend_index]
    return np.sqrt((scale * pulsar.sigmas) ** 2 + added**2)


def simulate_residuals(array, seed=0, *, white=True, red=True, background_log10_amplitude=None,
                       background_index=13 / 3, background_components=30, binaries=(),
                       fit_timing_model=True, true_white=None):
    """Draw post-fit residuals for every pulsar of ``array`` (list of arrays, seconds).

    White noise uses each pulsar's effective sigmas (dataset white-noise
    factors applied), or the true white noise ``true_white`` of
    :func:`wrong_white_noise` when given; red noise the pulsar's power law on 30 Fourier
    frequencies of the array span; the background is Hellings–Downs
    correlated; binaries are added with their full Earth and pulsar terms.
    """
    rng = _rng(seed)
    total = [np.zeros(p.n_toas) for p in array]
    if white:
        for r, p in zip(total, array):
            sig = p.effective_sigmas() if true_white is None else true_sigmas(p, true_white)
            r += rng.standard_normal(p.n_toas) * sig
    if red:
        for r, p in zip(total, array):
            if p.noise.has_red_noise:
                freqs = np.arange(1, 31) / array.span
                var = np.repeat(powerlaw_variance(freqs, p.noise.red_log10_amplitude, p.noise.red_index,
                                                  array.span), 2)
                r += fourier_basis(p.toas, array.start, array.span, 30) @ (rng.standard_normal(60) * np.sqrt(var))
    if background_log10_amplitude is not None:
        for r, b in zip(total, correlated_background(array, background_log10_amplitude, background_index,
                                                     background_components, rng)):
            r += b
    for binary in binaries:
        for r, s in zip(total, binary_residuals(array, binary)):
            r += s
    if fit_timing_model:
        total = [postfit(p, r) for p, r in zip(array, total)]
    return total


def simulated_array(array, seed=0, **kwargs):
    """``array`` with residuals replaced by a :func:`simulate_residuals` draw."""
    return array.with_residuals(simulate_residuals(array, seed, **kwargs))


__all__ = ["Binary", "invented_array", "simulate_residuals", "simulated_array", "binary_residuals",
           "correlated_background", "postfit", "wrong_white_noise", "true_sigmas"]
