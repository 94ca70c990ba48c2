"""The follow-up stage's options (:class:`FollowupOptions`): ``cwsearch followup``'s options and the run
file's ``[followup]`` section (:mod:`cwsearch.core.options`). Standard library only; ``stage.py``
re-exports it.

Examples
--------
>>> FollowupOptions(walkers=17).validate()
Traceback (most recent call last):
...
cwsearch.core.errors.InputError: --walkers must be even and at least 18 (ptemcee needs > 2 x 8 parameters)
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from ...core.errors import InputError
from ...core.options import CLI_ONLY, option
from ...core.safeio import check_count

_TARGET = "what to follow"
_MODEL = "signal model"
_SAMPLER = "sampler"
_PICKED = ("the pipeline follows every scan candidate below [followup] fap_threshold (at most max_candidates), "
           "so a run file does not pick the target by hand")


@dataclass(frozen=True)
class FollowupOptions:
    """Options of the follow-up stage; names equal the CLI options (dashes -> underscores)."""

    candidate: int | str | None = option(None, "follow row K (1 = best) of scan/candidates.ecsv; its name "
                                               "candidate_K works too", metavar="K|candidate_K", group=_TARGET,
                                         only=CLI_ONLY, why=_PICKED)
    top: int = option(1, "follow the N best candidates (a subfolder each when N > 1)", metavar="N", group=_TARGET,
                      only=CLI_ONLY, why=_PICKED)
    frequency: float | None = option(None, "explicit target frequency [Hz] (with --ra, --dec)", metavar="HZ",
                                     group=_TARGET, only=CLI_ONLY, why=_PICKED)
    ra: float | None = option(None, "explicit target right ascension [deg]", metavar="DEG", group=_TARGET,
                              only=CLI_ONLY, why=_PICKED)
    dec: float | None = option(None, "explicit target declination [deg]", metavar="DEG", group=_TARGET,
                               only=CLI_ONLY, why=_PICKED)
    all_sky: bool = option(False, "no target: start from the prior over the whole band", group=_TARGET,
                           only=CLI_ONLY, why=_PICKED)
    sky_radius: float | None = option(None, "bound the sky prior to a cap of this radius [deg] around --ra, --dec "
                                            "(a targeted follow-up, e.g. of a catalogue target from cwsearch "
                                            "targets; not set: the whole sky)", metavar="DEG", group=_TARGET,
                                      only=CLI_ONLY, why=_PICKED)
    resume: bool = option(False, "continue from the checkpoint in the output folder", group=_SAMPLER,
                          only=CLI_ONLY, why="an interrupted run resumes by itself (the pipeline's skipping and "
                                             "the sampler checkpoint)")
    ess: float = option(1000.0, "the sampler stops at this effective sample size (the demo uses 250; 1000 for "
                                "results you publish) ...", group=_SAMPLER)
    max_iterations: int = option(20000, "... or after this many iterations", metavar="N", group=_SAMPLER)
    max_time: float | None = option(None, "... or after this many seconds of wall time (not set: no limit; a time "
                                          "limit makes the result depend on the machine's speed)",
                                    metavar="SECONDS", group=_SAMPLER)
    temperatures: int = option(10, "temperatures of the parallel-tempered ladder (raise if the Bayes factor's "
                                   "error is large)", metavar="N", group=_SAMPLER)
    walkers: int = option(32, "walkers per temperature (even, at least 18)", metavar="N", group=_SAMPLER)
    max_temperature: float = option(1e6, "hottest temperature of the ladder (raise it if the evidence error is "
                                         "large)", metavar="T", group=_SAMPLER)
    earth_term_only: bool = option(False, "drop the pulsar term (Earth term only)", group=_MODEL)
    evolution: Literal["full", "pulsar-frequency", "monochromatic"] = option(
        "full", "frequency evolution: full, pulsar-frequency or monochromatic", group=_MODEL)
    frequency_window: float = option(5.0, "prior on the GW frequency: this many bins of 1/T_span either side of "
                                          "the target's frequency", metavar="BINS", group=_TARGET)
    max_frequency: float = option(1e-7, "upper edge of the frequency band [Hz] of an all-sky follow-up "
                                        "(--all-sky)", metavar="HZ", group=_TARGET)
    strain_prior: Literal["log-uniform", "uniform"] = option(
        "log-uniform", "strain prior: log-uniform for detection, uniform for upper limits", group=_MODEL)
    pulsar_distances: Literal["marginalise-phase", "sample-distance"] = option(
        "marginalise-phase", "pulsar distances: 'marginalise-phase' holds each distance at its catalogue value and "
                             "marginalises the pulsar-term phase; 'sample-distance' samples each distance with a "
                             "Gaussian prior (distance, distance_err; > 0) and makes the phase coherent from it, "
                             "except for pulsars with distance_err x (1 + Omega.p) > one GW wavelength, whose phase "
                             "stays free (listed in summary.json)", group=_MODEL)
    phase_grid: int = option(0, "points of the pulsar-phase marginalisation grid (0: chosen per pulsar, error "
                                "< 1e-13)", metavar="K", group=_MODEL)
    start: Literal["scan", "prior"] = option(
        "scan", "where the walkers start: 'scan' draws each temperature's sky positions and frequencies from the "
                "scan's Fe sky map and spectrum tempered by that temperature (exp(beta Fe), the profile "
                "likelihood: hot chains broad, the cold chain near the peak), the other parameters from the "
                "prior; 'prior' draws everything from the prior (also used when the scan left no map)",
        group=_SAMPLER)
    mode_jumps: bool = option(
        True, "every 10 iterations, propose each walker a new sky position and frequency drawn from the scan's "
              "Fe sky map and spectrum (80 %, exp(Fe / 2)) or uniformly (20 %), accepted by Metropolis-Hastings, "
              "to move between sky and frequency modes (needs the scan's maps; otherwise off)",
        cli_help="no mode-jump moves between sky and frequency modes (on by default when the scan left its Fe "
                 "sky map: every 10 iterations each walker proposes a sky position and frequency drawn from the "
                 "scan's Fe maps, accepted by Metropolis-Hastings)", group=_SAMPLER)
    checkpoint_every: int = option(100, "write the sampler checkpoint every this many iterations (a killed run "
                                        "resumes from it)", metavar="N", group=_SAMPLER)
    adapt_iterations: int = option(500, "adapt the temperature ladder during the first this many iterations",
                                   metavar="N", group=_SAMPLER)
    max_temperatures: int | None = option(None, "the ladder may grow to this many temperatures where neighbours "
                                                "rarely swap (not set: 3 x temperatures, at most 40; equal to "
                                                "temperatures keeps it fixed)", metavar="N", group=_SAMPLER)
    no_plots: bool = option(False, "skip the corner, sky, trace and residual plots (PNG)")

    def validate(self):
        evolution_modes = ("full", "pulsar-frequency", "monochromatic")  # the Literal above
        if self.evolution not in evolution_modes:
            raise InputError(f"--evolution must be one of {', '.join(evolution_modes)}, not {self.evolution!r}")
        if self.start not in ("scan", "prior"):
            raise InputError(f"--start must be 'scan' or 'prior', not {self.start!r}")
        if self.pulsar_distances not in ("marginalise-phase", "sample-distance"):
            raise InputError(f"--pulsar-distances must be 'marginalise-phase' or 'sample-distance', not "
                             f"{self.pulsar_distances!r}")
        if self.pulsar_distances == "sample-distance" and self.earth_term_only:
            raise InputError("--pulsar-distances sample-distance needs the pulsar term (drop --earth-term-only)")
        if self.strain_prior not in ("log-uniform", "uniform"):
            raise InputError("--strain-prior must be 'log-uniform' or 'uniform'")
        if self.walkers < 18 or self.walkers % 2:
            raise InputError("--walkers must be even and at least 18 (ptemcee needs > 2 x 8 parameters)")
        if self.temperatures < 1 or self.max_temperature <= 1:
            raise InputError("--temperatures must be >= 1 and --max-temperature > 1")
        if self.max_temperatures is not None and self.max_temperatures < 1:
            raise InputError("--max-temperatures must be >= 1")
        explicit = [v is not None for v in (self.frequency, self.ra, self.dec)]
        if any(explicit) and not all(explicit):
            raise InputError("an explicit target needs all of --frequency, --ra and --dec")
        if self.sky_radius is not None:
            if not all(explicit):
                raise InputError("--sky-radius needs an explicit target (--frequency, --ra and --dec)")
            if not (math.isfinite(self.sky_radius) and 0 < self.sky_radius <= 180):
                raise InputError(f"--sky-radius must be within (0, 180] deg, not {self.sky_radius}")
        if self.ess <= 0 or self.max_iterations <= 0:
            raise InputError("--ess and --max-iterations must be positive")
        if self.max_time is not None and not (math.isfinite(self.max_time) and self.max_time > 0):
            raise InputError(f"--max-time must be a positive number of seconds, not {self.max_time}")
        check_count(self.max_iterations, "max_iterations", minimum=1, maximum=10_000_000)
        check_count(self.walkers, "walkers", minimum=18, maximum=10_000)
        check_count(self.temperatures, "temperatures", minimum=1, maximum=200)
        check_count(self.checkpoint_every, "checkpoint_every", minimum=1, maximum=10_000_000)
        if not math.isfinite(self.ess):   # a huge --ess is legal: the iteration cap or --max-time stops the run
            raise InputError(f"--ess must be a finite number, not {self.ess}")
        return self


__all__ = ["FollowupOptions"]
