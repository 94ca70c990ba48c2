"""The host stage's options (:class:`HostsOptions`): ``cwsearch hosts``'s options and the run file's
``[hosts]`` section (:mod:`cwsearch.core.options`). Standard library only; ``stage.py`` re-exports it.

Examples
--------
>>> HostsOptions(completeness=1.5).validate()
Traceback (most recent call last):
...
cwsearch.core.errors.InputError: --completeness must be within [0, 1] (got 1.5)
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

from ...core.errors import InputError
from ...core.options import CLI_ONLY, option

_MODEL = "host model"
_WHERE = "localisation"

#: the black-hole mass - bulge mass relations (their coefficients: cwsearch.physics.relations.RELATIONS)
RELATION_NAMES = ("mcconnell-ma", "kormendy-ho")


@dataclass(frozen=True)
class HostsOptions:
    """Options of the host stage (names = CLI options with dashes -> underscores)."""

    catalog: str | None = option(None, "galaxy catalogue, ECSV or CSV (name, ra, dec, distance [Mpc] or redshift, "
                                       "optional mass proxy and EM period); in a run file, leave it out to skip "
                                       "the host stage", metavar="FILE", required=True)
    columns: str | None = option(None, "column-name mapping for a catalogue with other column names, e.g. "
                                       "'ra=RAJ2000,dec=DEJ2000,distance=Dist'", metavar="MAP")
    completeness: float = option(0.5, "prior probability that the host is in the catalogue, given it lies within "
                                      "the catalogue's distance limit", metavar="C")
    relation: Literal["mcconnell-ma", "kormendy-ho"] = option(
        "mcconnell-ma", "black-hole mass - bulge mass relation: mcconnell-ma (McConnell & Ma 2013) or "
                        "kormendy-ho (Kormendy & Ho 2013)")
    top: int = option(10, "rows in the printed table and hosts in the chirp-mass plot (at most 6 there)",
                      metavar="N")
    distance_limit: float | None = option(None, "catalogue distance limit [Mpc] (not set: its largest distance)",
                                          metavar="MPC", group=_MODEL)
    distance_error: float = option(0.1, "fractional distance error where the catalogue has no distance_err",
                                   metavar="FRAC", group=_MODEL)
    mass_ratio_min: float = option(0.1, "smallest mass ratio q of the log-uniform mass-ratio prior on [q, 1]",
                                   metavar="Q", group=_MODEL)
    period_factor: float = option(1.0, "EM period = period_factor x orbital period (1: the EM period is the "
                                       "orbital period 2/f_gw; 0.5: the GW period)", metavar="X", group=_MODEL)
    sky_bandwidth: float | None = option(None, "sky kernel bandwidth [deg] (not set: Scott's rule from the "
                                               "samples)", metavar="DEG", group=_WHERE)
    resolution: float = option(10.0, "sky resolution [deg, 1 sigma] for a scan candidate without an Fe map",
                               metavar="DEG", group=_WHERE)
    sky_map: str | None = option(None, "Fe sky map (ECSV with pixel, fe) for a scan candidate (not set: the "
                                       "scan's own)", metavar="FILE", group=_WHERE)
    candidate: str | None = option(None, "candidate name candidate_K or row K (1 = best): its follow-up "
                                         "posterior, or the scan candidate when there is no posterior",
                                   metavar="NAME", group=_WHERE, only=CLI_ONLY,
                                   why="the pipeline ranks hosts for every followed-up candidate")
    observed_span: float | None = option(None, "observed span [yr] for the coalescence check (not set: from the "
                                               "dataset, else 15)", metavar="YEARS", group=_MODEL)
    max_samples: int = option(20000, "use at most this many posterior samples (random subset)", metavar="N",
                              group=_WHERE)
    no_plots: bool = option(False, "skip the PNG plots")

    def validate(self):
        """Raise :class:`InputError` for values the host stage cannot use (the catalogue itself is checked when
        the stage runs: a run file may leave it out); returns ``self``."""
        relations = RELATION_NAMES
        if not 0.0 <= self.completeness <= 1.0:
            raise InputError(f"--completeness must be within [0, 1] (got {self.completeness})")
        if self.relation not in relations:
            raise InputError(f"--relation must be one of {', '.join(relations)} (got {self.relation!r})")
        if self.top < 1:
            raise InputError("--top must be >= 1")
        if not 0 < self.mass_ratio_min <= 1:
            raise InputError("--mass-ratio-min must be within (0, 1]")
        if not self.distance_error > 0:
            raise InputError("--distance-error must be > 0")
        if self.distance_limit is not None and not self.distance_limit > 0:
            raise InputError("--distance-limit must be > 0 Mpc")
        if self.sky_bandwidth is not None and not 0 < self.sky_bandwidth < 60:
            raise InputError("--sky-bandwidth must be within (0, 60) deg")
        if not 0 < self.resolution < 90:
            raise InputError("--resolution must be within (0, 90) deg")
        if not self.period_factor > 0:
            raise InputError("--period-factor must be > 0")
        if self.max_samples < 100:
            raise InputError("--max-samples must be >= 100")
        if self.observed_span is not None and not self.observed_span > 0:
            raise InputError("--observed-span must be > 0 yr")
        return self


__all__ = ["HostsOptions", "RELATION_NAMES"]
