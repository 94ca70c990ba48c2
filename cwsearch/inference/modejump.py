"""The proposal of the mode-jump move: an exact density over (ra, sin dec[, log10 f]) (docs/design.md §8).

:func:`cwsearch.inference.sampling.run_sampler` takes, every few iterations, an independence
Metropolis–Hastings step on the sky position and frequency of every walker (the other parameters held
fixed) with a proposal ``q`` that does not depend on the current point. The step is exact only if ``q``
can be both drawn from and evaluated at any point; :class:`SkyFrequencyProposal` is such a ``q``:

    q(x) = (1 − ε) · P_sky(pixel(x)) / Ω_pix · P_f(bin(x)) / w_bin(x)  +  ε / (4π · (hi − lo))

over (ra, sin dec, log10 f) on [0, 2π) × [−1, 1] × [lo, hi]. HEALPix pixels have equal area
``Ω_pix = 4π / N_pix`` and ``dΩ = d(ra) d(sin dec)``, so a point uniform on the sphere inside a pixel has
density ``1 / Ω_pix`` in (ra, sin dec); it is drawn by rejection from a box in (ra relative to the
pixel's centre, sin dec) around the pixel, against the pixel index of the point (the box is padded, so
a polar pixel or one across ra = 0 is covered whole). The frequency bins partition [lo, hi] (edges
half-way between neighbouring bin centres in log10 f, the outer ones at lo and hi); within its bin
log10 f is uniform. The second term (ε, default 0.2) is uniform over the sphere and the band, so ``q``
is nowhere zero where the prior is not.

Without a frequency part (``log10_band=None``) the proposal is over (ra, sin dec) only.

Examples
--------
>>> import numpy as np
>>> q = SkyFrequencyProposal(np.zeros(48), 2, uniform_fraction=0.2)
>>> x = q.draw(np.random.default_rng(1), 5)
>>> bool(np.allclose(q.log_density(x), -np.log(4 * np.pi)))
True
"""

from __future__ import annotations

import hashlib
import math

import astropy.units as u
import numpy as np
from astropy_healpix import HEALPix

TWO_PI = 2.0 * math.pi


class SkyFrequencyProposal:
    """Mixture proposal ``(1 − ε) q_Fe + ε q_uniform`` over (ra, sin dec[, log10 f]) (see module docstring).

    Parameters
    ----------
    sky_log_weight : (12 nside²,) log of the (unnormalised) pixel weights, HEALPix RING order by default;
        non-finite entries get weight zero
    nside : HEALPix resolution of ``sky_log_weight``
    log10_band : (lo, hi) of log10 f [Hz], or None for a sky-only proposal
    log10_centres, frequency_log_weight : bin centres in log10 f [Hz] and the log of their weights
        (centres outside the band are dropped; none left: one bin, the whole band)
    uniform_fraction : ε, the weight of the uniform part (0 < ε ≤ 1)
    columns : the indices of (ra, sin dec[, log10 f]) in the sampler's parameter vector
    """

    def __init__(self, sky_log_weight, nside, *, log10_band=None, log10_centres=None, frequency_log_weight=None,
                 uniform_fraction=0.2, order="ring", columns=None):
        self.nside = int(nside)
        self.healpix = HEALPix(nside=self.nside, order=order)
        npix = self.healpix.npix
        weight = np.asarray(sky_log_weight, dtype=float)
        if weight.shape != (npix,):
            raise ValueError(f"the sky weights need {npix} pixels, not {weight.shape}")
        if not 0.0 < uniform_fraction <= 1.0:
            raise ValueError("the uniform fraction must be in (0, 1]")
        self.uniform_fraction = float(uniform_fraction)
        self.sky_probability = _normalised(weight)
        self.pixel_area = 4.0 * math.pi / npix      # sr, = the pixel's area in (ra, sin dec)
        self.band = None if log10_band is None else (float(log10_band[0]), float(log10_band[1]))
        if self.band is not None:
            lo, hi = self.band
            if not hi > lo:
                raise ValueError("empty frequency band")
            centres = np.asarray([] if log10_centres is None else log10_centres, dtype=float)
            logw = np.asarray([] if frequency_log_weight is None else frequency_log_weight, dtype=float)
            keep = (centres >= lo) & (centres <= hi) & np.isfinite(logw) if centres.size else np.zeros(0, bool)
            centres, logw = centres[keep], logw[keep]
            order_f = np.argsort(centres)
            centres, logw = centres[order_f], logw[order_f]
            if centres.size == 0:
                centres, logw = np.array([0.5 * (lo + hi)]), np.zeros(1)
            self.edges = np.concatenate([[lo], 0.5 * (centres[1:] + centres[:-1]), [hi]])
            self.widths = np.diff(self.edges)
            prob = _normalised(logw)
            prob[self.widths <= 0] = 0.0             # a bin of zero width (duplicate centres) is never drawn
            self.frequency_probability = prob / prob.sum()
        ncol = 2 if self.band is None else 3
        self.columns = tuple(range(ncol)) if columns is None else tuple(int(c) for c in columns)
        if len(self.columns) != ncol:
            raise ValueError(f"the proposal moves {ncol} columns, not {len(self.columns)}")
        self._boxes = None

    # ------------------------------------------------------------ density
    def log_density(self, values):
        """ln q at rows (ra, sin dec[, log10 f]) of ``values`` (N, 2 or 3); −inf outside the domain."""
        x = np.atleast_2d(np.asarray(values, dtype=float))
        ra, z = x[:, 0], x[:, 1]
        inside = (ra >= 0) & (ra < TWO_PI) & (np.abs(z) <= 1)
        uniform = 1.0 / (4.0 * math.pi)
        fe = np.zeros(x.shape[0])
        if inside.any():
            pix = self.healpix.lonlat_to_healpix(ra[inside] * u.rad, np.arcsin(z[inside]) * u.rad)
            fe[inside] = self.sky_probability[pix] / self.pixel_area
        if self.band is not None:
            lo, hi = self.band
            logf = x[:, 2]
            inside &= (logf >= lo) & (logf <= hi)
            k = np.clip(np.searchsorted(self.edges, logf, side="right") - 1, 0, self.widths.size - 1)
            with np.errstate(divide="ignore", invalid="ignore"):
                fe = fe * np.where(self.widths[k] > 0, self.frequency_probability[k] / self.widths[k], 0.0)
            uniform = uniform / (hi - lo)
        q = (1.0 - self.uniform_fraction) * fe + self.uniform_fraction * uniform
        with np.errstate(divide="ignore"):
            return np.where(inside, np.log(q), -np.inf)

    # ------------------------------------------------------------ draws
    def draw(self, rng, size):
        """``size`` rows (ra, sin dec[, log10 f]) drawn from q with the numpy Generator ``rng``."""
        size = int(size)
        ncol = len(self.columns)
        out = np.empty((size, ncol))
        uniform = rng.random(size) < self.uniform_fraction
        nu = int(uniform.sum())
        out[uniform, 0] = rng.uniform(0.0, TWO_PI, nu)
        out[uniform, 1] = rng.uniform(-1.0, 1.0, nu)
        fe = ~uniform
        nf = size - nu
        pixels = rng.choice(self.sky_probability.size, size=nf, p=self.sky_probability)
        out[fe, 0], out[fe, 1] = self.draw_in_pixels(pixels, rng)
        if self.band is not None:
            out[uniform, 2] = rng.uniform(self.band[0], self.band[1], nu)
            k = rng.choice(self.widths.size, size=nf, p=self.frequency_probability)
            f = self.edges[k] + rng.random(nf) * self.widths[k]
            out[fe, 2] = np.minimum(f, np.nextafter(self.band[1], self.band[0]))
        return out

    def draw_in_pixels(self, pixels, rng, max_rounds=10_000):
        """(ra, sin dec) uniform on the sphere inside each of ``pixels``: rejection from the pixel's box in
        (ra − ra_centre, sin dec) against the pixel index of the drawn point."""
        pixels = np.asarray(pixels, dtype=np.int64)
        lo, width, zlo, zwidth, centre = self._pixel_boxes()
        ra = np.empty(pixels.size)
        z = np.empty(pixels.size)
        todo = np.arange(pixels.size)
        for _ in range(max_rounds):
            if todo.size == 0:
                return ra, z
            p = pixels[todo]
            lon = np.mod(centre[p] + lo[p] + rng.random(todo.size) * width[p], TWO_PI)
            lon = np.where(lon >= TWO_PI, 0.0, lon)
            zz = zlo[p] + rng.random(todo.size) * zwidth[p]
            got = self.healpix.lonlat_to_healpix(lon * u.rad, np.arcsin(zz) * u.rad) == p
            ra[todo[got]] = lon[got]
            z[todo[got]] = zz[got]
            todo = todo[~got]
        raise RuntimeError("pixel rejection sampler did not finish")   # not reached: acceptance >= 1/4 per round

    def _pixel_boxes(self, step=8, pad=0.1):
        """Per pixel: (ra offset, ra width, sin-dec lower edge, sin-dec width, ra of the centre) of a box that
        holds the whole pixel: the extent of ``step`` boundary points per edge, padded by ``pad`` of the
        width on each side (ra at most the whole circle, sin dec within [−1, 1])."""
        if self._boxes is None:
            pix = np.arange(self.healpix.npix)
            lon_c, _ = self.healpix.healpix_to_lonlat(pix)
            centre = lon_c.to_value(u.rad)
            lon, lat = self.healpix.boundaries_lonlat(pix, step=step)
            rel = np.mod(lon.to_value(u.rad) - centre[:, None] + math.pi, TWO_PI) - math.pi
            z = np.sin(lat.to_value(u.rad))
            lo, hi = rel.min(axis=1), rel.max(axis=1)
            w = hi - lo
            lo, hi = lo - pad * w, hi + pad * w
            full = hi - lo >= TWO_PI
            lo, hi = np.where(full, -math.pi, lo), np.where(full, math.pi, hi)
            zl, zh = z.min(axis=1), z.max(axis=1)
            zw = zh - zl
            zl, zh = np.maximum(zl - pad * zw, -1.0), np.minimum(zh + pad * zw, 1.0)
            self._boxes = (lo, hi - lo, zl, zh - zl, centre)
        return self._boxes

    # ------------------------------------------------------------ bookkeeping
    def describe(self) -> dict:
        """A JSON-ready description (checkpoint fingerprint and summary): sizes, ε, and a SHA-256 of the
        weights."""
        digest = hashlib.sha256(self.sky_probability.tobytes())
        if self.band is not None:
            digest.update(self.edges.tobytes())
            digest.update(self.frequency_probability.tobytes())
        out = {"nside": self.nside, "uniform_fraction": self.uniform_fraction, "columns": list(self.columns),
               "weights_sha256": digest.hexdigest()}
        if self.band is not None:
            out.update({"log10_frequency_band": list(self.band), "frequency_bins": int(self.widths.size)})
        return out


def _normalised(log_weight):
    """exp(log_weight) / sum, non-finite entries 0; all non-finite: uniform."""
    w = np.asarray(log_weight, dtype=float)
    ok = np.isfinite(w)
    if not ok.any():
        return np.full(w.size, 1.0 / w.size)
    p = np.where(ok, np.exp(np.where(ok, w, 0.0) - w[ok].max()), 0.0)
    return p / p.sum()


__all__ = ["SkyFrequencyProposal"]
