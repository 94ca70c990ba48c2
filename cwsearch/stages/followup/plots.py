"""Plots of the follow-up stage: corner plot, posterior sky map, trace plots.

``plot_followup(folder, table, result, likelihood, array, target)`` writes
``corner.png``, ``sky.png`` and ``trace.png`` into ``folder``.
"""

from __future__ import annotations

import numpy as np

from ...core.plotting import pyplot, save_figure, sky_map
from ...data.truth import injected_binary
from ...physics import sky

#: (posterior column, axis label, transform to the plotted unit)
CORNER_COLUMNS = (("ra", "RA [deg]", None), ("dec", "Dec [deg]", None), ("frequency", "f [nHz]", "nHz"),
                  ("chirp_mass", "log10 Mc [Msun]", "log10"), ("strain", "log10 h0", "log10"),
                  ("inclination", "ι [deg]", "deg"), ("polarization", "ψ [deg]", "deg"),
                  ("phase", "Φ0 [deg]", "deg"))


def _to_unit(x, how, *, angle_in_degrees=False):
    x = np.asarray(x, dtype=float)
    if how == "nHz":
        return x * 1e9
    if how == "log10":
        return np.log10(np.maximum(x, 1e-300))
    if how == "deg":
        return x if angle_in_degrees else np.degrees(x)
    return x


def corner_plot(path, table, truth=None):
    """Corner plot (the ``corner`` package) of the posterior in degrees and natural units, truth in magenta."""
    # lazy: a heavy import, loaded only when this runs
    import corner

    plt = pyplot()
    data, labels, truths = [], [], []
    for name, label, how in CORNER_COLUMNS:
        data.append(_to_unit(table[name], how))
        labels.append(label)
        t = (truth or {}).get(name)
        truths.append(None if t is None else float(_to_unit(t, how, angle_in_degrees=True)))
    data = np.column_stack(data)
    keep = np.ptp(data, axis=0) > 0
    kept_truths = list(np.array(truths, dtype=object)[keep])
    fig = corner.corner(data[:, keep], labels=list(np.array(labels)[keep]), quantiles=[0.05, 0.5, 0.95],
                        show_titles=True, title_fmt=".3g", title_kwargs={"fontsize": 10},
                        label_kwargs={"fontsize": 11}, labelpad=0.08, max_n_ticks=4,
                        truths=kept_truths if truth else None, truth_color="#e6007e")
    for ax in fig.get_axes():
        ax.tick_params(labelsize=8)
    fig.subplots_adjust(top=0.94, wspace=0.12, hspace=0.12)
    if truth:
        fig.suptitle("posterior (magenta: truth from injection.json; titles: median with 90 % interval)",
                     fontsize=12)
    save_figure(fig, path)
    plt.close("all")


def credible_levels(probability):
    """Per pixel, the smallest credible level whose region contains it (0 = densest pixel)."""
    p = np.asarray(probability, dtype=float)
    order = np.argsort(-p)
    cum = np.cumsum(p[order])
    levels = np.empty_like(p)
    levels[order] = cum - p[order]      # probability in strictly denser pixels
    return levels


def sky_posterior(path, ra, dec, pulsars=None, target=None, nside=None, truth=None, centre=None):
    """Posterior sky density (HEALPix histogram) with 50 % and 90 % credible regions and a zoom panel."""
    ra, dec = np.asarray(ra), np.asarray(dec)
    if nside is None:   # the resolution of the sky summary (coarser for few samples), at least nside 4
        nside = max(int((centre or {}).get("map_nside") or (16 if ra.size < 3000 else 32)), 4)
    counts = np.bincount(sky.pixel_of(nside, ra, dec), minlength=sky.n_pixels(nside)).astype(float)
    prob = counts / counts.sum()
    levels = credible_levels(prob)
    marks = []
    if target is not None:
        marks.append({"ra": target[0], "dec": target[1], "label": "start (scan peak)", "color": "#d62728",
                      "marker": "x"})
    zoom = None
    if centre is not None:
        zoom = (np.radians(centre["ra"]), np.radians(centre["dec"]),
                float(np.clip(1.5 * centre.get("radius_90_deg", 10.0), 8.0, 60.0)))
    truth_rad = None if not truth or "ra" not in truth else (np.radians(truth["ra"]), np.radians(truth["dec"]))
    sky_map(path, prob / sky.pixel_area(nside), nside,
            title="posterior sky position (solid: 50 %, dashed: 90 % credible region)",
            label="posterior probability density [1/sr]", pulsars=pulsars, marks=marks, cmap="Blues",
            contours=[([0.5, 0.9], levels)], truth=truth_rad, zoom=zoom)


#: sampler coordinate -> (axis label, transform to a physical unit, key in the truth dict)
TRACE_UNITS = {
    "ra": ("RA [deg]", np.degrees, "ra"),
    "sin_dec": ("Dec [deg]", lambda x: np.degrees(np.arcsin(np.clip(x, -1, 1))), "dec"),
    "log10_frequency": ("f [nHz]", lambda x: 1e9 * 10 ** x, "frequency"),
    "log10_chirp_mass": ("log10 Mc [Msun]", None, "chirp_mass"),
    "log10_strain": ("log10 h0", None, "strain"),
    "cos_inclination": ("inclination [deg]", lambda x: np.degrees(np.arccos(np.clip(x, -1, 1))), "inclination"),
    "polarization": ("ψ [deg]", np.degrees, "polarization"),
    "phase": ("Φ0 [deg]", np.degrees, "phase"),
}


def _truth_in_trace_unit(name, truth):
    key = TRACE_UNITS.get(name, (None, None, None))[2]
    if not truth or key not in truth:
        return None
    t = float(truth[key])
    if name == "log10_frequency":
        return t * 1e9
    if name.startswith("log10_"):
        return float(np.log10(t))
    return t   # degrees already (cwsearch.data.truth)


def trace_plot(path, chain, names, burn_in, max_walkers=8, truth=None):
    """T = 1 traces of each parameter for a few walkers, in degrees and natural units; burn-in shaded."""
    plt = pyplot()
    n_iter, n_walk, dim = chain.shape
    fig, axes = plt.subplots(dim, 1, figsize=(8, 1.35 * dim), sharex=True)
    for j, ax in enumerate(np.atleast_1d(axes)):
        label, how, _ = TRACE_UNITS.get(names[j], (names[j].replace("_", " "), None, None))
        values = chain[:, :max_walkers, j]
        ax.plot(how(values) if how else values, lw=0.5, alpha=0.7)
        ax.axvspan(0, burn_in, color="grey", alpha=0.15)
        t = _truth_in_trace_unit(names[j], truth)
        if t is not None:
            ax.axhline(t, color="#e6007e", lw=1.4, ls="--")
        ax.set_ylabel(label, fontsize=8)
        ax.tick_params(labelsize=7)
    first = np.atleast_1d(axes)[0]
    first.set_title("T = 1 chains (grey: burn-in" + ("; dashed magenta: truth)" if truth else ")"), fontsize=9)
    np.atleast_1d(axes)[-1].set_xlabel("iteration")
    fig.tight_layout()
    save_figure(fig, path)


def plot_followup(folder, table, result, likelihood, array, target, sky=None):
    """All follow-up plots into ``folder`` (truth from the dataset's injection.json when there is one)."""
    truth = injected_binary(array)
    if len(table) >= 2:
        corner_plot(folder / "corner.png", table, truth)
        start = None if target.ra is None else (target.ra, target.dec)
        sky_posterior(folder / "sky.png", np.radians(np.asarray(table["ra"], dtype=float)),
                      np.radians(np.asarray(table["dec"], dtype=float)),
                      pulsars=(np.array([p.ra for p in array]), np.array([p.dec for p in array])), target=start,
                      truth=truth, centre=sky)
    if result.iterations:
        trace_plot(folder / "trace.png", result.chain, list(likelihood.names), result.burn_in, truth=truth)


__all__ = [
    "CORNER_COLUMNS", "TRACE_UNITS", "corner_plot", "credible_levels", "sky_posterior", "trace_plot",
    "plot_followup",
]
