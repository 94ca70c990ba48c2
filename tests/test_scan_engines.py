"""The scan's parallel loops (frequency chunks, noise-only scans) give the same numbers on every engine.

Serial (numba on one thread, in this process), threaded (numba's threads),
two local worker processes and a Dask LocalCluster with two workers: the same
Fe map, spectrum, candidates and null maxima to 1e-12 relative (plus 1e-12
of the largest magnitude for entries near zero), never bit for bit (common
practice for parallel reductions, no source). Also: the scan and the limits
never hold an (N_pix × N_freq × N_psr) array (docs/design.md §12).
"""

from __future__ import annotations

import numpy as np
import pytest

from cwsearch.physics.simulate import invented_array, simulated_array
from cwsearch.stages.scan import stage as scan


@pytest.fixture(scope="module")
def array():
    return simulated_array(invented_array(n_pulsars=5, years=8, seed=21, toas_per_pulsar=80), seed=22)


def _close(a, b, what):
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    scale = np.abs(a[np.isfinite(a)]).max(initial=0.0)
    np.testing.assert_allclose(b, a, rtol=1e-12, atol=1e-12 * scale, err_msg=what)


def _run(array, tmp_path, name, **engine):
    opts = scan.ScanOptions(nside=2, fmax=2.5e-7, null_sims=6, no_plots=True, **engine)
    return scan.run_scan(array, tmp_path / name, opts, seed=5, progress=False)


def _assert_same(ref, other):
    _close(ref.fe_map, other.fe_map, "fe_map")
    for key in ("fe_max", "fp", "fe_max_fap_single"):
        _close(ref.spectrum[key], other.spectrum[key], key)
    assert np.array_equal(np.asarray(ref.spectrum["fe_max_pixel"]), np.asarray(other.spectrum["fe_max_pixel"]))
    for key in ("frequency", "fe", "fap", "strain"):
        _close(ref.candidates[key], other.candidates[key], key)
    _close(ref.null_fe_max, other.null_fe_max, "null_fe_max")
    _close(ref.null_fp_max, other.null_fp_max, "null_fp_max")


def test_serial_threaded_processes_and_dask_agree(array, tmp_path, monkeypatch):
    import numba
    from distributed import LocalCluster

    monkeypatch.setattr(scan, "FREQUENCIES_PER_TASK", 100)    # several chunks on this small grid
    threads = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        serial = _run(array, tmp_path, "serial")
    finally:
        numba.set_num_threads(threads)
    assert serial.frequencies.size > 100                       # really split into chunks below
    threaded = _run(array, tmp_path, "threaded")
    processes = _run(array, tmp_path, "processes", workers=2)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=":0",
                      silence_logs=40) as cluster:
        dask = _run(array, tmp_path, "dask", scheduler=cluster.scheduler_address)
    for other in (threaded, processes, dask):
        _assert_same(serial, other)


def test_no_pixel_frequency_pulsar_array(array, monkeypatch):
    """fe_sky works in frequency chunks: no product of the sky kernel has N_pix x N_freq x N_psr elements."""
    from cwsearch.physics import fstat
    from cwsearch.physics.noise import NoiseWeighting

    freqs = scan.frequency_grid(array, fmax=2.5e-7)
    _, _, fplus, fcross = scan.sky_grid(array, 4)
    proj = fstat.project(NoiseWeighting(array), freqs)
    n_pix, n_psr = fplus.shape
    biggest = []
    real_matmul = np.matmul

    def watch(a, b, *args, **kwargs):
        out = real_matmul(a, b, *args, **kwargs)
        biggest.append(np.asarray(out).size)
        return out

    monkeypatch.setattr(np, "matmul", watch)
    fstat.fe_sky(proj, fplus, fcross, keep_map=False, chunk_elements=n_pix * 13 * 8)
    # the chunked pulsar sums are (2 or 3 N_pix) x (a few frequencies): far below N_pix x N_freq x N_psr
    assert max(biggest, default=0) <= 3 * n_pix * 3 * 8 < n_pix * freqs.size * n_psr
