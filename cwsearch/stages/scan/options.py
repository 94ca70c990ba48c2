"""The scan stage's options (:class:`ScanOptions`): one dataclass for ``cwsearch scan``'s options and the run
file's ``[scan]`` section (:mod:`cwsearch.core.options`). Standard library only, so ``cwsearch scan --help``
stays fast; ``stage.py`` re-exports it.

Examples
--------
>>> ScanOptions(nside=6).validate()
Traceback (most recent call last):
...
cwsearch.core.errors.InputError: option --nside: must be a power of two between 1 and 1024, not 6
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass
from typing import Literal

from ...core.errors import InputError
from ...core.options import CLI_ONLY, option

STATISTICS = ("fe", "fp", "both")

#: most noise-only scans for the empirical false-alarm probability (resolves FAPs down to 1e-5)
MAX_NULL_SIMS = 100_000

_RUNNER = ("where the work runs is the run file's [execution] section (the same for every stage), not an "
           "input of the scan")


@dataclass(frozen=True)
class ScanOptions:
    """Options of the scan stage (CLI options of ``cwsearch scan``, ``[scan]`` in a run file).

    Attributes
    ----------
    fmin, fmax : float or None
        Frequency range [Hz]. Defaults: 1/T_span, and the Nyquist-like limit
        1/(2 × median TOA spacing) capped at 1e-6 Hz.
    oversample : int
        Frequency spacing 1/(oversample · T_span).
    nside : int
        HEALPix resolution (power of two); 12 nside² pixels.
    statistic : ``"fe"``, ``"fp"`` or ``"both"``
        Earth-term Fe (sky scan), pulsar-term Fp (no sky), or both.
    null_sims : int
        Noise-only scans of the same array for the empirical FAP (0: none).
    fap_threshold : float
        List candidates whose (trials-corrected analytic) FAP is below this;
        the loudest is always listed.
    max_candidates : int
        At most this many rows in ``candidates.ecsv``.
    merge_angle : float
        Local maxima closer than this [deg] and within one independent
        frequency bin (1/T_span) are one candidate. The default 180 keeps
        one candidate per frequency bin (the sky sidelobes of one source
        are not separate candidates).
    no_plots : bool
        Skip the PNG plots.
    workers : int or None
        Task runner for the scan's independent loops (frequency chunks
        of the sky scan, batches of noise-only scans): None or 1 runs them in
        this process (default; the kernels use every core with threads), N > 1
        in N local worker processes (:mod:`cwsearch.inference.execution`).
    scheduler : str or None
        Address of a running Dask scheduler; the same tasks go to its workers.
        Numbers agree with the serial run to 1e-12 relative.
    """

    fmin: float | None = option(None, "lowest GW frequency [Hz]; not set: 1/T_span", metavar="HZ", group="scan")
    fmax: float | None = option(None, "highest GW frequency [Hz]; not set: 1/(2 x median TOA spacing), at most 1e-6",
                                metavar="HZ", group="scan")
    oversample: int = option(2, "frequency spacing 1/(oversample x T_span)", metavar="N", group="scan")
    nside: int = option(16, "HEALPix sky resolution, a power of two: 12 nside^2 pixels", group="scan")
    statistic: Literal["fe", "fp", "both"] = option(
        "both", "fe: Earth-term sky scan; fp: pulsar-term (no sky); both", group="scan")
    null_sims: int = option(0, "noise-only scans of the same array for an empirical false-alarm probability "
                               "(0: analytic FAP only)", metavar="N", group="scan")
    fap_threshold: float = option(0.5, "list candidates whose trials-corrected analytic FAP is below this; the "
                                       "loudest is always listed", metavar="P", group="scan")
    max_candidates: int = option(20, "at most this many rows in scan/candidates.ecsv", metavar="N", group="scan")
    merge_angle: float = option(180.0, "peaks closer than this [deg] and within one frequency bin 1/T_span are one "
                                       "candidate", metavar="DEG", group="scan")
    no_plots: bool = option(False, "skip the PNG plots", group="scan")
    workers: int | None = option(None, "run frequency chunks and noise-only scans in N local worker processes "
                                       "(not set: in this process, every core through threads)",
                                 metavar="N", group="execution", only=CLI_ONLY, why=_RUNNER)
    scheduler: str | None = option(None, "send them to a running Dask scheduler, e.g. tcp://10.0.0.5:8786 (the "
                                         "numbers do not depend on where they run)",
                                   metavar="ADDRESS", group="execution", only=CLI_ONLY, why=_RUNNER)

    def validate(self):
        """Raise :class:`InputError` for values the scan cannot use."""
        def bad(name, why):
            raise InputError(f"option --{name.replace('_', '-')}: {why}")

        if self.fmin is not None and not self.fmin > 0:
            bad("fmin", f"must be > 0 Hz, not {self.fmin}")
        if self.fmax is not None and not self.fmax > 0:
            bad("fmax", f"must be > 0 Hz, not {self.fmax}")
        if self.fmin is not None and self.fmax is not None and not self.fmax > self.fmin:
            bad("fmax", f"must be above --fmin ({self.fmax} <= {self.fmin})")
        if not (isinstance(self.oversample, numbers.Integral) and self.oversample >= 1):
            bad("oversample", f"must be an integer >= 1, not {self.oversample}")
        nside = int(self.nside)
        if nside != self.nside or nside < 1 or nside & (nside - 1) or nside > 1024:
            bad("nside", f"must be a power of two between 1 and 1024, not {self.nside}")
        if self.statistic not in STATISTICS:
            bad("statistic", f"must be one of {', '.join(STATISTICS)}, not {self.statistic!r}")
        if int(self.null_sims) != self.null_sims or self.null_sims < 0:
            bad("null_sims", f"must be an integer >= 0, not {self.null_sims}")
        if self.null_sims > MAX_NULL_SIMS:
            bad("null_sims", f"at most {MAX_NULL_SIMS:,}, not {int(self.null_sims):,}: each is a full noise-only "
                             f"scan, so this many take about {int(self.null_sims):.3g} times as long as the scan "
                             "itself")
        if not 0 < self.fap_threshold <= 1:
            bad("fap_threshold", f"must be in (0, 1], not {self.fap_threshold}")
        if int(self.max_candidates) != self.max_candidates or self.max_candidates < 1:
            bad("max_candidates", f"must be an integer >= 1, not {self.max_candidates}")
        if not 0 <= self.merge_angle <= 180:
            bad("merge_angle", f"must be between 0 and 180 degrees, not {self.merge_angle}")
        if self.workers is not None and (int(self.workers) != self.workers or self.workers < 1):
            bad("workers", f"must be an integer >= 1, not {self.workers}")
        return self

    @property
    def distributed(self) -> bool:
        """Whether the scan's loops go to worker processes or a Dask cluster."""
        return bool(self.scheduler) or (self.workers or 1) > 1


__all__ = ["ScanOptions", "STATISTICS", "MAX_NULL_SIMS"]
