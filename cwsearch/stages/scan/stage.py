"""The all-sky hunt: Fe and Fp over frequency × sky, candidates and false-alarm probabilities.

:func:`run_scan` scans every frequency of a uniform grid (from 1/T_span,
spacing 1/(oversample·T_span)) on a HEALPix sky (docs/design.md §6) and writes
``run_dir/scan/``:

``candidates.ecsv``
    one row per distinct candidate (local maxima of Fe in frequency × sky,
    neighbours within one independent frequency bin and ``merge_angle``
    merged), best first, with analytic and empirical false-alarm
    probabilities and the maximum-likelihood (h0, ι, ψ, Φ0) from M⁻¹N;
``spectrum.ecsv``
    per frequency: the maximum of Fe over the sky, Fp, and their FAPs;
``scan_summary.json`` and PNG plots.

False-alarm probabilities
-------------------------
``fap_single``: the single-template value ``(1 + Fe) e^(−Fe)`` (2Fe ~ χ²(4)
in noise; Ellis, Siemens & Creighton 2012). ``fap``: the same corrected for
the look-elsewhere effect, ``1 − (1 − fap_single)^N_eff`` with
``N_eff(Fe) = N_freq × N_sky(Fe)``. Every frequency bin counts as a trial
(conservative on an oversampled grid). ``N_sky(Fe) = max(1, a + b·Fe)`` grows
with the threshold, as expected for the maximum of a χ² field over a 2-D
sky; a and b come from a quick Monte Carlo of the sufficient statistics
(per-pulsar X, Y drawn with covariance Z under the noise model, maximum of
Fe over the sky; see :func:`effective_sky_templates`). On noise-only
simulations of 4–30 pulsars this analytic FAP came out calibrated at the
0.1 and 0.02 levels and conservative near 0.5 (README, Hunting section).
``fap_empirical`` (with ``null_sims``) is the fraction of complete
noise-only scans of the same array (time series simulated with the same
TOAs, sigmas and noise model) whose maximum Fe reaches the candidate's,
``(1 + k) / (1 + N_sims)``; it does not rely on the noise model being
Gaussian and block-diagonal, and is the one to quote.

A loud source also shows spectral sidelobes (multiples of 1/T_span away)
that can appear as further, weaker candidates.

Examples
--------
>>> import tempfile
>>> from cwsearch.physics.simulate import invented_array, simulated_array
>>> from cwsearch.stages.scan.stage import ScanOptions, run_scan
>>> arr = simulated_array(invented_array(n_pulsars=5, years=8, seed=1), seed=2)
>>> res = run_scan(arr, tempfile.mkdtemp(), ScanOptions(nside=2, fmax=2e-8, no_plots=True), progress=False)
>>> sorted(res.files)[:2]
['candidates', 'sky_map']
"""

from __future__ import annotations

import time
import warnings
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
from astropy.table import Table
from numba import njit, prange
from scipy.special import chdtrc, chdtri    # the chi-squared tails scipy.stats.chi2 uses, without its import

from ...core.errors import InputError
from ...core.fileio import write_json_atomic, write_table_atomic
from ...core.progress import progress as bar
from ...data.healpix_fits import write_healpix_map
from ...data.truth import injected_binary
from ...inference.noisefit import GOF_THRESHOLD, NoiseFitWarning, goodness_of_fit, stage_noise_statement
from ...inference.execution import TaskRunner
from ...physics import fstat, sky
from ...physics.fstat import default_max_frequency, frequency_grid
from ...physics.correlated import ArrayNoise, array_noise, pair_correlations
from ...physics.noise import NoiseSettings, NoiseWeighting
from ...physics.sky import angular_separation
from ...physics.waveform import antenna_pattern
from .options import MAX_NULL_SIMS, STATISTICS, ScanOptions  # the options live beside (standard library only)


#: default cap on the highest scanned frequency [Hz]

#: largest Fe map (float32, pixels × frequencies) a scan keeps in memory [bytes]
MAX_MAP_BYTES = 4e9

#: Monte Carlo draws per frequency for the effective number of sky templates
SKY_TRIAL_DRAWS = 1000


@dataclass
class ScanResult:
    """What :func:`run_scan` returns (everything it wrote is also in ``files``)."""

    frequencies: np.ndarray
    fe_map: np.ndarray | None          # (N_pix, N_freq) float32, None for statistic "fp"
    spectrum: object                   # astropy Table
    candidates: object                 # astropy Table
    summary: dict
    files: dict = field(default_factory=dict)
    null_fe_max: np.ndarray | None = None
    null_fp_max: np.ndarray | None = None


# ---------------------------------------------------------------- statistics
def fe_single_fap(fe):
    """Single-template false-alarm probability of Fe: ``(1 + F) e^(−F)`` (2Fe ~ χ²(4))."""
    fe = np.maximum(np.asarray(fe, dtype=float), 0.0)
    return (1.0 + fe) * np.exp(-fe)


def trials_fap(single, n_trials):
    """``1 − (1 − p)^N`` computed without cancellation."""
    single = np.clip(np.asarray(single, dtype=float), 0.0, 1.0)
    with np.errstate(divide="ignore"):
        return -np.expm1(n_trials * np.log1p(-single))


def fp_fap(fp, dof, scale=1.0):
    """Single-frequency FAP of Fp: ``P(c·χ²(dof) ≥ 2Fp)`` with ``c = scale``.

    Per-pulsar noise: c = 1 and 2Fp ~ χ²(2 N_psr) exactly (Ellis, Siemens &
    Creighton 2012). With a correlated common process the terms are dependent
    and (dof, scale) are the moment-matched values of
    :func:`cwsearch.physics.correlated.fp_moment_matched`.
    """

    fp = np.asarray(fp, dtype=float)
    dof = np.asarray(dof, dtype=float)
    scale = np.asarray(scale, dtype=float)
    return np.where(dof > 0, chdtrc(np.maximum(dof, 1e-9), 2 * fp / scale), 1.0)


@dataclass(frozen=True)
class SkyTrials:
    """Effective number of independent sky templates at one frequency, ``N_sky(F) = max(1, a + b·F)``.

    For a search over a 2-D sky the effective number of templates grows with
    the threshold (the Euler-characteristic heuristic for the maximum of a
    χ² random field, Worsley 1994, Adv. Appl. Prob. 26, 13 — from memory);
    a straight line in Fe fitted at two points of the simulated sky-maximum
    distribution captures it.
    """

    intercept: float
    slope: float

    def n_sky(self, fe):
        return np.maximum(1.0, self.intercept + self.slope * np.asarray(fe, dtype=float))


@dataclass(frozen=True)
class Trials:
    """Look-elsewhere correction of the whole scan: ``N_eff(F) = n_frequencies × N_sky(F)``.

    Every frequency bin counts as a trial (conservative on an oversampled
    grid); ``sky`` is None for an Fp-only scan (no sky trials).
    """

    n_frequencies: int
    sky: SkyTrials | None

    def n_eff(self, fe):
        sky = 1.0 if self.sky is None else self.sky.n_sky(fe)
        return self.n_frequencies * sky

    def fe_fap(self, fe):
        """Trials-corrected analytic FAP of Fe values."""
        return trials_fap(fe_single_fap(fe), self.n_eff(fe))

    def fe_threshold(self, fap):
        """Fe at which :meth:`fe_fap` equals ``fap``."""
        return _root_by_bisection(lambda f: float(self.fe_fap(f)) - fap, 0.0, 1e4)


def _root_by_bisection(function, lo, hi):
    """A root of ``function`` in [lo, hi] (signs differ at the ends), bisected to adjacent floats.

    Replaces scipy.optimize.brentq here (its import costs ~0.3 s of a 1 s command); the result is
    within one unit in the last place of the root instead of brentq's 2e-12 absolute.
    """
    f_lo = function(lo)
    if f_lo == 0:
        return float(lo)
    if (function(hi) > 0) == (f_lo > 0):
        raise ValueError("the function has the same sign at both ends of the bracket")
    for _ in range(2000):
        mid = 0.5 * (lo + hi)
        if mid <= lo or mid >= hi:
            break
        f_mid = function(mid)
        if f_mid == 0:
            return float(mid)
        if (f_mid > 0) == (f_lo > 0):
            lo, f_lo = mid, f_mid
        else:
            hi = mid
    return float(0.5 * (lo + hi))


def fitted_trials(maxima, quantiles=(0.5, 0.98)) -> SkyTrials:
    """Fit ``N(F) = a + b·F`` so that ``1 − (1 − (1+F)e^−F)^N(F)`` matches two quantiles of ``maxima``."""
    maxima = np.asarray(maxima, dtype=float)
    points = []
    for q in quantiles:
        fq = float(np.quantile(maxima, q))
        single = float(fe_single_fap(fq))
        n = np.log(q) / np.log1p(-single) if 0 < single < 1 else 1.0
        points.append((fq, max(float(n), 1.0)))
    (f1, n1), (f2, n2) = points
    slope = max((n2 - n1) / (f2 - f1), 0.0) if f2 > f1 else 0.0
    return SkyTrials(n1 - slope * f1, slope)


def effective_sky_templates(proj, fplus, fcross, seed=0, *, draws=SKY_TRIAL_DRAWS, frequency_indices=None,
                            noise=None):
    """:class:`SkyTrials` from a Monte Carlo of the sufficient statistics.

    Under the noise model the stacked (X, Y) of all pulsars is Gaussian with
    covariance Z_p per pulsar (independent pulsars), or ``δ_pq Z_p − W_pq``
    with a correlated common process (``noise``, the run's
    :class:`~cwsearch.physics.correlated.ArrayNoise`; None: per pulsar). At three
    frequencies across the band, ``draws`` such sets are drawn directly (no time
    series needed), the maximum of Fe over the sky is taken with the model's
    M, and :func:`fitted_trials` matches the median and the 98 % point of the
    pooled maxima. With one or two pulsars Fe does not depend on the sky and
    N_sky = 1.
    """
    n_freq = proj.frequencies.size
    if frequency_indices is None:
        frequency_indices = np.unique(np.linspace(0, n_freq - 1, min(3, n_freq) + 2)[1:-1].round().astype(int))
    rng = np.random.default_rng(seed)
    pooled = []
    for k in frequency_indices:
        z = proj.z[:, k]
        if not np.any(z[:, 0] + z[:, 2] > 0):
            continue
        if noise is None or not noise.correlated:
            zmat = np.stack([np.stack([z[:, 0], z[:, 1]], -1), np.stack([z[:, 1], z[:, 2]], -1)], -2)
            vals, vecs = np.linalg.eigh(zmat)
            root = (vecs * np.sqrt(np.clip(vals, 0, None))[:, None, :]) @ np.swapaxes(vecs, -1, -2)  # (P, 2, 2)
            xy = np.einsum("pij,bpj->bpi", root, rng.standard_normal((draws, z.shape[0], 2)))
            xs, ys = xy[..., 0], xy[..., 1]
        else:
            xs, ys = noise.draw_projections(proj, k, draws, rng)
        step = max(1, 2_000_000 // (4 * fplus.shape[0]))
        for b0 in range(0, draws, step):
            b1 = min(draws, b0 + step)
            sub = fstat.Projections(proj.frequencies[k:k + 1], xs[b0:b1, :, None], ys[b0:b1, :, None],
                                    proj.z[:, k:k + 1], proj.positions, proj.z_scale)
            if noise is None:
                scan = fstat.fe_sky(sub, fplus, fcross, keep_map=False)
            else:
                scan = ArrayNoise.fe_sky(noise, sub, fplus, fcross, keep_map=False)
            pooled.append(scan.fe_max[:, 0])
    if not pooled:
        return SkyTrials(1.0, 0.0)
    return fitted_trials(np.concatenate(pooled))


def fitted_effective_trials(null_max_fe):
    """The constant N_eff for which ``1 − (1 − (1+F)e^−F)^N`` puts the median null maximum at FAP ½."""
    median = float(np.median(null_max_fe))
    single = float(fe_single_fap(median))
    if not 0 < single < 1:
        return float("nan")
    return float(np.log(0.5) / np.log1p(-single))


def empirical_fap(values, null_max):
    """``(1 + #{null maxima ≥ value}) / (1 + N_sims)`` for each value."""
    null_sorted = np.sort(np.asarray(null_max, dtype=float))
    values = np.asarray(values, dtype=float)
    exceed = null_sorted.size - np.searchsorted(null_sorted, values, side="left")
    return (1.0 + exceed) / (1.0 + null_sorted.size)


# ---------------------------------------------------------------- maps
def sky_grid(array, nside):
    """Pixel centres (ra, dec) [rad] and antenna patterns F+, Fx (N_pix, N_psr)."""
    ra, dec = sky.pixel_centres(nside)
    fplus, fcross, _ = antenna_pattern(ra, dec, array.positions)
    return ra, dec, np.ascontiguousarray(fplus), np.ascontiguousarray(fcross)


def _as_noise(engine):
    """An :class:`~cwsearch.physics.correlated.ArrayNoise` for an ArrayNoise or a per-pulsar engine."""
    return engine if isinstance(engine, ArrayNoise) else ArrayNoise.from_engine(engine)


def fe_map(engine, frequencies, fplus, fcross, residuals=None, *, progress=False, desc="scan"):
    """Fe over sky × frequency for ``residuals`` (default: the data) with the engine's noise model.

    ``engine``: the run's :class:`~cwsearch.physics.correlated.ArrayNoise` (or a per-pulsar
    :class:`~cwsearch.physics.noise.NoiseWeighting`). Returns ``(fstat.SkyScan, Projections)``;
    the sky scan's ``fe_map`` is (N_pix, N_freq) float32. With a correlated common process
    X, Y come from the weighted data and M carries the cross-pulsar blocks.
    """
    noise = _as_noise(engine)
    with bar(total=len(noise), desc=f"{desc}: projections", enabled=progress, unit="psr") as pb:
        proj = noise.projections(frequencies, residuals, on_pulsar=lambda i: pb.update(1))
    if noise.correlated:
        with bar(total=1, desc=f"{desc}: cross-pulsar blocks", enabled=progress, unit="step") as pb:
            noise.corrections(proj.frequencies)
            pb.update(1)
    with bar(total=len(frequencies), desc=f"{desc}: sky", enabled=progress, unit="freq") as pb:
        result = noise.fe_sky(proj, fplus, fcross, map_dtype=np.float32, on_chunk=pb.update)
    return result, proj


#: frequencies per task when the sky scan is split over workers (a multiple of fstat.ANCHOR_EVERY, so the
#: rotation-stepped sines and cosines are anchored at the same bins as in one piece)
FREQUENCIES_PER_TASK = 200


def _scan_chunk_task(task):
    """Worker entry point: projections and Fe map of one chunk of frequencies. Pure function of its input
    (the array and noise settings are data; the worker builds its own noise engine)."""
    engine = NoiseWeighting(task["array"], task["noise"])
    proj = fstat.project(engine, task["frequencies"], step=task["step"], z_scale=task["z_scale"])
    sky_scan = fstat.fe_sky(proj, task["fplus"], task["fcross"], map_dtype=np.float32)
    return proj.x, proj.y, proj.z, proj.z_scale, sky_scan.fe_map, sky_scan.fe_max, sky_scan.best_pixel


def fe_map_tasks(engine, frequencies, fplus, fcross, *, workers=1, scheduler=None, progress=False, desc="scan"):
    """:func:`fe_map` with the frequencies split into chunks of :data:`FREQUENCIES_PER_TASK` run by the
    task runner (local processes or a Dask cluster). Same results as :func:`fe_map` to rounding
    (1e-12 relative): chunks start at multiples of the anchoring interval and use the full grid's step."""
    array, noise = engine.array, engine.settings
    frequencies = np.ascontiguousarray(frequencies, dtype=float)
    step = fstat.uniform_step(frequencies)
    z_scale = fstat.project(engine, frequencies[:1]).z_scale
    tasks, weights = [], []
    for f0 in range(0, frequencies.size, FREQUENCIES_PER_TASK):
        f1 = min(frequencies.size, f0 + FREQUENCIES_PER_TASK)
        tasks.append({"array": array, "noise": noise, "frequencies": frequencies[f0:f1], "step": step,
                      "z_scale": z_scale, "fplus": fplus, "fcross": fcross})
        weights.append(f1 - f0)
    with TaskRunner(workers=workers, scheduler=scheduler) as runner:
        with bar(total=frequencies.size, desc=f"{desc}: frequency chunks", enabled=progress, unit="freq") as pb:
            parts = runner.map(_scan_chunk_task, tasks, weights=weights, on_done=pb.update)
    x, y, z, fe, fe_max, best = (np.concatenate([p[i] for p in parts], axis=1) for i in (0, 1, 2, 4, 5, 6))
    proj = fstat.Projections(frequencies, x, y, z, array.positions, z_scale)
    return fstat.SkyScan(fe, fe_max, best), proj


def simulate_noise(array, noise: NoiseSettings, rng, engine=None):
    """Noise-only residuals for ``array`` drawn from the run's noise model: white noise,
    per-pulsar red noise and the common process with the model's inter-pulsar correlation
    (:meth:`cwsearch.physics.correlated.ArrayNoise.simulate`, timing model fitted out).
    ``engine`` (the run's ArrayNoise) avoids rebuilding it."""

    engine = array_noise(array, noise) if engine is None else _as_noise(engine)
    return engine.simulate(rng)


def null_maxima(array, engine, noise, frequencies, fplus, fcross, n_sims, seed, *, want_fe=True,
                progress=False, batch=32, workers=1, scheduler=None):
    """Maximum Fe over sky × frequency and maximum Fp over frequency for ``n_sims`` noise-only scans.

    Simulations are drawn from, and scanned with, the run's noise model ``engine``
    (:class:`~cwsearch.physics.correlated.ArrayNoise`; a per-pulsar engine is wrapped).
    Simulation ``i`` uses child ``i`` of ``numpy.random.SeedSequence(seed)``,
    so results do not depend on the batch size or the engine: batches run
    in this process, or with ``workers``/``scheduler`` as tasks of
    :class:`cwsearch.inference.execution.TaskRunner`. Returns two arrays
    (n_sims,) (the Fe one is None if ``want_fe`` is false).
    """
    engine = _as_noise(engine)
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    children = root.spawn(n_sims)
    fe_max = np.empty(n_sims) if want_fe else None
    fp_max = np.empty(n_sims)
    if (workers or 1) > 1 or scheduler:
        tasks = [{"array": array, "noise": noise, "frequencies": frequencies, "fplus": fplus, "fcross": fcross,
                  "seeds": children[start:min(n_sims, start + batch)], "want_fe": want_fe}
                 for start in range(0, n_sims, batch)]
        with TaskRunner(workers=workers, scheduler=scheduler) as runner:
            with bar(total=n_sims, desc="null simulations", enabled=progress, unit="sim") as pb:
                parts = runner.map(_null_task, tasks, weights=[len(t["seeds"]) for t in tasks], on_done=pb.update)
        for start, (fe, fp) in zip(range(0, n_sims, batch), parts):
            fp_max[start:start + fp.size] = fp
            if want_fe:
                fe_max[start:start + fe.size] = fe
        return fe_max, fp_max
    with bar(total=n_sims, desc="null simulations", enabled=progress, unit="sim") as pb:
        for start in range(0, n_sims, batch):
            stop = min(n_sims, start + batch)
            fe, fp = _null_batch(array, engine, noise, frequencies, fplus, fcross, children[start:stop], want_fe)
            fp_max[start:stop] = fp
            if want_fe:
                fe_max[start:stop] = fe
            pb.update(stop - start)
    return fe_max, fp_max


def _null_batch(array, engine, noise, frequencies, fplus, fcross, seeds, want_fe):
    """Maxima of Fe and Fp for the noise-only scans seeded by ``seeds`` (one child seed per simulation)."""
    engine = _as_noise(engine)
    sims = [engine.simulate(np.random.default_rng(s)) for s in seeds]
    sets = [np.stack([sim[p] for sim in sims], axis=1) for p in range(len(array))]
    proj = engine.projections(frequencies, sets)
    fp = np.atleast_2d(engine.fp(proj)).max(axis=-1)
    fe = engine.fe_sky(proj, fplus, fcross, keep_map=False).fe_max.max(axis=-1) if want_fe else None
    return fe, fp


def _null_task(task):
    """Worker entry point: one batch of noise-only scans (array and noise settings sent as data)."""
    engine = array_noise(task["array"], task["noise"])
    return _null_batch(task["array"], engine, task["noise"], task["frequencies"], task["fplus"], task["fcross"],
                       task["seeds"], task["want_fe"])


# ---------------------------------------------------------------- candidates
def local_maxima(fe, neighbours, threshold=-np.inf):
    """(pixel, frequency index) pairs where Fe ≥ ``threshold`` and ≥ every neighbour in sky × frequency.

    Neighbours: the 8 HEALPix neighbours (``neighbours`` (N_pix, 8), −1 for
    none) and the pixel itself, at the same and the adjacent frequency bins.
    Ties all count as maxima (they are merged later). Pairs in row-major order (pixel, then frequency).
    """
    fe = np.ascontiguousarray(fe)
    nb = np.ascontiguousarray(neighbours, dtype=np.int64)
    mask = np.zeros(fe.shape, dtype=np.bool_)
    _local_maxima_kernel(fe, nb, float(threshold), bool(np.isfinite(threshold)), mask)
    pix, fidx = np.nonzero(mask)
    return pix, fidx


@njit(cache=True, parallel=True)
def _local_maxima_kernel(fe, neighbours, threshold, use_threshold, mask):
    """``mask[s, f]`` = Fe at (s, f) is ≥ the threshold (when used) and no neighbour is larger (numba)."""
    n_pix, n_freq = fe.shape
    for s in prange(n_pix):
        for f in range(n_freq):
            value = fe[s, f]
            if use_threshold and not value >= threshold:
                continue
            ok = True
            for df in range(-1, 2):
                g = f + df
                if g < 0 or g >= n_freq:
                    continue
                if df != 0 and fe[s, g] > value:
                    ok = False
                    break
                for k in range(neighbours.shape[1]):
                    other = neighbours[s, k]
                    if other >= 0 and fe[other, g] > value:
                        ok = False
                        break
                if not ok:
                    break
            mask[s, f] = ok


def merge_peaks(values, frequencies, ra, dec, frequency_window, merge_angle, limit):
    """Greedy merge: best first, drop peaks within ``frequency_window`` [Hz] and ``merge_angle`` [rad]
    of a kept one. Returns kept indices (at most ``limit``)."""
    order = np.argsort(-np.asarray(values), kind="stable")
    kept = []
    for i in order:
        close = False
        for j in kept:
            if abs(frequencies[i] - frequencies[j]) <= frequency_window and (
                    merge_angle >= np.pi or angular_separation(ra[i], dec[i], ra[j], dec[j]) <= merge_angle):
                close = True
                break
        if not close:
            kept.append(int(i))
            if len(kept) >= limit:
                break
    return np.array(kept, dtype=int)


# ---------------------------------------------------------------- the stage
def run_scan(array, run_dir, options: ScanOptions = ScanOptions(), *, noise: NoiseSettings | None = None,
             seed=0, progress=True, timings=None) -> ScanResult:
    """Scan ``array`` over frequency × sky and write ``run_dir/scan/`` (see the module docstring).

    Parameters
    ----------
    array : :class:`~cwsearch.data.model.Array`
    run_dir : path of the run folder (created if missing)
    options : :class:`ScanOptions`
    noise : :class:`~cwsearch.physics.noise.NoiseSettings`, the noise model for weighting and null simulations
        (None: the default settings)
    seed : int, seeds the null simulations
    progress : show progress bars
    timings : dict or None
        Seconds already spent by the caller (e.g. ``{"read_seconds": ...}``), reported with the
        stage's own split in the summary: ``noise_build_seconds``, ``kernel_seconds`` (projections
        and sky kernel; also ``scan_seconds``), ``trials_seconds``, ``null_sims_seconds``,
        ``candidates_seconds``, ``write_seconds``, ``plots_seconds``. The numbers are written
        first; the plots come after (``no_plots`` skips them) and the summary is then rewritten
        with their file names.
    """
    noise = NoiseSettings() if noise is None else noise
    options.validate()
    started = time.time()
    out = Path(run_dir) / "scan"
    frequencies = frequency_grid(array, options.fmin, options.fmax, options.oversample)
    n_freq = frequencies.size
    span = array.span
    want_fe = options.statistic in ("fe", "both")
    timings = dict(timings or {})
    t = time.time()
    engine = array_noise(array, noise)
    timings["noise_build_seconds"] = time.time() - t
    ra, dec, fplus, fcross = sky_grid(array, options.nside)
    n_pix = ra.size
    if want_fe and 4.0 * n_pix * n_freq > MAX_MAP_BYTES:
        raise InputError(f"option --nside: the Fe map of {n_pix} pixels x {n_freq} frequencies needs "
                         f"{4.0 * n_pix * n_freq / 1e9:.1f} GB (limit {MAX_MAP_BYTES / 1e9:.0f} GB); lower --nside, "
                         "narrow --fmin/--fmax or reduce --oversample")

    t = time.time()
    if want_fe and options.distributed and not engine.correlated:
        # the frequency-chunk tasks use the per-pulsar engine; a correlated model scans in one piece
        sky_scan, proj = fe_map_tasks(engine.engine, frequencies, fplus, fcross, workers=options.workers or 1,
                                      scheduler=options.scheduler or None, progress=progress)
        fe_full = sky_scan.fe_map
        fe_max = sky_scan.fe_max[0]
        best_pixel = sky_scan.best_pixel[0]
    elif want_fe:
        sky_scan, proj = fe_map(engine, frequencies, fplus, fcross, progress=progress)
        fe_full = sky_scan.fe_map
        fe_max = sky_scan.fe_max[0]
        best_pixel = sky_scan.best_pixel[0]
    else:

        with bar(total=len(engine), desc="scan: projections", enabled=progress, unit="psr") as pb:
            proj = engine.projections(frequencies, on_pulsar=lambda i: pb.update(1))
        fe_full = None
        fe_max = np.full(n_freq, np.nan)
        best_pixel = np.zeros(n_freq, dtype=int)
    fp = engine.fp(proj)
    fp_dof, fp_scale = engine.fp_distribution(proj)
    timings["kernel_seconds"] = timings["scan_seconds"] = time.time() - t

    # trials
    sky_seed, null_seed = np.random.SeedSequence(seed).spawn(2)
    t = time.time()
    trials = Trials(n_freq, effective_sky_templates(proj, fplus, fcross, sky_seed, noise=engine) if want_fe else None)
    timings["trials_seconds"] = time.time() - t

    # null simulations
    null_fe = null_fp = None
    if options.null_sims:
        t = time.time()
        null_fe, null_fp = null_maxima(array, engine, noise, frequencies, fplus, fcross, int(options.null_sims),
                                       null_seed, want_fe=want_fe, progress=progress,
                                       workers=options.workers or 1, scheduler=options.scheduler or None)
        timings["null_sims_seconds"] = time.time() - t

    # spectrum
    fp_single = fp_fap(fp, fp_dof, fp_scale)
    spectrum = Table()
    spectrum["frequency"] = frequencies
    spectrum["frequency"].unit = "Hz"
    spectrum["fe_max"] = fe_max
    spectrum["fe_max_pixel"] = best_pixel
    spectrum["fe_max_ra"] = np.degrees(ra[best_pixel]) if want_fe else np.full(n_freq, np.nan)
    spectrum["fe_max_ra"].unit = "deg"
    spectrum["fe_max_dec"] = np.degrees(dec[best_pixel]) if want_fe else np.full(n_freq, np.nan)
    spectrum["fe_max_dec"].unit = "deg"
    spectrum["fe_max_fap_single"] = fe_single_fap(fe_max) if want_fe else np.full(n_freq, np.nan)
    spectrum["fe_max_fap_sky"] = (trials_fap(spectrum["fe_max_fap_single"], trials.sky.n_sky(fe_max)) if want_fe
                                  else np.full(n_freq, np.nan))
    spectrum["fp"] = fp
    spectrum["fp_dof"] = fp_dof
    spectrum["fp_scale"] = fp_scale
    spectrum["fp_fap_single"] = fp_single
    spectrum.meta["description"] = (
        "fe_max: maximum of Fe over the sky at each frequency (at pixel fe_max_pixel); "
        "fe_max_fap_single: (1+F)exp(-F), one template; fe_max_fap_sky: corrected for the N_sky(F) sky "
        "templates of one frequency (scan_summary.json); fp: pulsar-term Fp, 2Fp ~ fp_scale x chi2(fp_dof) in noise "
        "(exact with fp_scale = 1 for per-pulsar noise; moment-matched with a correlated common process); "
        "fp_fap_single: its single-frequency FAP")

    # candidates
    t = time.time()
    candidates = _candidates(options, array, proj, frequencies, fe_full, fp, (fp_dof, fp_scale), ra, dec, fplus,
                             fcross, trials, null_fe, null_fp, span, engine)
    timings["candidates_seconds"] = time.time() - t

    summary = _summary(options, array, noise, frequencies, n_pix, trials, candidates, null_fe, null_fp, want_fe,
                       seed, timings)
    summary["noise_model"] = {**stage_noise_statement(array, noise), **engine.describe()}  # source, values, engine
    t = time.time()
    summary["goodness_of_fit"] = scan_goodness_of_fit(array, noise)
    summary["goodness_of_fit_seconds"] = round(time.time() - t, 3)
    if engine.correlated:
        summary["fap_validity"] = (
            "with the correlated common process in the noise model, 2Fe ~ chi2(4) stays exact for one template "
            "(Fe uses the full array inner product); the sky trials are drawn with the cross-pulsar covariance; "
            "2Fp is no longer chi2(2 N_psr) (the per-pulsar terms are dependent): its FAP uses the "
            "moment-matched scaled chi2 of fp_dof, fp_scale (spectrum.ecsv)")
    files = {
        "candidates": out / "candidates.ecsv",
        "spectrum": out / "spectrum.ecsv",
        "summary": out / "scan_summary.json",
    }
    t = time.time()
    write_table_atomic(files["spectrum"], spectrum)
    write_table_atomic(files["candidates"], candidates)
    if null_fe is not None or null_fp is not None:
        null_table = Table()
        null_table["simulation"] = np.arange(len(null_fe if null_fe is not None else null_fp))
        if null_fe is not None:
            null_table["fe_max"] = np.asarray(null_fe, dtype=float)
        if null_fp is not None:
            null_table["fp_max"] = np.asarray(null_fp, dtype=float)
        null_table.meta["description"] = ("loudest Fe (over sky and frequency) and loudest Fp (over frequency) of "
                                          "each noise-only scan of the same array and noise model")
        files["null_maxima"] = out / "null_maxima.ecsv"
        write_table_atomic(files["null_maxima"], null_table)
    if want_fe and fe_full is not None:
        files["sky_map"] = out / "fe_sky.fits"
        maps = {"FE_MAX": fe_full.max(axis=1)}
        extra = {}
        if len(candidates):
            k = int(candidates["frequency_index"][0])
            maps["FE_BEST_FREQ"] = fe_full[:, k]
            extra = {"BESTFREQ": float(frequencies[k])}
        write_healpix_map(files["sky_map"], maps, nside=options.nside,
                          description="FE_MAX: maximum Fe over all scanned frequencies per pixel; FE_BEST_FREQ: "
                                      "Fe at the best candidate's frequency (BESTFREQ, Hz)", extra=extra)
    summary["write_seconds"] = round(time.time() - t, 3)
    summary["plots_seconds"] = 0.0
    if not options.no_plots:     # the tables are complete before any plot; the summary (the stage's
        # completion mark) comes last
        t = time.time()
        # lazy: matplotlib is loaded only when plots are drawn
        from . import plots as scan_plots

        thresholds = _thresholds(trials, null_fe, (fp_dof, fp_scale))
        files["spectrum_plot"] = out / "spectrum.png"
        scan_plots.spectrum_plot(files["spectrum_plot"], spectrum, candidates, thresholds, want_fe=want_fe,
                                 truth=injected_binary(array))
        if want_fe and len(candidates):
            k = int(candidates["frequency_index"][0])
            files["sky_plot"] = out / "sky_fe.png"
            scan_plots.sky_plot(files["sky_plot"], fe_full[:, k], options.nside, frequencies[k], array,
                                candidates[candidates["frequency_index"] == k])
        null = null_fe if want_fe else null_fp
        if null is not None and len(candidates):
            files["null_plot"] = out / "null_fe.png"
            observed = float(np.nanmax(candidates["fe" if want_fe else "fp"]))
            scan_plots.null_plot(files["null_plot"], null, observed, statistic="Fe" if want_fe else "Fp")
        if engine.kind != "none" and len(array) >= 2:
            pairs = pair_correlations(array, noise)
            files["correlation_plot"] = out / "hd_correlations.png"
            scan_plots.correlation_plot(files["correlation_plot"], pairs, title=(
                f"inter-pulsar correlations of the residuals ({len(array)} pulsars); model: {engine.kind}"))
            summary["pair_correlations"] = {
                "method": "per pair X_i' Phi X_j / tr(Z_i Phi Z_j Phi) with X = F' C_i^-1 r (each pulsar whitened "
                          "with its own covariance incl. the common auto-power); estimates Gamma_ij; binned by "
                          "angle with inverse-variance weights",
                **{k: [float(v) for v in pairs.bins[k]] for k in ("centre", "rho", "sigma", "expected", "count")},
                "centre_unit": "rad"}
        summary["plots_seconds"] = round(time.time() - t, 3)
    summary["files"] = {k: v.name for k, v in files.items()}
    summary["seconds"] = round(time.time() - started, 3)
    write_json_atomic(files["summary"], summary)
    return ScanResult(frequencies, fe_full, spectrum, candidates, summary, files, null_fe, null_fp)


def scan_goodness_of_fit(array, noise, *, warn=True) -> dict:
    """Goodness of fit of every pulsar under the scan's noise model (always on): the normality and
    low-frequency-excess tests of :func:`cwsearch.inference.noisefit.goodness_of_fit`. Warns
    (:class:`~cwsearch.inference.noisefit.NoiseFitWarning`) naming each pulsar with p < 1e-3, and when the
    array shows a common low-frequency excess (pointing to the common-process fit)."""
    checks, combined = goodness_of_fit(array, noise)
    failed = [c for c in checks if c.flagged]
    messages = [f"pulsar {c.name}: whitened residuals fail a check under the scan's noise model "
                f"(normality p = {c.normality_pvalue:.2g}, low-frequency excess p = {c.lowfreq_pvalue:.2g})"
                for c in failed]
    if combined.flagged:
        hint = ("the noise model's common process does not account for it: refit it (noise stage)"
                if noise.common_log10_amplitude is not None else
                "fit a common red process (noise stage, --noise-model estimate)")
        messages.append(f"array: combined low-frequency excess (p = {combined.pvalue:.2g}) points to an unmodelled "
                        f"common red process; {hint}")
    if warn:
        for m in messages:
            warnings.warn(m, NoiseFitWarning, stacklevel=2)
    return {"tests": "normality: scipy.stats.kstest of whitened residuals against N(0,1); low-frequency excess: "
                     "chi2 over the lowest 4 sine/cosine pairs (scipy.stats.chi2.sf)",
            "threshold": GOF_THRESHOLD, "n_failed": len(failed), "failed": [c.name for c in failed],
            "pulsars": {c.name: {"normality_pvalue": float(c.normality_pvalue),
                                 "low_frequency_pvalue": float(c.lowfreq_pvalue)} for c in checks},
            "array_low_frequency": {"statistic": float(combined.statistic), "dof": int(combined.dof),
                                    "pvalue": float(combined.pvalue), "flagged": bool(combined.flagged)},
            "warnings": messages}


def _thresholds(trials, null_fe, fp_law, level=0.01):
    """Lines for the spectrum plot: (label, value or per-frequency array)."""
    fp_dof, fp_scale = fp_law

    out = {"fe": [], "fp": []}
    if trials.sky is not None:
        fe_all = trials.fe_threshold(level)
        out["fe"].append((f"FAP {level:g}, whole scan (analytic, N_eff = {float(trials.n_eff(fe_all)):.0f})", fe_all))
        one = Trials(1, trials.sky)
        fe_one = one.fe_threshold(level)
        out["fe"].append((f"FAP {level:g}, one frequency (analytic, N_sky = {float(one.n_eff(fe_one)):.0f})", fe_one))
        if null_fe is not None and null_fe.size >= 1 / level:
            out["fe"].append((f"FAP {level:g}, empirical ({null_fe.size} null scans)",
                              float(np.quantile(null_fe, 1 - level))))
    single = -np.expm1(np.log1p(-level) / trials.n_frequencies)
    out["fp"].append((f"FAP {level:g} over the band (analytic, {trials.n_frequencies} frequency trials)",
                      np.where(fp_dof > 0, 0.5 * fp_scale * chdtri(np.maximum(fp_dof, 1e-9), single), np.nan)))
    return out


def _candidates(options, array, proj, frequencies, fe_full, fp, fp_law, ra, dec, fplus, fcross, trials,
                null_fe, null_fp, span, engine=None):


    fp_dof, fp_scale = fp_law
    noise = None if engine is None else _as_noise(engine)
    limit = int(options.max_candidates)
    window = 1.0 / span * (1 + 1e-9)
    table = Table()
    if fe_full is not None:
        threshold = trials.fe_threshold(options.fap_threshold) if options.fap_threshold < 1 else -np.inf
        pix, fidx = local_maxima(fe_full, sky.pixel_neighbours(options.nside), threshold)
        if pix.size == 0:   # always report the loudest point
            s, f = np.unravel_index(int(np.argmax(fe_full)), fe_full.shape)
            pix, fidx = np.array([s]), np.array([f])
        fe_vals = fe_full[pix, fidx].astype(float)
        keep = merge_peaks(fe_vals, frequencies[fidx], ra[pix], dec[pix], window,
                           np.radians(options.merge_angle), limit)
        pix, fidx = pix[keep], fidx[keep]
        # exact Fe and amplitudes at each candidate
        fe = np.empty(pix.size)
        amps = np.empty((pix.size, 4))
        for i, (s, f) in enumerate(zip(pix, fidx)):
            sub = fstat.Projections(frequencies[f:f + 1], proj.x[:, f:f + 1], proj.y[:, f:f + 1],
                                    proj.z[:, f:f + 1], proj.positions, proj.z_scale)
            if noise is None:
                val, amp = fstat.fe_with_amplitudes(sub, fplus[s:s + 1], fcross[s:s + 1])
            else:
                val, amp = noise.fe_with_amplitudes(sub, fplus[s:s + 1], fcross[s:s + 1])
            fe[i], amps[i] = val[0, 0], amp[0, 0]
        order = np.argsort(-fe, kind="stable")
        pix, fidx, fe, amps = pix[order], fidx[order], fe[order], amps[order]
        strain, cos_inclination, psi, phase = fstat.amplitudes_to_parameters(amps, frequencies[fidx])
        table["rank"] = np.arange(1, pix.size + 1)
        table["frequency"] = frequencies[fidx]
        table["frequency"].unit = "Hz"
        table["ra"] = np.degrees(ra[pix])
        table["ra"].unit = "deg"
        table["dec"] = np.degrees(dec[pix])
        table["dec"].unit = "deg"
        table["pixel"] = pix
        table["frequency_index"] = fidx
        table["fe"] = fe
        table["snr"] = np.sqrt(np.maximum(2 * fe - 4, 0))
        table["fap"] = trials.fe_fap(fe)
        table["n_eff"] = trials.n_eff(fe)
        table["fap_empirical"] = empirical_fap(fe, null_fe) if null_fe is not None else np.full(pix.size, np.nan)
        table["fap_single"] = fe_single_fap(fe)
        table["fp"] = fp[fidx]
        table["fp_fap"] = trials_fap(fp_fap(fp[fidx], fp_dof[fidx], fp_scale[fidx]), trials.n_frequencies)
        table["strain"] = strain
        table["inclination"] = np.arccos(np.clip(cos_inclination, -1, 1))
        table["inclination"].unit = "rad"
        table["polarization"] = psi
        table["polarization"].unit = "rad"
        table["phase"] = phase
        table["phase"].unit = "rad"
    else:
        single = fp_fap(fp, fp_dof, fp_scale)
        peaks = np.array([k for k in range(fp.size)
                          if (k == 0 or fp[k] >= fp[k - 1]) and (k == fp.size - 1 or fp[k] >= fp[k + 1])])
        peaks = peaks[trials_fap(single[peaks], trials.n_frequencies) <= options.fap_threshold] if peaks.size else peaks
        if peaks.size == 0:
            peaks = np.array([int(np.argmax(fp))])
        keep = merge_peaks(fp[peaks], frequencies[peaks], np.zeros(peaks.size), np.zeros(peaks.size), window,
                           np.pi, limit)
        fidx = peaks[keep]
        nan = np.full(fidx.size, np.nan)
        table["rank"] = np.arange(1, fidx.size + 1)
        table["frequency"] = frequencies[fidx]
        table["frequency"].unit = "Hz"
        table["ra"], table["dec"] = nan, nan
        table["ra"].unit = table["dec"].unit = "deg"
        table["pixel"] = np.full(fidx.size, -1)
        table["frequency_index"] = fidx
        for name in ("fe", "snr"):
            table[name] = nan
        table["fap"] = trials_fap(single[fidx], trials.n_frequencies)
        table["n_eff"] = np.full(fidx.size, float(trials.n_frequencies))
        table["fap_empirical"] = empirical_fap(fp[fidx], null_fp) if null_fp is not None else nan
        table["fap_single"] = single[fidx]
        table["fp"] = fp[fidx]
        table["fp_fap"] = table["fap"]
        for name in ("strain", "inclination", "polarization", "phase"):
            table[name] = nan
    table.meta["description"] = (
        "fap: analytic, trials-corrected 1-(1-p)^n_eff with p = (1+Fe)exp(-Fe) (Fp: chi2 survival), "
        "n_eff = N_freq x N_sky(Fe) (scan_summary.json); fap_empirical: fraction (1+k)/(1+N) of noise-only scans whose "
        "maximum reaches this value (NaN without null simulations); fap_single: one template, no trials. "
        "strain, inclination, polarization, phase: maximum-likelihood Earth-term values from M^-1 N.")
    return table


def _summary(options, array, noise, frequencies, n_pix, trials, candidates, null_fe, null_fp, want_fe, seed,
             timings):
    summary = {
        "statistic": options.statistic,
        "n_pulsars": len(array),
        "span_years": array.span / 3.15576e7,
        "fmin": float(frequencies[0]),
        "fmax": float(frequencies[-1]),
        "frequency_step": float(frequencies[1] - frequencies[0]) if frequencies.size > 1 else None,
        "n_frequencies": int(frequencies.size),
        "oversample": int(options.oversample),
        "nside": int(options.nside),
        "n_pixels": int(n_pix) if want_fe else 0,
        "n_eff_frequencies": int(trials.n_frequencies),
    }
    if trials.sky is not None:
        summary["n_eff_sky_intercept"] = float(trials.sky.intercept)
        summary["n_eff_sky_slope"] = float(trials.sky.slope)
        summary["n_eff_method"] = (
            "N_eff(Fe) = n_frequencies x max(1, n_eff_sky_intercept + n_eff_sky_slope * Fe): every frequency bin "
            "is a trial; the sky part is a line in Fe fitted to the median and 98% point of the sky maximum of Fe "
            f"in {SKY_TRIAL_DRAWS} Gaussian draws of the per-pulsar (X, Y) (covariance Z) at each of 3 frequencies")
    else:
        summary["n_eff_method"] = "N_eff = n_frequencies (Fp: no sky trials)"
    summary["fap_meaning"] = ("fap: analytic, single-template (1+Fe)exp(-Fe) (Fp: chi-squared) corrected for "
                              "N_eff templates; fap_single: one template, no trials correction")
    summary.update({"n_candidates": int(len(candidates)), "null_sims": int(options.null_sims), "seed": int(seed),
                    "noise": asdict(noise)})
    if len(candidates):
        best = candidates[0]
        summary["best"] = {k: (None if not np.isfinite(float(best[k])) else float(best[k]))
                           for k in ("frequency", "ra", "dec", "fe", "snr", "fap", "n_eff", "fp", "strain")}
        summary["best_frequency"] = float(best["frequency"])
        summary["best_fap"] = float(best["fap"])
    if null_fe is not None or null_fp is not None:
        null = null_fe if want_fe else null_fp
        summary["fap_empirical_meaning"] = ("fap_empirical = (1 + k)/(1 + N): fraction of N noise-only scans of "
                                            "the same array and noise model whose maximum "
                                            + ("Fe" if want_fe else "Fp") + " reaches the candidate's")
        summary["null_max_median"] = float(np.median(null))
        if len(candidates):
            summary["best_fap_empirical"] = float(candidates[0]["fap_empirical"])
            summary["best"]["fap_empirical"] = summary["best_fap_empirical"]
        if want_fe:
            summary["n_eff_fitted_from_null_sims"] = fitted_effective_trials(null_fe)
            thr = trials.fe_threshold(0.1)
            summary["null_fraction_above_analytic_fap_0.1"] = float(np.mean(null_fe >= thr))
    summary.update({k: round(v, 3) for k, v in timings.items()})
    return summary


__all__ = ["ScanOptions", "STATISTICS", "MAX_NULL_SIMS", "ScanResult", "run_scan", "frequency_grid", "default_max_frequency", "fe_map",
           "null_maxima", "simulate_noise", "effective_sky_templates", "fe_single_fap", "trials_fap", "fp_fap",
           "empirical_fap", "local_maxima", "merge_peaks", "sky_grid", "Trials", "SkyTrials", "fitted_trials"]
