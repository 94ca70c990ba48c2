"""``cwsearch inspect``: validate a dataset folder and print a summary per pulsar."""

from __future__ import annotations

import json
import sys
import warnings
from pathlib import Path

from ..core.constants import DAY_SECONDS, YEAR_SECONDS
from ..core.safeio import escape_text
from ._common import add_mjd_range_argument

DESCRIPTION = """\
Validate a dataset folder (pulsars.ecsv, residuals/NAME.ecsv, optional
noise.ecsv) and print one line per pulsar: sky position [deg], distance
[kpc], number of TOAs, time span [yr], backends, median TOA uncertainty
[ns], white-noise settings per backend (factor x, added + in ns) and red
noise (log10 amplitude, index), then totals and the dataset checksum.
A bad dataset stops with one message naming file, row and column (exit 2)."""

EXAMPLE = """\
  cwsearch inspect mydata
  cwsearch inspect mydata --json > summary.json"""


def add_arguments(parser):
    parser.add_argument("dataset", help="dataset folder (pulsars.ecsv, residuals/, optional noise.ecsv)")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON instead of a table")
    add_mjd_range_argument(parser)


def run(args) -> int:
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..data.dataset import read_dataset

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        array = read_dataset(args.dataset, mjd_range=args.mjd_range)
    for w in caught:
        print(f"cwsearch: warning: {escape_text(w.message)}", file=sys.stderr)
    summary = summarize(array, args.dataset)
    summary["goodness_of_fit"] = goodness_of_fit_summary(array)
    for message in summary["goodness_of_fit"]["warnings"]:
        print(f"cwsearch: warning: {message}", file=sys.stderr)
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        print(format_summary(summary))  # every text from the files is escaped there (escape_text)
    return 0


def summarize(array, path=None) -> dict:
    """JSON-serialisable description of an :class:`~cwsearch.data.model.Array` (what ``inspect`` prints)."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    import numpy as np
    from ..data.dataset import INJECTION_FILE, dataset_checksum

    pulsars = []
    for p in array:
        noise = p.noise
        pulsars.append({
            "name": p.name,
            "ra": float(np.degrees(p.ra)),
            "dec": float(np.degrees(p.dec)),
            "distance": p.distance,
            "distance_err": p.distance_err,
            "n_toas": p.n_toas,
            "start_mjd": float(p.mjd[0]),
            "end_mjd": float(p.mjd[-1]),
            "span_years": float(p.mjd[-1] - p.mjd[0]) * DAY_SECONDS / YEAR_SECONDS,
            "backends": list(p.backend_names),
            "median_sigma_ns": float(np.median(p.sigmas)) * 1e9,
            "rms_residual_ns": float(np.sqrt(np.mean(p.residuals**2))) * 1e9,
            "design_columns": list(p.extra_design_names),
            "sigma_scale": {b: noise.sigma_scale[b] for b in p.backend_names if b in noise.sigma_scale},
            "sigma_added_ns": {b: noise.sigma_added[b] * 1e9 for b in p.backend_names if b in noise.sigma_added},
            "red_log10_amplitude": noise.red_log10_amplitude if noise.has_red_noise else None,
            "red_index": noise.red_index if noise.has_red_noise else None,
        })
    summary = {
        "dataset": None if path is None else str(path),
        "n_pulsars": len(array),
        "n_toas": int(sum(p.n_toas for p in array)),
        "start_mjd": array.start / DAY_SECONDS,
        "end_mjd": array.end / DAY_SECONDS,
        "span_years": array.span / YEAR_SECONDS,
        "n_backends": int(sum(len(p.backend_names) for p in array)),
        "n_red_noise": int(sum(p.noise.has_red_noise for p in array)),
        "checksum": None,
        "injected_binaries": None,
        "pulsars": pulsars,
    }
    if path is not None:
        summary["checksum"] = dataset_checksum(path)
        injection = Path(path) / INJECTION_FILE
        if injection.is_file():
            try:
                summary["injected_binaries"] = len(json.loads(injection.read_text(encoding="utf-8"))["binaries"])
            except (OSError, ValueError, KeyError, TypeError):
                summary["injected_binaries"] = None
    return summary


def goodness_of_fit_summary(array) -> dict:
    """Goodness of fit of every pulsar under the dataset's own noise values (always on; the same tests as the
    scan: :func:`cwsearch.stages.scan.stage.scan_goodness_of_fit`)."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..physics.noise import NoiseSettings
    from ..stages.scan.stage import scan_goodness_of_fit

    gof = scan_goodness_of_fit(array, NoiseSettings(), warn=False)
    gof["noise_model"] = "the dataset's own noise values (pulsars.ecsv red noise, noise.ecsv white factors)"
    gof["warnings"] = [m.replace("under the scan's noise model", "under the dataset's noise values")
                       for m in gof["warnings"]]
    return gof


def _white(psr) -> str:
    parts = []
    for b in psr["backends"]:
        scale, added = psr["sigma_scale"].get(b), psr["sigma_added_ns"].get(b)
        if scale is None and added is None:
            continue
        text = b
        if scale is not None and scale != 1.0:
            text += f" x{scale:.3g}"
        if added:
            text += f" +{added:.3g}ns"
        parts.append(text)
    return ", ".join(parts) or "-"


def format_summary(summary) -> str:
    """Plain-text table of :func:`summarize` output."""
    header = ["name", "ra[deg]", "dec[deg]", "dist[kpc]", "TOAs", "span[yr]", "backends", "med.sigma[ns]",
              "white noise", "red noise"]
    rows = []
    for p in summary["pulsars"]:
        red = "-" if p["red_log10_amplitude"] is None else \
            f"log10A={p['red_log10_amplitude']:.2f} gamma={p['red_index']:.2f}"
        rows.append([escape_text(p["name"]), f"{p['ra']:.3f}", f"{p['dec']:+.3f}",
                     f"{p['distance']:.3g}+-{p['distance_err']:.2g}", str(p["n_toas"]), f"{p['span_years']:.2f}",
                     escape_text(",".join(p["backends"])), f"{p['median_sigma_ns']:.1f}", escape_text(_white(p)), red])
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(header)]
    right = {1, 2, 3, 4, 5, 7}

    def line(cells):
        return "  ".join(c.rjust(w) if i in right else c.ljust(w) for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    out = [line(header), line(["-" * w for w in widths])] + [line(r) for r in rows]
    s = summary
    out.append("")
    out.append(f"{s['n_pulsars']} pulsars, {s['n_toas']} TOAs, MJD {s['start_mjd']:.2f} to {s['end_mjd']:.2f} "
               f"({s['span_years']:.2f} yr), {s['n_backends']} pulsar-backend pairs, "
               f"{s['n_red_noise']} pulsars with red noise")
    if s["injected_binaries"] is not None:
        out.append(f"injection.json present: {s['injected_binaries']} injected binaries (simulated data)")
    if s["checksum"]:
        out.append(f"checksum (sha256): {s['checksum']}")
    gof = s.get("goodness_of_fit")
    if gof:
        out.append(f"goodness of fit under the dataset's noise values: {gof['n_failed']} of {s['n_pulsars']} pulsars "
                   f"fail (p < {gof['threshold']:g})" + (f": {', '.join(gof['failed'])}" if gof["failed"] else "")
                   + ("; array-level low-frequency excess (run 'cwsearch noise' to fit a common process)"
                      if gof["array_low_frequency"]["flagged"] else ""))
    out.append("dataset is valid")
    return "\n".join(out)


__all__ = ["DESCRIPTION", "EXAMPLE", "add_arguments", "run", "summarize", "format_summary"]
