"""Command line basics: help, version, exit codes, lazy imports, simulate + inspect round trip.

Expectations are common practice for command-line tools (no source): --help and --version exit 0, usage
errors exit 2, user errors give one line without a traceback, and help stays cheap (no numba/matplotlib).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from cwsearch import __version__, cli
from cwsearch.data.compare import compare_datasets
from cwsearch.data.dataset import dataset_checksum, read_dataset

REPO = Path(__file__).resolve().parents[1]
SMALL = ["--pulsars", "4", "--years", "6", "--toas-per-pulsar", "40"]


def _run(args, cwd):
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.run([sys.executable, "-m", "cwsearch", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=300)


def test_help_and_version(tmp_path):
    out = _run(["--help"], tmp_path)
    assert out.returncode == 0
    for name in ("simulate", "inspect", "scan"):
        assert name in out.stdout
    out = _run(["--version"], tmp_path)
    assert out.returncode == 0 and __version__ in out.stdout


def test_unknown_command_exits_2(tmp_path):
    out = _run(["frobnicate"], tmp_path)
    assert out.returncode == 2
    assert "unknown command" in out.stderr and "Traceback" not in out.stderr


def test_help_imports_no_numba_or_matplotlib(tmp_path):
    code = (
        "import sys, contextlib, io\n"
        "from cwsearch.cli import main\n"
        "for argv in (['--help'], ['simulate', '--help'], ['inspect', '--help']):\n"
        "    with contextlib.redirect_stdout(io.StringIO()):\n"
        "        assert main(argv) == 0, argv\n"
        "print(sorted(m for m in ('numba', 'matplotlib', 'numpy') if m in sys.modules))\n"
    )
    env = dict(os.environ, PYTHONPATH=str(REPO))
    out = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, env=env, capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_scan_stage_imports_no_scipy_stats_optimize_or_matplotlib(tmp_path):
    """The whole-command time of ``cwsearch scan`` (issue 18): its stage loads neither scipy.stats nor
    scipy.optimize (0.4 s of imports together) nor matplotlib (plots import it when they are made)."""
    code = ("import sys\nimport cwsearch.commands.scan, cwsearch.stages.scan.stage\n"
            "print(sorted(m for m in ('scipy.stats', 'scipy.optimize', 'matplotlib') if m in sys.modules))\n")
    env = dict(os.environ, PYTHONPATH=str(REPO))
    out = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, env=env, capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_command_help_shows_example(capsys):
    assert cli.main(["simulate", "--help"]) == 0
    text = capsys.readouterr().out
    assert "cwsearch simulate mydata --pulsars 40" in text and "--inject-strain" in text
    assert cli.main(["inspect", "--help"]) == 0
    assert "cwsearch inspect mydata" in capsys.readouterr().out


def test_simulate_then_inspect(tmp_path, capsys):
    out = tmp_path / "mydata"
    argv = ["simulate", str(out), *SMALL, "--seed", "7", "--inject-strain", "2e-14", "--inject-frequency", "8e-9",
            "--inject-ra", "150", "--inject-dec", "-20"]
    assert cli.main(argv) == 0
    assert "optimal SNR" in capsys.readouterr().out
    injection = json.loads((out / "injection.json").read_text())
    (binary,) = injection["binaries"]
    # exact on purpose: the options are copied into injection.json, not recomputed
    assert (binary["ra"], binary["dec"], binary["gw_frequency"], binary["strain"]) == (150.0, -20.0, 8e-9, 2e-14)
    assert binary["chirp_mass"] == 1e9 and set(binary["pulsar_phases"]) == {f"SIMPSR0{i}" for i in range(1, 5)}
    assert injection["seed"] == 7

    assert cli.main(["inspect", str(out)]) == 0
    table = capsys.readouterr().out
    assert "SIMPSR04" in table and "dataset is valid" in table
    assert cli.main(["inspect", str(out), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    arr = read_dataset(out)
    assert summary["n_pulsars"] == 4 and summary["n_toas"] == sum(p.n_toas for p in arr)
    assert summary["checksum"] == dataset_checksum(out)  # checksum of the same files, read twice
    assert summary["injected_binaries"] == 1
    assert [p["name"] for p in summary["pulsars"]] == arr.names

    # refuses a non-empty folder, replaces it with --overwrite, same seed -> same numbers (recomputed, so
    # compared table by table to 1e-12 relative, never by checksum)
    before = dataset_checksum(out)
    keep = tmp_path / "first"
    shutil.copytree(out, keep)
    assert cli.main(argv) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert dataset_checksum(out) == before  # refused: the files were not touched, so their bytes are the same
    assert cli.main(argv + ["--overwrite", "--quiet"]) == 0
    same = compare_datasets(out, keep)
    assert same.ok, same.describe()
    assert cli.main(["simulate", str(tmp_path / "other"), *SMALL, "--seed", "8", "--quiet"]) == 0
    assert dataset_checksum(tmp_path / "other") != before


def test_inject_file_round_trip(tmp_path, capsys):
    """Several binaries from --inject-file; feeding injection.json back in reproduces the same dataset."""
    spec = [
        {"ra": 10.0, "dec": 45.0, "gw_frequency": 5e-9, "strain": 1e-14},
        {"ra": 200.0, "dec": -30.0, "gw_frequency": 2e-8, "luminosity_distance": 50.0, "chirp_mass": 2e9,
         "inclination": 0.2, "evolution": "monochromatic", "pulsar_term": False},
    ]
    (tmp_path / "b.json").write_text(json.dumps(spec))
    assert cli.main(["simulate", str(tmp_path / "a"), *SMALL, "--inject-file", str(tmp_path / "b.json"),
                     "--quiet"]) == 0
    injection = json.loads((tmp_path / "a" / "injection.json").read_text())
    assert len(injection["binaries"]) == 2
    assert injection["binaries"][1]["evolution"] == "monochromatic"
    assert injection["binaries"][1]["strain"] > 0
    assert cli.main(["simulate", str(tmp_path / "b"), *SMALL, "--inject-file",
                     str(tmp_path / "a" / "injection.json"), "--quiet"]) == 0
    same = compare_datasets(tmp_path / "a", tmp_path / "b", injection=False)  # recomputed: to 1e-12 relative
    assert same.ok, same.describe()


@pytest.mark.parametrize("extra, message", [
    (["--inject-strain", "1e-14", "--inject-frequency", "1e-7", "--inject-ra", "1", "--inject-dec", "2",
      "--inject-chirp-mass", "1e10"], "merges"),
    (["--inject-strain", "1e-14", "--inject-frequency", "8e-9"], "also needs --inject-ra, --inject-dec"),
    (["--inject-strain", "1e-14", "--inject-frequency", "8e-9", "--inject-ra", "400", "--inject-dec", "0"],
     "ra must be in [0, 360)"),
    (["--pulsars", "0"], "--pulsars must be at least 1"),
    (["--sigma", "-1"], "--sigma must be > 0"),
])
def test_simulate_user_errors(tmp_path, capsys, extra, message):
    assert cli.main(["simulate", str(tmp_path / "x"), "--years", "5", "--toas-per-pulsar", "30",
                     "--pulsars", "3", *extra]) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err
    assert not (tmp_path / "x").exists()


def test_bad_dataset_exit_2_one_line(tmp_path):
    """A broken dataset: exit 2, one line naming file, row and column, no traceback (subprocess)."""
    assert cli.main(["simulate", str(tmp_path / "d"), *SMALL, "--quiet"]) == 0
    path = tmp_path / "d" / "residuals" / "SIMPSR02.ecsv"
    lines = path.read_text().splitlines()
    header = next(i for i, line in enumerate(lines) if not line.startswith("#"))
    fields = lines[header + 3].split()
    fields[2] = "-3e-7"                       # sigma of data row 3
    lines[header + 3] = " ".join(fields)
    path.write_text("\n".join(lines) + "\n")
    out = _run(["inspect", "d"], tmp_path)
    assert out.returncode == 2
    assert out.stderr.strip().splitlines() == [
        "cwsearch: error: d/residuals/SIMPSR02.ecsv, row 3, column sigma: sigma must be > 0 (got -3e-07)"]
    assert out.stdout == ""


def test_missing_dataset_exit_2(tmp_path, capsys):
    assert cli.main(["inspect", str(tmp_path / "nowhere")]) == 2
    assert "dataset folder not found" in capsys.readouterr().err
