"""Atomic file writing: every output appears whole or not at all.

All stages write through these helpers, so an interrupted run (Ctrl-C,
kill -9, full disk) never leaves a half-written file behind: data goes to a
temporary file in the same folder, is flushed to disk, and is renamed over
the target in one step.

Examples
--------
>>> import tempfile, pathlib
>>> from cwsearch.core.fileio import write_text_atomic
>>> d = pathlib.Path(tempfile.mkdtemp())
>>> write_text_atomic(d / "hello.txt", "hi\\n")
>>> (d / "hello.txt").read_text()
'hi\\n'
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import tempfile
from pathlib import Path

import numpy as np

from .errors import InputError


@contextlib.contextmanager
def atomic_path(target):
    """Yield a temporary path next to ``target``; rename it over ``target`` on success.

    On any exception the temporary file is removed and ``target`` is left as
    it was. A folder that cannot be written raises :class:`InputError`.
    """
    target = Path(target)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix="." + target.name + ".", suffix=".part", dir=target.parent)
    except OSError as exc:
        raise InputError(f"cannot write here ({exc.strerror})", file=target.parent) from None
    try:
        os.fchmod(fd, 0o666 & ~_umask())   # mkstemp makes 0600 files: give outputs the user's usual mode
    except OSError:
        pass
    finally:
        os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise InputError(f"cannot write ({exc.strerror})", file=target) from None
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _umask() -> int:
    """The process umask (read by setting and restoring it)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def write_text_atomic(target, text: str) -> None:
    """Write ``text`` (UTF-8) to ``target`` atomically."""
    with atomic_path(target) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_bytes_atomic(target, data: bytes) -> None:
    """Write ``data`` to ``target`` atomically."""
    with atomic_path(target) as tmp:
        tmp.write_bytes(data)


def write_json_atomic(target, obj) -> None:
    """Write ``obj`` as indented, strict JSON to ``target`` atomically: a float that is not finite (NaN,
    ±inf: "no value") is written as ``null``, since JSON (RFC 8259) has no NaN and other tools refuse it."""
    text = json.dumps(_finite_or_null(obj), indent=2, sort_keys=False, default=_json_default, allow_nan=False)
    write_text_atomic(target, text + "\n")


def _finite_or_null(obj):
    """``obj`` with NumPy values made plain and every non-finite float replaced by None."""
    if isinstance(obj, dict):
        return {k: _finite_or_null(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite_or_null(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _finite_or_null(obj.tolist())
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def write_table_atomic(target, table) -> None:
    """Write an astropy Table as ECSV to ``target`` atomically."""
    with atomic_path(target) as tmp:
        table.write(tmp, format="ascii.ecsv", overwrite=True)


def _json_default(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


__all__ = [
    "atomic_path", "write_text_atomic", "write_bytes_atomic", "write_json_atomic", "write_table_atomic",
]
