"""Reproducibility comparisons (cwsearch.data.compare): recomputed floats agree to a stated tolerance.

Reference: numpy's own ``np.isclose`` with the same rtol/atol rule (|a − b| ≤ atol + rtol·|b|); text,
integers, units and masks exactly (common practice, no source).
"""

from __future__ import annotations

import numpy as np
from astropy.table import MaskedColumn, Table

from cwsearch.data.compare import (ATOL_SCALE, RTOL, compare_arrays, compare_datasets, compare_files,
                              compare_json, compare_tables)


def test_verdict_agrees_with_numpy_isclose():
    rng = np.random.default_rng(3)
    b = rng.normal(size=2000) * 1e-6          # values crossing zero, like residuals
    for size in (1e-16, 1e-13, 1e-12, 1e-11, 1e-9):
        a = b + rng.normal(size=b.size) * size * np.abs(b).max()
        expected = bool(np.all(np.isclose(a, b, rtol=RTOL, atol=ATOL_SCALE * np.abs(b).max())))
        assert compare_arrays(a, b, where="x").ok == expected, size


def test_last_bit_changes_pass_real_changes_fail():
    b = np.array([1.0, -2.5e-7, 0.0, 6.2e-7])
    assert compare_arrays(b * (1 + 3e-16), b, where="sigma").ok   # issue 15: 3e-16 relative on another CPU
    bad = compare_arrays(b * (1 + 1e-9), b, where="sigma")
    assert not bad.ok and "sigma" in bad.problems[0] and bad.worst[2] > 1
    assert not compare_arrays(np.array([1, 2]), np.array([1, 3]), where="pixel").ok     # integers: exact
    assert not compare_arrays(np.array(["A", "B"]), np.array(["A", "C"]), where="backend").ok
    assert not compare_arrays(np.array([1.0, np.nan]), np.array([1.0, 2.0]), where="x").ok
    assert compare_arrays(np.array([1.0, np.nan]), np.array([1.0, np.nan]), where="x").ok
    # single precision: one unit in the last place of float32 is not a difference
    f32 = np.float32([1.0, 3.0])
    assert compare_arrays(np.nextafter(f32, np.float32(2)), f32, where="fe").ok


def test_tables_column_by_column():
    t = Table({"name": ["A", "B"], "fe": [3.0, 4.0], "rank": [1, 2]})
    t["fe"].unit = "s"
    t.meta["nside"] = 4
    u = t.copy()
    u["fe"] = u["fe"] * (1 + 2e-16)
    assert compare_tables(u, t).ok
    u["name"][1] = "C"
    result = compare_tables(u, t)
    assert not result.ok and "column name" in result.describe()
    v = t.copy()
    v["fe"].unit = "d"
    assert not compare_tables(v, t).ok
    w = t.copy()
    w.meta["nside"] = 8
    assert not compare_tables(w, t).ok
    m = Table({"x": MaskedColumn([1.0, 2.0], mask=[False, True])})
    n = Table({"x": MaskedColumn([1.0, 2.0], mask=[False, False])})
    assert not compare_tables(m, n).ok


def test_json_numbers_to_tolerance_text_exactly():
    a = {"snr": 15.000000000000002, "name": "SIMPSR01", "n": 3, "flag": True, "x": None, "v": [1.0, 2.0]}
    assert compare_json(dict(a), a).ok
    assert not compare_json(dict(a, snr=15.0001), a).ok
    assert not compare_json(dict(a, n=4), a).ok
    assert not compare_json(dict(a, name="SIMPSR02"), a).ok
    assert not compare_json(dict(a, flag=1), a).ok
    assert not compare_json({**a, "extra": 1}, a).ok


def test_files_and_datasets(tmp_path, tiny_array):
    from cwsearch.data.dataset import write_dataset
    from cwsearch.data.model import Array, Pulsar

    write_dataset(tiny_array, tmp_path / "a")

    def perturbed(factor):
        out = []
        for p in tiny_array:
            out.append(Pulsar(p.name, ra=p.ra, dec=p.dec, distance=p.distance, distance_err=p.distance_err,
                              mjd=p.mjd, residuals=p.residuals, sigmas=p.sigmas * factor, backends=p.backends,
                              extra_design=p.extra_design, extra_design_names=p.extra_design_names,
                              noise=p.noise))
        return Array(out)

    write_dataset(perturbed(1 + 3e-16), tmp_path / "b")
    write_dataset(perturbed(1 + 1e-10), tmp_path / "c")
    assert compare_datasets(tmp_path / "b", tmp_path / "a").ok
    bad = compare_datasets(tmp_path / "c", tmp_path / "a")
    assert not bad.ok and "column sigma" in bad.describe()
    (tmp_path / "x.bin").write_bytes(b"abc")
    (tmp_path / "y.bin").write_bytes(b"abd")
    assert not compare_files(tmp_path / "x.bin", tmp_path / "y.bin").ok   # not numbers: bytes
    assert not compare_files(tmp_path / "x.bin", tmp_path / "missing.bin").ok

