"""Plots of the targets stage: the p–p plot of all targets' p-values and a sky map coloured by p-value."""

from __future__ import annotations

import numpy as np
from scipy.stats import beta

from ...core.plotting import pyplot, save_figure


def _lon(ra_deg):
    """RA [deg] to Mollweide longitude [rad], east to the left (as :mod:`cwsearch.core.plotting`)."""
    return -(np.remainder(np.radians(np.asarray(ra_deg, dtype=float)) + np.pi, 2 * np.pi) - np.pi)


def pp_plot(path, p_values, method):
    """Sorted p-values against their expectation under the null (uniform), log-log, with the pointwise 95 %
    band of uniform order statistics (the k-th smallest of m is Beta(k, m − k + 1))."""
    plt = pyplot()
    p = np.sort(np.asarray(p_values, dtype=float)[np.isfinite(p_values)])
    m = p.size
    k = np.arange(1, m + 1)
    expected = k / (m + 1)
    fig, ax = plt.subplots(figsize=(5.8, 5.2))
    ax.fill_between(expected, beta.ppf(0.025, k, m - k + 1), beta.ppf(0.975, k, m - k + 1), color="0.85",
                    label="95 % band (uniform p-values)")
    ax.plot([expected[0], 1], [expected[0], 1], color="0.4", lw=1, ls="--")
    ax.scatter(expected, p, s=8, color="tab:blue", label=f"{m} targets ({method})", zorder=3)
    ax.axhline(0.05 / max(m, 1), color="tab:red", lw=1, ls=":", label="0.05 / m (Bonferroni at 5 %)")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("expected p-value (uniform order statistic k/(m+1))")
    ax.set_ylabel("observed p-value")
    ax.set_title("Targets: p-values against the null", fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8, loc="upper left")
    save_figure(fig, path)


def sky_plot(path, table, array):
    """Mollweide map of the targets coloured by −log10 p, pulsars as stars, followed-up targets circled."""
    plt = pyplot()
    searched = np.asarray(table["status"]) == "searched"
    ra = np.asarray(table["ra"], dtype=float)
    dec = np.radians(np.asarray(table["dec"], dtype=float))
    p = np.asarray(table["p_value"], dtype=float)
    fig = plt.figure(figsize=(8.5, 5.4))
    ax = fig.add_axes([0.04, 0.24, 0.92, 0.68], projection="mollweide")
    cax = fig.add_axes([0.1, 0.14, 0.45, 0.03])
    score = -np.log10(np.clip(p[searched], 1e-300, 1))
    order = np.argsort(score)
    sc = ax.scatter(_lon(ra[searched][order]), dec[searched][order], c=score[order], s=10, cmap="viridis",
                    vmin=0, vmax=max(3.0, float(score.max()) if score.size else 3.0), zorder=2)
    handles = []
    if np.any(~searched):
        handles.append(ax.scatter(_lon(ra[~searched]), dec[~searched], s=6, c="0.7", marker=".",
                                  label="window outside the band", zorder=1))
    handles.append(ax.scatter(_lon(np.degrees([q.ra for q in array])), [q.dec for q in array], marker="*", s=60,
                              c="white", edgecolors="black", linewidths=0.6, label="pulsars", zorder=3))
    chosen = np.asarray(table["followed_up"], dtype=bool)
    if chosen.any():
        handles.append(ax.scatter(_lon(ra[chosen]), dec[chosen], s=160, facecolors="none", edgecolors="red",
                                  linewidths=1.2, label="handed to the follow-up", zorder=4))
    ticks = np.arange(-150, 181, 30)
    ax.set_xticks(np.radians(ticks))
    ax.set_xticklabels([f"{int(t)}°" for t in np.remainder(-ticks, 360)], fontsize=8)
    ax.tick_params(axis="y", labelsize=8)
    ax.grid(True, color="grey", alpha=0.4)
    ax.set_xlabel("right ascension [deg]", fontsize=8)
    ax.set_ylabel("declination [deg]", fontsize=8)
    ax.set_title("Targets coloured by p-value", fontsize=10, pad=12)
    fig.colorbar(sc, cax=cax, orientation="horizontal", label="−log10 p-value (per target, before correction)")
    fig.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.58, 0.02), fontsize=7.5, frameon=False)
    save_figure(fig, path)


def make_plots(folder, table, array, method):
    """Draw ``pp_plot.png`` and ``sky_targets.png`` into ``folder``; returns {name: path}."""
    files = {"pp_plot": str(folder / "pp_plot.png"), "sky_targets": str(folder / "sky_targets.png")}
    searched = np.asarray(table["status"]) == "searched"
    pp_plot(files["pp_plot"], np.asarray(table["p_value"], dtype=float)[searched], method)
    sky_plot(files["sky_targets"], table, array)
    return files


__all__ = ["pp_plot", "sky_plot", "make_plots"]
