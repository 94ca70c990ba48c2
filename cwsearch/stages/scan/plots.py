"""Plots of the scan stage: Fe-max and Fp spectra with FAP thresholds, and the Fe sky map.

Called by :func:`cwsearch.stages.scan.stage.run_scan`; all files are PNG, written atomically.
"""

from __future__ import annotations

import numpy as np

from ...core.plotting import pyplot, save_figure, sky_map
from ...data.truth import injected_binary
from ...data.plots import correlation_plot  # noqa: F401  (the scan draws it; defined with the dataset plots)

_LINE_STYLES = ("--", ":", "-.")


def _log_if_wide(ax, values, levels):
    """Logarithmic y axis when a peak towers over the threshold lines (keeps both readable)."""
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values) & (values > 0)]
    levels = [float(v) for v in levels if np.isfinite(v) and v > 0]
    if values.size and levels and values.max() > 20 * max(levels):
        ax.set_yscale("log")
        ax.set_ylim(bottom=max(values.min(), 0.05 * min(levels)))


def spectrum_plot(path, spectrum, candidates, thresholds, *, want_fe=True, truth=None):
    """Two panels against frequency: the sky maximum of Fe (if scanned) and Fp, with threshold lines.

    ``thresholds``: ``{"fe": [(label, value)], "fp": [(label, value or per-frequency array)]}``;
    ``truth``: the injected binary (:func:`cwsearch.data.truth.injected_binary`), its GW frequency drawn
    as a dashed magenta line in every panel.
    """
    plt = pyplot()
    freq = np.asarray(spectrum["frequency"], dtype=float)
    n_panels = 2 if want_fe else 1
    fig, axes = plt.subplots(n_panels, 1, figsize=(8, 3.2 * n_panels), sharex=True, squeeze=False)
    axes = axes[:, 0]
    if want_fe:
        ax = axes[0]
        ax.plot(freq, spectrum["fe_max"], color="C0", lw=0.9, label="max over sky of Fe")
        for style, (label, value) in zip(_LINE_STYLES, thresholds.get("fe", [])):
            ax.axhline(value, color="C3", ls=style, lw=1.0, label=label)
        if len(candidates) and np.all(np.isfinite(np.asarray(candidates["fe"], dtype=float))):
            ax.scatter(candidates["frequency"], candidates["fe"], marker="v", color="C1", zorder=3,
                       label="candidates")
        _log_if_wide(ax, spectrum["fe_max"], [v for _, v in thresholds.get("fe", [])])
        ax.set_ylabel("Fe (sky maximum)")
        ax.legend(fontsize=7, loc="upper right")
        ax.grid(alpha=0.3)
    ax = axes[-1]
    ax.plot(freq, spectrum["fp"], color="C2", lw=0.9, label="Fp (pulsar term)")
    for style, (label, value) in zip(_LINE_STYLES, thresholds.get("fp", [])):
        if np.ndim(value):
            ax.plot(freq, value, color="C3", ls=style, lw=1.0, label=label)
        else:
            ax.axhline(value, color="C3", ls=style, lw=1.0, label=label)
    _log_if_wide(ax, spectrum["fp"], [np.nanmax(v) for _, v in thresholds.get("fp", [])])
    ax.set_ylabel("Fp")
    ax.set_xlabel("GW frequency [Hz]")
    ax.set_xscale("log")
    if truth and truth.get("frequency"):
        for panel in axes:
            panel.axvline(truth["frequency"], color="#e6007e", ls="--", lw=1.2, zorder=1,
                          label="true frequency (injection.json)")
        if want_fe:
            axes[0].legend(fontsize=7, loc="upper right")
    ax.legend(fontsize=7, loc="upper right")
    ax.grid(alpha=0.3)
    axes[0].set_title("F-statistic spectrum")
    fig.tight_layout()
    save_figure(fig, path)


def sky_plot(path, fe_values, nside, frequency, array, candidates):
    """Mollweide map of Fe at one frequency, pulsars as stars, candidates marked, a zoom on the best one,
    and the truth (the dataset's injection.json) when there is one."""
    marks = [{"ra": np.radians(float(row["ra"])), "dec": np.radians(float(row["dec"])),
              "label": f"candidate {int(row['rank'])}" if i < 3 else None, "color": "#d62728", "marker": "x",
              "text": f"#{int(row['rank'])}" if i < 3 else None}
             for i, row in enumerate(candidates)]
    truth = injected_binary(array)
    zoom = (marks[0]["ra"], marks[0]["dec"], 30.0) if marks else None
    sky_map(path, np.asarray(fe_values, dtype=float), nside,
            title=f"Fe over the sky at f = {frequency * 1e9:.4g} nHz", label="Fe (F-statistic)",
            pulsars=(np.array([p.ra for p in array]), np.array([p.dec for p in array])), marks=marks,
            cmap="YlGnBu", truth=None if not truth else (np.radians(truth["ra"]), np.radians(truth["dec"])),
            zoom=zoom)


def null_plot(path, null_max, observed, statistic="Fe"):
    """Histogram of the loudest noise-only values with the observed loudest value marked."""
    plt = pyplot()
    null_max = np.asarray(null_max, dtype=float)
    n = null_max.size
    k = int(np.sum(null_max >= observed))
    fig, ax = plt.subplots(figsize=(7, 3.8))
    top = max(float(null_max.max()), observed)
    bins = np.linspace(min(float(null_max.min()), observed) * 0.95, top * 1.05, max(10, min(40, n // 2 + 5)))
    ax.hist(null_max, bins=bins, color="#9ecae1", edgecolor="#3182bd", label=f"{n} noise-only scans")
    ax.axvline(observed, color="#d62728", lw=2, label=f"observed loudest {statistic} = {observed:.3g}")
    fap = (1 + k) / (1 + n)
    text = (f"empirical FAP < {1 / (n + 1):.2g} (no noise-only scan reached it)" if k == 0
            else f"empirical FAP = (1 + {k})/(1 + {n}) = {fap:.2g}")
    ax.set_title(text, fontsize=10)
    ax.set_xlabel(f"loudest {statistic} of a scan (over sky and frequency)")
    ax.set_ylabel("number of scans")
    ax.legend(fontsize=8, loc="upper center")
    ax.grid(alpha=0.3)
    fig.tight_layout()
    save_figure(fig, path)


__all__ = ["spectrum_plot", "sky_plot", "null_plot"]
