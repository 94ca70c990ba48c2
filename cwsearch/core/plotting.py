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


def _pixels(nside, ra, dec):
    """HEALPix RING pixel of each (ra, dec) [rad], straight from astropy-healpix (as physics.sky.pixel_of;
    this floor may not import physics)."""
    return np.asarray(HEALPix(nside=int(nside), order="ring").lonlat_to_healpix(
        np.asarray(ra) * u.rad, np.asarray(dec) * u.rad))


def _outlined(texts, color="black"):
    """Give tick labels a white outline so they read on any colour of the map."""
    # lazy: a heavy import, loaded only when this runs
    import matplotlib.patheffects as pe

    for t in texts:
        t.set_path_effects([pe.withStroke(linewidth=2.5, foreground="white")])
        t.set_color(color)


#: offsets [points] tried, in order, for a label beside its marker (then the same twice as far out)
_LABEL_OFFSETS = ((6, 5), (6, -13), (-14, 5), (-14, -13), (9, -4), (-20, -4), (-4, 9), (-4, -17))


def place_labels(ax, points, texts, *, fontsize=8, avoid=()):
    """Annotate ``points`` (data coordinates) with ``texts`` so that no two labels overlap each other or a
    marker: each label takes the first offset of :data:`_LABEL_OFFSETS` (then twice as far, with a leader
    line) whose box is free and inside the axes; a label with no free place goes to the least crowded one.
    ``avoid``: extra display-coordinate boxes (``Bbox``) to keep clear. Returns the annotations."""
    # lazy: a heavy import, loaded only when this runs
    from matplotlib.transforms import Bbox

    fig = ax.figure
    renderer = fig.canvas.get_renderer()
    frame = ax.get_window_extent(renderer)
    marker_boxes = []
    for x, y in points:
        px, py = ax.transData.transform((x, y))
        r = 4.0 * fig.dpi / 72.0
        marker_boxes.append(Bbox.from_extents(px - r, py - r, px + r, py + r))
    taken = list(avoid)
    out = []
    for (x, y), text in zip(points, texts):
        best, best_score = None, None
        for scale in (1, 2):
            for dx, dy in _LABEL_OFFSETS:
                label = ax.annotate(text, (x, y), xytext=(dx * scale, dy * scale), textcoords="offset points",
                                    fontsize=fontsize, fontweight="bold", zorder=6,
                                    arrowprops=dict(arrowstyle="-", lw=0.5, color="0.25") if scale > 1 else None)
                box = label.get_window_extent(renderer).expanded(1.08, 1.15)
                clash = sum(box.overlaps(b) for b in taken + marker_boxes)
                outside = not (frame.contains(box.x0, box.y0) and frame.contains(box.x1, box.y1))
                score = clash + 10 * outside
                if best is None or score < best_score:
                    if best is not None:
                        best[0].remove()
                    best, best_score = (label, box), score
                else:
                    label.remove()
                if best_score == 0:
                    break
            if best_score == 0:
                break
        _outlined([best[0]])
        taken.append(best[1])
        out.append(best[0])
    return out


def _zoom_panel(ax, values, nside, centre, radius, *, cmap, norm, contours, pulsars, marks, truth):
    """A flat (cartesian, degrees) zoom of the map around ``centre`` = (ra, dec) [rad], half-width ``radius`` [deg];
    returns the texts of the marks labelled in it (those inside the panel)."""
    ra0, dec0 = np.degrees(centre[0]), np.degrees(centre[1])
    half_ra = min(radius / max(np.cos(np.radians(dec0)), 0.2), 180.0)
    ra_grid = np.linspace(ra0 - half_ra, ra0 + half_ra, 240)
    dec_grid = np.linspace(max(dec0 - radius, -90), min(dec0 + radius, 90), 200)
    rg, dg = np.meshgrid(ra_grid, dec_grid)
    pix = _pixels(nside, np.radians(np.remainder(rg, 360)), np.radians(dg))
    ax.pcolormesh(rg, dg, np.asarray(values)[pix], cmap=cmap, norm=norm, shading="auto")
    for levels, level_map in contours or []:
        ax.contour(rg, dg, np.asarray(level_map)[pix], levels=levels, colors="black", linewidths=1.0,
                   linestyles=["-", "--"][:len(levels)])

    def near(ra, dec):
        ra = np.degrees(np.asarray(ra, dtype=float))
        ra = ra0 + (np.remainder(ra - ra0 + 180, 360) - 180)   # unwrap next to the centre
        return ra, np.degrees(np.asarray(dec, dtype=float))

    if pulsars is not None:
        x, y = near(*pulsars)
        ax.scatter(x, y, marker="*", s=70, c="white", edgecolors="black", linewidths=0.6, zorder=3)
    labelled = []
    for mark in marks or []:
        x, y = near(mark["ra"], mark["dec"])
        ax.scatter(x, y, marker=mark.get("marker", "x"), s=mark.get("size", 60), c=mark.get("color", "red"),
                   zorder=4, edgecolors=mark.get("edge", None))
        if mark.get("text"):
            labelled.append(((float(np.atleast_1d(x)[0]), float(np.atleast_1d(y)[0])), mark["text"]))
    if truth is not None:
        x, y = near(*truth)
        ax.scatter(x, y, marker="P", s=110, c="#e6007e", edgecolors="black", linewidths=0.7, zorder=5)
    ax.set_xlim(ra0 + half_ra, ra0 - half_ra)     # east to the left
    ax.set_ylim(dec_grid[0], dec_grid[-1])
    ax.set_xlabel("right ascension [deg]")
    ax.set_ylabel("declination [deg]")
    ax.set_title(f"zoom: {2 * radius:.0g}° across" if radius < 5 else f"zoom: {2 * radius:.0f}° across", fontsize=9)
    ax.set_aspect(1 / max(np.cos(np.radians(dec0)), 0.2))
    ax.grid(alpha=0.3)
    ax.xaxis.set_major_formatter(_degree_formatter())
    ax.yaxis.set_major_formatter(_degree_formatter(wrap=False))
    inside = [(pt, t) for pt, t in labelled
              if min(ax.get_xlim()) <= pt[0] <= max(ax.get_xlim()) and ax.get_ylim()[0] <= pt[1] <= ax.get_ylim()[1]]
    if inside:
        ax.apply_aspect()
        place_labels(ax, [pt for pt, _ in inside], [t for _, t in inside])
    return [t for _, t in inside]


def _degree_formatter(wrap=True):
    """Tick labels in degrees (right ascension wrapped into [0, 360))."""
    # lazy: a heavy import, loaded only when this runs
    from matplotlib.ticker import FuncFormatter

    def fmt(x, _pos):
        v = float(np.remainder(x, 360.0)) if wrap else float(x)
        return f"{v:.0f}°" if abs(v - round(v)) < 1e-6 else f"{v:.1f}°"

    return FuncFormatter(fmt)


def sky_figure(values, nside, *, title="", label="", pulsars=None, marks=None, log=False,
               cmap="viridis", contours=None, truth=None, zoom=None, footer=None):
    """Mollweide map of a HEALPix (RING) map: light background, pulsars as stars, marked points; returns the
    figure (see :func:`sky_map`, which saves it).

    ``pulsars``: (ra, dec) arrays [rad]; ``marks``: list of dicts with keys
    ``ra``, ``dec`` [rad], optional ``label``, ``color``, ``marker``, ``size``, ``text`` (a label drawn in
    the zoom panel, placed clear of the other labels and markers). ``contours``: optional list of
    (levels, map) drawn as contour lines. ``truth``: (ra, dec) [rad] of an injected source, drawn as a
    magenta plus. ``zoom``: (ra, dec [rad], half-width [deg]) adds a flat zoom panel around that point.
    ``footer``: a line of text under the figure. Axes in degrees (right ascension increasing to the
    left, east); legends sit below the map, never over it.
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
    bottom = 0.06 if footer else 0.0
    if zoom is not None:
        fig = plt.figure(figsize=(12, 5.2 + (0.4 if footer else 0)))
        ax = fig.add_axes([0.02, 0.26 + bottom, 0.6, 0.66 - bottom], projection="mollweide")
        zax = fig.add_axes([0.69, 0.26 + bottom, 0.29, 0.66 - bottom])
        cax = fig.add_axes([0.08, 0.15 + bottom, 0.42, 0.03])
    else:
        fig = plt.figure(figsize=(8.5, 5.2 + (0.4 if footer else 0)))
        ax = fig.add_axes([0.04, 0.26 + bottom, 0.92, 0.66 - bottom], projection="mollweide")
        cax = fig.add_axes([0.1, 0.15 + bottom, 0.45, 0.03])
        zax = None
    if log:
        # lazy: a heavy import, loaded only when this runs
        from matplotlib.colors import LogNorm

        positive = grid[np.isfinite(grid) & (grid > 0)]
        norm = LogNorm(vmin=positive.min(), vmax=positive.max()) if positive.size else None
    else:
        # lazy: a heavy import, loaded only when this runs
        from matplotlib.colors import Normalize

        finite = grid[np.isfinite(grid)]
        norm = Normalize(vmin=finite.min(), vmax=finite.max()) if finite.size else None
    mesh = ax.pcolormesh(lon_g, lat_g, grid, cmap=cmap, norm=norm, shading="auto")
    if contours:
        for levels, level_map in contours:
            ax.contour(lon_g, lat_g, np.asarray(level_map)[pix], levels=levels, colors="black",
                       linewidths=0.9, linestyles=["-", "--"][:len(levels)])
    handles = []
    if pulsars is not None:
        handles.append(ax.scatter(_wrap_ra(pulsars[0]), pulsars[1], marker="*", s=60, c="white",
                                  edgecolors="black", linewidths=0.6, label="pulsars", zorder=3))
    for mark in marks or []:
        h = ax.scatter(_wrap_ra(mark["ra"]), mark["dec"], marker=mark.get("marker", "x"),
                       s=mark.get("size", 60), c=mark.get("color", "red"), label=mark.get("label"), zorder=4,
                       edgecolors=mark.get("edge", None))
        if mark.get("label"):
            handles.append(h)
    if truth is not None:
        handles.append(ax.scatter(_wrap_ra(truth[0]), truth[1], marker="P", s=110, c="#e6007e",
                                  edgecolors="black", linewidths=0.7, label="truth (injection.json)", zorder=5))
    if zoom is not None:
        handles.append(ax.scatter(_wrap_ra(zoom[0]), zoom[1], marker="o", s=260, facecolors="none",
                                  edgecolors="black", linewidths=1.0, label="zoomed region (right)", zorder=4))
    ticks = np.arange(-150, 181, 30)
    ax.set_xticks(np.radians(ticks))
    # right ascension in degrees, increasing to the left (east): plotted longitude -λ is ra λ
    ax.set_xticklabels([f"{int(t)}°" for t in np.remainder(-ticks, 360)], fontsize=8)
    _outlined(ax.get_xticklabels())
    _outlined(ax.get_yticklabels())
    ax.tick_params(axis="y", labelsize=8)
    ax.grid(True, color="grey", alpha=0.4)
    ax.set_xlabel("right ascension [deg]", fontsize=8, labelpad=2)
    ax.set_ylabel("declination [deg]", fontsize=8)
    bar = fig.colorbar(mesh, cax=cax, orientation="horizontal", label=label)
    if not log:
        # lazy: a heavy import, loaded only when this runs
        from matplotlib.ticker import FormatStrFormatter, MaxNLocator

        # every tick carries its own exponent: no separate offset text to collide with the label
        bar.locator = MaxNLocator(5)
        bar.formatter = FormatStrFormatter("%.3g")
        bar.update_ticks()
    if title:
        ax.set_title(title, pad=12, fontsize=10)
    if handles:
        fig.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.55 if zoom is None else 0.54, bottom),
                   fontsize=7.5, frameon=False, ncol=1)
    if footer:
        fig.text(0.02, 0.012, footer, fontsize=7.5, ha="left", va="bottom")
    zoomed = []
    if zax is not None:
        zoomed = _zoom_panel(zax, values, nside, zoom[:2], zoom[2], cmap=cmap, norm=norm, contours=contours,
                             pulsars=pulsars, marks=marks, truth=truth)
    outside = [m for m in marks or [] if m.get("text") and m["text"] not in zoomed]
    if outside:
        # marks the zoom panel does not show are numbered on the map itself, clear of the tick labels
        fig.canvas.draw()
        renderer = fig.canvas.get_renderer()
        ticks = [t.get_window_extent(renderer) for t in ax.get_xticklabels() + ax.get_yticklabels()
                 if t.get_text()]
        place_labels(ax, [(float(np.atleast_1d(_wrap_ra(m["ra"]))[0]), float(np.atleast_1d(m["dec"])[0]))
                          for m in outside], [m["text"] for m in outside], avoid=ticks)
    return fig


def sky_map(path, values, nside, **kwargs):
    """Write the :func:`sky_figure` of a HEALPix (RING) map to ``path`` (PNG); keywords as there."""
    save_figure(sky_figure(values, nside, **kwargs), path)


__all__ = ["pyplot", "save_figure", "sky_figure", "sky_map", "place_labels"]
