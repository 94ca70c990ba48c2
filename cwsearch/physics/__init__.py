"""Floor 2, the physics: the signal, the noise and the statistics built from them.

``waveform`` (antenna patterns, Earth/pulsar-term residuals, frequency
evolution, strain <-> chirp mass/distance), ``sky`` (HEALPix grids),
``noise`` (:class:`NoiseWeighting`, the noise engine: the only place a
covariance is inverted), ``fstat`` (Fe/Fp-statistics and the frequency
grid), ``linalg`` (the one LDLᵀ helper of the small symmetric systems),
``relations`` (galaxy scaling relations) and ``simulate`` (invented arrays,
noise draws, injections).

Numba style, for every kernel of the package (here and in the floors above):
``@njit(cache=True)`` always (compiled code is cached on disk), no explicit
type signatures (compiled lazily at the first call, for the types met),
``parallel=True`` only on kernels with a ``prange`` loop, ``nogil=True`` on
kernels run from threads, ``inline="always"`` on the tiny scalar helpers,
and ``fastmath=True`` only where a kernel says so in its docstring.
"""

__all__: list = []
