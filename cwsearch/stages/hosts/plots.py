"""Plots of the host stage: sky maps with the catalogue galaxies, chirp-mass consistency per host.

Files (PNG, in the hosts folder):

* ``hosts_sky.png`` — Mollweide map of the sky density of the binary
  (kernel density of the samples), 90 % and 99 % contours, galaxies in the
  99 % region coloured by host probability, the best one labelled.
* ``hosts_sky_zoom.png`` — the same region in right ascension/declination,
  samples as a 2-D histogram, galaxies sized and coloured by probability.
* ``hosts_followup_sky.png`` — the follow-up's posterior sky map
  (``posterior_sky.fits`` next to the posterior; a histogram of the
  localisation's samples otherwise) with its 90 % credible region, the
  pulsars, the top-ranked hosts numbered (names and probabilities listed
  under the map) and a zoom panel around the candidate; degrees throughout,
  labels placed clear of each other and of the markers.
* ``hosts_chirp_mass.png`` — for the top hosts: the chirp mass implied by
  the measured strain and frequency at the galaxy's distance (samples
  weighted by the sky kernel at the galaxy), against the chirp-mass range
  expected from the galaxy's mass proxy (relation scatter and mass-ratio
  prior, observed frame).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ...core.plotting import pyplot, save_figure, sky_figure, sky_map
from ...data.healpix_fits import posterior_sky_map, read_probability_map
from ...physics import sky as sky_geometry
from ...physics.relations import chirp_mass_log_density, LN10
from ...physics.sky import unit_vectors
from ...physics.waveform import chirp_mass_for_strain


def _prob_colors(p):
    plt = pyplot()
    cmap = plt.get_cmap("plasma")
    p = np.nan_to_num(np.asarray(p, float))
    lp = np.log10(np.clip(p, 1e-6, 1.0))
    return cmap((lp + 6.0) / 6.0), lp


#: hosts numbered on the follow-up sky map
SKY_MAP_HOSTS = 5


def make_plots(folder, res, model, options, truth=None, pulsars=None):
    """Write the PNG files for one candidate; returns their paths (``truth``: injected binary, degrees;
    ``pulsars``: (ra, dec) arrays [rad] or None)."""
    paths = [sky_plot(folder / "hosts_sky.png", res, truth), zoom_plot(folder / "hosts_sky_zoom.png", res, truth),
             followup_sky_plot(folder / "hosts_followup_sky.png", res, pulsars, truth)]
    if len(res.ranking):
        paths.append(chirp_mass_plot(folder / "hosts_chirp_mass.png", res, model, min(options.top, 6), truth))
    return paths


def sky_plot(path, res, truth=None):
    nside, dens, t90, t99 = res.sky_map
    table = res.ranking
    colors, _ = _prob_colors(table["probability"]) if len(table) else (None, None)
    marks = []
    for k in range(min(len(table), 40)):
        marks.append({"ra": math.radians(table["ra"][k]), "dec": math.radians(table["dec"][k]),
                      "color": [colors[k]], "marker": "o", "size": 18 if k else 40,
                      "label": (f"best host {table['name'][k]} (p={table['probability'][k]:.2f})" if k == 0
                                else None)})
    sky_map(path, dens, nside, title=f"Candidate {res.localisation.label}: sky density and catalogue galaxies "
                                     "(contours: 90 % and 99 % regions)",
            label="sky density of the binary [1/sr]", marks=marks, cmap="Blues",
            contours=[([t99, t90], dens)] if t90 > t99 else None,
            truth=None if not truth else (math.radians(truth["ra"]), math.radians(truth["dec"])))
    return path


def followup_sky_map(res):
    """(nside, probability per pixel, where it came from) of the candidate's localisation: the follow-up's
    ``posterior_sky.fits`` when it sits next to the posterior file, else a histogram of the samples at the
    finest nside (at most 64) whose occupied pixels hold at least 10 samples on average."""
    loc = res.localisation
    found = read_probability_map(Path(loc.source).parent / "posterior_sky.fits") if loc.kind == "posterior" else None
    if found is not None:
        return found[0], found[1], "follow-up posterior_sky.fits"
    nside = 64      # coarsened until the occupied pixels hold >= 10 samples on average, as the follow-up's map
    prob = posterior_sky_map(loc.ra, loc.dec, nside)
    while nside > 1 and len(loc) / max(np.count_nonzero(prob), 1) < 10:
        nside //= 2
        prob = posterior_sky_map(loc.ra, loc.dec, nside)
    return nside, prob, f"histogram of {len(loc)} samples"


def _credible_levels(prob):
    """Per pixel, the probability in strictly denser pixels (its region is the 90 % one when below 0.9)."""
    order = np.argsort(-prob)
    levels = np.empty_like(prob)
    levels[order] = np.cumsum(prob[order]) - prob[order]
    return levels


def followup_sky_figure(res, pulsars=None, truth=None, n_hosts=SKY_MAP_HOSTS):
    """The figure of ``hosts_followup_sky.png`` (module docstring); returned, not saved."""
    loc = res.localisation
    nside, prob, origin = followup_sky_map(res)
    density = prob / (4 * math.pi / prob.size * (180 / math.pi) ** 2)     # per deg²
    levels = _credible_levels(prob)
    v = sky_geometry.unit_vectors(loc.ra, loc.dec).mean(axis=0)
    centre = (math.atan2(v[1], v[0]) % (2 * math.pi), math.asin(float(np.clip(v[2] / max(np.linalg.norm(v), 1e-300),
                                                                              -1, 1))))
    sep = np.degrees(sky_geometry.angular_separation(centre[0], centre[1], loc.ra, loc.dec))
    radius = float(np.clip(1.6 * np.percentile(sep, 90), 3.0, 45.0))
    table = res.ranking
    n = min(n_hosts, len(table))
    marks = []
    colors = pyplot().get_cmap("tab10")
    for k in range(n):
        marks.append({"ra": math.radians(float(table["ra"][k])), "dec": math.radians(float(table["dec"][k])),
                      "marker": "o", "size": 36, "color": [colors(1)], "edge": "black", "text": str(k + 1),
                      "label": "top hosts (numbered; names below)" if k == 0 else None})
    footer = None
    if n:
        footer = "top hosts  " + "   ".join(f"{k + 1}: {table['name'][k]} (p = {table['probability'][k]:.2g})"
                                          for k in range(n))
    what = "posterior" if loc.kind == "posterior" else "localisation (no follow-up posterior)"
    return sky_figure(density, nside, title=f"Candidate {loc.label}: {what} sky map, 90 % credible region "
                                            "(contour), pulsars and top hosts",
                      label=f"probability per square degree ({origin}, HEALPix nside {nside})", pulsars=pulsars,
                      marks=marks, cmap="Blues", contours=[([0.9], levels)],
                      truth=None if not truth or "ra" not in truth else
                      (math.radians(truth["ra"]), math.radians(truth["dec"])),
                      zoom=(centre[0], centre[1], radius), footer=footer)


def followup_sky_plot(path, res, pulsars=None, truth=None):
    save_figure(followup_sky_figure(res, pulsars, truth), path)
    return path


def _unwrap(ra_deg, centre):
    return (np.asarray(ra_deg) - centre + 180.0) % 360.0 - 180.0 + centre


def zoom_plot(path, res, truth=None):
    plt = pyplot()
    loc = res.localisation
    ra_s, dec_s = np.degrees(loc.ra), np.degrees(loc.dec)
    v = res.kde.vectors.mean(axis=0)
    centre_ra = math.degrees(math.atan2(v[1], v[0])) % 360.0
    ra_u = _unwrap(ra_s, centre_ra)
    fig, ax = plt.subplots(figsize=(6.4, 5.2))
    lo_r, hi_r = np.percentile(ra_u, [0.5, 99.5])
    lo_d, hi_d = np.percentile(dec_s, [0.5, 99.5])
    pad_r, pad_d = max(0.1 * (hi_r - lo_r), 1.0), max(0.1 * (hi_d - lo_d), 1.0)
    ax.hist2d(ra_u, dec_s, bins=60, range=[[lo_r - pad_r, hi_r + pad_r], [max(lo_d - pad_d, -90),
                                                                          min(hi_d + pad_d, 90)]],
              cmap="Blues")
    table = res.ranking
    if len(table):
        colors, lp = _prob_colors(table["probability"])
        gra = _unwrap(np.asarray(table["ra"]), centre_ra)
        sizes = 20 + 200 * np.clip((lp + 6) / 6, 0, 1)
        sc = ax.scatter(gra, table["dec"], s=sizes, c=lp, cmap="plasma", vmin=-6, vmax=0, edgecolors="black",
                        linewidths=0.5, zorder=3)
        fig.colorbar(sc, ax=ax, label="log10 host probability")
        # rank numbers beside the top hosts (names collide when galaxies cluster), the names listed below
        from ...core.plotting import _outlined

        n_label = min(5, len(table))
        for k in range(n_label):
            _outlined([ax.annotate(str(k + 1), (gra[k], table["dec"][k]), fontsize=9, fontweight="bold",
                                   xytext=(5, 5), textcoords="offset points")])
        listing = "   ".join(f"{k + 1}: {table['name'][k]} (p = {table['probability'][k]:.2g})"
                               for k in range(n_label))
        fig.text(0.02, -0.02, "top hosts  " + listing, fontsize=8, ha="left", va="top", wrap=True)
    if truth and "ra" in truth:
        ax.scatter(_unwrap(truth["ra"], centre_ra), truth["dec"], marker="P", s=110, c="#e6007e",
                   edgecolors="black", linewidths=0.7, zorder=5, label="truth (injection.json)")
        ax.legend(fontsize=8, loc="lower left")
    ax.invert_xaxis()
    ax.set_xlabel("right ascension [deg]")
    ax.set_ylabel("declination [deg]")
    ax.set_title(f"Candidate {loc.label}: samples and galaxies in the 99% region", fontsize=10)
    save_figure(fig, path)
    return path


def chirp_mass_plot(path, res, model, n_top, truth=None):
    plt = pyplot()
    loc = res.localisation
    table = res.ranking
    n = min(n_top, len(table))
    index = {name: i for i, name in enumerate(res.galaxies.name)}
    mu, sigma, used = res.galaxies.total_mass_prior(model.relation)
    cols = min(n, 3)
    rows = math.ceil(n / cols)
    fig, axes = plt.subplots(rows, cols, figsize=(4.2 * cols, 3.2 * rows), squeeze=False)
    for k in range(rows * cols):
        ax = axes[k // cols][k % cols]
        if k >= n:
            ax.axis("off")
            continue
        i = index[str(table["name"][k])]
        gv = unit_vectors(math.radians(res.galaxies.ra[i]), math.radians(res.galaxies.dec[i]))
        lk = res.kde.log_kernel(gv[None, :])[0]
        w = np.exp(lk - lk.max())
        implied = np.log10(chirp_mass_for_strain(loc.strain, loc.frequency, res.galaxies.distance[i]))
        lo, hi = np.percentile(implied, [0.5, 99.5])
        if np.isfinite(mu[i]):
            centre = mu[i] + math.log10(0.35)
            lo, hi = min(lo, centre - 3 * sigma[i]), max(hi, centre + 3 * sigma[i])
        bins = np.linspace(lo - 0.1, hi + 0.1, 50)
        ax.hist(implied, bins=bins, weights=w, density=True, histtype="stepfilled", alpha=0.5,
                color="tab:blue", label="implied at galaxy distance")
        if loc.kind == "posterior":
            ax.hist(np.log10(loc.chirp_mass), bins=bins, weights=w, density=True, histtype="step",
                    color="tab:gray", label="posterior chirp mass")
        if np.isfinite(mu[i]):
            x = np.linspace(bins[0], bins[-1], 400)
            dens = chirp_mass_log_density(x * LN10, mu[i], sigma[i],
                                          ln_redshift_factor=math.log1p(res.galaxies.redshift[i]),
                                          mass_ratio=model.mass_ratio) * LN10
            ax.plot(x, dens, color="tab:red", lw=1.5, label=f"expected ({used[i]})")
        else:
            ax.text(0.02, 0.9, "no mass proxy", transform=ax.transAxes, fontsize=8)
        if truth and truth.get("chirp_mass"):
            ax.axvline(math.log10(truth["chirp_mass"]), color="#e6007e", ls="--", lw=1.3,
                       label="true chirp mass (injection.json)")
        ax.set_title(f"{table['name'][k]}  d={table['distance'][k]:.0f} Mpc  p={table['probability'][k]:.3f}",
                     fontsize=8)
        ax.set_xlabel("log10 chirp mass [Msun] (observed frame)", fontsize=8)
        ax.tick_params(labelsize=7)
        if k == 0:
            ax.legend(fontsize=6, loc="upper left")
    fig.suptitle(f"Candidate {loc.label}: chirp mass implied vs expected, top hosts", fontsize=10)
    fig.tight_layout()
    save_figure(fig, path)
    return path


__all__ = ["make_plots", "sky_plot", "zoom_plot", "chirp_mass_plot", "followup_sky_map", "followup_sky_figure",
           "followup_sky_plot", "SKY_MAP_HOSTS"]
