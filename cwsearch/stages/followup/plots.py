"""Plots of the follow-up stage: corner plot, posterior sky map, trace plots, fitted residuals.

``plot_followup(folder, table, result, likelihood, array, target)`` writes
``corner.png``, ``sky.png``, ``trace.png`` and ``residuals.png`` into ``folder``.

``residuals.png``: per pulsar, the timing residuals with the binary signal of
the posterior (Earth + pulsar term, :func:`cwsearch.physics.waveform.residuals`
through its basis series): pointwise median and 90 % band of the signals of
:data:`RESIDUAL_DRAWS` posterior draws (:mod:`cwsearch.inference.posterior_signal`, shared with the
pipeline's subtract-and-rescan rounds). The likelihood marginalises the
pulsar-term phases (docs/design.md §7), so each draw gets its pulsar phases
drawn from their conditional posterior given the draw's eight parameters (each
pulsar's own likelihood on a phase grid; for a Hellings–Downs background the
cross-pulsar terms are left out of this one step). Every signal passes through
the pulsar's timing-model fit, as the residuals did. With ``injection.json``
the true signal is drawn too (dashed magenta).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ...core.plotting import pyplot, save_figure, sky_map
from ...core.constants import YEAR_SECONDS
from ...data.truth import injected_binary, injected_signal
from ...physics import sky, waveform
from ...physics.simulate import postfit
from ...inference.posterior_signal import RESIDUAL_DRAWS, signal_draws  # shared with the pipeline's rounds

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


#: at most this many pulsar panels (the pulsars with the largest fitted signal first)
MAX_RESIDUAL_PANELS = 20


def true_signals(array, truth):
    """The injected binary's residuals [s] at every pulsar's TOAs (after the timing-model fit), from
    :func:`cwsearch.data.truth.injected_signal`; None without a truth."""
    if not truth:
        return None
    ref = truth["reference_time"] if truth.get("reference_time") is not None else array.reference_time
    out = []
    for p in array:
        out.append(postfit(p, waveform.residuals(
            p.toas, p.position, p.distance, ra=truth["ra"], dec=truth["dec"], gw_frequency=truth["gw_frequency"],
            chirp_mass=truth["chirp_mass"], strain=truth["strain"], inclination=truth["inclination"],
            polarization=truth["polarization"], phase=truth["phase"], reference_time=ref,
            pulsar_phase=truth["pulsar_phases"].get(p.name), evolution=truth["evolution"],
            pulsar_term=truth["pulsar_term"])))
    return out


def residual_plot(path, array, signals, truth_signals=None, max_panels=MAX_RESIDUAL_PANELS):
    """Multi-panel figure: per pulsar the residuals (error bars: effective white-noise σ) against time
    [yr], the pointwise median of ``signals`` (list of (draws, TOAs) arrays) and its 90 % band; the
    true signal (dashed magenta) when given. Pulsars with the largest median signal first."""
    plt = pyplot()
    medians = [np.median(s, axis=0) if s.size else np.zeros(s.shape[1]) for s in signals]
    snr2 = [float(np.sum((m / p.effective_sigmas()) ** 2)) for m, p in zip(medians, array)]
    order = np.argsort(snr2)[::-1][:max_panels]
    n = len(order)
    cols = min(4, max(n, 1))
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(3.6 * cols, 2.5 * rows + 0.9), squeeze=False, sharex=True)
    t0 = array.start
    for ax, i in zip(axes.flat, order):
        p = array[int(i)]
        years = (p.toas - t0) / YEAR_SECONDS
        ns = 1e9
        ax.errorbar(years, p.residuals * ns, yerr=p.effective_sigmas() * ns, fmt=".", ms=2.5, lw=0.5,
                    color="0.55", ecolor="0.8", zorder=1)
        s = signals[int(i)]
        if s.size:
            lo, hi = np.percentile(s, [5, 95], axis=0)
            ax.fill_between(years, lo * ns, hi * ns, color="tab:blue", alpha=0.3, lw=0, zorder=2)
            ax.plot(years, medians[int(i)] * ns, color="tab:blue", lw=1.3, zorder=3)
        if truth_signals is not None:
            ax.plot(years, truth_signals[int(i)] * ns, color="#e6007e", lw=1.1, ls="--", zorder=4)
        # the y range follows the bulk of the residuals and the curves, not a few outlying TOAs
        curves = [p.residuals * 0]
        if s.size:
            curves += [lo, hi]
        if truth_signals is not None:
            curves.append(truth_signals[int(i)])
        top = max(float(np.percentile(np.abs(p.residuals), 99)), float(np.max(np.abs(np.concatenate(curves)))))
        if top > 0:
            ax.set_ylim(-1.25 * top * ns, 1.25 * top * ns)
        ax.set_title(p.name, fontsize=9)
        ax.tick_params(labelsize=7)
        ax.grid(alpha=0.3)
    for ax in list(axes.flat)[n:]:
        ax.axis("off")
    for ax in axes[:, 0]:
        ax.set_ylabel("residual [ns]", fontsize=8)
    for ax in axes[-1, :]:
        ax.set_xlabel("years since first TOA", fontsize=8)
    # lazy: a heavy import, loaded only when this runs
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles = [Line2D([], [], color="0.55", marker=".", ls="", label="residuals (±1σ white noise)"),
               Line2D([], [], color="tab:blue", lw=1.3, label="fitted binary: posterior median"),
               Patch(color="tab:blue", alpha=0.3, label="90 % band of posterior draws")]
    if truth_signals is not None:
        handles.append(Line2D([], [], color="#e6007e", ls="--", lw=1.1, label="true signal (injection.json)"))
    shown = f"the {n} with the largest fitted signal of {len(array)} pulsars" if n < len(array) else \
        f"all {n} pulsars, largest fitted signal first"
    fig.suptitle(f"Timing residuals with the fitted binary signal (Earth + pulsar term, after the timing-model "
                 f"fit); {shown}", fontsize=10)
    fig.tight_layout(rect=(0, 0.06 if rows > 1 else 0.1, 1, 0.96))
    fig.legend(handles=handles, loc="lower center", ncol=len(handles), fontsize=8, frameon=False)
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
    if len(table) >= 1:
        residual_plot(folder / "residuals.png", array, signal_draws(likelihood, array, table),
                      true_signals(array, injected_signal(array)))


def plot_joint(folder, tables, truths=None):
    """Joint follow-up: ``corner_source_K.png`` per source (its block of the joint posterior, the other
    sources marginalised), truth in magenta where the injection falls in the source's window; returns the
    file names."""
    names = []
    for k, table in enumerate(tables):
        name = f"corner_source_{k + 1}.png"
        corner_plot(Path(folder) / name, table, (truths or [None] * len(tables))[k])
        names.append(name)
    return names


__all__ = [
    "CORNER_COLUMNS", "TRACE_UNITS", "corner_plot", "credible_levels", "sky_posterior", "trace_plot",
    "plot_followup", "RESIDUAL_DRAWS", "signal_draws", "true_signals", "residual_plot",
    "plot_joint",
]
