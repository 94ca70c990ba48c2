"""The injected binary of a simulated dataset (``injection.json``), for over-plotting the truth.

:func:`injected_binary` returns the first injected binary in the units the
plots use (angles and sky position in degrees, frequency in Hz, chirp mass in
Msun, distance in Mpc), or ``None`` for real data (no ``injection.json``).

Examples
--------
>>> from cwsearch.data.truth import injected_binary
>>> from cwsearch.commands.demo import demo_paths
>>> truth = injected_binary(demo_paths()[0])
>>> truth["ra"], truth["dec"], truth["frequency"]
(141.0, -27.5, 1.2e-08)
>>> injected_binary("/nonexistent") is None
True
"""

from __future__ import annotations

import json
import math
from pathlib import Path

INJECTION_FILE = "injection.json"


def injected_binary(source):
    """The truth for ``source``: a dataset folder, a run folder (via its dataset.json) or an Array."""
    folder = getattr(source, "source", source)
    if not isinstance(folder, (str, Path)):
        return None   # an Array built in memory (not read from a folder): no injection.json to read
    folder = Path(folder)
    if not (folder / INJECTION_FILE).is_file() and (folder / "dataset.json").is_file():
        try:
            folder = Path(json.loads((folder / "dataset.json").read_text(encoding="utf-8"))["path"])
        except (OSError, ValueError, KeyError, TypeError):
            return None
    try:
        inj = json.loads((folder / INJECTION_FILE).read_text(encoding="utf-8"))
        b = inj["binaries"][0]
    except (OSError, ValueError, KeyError, IndexError, TypeError):
        return None
    out = {k: float(b[k]) for k in ("ra", "dec", "chirp_mass", "strain", "luminosity_distance") if k in b}
    for k in ("inclination", "polarization", "phase"):
        if k in b:
            out[k] = math.degrees(float(b[k]))   # plots and tables show angles in degrees
    if "gw_frequency" in b:
        out["frequency"] = float(b["gw_frequency"])
    return out


__all__ = ["injected_binary"]
