"""Faults: kill -9 mid-stage then resume, full or read-only output folders.

Expectations (issue 8; common practice for batch tools, no source):

* a run killed with SIGKILL after it has made progress and then started
  again finishes, keeps the stages it had finished (their files unchanged),
  and ends with outputs equal to those of an uninterrupted run with the same
  seed: the resumed stage's tables are recomputed, so they are compared number
  by number (text exactly, floats to 1e-12 relative, ``cwsearch.data.compare``),
  never byte for byte; files of finished stages are not rewritten and must
  keep their bytes;
* a killed run leaves no half-written output file (every visible file in
  the run folder is complete; writes go through temporary files + rename);
* an output folder that cannot be written (read-only file system, full disk)
  gives exit status 2 and one line, and leaves the inputs untouched.

Runs use the tiny invented array of tests/conftest.py (inputs, never check values).
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from cwsearch import cli
from cwsearch.data.compare import compare_files
from cwsearch.job.pipeline import STAGE_FILE

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    from cwsearch.data.dataset import write_dataset
    from tests.conftest import make_tiny_array

    folder = tmp_path_factory.mktemp("faults") / "data"
    write_dataset(make_tiny_array(), folder)
    return folder


def fill_until_full(path: Path):
    """Write ``path/filler`` until the file system says ENOSPC."""
    try:
        with open(path / "filler", "wb") as fh:
            while True:
                fh.write(b"\0" * 1024)
                fh.flush()
                os.fsync(fh.fileno())
    except OSError as exc:
        assert exc.errno == errno.ENOSPC


def tree(folder, *, hidden=True):
    """{relative path: sha256} of the files under ``folder``."""
    folder = Path(folder)
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and (hidden or not p.name.startswith("."))}


def run_file(path: Path, dataset: Path, out: str, stages, noise_model=None, **sections):
    lines = [f'dataset = "{dataset}"', f'out = "{out}"', "seed = 5", f"stages = {json.dumps(stages)}", "",
             "[noise]", "red_components = 5", *([f'model = "{noise_model}"'] if noise_model else []), ""]
    for name, values in sections.items():
        lines.append(f"[{name}]")
        lines += [f"{k} = {json.dumps(v)}" for k, v in values.items()]
        lines.append("")
    path.write_text("\n".join(lines))
    return path


def kill_when(argv, pattern: str, *, cwd, timeout=120.0, settle=0.3, also=None):
    """Start ``python -m cwsearch argv``; SIGKILL it once ``pattern`` shows on its stderr (progress made)
    and ``also()`` (if given) is true.

    Returns the stderr text seen. Fails if the process ends by itself first.
    """
    proc = subprocess.Popen([sys.executable, "-m", "cwsearch", *map(str, argv)], cwd=cwd,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=dict(os.environ, COLUMNS="120"))
    seen = bytearray()

    def reader():
        while True:
            chunk = os.read(proc.stderr.fileno(), 4096)
            if not chunk:
                return
            seen.extend(chunk)

    thread = threading.Thread(target=reader, daemon=True)
    thread.start()
    deadline = time.monotonic() + timeout
    try:
        while pattern.encode() not in seen or (also is not None and not also()):
            if proc.poll() is not None:
                pytest.fail(f"process ended (exit {proc.returncode}) before {pattern!r}:\n{seen.decode(errors='replace')}")
            if time.monotonic() > deadline:
                pytest.fail(f"{pattern!r} not seen within {timeout} s:\n{seen.decode(errors='replace')}")
            time.sleep(0.02)
        time.sleep(settle)
        assert proc.poll() is None, "finished before it could be killed"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    thread.join(timeout=5)
    assert proc.returncode == -signal.SIGKILL
    return seen.decode(errors="replace")


def assert_no_half_written(folder):
    """Every visible output parses completely (ECSV via astropy, JSON via json); hidden temporaries are
    named '.NAME.<random>.part' and never take a final name."""
    from astropy.table import Table

    for p in Path(folder).rglob("*"):
        if not p.is_file() or p.name.startswith("."):
            continue
        if p.suffix == ".ecsv":
            Table.read(p, format="ascii.ecsv")
        elif p.suffix == ".json":
            json.loads(p.read_text())
        elif p.suffix == ".png":
            assert p.read_bytes()[-8:] == b"\xaeB`\x82" or p.read_bytes().endswith(b"IEND\xaeB`\x82")


def stage_available(name):
    from cwsearch.job import pipeline

    spec = {s.name: s for s in pipeline.default_stages()}.get(name)
    return spec is not None and (spec.available is None or spec.available() is None)


SCAN = {"nside": 2, "fmax": 3e-8, "null_sims": 20, "no_plots": True}




def assert_same_numbers(got: Path, want: Path):
    """A recomputed output file equals the reference to 1e-12 relative (``cwsearch.data.compare``)."""
    from cwsearch.data.compare import compare_files

    result = compare_files(got, want)
    assert result.ok, f"{got}: {result.describe()}"


# ------------------------------------------------------------------ scan (deterministic: same numbers)

def test_kill_scan_then_resume_equals_uninterrupted(dataset, tmp_path, capsys):
    # enough null simulations that the kill lands inside them on a fast machine: 1000 took 0.33 s on an
    # idle 2-core machine once the kernels were compiled, so a 0.3 s settle could miss them (CI did);
    # 5000 take ~1.7 s there and the kill comes 0.05 s after their progress bar appears
    scan = dict(SCAN, null_sims=5000)
    # the default (estimate) noise model: the run fits the noise first, and the resumed run reuses that
    # finished fit (same options and seed); recomputed numbers compared to 1e-9 relative (stated tolerance)
    ref = run_file(tmp_path / "ref.toml", dataset, "ref", ["scan"], scan=scan)
    assert cli.main(["run", str(ref), "--quiet"]) == 0
    killed = run_file(tmp_path / "killed.toml", dataset, "killed", ["scan"], scan=scan)
    inputs = tree(dataset)

    kill_when(["run", killed], "null simulations:", cwd=tmp_path, settle=0.05)
    assert_no_half_written(tmp_path / "killed")
    record = json.loads((tmp_path / "killed" / "scan" / STAGE_FILE).read_text())
    assert record["status"] == "running"  # the record says the stage did not finish

    capsys.readouterr()
    assert cli.main(["run", str(killed), "--quiet"]) == 0
    for name in ("noise/noise_model.ecsv", "scan/candidates.ecsv", "scan/spectrum.ecsv"):
        result = compare_files(tmp_path / "killed" / name, tmp_path / "ref" / name, rtol=1e-9)
        assert result.ok, f"{name}: {result.describe()}"
    assert json.loads((tmp_path / "killed" / "scan" / STAGE_FILE).read_text())["status"] == "complete"
    leftovers = [p.name for p in (tmp_path / "killed").rglob("*.part")]
    assert not leftovers, f"temporary files left after the resumed run: {leftovers}"
    assert tree(dataset) == inputs


def test_kill_during_noise_fit_then_resume_equals_uninterrupted(dataset, tmp_path, capsys):
    """The default ``estimate`` noise model: a scan-only run fits the noise first (into RUN_DIR/noise/).
    Killed during that fit and run again, it must give the numbers of an uninterrupted run (recomputed
    floats: 1e-9 relative, a stated tolerance; cwsearch.data.compare). The resumed run may reuse a finished
    fit only (summary.json written last, same options and seed: cwsearch.job.noisemodel.reusable_fit)."""
    scan = dict(SCAN, null_sims=20)
    ref = run_file(tmp_path / "ref.toml", dataset, "ref", ["scan"], scan=scan)
    assert cli.main(["run", str(ref), "--quiet"]) == 0
    killed = run_file(tmp_path / "killed.toml", dataset, "killed", ["scan"], scan=scan)
    # the fit starts right after the noise stage's "off" line (it takes about a second here)
    kill_when(["run", killed], "noise: off", cwd=tmp_path, settle=0.3,
              also=lambda: not (tmp_path / "killed" / "scan" / STAGE_FILE).exists())
    assert_no_half_written(tmp_path / "killed")
    capsys.readouterr()
    assert cli.main(["run", str(killed), "--quiet"]) == 0
    for name in ("noise/noise_model.ecsv", "scan/candidates.ecsv", "scan/spectrum.ecsv"):
        result = compare_files(tmp_path / "killed" / name, tmp_path / "ref" / name, rtol=1e-9)
        assert result.ok, f"{name}: {result.describe()}"
    assert not list((tmp_path / "killed").rglob("*.part"))


# ------------------------------------------------------------------ limits (deterministic) after a finished scan

LIMITS = {"nside": 2, "fmax": 3e-8, "oversample": 1, "no_plots": True}


@pytest.mark.skipif(not stage_available("limits"), reason="limits stage not in place yet")
def test_kill_limits_keeps_scan_and_resumes(dataset, tmp_path, capsys):
    scan = dict(SCAN, null_sims=0)
    execution = {"workers": 1}
    # nside 4 (192 pixels): enough rows that the stage is still running 0.3 s after it announces itself
    # on any machine (at nside 2 a fast machine could finish within the old 1 s settle time)
    limits = dict(LIMITS, nside=4)
    ref = run_file(tmp_path / "ref.toml", dataset, "ref", ["scan", "limits"], scan=scan, limits=limits,
                   execution=execution)
    assert cli.main(["run", str(ref), "--quiet"]) == 0
    killed = run_file(tmp_path / "killed.toml", dataset, "killed", ["scan", "limits"], scan=scan, limits=limits,
                      execution=execution)
    kill_when(["run", killed], "limits: running", cwd=tmp_path, settle=0.3)
    scan_after_kill = tree(tmp_path / "killed" / "scan")
    assert json.loads((tmp_path / "killed" / "scan" / STAGE_FILE).read_text())["status"] == "complete"
    assert_no_half_written(tmp_path / "killed")
    capsys.readouterr()
    assert cli.main(["run", str(killed), "--quiet"]) == 0
    # exact on purpose: the finished scan must not be rewritten, so its files keep their bytes
    assert tree(tmp_path / "killed" / "scan") == scan_after_kill  # finished work kept, not redone
    ref_files = tree(tmp_path / "ref" / "limits", hidden=False)
    for name in ref_files:
        if name.endswith(".ecsv"):
            assert_same_numbers(tmp_path / "killed" / "limits" / name, tmp_path / "ref" / "limits" / name)


# ------------------------------------------------------------------ follow-up (sampling: statistically equivalent)

@pytest.mark.skipif(not stage_available("followup"), reason="follow-up stage not in place yet")
def test_kill_followup_resumes_from_checkpoint(tmp_path, capsys):
    """Loud injection, so the scan hands one candidate to the follow-up; kill after the sampler has
    written a checkpoint, then resume. Both runs stop at the same iteration cap, so the resumed sampler
    (restored from its checkpoint, generator state included) must give the uninterrupted posterior's
    numbers (to 1e-12 relative; the resumed iterations are recomputed); a sampler that restarted or lost
    its random state would not (common practice, no source)."""
    data = tmp_path / "loud"
    assert cli.main(["simulate", str(data), "--pulsars", "6", "--years", "8", "--toas-per-pulsar", "60", "--seed", "3",
                     "--inject-strain", "3e-14", "--inject-frequency", "1.2e-8", "--inject-ra", "100",
                     "--inject-dec", "10", "--quiet"]) == 0
    scan = dict(SCAN, null_sims=0)
    followup = {"fap_threshold": 0.5, "max_candidates": 1, "ess": 1.0e9, "walkers": 18, "temperatures": 3,
                "checkpoint_every": 10, "adapt_iterations": 40, "max_iterations": 160, "earth_term_only": True,
                "evolution": "monochromatic", "no_plots": True}
    ref = run_file(tmp_path / "ref.toml", data, "ref", ["scan", "followup"], scan=scan, followup=followup)
    assert cli.main(["run", str(ref), "--quiet"]) == 0
    killed = run_file(tmp_path / "killed.toml", data, "killed", ["scan", "followup"], scan=scan, followup=followup)
    kill_when(["run", killed], "followup: running", cwd=tmp_path, settle=0.0,
              also=lambda: any((tmp_path / "killed" / "followup").rglob("checkpoint.npz")))
    assert_no_half_written(tmp_path / "killed")
    scan_after_kill = tree(tmp_path / "killed" / "scan")
    capsys.readouterr()
    assert cli.main(["run", str(killed), "--quiet"]) == 0
    assert tree(tmp_path / "killed" / "scan") == scan_after_kill  # not rewritten: same bytes
    posteriors = sorted(p.relative_to(tmp_path / "ref") for p in (tmp_path / "ref" / "followup").rglob("posterior.ecsv"))
    assert posteriors
    for rel in posteriors:
        assert_same_numbers(tmp_path / "killed" / rel, tmp_path / "ref" / rel)


# ------------------------------------------------------------------ output folder not writable


def _ro_mount(path: Path):
    """A read-only tmpfs at ``path`` (root only); None if mounting is not possible here."""
    path.mkdir()
    res = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64k,ro", "tmpfs", str(path)], capture_output=True)
    return path if res.returncode == 0 else None


def _umount(path: Path):
    subprocess.run(["umount", str(path)], capture_output=True)


def test_read_only_output_folder(dataset, tmp_path, capsys):
    inputs = tree(dataset)
    target = tmp_path / "ro"
    if os.geteuid() != 0:
        target.mkdir()
        target.chmod(0o555)
        mounted = False
    else:  # root ignores permission bits: use a read-only file system instead
        if _ro_mount(target) is None:
            pytest.skip("cannot make a read-only folder here (root without mount)")
        mounted = True
    try:
        capsys.readouterr()
        code = cli.main(["scan", str(dataset), "--out", str(target / "run"), "--nside", "2", "--fmax", "3e-8",
                         "--no-plots", "--quiet", "--red-components", "5"])
        err = capsys.readouterr().err
        assert code == 2, err
        lines = err.strip().splitlines()
        assert len(lines) == 1 and "Traceback" not in err
        assert str(target) in lines[0]
        assert not any(target.iterdir())
    finally:
        if mounted:
            _umount(target)
        else:
            target.chmod(0o755)
    assert tree(dataset) == inputs


def test_full_disk(dataset, tmp_path, capsys, monkeypatch):
    """Disk full: a real small tmpfs filled up when root; otherwise every file write fails with ENOSPC."""
    inputs = tree(dataset)
    target = tmp_path / "full"
    mounted = False
    if os.geteuid() == 0:
        target.mkdir()
        mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=16k", "tmpfs", str(target)],
                                 capture_output=True).returncode == 0
    if mounted:
        fill_until_full(target)
    else:
        import builtins

        real_open = builtins.open

        def full_open(file, mode="r", *args, **kwargs):
            if any(c in mode for c in "wax+") and str(file).startswith(str(target)):
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(file))
            return real_open(file, mode, *args, **kwargs)

        monkeypatch.setattr(builtins, "open", full_open)
    try:
        before = tree(target) if target.exists() else {}
        capsys.readouterr()
        code = cli.main(["scan", str(dataset), "--out", str(target / "run"), "--nside", "2", "--fmax", "3e-8",
                         "--no-plots", "--quiet", "--red-components", "5"])
        err = capsys.readouterr().err
        assert code == 2, err
        lines = err.strip().splitlines()
        assert len(lines) == 1 and "Traceback" not in err, err
        assert "space" in lines[0].lower()
        after = tree(target) if target.exists() else {}
        assert after == before  # no partial output, no temporaries
    finally:
        if mounted:
            _umount(target)
    assert tree(dataset) == inputs


# ------------------------------------------------------------------ a worker killed mid-run


def _die_once(task):
    """Task for the worker-death tests: the task numbered ``victim`` kills its own worker process (SIGKILL)
    the first time it runs; every task returns its number squared."""
    number, victim, marker = task
    if number == victim and not os.path.exists(marker):
        Path(marker).write_text(str(os.getpid()))
        os.kill(os.getpid(), signal.SIGKILL)
    time.sleep(0.05)
    return number * number


# (a local worker process killed mid-run: tests/test_execution.py::test_local_pool_restarted_when_a_worker_process_dies)


def test_killed_dask_worker_is_retried(tmp_path):
    pytest.importorskip("distributed")
    from distributed import LocalCluster

    from cwsearch.inference.execution import TaskRunner

    marker = str(tmp_path / "killed_once")
    tasks = [(i, 5, marker) for i in range(10)]
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                      silence_logs=50) as cluster:
        with TaskRunner(scheduler=cluster.scheduler_address, retries=3) as runner:
            results = runner.map(_die_once, tasks)
    assert Path(marker).exists()
    assert results == [i * i for i in range(10)]
