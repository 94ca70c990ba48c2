"""The whole job in one call: noise → scan → follow-up → hosts → limits, with skipping, resume and provenance.

:func:`run_pipeline` takes a validated :class:`~cwsearch.job.config.RunConfig`
and fills its run folder (DESIGN.md §11)::

    RUN_DIR/
      run.toml          the fully resolved configuration
      provenance.json   versions, seed, dataset checksum, times, host, CPUs, stage log
      summary.json      the headline result (also printed by ``cwsearch run --json``)
      dataset.json      the dataset summary shown on the report
      scan/ followup/ hosts/ limits/    one folder per stage, each with .stage.json
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
>>> from cwsearch.job.pipeline import stage_seed
>>> stage_seed(0, "scan") == stage_seed(0, "scan") != stage_seed(0, "limits")
True
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import shutil
import socket
import sys
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

from .. import __version__
from .config import STAGES, RunConfig
from ..core.errors import InputError
from ..core.fileio import write_json_atomic

STAGE_FILE = ".stage.json"
DONE = ("complete", "empty")

#: packages whose versions go into provenance.json
PACKAGES = ("numpy", "scipy", "astropy", "astropy-healpix", "numba", "ptemcee", "matplotlib", "dask",
            "distributed", "tqdm", "corner")


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
def stage_seed(seed: int, stage: str) -> int:
    """Independent per-stage seed derived from the run seed (SeedSequence spawning)."""
    import numpy as np

    index = _SEED_ORDER.index(stage) if stage in _SEED_ORDER else sum(stage.encode())
    return int(np.random.SeedSequence([int(seed), index]).generate_state(1, dtype=np.uint32)[0])


#: stage -> index of its seed (fixed, so that adding a stage does not change the other stages' seeds)
_SEED_ORDER = ("scan", "followup", "hosts", "limits", "noise")


def canonical_hash(obj) -> str:
    """SHA-256 of the canonical JSON of ``obj`` (sorted keys; floats by shortest repr)."""
    text = json.dumps(obj, sort_keys=True, separators=(",", ":"), default=_json_default)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _json_default(obj):
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "item"):
        return obj.item()
    if hasattr(obj, "tolist"):
        return obj.tolist()
    return str(obj)


def file_checksum(path) -> str:
    """SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def folder_hash(folder) -> str:
    """SHA-256 over the relative paths and bytes of every visible file under ``folder``.

    Hidden names (starting with '.': the stage record, temporary files,
    checkpoints) are left out.
    """
    folder = Path(folder)
    h = hashlib.sha256()
    if folder.is_dir():
        for path in sorted(folder.rglob("*")):
            rel = path.relative_to(folder)
            if any(part.startswith(".") for part in rel.parts) or not path.is_file():
                continue
            h.update(str(rel.as_posix()).encode() + b"\0")
            h.update(file_checksum(path).encode() + b"\n")
    return h.hexdigest()


def product_hash(folder, patterns) -> str:
    """SHA-256 over the relative paths and bytes of the files matching ``patterns`` (globs relative
    to ``folder``); the whole :func:`folder_hash` when no pattern is given."""
    if not patterns:
        return folder_hash(folder)
    folder = Path(folder)
    files = sorted({p for pattern in patterns for p in folder.glob(pattern) if p.is_file()})
    h = hashlib.sha256()
    for path in files:
        h.update(str(path.relative_to(folder).as_posix()).encode() + b"\0")
        h.update(file_checksum(path).encode() + b"\n")
    return h.hexdigest()


def read_record(stage_dir) -> dict | None:
    """The stage record ``.stage.json`` of a stage folder, or None."""
    path = Path(stage_dir) / STAGE_FILE
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def record_is_current(stage_dir, input_hash) -> bool:
    """True if the stage finished with these inputs and its files are untouched."""
    rec = read_record(stage_dir)
    return bool(rec and rec.get("status") in DONE and rec.get("input_hash") == input_hash
                and rec.get("output_hash") == folder_hash(stage_dir))


# ---------------------------------------------------------------- provenance
def package_versions() -> dict:
    """Versions of Python, cwsearch and the numerical packages it uses."""
    from importlib import metadata

    versions = {"python": platform.python_version(), "cwsearch": __version__}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return versions


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _cpu_count() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        return os.cpu_count() or 1


# ---------------------------------------------------------------- run-folder lock
class RunLock:
    """Keeps two runs out of the same folder at once (``RUN_DIR/.lock`` with the owner's pid).

    A lock left by a killed run (its process is gone) is taken over.
    """

    def __init__(self, run_dir):
        self.path = Path(run_dir) / ".lock"
        self.held = False

    def __enter__(self):
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:  # read-only file system, no permission, disk full
            raise InputError(f"cannot write here ({exc.strerror})", file=self.path.parent) from None
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                owner = self._owner()
                if owner and owner[0] == socket.gethostname() and _pid_alive(owner[1]):
                    raise InputError(f"another cwsearch run (pid {owner[1]}) is using this run folder; "
                                     "wait for it or choose another folder", file=self.path.parent) from None
                self.path.unlink(missing_ok=True)  # stale lock of a killed run
                continue
            except OSError as exc:
                raise InputError(f"cannot write here ({exc.strerror})", file=self.path.parent) from None
            try:
                with os.fdopen(fd, "w") as fh:
                    fh.write(f"{socket.gethostname()} {os.getpid()}\n")
            except OSError as exc:  # disk full: no half-written lock left behind
                self.path.unlink(missing_ok=True)
                raise InputError(f"cannot write ({exc.strerror})", file=self.path) from None
            self.held = True
            return self
        raise InputError("cannot lock the run folder", file=self.path.parent)

    def _owner(self):
        try:
            host, pid = self.path.read_text().split()
            return host, int(pid)
        except (OSError, ValueError):
            return None

    def __exit__(self, *exc):
        if self.held:
            self.path.unlink(missing_ok=True)
            self.held = False
        return False


def _pid_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


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
        if spec.name not in config.stages:
            rec = read_record(stage_dir)
            if rec and rec.get("status") in DONE and rec.get("output_hash") == folder_hash(stage_dir):
                records[spec.name] = rec  # earlier results stay usable downstream
            reports.append(StageReport(spec.name, "off", reason="not in this run's stages"))
            log(f"{label}: off (not in this run's stages)")
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
                           upstream={u: records[u] for u in spec.upstream}, _array_loader=load_array,
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
        started, t0 = _now(), time.perf_counter()
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
                  "started": started, "finished": _now(),
                  "seconds": round(seconds, 3), "seed": ctx.seed, "cwsearch": __version__,
                  "inputs": inputs, "summary": _jsonable(summary)}
        write_json_atomic(stage_dir / STAGE_FILE, record)
        records[spec.name] = record
        reports.append(StageReport(spec.name, "ran" if status == "complete" else "empty", seconds, reason,
                                   record["summary"]))
        log(f"{label}: done in {seconds:.1f} s" + (f" ({reason})" if reason else ""))
    return reports


def _plain_dataclass(obj):
    import dataclasses

    if obj is None:
        return None
    return {f.name: getattr(obj, f.name) for f in dataclasses.fields(obj)}


def _jsonable(obj):
    return json.loads(json.dumps(obj, default=_json_default))


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
    from ..data.dataset import dataset_checksum, read_dataset

    run_dir = Path(config.out)
    log = (lambda msg: None) if quiet else (lambda msg: print(msg, file=sys.stderr, flush=True))
    progress = progress and not quiet
    specs = default_stages() if specs is None else specs

    # everything a user can get wrong is checked before any work
    array = read_dataset(config.dataset)
    checksum = dataset_checksum(config.dataset)
    with RunLock(run_dir):
        started = _now()
        config.write(run_dir / "run.toml")
        provenance = _provenance(config, checksum, started, previous=_read_json(run_dir / "provenance.json"))
        write_json_atomic(run_dir / "provenance.json", provenance)
        write_json_atomic(run_dir / "dataset.json", dataset_summary(array, config.dataset, checksum))
        if write_report:
            from ..data.plots import dataset_overview

            dataset_overview(array, run_dir / "dataset.png")
        log(f"cwsearch: run folder {run_dir}")
        status = "interrupted"
        try:
            reports = run_stages(config, specs, dataset_checksum=checksum, load_array=lambda: array,
                                 force=force, progress=progress, log=log,
                                 noise_resolver=run_noise_resolver(config, array, checksum, progress))
            status = "complete"
        except BaseException as exc:
            status = "interrupted" if isinstance(exc, KeyboardInterrupt) else "failed"
            provenance.update(finished=_now(), status=status)
            try:
                write_json_atomic(run_dir / "provenance.json", provenance)
            except InputError:
                pass  # e.g. the disk is full: the original error is the one to report
            raise
        headline = headline_result(run_dir, reports)
        write_json_atomic(run_dir / "summary.json", {"headline": headline,
                                                     "stages": [r.as_dict() for r in reports]})
        provenance.update(finished=_now(), status=status, stages=[r.as_dict() for r in reports])
        for r in provenance["stages"]:
            r.pop("summary", None)
        write_json_atomic(run_dir / "provenance.json", provenance)
        report_path = None
        if write_report:
            from .report import build_report

            report_path = build_report(run_dir)
    return PipelineResult(run_dir, reports, headline, report_path)


def run_noise_resolver(config, array, checksum, progress=False):
    """``() -> ResolvedNoise`` for a run (resolved on first use, then cached): the run's ``[noise] model``
    through :func:`cwsearch.job.noisemodel.resolve_noise_model`."""
    cache = {}

    def resolver():
        if "resolved" not in cache:
            from .noisemodel import resolve_noise_model

            options = config.options.get("noise")
            cache["resolved"] = resolve_noise_model(
                array, config.out, getattr(options, "model", "estimate"), noise=config.noise,
                dataset_checksum=checksum, options=options, seed=stage_seed(config.seed, "noise"), progress=progress)
        return cache["resolved"]
    return resolver


def _read_json(path):
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def _provenance(config, checksum, started, previous=None) -> dict:
    history = []
    if previous:
        history = list(previous.get("history", []))
        history.append({k: previous.get(k) for k in ("started", "finished", "status")})
    return {
        "cwsearch": __version__,
        "command": " ".join([Path(sys.argv[0]).name] + sys.argv[1:]) if sys.argv else "",
        "run_file": str(config.path) if config.path else None,
        "seed": config.seed,
        "stage_seeds": {s: stage_seed(config.seed, s) for s in STAGES},
        "dataset": str(config.dataset),
        "dataset_checksum": checksum,
        "started": started,
        "finished": None,
        "status": "running",
        "host": socket.gethostname(),
        "cpu_count": _cpu_count(),
        "platform": platform.platform(),
        "engine": dict(config.engine),
        "versions": package_versions(),
        "history": history[-20:],
    }


def dataset_summary(array, path, checksum) -> dict:
    """Per-pulsar table and totals shown in the report's dataset section."""
    import numpy as np

    from ..core.constants import YEAR_SECONDS

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
def _read_table(path):
    from astropy.table import Table

    try:
        return Table.read(path, format="ascii.ecsv")
    except Exception:
        return None


def headline_result(run_dir, reports=None) -> dict:
    """The headline: candidate found or not and its significance, best host, best limit.

    Read from the stage output files of DESIGN.md §11, so it works for any
    run folder.
    """
    import numpy as np

    run_dir = Path(run_dir)
    statuses = {r.name: r for r in (reports or [])}
    head = {"candidate_found": False, "candidate": None, "best_host": None, "best_limit": None}

    fol = _read_json(run_dir / "followup" / "summary.json")
    fol_rec = read_record(run_dir / "followup")
    followed = fol_rec.get("summary", {}) if fol_rec and fol_rec.get("status") == "complete" else {}
    cands = _read_table(run_dir / "scan" / "candidates.ecsv")
    if cands is not None and len(cands):
        best = cands[int(np.argmin(cands["fap"]))] if "fap" in cands.colnames else cands[0]
        cand = {k: _num(best[k]) for k in ("frequency", "ra", "dec", "fe", "fap", "fap_empirical")
                if k in cands.colnames}
        threshold = _threshold(run_dir)
        cand["fap_threshold"] = threshold
        head["candidate_found"] = bool("fap" in cand and threshold is not None and cand["fap"] < threshold)
        if isinstance(fol, dict) and fol.get("log_bayes_factor") is not None:
            bf = fol["log_bayes_factor"]
            err = fol.get("log_bayes_factor_error", fol.get("log_bayes_factor_err"))
            if isinstance(bf, list):  # several candidates followed: the first is the best
                bf = bf[0] if bf else None
                err = err[0] if isinstance(err, list) and err else None
            cand["log_bayes_factor"] = _num(bf)
            if err is not None:
                cand["log_bayes_factor_err"] = _num(err)
        for key in ("log_bayes_factor", "log_bayes_factor_err"):
            if key not in cand and key in followed:
                cand[key] = _num(followed[key])
        head["candidate"] = cand
    hosts = _read_table(run_dir / "hosts" / "ranking.ecsv")
    if hosts is not None and len(hosts) and "probability" in hosts.colnames:
        i = int(np.argmax(hosts["probability"]))
        head["best_host"] = {"name": str(hosts["name"][i]), "probability": _num(hosts["probability"][i])}
    lim = _read_table(run_dir / "limits" / "frequency_limits.ecsv")
    if lim is not None and len(lim) and "strain_95" in lim.colnames:
        i = int(np.nanargmin(np.asarray(lim["strain_95"], dtype=float)))
        head["best_limit"] = {"frequency": _num(lim["frequency"][i]), "strain_95": _num(lim["strain_95"][i])}
    if statuses:
        head["stages"] = {name: r.status for name, r in statuses.items()}
    return head


def _threshold(run_dir):
    rec = read_record(Path(run_dir) / "followup")
    if rec:
        thr = rec.get("inputs", {}).get("options", {}).get("fap_threshold")
        if thr is not None:
            return float(thr)
    try:
        import tomllib

        cfg = tomllib.loads((Path(run_dir) / "run.toml").read_text(encoding="utf-8"))
        return float(cfg.get("followup", {}).get("fap_threshold", 0.01))
    except (OSError, ValueError):
        return 0.01


def _num(v):
    try:
        v = v.item()
    except AttributeError:
        pass
    if isinstance(v, float) and v != v:
        return None
    return v


def format_headline(head: dict) -> str:
    """The headline as a few plain-English lines."""
    lines = []
    cand = head.get("candidate")
    if head.get("candidate_found") and cand:
        line = (f"Candidate found: f_gw = {cand['frequency']:.4g} Hz at ra = {cand.get('ra', float('nan')):.1f} deg, "
                f"dec = {cand.get('dec', float('nan')):.1f} deg, false-alarm probability {cand['fap']:.2g}")
        if cand.get("log_bayes_factor") is not None:
            line += f", ln Bayes factor {cand['log_bayes_factor']:.1f}"
            if cand.get("log_bayes_factor_err") is not None:
                line += f" ± {cand['log_bayes_factor_err']:.1f}"
        lines.append(line + ".")
    elif cand:
        lines.append(f"No candidate: the strongest peak (f_gw = {cand['frequency']:.4g} Hz) has false-alarm "
                     f"probability {cand.get('fap', float('nan')):.2g}, above the threshold "
                     f"{cand.get('fap_threshold')}.")
    else:
        lines.append("No candidate (no scan result).")
    host = head.get("best_host")
    if host:
        lines.append(f"Best host: {host['name']} with probability {host['probability']:.2f}.")
    lim = head.get("best_limit")
    if lim:
        lines.append(f"Sky-averaged 95% strain upper limit: {lim['strain_95']:.3g} at {lim['frequency']:.4g} Hz "
                     "(most sensitive frequency).")
    return "\n".join(lines)


# ---------------------------------------------------------------- the real stages
def default_stages():
    """The four stages of the job, wired to the stage modules."""
    return [
        StageSpec("noise", _run_noise, available=_availability("noise"), products=("noise_model.ecsv",)),
        StageSpec("scan", _run_scan, available=_availability("scan"), products=("candidates.ecsv",)),
        StageSpec("followup", _run_followup, upstream=("scan",), available=_availability("followup"),
                  products=("posterior.ecsv", "*/posterior.ecsv")),
        StageSpec("hosts", _run_hosts, upstream=("followup",), extra_inputs=_hosts_inputs,
                  available=_availability("hosts")),
        StageSpec("limits", _run_limits, available=_availability("limits")),
    ]


#: the function each stage module must provide
_ENTRY = {"noise": "run_noise", "scan": "run_scan", "followup": "run_followup", "hosts": "run_hosts", "limits": "run_limits"}


def _availability(name):
    def check():
        from .config import stage_options_class

        try:
            module = _stage_module(name)
        except StageUnavailable as exc:
            return str(exc)
        if stage_options_class(name) is None or not hasattr(module, _ENTRY[name]):
            return f"stage not available: cwsearch.{name} has no {_ENTRY[name]}() with its options class yet"
        return None
    return check


def _stage_module(name):
    import importlib

    try:
        return importlib.import_module(f"cwsearch.stages.{name}.stage")
    except ModuleNotFoundError as exc:
        if exc.name in (f"cwsearch.stages.{name}.stage", f"cwsearch.stages.{name}", "cwsearch"):
            raise StageUnavailable(f"stage not available: cwsearch.{name} is not installed in this copy") from None
        raise


def _run_noise(ctx):
    """Fit the noise model (only when the run's noise model is ``estimate``)."""
    model = getattr(ctx.options, "model", "estimate")
    if model != "estimate":
        raise NothingToDo(f"the run uses the {'dataset' if model == 'dataset' else 'given'} noise model"
                          + ("" if model == "dataset" else f" ({model})"))
    mod = _stage_module("noise")
    result = mod.run_noise(ctx.array, ctx.run_dir, ctx.options, noise=ctx.config.noise, seed=ctx.seed,
                           progress=ctx.progress, dataset_checksum=ctx.dataset_checksum)
    return dict(getattr(result, "summary", {}) or {})


def _run_scan(ctx):
    mod = _stage_module("scan")
    options = engine_options(ctx.options, ctx.config.engine)
    result = mod.run_scan(ctx.model_array, ctx.run_dir, options, noise=ctx.noise, seed=ctx.seed,
                          progress=ctx.progress)
    return dict(getattr(result, "summary", {}) or {})


def followup_rows(candidates, fap_threshold, max_candidates, span):
    """Rows (0-based, best first) of the scan candidates to follow up.

    Every candidate whose trials-corrected analytic false-alarm probability
    (column ``fap``) is below ``fap_threshold``, best first, except those
    within one frequency bin (1/T_span) of a better chosen one (the same
    source seen at another sky position: the follow-up fits the whole sky
    anyway), at most ``max_candidates``.
    """
    import numpy as np

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


def _run_followup(ctx):
    """Follow up every scan candidate below the false-alarm threshold (reads run_dir/scan/candidates.ecsv)."""
    from dataclasses import asdict, replace

    import numpy as np

    mod = _stage_module("followup")
    threshold = float(ctx.extra.get("fap_threshold", 0.01))
    max_candidates = int(ctx.extra.get("max_candidates", 3))
    cands = _read_table(ctx.run_dir / "scan" / "candidates.ecsv")
    rows = followup_rows(cands, threshold, max_candidates, ctx.array.span)
    if not rows:
        best = float(np.min(cands["fap"])) if cands is not None and len(cands) and "fap" in cands.colnames \
            else None
        raise NothingToDo(f"no scan candidate has a false-alarm probability below {threshold:g}"
                          + (f" (best {best:.2g})" if best is not None else ""))
    if rows == list(range(len(rows))):
        # the chosen candidates are the best ones: one call (one sub-folder each when there are several)
        options = replace(ctx.options, top=len(rows), candidate=None, resume=ctx.resuming)
        result = mod.run_followup(ctx.model_array, ctx.run_dir, options, noise=ctx.noise, seed=ctx.seed,
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
            shutil.copy2(ctx.run_dir / "scan" / "candidates.ecsv", scratch / "scan" / "candidates.ecsv")
            options = replace(ctx.options, top=1, candidate=row + 1, resume=ctx.resuming)
            result = mod.run_followup(ctx.model_array, scratch, options, noise=ctx.noise, seed=int(seed),
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


def _run_hosts(ctx):
    """Rank catalogue galaxies for every followed-up candidate (reads run_dir/followup/)."""
    if ctx.upstream.get("followup", {}).get("status") == "empty":
        raise NothingToDo("no candidate was followed up, so there is no source to match")
    if not getattr(ctx.options, "catalog", None):
        raise NothingToDo("no galaxy catalogue given ([hosts] catalog)")
    mod = _stage_module("hosts")
    result = mod.run_hosts(ctx.model_array, ctx.run_dir, ctx.options, noise=ctx.noise, seed=ctx.seed,
                           progress=ctx.progress)
    return dict(getattr(result, "summary", {}) or {})


def engine_options(options, engine: dict):
    """``options`` with the [engine] settings filled into its ``workers``/``scheduler`` fields (if it has them).

    The engine decides where the work runs, not its result, so it is not part of any stage's input hash.
    """
    from dataclasses import fields, replace

    names = {f.name for f in fields(options)}
    changes = {}
    if "workers" in names:
        changes["workers"] = int(engine.get("workers") or 0) or None
    if "scheduler" in names:
        changes["scheduler"] = engine.get("address") or None if engine.get("kind") == "dask" else None
    return replace(options, **changes) if changes else options


def _run_limits(ctx):
    mod = _stage_module("limits")
    options = engine_options(ctx.options, ctx.config.engine)
    result = mod.run_limits(ctx.model_array, ctx.run_dir, options, noise=ctx.noise, seed=ctx.seed,
                            progress=ctx.progress)
    return dict(getattr(result, "summary", {}) or {})


__all__ = ["run_pipeline", "run_stages", "StageSpec", "StageContext", "StageReport", "PipelineResult",
           "NothingToDo", "StageUnavailable", "headline_result", "format_headline", "stage_seed",
           "folder_hash", "product_hash", "canonical_hash", "default_stages", "package_versions"]
