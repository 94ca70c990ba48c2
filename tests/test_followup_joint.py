"""The joint follow-up of the confirmed sources (cwsearch.stages.followup.joint, docs/design.md §7a).

Checks: two binaries injected (invented array, seeded) are both recovered inside their 90 % intervals of
the joint posterior (a 90 % interval misses a true value 10 % of the time: common practice, no source;
the seeds are fixed in advance); the files of the joint folder exist and parse as ECSV/JSON (astropy,
json); a bad confirmed-sources row is one InputError naming file, row and column.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from astropy.table import Table

from cwsearch.core.errors import InputError
from cwsearch.physics import simulate
from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
from cwsearch.physics.simulate import Binary, invented_array, simulate_residuals
from cwsearch.stages.followup.joint import frequency_windows, read_confirmed_sources, run_joint_followup
from cwsearch.stages.followup.options import FollowupOptions

NOISE = NoiseSettings(red_components=4, pulsar_red_noise=False)


def _write_sources(run, rows):
    table = Table(rows=rows, names=("round", "ra", "dec", "frequency", "strain"))
    table["ra"].unit, table["dec"].unit, table["frequency"].unit = "deg", "deg", "Hz"
    run.mkdir(parents=True, exist_ok=True)
    table.write(run / "confirmed_sources.ecsv", format="ascii.ecsv", overwrite=True)


def test_two_injected_sources_recovered_jointly(tmp_path):
    base = invented_array(n_pulsars=6, years=10, seed=61, toas_per_pulsar=60)
    binaries = [Binary(ra=1.2, dec=0.4, gw_frequency=1.2e-8, chirp_mass=5e8, strain=1e-14, inclination=0.8,
                       polarization=0.5, phase=1.0),
                Binary(ra=4.3, dec=-0.5, gw_frequency=3.1e-8, chirp_mass=3e8, strain=1e-14, inclination=2.0,
                       polarization=2.0, phase=0.4)]
    engine = NoiseWeighting(base.with_residuals(simulate_residuals(base, seed=62)), NOISE)
    for b, snr in zip(binaries, (15.0, 11.0)):       # optimal SNR through the noise engine
        b.strain *= snr / engine.optimal_snr(simulate.binary_residuals(base, b))
    data = base.with_residuals(simulate_residuals(base, seed=62, binaries=binaries))
    run = tmp_path / "run"
    # the rounds' estimates, slightly off the truth (as single-source follow-ups would give: 0.03 bins in frequency)
    _write_sources(run, [(1, math.degrees(b.ra) + 2, math.degrees(b.dec) - 1, b.gw_frequency * 1.003, b.strain * 1.2)
                         for b in binaries])
    options = FollowupOptions(walkers=34, temperatures=2, max_temperature=30.0, ess=100, max_iterations=800,
                              adapt_iterations=100, checkpoint_every=10_000)
    result = run_joint_followup(data, run, None, options, noise=NOISE, seed=7, progress=False)
    summary = result.summary
    assert summary["n_sources"] == 2 and len(summary["sources"]) == 2
    for b, entry in zip(binaries, summary["sources"]):
        truth = {"frequency": b.gw_frequency, "ra": math.degrees(b.ra), "dec": math.degrees(b.dec), "strain": b.strain}
        for name, value in truth.items():
            lo, hi = entry["parameters"][name]["interval_90"]
            assert lo <= value <= hi, (entry["source"], name, lo, value, hi)
    folder = run / "followup" / "joint"
    post = Table.read(folder / "posterior.ecsv", format="ascii.ecsv")
    assert {"s1_frequency", "s2_frequency", "s2_phase", "log_likelihood", "walker"} <= set(post.colnames)
    assert post["s1_ra"].unit == "deg" and np.all(post["s1_frequency"] < post["s2_frequency"])
    sources = Table.read(folder / "sources.ecsv", format="ascii.ecsv")
    assert list(sources["source"]) == [1, 2] and "frequency_q95" in sources.colnames
    assert json.loads((folder / "summary.json").read_text())["sources"][1]["source"] == 2
    assert (folder / "corner_source_1.png").is_file() and (folder / "corner_source_2.png").is_file()


def test_overlapping_windows_are_cut_at_the_midpoint():
    """Two sources 4 bins apart with windows of 5 bins: the windows meet at the midpoint (arithmetic)."""
    span = 3e8
    freqs = (3e-8, 3e-8 + 4 / span)
    (a_lo, a_hi), (b_lo, b_hi) = frequency_windows(
        [type("S", (), {"frequency": f})() for f in freqs], span, 5.0)
    mid = 0.5 * (freqs[0] + freqs[1])
    assert 10 ** a_hi == pytest.approx(mid, rel=1e-12) and 10 ** b_lo == pytest.approx(mid, rel=1e-12)
    assert 10 ** a_lo == pytest.approx(freqs[0] - 5 / span, rel=1e-12)


@pytest.mark.parametrize("rows, column, row", [
    ([(1, 10.0, 5.0, float("nan"), 1e-14)], "frequency", 1),
    ([(1, 10.0, 5.0, 1e-8, 1e-14), (2, 20.0, 95.0, 2e-8, 1e-14)], "dec", 2),
])
def test_bad_confirmed_sources_row(tmp_path, rows, column, row):
    _write_sources(tmp_path, rows)
    with pytest.raises(InputError) as err:
        read_confirmed_sources(tmp_path)
    assert err.value.column == column and err.value.row == row and "confirmed_sources.ecsv" in str(err.value)


def test_missing_column(tmp_path):
    Table(rows=[(1.0, 2.0)], names=("ra", "dec")).write(tmp_path / "confirmed_sources.ecsv", format="ascii.ecsv")
    with pytest.raises(InputError) as err:
        read_confirmed_sources(tmp_path)
    assert err.value.column == "frequency"
