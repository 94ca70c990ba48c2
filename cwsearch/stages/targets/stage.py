"""Targeted searches of a whole catalogue: every galaxy or periodic-AGN candidate tested (docs/design.md §13).

For each row of a user catalogue the sky position is fixed and the statistic is the Earth-term
Fe-statistic maximised over a frequency window: the whole band, or, for a row with an electromagnetic
period, ``f_gw = 2 period_factor / P_obs`` ± ``period_sigmas`` × its uncertainty (observer frame;
``period_frame='rest'`` redshifts a rest-frame period with the catalogue redshift,
:func:`cwsearch.inference.targeted.gw_frequency_from_period`). Fe uses the run's noise model
(:func:`cwsearch.physics.correlated.array_noise`: the estimated noise and the Hellings–Downs background
when the run has one).

**p-values.** Default: noise-only simulations (``null='simulations'``, ``null_sims`` datasets drawn from
the run's noise model and searched at the same positions and windows). Why this default: the null is then
exactly that of the statistic under the model, at each target's own position and window, and a real
signal in the data cannot leak into it. Sky scrambles (``null='scrambles'``: the data's statistic at
random sky positions) make no use of the noise model beyond the statistic itself, so they also absorb an
unmodelled excess, but a real binary anywhere raises them (its sky response is tens of degrees wide), so
they are conservative exactly when there is something to find; ``'both'`` reports the scramble p-value
beside the simulated one. Draws are pooled across targets with the same window width and the far tail is
an extreme-value extension (:func:`cwsearch.inference.targeted.calibrated_p_values`).

**Multiple testing.** ``p_family`` is Holm's family-wise adjusted p-value over all searched targets,
``p_bonferroni`` Bonferroni's, ``q_fdr`` the Benjamini–Hochberg (or ``fdr_method='by'``
Benjamini–Yekutieli) false-discovery-rate adjusted p-value.

**Follow-up.** Targets with ``p_family < followup_threshold`` (at most ``followup_top``) are handed to the
follow-up: ``followup_targets.ecsv`` with position and frequency window, and the command to run.

**Limits.** Per target the 95 % chirp-mass upper limit of the limits stage's galaxy limits (Bayesian,
uniform strain prior, exact position; :func:`cwsearch.inference.targeted.target_limits`) at the catalogue
distance: at the bin nearest the predicted frequency for a period target, otherwise at the most
sensitive frequency of the target's nside-4 HEALPix pixel.

Examples
--------
>>> from cwsearch.stages.targets.stage import TargetsOptions
>>> TargetsOptions(catalog="galaxies.ecsv").validate().null
'simulations'
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
from ...inference.execution import TaskRunner
from ...inference.noisefit import stage_noise_statement
from ...inference.targeted import (benjamini_hochberg, benjamini_yekutieli, bonferroni,
                                   calibrated_p_values, frequency_windows, gw_frequency_from_period, holm,
                                   scrambled_window_maxima, simulated_window_maxima, target_limits,
                                   target_statistics)
from ...physics.correlated import array_noise
from ...physics.fstat import frequency_grid
from ...physics.noise import NoiseSettings
from .options import MAX_NULL_SIMS, MAX_SCRAMBLES, TargetsOptions  # noqa: F401  (re-exported)


@dataclass
class TargetsResult:
    """What :func:`run_targets` returns; the tables are also written to ``run_dir/targets/``."""

    results: object          # astropy Table, one row per target (results.ecsv)
    followup: object         # astropy Table of the targets handed to the follow-up
    summary: dict
    files: dict = field(default_factory=dict)
    null: dict = field(default_factory=dict)   # method -> (K, S) null draws of the statistic (catalogue order)


def _windows(catalog, frequencies, span, options):
    """Centre, sigma [Hz] (NaN centre: the whole band) and the grid windows of every target."""
    n = len(catalog)
    centre = np.full(n, np.nan)
    sigma = np.zeros(n)
    has = np.isfinite(catalog.period) & (not options.ignore_periods)
    if has.any():
        f = gw_frequency_from_period(catalog.period[has], redshift=catalog.redshift[has],
                                     frame=options.period_frame, period_factor=options.period_factor)
        centre[has] = f
        sigma[has] = np.asarray(f) * catalog.period_err[has] / catalog.period[has]
    lo, hi, inside = frequency_windows(frequencies, centre, sigma, n_sigma=float(options.period_sigmas),
                                       min_half_width=0.5 / span)
    return centre, sigma, has, lo, hi, inside


def run_targets(array, run_dir, options: TargetsOptions = TargetsOptions(), *, noise=None, seed=0, progress=True):
    """The targets stage: write ``run_dir/targets/`` and return a :class:`TargetsResult`.

    Files: ``results.ecsv`` (one row per target), ``followup_targets.ecsv``, ``targets_summary.json``,
    ``pp_plot.png`` and ``sky_targets.png``.
    """
    options.validate()
    if not options.catalog:
        raise InputError("the targets stage needs a catalogue (--catalog FILE; [targets] catalog in a run file)")
    noise = NoiseSettings() if noise is None else noise
    started = time.time()
    timings = {}
    folder = Path(run_dir) / "targets"
    catalog = read_catalog(options.catalog, options.columns)
    frequencies = frequency_grid(array, fmin=options.fmin, fmax=options.fmax, oversample=int(options.oversample))
    centre, sigma, has_period, lo, hi, inside = _windows(catalog, frequencies, array.span, options)
    ra, dec = np.radians(catalog.ra), np.radians(catalog.dec)
    widths = np.where(inside, hi - lo + 1, 0)
    searched = np.flatnonzero(inside)

    t = time.time()
    engine = array_noise(array, noise)
    proj = engine.projections(frequencies)
    timings["projections_seconds"] = time.time() - t
    t = time.time()
    stat = np.full(len(catalog), np.nan)
    best = np.full(len(catalog), -1, dtype=np.int64)
    if searched.size:
        s, b = target_statistics(engine, proj, ra[searched], dec[searched], lo[searched], hi[searched])
        stat[searched], best[searched] = s, b
    timings["statistic_seconds"] = time.time() - t

    seeds = np.random.SeedSequence(seed).spawn(2)
    null = {}
    p_values = {}
    if searched.size and options.null in ("simulations", "both"):
        t = time.time()
        with progress_bar(total=int(options.null_sims), desc="targets: noise-only simulations", enabled=progress,
                          unit="sim") as bar:
            draws = simulated_window_maxima(engine, frequencies, ra[searched], dec[searched], lo[searched],
                                            hi[searched], int(options.null_sims), seeds[0], on_done=bar.update)
        null["simulations"] = draws
        p_values["simulations"] = calibrated_p_values(stat[searched], draws, widths[searched])
        timings["simulations_seconds"] = time.time() - t
    if searched.size and options.null in ("scrambles", "both"):
        t = time.time()
        with progress_bar(total=int(options.scrambles), desc="targets: sky scrambles", enabled=progress,
                          unit="pos") as bar:
            draws, _ = scrambled_window_maxima(engine, proj, lo[searched], hi[searched], int(options.scrambles),
                                               seeds[1], on_done=bar.update)
        null["scrambles"] = draws
        p_values["scrambles"] = calibrated_p_values(stat[searched], draws, widths[searched], identical_windows=(
            lo[searched], hi[searched]))
        timings["scrambles_seconds"] = time.time() - t
    quoted = "scrambles" if options.null == "scrambles" else "simulations"

    n = len(catalog)
    p = np.full(n, np.nan)
    p_method = np.full(n, "none", dtype="<U9")
    n_pool = np.zeros(n, dtype=np.int64)
    if searched.size:
        p[searched], p_method[searched], n_pool[searched] = p_values[quoted]
    p_family = holm(p)
    p_bonf = bonferroni(p)
    q_fdr = benjamini_hochberg(p) if options.fdr_method == "bh" else benjamini_yekutieli(p)

    # limits
    strain95 = np.full(n, np.nan)
    mc95 = np.full(n, np.nan)
    limit_index = np.full(n, -1, dtype=np.int64)
    if not options.no_limits and searched.size:
        t = time.time()
        nearest = np.abs(np.where(has_period, centre, np.inf)[:, None] - frequencies[None, :]).argmin(axis=1)
        want = np.where(has_period, nearest, -1).astype(np.int64)      # -1: the most sensitive frequency
        workers = None if not options.workers else int(options.workers)
        with TaskRunner(workers=workers if searched.size > 2000 else 1, scheduler=options.scheduler or None) \
                as runner:
            h, m, k = target_limits(engine, proj, ra[searched], dec[searched], want[searched],
                                    catalog.distance[searched], quadrature=options.quadrature, runner=runner)
            limits_engine = runner.describe()
        strain95[searched], mc95[searched], limit_index[searched] = h, m, k
        timings["limits_seconds"] = time.time() - t
    else:
        limits_engine = None

    # follow-up hand-off
    order = np.lexsort((-np.where(np.isfinite(stat), stat, -np.inf), np.where(np.isfinite(p), p, 2.0)))
    chosen = [int(i) for i in order if np.isfinite(p_family[i]) and p_family[i] < options.followup_threshold]
    chosen = chosen[:int(options.followup_top)]
    followed = np.zeros(n, dtype=bool)
    followed[chosen] = True

    # ------------------------------------------------ tables
    best_f = np.where(best >= 0, frequencies[np.clip(best, 0, None)], np.nan)
    tab = Table()
    tab["rank"] = np.zeros(n, dtype=np.int64)
    tab["name"] = catalog.name
    tab["catalog_row"] = catalog.row
    tab["ra"] = catalog.ra * u.deg
    tab["dec"] = catalog.dec * u.deg
    tab["distance"] = catalog.distance * u.Mpc
    tab["redshift"] = catalog.redshift
    tab["period"] = np.where(has_period, catalog.period, np.nan) * u.day
    tab["window"] = np.where(has_period, "period", "band")
    tab["status"] = np.where(inside, "searched", "outside_band")
    tab["predicted_frequency"] = centre * u.Hz
    tab["frequency_low"] = np.where(inside, frequencies[np.clip(lo, 0, None)], np.nan) * u.Hz
    tab["frequency_high"] = np.where(inside, frequencies[np.clip(hi, 0, None)], np.nan) * u.Hz
    tab["n_bins"] = widths
    tab["fe"] = stat
    tab["best_frequency"] = best_f * u.Hz
    tab["p_value"] = p
    tab["p_method"] = p_method
    if "scrambles" in p_values and quoted != "scrambles":
        ps = np.full(n, np.nan)
        ps[searched] = p_values["scrambles"][0]
        tab["p_value_scramble"] = ps
    tab["p_family"] = p_family
    tab["p_bonferroni"] = p_bonf
    tab["q_fdr"] = q_fdr
    tab["followed_up"] = followed
    tab["strain_95"] = strain95
    tab["chirp_mass_95"] = mc95 * u.solMass
    tab["limit_frequency"] = np.where(limit_index >= 0, frequencies[np.clip(limit_index, 0, None)], np.nan) * u.Hz
    tab = tab[order]
    tab["rank"] = np.arange(1, n + 1)
    tab.meta.update({
        "statistic": "Fe maximised over the frequency window at the fixed sky position (2Fe ~ chi2(4) per template)",
        "p_value": f"from {quoted}: pooled by window width; empirical while >= 10 null draws reach the value, "
                   "extreme-value tail beyond",
        "p_family": "Holm (1979) family-wise adjusted p-value over the searched targets",
        "q_fdr": f"{'Benjamini-Hochberg' if options.fdr_method == 'bh' else 'Benjamini-Yekutieli'} adjusted p-value",
        "frequency_convention": f"observer frame; f_gw = 2 x {options.period_factor:g} / P_obs, P_obs = "
                                + ("(1 + z) P_catalogue" if options.period_frame == "rest" else "P_catalogue"),
        "chirp_mass_95": "observer-frame (redshifted) chirp mass; 95 % Bayesian limit at limit_frequency",
        "catalog": str(options.catalog),
    })
    fcols = ["name", "ra", "dec", "distance", "fe", "best_frequency", "frequency_low", "frequency_high", "p_value",
             "p_family", "q_fdr"]
    ftab = tab[tab["followed_up"]][fcols]
    ftab.meta["meaning"] = (f"targets with p_family < {options.followup_threshold:g} (at most "
                            f"{options.followup_top}); follow them up with the sky at the target")

    n_searched = int(searched.size)
    summary = {
        "catalog": str(options.catalog),
        "n_targets": int(n),
        "n_searched": n_searched,
        "n_outside_band": int(n - n_searched),
        "n_period_targets": int(np.sum(has_period & inside)),
        "n_band_targets": int(np.sum(~has_period & inside)),
        "frequency_range": [float(frequencies[0]), float(frequencies[-1])],
        "n_frequencies": int(frequencies.size),
        "oversample": int(options.oversample),
        "null": options.null,
        "p_value_from": quoted,
        "null_sims": int(options.null_sims) if "simulations" in null else 0,
        "scrambles": int(options.scrambles) if "scrambles" in null else 0,
        "fdr_method": options.fdr_method,
        "frequency_convention": tab.meta["frequency_convention"],
        "n_family_below_0.05": int(np.sum(p_family < 0.05)),
        "n_fdr_below_0.05": int(np.sum(q_fdr < 0.05)),
        "n_tail_p_values": int(np.sum(p_method == "tail")),
        "followup_threshold": float(options.followup_threshold),
        "followup": [{"name": str(r["name"]), "ra": float(r["ra"]), "dec": float(r["dec"]),
                      "frequency": float(r["best_frequency"]), "frequency_low": float(r["frequency_low"]),
                      "frequency_high": float(r["frequency_high"]), "p_family": float(r["p_family"]),
                      "sky_radius": float(options.followup_sky_radius)}
                     for r in ftab],
        "noise_model": {**stage_noise_statement(array, noise), **engine.describe()},
        "seed": int(seed),
    }
    if n_searched:
        top = tab[0]
        summary["best"] = {"name": str(top["name"]), "fe": float(top["fe"]), "p_value": float(top["p_value"]),
                           "p_family": float(top["p_family"]), "q_fdr": float(top["q_fdr"]),
                           "best_frequency": float(top["best_frequency"]), "window": str(top["window"])}
    if not options.no_limits and n_searched:
        finite = np.isfinite(mc95)
        if finite.any():
            i = int(np.nanargmin(np.where(finite, mc95, np.inf)))
            summary["tightest_limit"] = {"name": str(catalog.name[i]), "chirp_mass_95": float(mc95[i]),
                                         "distance": float(catalog.distance[i]),
                                         "frequency": float(frequencies[limit_index[i]])}
        summary["limits"] = {"quadrature": options.quadrature, "runner": limits_engine,
                             "median_chirp_mass_95": _finite_or_none(np.nanmedian(mc95) if finite.any() else np.nan)}
    if "scrambles" in p_values and "simulations" in p_values:
        a, b = p_values["simulations"][0], p_values["scrambles"][0]
        summary["scramble_vs_simulation"] = {"median_ratio": _finite_or_none(np.median(b / np.maximum(a, 1e-300)))}

    files = {}
    folder.mkdir(parents=True, exist_ok=True)
    write_table_atomic(folder / "results.ecsv", tab)
    files["results"] = str(folder / "results.ecsv")
    write_table_atomic(folder / "followup_targets.ecsv", ftab)
    files["followup_targets"] = str(folder / "followup_targets.ecsv")
    if not options.no_plots and n_searched:
        t = time.time()
        # lazy: matplotlib is loaded only when plots are drawn
        from .plots import make_plots

        files.update(make_plots(folder, tab, array, quoted))
        timings["plots_seconds"] = time.time() - t
    timings["wall_seconds"] = time.time() - started
    summary["timings"] = {k: round(v, 3) for k, v in timings.items()}
    summary["files"] = sorted(Path(f).name for f in files.values())
    write_json_atomic(folder / "targets_summary.json", summary)
    files["summary"] = str(folder / "targets_summary.json")
    return TargetsResult(tab, ftab, summary, files, null)


def _finite_or_none(v):
    v = float(v)
    return v if math.isfinite(v) else None


__all__ = ["TargetsOptions", "TargetsResult", "run_targets", "MAX_NULL_SIMS", "MAX_SCRAMBLES"]
