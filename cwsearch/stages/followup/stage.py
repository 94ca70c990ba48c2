"""Follow-up stage: a parallel-tempered MCMC fit of scan candidates (docs/design.md §7–8).

For each candidate (a row of ``RUN_DIR/scan/candidates.ecsv``, an explicit
target, or the whole sky) the stage samples the 8 global parameters of one
circular binary with the fast likelihood of :mod:`cwsearch.inference.likelihood`
(pulsar phases marginalised, or Earth term only), writes equally weighted
posterior samples, a summary with the signal-versus-noise log Bayes factor,
and plots, into ``RUN_DIR/followup/`` (``RUN_DIR/followup/candidate_K/``
when several candidates are followed).

Priors (docs/design.md §8): isotropic sky; log-uniform GW frequency in a window
of ``frequency_window`` bins of 1/T_span either side of the target (in the
band [1/T_span, ``max_frequency``] for ``all_sky``); log-uniform chirp mass
in [1e7, 1e11] Msun, excluding binaries that merge within the data;
log-uniform strain in [1e-18, 1e-11] (``strain_prior="uniform"``: uniform
in [0, 1e-11], for upper limits); uniform cos ι, polarisation ψ in [0, π)
and phase Φ0 in [0, π) (the waveform has period π in both). Pulsar distances
are held at their catalogue values (with free pulsar phases they only set
the pulsar-term frequency and amplitude in the evolving modes).

Noise model: the run's (:func:`cwsearch.physics.correlated.array_noise`). With a
Hellings–Downs common process the likelihood is
:class:`cwsearch.inference.correlated_likelihood.CorrelatedLikelihood`, so the
Bayes factor is *binary + correlated background versus correlated background
alone*; ``background_comparison`` in ``summary.json`` puts it side by side
with the Bayes factor under an uncorrelated common background (and vice versa
for an uncorrelated run), the other one estimated by importance reweighting
of the posterior samples with the likelihood ratio (method and effective
sample size stated there). A candidate whose support holds only under the
uncorrelated background is not a binary candidate.

The walkers start from the prior (the whole search window), not around the
scan point; the sampler's stopping rule and ladder adaptation are those of
:mod:`cwsearch.sampling`, and every reason to distrust a run (an iteration or
time cap, a poorly swapping temperature pair) is listed under ``warnings``
in ``summary.json``.

Examples
--------
>>> from cwsearch.stages.followup.stage import FollowupOptions
>>> FollowupOptions(walkers=16, temperatures=4).evolution
'full'
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import time
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.table import Table
from astropy_healpix import HEALPix
from scipy.special import log_ndtr

from ...core.candidates import candidate_row
from ...core.constants import YEAR_SECONDS
from ...core.errors import InputError
from ...core.fileio import write_json_atomic, write_table_atomic
from ...core.safeio import read_input_text, require_finished
from ...inference import sampling
from ...inference.likelihood import Likelihood, free_pulsar_phases
from ...inference.modejump import SkyFrequencyProposal
from ...inference.noisefit import stage_noise_statement
from ...inference.correlated_likelihood import likelihood_for, other_background, reweighted_log_bayes_factor
from ...physics import fstat, waveform
from ...data.healpix_fits import credible_area, posterior_sky_map, read_healpix_map, write_healpix_map
from ...physics.correlated import ArrayNoise
from ...physics.noise import NoiseSettings
from ...physics.sky import angular_separation, unit_vectors
from .options import FollowupOptions  # the options live beside (standard library only)

STRAIN_RANGE = (1e-18, 1e-11)
CHIRP_MASS_RANGE = (1e7, 1e11)
OUTPUT_COLUMNS = ("ra", "dec", "frequency", "chirp_mass", "strain", "inclination", "polarization", "phase",
                  "luminosity_distance", "orbital_period")
#: per-sample bookkeeping columns of ``posterior.ecsv`` after :data:`OUTPUT_COLUMNS`
SAMPLE_COLUMNS = ("log_likelihood", "log_prior", "iteration", "walker", "temperature")


@dataclass
class Target:
    """A starting point: frequency [Hz], ra, dec [rad], optional projection guesses."""

    label: str
    frequency: float | None
    ra: float | None
    dec: float | None
    strain: float | None = None
    inclination: float | None = None
    polarization: float | None = None
    phase: float | None = None
    source: dict = field(default_factory=dict)


@dataclass
class FollowupResult:
    """Result of :func:`run_followup`: ``summary`` (JSON-ready), per-target folders and sampler results."""

    summary: dict
    folders: list
    runs: list


# ---------------------------------------------------------------- prior
class Prior:
    """The follow-up prior in sampler coordinates (see module docstring); vectorised."""

    def __init__(self, likelihood, log10_frequency_range, uniform_strain=False, sky_cap=None):
        self.likelihood = likelihood
        self.uniform_strain = uniform_strain
        # (ra, dec, radius) [rad]: the sky prior is uniform on this cap instead of the whole sphere
        self.sky_cap = None if sky_cap is None else tuple(float(v) for v in sky_cap)
        strain = (0.0, STRAIN_RANGE[1]) if uniform_strain else tuple(np.log10(STRAIN_RANGE))
        self.lower = np.array([0.0, -1.0, log10_frequency_range[0], np.log10(CHIRP_MASS_RANGE[0]), strain[0],
                               -1.0, 0.0, 0.0])
        self.upper = np.array([2 * np.pi, 1.0, log10_frequency_range[1], np.log10(CHIRP_MASS_RANGE[1]), strain[1],
                               1.0, np.pi, np.pi])

        # sampled pulsar distances [kpc] (docs/design.md §7 "Pulsar distances"): Gaussian, truncated at > 0
        sampled = getattr(likelihood, "sampled_distances", np.zeros(0, dtype=int))
        self.distance_mean = np.asarray(likelihood.pulsar_distances, dtype=float)[sampled] if sampled.size else \
            np.zeros(0)
        self.distance_sigma = np.asarray(likelihood.pulsar_distance_errors, dtype=float)[sampled] if sampled.size \
            else np.zeros(0)
        self.dim = 8 + self.distance_mean.size

    def __call__(self, theta):
        theta = np.atleast_2d(theta)
        base = theta[:, :8]
        inside = np.all((base >= self.lower) & (base < self.upper), axis=1)
        if self.sky_cap is not None:
            inside &= self._in_cap(theta[:, 0], theta[:, 1])
        out = np.where(inside, 0.0, -np.inf)
        if self.dim > 8:
            out = out + self._distance_log_prior(theta[:, 8:])
            inside &= np.isfinite(out)
        if inside.any():
            merge = self.likelihood.merges_within_data(10.0 ** theta[inside, 2], 10.0 ** theta[inside, 3])
            sub = out[inside]
            sub[np.asarray(merge, dtype=bool)] = -np.inf
            out[inside] = sub
        return out

    #: sampler indices of ψ and Φ0: the pair the exact symmetry shifts together
    SYMMETRIC_PAIR = (6, 7)

    def exact_symmetry(self, positions, rng):
        """Map, in place, a random half of the walkers in ``positions`` (..., dim) by
        (ψ, Φ0) → (ψ + π/2, Φ0 + π/2) mod π. Both polarisations change sign under ψ → ψ + π/2
        (the antenna patterns rotate by 2ψ) and again under Φ0 → Φ0 + π/2 (the gravitational-wave
        phase 2Φ advances by π), Earth and pulsar term alike (the pulsar-term phase follows Φ0, or is
        marginalised over a whole period), so the signal, and with the uniform priors on [0, π) the
        posterior, are unchanged (docs/design.md §8). Used by :func:`cwsearch.inference.sampling.run_sampler`."""
        flip = rng.random(positions.shape[:-1]) < 0.5
        for j in self.SYMMETRIC_PAIR:
            positions[..., j] = np.where(flip, (positions[..., j] + 0.5 * np.pi) % np.pi, positions[..., j])

    def _distance_log_prior(self, distance):
        """Σ_p ln N(L_p; distance, distance_err) truncated at L > 0 (normalised: minus ln Φ(μ/σ))."""
        z = (distance - self.distance_mean) / self.distance_sigma
        logp = -0.5 * z**2 - np.log(self.distance_sigma * math.sqrt(2 * math.pi)) - log_ndtr(
            self.distance_mean / self.distance_sigma)
        return np.where(np.all(distance > 0, axis=1), logp.sum(axis=1), -np.inf)

    def _in_cap(self, ra, sin_dec):
        ra0, dec0, radius = self.sky_cap
        cos_dec = np.sqrt(np.clip(1.0 - sin_dec**2, 0.0, None))
        cos_sep = sin_dec * math.sin(dec0) + cos_dec * math.cos(dec0) * np.cos(ra - ra0)
        return cos_sep >= math.cos(radius)

    def _draw_cap(self, rng, size):
        """(ra, sin dec) uniform on the sky cap: cos(separation) uniform in [cos r, 1], azimuth uniform,
        rotated to the cap's centre."""
        ra0, dec0, radius = self.sky_cap
        cos_sep = rng.uniform(math.cos(radius), 1.0, size)
        sin_sep = np.sqrt(np.clip(1.0 - cos_sep**2, 0.0, None))
        azimuth = rng.uniform(0.0, 2 * np.pi, size)
        sin_dec = np.clip(math.sin(dec0) * cos_sep + math.cos(dec0) * sin_sep * np.cos(azimuth), -1.0, 1.0)
        ra = ra0 + np.arctan2(np.sin(azimuth) * sin_sep * math.cos(dec0),
                              cos_sep - math.sin(dec0) * sin_dec)
        return np.remainder(ra, 2 * np.pi), sin_dec

    def draw(self, rng, size):
        """Draws from the prior (rejecting merging binaries), shape (size, 8 + sampled distances)."""
        out = np.empty((0, self.dim))
        for _ in range(200):
            x = np.empty((2 * size, self.dim))
            x[:, :8] = rng.uniform(self.lower, self.upper, (2 * size, 8))
            if self.dim > 8:
                x[:, 8:] = rng.normal(self.distance_mean, self.distance_sigma, (2 * size, self.dim - 8))
            if self.sky_cap is not None:
                x[:, 0], x[:, 1] = self._draw_cap(rng, 2 * size)
            out = np.vstack([out, x[np.isfinite(self(x))]])
            if out.shape[0] >= size:
                return out[:size]
        raise InputError("hardly any binary of the prior survives to the end of the data at this frequency "
                         "(chirp masses 1e7-1e11 Msun merge first); choose a lower frequency")


def initial_positions(prior, target: Target, span, shape, rng, *, scan_start=None, betas=None):
    """Walkers drawn from the prior, i.e. over the whole search window (the frequency window around
    the target, the whole sky, every strain and orientation), at every temperature.

    The walkers deliberately do not start in a ball around the scan point: a start near the answer
    lets a short chain look converged while it has not explored the posterior (its spread and its
    autocorrelation time are then underestimated). ``target`` and ``span`` only set the window,
    through ``prior``.

    With ``scan_start`` (:func:`read_scan_start`) and the ladder's inverse temperatures ``betas``, the
    sky position and frequency of the walkers at inverse temperature β are drawn instead from the scan's
    Fe sky map and Fe spectrum tempered by β: pixel and frequency bin with probability ∝ exp(β Fe), a
    uniform point inside the pixel (astropy-healpix offsets) and a log-uniform frequency inside the bin.
    Fe is the likelihood ratio maximised over the amplitude parameters (Ellis, Siemens & Creighton
    2012), so this is the tempered profile likelihood: the hot chains start all over the window, the
    cold chain where the data put the source; strain, orientation and chirp mass still come from the
    prior. Positions outside the prior (window, cap) are drawn from the prior.
    """
    n = shape[0] * shape[1]
    pos = prior.draw(rng, n)
    dim = pos.shape[1]
    if scan_start is not None and betas is not None:
        pos = pos.reshape(shape + (dim,))
        for t, beta in enumerate(np.asarray(betas, dtype=float)[:shape[0]]):
            pos[t, :, :3] = _tempered_sky_and_frequency(scan_start, float(beta), shape[1], prior, rng)
        pos = pos.reshape(n, dim)
        outside = ~np.isfinite(prior(pos))
        if outside.any():
            pos[outside] = prior.draw(rng, int(outside.sum()))
    for _ in range(20):       # ptemcee cannot start where the likelihood is not finite
        bad = ~np.isfinite(prior.likelihood.batch(pos))
        if not bad.any():
            break
        pos[bad] = prior.draw(rng, int(bad.sum()))
    return pos.reshape(shape + (dim,))


@dataclass
class ScanStart:
    """What the walkers' start takes from a finished scan: the Fe sky map (maximum over frequency; HEALPix
    RING, ``nside``) and the Fe spectrum (maximum over the sky per frequency)."""

    fe_sky: np.ndarray
    nside: int
    frequencies: np.ndarray
    fe_spectrum: np.ndarray


def read_scan_start(run_dir):
    """:class:`ScanStart` from ``run_dir/scan/`` (``fe_sky.fits`` column FE_MAX, ``spectrum.ecsv``), or None
    when the scan wrote no sky map (Fp-only scan, no scan) or the files cannot be read."""
    scan = Path(run_dir) / "scan"
    sky_file = scan / "fe_sky.fits"
    # only a finished scan's regular files of a sane size (a FIFO or a device would block the FITS reader)
    if not ((scan / "scan_summary.json").is_file() and sky_file.is_file() and not sky_file.is_symlink()
            and sky_file.stat().st_size < 512 * 2**20):
        return None
    try:
        maps, header = read_healpix_map(sky_file)
        spectrum = Table.read(read_input_text(scan / "spectrum.ecsv", Path(run_dir), what="scan spectrum") + "\n",
                              format="ascii.ecsv")
        fe_sky = np.asarray(maps["FE_MAX"], dtype=float)
        nside = int(header["NSIDE"])
        frequencies = np.asarray(spectrum["frequency"], dtype=float)
        fe_spectrum = np.asarray(spectrum["fe_max"], dtype=float)
    except Exception:   # a damaged map or spectrum: the walkers start from the prior (stated in the summary)
        return None
    if fe_sky.size != 12 * nside * nside or not np.isfinite(fe_sky).any() or not np.isfinite(fe_spectrum).any():
        return None
    return ScanStart(fe_sky, nside, frequencies, fe_spectrum)


def _tempered_sky_and_frequency(start: ScanStart, beta, n, prior, rng):
    """``n`` rows (ra, sin dec, log10 f) drawn ∝ exp(β Fe) from the scan's sky map and spectrum (within
    the prior's frequency band; the whole band uniformly if the spectrum has no bin in it)."""
    out = np.empty((n, 3))
    weight = np.where(np.isfinite(start.fe_sky), beta * (start.fe_sky - np.nanmax(start.fe_sky)), -np.inf)
    prob = np.exp(weight)
    pixels = rng.choice(prob.size, size=n, p=prob / prob.sum())
    hp = HEALPix(nside=start.nside, order="ring")
    lon, lat = hp.healpix_to_lonlat(pixels, dx=rng.uniform(size=n), dy=rng.uniform(size=n))
    out[:, 0] = np.mod(lon.to_value(u.rad), 2 * np.pi)
    out[:, 1] = np.sin(lat.to_value(u.rad))
    lo, hi = prior.lower[2], prior.upper[2]
    logf = np.log10(start.frequencies)
    inside = np.isfinite(start.fe_spectrum) & (logf >= lo) & (logf <= hi)
    if inside.sum() < 1:
        out[:, 2] = rng.uniform(lo, hi, n)
        return out
    centres = logf[inside]
    fe = start.fe_spectrum[inside]
    prob = np.exp(beta * (fe - fe.max()))
    k = rng.choice(centres.size, size=n, p=prob / prob.sum())
    half = 0.5 * np.median(np.diff(centres)) if centres.size > 1 else 0.5 * (hi - lo)
    out[:, 2] = np.clip(centres[k] + rng.uniform(-half, half, n), lo, np.nextafter(hi, lo))
    return out


#: the mode-jump proposal (docs/design.md §8): q_Fe ∝ exp(β_q Fe) per pixel and per frequency bin, and the
#: weight ε of the uniform part of the mixture (1 − ε) q_Fe + ε q_uniform
MODE_JUMP_FE_TEMPERING = 0.5
MODE_JUMP_UNIFORM_FRACTION = 0.2


def mode_jump_proposal(start: ScanStart, prior, beta_q=MODE_JUMP_FE_TEMPERING,
                       uniform_fraction=MODE_JUMP_UNIFORM_FRACTION):
    """The mode-jump move's proposal over (ra, sin dec, log10 f) from the scan's Fe maps: a product of the
    sky part ∝ exp(β_q Fe_sky) per HEALPix pixel (Fe maximised over frequency) and the frequency part ∝
    exp(β_q Fe_spectrum) per scan frequency bin (Fe maximised over the sky) within the prior's band, mixed
    with ε of the uniform density over the sphere and the band (:class:`SkyFrequencyProposal`). The
    scan stores only these two maxima, not Fe per (pixel, frequency), hence the product."""
    freqs = np.asarray(start.frequencies, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        centres = np.where(freqs > 0, np.log10(np.where(freqs > 0, freqs, 1.0)), np.nan)
    return SkyFrequencyProposal(beta_q * np.asarray(start.fe_sky, dtype=float), start.nside,
                                log10_band=(prior.lower[2], prior.upper[2]), log10_centres=centres,
                                frequency_log_weight=beta_q * np.asarray(start.fe_spectrum, dtype=float),
                                uniform_fraction=uniform_fraction, columns=(0, 1, 2))


# ---------------------------------------------------------------- targets
def read_candidates(run_dir):
    """The scan's candidates table (astropy Table), best first (by ``fe`` when present)."""
    path = Path(run_dir) / "scan" / "candidates.ecsv"
    if not os.path.lexists(path):
        raise InputError("no scan candidates found; run 'cwsearch scan' first, or give --frequency/--ra/--dec "
                         "or --all-sky", file=path)
    require_finished(path, path.parent / "scan_summary.json", stage="scan", command="cwsearch scan")
    text = read_input_text(path, Path(run_dir), what="candidates file")
    try:
        table = Table.read(text + "\n", format="ascii.ecsv")
    except Exception as exc:  # malformed file: one line naming it
        raise InputError(f"cannot read candidates ({' '.join(str(exc).split())[:300]})", file=path) from None
    for col in ("frequency", "ra", "dec"):
        if col not in table.colnames:
            raise InputError(f"missing column '{col}'", file=path, column=col)
    if len(table) == 0:
        raise InputError("the candidates file has no rows", file=path)
    return table, path


def _column_value(table, name, row, unit, default_unit):
    if name not in table.colnames:
        return None
    col = table[name]
    value = float(col[row])
    if not np.isfinite(value):
        return None
    if col.unit is not None:
        return float((value * col.unit).to_value(unit))
    return float((value * default_unit).to_value(unit)) if default_unit is not None else value


def select_targets(run_dir, options: FollowupOptions):
    """The list of :class:`Target` to follow for these options."""
    if options.all_sky:
        return [Target("all-sky", None, None, None)]
    if options.frequency is not None:
        if not 0 < options.frequency <= options.max_frequency:
            raise InputError(f"--frequency must be in (0, {options.max_frequency:g}] Hz (raise --max-frequency "
                             "for higher targets)")
        if not -90 <= options.dec <= 90:
            raise InputError("--dec must be within [-90, 90] degrees")
        return [Target("target", options.frequency, np.radians(options.ra % 360), np.radians(options.dec),
                       source={"frequency": options.frequency, "ra": options.ra, "dec": options.dec})]
    table, path = read_candidates(run_dir)
    if options.candidate is not None:
        try:
            row = candidate_row(options.candidate)
        except ValueError as exc:
            raise InputError(f"--candidate: {exc}", file=path) from None
        if not 1 <= row <= len(table):
            raise InputError(f"--candidate must be between 1 and {len(table)} (or candidate_1 .. "
                             f"candidate_{len(table)})", file=path)
        rows = [row - 1]
    else:
        order = np.argsort(-np.asarray(table["fe"], dtype=float), kind="stable") if "fe" in table.colnames \
            else np.arange(len(table))
        rows = [int(r) for r in order[: max(1, options.top)]]
    targets = []
    for r in rows:
        get = lambda name, unit, default: _column_value(table, name, r, unit, default)  # noqa: E731
        freq = get("frequency", u.Hz, u.Hz)
        ra, dec = get("ra", u.rad, u.deg), get("dec", u.rad, u.deg)
        if freq is None or ra is None or dec is None or freq <= 0:
            raise InputError("frequency, ra and dec must be finite (frequency > 0)", file=path, row=r + 1)
        if freq > options.max_frequency:
            raise InputError(f"candidate frequency {freq:g} Hz is above --max-frequency {options.max_frequency:g}",
                             file=path, row=r + 1, column="frequency")
        source = {name: (float(table[name][r]) if np.issubdtype(np.asarray(table[name]).dtype, np.number)
                         else str(table[name][r])) for name in table.colnames}
        targets.append(Target(f"candidate_{r + 1}", freq, ra, dec, strain=get("strain", u.one, None),
                              inclination=get("inclination", u.rad, u.rad),
                              polarization=get("polarization", u.rad, u.rad), phase=get("phase", u.rad, u.rad),
                              source=source))
    return targets


def earth_term_start(engine, target: Target) -> Target:
    """Fill strain, inclination, polarisation and phase of ``target`` with the Earth-term
    maximum-likelihood values of the F-statistic at its frequency and sky position."""
    noise = engine if isinstance(engine, ArrayNoise) else ArrayNoise.from_engine(engine)
    proj = noise.projections(np.array([target.frequency]))
    fplus, fcross = fstat.sky_patterns(proj, target.ra, target.dec)
    _, amp = noise.fe_with_amplitudes(proj, fplus, fcross)
    strain, cos_inclination, psi, phase = (float(np.ravel(v)[0]) for v in
                                   fstat.amplitudes_to_parameters(amp[0, 0], target.frequency))
    if not (np.isfinite(strain) and strain > 0):
        return target
    return replace(target, strain=strain, inclination=float(np.arccos(np.clip(cos_inclination, -1, 1))),
                   polarization=psi, phase=phase)


# ---------------------------------------------------------------- outputs
def posterior_table(likelihood, samples):
    """Astropy Table of physical posterior samples (columns :data:`OUTPUT_COLUMNS`)."""
    par = likelihood.physical(samples)
    table = Table()
    table["ra"] = np.degrees(par["ra"]) * u.deg
    table["dec"] = np.degrees(par["dec"]) * u.deg
    table["frequency"] = par["gw_frequency"] * u.Hz
    table["chirp_mass"] = par["chirp_mass"] * u.solMass
    table["strain"] = par["strain"]
    table["inclination"] = par["inclination"] * u.rad
    table["polarization"] = par["polarization"] * u.rad
    table["phase"] = par["phase"] * u.rad
    with np.errstate(divide="ignore"):
        table["luminosity_distance"] = waveform.luminosity_distance_for_strain(
            par["strain"], par["chirp_mass"], par["gw_frequency"]) * u.Mpc
    table["orbital_period"] = waveform.orbital_period(par["gw_frequency"]) / YEAR_SECONDS * u.yr
    table.meta["description"] = "equally weighted posterior samples (T = 1) of the cwsearch follow-up"
    return table


def _with_sample_columns(table, details, result, tau):
    """``table`` plus the per-sample T=1 log-likelihood, log-prior (as the sampler saw it: 0 inside the
    support, the priors being uniform in the sampler coordinates, plus the sampled distances' Gaussian
    log density), 0-based chain iteration, walker and temperature index (0: every posterior sample is
    from the T = 1 chain); τ, ESS and the burn-in go into the table's metadata."""
    out = table.copy(copy_data=False)
    out["log_likelihood"] = details["log_likelihood"]
    out["log_prior"] = details["log_prior"]
    out["iteration"] = details["iteration"].astype(np.int64)
    out["walker"] = details["walker"].astype(np.int64)
    out["temperature"] = np.zeros(len(out), dtype=np.int64)    # every sample is from the T = 1 chain
    out.meta["temperature_index"] = "0 = the cold (T = 1) chain of the ladder, the only one the posterior uses"
    out.meta.update({"autocorrelation_time": tau, "effective_sample_size": float(result.ess),
                     "burn_in": int(result.burn_in), "iterations": int(result.iterations),
                     "thinning": int(np.max(np.diff(np.unique(details["iteration"])), initial=1)),
                     "converged": bool(result.converged), "stopped_by": result.stopped_by})
    return out


def _intervals(table):
    out = {}
    for name in table.colnames:
        x = np.asarray(table[name], dtype=float)
        x = x[np.isfinite(x)]
        if x.size == 0:
            continue
        lo, med, hi = np.percentile(x, [5, 50, 95])
        out[name] = {"median": float(med), "interval_90": [float(lo), float(hi)],
                     "unit": str(table[name].unit) if table[name].unit is not None else ""}
    return out


#: finest HEALPix resolution of the posterior sky map (posterior_sky.fits; nside 64: 0.84 deg² pixels)
SKY_MAP_NSIDE = 64
#: the map is coarsened until the occupied pixels hold at least this many samples on average: a histogram
#: of few samples puts each in its own pixel and would make the credible area far too small
SAMPLES_PER_PIXEL = 10


def sky_summary(ra_deg, dec_deg, folder=None, nside=SKY_MAP_NSIDE):
    """Posterior sky position: the direction of the mean unit vector of the samples (immune to the
    0/360° wrap), the radius around it holding 90 % of the samples, and the 50 % and 90 % credible areas
    [deg²]: the smallest sets of HEALPix pixels holding 50 % and 90 % of the samples, at the finest nside (≤ ``nside``)
    whose occupied pixels hold :data:`SAMPLES_PER_PIXEL` samples on average (so a poorly sampled
    posterior gets a coarse map and an honest, large area). With ``folder`` the map is also written as
    ``posterior_sky.fits`` (HEALPix FITS)."""
    ra, dec = np.radians(np.asarray(ra_deg, dtype=float)), np.radians(np.asarray(dec_deg, dtype=float))
    ok = np.isfinite(ra) & np.isfinite(dec)
    ra, dec = ra[ok], dec[ok]
    if ra.size == 0:
        return None
    v = unit_vectors(ra, dec).mean(axis=0)
    norm = float(np.linalg.norm(v))
    ra0 = float(np.arctan2(v[1], v[0]) % (2 * np.pi))
    dec0 = float(np.arcsin(np.clip(v[2] / norm, -1, 1))) if norm > 0 else 0.0
    sep = np.degrees(angular_separation(ra0, dec0, ra, dec))
    while True:
        prob = posterior_sky_map(ra, dec, nside)
        if nside == 1 or ra.size / max(np.count_nonzero(prob), 1) >= SAMPLES_PER_PIXEL:
            break
        nside //= 2
    out = {"ra": float(np.degrees(ra0)), "dec": float(np.degrees(dec0)),
           "median_offset_deg": float(np.median(sep)), "radius_90_deg": float(np.percentile(sep, 90)),
           "credible_area_50_deg2": credible_area(prob, 0.5),
           "credible_area_90_deg2": credible_area(prob, 0.9), "map_nside": int(nside),
           "pixel_area_deg2": float(4 * np.pi / prob.size * (180 / np.pi) ** 2),
           "n_samples": int(ra.size),
           "method": "mean unit vector of the samples; 50 % and 90 % areas from the smallest sets of HEALPix "
                     f"pixels holding 50 % and 90 % of the samples, at the finest nside with >= {SAMPLES_PER_PIXEL} samples per "
                     "occupied pixel"}
    if folder is not None:
        write_healpix_map(Path(folder) / "posterior_sky.fits", {"PROB": prob}, nside=nside,
                          units={"PROB": "pix-1"},
                          description="posterior probability per pixel of the follow-up (sums to 1)")
        out["map_file"] = "posterior_sky.fits"
    return out


#: entries of a noise-model statement that say where the model came from, not what it is (the table's path,
#: whether a fitted table was reused, the file's own checksum with its provenance), left out of the checksum:
#: the same model reached by another run folder or by a resumed run has the same checksum
_NOT_THE_MODEL = frozenset({"table", "table_checksum", "reused", "meaning", "notes"})


def noise_model_checksum(statement) -> str:
    """SHA-256 (hex) of a noise-model statement's canonical JSON (sorted keys, NaN as null), without the
    entries of :data:`_NOT_THE_MODEL`."""
    model = {k: v for k, v in dict(statement).items() if k not in _NOT_THE_MODEL}
    text = json.dumps(model, sort_keys=True, separators=(",", ":"), default=str, allow_nan=True)
    return hashlib.sha256(text.encode()).hexdigest()


def _sampled_distance_likelihood(likelihood, array, target, band, options):
    """``--pulsar-distances sample-distance``: the likelihood with every pulsar's distance sampled except
    those whose pulsar-term phase stays free by :func:`cwsearch.inference.likelihood.free_pulsar_phases`
    (σ_L (1 + Ω̂·p̂) > λ_gw at the band's highest frequency; Ω̂ at the target's position, or the
    all-sky mean of 1 + Ω̂·p̂, which is 1, without one), and the statement for summary.json."""
    f_top = 10.0 ** band[1]
    if target.ra is not None:
        _, _, odp = waveform.antenna_pattern(target.ra, target.dec, array.positions)
        odp = np.asarray(odp, dtype=float).reshape(-1)
        where = "at the target's position"
    else:
        odp = np.zeros(len(array))
        where = "sky-averaged (1 + Omega.p has mean 1 over the sky)"
    free = free_pulsar_phases(likelihood.pulsar_distance_errors, odp, f_top)
    sampled = ~free
    like = likelihood.with_sampled_distances(sampled)
    dim = 8 + int(sampled.sum())
    if options.walkers < 2 * dim + 2:
        raise InputError(f"--walkers must be at least {2 * dim + 2} with {dim - 8} sampled pulsar distances "
                         f"(ptemcee needs more than 2 x {dim} parameters); raise --walkers")
    names = [p.name for p in array]
    statement = {
        "mode": "sample-distance",
        "sampled": [names[i] for i in np.flatnonzero(sampled)],
        "free_phase": [names[i] for i in np.flatnonzero(free)],
        "rule": (f"a pulsar's pulsar-term phase is free (uniform, marginalised) when distance_err x (1 + Omega.p) > "
                 f"lambda_gw = c / f, with f = {f_top:.4g} Hz (the band's top) and Omega.p {where}: the Gaussian "
                 "distance prior then spreads the pulsar-term GW phase by >= 2 pi and its wrapped distribution is "
                 "uniform to 5e-9; every other pulsar's distance is sampled (Gaussian prior distance +- distance_err, "
                 "truncated at > 0) and its phase is coherent from it"),
    }
    return like, statement


def _with_pulsar_columns(table, likelihood, samples, rng):
    """``table`` plus, per pulsar NAME, ``distance_NAME`` [kpc] (sampled, or the catalogue value) and
    ``pulsar_phase_NAME`` [rad] (coherent from the sampled distance, or drawn from its conditional
    posterior: :meth:`cwsearch.inference.likelihood.Likelihood.draw_pulsar_phases`)."""
    out = table.copy(copy_data=False)
    par = likelihood.physical(samples)
    names = [p.name for p in likelihood.array]
    phases = likelihood.draw_pulsar_phases(samples, rng) if len(samples) else np.zeros((0, len(names)))
    sampled = set(int(p) for p in likelihood.sampled_distances)
    for p, name in enumerate(names):
        out[f"distance_{name}"] = par["pulsar_distance"][:, p] * u.kpc
    for p, name in enumerate(names):
        out[f"pulsar_phase_{name}"] = phases[:, p] * u.rad
    correlated = getattr(getattr(likelihood, "noise_model", None), "correlated", False)
    out.meta["pulsar_columns"] = {
        "distance_NAME": "sampled (Gaussian prior, truncated > 0)" if sampled else "catalogue value (held fixed)",
        "sampled_distances": [names[p] for p in sorted(sampled)],
        "pulsar_phase_NAME": (
            "none: Earth term only (NaN)" if not likelihood.pulsar_term else
            "orbital phase of the pulsar term at the reference time, in [0, pi) (the waveform has period pi); "
            "for a sampled distance the coherent value Phi(t0 - L(1 + Omega.p)/c); otherwise one draw per sample "
            "from the phase's conditional posterior given the sample's other parameters, on a 256-point grid "
            "with a uniform offset inside the drawn cell (seeded from the run's seed)"
            + ("; with the correlated background each pulsar's own term only (the cross-pulsar pulsar-term "
               "coupling of the mean field left out)" if correlated else "")),
    }
    return out


def _follow_one(likelihood, target, array, folder, options, seed_seq, progress, other=None, scan_start=None,
                noise_statement=None, scan_maps=None):

    span = array.span
    if target.frequency is None:
        band = (np.log10(1.0 / span), np.log10(options.max_frequency))
    else:
        half = options.frequency_window / span
        band = (np.log10(max(target.frequency - half, 0.5 / span)), np.log10(target.frequency + half))
    if band[0] >= band[1]:
        raise InputError("empty frequency band for the follow-up; check --max-frequency / --frequency")
    sky_cap = None
    if getattr(options, "sky_radius", None) is not None and target.ra is not None:
        sky_cap = (float(target.ra), float(target.dec), math.radians(float(options.sky_radius)))
    distances = None
    if getattr(options, "pulsar_distances", "marginalise-phase") == "sample-distance":
        likelihood, distances = _sampled_distance_likelihood(likelihood, array, target, band, options)
    prior = Prior(likelihood, band, uniform_strain=options.strain_prior == "uniform", sky_cap=sky_cap)
    init_seq, sampler_seq = seed_seq.spawn(2)
    rng = np.random.default_rng(init_seq)
    settings = sampling.SamplerSettings(
        walkers=options.walkers, temperatures=options.temperatures, max_temperature=options.max_temperature,
        ess=options.ess, max_iterations=options.max_iterations,
        max_time=float("inf") if options.max_time is None else float(options.max_time),
        checkpoint_every=options.checkpoint_every, adapt_iterations=options.adapt_iterations,
        max_temperatures=options.max_temperatures)
    ntemps = options.temperatures
    betas = np.geomspace(1.0, 1.0 / options.max_temperature, ntemps) if ntemps > 1 else np.ones(1)
    initial = initial_positions(prior, target, span, (options.temperatures, options.walkers), rng,
                                scan_start=scan_start, betas=betas)
    start_note = ("sky and frequency from the scan's Fe sky map and spectrum tempered by each chain's "
                  "temperature (exp(beta Fe)); strain, orientation and chirp mass from the prior"
                  if scan_start is not None else "walkers drawn from the prior (the whole search window)")
    fingerprint = {"target": [target.frequency, target.ra, target.dec], "band": list(band),
                   "pulsar_distances": likelihood.pulsar_distance_mode,
                   "sampled_distances": [int(p) for p in likelihood.sampled_distances],
                   "start": "scan" if scan_start is not None else "prior",
                   "pulsar_term": likelihood.pulsar_term, "evolution": likelihood.evolution,
                   "strain_prior": options.strain_prior, "n_pulsars": len(array), "sky_cap": sky_cap,
                   "phase_grid": likelihood.phase_grid}
    use_jumps = bool(getattr(options, "mode_jumps", True)) and scan_maps is not None
    jump = mode_jump_proposal(scan_maps, prior) if use_jumps else None
    fingerprint["mode_jumps"] = use_jumps
    result = sampling.run_sampler(prior, likelihood.batch, initial, settings, seed=sampler_seq,
                                  checkpoint=folder / "checkpoint.npz", resume=options.resume,
                                  fingerprint=fingerprint, progress=progress, label=target.label, mode_jump=jump)
    details = result.sample_details()
    samples = details["samples"]
    table = posterior_table(likelihood, samples)
    names = list(likelihood.names)
    tau = dict(zip(names, map(float, result.autocorrelation_time)))
    phase_seq = np.random.SeedSequence(seed_seq.entropy, spawn_key=tuple(seed_seq.spawn_key) + (7,))
    posterior_file = _with_pulsar_columns(_with_sample_columns(table, details, result, tau), likelihood, samples,
                                          np.random.default_rng(phase_seq))
    model_obj = getattr(likelihood, "noise_model", None)
    statement = {**(stage_noise_statement(array, None) if noise_statement is None else noise_statement),
                 **(model_obj.describe() if model_obj is not None else {})}
    posterior_file.meta["noise_model_checksum"] = noise_model_checksum(statement)
    posterior_file.meta["noise_model_checksum_of"] = ("SHA-256 of the canonical JSON (sorted keys) of summary.json's "
                                                      "noise_model entry without its table path, table checksum, "
                                                      "reuse flag, meaning and notes (the model's values only)")
    write_table_atomic(folder / "posterior.ecsv", posterior_file)
    pairs = [[float(1 / a), float(1 / b)] for a, b in zip(result.betas[:-1], result.betas[1:])]
    comparison = _background_comparison(likelihood, other, result, details, samples, progress)
    summary = {
        "target": target.label,
        "start": {"frequency": target.frequency,
                  "ra": None if target.ra is None else float(np.degrees(target.ra)),
                  "dec": None if target.dec is None else float(np.degrees(target.dec)),
                  "candidate_row": target.source or None},
        "log_bayes_factor": result.log_evidence,
        "log_bayes_factor_error": result.log_evidence_error,
        "bayes_factor_meaning": comparison["meaning"],
        "background_comparison": comparison,
        "parameters": _intervals(table),
        "sky": sky_summary(table["ra"], table["dec"], folder),
        "warnings": list(result.warnings),
        "converged": bool(result.converged),
        "stopped_by": result.stopped_by,
        "waiting_for": result.waiting_for,
        "autocorrelation_time": tau,
        "chain_length_over_tau": dict(zip(names, map(float, result.chain_taus()))),
        "effective_sample_size": result.ess,
        "n_samples": int(samples.shape[0]),
        "iterations": result.iterations,
        "burn_in": result.burn_in,
        "adaptation_end": result.adaptation_end,
        "stopping_rule": {"ess": options.ess, "min_chain_taus": settings.min_chain_taus,
                          "tau_tolerance_per_check": settings.tau_tolerance, "tau_checks": settings.tau_checks,
                          "check_every": settings.check_every, "burn_in": "first quarter, at least the adaptation",
                          "start": start_note},
        "swap_acceptance": [float(x) if np.isfinite(x) else None for x in result.swap_acceptance],
        "swap_pairs": pairs,
        "min_swap_acceptance": settings.min_swap_acceptance,
        "ladder_history": result.ladder_history,
        "acceptance": [float(x) for x in np.nan_to_num(result.acceptance)],
        "mode_jump": _mode_jump_summary(jump, result, settings, options),
        "temperatures": [float(1 / b) for b in result.betas],
        "max_log_likelihood": float(result.log_likelihood.max()) if result.iterations else None,
        "likelihood_evaluations": result.evaluations,
        "wall_time": result.wall_time,
        "model": {"pulsar_term": likelihood.pulsar_term, "pulsar_phases": "marginalised" if likelihood.pulsar_term
                  else "none", "pulsar_distances": "catalogue values" if distances is None else distances,
                  "evolution": likelihood.evolution,
                  "strain_prior": options.strain_prior, "log10_frequency_band": list(band),
                  "sky_prior": ("isotropic (the whole sky)" if sky_cap is None else
                                f"uniform on a cap of {options.sky_radius:g} deg around ra = "
                                f"{math.degrees(sky_cap[0]):.4f}, dec = {math.degrees(sky_cap[1]):.4f} deg"),
                  "chirp_mass_range": list(CHIRP_MASS_RANGE), "strain_range": list(STRAIN_RANGE)},
    }
    noise_model = getattr(likelihood, "noise_model", None)
    if noise_model is not None:
        summary["noise_model"] = noise_model.describe()
        if noise_model.correlated and likelihood.pulsar_term:
            summary["model"]["pulsar_phases"] = ("marginalised (pulsar-term cross terms of different pulsars "
                                                 "in variational mean field)")
    return summary, result, table


def _mode_jump_summary(jump, result, settings, options):
    """summary.json's ``mode_jump`` entry: on or off (and why), the proposal, and the acceptance per temperature."""
    if jump is None:
        why = ("turned off (mode_jumps = false / --no-mode-jumps)" if not getattr(options, "mode_jumps", True) else
               "no scan sky map (scan/fe_sky.fits) to build the proposal from")
        return {"used": False, "note": why}
    return {"used": True, "every": int(settings.mode_jump_every),
            "proposal": {**jump.describe(), "fe_tempering": MODE_JUMP_FE_TEMPERING,
                         "meaning": "(1 - uniform_fraction) x exp(fe_tempering Fe_sky) per HEALPix pixel x "
                                    "exp(fe_tempering Fe_spectrum) per scan frequency bin + uniform_fraction x "
                                    "uniform over the sphere and the band; (ra, sin dec) uniform within a "
                                    "pixel, log10 f uniform within a bin"},
            "acceptance": [float(x) for x in result.mode_jump_acceptance],
            "proposals": [int(x) for x in result.mode_jump_proposals],
            "acceptance_meaning": "fraction of accepted mode-jump proposals per temperature (T = 1 first), "
                                  "since the last change of the ladder"}


def _background_comparison(likelihood, other, result, details, samples, progress):
    """The Bayes factor under the run's background and under the other one (uncorrelated versus
    Hellings–Downs), the second by importance reweighting of this run's posterior samples
    (:func:`cwsearch.inference.correlated_likelihood.reweighted_log_bayes_factor`)."""

    model = getattr(likelihood, "noise_model", None)
    kind = model.kind if model is not None else "none"
    label = {"hellings-downs": "Hellings-Downs correlated background", "uncorrelated":
             "uncorrelated common background", "none": "noise without a common background"}
    out = {"meaning": f"binary + {label.get(kind, kind)} versus {label.get(kind, kind)} alone",
           "run_model": kind, "log_bayes_factor": {kind: result.log_evidence}}
    if other is None or not result.iterations:
        out["note"] = ("no common process in the noise model: nothing to compare" if other is None else
                       "no samples")
        return out
    other_kind = other.noise_model.kind
    t = time.monotonic()
    rw = reweighted_log_bayes_factor(result.log_evidence, samples, details["log_likelihood"], other,
                                     chain_ess=float(result.ess) if np.isfinite(result.ess) else None)
    out["log_bayes_factor"][other_kind] = rw["log_bayes_factor"]
    out.update({
        "method": (f"{other_kind}: importance reweighting of the {kind} posterior samples with the likelihood "
                   f"ratio exp(lnL_{other_kind} - lnL_{kind}) (ln B_other = ln B + ln mean(w)); not a second "
                   "sampling run"),
        "importance_effective_sample_size": rw["importance_ess"], "n_samples": rw["n_samples"],
        "reweighting_error": rw["error"], "seconds": round(time.monotonic() - t, 2)})
    if rw["n_samples"] and rw["importance_ess"] < max(20.0, 0.05 * rw["n_samples"]):
        out["warning"] = (f"importance ESS {rw['importance_ess']:.0f} of {rw['n_samples']} samples: the two "
                          "posteriors barely overlap and the reweighted Bayes factor is unreliable; follow up "
                          f"again with --common-correlation {other_kind}")
    if kind == "hellings-downs" or other_kind == "hellings-downs":
        hd = out["log_bayes_factor"].get("hellings-downs")
        unc = out["log_bayes_factor"].get("uncorrelated")
        if hd is not None and unc is not None:
            out["difference_uncorrelated_minus_hellings_downs"] = float(unc - hd)
    return out


def run_followup(array, run_dir, options: FollowupOptions = FollowupOptions(), *, noise=None,
                 seed=0, progress=True) -> FollowupResult:
    """Follow up the chosen targets and write ``run_dir/followup/`` (see module docstring).

    ``noise``: :class:`~cwsearch.physics.noise.NoiseSettings` (None: the default settings).
    """
    noise = NoiseSettings() if noise is None else noise
    options.validate()
    run_dir = Path(run_dir)
    targets = select_targets(run_dir, options)
    start = time.monotonic()
    model = dict(pulsar_term=not options.earth_term_only, evolution=options.evolution,
                 phase_grid=options.phase_grid, uniform_strain=options.strain_prior == "uniform")
    likelihood = likelihood_for(array, noise, **model)
    other_noise = other_background(noise)
    other = likelihood_for(array, other_noise, **model) if other_noise is not None else None
    skipped_comparison = False
    if options.pulsar_distances == "sample-distance":
        if getattr(getattr(likelihood, "noise_model", None), "correlated", False):
            raise InputError("--pulsar-distances sample-distance works with a noise model without a correlated common "
                             "process (the correlated likelihood marginalises the pulsar phases in mean field); use "
                             "--pulsar-distances marginalise-phase")
        skipped_comparison, other = other is not None, None
    seqs = np.random.SeedSequence(seed).spawn(len(targets))
    scan_maps = read_scan_start(run_dir) if options.start == "scan" or options.mode_jumps else None
    scan_start = scan_maps if options.start == "scan" else None
    stage = run_dir / "followup"
    summaries, folders, runs = [], [], []
    for target, seq in zip(targets, seqs):
        folder = stage if len(targets) == 1 else stage / target.label
        summary, result, table = _follow_one(likelihood, target, array, folder, options, seq, progress, other,
                                             scan_start=scan_start, noise_statement=stage_noise_statement(array, noise),
                                             scan_maps=scan_maps)
        summary["seed"] = seed
        if skipped_comparison:
            summary["background_comparison"]["note"] = (
                "not computed with --pulsar-distances sample-distance (the other background's likelihood is the "
                "correlated one, which marginalises every pulsar phase)")
        summary["noise_model"] = {**stage_noise_statement(array, noise), **summary.get("noise_model", {})}
        write_json_atomic(folder / "summary.json", summary)
        if not options.no_plots:
            # lazy: matplotlib is loaded only when plots are drawn
            from .plots import plot_followup

            plot_followup(folder, table, result, likelihood, array, target, sky=summary.get("sky"))
        summaries.append(summary)
        folders.append(folder)
        runs.append(result)
    headline = {"targets": [s["target"] for s in summaries],
                "log_bayes_factor": [s["log_bayes_factor"] for s in summaries],
                "log_bayes_factor_error": [s["log_bayes_factor_error"] for s in summaries],
                "effective_sample_size": [s["effective_sample_size"] for s in summaries],
                "bayes_factor_meaning": summaries[0]["bayes_factor_meaning"],
                "background_comparison": [s["background_comparison"]["log_bayes_factor"] for s in summaries],
                "folders": [str(f) for f in folders], "seed": seed,
                "wall_time": time.monotonic() - start, "options": asdict(options),
                "noise_model": stage_noise_statement(array, noise)}
    if len(targets) > 1:
        write_json_atomic(stage / "summary.json", headline)
    return FollowupResult(summary=headline if len(targets) > 1 else summaries[0], folders=folders, runs=runs)


__all__ = ["FollowupOptions", "FollowupResult", "run_followup", "Prior", "select_targets", "posterior_table",
           "initial_positions", "read_scan_start", "ScanStart", "mode_jump_proposal", "Target", "OUTPUT_COLUMNS", "SAMPLE_COLUMNS"]
