"""Host-galaxy crossmatch: which catalogued galaxy could host a candidate binary?

Method (``docs/design.md`` §10, the README (Host galaxies))
---------------------------------------------------------------
For each galaxy *g* the Bayes factor of "the binary lives in *g*" against
the search prior is the posterior average of the prior ratio,

    B_g = E_posterior[ π_g(θ) / π_search(θ) ],

evaluated by reweighting the posterior samples θ_i = (sky, f, Mc, h0):

* **sky** — the δ-function at the galaxy is replaced by a von Mises–Fisher
  kernel (kernel density on the sphere) with Scott's-rule bandwidth
  ``h = σ n^(−1/6)`` from the samples' angular spread; the isotropic search
  prior has density 1/4π.
* **distance** — the implied luminosity distance of each sample,
  :func:`cwsearch.physics.waveform.luminosity_distance_for_strain` (observed-frame
  frequency and chirp mass, so no redshift correction is needed there),
  against the galaxy distance: log-normal with the catalogue's distance
  error. The search prior is log-uniform in h0, so the ratio is that
  density in ln d over the constant prior density in ln h0.
* **mass** — the observed chirp mass against the galaxy's expected one:
  black-hole (total) mass from a published relation with its scatter, a
  log-uniform mass ratio, times (1+z) for the observed frame
  (:mod:`cwsearch.physics.relations`), over the log-uniform search prior.
* **period** — for galaxies with a claimed EM period: the observed orbital
  period ``2/f_gw`` (times ``period_factor``; 1 means the EM period *is*
  the orbital period) against ``period ± period_err``, over the log-uniform
  frequency prior.
* **coalescence** — samples whose time to coalescence
  (:func:`cwsearch.physics.waveform.time_to_coalescence`) is shorter than the
  observed span get weight 0.

The five reported factors are a chain of conditional averages (each
conditional on the ones before it) that multiply to the Bayes factor
against an uncatalogued host (up to that host's coalescence fraction,
normally 1): ``sky_density`` (posterior/prior sky density at the galaxy),
``distance_consistency`` and ``mass_consistency`` (each relative to the same
factor for an uncatalogued host, so > 1 favours the galaxy),
``period_consistency`` and ``coalescence_ok``.

Normalisation: the host is a catalogue galaxy with prior probability
``completeness`` (spread evenly over the galaxies within the distance
limit), or an uncatalogued galaxy with ``1 − completeness``. An
uncatalogued host is isotropic on the sky, uniform in volume out to the
catalogue's distance limit, draws its black-hole mass from the catalogue's
own mass distribution (also used for catalogue galaxies without a mass
proxy), and has the search prior in frequency. The range constants of the
log-uniform strain and chirp-mass search priors cancel in the
probabilities.

Localisation: the follow-up posterior (``run_dir/followup/posterior.ecsv``
or one per candidate sub-folder) when there is one; otherwise a scan
candidate alone, with a coarse pseudo-posterior: sky from an Fe sky map
(``exp(Fe − Fe_max)``; a map file, or computed from the dataset at the
candidate frequency when the array is given), else a Fisher (vMF) blob of
``resolution`` degrees around the candidate; frequency uniform within one
bin 1/T; ln h0 normal around the maximum-likelihood strain with
σ = 1/ρ, ρ² = max(2Fe − 4, 1); chirp mass from the search prior. The
summary says which was used.

A host association is a probability under these assumptions, not an
identification.

Examples
--------
>>> from cwsearch.stages.hosts.stage import HostsOptions
>>> HostsOptions(catalog="catalogs/demo_galaxies.ecsv").completeness
0.5
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
from astropy.table import Table, vstack
from scipy.spatial import cKDTree
from scipy.special import logsumexp

from ...core.candidates import candidate_name, candidate_row
from ...core.constants import YEAR_SECONDS
from ...core.errors import InputError
from ...core.safeio import escape_text, read_input_text, require_finished
from ...core.fileio import write_json_atomic, write_table_atomic
from ...data.catalog import read_catalog
from ...data.healpix_fits import credible_area, probability_at, read_probability_map
from ...data.truth import injected_binary
from ...inference.noisefit import stage_noise_statement
from ...physics import fstat
from ...physics.correlated import array_noise
from ...physics.relations import (chirp_mass_offset_table, LN10, MassRatioPrior, population_chirp_mass_table,
                                  redshift_at_distance, RELATIONS)
from ...physics.sky import _healpix, pixel_centres, unit_vectors
from ...physics.waveform import luminosity_distance_for_strain, orbital_period, time_to_coalescence
from .options import HostsOptions  # the options live beside (standard library only)

#: search prior of the follow-up (docs/design.md §8): log-uniform chirp mass range [Msun]
SEARCH_CHIRP_MASS_RANGE = (1e7, 1e11)
#: log-uniform strain range assumed for the search prior (cancels in probabilities)
SEARCH_STRAIN_RANGE = (1e-18, 1e-11)
#: top of the search frequency band [Hz] (docs/design.md §6 default cap); the bottom is 1/T_span
SEARCH_FREQUENCY_MAX = 1e-6
#: observed span assumed when neither the array nor ``observed_span`` gives one [yr]
DEFAULT_SPAN_YEARS = 15.0
#: posterior columns needed
POSTERIOR_COLUMNS = ("ra", "dec", "frequency", "chirp_mass", "strain")
_LN4PI = math.log(4 * math.pi)


@dataclass
class Localisation:
    """Samples describing where and what the binary is (angles in rad, SI-ish units)."""

    label: str
    kind: str            # "posterior", "scan-fe-map" or "scan-fisher-blob"
    description: str
    source: str
    ra: np.ndarray
    dec: np.ndarray
    frequency: np.ndarray   # Hz, observed
    chirp_mass: np.ndarray  # Msun, observed frame
    strain: np.ndarray
    prior: dict | None = None  # search prior of the follow-up (from its summary.json), if known

    def __len__(self):
        return int(self.ra.size)

    def subsample(self, n, rng):
        if len(self) <= n:
            return self
        idx = np.sort(rng.choice(len(self), size=n, replace=False))
        return Localisation(self.label, self.kind, self.description + f"; random subset of {n} samples",
                            self.source, self.ra[idx], self.dec[idx], self.frequency[idx],
                            self.chirp_mass[idx], self.strain[idx], self.prior)


@dataclass
class CandidateHosts:
    """Host ranking for one localisation."""

    localisation: Localisation
    ranking: object          # astropy Table, rows inside the 99 % sky region, best first
    summary: dict
    kde: object = None
    galaxies: object = None  # Catalog of the scored galaxies
    scores: dict = None
    p_gal: object = None     # probability of each scored galaxy
    sky_map: tuple = None    # (nside, density map [1/sr], 90 % level, 99 % level)
    plots: list = field(default_factory=list)


@dataclass
class HostsResult:
    """Result of :func:`run_hosts`: combined ranking table, summary dict, per-candidate results."""

    ranking: object
    summary: dict
    candidates: list
    out_dir: Path


# ---------------------------------------------------------------- numba kernels
_KERNELS = {}


def _kernels():
    """Compile (or load from cache) the two numba kernels on first use."""
    if not _KERNELS:
        # lazy: a heavy import, loaded only when this runs
        from numba import njit, prange

        @njit(cache=True, parallel=True)
        def kernel_sums(queries, samples, kappa, out):
            for q in prange(queries.shape[0]):
                acc = 0.0
                for i in range(samples.shape[0]):
                    dot = (queries[q, 0] * samples[i, 0] + queries[q, 1] * samples[i, 1]
                           + queries[q, 2] * samples[i, 2])
                    acc += math.exp(kappa * (dot - 1.0))
                out[q] = acc

        @njit(cache=True, parallel=True)
        def score(samples, s_lnd, s_lnmc, s_period, s_logc, s_inv_h, s_inv_mc, s_inv_f, gal, g_lnd, g_sig,
                  g_tab, g_shift, g_per, g_perr, log_norm, kappa, period_factor,
                  tab_x0, tab_dx, tab_vals, tab_len, out):
            # Sums over samples of the chained weights, accumulated in linear space relative to fixed upper
            # bounds (no overflow; a galaxy whose weights all fall e^-700 below the bound gets -inf).
            # Samples more than 10 kernel widths from the galaxy (kernel < e^-50 of its peak) are skipped:
            # pre-selection guarantees one within 5 widths, whose kernel is >= e^-12.5.
            n = samples.shape[0]
            half_ln_2pi = 0.5 * math.log(2.0 * math.pi)
            max_inv_h = -np.inf
            for i in range(n):
                max_inv_h = max(max_inv_h, s_inv_h[i])
            mc_lin = np.empty(n)
            for i in range(n):
                mc_lin[i] = math.exp(s_inv_mc[i])
            for g in prange(gal.shape[0]):
                acc = np.zeros(6)
                ld0 = -math.log(g_sig[g]) - half_ln_2pi
                t = g_tab[g]
                has_period = g_per[g] > 0
                lp0 = -math.log(g_perr[g]) - half_ln_2pi if has_period else 0.0
                for i in range(n):
                    dot = gal[g, 0] * samples[i, 0] + gal[g, 1] * samples[i, 1] + gal[g, 2] * samples[i, 2]
                    lk = kappa * (dot - 1.0)
                    if lk < -50.0:
                        continue
                    z = (s_lnd[i] - g_lnd[g]) / g_sig[g]
                    e0 = math.exp(lk)
                    e1 = math.exp(lk - 0.5 * z * z + s_inv_h[i] - max_inv_h)
                    e2 = e1
                    if t >= 0:
                        u = (s_lnmc[i] - g_shift[g] - tab_x0[t]) / tab_dx[t]
                        j = int(math.floor(u))
                        if j < 0 or j >= tab_len[t] - 1:
                            e2 = 0.0
                        else:
                            fr = u - j
                            e2 = e1 * (tab_vals[t, j] * (1.0 - fr) + tab_vals[t, j + 1] * fr) * mc_lin[i]
                    e3 = e2
                    if has_period:
                        x = period_factor * s_period[i]
                        zp = (x - g_per[g]) / g_perr[g]
                        e3 = e2 * math.exp(-0.5 * zp * zp + lp0 + math.log(x) + s_inv_f[i])
                    e4 = e3 if s_logc[i] == 0.0 else 0.0
                    acc[0] += e0
                    acc[1] += e1
                    acc[2] += e2
                    acc[3] += e3
                    acc[4] += e4
                    acc[5] += e4 * e4
                ref_d = log_norm + ld0 + max_inv_h
                refs = (log_norm, ref_d, ref_d, ref_d, ref_d, 2.0 * ref_d)
                for k in range(6):
                    out[g, k] = refs[k] + math.log(acc[k]) if acc[k] > 0 else -np.inf

        _KERNELS["kernel_sums"] = kernel_sums
        _KERNELS["score"] = score
    return _KERNELS


# ---------------------------------------------------------------- sky kernel density
class SkyKernelDensity:
    """Kernel density on the sphere with a von Mises–Fisher kernel.

    ``density(ra, dec)`` [1/sr] = mean over samples of
    ``κ / (2π (1 − e^{−2κ})) · exp(κ (x_i·y − 1))``. Default bandwidth
    (``h = κ^{-1/2}`` rad): Scott's rule in two dimensions, ``σ n^(−1/6)``,
    with σ = κ̂^{-1/2} from the mean resultant length R̄ of the samples,
    ``κ̂ ≈ R̄ (3 − R̄²)/(1 − R̄²)`` (Banerjee et al. 2005, JMLR 6, 1345 —
    from memory). A multi-modal sky posterior inflates σ and so smooths
    more; pass ``bandwidth`` [rad] to override.

    >>> import math, numpy as np
    >>> kde = SkyKernelDensity(np.zeros(1), np.zeros(1), bandwidth=math.radians(1.0))
    >>> round(kde.density(0.0, 0.0) * 2 * math.pi * math.radians(1.0)**2, 3)   # peak 1/(2πh²)
    1.0
    """

    def __init__(self, ra, dec, bandwidth=None):
        self.vectors = np.ascontiguousarray(unit_vectors(np.atleast_1d(np.asarray(ra, float)),
                                                         np.atleast_1d(np.asarray(dec, float))))
        n = len(self.vectors)
        if bandwidth is None:
            r = min(float(np.linalg.norm(self.vectors.mean(axis=0))), 1 - 1e-12)
            kappa_hat = r * (3 - r * r) / (1 - r * r)
            sigma = 1.0 / math.sqrt(max(kappa_hat, 1e-12))
            bandwidth = min(sigma * n ** (-1.0 / 6.0), 0.5)
        self.bandwidth = float(bandwidth)
        self.kappa = 1.0 / self.bandwidth**2
        k = self.kappa
        self.log_norm = math.log(k / (2 * math.pi)) - math.log1p(-math.exp(-2 * k))
        self._tree = None

    @property
    def tree(self):
        if self._tree is None:

            self._tree = cKDTree(self.vectors)
        return self._tree

    def log_kernel(self, vectors):
        """ln kernel [1/sr] between each of ``vectors`` (G, 3) and each sample: (G, N)."""
        return self.log_norm + self.kappa * (np.asarray(vectors) @ self.vectors.T - 1.0)

    def log_density_vectors(self, vectors):
        """ln density [1/sr] at unit vectors (G, 3) (numba, parallel over points)."""
        q = np.ascontiguousarray(np.atleast_2d(vectors), dtype=float)
        sums = np.empty(len(q))
        _kernels()["kernel_sums"](q, self.vectors, self.kappa, sums)
        with np.errstate(divide="ignore"):
            return self.log_norm + np.log(sums) - math.log(len(self.vectors))

    def density(self, ra, dec):
        """Density [1/sr] at (ra, dec) [rad]."""
        v = unit_vectors(np.atleast_1d(ra), np.atleast_1d(dec))
        d = np.exp(self.log_density_vectors(v))
        return d if np.ndim(ra) else float(d[0])

    def near(self, vectors, n_bandwidths=5.0):
        """Boolean mask: within ``n_bandwidths`` kernel widths of some sample (vectorised, k-d tree)."""
        angle = min(n_bandwidths * self.bandwidth, math.pi)
        chord = 2 * math.sin(angle / 2)
        dist, _ = self.tree.query(np.asarray(vectors), k=1, distance_upper_bound=chord * (1 + 1e-9))
        return np.isfinite(dist)

    def credible_thresholds(self, levels, rng, max_points=4000):
        """Density values whose super-level sets hold each of ``levels`` of the probability.

        The ``1 − level`` quantiles of the density evaluated at (up to
        ``max_points`` of) the samples themselves: the standard
        highest-density-region estimate.
        """
        v = self.vectors
        if len(v) > max_points:
            v = v[rng.choice(len(v), size=max_points, replace=False)]
        logd = self.log_density_vectors(v)
        return [float(np.exp(np.quantile(logd, 1.0 - level))) for level in levels]

    def healpix_map(self, nside):
        """Density [1/sr] on a HEALPix RING grid (0 far from every sample)."""
        ra, dec = pixel_centres(nside)
        v = unit_vectors(ra, dec)
        out = np.zeros(len(v))
        near = self.near(v, 6.0)
        out[near] = np.exp(self.log_density_vectors(v[near]))
        return out


def sample_fisher(ra0, dec0, sigma, n, rng):
    """Draw ``n`` directions from a von Mises–Fisher distribution (κ = 1/σ², σ in rad) around (ra0, dec0)."""
    kappa = 1.0 / sigma**2
    u = rng.uniform(size=n)
    w = 1.0 + np.log(u + (1.0 - u) * np.exp(-2.0 * kappa)) / kappa   # cos of the angle from the centre
    phi = rng.uniform(0, 2 * np.pi, size=n)
    s = np.sqrt(np.clip(1 - w * w, 0, None))
    mu = unit_vectors(ra0, dec0)
    helper = np.array([0.0, 0.0, 1.0]) if abs(mu[2]) < 0.9 else np.array([1.0, 0.0, 0.0])
    e1 = np.cross(mu, helper)
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(mu, e1)
    x = w[:, None] * mu + s[:, None] * (np.cos(phi)[:, None] * e1 + np.sin(phi)[:, None] * e2)
    return np.remainder(np.arctan2(x[:, 1], x[:, 0]), 2 * np.pi), np.arcsin(np.clip(x[:, 2], -1, 1))


# ---------------------------------------------------------------- localisations
def _column_values(table, name, unit, path, positive=False):
    col = table[name]
    if getattr(col, "unit", None) is not None and unit is not None and str(col.unit) not in ("", "None"):
        try:
            values = np.asarray(col.quantity.to_value(unit), dtype=float)
        except Exception:
            raise InputError(f"unit '{col.unit}' cannot be converted to {unit}", file=path, column=name) from None
    else:
        values = np.asarray(col, dtype=float)
    mask = np.asarray(getattr(col, "mask", False))
    bad = np.flatnonzero((mask if mask.ndim else np.zeros(len(values), bool)) | ~np.isfinite(values)
                         | ((values <= 0) if positive else False))
    if bad.size:
        raise InputError(f"value {values[bad[0]]!r} is not {'a positive' if positive else 'a finite'} number",
                         file=path, row=int(bad[0]) + 1, column=name)
    return values


def read_posterior(path, label=None):
    """Posterior samples from a follow-up ``posterior.ecsv`` as a :class:`Localisation`."""
    path = Path(path)
    require_finished(path, path.parent / "summary.json", stage="follow-up", command="cwsearch followup")
    text = read_input_text(path, path.parent.parent, what="posterior")
    try:
        table = Table.read(text + "\n", format="ascii.ecsv")
    except Exception as exc:
        raise InputError(f"cannot read the posterior: {str(exc).splitlines()[0] if str(exc) else exc}",
                         file=path) from None
    missing = [c for c in POSTERIOR_COLUMNS if c not in table.colnames]
    if missing:
        raise InputError(f"missing posterior column(s) {', '.join(missing)}", file=path, column=missing[0])
    if len(table) < 10:
        raise InputError(f"only {len(table)} posterior samples (need at least 10)", file=path)
    ra = np.radians(_column_values(table, "ra", "deg", path))
    dec = np.radians(_column_values(table, "dec", "deg", path))
    bad = np.flatnonzero(np.abs(dec) > np.pi / 2 + 1e-12)
    if bad.size:
        raise InputError("declination outside [-90, 90] deg", file=path, row=int(bad[0]) + 1, column="dec")
    return Localisation(label or path.parent.name, "posterior",
                        f"follow-up posterior ({len(table)} samples)", str(path), ra, dec,
                        _column_values(table, "frequency", "Hz", path, True),
                        _column_values(table, "chirp_mass", "solMass", path, True),
                        _column_values(table, "strain", None, path, True),
                        _followup_prior(path.parent / "summary.json"))


def _followup_prior(path: Path):
    """The follow-up's search prior from its ``summary.json`` (``model`` entry), or None if not found."""
    try:
        model = json.loads(read_input_text(path, path.parent.parent, what="follow-up summary")).get("model") or {}
    except (InputError, ValueError, AttributeError, RecursionError):
        return None
    out = {}
    try:
        if "log10_frequency_band" in model:
            lo, hi = (10.0 ** float(v) for v in model["log10_frequency_band"])
            if 0 < lo < hi:
                out["frequency_band"] = (lo, hi)
        if "chirp_mass_range" in model:
            lo, hi = (float(v) for v in model["chirp_mass_range"])
            if 0 < lo < hi:
                out["chirp_mass_range"] = (lo, hi)
        if "strain_range" in model:
            lo, hi = (float(v) for v in model["strain_range"])
            if 0 < lo < hi:
                out["strain_range"] = (lo, hi)
        if model.get("strain_prior") in ("log-uniform", "uniform"):
            out["strain_prior"] = model["strain_prior"]
    except (TypeError, ValueError):
        return None
    return out or None


def _find_sky_map(scan_dir: Path, options):
    if options.sky_map:
        p = Path(options.sky_map)
        if not p.is_file():
            raise InputError("Fe sky map not found", file=p)
        return [p]
    names = ["fe_map.ecsv", "sky_map.ecsv", "fe_sky.ecsv", "skymap.ecsv"]
    found = [scan_dir / n for n in names if (scan_dir / n).is_file()]
    others = sorted(p for p in scan_dir.glob("*.ecsv") if p.name not in names
                    and p.name not in ("candidates.ecsv", "spectrum.ecsv"))
    return found + others


def _read_fe_map(path: Path, candidate_row: int, frequency: float, *, explicit=False):
    """(nside, pixels, fe) from an Fe map table, or None if it is not a usable map for this candidate.

    With ``explicit`` (the user named the file with ``--sky-map``) an unusable map is an InputError saying
    why, never silently replaced by another localisation."""
    def unusable(why):
        if explicit:
            raise InputError(f"not a usable Fe sky map for candidate {candidate_row}: {why} (--sky-map takes an "
                             "ECSV table with columns pixel and fe)", file=path)
        return None

    try:
        table = Table.read(read_input_text(path) + "\n", format="ascii.ecsv")
    except InputError:
        if explicit:
            raise
        return None
    except Exception as exc:   # astropy's parser raises many kinds; any of them means "not a table"
        return unusable(f"not an ECSV table ({type(exc).__name__})")
    if "pixel" not in table.colnames or "fe" not in table.colnames or len(table) == 0:
        return unusable("no pixel and fe columns, or no rows")
    try:
        if "candidate" in table.colnames:
            table = table[np.asarray(table["candidate"]) == candidate_row]
            if len(table) == 0:
                return unusable("no rows for this candidate")
        f_map = table.meta.get("frequency")
        if "frequency" in table.colnames:
            f_map = float(np.median(np.asarray(table["frequency"], float)))
        if f_map is not None and not abs(float(f_map) - frequency) <= 0.01 * frequency:
            return unusable(f"made at {float(f_map):.4g} Hz, not at the candidate's {frequency:.4g} Hz")
        pixels = np.asarray(table["pixel"], dtype=float)
        fe = np.asarray(table["fe"], dtype=float)
        if not np.all(np.isfinite(pixels)) or np.any(pixels != np.round(pixels)):
            return unusable("pixel numbers that are not whole numbers")
        pixels = pixels.astype(np.int64)
        nside = table.meta.get("nside")
        if nside is None:
            npix = 12 * 4 ** math.ceil(math.log((pixels.max() + 1) / 12, 4)) if pixels.max() >= 12 else 12
            nside = int(round(math.sqrt(npix / 12)))
        nside = int(nside)
        if not 1 <= nside <= 8192 or nside & (nside - 1):
            return unusable(f"nside {nside} is not a power of two up to 8192")
    except (TypeError, ValueError, OverflowError) as exc:
        return unusable(f"malformed ({exc})")
    good = np.isfinite(fe) & (pixels >= 0) & (pixels < 12 * nside ** 2)
    if not good.any():
        return unusable("no finite fe value on a valid pixel")
    return nside, pixels[good], fe[good]


def fe_sky_map(array, frequency, noise=None, nside=32):
    """Earth-term Fe on a HEALPix grid at one frequency [Hz], from the dataset, with the run's noise
    model (:func:`cwsearch.physics.correlated.array_noise`: correlated Fe with a Hellings–Downs background)."""
    engine = array_noise(array, noise)
    proj = engine.projections(np.array([float(frequency)]))
    ra, dec = pixel_centres(nside)
    fplus, fcross = fstat.sky_patterns(proj, ra, dec)
    return np.asarray(engine.fe_sky(proj, fplus, fcross).fe_map)[:, 0]


def scan_localisation(run_dir, options, span_seconds, rng, n_samples=20000, *, array=None, noise=None):
    """Coarse pseudo-posterior from a scan candidate alone (see the module docstring).

    Sky, in order of preference: ``options.sky_map``; an Fe map table
    (``pixel``, ``fe``) in ``run_dir/scan/``; an Fe map computed here at the
    candidate's frequency from ``array`` (nside 32); a Fisher blob of
    ``options.resolution`` degrees around the candidate.
    """
    scan_dir = Path(run_dir) / "scan"
    path = scan_dir / "candidates.ecsv"
    require_finished(path, scan_dir / "scan_summary.json", stage="scan", command="cwsearch scan")
    try:
        table = Table.read(read_input_text(path, Path(run_dir), what="candidates file") + "\n", format="ascii.ecsv")
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"cannot read scan candidates: {str(exc).splitlines()[0] if str(exc) else exc}",
                         file=path) from None
    for c in ("frequency", "ra", "dec", "fe", "strain"):
        if c not in table.colnames:
            raise InputError(f"missing scan-candidate column {c}", file=path, column=c)
    if len(table) == 0:
        raise InputError("no scan candidates to match", file=path)
    fe_all = np.asarray(table["fe"], float)
    if options.candidate is not None:
        try:
            row = candidate_row(options.candidate)
        except ValueError:
            raise InputError(f"--candidate {options.candidate!r}: give a scan candidate row number (1 = best) "
                             "or its name candidate_K", file=path) from None
        if not 1 <= row <= len(table):
            raise InputError(f"--candidate {row}: the scan has {len(table)} candidate(s)", file=path)
        i = row - 1
    else:
        i = int(np.argmax(fe_all))
        row = i + 1
    f0 = float(_column_values(table, "frequency", "Hz", path, True)[i])
    ra0 = math.radians(float(_column_values(table, "ra", "deg", path)[i]))
    dec0 = math.radians(float(_column_values(table, "dec", "deg", path)[i]))
    h_ml = float(_column_values(table, "strain", None, path, True)[i])
    fe = float(fe_all[i])
    rho = math.sqrt(max(2 * fe - 4, 1.0))
    fe_map = None
    for p in _find_sky_map(scan_dir, options):
        fe_map = _read_fe_map(p, row, f0, explicit=bool(options.sky_map))
        if fe_map is not None:
            map_label = p.name
            break
    if fe_map is None and array is not None:
        nside = 32
        fe_map = (nside, np.arange(12 * nside**2), fe_sky_map(array, f0, noise, nside))
        map_label = f"computed from the dataset at {f0:.4g} Hz"
    if fe_map is not None:

        nside, pixels, fe_values = fe_map
        prob = np.exp(fe_values - fe_values.max())
        prob /= prob.sum()
        chosen = rng.choice(pixels, size=n_samples, p=prob)
        lon, lat = _healpix(nside).healpix_to_lonlat(chosen, dx=rng.uniform(size=n_samples),
                                                     dy=rng.uniform(size=n_samples))
        ra, dec = np.asarray(lon.to_value("rad")), np.asarray(lat.to_value("rad"))
        kind = "scan-fe-map"
        desc = (f"scan candidate {row} alone (no follow-up posterior): sky from the Fe sky map "
                f"{map_label} (nside {nside}, density exp(Fe - Fe_max))")
    else:
        ra, dec = sample_fisher(ra0, dec0, math.radians(options.resolution), n_samples, rng)
        kind = "scan-fisher-blob"
        desc = (f"scan candidate {row} alone (no follow-up posterior, no Fe map): sky from a Fisher blob "
                f"of {options.resolution:g} deg (1 sigma) around the candidate")
    bin_width = 1.0 / span_seconds
    frequency = np.clip(f0 + bin_width * (rng.uniform(size=n_samples) - 0.5), 0.1 * f0, None)
    strain = h_ml * np.exp(rng.normal(size=n_samples) / rho)
    lo, hi = SEARCH_CHIRP_MASS_RANGE
    chirp_mass = np.exp(rng.uniform(math.log(lo), math.log(hi), size=n_samples))
    desc += (f"; frequency uniform within 1/T of {f0:.4g} Hz; ln strain ~ N(ln {h_ml:.3g}, 1/rho), "
             f"rho = {rho:.2f}; chirp mass from the search prior")
    return Localisation(f"scan-{row}", kind, desc, str(path), ra, dec, frequency, chirp_mass, strain)


def find_localisations(run_dir, options, span_seconds, rng, *, array=None, noise=None):
    """Follow-up posteriors of the run (one per candidate folder), else one scan candidate."""
    run_dir = Path(run_dir)
    follow = run_dir / "followup"
    found = []
    if (follow / "posterior.ecsv").is_file():
        found.append((follow / "posterior.ecsv", "followup"))
    if follow.is_dir():
        for sub in sorted(p for p in follow.iterdir() if p.is_dir()):
            if (sub / "posterior.ecsv").is_file():
                found.append((sub / "posterior.ecsv", sub.name))
    if found:
        if options.candidate is not None:
            found = [f for f in found if _same_candidate(f, options.candidate)]
            if not found:
                raise InputError(f"--candidate {options.candidate}: no follow-up folder of that name", file=follow)
        return [read_posterior(p, label) for p, label in found]
    if (run_dir / "scan" / "candidates.ecsv").is_file():
        return [scan_localisation(run_dir, options, span_seconds, rng, array=array, noise=noise)]
    raise InputError("no follow-up posterior (followup/posterior.ecsv) and no scan candidates "
                     "(scan/candidates.ecsv) in the run folder; run 'cwsearch followup' or 'cwsearch scan' first",
                     file=run_dir)


# ---------------------------------------------------------------- scoring
@dataclass
class HostModel:
    """Fixed ingredients of the host prior shared by all galaxies.

    ``population`` is the tabulated source-frame chirp-mass density of a
    galaxy drawn at random from the catalogue (``(grid, density)`` in ln Mc,
    :func:`cwsearch.physics.relations.population_chirp_mass_table`), used for an
    uncatalogued host and for catalogue galaxies without a mass proxy;
    ``None`` when no galaxy has a proxy (then mass carries no information).
    """

    relation: object
    mass_ratio: object
    distance_limit: float          # Mpc
    span_seconds: float
    frequency_band: tuple          # (f_lo, f_hi) Hz, of the log-uniform search prior
    period_factor: float = 1.0
    population: tuple | None = None
    chirp_mass_range: tuple = SEARCH_CHIRP_MASS_RANGE
    strain_range: tuple = SEARCH_STRAIN_RANGE
    strain_prior: str = "log-uniform"   # or "uniform"


def inverse_search_prior(terms, model: HostModel):
    """Per-sample ``−ln π_search`` of ln h0, ln Mc and ln f (the denominators of the prior ratios).

    Log-uniform on ``[lo, hi]``: ``π(ln x) = 1/ln(hi/lo)``; a uniform strain
    prior on ``[lo, hi]``: ``π(ln h) = h/(hi − lo)``.
    """
    n = terms["ln_strain"].size
    h_lo, h_hi = model.strain_range
    if model.strain_prior == "uniform":
        inv_h = math.log(h_hi - h_lo) - terms["ln_strain"]
    else:
        inv_h = np.full(n, math.log(math.log(h_hi / h_lo)))
    inv_mc = np.full(n, math.log(math.log(model.chirp_mass_range[1] / model.chirp_mass_range[0])))
    inv_f = np.full(n, math.log(math.log(model.frequency_band[1] / model.frequency_band[0])))
    return inv_h, inv_mc, inv_f


def build_host_model(catalog, options, span_seconds, distance_limit):
    """:class:`HostModel` for a catalogue and options (population mass table from the whole catalogue)."""
    relation = RELATIONS[options.relation]
    mass_ratio = MassRatioPrior(options.mass_ratio_min)
    mu, sigma, _ = catalog.total_mass_prior(relation)
    has = np.isfinite(mu)
    population = population_chirp_mass_table(mu[has], sigma[has], mass_ratio) if has.any() else None
    return HostModel(relation, mass_ratio, float(distance_limit), float(span_seconds),
                     (1.0 / span_seconds, SEARCH_FREQUENCY_MAX), options.period_factor, population)


def sample_terms(loc: Localisation, model: HostModel):
    """Per-sample quantities: ln implied distance, ln chirp mass, orbital period [d], coalescence mask."""
    d_impl = np.asarray(luminosity_distance_for_strain(loc.strain, loc.chirp_mass, loc.frequency), float)
    t_c = np.asarray(time_to_coalescence(loc.chirp_mass, loc.frequency), float)
    return {
        "ln_distance": np.log(d_impl),
        "ln_strain": np.log(loc.strain),
        "ln_chirp_mass": np.log(loc.chirp_mass),
        "orbital_period_days": np.asarray(orbital_period(loc.frequency), float) / 86400.0,
        "log_coalescence": np.where(t_c > model.span_seconds, 0.0, -np.inf),
    }


def not_catalogued_terms(terms, model: HostModel):
    """Per-sample ln prior ratios of an uncatalogued host: (distance, mass, coalescence).

    Isotropic; uniform in Euclidean volume out to the distance limit,
    ``p(ln d) = 3 (d/d_max)^3``; chirp mass from the catalogue population
    (observed frame at the sample's implied distance); frequency as the
    search prior.
    """
    # ln of 1/prior density of the log-uniform search priors (ln h0, ln Mc, ln f): ln(ln(hi/lo))
    inv_h, inv_mc, _ = inverse_search_prior(terms, model)
    lnd = terms["ln_distance"]
    ln_dmax = math.log(model.distance_limit)
    with np.errstate(divide="ignore"):
        log_dist = np.where(lnd <= ln_dmax, math.log(3.0) + 3 * (lnd - ln_dmax), -np.inf) + inv_h
        if model.population is None:
            log_mass = np.zeros_like(lnd)
        else:
            ln_zf = np.log1p(redshift_at_distance(np.exp(np.minimum(lnd, 30.0))))
            grid, dens = model.population
            log_mass = np.log(np.interp(terms["ln_chirp_mass"] - ln_zf, grid, dens, left=0.0, right=0.0)) \
                + inv_mc
    return log_dist, log_mass, terms["log_coalescence"]


def _mass_tables(galaxies, model):
    """Per-galaxy table index and shift, and the stacked tables, for the numba scoring kernel."""
    mu, sigma, _ = galaxies.total_mass_prior(model.relation)
    ln_zf = np.log1p(galaxies.redshift)
    tables, tab = [], np.full(len(galaxies), -1, dtype=np.int64)
    shift = np.zeros(len(galaxies))
    has = np.isfinite(mu)
    for s in np.unique(sigma[has]):
        rows = has & (sigma == s)
        tab[rows] = len(tables)
        shift[rows] = mu[rows] * LN10 + ln_zf[rows]
        tables.append(chirp_mass_offset_table(s, model.mass_ratio))
    if model.population is not None and (~has).any():
        tab[~has] = len(tables)
        shift[~has] = ln_zf[~has]
        tables.append(model.population)
    length = max([t[0].size for t in tables], default=2)
    vals = np.zeros((max(len(tables), 1), length))
    x0, dx, lens = np.zeros(len(vals)), np.ones(len(vals)), np.full(len(vals), 2, dtype=np.int64)
    for k, (grid, dens) in enumerate(tables):
        vals[k, :grid.size] = dens
        x0[k], dx[k], lens[k] = grid[0], grid[1] - grid[0], grid.size
    return tab, shift, x0, dx, vals, lens


def _logmeanexp(a):
    a = np.asarray(a, float)
    return float(logsumexp(a) - math.log(a.size)) if np.isfinite(a).any() else -np.inf


def score_galaxies(loc, kde, galaxies, model):
    """Bayes-factor chain for each galaxy; returns a dict of arrays (see the module docstring).

    Keys: ``sky_density``, ``distance_consistency``, ``mass_consistency``,
    ``period_consistency``, ``coalescence_ok`` (their product times
    ``1/coalescence_out`` is the Bayes factor against an uncatalogued host),
    ``log_bayes_factor`` (that Bayes factor, natural log),
    ``ln_bayes_search`` (against the search prior), ``n_effective`` (Kish
    effective number of samples behind each galaxy), and scalars
    ``ln_bayes_out`` (uncatalogued host against the search prior) and
    ``coalescence_out``.
    """
    terms = sample_terms(loc, model)
    out_d, out_m, out_c = not_catalogued_terms(terms, model)
    ln_beta_d = _logmeanexp(out_d)
    ln_beta_dm = _logmeanexp(out_d + out_m)
    ln_b_out = _logmeanexp(out_d + out_m + out_c)
    inv_h, inv_mc, inv_f = inverse_search_prior(terms, model)
    tab, shift, x0, dx, vals, lens = _mass_tables(galaxies, model)
    g = len(galaxies)
    raw = np.full((g, 6), -np.inf)
    if g:
        gal = np.ascontiguousarray(unit_vectors(np.radians(galaxies.ra), np.radians(galaxies.dec)))
        period = np.where(np.isfinite(galaxies.period), galaxies.period, -1.0)
        perr = np.where(np.isfinite(galaxies.period_err), galaxies.period_err, 1.0)
        _kernels()["score"](kde.vectors, terms["ln_distance"], terms["ln_chirp_mass"],
                            terms["orbital_period_days"], terms["log_coalescence"], inv_h, inv_mc, inv_f, gal,
                            np.log(galaxies.distance), galaxies.distance_err / galaxies.distance, tab, shift,
                            period, perr, kde.log_norm, kde.kappa, float(model.period_factor), x0, dx, vals, lens,
                            raw)
    ln_sky, ln_d, ln_dm, ln_dmp, ln_all, ln_all2 = raw.T
    ln_n = math.log(len(loc))
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        res = {
            "sky_density": np.exp(_LN4PI + ln_sky - ln_n),
            "distance_consistency": np.exp(ln_d - ln_sky - ln_beta_d),
            "mass_consistency": np.exp(ln_dm - ln_d - (ln_beta_dm - ln_beta_d)),
            "period_consistency": np.exp(ln_dmp - ln_dm),
            "coalescence_ok": np.exp(ln_all - ln_dmp),
            "ln_bayes_search": _LN4PI + ln_all - ln_n,
            "n_effective": np.exp(2 * ln_all - ln_all2),
        }
    res["log_bayes_factor"] = res["ln_bayes_search"] - ln_b_out
    for k in ("distance_consistency", "mass_consistency", "period_consistency", "coalescence_ok", "n_effective"):
        res[k] = np.nan_to_num(res[k], nan=0.0, posinf=0.0)
    res["ln_bayes_out"] = ln_b_out
    res["coalescence_out"] = float(np.exp(ln_b_out - ln_beta_dm)) if np.isfinite(ln_beta_dm) else 0.0
    res["terms"] = terms
    return res


def posterior_probabilities(ln_bayes, ln_bayes_out, completeness, n_catalogue):
    """Probabilities of each galaxy and of "not in the catalogue".

    Prior: ``completeness / n_catalogue`` per galaxy, ``1 − completeness``
    for an uncatalogued host; Bayes factors against the search prior.
    """
    ln_prior_g = math.log(completeness) - math.log(max(n_catalogue, 1)) if completeness > 0 else -np.inf
    ln_prior_out = math.log1p(-completeness) if completeness < 1 else -np.inf
    terms = np.concatenate([np.asarray(ln_bayes, float) + ln_prior_g, [ln_bayes_out + ln_prior_out]])
    z = logsumexp(terms) if np.isfinite(terms).any() else -np.inf
    if not np.isfinite(z):
        return np.full(len(ln_bayes), np.nan), float("nan")
    p = np.exp(terms - z)
    return p[:-1], float(p[-1])


# ---------------------------------------------------------------- the stage
def _span_seconds(array, options):
    if array is not None:
        return float(array.span), "dataset"
    if options.observed_span is not None:
        return float(options.observed_span) * YEAR_SECONDS, "--observed-span"
    return DEFAULT_SPAN_YEARS * YEAR_SECONDS, f"assumed {DEFAULT_SPAN_YEARS:g} yr (no dataset given)"


def _check_options(options):
    if not options.catalog:
        raise InputError("no galaxy catalogue given (--catalog FILE)")
    options.validate()


def rank_candidate(loc, catalog, model, options, rng, *, n_catalogue):
    """Score the galaxies near one localisation; returns a :class:`CandidateHosts`."""
    if loc.prior:
        model = dataclasses.replace(model, **loc.prior)
    bandwidth = math.radians(options.sky_bandwidth) if options.sky_bandwidth else None
    kde = SkyKernelDensity(loc.ra, loc.dec, bandwidth=bandwidth)
    vectors = unit_vectors(np.radians(catalog.ra), np.radians(catalog.dec))
    near = kde.near(vectors, 5.0)
    galaxies = catalog.subset(np.flatnonzero(near))
    scores = score_galaxies(loc, kde, galaxies, model)
    p_gal, p_out = posterior_probabilities(scores["ln_bayes_search"], scores["ln_bayes_out"],
                                           options.completeness, n_catalogue)
    t90, t99 = kde.credible_thresholds((0.90, 0.99), rng)
    sky_dens = scores["sky_density"] / (4 * math.pi)
    inside = sky_dens >= t99
    order = np.flatnonzero(inside)
    order = order[np.lexsort((-scores["sky_density"][order], -np.nan_to_num(p_gal[order], nan=-1)))]
    mu, sigma, used = galaxies.total_mass_prior(model.relation)
    table = Table()
    table["candidate"] = np.full(order.size, loc.label)
    table["name"] = galaxies.name[order]
    table["ra"] = galaxies.ra[order]
    table["ra"].unit = "deg"
    table["dec"] = galaxies.dec[order]
    table["dec"].unit = "deg"
    table["distance"] = galaxies.distance[order]
    table["distance"].unit = "Mpc"
    table["redshift"] = galaxies.redshift[order]
    table["probability"] = p_gal[order]
    table["log_bayes_factor"] = scores["log_bayes_factor"][order]
    for k in ("sky_density", "distance_consistency", "mass_consistency", "period_consistency", "coalescence_ok"):
        table[k] = scores[k][order]
    table["n_effective"] = scores["n_effective"][order]
    table["log10_bh_mass"] = mu[order]
    table["mass_proxy"] = np.where(used[order] == "", "none", used[order])
    table["has_period"] = np.isfinite(galaxies.period[order])
    # the follow-up's HEALPix localisation product, where there is one: each galaxy's credible level in it
    followup_map = (read_probability_map(Path(loc.source).parent / "posterior_sky.fits")
                    if loc.kind == "posterior" else None)
    if followup_map is not None:
        table["map_credible_level"] = probability_at(followup_map[0], followup_map[1],
                                                     np.radians(np.asarray(table["ra"], dtype=float)),
                                                     np.radians(np.asarray(table["dec"], dtype=float)))
    table.meta["description"] = ("Host-galaxy ranking: galaxies inside the 99% sky region, most probable first. "
                                 "log_bayes_factor is against an uncatalogued host; the five factors multiply to "
                                 "exp(log_bayes_factor). log10_bh_mass is the expected total black-hole mass.")
    # 90/99 % areas from a HEALPix map of the kernel density
    nside = int(min(256, max(16, 2 ** math.ceil(math.log2(1.5 / max(kde.bandwidth, 1e-4))))))
    dens_map = kde.healpix_map(nside)
    pix_area_deg2 = 4 * math.pi / (12 * nside**2) * (180 / math.pi) ** 2
    area90 = float(np.count_nonzero(dens_map >= t90) * pix_area_deg2)
    area99 = float(np.count_nonzero(dens_map >= t99) * pix_area_deg2)
    best = None
    if order.size:
        i = order[0]
        best = {"name": str(galaxies.name[i]), "probability": float(p_gal[i]),
                "log_bayes_factor": float(scores["log_bayes_factor"][i]),
                "distance_mpc": float(galaxies.distance[i]), "n_effective": float(scores["n_effective"][i])}
    d_impl = np.exp(scores["terms"]["ln_distance"])
    summary = {
        "candidate": loc.label,
        "localisation": loc.kind,
        "localisation_description": loc.description,
        "localisation_source": loc.source,
        "n_samples": len(loc),
        "search_prior": {"source": "follow-up summary.json" if loc.prior else "defaults (docs/design.md §8)",
                         "frequency_band_hz": list(model.frequency_band),
                         "chirp_mass_range_msun": list(model.chirp_mass_range),
                         "strain_range": list(model.strain_range), "strain_prior": model.strain_prior},
        "sky_bandwidth_deg": math.degrees(kde.bandwidth),
        "sky_area_90_deg2": area90,
        "sky_area_99_deg2": area99,
        "n_galaxies_scored": int(len(galaxies)),
        "n_galaxies_in_99_region": int(order.size),
        "probability_not_in_catalogue": p_out,
        "probability_in_listed_galaxies": float(np.nansum(p_gal[order])) if order.size else 0.0,
        "not_catalogued_coalescence_fraction": scores["coalescence_out"],
        "implied_distance_beyond_limit_fraction": float(np.mean(d_impl > model.distance_limit)),
        "implied_distance_mpc": {"median": float(np.median(d_impl)),
                                 "interval_90": [float(v) for v in np.percentile(d_impl, [5, 95])],
                                 "source": "luminosity distance implied by each sample's strain, chirp mass and "
                                           "frequency (enters distance_consistency)"},
        "best_host": best,
    }
    if followup_map is not None:
        nside_map, prob_map = followup_map
        summary["followup_map"] = {
            "file": str(Path(loc.source).parent / "posterior_sky.fits"), "nside": int(nside_map),
            "credible_area_50_deg2": credible_area(prob_map, 0.5),
            "credible_area_90_deg2": credible_area(prob_map, 0.9),
            "n_listed_inside_90": int(np.count_nonzero(np.asarray(table["map_credible_level"]) <= 0.9)),
            "use": "each listed galaxy's credible level in the map (map_credible_level); the sky factor itself "
                   "uses a kernel density of the same samples (smoother than the map's pixels)"}
    if best is not None and best["n_effective"] < 20:
        summary["warning"] = (f"the best host rests on only {best['n_effective']:.0f} effective samples; "
                              "its probability is noisy (more posterior samples would help)")
    return CandidateHosts(loc, table, _finite_or_none(summary), kde, galaxies, scores, p_gal,
                          (nside, dens_map, t90, t99))


def _finite_or_none(obj):
    """NaN/inf -> None throughout a summary (strict JSON)."""
    if isinstance(obj, dict):
        return {k: _finite_or_none(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite_or_none(v) for v in obj]
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    return obj


def run_hosts(array, run_dir, options: HostsOptions, *, noise=None, seed=0, progress=True) -> HostsResult:
    """Rank catalogue galaxies as hosts of the run's candidate(s); writes ``run_dir/hosts/``.

    ``array`` (optional, may be ``None``) supplies the observed span for the
    coalescence check and the bottom of the frequency band, and, with
    ``noise``, the Fe sky map for a scan candidate without a posterior.

    Writes ``ranking.ecsv`` (all candidates, with a ``candidate`` column),
    ``hosts_summary.json`` and plots; with several follow-up candidates also
    one sub-folder per candidate with its own ranking and plots.
    """
    _check_options(options)
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise InputError("run folder not found", file=run_dir)
    seeds = np.random.SeedSequence(seed)
    rng = np.random.default_rng(seeds.spawn(1)[0])
    span, span_source = _span_seconds(array, options)
    catalog = read_catalog(options.catalog, options.columns, distance_error=options.distance_error)
    d_max = float(options.distance_limit) if options.distance_limit else float(np.max(catalog.distance))
    within = catalog.distance <= d_max
    if not within.any():
        raise InputError(f"no catalogue galaxy lies within the distance limit {d_max:g} Mpc", file=options.catalog)
    catalog = catalog.subset(np.flatnonzero(within)) if not within.all() else catalog
    model = build_host_model(catalog, options, span, d_max)
    locs = find_localisations(run_dir, options, span, rng, array=array, noise=noise)
    out_dir = run_dir / "hosts"
    results = []
    for loc, child in zip(locs, seeds.spawn(len(locs))):
        loc_rng = np.random.default_rng(child)
        loc = loc.subsample(options.max_samples, loc_rng)
        results.append(rank_candidate(loc, catalog, model, options, loc_rng, n_catalogue=len(catalog)))
    several = len(results) > 1
    if not options.no_plots:
        # lazy: matplotlib is loaded only when plots are drawn
        from . import plots as host_plots

    for res in results:
        folder = out_dir / res.localisation.label if several else out_dir
        if several:
            write_table_atomic(folder / "ranking.ecsv", res.ranking)
            write_json_atomic(folder / "hosts_summary.json", res.summary)
        res.plots = (host_plots.make_plots(folder, res, model, options, truth=_truth(array, run_dir),
                                           pulsars=_pulsar_positions(array, run_dir))
                     if not options.no_plots else [])
    ranking = vstack([r.ranking for r in results], metadata_conflicts="silent") if several else results[0].ranking
    write_table_atomic(out_dir / "ranking.ecsv", ranking)
    first = results[0].summary
    summary = {
        "catalog": str(options.catalog),
        "n_catalogue": len(catalog),
        "distance_limit_mpc": d_max,
        "completeness": options.completeness,
        "relation": RELATIONS[options.relation].source,
        "mass_ratio_prior": f"log-uniform q in [{options.mass_ratio_min:g}, 1]",
        "period_harmonic": (f"EM period = {options.period_factor:g} x orbital period (orbital period = 2/f_gw, "
                            "observed frame)"),
        "observed_span_yr": span / YEAR_SECONDS,
        "observed_span_source": span_source,
        "localisation": first["localisation"],
        "localisation_description": first["localisation_description"],
        "probability_not_in_catalogue": first["probability_not_in_catalogue"],
        "probability_note": ("probabilities cover the catalogue galaxies within the distance limit plus an "
                             "uncatalogued host; galaxies far outside the sky region have negligible probability"),
        "best_host": first["best_host"],
        "candidates": [r.summary for r in results],
        "seed": seed,
        "options": asdict(options),
        "caution": "A host association is a probability under the stated priors, not an identification.",
    }
    if array is not None:
        summary["noise_model"] = stage_noise_statement(array, noise)
    write_json_atomic(out_dir / "hosts_summary.json", summary)
    return HostsResult(ranking, summary, results, out_dir)


def format_table(result: HostsResult, top=10) -> str:
    """The printed top-N table (one block per candidate)."""
    lines = []
    for res in result.candidates:
        s = res.summary
        lines.append(f"Candidate {s['candidate']}: {s['localisation_description']}")
        lines.append(f"  99% sky region {s['sky_area_99_deg2']:.0f} deg2 holds {s['n_galaxies_in_99_region']} "
                     f"catalogue galaxies; P(host not in catalogue) = {s['probability_not_in_catalogue']:.3f}")
        head = (f"  {'#':>3} {'name':<18} {'ra':>7} {'dec':>7} {'d/Mpc':>7} {'prob':>7} {'lnB':>7} "
                f"{'sky':>8} {'dist':>7} {'mass':>7} {'period':>6} {'coal':>5}")
        lines.append(head)
        t = res.ranking
        for k in range(min(top, len(t))):
            r = t[k]
            lines.append(f"  {k + 1:>3} {escape_text(str(r['name'])[:18]):<18} {r['ra']:7.2f} {r['dec']:7.2f} "
                         f"{r['distance']:7.1f} {r['probability']:7.4f} {r['log_bayes_factor']:7.2f} "
                         f"{r['sky_density']:8.3g} {r['distance_consistency']:7.3g} {r['mass_consistency']:7.3g} "
                         f"{r['period_consistency']:6.3g} {r['coalescence_ok']:5.2f}")
        if len(t) == 0:
            lines.append("  (no catalogue galaxy inside the 99% sky region)")
        if "warning" in s:
            lines.append("  warning: " + s["warning"])
    lines.append("A host association is a probability, not an identification.")
    return "\n".join(lines)


def summary_json(result: HostsResult) -> str:
    return json.dumps(result.summary, indent=2, default=lambda o: o.item() if hasattr(o, "item") else str(o))


def _truth(array, run_dir):
    """The injected binary of a simulated dataset (for over-plotting), or None; without an array (the
    ``cwsearch hosts`` command) it is found through the run folder's dataset.json."""
    return injected_binary(array) or injected_binary(run_dir)


def _pulsar_positions(array, run_dir):
    """(ra, dec) arrays [rad] of the pulsars, from the array or else the run folder's dataset.json; None if
    neither is there."""
    if array is not None:
        return np.array([p.ra for p in array]), np.array([p.dec for p in array])
    try:
        pulsars = json.loads((Path(run_dir) / "dataset.json").read_text(encoding="utf-8"))["pulsars"]
        return (np.radians([float(p["ra_deg"]) for p in pulsars]), np.radians([float(p["dec_deg"]) for p in pulsars]))
    except (OSError, ValueError, KeyError, TypeError):
        return None


def _same_candidate(found, wanted) -> bool:
    """Whether a follow-up posterior ``(path, label)`` is the candidate named ``wanted`` (folder name, row K or
    candidate_K; a single follow-up in followup/ itself is matched by the scan row it started from)."""
    path, label = found
    if label == str(wanted):
        return True
    try:
        row = candidate_row(wanted)
    except ValueError:
        return False
    if label == candidate_name(row):
        return True
    try:
        start = json.loads((path.parent / "summary.json").read_text(encoding="utf-8")).get("start") or {}
    except (OSError, ValueError):
        return False
    rank = (start.get("candidate_row") or {}).get("rank") if isinstance(start.get("candidate_row"), dict) else None
    return rank is not None and int(rank) == row

__all__ = [
    "SEARCH_CHIRP_MASS_RANGE", "SEARCH_STRAIN_RANGE", "SEARCH_FREQUENCY_MAX", "DEFAULT_SPAN_YEARS",
    "POSTERIOR_COLUMNS", "HostsOptions", "Localisation", "CandidateHosts", "HostsResult",
    "SkyKernelDensity", "sample_fisher", "read_posterior", "fe_sky_map", "scan_localisation",
    "find_localisations", "HostModel", "inverse_search_prior", "build_host_model", "sample_terms",
    "not_catalogued_terms", "score_galaxies", "posterior_probabilities", "rank_candidate", "run_hosts",
    "format_table", "summary_json",
]
