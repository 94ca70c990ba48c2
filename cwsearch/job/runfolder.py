"""The run folder: its layout, the stage records (``.stage.json``), hashes, provenance, seeds and the lock.

A run folder (``docs/design.md §11``) holds ``run.toml``, ``provenance.json``,
``summary.json``, ``dataset.json``, one folder per stage with its
``.stage.json`` record, and ``report.html``. This module owns everything the
pipeline (:mod:`cwsearch.job.pipeline`) and the report
(:mod:`cwsearch.job.report`) both need to read or write there: the
stage record and what makes it current (input hash, output hash), the
per-stage seeds, the provenance record and the lock that keeps two runs
out of one folder.

Examples
--------
>>> from cwsearch.job.runfolder import stage_seed
>>> stage_seed(0, "scan") == stage_seed(0, "scan") != stage_seed(0, "limits")
True
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import platform
import shutil
import socket
import sys
import time
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path

import numpy as np
from astropy.table import Table

from .. import __version__
from ..core.errors import InputError
from ..core.fileio import write_json_atomic
from ..core.safeio import escape_text, read_input_text
from .config import STAGES

STAGE_FILE = ".stage.json"
DONE = ("complete", "empty")


#: packages whose versions go into provenance.json
PACKAGES = ("numpy", "scipy", "astropy", "astropy-healpix", "numba", "ptemcee", "matplotlib", "dask",
            "distributed", "tqdm", "corner")


#: stage -> index of its seed (fixed, so that adding a stage does not change the other stages' seeds)
_SEED_ORDER = ("scan", "followup", "hosts", "limits", "noise")


def stage_seed(seed: int, stage: str) -> int:
    """Independent per-stage seed derived from the run seed (SeedSequence spawning)."""
    index = _SEED_ORDER.index(stage) if stage in _SEED_ORDER else sum(stage.encode())
    return int(np.random.SeedSequence([int(seed), index]).generate_state(1, dtype=np.uint32)[0])


def canonical_hash(obj) -> str:
    """SHA-256 of the canonical JSON of ``obj`` (sorted keys; floats by shortest repr)."""
    text = json.dumps(obj, sort_keys=True, separators=(",", ":"), default=json_default)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def json_default(obj):
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
    record = read_json(Path(stage_dir) / STAGE_FILE, stage_dir)
    return record if isinstance(record, dict) else None


def record_is_current(stage_dir, input_hash) -> bool:
    """True if the stage finished with these inputs and its files are untouched."""
    rec = read_record(stage_dir)
    return bool(rec and rec.get("status") in DONE and rec.get("input_hash") == input_hash
                and rec.get("output_hash") == folder_hash(stage_dir))


def package_versions() -> dict:
    """Versions of Python, cwsearch and the numerical packages it uses."""
    versions = {"python": platform.python_version(), "cwsearch": __version__}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return versions


def utc_now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def cpu_count() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        return os.cpu_count() or 1


#: a lock naming ANOTHER host is trusted this long [s] (its pid cannot be checked from here); older, it is
#: taken over. A lock naming this host is stale as soon as its process is gone.
LOCK_STALE_SECONDS = 24 * 3600


class RunLock:
    """Keeps two runs out of the same folder at once (``RUN_DIR/.lock``: the owner's host name and pid).

    Rule for shared file systems (docs/design.md §11): a lock written on
    this host is stale once its process is gone (a killed run) and is taken
    over. A lock naming another host is **not** stale: this host cannot see
    that process, so the folder is refused until the lock is older than
    :data:`LOCK_STALE_SECONDS` (24 h) or removed by hand (``rm RUN_DIR/.lock``
    once that run is known to be dead). An unreadable lock (empty, garbled)
    counts as written on this host by a dead process only when it is older
    than a minute (a lock being written right now is left alone).

    Once the lock is held, leftover temporary files of interrupted writes
    (hidden ``.NAME.XXXX.part`` files and folders anywhere in the run folder)
    are removed: no other process can be writing them.
    """

    def __init__(self, run_dir, *, clean=True):
        self.path = Path(run_dir) / ".lock"
        self.held = False
        self.clean = clean

    def __enter__(self):
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:  # read-only file system, no permission, disk full
            raise InputError(f"cannot write here ({exc.strerror})", file=self.path.parent) from None
        for _ in range(3):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                self._refuse_unless_stale()
                self.path.unlink(missing_ok=True)  # stale lock
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
            if self.clean:
                clean_partial_files(self.path.parent)
            return self
        raise InputError("cannot lock the run folder", file=self.path.parent)

    def _refuse_unless_stale(self):
        owner = self._owner()
        try:
            age = time.time() - os.lstat(self.path).st_mtime
        except OSError:
            return  # gone meanwhile
        here = socket.gethostname()
        if owner is None:
            if age < 60:
                raise InputError("another cwsearch run is starting in this run folder (its lock is being "
                                 "written); wait for it or choose another folder", file=self.path.parent)
            return
        host, pid = owner
        if host == here:
            if _pid_alive(pid):
                raise InputError(f"another cwsearch run (pid {pid}) is using this run folder; "
                                 "wait for it or choose another folder", file=self.path.parent)
            return
        if age < LOCK_STALE_SECONDS:
            raise InputError(f"another cwsearch run (pid {pid} on host {escape_text(host)}, lock written "
                             f"{age / 3600:.1f} h ago) is using this run folder; a lock from another host is "
                             f"trusted for {LOCK_STALE_SECONDS // 3600} h. If that run is dead, remove "
                             f"{self.path} by hand", file=self.path.parent)

    def _owner(self):
        try:
            host, pid = self.path.read_text().split()
            return host, int(pid)
        except (OSError, ValueError, UnicodeDecodeError):
            return None

    def __exit__(self, *exc):
        if self.held:
            self.path.unlink(missing_ok=True)
            self.held = False
        return False


def clean_partial_files(run_dir) -> list:
    """Remove the temporaries of interrupted atomic writes (hidden ``*.part`` files and folders) under
    ``run_dir``; only call it while holding the run folder's lock. Returns what was removed."""
    removed = []
    root = Path(run_dir)
    if not root.is_dir():
        return removed
    for path in sorted(root.rglob(".*.part"), key=lambda p: len(p.parts), reverse=True):
        try:
            if path.is_dir() and not path.is_symlink():
                shutil.rmtree(path)
            else:
                path.unlink()
            removed.append(path)
        except OSError:
            pass  # e.g. a read-only folder: nothing is written there either
    return removed


@contextlib.contextmanager
def stage_guard(run_dir, checksum=None, *, dataset_record=None):
    """The run-folder guard of a stage command (``cwsearch scan/followup/limits/hosts``), as the pipeline's.

    * the lock (:class:`RunLock`, with its rule for other hosts) and the clean-up of ``.part`` files;
    * the dataset check: a run folder whose ``dataset.json`` or ``provenance.json`` records another
      dataset checksum is refused (its results belong to another dataset);
    * on success, when no dataset was recorded yet, ``dataset_record()`` (a dict holding ``checksum``)
      is written to ``dataset.json``;
    * a run folder this guard created and left empty (the stage failed early) is removed again.
    """
    run_dir = Path(run_dir)
    created = not os.path.lexists(run_dir)
    recorded = recorded_checksum(run_dir)
    if checksum is not None and recorded is not None and recorded != checksum:
        raise InputError(f"this run folder holds results of another dataset (its dataset.json records checksum "
                         f"{recorded[:12]}..., this dataset has {checksum[:12]}...); choose another --out, or "
                         "give the dataset the folder was made from", file=run_dir)
    # the stage summaries record the dataset too: a folder without dataset.json (older, or edited by hand)
    # is checked through them, and one whose summaries disagree with its dataset.json is refused
    check_results_dataset(run_dir, checksum if checksum is not None else recorded)
    try:
        with RunLock(run_dir):
            yield
            if checksum is not None and recorded is None and dataset_record is not None:
                write_json_atomic(run_dir / "dataset.json", dataset_record())
    finally:
        if created:
            try:
                run_dir.rmdir()  # only if empty
            except OSError:
                pass


#: stage summaries that record the dataset checksum of their results (``noise_model.dataset_checksum``)
RESULT_SUMMARIES = ("scan/scan_summary.json", "followup/summary.json", "followup/candidate_*/summary.json",
                    "limits/limits_summary.json")


def check_results_dataset(run_dir, checksum):
    """Refuse (InputError naming the file) a run folder whose stage results were made from another dataset
    than ``checksum`` (the dataset at hand, or the one the folder records): each summary of
    :data:`RESULT_SUMMARIES` that states ``noise_model.dataset_checksum`` must state this one. Without a
    ``checksum`` the summaries must agree with each other."""
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        return
    seen = None
    for pattern in RESULT_SUMMARIES:
        for path in sorted(run_dir.glob(pattern)):
            data = read_json(path)
            model = data.get("noise_model") if isinstance(data, dict) else None
            theirs = model.get("dataset_checksum") if isinstance(model, dict) else None
            if not isinstance(theirs, str):
                continue
            want = checksum if checksum is not None else seen
            if want is not None and theirs != want:
                raise InputError(f"these results were made from another dataset (checksum {escape_text(theirs[:12])}"
                                 f"..., not {want[:12]}...): the run folder mixes datasets; choose another --out "
                                 "or rerun the stage", file=path)
            seen = theirs


def check_out_of_dataset(run_dir, dataset, *, what="--out"):
    """Refuse (InputError) a run folder that is the dataset folder or lies inside it: results written there
    would mix with the data (and a folder inside residuals/ would be taken for unused data files)."""
    run, data = Path(run_dir).resolve(), Path(dataset).resolve()
    if run == data or data in run.parents:
        raise InputError(f"the run folder is {'the' if run == data else 'inside the'} dataset folder {data}; "
                         f"results must not be mixed with the data: choose another {what}", file=run_dir)


def recorded_checksum(run_dir):
    """The dataset checksum a run folder records (``dataset.json`` or ``provenance.json``), or None."""
    for name, key in (("dataset.json", "checksum"), ("provenance.json", "dataset_checksum")):
        data = read_json(Path(run_dir) / name)
        if isinstance(data, dict) and isinstance(data.get(key), str):
            return data[key]
    return None


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


def read_json(path, root=None):
    """The JSON content of a run-folder file, or None if it is missing, not a regular file, too big or
    not JSON (read through :mod:`cwsearch.core.safeio`)."""
    try:
        return json.loads(read_input_text(path, root, max_bytes=JSON_MAX_BYTES))
    except (InputError, ValueError, RecursionError):
        return None


#: largest JSON file of a run folder read [bytes]
JSON_MAX_BYTES = 64 << 20


def provenance_record(config, checksum, started, previous=None) -> dict:
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
        "cpu_count": cpu_count(),
        "platform": platform.platform(),
        "execution": dict(config.execution),
        "versions": package_versions(),
        "history": history[-20:],
    }


def read_table(path):
    """An ECSV table of a run folder, or None if it is missing, not a regular file or unreadable."""
    try:
        text = read_input_text(path)
    except InputError:
        return None
    try:
        return Table.read(text if text.endswith("\n") else text + "\n", format="ascii.ecsv")
    except Exception:
        return None


__all__ = ["check_out_of_dataset", "STAGE_FILE", "DONE", "PACKAGES", "stage_seed", "canonical_hash", "file_checksum", "folder_hash",
           "product_hash", "read_record", "record_is_current", "read_json", "read_table", "package_versions", "RunLock",
           "json_default", "utc_now", "cpu_count", "provenance_record", "LOCK_STALE_SECONDS", "clean_partial_files",
           "stage_guard", "recorded_checksum", "JSON_MAX_BYTES"]
