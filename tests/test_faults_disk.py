"""Faults: a read-only or full output folder for the follow-up, hosts and limits stages and for
``cwsearch run`` (the scan stage is in tests/test_faults.py).

Expectations (issue 8; common practice for batch tools, no source): exit status 2, one line on
stderr naming the path that could not be written, no traceback, no partial or temporary file left
in the run folder, and the inputs (dataset, catalogue, run file, earlier stages' results) byte for
byte unchanged. Three ways to meet the fault:

* a read-only folder: a real read-only tmpfs when root, else a folder without write permission;
* a full disk: a real small tmpfs filled to the last byte (root only);
* a disk that fills part-way through the stage: the real atomic writer of cwsearch.core.fileio writes
  the temporary file and then meets ENOSPC (any user), so earlier outputs exist and must be whole.

Also: ENOSPC while a plot is saved, and while numba saves its compiled-code cache (outside the run
folder). Runs use the tiny invented array of tests/conftest.py and the smallest settings that reach
each stage's real write path (inputs, never check values).
"""

from __future__ import annotations

import contextlib
import errno
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from cwsearch import cli
from cwsearch.core import fileio
from cwsearch.job.pipeline import read_record
from tests.test_faults import assert_no_half_written, fill_until_full, stage_available, tree

ROOT = os.geteuid() == 0
NOISE = ["--red-components", "5"]

# a tiny invented catalogue (names and numbers made up for the test)
CATALOGUE = "name,ra,dec,distance\nTESTGAL-A,100.0,10.0,40.0\nTESTGAL-B,250.0,-30.0,90.0\nTESTGAL-C,20.0,45.0,15.0\n"


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """Dataset folder, catalogue, and a finished tiny scan (the input of the hosts stage)."""
    from cwsearch.data.dataset import write_dataset
    from tests.conftest import make_tiny_array

    base = tmp_path_factory.mktemp("disk")
    data = base / "data"
    write_dataset(make_tiny_array(), data)
    catalogue = base / "galaxies.csv"
    catalogue.write_text(CATALOGUE)
    scanned = base / "scanned"
    assert cli.main(["scan", str(data), "--out", str(scanned), "--nside", "2", "--fmax", "3e-8", "--null-sims", "0",
                     "--no-plots", "--quiet", *NOISE]) == 0
    return {"data": data, "catalogue": catalogue, "scanned": scanned, "base": base}


def _argv(stage, run_dir, inp, *, plots=False):
    """The smallest command line of ``stage`` writing into ``run_dir``."""
    no_plots = [] if plots else ["--no-plots"]
    if stage == "followup":
        return ["followup", str(inp["data"]), "--out", str(run_dir), "--frequency", "1.2e-8", "--ra", "100",
                "--dec", "10", "--earth-term-only", "--evolution", "monochromatic", "--walkers", "18",
                "--temperatures", "2", "--max-iterations", "20", "--checkpoint-every", "5",
                "--adapt-iterations", "5", "--ess", "1e9", "--quiet", *no_plots, *NOISE]
    if stage == "limits":
        return ["limits", str(inp["data"]), "--out", str(run_dir), "--nside", "1", "--fmax", "2e-8",
                "--workers", "1", "--quiet", *no_plots, *NOISE]
    if stage == "hosts":
        return ["hosts", "--out", str(run_dir), "--catalog", str(inp["catalogue"]), "--quiet", *no_plots]
    if stage == "run":
        runfile = inp["base"] / f"run_{run_dir.parent.name}.toml"
        runfile.write_text(
            f'dataset = "{inp["data"]}"\nout = "{run_dir}"\nseed = 5\nstages = ["scan", "limits"]\n\n'
            "[noise]\nred_components = 5\n\n[scan]\nnside = 2\nfmax = 3e-8\nnull_sims = 0\nno_plots = true\n\n"
            "[limits]\nnside = 1\nfmax = 2e-8\nno_plots = true\n\n[execution]\nworkers = 1\n")
        return ["run", str(runfile), "--quiet"]
    raise ValueError(stage)


STAGES = [pytest.param(s, marks=pytest.mark.skipif(s in ("followup", "hosts", "limits") and not stage_available(s),
                                                   reason=f"{s} stage not in place yet"))
          for s in ("followup", "hosts", "limits", "run")]


def _input_state(stage, inp):
    """Hashes of everything ``stage`` reads."""
    state = {"data": tree(inp["data"]), "catalogue": inp["catalogue"].read_bytes()}
    if stage == "run":
        state["runfile"] = sorted(p.read_bytes() for p in inp["base"].glob("run_*.toml"))
    return state


def _mount(path: Path, options: str) -> bool:
    if not ROOT:
        return False
    path.mkdir(exist_ok=True)
    return subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(path)],
                          capture_output=True).returncode == 0


@contextlib.contextmanager
def _unwritable(folder: Path, how: str, seed_run: Path | None):
    """``folder`` made read-only (``how='ro'``) or full (``how='full'``), holding a copy of
    ``seed_run`` as folder/run when given (the hosts stage reads a finished scan there)."""
    mounted = _mount(folder, "size=512k")
    if not mounted:
        if how == "full" or ROOT:  # root ignores permission bits, so only a read-only mount will do
            pytest.skip("needs a tmpfs mount (root, mount allowed)")
        folder.mkdir(exist_ok=True)
    try:
        if seed_run is not None:
            shutil.copytree(seed_run, folder / "run")
        if how == "full":
            fill_until_full(folder)
        elif mounted:
            subprocess.run(["mount", "-o", "remount,ro", str(folder)], check=True, capture_output=True)
        else:
            for p in [folder, *[q for q in folder.rglob("*") if q.is_dir()]]:
                p.chmod(0o555)
        yield
    finally:
        if mounted:
            subprocess.run(["umount", str(folder)], capture_output=True)
        else:
            for p in [folder, *[q for q in folder.rglob("*") if q.is_dir()]]:
                p.chmod(0o755)


def _one_line_error(capsys, code, *must_name):
    err = capsys.readouterr().err
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    assert lines[0].startswith("cwsearch: error: ")
    for text in must_name:
        assert str(text) in lines[0], (text, lines[0])
    return lines[0]


@pytest.mark.parametrize("how", ["ro", "full"])
@pytest.mark.parametrize("stage", STAGES)
def test_unwritable_run_folder(stage, how, inputs, tmp_path, capsys):
    folder = tmp_path / how
    run_dir = folder / "run"
    argv = _argv(stage, run_dir, inputs)
    before_inputs = _input_state(stage, inputs)
    with _unwritable(folder, how, inputs["scanned"] if stage == "hosts" else None):
        before = tree(folder)
        capsys.readouterr()
        code = cli.main(argv)
        line = _one_line_error(capsys, code, folder)
        if how == "full":
            assert "no space" in line.lower()
        else:
            assert "read-only" in line.lower() or "permission" in line.lower()
        assert tree(folder) == before  # nothing new: no partial output, no temporaries, no lock
    assert _input_state(stage, inputs) == before_inputs


# the file whose write meets the full disk: late in the stage, so that earlier outputs exist
FILLS_AT = {"followup": "followup/posterior.ecsv", "hosts": "hosts/hosts_summary.json",
            "limits": "limits/limits_summary.json", "run": "limits/frequency_limits.ecsv"}


def _fill_at(monkeypatch, target_path: Path, scope: Path | None = None):
    """From the write of ``target_path`` on, every write under ``scope`` (default: its folder) meets
    ENOSPC after the temporary file has been written (the real atomic writer then cleans up)."""
    scope = target_path.parent if scope is None else scope
    real = fileio.atomic_path
    state = {"full": False}

    @contextlib.contextmanager
    def filling(target):
        target = Path(target)
        state["full"] = state["full"] or target == target_path
        with real(target) as tmp:
            yield tmp
            if state["full"] and target.is_relative_to(scope):
                assert tmp.exists()  # the bytes were written to the temporary file
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(fileio, "atomic_path", filling)
    return state


@pytest.mark.parametrize("stage", STAGES)
def test_disk_fills_during_stage(stage, inputs, tmp_path, capsys, monkeypatch):
    run_dir = tmp_path / "out" / "run"
    if stage == "hosts":
        shutil.copytree(inputs["scanned"], run_dir)
    scan_before = tree(run_dir / "scan") if stage == "hosts" else None
    argv = _argv(stage, run_dir, inputs)
    before_inputs = _input_state(stage, inputs)
    target = run_dir / FILLS_AT[stage]
    # for the pipeline the whole run folder is full from then on (its failure record cannot be written)
    state = _fill_at(monkeypatch, target, run_dir if stage == "run" else None)
    capsys.readouterr()
    code = cli.main(argv)
    line = _one_line_error(capsys, code, target)
    assert state["full"] and "no space" in line.lower()
    assert not target.exists()
    assert not [p.name for p in run_dir.rglob("*.part")]
    assert_no_half_written(run_dir)
    if stage == "run":  # the scan is kept; no record says the limits stage finished (a rerun redoes it)
        assert read_record(run_dir / "scan")["status"] == "complete"
        limits_record = read_record(run_dir / "limits")
        assert limits_record is None or limits_record.get("status") != "complete"
        assert not (run_dir / ".lock").exists()
    if scan_before is not None:
        assert tree(run_dir / "scan") == scan_before
    assert _input_state(stage, inputs) == before_inputs


@pytest.mark.skipif(not stage_available("hosts"), reason="hosts stage not in place yet")
def test_disk_full_while_saving_a_plot(inputs, tmp_path, capsys, monkeypatch):
    """ENOSPC at a PNG (cwsearch.core.plotting): exit 2 naming the picture, no temporary, no figure left open."""
    import matplotlib.pyplot as plt

    run_dir = tmp_path / "run"
    shutil.copytree(inputs["scanned"], run_dir)
    target = run_dir / "hosts" / "hosts_sky.png"
    _fill_at(monkeypatch, target)
    plt.close("all")
    capsys.readouterr()
    code = cli.main(_argv("hosts", run_dir, inputs, plots=True))
    _one_line_error(capsys, code, target)
    assert not target.exists() and not list(run_dir.rglob("*.part"))
    assert_no_half_written(run_dir)
    assert plt.get_fignums() == []


@pytest.mark.skipif(not ROOT, reason="a full cache folder needs a tmpfs mount (root)")
def test_numba_cache_on_a_full_disk(inputs, tmp_path):
    """numba saves compiled code in NUMBA_CACHE_DIR; when that disk is full the run stops with one
    line naming the cache file, exit 2, nothing in the run folder (a fresh process, so numba compiles)."""
    cache = tmp_path / "cache"
    if not _mount(cache, "size=64k"):
        pytest.skip("cannot mount a tmpfs here")
    try:
        fill_until_full(cache)
        out = tmp_path / "out"
        before = tree(inputs["data"])
        env = dict(os.environ, NUMBA_CACHE_DIR=str(cache / "numba"), NUMBA_NUM_THREADS="1")
        proc = subprocess.run([sys.executable, "-m", "cwsearch", "scan", str(inputs["data"]), "--out", str(out),
                               "--nside", "2", "--fmax", "3e-8", "--null-sims", "0", "--no-plots", "--quiet", *NOISE,
                               "--noise-model", "dataset"],  # the point here is the numba cache, not the noise fit
                              capture_output=True, text=True, env=env, cwd=tmp_path, timeout=300)
        lines = proc.stderr.strip().splitlines()
        assert proc.returncode == 2, proc.stderr
        assert len(lines) == 1 and "Traceback" not in proc.stderr, proc.stderr
        assert str(cache) in lines[0] and "no space" in lines[0].lower()
        assert not out.exists() or tree(out) == {}
        assert tree(inputs["data"]) == before
    finally:
        subprocess.run(["umount", str(cache)], capture_output=True)
