"""cwsearch: search pulsar-timing residuals for individual supermassive black-hole binaries.

Public API (imported lazily, so ``import cwsearch`` is cheap):

Data and I/O
    :class:`Pulsar`, :class:`Array` (``cwsearch.data.model``);
    :func:`read_dataset`, :func:`write_dataset` (``cwsearch.data.dataset``).
Physics
    ``cwsearch.physics.waveform``: antenna patterns, Earth/pulsar-term residuals,
    strain <-> chirp mass/distance, time to coalescence.
Noise weighting
    :class:`NoiseWeighting`, :class:`NoiseSettings` (``cwsearch.physics.noise``): the
    only place a covariance is inverted; inner products ``(x|y)``.
Simulation
    :func:`invented_array`, :func:`simulate_residuals`, :class:`Binary`
    (``cwsearch.physics.simulate``).
Stages (each: ``<Stage>Options`` and ``run_<stage>(array, run_dir, options, ...)``)
    scan: :class:`ScanOptions`, :func:`run_scan` (``cwsearch.stages.scan.stage``, on ``cwsearch.physics.fstat``);
    follow-up: :class:`Likelihood`, :class:`FollowupOptions`, :func:`run_followup`
    (``cwsearch.inference.likelihood``, ``cwsearch.inference.sampling``, ``cwsearch.stages.followup.stage``);
    hosts: :func:`read_catalog`, :class:`HostsOptions`, :func:`run_hosts`
    (``cwsearch.data.catalog``, ``cwsearch.physics.relations``, ``cwsearch.stages.hosts.stage``);
    limits: :class:`LimitsOptions`, :func:`run_limits` (``cwsearch.stages.limits.stage``, ``cwsearch.inference.execution``).
Whole job
    :func:`load_config`, :func:`run_pipeline` (``cwsearch.job.config``, ``cwsearch.job.pipeline``,
    ``cwsearch.job.report``).

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
    "Pulsar": "data.model", "Array": "data.model", "PulsarNoise": "data.model",
    "read_dataset": "data.dataset", "write_dataset": "data.dataset", "dataset_checksum": "data.dataset",
    "NoiseWeighting": "physics.noise", "NoiseSettings": "physics.noise",
    "invented_array": "physics.simulate", "simulate_residuals": "physics.simulate", "Binary": "physics.simulate",
    "InputError": "core.errors",
    "ScanOptions": "stages.scan.stage", "run_scan": "stages.scan.stage",
    "Likelihood": "inference.likelihood", "FollowupOptions": "stages.followup.stage", "run_followup": "stages.followup.stage",
    "read_catalog": "data.catalog", "HostsOptions": "stages.hosts.stage", "run_hosts": "stages.hosts.stage",
    "LimitsOptions": "stages.limits.stage", "run_limits": "stages.limits.stage",
    "load_config": "job.config", "run_pipeline": "job.pipeline",
}

__all__ = sorted(_LAZY) + ["__version__"]


def __getattr__(name):
    if name in _LAZY:
        return getattr(import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'cwsearch' has no attribute {name!r}")


def __dir__():
    return __all__
