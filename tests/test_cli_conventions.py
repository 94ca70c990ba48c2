"""One convention across commands (issue 15 §4): --out RUN_DIR for every stage (hosts' old positional form
still works, with a note), --candidate accepts a name (candidate_K) or a row, run-file noise keys are also
command-line options. Common practice, no source: these check the interface contract written in the README."""

from __future__ import annotations

import argparse

import pytest

from cwsearch.core.candidates import candidate_name, candidate_row
from cwsearch.core.errors import InputError


def test_candidate_names_and_rows():
    for text, row in (("candidate_3", 3), ("Candidate-3", 3), ("3", 3), ("#3", 3), (3, 3), (" candidate 12 ", 12)):
        assert candidate_row(text) == row
    assert candidate_row(candidate_name(7)) == 7
    for bad in ("best", "candidate_", "3.5", True):
        with pytest.raises(ValueError):
            candidate_row(bad)


def test_hosts_takes_the_run_folder_by_out(capsys):
    from cwsearch.commands import hosts

    parser = argparse.ArgumentParser()
    hosts.add_arguments(parser)
    args = parser.parse_args(["--out", "runs/x", "--catalog", "c.ecsv"])
    assert hosts.run_folder(args) == "runs/x" and capsys.readouterr().err == ""
    args = parser.parse_args(["runs/y", "--catalog", "c.ecsv"])
    assert hosts.run_folder(args) == "runs/y" and "deprecated" in capsys.readouterr().err
    with pytest.raises(InputError):
        hosts.run_folder(parser.parse_args(["--catalog", "c.ecsv"]))
    with pytest.raises(InputError):
        hosts.run_folder(parser.parse_args(["runs/a", "--out", "runs/b", "--catalog", "c.ecsv"]))


def test_noise_and_followup_run_file_keys_are_options():
    from cwsearch.commands import followup
    from cwsearch.commands._common import noise_settings

    parser = argparse.ArgumentParser()
    followup.add_arguments(parser)
    args = parser.parse_args(["data", "--out", "r", "--no-white-noise-factors", "--fap-threshold", "0.05",
                              "--max-candidates", "2", "--candidate", "candidate_2"])
    assert noise_settings(args).white_noise_factors is False
    assert args.fap_threshold == 0.05 and args.max_candidates == 2 and args.candidate == "candidate_2"
    assert noise_settings(parser.parse_args(["data", "--out", "r"])).white_noise_factors is True


def test_threshold_top_counts_candidates_below_the_threshold(tmp_path):
    from astropy.table import Table

    from cwsearch.commands.followup import threshold_top
    from cwsearch.core.fileio import write_table_atomic

    (tmp_path / "scan").mkdir()
    write_table_atomic(tmp_path / "scan" / "candidates.ecsv", Table({"fap": [1e-9, 1e-3, 0.2, 0.5]}))
    assert threshold_top(tmp_path, 0.01, 3) == 2
    assert threshold_top(tmp_path, 0.3, 1) == 1
    with pytest.raises(InputError):
        threshold_top(tmp_path, 1e-12, 3)
