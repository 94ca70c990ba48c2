"""The noise stage's options (:class:`NoiseOptions`): ``cwsearch noise``'s options and the run file's
``[noise]`` keys of the fit, beside the run-level :class:`~cwsearch.physics.noise_settings.NoiseSettings`
(:mod:`cwsearch.core.options`). Standard library only; ``stage.py`` re-exports it.

Examples
--------
>>> NoiseOptions(starts=0).validate()
Traceback (most recent call last):
...
cwsearch.core.errors.InputError: option --starts: must be >= 1
"""

from __future__ import annotations

from dataclasses import dataclass

from ...core.errors import InputError
from ...core.options import CLI_ONLY, option

#: the special values of ``model`` (anything else is a noise-table path)
MODEL_CHOICES = ("estimate", "dataset")

_FIT = "noise fit"
_RUNNER = ("where the work runs is the run file's [execution] section (the same for every stage), not an "
           "input of the fit")
#: with ``workers`` not set, the per-pulsar fits go to local worker processes from this many TOAs in all
#: (below it, starting the workers costs more than it saves)
PARALLEL_FROM_TOAS = 20_000


@dataclass(frozen=True)
class NoiseOptions:
    """Options of the noise stage (run-file section ``[noise]``, next to the noise settings).

    Attributes
    ----------
    model : which noise model every stage uses: ``estimate`` (fit it here, default; a fit of the same
        dataset in RUN_DIR/noise/ is reused), ``dataset`` (the values in the dataset files, fixed), or
        the path of a noise table (written by this stage or by hand).
    fit_common : fit a common red process.
    fixed_common_index : the common spectral index, fixed (default 13/3: a background of circular binaries,
        Phinney 2001). A fitted index lets a flat "common process" absorb a loud binary: on the demo data a
        free index gave γ = 1.4, log10 A = −13.6, and the scan then lost the injected SNR-15 binary.
    free_common_index : fit the common index as well (within [0.5, 7]) instead of fixing it.
    red_noise_threshold : 2 Δln L needed to claim red noise in a pulsar.
    min_toas_red : pulsars with fewer TOAs are fitted white only (with a warning).
    starts : optimiser starts per fit.
    iterations : extra rounds of (common fit, pulsar refit).
    upper_limits : 95 % amplitude upper limits (prior uniform in amplitude).
    contour_points : grid points per axis of the common-process likelihood plot.
    no_plots : do not draw the PNG plots.
    """

    model: str = option("estimate", "the noise model every stage uses: 'estimate' (fit it from the residuals in "
                                    "the noise stage; a fit of the same dataset in RUN_DIR/noise/ is reused), "
                                    "'dataset' (the values in the dataset files, fixed) or the path of a noise "
                                    "table (noise_model.ecsv)",
                        flag="--noise-model", dest="noise_model", metavar="estimate|dataset|FILE",
                        group="noise model")
    fit_common: bool = option(True, "fit a common red process (model = 'estimate')",
                              cli_help="do not fit a common red process", aliases=("--no-common",), group=_FIT)
    fixed_common_index: float = option(13.0 / 3.0, "the common spectral index, fixed (13/3: a background of "
                                                    "circular binaries; a fitted index can absorb a loud binary "
                                                    "into the noise model)",
                                       metavar="GAMMA", show_default="13/3", group=_FIT)
    free_common_index: bool = option(False, "fit the common index as well, within [0.5, 7] (a free index can "
                                            "absorb a loud binary into the noise)", group=_FIT)
    red_noise_threshold: float = option(9.0, "2 dlnL (white + red against white only) needed to claim red noise "
                                             "in a pulsar", metavar="X", group=_FIT)
    min_toas_red: int = option(40, "pulsars with fewer TOAs are fitted with white noise only (with a warning)",
                               metavar="N", group=_FIT)
    starts: int = option(3, "optimiser starts per fit", metavar="N", group=_FIT)
    iterations: int = option(1, "extra rounds of (common fit, pulsar refit)", metavar="N", group=_FIT)
    upper_limits: bool = option(True, "95 % amplitude upper limits (prior uniform in amplitude)",
                                cli_help="skip the 95 % amplitude upper limits", group=_FIT)
    contour_points: int = option(16, "grid points per axis of the common-process likelihood plot", metavar="N",
                                 group=_FIT)
    no_plots: bool = option(False, "skip the noise-stage plots (PNG)", group=_FIT)
    workers: int | None = option(None, "fit the pulsars in N local worker processes (not set: one per CPU "
                                       f"from {PARALLEL_FROM_TOAS:,} TOAs in all, else in this process; the "
                                       "numbers do not depend on it)",
                                 metavar="N", group="execution", only=CLI_ONLY, why=_RUNNER)
    scheduler: str | None = option(None, "send the per-pulsar fits to a running Dask scheduler, e.g. "
                                         "tcp://10.0.0.5:8786", metavar="ADDRESS", group="execution",
                                   only=CLI_ONLY, why=_RUNNER)

    def validate(self) -> "NoiseOptions":
        if not isinstance(self.model, str) or not self.model.strip():
            raise InputError("option --noise-model: give estimate, dataset or the path of a noise table")
        if self.red_noise_threshold < 0:
            raise InputError("option --red-noise-threshold: must be >= 0")
        if self.min_toas_red < 1:
            raise InputError("option --min-toas-red: must be >= 1")
        if self.starts < 1:
            raise InputError("option --starts: must be >= 1")
        if self.iterations < 0:
            raise InputError("option --iterations: must be >= 0")
        if self.contour_points < 3:
            raise InputError("option --contour-points: must be >= 3")
        if self.workers is not None and (int(self.workers) != self.workers or not 1 <= self.workers <= 1024):
            raise InputError(f"option --workers: must be an integer in [1, 1024], not {self.workers}")
        if not 0.5 <= self.fixed_common_index <= 7.0:
            raise InputError("option --fixed-common-index: must be in [0.5, 7] (the fitted range)")
        return self

    def fit_settings(self, red_components: int):
        """The fitter's settings (:class:`cwsearch.inference.noisefit.FitSettings`)."""
        # lazy: the fitter's settings class lives with the numerical code (this module stays standard library)
        from ...inference.noisefit import FitSettings

        return FitSettings(red_components=int(red_components), red_noise_threshold=float(self.red_noise_threshold),
                           min_toas_red=int(self.min_toas_red), n_starts=int(self.starts),
                           common=bool(self.fit_common),
                           common_index=None if self.free_common_index else self.fixed_common_index,
                           iterations=int(self.iterations), upper_limits=bool(self.upper_limits))


__all__ = ["NoiseOptions", "MODEL_CHOICES", "PARALLEL_FROM_TOAS"]
