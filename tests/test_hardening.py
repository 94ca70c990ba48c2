"""Hardening (issue 19): every way a file, a folder or a second process can go wrong, one test each.

Each test is named after what it guards. Expectations are the project's
contract (docs/design.md §3, §11; common practice for command-line tools, no
source): a user's mistake or a hostile file gives exit status 2 and one line
naming the file (and row and column where they apply), never a traceback,
a hang or a silently wrong result; legal input is accepted. The plausible
ranges checked are those stated in ``cwsearch.core.safeio``.

All datasets are tiny invented ones (tests/conftest.py), inputs only, never
check values.

Audit: every case of issue 19 and the test that guards it (this file unless
another is named; H = tests/test_hardening.py, B = tests/test_bad_input.py,
Z = tests/test_fuzz_readers.py, F = tests/test_faults.py, D = tests/test_faults_disk.py)

Tracebacks instead of one line
  300-character pulsar name ............ test_long_pulsar_name_is_one_line_error
  noise.ecsv -> /dev/zero .............. test_noise_table_symlink_to_dev_zero_refused,
                                         test_device_refused_as_not_a_regular_file
  sigma = 1e-200 ....................... test_sigma_underflow_refused
  [noise] red_components = -1 .......... test_run_file_negative_red_components_refused_before_writing,
                                         test_counts_have_upper_bounds
  truncated / object-array checkpoint .. test_resume_damaged_checkpoint_says_rerun_without_resume,
                                         Z test_checkpoint_reader_fuzz
Hangs
  noise.ecsv a named pipe .............. test_noise_table_fifo_refused_without_blocking,
                                         test_pulsars_file_fifo_refused_without_blocking,
                                         test_fitted_noise_table_fifo_refused_without_blocking
  null_sims = 1e12 ..................... test_huge_null_sims_refused_with_time_estimate,
                                         test_run_file_refuses_nonpositive_max_time_and_huge_null_sims
Wrong silent acceptance, misleading errors
  mjd in yr ............................ test_mjd_in_years_refused_as_implausible
  MJD range widened by a flag .......... test_mjd_range_flag_widens_the_plausible_dates,
                                         test_run_file_mjd_range_widens_the_plausible_dates
  residual symlink outside the dataset . test_residual_symlink_outside_dataset_refused_unread
                                         (legal: test_residual_symlink_inside_dataset_accepted)
  residual = 1e300 ..................... test_huge_residual_refused, test_residual_a_million_sigma_away_refused
  mjd = -1e9 (said --nside) ............ test_negative_mjd_names_file_row_column
  (found here) injection.json a FIFO or
  with text values: hang, traceback .... test_damaged_injection_json_refused_when_the_dataset_is_read,
                                         Z test_dataset_reader_fuzz[injection.json]
  stages = [] .......................... test_run_file_empty_stages_refused
  [limits] galaxy bad, passes --check .. test_run_file_bad_limits_galaxy_fails_check
  max_time = -10, NaN in JSON .......... test_followup_nonpositive_max_time_refused,
                                         test_run_file_refuses_nonpositive_max_time_and_huge_null_sims,
                                         test_followup_tiny_max_time_samples_and_writes_strict_json,
                                         test_json_outputs_write_null_for_values_that_are_not_numbers
  catalogue distance inf dropped ....... test_catalog_infinite_distance_refused_not_dropped
  hosts: posterior without summary ..... test_hosts_refuses_posterior_without_summary
  followup/hosts: scan without summary . test_followup_refuses_scan_without_summary,
                                         test_hosts_refuses_scan_without_summary
  simulate --overwrite deletes files ... test_simulate_overwrite_keeps_unrelated_files
  (found here) --out inside the dataset  test_run_folder_inside_the_dataset_refused
  (found here) simulate strain 1e300
  wrote an unreadable dataset .......... test_simulate_never_writes_a_dataset_the_reader_refuses,
                                         B test_bad_simulate[strain-unreadably-large]
Legal input rejected
  catalogue ra = 720.5 ................. test_catalog_ra_720_5_wraps
  UTF-8 CSV with a byte-order mark ..... test_catalog_utf8_bom_csv_accepted
Faults
  kill -9 of limits --workers 2 ........ test_kill9_of_limits_with_two_workers_leaves_no_worker_processes,
                                         test_kill9_of_main_process_leaves_no_worker_processes
  .NAME.png.XXXX.part left behind ...... test_part_files_cleaned_when_the_run_folder_is_locked,
                                         F test_kill_scan_then_resume_equals_uninterrupted (no .part after resume)
  two scan --out SAME at once .......... test_two_scans_into_one_run_folder_at_once_the_second_is_refused,
                                         test_stage_command_refuses_run_folder_locked_by_live_run
  lock of another host taken as stale .. test_lock_naming_another_host_is_not_stale
  followup B --out RUN_OF_A (hosts,
  limits; found here: noise too) ....... test_stage_command_refuses_run_of_another_dataset,
                                         test_followup_and_limits_refuse_the_run_folder_of_another_dataset,
                                         test_stage_command_checks_the_results_when_dataset_json_is_gone,
                                         test_hosts_refuses_results_of_another_dataset,
                                         test_stage_command_records_its_dataset,
                                         test_run_of_another_dataset_does_not_use_the_folders_earlier_results
  resume of an estimate-model scan ..... F test_kill_scan_then_resume_equals_uninterrupted (estimate model),
                                         F test_kill_during_noise_fit_then_resume_equals_uninterrupted,
                                         tests/test_noise_stage.py::
                                         test_estimate_refits_an_interrupted_fit_or_one_with_other_options_or_seed
Security
  symlinks, FIFOs, devices followed .... the symlink/FIFO/device tests above
  ESC/OSC in names printed raw ......... test_control_characters_escaped_in_inspect_output,
                                         test_control_characters_escaped_in_limits_galaxy_messages,
                                         test_control_characters_escaped_in_the_hosts_ranking,
                                         test_escape_text_leaves_printable_text_alone
  outputs 0600 whatever the umask ...... test_outputs_follow_the_umask
The safety layer itself
  size cap with a clear message ........ test_size_cap_has_a_clear_message
  counts with upper bounds ............. test_counts_have_upper_bounds, test_huge_null_sims_refused_with_time_estimate
  fuzz of every reader (bytes, Unicode,
  numeric extremes) .................... Z test_dataset_reader_fuzz (pulsars, residuals, noise.ecsv),
                                         Z test_catalog_reader_fuzz (CSV, ECSV), Z test_run_file_fuzz,
                                         Z test_run_folder_reader_fuzz (candidates, posterior, its summary),
                                         Z test_rounds_reader_fuzz (a round's posterior, subtracted_signal.ecsv),
                                         Z test_noise_table_reader_fuzz, Z test_checkpoint_reader_fuzz,
                                         Z test_fe_sky_map_reader_fuzz (hosts --sky-map; found here: an
                                         unusable map given by name was silently replaced by a Fisher blob)
What held before and must keep holding
  YAML tags that would run code ........ Z test_yaml_python_tags_rejected_not_executed,
                                         B test_bad_dataset[residuals-python-yaml-tag]
  checkpoints never unpickle ........... Z test_numpy_loads_refuse_pickles, Z test_no_code_execution_or_unpickling_in_package
  names cannot escape their folders .... B test_bad_dataset[pulsar-name-slash, -backslash, -dotdot],
                                         test_candidate_name_cannot_leave_the_run_folder
  data strings escaped in the report ... tests/test_report.py::test_strict_html5_parse, test_content_of_the_sections
  full disk, read-only folder .......... F test_read_only_output_folder, F test_full_disk,
                                         D test_unwritable_run_folder, D test_disk_fills_during_stage
  kill -9 resumed to the same numbers .. F test_kill_* (scan, noise fit, limits, follow-up)
  same numbers across thread counts .... tests/test_scan_engines.py::test_serial_threaded_processes_and_dask_agree
  118 bad inputs refused cleanly ....... B test_bad_dataset, test_bad_scan_option, test_bad_run_file,
                                         test_bad_catalog, test_bad_limits_input, test_bad_followup_input, ...
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from cwsearch.cli import main as cli_main
from cwsearch.core.errors import InputError
from tests.test_bad_input import (check_user_error, noise, psr, res, run_cli, scan_argv, set_unit, set_value,
                                  snapshot, template, work)  # noqa: F401 (fixtures)

# ------------------------------------------------------------------ tracebacks that became one line


def test_long_pulsar_name_is_one_line_error(work, capsys):
    set_value(psr(work), 2, "name", "P" * 300)
    code, err = run_cli(scan_argv(work), capsys)
    check_user_error(code, err, ["pulsars.ecsv", "row 2", "column name", "characters"])


def test_noise_table_symlink_to_dev_zero_refused(work, capsys):
    noise(work).unlink()
    noise(work).symlink_to("/dev/zero")
    code, err = run_cli(scan_argv(work), capsys)
    check_user_error(code, err, ["noise.ecsv", "outside the folder"])


def test_device_refused_as_not_a_regular_file():
    """A character device (endless /dev/zero) is refused before any byte is read."""
    from cwsearch.core.safeio import read_input_bytes

    with pytest.raises(InputError, match="device"):
        read_input_bytes("/dev/zero")


def test_sigma_underflow_refused(work, capsys):
    set_value(res(work), 4, "sigma", "1e-200")
    code, err = run_cli(scan_argv(work), capsys)
    check_user_error(code, err, ["SIMPSR02.ecsv", "row 4", "column sigma", "plausible"])


def test_run_file_negative_red_components_refused_before_writing(work, capsys):
    runfile = work / "run.toml"
    runfile.write_text('dataset = "data"\nout = "run"\nstages = ["scan"]\n\n[noise]\nred_components = -1\n')
    before = snapshot(work)
    code, err = run_cli(["run", runfile, "--quiet"], capsys)
    check_user_error(code, err, ["run.toml", "red_components"])
    assert snapshot(work) == before  # no dataset.json, provenance.json or scan/ written


def _explicit_followup(work, *extra):
    return ["followup", work / "data", "--out", work / "run", "--quiet", "--red-components", "3",
            "--frequency", "1e-8", "--ra", "10", "--dec", "10", "--walkers", "18", "--temperatures", "2",
            "--max-iterations", "10", "--no-plots", *extra]


@pytest.mark.parametrize("damage", ["truncated", "object-array"])
def test_resume_damaged_checkpoint_says_rerun_without_resume(work, capsys, damage):
    ck = work / "run" / "followup" / "checkpoint.npz"
    ck.parent.mkdir(parents=True)
    if damage == "truncated":
        np.savez(ck, fingerprint=np.array("x"), iterations=np.array(3))
        ck.write_bytes(ck.read_bytes()[:40])
    else:
        np.savez(ck, fingerprint=np.array([{"a": 1}], dtype=object))
    code, err = run_cli(_explicit_followup(work, "--resume"), capsys)
    check_user_error(code, err, ["checkpoint.npz", "damaged", "without --resume"])


# ------------------------------------------------------------------ hangs


def test_noise_table_fifo_refused_without_blocking(work, capsys):
    noise(work).unlink()
    os.mkfifo(noise(work))
    code, err = run_cli(scan_argv(work), capsys)   # a reader that blocked would never return here
    check_user_error(code, err, ["noise.ecsv", "named pipe"])


def test_pulsars_file_fifo_refused_without_blocking(work, capsys):
    psr(work).unlink()
    os.mkfifo(psr(work))
    code, err = run_cli(["inspect", work / "data"], capsys)
    check_user_error(code, err, ["pulsars.ecsv", "named pipe"])


def test_huge_null_sims_refused_with_time_estimate(work, capsys):
    code, err = run_cli(scan_argv(work, "--null-sims", "1000000000000"), capsys)
    message = check_user_error(code, err, ["--null-sims", "at most", "times as long"])
    assert "1e+12" in message


# ------------------------------------------------------------------ wrong silent acceptance


def test_mjd_in_years_refused_as_implausible(work, capsys):
    set_unit(res(work), "mjd", "yr")
    code, err = run_cli(scan_argv(work), capsys)
    check_user_error(code, err, ["SIMPSR02.ecsv", "row 1", "column mjd", "plausible", "'yr'"])


def test_mjd_range_flag_widens_the_plausible_dates(work, capsys):
    from cwsearch.data.dataset import read_dataset

    lo = float(read_dataset(work / "data")[0].mjd[0])
    with pytest.raises(InputError, match="plausible range"):
        read_dataset(work / "data", mjd_range=(lo + 1, 70000))
    code, err = run_cli(["inspect", work / "data", "--mjd-range", "30000", "80000"], capsys)
    assert code == 0, err


def test_run_file_mjd_range_widens_the_plausible_dates(work, capsys):
    """The run file's `mjd_range = [LO, HI]` is the --mjd-range of the stage commands: TOAs outside refused
    (file, row, column), a wider range accepts older data (MJD 20000-ish here: shifted copies)."""
    from cwsearch.data.dataset import read_dataset, write_dataset
    from cwsearch.data.model import Array, Pulsar

    lo = float(read_dataset(work / "data")[0].mjd[0])
    runfile = work / "run.toml"
    base = 'dataset = "{data}"\nout = "run"\nstages = ["scan"]\n{extra}\n[noise]\nmodel = "dataset"\n' \
           'red_components = 5\n\n[scan]\nnside = 1\nfmax = 3e-8\nno_plots = true\n'
    runfile.write_text(base.format(data="data", extra=f"mjd_range = [{lo + 1}, 70000]\n"))
    before = snapshot(work)
    code, err = run_cli(["run", runfile, "--quiet"], capsys)
    check_user_error(code, err, ["row 1", "column mjd", "plausible range"])
    assert snapshot(work) == before
    runfile.write_text(base.format(data="data", extra="mjd_range = [70000, 40000]\n"))
    code, err = run_cli(["run", runfile, "--check"], capsys)
    check_user_error(code, err, ["run.toml", "line 4", "mjd_range", "LO < HI"])

    old = [Pulsar(p.name, ra=p.ra, dec=p.dec, distance=p.distance, distance_err=p.distance_err, mjd=p.mjd - 30000,
                  residuals=p.residuals, sigmas=p.sigmas, backends=p.backends, extra_design=p.extra_design,
                  extra_design_names=p.extra_design_names) for p in read_dataset(work / "data")]
    write_dataset(Array(old), work / "old")
    runfile.write_text(base.format(data="old", extra=""))
    code, err = run_cli(["run", runfile, "--quiet"], capsys)
    check_user_error(code, err, ["column mjd", "plausible range"])
    runfile.write_text(base.format(data="old", extra="mjd_range = [1000, 70000]\n"))
    code, err = run_cli(["run", runfile, "--quiet"], capsys)
    assert code == 0, err
    assert (work / "run" / "scan" / "candidates.ecsv").is_file()


def test_residual_symlink_outside_dataset_refused_unread(work, capsys, tmp_path_factory):
    outside = tmp_path_factory.mktemp("elsewhere") / "x.ecsv"
    outside.write_bytes(res(work).read_bytes())
    res(work).unlink()
    res(work).symlink_to(outside)
    code, err = run_cli(scan_argv(work), capsys)
    check_user_error(code, err, ["SIMPSR02.ecsv", "symbolic link", "outside"])
    res(work).unlink()
    res(work).symlink_to("/etc/passwd")
    code, err = run_cli(scan_argv(work), capsys)
    check_user_error(code, err, ["SIMPSR02.ecsv", "outside"])


def _injection(w):
    return w / "data" / "injection.json"


INJECTION_CASES = [
    ("fifo", lambda w: os.mkfifo(_injection(w)), ["injection.json", "named pipe"]),
    ("symlink-outside", lambda w: _injection(w).symlink_to("/etc/passwd"), ["injection.json", "outside"]),
    ("not-json", lambda w: _injection(w).write_text("{binaries: }"), ["injection.json", "not valid JSON"]),
    ("not-an-object", lambda w: _injection(w).write_text("[1, 2]"), ["injection.json", "JSON object"]),
    ("binaries-not-a-list", lambda w: _injection(w).write_text('{"binaries": 5}'), ["binaries", "list"]),
    ("ra-text", lambda w: _injection(w).write_text('{"binaries": [{"ra": "x", "dec": 1}]}'),
     ["binaries[0].ra", "finite number"]),
    ("strain-nan", lambda w: _injection(w).write_text('{"binaries": [{"ra": 1, "strain": NaN}]}'),
     ["binaries[0].strain", "finite number"]),
    ("true-noise-text", lambda w: _injection(w).write_text(
        '{"true_noise": {"SIMPSR01": {"white": {"A": {"sigma_scale": "big"}}}}}'), ["true_noise.SIMPSR01.white.A"]),
]


@pytest.mark.parametrize("damage, expect", [c[1:] for c in INJECTION_CASES], ids=[c[0] for c in INJECTION_CASES])
def test_damaged_injection_json_refused_when_the_dataset_is_read(work, capsys, damage, expect):
    """A simulated dataset's injection.json (the truth the plots and the report show) is read when the
    dataset is: a FIFO used to hang the scan's plots, a text value gave a traceback after the work."""
    damage(work)
    code, err = run_cli(scan_argv(work, "--noise-model", "dataset"), capsys)
    check_user_error(code, err, expect)
    assert not (work / "run").exists()


def test_residual_symlink_inside_dataset_accepted(work):
    from cwsearch.data.dataset import read_dataset

    target = work / "data" / "residuals" / "copy_of_SIMPSR02.ecsv.txt"
    target.write_bytes(res(work).read_bytes())
    res(work).unlink()
    res(work).symlink_to(target.name)
    assert len(read_dataset(work / "data")) == 3


def test_huge_residual_refused(work, capsys):
    set_value(res(work), 6, "residual", "1e300")
    code, err = run_cli(scan_argv(work), capsys)
    check_user_error(code, err, ["SIMPSR02.ecsv", "row 6", "column residual", "implausible"])


def test_residual_a_million_sigma_away_refused(work, capsys):
    set_value(res(work), 2, "residual", "0.5")   # 0.5 s against sigma ~1e-7 s
    code, err = run_cli(scan_argv(work), capsys)
    check_user_error(code, err, ["SIMPSR02.ecsv", "row 2", "column residual"])


def test_negative_mjd_names_file_row_column(work, capsys):
    set_value(res(work), 1, "mjd", "-1e9")
    code, err = run_cli(scan_argv(work), capsys)
    message = check_user_error(code, err, ["SIMPSR02.ecsv", "row 1", "column mjd"])
    assert "--nside" not in message


def test_run_file_empty_stages_refused(work, capsys):
    runfile = work / "run.toml"
    runfile.write_text('dataset = "data"\nout = "run"\nstages = []\n')
    code, err = run_cli(["run", runfile, "--quiet"], capsys)
    check_user_error(code, err, ["run.toml", "stages", "no stage"])
    assert not (work / "run").exists()


def test_run_file_bad_limits_galaxy_fails_check(work, capsys):
    runfile = work / "run.toml"
    runfile.write_text('dataset = "data"\nout = "run"\nstages = ["limits"]\n\n[limits]\n'
                       'galaxy = [["G1", 10, 120, -5]]\n')
    code, err = run_cli(["run", runfile, "--check"], capsys)
    check_user_error(code, err, ["run.toml", "galaxy", "line 6"])


@pytest.mark.parametrize("value", ["-10", "0", "nan"])
def test_followup_nonpositive_max_time_refused(work, capsys, value):
    code, err = run_cli(_explicit_followup(work, f"--max-time={value}"), capsys)
    check_user_error(code, err, ["--max-time"])
    assert not (work / "run").exists()


def _strict_json(path):
    """json.loads that refuses NaN and ±Infinity (not JSON: RFC 8259 has no such numbers)."""
    def refuse(constant):
        raise ValueError(f"{path}: {constant} is not JSON")
    return json.loads(Path(path).read_text(encoding="utf-8"), parse_constant=refuse)


def test_run_file_refuses_nonpositive_max_time_and_huge_null_sims(work, capsys):
    """The command-line forms: test_followup_nonpositive_max_time_refused, test_huge_null_sims_refused_*."""
    runfile = work / "run.toml"
    for section, line in (("followup", "max_time = -10"), ("scan", "null_sims = 1000000000000")):
        runfile.write_text(f'dataset = "data"\nout = "run"\n\n[{section}]\n{line}\n')
        code, err = run_cli(["run", runfile, "--check"], capsys)
        check_user_error(code, err, ["run.toml", "line 5", line.split(" ")[0]])
    assert not (work / "run").exists()


def test_followup_tiny_max_time_samples_and_writes_strict_json(work, capsys):
    """A wall-time cap smaller than one step used to stop before the first iteration: exit 0, an empty
    posterior and NaN in summary.json (not JSON). The cap now counts once there are samples, and a value
    that is not a number is written as null."""
    code, err = run_cli(_explicit_followup(work, "--max-time=1e-6", "--noise-model", "dataset"), capsys)
    assert code == 0, err
    summary = _strict_json(work / "run" / "followup" / "summary.json")
    assert summary["iterations"] > 0
    for path in (work / "run").rglob("*.json"):
        _strict_json(path)


def test_json_outputs_write_null_for_values_that_are_not_numbers(tmp_path):
    from cwsearch.core.fileio import write_json_atomic

    write_json_atomic(tmp_path / "a.json", {"x": float("nan"), "y": [np.inf, 1.5, np.float32(-np.inf)],
                                            "z": np.array([np.nan, 2.0])})
    assert _strict_json(tmp_path / "a.json") == {"x": None, "y": [None, 1.5, None], "z": [None, 2.0]}


def test_catalog_infinite_distance_refused_not_dropped(tmp_path):
    from cwsearch.data.catalog import read_catalog

    path = tmp_path / "g.csv"
    path.write_text("name,ra,dec,distance,redshift\nA,10,20,40,0.01\nB,30,-5,inf,0.02\n")
    with pytest.raises(InputError, match=r"row 2, column distance"):
        read_catalog(path)


def _finished_looking_scan(run_dir):
    """A scan folder as a full disk during `scan` leaves it: candidates.ecsv but no scan_summary.json."""
    from astropy.table import Table

    t = Table({"frequency": [1e-8], "ra": [10.0], "dec": [10.0], "fe": [30.0], "fap": [1e-4], "fp": [1.0],
               "strain": [1e-14], "inclination": [1.0], "polarization": [0.5], "phase": [1.0]})
    t["frequency"].unit, t["ra"].unit, t["dec"].unit = "Hz", "deg", "deg"
    (run_dir / "scan").mkdir(parents=True)
    t.write(run_dir / "scan" / "candidates.ecsv", format="ascii.ecsv")


def test_followup_refuses_scan_without_summary(work, capsys):
    _finished_looking_scan(work / "run")
    code, err = run_cli(["followup", work / "data", "--out", work / "run", "--quiet", "--red-components", "3",
                         "--max-iterations", "10"], capsys)
    check_user_error(code, err, ["candidates.ecsv", "scan_summary.json", "did not finish"])


def test_hosts_refuses_scan_without_summary(work, capsys):
    _finished_looking_scan(work / "run")
    code, err = run_cli(["hosts", "--out", work / "run", "--catalog", work / "galaxies.csv", "--observed-span", "10",
                         "--quiet"], capsys)
    check_user_error(code, err, ["candidates.ecsv", "did not finish"])


def test_hosts_refuses_posterior_without_summary(work, capsys):
    from astropy.table import Table

    n = 50
    t = Table({"ra": np.full(n, 10.0), "dec": np.full(n, 20.0), "frequency": np.full(n, 1e-8),
               "chirp_mass": np.full(n, 1e9), "strain": np.full(n, 1e-14)})
    (work / "run" / "followup").mkdir(parents=True)
    t.write(work / "run" / "followup" / "posterior.ecsv", format="ascii.ecsv")
    code, err = run_cli(["hosts", "--out", work / "run", "--catalog", work / "galaxies.csv", "--observed-span", "10",
                         "--quiet"], capsys)
    check_user_error(code, err, ["posterior.ecsv", "summary.json", "did not finish"])


def test_simulate_overwrite_keeps_unrelated_files(work, capsys):
    target = work / "sim"
    argv = ["simulate", target, "--pulsars", "3", "--years", "5", "--toas-per-pulsar", "30", "--quiet"]
    assert run_cli(argv, capsys)[0] == 0
    (target / "my_notes.txt").write_text("precious\n")
    before = snapshot(target)
    code, err = run_cli(argv + ["--overwrite", "--seed", "5"], capsys)
    check_user_error(code, err, ["sim", "my_notes.txt", "more than a dataset"])
    assert snapshot(target) == before
    (target / "my_notes.txt").unlink()
    code, err = run_cli(argv + ["--overwrite", "--seed", "5"], capsys)   # a pure dataset folder is replaced
    assert code == 0, err


def test_simulate_never_writes_a_dataset_the_reader_refuses(tiny_array):
    """The last check before `simulate` writes: residuals beyond the reader's bounds (|r| <= 1 s, <= 1e6
    sigma, finite; cwsearch.core.safeio) are refused, so no command is left facing an unreadable dataset."""
    from cwsearch.commands.simulate import check_readable_residuals

    check_readable_residuals(tiny_array)   # a readable one passes
    loud = tiny_array.with_residuals([np.where(np.arange(p.n_toas) == 3, 2.0, p.residuals) for p in tiny_array])
    with pytest.raises(InputError, match="reach 2 s"):
        check_readable_residuals(loud)
    broken = tiny_array.with_residuals([np.full(p.n_toas, np.nan) for p in tiny_array])
    with pytest.raises(InputError, match="not finite"):
        check_readable_residuals(broken)


# ------------------------------------------------------------------ legal input that was rejected


def test_catalog_ra_720_5_wraps(tmp_path):
    from cwsearch.data.catalog import read_catalog

    path = tmp_path / "g.csv"
    path.write_text("name,ra,dec,distance\nA,720.5,20,40\nB,-10,0,50\n")
    cat = read_catalog(path)
    np.testing.assert_allclose(cat.ra, [0.5, 350.0], rtol=0, atol=1e-12)   # ra modulo 360 (definition)


def test_catalog_utf8_bom_csv_accepted(tmp_path):
    from cwsearch.data.catalog import read_catalog

    path = tmp_path / "g.csv"
    path.write_bytes(b"\xef\xbb\xbfname,ra,dec,distance\nGAL\xc3\xa9,10,20,40\n")
    cat = read_catalog(path)
    assert list(cat.name) == ["GAL\u00e9"]


# ------------------------------------------------------------------ faults: locks, checksums, leftovers, orphans


def test_stage_command_refuses_run_folder_locked_by_live_run(work, capsys):
    (work / "run").mkdir()
    (work / "run" / ".lock").write_text(f"{socket.gethostname()} {os.getpid()}\n")
    code, err = run_cli(scan_argv(work), capsys)
    check_user_error(code, err, ["run", "another cwsearch run", str(os.getpid())])
    assert not (work / "run" / "scan").exists()


def test_lock_naming_another_host_is_not_stale(tmp_path):
    from cwsearch.job.runfolder import LOCK_STALE_SECONDS, RunLock

    lock = tmp_path / ".lock"
    lock.write_text("some-other-node.cluster 12345\n")
    with pytest.raises(InputError, match="some-other-node.cluster"):
        with RunLock(tmp_path):
            pass
    assert lock.exists()   # never taken over while it may be live
    old = time.time() - LOCK_STALE_SECONDS - 60
    os.utime(lock, (old, old))
    with RunLock(tmp_path):   # older than the stated age: taken over
        assert socket.gethostname() in lock.read_text()
    assert not lock.exists()


def test_stage_command_refuses_run_of_another_dataset(work, capsys):
    (work / "run").mkdir()
    (work / "run" / "dataset.json").write_text(json.dumps({"checksum": "0" * 64}))
    before = snapshot(work / "run")
    for argv in (scan_argv(work), _explicit_followup(work)):
        code, err = run_cli(argv, capsys)
        check_user_error(code, err, ["run", "another dataset"])
    assert snapshot(work / "run") == before


def _dataset_b(work):
    """Dataset B: dataset A (work/data) with one residual changed, so another checksum."""
    import shutil

    shutil.copytree(work / "data", work / "data_b")
    set_value(work / "data_b" / "residuals" / "SIMPSR02.ecsv", 3, "residual", "1.5e-7")
    return work / "data_b"


def test_followup_and_limits_refuse_the_run_folder_of_another_dataset(work, capsys):
    """`cwsearch followup B --out RUN_OF_A` (and `limits`) would use dataset A's candidates, `noise` would
    replace A's noise model with B's: one line, exit 2."""
    code, err = run_cli(scan_argv(work, "--noise-model", "dataset"), capsys)
    assert code == 0, err
    data_b = _dataset_b(work)
    before = snapshot(work / "run")
    followup = ["followup", data_b, "--out", work / "run", "--quiet", "--red-components", "3", "--max-iterations",
                "10", "--noise-model", "dataset"]
    limits = ["limits", data_b, "--out", work / "run", "--nside", "1", "--fmax", "2e-8", "--no-plots", "--quiet",
              "--workers", "1", "--red-components", "5", "--noise-model", "dataset"]
    scan_b = [data_b if a == work / "data" else a for a in scan_argv(work)]
    noise = ["noise", data_b, "--out", work / "run", "--quiet", "--no-plots"]
    for argv in (followup, limits, scan_b, noise):
        code, err = run_cli(argv, capsys)
        check_user_error(code, err, ["run", "another dataset", "choose another --out"])
    assert snapshot(work / "run") == before


def test_stage_command_checks_the_results_when_dataset_json_is_gone(work, capsys):
    """A run folder without dataset.json (older, or edited by hand) is checked through its stage summaries."""
    code, err = run_cli(scan_argv(work, "--noise-model", "dataset"), capsys)
    assert code == 0, err
    (work / "run" / "dataset.json").unlink()
    data_b = _dataset_b(work)
    before = snapshot(work / "run")
    code, err = run_cli(["followup", data_b, "--out", work / "run", "--quiet", "--red-components", "3",
                         "--max-iterations", "10", "--noise-model", "dataset"], capsys)
    check_user_error(code, err, ["scan_summary.json", "another dataset"])
    assert snapshot(work / "run") == before


def test_run_of_another_dataset_does_not_use_the_folders_earlier_results(work, capsys):
    """`cwsearch run` with dataset B into the run folder of dataset A, scan left out of B's stages: A's
    finished scan must not feed B's follow-up (it is blocked, saying why), and A's scan is kept."""
    base = 'dataset = "{data}"\nout = "run"\nstages = {stages}\n\n[noise]\nmodel = "dataset"\n' \
           'red_components = 5\n\n[scan]\nnside = 1\nfmax = 3e-8\nno_plots = true\n\n' \
           '[followup]\nfap_threshold = 1.0\nmax_iterations = 10\nwalkers = 18\ntemperatures = 2\nno_plots = true\n'
    runfile = work / "run.toml"
    runfile.write_text(base.format(data="data", stages='["scan"]'))
    code, err = run_cli(["run", runfile, "--quiet"], capsys)
    assert code == 0, err
    scan_of_a = snapshot(work / "run" / "scan")
    _dataset_b(work)
    runfile.write_text(base.format(data="data_b", stages='["followup"]'))
    code, err = run_cli(["run", runfile, "--quiet"], capsys)
    stages = {s["stage"]: s for s in _strict_json(work / "run" / "summary.json")["stages"]}
    assert "another dataset" in stages["scan"]["reason"]
    assert stages["followup"]["status"] == "blocked"
    assert not (work / "run" / "followup" / "posterior.ecsv").exists()
    assert snapshot(work / "run" / "scan") == scan_of_a


def test_hosts_refuses_results_of_another_dataset(work, capsys):
    """`hosts` takes no dataset: the follow-up it ranks must come from the dataset the run folder records."""
    from tests.test_fuzz_readers import _scan_and_posterior

    run = work / "run"
    _scan_and_posterior(run)
    (run / "dataset.json").write_text(json.dumps({"checksum": "a" * 64}))
    (run / "followup" / "summary.json").write_text(json.dumps({"noise_model": {"dataset_checksum": "b" * 64}}))
    before = snapshot(run)
    code, err = run_cli(["hosts", "--out", run, "--catalog", work / "galaxies.csv", "--observed-span", "10",
                         "--quiet", "--no-plots"], capsys)
    check_user_error(code, err, ["followup", "summary.json", "another dataset", "bbbbbbbbbbbb"])
    assert snapshot(run) == before


@pytest.mark.parametrize("out", ["data", "data/residuals/run"])
def test_run_folder_inside_the_dataset_refused(work, capsys, out):
    """`scan DATA --out DATA` mixed the results into the dataset (and a run folder in residuals/ would look
    like unused data files); the stage commands and the run file refuse it."""
    before = snapshot(work / "data")
    argv = [work / out if a == work / "run" else a for a in scan_argv(work, "--noise-model", "dataset")]
    code, err = run_cli(argv, capsys)
    check_user_error(code, err, ["dataset folder", "choose another --out"])
    runfile = work / "run.toml"
    runfile.write_text(f'dataset = "data"\nout = "{out}"\n')
    code, err = run_cli(["run", runfile, "--check"], capsys)
    check_user_error(code, err, ["run.toml", "line 2", "dataset folder"])
    assert snapshot(work / "data") == before


def test_stage_command_records_its_dataset(work, capsys):
    from cwsearch.data.dataset import dataset_checksum
    from cwsearch.job.runfolder import recorded_checksum

    code, err = run_cli(scan_argv(work), capsys)
    assert code == 0, err
    assert recorded_checksum(work / "run") == dataset_checksum(work / "data")
    assert not (work / "run" / ".lock").exists()


def test_part_files_cleaned_when_the_run_folder_is_locked(tmp_path):
    from cwsearch.job.runfolder import RunLock

    leftovers = [tmp_path / "scan" / ".spectrum.png.k3j2.part", tmp_path / ".provenance.json.x1.part",
                 tmp_path / "limits" / "deep" / ".sky.ecsv.9.part"]
    for p in leftovers:
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text("half")
    (tmp_path / ".data.x.part").mkdir()
    keep = tmp_path / "scan" / "candidates.ecsv"
    keep.write_text("kept")
    with RunLock(tmp_path):
        pass
    assert not any(p.exists() for p in leftovers) and not (tmp_path / ".data.x.part").exists()
    assert keep.read_text() == "kept"


_ORPHAN_SCRIPT = """
import sys, threading, time
from cwsearch.inference.execution import TaskRunner
runner = TaskRunner(workers=2).__enter__()
threading.Thread(target=lambda: runner.map(time.sleep, [300, 300, 300]), daemon=True).start()
while runner._pool is None or len(runner._pool._processes or {}) < 2:
    time.sleep(0.05)
print(" ".join(str(pid) for pid in runner._pool._processes), flush=True)
time.sleep(300)
"""


def _gone(pid):
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] == "Z"   # a zombie has ended
    except FileNotFoundError:
        return True


def test_kill9_of_main_process_leaves_no_worker_processes():
    proc = subprocess.Popen([sys.executable, "-c", _ORPHAN_SCRIPT], stdout=subprocess.PIPE, text=True)
    try:
        pids = [int(p) for p in proc.stdout.readline().split()]
        assert len(pids) == 2 and not any(_gone(p) for p in pids)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    # liveness, not speed: the watchdog polls every 0.5 s; allow a generous minute on a loaded machine
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not all(_gone(p) for p in pids):
        time.sleep(0.2)
    alive = [p for p in pids if not _gone(p)]
    for p in alive:
        os.kill(p, signal.SIGKILL)
    assert not alive, f"orphaned worker processes {alive}"


def _children(pid):
    """Process ids whose parent is ``pid`` (Linux /proc)."""
    out = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            out += [int(c) for c in (task / "children").read_text().split()]
        except OSError:
            pass
    return out


def _start(argv, cwd):
    return subprocess.Popen([sys.executable, "-m", "cwsearch", *map(str, argv)], cwd=cwd,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)


def _wait_for(condition, proc, what, timeout=120):
    deadline = time.monotonic() + timeout
    while not condition():
        assert proc.poll() is None, f"the first process ended (exit {proc.returncode}) before {what}"
        assert time.monotonic() < deadline, f"no {what} within {timeout} s"
        time.sleep(0.05)


def test_two_scans_into_one_run_folder_at_once_the_second_is_refused(work, capsys):
    """Two `cwsearch scan --out SAME` at once: the second one refuses with one line naming the first's pid;
    after the first is killed (kill -9) its stale lock is taken over and a scan runs."""
    first = _start(scan_argv(work, "--null-sims", "100000", "--noise-model", "dataset"), work)
    try:
        _wait_for(lambda: (work / "run" / ".lock").exists(), first, "lock")
        code, err = run_cli(scan_argv(work, "--noise-model", "dataset"), capsys)
        check_user_error(code, err, ["another cwsearch run", f"pid {first.pid}"])
    finally:
        first.kill()
        first.wait()
    code, err = run_cli(scan_argv(work, "--noise-model", "dataset"), capsys)
    assert code == 0, err
    assert (work / "run" / "scan" / "scan_summary.json").is_file() and not (work / "run" / ".lock").exists()


def test_kill9_of_limits_with_two_workers_leaves_no_worker_processes(work):
    """`cwsearch limits --workers 2` killed with SIGKILL: its worker processes end too (watchdog)."""
    argv = ["limits", work / "data", "--out", work / "run", "--nside", "2", "--fmax", "3e-8", "--no-plots", "--quiet",
            "--workers", "2", "--red-components", "5", "--noise-model", "dataset"]
    proc = _start(argv, work)
    try:
        _wait_for(lambda: len(_children(proc.pid)) >= 2, proc, "two worker processes")
        workers = _children(proc.pid)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    # liveness, not speed: the watchdog polls every 0.5 s; allow a generous minute on a loaded machine
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not all(_gone(p) for p in workers):
        time.sleep(0.2)
    alive = [p for p in workers if not _gone(p)]
    for p in alive:
        os.kill(p, signal.SIGKILL)
    assert not alive, f"orphaned worker processes {alive}"


@pytest.mark.parametrize("command", ["hosts", "followup"])
def test_candidate_name_cannot_leave_the_run_folder(work, capsys, command):
    from tests.test_fuzz_readers import _scan_and_posterior

    _scan_and_posterior(work / "run")
    before = snapshot(work)
    if command == "hosts":
        argv = ["hosts", "--out", work / "run", "--catalog", work / "galaxies.csv", "--observed-span", "10",
                "--quiet", "--no-plots", "--candidate", "../../outside"]
    else:
        argv = ["followup", work / "data", "--out", work / "run", "--quiet", "--red-components", "3",
                "--max-iterations", "10", "--noise-model", "dataset", "--candidate", "../../outside"]
    code, err = run_cli(argv, capsys)
    check_user_error(code, err, ["--candidate"])
    assert snapshot(work) == before


# ------------------------------------------------------------------ security


def _dataset_with_backend(folder, label):
    from cwsearch.data.dataset import write_dataset
    from cwsearch.data.model import Array, Pulsar
    from tests.conftest import make_tiny_array

    arr = make_tiny_array()
    p = arr[0]
    backends = np.array([label if b == p.backends[0] else b for b in p.backends])
    q = Pulsar(p.name, ra=p.ra, dec=p.dec, distance=p.distance, distance_err=p.distance_err, mjd=p.mjd,
               residuals=p.residuals, sigmas=p.sigmas, backends=backends, extra_design=p.extra_design,
               extra_design_names=p.extra_design_names)
    write_dataset(Array([q] + list(arr)[1:]), folder)


def test_control_characters_escaped_in_inspect_output(tmp_path, capsys):
    from cwsearch import cli

    _dataset_with_backend(tmp_path / "d", "GBT\x1b]0;owned\x07\x1b[2J")
    capsys.readouterr()
    assert cli.main(["inspect", str(tmp_path / "d")]) == 0
    out = capsys.readouterr().out
    assert "\x1b" not in out and "\x07" not in out
    assert "GBT\\x1b]0;owned\\x07" in out


def test_control_characters_escaped_in_limits_galaxy_messages(work, capsys):
    name = "G\x1b]0;owned\x07"
    code, err = run_cli(["limits", work / "data", "--out", work / "run", "--quiet", "--galaxy", name, "10",
                         "120", "5"], capsys)
    check_user_error(code, err, ["--galaxy", "G\\x1b]0;owned\\x07"])
    assert "\x1b" not in err and "\x07" not in err


def test_control_characters_escaped_in_the_hosts_ranking(work, capsys):
    """Galaxy names from a catalogue are printed with their control characters escaped (an OSC title
    sequence and a screen clear here), never raw."""
    from tests.test_fuzz_readers import _scan_and_posterior

    _scan_and_posterior(work / "run")
    (work / "galaxies.csv").write_text("name,ra,dec,distance\nG\x1b]0;owned\x07\x1b[2J,10,20,40\nGAL002,200,-30,80\n")
    capsys.readouterr()
    code = cli_main(["hosts", "--out", str(work / "run"), "--catalog", str(work / "galaxies.csv"),
                     "--observed-span", "10", "--no-plots"])
    out = capsys.readouterr()
    assert code == 0, out.err
    assert "\x1b" not in out.out + out.err and "\x07" not in out.out + out.err
    assert "G\\x1b]0;owned\\x07" in out.out


def test_escape_text_leaves_printable_text_alone():
    from cwsearch.core.safeio import escape_text

    assert escape_text("GAL 001 \u00e9\u4e2d") == "GAL 001 \u00e9\u4e2d"
    assert escape_text("a\u202eb\x9bc\rd") == "a\\u202eb\\x9bc\\rd"   # bidi override, C1 CSI, carriage return


def test_outputs_follow_the_umask(tmp_path):
    from cwsearch.core.fileio import write_text_atomic

    old = os.umask(0o022)
    try:
        write_text_atomic(tmp_path / "a.txt", "x")
        os.umask(0o077)
        write_text_atomic(tmp_path / "b.txt", "x")
    finally:
        os.umask(old)
    assert (tmp_path / "a.txt").stat().st_mode & 0o777 == 0o644
    assert (tmp_path / "b.txt").stat().st_mode & 0o777 == 0o600


def test_size_cap_has_a_clear_message(tmp_path, monkeypatch):
    from cwsearch.core.safeio import read_input_bytes

    monkeypatch.setenv("CWSEARCH_MAX_INPUT_BYTES", "10")
    (tmp_path / "big.ecsv").write_bytes(b"x" * 11)
    with pytest.raises(InputError, match=r"big.ecsv: file is 11 bytes, above the 10-byte limit"):
        read_input_bytes(tmp_path / "big.ecsv")


def test_counts_have_upper_bounds():
    from cwsearch.physics.noise import NoiseSettings

    with pytest.raises(InputError, match="--red-components"):
        NoiseSettings(red_components=10**9)
    with pytest.raises(InputError, match="--red-components"):
        NoiseSettings(red_components=-1)


def test_fitted_noise_table_fifo_refused_without_blocking(tmp_path, tiny_array):
    from cwsearch.inference.noisefit import read_noise_table

    os.mkfifo(tmp_path / "noise_model.ecsv")
    with pytest.raises(InputError, match="named pipe"):
        read_noise_table(tmp_path / "noise_model.ecsv", tiny_array)
