"""Run-level noise-model settings (:class:`NoiseSettings`): the ``[noise]`` keys and the stage commands'
noise options, from one dataclass (:mod:`cwsearch.core.options`).

Standard library only (no numpy), so that ``cwsearch COMMAND --help`` stays fast;
:mod:`cwsearch.physics.noise` (the engine that uses them) re-exports it.

Examples
--------
>>> NoiseSettings().red_components
30
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from ..core.errors import InputError
from ..core.options import option
from ..core.safeio import check_count

#: most Fourier frequencies of a red process (k/T_span, k = 1..K): 1000 reaches daily cadence for 3 years
MAX_RED_COMPONENTS = 1000

_GROUP = "noise model"


@dataclass(frozen=True)
class NoiseSettings:
    """Run-level noise-model choices (per-pulsar values come from the dataset).

    Attributes
    ----------
    red_components : int
        Number of Fourier frequencies k/T_span, k = 1..K, for red processes.
    pulsar_red_noise : bool
        Use the per-pulsar red noise given in the dataset.
    common_log10_amplitude : float or None
        log10 amplitude of a common red process added to every pulsar (None: off).
    common_index : float
        Spectral index γ of the common process (13/3 for a background of
        circular binaries, Phinney 2001).
    white_noise_factors : bool
        Apply ``sigma_scale``/``sigma_added`` from the dataset.
    common_correlation : ``"hellings-downs"``, ``"uncorrelated"`` or ``"none"``
        How the common process couples the pulsars (used only when
        ``common_log10_amplitude`` is set): Hellings–Downs correlated (default;
        the array-level engine of :mod:`cwsearch.physics.correlated`), a common
        spectrum uncorrelated between pulsars (in each pulsar's Fourier prior),
        or ``"none"``: the common process is left out of the noise model.
        :func:`cwsearch.physics.correlated.array_noise` is the one place that
        turns this choice into an engine. :class:`NoiseWeighting` itself is the
        per-pulsar engine and always puts a given common process in each
        pulsar's prior.
    common_components : int or None
        Fourier frequencies of the common process, K_common ≤ ``red_components``
        (None: ``red_components``). The correlated engine's cost grows as
        (N_psr · 2K_common)³ while the background's power falls as f^−γ: above
        the frequency where it drops below the white-noise level it adds
        nothing measurable (:func:`cwsearch.physics.correlated.common_components_needed`
        reports that K).
    """

    red_components: int = option(30, "Fourier frequencies k/T_span, k = 1..red_components, for red processes",
                                 metavar="K", group=_GROUP)
    pulsar_red_noise: bool = option(True, "use the per-pulsar red noise given in the dataset",
                                    cli_help="ignore the per-pulsar red noise given in the dataset "
                                             "(--noise-model dataset)", group=_GROUP)
    common_log10_amplitude: float | None = option(
        None, "log10 amplitude of a common red process added to every pulsar (--noise-model dataset); "
              "not set: none", metavar="LOG10A", group=_GROUP)
    common_index: float = option(13.0 / 3.0, "spectral index gamma of the common process (13/3: a background of "
                                             "circular binaries)", metavar="GAMMA", show_default="13/3",
                                 group=_GROUP)
    white_noise_factors: bool = option(True, "apply the dataset's per-backend white-noise factors (noise.ecsv "
                                             "sigma_scale, sigma_added)",
                                       cli_help="ignore the dataset's per-backend white-noise factors (noise.ecsv "
                                                "sigma_scale, sigma_added)", group=_GROUP)
    common_correlation: Literal["hellings-downs", "uncorrelated", "none"] = option(
        "hellings-downs", "how the common process couples the pulsars: hellings-downs (array-level engine), "
                          "uncorrelated (same spectrum, independent pulsars) or none (leave it out)", group=_GROUP)
    common_components: int | None = option(
        None, "Fourier frequencies of the common process, at most red_components (not set: the same; fewer make "
              "the correlated engine much faster where the background is below the white noise)",
        metavar="K", group=_GROUP)

    def __post_init__(self):
        check_count(self.red_components, "red_components", minimum=0, maximum=MAX_RED_COMPONENTS)
        if self.common_components is not None:
            check_count(self.common_components, "common_components", minimum=0, maximum=MAX_RED_COMPONENTS)
        for name in ("common_log10_amplitude", "common_index"):
            value = getattr(self, name)
            if value is not None and not (isinstance(value, (int, float)) and math.isfinite(value)):
                raise InputError(f"option --{name.replace('_', '-')}: must be a finite number, not {value!r}")
        if self.common_log10_amplitude is not None and not -30 <= self.common_log10_amplitude <= -5:
            raise InputError("option --common-log10-amplitude: must be between -30 and -5 "
                             f"(a log10 strain amplitude), not {self.common_log10_amplitude}")

    def validate(self) -> "NoiseSettings":
        """The same contract as every stage's Options: the checks ran at construction; returns ``self``."""
        return self


__all__ = ["NoiseSettings", "MAX_RED_COMPONENTS"]
