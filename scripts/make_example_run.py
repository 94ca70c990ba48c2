"""Write runs/example.toml from the option dataclasses (cwsearch.job.example); ``--check`` only compares.

    python scripts/make_example_run.py           # rewrite runs/example.toml
    python scripts/make_example_run.py --check   # exit 1 (and say so) if the file is out of date
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from cwsearch.core.fileio import write_text_atomic  # noqa: E402
from cwsearch.job.example import example_toml  # noqa: E402

TARGET = ROOT / "runs" / "example.toml"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="compare only; exit 1 if the file differs")
    args = parser.parse_args(argv)
    text = example_toml()
    if args.check:
        same = TARGET.is_file() and TARGET.read_text(encoding="utf-8") == text
        print(f"{TARGET}: {'up to date' if same else 'DIFFERS from the option dataclasses (regenerate it)'}")
        return 0 if same else 1
    write_text_atomic(TARGET, text)
    print(f"wrote {TARGET}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
