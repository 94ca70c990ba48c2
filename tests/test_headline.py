"""The headline says only what the data support (issue 15 §2).

Checks: the empirical false-alarm probability (1 + k)/(1 + N) of N noise-only scans is quoted as an upper
bound 1/(N + 1) at its floor (the standard Monte Carlo p-value, Davison & Hinkley 1997, "Bootstrap
Methods", §4.2 — from memory); the position after a follow-up is the posterior; follow-ups whose
posteriors overlap are one source; sampler health and a few-effective-sample host are warnings in the
headline. Run folders here are invented file layouts (docs/design.md §11); the expected numbers are
computed in the test from their definitions.
"""

from __future__ import annotations

import json

import pytest

from cwsearch.job.headline import (COLD_SWAP_MIN, fap_text, format_headline, headline_result, merge_sources,
                                   sampler_health)


def _table(path, **cols):
    from astropy.table import Table

    from cwsearch.core.fileio import write_table_atomic

    write_table_atomic(path, Table(cols))


def _followup(ra, dec, f_lo, f_hi, row, bf=40.0, **extra):
    return {"target": f"candidate_{row}", "start": {"candidate_row": {"rank": float(row)}},
            "log_bayes_factor": bf, "log_bayes_factor_error": 0.5, "effective_sample_size": 1200.0,
            "stopping_rule": {"ess": 1000.0}, "stopped_by": "converged", "iterations": 5000,
            "swap_acceptance": [0.3, 0.4], "temperatures": [1.0, 2.0, 4.0],
            "parameters": {"frequency": {"median": 0.5 * (f_lo + f_hi), "interval_90": [f_lo, f_hi], "unit": "Hz"}},
            "sky": {"ra": ra, "dec": dec, "radius_90_deg": 8.0, "credible_area_90_deg2": 150.0}, **extra}


def _run(tmp_path, followups, null_sims=20, fap_empirical=1 / 21, n_effective=2.1):
    run = tmp_path / "run"
    for stage in ("scan", "followup", "hosts"):
        (run / stage).mkdir(parents=True)
    n = max(2, len(followups))
    _table(run / "scan" / "candidates.ecsv", frequency=[1.2e-8] * n, ra=[150.0] * n, dec=[-35.7] * n,
           fe=[60.0] * n, fap=[1e-31] * n, fap_empirical=[fap_empirical] * n)
    (run / "scan" / "scan_summary.json").write_text(json.dumps({"null_sims": null_sims, "nside": 8}))
    names = [f["target"] for f in followups]
    for f in followups:
        (run / "followup" / f["target"]).mkdir()
        (run / "followup" / f["target"] / "summary.json").write_text(json.dumps(f))
    (run / "followup" / "summary.json").write_text(json.dumps(
        {"targets": names, "log_bayes_factor": [f["log_bayes_factor"] for f in followups]}))
    (run / "followup" / ".stage.json").write_text(json.dumps({"status": "complete", "summary": {}}))
    _table(run / "hosts" / "ranking.ecsv", name=["GALX1", "GALX2"], probability=[0.28, 0.1],
           n_effective=[n_effective, 30.0])
    return run


def test_empirical_fap_at_its_floor_is_an_upper_bound():
    n = 20
    floor = 1 / (n + 1)                         # k = 0 exceedances: (1 + 0)/(1 + N)
    text = fap_text(floor, n, 1e-31)
    assert text.startswith(f"FAP < {floor:.2g} ({n} noise-only scans") and "0.048" in text
    assert "analytic estimate 1e-31" in text    # the analytic figure stays, labelled
    above = (1 + 3) / (1 + n)                   # k = 3
    assert fap_text(above, n, 0.1).startswith(f"FAP = {above:.2g} (empirical, {n} noise-only scans")
    assert "analytic" in fap_text(None, 0, 4e-31) and "no noise-only scans" in fap_text(None, 0, 4e-31)


def test_position_is_the_posterior_and_overlapping_followups_are_one_source(tmp_path):
    a = _followup(141.0, -27.5, 1.19e-8, 1.21e-8, row=1, bf=50.0)
    b = _followup(143.0, -29.0, 1.20e-8, 1.22e-8, row=3, bf=45.0)    # 2.5° away, frequencies overlap
    run = _run(tmp_path, [a, b])
    head = headline_result(run)
    assert len(head["sources"]) == 1 and head["sources"][0]["scan_peaks"] == [1, 3]
    pos = head["candidate"]["position"]
    assert pos["source"] == "posterior" and pos["dec"] == pytest.approx(-27.5) and pos["ra"] == pytest.approx(141.0)
    text = format_headline(head)
    assert "dec = -27.5°" in text and "-35.7" not in text and "90 % credible area 150 deg²" in text
    assert "scan peaks #1, #3 converged on the same posterior" in text
    assert "FAP < 0.048 (20 noise-only scans" in text


def test_separate_sources_stay_separate():
    a = _followup(141.0, -27.5, 1.19e-8, 1.21e-8, row=1)
    far_sky = _followup(300.0, 40.0, 1.19e-8, 1.21e-8, row=2)
    other_f = _followup(141.0, -27.5, 3.0e-8, 3.1e-8, row=3)
    targets = [(t["target"], t, None) for t in (a, far_sky, other_f)]
    assert sorted(map(len, merge_sources(targets))) == [1, 1, 1]


def test_sampler_health_and_few_effective_host_samples_are_warned(tmp_path):
    bad = _followup(141.0, -27.5, 1.19e-8, 1.21e-8, row=1, swap_acceptance=[0.0055, 0.03],
                    effective_sample_size=250.0, stopped_by="iterations", iterations=20000)
    health = sampler_health(bad)
    assert 0.0055 < COLD_SWAP_MIN
    assert any("cold-chain swap acceptance 0.0055" in h for h in health)
    assert any("swap acceptance 0.03 between T = 2↔4" in h for h in health)
    assert any("250 of the 1000" in h for h in health) and any("iteration cap" in h for h in health)
    assert sampler_health(_followup(141.0, -27.5, 1.19e-8, 1.21e-8, row=1)) == []
    head = headline_result(_run(tmp_path, [bad]))
    text = format_headline(head)
    assert "Best host: GALX1 with probability 0.28 (2.1 effective samples)" in text
    assert "WARNING: host ranking" in text and "2.1 effective posterior samples" in text
    assert "WARNING: sampler (candidate_1): cold-chain swap acceptance" in text
