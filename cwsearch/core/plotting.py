"""Plots for every stage, written as PNG files into the run folder.

Matplotlib is imported only here (Agg backend, never a screen). Stage plot
functions live in ``cwsearch/stages/<stage>/plots.py`` (and ``cwsearch/data/plots.py``) and share the helpers below.
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
from astropy_healpix import HEALPix

from . import fileio  # fileio.atomic_path is looked up at each call (the fault tests replace it)


def pyplot():
    """matplotlib.pyplot with the non-interactive Agg backend."""
    # lazy: a heavy import, loaded only when this runs
    import matplotlib

    matplotlib.use("Agg")
    # lazy, after the backend is chosen
    import matplotlib.pyplot as plt

    return plt


def save_figure(fig, path):
    """Save ``fig`` to ``path`` (PNG) atomically and close it."""
    plt = pyplot()
    try:
        with fileio.atomic_path(path) as tmp:
            fig.savefig(tmp, format="png", dpi=110, bbox_inches="tight")
    finally:  # closed also when the write fails (disk full), so no figure is left open
        plt.close(fig)


def _wrap_ra(ra):
    """RA [rad] to Mollweide longitude, astronomical convention (east to the left)."""
    lon = np.remainder(np.asarray(ra) + np.pi, 2 * np.pi) - np.pi
    return -lon


def sky_map(path, values, nside, *, title="", label="", pulsars=None, marks=None, log=False,
            cmap="viridis", contours=None):
    """Mollweide map of a HEALPix (RING) map, pulsars as white stars, optional marked points.

    ``pulsars``: (ra, dec) arrays [rad]; ``marks``: list of dicts with keys
    ``ra``, ``dec`` [rad], optional ``label``, ``color``, ``marker``, ``size``.
    ``contours``: optional list of (levels, map) drawn as contour lines.
    """
    plt = pyplot()
    res = 360
    lon = np.linspace(-np.pi, np.pi, res)
    lat = np.linspace(-np.pi / 2, np.pi / 2, res // 2)
    lon_g, lat_g = np.meshgrid(lon, lat)
    # the HEALPix RING lookup straight from astropy-healpix (the same call as cwsearch.physics.sky.pixel_of;
    # this floor may not import physics)
    pix = np.asarray(HEALPix(nside=int(nside), order="ring").lonlat_to_healpix(
        np.remainder(-lon_g, 2 * np.pi) * u.rad, lat_g * u.rad))
    grid = np.asarray(values)[pix]
    fig = plt.figure(figsize=(8, 4.6))
    ax = fig.add_subplot(111, projection="mollweide")
    if log:
        # lazy: a heavy import, loaded only when this runs
        from matplotlib.colors import LogNorm

        mesh = ax.pcolormesh(lon_g, lat_g, grid, cmap=cmap, shading="auto",
                             norm=LogNorm(vmin=np.nanmin(grid[grid > 0]), vmax=np.nanmax(grid)))
    else:
        mesh = ax.pcolormesh(lon_g, lat_g, grid, cmap=cmap, shading="auto")
    if contours:
        for levels, cmap_values in contours:
            ax.contour(lon_g, lat_g, np.asarray(cmap_values)[pix], levels=levels, colors="white",
                       linewidths=1.0)
    if pulsars is not None:
        ax.scatter(_wrap_ra(pulsars[0]), pulsars[1], marker="*", s=60, c="white", edgecolors="black",
                   linewidths=0.5, label="pulsars", zorder=3)
    for mark in marks or []:
        ax.scatter(_wrap_ra(mark["ra"]), mark["dec"], marker=mark.get("marker", "x"),
                   s=mark.get("size", 60), c=mark.get("color", "red"), label=mark.get("label"), zorder=4)
    ax.set_xticklabels([f"{int(h)}h" for h in np.linspace(10, -10, 11) % 24])
    ax.grid(True, alpha=0.3)
    fig.colorbar(mesh, ax=ax, orientation="horizontal", pad=0.06, fraction=0.05, label=label)
    if title:
        ax.set_title(title, pad=14)
    if pulsars is not None or marks:
        ax.legend(loc="lower right", fontsize=7, framealpha=0.6)
    save_figure(fig, path)


__all__ = ["pyplot", "save_figure", "sky_map"]
