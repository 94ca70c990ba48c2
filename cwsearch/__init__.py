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
Stages (registry ``cwsearch.stages.STAGES``; each stage package exports ``Options``,
``run(array, run_dir, options, *, noise=None, seed=0, progress=True)`` and its old names)
    scan: :class:`ScanOptions`, :func:`run_scan` (``cwsearch.stages.scan``, on ``cwsearch.physics.fstat``);
    follow-up: :class:`Likelihood`, :class:`FollowupOptions`, :func:`run_followup`
    (``cwsearch.inference.likelihood``, ``cwsearch.inference.sampling``, ``cwsearch.stages.followup``);
    hosts: :func:`read_catalog`, :class:`HostsOptions`, :func:`run_hosts`
    (``cwsearch.data.catalog``, ``cwsearch.physics.relations``, ``cwsearch.stages.hosts``);
    limits: :class:`LimitsOptions`, :func:`run_limits` (``cwsearch.stages.limits``, ``cwsearch.inference.execution``).
Whole job
    :func:`load_config`, :func:`run_pipeline` (``cwsearch.job.config``, ``cwsearch.job.pipeline``,
    ``cwsearch.job.runfolder``, ``cwsearch.job.report``).

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
    "ScanOptions": "stages.scan", "run_scan": "stages.scan",
    "Likelihood": "inference.likelihood", "FollowupOptions": "stages.followup", "run_followup": "stages.followup",
    "read_catalog": "data.catalog", "HostsOptions": "stages.hosts", "run_hosts": "stages.hosts",
    "LimitsOptions": "stages.limits", "run_limits": "stages.limits",
    "load_config": "job.config", "run_pipeline": "job.pipeline",
}

__all__ = sorted(_LAZY) + ["__version__"]


def __getattr__(name):
    if name in _LAZY:
        return getattr(import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'cwsearch' has no attribute {name!r}")


def __dir__():
    return __all__
