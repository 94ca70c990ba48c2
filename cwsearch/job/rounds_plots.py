"""The figure of the subtract-and-rescan rounds (``rounds/rounds.png``, docs/design.md §14).

Top: the loudest Fe over the sky against GW frequency for every round (round 1 the run's scan, round K the
rescan of what is left after K - 1 subtracted sources), the confirmed sources' frequencies marked. Bottom:
for the pulsars with the largest subtracted signal, the residuals and the subtracted signal (sum of the
confirmed sources' posterior-median signals).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..core.constants import YEAR_SECONDS
from ..core.plotting import pyplot, save_figure
from .runfolder import read_table

#: pulsars shown in the bottom panels (largest subtracted signal first)
SIGNAL_PANELS = 3


def rounds_figure(path, run_dir, rounds, confirmed, array, signals):
    """Write ``rounds.png`` (module docstring)."""
    plt = pyplot()
    n_sig = min(SIGNAL_PANELS, len(array)) if signals else 0
    fig, axes = plt.subplots(1 + n_sig, 1, figsize=(8.5, 3.2 + 1.9 * n_sig), squeeze=False)
    ax = axes[0, 0]
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    for entry in rounds:
        spec = read_table(Path(run_dir) / entry["scan"] / "spectrum.ecsv")
        if spec is None or "fe_max" not in spec.colnames:
            continue
        k = int(entry["round"])
        ax.plot(np.asarray(spec["frequency"], dtype=float) * 1e9, np.asarray(spec["fe_max"], dtype=float),
                lw=1.1, color=colors[(k - 1) % len(colors)],
                label=f"round {k}" + (f" ({entry['subtracted_sources']} subtracted)" if k > 1 else " (the data)"))
    for src in confirmed:
        ax.axvline(src["frequency"] * 1e9, color="0.3", ls=":", lw=1.0)
        ax.annotate(f"source {src['source']}", (src["frequency"] * 1e9, 1.0), xycoords=("data", "axes fraction"),
                    xytext=(3, -12), textcoords="offset points", fontsize=8, color="0.25")
    ax.set_xlabel("GW frequency [nHz]")
    ax.set_ylabel("loudest Fe over the sky")
    ax.set_title(f"Subtract and rescan: {len(rounds)} round(s), {len(confirmed)} confirmed source(s) "
                 "(dotted: confirmed frequencies)", fontsize=10)
    ax.grid(alpha=0.3)
    if ax.lines:
        ax.legend(fontsize=8, frameon=False)
    if n_sig:
        total = [sum(s[i] for s in signals) for i in range(len(array))]
        power = [float(np.sum((t / p.effective_sigmas()) ** 2)) for t, p in zip(total, array)]
        for ax, i in zip(axes[1:, 0], np.argsort(power)[::-1][:n_sig]):
            p = array[int(i)]
            years = (p.toas - array.start) / YEAR_SECONDS
            ax.errorbar(years, p.residuals * 1e9, yerr=p.effective_sigmas() * 1e9, fmt=".", ms=2.5, lw=0.5,
                        color="0.55", ecolor="0.8", label="residuals (±1σ white noise)")
            ax.plot(years, total[int(i)] * 1e9, color="tab:blue", lw=1.3, label="subtracted signal")
            ax.set_ylabel(f"{p.name} [ns]", fontsize=8)
            ax.grid(alpha=0.3)
            ax.tick_params(labelsize=7)
        axes[1, 0].legend(fontsize=8, frameon=False, loc="upper right")
        axes[-1, 0].set_xlabel("years since first TOA")
    fig.tight_layout()
    save_figure(fig, path)


__all__ = ["rounds_figure", "SIGNAL_PANELS"]
