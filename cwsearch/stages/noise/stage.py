"""The noise stage: estimate the noise model from the residuals and write it for every later stage.

``run_noise`` fits, from the residuals alone (:func:`cwsearch.inference.noisefit.fit_noise`,
docs/design.md §5a): white-noise ``sigma_scale``/``sigma_added`` per pulsar and backend, power-law
red noise per pulsar with a model choice (likelihood ratio 2 Δln L against a threshold), and a
common red process (uncorrelated between pulsars, or Hellings–Downs correlated when the run's
``common_correlation`` says so and the correlated array engine is installed). It writes
``RUN_DIR/noise/``:

* ``noise_model.ecsv`` — the fitted model, one row per pulsar and backend, units and the method,
  bounds and dataset checksum in the header (:func:`cwsearch.inference.noisefit.write_noise_table`);
* ``summary.json`` — every value with its uncertainty, the prior ranges (bounds), the per-pulsar
  model choice with its figure and threshold, the common-process detection figure, goodness of
  fit, warnings and the dataset checksum;
* ``spectra.png`` — per pulsar the white-noise-weighted residual power against the fitted model;
* ``common_likelihood.png`` — the common-process likelihood over amplitude × index.

Which noise model the other stages use (``estimate``, ``dataset`` or a FILE) is decided in one
place, :func:`cwsearch.job.noisemodel.resolve_noise_model`; this stage only fits and writes.

Examples
--------
>>> NoiseOptions().model, NoiseOptions(model="dataset").validate().model
('estimate', 'dataset')
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import time
import warnings
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import numpy as np

from ...core.errors import InputError
from ...core.fileio import write_json_atomic, write_table_atomic
from ...data.truth import injected_noise
from ...inference.noisefit import (GOF_THRESHOLD, NoiseFitWarning, UncorrelatedCommonLikelihood,
                                   apply_noise_model, fit_common, fit_noise, noise_table)
from ...inference.execution import TaskRunner, available_cpus
from ...physics.noise import NoiseSettings
from . import plots
from .options import MODEL_CHOICES, PARALLEL_FROM_TOAS, NoiseOptions  # the options live beside (standard library only)

#: file names inside RUN_DIR/noise/
TABLE_NAME = "noise_model.ecsv"
SUMMARY_NAME = "summary.json"


@dataclass
class NoiseResult:
    """What :func:`run_noise` produced: the fit, the model later stages use, the summary and files."""

    fit: object
    model: object
    summary: dict
    files: dict


def common_correlation(noise) -> str:
    """The run's common-process correlation (``hellings-downs``, ``uncorrelated``, ``none``); the noise
    settings' ``common_correlation`` when they have one, else ``uncorrelated``."""
    value = getattr(noise, "common_correlation", None) if noise is not None else None
    return str(value) if value else "uncorrelated"


def correlated_available() -> bool:
    """True when the Hellings–Downs array engine (:mod:`cwsearch.physics.correlated`) is installed."""
    try:
        # lazy: the correlated engine is optional (numba kernels)
        from ...physics import correlated  # noqa: F401
    except ImportError:
        return False
    return True


class CorrelatedCommonLikelihood:
    """Array log-likelihood of a correlated common process (``correlation`` kind), for ``fit_noise``.

    ``self(log10_amplitude, index)`` is the exact array log-likelihood with the pulsars' white and own
    red noise as carried by ``array`` (:class:`cwsearch.physics.correlated.ArrayWeighting`); no
    analytic gradient (the common fit then uses finite differences).
    """

    def __init__(self, array, red_components=30, correlation="hellings-downs"):
        # lazy: the correlated engine is optional (numba kernels)
        from ...physics.correlated import ArrayWeighting, CommonProcess

        settings = NoiseSettings(red_components=int(red_components), pulsar_red_noise=True,
                                 common_log10_amplitude=None, white_noise_factors=True)
        self._base = ArrayWeighting(array, settings, CommonProcess(-15.0, 13 / 3, int(red_components), correlation))
        self.evaluations = 0

    def __call__(self, log10_amplitude, index) -> float:
        self.evaluations += 1
        try:
            return float(self._base.with_common(log10_amplitude, index).log_likelihood())
        except np.linalg.LinAlgError:
            return -1e20


def _correlated_factory(correlation):
    def factory(array, red_components):
        return CorrelatedCommonLikelihood(array, red_components, correlation)
    return factory


def fit_fingerprint(options: NoiseOptions, noise: NoiseSettings | None, seed, dataset_checksum,
                    correlation=None) -> str:
    """SHA-256 of everything that decides a fit's numbers: the fit settings (from ``options`` and the
    basis size ``noise.red_components``), the common-process correlation asked for, the seed of the extra
    optimiser starts and the dataset checksum (docs/design.md §5a).

    :func:`run_noise` records it in the table's header (``fit_fingerprint``); the ``estimate`` noise model
    reuses a fitted table only when its fingerprint equals the one of the run at hand, so a table fitted
    with other options, another seed or by an interrupted fit is fitted again, never silently reused.
    """
    noise = noise or NoiseSettings()
    settings = options.validate().fit_settings(noise.red_components)
    wanted = correlation or common_correlation(noise)
    if wanted == "none":
        settings = replace(settings, common=False)
    record = {"settings": asdict(settings), "correlation": wanted, "seed": int(seed) if isinstance(seed, (int, np.integer)) else None,
              "dataset_checksum": None if dataset_checksum is None else str(dataset_checksum)}
    return hashlib.sha256(json.dumps(record, sort_keys=True).encode()).hexdigest()


def run_noise(array, run_dir, options: NoiseOptions = NoiseOptions(), *, noise: NoiseSettings | None = None,
              seed=0, progress=True, dataset_checksum=None, correlation=None) -> NoiseResult:
    """Fit the noise model of ``array`` and write ``run_dir/noise/`` (see the module docstring).

    Parameters
    ----------
    array : :class:`~cwsearch.data.model.Array` (its quoted sigmas and residuals; its noise values are not used)
    run_dir : run folder
    options : :class:`NoiseOptions`
    noise : :class:`~cwsearch.physics.noise.NoiseSettings` (its ``red_components`` sets the Fourier basis;
        its ``common_correlation``, when present, the correlation of the common fit)
    seed : int (extra optimiser starts)
    dataset_checksum : recorded in the table, so that it is only reused on the same dataset
    correlation : override of the common-process correlation (``hellings-downs`` or ``uncorrelated``)
    """
    options = options.validate()
    noise = noise or NoiseSettings()
    started = time.time()
    out = Path(run_dir) / "noise"
    settings = options.fit_settings(noise.red_components)
    wanted = correlation or common_correlation(noise)
    if wanted == "none":
        settings = replace(settings, common=False)
    used = "uncorrelated"
    factory = None
    notes = []
    if settings.common and wanted not in ("uncorrelated", "none"):
        if correlated_available():
            factory, used = _correlated_factory(wanted), wanted
        else:
            notes.append(f"the run asks for a {wanted} common process, but the correlated array engine is not "
                         "installed: the common process was fitted uncorrelated between pulsars")
    if progress:
        print(f"noise: fitting {len(array)} pulsars (white per backend, red per pulsar"
              + (f", common process {used})" if settings.common else ")"), flush=True)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", NoiseFitWarning)
        fit = fit_noise_checked(array, settings, seed, dataset_checksum, factory, options)
    messages = notes + [str(w.message) for w in caught if issubclass(w.category, NoiseFitWarning)]
    # re-emit, so that callers (and the command line) see them
    for m in messages:
        warnings.warn(m, NoiseFitWarning, stacklevel=2)
    fit.common_correlation = used if fit.common is not None else "none"
    model = fit.model()
    engine_settings = model_settings(model, noise, used if fit.common is not None else "none")

    comparison = None
    if fit.common is not None and factory is not None:
        # correlated against uncorrelated: both maximised with the same pulsar models
        base = apply_noise_model(array, replace(model, common_log10_amplitude=None), check=False)
        plain = fit_common(UncorrelatedCommonLikelihood(base, settings.red_components), fit.bounds,
                           index=settings.common_index)
        comparison = {"correlated": used, "log_likelihood_correlated": fit.common.log_likelihood,
                      "log_likelihood_uncorrelated": plain.log_likelihood,
                      "statistic": 2.0 * (fit.common.log_likelihood - plain.log_likelihood),
                      "uncorrelated_log10_amplitude": plain.log10_amplitude, "uncorrelated_index": plain.index,
                      "meaning": "2 [max ln L(correlated) - max ln L(uncorrelated)], same pulsar noise"}

    files = {"table": out / TABLE_NAME, "summary": out / SUMMARY_NAME}
    out.mkdir(parents=True, exist_ok=True)
    # the summary is written last: a noise folder with a table but no summary is an interrupted fit (the
    # estimate noise model then fits again); an old summary must not vouch for the new table
    files["summary"].unlink(missing_ok=True)
    table = noise_table(fit)
    table.meta["fit_fingerprint"] = fit_fingerprint(options, noise, seed, dataset_checksum, correlation)
    write_table_atomic(files["table"], table)
    contour = None
    if not options.no_plots:
        files["spectra_plot"] = out / "spectra.png"
        truth = injected_noise(array)
        plots.spectra_plot(files["spectra_plot"], apply_noise_model(array, model), engine_settings, fit, truth=truth)
        if fit.common is not None:
            files["common_plot"] = out / "common_likelihood.png"
            like_array = apply_noise_model(array, replace(model, common_log10_amplitude=None), check=False)
            like = (factory or UncorrelatedCommonLikelihood)(like_array, settings.red_components)
            # the correlated likelihood costs one (N_psr 2K)^2 Cholesky per point: a coarser grid
            points = options.contour_points if factory is None else min(options.contour_points, 8)
            contour = plots.common_contour_plot(files["common_plot"], like, fit, points, used, truth=truth)
    summary = fit_summary(fit, options, dataset_checksum, used, messages, comparison, GOF_THRESHOLD)
    summary["engine_settings"] = asdict(engine_settings)
    if contour is not None:
        summary["common"]["contour"] = contour
    summary["files"] = {k: v.name for k, v in files.items()}
    summary["seconds"] = round(time.time() - started, 3)
    write_json_atomic(files["summary"], summary)
    return NoiseResult(fit, model, summary, files)


def fit_noise_checked(array, settings, seed, dataset_checksum, factory, options: NoiseOptions | None = None):
    """:func:`~cwsearch.inference.noisefit.fit_noise` after the array-level input checks of this stage, with
    the per-pulsar fits on the task runner ``options`` asks for (:func:`fit_runner`)."""
    if len(array) == 0:
        raise InputError("the dataset has no pulsars to fit")
    with fit_runner(array, options) as runner:
        return fit_noise(array, settings, seed=seed, dataset_checksum=dataset_checksum, common_likelihood=factory,
                         runner=None if runner.kind == "serial" else runner)


def fit_runner(array, options: NoiseOptions | None) -> TaskRunner:
    """Where the per-pulsar fits run: ``options.scheduler`` (Dask), ``options.workers`` local processes, or,
    with neither set, one process per CPU from :data:`PARALLEL_FROM_TOAS` TOAs in all (else this process)."""
    scheduler = getattr(options, "scheduler", None)
    workers = getattr(options, "workers", None)
    if workers is None and not scheduler:
        large = sum(p.n_toas for p in array) >= PARALLEL_FROM_TOAS
        workers = min(available_cpus(), len(array)) if large else 1
    return TaskRunner(workers=workers, scheduler=scheduler)


def model_settings(model, noise: NoiseSettings | None, correlation: str) -> NoiseSettings:
    """Engine settings for a fitted :class:`~cwsearch.inference.noisefit.NoiseModel`: its own settings,
    with the run's ``common_correlation`` (when the settings have that field) set to what was fitted."""
    settings = model.noise_settings()
    names = {f.name for f in dataclasses.fields(settings)}
    if "common_correlation" in names:
        settings = replace(settings, common_correlation=correlation)
    return settings


def _num(v):
    v = float(v)
    return v if np.isfinite(v) else None


def fit_summary(fit, options, dataset_checksum, correlation, messages, comparison, gof_threshold) -> dict:
    """The JSON summary of a :class:`~cwsearch.inference.noisefit.NoiseFit` (every value with its uncertainty)."""
    s = fit.settings
    meta = fit.meta()
    pulsars = []
    for p in fit.pulsars:
        g = p.gof
        pulsars.append({
            "name": p.name,
            "white": {b: {"n_toas": p.n_toas[b], "sigma_scale": _num(p.sigma_scale[b]),
                          "sigma_scale_err": _num(p.sigma_scale_err[b]), "sigma_added_s": _num(p.sigma_added[b]),
                          "sigma_added_err_s": _num(p.sigma_added_err[b])} for b in p.backends},
            "red_noise": {
                "model": "white + red" if p.red_noise else "white only",
                "claimed": bool(p.red_noise), "fitted": bool(p.red_fitted),
                "statistic": _num(p.red_statistic), "threshold": float(s.red_noise_threshold),
                "statistic_meaning": "2 [max ln L(white + red) - max ln L(white)], common process fixed",
                "log10_amplitude": _num(p.red_log10_amplitude), "log10_amplitude_err": _num(p.red_log10_amplitude_err),
                "log10_amplitude_interval_2sigma": [_num(p.red_log10_amplitude_low), _num(p.red_log10_amplitude_high)],
                "index": _num(p.red_index), "index_err": _num(p.red_index_err),
                "log10_amplitude_95": _num(p.red_log10_amplitude_95)},
            "converged": bool(p.converged),
            "goodness_of_fit": None if g is None else {
                "normality_pvalue": _num(g.normality_pvalue), "normality_statistic": _num(g.normality_statistic),
                "low_frequency_pvalue": _num(g.lowfreq_pvalue), "low_frequency_statistic": _num(g.lowfreq_statistic),
                "low_frequency_dof": int(g.lowfreq_dof), "flagged": bool(g.flagged)},
        })
    c = fit.common
    common = None
    if c is not None:
        common = {"log10_amplitude": _num(c.log10_amplitude), "log10_amplitude_err": _num(c.log10_amplitude_err),
                  "index": _num(c.index), "index_err": _num(c.index_err), "index_fixed": bool(c.index_fixed),
                  "statistic": _num(c.statistic),
                  "statistic_meaning": "2 [max ln L - ln L(amplitude at its lower bound)] (detection figure)",
                  "log10_amplitude_95": _num(c.log10_amplitude_95), "converged": bool(c.converged),
                  "correlation": correlation, "correlated_vs_uncorrelated": comparison}
    flagged = [p["name"] for p in pulsars if p["goodness_of_fit"] and p["goodness_of_fit"]["flagged"]]
    return {
        "stage": "noise",
        "dataset_checksum": dataset_checksum,
        "n_pulsars": len(fit.pulsars),
        "n_red_noise": int(sum(p.red_noise for p in fit.pulsars)),
        "red_noise_pulsars": [p.name for p in fit.pulsars if p.red_noise],
        "n_not_converged": int(sum(not p.converged for p in fit.pulsars)),
        "method": meta["method"],
        "uncertainties": meta["uncertainties"],
        "priors": meta["priors"],
        "bounds": meta["bounds"],
        "red_components": int(s.red_components),
        "red_noise_test": meta["red_noise_test"],
        "red_noise_threshold": float(s.red_noise_threshold),
        "min_toas_red": int(s.min_toas_red),
        "upper_limits": meta["upper_limits"],
        "goodness_of_fit_tests": {"normality": meta["normality_test"], "low_frequency": meta["low_frequency_test"],
                                  "threshold": float(gof_threshold)},
        "n_failed_goodness_of_fit": len(flagged),
        "failed_goodness_of_fit": flagged,
        "array_low_frequency": meta["array_low_frequency"],
        "common": common,
        "pulsars": pulsars,
        "warnings": list(messages),
        "options": asdict(options),
    }


__all__ = ["NoiseOptions", "NoiseResult", "run_noise", "fit_runner", "fit_fingerprint", "fit_summary", "model_settings", "common_correlation",
           "CorrelatedCommonLikelihood", "TABLE_NAME", "SUMMARY_NAME", "MODEL_CHOICES"]
