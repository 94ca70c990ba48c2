"""The one place that decides which noise model a run's stages use (``--noise-model``, ``[noise] model``).

:func:`resolve_noise_model` returns the array carrying the chosen per-pulsar noise, the engine
:class:`~cwsearch.physics.noise.NoiseSettings` and a description (source, values, checksums) that
every stage writes into its summary and the report shows:

* ``estimate`` (default): the model fitted by the noise stage. ``RUN_DIR/noise/noise_model.ecsv`` is
  reused when it is a finished fit (its summary.json is there) of the same dataset and, in a run
  (``cwsearch run``), with the run file's fit options and seed (:func:`reusable_fit`); otherwise the
  noise stage runs first.
* ``dataset``: the values of the dataset files (``pulsars.ecsv`` red noise, ``noise.ecsv`` white
  factors) with the run's noise settings, fixed (the behaviour before the noise stage existed).
* a FILE: a noise table (written by the noise stage or by hand). A table that records another
  dataset's checksum is refused (exit 2, naming both checksums); one naming an unknown pulsar or
  backend is refused naming file, row and column.

With ``estimate`` or a FILE, the run's own common-process and red-noise switches cannot apply (the
model has its own): each one set is reported in the description's ``notes`` and as a warning,
never dropped silently.

Examples
--------
>>> from cwsearch.physics.simulate import invented_array, simulated_array
>>> arr = simulated_array(invented_array(n_pulsars=2, years=8, seed=1, toas_per_pulsar=60), seed=2)
>>> r = resolve_noise_model(arr, None, "dataset")
>>> r.description["source"], r.array is arr
('dataset', True)
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, replace
from pathlib import Path

from ..core.errors import InputError
from ..data.dataset import _read_table
from ..inference.noisefit import apply_noise_model, read_noise_table
from ..inference.noisefit import describe_noise_model as describe
from ..physics.noise import NoiseSettings
from ..stages.noise.stage import SUMMARY_NAME, TABLE_NAME, NoiseOptions, fit_fingerprint, model_settings, run_noise


class NoiseModelWarning(UserWarning):
    """A run setting that the chosen noise model replaces, or a noise table without a dataset checksum."""


@dataclass
class ResolvedNoise:
    """The noise model of a run: ``array`` (pulsars carry their noise), ``noise`` (engine settings),
    ``description`` (JSON-ready: source, table, checksums, values, notes)."""

    array: object
    noise: object
    description: dict

    def fingerprint(self) -> dict:
        """What identifies the model (for the stages' input hashes): source, table checksum, settings."""
        d = self.description
        return {"source": d["source"], "table_checksum": d.get("table_checksum"), "settings": d["settings"]}


def table_path(run_dir) -> Path:
    """``RUN_DIR/noise/noise_model.ecsv``."""
    return Path(run_dir) / "noise" / TABLE_NAME


def _table_meta(path) -> dict:
    return dict(_read_table(Path(path)).meta)


def _ignored_settings(noise) -> list:
    notes = []
    if noise is None:
        return notes
    if noise.common_log10_amplitude is not None:
        notes.append(f"the run's common_log10_amplitude = {noise.common_log10_amplitude:g} is not used: the noise "
                     "model has its own common process (use the dataset noise model to set it by hand)")
    if not noise.pulsar_red_noise:
        notes.append("the run's pulsar_red_noise = false is not used: the noise model decides per pulsar "
                     "(use the dataset noise model to switch red noise off)")
    if not noise.white_noise_factors:
        notes.append("the run's white_noise_factors = false is not used: the noise model's white noise applies")
    return notes


def _from_table(array, path, noise, source, dataset_checksum, reused, notes):
    meta = _table_meta(path)
    stored = meta.get("dataset_checksum")
    if stored is None:
        notes = list(notes) + [f"the noise table {path} records no dataset checksum; it was applied because every "
                               "pulsar and backend of the dataset has a row"]
    model = read_noise_table(path, array, dataset_checksum=dataset_checksum if stored is not None else None)
    common = meta.get("common") or {}
    correlation = common.get("correlation") if isinstance(common, dict) else None
    correlation = "uncorrelated" if not correlation or "uncorrelated" in str(correlation) else str(correlation)
    settings = model_settings(model, noise, correlation if model.common_log10_amplitude is not None else "none")
    new = apply_noise_model(array, model)
    desc = describe(new, settings, source, table=path, dataset_checksum=dataset_checksum,
                    table_dataset_checksum=stored, reused=reused, notes=notes, common_correlation=correlation)
    return ResolvedNoise(new, settings, desc)


def resolve_noise_model(array, run_dir, model="estimate", *, noise=None, dataset_checksum=None, options=None,
                        seed=0, progress=False) -> ResolvedNoise:
    """The noise model every stage of a run uses (module docstring).

    Parameters
    ----------
    array : the dataset as read (:class:`~cwsearch.data.model.Array`)
    run_dir : the run folder (``estimate`` reads/writes ``RUN_DIR/noise/``)
    model : ``"estimate"``, ``"dataset"`` or the path of a noise table
    noise : the run's :class:`~cwsearch.physics.noise.NoiseSettings` (``red_components`` is the fit's basis)
    dataset_checksum : :func:`cwsearch.data.dataset.dataset_checksum` of the dataset (required for ``estimate``)
    options : :class:`~cwsearch.stages.noise.NoiseOptions` of a fit run here (default options)
    seed : seed of a fit run here
    """
    noise = noise or NoiseSettings()
    model = str(model or "estimate")
    if model == "dataset":
        desc = describe(array, noise, "dataset", dataset_checksum=dataset_checksum)
        resolved = ResolvedNoise(array, noise, desc)
    elif model == "estimate":
        if run_dir is None:
            raise InputError("the estimated noise model needs a run folder (--out)")
        path = table_path(run_dir)
        # a run file states the fit's options: a table must match them; a stage command states none (the
        # `noise` command sets them), so any finished fit of this dataset is reused
        fingerprint = None if options is None else fit_fingerprint(replace_model(options, "estimate"), noise, seed,
                                                                   dataset_checksum)
        reused = dataset_checksum is not None and reusable_fit(path, dataset_checksum, fingerprint)
        if not reused:
            run_noise(array, run_dir, replace_model(options or NoiseOptions(), "estimate"), noise=noise, seed=seed,
                      progress=progress, dataset_checksum=dataset_checksum)
        resolved = _from_table(array, path, noise, "estimate", dataset_checksum, reused, _ignored_settings(noise))
    else:
        path = Path(model).expanduser()
        if not path.is_file():
            raise InputError("noise table not found (--noise-model takes estimate, dataset or a noise table)",
                             file=path)
        resolved = _from_table(array, path.resolve(), noise, "file", dataset_checksum, None, _ignored_settings(noise))
    for note in resolved.description["notes"]:
        warnings.warn(note, NoiseModelWarning, stacklevel=2)
    resolved.array.noise_model = resolved.description
    return resolved


def reusable_fit(path, dataset_checksum, fingerprint=None) -> bool:
    """True when ``path`` (RUN_DIR/noise/noise_model.ecsv) is a finished fit of the dataset with checksum
    ``dataset_checksum``: the stage's summary.json (written last) is there, and, when ``fingerprint`` is
    given (:func:`cwsearch.stages.noise.stage.fit_fingerprint` of a run file's options and seed), the
    table's header records that same fingerprint. Anything else (an interrupted fit, a fit with other
    options or another seed, an unreadable table) is fitted again, so that a run's numbers never depend
    on what an earlier, interrupted or different run left in the folder."""
    path = Path(path)
    if not (path.is_file() and (path.parent / SUMMARY_NAME).is_file()):
        return False
    try:
        meta = _table_meta(path)
    except InputError:
        return False
    if str(meta.get("dataset_checksum")) != str(dataset_checksum):
        return False
    return fingerprint is None or str(meta.get("fit_fingerprint")) == str(fingerprint)


def replace_model(options, model):
    """``options`` (NoiseOptions) with another ``model``."""
    return replace(options, model=model)


def format_description(desc: dict) -> str:
    """One line naming the noise model (for the command line)."""
    src = desc["source"]
    head = {"estimate": "estimated", "dataset": "dataset values", "file": "noise table"}[src]
    if desc.get("table"):
        head += f" ({desc['table']}" + (", reused" if desc.get("reused") else "") + ")"
    c = desc.get("common")
    common = (f"common log10 A = {c['log10_amplitude']:.2f}, index {c['index']:.2f} ({c['correlation']})" if c
              else "no common process")
    return f"noise model: {head}; {desc['n_red_noise']} of {len(desc['pulsars'])} pulsars with red noise; {common}"


__all__ = ["resolve_noise_model", "ResolvedNoise", "NoiseModelWarning", "describe", "format_description",
           "table_path"]
