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

import hashlib
import json
import os
import platform
import socket
import sys
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path

import numpy as np
from astropy.table import Table

from .. import __version__
from ..core.errors import InputError
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


def read_json(path):
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


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
        "engine": dict(config.engine),
        "versions": package_versions(),
        "history": history[-20:],
    }


def read_table(path):
    if not Path(path).is_file():
        return None
    try:
        return Table.read(path, format="ascii.ecsv")
    except Exception:
        return None


__all__ = ["STAGE_FILE", "DONE", "PACKAGES", "stage_seed", "canonical_hash", "file_checksum", "folder_hash",
           "product_hash", "read_record", "record_is_current", "read_json", "read_table", "package_versions", "RunLock",
           "json_default", "utc_now", "cpu_count", "provenance_record"]
