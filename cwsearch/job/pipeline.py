"""The whole job in one call: noise → scan → follow-up → hosts → limits, with skipping, resume and provenance.

:func:`run_pipeline` takes a validated :class:`~cwsearch.job.config.RunConfig`
and fills its run folder (docs/design.md §11)::

    RUN_DIR/
      run.toml          the fully resolved configuration
      provenance.json   versions, seed, dataset checksum, times, host, CPUs, stage log
      summary.json      the headline result (also printed by ``cwsearch run --json``)
      dataset.json      the dataset summary shown on the report
      scan/ followup/ hosts/ limits/    one folder per stage, each with .stage.json
      rounds/           the subtract-and-rescan step (round 1 is scan/ + followup/; round K: rounds/round-K/)
      confirmed_sources.ecsv   one row per source the detection rule confirmed (a copy of rounds/'s)
      report.html       one self-contained page

Stage skipping. Each stage's *input hash* is the SHA-256 of: the stage name,
the cwsearch version, the dataset checksum, the stage's resolved options,
the noise settings, the stage's seed, and the hashes of the *products* of
the stages it reads (scan: ``candidates.ecsv``; follow-up: the
``posterior.ecsv`` files; summaries with wall times are left out), plus the
catalogue's checksum for the host stage. When a stage
finishes, ``STAGE/.stage.json`` records its input hash, the hash of the files
it wrote, its summary and its times. A later run skips a stage whose
recorded input hash matches and whose files are unchanged; ``force`` reruns
it from an empty folder. Because a downstream stage hashes its upstream
*products*, re-running an upstream stage that produces the same products
(same seed, same options) does not invalidate the rest.

The rounds step. ``rounds`` (:mod:`cwsearch.job.rounds`, docs/design.md §14) is the pipeline's own step
after the follow-up, on whenever the follow-up is in the run's stages: the detection rule, subtract and
rescan. It hashes the scan's and follow-up's products, ``[rounds]`` and the scan and follow-up options; its
products (``confirmed_sources.ecsv``, ``subtracted_signal.ecsv``) enter the input hashes of the limits and
targets stages, which work on the data with the confirmed signals subtracted (:func:`analysis_array`), only
when a source is confirmed. With two or more confirmed sources it calls :func:`_joint_followup`, the one
place where the joint multi-source follow-up runs (into ``rounds/joint/``). When the run ranks hosts (the
hosts stage in its stages, ``[hosts] catalog``), the step ranks the sources it confirms after round 1 with the
hosts stage's own run (:func:`_rank_hosts`), and the ``[hosts]`` options and catalogue enter its input hash.

Resume. ``.stage.json`` is removed before a stage starts and written only
after the stage has finished (all files are written atomically), so a run
killed at any moment leaves finished stages marked done and the interrupted
stage unmarked: running again redoes only the interrupted stage and what
follows. (A stage may keep its own checkpoint inside its folder to resume
mid-stage.)

Seeds. The run seed is expanded with :class:`numpy.random.SeedSequence`
into one independent seed per stage (``SeedSequence([seed, k])`` for the
k-th stage), so a stage's numbers do not depend on which other stages ran.

Examples
--------
>>> from cwsearch.job.pipeline import stage_seed    # from cwsearch.job.runfolder
>>> stage_seed(0, "scan") == stage_seed(0, "scan") != stage_seed(0, "limits")
True
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import sys
import time
from dataclasses import asdict, dataclass, field, fields, replace
from pathlib import Path
from typing import Callable

import numpy as np
from astropy.table import Table

from .. import __version__
from ..core.constants import YEAR_SECONDS
from ..core.errors import InputError
from ..core.fileio import write_json_atomic, write_table_atomic
from ..data.dataset import dataset_checksum, read_dataset
from ..stages import BY_NAME, STAGES as REGISTRY
from .config import RunConfig
from .noisemodel import resolve_noise_model
from .report import build_report, format_headline, headline_result
from .rounds import (PRODUCTS as ROUND_PRODUCTS, hosts_entry, kept_draw_columns, read_subtracted_signal,
                     run_rounds, subtracted_array)
from .runfolder import (DONE, STAGE_FILE, RunLock, canonical_hash, file_checksum, folder_hash, json_default,
                        package_versions, product_hash, provenance_record, read_json, read_record, read_table,
                        record_is_current, stage_seed, utc_now)


class NothingToDo(Exception):
    """Raised by a stage runner when its inputs leave nothing to compute (e.g. no candidate).

    The stage is then recorded as done with status ``"empty"`` and the reason.
    """


class StageUnavailable(Exception):
    """Raised by a stage runner when its module is not installed in this copy of cwsearch."""


@dataclass
class StageSpec:
    """One pipeline stage.

    ``run(ctx) -> dict`` does the work, writing into ``ctx.stage_dir``, and
    returns the stage summary (JSON-serialisable). ``upstream`` names the
    stages whose outputs it reads. ``extra_inputs(ctx) -> dict`` adds
    further things to hash (e.g. a catalogue checksum).
    """

    name: str
    run: Callable
    upstream: tuple = ()
    extra_inputs: Callable | None = None
    available: Callable | None = None  # () -> None, or the reason the stage cannot run here
    #: glob patterns (relative to the stage folder) of the files later stages read; their hash, not the
    #: whole folder's (summaries hold wall times), is what a downstream stage's input hash includes
    products: tuple = ()
    #: a pipeline step that is not a registry stage runs whenever this registry stage is in the run's stages
    #: (the ``rounds`` step belongs to ``followup``)
    part_of: str | None = None
    #: stages whose records the runner hands over in ``ctx.upstream`` when they have one, without blocking
    #: when they have none (what they change enters the input hash through ``extra_inputs``)
    optional_upstream: tuple = ()


@dataclass
class StageContext:
    """What a stage runner gets: config, folders, seed, upstream records and the dataset."""

    config: RunConfig
    run_dir: Path
    stage_dir: Path
    name: str
    seed: int
    progress: bool
    upstream: dict
    resuming: bool = False  # the same stage, same inputs, was interrupted before: continue its checkpoint
    _array_loader: Callable = field(repr=False, default=None)
    dataset_checksum: str | None = None
    #: () -> :class:`~cwsearch.job.noisemodel.ResolvedNoise`, the run's noise model (None: the dataset's)
    _noise_resolver: Callable = field(repr=False, default=None)

    @property
    def array(self):
        """The dataset as a :class:`~cwsearch.data.model.Array` (read once per run)."""
        return self._array_loader()

    @property
    def model_array(self):
        """The dataset carrying the run's noise model (what every stage after the noise stage uses)."""
        return self._noise_resolver().array if self._noise_resolver is not None else self.array

    @property
    def noise(self):
        """The engine noise settings of the run's noise model."""
        return self._noise_resolver().noise if self._noise_resolver is not None else self.config.noise

    @property
    def options(self):
        return self.config.options.get(self.name)

    @property
    def extra(self) -> dict:
        return self.config.extra.get(self.name, {})


@dataclass
class StageReport:
    """What happened to one stage in this run."""

    name: str
    status: str  # ran | skipped | empty | off | unavailable | blocked | failed
    seconds: float = 0.0
    reason: str = ""
    summary: dict = field(default_factory=dict)

    def as_dict(self):
        return {"stage": self.name, "status": self.status, "seconds": round(self.seconds, 3),
                "reason": self.reason, "summary": self.summary}


@dataclass
class PipelineResult:
    """Outcome of :func:`run_pipeline`: per-stage reports, headline, paths."""

    run_dir: Path
    stages: list
    headline: dict
    report: Path | None

    @property
    def summary(self) -> dict:
        return {"run_dir": str(self.run_dir), "report": str(self.report) if self.report else None,
                "headline": self.headline, "stages": [s.as_dict() for s in self.stages]}


# ---------------------------------------------------------------- hashing


# ---------------------------------------------------------------- provenance


# ---------------------------------------------------------------- run-folder lock


# ---------------------------------------------------------------- the runner
def run_stages(config: RunConfig, specs, *, dataset_checksum: str, load_array: Callable, force=(),
               progress=True, log=None, noise_resolver: Callable | None = None) -> list:
    """Run ``specs`` (list of :class:`StageSpec`, in order) into ``config.out`` with skipping.

    This is the machinery under :func:`run_pipeline`, usable with any stage
    functions (tests use tiny dummy stages). ``force``: stage names to rerun
    from an empty folder. ``noise_resolver() -> ResolvedNoise`` gives the run's noise model to every
    stage except ``noise`` (its fingerprint enters their input hashes). Returns a list of
    :class:`StageReport`.
    """
    run_dir = Path(config.out)
    names = [s.name for s in specs]
    force = set(force)
    unknown = force - set(names) - {"all"}
    if unknown:
        raise InputError(f"--force: unknown stage {sorted(unknown)[0]!r} (choose from {', '.join(names)}, all)")
    if "all" in force:
        force = set(names)
    log = log or (lambda msg: None)
    noise = _plain_dataclass(config.noise)
    reports, records = [], {}
    for k, spec in enumerate(specs):
        stage_dir = run_dir / spec.name
        label = f"[{k + 1}/{len(specs)}] {spec.name}"
        if spec.name not in config.stages and (spec.part_of is None or spec.part_of not in config.stages):
            rec = read_record(stage_dir)
            if rec and rec.get("status") in DONE and rec.get("output_hash") == folder_hash(stage_dir):
                if (rec.get("inputs") or {}).get("dataset") == dataset_checksum:
                    records[spec.name] = rec  # earlier results of this dataset stay usable downstream
                    reason = "not in this run's stages"
                else:   # results of another dataset (the same --out reused) must not feed this run's stages
                    reason = "not in this run's stages; its results in the run folder are of another dataset"
            else:
                reason = "not in this run's stages"
            reports.append(StageReport(spec.name, "off", reason=reason))
            log(f"{label}: off ({reason})")
            continue
        reason = spec.available() if spec.available is not None else None
        if reason:
            reports.append(StageReport(spec.name, "unavailable", reason=reason))
            log(f"{label}: {reason}")
            continue
        missing = [u for u in spec.upstream if u not in records]
        if missing:
            reason = f"needs the {missing[0]} stage, which has no finished result"
            reports.append(StageReport(spec.name, "blocked", reason=reason))
            log(f"{label}: not run ({reason})")
            continue
        ctx = StageContext(config=config, run_dir=run_dir, stage_dir=stage_dir, name=spec.name,
                           seed=stage_seed(config.seed, spec.name), progress=progress,
                           upstream={u: records[u] for u in spec.upstream + tuple(spec.optional_upstream)
                                     if u in records}, _array_loader=load_array,
                           dataset_checksum=dataset_checksum,
                           _noise_resolver=noise_resolver if spec.name != "noise" else None)
        stage_noise = noise
        if noise_resolver is not None and spec.name != "noise":
            stage_noise = {"settings": noise, "model": noise_resolver().fingerprint()}
        inputs = {
            "stage": spec.name,
            "cwsearch": __version__,
            "dataset": dataset_checksum,
            "options": config.stage_config(spec.name),
            "noise": stage_noise,
            "seed": ctx.seed,
            "upstream": {u: records[u].get("product_hash", records[u].get("output_hash")) for u in spec.upstream},
        }
        if spec.extra_inputs is not None:
            try:
                inputs["extra"] = spec.extra_inputs(ctx)
            except StageUnavailable as exc:
                reports.append(StageReport(spec.name, "unavailable", reason=str(exc)))
                log(f"{label}: {exc}")
                continue
        input_hash = canonical_hash(inputs)
        if spec.name not in force and record_is_current(stage_dir, input_hash):
            rec = read_record(stage_dir)
            records[spec.name] = rec
            reports.append(StageReport(spec.name, "skipped", reason="up to date (inputs unchanged)",
                                       summary=rec.get("summary", {})))
            log(f"{label}: up to date, skipped")
            continue
        if spec.name in force and stage_dir.exists():
            shutil.rmtree(stage_dir)
        previous = read_record(stage_dir)
        stage_dir.mkdir(parents=True, exist_ok=True)
        started, t0 = utc_now(), time.perf_counter()
        ctx.resuming = bool(previous and previous.get("status") == "running"
                            and previous.get("input_hash") == input_hash)
        if ctx.resuming:
            log(f"{label}: resuming (interrupted earlier) ...")
        else:
            log(f"{label}: running ...")
        write_json_atomic(stage_dir / STAGE_FILE, {"stage": spec.name, "status": "running",
                                                   "input_hash": input_hash, "started": started})
        status, reason = "complete", ""
        try:
            summary = spec.run(ctx) or {}
        except NothingToDo as exc:
            status, reason, summary = "empty", str(exc), {}
        except StageUnavailable as exc:
            (stage_dir / STAGE_FILE).unlink(missing_ok=True)
            reports.append(StageReport(spec.name, "unavailable", reason=str(exc)))
            log(f"{label}: {exc}")
            continue
        seconds = time.perf_counter() - t0
        record = {"stage": spec.name, "status": status, "reason": reason, "input_hash": input_hash,
                  "output_hash": folder_hash(stage_dir), "product_hash": product_hash(stage_dir, spec.products),
                  "started": started, "finished": utc_now(),
                  "seconds": round(seconds, 3), "seed": ctx.seed, "cwsearch": __version__,
                  "inputs": inputs, "summary": _jsonable(summary)}
        write_json_atomic(stage_dir / STAGE_FILE, record)
        records[spec.name] = record
        reports.append(StageReport(spec.name, "ran" if status == "complete" else "empty", seconds, reason,
                                   record["summary"]))
        log(f"{label}: done in {seconds:.1f} s" + (f" ({reason})" if reason else ""))
    return reports


def _plain_dataclass(obj):
    if obj is None:
        return None
    return {f.name: getattr(obj, f.name) for f in dataclasses.fields(obj)}


def _jsonable(obj):
    return json.loads(json.dumps(obj, default=json_default))


def run_pipeline(config: RunConfig, *, force=(), progress=True, quiet=False, specs=None,
                 write_report=True) -> PipelineResult:
    """Run the whole job described by ``config`` into ``config.out``.

    Parameters
    ----------
    config : RunConfig (from :func:`cwsearch.job.config.load_config`)
    force : iterable of stage names (or ``"all"``) to recompute from scratch
    progress : show progress bars inside stages
    quiet : print nothing (implies no progress bars)
    specs : stage list (default: :func:`default_stages`); tests pass dummy stages
    write_report : build ``report.html`` at the end

    Returns a :class:`PipelineResult`; the headline is also written to
    ``summary.json``.
    """
    run_dir = Path(config.out)
    log = (lambda msg: None) if quiet else (lambda msg: print(msg, file=sys.stderr, flush=True))
    progress = progress and not quiet
    specs = default_stages() if specs is None else specs

    # everything a user can get wrong is checked before any work
    array = read_dataset(config.dataset, mjd_range=getattr(config, "mjd_range", None))
    checksum = dataset_checksum(config.dataset)
    with RunLock(run_dir):
        started = utc_now()
        config.write(run_dir / "run.toml")
        provenance = provenance_record(config, checksum, started, previous=read_json(run_dir / "provenance.json"))
        write_json_atomic(run_dir / "provenance.json", provenance)
        write_json_atomic(run_dir / "dataset.json", dataset_summary(array, config.dataset, checksum))
        if write_report:
            # lazy: matplotlib is loaded only when plots are drawn
            from ..data.plots import dataset_overview

            dataset_overview(array, run_dir / "dataset.png")
        log(f"cwsearch: run folder {run_dir}")
        status = "interrupted"
        try:
            reports = run_stages(config, specs, dataset_checksum=checksum, load_array=lambda: array,
                                 force=force, progress=progress, log=log,
                                 noise_resolver=(run_noise_resolver(config, array, checksum, progress)
                                                 if any(spec.name == "noise" for spec in specs) else None))
            status = "complete"
        except BaseException as exc:
            status = "interrupted" if isinstance(exc, KeyboardInterrupt) else "failed"
            provenance.update(finished=utc_now(), status=status)
            try:
                write_json_atomic(run_dir / "provenance.json", provenance)
            except InputError:
                pass  # e.g. the disk is full: the original error is the one to report
            raise
        headline = headline_result(run_dir, reports)
        write_json_atomic(run_dir / "summary.json", {"headline": headline,
                                                     "stages": [r.as_dict() for r in reports]})
        provenance.update(finished=utc_now(), status=status, stages=[r.as_dict() for r in reports])
        for r in provenance["stages"]:
            r.pop("summary", None)
        write_json_atomic(run_dir / "provenance.json", provenance)
        report_path = None
        if write_report:
            report_path = build_report(run_dir)
    return PipelineResult(run_dir, reports, headline, report_path)


def run_noise_resolver(config, array, checksum, progress=False):
    """``() -> ResolvedNoise`` for a run (resolved on first use, then cached): the run's ``[noise] model``
    through :func:`cwsearch.job.noisemodel.resolve_noise_model`."""
    cache = {}

    def resolver():
        if "resolved" not in cache:
            options = config.options.get("noise")
            cache["resolved"] = resolve_noise_model(
                array, config.out, getattr(options, "model", "estimate"), noise=config.noise,
                dataset_checksum=checksum, options=options, seed=stage_seed(config.seed, "noise"), progress=progress)
        return cache["resolved"]
    return resolver


def dataset_summary(array, path, checksum) -> dict:
    """Per-pulsar table and totals shown in the report's dataset section."""
    rows = []
    for p in array:
        rows.append({
            "name": p.name,
            "ra_deg": round(float(np.degrees(p.ra)), 4),
            "dec_deg": round(float(np.degrees(p.dec)), 4),
            "distance_kpc": round(p.distance, 4),
            "distance_err_kpc": round(p.distance_err, 4),
            "n_toas": int(p.n_toas),
            "span_yr": round(float((p.toas[-1] - p.toas[0]) / YEAR_SECONDS), 2),
            "backends": list(p.backend_names),
            "median_sigma_ns": round(float(np.median(p.sigmas)) * 1e9, 2),
            "red_noise": (None if not p.noise.has_red_noise else
                          {"log10_amplitude": p.noise.red_log10_amplitude, "index": p.noise.red_index}),
        })
    return {
        "path": str(path),
        "checksum": checksum,
        "n_pulsars": len(array),
        "n_toas": int(sum(p.n_toas for p in array)),
        "span_yr": round(array.span / YEAR_SECONDS, 3),
        "pulsars": rows,
    }


# ---------------------------------------------------------------- headline


# ---------------------------------------------------------------- the real stages
def default_stages():
    """One :class:`StageSpec` per entry of the stage registry :data:`cwsearch.stages.STAGES`, in order, and
    the pipeline's own ``rounds`` step (subtract and rescan, :mod:`cwsearch.job.rounds`) after the follow-up;
    the limits and targets stages read the data with the confirmed sources subtracted."""
    specs = []
    for stage in REGISTRY:
        specs.append(StageSpec(stage.name, _stage_runner(stage), upstream=stage.upstream,
                               extra_inputs=_EXTRA_INPUTS.get(stage.name), products=stage.products,
                               optional_upstream=("rounds",) if stage.name in _SUBTRACTED else ()))
        if stage.name == "followup":
            specs.append(StageSpec("rounds", _run_rounds, upstream=("scan", "followup"), extra_inputs=_rounds_inputs,
                                   products=ROUND_PRODUCTS, part_of="followup"))
    return specs


# ---------------------------------------------------------------- subtract and rescan (docs/design.md §14)
def _rounds_inputs(ctx):
    """What the rounds step's result depends on besides the scan's and follow-up's products: the [rounds]
    rule, and the scan and follow-up options it reruns with; when it ranks hosts (:func:`_ranks_hosts`) also
    the [hosts] options and the catalogue's checksum (without, the hash is what it was before)."""
    inputs = {"rounds": dict(ctx.config.rounds), "scan": ctx.config.stage_config("scan"),
              "followup": ctx.config.stage_config("followup")}
    if _ranks_hosts(ctx):
        catalog = ctx.config.options["hosts"].catalog     # the hosts stage's catalogue, not this step's options
        inputs["hosts"] = {"options": ctx.config.stage_config("hosts"),
                           "catalog": file_checksum(catalog) if Path(catalog).is_file() else None}
    return inputs


def _ranks_hosts(ctx) -> bool:
    """Whether the rounds step ranks hosts of its later sources: the hosts stage is in the run's stages and
    ``[hosts] catalog`` is set (the same condition under which the hosts stage ranks the round-1 source)."""
    options = ctx.config.options.get("hosts")
    return "hosts" in ctx.config.stages and bool(getattr(options, "catalog", None))


def _rank_hosts(ctx, folder, seed):
    """The hosts stage's own ranking (:func:`cwsearch.stages.hosts.stage.run_hosts`, the ``[hosts]``
    options) of the follow-up posterior in ``folder/followup/`` into ``folder/hosts/``, called by the rounds
    step for a later round's source (``folder`` = ``rounds/round-K``) and by :func:`_joint_followup` for a
    joint-follow-up source (``rounds/joint/source-J``). The array handed over is the run's noise-model data
    without the dataset's truth (as the rounds' rescans get it): the injected binary of ``injection.json`` is
    the first one, not necessarily this source, so the plots mark no truth. Returns the ranking's summary
    (hosts_summary.json)."""
    options = replace(runner_options(ctx.config.options["hosts"], ctx.config.execution), candidate=None)
    array = subtracted_array(ctx.model_array, [np.zeros(p.n_toas) for p in ctx.model_array])
    result = BY_NAME["hosts"].run(array, folder, options, noise=ctx.noise, seed=int(seed), progress=ctx.progress)
    return dict(result.summary or {})


def _run_rounds(ctx):
    """The ``rounds`` step: the detection rule on round 1's follow-ups, then subtract and rescan
    (:func:`cwsearch.job.rounds.run_rounds`); writes ``rounds/`` and ``RUN_DIR/confirmed_sources.ecsv``;
    with a host ranking in the run, the hosts of the sources confirmed after round 1 (:func:`_rank_hosts`)."""
    return run_rounds(ctx, scan_stage=BY_NAME["scan"], followup_stage=BY_NAME["followup"],
                      runner_options=runner_options, joint_followup=_joint_followup,
                      rank_hosts=_rank_hosts if _ranks_hosts(ctx) else None)


def _joint_followup(ctx, sources):
    """The joint follow-up of the confirmed sources (issue 17, item 2), called by the rounds step with
    ``sources`` (the rows of ``RUN_DIR/confirmed_sources.ecsv`` as dicts: round, ra, dec [deg], frequency
    [Hz], chirp_mass [Msun], strain, inclination, polarization, phase [rad], ...) whenever two or more
    sources are confirmed: :func:`cwsearch.stages.followup.joint.run_joint_followup` with the
    ``[followup]`` options on the run's noise-model data, into ``RUN_DIR/rounds/joint/`` (inside the rounds
    step's folder, so the follow-up stage's own products and hashes stay as they were). Returns what
    ``rounds/rounds.json`` records (``joint_followup``); None when ``[rounds] joint_followup = false``."""
    if not ctx.config.rounds.get("joint_followup", True):
        return None
    # lazy: the follow-up stage's computation module, loaded only when two sources are confirmed
    from ..stages.followup.joint import run_joint_followup

    options = ctx.config.options.get("followup") or BY_NAME["followup"].options()
    options = replace(options, resume=False, candidate=None, top=1)
    seed = int(np.random.SeedSequence([int(ctx.seed), 17]).generate_state(1)[0])   # the rounds seed, key 17
    folder = Path(ctx.stage_dir) / "joint"
    result = run_joint_followup(ctx.model_array, ctx.run_dir, list(sources), options, noise=ctx.noise, seed=seed,
                                progress=ctx.progress, folder=folder)
    s = result.summary
    bf = s["log_bayes_factor"]
    text = (f"{s['n_sources']} sources in one fit ({folder.relative_to(ctx.run_dir)}/; ln B = "
            + (f"{bf:.2f}" if bf is not None else "–") + f", {s['effective_sample_size']:.0f} effective samples, "
            f"stopped by {s['stopped_by']}); each source's joint-posterior parameters are in the section "
            "'Joint follow-up'.")
    entries = [{"source": e["source"], "round": e["round"],
                **{k: e["parameters"][k]["median"] for k in ("frequency", "ra", "dec", "strain")
                   if k in e["parameters"]}} for e in s["sources"]]
    if _ranks_hosts(ctx):
        for entry, e in zip(entries, s["sources"]):
            entry["hosts"] = _joint_source_hosts(ctx, result, e, seed)
    return {"text": text, "folder": str(folder.relative_to(ctx.run_dir)), "n_sources": s["n_sources"],
            "log_bayes_factor": s["log_bayes_factor"], "log_bayes_factor_error": s["log_bayes_factor_error"],
            "effective_sample_size": s["effective_sample_size"], "stopped_by": s["stopped_by"],
            "sources": entries}


def _joint_source_hosts(ctx, result, entry, joint_seed):
    """The host ranking of joint-follow-up source J (``entry``: its item of the joint summary's ``sources``):
    its block of the joint posterior (``sJ_`` columns, unprefixed: the single-source posterior's columns) in
    ``rounds/joint/source-J/followup/posterior.ecsv`` with a ``summary.json`` stating its prior (the joint
    prior of source J is the single-source one on its frequency window), then :func:`_rank_hosts` into
    ``rounds/joint/source-J/hosts/``; returns :func:`cwsearch.job.rounds.hosts_entry`'s record (an
    ``error`` entry for a user error)."""
    # lazy: the follow-up stage's computation module (already loaded by the joint follow-up)
    from ..stages.followup.joint import source_table
    from ..stages.followup.stage import CHIRP_MASS_RANGE, STRAIN_RANGE

    k = int(entry["source"])
    folder = Path(result.folder) / f"source-{k}"
    rel = os.path.relpath(folder / "hosts", ctx.run_dir)
    model = dict(result.summary.get("model") or {})
    prior = {"log10_frequency_band": list(entry["log10_frequency_band"]), "strain_prior": model.get("strain_prior"),
             "chirp_mass_range": list(CHIRP_MASS_RANGE), "strain_range": list(STRAIN_RANGE)}
    write_table_atomic(folder / "followup" / "posterior.ecsv", source_table(result.table, k))
    write_json_atomic(folder / "followup" / "summary.json", {
        "source": k, "round": entry.get("round"), "model": prior,
        "what": f"source {k}'s block (s{k}_ columns) of the joint follow-up's posterior (../../posterior.ecsv), "
                "for its host ranking (../hosts/)"})
    seed = int(np.random.SeedSequence([int(joint_seed), k]).generate_state(1)[0])
    try:
        summary = _rank_hosts(ctx, folder, seed)
    except InputError as exc:
        return {"folder": rel, "error": str(exc)}
    return hosts_entry(summary, rel)


def _subtraction(ctx):
    """``(n_confirmed, record)`` of the rounds step this stage sees (0, None without a confirmed source)."""
    rec = ctx.upstream.get("rounds") or {}
    n = int((rec.get("summary") or {}).get("n_confirmed") or 0)
    return (n, rec) if rec.get("status") in DONE and n > 0 else (0, None)


def _subtraction_inputs(ctx):
    """Input-hash entry of a stage run on the data with the confirmed sources subtracted: the rounds step's
    products (confirmed_sources.ecsv, subtracted_signal.ecsv); nothing when no source is confirmed (so the
    hash is what it was before the rounds step existed)."""
    n, rec = _subtraction(ctx)
    return {"subtracted": rec.get("product_hash")} if n else {}


def analysis_array(ctx):
    """The data the limits and targets stages work on: the run's noise-model array, with the confirmed
    sources' posterior-median signals subtracted when the rounds step confirmed any; and the statement
    (None when nothing is subtracted)."""
    n, rec = _subtraction(ctx)
    if not n:
        return ctx.model_array, None
    signal = read_subtracted_signal(ctx.run_dir / "rounds" / "subtracted_signal.ecsv", ctx.model_array)
    sources = (rec.get("summary") or {}).get("confirmed") or []
    listed = "; ".join(f"source {s['source']} (round {s['round']}): f = {s['frequency']:.4g} Hz, ra = {s['ra']:.2f} "
                       f"deg, dec = {s['dec']:.2f} deg, h0 = {s['strain']:.3g}" for s in sources)
    note = {"n_subtracted": n, "sources": [{k: s.get(k) for k in ("source", "round", "frequency", "ra", "dec",
                                                                   "strain", "chirp_mass", "folder")}
                                           for s in sources],
            "text": f"computed after subtracting {n} confirmed source(s): {listed} (posterior-median signals, "
                    "rounds/subtracted_signal.ecsv)"}
    return subtracted_array(ctx.model_array, signal), note


def _with_subtraction_note(summary, note, path):
    """The stage summary (and its file ``path``) with the statement of what was subtracted."""
    if note is None:
        return summary
    summary = dict(summary)
    summary["subtracted_sources"] = note
    if Path(path).is_file():
        on_disk = read_json(path) or {}
        on_disk["subtracted_sources"] = note
        write_json_atomic(path, on_disk)
    return summary


def _run_limits(ctx, stage):
    """The limits stage on :func:`analysis_array` (the confirmed sources subtracted, stated in
    ``limits_summary.json``: "limits computed after subtracting N confirmed source(s): ..."), with the
    subtraction error (:func:`_subtraction_error`)."""
    array, note = analysis_array(ctx)
    options = runner_options(ctx.options, ctx.config.execution)
    result = stage.run(array, ctx.run_dir, options, noise=ctx.noise, seed=ctx.seed, progress=ctx.progress)
    if note is not None:
        note = dict(note, text="limits " + note["text"])
        note["subtraction_error"] = _subtraction_error(ctx, stage, options)
    return _with_subtraction_note(dict(result.summary or {}), note, ctx.stage_dir / "limits_summary.json")


def _subtraction_error(ctx, stage, options):
    """The limits' stated error from the subtraction (docs/design.md §14): the limits recomputed (same seed,
    no plots) with each kept posterior draw of the confirmed signals subtracted instead of their median; per
    frequency the sample standard deviation of those sky-averaged limits relative to the median-subtracted one.
    Written to ``limits/subtraction_error.ecsv``; returns its summary."""
    path = ctx.run_dir / "rounds" / "subtracted_signal.ecsv"
    columns = kept_draw_columns(path)
    main = read_table(ctx.stage_dir / "frequency_limits.ecsv")
    if len(columns) < 2 or main is None or "strain_95" not in main.colnames:
        return {"note": "not computed (fewer than two kept posterior draws)"}
    limits = []
    for column in columns:
        scratch = ctx.stage_dir / f".work_{column}"
        if scratch.exists():
            shutil.rmtree(scratch)
        draw_array = subtracted_array(ctx.model_array, read_subtracted_signal(path, ctx.model_array, column))
        stage.run(draw_array, scratch, replace(options, no_plots=True, mcmc_check=None), noise=ctx.noise,
                  seed=ctx.seed, progress=False)
        table = read_table(scratch / "limits" / "frequency_limits.ecsv")
        shutil.rmtree(scratch)
        if table is None or len(table) != len(main):
            return {"note": f"not computed (the limits with {column} subtracted could not be read)"}
        limits.append(np.asarray(table["strain_95"], dtype=float))
    limits = np.array(limits)
    centre = np.asarray(main["strain_95"], dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        relative = np.std(limits, axis=0, ddof=1) / centre
    out = Table()
    out["frequency"] = main["frequency"]
    out["strain_95"] = centre
    for column, values in zip(columns, limits):
        out[f"strain_95_{column}"] = values
    out["relative_error"] = relative
    out.meta["description"] = ("the subtraction error of the sky-averaged 95 % strain limits: the limits with each "
                               "kept posterior draw of the confirmed signals subtracted instead of their median "
                               "(rounds/subtracted_signal.ecsv draw_K), and their sample standard deviation "
                               "relative to the median-subtracted limit")
    write_table_atomic(ctx.stage_dir / "subtraction_error.ecsv", out)
    finite = relative[np.isfinite(relative)]
    return {"method": f"standard deviation of the sky-averaged limits over {len(columns)} posterior draws of the "
                      "subtracted signal, relative to the limit with the posterior median subtracted",
            "n_draws": len(columns), "file": "subtraction_error.ecsv",
            "median_relative": float(np.median(finite)) if finite.size else None,
            "max_relative": float(np.max(finite)) if finite.size else None}


def _stage_runner(stage):
    """``run(ctx)`` of one registered stage: the pipeline's own check, then the stage's ``run`` (or the
    pipeline's own way of running it), returning the stage summary."""
    def run(ctx):
        check = _PRECHECKS.get(stage.name)
        if check is not None:
            check(ctx)
        custom = _CUSTOM_RUNS.get(stage.name)
        if custom is not None:
            return custom(ctx, stage)
        options = runner_options(ctx.options, ctx.config.execution)
        result = stage.run(ctx.model_array, ctx.run_dir, options, noise=ctx.noise, seed=ctx.seed,
                           progress=ctx.progress)
        return dict(result.summary or {})
    return run


def followup_rows(candidates, fap_threshold, max_candidates, span):
    """Rows (0-based, best first) of the scan candidates to follow up.

    Every candidate whose trials-corrected analytic false-alarm probability
    (column ``fap``) is below ``fap_threshold``, best first, except those
    within one frequency bin (1/T_span) of a better chosen one (the same
    source seen at another sky position: the follow-up fits the whole sky
    anyway), at most ``max_candidates``.
    """
    if candidates is None or len(candidates) == 0 or "fap" not in candidates.colnames:
        return []
    fap = np.asarray(candidates["fap"], dtype=float)
    order = np.argsort(fap, kind="stable")
    chosen = []
    for r in order:
        if not fap[r] < fap_threshold:
            break
        f = float(candidates["frequency"][r])
        if any(abs(f - float(candidates["frequency"][c])) <= 1.0 / span * (1 + 1e-9) for c in chosen):
            continue
        chosen.append(int(r))
        if len(chosen) >= max_candidates:
            break
    return chosen


def _run_followup(ctx, stage):
    """Follow up every scan candidate below the false-alarm threshold (reads run_dir/scan/candidates.ecsv)."""
    threshold = float(ctx.extra.get("fap_threshold", 0.01))
    max_candidates = int(ctx.extra.get("max_candidates", 3))
    cands = read_table(ctx.run_dir / "scan" / "candidates.ecsv")
    rows = followup_rows(cands, threshold, max_candidates, ctx.array.span)
    if not rows:
        best = float(np.min(cands["fap"])) if cands is not None and len(cands) and "fap" in cands.colnames \
            else None
        raise NothingToDo(f"no scan candidate has a false-alarm probability below {threshold:g}"
                          + (f" (best {best:.2g})" if best is not None else ""))
    if rows == list(range(len(rows))):
        # the chosen candidates are the best ones: one call (one sub-folder each when there are several)
        options = replace(ctx.options, top=len(rows), candidate=None, resume=ctx.resuming)
        result = stage.run(ctx.model_array, ctx.run_dir, options, noise=ctx.noise, seed=ctx.seed,
                                  progress=ctx.progress)
        summary = dict(getattr(result, "summary", {}) or {})
    else:
        # candidates skipped in between (same source at another sky position): one call per chosen row, each
        # in a scratch run folder, moved to followup/candidate_ROW/
        seeds = np.random.SeedSequence(ctx.seed).generate_state(len(rows))
        parts = []
        for row, seed in zip(rows, seeds):
            scratch = ctx.stage_dir / f".work_{row + 1}"
            (scratch / "scan").mkdir(parents=True, exist_ok=True)
            for name in ("candidates.ecsv", "scan_summary.json"):
                shutil.copy2(ctx.run_dir / "scan" / name, scratch / "scan" / name)
            options = replace(ctx.options, top=1, candidate=row + 1, resume=ctx.resuming)
            result = stage.run(ctx.model_array, scratch, options, noise=ctx.noise, seed=int(seed),
                                      progress=ctx.progress)
            final = ctx.stage_dir / f"candidate_{row + 1}"
            if final.exists():
                shutil.rmtree(final)
            os.replace(scratch / "followup", final)
            shutil.rmtree(scratch)
            parts.append(dict(getattr(result, "summary", {}) or {}))
        summary = {"targets": [f"candidate_{r + 1}" for r in rows],
                   "log_bayes_factor": [p.get("log_bayes_factor") for p in parts],
                   "log_bayes_factor_error": [p.get("log_bayes_factor_error") for p in parts],
                   "effective_sample_size": [p.get("effective_sample_size") for p in parts],
                   "folders": [str(ctx.stage_dir / f"candidate_{r + 1}") for r in rows],
                   "seed": ctx.seed, "options": asdict(ctx.options)}
        write_json_atomic(ctx.stage_dir / "summary.json", summary)
    summary["followed_rows"] = [r + 1 for r in rows]
    summary["fap_threshold"] = threshold
    return summary


def _hosts_inputs(ctx):
    catalog = getattr(ctx.options, "catalog", None)
    return {"catalog": file_checksum(catalog) if catalog and Path(catalog).is_file() else None}


def _hosts_precheck(ctx):
    """The host stage needs a followed-up candidate and a catalogue."""
    if ctx.upstream.get("followup", {}).get("status") == "empty":
        raise NothingToDo("no candidate was followed up, so there is no source to match")
    if not getattr(ctx.options, "catalog", None):
        raise NothingToDo("no galaxy catalogue given ([hosts] catalog)")


def runner_options(options, execution: dict):
    """``options`` with the task-runner settings (run-file section ``[execution]``: ``workers``, ``scheduler``;
    or a dict in the old ``[engine]`` shape: ``kind``, ``workers``, ``address``) filled into its
    ``workers``/``scheduler`` fields (if it has them).

    The runner decides where the work runs, not its result, so it is not part of any stage's input hash.
    """

    names = {f.name for f in fields(options)}
    changes = {}
    if "workers" in names:
        changes["workers"] = int(execution.get("workers") or 0) or None
    if "scheduler" in names:
        if "scheduler" in execution:
            changes["scheduler"] = execution.get("scheduler") or None
        else:   # the old [engine] shape
            changes["scheduler"] = execution.get("address") or None if execution.get("kind") == "dask" else None
    return replace(options, **changes) if changes else options


def _run_noise(ctx, stage):
    """Fit the noise model (only when the run's noise model is ``estimate``; else nothing to do)."""
    model = getattr(ctx.options, "model", "estimate")
    if model != "estimate":
        raise NothingToDo(f"the run uses the {'dataset' if model == 'dataset' else 'given'} noise model"
                          + ("" if model == "dataset" else f" ({model})"))
    result = stage.run(ctx.array, ctx.run_dir, ctx.options, noise=ctx.config.noise, seed=ctx.seed,
                       progress=ctx.progress, dataset_checksum=ctx.dataset_checksum)
    return dict(result.summary or {})


def _run_targets(ctx, stage):
    """The targets stage; with ``[targets] follow_up = true`` then the follow-up of every target it hands over,
    its sky prior bounded to the cap of ``followup_sky_radius`` around the target and the frequency prior
    around its loudest frequency, with the ``[followup]`` sampler settings, one folder each:
    ``targets/followup_K`` (K = the order of ``targets_summary.json``'s ``followup`` list)."""
    options = runner_options(ctx.options, ctx.config.execution)
    array, note = analysis_array(ctx)
    result = stage.run(array, ctx.run_dir, options, noise=ctx.noise, seed=ctx.seed, progress=ctx.progress)
    if note is not None:
        note = dict(note, text="targeted searches " + note["text"])
    summary = _with_subtraction_note(dict(result.summary or {}), note, ctx.stage_dir / "targets_summary.json")
    chosen = summary.get("followup") or []
    if not getattr(options, "follow_up", False) or not chosen:
        return summary
    follow = BY_NAME["followup"]
    base = ctx.config.options.get("followup") or follow.options()
    seeds = np.random.SeedSequence(ctx.seed).generate_state(len(chosen))
    for k, (entry, seed) in enumerate(zip(chosen, seeds), start=1):
        scratch = ctx.stage_dir / f".work_followup_{k}"
        if scratch.exists():
            shutil.rmtree(scratch)
        opts = replace(base, candidate=None, top=1, all_sky=False, resume=False, frequency=entry["frequency"],
                       ra=entry["ra"], dec=entry["dec"], sky_radius=entry["sky_radius"])
        res = follow.run(array, scratch, opts, noise=ctx.noise, seed=int(seed), progress=ctx.progress)
        final = ctx.stage_dir / f"followup_{k}"
        if final.exists():
            shutil.rmtree(final)
        os.replace(scratch / "followup", final)
        shutil.rmtree(scratch)
        s = dict(getattr(res, "summary", {}) or {})
        entry.update({"folder": f"followup_{k}", "log_bayes_factor": s.get("log_bayes_factor"),
                      "log_bayes_factor_error": s.get("log_bayes_factor_error"),
                      "bayes_factor_meaning": s.get("bayes_factor_meaning")})
    summary["followup"] = chosen
    write_json_atomic(ctx.stage_dir / "targets_summary.json", summary)
    return summary


def _targets_precheck(ctx):
    """The targets stage needs a catalogue."""
    if not getattr(ctx.options, "catalog", None):
        raise NothingToDo("no target catalogue given ([targets] catalog)")


#: what the pipeline adds around a stage, by stage name (every other stage is run as registered)
_PRECHECKS = {"hosts": _hosts_precheck,          # checks that raise NothingToDo before the stage runs
              "targets": _targets_precheck}
_CUSTOM_RUNS = {"followup": _run_followup,       # the follow-up picks its candidates from the scan's table
                "targets": _run_targets,         # then follows up the targets it hands over ([targets] follow_up)
                "limits": _run_limits,           # on the data with the confirmed sources subtracted
                "noise": _run_noise}             # the noise stage fits only for the 'estimate' model
_EXTRA_INPUTS = {"hosts": _hosts_inputs,         # more input-hash entries (the catalogue's checksum)
                 "targets": lambda ctx: {**_hosts_inputs(ctx), **_subtraction_inputs(ctx)},
                 "limits": _subtraction_inputs}  # ... and the subtracted signal of the confirmed sources
#: the stages that work on the data with the confirmed sources subtracted (the rounds step's record)
_SUBTRACTED = ("limits", "targets")


#: the old name of :func:`runner_options`
engine_options = runner_options

__all__ = ["run_pipeline", "run_stages", "StageSpec", "StageContext", "StageReport", "PipelineResult",
           "NothingToDo", "StageUnavailable", "headline_result", "format_headline", "stage_seed",
           "folder_hash", "product_hash", "canonical_hash", "default_stages", "package_versions",
           "runner_options", "engine_options", "followup_rows", "read_record", "RunLock", "STAGE_FILE",
           "analysis_array"]
