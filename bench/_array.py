"""The benchmark array of docs/design.md §12, shared by every benchmark.

50 invented pulsars × 1000 TOAs over 15 years, each with power-law red
noise on 30 Fourier pairs, plus a common red process (γ = 13/3) that is
both simulated (Hellings–Downs correlated) and included in the noise model.

Examples
--------
>>> from bench._array import bench_array
>>> array, noise = bench_array(n_pulsars=3, toas_per_pulsar=100)
>>> len(array), noise.red_components
(3, 30)
"""

from __future__ import annotations

from cwsearch.physics.noise import NoiseSettings
from cwsearch.physics.simulate import invented_array, simulated_array

#: log10 amplitude of the common process in the bench array (a background of the size seen by PTAs)
COMMON_LOG10_AMPLITUDE = -14.6
COMMON_INDEX = 13.0 / 3.0
RED_COMPONENTS = 30


def bench_array(n_pulsars=50, toas_per_pulsar=1000, years=15.0, seed=2026):
    """Return ``(array, noise_settings)`` for the benchmark array.

    Deterministic for a given ``seed``. The noise settings use 30 Fourier
    frequencies for per-pulsar red noise and the common process, so each
    pulsar's Woodbury rank is 5 timing-model columns + 60 Fourier columns.
    """
    base = invented_array(n_pulsars=n_pulsars, years=years, seed=seed, toas_per_pulsar=toas_per_pulsar,
                          red_noise_fraction=1.0, full_span=True)
    array = simulated_array(base, seed=seed + 1, background_log10_amplitude=COMMON_LOG10_AMPLITUDE,
                            background_index=COMMON_INDEX, background_components=RED_COMPONENTS)
    noise = NoiseSettings(red_components=RED_COMPONENTS, pulsar_red_noise=True,
                          common_log10_amplitude=COMMON_LOG10_AMPLITUDE, common_index=COMMON_INDEX)
    return array, noise
