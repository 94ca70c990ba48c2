"""Shared test fixtures: a tiny simulated array and a dataset folder written from it.

Both are invented data for exercising code paths; they are never check values.
"""

from __future__ import annotations

import numpy as np
import pytest


def make_tiny_array(seed=11, n_pulsars=3, toas=40):
    """A tiny invented array (3 pulsars x 40 TOAs, 6 yr) with red noise, white-noise factors and a
    ``design_*`` column on the last pulsar, and simulated residuals."""
    from cwsearch.data.model import Array, Pulsar
    from cwsearch.physics.simulate import invented_array, simulated_array

    arr = invented_array(n_pulsars=n_pulsars, years=6, seed=seed, toas_per_pulsar=toas, red_noise_fraction=0.5)
    first = arr[0]
    first.noise.sigma_scale[first.backend_names[0]] = 1.3
    first.noise.sigma_added[first.backend_names[0]] = 2.5e-7
    last = arr[-1]
    rng = np.random.default_rng(seed)
    extra = rng.normal(size=(last.n_toas, 1))
    last = Pulsar(last.name, ra=last.ra, dec=last.dec, distance=last.distance, distance_err=last.distance_err,
                  mjd=last.mjd, residuals=last.residuals, sigmas=last.sigmas, backends=last.backends,
                  extra_design=extra, extra_design_names=("design_dmx1",), noise=last.noise)
    arr = Array(list(arr)[:-1] + [last])
    return simulated_array(arr, seed=seed + 1)


@pytest.fixture(scope="session")
def tiny_array():
    """Session-wide tiny array (do not modify it in tests)."""
    return make_tiny_array()


@pytest.fixture
def dataset_dir(tmp_path, tiny_array):
    """A fresh dataset folder written from :func:`tiny_array` (safe to modify)."""
    from cwsearch.data.dataset import write_dataset

    path = tmp_path / "data"
    write_dataset(tiny_array, path)
    return path
