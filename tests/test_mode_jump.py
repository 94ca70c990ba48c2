"""The mode-jump move (cwsearch.inference.modejump, sampling.mode_jump_step; docs/design.md §8).

Check values: the acceptance rule of an independence Metropolis–Hastings sampler keeps its target
invariant (Hastings 1970; Tierney 1994; from memory), so a chain of that move alone must give an
invented two-mode target's exact mode weights (1/2 each, by symmetry) within binomial error, and the
exact marginal CDF of ra (a two-component normal mixture, scipy.stats.norm), tested with
scipy.stats.kstest; HEALPix facts (equal-area pixels, NESTED children of a pixel tile it; common
practice, no source) for the density's normalisation and the uniformity within a pixel
(scipy.stats.chisquare); a run without the move (same seed) as the reference that the move does not
disturb the sampler's other random numbers; an uninterrupted run as the reference of a resumed one.
"""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np
import pytest
from astropy_healpix import HEALPix
from scipy import stats

from cwsearch.inference.modejump import SkyFrequencyProposal
from cwsearch.inference.sampling import SamplerSettings, VectorisedPool, mode_jump_step, run_sampler

BAND = (-8.6, -8.2)                          # log10 f [Hz], invented
# two modes in (ra, sin dec, log10 f), invented; widths in each coordinate
MODES = np.array([[1.5, 0.4, -8.5], [4.5, -0.3, -8.3]])
WIDTHS = np.array([0.15, 0.08, 0.02])
SPECTATOR = (0.3, 0.7)                       # mean and width of the 4th, Gaussian parameter (held fixed)


def _box_prior(x):
    ok = (x[:, 0] >= 0) & (x[:, 0] < 2 * np.pi) & (np.abs(x[:, 1]) <= 1) & (x[:, 2] >= BAND[0]) & (x[:, 2] <= BAND[1])
    return np.where(ok, 0.0, -np.inf)


def _two_modes(x):
    """ln of an equal mixture of two product-normal modes in the first three coordinates times a normal in
    the fourth (modes > 10 widths from every edge and from each other: truncation and overlap < 1e-20)."""
    z = (x[:, None, :3] - MODES[None]) / WIDTHS
    log_mode = -0.5 * np.sum(z**2, axis=2) - np.sum(np.log(np.sqrt(2 * np.pi) * WIDTHS))
    spectator = -0.5 * ((x[:, 3] - SPECTATOR[0]) / SPECTATOR[1]) ** 2
    return np.logaddexp(log_mode[:, 0], log_mode[:, 1]) + np.log(0.5) + spectator


def _lopsided_proposal(share_first=0.75, nside=8):
    """q_Fe with ``share_first`` of its sky mass and of its frequency mass near the first mode (Gaussian bumps
    on pixel centres and bin centres), uniform part ε = 0.2. q_Fe is the product of the two, so it puts
    0.75² : 0.25² = 9 : 1 of its on-mode mass on the first mode against the second (and the rest on the
    crossed sky-of-one, frequency-of-the-other combinations, where the target is ~0)."""
    hp = HEALPix(nside=nside, order="ring")
    lon, lat = hp.healpix_to_lonlat(np.arange(hp.npix))
    ra, z = lon.to_value(u.rad), np.sin(lat.to_value(u.rad))
    bumps = [np.exp(-0.5 * (((np.angle(np.exp(1j * (ra - m[0])))) / 0.3) ** 2 + ((z - m[1]) / 0.15) ** 2))
             for m in MODES]
    sky = share_first * bumps[0] / bumps[0].sum() + (1 - share_first) * bumps[1] / bumps[1].sum()
    centres = np.linspace(BAND[0], BAND[1], 21)
    fb = [np.exp(-0.5 * ((centres - m[2]) / 0.04) ** 2) for m in MODES]
    freq = share_first * fb[0] / fb[0].sum() + (1 - share_first) * fb[1] / fb[1].sum()
    return SkyFrequencyProposal(np.log(sky), nside, log10_band=BAND, log10_centres=centres,
                                frequency_log_weight=np.log(freq), uniform_fraction=0.2)


def test_mode_jump_alone_keeps_the_two_mode_target_and_its_ra_marginal():
    # A chain of mode-jump moves only (no stretch moves, the 4th parameter never moves), at β = 1 and
    # β = 0.5, all walkers starting in the first mode, with q favouring that mode 9 : 1 (measured: the
    # walkers' split reaches 1/2 after ~100 moves; 200 are discarded). Target at β: an
    # equal mixture of normals of widths WIDTHS / sqrt(β) (modes 20 widths apart, so L^β is that mixture
    # to < 1e-20). Samples: every walker's state at 5 iterations 40 apart after 200 of burn-in (the
    # measured acceptance is 0.10 at β = 1 and 0.20 at β = 0.5, so 40 iterations are >= 4 proposals accepted
    # per walker and the thinned states are close to independent). Binomial error sqrt(1/4 N).
    walkers, betas = 400, np.array([1.0, 0.5])
    proposal = _lopsided_proposal()
    pool = VectorisedPool(_box_prior, _two_modes)
    rng = np.random.default_rng(11)
    pos = np.empty((2, walkers, 4))
    pos[..., :3] = MODES[0] + 0.3 * WIDTHS * rng.standard_normal((2, walkers, 3))
    pos[..., 3] = rng.normal(*SPECTATOR, (2, walkers))
    logl = _two_modes(pos.reshape(-1, 4)).reshape(2, walkers)
    logpost = betas[:, None] * logl
    proposal.columns = (0, 1, 2)
    kept, accepted = [], np.zeros(2)
    for it in range(400):
        acc = mode_jump_step(pos, logpost, logl, betas, proposal, pool, np.random.default_rng([5, it]))
        accepted += acc.sum(axis=1)
        if it >= 200 and (it - 200) % 40 == 39:
            kept.append(pos.copy())
    # the state arrays stay consistent with the positions (the move updates them in place)
    np.testing.assert_allclose(logl, _two_modes(pos.reshape(-1, 4)).reshape(2, walkers), rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(logpost, betas[:, None] * logl, rtol=1e-12, atol=1e-9)
    samples = np.stack(kept)                              # (5, T, walkers, 4)
    rate = accepted / (400 * walkers)
    assert np.all(rate > 0.02), rate
    for t, beta in enumerate(betas):
        s = samples[:, t].reshape(-1, 4)
        first = float(np.mean(s[:, 0] < np.pi))
        se = math.sqrt(0.25 / s.shape[0])
        assert abs(first - 0.5) < 4 * se, (beta, first, se)
        width = WIDTHS[0] / math.sqrt(beta)

        def ra_cdf(x, width=width):
            return 0.5 * stats.norm.cdf(x, MODES[0, 0], width) + 0.5 * stats.norm.cdf(x, MODES[1, 0], width)

        assert stats.kstest(s[:, 0], ra_cdf).pvalue > 1e-3
        # the spectator parameter is held fixed by the move
        assert np.allclose(samples[:, t, :, 3], pos[t, :, 3])


def test_density_integrates_to_one_and_matches_the_draws():
    # (1) Quadrature: q is constant on each (pixel, frequency bin); the NESTED children of a pixel at
    #     4 x nside tile it with equal areas, so the sum over children centres x child area is exact, and
    #     the frequency integral is exact on a grid of 2000 cells whose edges include the bin edges (midpoint rule on a
    #     piecewise-constant function: exact up to the cells that straddle an edge; tolerance 1e-3).
    # (2) E_{x~q}[u(x) / q(x)] = ∫ u = 1 for the uniform density u on the domain: holds only if the draws
    #     follow the density that log_density evaluates; u/q ≤ 1/ε = 5 so the Monte-Carlo error is
    #     small (4 standard errors).
    q = _lopsided_proposal(nside=4)
    fine = HEALPix(nside=16, order="nested")
    lon, lat = fine.healpix_to_lonlat(np.arange(fine.npix))
    ra, z = lon.to_value(u.rad), np.sin(lat.to_value(u.rad))
    logf = np.linspace(BAND[0], BAND[1], 2001)
    mid = 0.5 * (logf[1:] + logf[:-1])
    dens = np.exp(q.log_density(np.column_stack([np.repeat(ra, mid.size), np.repeat(z, mid.size),
                                                 np.tile(mid, ra.size)]))).reshape(ra.size, mid.size)
    integral = float(dens.sum() * (4 * np.pi / fine.npix) * np.diff(logf)[0])
    assert abs(integral - 1.0) < 1e-3, integral
    rng = np.random.default_rng(3)
    x = q.draw(rng, 200_000)
    assert np.all(np.isfinite(q.log_density(x)))
    ratio = np.exp(-np.log(4 * np.pi * (BAND[1] - BAND[0])) - q.log_density(x))
    assert abs(ratio.mean() - 1.0) < 4 * ratio.std() / math.sqrt(ratio.size), ratio.mean()


@pytest.mark.parametrize("pixel_kind", ["north-pole", "equator-across-ra-0", "mid-latitude", "south-pole"])
def test_draws_are_uniform_within_a_pixel(pixel_kind):
    # Points drawn in one RING pixel of nside 4 are binned into its 16 NESTED children at nside 16
    # (equal areas): chi-square against equal counts (p > 1e-3), and every point lies in the pixel.
    nside = 4
    ring = HEALPix(nside=nside, order="ring")
    pixel = {"north-pole": 0, "equator-across-ra-0": int(ring.lonlat_to_healpix(0 * u.rad, 0 * u.rad)),
             "mid-latitude": 30, "south-pole": ring.npix - 1}[pixel_kind]
    q = SkyFrequencyProposal(np.zeros(ring.npix), nside)
    ra, z = q.draw_in_pixels(np.full(16_000, pixel), np.random.default_rng(8))
    assert np.all(ring.lonlat_to_healpix(ra * u.rad, np.arcsin(z) * u.rad) == pixel)
    if pixel_kind == "equator-across-ra-0":
        assert np.any(ra < 0.1) and np.any(ra > 2 * np.pi - 0.1)      # the pixel straddles ra = 0
    nested_parent = int(ring.ring_to_nested(pixel))
    fine = HEALPix(nside=4 * nside, order="nested")
    child = fine.lonlat_to_healpix(ra * u.rad, np.arcsin(z) * u.rad) - 16 * nested_parent
    assert np.all((child >= 0) & (child < 16))
    counts = np.bincount(child, minlength=16)
    assert stats.chisquare(counts).pvalue > 1e-3, counts


# ---------------------------------------------------------------- in run_sampler
def _sampler_run(mode_jump, seed=9, tmp=None, resume=False, callback=None, every=10, iterations=300):
    settings = SamplerSettings(walkers=12, temperatures=3, max_temperature=100.0, ess=1e9,
                               max_iterations=iterations, adapt_iterations=60, check_every=50,
                               checkpoint_every=50, mode_jump_every=every)
    rng = np.random.default_rng(21)
    p0 = np.empty((3, 12, 4))
    p0[..., :3] = MODES[0] + 0.3 * WIDTHS * rng.standard_normal((3, 12, 3))
    p0[..., 3] = rng.normal(*SPECTATOR, (3, 12))
    return run_sampler(_box_prior, _two_modes, p0, settings, seed=seed, progress=False, mode_jump=mode_jump,
                       checkpoint=None if tmp is None else tmp / "ck.npz", resume=resume, callback=callback,
                       fingerprint={"toy": "two modes"})


def test_same_seed_same_chain_and_no_move_keeps_the_other_random_numbers(tmp_path):
    proposal = _lopsided_proposal()
    a = _sampler_run(proposal)
    b = _sampler_run(proposal)
    np.testing.assert_allclose(a.chain, b.chain, rtol=1e-12, atol=1e-12)
    assert a.mode_jump_acceptance.shape == (a.betas.size,) and np.all(a.mode_jump_acceptance > 0)
    # without the move, and with the move never due (every > iterations), the chains agree: the move has its
    # own random stream and leaves ptemcee's untouched
    plain = _sampler_run(None)
    never = _sampler_run(proposal, every=10_000)
    np.testing.assert_allclose(never.chain, plain.chain, rtol=1e-12, atol=1e-12)
    assert plain.mode_jump_acceptance is None
    assert not np.allclose(a.chain, plain.chain)


def test_resume_with_mode_jumps_repeats_the_uninterrupted_run(tmp_path):
    proposal = _lopsided_proposal()
    (tmp_path / "ref").mkdir()
    (tmp_path / "cut").mkdir()
    reference = _sampler_run(proposal, tmp=tmp_path / "ref", iterations=200)

    class Crash(Exception):
        pass

    def crash(n):
        if n == 130:
            raise Crash

    with pytest.raises(Crash):
        _sampler_run(proposal, tmp=tmp_path / "cut", iterations=200, callback=crash)
    resumed = _sampler_run(proposal, tmp=tmp_path / "cut", iterations=200, resume=True)
    assert resumed.iterations == reference.iterations == 200
    np.testing.assert_allclose(resumed.chain, reference.chain, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(resumed.mode_jump_acceptance, reference.mode_jump_acceptance, rtol=1e-12)


def test_stage_follow_up_with_mode_jumps_from_a_real_scan(tmp_path):
    """End to end through the stages: a scan writes its Fe maps, the follow-up builds the mode-jump
    proposal from them, runs the move, states it in summary.json, and still finds a loud injection
    (the truth inside the 90 % interval of frequency; common practice, no source). Acceptances are
    probabilities, one per temperature."""
    import json
    import math

    from cwsearch.physics import simulate
    from cwsearch.physics.noise import NoiseSettings, NoiseWeighting
    from cwsearch.physics.simulate import Binary, invented_array, simulate_residuals
    from cwsearch.stages.followup.stage import FollowupOptions, run_followup
    from cwsearch.stages.scan.options import ScanOptions
    from cwsearch.stages.scan.stage import run_scan

    white = NoiseSettings(red_components=0)
    base = invented_array(n_pulsars=8, years=12, seed=31, toas_per_pulsar=90, full_span=True)
    binary = Binary(ra=2.0, dec=0.4, gw_frequency=1.2e-8, chirp_mass=5e8, strain=1e-14, inclination=0.8,
                    polarization=0.6, phase=1.0)
    binary.strain *= 15.0 / NoiseWeighting(base, white).optimal_snr(simulate.binary_residuals(base, binary))
    array = base.with_residuals(simulate_residuals(base, seed=61, binaries=[binary]))
    run_dir = tmp_path / "run"
    run_scan(array, run_dir, ScanOptions(nside=4, fmax=3e-8, no_plots=True), noise=white, seed=3, progress=False)
    options = FollowupOptions(frequency=binary.gw_frequency, ra=math.degrees(binary.ra),
                              dec=math.degrees(binary.dec), walkers=18, temperatures=4, max_temperature=1e4,
                              ess=100, max_iterations=600, adapt_iterations=100, checkpoint_every=10**6,
                              max_temperatures=4, no_plots=True)
    summary = run_followup(array, run_dir, options, noise=white, seed=5, progress=False).summary
    jump = summary["mode_jump"]
    assert jump["used"] is True
    assert len(jump["acceptance"]) == len(jump["proposals"]) >= 1
    assert all(0.0 <= a <= 1.0 for a in jump["acceptance"]) and sum(jump["proposals"]) > 0
    lo, hi = summary["parameters"]["frequency"]["interval_90"]
    assert lo <= binary.gw_frequency <= hi
    written = json.loads(next((run_dir / "followup").rglob("summary.json")).read_text())
    assert written["mode_jump"]["used"] is True
