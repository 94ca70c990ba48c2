"""Floor 3, the inference: the likelihood, the sampler and the task runner.

``likelihood`` (the fast continuous-wave likelihood, pulsar phases
marginalised), ``sampling`` (the parallel-tempered ptemcee wrapper:
vectorised pool, checkpoints, evidence) and ``execution`` (the task runner:
local processes or a Dask cluster).
"""

__all__: list = []
