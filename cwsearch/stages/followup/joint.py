"""Joint follow-up of the confirmed sources: one posterior for all of them (docs/design.md §7a, §8).

:func:`run_joint_followup` samples K circular binaries at once with the joint
likelihood of :mod:`cwsearch.inference.multisource` (sum of the K signals,
Earth and pulsar terms, the run's one noise model; with a Hellings–Downs
common process the correlated background), with ptemcee through
:func:`cwsearch.inference.sampling.run_sampler` and its stopping rule.

Sources. One row each of ``RUN_DIR/confirmed_sources.ecsv`` (written by the
pipeline's subtract-and-rescan rounds; columns ``round``, ``ra``, ``dec``
[deg], ``frequency`` [Hz], and where known ``chirp_mass`` [solMass],
``strain``, ``inclination``, ``polarization``, ``phase`` [rad]), or the list
given by the caller.

Priors, per source, as the single-source follow-up's (``Prior``): the whole
sky; log-uniform frequency in ``frequency_window`` bins of 1/T_span either
side of the source's round estimate, except that where two sources' windows
overlap both are cut at the midpoint between their estimates (the windows
are then disjoint and ordered, so the labels cannot swap); log-uniform chirp
mass and strain, uniform orientation, binaries that merge within the data
excluded.

Start. The colder half of the temperature ladder starts in a small ball
around each source's round estimate (sky 2°, frequency 0.05 bins, strain
0.1 dex, orientation 0.1 rad where the estimate has them; chirp mass from
the prior); the hotter half from the prior. Unlike a single candidate the
confirmed sources have already been followed up one by one; the stopping
rule's burn-in and drift checks are the guard against a chain that has not
left its start.

Walkers: at least 2 × (8K) + 2 (ptemcee's ensemble moves need more walkers
than twice the dimension); ``options.walkers`` when larger.

Outputs in ``RUN_DIR/followup/joint/``: ``posterior.ecsv`` (one column block
per source, prefixed ``s1_``, ``s2_``, … in the units of the single-source
posterior, then ``log_likelihood``, ``log_prior``, ``iteration``,
``walker``), ``sources.ecsv`` (one row per source: median and 5 %/95 %
quantiles of every parameter), ``corner_source_K.png`` per source and
``summary.json`` (each source's parameters and sky position, the joint log
Bayes factor against noise alone, the sampler's figures and warnings).
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.table import Table

from ...core.errors import InputError
from ...core.fileio import write_json_atomic, write_table_atomic
from ...core.safeio import read_input_text
from ...data.truth import injected_binary
from ...inference import sampling
from ...inference.correlated_likelihood import likelihood_for
from ...inference.multisource import MultiSourceLikelihood
from ...inference.noisefit import stage_noise_statement
from ...physics.noise import NoiseSettings
from .options import FollowupOptions
from .stage import OUTPUT_COLUMNS, Prior, _intervals, _with_sample_columns, posterior_table, sky_summary

CONFIRMED_FILE = "confirmed_sources.ecsv"
#: columns a confirmed-sources row must have (the others are optional starting values)
REQUIRED_COLUMNS = ("ra", "dec", "frequency")
#: (column, unit of the file when the column has none, unit used here)
_COLUMNS = (("ra", u.deg, u.rad), ("dec", u.deg, u.rad), ("frequency", u.Hz, u.Hz),
            ("chirp_mass", u.solMass, u.solMass), ("strain", u.one, u.one), ("inclination", u.rad, u.rad),
            ("polarization", u.rad, u.rad), ("phase", u.rad, u.rad))
#: the start ball's widths: sky [rad], frequency [bins of 1/T], strain [dex], orientation [rad]
START_SKY, START_BINS, START_DEX, START_ANGLE = math.radians(2.0), 0.05, 0.1, 0.1
FOLDER = Path("followup") / "joint"


@dataclass
class ConfirmedSource:
    """One confirmed source's round estimate: frequency [Hz], ra, dec [rad], optional chirp mass [Msun],
    strain, inclination, polarisation, phase [rad]; ``round`` (1-based) and ``row`` of the file."""

    frequency: float
    ra: float
    dec: float
    chirp_mass: float | None = None
    strain: float | None = None
    inclination: float | None = None
    polarization: float | None = None
    phase: float | None = None
    round: int | None = None
    row: int | None = None


@dataclass
class JointResult:
    """Result of :func:`run_joint_followup`: ``summary`` (JSON-ready), the folder, the sampler result and
    the posterior table."""

    summary: dict
    folder: Path
    run: object
    table: Table


# ---------------------------------------------------------------- sources
def read_confirmed_sources(run_dir) -> list[ConfirmedSource]:
    """The rows of ``run_dir/confirmed_sources.ecsv`` (an InputError naming file, row and column for a
    bad one)."""
    path = Path(run_dir) / CONFIRMED_FILE
    text = read_input_text(path, Path(run_dir), what="confirmed sources")
    try:
        table = Table.read(text + "\n", format="ascii.ecsv")
    except Exception as exc:  # a malformed file: one line naming it
        raise InputError(f"cannot read the confirmed sources ({' '.join(str(exc).split())[:300]})",
                         file=path) from None
    return sources_from_table(table, path)


def sources_from_table(table, path=None) -> list[ConfirmedSource]:
    """:class:`ConfirmedSource` per row of an astropy Table with the columns of :data:`CONFIRMED_FILE`."""
    for name in REQUIRED_COLUMNS:
        if name not in table.colnames:
            raise InputError(f"missing column '{name}'", file=path, column=name)
    if len(table) == 0:
        raise InputError("no confirmed sources in the file", file=path)
    out = []
    for r in range(len(table)):
        values = {}
        for name, default, unit in _COLUMNS:
            if name not in table.colnames:
                values[name] = None
                continue
            col = table[name]
            try:
                x = float(col[r])
            except (TypeError, ValueError):
                raise InputError(f"'{name}' is not a number", file=path, row=r + 1, column=name) from None
            if not math.isfinite(x):
                if name in REQUIRED_COLUMNS:
                    raise InputError(f"'{name}' must be finite", file=path, row=r + 1, column=name)
                values[name] = None
                continue
            try:
                values[name] = float((x * (col.unit or default)).to_value(unit))
            except u.UnitConversionError:
                raise InputError(f"'{name}' has unit {col.unit}, expected one convertible to {default}", file=path,
                                 row=r + 1, column=name) from None
        if values["frequency"] <= 0:
            raise InputError("'frequency' must be > 0", file=path, row=r + 1, column="frequency")
        if not -math.pi / 2 <= values["dec"] <= math.pi / 2:
            raise InputError("'dec' must be within [-90, 90] deg", file=path, row=r + 1, column="dec")
        for name in ("chirp_mass", "strain"):
            if values[name] is not None and values[name] <= 0:
                values[name] = None            # no usable start value: the prior instead
        values["ra"] = values["ra"] % (2 * math.pi)
        rnd = int(table["round"][r]) if "round" in table.colnames else r + 1
        out.append(ConfirmedSource(round=rnd, row=r + 1, **values))
    return out


def sources_from_rows(rows) -> list[ConfirmedSource]:
    """:class:`ConfirmedSource` per dict with the keys of ``confirmed_sources.ecsv`` (ra, dec [deg],
    frequency [Hz], ...; None for an unknown value; other keys ignored), e.g. the pipeline's rounds."""
    table = Table()
    for name, default, _ in _COLUMNS:
        if any(name in r for r in rows):
            values = [np.nan if r.get(name) is None else r.get(name) for r in rows]
            table[name] = np.array(values, dtype=float) * default
    table["round"] = [int(r.get("round") or k + 1) for k, r in enumerate(rows)]
    return sources_from_table(table)


def frequency_windows(sources, span, bins):
    """log10 frequency bands [(lo, hi)] per source: ``bins`` of 1/span either side of its frequency
    (never below 0.5/span), cut at the midpoint between two sources' frequencies where the windows
    would overlap."""
    half = bins / span
    freqs = np.array([s.frequency for s in sources])
    lo = np.maximum(freqs - half, 0.5 / span)
    hi = freqs + half
    order = np.argsort(freqs)
    for a, b in zip(order[:-1], order[1:]):
        if hi[a] > lo[b]:
            mid = 0.5 * (freqs[a] + freqs[b])
            hi[a], lo[b] = min(hi[a], mid), max(lo[b], mid)
    if np.any(lo >= hi):
        raise InputError("two confirmed sources at the same frequency: the joint fit needs distinct frequencies")
    return [(float(np.log10(a)), float(np.log10(b))) for a, b in zip(lo, hi)]


# ---------------------------------------------------------------- prior and start
class JointPrior:
    """The product of one single-source :class:`~cwsearch.stages.followup.stage.Prior` per source block."""

    def __init__(self, priors):
        self.priors = list(priors)

    def __call__(self, theta):
        theta = np.atleast_2d(theta)
        return sum(p(theta[:, 8 * k: 8 * (k + 1)]) for k, p in enumerate(self.priors))

    def draw(self, rng, size):
        return np.hstack([p.draw(rng, size) for p in self.priors])


def _ball(prior: Prior, source: ConfirmedSource, span, size, rng, uniform_strain):
    """``size`` points (W, 8) of one source block around its round estimate (see the module docstring)."""
    x = prior.draw(rng, size)
    ra = source.ra + rng.normal(0, START_SKY, size) / max(math.cos(source.dec), 0.1)
    dec = np.clip(source.dec + rng.normal(0, START_SKY, size), -math.pi / 2, math.pi / 2)
    x[:, 0], x[:, 1] = np.remainder(ra, 2 * np.pi), np.sin(dec)
    x[:, 2] = np.log10(source.frequency + rng.normal(0, START_BINS / span, size))
    if source.strain is not None:
        x[:, 4] = (source.strain * 10 ** rng.normal(0, START_DEX, size) if uniform_strain else
                   np.log10(source.strain) + rng.normal(0, START_DEX, size))
    if source.inclination is not None:
        x[:, 5] = np.clip(math.cos(source.inclination) + rng.normal(0, START_ANGLE, size), -1, 1)
    for col, value in ((6, source.polarization), (7, source.phase)):
        if value is not None:
            x[:, col] = np.remainder(value + rng.normal(0, START_ANGLE, size), np.pi)
    return x


def joint_initial_positions(prior: JointPrior, likelihood, sources, span, shape, rng, uniform_strain=False):
    """Walkers (temperatures, walkers, 8K): the colder half of the ladder around the round estimates, the
    hotter half from the prior; points outside the prior or with a non-finite likelihood redrawn from it."""
    n_t, n_w = shape
    pos = prior.draw(rng, n_t * n_w).reshape(n_t, n_w, -1)
    cold = max(1, (n_t + 1) // 2)
    for k, (block, source) in enumerate(zip(prior.priors, sources)):
        pos[:cold, :, 8 * k: 8 * (k + 1)] = _ball(block, source, span, cold * n_w, rng,
                                                   uniform_strain).reshape(cold, n_w, 8)
    pos = pos.reshape(n_t * n_w, -1)
    for _ in range(20):
        bad = ~np.isfinite(prior(pos))
        bad[~bad] = ~np.isfinite(likelihood.batch(pos[~bad]))
        if not bad.any():
            break
        pos[bad] = prior.draw(rng, int(bad.sum()))
    return pos.reshape(n_t, n_w, -1)


# ---------------------------------------------------------------- outputs
def joint_posterior_table(likelihood: MultiSourceLikelihood, samples):
    """One column block per source (:data:`~cwsearch.stages.followup.stage.OUTPUT_COLUMNS` prefixed
    ``s{k}_``), from the sampler coordinates (N, 8K)."""
    table = Table()
    for k, block in enumerate(likelihood.split(samples)):
        single = posterior_table(likelihood.base, block)
        for name in OUTPUT_COLUMNS:
            table[f"s{k + 1}_{name}"] = single[name]
    table.meta["description"] = ("equally weighted joint posterior samples (T = 1) of the cwsearch joint "
                                 "follow-up; source k's parameters prefixed s{k}_")
    return table


def source_table(table, n_sources):
    """Source k's columns of the joint posterior, without the prefix (a view)."""
    sub = Table()
    for name in OUTPUT_COLUMNS:
        sub[name] = table[f"s{n_sources}_{name}"]
    return sub


def parameter_table(per_source, sources):
    """``sources.ecsv``: one row per source, the median and 5 % / 95 % quantiles of each parameter."""
    out = Table()
    out["source"] = np.arange(1, len(per_source) + 1)
    out["round"] = [s.round if s.round is not None else -1 for s in sources]
    for name in OUTPUT_COLUMNS:
        unit = per_source[0][name].get("unit", "") if name in per_source[0] else ""
        for suffix, pick in (("", lambda d: d["median"]), ("_q05", lambda d: d["interval_90"][0]),
                             ("_q95", lambda d: d["interval_90"][1])):
            values = [pick(p[name]) if name in p else np.nan for p in per_source]
            out[name + suffix] = values * u.Unit(unit) if unit else values
    out.meta["description"] = ("each confirmed source's parameters from the joint posterior: median and "
                               "5 % / 95 % quantiles (90 % interval)")
    return out


def _truths(run_dir, array, windows):
    """The injected binary (data/truth.py) given to the source whose frequency window holds it."""
    out = [None] * len(windows)
    try:
        truth = injected_binary(array) or injected_binary(run_dir)
    except Exception:   # no or an unreadable injection.json: no truth marks
        truth = None
    if truth and "frequency" in truth:
        for k, (lo, hi) in enumerate(windows):
            if 10 ** lo <= truth["frequency"] <= 10 ** hi:
                out[k] = truth
    return out


# ---------------------------------------------------------------- the stage entry
def run_joint_followup(array, run_dir, sources=None, options: FollowupOptions = FollowupOptions(), *,
                       noise=None, seed=0, progress=True, folder=None) -> JointResult:
    """Sample all confirmed sources at once and write ``run_dir/followup/joint/`` (module docstring).

    ``sources``: a list of :class:`ConfirmedSource` (or dicts of its fields), an astropy Table with
    the columns of ``confirmed_sources.ecsv``, or None to read ``run_dir/confirmed_sources.ecsv``.
    ``options``: the follow-up's (sampler settings, model, ``frequency_window``, ``no_plots``);
    ``noise``: the run's :class:`~cwsearch.physics.noise.NoiseSettings` or
    :class:`~cwsearch.physics.correlated.ArrayNoise`; ``folder``: where to write (default
    ``run_dir/followup/joint``; the pipeline's rounds step uses ``RUN_DIR/rounds/joint``).
    """
    options.validate()
    run_dir = Path(run_dir)
    noise = NoiseSettings() if noise is None else noise
    if sources is None:
        sources = read_confirmed_sources(run_dir)
    elif isinstance(sources, Table):
        sources = sources_from_table(sources)
    elif sources and not isinstance(sources[0], ConfirmedSource):
        sources = sources_from_rows(sources)
    if not sources:
        raise InputError("no confirmed sources to follow up jointly")
    n_src = len(sources)
    folder = run_dir / FOLDER if folder is None else Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    started = time.monotonic()
    model = dict(pulsar_term=not options.earth_term_only, evolution=options.evolution,
                 phase_grid=options.phase_grid, uniform_strain=options.strain_prior == "uniform")
    base = likelihood_for(array, noise, **model)
    likelihood = MultiSourceLikelihood(base, n_src)
    span = array.span
    windows = frequency_windows(sources, span, options.frequency_window)
    uniform = options.strain_prior == "uniform"
    prior = JointPrior([Prior(base, band, uniform_strain=uniform) for band in windows])
    dim = 8 * n_src
    walkers = max(options.walkers, 2 * dim + 2)
    walkers += walkers % 2
    settings = sampling.SamplerSettings(
        walkers=walkers, temperatures=options.temperatures, max_temperature=options.max_temperature,
        ess=options.ess, max_iterations=options.max_iterations,
        max_time=float("inf") if options.max_time is None else float(options.max_time),
        checkpoint_every=options.checkpoint_every, adapt_iterations=options.adapt_iterations,
        max_temperatures=options.max_temperatures)
    init_seq, sampler_seq = np.random.SeedSequence(seed).spawn(2)
    rng = np.random.default_rng(init_seq)
    initial = joint_initial_positions(prior, likelihood, sources, span, (options.temperatures, walkers), rng,
                                      uniform_strain=uniform)
    fingerprint = {"joint": [[s.frequency, s.ra, s.dec] for s in sources], "bands": windows,
                   "pulsar_term": likelihood.pulsar_term, "evolution": likelihood.evolution,
                   "strain_prior": options.strain_prior, "n_pulsars": len(array), "phase_grid": likelihood.phase_grid}
    result = sampling.run_sampler(prior, likelihood.batch, initial, settings, seed=sampler_seq,
                                  checkpoint=folder / "checkpoint.npz", resume=options.resume,
                                  fingerprint=fingerprint, progress=progress, label="joint follow-up")
    details = result.sample_details()
    table = joint_posterior_table(likelihood, details["samples"])
    tau = dict(zip(likelihood.names, map(float, result.autocorrelation_time)))
    write_table_atomic(folder / "posterior.ecsv", _with_sample_columns(table, details, result, tau))
    per_source, per_table = [], []
    for k in range(n_src):
        sub = source_table(table, k + 1)
        per_table.append(sub)
        per_source.append(_intervals(sub))
    write_table_atomic(folder / "sources.ecsv", parameter_table(per_source, sources))
    entries = []
    for k, (source, params, sub) in enumerate(zip(sources, per_source, per_table)):
        entries.append({"source": k + 1, "round": source.round,
                        "start": {"frequency": source.frequency, "ra": math.degrees(source.ra),
                                  "dec": math.degrees(source.dec), "row": source.row},
                        "log10_frequency_band": list(windows[k]), "parameters": params,
                        "sky": sky_summary(sub["ra"], sub["dec"], None)})
    noise_model = getattr(base, "noise_model", None)
    correlated = bool(noise_model is not None and noise_model.correlated)
    pairs = [[float(1 / a), float(1 / b)] for a, b in zip(result.betas[:-1], result.betas[1:])]
    summary = {
        "n_sources": n_src, "sources": entries,
        "log_bayes_factor": result.log_evidence, "log_bayes_factor_error": result.log_evidence_error,
        "bayes_factor_meaning": (f"{n_src} binaries + noise versus noise alone (the run's noise model"
                                 + (", Hellings-Downs background in both)" if correlated else ")")),
        "warnings": list(result.warnings), "converged": bool(result.converged), "stopped_by": result.stopped_by,
        "waiting_for": result.waiting_for, "effective_sample_size": result.ess,
        "n_samples": int(details["samples"].shape[0]), "iterations": result.iterations, "burn_in": result.burn_in,
        "autocorrelation_time": tau, "walkers": walkers, "temperatures": [float(1 / b) for b in result.betas],
        "swap_acceptance": [float(x) if np.isfinite(x) else None for x in result.swap_acceptance],
        "swap_pairs": pairs,
        "max_log_likelihood": float(result.log_likelihood.max()) if result.iterations else None,
        "likelihood_evaluations": result.evaluations, "wall_time": result.wall_time,
        "stage_time": time.monotonic() - started, "seed": seed, "options": asdict(options),
        "model": {"likelihood": "joint: sum of the sources' signals, one noise model (docs/design.md §7a)",
                  "pulsar_term": likelihood.pulsar_term,
                  "pulsar_phases": ("marginalised in mean field over (source, pulsar) pairs (Hellings-Downs "
                                    "cross terms)" if correlated and likelihood.pulsar_term else
                                    "marginalised exactly, K phases per pulsar" if likelihood.pulsar_term
                                    else "none"),
                  "pulsar_distances": "catalogue values", "evolution": likelihood.evolution,
                  "strain_prior": options.strain_prior,
                  "sky_prior": "isotropic (the whole sky) for every source",
                  "frequency_prior": (f"log-uniform, {options.frequency_window:g} bins of 1/T_span either side of "
                                      "each source's round estimate, overlapping windows cut at the midpoint"),
                  "start": "colder half of the ladder around the round estimates, hotter half from the prior"},
        "noise_model": {**stage_noise_statement(array, noise),
                        **(noise_model.describe() if noise_model is not None else {})},
    }
    if not options.no_plots:
        # lazy: matplotlib is loaded only when plots are drawn
        from .plots import plot_joint

        summary["figures"] = plot_joint(folder, per_table, _truths(run_dir, array, windows))
    write_json_atomic(folder / "summary.json", summary)
    return JointResult(summary=summary, folder=folder, run=result, table=table)


__all__ = ["CONFIRMED_FILE", "ConfirmedSource", "JointResult", "read_confirmed_sources", "sources_from_table", "sources_from_rows",
           "frequency_windows", "JointPrior", "joint_initial_positions", "joint_posterior_table",
           "parameter_table", "run_joint_followup"]
