"""Published scaling relations used to turn a galaxy into an expected binary.

Black-hole mass from bulge mass, stellar mass from K-band luminosity, the
chirp-mass prior implied by a black-hole mass and a mass-ratio prior, and
luminosity distance from redshift (Planck 2018 cosmology).

Sources (the numerical coefficients below were written **from memory** and
should be verified against the papers before relying on them; the tests
check the code against these same stated values):

* McConnell & Ma 2013, ApJ 764, 184 — bulge-mass relation
  ``log10 M_BH = 8.46 + 1.05 log10(M_bulge / 1e11 Msun)``, intrinsic
  scatter 0.34 dex.
* Kormendy & Ho 2013, ARA&A 51, 511 — ``M_BH = 0.49e9 Msun
  (M_bulge / 1e11 Msun)^1.16``, intrinsic scatter about 0.29 dex.
* Cappellari 2013, ApJL 778, L2 — K-band mass proxy
  ``log10 M* ≈ 10.58 − 0.44 (M_K + 23)``. The scatter used with it here
  (0.1 dex) is our assumption, not a quoted value.
* Planck Collaboration 2020, A&A 641, A6 (Planck 2018 VI) — cosmology, via
  :data:`astropy.cosmology.Planck18`.

Conventions (our assumptions, stated in the README (Host galaxies)):

* The black-hole mass from a relation is taken as the **total** mass
  ``m1 + m2`` of the binary.
* A stellar mass is taken as the bulge mass (massive early-type hosts are
  bulge dominated); this adds no extra scatter beyond the proxy's own.
* A catalogued ``log10_bh_mass`` is used directly, with 0.1 dex uncertainty
  (assumption).
* Mass ratio ``q = m2/m1`` is log-uniform in ``[q_min, 1]`` (default
  ``q_min = 0.1``); the chirp mass is ``M q^(3/5) / (1+q)^(6/5)``
  (:func:`cwsearch.physics.waveform.chirp_mass_from_masses`).

Examples
--------
>>> from cwsearch.physics.relations import RELATIONS
>>> mu, sigma = RELATIONS["mcconnell-ma"].log10_bh_mass(11.0)
>>> round(float(mu), 2), sigma
(8.46, 0.34)
>>> round(float(luminosity_distance(0.01)), 1)    # Mpc, Planck18
44.6
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ..data.catalog import MASS_PROXIES
from ..data.cosmology import luminosity_distance, redshift_at_distance
from .waveform import chirp_mass_from_masses
LN10 = np.log(10.0)

#: assumed uncertainty [dex] of a catalogued black-hole mass (no source; our choice)
BH_MASS_UNCERTAINTY_DEX = 0.1
#: assumed scatter [dex] of the K-band stellar-mass proxy (no source; our choice)
K_BAND_SCATTER_DEX = 0.1



@dataclass(frozen=True)
class BulgeRelation:
    """``log10 M_BH = intercept + slope (log10 M_bulge − pivot)`` with intrinsic scatter [dex]."""

    name: str
    intercept: float
    slope: float
    pivot: float
    scatter: float
    source: str

    def log10_bh_mass(self, log10_bulge_mass):
        """Mean log10 black-hole mass [Msun] and scatter [dex] for a log10 bulge mass [Msun]."""
        x = np.asarray(log10_bulge_mass, dtype=float)
        return self.intercept + self.slope * (x - self.pivot), self.scatter

    def total_mass_prior(self, proxy: str, values):
        """:func:`total_mass_prior` with this relation (what a catalogue calls, knowing no relation)."""
        return total_mass_prior(proxy, values, self)


#: McConnell & Ma 2013, ApJ 764, 184 (from memory): 8.46 + 1.05 log10(M_bulge/1e11), 0.34 dex
MCCONNELL_MA_2013 = BulgeRelation("mcconnell-ma", 8.46, 1.05, 11.0, 0.34,
                                  "McConnell & Ma 2013, ApJ 764, 184 (coefficients from memory)")
#: Kormendy & Ho 2013, ARA&A 51, 511 (from memory): 0.49e9 (M_bulge/1e11)^1.16, 0.29 dex
KORMENDY_HO_2013 = BulgeRelation("kormendy-ho", float(np.log10(0.49e9)), 1.16, 11.0, 0.29,
                                 "Kormendy & Ho 2013, ARA&A 51, 511 (coefficients from memory)")

RELATIONS = {r.name: r for r in (MCCONNELL_MA_2013, KORMENDY_HO_2013)}


def stellar_mass_from_k_band(k_abs_mag):
    """log10 stellar mass [Msun] from the K-band absolute magnitude (Cappellari 2013, from memory).

    ``log10 M* ≈ 10.58 − 0.44 (M_K + 23)``.

    >>> float(stellar_mass_from_k_band(-23.0))
    10.58
    """
    return 10.58 - 0.44 * (np.asarray(k_abs_mag, dtype=float) + 23.0)


def total_mass_prior(proxy: str, values, relation: BulgeRelation = MCCONNELL_MA_2013):
    """Mean and standard deviation of log10 total black-hole mass [Msun] from a mass proxy.

    ``proxy`` is one of :data:`MASS_PROXIES`. Returns two arrays shaped like
    ``values``. Scatters add in quadrature.
    """
    v = np.asarray(values, dtype=float)
    if proxy == "log10_bh_mass":
        return v, np.full_like(v, BH_MASS_UNCERTAINTY_DEX)
    if proxy == "log10_bulge_mass":
        mu, s = relation.log10_bh_mass(v)
        return mu, np.full_like(v, s)
    if proxy == "log10_stellar_mass":
        mu, s = relation.log10_bh_mass(v)   # stellar mass taken as bulge mass (assumption)
        return mu, np.full_like(v, s)
    if proxy == "k_abs_mag":
        mu, s = relation.log10_bh_mass(stellar_mass_from_k_band(v))
        scatter = np.hypot(s, relation.slope * K_BAND_SCATTER_DEX)
        return mu, np.full_like(v, scatter)
    raise ValueError(f"unknown mass proxy {proxy!r}")


# --------------------------------------------------------------- chirp-mass prior
@dataclass(frozen=True)
class MassRatioPrior:
    """Log-uniform mass ratio ``q = m2/m1`` in ``[q_min, 1]``, integrated on a midpoint grid in ln q."""

    q_min: float = 0.1
    n_grid: int = 256

    def chirp_mass_offsets(self):
        """``ln(Mc / M_total)`` on the q grid and the grid weights (sum 1)."""
        if self.q_min >= 1.0:
            q = np.array([1.0])
        else:
            edges = np.linspace(np.log(self.q_min), 0.0, self.n_grid + 1)
            q = np.exp(0.5 * (edges[1:] + edges[:-1]))
        offsets = np.log(chirp_mass_from_masses(1.0 / (1.0 + q), q / (1.0 + q)))
        return np.atleast_1d(offsets), np.full(q.size, 1.0 / q.size)


@lru_cache(maxsize=32)
def _offset_table(sigma_ln: float, q_min: float, n_grid: int):
    offsets, weights = MassRatioPrior(q_min, n_grid).chirp_mass_offsets()
    lo, hi = offsets.min() - 9 * sigma_ln, offsets.max() + 9 * sigma_ln
    x = np.linspace(lo, hi, 4001)
    z = (x[:, None] - offsets[None, :]) / sigma_ln
    dens = (np.exp(-0.5 * z**2) / (np.sqrt(2 * np.pi) * sigma_ln)) @ weights
    return x, dens


def chirp_mass_log_density(ln_chirp_mass, log10_total_mass, sigma_dex, *, ln_redshift_factor=0.0,
                           mass_ratio=MassRatioPrior()):
    """Prior density of ``ln Mc`` (per unit ln Mc) implied by a total-mass prior and a mass-ratio prior.

    ``ln M_total ~ Normal(log10_total_mass · ln10, sigma_dex · ln10)``, ``q``
    from ``mass_ratio``; ``Mc = M_total q^(3/5)/(1+q)^(6/5)`` in the source
    frame, and the observed chirp mass is ``(1+z)`` times that:
    pass ``ln_redshift_factor = ln(1+z)`` to get the observed-frame density.
    All arguments broadcast; ``sigma_dex`` must be one number.

    >>> import numpy as np
    >>> x = np.linspace(10, 30, 20001)
    >>> round(float(np.trapezoid(chirp_mass_log_density(x, 9.0, 0.34), x)), 4)
    1.0
    """
    sigma_ln = float(sigma_dex) * LN10
    grid, dens = _offset_table(round(sigma_ln, 12), float(mass_ratio.q_min), int(mass_ratio.n_grid))
    u = np.asarray(ln_chirp_mass, dtype=float) - ln_redshift_factor - np.asarray(log10_total_mass) * LN10
    return np.interp(u, grid, dens, left=0.0, right=0.0)


def chirp_mass_offset_table(sigma_dex, mass_ratio=MassRatioPrior()):
    """Tabulated density of ``u = ln Mc − ln M̄`` on a uniform grid: ``(grid, density)``.

    ``M̄`` is the median total mass (``ln M_total ~ Normal(ln M̄, σ)``).
    :func:`chirp_mass_log_density` interpolates this table.
    """
    return _offset_table(round(float(sigma_dex) * LN10, 12), float(mass_ratio.q_min), int(mass_ratio.n_grid))


def population_chirp_mass_table(log10_total_mass, sigma_dex, mass_ratio=MassRatioPrior(), step=0.01):
    """Density of source-frame ``ln Mc`` for a galaxy drawn at random from a population.

    ``log10_total_mass`` and ``sigma_dex``: per-galaxy mean and scatter of
    log10 total black-hole mass (e.g. a whole catalogue). Each galaxy
    contributes its own chirp-mass prior (:func:`chirp_mass_log_density`);
    the mixture is built by histogramming the means on a uniform grid of
    ``step`` in ln Mc and convolving with each scatter's kernel, so it is
    fast for millions of galaxies. Returns ``(grid, density)``.

    >>> import numpy as np
    >>> x, p = population_chirp_mass_table(np.array([8.0, 9.0]), np.array([0.34, 0.34]))
    >>> round(float(np.trapezoid(p, x)), 3)
    1.0
    """
    mu_ln = np.asarray(log10_total_mass, dtype=float) * LN10
    sig = np.asarray(sigma_dex, dtype=float)
    grids = {float(s): chirp_mass_offset_table(s, mass_ratio) for s in np.unique(sig)}
    lo = mu_ln.min() + min(g[0][0] for g in grids.values())
    hi = mu_ln.max() + max(g[0][-1] for g in grids.values())
    n = int(np.ceil((hi - lo) / step)) + 1
    grid = lo + step * np.arange(n)
    total = np.zeros(n)
    for s, (kx, kd) in grids.items():
        sel = sig == s
        counts = np.bincount(np.clip(np.rint((mu_ln[sel] - mu_ln.min()) / step).astype(np.int64), 0, None),
                             minlength=1).astype(float)
        k0 = int(np.floor(kx[0] / step))
        kgrid = step * np.arange(k0, int(np.ceil(kx[-1] / step)) + 1)
        kern = np.interp(kgrid, kx, kd, left=0.0, right=0.0)
        conv = np.convolve(counts, kern)            # index j <-> mu_min + step*(j + k0)
        start = int(np.rint((mu_ln.min() + step * k0 - lo) / step))
        end = min(start + conv.size, n)
        total[max(start, 0):end] += conv[max(-start, 0):end - start]
    total /= mu_ln.size
    return grid, total


__all__ = ["MASS_PROXIES", "luminosity_distance", "redshift_at_distance", 
    "LN10", "BH_MASS_UNCERTAINTY_DEX", "K_BAND_SCATTER_DEX", "BulgeRelation", "MCCONNELL_MA_2013",
    "KORMENDY_HO_2013", "RELATIONS", "stellar_mass_from_k_band", "total_mass_prior", "MassRatioPrior",
    "chirp_mass_log_density", "chirp_mass_offset_table", "population_chirp_mass_table",
]
