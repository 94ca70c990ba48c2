"""How long ``cwsearch COMMAND --help`` takes (issue 16: options built from the stages' dataclasses must keep
help fast): ``python -m bench.help``.

Each command's ``--help`` runs in a fresh Python process, timed from outside (interpreter start and imports
included), ``--repeats`` times (median); in the same run, the reference is a bare interpreter printing an
empty argparse help (``python -c "import argparse; argparse.ArgumentParser().print_help()"``), so the ratio
command / reference says what cwsearch adds. Also checks in one process that building every command's
parser loaded none of numpy, scipy, astropy, numba, matplotlib or dask. ``--compare PATH`` also times the
cwsearch of another checkout (e.g. a ``git worktree`` of an older commit) in the same run. Prints each
figure and the load average (the machine is shared); ``--json PATH`` writes them (default
bench/results/help.json).

>>> _median([3.0, 1.0, 2.0])
2.0
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

from cwsearch.core.fileio import write_json_atomic

ROOT = Path(__file__).resolve().parent.parent
COMMANDS = ("", "noise", "scan", "followup", "hosts", "limits", "run", "demo")
REFERENCE = [sys.executable, "-c", "import argparse; argparse.ArgumentParser().print_help()"]
HEAVY = ("numpy", "scipy", "astropy", "numba", "matplotlib", "dask", "distributed")
CHECK = ("import sys, io, contextlib\nfrom cwsearch.cli import main\n"
         "for name in %r:\n"
         "    with contextlib.redirect_stdout(io.StringIO()):\n"
         "        main(([name] if name else []) + ['--help'])\n"
         "print(sorted(m for m in sys.modules if m.split('.')[0] in %r))\n")


def _median(values):
    return float(statistics.median(values))


def _time(argv, repeats, env, cwd=ROOT):
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env, cwd=cwd, check=True)
        times.append(time.perf_counter() - t)
    return _median(times)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=9)
    parser.add_argument("--json", default=str(ROOT / "bench" / "results" / "help.json"), metavar="PATH")
    parser.add_argument("--compare", default=None, metavar="PATH",
                        help="another checkout whose cwsearch is timed too (same commands, same run)")
    args = parser.parse_args(argv)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    other = dict(os.environ, PYTHONPATH=str(Path(args.compare).resolve())) if args.compare else None
    load = os.getloadavg()[0]
    reference = _time(REFERENCE, args.repeats, env)
    print(f"reference (bare python, empty argparse help): {reference * 1e3:.0f} ms  (load {load:.1f})")
    results = {"reference_seconds": reference, "load_average": load, "repeats": args.repeats, "commands": {}}
    for name in COMMANDS:
        command = [sys.executable, "-m", "cwsearch", *([name] if name else []), "--help"]
        seconds = _time(command, args.repeats, env)
        label = f"cwsearch {name} --help".replace("  ", " ")
        row = {"seconds": seconds, "ratio": seconds / reference}
        text = f"{label:<28} {seconds * 1e3:6.0f} ms  = {seconds / reference:4.1f} x reference"
        if other is not None:
            before = _time(command, args.repeats, other, cwd=Path(args.compare).resolve())
            row.update(compare_seconds=before, ratio_to_compare=seconds / before)
            text += f";  {args.compare}: {before * 1e3:.0f} ms ({seconds / before:.2f} x)"
        print(text)
        results["commands"][name or "(top)"] = row
    out = subprocess.run([sys.executable, "-c", CHECK % (COMMANDS, HEAVY)], capture_output=True, text=True,
                         env=env, cwd=ROOT, check=True)
    loaded = out.stdout.strip()
    print(f"numerical modules loaded by every --help: {loaded}")
    results["numerical_modules_loaded"] = loaded
    Path(args.json).parent.mkdir(parents=True, exist_ok=True)
    write_json_atomic(args.json, results)
    print(f"wrote {args.json}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())


__all__ = ["main"]
