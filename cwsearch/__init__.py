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
Stages (each: ``<Stage>Options`` and ``run_<stage>(array, run_dir, options, ...)``)
    scan: :class:`ScanOptions`, :func:`run_scan` (``cwsearch.scan``, on ``cwsearch.fstat``);
    follow-up: :class:`Likelihood`, :class:`FollowupOptions`, :func:`run_followup`
    (``cwsearch.likelihood``, ``cwsearch.sampling``, ``cwsearch.followup``);
    hosts: :func:`read_catalog`, :class:`HostsOptions`, :func:`run_hosts`
    (``cwsearch.catalog``, ``cwsearch.relations``, ``cwsearch.hosts``);
    limits: :class:`LimitsOptions`, :func:`run_limits` (``cwsearch.limits``, ``cwsearch.execution``).
Whole job
    :func:`load_config`, :func:`run_pipeline` (``cwsearch.config``, ``cwsearch.pipeline``,
    ``cwsearch.report``).

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
    "read_dataset": "dataset", "write_dataset": "dataset", "dataset_checksum": "dataset",
    "NoiseWeighting": "noise", "NoiseSettings": "noise",
    "invented_array": "simulate", "simulate_residuals": "simulate", "Binary": "simulate",
    "InputError": "errors",
    "ScanOptions": "scan", "run_scan": "scan",
    "Likelihood": "likelihood", "FollowupOptions": "followup", "run_followup": "followup",
    "read_catalog": "catalog", "HostsOptions": "hosts", "run_hosts": "hosts",
    "LimitsOptions": "limits", "run_limits": "limits",
    "load_config": "config", "run_pipeline": "pipeline",
}

__all__ = sorted(_LAZY) + ["__version__"]


def __getattr__(name):
    if name in _LAZY:
        return getattr(import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'cwsearch' has no attribute {name!r}")


def __dir__():
    return __all__
