"""Figures of the noise stage: per-pulsar residual power against the fitted model, and the
common-process likelihood over amplitude × index."""

from __future__ import annotations

import numpy as np

from ...core.constants import YEAR_FREQUENCY
from ...core.plotting import pyplot, save_figure
from ...physics.noise import (NoiseSettings, PulsarWeighting, fourier_basis, fourier_frequencies,
                              powerlaw_variance)


def residual_power(pulsar, start, span, components, fourier_variance=None):
    """White-noise-weighted residual power of one pulsar at k/span, k = 1..components, and its expectation.

    Per frequency, the sine and cosine amplitudes ``c_k = G_kk⁻¹ (B_k|r)`` are fitted to the residuals with
    the pulsar's white noise only (timing model marginalised; ``G = (B|B)`` over all frequencies, ``G_kk``
    its 2 × 2 block). Returns ``(frequencies, power, white_level, expected)``: ``power = ½ |c_k|²``;
    ``white_level = ½ tr G_kk⁻¹``, its expectation under white noise alone; and ``expected``, its exact
    expectation when the residuals also hold a Gaussian process with Fourier variances
    ``fourier_variance`` (length 2 × components, sine and cosine of each frequency; None: white only):

        Cov(B|r) = G + G Φ G   ⇒   E[power_k] = ½ tr G_kk⁻¹ + ½ tr (G_kk⁻¹ (G Φ G)_kk G_kk⁻¹).

    The second term is not just φ_k: through the irregular sampling and the timing-model fit, the strong
    low-frequency power of a red process leaks into every higher frequency's estimate, and the model line
    must carry the same leakage as the points. A frequency the timing model nearly absorbs (e.g. 1/yr with
    astrometry; white level above 100 × the median) is left out (NaN).
    """
    white = PulsarWeighting(pulsar, start, span, NoiseSettings(red_components=0, pulsar_red_noise=False))
    freqs = fourier_frequencies(span, components)
    basis = fourier_basis(pulsar.toas, start, span, components)
    proj = white.inner(basis, pulsar.residuals)
    gram = white.inner(basis, basis)
    coloured = None
    if fourier_variance is not None:
        coloured = gram @ (np.asarray(fourier_variance, dtype=float)[:, None] * gram)
    power = np.empty(components)
    level = np.empty(components)
    expected = np.empty(components)
    for k in range(components):
        sl = slice(2 * k, 2 * k + 2)
        try:
            ginv = np.linalg.inv(gram[sl, sl])
        except np.linalg.LinAlgError:
            power[k] = level[k] = expected[k] = np.nan
            continue
        c = ginv @ proj[sl]
        power[k] = 0.5 * float(c @ c)
        level[k] = 0.5 * float(np.trace(ginv))
        expected[k] = level[k] + (0.0 if coloured is None else 0.5 * float(np.trace(ginv @ coloured[sl, sl] @ ginv)))
    # a 2 x 2 block the timing model has (nearly) absorbed inverts to round-off, even to a negative trace
    finite = np.isfinite(level) & (level > 0) & np.isfinite(expected) & (expected > 0)
    bad = ~finite
    if finite.any():
        bad |= level > 100.0 * np.median(level[finite])
    power[bad] = level[bad] = expected[bad] = np.nan
    return freqs, power, level, expected


def spectra_plot(path, array, settings, fit, max_panels=60, truth=None):
    """Grid of per-pulsar panels: residual power (points), white level, fitted red + common + white model;
    with ``truth`` (:func:`cwsearch.data.truth.injected_noise`) the true red noise and background spectra
    as dashed magenta lines."""
    plt = pyplot()
    pulsars = list(array)[:max_panels]
    n = len(pulsars)
    cols = min(5, max(n, 1))
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(2.6 * cols, 2.2 * rows), squeeze=False, sharex=True)
    components = max(int(settings.red_components), 1)
    common = fit.common
    for ax, p in zip(axes.flat, pulsars):
        freqs = fourier_frequencies(array.span, components)
        red = np.zeros(components)
        if p.noise.has_red_noise:
            red = powerlaw_variance(freqs, p.noise.red_log10_amplitude, p.noise.red_index, array.span)
        com = np.zeros(components)
        if common is not None:
            com = powerlaw_variance(freqs, common.log10_amplitude, common.index, array.span)
        freqs, power, level, model = residual_power(p, array.start, array.span, components,
                                                    fourier_variance=np.repeat(red + com, 2))
        x = freqs / YEAR_FREQUENCY
        ax.loglog(x, power, ".", color="0.3", ms=4)
        ax.loglog(x, level, ":", color="tab:gray", lw=1)
        ax.loglog(x, model, "-", color="tab:red", lw=1.2)
        if p.noise.has_red_noise:
            ax.loglog(x, red, "--", color="tab:orange", lw=0.8)
        if common is not None:
            ax.loglog(x, com, "--", color="tab:blue", lw=0.8)
        true_red = ((truth or {}).get("pulsars") or {}).get(p.name, {}).get("red")
        if true_red:
            ax.loglog(x, powerlaw_variance(freqs, true_red["log10_amplitude"], true_red["index"], array.span), "--",
                      color="#e6007e", lw=1.0)
        background = (truth or {}).get("background")
        if background:
            ax.loglog(x, powerlaw_variance(freqs, background["log10_amplitude"], background["index"], array.span),
                      ":", color="#e6007e", lw=1.0)
        pf = fit[p.name]
        flag = " !" if pf.gof is not None and pf.gof.flagged else ""
        ax.set_title(f"{p.name}{flag}" + (" (red)" if pf.red_noise else ""), fontsize=8)
        ax.tick_params(labelsize=6)
        # no minor ticks: on log axes they dominate the drawing time of a grid of 20-60 panels
        # (measured: 18 s of tick layout for 20 panels), and at this size they carry no information
        ax.minorticks_off()
    for ax in list(axes.flat)[n:]:
        ax.axis("off")
    for ax in axes[-1]:
        ax.set_xlabel("f [1/yr]", fontsize=7)
    for ax in axes[:, 0]:
        ax.set_ylabel("power [s²]", fontsize=7)
    fig.suptitle("Residual power (points, white-noise weighted, per frequency) against its expectation under the "
                 "fitted model (red line, including the leakage of low-frequency power through the sampling);\n"
                 "white level (dotted); spectra of the fitted red (orange) and common (blue) processes; "
                 "'!' = failed goodness of fit"
                 + ("; truth (injection.json, magenta): red noise dashed, background dotted" if truth else ""),
                 fontsize=8)
    # fixed margins instead of tight_layout (which measures every tick label of every panel)
    fig.subplots_adjust(left=0.6 / (2.6 * cols), right=1 - 0.1 / (2.6 * cols), bottom=0.45 / (2.2 * rows),
                        top=1 - 0.95 / (2.2 * rows), wspace=0.3, hspace=0.45)
    save_figure(fig, path)


def common_grid(log_likelihood, fit, points=16):
    """``(log10 amplitudes, indices, 2 Δln L grid)`` around the fitted common process (bounds-clipped)."""
    b = fit.bounds
    c = fit.common
    # the window: five Hessian errors either side (at least 0.1 in log10 A and 0.3 in index, at most the bounds)
    half_a = float(np.clip(5 * c.log10_amplitude_err, 0.1, 1.5))
    lo_a = max(b.common_log10_amplitude[0], c.log10_amplitude - half_a)
    hi_a = min(b.common_log10_amplitude[1], c.log10_amplitude + half_a)
    amps = np.linspace(lo_a, hi_a, points)
    if c.index_fixed:
        idx = np.array([c.index])
    else:
        half_g = float(np.clip(5 * c.index_err, 0.3, 3.25))
        idx = np.linspace(max(b.common_index[0], c.index - half_g), min(b.common_index[1], c.index + half_g), points)
    grid = np.array([[log_likelihood(a, g) for a in amps] for g in idx])
    top = max(np.nanmax(grid), c.log_likelihood)
    return amps, idx, 2.0 * (top - grid)


def common_contour_plot(path, log_likelihood, fit, points, correlation, truth=None):
    """Contours 2 Δln L = 2.30, 6.18, 11.8 (68, 95, 99.7 % for two parameters) of the common process; returns
    the grid as a JSON-ready dict. The injected background (``truth["background"]``, from
    :func:`cwsearch.data.truth.injected_noise`) is drawn as a magenta plus, or a line when the index is fixed."""
    plt = pyplot()
    amps, idx, delta = common_grid(log_likelihood, fit, points)
    c = fit.common
    background = (truth or {}).get("background")
    fig, ax = plt.subplots(figsize=(5.2, 4.0))
    if idx.size > 1:
        cs = ax.contourf(amps, idx, np.minimum(delta, 30), levels=30, cmap="viridis_r")
        fig.colorbar(cs, ax=ax, label="2 Δln L (clipped at 30)")
        ax.contour(amps, idx, delta, levels=[2.30, 6.18, 11.8], colors="w", linewidths=1)
        ax.plot([c.log10_amplitude], [c.index], "r*", ms=10, label="maximum likelihood")
        ax.axhline(13 / 3, color="w", ls=":", lw=0.8)
        if background:
            ax.scatter([background["log10_amplitude"]], [background["index"]], marker="P", s=110, c="#e6007e",
                       edgecolors="black", linewidths=0.7, zorder=5, label="truth (injection.json)")
        ax.set_ylabel("common spectral index γ")
    else:
        ax.plot(amps, delta[0], "-")
        ax.axhline(4.0, color="k", ls=":", lw=0.8)
        if background:
            ax.axvline(background["log10_amplitude"], color="#e6007e", ls="--", lw=1.2,
                       label=f"truth (injection.json, γ = {background['index']:.3g})")
            ax.legend(loc="upper center", fontsize=7)
        ax.set_ylabel(f"2 Δln L (index fixed at {c.index:.3g})")
    ax.set_xlabel("common log10 amplitude")
    ax.set_title(f"Common process ({correlation}): 2 ΔlnL = {c.statistic:.1f} against zero amplitude", fontsize=9)
    ax.legend(loc="lower left", fontsize=7) if idx.size > 1 else None
    fig.tight_layout()
    save_figure(fig, path)
    return {"log10_amplitude": [float(a) for a in amps], "index": [float(g) for g in idx],
            "delta_2lnL": [[float(v) for v in row] for row in delta]}


__all__ = ["residual_power", "spectra_plot", "common_grid", "common_contour_plot"]
