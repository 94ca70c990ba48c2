"""Follow-up likelihood speed on the docs/design.md §12 bench array (50 pulsars × 1000 TOAs, rank 65).

``python -m bench.likelihood`` prints

* projection evaluations/s: ln Λ at fixed shape from the cached per-pulsar
  products (pulsar phases marginalised on the grid), target ≥ 1e5/s;
* full shape evaluations/s: the sampler's path, every parameter new for
  every walker (basis series at Chebyshev nodes with cached interpolation
  products, marginalisation), target ≥ 2e3/s, and the same batches through
  the path that builds the series at every TOA (``shape_path="direct"``);
* the same figures for a straightforward implementation measured in the same
  run: the whole signal rebuilt with ``waveform.residuals`` and weighted
  through the noise engine at each call (with the pulsar phases fixed — a
  marginalised straightforward version would cost a grid of such calls more),
  and the ratios.

Options: ``--walkers`` (batch size of a full-shape call, default 160 = 10
temperatures × 32 walkers / 2, one ptemcee batch), ``--evolution``,
``--repeats``. The machine's load average is printed with the figures:
other processes on the same cores slow every figure down alike.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np


def _random_theta(rng, n, f_centre):
    return np.column_stack([rng.uniform(0, 2 * np.pi, n), rng.uniform(-1, 1, n),
                            np.log10(f_centre) + rng.uniform(-0.02, 0.02, n), rng.uniform(7, 9.5, n),
                            rng.uniform(-15, -14, n), rng.uniform(-1, 1, n), rng.uniform(0, np.pi, n),
                            rng.uniform(0, np.pi, n)])


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--walkers", type=int, default=160)
    parser.add_argument("--evolution", default="full")
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args(argv)

    from bench._array import bench_array
    from cwsearch.physics import waveform
    from cwsearch.inference.likelihood import Likelihood

    array, noise = bench_array()
    t = time.perf_counter()
    like = Likelihood(array, noise, evolution=args.evolution)
    setup = time.perf_counter() - t
    rng = np.random.default_rng(1)
    f0 = 2e-8
    theta = _random_theta(rng, args.walkers, f0)
    like.batch(theta[:4])                                       # compile / warm up
    like.batch(theta)

    # full shape evaluations
    t = time.perf_counter()
    for _ in range(args.repeats):
        like.batch(_random_theta(rng, args.walkers, f0))
    full_rate = args.repeats * args.walkers / (time.perf_counter() - t)

    # the same batches through the TOA-by-TOA path (no interpolation nodes), for the ratio
    direct = Likelihood(array, like.engine, evolution=args.evolution, shape_path="direct")
    direct.batch(theta)
    t = time.perf_counter()
    for _ in range(args.repeats):
        direct.batch(_random_theta(rng, args.walkers, f0))
    direct_rate = args.repeats * args.walkers / (time.perf_counter() - t)
    par = like.physical(theta)
    kappa = 1.0 / waveform.time_to_coalescence(par["chirp_mass"], par["gw_frequency"])
    nodes = like._node_count(np.pi * par["gw_frequency"], kappa if args.evolution == "full" else 0 * kappa)

    # projection evaluations at fixed shape
    par = like.physical(_random_theta(rng, 20000, f0))
    cache = like.shape_cache(1.0, 0.3, f0, 3e8)
    like.projection(cache, par["strain"], par["inclination"], par["polarization"], par["phase"])  # warm-up (parallel kernel)
    t = time.perf_counter()
    for _ in range(args.repeats):
        like.projection(cache, par["strain"], par["inclination"], par["polarization"], par["phase"])
    proj_rate = args.repeats * 20000 / (time.perf_counter() - t)

    # straightforward reference: rebuild every residual, weight through the noise engine, every call
    n_ref = 10
    like.reference(theta[:1])
    t = time.perf_counter()
    for i in range(n_ref):
        like.reference(theta[i:i + 1])
    ref_rate = n_ref / (time.perf_counter() - t)

    load = os.getloadavg()[0]
    print(f"bench array: {len(array)} pulsars x {array[0].n_toas} TOAs, rank {like.engine[0].rank}, "
          f"evolution {args.evolution}; likelihood set-up {setup:.1f} s; load average {load:.1f} "
          f"on {os.cpu_count()} cores")
    print(f"projection evaluations/s : {proj_rate:12.4g}   (target >= 1e5)   "
          f"x{proj_rate / ref_rate:,.0f} the straightforward evaluation")
    print(f"full shape evaluations/s : {full_rate:12.4g}   (target >= 2e3)   "
          f"x{full_rate / ref_rate:,.0f} the straightforward evaluation")
    print(f"  of which: Chebyshev nodes per walker {dict(zip(*(x.tolist() for x in np.unique(nodes, return_counts=True))))}"
          " (0 = series at every TOA)")
    print(f"series at every TOA      : {direct_rate:12.4g}   (shape_path='direct'; nodes path is "
          f"x{full_rate / direct_rate:.1f} faster)")
    print(f"straightforward evals/s  : {ref_rate:12.4g}   (waveform.residuals + noise engine per call, "
          "pulsar phases fixed)")


if __name__ == "__main__":
    main()
