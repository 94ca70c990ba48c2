"""The input-safety layer: every reader of a user's or a run folder's file goes through here.

One place decides what a file may be before a parser sees its bytes, and
what a number may be before a computation sees it (issue 19;
``docs/design.md §3``):

* **Regular files only.** A FIFO, a device, a socket or a folder where a
  file is expected is refused, and the check never blocks: the file is
  opened non-blocking and inspected with ``fstat`` before anything is read
  (a named pipe with no writer would otherwise hang the reader forever,
  ``/dev/zero`` would be read without end).
* **Symlinks stay inside their folder.** A file that belongs to a folder (a
  dataset file in the dataset, a checkpoint in its run folder) may be a
  symlink only if its target, fully resolved, is inside that folder;
  ``residuals/X.ecsv -> /etc/passwd`` is refused without being opened.
* **A size cap** (:data:`MAX_INPUT_BYTES`, 1 GiB by default; the
  environment variable ``CWSEARCH_MAX_INPUT_BYTES`` changes it) with a
  message naming the file, its size and the cap.
* **Plausible numbers**: :data:`MJD_RANGE`, :data:`SIGMA_RANGE`,
  :data:`MAX_RESIDUAL_SECONDS`, :data:`MAX_RESIDUAL_OVER_SIGMA` and
  :func:`check_count` (integer counts with an upper bound and, where the
  cost of one unit is known, a time estimate in the message).
* **Terminal-safe text**: :func:`escape_text` turns control characters
  (ESC, OSC, BEL, CR, C1 controls, ...) in galaxy names, backend labels,
  pulsar names or messages into visible ``\\x1b``-style escapes, so nothing
  read from a file can retitle, clear or rewrite the terminal.

This module is on the lowest floor (it imports nothing of cwsearch but
:mod:`cwsearch.core.errors`), so data readers, the run folder and the
command line can all use it.

Examples
--------
>>> import tempfile, pathlib
>>> d = pathlib.Path(tempfile.mkdtemp())
>>> _ = (d / "a.txt").write_text("hello")
>>> read_input_bytes(d / "a.txt", root=d)
b'hello'
>>> escape_text("GAL\\x1b]0;owned\\x07")
'GAL\\\\x1b]0;owned\\\\x07'
>>> check_count(5, "null_sims", maximum=10)
5
"""

from __future__ import annotations

import os
import stat
import unicodedata
from pathlib import Path

from .errors import InputError

#: largest file any reader accepts [bytes] (``CWSEARCH_MAX_INPUT_BYTES`` overrides)
MAX_INPUT_BYTES = 1 << 30

#: plausible TOA dates [MJD]: 1968-05 to 2050-08 (pulsars were discovered in 1967); a wider range needs
#: ``--mjd-range LO HI`` (``read_dataset(..., mjd_range=...)``)
MJD_RANGE = (40000.0, 70000.0)
#: plausible TOA uncertainties [s]: 1 ps to 0.1 s (below: not a timing measurement, a unit slip or an
#: underflow; above: a rotation-period-sized error)
SIGMA_RANGE = (1e-12, 0.1)
#: plausible |residual| [s] (a timing residual is a fraction of a rotation period; 1 s is far above any)
MAX_RESIDUAL_SECONDS = 1.0
#: plausible |residual| / sigma (a residual a million uncertainties away is a unit or transcription error)
MAX_RESIDUAL_OVER_SIGMA = 1e6


def max_input_bytes() -> int:
    """The size cap in force (:data:`MAX_INPUT_BYTES` or ``CWSEARCH_MAX_INPUT_BYTES``)."""
    value = os.environ.get("CWSEARCH_MAX_INPUT_BYTES")
    if value:
        try:
            return max(1, int(value))
        except ValueError:
            raise InputError(f"CWSEARCH_MAX_INPUT_BYTES must be a number of bytes, not {value!r}") from None
    return MAX_INPUT_BYTES


def _kind(mode: int) -> str:
    if stat.S_ISDIR(mode):
        return "a folder"
    if stat.S_ISFIFO(mode):
        return "a named pipe (FIFO)"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a regular file"


def _inside(path: Path, root: Path) -> bool:
    try:
        path.relative_to(root)
        return True
    except ValueError:
        return False


def check_link(path, root=None, *, what="file") -> Path:
    """The fully resolved ``path``; refuses a symlink (at any level below ``root``) leading outside ``root``.

    ``root`` is the folder the file belongs to (None: no containment rule).
    """
    path = Path(path)
    if root is None:
        return path.resolve()
    root_resolved = Path(root).resolve()
    resolved = path.resolve()
    if not _inside(resolved, root_resolved):
        raise InputError(f"{what} is a symbolic link to {escape_text(str(resolved))}, outside the folder "
                         f"{escape_text(str(root_resolved))} it belongs to (copy the file in instead)", file=path)
    return resolved


def is_regular_file(path) -> bool:
    """True if ``path`` (following symlinks) is a regular file. Never blocks, never raises."""
    try:
        return stat.S_ISREG(os.stat(path).st_mode)
    except (OSError, ValueError):
        return False


def open_regular(path, root=None, *, what="file", max_bytes=None):
    """Open ``path`` for reading in binary mode after the safety checks; returns ``(file object, size)``.

    Refuses (:class:`InputError`, naming the file): a missing file, a symlink
    outside ``root``, anything but a regular file, a file above the size cap.
    """
    path = Path(path)
    check_link(path, root, what=what)
    cap = max_input_bytes() if max_bytes is None else int(max_bytes)
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
    except FileNotFoundError:
        raise InputError(f"{what} not found", file=path) from None
    except OSError as exc:
        raise InputError(f"cannot read {what} ({exc.strerror})", file=path) from None
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise InputError(f"{what} is {_kind(info.st_mode)}, not a regular file", file=path)
        if info.st_size > cap:
            raise InputError(f"{what} is {info.st_size:,} bytes, above the {cap:,}-byte limit "
                             "(set CWSEARCH_MAX_INPUT_BYTES to allow larger files)", file=path)
        if hasattr(os, "set_blocking"):
            os.set_blocking(fd, True)
        fh = os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise
    return fh, info.st_size


def read_input_bytes(path, root=None, *, what="file", max_bytes=None) -> bytes:
    """The bytes of ``path`` after :func:`open_regular`'s checks (reads at most the cap, even if the
    file grows while it is read)."""
    cap = max_input_bytes() if max_bytes is None else int(max_bytes)
    fh, _ = open_regular(path, root, what=what, max_bytes=cap)
    try:
        with fh:
            data = fh.read(cap + 1)
    except OSError as exc:
        raise InputError(f"cannot read {what} ({exc.strerror})", file=path) from None
    if len(data) > cap:
        raise InputError(f"{what} is above the {cap:,}-byte limit (it grew while being read)", file=path)
    return data


def read_input_text(path, root=None, *, what="file", max_bytes=None) -> str:
    """:func:`read_input_bytes` decoded as UTF-8 (a leading byte-order mark is dropped)."""
    raw = read_input_bytes(path, root, what=what, max_bytes=max_bytes)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(f"not UTF-8 text (the 'utf-8' codec cannot decode byte {exc.start} on line {line}); "
                         "save it as UTF-8", file=path) from None
    return text[1:] if text.startswith("\ufeff") else text


def check_folder(path, *, what="folder") -> Path:
    """``path`` if it is a folder (following symlinks); InputError otherwise."""
    path = Path(path)
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise InputError(f"{what} not found", file=path) from None
    except OSError as exc:
        raise InputError(f"cannot open {what} ({exc.strerror})", file=path) from None
    if not stat.S_ISDIR(mode):
        raise InputError(f"not a folder ({_kind(mode)})" if not stat.S_ISREG(mode) else "not a folder", file=path)
    return path


def require_finished(product, summary, *, stage, command):
    """Refuse a stage product (``scan/candidates.ecsv``, ``followup/posterior.ecsv``) whose stage summary
    is missing: a stage writes its summary last, so without it the stage did not finish (a kill, a full
    disk) and its files must not be used."""
    if not is_regular_file(summary):
        raise InputError(f"the {stage} stage did not finish here ({Path(summary).name} is missing beside "
                         f"{Path(product).name}, e.g. after a full disk or a kill); run '{command}' again",
                         file=product)


# ---------------------------------------------------------------- numbers
def check_count(value, name, *, minimum=0, maximum, seconds_each=None, option=True) -> int:
    """``value`` as an int if it is an integer in ``[minimum, maximum]``; InputError otherwise.

    ``seconds_each`` (rough cost of one unit) adds a time estimate to the message.
    ``option``: name the value as a command-line option (``--null-sims``).
    """
    label = f"--{name.replace('_', '-')}" if option else name
    try:
        ok = int(value) == value and not isinstance(value, bool)
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok:
        raise InputError(f"option {label}: must be an integer, not {value!r}")
    if not minimum <= int(value) <= maximum:
        estimate = ""
        if seconds_each is not None and int(value) > maximum:
            estimate = f"; {value} would take about {_duration(float(value) * seconds_each)}"
        raise InputError(f"option {label}: must be between {minimum} and {maximum}, not {value}{estimate}")
    return int(value)


def _duration(seconds: float) -> str:
    for unit, size in (("years", 365.25 * 86400), ("days", 86400), ("hours", 3600), ("minutes", 60)):
        if seconds >= size:
            return f"{seconds / size:.3g} {unit}"
    return f"{seconds:.3g} seconds"


# ---------------------------------------------------------------- text
_SHORT = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def escape_text(text) -> str:
    """``text`` with every control or format character shown as an escape (``\\x1b``, ``\\u202e``).

    Printable text (letters of any script, digits, punctuation, spaces) is
    unchanged. Use it on every string from a file before it reaches a
    terminal.
    """
    text = str(text)
    if text.isprintable():
        return text
    out = []
    for ch in text:
        if ch.isprintable() or ch == " ":
            out.append(ch)
        elif ch in _SHORT:
            out.append(_SHORT[ch])
        elif unicodedata.category(ch) == "Zs":
            out.append(ch)
        else:
            code = ord(ch)
            out.append(f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}" if code < 0x10000 else f"\\U{code:08x}")
    return "".join(out)


def has_control(text) -> bool:
    """True if :func:`escape_text` would change ``text``."""
    return escape_text(text) != str(text)


__all__ = ["MAX_INPUT_BYTES", "MJD_RANGE", "SIGMA_RANGE", "MAX_RESIDUAL_SECONDS", "MAX_RESIDUAL_OVER_SIGMA",
           "max_input_bytes", "check_link", "is_regular_file", "open_regular", "read_input_bytes",
           "read_input_text", "check_folder", "check_count", "escape_text", "has_control", "require_finished"]
