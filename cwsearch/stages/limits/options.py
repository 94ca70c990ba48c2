"""The limits stage's options (:class:`LimitsOptions`, and the hand-given :class:`Galaxy` rows it checks):
``cwsearch limits``'s options and the run file's ``[limits]`` section (:mod:`cwsearch.core.options`).
Standard library only; ``stage.py`` re-exports it.

Examples
--------
>>> parse_galaxies([("G1", "10", "-5.5", "20")])
[Galaxy(name='G1', ra=10.0, dec=-5.5, distance=20.0)]
>>> LimitsOptions(method="maybe").validate()
Traceback (most recent call last):
...
cwsearch.core.errors.InputError: option --method: must be one of bayes, frequentist, both, not 'maybe'
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from typing import Literal

from ...core.errors import InputError
from ...core.options import CLI_ONLY, option

METHODS = ("bayes", "frequentist", "both")
#: names of the quadrature presets (their node counts: cwsearch.stages.limits.stage.QUADRATURE)
QUADRATURE_NAMES = ("fast", "standard", "fine")
#: most local worker processes
MAX_WORKERS = 1024
#: default distance draws of --pulsar-term (cwsearch.inference.pulsar_term_limits.DEFAULT_DRAWS)
PULSAR_TERM_DRAWS = 256

_G = "limits"
_RUNNER = ("where the work runs is the run file's [execution] section (the same for every stage), not an "
           "input of the limits")


@dataclass(frozen=True)
class Galaxy:
    """A named galaxy: position [deg] and luminosity distance [Mpc]."""

    name: str
    ra: float
    dec: float
    distance: float


def parse_galaxies(entries):
    """:class:`Galaxy` objects from ``(NAME, RA_DEG, DEC_DEG, DISTANCE_MPC)`` tuples (CLI/TOML)."""
    out = []
    for k, entry in enumerate(entries or (), start=1):
        if isinstance(entry, Galaxy):
            out.append(entry)
            continue
        if len(entry) != 4:
            raise InputError(f"--galaxy number {k} needs NAME RA DEC DISTANCE_MPC, got {len(entry)} values")
        name = str(entry[0])
        try:
            ra, dec, dist = (float(v) for v in entry[1:])
        except (TypeError, ValueError):
            raise InputError(f"--galaxy {name}: RA, DEC and DISTANCE_MPC must be numbers") from None
        check_galaxy(name, ra, dec, dist, where=f"--galaxy {name}")
        out.append(Galaxy(name, ra, dec, dist))
    return out


def check_galaxy(name, ra, dec, dist, where, file=None, row=None):
    """Refuse a galaxy outside the sky or at a non-positive distance (:class:`InputError` naming ``where``)."""
    if not (0.0 <= ra <= 360.0):
        raise InputError(f"{where}: ra must be in [0, 360] deg, got {ra}", file=file, row=row, column="ra")
    if not (-90.0 <= dec <= 90.0):
        raise InputError(f"{where}: dec must be in [-90, 90] deg, got {dec}", file=file, row=row, column="dec")
    if not (dist > 0 and math.isfinite(dist)):
        raise InputError(f"{where}: distance must be > 0 Mpc, got {dist}", file=file, row=row,
                         column="distance")


@dataclass(frozen=True)
class LimitsOptions:
    """Options of the limits stage (CLI options of ``cwsearch limits``; ``[limits]`` in a run file).

    Attributes
    ----------
    fmin, fmax : float or None
        Frequency band [Hz]; defaults 1/T_span and min(1e-7 Hz, the scan's Nyquist-like limit).
    oversample : int
        Frequency spacing 1/(oversample · T_span).
    nside : int
        HEALPix resolution (power of two) of the sky grid.
    sky_frequency : float or None
        Frequency [Hz] of ``sky_limits.ecsv`` (nearest bin); default the most sensitive bin.
    method : ``"bayes"``, ``"frequentist"`` or ``"both"``
        ``strain_95`` columns use bayes unless the method is ``frequentist``.
        ``bayes`` also reports the (cheap) frequentist limit in the frequency
        table and the summary; ``both`` adds it to the sky and galaxy tables;
        ``frequentist`` computes only that one.
    workers : int or None
        Local worker processes (None or 0: one per CPU).
    scheduler : str or None
        Address of a running dask.distributed scheduler (overrides ``workers``).
    galaxy : tuple of (name, ra [deg], dec [deg], distance [Mpc])
        Galaxies for chirp-mass limits.
    catalog : str or None
        Galaxy catalogue (ECSV/CSV) to take ``select`` galaxies from.
    select : tuple of str
        Galaxy names in ``catalog`` (each item may list several, comma-separated).
    mcmc_check : int or None
        Pixel at which to compare the quadrature limit with the sampler (at the sky frequency).
    quadrature : ``"fast"``, ``"standard"`` or ``"fine"``
        Angle-grid size of the Bayesian quadrature (see ``stage.QUADRATURE``).
    pulsar_term : bool
        Bayesian limit with the pulsar term (distances marginalised; docs/design.md §9).
    pulsar_term_draws : int
        Monte Carlo draws of the pulsar distances for ``pulsar_term``.
    no_plots : bool
        Skip the PNG plots.
    """

    fmin: float | None = option(None, "lowest GW frequency [Hz] (not set: 1/T_span)", metavar="HZ", group=_G)
    fmax: float | None = option(None, "highest GW frequency [Hz] (not set: min(1e-7, 1/(2 x median TOA spacing)): "
                                      "lower than the scan's default because every limit frequency costs a "
                                      "quadrature over every sky pixel)", metavar="HZ", group=_G)
    oversample: int = option(1, "frequency spacing 1/(oversample x T_span)", metavar="N", group=_G)
    nside: int = option(8, "HEALPix resolution of the sky map, a power of two (12 nside^2 pixels)", group=_G)
    sky_frequency: float | None = option(None, "frequency [Hz] of sky_limits.ecsv and the sky map (not set: the "
                                               "most sensitive bin)", metavar="HZ", group=_G)
    method: Literal["bayes", "frequentist", "both"] = option(
        "bayes", "bayes: quadrature posterior, uniform strain prior (the frequentist limit is reported alongside); "
                 "frequentist: Fe-based only; both: frequentist columns in the sky and galaxy tables too", group=_G)
    workers: int | None = option(None, "local worker processes (not set: one per CPU; 1 = no extra processes)",
                                 metavar="N", group="execution", only=CLI_ONLY, why=_RUNNER)
    scheduler: str | None = option(None, "run the pixel x frequency tasks on a running Dask cluster, e.g. "
                                         "tcp://10.0.0.5:8786", metavar="ADDRESS", group="execution",
                                   only=CLI_ONLY, why=_RUNNER)
    galaxy: tuple[tuple[str, float, float, float], ...] = option(
        (), "chirp-mass limits for a galaxy at RA, DEC [deg] and luminosity distance [Mpc] (repeatable; in a run "
            "file a list of [name, ra, dec, distance])", metavar=("NAME", "RA", "DEC", "DISTANCE_MPC"), group=_G)
    catalog: str | None = option(None, "galaxy catalogue (ECSV or CSV: name, ra, dec, distance [Mpc] or redshift) "
                                       "to take --select galaxies from", metavar="FILE", group=_G)
    select: tuple[str, ...] = option((), "galaxies of the catalogue to compute chirp-mass limits for (each item may "
                                         "list several, comma-separated; repeatable)", metavar="NAME[,NAME..]",
                                     group=_G)
    mcmc_check: int | None = option(None, "also sample the posterior at this pixel (sky frequency) and compare it "
                                          "with the quadrature limit", metavar="PIXEL", group=_G)
    quadrature: Literal["fast", "standard", "fine"] = option(
        "standard", "angle-grid size of the Bayesian quadrature: fast, standard (~0.3 % worst case) or fine",
        group=_G)
    pulsar_term: bool = option(False, "Bayesian limit with the pulsar term: pulsar distances marginalised over "
                                      "their priors by Monte Carlo (exact per draw; monochromatic approximation); "
                                      "costs about --pulsar-term-draws times the Earth-term limit", group=_G)
    pulsar_term_draws: int = option(PULSAR_TERM_DRAWS, "distance draws of --pulsar-term (its Monte Carlo error "
                                                       "falls as 1/sqrt(N))", metavar="N", group=_G)
    no_plots: bool = option(False, "skip the PNG plots", group=_G)

    def validate(self):
        """Raise :class:`InputError` for values the stage cannot use; returns self."""
        def bad(name, why):
            raise InputError(f"option --{name.replace('_', '-')}: {why}")

        for name in ("fmin", "fmax", "sky_frequency"):
            v = getattr(self, name)
            if v is not None and not (float(v) > 0 and math.isfinite(float(v))):
                bad(name, f"must be > 0 Hz, not {v}")
        if self.fmin is not None and self.fmax is not None and not self.fmax > self.fmin:
            bad("fmax", f"must be above --fmin ({self.fmax} <= {self.fmin})")
        if not (isinstance(self.oversample, numbers.Integral) and self.oversample >= 1):
            bad("oversample", f"must be an integer >= 1, not {self.oversample}")
        nside = int(self.nside)
        if nside != self.nside or nside < 1 or nside & (nside - 1) or nside > 256:
            bad("nside", f"must be a power of two between 1 and 256, not {self.nside}")
        if self.method not in METHODS:
            bad("method", f"must be one of {', '.join(METHODS)}, not {self.method!r}")
        if self.quadrature not in QUADRATURE_NAMES:
            bad("quadrature", f"must be one of {', '.join(QUADRATURE_NAMES)}, not {self.quadrature!r}")
        if self.workers is not None and (int(self.workers) != self.workers or self.workers < 0):
            bad("workers", f"must be an integer >= 1 (0: one per CPU), not {self.workers}")
        if self.mcmc_check is not None and not (0 <= int(self.mcmc_check) < 12 * nside * nside):
            bad("mcmc_check", f"pixel must be in 0..{12 * nside * nside - 1} for nside {nside}, "
                f"not {self.mcmc_check}")
        if self.select and not self.catalog:
            bad("select", "needs --catalog FILE")
        if self.workers is not None and self.workers > MAX_WORKERS:
            bad("workers", f"at most {MAX_WORKERS}, not {self.workers}")
        if not (isinstance(self.pulsar_term_draws, numbers.Integral) and 2 <= self.pulsar_term_draws <= 100_000):
            bad("pulsar_term_draws", f"must be an integer between 2 and 100000, not {self.pulsar_term_draws}")
        if self.pulsar_term and self.method == "frequentist":
            bad("pulsar_term", "is a Bayesian limit; use --method bayes or both")
        parse_galaxies(self.galaxy)   # a bad galaxy is refused now (and by `run --check`), not mid-run
        return self


__all__ = ["LimitsOptions", "Galaxy", "parse_galaxies", "check_galaxy", "METHODS", "QUADRATURE_NAMES",
           "MAX_WORKERS", "PULSAR_TERM_DRAWS"]
