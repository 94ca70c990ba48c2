"""Plots of the follow-up stage: corner plot, posterior sky map, trace plots.

``plot_followup(folder, table, result, likelihood, array, target)`` writes
``corner.png``, ``sky.png`` and ``trace.png`` into ``folder``.
"""

from __future__ import annotations

import numpy as np

from ...core.plotting import pyplot, save_figure, sky_map
from ...physics import sky

CORNER_COLUMNS = (("ra", "ra [deg]"), ("dec", "dec [deg]"), ("frequency", "f [nHz]"),
                  ("chirp_mass", "log10 Mc [Msun]"), ("strain", "log10 h0"), ("inclination", "ι [rad]"),
                  ("polarization", "ψ [rad]"), ("phase", "Φ0 [rad]"))


def corner_plot(path, table, truths=None):
    """Corner plot (the ``corner`` package) of the posterior table."""
    # lazy: a heavy import, loaded only when this runs
    import corner

    plt = pyplot()
    data, labels = [], []
    for name, label in CORNER_COLUMNS:
        x = np.asarray(table[name], dtype=float)
        if name == "frequency":
            x = x * 1e9
        elif name in ("chirp_mass", "strain"):
            x = np.log10(np.maximum(x, 1e-300))
        data.append(x)
        labels.append(label)
    data = np.column_stack(data)
    keep = np.ptp(data, axis=0) > 0
    fig = corner.corner(data[:, keep], labels=list(np.array(labels)[keep]), quantiles=[0.05, 0.5, 0.95],
                        show_titles=True, title_kwargs={"fontsize": 8}, label_kwargs={"fontsize": 8},
                        truths=None if truths is None else list(np.asarray(truths)[keep]))
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


def sky_posterior(path, ra, dec, pulsars=None, target=None, nside=None):
    """Posterior sky density (HEALPix histogram) with 50 % and 90 % credible regions."""
    ra, dec = np.asarray(ra), np.asarray(dec)
    if nside is None:
        nside = 16 if ra.size < 3000 else 32
    counts = np.bincount(sky.pixel_of(nside, ra, dec), minlength=sky.n_pixels(nside)).astype(float)
    prob = counts / counts.sum()
    levels = credible_levels(prob)
    marks = []
    if target is not None:
        marks.append({"ra": target[0], "dec": target[1], "label": "start", "color": "red", "marker": "x"})
    sky_map(path, prob / sky.pixel_area(nside), nside, title="posterior sky position (50 %, 90 % regions)",
            label="probability density [1/sr]", pulsars=pulsars, marks=marks, cmap="magma",
            contours=[([0.5, 0.9], levels)])


def trace_plot(path, chain, names, burn_in, max_walkers=8):
    """T = 1 traces of each sampler parameter for a few walkers; burn-in shaded."""
    plt = pyplot()
    n_iter, n_walk, dim = chain.shape
    fig, axes = plt.subplots(dim, 1, figsize=(8, 1.3 * dim), sharex=True)
    for j, ax in enumerate(np.atleast_1d(axes)):
        ax.plot(chain[:, :max_walkers, j], lw=0.5, alpha=0.7)
        ax.axvspan(0, burn_in, color="grey", alpha=0.15)
        ax.set_ylabel(names[j], fontsize=7)
        ax.tick_params(labelsize=7)
    np.atleast_1d(axes)[-1].set_xlabel("iteration")
    save_figure(fig, path)


def plot_followup(folder, table, result, likelihood, array, target):
    """All follow-up plots into ``folder``."""
    if len(table) >= 2:
        corner_plot(folder / "corner.png", table)
        start = None if target.ra is None else (target.ra, target.dec)
        sky_posterior(folder / "sky.png", np.radians(np.asarray(table["ra"], dtype=float)),
                      np.radians(np.asarray(table["dec"], dtype=float)),
                      pulsars=(np.array([p.ra for p in array]), np.array([p.dec for p in array])), target=start)
    if result.iterations:
        trace_plot(folder / "trace.png", result.chain, list(likelihood.names), result.burn_in)


__all__ = [
    "CORNER_COLUMNS", "corner_plot", "credible_levels", "sky_posterior", "trace_plot", "plot_followup",
]
