"""Plots of the limits stage: strain limit versus frequency, sky map of the limit, chirp-mass limits."""

from __future__ import annotations

import numpy as np

from ...core.plotting import pyplot, save_figure, sky_map
from ...data.truth import injected_binary


def _nhz_axis(ax):
    """Frequency axis in nHz with plain numbers (no colliding 10^-9 minor labels)."""
    # lazy: a heavy import, loaded only when this runs
    from matplotlib.ticker import LogLocator, NullFormatter, ScalarFormatter

    ax.set_xscale("log")
    ax.xaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    ax.xaxis.set_major_formatter(ScalarFormatter())
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel("GW frequency [nHz]")


def frequency_plot(path, table, truth=None):
    """Sky-averaged 95 % strain limit versus frequency (log-log), best-to-worst pixel range shaded."""
    plt = pyplot()
    f = np.asarray(table["frequency"], dtype=float) * 1e9
    fig, ax = plt.subplots(figsize=(7, 4.5))
    method = table.meta.get("method", "bayes")
    ax.fill_between(f, np.asarray(table["strain_95_best"]), np.asarray(table["strain_95_worst"]),
                    color="tab:blue", alpha=0.2, label="best to worst sky position")
    ax.plot(f, np.asarray(table["strain_95"]), color="tab:blue", lw=1.8, label=f"sky-averaged ({method})")
    if "strain_95_frequentist" in table.colnames:
        ax.plot(f, np.asarray(table["strain_95_frequentist"]), color="tab:orange", lw=1.4, ls="--",
                label="sky-averaged (frequentist)")
    if truth and "strain" in truth and "frequency" in truth:
        ax.scatter([truth["frequency"] * 1e9], [truth["strain"]], marker="P", s=110, c="#e6007e",
                   edgecolors="black", linewidths=0.7, zorder=5, label="truth (injection.json)")
    _nhz_axis(ax)
    ax.set_yscale("log")
    ax.set_ylabel("95 % upper limit on strain amplitude $h_0$")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    save_figure(fig, path)


def sky_plot(path, sky_table, nside, array, truth=None):
    """Mollweide map of the per-pixel limit at the sky frequency, pulsars (and the truth) marked."""
    values = np.asarray(sky_table["strain_95"], dtype=float)
    pulsars = (np.array([p.ra for p in array]), np.array([p.dec for p in array]))
    freq = float(sky_table.meta.get("frequency", np.nan))
    sky_map(path, values, nside, title=f"95 % strain upper limit at {freq * 1e9:.2f} nHz",
            label="95 % upper limit on $h_0$", pulsars=pulsars, log=bool(np.all(values > 0)), cmap="YlGnBu_r",
            truth=None if not truth else (np.radians(truth["ra"]), np.radians(truth["dec"])))


def galaxy_plot(path, galaxy_table, truth=None):
    """Chirp-mass 95 % limit versus frequency, one line per galaxy; the injected binary's (frequency, chirp
    mass) as a magenta plus when ``truth`` is given."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(7, 4.5))
    names = list(dict.fromkeys(str(n) for n in galaxy_table["name"]))
    for name in names:
        sel = np.asarray(galaxy_table["name"]) == name
        d = float(np.asarray(galaxy_table["distance"])[sel][0])
        ax.plot(np.asarray(galaxy_table["frequency"])[sel] * 1e9, np.asarray(galaxy_table["chirp_mass_95"])[sel],
                lw=1.5, label=f"{name} ({d:.3g} Mpc)")
    if truth and "chirp_mass" in truth and "frequency" in truth:
        ax.scatter([truth["frequency"] * 1e9], [truth["chirp_mass"]], marker="P", s=110, c="#e6007e",
                   edgecolors="black", linewidths=0.7, zorder=5, label="truth (injection.json)")
    _nhz_axis(ax)
    ax.set_yscale("log")
    ax.set_ylabel(r"95 % upper limit on chirp mass [$M_\odot$]")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    save_figure(fig, path)


def make_plots(folder, frequencies, freq_table, sky_table, galaxy_table, array, nside, method):
    """Draw every limits plot into ``folder``; returns {name: path}."""
    files = {"frequency_plot": str(folder / "strain_limits.png"), "sky_plot": str(folder / "sky_limits.png")}
    truth = injected_binary(array)
    frequency_plot(folder / "strain_limits.png", freq_table, truth)
    sky_plot(folder / "sky_limits.png", sky_table, nside, array, truth)
    if galaxy_table is not None:
        galaxy_plot(folder / "galaxy_limits.png", galaxy_table, truth)
        files["galaxy_plot"] = str(folder / "galaxy_limits.png")
    return files


__all__ = ["frequency_plot", "sky_plot", "galaxy_plot", "make_plots"]
