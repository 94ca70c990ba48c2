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

:func:`injected_signal` returns the same binary in the units of
:func:`cwsearch.physics.waveform.residuals` (radians, Hz, Msun), with the
per-pulsar pulsar-term phases and the reference epoch, so that the true
residuals can be drawn over the fitted ones:

>>> signal = injected_signal(demo_paths()[0])
>>> round(signal["ra"], 4), signal["evolution"], len(signal["pulsar_phases"])
(2.4609, 'full', 20)
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from ..core.constants import DAY_SECONDS

INJECTION_FILE = "injection.json"


def _read_injection(source):
    """(injection dict, first binary dict) of ``source`` (see :func:`injected_binary`), or (None, None)."""
    folder = getattr(source, "source", source)
    if not isinstance(folder, (str, Path)):
        return None, None   # an Array built in memory (not read from a folder): no injection.json to read
    folder = Path(folder)
    if not (folder / INJECTION_FILE).is_file() and (folder / "dataset.json").is_file():
        try:
            folder = Path(json.loads((folder / "dataset.json").read_text(encoding="utf-8"))["path"])
        except (OSError, ValueError, KeyError, TypeError):
            return None, None
    try:
        inj = json.loads((folder / INJECTION_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None, None
    if not isinstance(inj, dict):
        return None, None
    try:
        first = inj["binaries"][0]
    except (KeyError, IndexError, TypeError):
        return inj, None
    return inj, first if isinstance(first, dict) else None


def injected_signal(source):
    """The first injected binary in waveform units, or None.

    Keys: ``ra``, ``dec``, ``inclination``, ``polarization``, ``phase`` [rad], ``gw_frequency`` [Hz],
    ``chirp_mass`` [Msun], ``strain``, ``evolution``, ``pulsar_term``, ``pulsar_phases`` (pulsar name ->
    pulsar-term phase at the reference epoch [rad]; empty when not recorded: then the coherent phase from
    the pulsar distance applies) and ``reference_time`` [s] (None when not recorded).
    """
    inj, b = _read_injection(source)
    if b is None:
        return None
    try:
        out = {"ra": math.radians(float(b["ra"])), "dec": math.radians(float(b["dec"])),
               "gw_frequency": float(b["gw_frequency"]), "chirp_mass": float(b.get("chirp_mass", 0.0)),
               "strain": float(b["strain"]), "inclination": float(b.get("inclination", 0.5)),
               "polarization": float(b.get("polarization", 0.3)), "phase": float(b.get("phase", 1.0)),
               "evolution": str(b.get("evolution", "full")), "pulsar_term": bool(b.get("pulsar_term", True))}
        phases = b.get("pulsar_phases") or {}
        out["pulsar_phases"] = {str(k): float(v) for k, v in phases.items()} if isinstance(phases, dict) else {}
        mjd = inj.get("reference_mjd")
        out["reference_time"] = None if mjd is None else float(mjd) * DAY_SECONDS
    except (KeyError, TypeError, ValueError):
        return None
    return out


def injected_noise(source):
    """The noise a simulated dataset was drawn from, or None (no ``injection.json`` or no noise record).

    Returns ``{"pulsars": {name: {"white": {backend: {"sigma_scale", "sigma_added" [s]}}, "red":
    {"log10_amplitude", "index"} or None}}, "background": {"log10_amplitude", "index"} or None}``.
    """
    inj, _ = _read_injection(source)     # a noise-only simulation has no binary but records its noise
    if inj is None:
        return None
    pulsars = inj.get("true_noise") if isinstance(inj.get("true_noise"), dict) else {}
    background = inj.get("background") if isinstance(inj.get("background"), dict) else None
    if not pulsars and background is None:
        return None
    return {"pulsars": pulsars, "background": background}


def injected_binary(source):
    """The truth for ``source``: a dataset folder, a run folder (via its dataset.json) or an Array."""
    _, b = _read_injection(source)
    if b is None:
        return None
    out = {k: float(b[k]) for k in ("ra", "dec", "chirp_mass", "strain", "luminosity_distance") if k in b}
    for k in ("inclination", "polarization", "phase"):
        if k in b:
            out[k] = math.degrees(float(b[k]))   # plots and tables show angles in degrees
    if "gw_frequency" in b:
        out["frequency"] = float(b["gw_frequency"])
    return out


__all__ = ["injected_binary", "injected_signal", "injected_noise"]
