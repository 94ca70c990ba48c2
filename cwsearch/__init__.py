"""cwsearch: search pulsar-timing residuals for individual supermassive black-hole binaries.

Public API (imported lazily, so ``import cwsearch`` is cheap):

Data and I/O
    :class:`Pulsar`, :class:`Array` (``cwsearch.model``);
    :func:`read_dataset`, :func:`write_dataset` (``cwsearch.dataset``).
Physics
    ``cwsearch.waveform``: antenna patterns, Earth/pulsar-term residuals,
    strain <-> chirp mass/distance, time to coalescence.
Noise weighting
    :class:`NoiseWeighting`, :class:`NoiseSettings` (``cwsearch.noise``): the
    only place a covariance is inverted; inner products ``(x|y)``.
Simulation
    :func:`invented_array`, :func:`simulate_residuals`, :class:`Binary`
    (``cwsearch.simulate``).
Stages
    ``cwsearch.fstat`` (F-statistics), ``cwsearch.scan``, ``cwsearch.likelihood``,
    ``cwsearch.sampling``, ``cwsearch.limits``, ``cwsearch.hosts``.

Example
-------
>>> import cwsearch
>>> arr = cwsearch.invented_array(n_pulsars=4, years=10, seed=1)
>>> len(arr)
4
"""

from importlib import import_module

__version__ = "0.1.0"

_LAZY = {
    "Pulsar": "model", "Array": "model", "PulsarNoise": "model",
    "read_dataset": "dataset", "write_dataset": "dataset",
    "NoiseWeighting": "noise", "NoiseSettings": "noise",
    "invented_array": "simulate", "simulate_residuals": "simulate", "Binary": "simulate",
    "InputError": "errors",
}

__all__ = sorted(_LAZY) + ["__version__"]


def __getattr__(name):
    if name in _LAZY:
        return getattr(import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'cwsearch' has no attribute {name!r}")


def __dir__():
    return __all__
