"""95 % strain upper limits versus frequency and sky position; chirp-mass limits for galaxies.

At one sky position and GW frequency the Earth-term data enter only through
the 4-vector N and the 4×4 matrix M of :func:`cwsearch.physics.fstat.network_vectors`
(Ellis, Siemens & Creighton 2012). With the amplitude vector ``b`` of
:func:`cwsearch.physics.fstat.parameters_to_amplitudes` the log likelihood ratio is

``ln Λ(b) = b·N − ½ bᵀ M b``.

``b`` is linear in the strain: ``b = x u(cos ι, ψ, Φ0)`` with
``x = h0 / (2π f)``. For fixed angles ``ln Λ = x a − ½ x² c`` with
``a = u·N`` and ``c = uᵀ M u``, a Gaussian in x. So the posterior of h0
under a uniform prior on h0 ≥ 0, marginalised over cos ι, ψ, Φ0, is a
*mixture of truncated normals*, one per node of a deterministic angle grid
(Gauss–Legendre in cos ι, uniform periodic grids in ψ and Φ0): the h0
integral is done exactly (error functions), only the three angles are
quadrature. :func:`bayesian_limit` takes the 95 % quantile of that mixture.

The frequentist limit (:func:`frequentist_limit`) is the h0 at which 95 %
of Earth-term signals with random orientation give 2Fe above the observed
value, using ``2Fe ~ χ'²(4, ρ²)``, ``ρ² = bᵀ M b`` (non-central χ²,
Ellis, Siemens & Creighton 2012), averaged over the same kind of angle grid.

Noise model: the run's (:func:`cwsearch.physics.correlated.array_noise`). With a
Hellings–Downs (or other correlated) common process N and M use the array
inner product (:func:`cwsearch.physics.correlated.correlated_network`: X, Y
of the weighted data, M minus the cross-pulsar blocks), so both limits and
the galaxies' chirp-mass limits are conditional on the correlated background;
``2Fe ~ χ'²(4, ρ²)`` still holds exactly with the true covariance.

Sky averages treat the source position as uniform over the sky (HEALPix
pixels have equal areas): the Bayesian sky-averaged limit is the 95 %
quantile of the posterior marginalised over pixels (each pixel weighted by
its evidence under the common uniform h0 prior); the frequentist one is the
h0 at which the detection probability averaged over pixels and orientation
reaches 95 %. Both come from each pixel's CDF tabulated on a relative grid
around its own limit and interpolated (relative accuracy ~1e-3).

:func:`run_limits` is the stage entry point (``cwsearch limits``); the
pixel × frequency work is fanned out by :mod:`cwsearch.inference.execution`.

Examples
--------
>>> import numpy as np
>>> from cwsearch.stages.limits.stage import bayesian_limit, frequentist_limit
>>> m = np.diag([4.0, 4.0, 3.0, 3.0]) * 1e16      # sensitive 4×4 M (s⁻²)
>>> n = np.zeros(4)                               # data with nothing in it
>>> h95 = bayesian_limit(n, m, 1e-8)
>>> f"{h95:.2e}"
'5.19e-16'
>>> hf = frequentist_limit(n, m, 1e-8, fe=2.0)
>>> bool(hf > 0)
True
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.table import Table

from ...core.errors import InputError
from ...core.fileio import write_json_atomic, write_table_atomic
from ...core.progress import progress as progress_bar
from ...data.catalog import read_catalog
from ...data.healpix_fits import write_healpix_map
from ...inference.execution import TaskRunner
from ...inference.upper_limits import (  # noqa: F401  (kernels shared with the targets stage)
    COS_PANELS, FREQUENTIST_GRID, LEVEL, QUADRATURE, RELATIVE_GRID, angle_grid, bayes_rows, bayesian_limit,
    frequentist_limit, frequentist_rows, ncx2_sf, posterior_cdf)
from ...inference.sampling import run_sampler, SamplerSettings
from ...inference.noisefit import stage_noise_statement
from ...physics import fstat, sky
from ...physics.fstat import default_max_frequency, frequency_grid, parameters_to_amplitudes
from ...physics.correlated import array_noise
from ...physics.noise import NoiseSettings
from ...physics.waveform import antenna_pattern, chirp_mass_for_strain
from ...inference.pulsar_term_limits import DEFAULT_DRAWS, distance_draws, pulsar_term_rows
from .options import Galaxy, LimitsOptions, METHODS, parse_galaxies  # the options live beside (standard library)


# ----------------------------------------------------------------------------- sky averages
def _interp_on_relative_grid(h, limits, table, at_zero):
    """Per-pixel probability at absolute strain ``h`` (scalar) from the tabulated values; (S,).

    Between grid points: cubic Hermite in log strain with the tabulated
    derivatives. Below the grid: linear in strain from the value at zero.
    Above: the last grid value (≈ 1).
    """
    rel = h / limits
    logr = np.log(RELATIVE_GRID)
    out = np.empty(limits.shape)
    low = rel <= RELATIVE_GRID[0]
    high = rel >= RELATIVE_GRID[-1]
    mid = ~(low | high)
    if np.any(mid):
        lr = np.log(rel[mid])
        idx = np.clip(np.searchsorted(logr, lr) - 1, 0, logr.size - 2)
        step = logr[idx + 1] - logr[idx]
        t = (lr - logr[idx]) / step
        v = table[mid]
        rows = np.arange(v.shape[0])
        v0, d0 = v[rows, idx, 0], v[rows, idx, 1]
        v1, d1 = v[rows, idx + 1, 0], v[rows, idx + 1, 1]
        t2, t3 = t * t, t * t * t
        out[mid] = ((2 * t3 - 3 * t2 + 1) * v0 + (t3 - 2 * t2 + t) * step * d0
                    + (-2 * t3 + 3 * t2) * v1 + (t3 - t2) * step * d1)
    if np.any(low):
        t = rel[low] / RELATIVE_GRID[0]
        out[low] = (1 - t) * at_zero[low] + t * table[low, 0, 0]
    if np.any(high):
        out[high] = table[high, -1, 0]
    return np.clip(out, 0.0, 1.0)


def _solve_mixture(scales, weights, table, at_zero, level):
    """Strain at which Σ_s weights_s value_s(h) = level (bisection in log h).

    ``scales`` are the per-pixel tabulation scales (see :data:`RELATIVE_GRID`).
    """
    scales, weights = np.asarray(scales, dtype=float), np.asarray(weights, dtype=float)
    at_zero = np.asarray(at_zero, dtype=float)
    used = weights > 0
    if not np.all(np.isfinite(scales[used])):
        return np.inf
    scales, weights, table, at_zero = scales[used], weights[used], table[used], at_zero[used]
    if scales.size == 0:
        return np.inf
    weights = weights / weights.sum()

    def total(h):
        return float(weights @ _interp_on_relative_grid(h, scales, table, at_zero))

    if float(weights @ at_zero) >= level:
        return 0.0
    lo = float(scales.min() * RELATIVE_GRID[0])
    hi = float(scales.max() * RELATIVE_GRID[-1])
    if total(lo) >= level:
        return lo
    if total(hi) < level:
        return np.inf
    for _ in range(200):
        mid = math.sqrt(lo * hi)
        if total(mid) >= level:
            hi = mid
        else:
            lo = mid
        if hi / lo - 1 < 1e-10:
            break
    return hi


def sky_averaged_bayes(x95, logz, table, level=LEVEL):
    """Sky-marginalised Bayesian limit from per-pixel results (equal-area pixels, uniform sky).

    Each pixel's posterior enters with weight ∝ its evidence under the
    common uniform strain prior.
    """
    x95, logz = np.asarray(x95), np.asarray(logz)
    if np.any(~np.isfinite(logz)):
        return np.inf
    weights = np.exp(logz - logz.max())
    return _solve_mixture(x95, weights, np.asarray(table), np.zeros(x95.size), level)


def sky_averaged_frequentist(scale, p0, table, level=LEVEL):
    """Frequentist limit with the detection probability averaged over pixels and orientation.

    ``scale``, ``p0``, ``table`` as returned by :func:`frequentist_rows`.
    """
    scale = np.asarray(scale)
    return _solve_mixture(scale, np.ones(scale.size), np.asarray(table), np.asarray(p0), level)


# ----------------------------------------------------------------------------- galaxies
def galaxy_chirp_mass_limit(strain_limit, gw_frequency, distance_mpc):
    """Chirp mass [Msun] at which a binary at ``distance_mpc`` would have strain ``strain_limit``.

    Inverts ``h0 = 2 (G Mc)^(5/3) (π f)^(2/3) / (c⁴ d_L)`` (Sesana & Vecchio
    2010) through :func:`cwsearch.physics.waveform.chirp_mass_for_strain`.

    >>> f"{galaxy_chirp_mass_limit(2.76e-15, 1e-8, 100.0):.3g}"
    '1e+09'
    """
    return chirp_mass_for_strain(strain_limit, gw_frequency, distance_mpc)


def read_catalog_galaxies(path, select):
    """Galaxies named in ``select`` from a catalogue (ECSV or CSV, read by :func:`cwsearch.data.catalog.read_catalog`).

    ``select``: names, each item may hold several separated by commas.
    Distances come from the ``distance`` column [Mpc] or, where only a
    redshift is given, from Planck18 (as in the hosts stage).
    """
    names = [s.strip() for item in (select or ()) for s in str(item).split(",") if s.strip()]
    if not names:
        raise InputError("--catalog needs --select NAME[,NAME..] naming the galaxies to use")
    catalog = read_catalog(path)
    index = {str(n): i for i, n in enumerate(catalog.name)}
    out = []
    for name in names:
        if name not in index:
            raise InputError(f"galaxy {name!r} (from --select) is not in the catalogue", file=path, column="name")
        i = index[name]
        out.append(Galaxy(name, float(catalog.ra[i]), float(catalog.dec[i]), float(catalog.distance[i])))
    return out


# ----------------------------------------------------------------------------- Monte Carlo cross-checks
def _unit_amplitudes(cos_inclination, polarization, phase):
    return parameters_to_amplitudes(2 * np.pi, cos_inclination, polarization, phase, 1.0)


def log_likelihood_ratio(nvec, mmat, gw_frequency, strain, cos_inclination, polarization, phase):
    """Earth-term ``ln Λ = b·N − ½ bᵀ M b`` for parameter arrays (broadcast), b from
    :func:`cwsearch.physics.fstat.parameters_to_amplitudes`."""
    b = parameters_to_amplitudes(strain, cos_inclination, polarization, phase, gw_frequency)
    return b @ np.asarray(nvec, dtype=float) - 0.5 * np.einsum("...i,ij,...j->...", b, np.asarray(mmat), b)


def importance_sampled_limit(nvec, mmat, gw_frequency, *, n_samples=400_000, n_batches=20, seed=0,
                             level=LEVEL):
    """95 % strain limit by importance sampling over (h0, cos ι, ψ, Φ0); returns ``(h95, error)``.

    An independent Monte Carlo evaluation of the same posterior as
    :func:`bayesian_limit` (uniform h0, cos ι, ψ, Φ0): angles are drawn from
    their prior, h0 uniformly below a cap where ``ln Λ < −40``, each draw is
    weighted by Λ times the proposal width. The error is the spread of the
    quantile over ``n_batches`` independent batches divided by √n_batches.
    """
    rng = np.random.default_rng(seed)
    nvec = np.asarray(nvec, dtype=float)
    mmat = np.asarray(mmat, dtype=float)
    scale = 2 * np.pi * gw_frequency
    per_batch = int(n_samples) // int(n_batches)
    all_x, all_logw, quantiles = [], [], []
    for _ in range(int(n_batches)):
        ci = rng.uniform(-1, 1, per_batch)
        psi = rng.uniform(0, np.pi, per_batch)
        phase = rng.uniform(0, np.pi, per_batch)
        u = _unit_amplitudes(ci, psi, phase)
        a = u @ nvec
        c = np.einsum("ni,ij,nj->n", u, mmat, u)
        cap = (a + np.sqrt(a * a + 80.0 * c)) / c
        x = rng.uniform(0, 1, per_batch) * cap
        logw = x * a - 0.5 * x * x * c + np.log(cap)
        quantiles.append(_weighted_quantile(x, logw, level))
        all_x.append(x)
        all_logw.append(logw)
    q = _weighted_quantile(np.concatenate(all_x), np.concatenate(all_logw), level)
    err = np.std(quantiles, ddof=1) / np.sqrt(len(quantiles))
    return float(q * scale), float(err * scale)


def _weighted_quantile(x, logw, level):
    order = np.argsort(x)
    w = np.exp(logw[order] - logw.max())
    cum = np.cumsum(w)
    return float(x[order][np.searchsorted(cum, level * cum[-1])])


def sampler_limit(nvec, mmat, gw_frequency, *, seed=0, ess=2000.0, progress=False, level=LEVEL):
    """95 % strain limit from the follow-up sampler (:func:`cwsearch.inference.sampling.run_sampler`, ptemcee)
    run on the Earth-term ``ln Λ`` with uniform priors on h0, cos ι, ψ, Φ0.

    Returns ``(h95, error, details)``; the error is ``√(p(1−p)/ESS)`` divided
    by the posterior density at the quantile (estimated from the samples).
    """
    nvec = np.asarray(nvec, dtype=float)
    mmat = np.asarray(mmat, dtype=float)
    u, _ = angle_grid(*QUADRATURE["fast"])
    a = u @ nvec
    c = np.einsum("ni,ij,nj->n", u, mmat, u)
    x_cap = float(np.max((a + np.sqrt(a * a + 80.0 * c)) / c))
    lower = np.array([0.0, -1.0, 0.0, 0.0])
    upper = np.array([x_cap, 1.0, np.pi, np.pi])

    def log_prior(p):
        inside = np.all((p >= lower) & (p <= upper), axis=1)
        return np.where(inside, 0.0, -np.inf)

    def log_likelihood(p):
        b = _unit_amplitudes(p[:, 1], p[:, 2], p[:, 3]) * p[:, :1]
        return b @ nvec - 0.5 * np.einsum("ni,ij,nj->n", b, mmat, b)

    settings = SamplerSettings(walkers=32, temperatures=4, max_temperature=50.0, ess=float(ess),
                               max_iterations=20_000, adapt_iterations=200, check_every=50)
    rng = np.random.default_rng(seed)
    initial = rng.uniform(lower, upper, size=(settings.temperatures, settings.walkers, 4))
    initial[..., 0] *= 0.2
    result = run_sampler(log_prior, log_likelihood, initial, settings, seed=seed, progress=progress,
                         label="limits check")
    x = result.samples()[:, 0]
    q = float(np.quantile(x, level))
    density = 0.02 / max(float(np.quantile(x, level + 0.01) - np.quantile(x, level - 0.01)), 1e-300)
    err = np.sqrt(level * (1 - level) / max(result.ess, 1.0)) / density
    scale = 2 * np.pi * gw_frequency
    details = {"ess": float(result.ess), "iterations": int(result.iterations), "stopped_by": result.stopped_by}
    return q * scale, float(err * scale), details


# ----------------------------------------------------------------------------- the stage
#: default highest frequency of the limits stage [Hz] (below the scan's Nyquist-like cap)
DEFAULT_FMAX = 1e-7
#: pixel × frequency rows per task
ROWS_PER_TASK = 48


@dataclass
class LimitsResult:
    """What :func:`run_limits` returns; every table is also written to ``run_dir/limits/``."""

    frequencies: np.ndarray
    pixel_limits: np.ndarray              # (N_pix, N_freq) strain_95 of the primary method
    frequency_limits: object              # astropy Table
    sky_limits: object                    # astropy Table
    galaxy_limits: object | None          # astropy Table or None
    summary: dict
    files: dict = field(default_factory=dict)
    pixel_limits_frequentist: np.ndarray | None = None


def _limits_task(task):
    """Worker entry point: limits for a chunk of (N, M) rows, or (``pulsar_term``) the pulsar-term limits
    of a block of sky positions at every frequency. Pure function of its input."""
    if task.get("pulsar_term"):
        proj = fstat.Projections(task["frequencies"], task["x"], task["y"], task["z"], None)
        return {"pulsar_term": pulsar_term_rows(proj, task["fplus"], task["fcross"], task["odp"], task["distances"],
                                                task["uniform"], task["distance_errors"],
                                                corrections=task["corrections"], level=task["level"],
                                                grid=task["grid"])}
    out = {}
    if task["bayes"]:
        x95, logz, table = bayes_rows(task["nvec"], task["mmat"], level=task["level"], grid=task["grid"])
        out["bayes"] = (x95, logz, table)
    if task["frequentist"]:
        out["frequentist"] = frequentist_rows(task["mmat"], task["two_fe"], task["dof"], level=task["level"])
    return out


def _network_dof(mmat):
    """Degrees of freedom of 2Fe per row: the rank of M (4, or 2 for a single pulsar)."""
    eig = np.linalg.eigvalsh(mmat)
    top = np.max(eig, axis=-1, keepdims=True)
    return np.sum(eig > 1e-10 * np.maximum(top, 1e-300), axis=-1).astype(np.int64)


def _pulsar_term_tasks(proj, fplus, fcross, odp, array, draws, seed, noise, quadrature, level):
    """The pulsar-term tasks (blocks of sky positions at every frequency) and their weights."""
    distances, uniform = distance_draws([p.distance for p in array], [p.distance_err for p in array], draws, seed)
    errors = np.array([p.distance_err for p in array])
    corrections = None
    if noise is not None and noise.correlated:
        corrections = np.ascontiguousarray(noise.corrections(proj.frequencies))
    n_pos, n_freq = fplus.shape[0], proj.frequencies.size
    per_task = max(1, ROWS_PER_TASK // (n_freq * max(1, draws // 8)))
    tasks, weights = [], []
    for s0 in range(0, n_pos, per_task):
        s1 = min(n_pos, s0 + per_task)
        tasks.append({"pulsar_term": True, "frequencies": proj.frequencies, "x": proj.x, "y": proj.y, "z": proj.z,
                      "fplus": fplus[s0:s1], "fcross": fcross[s0:s1], "odp": odp[s0:s1], "distances": distances,
                      "uniform": uniform, "distance_errors": errors, "corrections": corrections,
                      "grid": QUADRATURE[quadrature], "level": float(level)})
        weights.append((s1 - s0) * n_freq * draws)
    return tasks, weights


def compute_limits(proj, ra, dec, *, method="bayes", quadrature="standard", workers=1, scheduler=None,
                   progress=False, level=LEVEL, noise=None, pulsar_term=False, pulsar_term_draws=DEFAULT_DRAWS,
                   seed=0, array=None):
    """Per-position limits from projections at every frequency of ``proj``.

    Parameters
    ----------
    proj : :class:`cwsearch.physics.fstat.Projections`
    ra, dec : arrays (S,) [rad] of sky positions (pixel centres, galaxies)
    method, quadrature : as in :class:`LimitsOptions`
    noise : the run's :class:`cwsearch.physics.correlated.ArrayNoise` that made ``proj``
        (None: per-pulsar projections); with a correlated common process N and M carry
        the cross-pulsar terms (:func:`cwsearch.physics.correlated.correlated_network`).
    workers, scheduler : the task runner (:class:`cwsearch.inference.execution.TaskRunner`)
    pulsar_term, pulsar_term_draws, seed, array : the Bayesian limit with the pulsar term, pulsar
        distances of ``array`` marginalised by ``pulsar_term_draws`` draws from the stream ``seed``
        (:mod:`cwsearch.inference.pulsar_term_limits`); the Earth-term one is then kept as
        ``bayes_earth_term`` (and its ``_x``, ``_log_evidence``, ``_table``), with ``bayes_mc_error``
        (strain) and ``bayes_ess`` (effective draws). The frequentist limit stays Earth-term.

    Returns a dict of (S, F) arrays in strain: ``bayes`` (h95), ``bayes_log_evidence``,
    ``bayes_table`` (S, F, K, 2) in units of x; ``frequentist``, ``frequentist_p0``,
    ``frequentist_scale``, ``frequentist_table``; and ``fe`` (S, F); plus the task runner's description (key ``engine``, kept for old run folders).
    """
    want_bayes = method in ("bayes", "both")
    want_freq = method in ("frequentist", "both")
    fplus, fcross, odp = antenna_pattern(np.atleast_1d(ra), np.atleast_1d(dec), proj.positions)
    if noise is None:
        nvec, mmat = fstat.network_vectors(proj, fplus, fcross)
        fe = fstat.fe_statistic(proj, fplus, fcross)
    else:
        nvec, mmat = noise.network(proj, fplus, fcross)
        fe = noise.fe_sky(proj, fplus, fcross).fe_map
    n_pos, n_freq = fe.shape
    rows_n = nvec.reshape(-1, 4)
    rows_m = mmat.reshape(-1, 4, 4)
    rows_fe = fe.reshape(-1)
    rows_dof = _network_dof(rows_m)
    n_rows = rows_n.shape[0]
    tasks, weights = [], []
    for start in range(0, n_rows, ROWS_PER_TASK):
        sl = slice(start, min(start + ROWS_PER_TASK, n_rows))
        tasks.append({"nvec": rows_n[sl].copy(), "mmat": rows_m[sl].copy(), "two_fe": 2.0 * rows_fe[sl],
                      "dof": rows_dof[sl].copy(), "bayes": want_bayes, "frequentist": want_freq,
                      "grid": QUADRATURE[quadrature], "level": float(level)})
        weights.append(sl.stop - sl.start)
    pt_tasks = []
    if pulsar_term and want_bayes:
        if array is None:
            raise ValueError("the pulsar-term limit needs the array (pulsar distances)")
        pt_tasks, pt_weights = _pulsar_term_tasks(proj, fplus, fcross, odp, array, int(pulsar_term_draws), seed,
                                                  noise, quadrature, level)
        tasks += pt_tasks
        weights += pt_weights
    n_earth = len(tasks) - len(pt_tasks)
    with TaskRunner(workers=workers, scheduler=scheduler) as runner:
        where = runner.describe()
        with progress_bar(total=sum(weights), desc="limits (pixel x frequency)", enabled=progress,
                          unit="px") as bar:
            results = runner.map(_limits_task, tasks, weights=weights, on_done=bar.update)
    pt_results, results = results[n_earth:], results[:n_earth]
    scale = 2 * np.pi * proj.frequencies[None, :]
    out = {"fe": fe, "runner": where}
    if want_bayes:
        x95 = np.concatenate([r["bayes"][0] for r in results]).reshape(n_pos, n_freq)
        out["bayes"] = x95 * scale
        out["bayes_x"] = x95
        out["bayes_log_evidence"] = np.concatenate([r["bayes"][1] for r in results]).reshape(n_pos, n_freq)
        out["bayes_table"] = np.concatenate([r["bayes"][2] for r in results]).reshape(n_pos, n_freq, -1, 2)
    if want_freq:
        x95 = np.concatenate([r["frequentist"][0] for r in results]).reshape(n_pos, n_freq)
        out["frequentist"] = x95 * scale
        out["frequentist_p0"] = np.concatenate([r["frequentist"][1] for r in results]).reshape(n_pos, n_freq)
        out["frequentist_scale"] = np.concatenate([r["frequentist"][2] for r in results]).reshape(n_pos, n_freq)
        out["frequentist_table"] = np.concatenate([r["frequentist"][3] for r in results]).reshape(
            n_pos, n_freq, -1, 2)
    if pt_results:
        for key in ("bayes", "bayes_x", "bayes_log_evidence", "bayes_table"):
            out[key.replace("bayes", "bayes_earth_term", 1)] = out[key]
        x95, logz, err, ess, table = (np.concatenate([r["pulsar_term"][k] for r in pt_results]) for k in range(5))
        out["bayes"] = x95 * scale
        out["bayes_x"] = x95
        out["bayes_log_evidence"] = logz
        out["bayes_table"] = table
        out["bayes_mc_error"] = err * scale
        out["bayes_ess"] = ess
        out["pulsar_term"] = {"draws": int(pulsar_term_draws), "seed": int(seed)}
    return out


def _sky_averages(res, frequencies, n_pix, level=LEVEL):
    """Sky-averaged limits per frequency (first ``n_pix`` positions are the HEALPix pixels)."""
    out = {}
    scale = 2 * np.pi * np.asarray(frequencies)
    if "bayes" in res:
        out["bayes"] = np.array([
            sky_averaged_bayes(res["bayes_x"][:n_pix, f], res["bayes_log_evidence"][:n_pix, f],
                               res["bayes_table"][:n_pix, f], level) for f in range(len(frequencies))]) * scale
    if "bayes_earth_term" in res:
        out["bayes_earth_term"] = np.array([
            sky_averaged_bayes(res["bayes_earth_term_x"][:n_pix, f], res["bayes_earth_term_log_evidence"][:n_pix, f],
                               res["bayes_earth_term_table"][:n_pix, f], level)
            for f in range(len(frequencies))]) * scale
    if "frequentist" in res:
        out["frequentist"] = np.array([
            sky_averaged_frequentist(res["frequentist_scale"][:n_pix, f], res["frequentist_p0"][:n_pix, f],
                                     res["frequentist_table"][:n_pix, f], level)
            for f in range(len(frequencies))]) * scale
    return out


def _positive_min(pixel_limits):
    """Per column (frequency), the lowest positive per-pixel limit (NaN if none): an empty frequentist
    limit (0, see :func:`_best_pixel`) is not a best sky position."""
    x = np.asarray(pixel_limits, dtype=float)
    m = np.where(x > 0, x, np.inf).min(axis=0)
    return np.where(np.isfinite(m), m, np.nan)


def _best_pixel(pixel_limits):
    """Best (lowest) per-pixel limit among pixels with a positive, finite limit, and how many pixels have
    an empty limit (0: the observed Fe is below what noise alone gives 95 % of the time, so the frequentist
    construction excludes every strain; such a pixel has no informative limit, and is not "best")."""
    x = np.asarray(pixel_limits, dtype=float)
    ok = np.isfinite(x) & (x > 0)
    return {"best_pixel_strain_95": float(x[ok].min()) if ok.any() else None,
            "pixels_with_empty_limit": int(np.sum(x == 0))}


def _finite_or_none(v):
    v = float(v)
    return v if math.isfinite(v) else None


@dataclass
class LimitsComputation:
    """Everything the limits stage computed, before any file is written (:func:`compute_stage_limits`).

    ``limits`` holds the per-point 95 % strain limits of each method computed, shape
    (N_pix + N_galaxies, N_freq) (sky pixels first, then the galaxies' exact positions), the ``fe`` values
    and the runner's description (``limits["runner"]``, from :func:`compute_limits`); ``averages`` the
    sky-averaged limits per method, (N_freq,).
    """

    frequencies: np.ndarray
    nside: int
    pixel_ra: np.ndarray                  # rad, HEALPix RING pixel centres
    pixel_dec: np.ndarray                 # rad
    galaxies: list
    limits: dict
    averages: dict
    primary: str                          # the method of the strain_95 columns
    method: str                           # the option as given (bayes, frequentist or both)
    quadrature: str
    sky_index: int                        # frequency bin of the sky table
    noise_description: dict
    check: dict | None = None             # the sampler check (--mcmc-check), if asked for
    fmax_note: str | None = None

    @property
    def n_pixels(self) -> int:
        return int(self.pixel_ra.size)

    @property
    def pixel_limits(self) -> np.ndarray:
        """(N_pix, N_freq) limits of the primary method."""
        return self.limits[self.primary][:self.n_pixels]

    @property
    def sky_frequency(self) -> float:
        return float(self.frequencies[self.sky_index])


@dataclass
class LimitsTables:
    """The stage's tables (astropy): per frequency, per pixel at the sky frequency, per galaxy (or None)."""

    frequency: object
    sky: object
    galaxy: object | None


def _band(array, options):
    """The frequency grid of the limits, the note on its default top, and the bin of ``--sky-frequency``."""
    fmax = options.fmax if options.fmax is not None else min(DEFAULT_FMAX, default_max_frequency(array))
    fmin = options.fmin
    if fmin is not None and options.fmax is None and not fmax > fmin:
        fmax = default_max_frequency(array)
    frequencies = frequency_grid(array, fmin=fmin, fmax=fmax, oversample=int(options.oversample))
    fmax_note = None
    if options.fmax is None and fmax < default_max_frequency(array):
        fmax_note = (f"highest frequency {fmax:.3g} Hz by default, lower than the scan's default "
                     f"{default_max_frequency(array):.3g} Hz (1/(2 x median TOA spacing), at most 1e-6 Hz): every "
                     "limit frequency costs a quadrature over every sky pixel, and limits matter most where the "
                     "array is sensitive; set fmax (--fmax) to go higher")
    requested_sky_index = None
    if options.sky_frequency is not None:
        requested_sky_index = int(np.argmin(np.abs(frequencies - options.sky_frequency)))
        step = frequencies[1] - frequencies[0] if len(frequencies) > 1 else 1.0 / array.span
        if abs(frequencies[requested_sky_index] - options.sky_frequency) > step:
            raise InputError(f"option --sky-frequency: {options.sky_frequency:.4g} Hz is outside the band "
                             f"{frequencies[0]:.4g}-{frequencies[-1]:.4g} Hz")
    return frequencies, fmax_note, requested_sky_index


def _galaxies(options):
    """The galaxies of ``--galaxy`` and ``--catalog/--select`` (names unique)."""
    galaxies = parse_galaxies(options.galaxy)
    if options.catalog:
        galaxies += read_catalog_galaxies(options.catalog, options.select)
    names = [g.name for g in galaxies]
    if len(set(names)) != len(names):
        raise InputError("option --galaxy/--select: galaxy names must be unique")
    return galaxies


def _sampler_check(engine, proj, computation, pixel, quadrature, *, seed, progress):
    """The quadrature limit at one pixel and the sky frequency compared with a sampled posterior."""
    ra, dec = computation.pixel_ra, computation.pixel_dec
    fplus, fcross = fstat.sky_patterns(proj, ra[pixel:pixel + 1], dec[pixel:pixel + 1])
    nv, mm = engine.network(proj, fplus, fcross)
    nv, mm = nv[0, computation.sky_index], mm[0, computation.sky_index]
    frequency = computation.sky_frequency
    quad = bayesian_limit(nv, mm, frequency, grid=QUADRATURE[quadrature])
    check = {"pixel": pixel, "frequency": frequency, "quadrature": quad}
    try:
        h, err, details = sampler_limit(nv, mm, frequency, seed=seed, progress=progress)
        check.update({"sampled": h, "sampled_error": err, "sampler": "cwsearch.inference.sampling (ptemcee)",
                      **details})
    except ImportError:
        h, err = importance_sampled_limit(nv, mm, frequency, seed=seed)
        check.update({"sampled": h, "sampled_error": err, "sampler": "importance sampling"})
    check["difference_in_errors"] = (check["sampled"] - quad) / max(check["sampled_error"], 1e-300)
    return check


def compute_stage_limits(array, options: LimitsOptions = LimitsOptions(), *, noise=None, seed=0,
                         progress=True) -> LimitsComputation:
    """The limits stage's numbers (no file is written): per-pixel and per-galaxy limits at every frequency,
    their sky averages, the sky-table frequency and the optional sampler check."""
    options.validate()
    noise = NoiseSettings() if noise is None else noise
    galaxies = _galaxies(options)
    frequencies, fmax_note, requested_sky_index = _band(array, options)
    engine = array_noise(array, noise)
    proj = engine.projections(frequencies)
    nside = int(options.nside)
    n_pix = sky.n_pixels(nside)
    ra_pix, dec_pix = sky.pixel_centres(nside)
    ra = np.concatenate([ra_pix, np.radians([g.ra for g in galaxies])])
    dec = np.concatenate([dec_pix, np.radians([g.dec for g in galaxies])])
    # the frequentist limit costs ~5 % of the Bayesian one, so "bayes" reports it too
    computed = "frequentist" if options.method == "frequentist" else "both"
    res = compute_limits(proj, ra, dec, method=computed, quadrature=options.quadrature,
                         workers=None if not options.workers else int(options.workers),
                         scheduler=options.scheduler or None, progress=progress, noise=engine,
                         pulsar_term=bool(options.pulsar_term), pulsar_term_draws=int(options.pulsar_term_draws),
                         seed=seed, array=array)
    averages = _sky_averages(res, frequencies, n_pix)
    primary = "frequentist" if options.method == "frequentist" else "bayes"
    if requested_sky_index is not None:
        sky_index = requested_sky_index
    else:
        finite = np.isfinite(averages[primary])
        sky_index = int(np.nanargmin(np.where(finite, averages[primary], np.inf))) if finite.any() else 0
    computation = LimitsComputation(frequencies, nside, ra_pix, dec_pix, galaxies, res, averages, primary,
                                    options.method, options.quadrature, sky_index, engine.describe(),
                                    fmax_note=fmax_note)
    if options.mcmc_check is not None:
        computation.check = _sampler_check(engine, proj, computation, int(options.mcmc_check), options.quadrature,
                                           seed=seed, progress=progress)
    return computation


def limits_tables(c: LimitsComputation) -> LimitsTables:
    """The frequency, sky and galaxy tables of a computation (with units and metadata)."""
    n_pix, frequencies, primary, res = c.n_pixels, c.frequencies, c.primary, c.limits
    pixel_limits = c.pixel_limits

    ftab = Table()
    ftab["frequency"] = frequencies * u.Hz
    ftab["strain_95"] = c.averages[primary]
    ftab["strain_95_best"] = _positive_min(pixel_limits)
    ftab["strain_95_worst"] = pixel_limits.max(axis=0)
    ftab["strain_95_median"] = np.median(pixel_limits, axis=0)
    ftab["best_pixel"] = np.argmin(pixel_limits, axis=0)
    ftab["worst_pixel"] = np.argmax(pixel_limits, axis=0)
    if primary == "bayes":
        pf = res["frequentist"][:n_pix]
        ftab["strain_95_frequentist"] = c.averages["frequentist"]
        ftab["strain_95_frequentist_best"] = _positive_min(pf)
        ftab["strain_95_frequentist_worst"] = pf.max(axis=0)
    if "bayes_earth_term" in c.averages:
        ftab["strain_95_earth_term"] = c.averages["bayes_earth_term"]
        ftab["strain_95_mc_error_median"] = np.median(res["bayes_mc_error"][:n_pix], axis=0)
    ftab["fe_max"] = res["fe"][:n_pix].max(axis=0)
    ftab.meta.update(_limit_statement(c))
    ftab.meta.update({"method": primary, "level": LEVEL, "nside": c.nside,
                      "sky_average": "posterior (bayes) or detection probability (frequentist) averaged over "
                                    "equal-area pixels, i.e. a uniformly distributed sky position"})

    stab = Table()
    stab["pixel"] = np.arange(n_pix)
    stab["ra"] = np.degrees(c.pixel_ra) * u.deg
    stab["dec"] = np.degrees(c.pixel_dec) * u.deg
    stab["strain_95"] = pixel_limits[:, c.sky_index]
    if c.method == "both":
        stab["strain_95_frequentist"] = res["frequentist"][:n_pix, c.sky_index]
    if "bayes_earth_term" in res:
        stab["strain_95_mc_error"] = res["bayes_mc_error"][:n_pix, c.sky_index]
        stab["strain_95_earth_term"] = res["bayes_earth_term"][:n_pix, c.sky_index]
    stab["fe"] = res["fe"][:n_pix, c.sky_index]
    stab.meta.update(_limit_statement(c))
    stab.meta.update({"frequency": c.sky_frequency, "frequency_unit": "Hz", "method": primary, "nside": c.nside,
                      "order": "ring"})

    gtab = None
    if c.galaxies:
        rows = []
        for k, g in enumerate(c.galaxies):
            strain = res[primary][n_pix + k]
            mc = np.asarray(galaxy_chirp_mass_limit(strain, frequencies, g.distance), dtype=float)
            extra = [[]] * len(frequencies)
            if c.method == "both":
                hf = res["frequentist"][n_pix + k]
                mf = np.atleast_1d(np.asarray(galaxy_chirp_mass_limit(hf, frequencies, g.distance), dtype=float))
                extra = [[a, b] for a, b in zip(hf, mf)]
            for f, h, m, e in zip(frequencies, strain, np.atleast_1d(mc), extra):
                rows.append((g.name, g.ra, g.dec, g.distance, f, h, m, *e))
        names = ["name", "ra", "dec", "distance", "frequency", "strain_95", "chirp_mass_95"]
        if c.method == "both":
            names += ["strain_95_frequentist", "chirp_mass_95_frequentist"]
        gtab = Table(rows=rows, names=names)
        if c.method == "both":
            gtab["chirp_mass_95_frequentist"].unit = u.solMass
        gtab["ra"].unit, gtab["dec"].unit, gtab["distance"].unit = u.deg, u.deg, u.Mpc
        gtab["frequency"].unit, gtab["chirp_mass_95"].unit = u.Hz, u.solMass
        gtab.meta.update(_limit_statement(c))
        gtab.meta.update({"method": primary, "position": "exact galaxy position"})
    return LimitsTables(ftab, stab, gtab)


def _limit_statement(c: LimitsComputation) -> dict:
    """Which limit the ``strain_95`` columns hold (table metadata and summary): Earth term only, or Earth +
    pulsar term with its draws and Monte Carlo error."""
    res = c.limits
    if "pulsar_term" not in res or c.primary != "bayes":
        return {"limit": "Earth term only"}
    n_pix = c.n_pixels
    rel = res["bayes_mc_error"][:n_pix] / res["bayes"][:n_pix]
    rel = rel[np.isfinite(rel)]
    pt = res["pulsar_term"]
    return {"limit": "Earth + pulsar term",
            "pulsar_term": {"draws": pt["draws"], "seed": pt["seed"],
                            "distances": "Gaussian (distance, distance_err) truncated at > 0; uniform phase where "
                                         "distance_err (1 + cos) > GW wavelength",
                            "approximation": "no frequency evolution: pulsar term at the Earth-term frequency "
                                             "(needs df/dt x L(1+Omega.p)/c < 1/T_span)",
                            "mc_error_relative_median": _finite_or_none(np.median(rel)) if rel.size else None,
                            "mc_error_relative_max": _finite_or_none(np.max(rel)) if rel.size else None,
                            "frequentist": "Earth term only"}}


def limits_summary(c: LimitsComputation, tables: LimitsTables) -> dict:
    """The JSON-ready summary of a computation (without ``files``, ``wall_time`` and the dataset's noise
    statement, which :func:`run_limits` adds)."""
    n_pix, frequencies, res, best = c.n_pixels, c.frequencies, c.limits, int(c.sky_index)
    summary = {
        "method": c.method,
        "level": LEVEL,
        "n_frequencies": int(len(frequencies)),
        "frequency_range": [float(frequencies[0]), float(frequencies[-1])],
        "nside": c.nside,
        "n_pixels": int(n_pix),
        "quadrature": c.quadrature,
        "sky_frequency": c.sky_frequency,
        "best_frequency": float(frequencies[best]),
        "runner": res["runner"],
        "noise_model": c.noise_description,
    }
    summary.update(_limit_statement(c))
    if c.fmax_note:
        summary["fmax_note"] = c.fmax_note
    for method in ("bayes", "bayes_earth_term", "frequentist"):
        if method in c.averages:
            summary[method] = {"strain_95_at_best_frequency": _finite_or_none(c.averages[method][best]),
                               "strain_95_min": _finite_or_none(np.nanmin(c.averages[method])),
                               **_best_pixel(res[method][:n_pix, best])}
    summary["strain_95"] = summary[c.primary]["strain_95_at_best_frequency"]
    if c.galaxies:
        gtab = tables.galaxy
        summary["galaxies"] = {g.name: {"distance": g.distance,
                                        "chirp_mass_95_min": _finite_or_none(
                                            np.nanmin(gtab["chirp_mass_95"][gtab["name"] == g.name])),
                                        "at_frequency": float(frequencies[int(np.nanargmin(
                                            res[c.primary][n_pix + k]))])}
                               for k, g in enumerate(c.galaxies)}
    if c.check is not None:
        summary["mcmc_check"] = c.check
    return summary


def write_limits(folder, c: LimitsComputation, tables: LimitsTables) -> dict:
    """Write the tables (ECSV) and the sky map (HEALPix FITS) into ``folder``; returns name -> path."""
    folder = Path(folder)
    files = {}
    write_table_atomic(folder / "frequency_limits.ecsv", tables.frequency)
    files["frequency_limits"] = str(folder / "frequency_limits.ecsv")
    write_table_atomic(folder / "sky_limits.ecsv", tables.sky)
    files["sky_limits"] = str(folder / "sky_limits.ecsv")
    write_healpix_map(folder / "sky_limits.fits", {"STRAIN_95": np.asarray(tables.sky["strain_95"], dtype=float)},
                      nside=c.nside, extra={"FREQ": c.sky_frequency, "METHOD": c.primary, "LEVEL": LEVEL},
                      description=f"95 % strain upper limit ({c.primary}) per pixel at FREQ Hz")
    files["sky_limits_map"] = str(folder / "sky_limits.fits")
    if tables.galaxy is not None:
        write_table_atomic(folder / "galaxy_limits.ecsv", tables.galaxy)
        files["galaxy_limits"] = str(folder / "galaxy_limits.ecsv")
    return files


def plot_limits(folder, c: LimitsComputation, tables: LimitsTables, array) -> dict:
    """Draw the stage's PNG figures into ``folder`` (:mod:`cwsearch.stages.limits.plots`); returns name -> path."""
    # lazy: matplotlib is loaded only when plots are drawn
    from .plots import make_plots

    return make_plots(Path(folder), c.frequencies, tables.frequency, tables.sky, tables.galaxy, array, c.nside,
                      c.primary)


def run_limits(array, run_dir, options: LimitsOptions = LimitsOptions(), *, noise=None, seed=0, progress=True):
    """The limits stage: compute (:func:`compute_stage_limits`), tabulate (:func:`limits_tables`), write
    (:func:`write_limits`), plot (:func:`plot_limits`) and summarise (:func:`limits_summary`) into
    ``run_dir/limits/``; returns a :class:`LimitsResult`.

    Files: ``frequency_limits.ecsv``, ``sky_limits.ecsv``, ``sky_limits.fits``, ``galaxy_limits.ecsv``
    (with galaxies), ``limits_summary.json`` (written last) and PNG plots.
    """
    started = time.time()
    noise = NoiseSettings() if noise is None else noise
    folder = Path(run_dir) / "limits"
    computation = compute_stage_limits(array, options, noise=noise, seed=seed, progress=progress)
    tables = limits_tables(computation)
    files = write_limits(folder, computation, tables)
    summary = limits_summary(computation, tables)
    summary["wall_time"] = round(time.time() - started, 3)
    if not options.no_plots:
        files.update(plot_limits(folder, computation, tables, array))
    summary["files"] = sorted(Path(p).name for p in files.values())
    summary["noise_model"] = {**stage_noise_statement(array, noise), **summary.get("noise_model", {})}
    write_json_atomic(folder / "limits_summary.json", summary)
    files["summary"] = str(folder / "limits_summary.json")
    limits = computation.limits
    return LimitsResult(computation.frequencies, computation.pixel_limits, tables.frequency, tables.sky,
                        tables.galaxy, summary, files,
                        limits["frequentist"][:computation.n_pixels] if "frequentist" in limits else None)

__all__ = [
    "LEVEL", "RELATIVE_GRID", "METHODS", "QUADRATURE", "FREQUENTIST_GRID", "COS_PANELS", "angle_grid",
    "ncx2_sf", "bayes_rows", "frequentist_rows", "bayesian_limit", "frequentist_limit", "posterior_cdf",
    "sky_averaged_bayes", "sky_averaged_frequentist", "galaxy_chirp_mass_limit", "Galaxy",
    "parse_galaxies", "read_catalog_galaxies", "log_likelihood_ratio", "importance_sampled_limit",
    "sampler_limit", "DEFAULT_FMAX", "ROWS_PER_TASK", "LimitsOptions", "LimitsResult", "compute_limits",
    "run_limits", "LimitsComputation", "LimitsTables", "compute_stage_limits", "limits_tables", "limits_summary",
    "write_limits", "plot_limits",
]
