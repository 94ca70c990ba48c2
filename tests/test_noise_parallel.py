"""The per-pulsar noise fits give the same numbers in this process and on local worker processes.

Where a task runs must not change a result (common practice, no source): the fits are deterministic and each
pulsar's random stream is drawn before the tasks are sent. Tolerance 1e-10 relative (the same code on the
same machine; a stated tolerance, not bit equality). The invented array is an input, not a check value.
"""

from __future__ import annotations

import numpy as np

from cwsearch.inference.execution import TaskRunner
from cwsearch.inference.noisefit import FitSettings, fit_noise
from cwsearch.physics.simulate import invented_array, simulate_residuals


def test_serial_and_worker_processes_fit_the_same_noise_model():
    base = invented_array(n_pulsars=4, years=10, seed=3, toas_per_pulsar=120, red_noise_fraction=0.5,
                          full_span=True)
    array = base.with_residuals(simulate_residuals(base, seed=4, background_log10_amplitude=-14.3,
                                                   background_components=10))
    settings = FitSettings(red_components=10, n_starts=4, upper_limits=False)   # 4 starts: the random one is used
    serial = fit_noise(array, settings, seed=9)
    with TaskRunner(workers=2) as runner:
        parallel = fit_noise(array, settings, seed=9, runner=runner)
    assert serial.evaluations == parallel.evaluations
    for a, b in zip(serial.pulsars, parallel.pulsars):
        assert a.red_noise == b.red_noise
        np.testing.assert_allclose([a.red_log10_amplitude, a.red_index, *a.sigma_scale.values()],
                                   [b.red_log10_amplitude, b.red_index, *b.sigma_scale.values()], rtol=1e-10)
    np.testing.assert_allclose(serial.common.log10_amplitude, parallel.common.log10_amplitude, rtol=1e-10)
