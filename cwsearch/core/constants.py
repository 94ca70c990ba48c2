"""Physical constants and unit conversions, in seconds (G = c = 1).

Values follow IAU 2015 / CODATA 2018 as used by :mod:`astropy.constants`;
``tests/test_waveform.py`` checks each against astropy. They are plain
floats so that numerical kernels never import astropy.

Examples
--------
>>> from cwsearch.core.constants import SOLAR_MASS_SECONDS, KPC_SECONDS
>>> round(SOLAR_MASS_SECONDS * 1e6, 6)      # G Msun / c^3 in microseconds
4.925491
>>> round(KPC_SECONDS / 3.15576e7)          # 1 kpc in light years
3262
"""

SPEED_OF_LIGHT = 299792458.0                 # m / s
SOLAR_MASS_SECONDS = 4.925490947641267e-06   # G Msun / c^3  [s]
PARSEC_METRES = 3.0856775814913673e16        # m
KPC_SECONDS = 1e3 * PARSEC_METRES / SPEED_OF_LIGHT   # light travel time over 1 kpc [s]
MPC_SECONDS = 1e6 * PARSEC_METRES / SPEED_OF_LIGHT   # light travel time over 1 Mpc [s]
DAY_SECONDS = 86400.0
YEAR_SECONDS = 365.25 * DAY_SECONDS          # Julian year [s]
YEAR_FREQUENCY = 1.0 / YEAR_SECONDS          # 1/yr [Hz]


__all__ = [
    "SPEED_OF_LIGHT", "SOLAR_MASS_SECONDS", "PARSEC_METRES", "KPC_SECONDS", "MPC_SECONDS",
    "DAY_SECONDS", "YEAR_SECONDS", "YEAR_FREQUENCY",
]
