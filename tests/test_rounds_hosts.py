"""Host ranking of the sources confirmed after round 1 (issue 17, docs/design.md §14): the rounds step's host
part on a tiny prepared run folder (no scan, no sampler).

Posteriors are the synthetic ones of tests/test_hosts.py (samples drawn around a known binary) and the
catalogue is its invented one (a planted host consistent with the binary, decoys, a random population); the
ranking itself is checked in tests/test_hosts.py, so here only what the rounds step adds: where it ranks,
with which posterior, what confirmed_sources.ecsv and rounds.json keep.
"""

from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
import pytest
from astropy.table import Table

from cwsearch.job import pipeline
from cwsearch.job.config import parse_config
from cwsearch.job.rounds import HOST_COLUMNS, hosts_seed, rank_confirmed_hosts, sources_table
from cwsearch.physics.noise import NoiseSettings
from cwsearch.physics.simulate import invented_array

from test_hosts import TRUE, synthetic_posterior, write_catalogue, write_posterior

NOISE = NoiseSettings(red_components=0, pulsar_red_noise=False)
MODEL = {"log10_frequency_band": [-8.1, -7.8], "chirp_mass_range": [1e7, 1e11], "strain_range": [1e-18, 1e-11],
         "strain_prior": "log-uniform"}


def _source(k, round_k, folder):
    return {"source": k, "round": round_k, "ra": TRUE["ra"], "dec": TRUE["dec"], "frequency": TRUE["frequency"],
            "chirp_mass": TRUE["chirp_mass"], "strain": 1e-14, "inclination": 1.0, "polarization": 0.5,
            "phase": 0.2, "fap_empirical": 0.01, "log_bayes_factor": 20.0, "log_bayes_factor_error": 0.3,
            "folder": folder}


@pytest.fixture
def prepared(tmp_path):
    """A run folder holding a round-2 follow-up posterior (rounds/round-2/followup/) and a context whose run file
    ranks hosts (the hosts stage in the stages, a [hosts] catalogue)."""
    rng = np.random.default_rng(11)
    catalogue = write_catalogue(tmp_path / "galaxies.csv", rng, n_population=200)
    run = tmp_path / "run"
    follow = run / "rounds" / "round-2" / "followup"
    write_posterior(follow / "posterior.ecsv", synthetic_posterior(rng, n=2000))
    (follow / "summary.json").write_text(json.dumps({"model": MODEL}))
    (tmp_path / "d").mkdir()
    text = (f'dataset = "d"\nstages = ["scan", "followup", "hosts"]\n[hosts]\ncatalog = "{catalogue}"\n'
            "no_plots = true\n")
    config = parse_config(text, path=tmp_path / "r.toml")
    array = invented_array(n_pulsars=4, years=15, seed=41, toas_per_pulsar=30, full_span=True)
    ctx = SimpleNamespace(config=config, run_dir=run, stage_dir=run / "rounds", model_array=array, noise=NOISE,
                          seed=5, progress=False, resuming=False)
    return ctx, catalogue


def test_a_later_rounds_source_is_ranked_in_its_round_folder(prepared, tmp_path):
    """The source of round 2 is ranked by the hosts stage's own function on round 2's posterior, into
    rounds/round-2/hosts/ with the hosts stage's file names; the round-1 source is left to the hosts stage;
    confirmed_sources.ecsv gets the best host, its probability and P(not in catalogue)."""
    ctx, catalogue = prepared
    assert pipeline._ranks_hosts(ctx)
    confirmed = [_source(1, 1, "followup"), _source(2, 2, "rounds/round-2/followup")]
    rank_confirmed_hosts(ctx, confirmed, None, pipeline._rank_hosts)
    out = ctx.run_dir / "rounds" / "round-2" / "hosts"
    # the same files as the hosts stage writes for round 1 (its own run on a run folder, no plots)
    from cwsearch.stages.hosts.stage import HostsOptions, run_hosts

    reference = tmp_path / "reference"
    write_posterior(reference / "followup" / "posterior.ecsv", synthetic_posterior(np.random.default_rng(2), n=500))
    run_hosts(None, reference, HostsOptions(catalog=str(catalogue), no_plots=True), progress=False)
    assert sorted(p.name for p in out.iterdir()) == sorted(p.name for p in (reference / "hosts").iterdir())
    ranking = Table.read(out / "ranking.ecsv", format="ascii.ecsv")
    summary = json.loads((out / "hosts_summary.json").read_text())
    # ranked on round 2's posterior, with the seed of round 2
    assert summary["candidates"][0]["localisation_source"] == str(ctx.run_dir / "rounds" / "round-2" / "followup"
                                                                  / "posterior.ecsv")
    assert summary["seed"] == hosts_seed(5, 2)
    # behaviour check (not a published value): the planted host, consistent with the binary in sky, distance
    # and mass, ranks first (the ranking's own check against decoys is tests/test_hosts.py)
    assert ranking["name"][0] == "HOST"
    p_out = summary["probability_not_in_catalogue"]
    # fact of probability: the host is one catalogue galaxy or none of them (disjoint alternatives), so the listed
    # galaxies' probabilities and P(not in catalogue) add up to at most 1, to rounding (1e-12)
    assert float(np.sum(ranking["probability"])) + p_out <= 1 + 1e-12
    assert 0 <= p_out <= 1
    # what the rounds step keeps: round 2's entry, the round-1 source pointed at the hosts stage's folder
    assert confirmed[0]["hosts"] == {"folder": "hosts", "candidate": "followup", "note": "ranked by the hosts stage"}
    entry = confirmed[1]["hosts"]
    assert entry["folder"] == "rounds/round-2/hosts" and entry["best_host"] == "HOST"
    assert entry["best_host_probability"] == pytest.approx(float(ranking["probability"][0]), rel=1e-12)
    assert entry["probability_not_in_catalogue"] == pytest.approx(p_out, rel=1e-12)
    # confirmed_sources.ecsv: the four host columns (blank for the round-1 source), read back as written
    path = tmp_path / "confirmed_sources.ecsv"
    sources_table(confirmed).write(path, format="ascii.ecsv")
    table = Table.read(path, format="ascii.ecsv")
    assert all(column in table.colnames for column, _, _ in HOST_COLUMNS)
    assert not any(name.startswith("joint_") for name in table.colnames)
    assert list(table["hosts_folder"]) == ["hosts", "rounds/round-2/hosts"] and table["best_host"][1] == "HOST"
    assert np.isnan(table["best_host_probability"][0])
    assert table["best_host_probability"][1] == pytest.approx(entry["best_host_probability"], rel=1e-12)
    assert table["probability_not_in_catalogue"][1] == pytest.approx(p_out, rel=1e-12)
    # ranked again (a resumed rounds step): the same numbers
    again = [_source(1, 1, "followup"), _source(2, 2, "rounds/round-2/followup")]
    rank_confirmed_hosts(ctx, again, None, pipeline._rank_hosts)
    assert again[1]["hosts"]["best_host"] == "HOST"
    assert again[1]["hosts"]["best_host_probability"] == pytest.approx(entry["best_host_probability"], rel=1e-9)


def test_without_a_host_ranking_nothing_is_ranked_and_the_table_is_as_before(prepared, tmp_path):
    """No hosts stage in the stages (or no catalogue): the rounds step ranks nothing and neither its input
    hash nor confirmed_sources.ecsv changes."""
    ctx, catalogue = prepared
    off = parse_config(f'dataset = "d"\nstages = ["scan", "followup"]\n[hosts]\ncatalog = "{catalogue}"\n',
                       path=tmp_path / "r.toml")
    ctx_off = SimpleNamespace(**{**vars(ctx), "config": off})
    assert not pipeline._ranks_hosts(ctx_off) and "hosts" not in pipeline._rounds_inputs(ctx_off)
    assert pipeline._rounds_inputs(ctx)["hosts"]["catalog"] is not None
    confirmed = [_source(1, 1, "followup"), _source(2, 2, "rounds/round-2/followup")]
    assert sources_table(confirmed).colnames[-1] == "folder"
    assert not (ctx.run_dir / "rounds" / "round-2" / "hosts").exists()


def test_a_catalogue_error_is_recorded_not_fatal(prepared, tmp_path):
    """A user error of the ranking (here no galaxy within the [hosts] distance limit) is kept in the source's
    entry: the rescans already done are not thrown away (the hosts stage reports the same error itself)."""
    ctx, catalogue = prepared
    text = (f'dataset = "d"\nstages = ["scan", "followup", "hosts"]\n[hosts]\ncatalog = "{catalogue}"\n'
            "distance_limit = 0.001\nno_plots = true\n")
    ctx_bad = SimpleNamespace(**{**vars(ctx), "config": parse_config(text, path=tmp_path / "r.toml")})
    confirmed = [_source(2, 2, "rounds/round-2/followup")]
    rank_confirmed_hosts(ctx_bad, confirmed, None, pipeline._rank_hosts)
    assert "distance limit" in confirmed[0]["hosts"]["error"]
    table = sources_table(confirmed)
    assert table["best_host"][0] == "" and np.isnan(table["best_host_probability"][0])


def test_joint_followup_sources_are_ranked_on_their_block_of_the_joint_posterior(prepared):
    """Each source of the joint follow-up: its s{J}_ columns of the joint posterior written as a single-source
    posterior (rounds/joint/source-J/followup/) with its frequency window as the search prior, ranked into
    rounds/joint/source-J/hosts/; the rounds step copies the result into joint_* columns."""
    from cwsearch.stages.followup.stage import OUTPUT_COLUMNS

    ctx, _ = prepared
    rng = np.random.default_rng(12)
    joint = Table()
    for k, ra in ((1, 20.0), (2, TRUE["ra"])):     # source 1 elsewhere on the sky, source 2 at the planted host
        loc = synthetic_posterior(rng, n=1500, ra=ra)
        block = {"ra": np.degrees(loc.ra), "dec": np.degrees(loc.dec), "frequency": loc.frequency,
                 "chirp_mass": loc.chirp_mass, "strain": loc.strain}
        for name in OUTPUT_COLUMNS:
            joint[f"s{k}_{name}"] = block.get(name, np.full(len(loc), 0.5))
    folder = ctx.run_dir / "rounds" / "joint"
    entries = [{"source": k, "round": k, "log10_frequency_band": [-7.95 + 0.01 * k, -7.88]} for k in (1, 2)]
    result = SimpleNamespace(folder=folder, table=joint, summary={"model": {"strain_prior": "log-uniform"},
                                                                 "sources": entries})
    got = pipeline._joint_source_hosts(ctx, result, entries[1], 99)
    posterior = Table.read(folder / "source-2" / "followup" / "posterior.ecsv", format="ascii.ecsv")
    np.testing.assert_allclose(posterior["ra"], joint["s2_ra"], rtol=1e-12)
    summary = json.loads((folder / "source-2" / "hosts" / "hosts_summary.json").read_text())
    # the search prior of source 2 is its joint frequency window (the joint prior per source, docs/design.md §7a)
    assert summary["candidates"][0]["search_prior"]["frequency_band_hz"] == pytest.approx([10 ** -7.93, 10 ** -7.88])
    assert got["folder"] == "rounds/joint/source-2/hosts" and got["best_host"] == "HOST"
    confirmed = [_source(1, 1, "followup"), _source(2, 2, "rounds/round-2/followup")]
    rank_confirmed_hosts(ctx, confirmed, {"sources": [{"source": 1}, {"source": 2, "hosts": got}]},
                         pipeline._rank_hosts)
    table = sources_table(confirmed)
    assert list(table["joint_best_host"]) == ["", "HOST"] and table["joint_hosts_folder"][1] == got["folder"]
    assert table["joint_best_host_probability"][1] == pytest.approx(got["best_host_probability"], rel=1e-12)
