"""The data model: a :class:`Pulsar` and an :class:`Array` of them.

Everything downstream (noise weighting, scan, likelihood, limits,
simulation) reads these objects; nothing else reads the dataset files.

Units
-----
``toas`` and ``residuals``, ``sigmas`` are in seconds (TOAs counted from
MJD 0); ``mjd`` keeps the original days; ``ra``, ``dec`` are radians;
``distance`` and ``distance_err`` are kpc (the unit of the trade, stated in
the dataset files); :attr:`Pulsar.light_travel_time` is seconds.

Examples
--------
>>> import numpy as np
>>> from cwsearch.data.model import Pulsar, Array
>>> mjd = np.linspace(53000, 58000, 100)
>>> psr = Pulsar("PSRX01", ra=1.0, dec=0.2, distance=1.2, distance_err=0.1, mjd=mjd,
...              residuals=np.zeros(100), sigmas=np.full(100, 1e-7),
...              backends=np.array(["A"] * 100))
>>> arr = Array([psr])
>>> round(arr.span / 3.15576e7, 2)
13.69
>>> psr.design_matrix.shape
(100, 5)
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..core.constants import DAY_SECONDS, KPC_SECONDS, YEAR_FREQUENCY

DEFAULT_DESIGN_COLUMNS = ("offset", "spin_frequency", "spin_down", "year_sin", "year_cos")


@dataclass
class PulsarNoise:
    """White and red noise settings of one pulsar.

    ``sigma_scale`` and ``sigma_added`` map backend -> multiplicative factor
    and quadrature-added white noise [s]: ``σ_eff² = (scale σ)² + added²``.
    ``red_log10_amplitude``/``red_index`` give a power-law red noise (None: none).
    """

    sigma_scale: dict = field(default_factory=dict)
    sigma_added: dict = field(default_factory=dict)
    red_log10_amplitude: float | None = None
    red_index: float | None = None

    @property
    def has_red_noise(self) -> bool:
        return self.red_log10_amplitude is not None and self.red_index is not None


def default_design_matrix(toas):
    """Timing-model columns: offset, spin frequency, spin-down (t, t²) and yearly sine/cosine.

    ``toas`` in seconds; times are centred and scaled so columns are O(1).
    """
    t = np.asarray(toas, dtype=float)
    centre = 0.5 * (t.min() + t.max())
    half = max(0.5 * (t.max() - t.min()), 1.0)
    x = (t - centre) / half
    year = 2 * np.pi * YEAR_FREQUENCY * t
    return np.column_stack([np.ones_like(t), x, x**2, np.sin(year), np.cos(year)])


class Pulsar:
    """One pulsar: position, distance, TOAs, residuals, uncertainties, backends, timing model, noise.

    Parameters
    ----------
    name : str
    ra, dec : float, radians
    distance, distance_err : float, kpc
    mjd : array (n,), days, strictly increasing
    residuals, sigmas : arrays (n,), seconds (post-fit residuals, TOA uncertainties)
    backends : array (n,) of str
    extra_design : array (n, k) or None
        Timing-model columns in addition to :func:`default_design_matrix`
        (the ``design_*`` columns of the residual file).
    extra_design_names : sequence of str
    noise : :class:`PulsarNoise` or None
    """

    def __init__(self, name, *, ra, dec, distance, distance_err, mjd, residuals, sigmas, backends,
                 extra_design=None, extra_design_names=(), noise=None):
        self.name = str(name)
        self.ra = float(ra)
        self.dec = float(dec)
        self.distance = float(distance)
        self.distance_err = float(distance_err)
        self.mjd = np.ascontiguousarray(mjd, dtype=float)
        self.residuals = np.ascontiguousarray(residuals, dtype=float)
        self.sigmas = np.ascontiguousarray(sigmas, dtype=float)
        self.backends = np.asarray(backends).astype(str)
        n = self.mjd.shape[0]
        if extra_design is None:
            extra_design = np.empty((n, 0))
        self.extra_design = np.ascontiguousarray(extra_design, dtype=float).reshape(n, -1)
        self.extra_design_names = tuple(extra_design_names)
        self.noise = noise if noise is not None else PulsarNoise()
        self.backend_names, self.backend_index = np.unique(self.backends, return_inverse=True)
        self.backend_names = tuple(str(b) for b in self.backend_names)

    @property
    def toas(self):
        """TOAs in seconds since MJD 0."""
        return self.mjd * DAY_SECONDS

    @property
    def position(self):
        """Unit vector towards the pulsar (equatorial frame)."""
        cd = np.cos(self.dec)
        return np.array([cd * np.cos(self.ra), cd * np.sin(self.ra), np.sin(self.dec)])

    @property
    def light_travel_time(self):
        """Distance as light travel time [s]."""
        return self.distance * KPC_SECONDS

    @property
    def design_matrix(self):
        """Full timing-model design matrix (default columns then ``design_*`` columns)."""
        return np.hstack([default_design_matrix(self.toas), self.extra_design])

    @property
    def n_toas(self) -> int:
        return self.mjd.shape[0]

    def effective_sigmas(self):
        """White-noise standard deviation per TOA: ``sqrt((scale σ)² + added²)`` [s]."""
        scale = np.array([self.noise.sigma_scale.get(b, 1.0) for b in self.backend_names])
        added = np.array([self.noise.sigma_added.get(b, 0.0) for b in self.backend_names])
        return np.sqrt((scale[self.backend_index] * self.sigmas) ** 2 + added[self.backend_index] ** 2)

    def with_residuals(self, residuals):
        """A copy of this pulsar with other residuals (same TOAs, noise and timing model)."""
        new = object.__new__(Pulsar)
        new.__dict__.update(self.__dict__)
        new.residuals = np.ascontiguousarray(residuals, dtype=float)
        return new

    def with_noise(self, noise: PulsarNoise):
        """A copy of this pulsar carrying another noise model (same TOAs, residuals and timing model)."""
        new = object.__new__(Pulsar)
        new.__dict__.update(self.__dict__)
        new.noise = noise
        return new

    def __repr__(self):
        return (f"Pulsar({self.name!r}, ra={np.degrees(self.ra):.3f} deg, dec={np.degrees(self.dec):.3f} deg, "
                f"distance={self.distance:.3g} kpc, n_toas={self.n_toas})")


class Array:
    """An ordered set of pulsars with a common time span.

    Indexing by position or by name; iteration yields pulsars.
    ``span`` is the array's total time span [s] (first to last TOA of any
    pulsar), ``start`` and ``end`` its TOA limits [s], and
    ``reference_time`` the epoch t0 at which GW frequency and phase are
    quoted (default: the start of the data).
    """

    def __init__(self, pulsars, reference_time=None):
        self.pulsars = tuple(pulsars)
        if not self.pulsars:
            raise ValueError("an array needs at least one pulsar")
        self.start = min(float(p.toas[0]) for p in self.pulsars)
        self.end = max(float(p.toas[-1]) for p in self.pulsars)
        self.reference_time = self.start if reference_time is None else float(reference_time)
        #: description of the noise model the pulsars carry (source, values, checksums), set by
        #: cwsearch.job.noisemodel.resolve_noise_model; None: as read from the dataset
        self.noise_model = None

    @property
    def span(self) -> float:
        return self.end - self.start

    @property
    def names(self):
        return [p.name for p in self.pulsars]

    @property
    def positions(self):
        """Unit vectors towards the pulsars, shape (N, 3)."""
        return np.array([p.position for p in self.pulsars])

    @property
    def light_travel_times(self):
        return np.array([p.light_travel_time for p in self.pulsars])

    def with_residuals(self, residuals):
        """A copy with other residuals (list of arrays, one per pulsar)."""
        return Array([p.with_residuals(r) for p, r in zip(self.pulsars, residuals)], self.reference_time)

    def with_noise(self, noise):
        """A copy whose pulsars carry other noise models (``noise``: name -> :class:`PulsarNoise`). The data
        are unchanged, so the copy keeps the dataset folder it was read from (``source``, where the plots
        find ``injection.json``); :meth:`with_residuals` does not (other data)."""
        out = Array([p.with_noise(noise[p.name]) for p in self.pulsars], self.reference_time)
        if getattr(self, "source", None) is not None:
            out.source = self.source
        return out

    def __len__(self):
        return len(self.pulsars)

    def __iter__(self):
        return iter(self.pulsars)

    def __getitem__(self, key):
        if isinstance(key, str):
            for p in self.pulsars:
                if p.name == key:
                    return p
            raise KeyError(key)
        return self.pulsars[key]

    def __repr__(self):
        return f"Array({len(self)} pulsars, span={self.span / 3.15576e7:.2f} yr)"


__all__ = ["DEFAULT_DESIGN_COLUMNS", "PulsarNoise", "default_design_matrix", "Pulsar", "Array"]
