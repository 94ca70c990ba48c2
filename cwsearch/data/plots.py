"""Dataset plots for the report and the stages: pulsar sky positions and observing spans per backend;
measured inter-pulsar correlations against the Hellings–Downs curve."""

from __future__ import annotations

import numpy as np

from ..core.constants import DAY_SECONDS
from ..core.plotting import _wrap_ra, pyplot, save_figure
from .truth import injected_binary


def dataset_overview(array, path, *, marks=None):
    """Two panels: pulsars on a Mollweide sky (size ~ 1/median sigma) and TOA coverage per backend.

    ``marks``: optional list of dicts (``ra``, ``dec`` [rad], ``label``) drawn on the sky panel. The
    injected binary of a simulated dataset (its ``injection.json``) is drawn as a magenta plus.
    Right ascension in degrees, increasing to the left (east).
    """
    plt = pyplot()
    fig = plt.figure(figsize=(11, 4.2))
    ax = fig.add_subplot(1, 2, 1, projection="mollweide")
    ra = np.array([p.ra for p in array])
    dec = np.array([p.dec for p in array])
    sig = np.array([np.median(p.sigmas) for p in array])
    size = 40 + 160 * (sig.min() / sig)
    ax.scatter(_wrap_ra(ra), dec, s=size, marker="*", c="tab:blue", edgecolors="black", linewidths=0.4,
               label="pulsars (larger: lower TOA sigma)")
    for mark in marks or []:
        ax.scatter(_wrap_ra(mark["ra"]), mark["dec"], marker="x", s=70, c="red", label=mark.get("label"))
    truth = injected_binary(array)
    if truth and "ra" in truth:
        ax.scatter(_wrap_ra(np.radians(truth["ra"])), np.radians(truth["dec"]), marker="P", s=110, c="#e6007e",
                   edgecolors="black", linewidths=0.7, zorder=5, label="injected binary (injection.json)")
    ticks = np.arange(-150, 181, 30)
    ax.set_xticks(np.radians(ticks))
    ax.set_xticklabels([f"{int(t)}°" for t in np.remainder(-ticks, 360)], fontsize=7)
    ax.grid(True, alpha=0.3)
    ax.legend(loc="lower right", fontsize=7)
    ax.set_title("pulsar positions (equatorial)", pad=12)

    ax2 = fig.add_subplot(1, 2, 2)
    cmap = plt.get_cmap("tab10")
    backends = sorted({b for p in array for b in p.backend_names})
    colour = {b: cmap(i % 10) for i, b in enumerate(backends)}
    for i, p in enumerate(array):
        years = 2000.0 + (p.mjd - 51544.5) / 365.25
        for b in p.backend_names:
            sel = p.backends == b
            ax2.plot(years[sel], np.full(sel.sum(), i), "|", ms=6, color=colour[b])
    for b in backends:
        ax2.plot([], [], "|", color=colour[b], label=b)
    ax2.set_yticks(range(len(array)))
    ax2.set_yticklabels(array.names, fontsize=6)
    ax2.set_xlabel("year")
    ax2.set_title(f"{sum(p.n_toas for p in array)} TOAs over {array.span / DAY_SECONDS / 365.25:.1f} yr", pad=22)
    ax2.legend(fontsize=7, loc="lower center", bbox_to_anchor=(0.5, 1.0), ncol=max(len(backends), 1),
               frameon=False)
    ax2.invert_yaxis()
    fig.tight_layout()
    save_figure(fig, path)


__all__ = ["dataset_overview"]


def correlation_plot(path, pairs, *, title=None):
    """Measured inter-pulsar correlations against angular separation, with the Hellings–Downs curve.

    ``pairs``: :class:`cwsearch.physics.correlated.PairCorrelations` (from
    :func:`cwsearch.physics.correlated.pair_correlations`). Grey points: every pair (ρ ± σ);
    black: inverse-variance weighted bins (equal pair counts) with their errors; line: the
    Hellings & Downs (1983) curve; shaded: its expected weak-signal scatter per bin (± the
    binned σ around the bin-averaged curve). Used by the scan stage and callable from the
    noise stage and the report.
    """
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(7.2, 4.4))
    deg = np.degrees(pairs.angle)
    ax.errorbar(deg, pairs.rho, yerr=pairs.sigma, fmt=".", color="0.65", ms=3, lw=0.5, alpha=0.6,
                label=f"pairs ({deg.size})")
    b = pairs.bins
    ax.fill_between(np.degrees(b["centre"]), b["expected"] - b["sigma"], b["expected"] + b["sigma"],
                    color="tab:orange", alpha=0.25, label="expected scatter of the bins (weak signal)")
    zeta = np.linspace(1e-3, np.pi, 400)
    x = 0.5 * (1 - np.cos(zeta))
    ax.plot(np.degrees(zeta), 0.5 - 0.25 * x + 1.5 * x * np.log(x), color="tab:orange", lw=1.6,
            label="Hellings-Downs")
    ax.errorbar(np.degrees(b["centre"]), b["rho"], yerr=b["sigma"], fmt="o", color="black", ms=5, capsize=3,
                label="binned measurement")
    ax.axhline(0.0, color="0.3", lw=0.6)
    ax.set_xlim(0, 180)
    spread = np.concatenate([b["rho"] - 3 * b["sigma"], b["rho"] + 3 * b["sigma"], [-0.4, 0.7]])
    ax.set_ylim(max(spread.min(), -3.0), min(spread.max(), 3.0))
    ax.set_xlabel("angular separation [deg]")
    ax.set_ylabel(f"correlation (units of A² at log10 A = {pairs.log10_amplitude:.2f})")
    ax.set_title(title or "inter-pulsar correlations of the residuals", fontsize=10)
    ax.legend(fontsize=7, loc="upper right")
    save_figure(fig, path)
    return path
