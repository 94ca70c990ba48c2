"""The binary signal a follow-up posterior implies at every TOA: posterior draws and their pointwise median.

Shared by the follow-up's residuals figure (``stages/followup/plots.py``) and the pipeline's
subtract-and-rescan rounds (``job/rounds.py``, docs/design.md §14), which subtracts the posterior-median
signal of a confirmed source from the residuals before the next scan.

Each posterior draw is a full Earth + pulsar-term signal (:func:`cwsearch.physics.waveform.residual_basis`
times :func:`cwsearch.physics.waveform.basis_coefficients`). When the posterior table carries every pulsar's
``distance_NAME`` [kpc] and ``pulsar_phase_NAME`` [rad] (the follow-up's ``posterior.ecsv``: sampled or
catalogue distances, coherent or conditionally drawn phases), each draw uses its own row's values. Otherwise
(an older posterior file) the pulsar-term phases, which the likelihood marginalises (docs/design.md §7), are
drawn here from their conditional posterior given the draw's eight parameters: each pulsar's own likelihood
on a grid of :data:`PHASE_POINTS` phases over [0, π) (uniform prior), at the catalogue distances; for a
Hellings–Downs background the cross-pulsar terms are left out of this one step.
Every signal passes through the pulsar's timing-model fit (:func:`cwsearch.physics.simulate.postfit`), as
the residuals did.

Examples
--------
>>> import numpy as np
>>> from astropy.table import Table
>>> from cwsearch.physics.simulate import invented_array, simulated_array
>>> from cwsearch.inference.likelihood import Likelihood
>>> from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
>>> arr = simulated_array(invented_array(n_pulsars=3, years=5, seed=1, toas_per_pulsar=40), seed=2)
>>> like = Likelihood(arr, NoiseWeighting(arr, NoiseSettings()))
>>> post = Table({"ra": [30.0, 31.0], "dec": [10.0, 11.0], "frequency": [2e-8, 2e-8], "chirp_mass": [1e9, 1e9],
...               "strain": [1e-14, 1e-14], "inclination": [0.5, 0.5], "polarization": [0.3, 0.3],
...               "phase": [1.0, 1.0]})
>>> [s.shape for s in median_signal(like, arr, post, seed=1)] == [(p.n_toas,) for p in arr]
True
"""

from __future__ import annotations

import numpy as np

from ..physics import waveform
from ..physics.simulate import postfit

#: posterior draws behind the median signal and its 90 % band (the residuals figure, the subtraction)
RESIDUAL_DRAWS = 100
#: points of the pulsar-phase grid the conditional pulsar phases are drawn on (the phase has period π)
PHASE_POINTS = 64
#: the posterior columns a draw needs (degrees, Hz, Msun, rad)
DRAW_COLUMNS = ("ra", "dec", "frequency", "chirp_mass", "strain", "inclination", "polarization", "phase")


def draw_pulsar_phase(coeffs_of, dvec, gmat, rng):
    """One draw of a pulsar-term phase from exp(ln Λ_p(χ)) on a grid over [0, π) (uniform prior).

    ``coeffs_of(phases) -> (K, 4)`` basis coefficients, ``dvec`` = (d|b_j), ``gmat`` = (b_i|b_j) of the pulsar.
    """
    grid = (np.arange(PHASE_POINTS) + 0.5) * np.pi / PHASE_POINTS
    c = coeffs_of(grid)                                   # (K, 4)
    log_like = c @ dvec - 0.5 * np.einsum("ki,ij,kj->k", c, gmat, c)
    w = np.exp(log_like - log_like.max())
    k = rng.choice(PHASE_POINTS, p=w / w.sum())
    return grid[k] + rng.uniform(-0.5, 0.5) * np.pi / PHASE_POINTS


def signal_draws(likelihood, array, table, n_draws=RESIDUAL_DRAWS, seed=0):
    """Binary signals [s] at every pulsar's TOAs for ``n_draws`` posterior samples of ``table``
    (the follow-up posterior, degrees/Hz/Msun/rad): a list (one per pulsar) of arrays (draws, TOAs),
    after the pulsar's timing-model fit. Pulsar phases as in the module docstring. ``likelihood`` is the
    follow-up's (:func:`cwsearch.inference.correlated_likelihood.likelihood_for`) on ``array``'s data."""
    rng = np.random.default_rng(seed)
    n = len(table)
    pick = rng.choice(n, size=min(n_draws, n), replace=False) if n else np.zeros(0, dtype=int)
    col = {name: np.asarray(table[name], dtype=float)[pick] for name in DRAW_COLUMNS}
    ra, dec = np.radians(col["ra"]), np.radians(col["dec"])
    out = [np.empty((pick.size, p.n_toas)) for p in array]
    if not pick.size:
        return out
    pulsar_term = bool(likelihood.pulsar_term)
    own = pulsar_term and all(f"pulsar_phase_{p.name}" in table.colnames and f"distance_{p.name}" in table.colnames
                              for p in array)
    if own:
        own_phase = np.column_stack([np.asarray(table[f"pulsar_phase_{p.name}"], dtype=float)[pick] for p in array])
        own_distance = np.column_stack([np.asarray(table[f"distance_{p.name}"], dtype=float)[pick] for p in array])
        own = bool(np.all(np.isfinite(own_phase)) and np.all(own_distance > 0))
    if own:
        fp_all, fc_all, odp = waveform.antenna_pattern(ra, dec, array.positions)
        for k in range(pick.size):
            fp, fc = fp_all[k], fc_all[k]
            for i, p in enumerate(array):
                basis, _ = waveform.residual_basis(p.toas, likelihood.reference_time, col["frequency"][k],
                                                   col["chirp_mass"][k], own_distance[k, i], odp[k, i],
                                                   likelihood.evolution)
                coeffs = waveform.basis_coefficients(col["strain"][k], col["inclination"][k], col["polarization"][k],
                                                     col["phase"][k], own_phase[k, i], fp[i], fc[i], True)
                out[i][k] = postfit(p, basis @ np.ravel(coeffs))
        return out
    # per-pulsar products (d|b_j), (b_i|b_j) of every draw at once: the sampler's batched path
    fplus, fcross, dvec, gmat = likelihood.shape_batch(ra, dec, col["frequency"], col["chirp_mass"])
    _, _, odp = waveform.antenna_pattern(ra, dec, array.positions)
    for k in range(pick.size):
        for i, p in enumerate(array):
            basis, _ = waveform.residual_basis(p.toas, likelihood.reference_time, col["frequency"][k],
                                               col["chirp_mass"][k], p.distance, odp[k, i], likelihood.evolution)

            def coeffs_of(pulsar_phase, i=i):
                return np.atleast_2d(waveform.basis_coefficients(
                    col["strain"][k], col["inclination"][k], col["polarization"][k], col["phase"][k],
                    pulsar_phase, fplus[k, i], fcross[k, i], pulsar_term))

            chi = draw_pulsar_phase(coeffs_of, dvec[k, i], gmat[k, i], rng) if pulsar_term else 0.0
            out[i][k] = postfit(p, basis @ coeffs_of(chi)[0])
    return out


def median_signal(likelihood, array, table, n_draws=RESIDUAL_DRAWS, seed=0):
    """The pointwise posterior-median signal [s] per pulsar (list of arrays, one value per TOA) of
    :func:`signal_draws` (zeros for an empty posterior)."""
    draws = signal_draws(likelihood, array, table, n_draws=n_draws, seed=seed)
    return [np.median(d, axis=0) if d.shape[0] else np.zeros(d.shape[1]) for d in draws]


__all__ = ["RESIDUAL_DRAWS", "PHASE_POINTS", "DRAW_COLUMNS", "draw_pulsar_phase", "signal_draws", "median_signal"]
