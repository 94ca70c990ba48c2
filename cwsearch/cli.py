"""The ``cwsearch`` command line: a thin dispatcher over the stage commands.

Each command lives in ``cwsearch/commands/<name>.py`` and provides
``DESCRIPTION`` and ``EXAMPLE`` strings, ``add_arguments(parser)`` and
``run(args) -> int``. Only the chosen command's module is imported, and
command modules import numerical code inside ``run`` only, so
``cwsearch --help`` stays fast (no numba, no matplotlib).

Exit status: 0 success, 2 user error (one line on stderr, no traceback),
1 internal error.
"""

from __future__ import annotations

import argparse
import errno
import importlib
import os
import sys
import traceback
import warnings

from . import __version__
from .core.errors import InputError
from .core.safeio import escape_text

#: command name -> one-line summary (the module is cwsearch.commands.<name>)
COMMANDS = {
    "demo": "run the whole job on the bundled invented demo data",
    "run": "run the whole job from a TOML run file",
    "simulate": "write an invented dataset (noise, background, injected binaries)",
    "inspect": "validate a dataset and print a summary per pulsar",
    "noise": "estimate the noise model (white, red per pulsar, common) from the residuals",
    "scan": "all-sky F-statistic scan over frequency x sky",
    "followup": "parallel-tempered MCMC fit of candidates (Earth + pulsar term)",
    "limits": "95% strain upper limits vs frequency and sky; chirp-mass limits for galaxies",
    "hosts": "rank catalogue galaxies as possible hosts of a candidate",
    "targets": "test every catalogue galaxy / periodic AGN at its sky position; calibrated p-values",
}


def _top_parser() -> argparse.ArgumentParser:
    lines = "\n".join(f"  {name:<10} {summary}" for name, summary in COMMANDS.items())
    parser = argparse.ArgumentParser(
        prog="cwsearch",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Search pulsar-timing residuals for individual supermassive black-hole binaries.",
        epilog=f"commands:\n{lines}\n\nexample:\n  cwsearch demo\n  cwsearch scan mydata --out runs/first\n\n"
        "Run 'cwsearch COMMAND --help' for a command's options and an example.",
    )
    parser.add_argument("--version", action="version", version=f"cwsearch {__version__}")
    parser.add_argument("command", nargs="?", help=argparse.SUPPRESS)
    return parser


def _command_parser(name: str, module) -> argparse.ArgumentParser:
    # lazy: the top-level `cwsearch --help` needs no registry (it is standard library only, but builds the
    # stages' option dataclasses)
    from .stages import BY_NAME

    epilog = "example:\n" + getattr(module, "EXAMPLE", f"  cwsearch {name}")
    if name in BY_NAME:   # a stage command: its options are the run file's keys (one source: the Options fields)
        epilog += ("\n\nrun file: for `cwsearch run` these options are keys, dashes turned into underscores\n"
                   f"(--no-NAME is NAME = false): the stage's in [{name}], the noise model's in [noise],\n"
                   "--workers/--scheduler in [execution], --out, --seed and --mjd-range at the top;\n"
                   "runs/example.toml lists every key")
    parser = argparse.ArgumentParser(
        prog=f"cwsearch {name}",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=getattr(module, "DESCRIPTION", COMMANDS[name]),
        epilog=epilog,
    )
    module.add_arguments(parser)
    return parser


def main(argv=None) -> int:
    """Entry point of the ``cwsearch`` console script."""
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv or argv[0] in ("-h", "--help", "--version") or argv[0] not in COMMANDS:
        parser = _top_parser()
        if argv and not argv[0].startswith("-") and argv[0] not in COMMANDS:
            parser.print_usage(sys.stderr)
            print(f"cwsearch: error: unknown command '{argv[0]}' (choose from {', '.join(COMMANDS)})", file=sys.stderr)
            return 2
        try:
            parser.parse_args(argv or ["--help"])
        except SystemExit as exc:
            return int(exc.code or 0)
        return 0
    name = argv[0]
    module = importlib.import_module(f"cwsearch.commands.{name}")
    parser = _command_parser(name, module)
    try:
        args = parser.parse_args(argv[1:])
    except SystemExit as exc:  # argparse: --help gives 0, bad options give 2
        return int(exc.code or 0)
    return run_command(module.run, args)


def run_command(func, args) -> int:
    """Run ``func(args)``, mapping user errors to exit 2 and crashes to exit 1."""
    warnings.showwarning = _show_warning
    try:
        return int(func(args) or 0)
    except InputError as exc:
        # one line, and nothing read from a file can drive the terminal (control characters escaped)
        print(f"cwsearch: error: {escape_text(str(exc))}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("cwsearch: interrupted; finished outputs are kept, nothing half-written", file=sys.stderr)
        return 130
    except OSError as exc:
        if exc.errno not in _CANNOT_WRITE:
            return _internal_error()
        # a full disk or read-only folder met outside cwsearch.core.fileio, e.g. while numba saves its
        # compiled-code cache: the user's problem, not a bug
        hint = "; free some space and run again" if exc.errno in _NO_SPACE else ""
        print(f"cwsearch: error: {_failed_path(exc)}: {exc.strerror}{hint}", file=sys.stderr)
        return 2
    except Exception:
        return _internal_error()


def _show_warning(message, category, filename, lineno, file=None, line=None):
    """cwsearch's own warnings as one line ``cwsearch: warning: ...`` on stderr; others as Python shows them."""
    if getattr(category, "__module__", "").startswith("cwsearch"):
        print(f"cwsearch: warning: {message}", file=sys.stderr if file is None else file)
        return
    print(warnings.formatwarning(message, category, filename, lineno, line), end="",
          file=sys.stderr if file is None else file)


#: errno values of a place that cannot be written or read by this user (exit 2, no traceback)
_NO_SPACE = {errno.ENOSPC, errno.EDQUOT}
_CANNOT_WRITE = _NO_SPACE | {errno.EROFS, errno.EACCES}


def _internal_error() -> int:
    """Show the traceback of the exception being handled; exit status 1."""
    traceback.print_exc()
    print("cwsearch: internal error (please report it with the traceback above)", file=sys.stderr)
    return 1


def _failed_path(exc: OSError) -> str:
    """The file an OSError is about: its ``filename``, else a path held by the innermost frame that
    has one (write errors on an open file carry no name); '(unknown file)' if none is found."""
    if exc.filename is not None:
        return str(exc.filename)
    frames = []
    tb = exc.__traceback__
    while tb is not None:
        frames.append(tb.tb_frame)
        tb = tb.tb_next
    for frame in reversed(frames):
        for name in ("filepath", "filename", "path", "target", "file", "tmpname"):
            value = frame.f_locals.get(name)
            if isinstance(value, (str, os.PathLike)):
                return os.fspath(value)
    return "(unknown file)"


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())


__all__ = ["COMMANDS", "main", "run_command"]
