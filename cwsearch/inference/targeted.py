"""Targeted searches: the Fe-statistic at fixed sky positions, calibrated p-values, multiple testing.

The pieces of the targets stage (docs/design.md §13) that are not files or figures:

* **Period to frequency** (:func:`gw_frequency_from_period`). A circular binary radiates at twice its
  orbital frequency, ``f_gw = 2 f_orb`` (common practice, no source). An electromagnetic period is
  ``period_factor`` times the orbital period (1: the EM period *is* the orbital period; the host stage's
  convention). Periods are taken in the **observer frame** by default; a rest-frame period is redshifted,
  ``P_obs = (1 + z) P_rest`` (cosmological time dilation), so ``f_gw,obs = 2 period_factor / ((1 + z) P_rest)``.
  The F-statistic works in the observer frame, like every frequency in this tool.
* **Frequency windows** (:func:`frequency_windows`): a target with a period is searched in
  ``f_gw ± n_sigma σ_f`` (``σ_f = f_gw σ_P / P`` to first order), at least ± half a Fourier bin
  ``1/(2 T_span)``; a target without one over the whole band. Windows are index ranges on the run's
  uniform frequency grid.
* **The statistic** ``T = max Fe`` over the window at the target's fixed position
  (:func:`window_maxima`, one numba pass over an (S, F) Fe map).
* **Null distributions**: :func:`simulated_window_maxima` (noise-only residuals drawn from the run's noise
  model, the same statistic at the same positions and windows) and :func:`scrambled_window_maxima` (the
  statistic of the *data* at random, isotropic sky positions over the same windows).
* **p-values** (:func:`calibrated_p_values`): the null draws of all targets with the same window width (in
  bins) are pooled (under the noise model the single-template law 2Fe ~ χ²(4) holds at every position and
  frequency, so the window maximum's law depends on the window, not on where it is); the p-value is the
  empirical ``(1 + k)/(1 + N)`` while at least ``tail_count`` null draws reach the observed value, and beyond
  that the extreme-value form ``1 − (1 − q(T))^{n(T)}``, ``q(T) = (1 + T) e^{−T}`` (the single-template
  survival function), with ``n(T)`` matched to the empirical survival at the last well-measured point and
  growing as ``√T`` above it (the rate of up-crossings of a χ² process, from memory), and at least the
  union bound over the window's bins once it reaches it.
* **Multiple testing**: :func:`holm` (family-wise, Holm 1979; ≥ Bonferroni's power, valid under any
  dependence), :func:`bonferroni`, :func:`benjamini_hochberg` (false-discovery rate, Benjamini & Hochberg
  1995; valid under positive dependence) and :func:`benjamini_yekutieli` (any dependence, 2001).
* **Chirp-mass limits per target** (:func:`target_limits`): the galaxy limits of the limits stage — the
  Bayesian 95 % strain limit at the exact position (:func:`cwsearch.inference.upper_limits.bayes_rows`),
  inverted to an (observer-frame) chirp mass at the catalogue distance with
  :func:`cwsearch.physics.waveform.chirp_mass_for_strain`.

Examples
--------
>>> import numpy as np
>>> f = gw_frequency_from_period(np.array([365.25 * 2]))       # a 2-yr observed orbital period [d]
>>> f"{float(f[0]):.4e}"
'3.1688e-08'
>>> p = np.array([0.01, 0.04, 0.03, 0.5])
>>> holm(p).round(3).tolist()
[0.04, 0.09, 0.09, 0.5]
>>> benjamini_hochberg(p).round(4).tolist()
[0.04, 0.0533, 0.0533, 0.5]
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from ..core.constants import DAY_SECONDS
from ..physics import fstat, sky
from ..physics.waveform import chirp_mass_for_strain
from .upper_limits import QUADRATURE, bayes_rows

#: empirical p-values are used while at least this many null draws reach the observed value
TAIL_COUNT = 10


# ---------------------------------------------------------------- periods and windows
def gw_frequency_from_period(period_days, *, redshift=0.0, frame="observed", period_factor=1.0):
    """Observer-frame GW frequency [Hz] of a circular binary with EM period ``period_days`` [d].

    ``frame='observed'``: the period was measured on Earth (no redshift applied); ``'rest'``: it is the
    source-frame period, ``P_obs = (1 + z) P_rest``. The orbital period is ``P_EM / period_factor`` and
    ``f_gw = 2 / P_orb`` (common practice, no source).

    >>> round(float(gw_frequency_from_period(100.0, redshift=0.1, frame="rest") * 1e9), 4)
    210.4377
    """
    if frame not in ("observed", "rest"):
        raise ValueError(f"frame must be 'observed' or 'rest', not {frame!r}")
    period = np.asarray(period_days, dtype=float) * DAY_SECONDS
    if frame == "rest":
        period = period * (1.0 + np.asarray(redshift, dtype=float))
    out = 2.0 * float(period_factor) / period
    return out if out.ndim else float(out)


def frequency_windows(frequencies, centre=None, sigma=None, *, n_sigma=3.0, min_half_width=0.0):
    """Index windows ``[lo, hi]`` (inclusive) on the uniform grid ``frequencies`` for each target.

    ``centre``, ``sigma`` [Hz] (S,): NaN centre means the whole band. A window is
    ``centre ± max(n_sigma σ, min_half_width)``, holding at least the bin nearest the centre. Returns
    ``(lo, hi, inside)``; ``inside`` is False where the window misses the band entirely (lo = hi = −1).

    >>> f = 1e-9 * np.arange(1, 11)
    >>> frequency_windows(f, np.array([np.nan, 5e-9, 5.2e-9, 3e-8]), np.array([0, 1e-9, 0, 0]))
    (array([ 0,  1,  4, -1]), array([ 9,  7,  4, -1]), array([ True,  True,  True, False]))
    """
    f = np.asarray(frequencies, dtype=float)
    n_freq = f.size
    step = (f[-1] - f[0]) / (n_freq - 1) if n_freq > 1 else max(f[0], 1e-300)
    if centre is None:
        return np.zeros(1, np.int64), np.full(1, n_freq - 1, np.int64), np.ones(1, bool)
    centre = np.asarray(centre, dtype=float)
    sigma = np.zeros_like(centre) if sigma is None else np.broadcast_to(np.asarray(sigma, float), centre.shape)
    band = ~np.isfinite(centre)
    half = np.maximum(n_sigma * np.where(np.isfinite(sigma), sigma, 0.0), min_half_width)
    c = np.where(band, 0.0, centre)
    lo = np.ceil((c - half - f[0]) / step - 1e-9)
    hi = np.floor((c + half - f[0]) / step + 1e-9)
    nearest = np.rint((c - f[0]) / step)
    lo, hi = np.minimum(lo, nearest), np.maximum(hi, nearest)
    inside = band | ((hi >= 0) & (lo <= n_freq - 1) & (c + half >= f[0] - 0.5 * step)
                     & (c - half <= f[-1] + 0.5 * step))
    lo = np.where(band, 0, np.clip(lo, 0, n_freq - 1)).astype(np.int64)
    hi = np.where(band, n_freq - 1, np.clip(hi, 0, n_freq - 1)).astype(np.int64)
    lo[~inside] = -1
    hi[~inside] = -1
    return lo, hi, inside


@njit(cache=True, parallel=True)
def _window_maxima(fe, lo, hi, out, arg):
    n_sets, n_targets = out.shape
    for b in prange(n_sets):
        for s in range(n_targets):
            best = -np.inf
            k_best = -1
            for k in range(lo[s], hi[s] + 1):
                v = fe[b, s, k]
                if v > best:
                    best = v
                    k_best = k
            out[b, s] = best
            arg[b, s] = k_best


@njit(cache=True, parallel=True)
def _update_window_maxima(fe, f0, lo, hi, out, arg):
    """Running window maxima from one frequency chunk ``fe`` (B, S, n) starting at index ``f0``."""
    n_sets, n_targets, n = fe.shape
    for b in prange(n_sets):
        for s in range(n_targets):
            a = max(lo[s], f0)
            e = min(hi[s], f0 + n - 1)
            for k in range(a, e + 1):
                v = fe[b, s, k - f0]
                if v > out[b, s]:
                    out[b, s] = v
                    arg[b, s] = k


def batch_window_maxima(engine, proj, fplus, fcross, lo, hi):
    """Window maxima (B, S) and their indices for every residual set of ``proj`` (a batch from
    :meth:`ArrayNoise.projections` with residual sets, or one set), from the chunks of the sky kernel: M is
    factored once per target and frequency for all sets and no (B, S, F) map is held."""
    n_sets = proj.x.shape[0] if proj.x.ndim == 3 else 1
    lo = np.ascontiguousarray(lo, dtype=np.int64)
    hi = np.ascontiguousarray(hi, dtype=np.int64)
    out = np.full((n_sets, lo.size), -np.inf)
    arg = np.full((n_sets, lo.size), -1, dtype=np.int64)

    def block(f0, fe):
        _update_window_maxima(np.ascontiguousarray(fe), int(f0), lo, hi, out, arg)

    kernel = engine.fe_sky if engine is not None else (lambda *a, **k: fstat.fe_sky(*a, **k))
    kernel(proj, fplus, fcross, keep_map=False, on_block=block)
    return out, arg


def window_maxima(fe, lo, hi):
    """Maximum of ``fe`` (S, F) or (B, S, F) over each target's window ``[lo_s, hi_s]``, and where.

    Returns ``(maximum, index)`` of shape (S,) or (B, S); targets with ``lo < 0`` get −inf and −1.

    >>> fe = np.array([[1.0, 5.0, 2.0], [3.0, 0.5, 4.0]])
    >>> window_maxima(fe, np.array([0, 1]), np.array([2, 1]))
    (array([5. , 0.5]), array([1, 1]))
    """
    fe = np.asarray(fe, dtype=float)
    single = fe.ndim == 2
    fe3 = np.ascontiguousarray(fe[None] if single else fe)
    lo = np.ascontiguousarray(lo, dtype=np.int64)
    hi = np.ascontiguousarray(hi, dtype=np.int64)
    out = np.empty(fe3.shape[:2])
    arg = np.empty(fe3.shape[:2], dtype=np.int64)
    _window_maxima(fe3, lo, hi, out, arg)
    return (out[0], arg[0]) if single else (out, arg)


@njit(cache=True, parallel=True)
def _range_maxima(rows, lo, hi, out):
    """out[k, s] = max(rows[k, lo_s..hi_s]) with a sparse table per row (O(1) per query)."""
    n_rows, n_freq = rows.shape
    n_targets = lo.shape[0]
    levels = 1
    while (1 << levels) <= n_freq:
        levels += 1
    for k in prange(n_rows):
        table = np.empty((levels, n_freq))
        for j in range(n_freq):
            table[0, j] = rows[k, j]
        for lv in range(1, levels):
            width = 1 << lv
            half = width >> 1
            for j in range(n_freq - width + 1):
                a = table[lv - 1, j]
                b = table[lv - 1, j + half]
                table[lv, j] = a if a > b else b
        for s in range(n_targets):
            if lo[s] < 0:
                out[k, s] = -np.inf
                continue
            length = hi[s] - lo[s] + 1
            lv = 0
            while (1 << (lv + 1)) <= length:
                lv += 1
            a = table[lv, lo[s]]
            b = table[lv, hi[s] - (1 << lv) + 1]
            out[k, s] = a if a > b else b


# ---------------------------------------------------------------- null distributions
def _engine_fe(engine, proj, fplus, fcross):
    """Fe map (S, F) at the pattern rows for one residual set."""
    if engine is None:
        return fstat.fe_sky(proj, fplus, fcross).fe_map
    return engine.fe_sky(proj, fplus, fcross).fe_map


def target_statistics(engine, proj, ra, dec, lo, hi, *, chunk=2000):
    """Observed window maxima of Fe at the targets: ``(T (S,), best frequency index (S,))``.

    ``engine`` is the run's :class:`cwsearch.physics.correlated.ArrayNoise` that made ``proj``; targets
    are taken ``chunk`` at a time (memory: chunk × F values).
    """
    n = len(ra)
    stat, arg = np.full(n, -np.inf), np.full(n, -1, dtype=np.int64)
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        fplus, fcross = fstat.sky_patterns(proj, np.asarray(ra[a:b]), np.asarray(dec[a:b]))
        m, k = batch_window_maxima(engine, proj, fplus, fcross, lo[a:b], hi[a:b])
        stat[a:b], arg[a:b] = m[0], k[0]
    return stat, arg


def simulated_window_maxima(engine, frequencies, ra, dec, lo, hi, n_sims, seed, *, batch=32, chunk=2000,
                            on_done=None):
    """The statistic of every target in ``n_sims`` noise-only datasets drawn from the run's noise model.

    Simulation ``i`` uses child ``i`` of ``numpy.random.SeedSequence(seed)`` (the same draws whatever the
    batch size). Each is a full residual simulation (:meth:`ArrayNoise.simulate`: white, per-pulsar red and
    the common process with its correlation; timing model fitted out), projected and scanned at the
    targets exactly like the data. Returns (n_sims, S).
    """
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    children = root.spawn(int(n_sims))
    n = len(ra)
    out = np.empty((int(n_sims), n))
    patterns = None
    for start in range(0, int(n_sims), batch):
        stop = min(int(n_sims), start + batch)
        sims = [engine.simulate(np.random.default_rng(s)) for s in children[start:stop]]
        sets = [np.stack([sim[p] for sim in sims], axis=1) for p in range(len(engine.array))]
        proj = engine.projections(frequencies, sets)
        if patterns is None:
            patterns = [fstat.sky_patterns(proj, np.asarray(ra[a:a + chunk]), np.asarray(dec[a:a + chunk]))
                        for a in range(0, n, chunk)]
        for c, a in enumerate(range(0, n, chunk)):
            fplus, fcross = patterns[c]
            out[start:stop, a:a + chunk] = batch_window_maxima(engine, proj, fplus, fcross, lo[a:a + chunk],
                                                               hi[a:a + chunk])[0]
        if on_done is not None:
            on_done(stop - start)
    return out


def random_sky(n, rng):
    """``n`` isotropic sky positions (ra, dec) [rad]."""
    ra = rng.uniform(0.0, 2 * np.pi, n)
    dec = np.arcsin(rng.uniform(-1.0, 1.0, n))
    return ra, dec


def scrambled_window_maxima(engine, proj, lo, hi, n_scrambles, seed, *, chunk=2000, on_done=None):
    """The statistic of the *data* at ``n_scrambles`` random isotropic sky positions, over every target's
    window: (n_scrambles, S), and the positions (ra, dec) [rad]."""
    rng = np.random.default_rng(seed)
    ra, dec = random_sky(int(n_scrambles), rng)
    lo = np.ascontiguousarray(lo, dtype=np.int64)
    hi = np.ascontiguousarray(hi, dtype=np.int64)
    out = np.empty((int(n_scrambles), lo.size))
    for a in range(0, int(n_scrambles), chunk):
        b = min(int(n_scrambles), a + chunk)
        fplus, fcross = fstat.sky_patterns(proj, ra[a:b], dec[a:b])
        rows = np.ascontiguousarray(_engine_fe(engine, proj, fplus, fcross))
        _range_maxima(rows, lo, hi, out[a:b])
        if on_done is not None:
            on_done(b - a)
    return out, (ra, dec)


# ---------------------------------------------------------------- p-values
def single_template_survival(fe):
    """``P(Fe > fe)`` for one template in noise, 2Fe ~ χ²(4): ``(1 + fe) e^{−fe}``."""
    fe = np.maximum(np.asarray(fe, dtype=float), 0.0)
    return (1.0 + fe) * np.exp(-fe)


def _survival_of_max(q, n):
    """``1 − (1 − q)^n`` without cancellation."""
    with np.errstate(divide="ignore"):
        return -np.expm1(n * np.log1p(-np.minimum(q, 1.0 - 1e-16)))


def calibrated_p_values(observed, null, widths, *, tail_count=TAIL_COUNT, identical_windows=None):
    """Per-target p-values of ``observed`` (S,) against ``null`` (K, S) draws, pooled by window width.

    ``identical_windows=(lo, hi)``: targets whose windows coincide have identical null draws (sky scrambles
    of the same data), so only one of them enters the pool. Returns ``(p, method, n_pool)``: ``method`` is ``'empirical'`` where at least ``tail_count`` pooled
    draws reach the observed value (p = (1 + k)/(1 + N)) and ``'tail'`` beyond (the extreme-value form of
    the module docstring); ``n_pool`` the number of pooled draws N behind each target. Targets with a
    non-finite observed value get NaN.
    """
    observed = np.asarray(observed, dtype=float)
    null = np.asarray(null, dtype=float).reshape(-1, observed.size)
    widths = np.asarray(widths, dtype=np.int64)
    p = np.full(observed.size, np.nan)
    method = np.full(observed.size, "", dtype="<U9")
    n_pool = np.zeros(observed.size, dtype=np.int64)
    ok = np.isfinite(observed)
    for w in np.unique(widths[ok]):
        idx = np.flatnonzero(ok & (widths == w))
        columns = idx
        if identical_windows is not None:
            columns = idx[np.unique(np.asarray(identical_windows[0])[idx], return_index=True)[1]]
        pool = np.sort(null[:, columns].ravel())
        pool = pool[np.isfinite(pool)]
        big_n = pool.size
        n_pool[idx] = big_n
        t = observed[idx]
        k = big_n - np.searchsorted(pool, t, side="left")          # draws >= observed
        emp = (1.0 + k) / (1.0 + big_n)
        if big_n >= 2 * tail_count:          # the anchor is then a measured point of the survival function
            t_star = max(float(pool[big_n - tail_count]), 1e-9)
            p_star = (1.0 + tail_count) / (1.0 + big_n)
            q_star = float(single_template_survival(t_star))
            n_star = math.log1p(-p_star) / math.log1p(-min(q_star, 1 - 1e-16))
        else:
            t_star, n_star = 0.0, float(w)
        use_tail = k < tail_count
        grow = n_star * np.sqrt(np.maximum(t, t_star) / t_star) if t_star > 0 else np.full(t.size, n_star)
        n_eff = np.minimum(grow, max(float(w), n_star))
        tail = _survival_of_max(single_template_survival(t), n_eff)
        p[idx] = np.where(use_tail, tail, emp)
        method[idx] = np.where(use_tail, "tail", "empirical")
    return p, method, n_pool


# ---------------------------------------------------------------- multiple testing
def _prepare(p):
    p = np.asarray(p, dtype=float)
    ok = np.isfinite(p)
    return p, ok, np.clip(p[ok], 0.0, 1.0)


def bonferroni(p):
    """Family-wise adjusted p-values ``min(1, m p)`` (m = number of finite p-values; NaN kept)."""
    p, ok, x = _prepare(p)
    out = np.full(p.shape, np.nan)
    out[ok] = np.minimum(1.0, x * x.size)
    return out


def holm(p):
    """Holm (1979) step-down adjusted p-values: ``max_{j ≤ i} min(1, (m − j + 1) p_(j))`` for sorted p."""
    p, ok, x = _prepare(p)
    out = np.full(p.shape, np.nan)
    m = x.size
    if m == 0:
        return out
    order = np.argsort(x, kind="stable")
    adj = np.minimum(1.0, np.maximum.accumulate((m - np.arange(m)) * x[order]))
    res = np.empty(m)
    res[order] = adj
    out[ok] = res
    return out


def _step_up(x, factor):
    m = x.size
    order = np.argsort(x, kind="stable")
    ranked = x[order] * m * factor / np.arange(1, m + 1)
    adj = np.minimum(1.0, np.minimum.accumulate(ranked[::-1])[::-1])
    res = np.empty(m)
    res[order] = adj
    return res


def benjamini_hochberg(p):
    """Benjamini–Hochberg (1995) adjusted p-values (q-values): ``min_{j ≥ i} min(1, m p_(j) / j)``."""
    p, ok, x = _prepare(p)
    out = np.full(p.shape, np.nan)
    if x.size:
        out[ok] = _step_up(x, 1.0)
    return out


def benjamini_yekutieli(p):
    """Benjamini–Yekutieli (2001) adjusted p-values: BH times ``Σ_{i=1}^m 1/i`` (any dependence)."""
    p, ok, x = _prepare(p)
    out = np.full(p.shape, np.nan)
    if x.size:
        out[ok] = _step_up(x, float(np.sum(1.0 / np.arange(1, x.size + 1))))
    return out


# ---------------------------------------------------------------- limits
def most_sensitive_index(mmat, frequencies):
    """Per target, the frequency index where the expected chirp-mass limit is smallest.

    The expected strain limit scales as ``2π f / √tr M(f)`` and ``Mc ∝ (h f^{−2/3})^{3/5}``, so the index
    minimising ``f^{1/3} / √tr M`` (``mmat`` (S, F, 4, 4)).
    """
    trace = np.einsum("...ii->...", np.asarray(mmat))
    with np.errstate(divide="ignore", invalid="ignore"):
        score = np.asarray(frequencies)[None, :] ** (1.0 / 3.0) / np.sqrt(np.where(trace > 0, trace, np.nan))
    score = np.where(np.isfinite(score), score, np.inf)
    return np.argmin(score, axis=-1)


def _network(engine, proj, fplus, fcross):
    """N (S, F, 4), M (S, F, 4, 4) with the run's inner product (per-pulsar when ``engine`` is None)."""
    if engine is None:
        return fstat.network_vectors(proj, fplus, fcross)
    return engine.network(proj, fplus, fcross)


def _limit_task(task):
    """Worker entry point: Bayesian limits in x = h0/(2πf) for a chunk of (N, M) rows."""
    return bayes_rows(task["nvec"], task["mmat"], grid=task["grid"])[0]


def target_limits(engine, proj, ra, dec, limit_index, distance_mpc, *, quadrature="standard", runner=None,
                  chunk=256):
    """95 % Bayesian strain limit and chirp-mass limit per target at frequency index ``limit_index``.

    ``limit_index`` (S,): a grid index, or −1 for "the most sensitive frequency at this position"
    (:func:`most_sensitive_index`). Returns ``(strain_95, chirp_mass_95 [Msun, observer frame], index)``.
    The limit is the limits stage's galaxy limit: the posterior of h0 (uniform prior, angles
    marginalised by quadrature) at the exact position (docs/design.md §9).
    """
    n = len(ra)
    index = np.asarray(limit_index, dtype=np.int64).copy()
    nvec = np.zeros((n, 4))
    mmat = np.zeros((n, 4, 4))
    auto = np.flatnonzero(index < 0)
    for a in range(0, auto.size, chunk):
        rows = auto[a:a + chunk]
        fplus, fcross = fstat.sky_patterns(proj, np.asarray(ra)[rows], np.asarray(dec)[rows])
        nv, mm = _network(engine, proj, fplus, fcross)
        k = most_sensitive_index(mm, proj.frequencies)
        index[rows] = k
        take = np.arange(rows.size)
        nvec[rows], mmat[rows] = nv[take, k], mm[take, k]
    for k in np.unique(index[index >= 0]):
        rows = np.flatnonzero(index == k)
        rows = rows[~np.isin(rows, auto)]
        if not rows.size:
            continue
        sub = fstat.Projections(proj.frequencies[k:k + 1], proj.x[:, k:k + 1], proj.y[:, k:k + 1],
                                proj.z[:, k:k + 1], proj.positions, proj.z_scale)
        for a in range(0, rows.size, 4 * chunk):
            part = rows[a:a + 4 * chunk]
            fplus, fcross = fstat.sky_patterns(sub, np.asarray(ra)[part], np.asarray(dec)[part])
            nv, mm = _network(engine, sub, fplus, fcross)
            nvec[part], mmat[part] = nv[:, 0], mm[:, 0]
    grid = QUADRATURE[quadrature]
    tasks = [{"nvec": nvec[a:a + 512], "mmat": mmat[a:a + 512], "grid": grid} for a in range(0, n, 512)]
    parts = runner.map(_limit_task, tasks) if runner is not None else [_limit_task(t) for t in tasks]
    x95 = np.concatenate(parts) if parts else np.zeros(0)
    freq = proj.frequencies[np.clip(index, 0, None)]
    strain = x95 * 2 * np.pi * freq
    mc = np.asarray(chirp_mass_for_strain(strain, freq, np.asarray(distance_mpc, dtype=float)), dtype=float)
    return strain, np.atleast_1d(mc), index


def sky_separation_deg(ra1, dec1, ra2, dec2):
    """Angular separation [deg] of positions given in radians (broadcast)."""
    return np.degrees(sky.angular_separation(ra1, dec1, ra2, dec2))


__all__ = [
    "TAIL_COUNT", "gw_frequency_from_period", "frequency_windows", "window_maxima",
    "batch_window_maxima",
    "target_statistics", "simulated_window_maxima", "random_sky", "scrambled_window_maxima",
    "single_template_survival", "calibrated_p_values", "bonferroni", "holm", "benjamini_hochberg",
    "benjamini_yekutieli", "most_sensitive_index", "target_limits", "sky_separation_deg",
]
