"""The targets stage's options (:class:`TargetsOptions`): ``cwsearch targets``'s options and the run file's
``[targets]`` section (:mod:`cwsearch.core.options`). Standard library only; ``stage.py`` re-exports it.

Examples
--------
>>> TargetsOptions(catalog="galaxies.ecsv").validate().null
'simulations'
>>> TargetsOptions(null="bootstrap").validate()
Traceback (most recent call last):
...
cwsearch.core.errors.InputError: option --null: must be one of simulations, scrambles, both, not 'bootstrap'
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from typing import Literal

from ...core.errors import InputError
from ...core.options import CLI_ONLY, FILE_ONLY, option

#: the null of the p-values: noise-only simulations, sky scrambles, or both (simulations quoted)
NULL_METHODS = ("simulations", "scrambles", "both")
#: names of the limits' quadrature presets (cwsearch.inference.upper_limits.QUADRATURE)
QUADRATURE_NAMES = ("fast", "standard", "fine")
#: most noise-only simulations / sky scrambles accepted
MAX_NULL_SIMS = 100_000
MAX_SCRAMBLES = 1_000_000

_G = "targets"
_P = "p-values and corrections"
_L = "limits per target"
_RUNNER = ("where the work runs is the run file's [execution] section (the same for every stage), not an "
           "input of the targets stage")


@dataclass(frozen=True)
class TargetsOptions:
    """Options of the targets stage (names = CLI options of ``cwsearch targets`` with dashes -> underscores;
    ``[targets]`` in a run file)."""

    catalog: str | None = option(None, "target catalogue, ECSV or CSV (name, ra, dec, distance [Mpc] or redshift; "
                                       "optional period, period_err [d]); in a run file, leave it out to skip the "
                                       "targets stage", metavar="FILE", required=True, group=_G)
    columns: str | None = option(None, "column-name mapping, e.g. 'ra=RAJ2000,dec=DEJ2000,distance=Dist'",
                                 metavar="MAP", group=_G)
    fmin: float | None = option(None, "lowest GW frequency [Hz] (not set: 1/T_span)", metavar="HZ", group=_G)
    fmax: float | None = option(None, "highest GW frequency [Hz] (not set: 1/(2 x median TOA spacing), at most "
                                      "1e-6)", metavar="HZ", group=_G)
    oversample: int = option(2, "frequency spacing 1/(oversample x T_span)", metavar="N", group=_G)
    ignore_periods: bool = option(False, "search every target over the whole band, even where a period is given",
                                  group=_G)
    period_frame: Literal["observed", "rest"] = option(
        "observed", "frame of the catalogue periods: observed (measured on Earth) or rest (source frame, "
                    "P_obs = (1 + z) P with the catalogue redshift)", group=_G)
    period_factor: float = option(1.0, "EM period = period_factor x orbital period, so f_gw = 2 period_factor / "
                                       "P_obs", metavar="X", group=_G)
    period_sigmas: float = option(3.0, "half-width of a period target's window in period errors (at least half a "
                                       "Fourier bin 1/(2 T_span))", metavar="K", group=_G)
    null: Literal["simulations", "scrambles", "both"] = option(
        "simulations", "null distribution of the p-values: noise-only simulations, sky scrambles (the data at "
                       "random sky positions), or both (the simulated p-value quoted, the scramble one beside it)",
        group=_P)
    null_sims: int = option(100, "noise-only simulated datasets for the p-values", metavar="N", group=_P)
    scrambles: int = option(1000, "random sky positions for the scramble p-values", metavar="N", group=_P)
    fdr_method: Literal["bh", "by"] = option("bh", "false-discovery-rate correction: bh (Benjamini-Hochberg) or by "
                                                   "(Benjamini-Yekutieli, any dependence)", group=_P)
    followup_threshold: float = option(0.01, "hand targets with a family-wise (Holm) p-value below this to the "
                                             "follow-up", metavar="P", group=_P)
    followup_top: int = option(5, "at most this many targets go to the follow-up", metavar="N", group=_P)
    followup_sky_radius: float = option(5.0, "the follow-up of a target bounds its sky prior to a cap of this "
                                             "radius [deg] around it (cwsearch followup --sky-radius)",
                                        metavar="DEG", group=_P)
    follow_up: bool = option(False, "in a run, follow up every target handed over (its sky bounded to the cap, "
                                    "with the [followup] sampler settings; each takes minutes), into "
                                    "targets/followup_K", group=_P, only=FILE_ONLY,
                             why="the targets command prints the follow-up commands instead (a stage does not "
                                 "run another stage; the pipeline does)")
    no_limits: bool = option(False, "skip the 95 % chirp-mass limits per target", group=_L)
    quadrature: Literal["fast", "standard", "fine"] = option("standard", "angle grid of the limits' quadrature",
                                                            group=_L)
    workers: int | None = option(None, "local worker processes for the limits (not set: one per CPU)",
                                 metavar="N", group="execution", only=CLI_ONLY, why=_RUNNER)
    scheduler: str | None = option(None, "address of a running Dask scheduler for the limits", metavar="ADDRESS",
                                   group="execution", only=CLI_ONLY, why=_RUNNER)
    no_plots: bool = option(False, "skip the PNG plots", group=_G)

    def validate(self):
        """Raise :class:`InputError` for values the stage cannot use (the catalogue itself is read when the
        stage runs); returns ``self``."""
        def bad(name, why):
            raise InputError(f"option --{name.replace('_', '-')}: {why}")

        for name in ("fmin", "fmax"):
            v = getattr(self, name)
            if v is not None and not (float(v) > 0 and math.isfinite(float(v))):
                bad(name, f"must be > 0 Hz, not {v}")
        if self.fmin is not None and self.fmax is not None and not self.fmax > self.fmin:
            bad("fmax", f"must be above --fmin ({self.fmax} <= {self.fmin})")
        if not (isinstance(self.oversample, numbers.Integral) and 1 <= self.oversample <= 64):
            bad("oversample", f"must be an integer in 1..64, not {self.oversample}")
        if self.period_frame not in ("observed", "rest"):
            bad("period_frame", f"must be 'observed' or 'rest', not {self.period_frame!r}")
        if not (self.period_factor > 0 and math.isfinite(self.period_factor)):
            bad("period_factor", f"must be > 0, not {self.period_factor}")
        if not (self.period_sigmas > 0 and math.isfinite(self.period_sigmas)):
            bad("period_sigmas", f"must be > 0, not {self.period_sigmas}")
        if self.null not in NULL_METHODS:
            bad("null", f"must be one of {', '.join(NULL_METHODS)}, not {self.null!r}")
        for name, top in (("null_sims", MAX_NULL_SIMS), ("scrambles", MAX_SCRAMBLES)):
            v = getattr(self, name)
            if int(v) != v or not 0 <= v <= top:
                bad(name, f"must be an integer in 0..{top:,}, not {v}")
        if self.null in ("simulations", "both") and self.null_sims < 1:
            bad("null_sims", f"must be >= 1 with --null {self.null}")
        if self.null in ("scrambles", "both") and self.scrambles < 1:
            bad("scrambles", f"must be >= 1 with --null {self.null}")
        if self.fdr_method not in ("bh", "by"):
            bad("fdr_method", f"must be 'bh' or 'by', not {self.fdr_method!r}")
        if not 0 <= self.followup_threshold <= 1:
            bad("followup_threshold", f"must be within [0, 1], not {self.followup_threshold}")
        if not (math.isfinite(self.followup_sky_radius) and 0 < self.followup_sky_radius <= 180):
            bad("followup_sky_radius", f"must be within (0, 180] deg, not {self.followup_sky_radius}")
        if int(self.followup_top) != self.followup_top or self.followup_top < 0:
            bad("followup_top", f"must be an integer >= 0, not {self.followup_top}")
        if self.quadrature not in QUADRATURE_NAMES:
            bad("quadrature", f"must be one of {', '.join(QUADRATURE_NAMES)}, not {self.quadrature!r}")
        if self.workers is not None and (int(self.workers) != self.workers or not 0 <= self.workers <= 1024):
            bad("workers", f"must be an integer in 0..1024 (0: one per CPU), not {self.workers}")
        return self


__all__ = ["TargetsOptions", "NULL_METHODS", "QUADRATURE_NAMES", "MAX_NULL_SIMS", "MAX_SCRAMBLES"]
