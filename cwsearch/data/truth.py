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
import os
from pathlib import Path

from ..core.constants import DAY_SECONDS
from ..core.errors import InputError
from ..core.safeio import escape_text, read_input_text

INJECTION_FILE = "injection.json"


#: numeric fields of an injected binary (finite numbers when present)
BINARY_NUMBERS = ("ra", "dec", "gw_frequency", "chirp_mass", "strain", "luminosity_distance", "inclination",
                  "polarization", "phase", "orbital_period_yr", "time_to_coalescence_yr", "optimal_snr")
#: largest injection.json read [bytes]
INJECTION_MAX_BYTES = 64 << 20


def read_injection_file(path, root=None) -> dict:
    """The content of an ``injection.json``, checked; InputError (naming the file and the entry) otherwise.

    Read through :mod:`cwsearch.core.safeio` (a regular file inside ``root``, the dataset folder: never a
    FIFO, a device or a link elsewhere; size cap). It must be a JSON object; ``binaries`` a list of objects
    whose :data:`BINARY_NUMBERS` are finite numbers when present; ``reference_mjd`` a number or null;
    ``background`` null or an object of numbers; ``true_noise`` an object per pulsar with ``white`` (per
    backend ``sigma_scale``, ``sigma_added``) and ``red`` (null or ``log10_amplitude``, ``index``).
    """
    path = Path(path)

    def bad(what):
        raise InputError(f"{what}", file=path)

    def number(value, where):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            bad(f"entry {where} must be a finite number, not {str(value)[:40]!r}")

    def numbers(obj, keys, where):
        if not isinstance(obj, dict):
            bad(f"entry {where} must be an object")
        for k in keys:
            if k in obj and obj[k] is not None:
                number(obj[k], f"{where}.{k}")

    text = read_input_text(path, root, what="injection file", max_bytes=INJECTION_MAX_BYTES)
    try:
        inj = json.loads(text)
    except (ValueError, RecursionError) as exc:
        bad(f"not valid JSON ({str(exc).splitlines()[0][:80]})")
    if not isinstance(inj, dict):
        bad("must be a JSON object")
    binaries = inj.get("binaries", [])
    if not isinstance(binaries, list):
        bad("entry binaries must be a list")
    for i, b in enumerate(binaries):
        numbers(b, BINARY_NUMBERS, f"binaries[{i}]")
        if isinstance(b.get("pulsar_phases"), dict):
            for name, v in b["pulsar_phases"].items():
                number(v, f"binaries[{i}].pulsar_phases.{escape_text(str(name))[:40]}")
    if inj.get("reference_mjd") is not None:
        number(inj["reference_mjd"], "reference_mjd")
    if inj.get("background") is not None:
        numbers(inj["background"], ("log10_amplitude", "index"), "background")
    noise = inj.get("true_noise")
    if noise is not None:
        if not isinstance(noise, dict):
            bad("entry true_noise must be an object")
        for name, rec in noise.items():
            where = f"true_noise.{escape_text(str(name))[:40]}"
            if not isinstance(rec, dict) or not isinstance(rec.get("white", {}), dict):
                bad(f"entry {where} must be an object with a 'white' object")
            for backend, w in rec.get("white", {}).items():
                numbers(w, ("sigma_scale", "sigma_added"), f"{where}.white.{escape_text(str(backend))[:40]}")
            if rec.get("red") is not None:
                numbers(rec["red"], ("log10_amplitude", "index"), f"{where}.red")
    return inj


def _read_injection(source):
    """(injection dict, first binary dict) of ``source`` (see :func:`injected_binary`), or (None, None)."""
    folder = getattr(source, "source", source)
    if not isinstance(folder, (str, Path)):
        return None, None   # an Array built in memory (not read from a folder): no injection.json to read
    folder = Path(folder)
    if not os.path.lexists(folder / INJECTION_FILE) and (folder / "dataset.json").is_file():
        try:   # a run folder: its dataset.json names the dataset folder
            folder = Path(json.loads(read_input_text(folder / "dataset.json", folder, max_bytes=64 << 20))["path"])
        except (InputError, ValueError, KeyError, TypeError, RecursionError):
            return None, None
    if not os.path.lexists(folder / INJECTION_FILE):
        return None, None
    try:
        inj = read_injection_file(folder / INJECTION_FILE, folder)
    except InputError:
        return None, None   # refused when the dataset was read; a truth that cannot be read is not shown
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


__all__ = ["injected_binary", "injected_signal", "injected_noise", "read_injection_file", "BINARY_NUMBERS"]
