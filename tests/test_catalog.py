"""Galaxy-catalogue reading and validation (row-and-column messages for every bad catalogue)."""

from __future__ import annotations

import numpy as np
import pytest

from cwsearch.data.catalog import parse_column_map, read_catalog
from cwsearch.core.errors import InputError

GOOD = "name,ra,dec,distance\nA,10.0,20.0,40.0\nB,350.5,-45.0,120.0\nC,180.0,89.0,300.0\n"


def _write(tmp_path, text, name="cat.csv"):
    p = tmp_path / name
    p.write_bytes(text.encode() if isinstance(text, str) else text)
    return p


def test_csv_and_ecsv_give_the_same_catalogue(tmp_path):
    from astropy.table import Table

    csv = read_catalog(_write(tmp_path, GOOD))
    t = Table.read(_write(tmp_path, GOOD, "copy.csv"), format="ascii.csv")
    t["ra"].unit, t["dec"].unit, t["distance"].unit = "deg", "deg", "Mpc"
    t.write(tmp_path / "cat.ecsv", format="ascii.ecsv")
    ecsv = read_catalog(tmp_path / "cat.ecsv")
    assert list(ecsv.name) == list(csv.name) == ["A", "B", "C"]
    for key in ("ra", "dec", "distance", "redshift"):
        assert getattr(ecsv, key) == pytest.approx(getattr(csv, key))
    # default distance error: 10 % (documented default)
    assert csv.distance_err == pytest.approx(0.1 * csv.distance)


def test_ecsv_units_are_converted(tmp_path):
    # unit conversion by astropy.units is the reference: 40000 kpc = 40 Mpc, 2 yr = 730.5 d
    from astropy.table import Table

    t = Table({"name": ["A"], "ra": [0.5], "dec": [0.1], "distance": [40000.0], "period": [2.0],
               "period_err": [0.1]})
    t["ra"].unit, t["dec"].unit, t["distance"].unit = "rad", "rad", "kpc"
    t["period"].unit = t["period_err"].unit = "yr"
    t.write(tmp_path / "u.ecsv", format="ascii.ecsv")
    cat = read_catalog(tmp_path / "u.ecsv")
    assert cat.ra[0] == pytest.approx(np.degrees(0.5))
    assert cat.distance[0] == pytest.approx(40.0)
    assert cat.period[0] == pytest.approx(730.5)


def test_redshift_only_uses_planck18(tmp_path):
    # astropy.cosmology.Planck18: z = 0.05 -> 229.9 Mpc (Planck 2018 VI, A&A 641, A6)
    cat = read_catalog(_write(tmp_path, "name,ra,dec,redshift\nA,1,2,0.05\n"))
    assert cat.distance[0] == pytest.approx(229.9, abs=0.06)
    # a distance-only row gets the Planck18 redshift back (inverse)
    cat = read_catalog(_write(tmp_path, "name,ra,dec,distance\nA,1,2,229.88\n"))
    assert cat.redshift[0] == pytest.approx(0.05, rel=1e-3)


def test_column_mapping(tmp_path):
    text = "ID,RAJ2000,DEJ2000,Dist,Kmag\nG1,10,20,40,-24.5\n"
    cat = read_catalog(_write(tmp_path, text), "name=ID,ra=RAJ2000,dec=DEJ2000,distance=Dist,k_abs_mag=Kmag")
    assert cat.name[0] == "G1" and cat.distance[0] == 40.0
    assert cat.proxies["k_abs_mag"][0] == -24.5  # exact: parsed from the file, not computed
    assert parse_column_map("ra=RAJ2000, dec=DEJ2000") == {"ra": "RAJ2000", "dec": "DEJ2000"}
    with pytest.raises(InputError, match="unknown column 'rightasc'"):
        parse_column_map("rightasc=RA")
    with pytest.raises(InputError, match="not of the form"):
        parse_column_map("ra")
    with pytest.raises(InputError, match=r"column 'RA_X' \(mapped to ra\) not found"):
        read_catalog(_write(tmp_path, text), "ra=RA_X")


def test_ra_is_wrapped_into_range(tmp_path):
    cat = read_catalog(_write(tmp_path, "name,ra,dec,distance\nA,-10,0,5\n"))
    assert cat.ra[0] == pytest.approx(350.0)


BAD = [
    # (csv text, expected row, expected column, message fragment)
    ("name,dec,distance\nA,1,2\n", None, "ra", "missing required column 'ra'"),
    ("name,ra,dec\nA,1,2\n", None, "distance", "needs a 'distance' [Mpc] or 'redshift' column"),
    ("name,ra,dec,distance\nA,1,2,3\nB,1,nan,3\n", 2, "dec", "finite number is required"),
    ("name,ra,dec,distance\nA,1,2,3\nB,1,,3\n", 2, "dec", "missing value"),
    ("name,ra,dec,distance\nA,1,2,3\nB,1,-90.5,3\n", 2, "dec", "declination must be within [-90, 90] deg"),
    ("name,ra,dec,distance\nA,1,2,3\nB,1,2,-3\n", 2, "distance", "distance must be > 0 Mpc (got -3)"),
    ("name,ra,dec,distance\nA,1,2,3\nB,1,2,0\n", 2, "distance", "distance must be > 0 Mpc"),
    ("name,ra,dec,distance\nA,1,2,3\nB,1,2,3\nA,5,6,7\n", 3, "name", "duplicate name 'A' (first seen in row 1)"),
    ("name,ra,dec,distance\nA,1,2,3\n,1,2,3\n", 2, "name", "empty name"),
    ("name,ra,dec,distance\nA,1,2,3\nB,x1,2,3\n", 2, "ra", "not a number: 'x1'"),
    ("name,ra,dec,distance\nA,inf,2,3\n", 1, "ra", "give a finite number"),
    ("name,ra,dec,redshift\nA,1,2,-0.1\n", 1, "redshift", "redshift must be >= 0"),
    ("name,ra,dec,distance,redshift\nA,1,2,3,0.1\nB,1,2,,\n", 2, "distance", "neither distance nor redshift"),
    ("name,ra,dec,distance,log10_bulge_mass\nA,1,2,3,11\nB,1,2,3,1e11\n", 2, "log10_bulge_mass",
     "outside the plausible range"),
    ("name,ra,dec,distance,k_abs_mag\nA,1,2,3,12.5\n", 1, "k_abs_mag", "outside the plausible range"),
    ("name,ra,dec,distance,period\nA,1,2,3,500\n", None, "period_err", "needs a 'period_err' column"),
    ("name,ra,dec,distance,period,period_err\nA,1,2,3,500,\n", 1, "period_err", "period error must be given"),
    ("name,ra,dec,distance,period,period_err\nA,1,2,3,-5,1\n", 1, "period", "period must be > 0 d"),
    ("name,ra,dec,distance,distance_err\nA,1,2,3,-1\n", 1, "distance_err", "distance error must be > 0"),
    ("name,ra,dec,distance\n", None, None, "no rows"),
]


@pytest.mark.parametrize("text,row,column,fragment", BAD, ids=[b[3][:30] for b in BAD])
def test_bad_catalogues_get_specific_messages(tmp_path, text, row, column, fragment):
    path = _write(tmp_path, text)
    with pytest.raises(InputError) as info:
        read_catalog(path)
    err = info.value
    assert fragment in err.message
    assert err.row == row
    assert err.column == column
    assert err.file == str(path)


def test_bad_bytes_are_located(tmp_path):
    path = _write(tmp_path, b"name,ra,dec,distance\nA,1,2,3\nB\xff\xfe,1,2,3\n")
    with pytest.raises(InputError, match=r"row 2: not valid UTF-8 text: byte 0xff on line 3"):
        read_catalog(path)


def test_bad_ecsv_row_and_missing_file(tmp_path):
    from astropy.table import Table

    t = Table({"name": ["A", "B"], "ra": [1.0, 2.0], "dec": [3.0, 95.0], "distance": [10.0, 20.0]})
    t.write(tmp_path / "b.ecsv", format="ascii.ecsv")
    with pytest.raises(InputError, match=r"b.ecsv, row 2, column dec: declination"):
        read_catalog(tmp_path / "b.ecsv")
    with pytest.raises(InputError, match="catalogue file not found"):
        read_catalog(tmp_path / "nope.ecsv")


def test_mass_proxy_preference_order(tmp_path):
    # a galaxy with both a bulge mass and a K magnitude uses the bulge mass (documented order)
    from cwsearch.physics.relations import MCCONNELL_MA_2013

    text = "name,ra,dec,distance,log10_bulge_mass,k_abs_mag\nA,1,2,3,11.0,-25\nB,1,2,3,,-25\nC,1,2,3,,\n"
    cat = read_catalog(_write(tmp_path, text))
    mu, sigma, used = cat.total_mass_prior(MCCONNELL_MA_2013)
    assert list(used) == ["log10_bulge_mass", "k_abs_mag", ""]
    assert mu[0] == pytest.approx(8.46)  # McConnell & Ma 2013 at 1e11 Msun (from memory)
    assert np.isnan(mu[2])


def test_demo_catalogue_is_valid_and_reproducible():
    # the committed demo catalogue is exactly what the seeded generator writes (reproducibility, no source)
    import importlib.util
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    cat = read_catalog(root / "catalogs" / "demo_galaxies.ecsv")
    assert 2000 < len(cat) < 10000
    assert np.nanmax(cat.distance) <= 300.0
    assert all(n.startswith("SIMGAL-") for n in cat.name[:20])
    spec = importlib.util.spec_from_file_location("make_demo_catalog", root / "scripts" / "make_demo_catalog.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    table, host, _ = mod.build()
    assert list(table["name"]) == list(cat.name)
    assert np.asarray(table["distance"]) == pytest.approx(cat.distance)
    i = list(cat.name).index(host)
    # the host sits at the demo binary's position and distance (scenario stated in the issue)
    assert (cat.ra[i], cat.dec[i], cat.distance[i]) == pytest.approx((141.0, -27.5, 80.0))
