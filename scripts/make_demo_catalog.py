"""Write ``catalogs/demo_galaxies.ecsv``: an invented galaxy catalogue for the demo (seeded, reproducible).

Every galaxy is invented. The catalogue holds

* a general population of 3000 galaxies, isotropic and uniform in volume
  out to 300 Mpc, with invented masses given through a mix of proxies
  (K-band magnitude, stellar, bulge or black-hole mass, or none);
* the **host** of the demo binary (fixed scenario used by the demo dataset:
  ra 141.0 deg, dec −27.5 deg, f_gw 1.2e-8 Hz, observed chirp mass 2.0e9
  Msun, luminosity distance 80 Mpc), placed at that position and distance,
  with a bulge mass that the McConnell & Ma 2013 relation turns into the
  total black-hole mass of an equal-mass binary with that chirp mass;
* seven **decoys** within a few degrees of the host with the wrong distance,
  the wrong mass, or a claimed EM period that does not match;
* a few galaxies elsewhere with invented EM periods.

Run from the repository root::

    python scripts/make_demo_catalog.py            # writes catalogs/demo_galaxies.ecsv
    python scripts/make_demo_catalog.py --check    # regenerate in memory and compare
"""

from __future__ import annotations

import argparse
import math
import sys

import numpy as np

SEED = 20260101
N_POPULATION = 3000
MAX_DISTANCE = 300.0  # Mpc
PREFIX = "SIMGAL"

#: the demo binary (fixed scenario shared with the demo dataset)
DEMO_BINARY = dict(ra=141.0, dec=-27.5, gw_frequency=1.2e-8, chirp_mass=2.0e9, luminosity_distance=80.0,
                   inclination=1.0, polarization=0.6, phase=2.0)


def _offset(ra, dec, sep_deg, angle_deg):
    """Position ``sep_deg`` away from (ra, dec) [deg] towards position angle ``angle_deg``."""
    d = math.radians(dec)
    s = math.radians(sep_deg)
    a = math.radians(angle_deg)
    dec2 = math.asin(math.sin(d) * math.cos(s) + math.cos(d) * math.sin(s) * math.cos(a))
    ra2 = math.radians(ra) + math.atan2(math.sin(a) * math.sin(s) * math.cos(d),
                                        math.cos(s) - math.sin(d) * math.sin(dec2))
    return math.degrees(ra2) % 360.0, math.degrees(dec2)


def host_bulge_mass():
    """log10 bulge mass of the host: MM13 mean relation at the equal-mass total mass of the demo binary."""
    from cwsearch.physics.relations import MCCONNELL_MA_2013, redshift_at_distance
    from cwsearch.physics.waveform import chirp_mass_from_masses

    z = redshift_at_distance(DEMO_BINARY["luminosity_distance"])
    source_chirp = DEMO_BINARY["chirp_mass"] / (1 + z)
    total = source_chirp / chirp_mass_from_masses(0.5, 0.5)
    r = MCCONNELL_MA_2013
    return r.pivot + (math.log10(total) - r.intercept) / r.slope, total


def build(seed=SEED):
    """The catalogue as an astropy Table, and the name of the planted host."""
    from astropy.table import Table

    from cwsearch.physics.relations import redshift_at_distance

    rng = np.random.default_rng(seed)
    n = N_POPULATION
    ra = rng.uniform(0, 360, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    distance = MAX_DISTANCE * rng.uniform(0.0005, 1.0, n) ** (1 / 3)
    # invented stellar masses: mostly 1e10-1e11, a tail to ~1e12
    log_mstar = np.clip(10.3 + 0.45 * rng.standard_normal(n) + rng.exponential(0.15, n), 9.0, 12.2)
    kind = rng.choice(["k", "stellar", "bulge", "bh", "none"], size=n, p=[0.5, 0.25, 0.15, 0.05, 0.05])
    bulge_fraction = np.clip(rng.uniform(0.3, 1.0, n), 0, 1)
    rows = []
    for i in range(n):
        rows.append(dict(ra=ra[i], dec=dec[i], distance=distance[i], kind=kind[i], log_mstar=log_mstar[i],
                         log_bulge=log_mstar[i] + math.log10(bulge_fraction[i]), period=np.nan, tag="population"))
    # a few invented EM periodicity claims elsewhere on the sky
    for i in rng.choice(n, size=4, replace=False):
        rows[i]["period"] = float(rng.uniform(300, 2500))
        rows[i]["tag"] = "population-period"

    log_bulge_host, _ = host_bulge_mass()
    b = DEMO_BINARY
    host = dict(ra=b["ra"], dec=b["dec"], distance=b["luminosity_distance"], kind="bulge",
                log_mstar=log_bulge_host, log_bulge=log_bulge_host, period=np.nan, tag="host")
    rows.append(host)
    decoys = [  # (separation deg, position angle deg, distance Mpc, log10 bulge mass, period d, what is wrong)
        (1.5, 40.0, 82.0, 10.4, np.nan, "decoy: right distance, bulge mass far too small"),
        (2.5, 160.0, 240.0, log_bulge_host, np.nan, "decoy: right mass, three times too far"),
        (3.0, 250.0, 27.0, log_bulge_host, np.nan, "decoy: right mass, three times too near"),
        (2.0, 300.0, 150.0, 11.0, np.nan, "decoy: too far and too light"),
        (4.0, 90.0, 79.0, 11.3, np.nan, "decoy: right distance, mass somewhat low"),
        (3.5, 200.0, 81.0, log_bulge_host, 700.0, "decoy: right distance and mass, EM period 700 d (orbital "
                                                  "period of the binary is 1929 d)"),
        (5.0, 330.0, 60.0, 12.3, np.nan, "decoy: slightly near and heavy"),
    ]
    for sep, angle, dist, lb, period, tag in decoys:
        r, d = _offset(b["ra"], b["dec"], sep, angle)
        rows.append(dict(ra=r, dec=d, distance=dist, kind="bulge", log_mstar=lb, log_bulge=lb, period=period,
                         tag=tag))

    order = np.argsort([r["ra"] for r in rows], kind="stable")
    rows = [rows[i] for i in order]
    m = len(rows)
    names = np.array([f"{PREFIX}-{i + 1:05d}" for i in range(m)])
    dist = np.array([r["distance"] for r in rows])
    nan = np.full(m, np.nan)
    k_mag, log_stellar, log_bulge, log_bh = nan.copy(), nan.copy(), nan.copy(), nan.copy()
    for i, r in enumerate(rows):
        if r["kind"] == "k":
            k_mag[i] = -23.0 - (r["log_mstar"] - 10.58) / 0.44     # Cappellari 2013 inverted
        elif r["kind"] == "stellar":
            log_stellar[i] = r["log_mstar"]
        elif r["kind"] == "bulge":
            log_bulge[i] = r["log_bulge"]
            log_stellar[i] = max(r["log_mstar"], r["log_bulge"])
        elif r["kind"] == "bh":
            log_bh[i] = 8.46 + 1.05 * (r["log_bulge"] - 11.0) + 0.3 * rng.standard_normal()
    period = np.array([r["period"] for r in rows])
    period_err = np.where(np.isfinite(period), 0.05 * period, np.nan)
    table = Table()
    table["name"] = names
    table["ra"] = np.round([r["ra"] for r in rows], 5)
    table["ra"].unit = "deg"
    table["dec"] = np.round([r["dec"] for r in rows], 5)
    table["dec"].unit = "deg"
    table["distance"] = np.round(dist, 3)
    table["distance"].unit = "Mpc"
    table["distance_err"] = np.round(0.08 * dist, 3)
    table["distance_err"].unit = "Mpc"
    table["redshift"] = np.round(redshift_at_distance(dist), 6)
    table["k_abs_mag"] = np.round(k_mag, 3)
    table["k_abs_mag"].unit = "mag"
    table["log10_stellar_mass"] = np.round(log_stellar, 3)
    table["log10_bulge_mass"] = np.round(log_bulge, 3)
    table["log10_bh_mass"] = np.round(log_bh, 3)
    table["period"] = np.round(period, 2)
    table["period"].unit = "d"
    table["period_err"] = np.round(period_err, 2)
    table["period_err"].unit = "d"
    table.meta["description"] = ("INVENTED galaxy catalogue for the cwsearch demo (scripts/make_demo_catalog.py, "
                                 f"seed {seed}). Not real galaxies. NaN = unknown.")
    host_name = str(names[[r["tag"] for r in rows].index("host")])
    table.meta["demo_host"] = host_name
    decoy_names = {str(names[i]): r["tag"] for i, r in enumerate(rows) if r["tag"].startswith("decoy")}
    return table, host_name, decoy_names


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default="catalogs/demo_galaxies.ecsv")
    parser.add_argument("--check", action="store_true", help="compare with the existing file instead of writing")
    args = parser.parse_args(argv)
    table, host, decoys = build()
    if args.check:
        from astropy.table import Table

        old = Table.read(args.out, format="ascii.ecsv")
        same = len(old) == len(table) and all(
            np.array_equal(np.asarray(old[c]), np.asarray(table[c]), equal_nan=old[c].dtype.kind == "f")
            for c in table.colnames)
        print("identical" if same else "DIFFERENT")
        return 0 if same else 1
    from cwsearch.core.fileio import write_table_atomic

    write_table_atomic(args.out, table)
    lb, total = host_bulge_mass()
    print(f"wrote {args.out}: {len(table)} invented galaxies; host {host} (log10 bulge mass {lb:.3f}, "
          f"total BH mass {total:.3g} Msun)")
    for name, tag in decoys.items():
        print(f"  {name}: {tag}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
