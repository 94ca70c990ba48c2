"""``cwsearch simulate``: write an invented dataset, with noise, a background and injected binaries.

The library entry point is :func:`simulate_dataset` with a
:class:`SimulateOptions` (field names equal the command-line options).
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, fields
from pathlib import Path

from .. import __version__
from ..core.constants import DAY_SECONDS, YEAR_SECONDS
from ..core.errors import InputError

DESCRIPTION = """\
Write an invented dataset folder (pulsars.ecsv, residuals/, noise settings)
with white noise, optional per-pulsar red noise, an optional Hellings-Downs
correlated background, and any number of injected circular binaries (Earth
and pulsar term). OUTDIR/injection.json records every true parameter: sky
position in degrees, GW frequency [Hz], chirp mass [Msun], strain,
inclination/polarization/phase [rad], the pulsar-term phase used for each
pulsar [rad], and the optimal signal-to-noise ratio. Pulsars are named
SIMPSR01, SIMPSR02, ...; the same --seed gives the same files."""

EXAMPLE = """\
  cwsearch simulate mydata --pulsars 40 --years 16 --seed 7 --inject-strain 2e-14 --inject-frequency 8e-9 --inject-ra 150 --inject-dec -20
  cwsearch simulate noise_only --pulsars 30 --background-log10-amplitude -14.7 --red-noise-fraction 0.3
  cwsearch simulate two --inject-file binaries.json   (a JSON list of {"ra", "dec", "gw_frequency", "strain", ...})"""

_BINARY_KEYS = {"ra", "dec", "gw_frequency", "strain", "luminosity_distance", "chirp_mass", "inclination",
                "polarization", "phase", "evolution", "pulsar_term", "pulsar_phases"}
#: keys written to injection.json for information; ignored when such a file is read back
_DERIVED_KEYS = {"orbital_period_yr", "time_to_coalescence_yr", "optimal_snr"}


@dataclass(frozen=True)
class SimulateOptions:
    """Settings of :func:`simulate_dataset` (names and defaults as the command-line options).

    Angles ``inject_ra``/``inject_dec`` in degrees; inclination, polarization
    and phase in radians; frequency in Hz; chirp mass in Msun; sigma in s.
    """

    pulsars: int = 20
    years: float = 15.0
    cadence_days: float = 14.0
    toas_per_pulsar: int | None = None
    sigma: float = 3e-7
    red_noise_fraction: float = 0.0
    background_log10_amplitude: float | None = None
    background_index: float = 13.0 / 3.0
    background_components: int = 30
    inject_strain: float | None = None
    inject_frequency: float | None = None
    inject_ra: float | None = None
    inject_dec: float | None = None
    inject_chirp_mass: float = 1e9
    inject_inclination: float = 0.5
    inject_polarization: float = 0.3
    inject_phase: float = 1.0
    evolution: str = "full"
    earth_term_only: bool = False
    inject_file: str | None = None
    wrong_sigmas: bool = False
    sigma_scale_range: tuple = (0.8, 1.6)
    sigma_added_range: tuple = (0.0, 0.5)
    noise_in_files: bool = False


def add_arguments(parser):
    parser.add_argument("outdir", help="dataset folder to create (must not exist or be empty)")
    d = SimulateOptions()
    a = parser.add_argument_group("array")
    a.add_argument("--pulsars", type=int, default=d.pulsars, metavar="N", help=f"number of pulsars (default {d.pulsars})")
    a.add_argument("--years", type=float, default=d.years, help=f"time span in years (default {d.years:g})")
    a.add_argument("--cadence-days", type=float, default=d.cadence_days, metavar="DAYS",
                   help=f"mean spacing of observations (default {d.cadence_days:g})")
    a.add_argument("--toas-per-pulsar", type=int, default=None, metavar="N",
                   help="fixed number of TOAs per pulsar (overrides --cadence-days)")
    a.add_argument("--sigma", type=float, default=d.sigma, metavar="SECONDS",
                   help=f"typical TOA uncertainty in seconds (default {d.sigma:g})")
    a.add_argument("--red-noise-fraction", type=float, default=d.red_noise_fraction, metavar="FRACTION",
                   help="fraction of pulsars given power-law red noise (default 0)")
    a.add_argument("--background-log10-amplitude", type=float, default=None, metavar="LOG10A",
                   help="add a Hellings-Downs correlated background with this log10 amplitude (default: none)")
    a.add_argument("--background-index", type=float, default=d.background_index, metavar="GAMMA",
                   help="spectral index of the background (default 13/3)")
    a.add_argument("--background-components", type=int, default=d.background_components, metavar="K",
                   help=f"Fourier frequencies of the background (default {d.background_components})")
    n = parser.add_argument_group("noise as in real data (true values only in injection.json)")
    n.add_argument("--wrong-sigmas", action="store_true",
                   help="make the quoted TOA errors wrong per backend: the true white noise is "
                        "(scale x quoted)^2 + added^2 with scale and added drawn from the ranges below")
    n.add_argument("--sigma-scale-range", type=float, nargs=2, default=d.sigma_scale_range, metavar=("LO", "HI"),
                   help="range of the true scale of the quoted errors (default %(default)s)")
    n.add_argument("--sigma-added-range", type=float, nargs=2, default=d.sigma_added_range, metavar=("LO", "HI"),
                   help="range of the true added white noise, as a fraction of the backend's median quoted "
                        "error (default %(default)s)")
    n.add_argument("--noise-in-files", action="store_true",
                   help="also write the true red-noise values into pulsars.ecsv (default: only injection.json, so "
                        "that the analysis must estimate them)")
    b = parser.add_argument_group("injected binary (all --inject-* options describe one binary)")
    b.add_argument("--inject-strain", type=float, default=None, metavar="H0", help="strain amplitude h0")
    b.add_argument("--inject-frequency", type=float, default=None, metavar="HZ",
                   help="GW frequency at the start of the data [Hz]")
    b.add_argument("--inject-ra", type=float, default=None, metavar="DEG", help="right ascension [deg]")
    b.add_argument("--inject-dec", type=float, default=None, metavar="DEG", help="declination [deg]")
    b.add_argument("--inject-chirp-mass", type=float, default=d.inject_chirp_mass, metavar="MSUN",
                   help=f"chirp mass [Msun] (default {d.inject_chirp_mass:g})")
    b.add_argument("--inject-inclination", type=float, default=d.inject_inclination, metavar="RAD",
                   help=f"inclination [rad] (default {d.inject_inclination})")
    b.add_argument("--inject-polarization", type=float, default=d.inject_polarization, metavar="RAD",
                   help=f"polarization angle [rad] (default {d.inject_polarization})")
    b.add_argument("--inject-phase", type=float, default=d.inject_phase, metavar="RAD",
                   help=f"orbital phase at the start of the data [rad] (default {d.inject_phase})")
    b.add_argument("--evolution", choices=("full", "pulsar-frequency", "monochromatic"), default="full",
                   help="frequency evolution of injected binaries (default full)")
    b.add_argument("--earth-term-only", action="store_true", help="inject without the pulsar term")
    b.add_argument("--inject-file", default=None, metavar="JSON",
                   help="JSON list of binaries (keys ra, dec [deg], gw_frequency [Hz], strain or "
                        "luminosity_distance [Mpc], optional chirp_mass, inclination, polarization, phase, "
                        "evolution, pulsar_term); an injection.json is accepted too")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace OUTDIR if it already holds a dataset")
    parser.add_argument("--quiet", action="store_true", help="print nothing on success")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")


def options_from_args(args) -> SimulateOptions:
    values = {f.name: getattr(args, f.name) for f in fields(SimulateOptions)}
    for key in ("sigma_scale_range", "sigma_added_range"):
        values[key] = tuple(float(v) for v in values[key])
    return SimulateOptions(**values)


def check_readable_residuals(array):
    """Refuse (InputError) a simulation whose residuals the dataset reader would refuse: finite, |residual|
    at most MAX_RESIDUAL_SECONDS and at most MAX_RESIDUAL_OVER_SIGMA sigma (cwsearch.core.safeio), so that
    `simulate` never writes a dataset that `inspect` and `scan` cannot read (e.g. a strain of 1e300)."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    import numpy as np
    from ..core.errors import InputError
    from ..core.safeio import MAX_RESIDUAL_OVER_SIGMA, MAX_RESIDUAL_SECONDS

    for p in array:
        r = np.asarray(p.residuals, dtype=float)
        worst = float(np.max(np.abs(r))) if r.size else 0.0
        ratio = float(np.max(np.abs(r) / np.asarray(p.sigmas, dtype=float))) if r.size else 0.0
        if not (np.all(np.isfinite(r)) and worst <= MAX_RESIDUAL_SECONDS and ratio <= MAX_RESIDUAL_OVER_SIGMA):
            size = "are not finite numbers" if not np.all(np.isfinite(r)) else f"reach {worst:.3g} s ({ratio:.3g} sigma)"
            raise InputError(f"the simulated residuals of pulsar {p.name} {size}; "
                             f"the dataset reader accepts at most {MAX_RESIDUAL_SECONDS:g} s and "
                             f"{MAX_RESIDUAL_OVER_SIGMA:g} sigma: lower the injected strain (or the noise)")


def run(args) -> int:
    summary = simulate_dataset(args.outdir, options_from_args(args), seed=args.seed, overwrite=args.overwrite)
    if args.json:
        print(json.dumps(summary, indent=2))
    elif not args.quiet:
        print(f"wrote {summary['n_pulsars']} pulsars, {summary['n_toas']} TOAs over "
              f"{summary['span_years']:.2f} yr to {summary['dataset']}")
        for i, b in enumerate(summary["binaries"]):
            print(f"  binary {i + 1}: f = {b['gw_frequency']:.4g} Hz, h0 = {b['strain']:.3g}, "
                  f"ra = {b['ra']:.3f} deg, dec = {b['dec']:.3f} deg, optimal SNR = {b['optimal_snr']:.2f}")
        if summary["binaries"]:
            print(f"  total optimal SNR = {summary['optimal_snr']:.2f}; true parameters in injection.json")
    return 0


# ---------------------------------------------------------------------- library
def _check_options(o: SimulateOptions):
    checks = [
        (o.pulsars >= 1, "--pulsars must be at least 1"),
        (o.years > 0, "--years must be > 0"),
        (o.cadence_days > 0, "--cadence-days must be > 0"),
        (o.toas_per_pulsar is None or o.toas_per_pulsar >= 10, "--toas-per-pulsar must be at least 10"),
        (o.sigma > 0, "--sigma must be > 0 (seconds)"),
        (0 <= o.red_noise_fraction <= 1, "--red-noise-fraction must be between 0 and 1"),
        (o.background_components >= 1, "--background-components must be at least 1"),
        (len(o.sigma_scale_range) == 2 and 0 < o.sigma_scale_range[0] <= o.sigma_scale_range[1],
         "--sigma-scale-range needs 0 < LO <= HI"),
        (len(o.sigma_added_range) == 2 and 0 <= o.sigma_added_range[0] <= o.sigma_added_range[1],
         "--sigma-added-range needs 0 <= LO <= HI"),
    ]
    for ok, message in checks:
        if not ok:
            raise InputError(message)


def _binary_from_dict(spec: dict, where: str, pulsar_names):
    """Validate one binary given in user units (deg, Hz, Msun, Mpc, rad) -> keyword dict in model units."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..core.safeio import MAX_RESIDUAL_SECONDS
    from ..physics import waveform

    unknown = set(spec) - _BINARY_KEYS - _DERIVED_KEYS
    if unknown:
        raise InputError(f"unknown key(s) {', '.join(sorted(unknown))} (allowed: {', '.join(sorted(_BINARY_KEYS))})",
                         file=where)
    for key in ("ra", "dec", "gw_frequency"):
        if spec.get(key) is None:
            raise InputError(f"missing '{key}'", file=where)
    if spec.get("strain") is None and spec.get("luminosity_distance") is None:
        raise InputError("give 'strain' or 'luminosity_distance' [Mpc]", file=where)

    def number(key, default=None):
        value = spec.get(key, default)
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise InputError(f"'{key}' must be a finite number, not {value!r}", file=where)
        return float(value)

    ra, dec, freq = number("ra"), number("dec"), number("gw_frequency")
    chirp_mass = number("chirp_mass", 1e9)
    if not 0 <= ra < 360:
        raise InputError(f"ra must be in [0, 360) degrees, not {ra}", file=where)
    if abs(dec) > 90:
        raise InputError(f"dec must be in [-90, 90] degrees, not {dec}", file=where)
    if freq <= 0:
        raise InputError(f"gw_frequency must be > 0 Hz, not {freq}", file=where)
    if chirp_mass <= 0:
        raise InputError(f"chirp_mass must be > 0 Msun, not {chirp_mass}", file=where)
    if spec.get("strain") is not None:
        strain = number("strain")
        if strain < 0:
            raise InputError(f"strain must be >= 0, not {strain}", file=where)
    else:
        distance = number("luminosity_distance")
        if distance <= 0:
            raise InputError(f"luminosity_distance must be > 0 Mpc, not {distance}", file=where)
        strain = float(waveform.strain_amplitude(chirp_mass, freq, distance))
    # the residual amplitude of a binary is of order h / (2 pi f) seconds (common practice, no source): one
    # beyond the dataset reader's bound would write a dataset no command can read
    if not math.isfinite(strain) or strain / (2 * math.pi * freq) > MAX_RESIDUAL_SECONDS:
        raise InputError(f"strain {strain:g} at {freq:g} Hz gives residuals of about h/(2 pi f) = "
                         f"{strain / (2 * math.pi * freq):.3g} s, above the {MAX_RESIDUAL_SECONDS:g} s the dataset "
                         "reader accepts", file=where)
    evolution = spec.get("evolution", "full")
    if evolution not in waveform.EVOLUTION_MODES:
        raise InputError(f"evolution must be one of {', '.join(waveform.EVOLUTION_MODES)}, not {evolution!r}",
                         file=where)
    pulsar_term = spec.get("pulsar_term", True)
    if not isinstance(pulsar_term, bool):
        raise InputError(f"pulsar_term must be true or false, not {pulsar_term!r}", file=where)
    phases = spec.get("pulsar_phases")
    if phases is not None:
        if not isinstance(phases, dict) or set(phases) != set(pulsar_names):
            raise InputError("pulsar_phases must map every simulated pulsar name to a phase [rad]", file=where)
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
                   for v in phases.values()):
            raise InputError("pulsar_phases must be finite numbers [rad]", file=where)
        phases = [float(phases[name]) for name in pulsar_names]
    return dict(ra=math.radians(ra), dec=math.radians(dec), gw_frequency=freq, chirp_mass=chirp_mass,
                strain=strain, inclination=number("inclination", 0.5), polarization=number("polarization", 0.3),
                phase=number("phase", 1.0), evolution=evolution, pulsar_term=pulsar_term, pulsar_phases=phases)


def _binary_specs(o: SimulateOptions, pulsar_names):
    """Binaries from --inject-* options and --inject-file, in model units."""
    specs = []
    if o.inject_file is not None:
        path = Path(o.inject_file)
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except OSError as exc:
            raise InputError(f"cannot read ({exc.strerror})", file=path) from None
        except UnicodeDecodeError:
            raise InputError("not UTF-8 text", file=path) from None
        except json.JSONDecodeError as exc:
            raise InputError(f"not valid JSON ({exc.msg}, line {exc.lineno} column {exc.colno})", file=path) from None
        if isinstance(data, dict) and "binaries" in data:
            data = data["binaries"]
        if isinstance(data, dict):
            data = [data]
        if not isinstance(data, list) or not all(isinstance(b, dict) for b in data):
            raise InputError("expected a JSON list of objects (one per binary)", file=path)
        for i, b in enumerate(data):
            specs.append(_binary_from_dict(b, f"{path}, binary {i + 1}", pulsar_names))
    given = {"--inject-strain": o.inject_strain, "--inject-frequency": o.inject_frequency,
             "--inject-ra": o.inject_ra, "--inject-dec": o.inject_dec}
    if any(v is not None for v in given.values()):
        missing = [k for k, v in given.items() if v is None]
        if missing:
            raise InputError(f"an injected binary also needs {', '.join(missing)}")
        specs.append(_binary_from_dict(
            {"ra": o.inject_ra, "dec": o.inject_dec, "gw_frequency": o.inject_frequency, "strain": o.inject_strain,
             "chirp_mass": o.inject_chirp_mass, "inclination": o.inject_inclination,
             "polarization": o.inject_polarization, "phase": o.inject_phase, "evolution": o.evolution,
             "pulsar_term": not o.earth_term_only},
            "--inject options", pulsar_names))
    return specs


def _pulsar_phases(array, spec):
    """Pulsar-term orbital phases at the reference time [rad] for the coherent model (one per pulsar)."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    import numpy as np
    from ..physics import waveform

    _, _, omega_dot_p = waveform.antenna_pattern(spec["ra"], spec["dec"], array.positions)
    phases = []
    for p, odp in zip(array, omega_dot_p):
        _, offset = waveform.residual_basis(p.toas[:1], array.reference_time, spec["gw_frequency"],
                                            spec["chirp_mass"], p.distance, odp, spec["evolution"])
        phases.append(float(np.mod(spec["phase"] + offset, 2 * np.pi)))
    return phases


def simulate_dataset(outdir, options: SimulateOptions | None = None, *, seed=0, overwrite=False) -> dict:
    """Simulate an invented dataset and write it (with injection.json) to ``outdir``.

    Returns a JSON-serialisable summary (also the content of injection.json
    plus the folder name and sizes). Raises :class:`~cwsearch.core.errors.InputError`
    (e.g. :class:`~cwsearch.core.errors.CoalescenceError` when an injected binary
    would merge inside the data span).
    """
    # lazy: keeps `cwsearch COMMAND --help` fast
    import numpy as np
    from ..physics import waveform
    from ..data.dataset import write_dataset
    from ..physics.noise import NoiseSettings, NoiseWeighting
    from ..data.model import PulsarNoise
    from ..physics.simulate import Binary, binary_residuals, invented_array, simulate_residuals, wrong_white_noise

    o = options or SimulateOptions()
    _check_options(o)
    array_seed, noise_seed, white_seed = np.random.SeedSequence(seed).spawn(3)
    array = invented_array(n_pulsars=o.pulsars, years=o.years, seed=np.random.default_rng(array_seed),
                           cadence_days=o.cadence_days, toas_per_pulsar=o.toas_per_pulsar, sigma_median=o.sigma,
                           red_noise_fraction=o.red_noise_fraction, full_span=False)
    specs = _binary_specs(o, array.names)
    binaries = []
    for spec in specs:
        waveform.check_before_coalescence(spec["chirp_mass"], spec["gw_frequency"], array.end - array.reference_time)
        if spec["pulsar_phases"] is None:
            spec["pulsar_phases"] = _pulsar_phases(array, spec)
        binaries.append(Binary(**spec))

    true_white = (wrong_white_noise(array, np.random.default_rng(white_seed), scale_range=o.sigma_scale_range,
                                    added_fraction=o.sigma_added_range) if o.wrong_sigmas else None)
    residuals = simulate_residuals(array, np.random.default_rng(noise_seed),
                                   background_log10_amplitude=o.background_log10_amplitude,
                                   background_index=o.background_index,
                                   background_components=o.background_components, binaries=binaries,
                                   true_white=true_white)
    simulated = array.with_residuals(residuals)
    true_noise = {p.name: {"white": (true_white[p.name] if true_white is not None else
                                     {b: {"sigma_scale": 1.0, "sigma_added": 0.0} for b in p.backend_names}),
                           "red": ({"log10_amplitude": p.noise.red_log10_amplitude, "index": p.noise.red_index}
                                   if p.noise.has_red_noise else None)} for p in array}

    engine = None
    if binaries:
        engine = NoiseWeighting(simulated, NoiseSettings(
            red_components=o.background_components, common_log10_amplitude=o.background_log10_amplitude,
            common_index=o.background_index))
    signals_total = [np.zeros(p.n_toas) for p in array]
    binary_records = []
    for binary in binaries:
        signals = binary_residuals(array, binary)
        for total, s in zip(signals_total, signals):
            total += s
        tc = waveform.time_to_coalescence(binary.chirp_mass, binary.gw_frequency)
        binary_records.append({
            "ra": math.degrees(binary.ra), "dec": math.degrees(binary.dec),
            "gw_frequency": binary.gw_frequency, "chirp_mass": binary.chirp_mass, "strain": binary.strain,
            "luminosity_distance": float(waveform.luminosity_distance_for_strain(
                binary.strain, binary.chirp_mass, binary.gw_frequency)) if binary.strain > 0 else None,
            "inclination": binary.inclination, "polarization": binary.polarization, "phase": binary.phase,
            "evolution": binary.evolution, "pulsar_term": binary.pulsar_term,
            "pulsar_phases": dict(zip(array.names, binary.pulsar_phases)),
            "orbital_period_yr": float(waveform.orbital_period(binary.gw_frequency)) / YEAR_SECONDS,
            "time_to_coalescence_yr": float(tc) / YEAR_SECONDS,
            "optimal_snr": engine.optimal_snr(signals),
        })
    injection = {
        "description": "true parameters of this invented dataset, written by cwsearch simulate",
        "cwsearch_version": __version__,
        "seed": int(seed),
        "units": {"ra": "deg", "dec": "deg", "gw_frequency": "Hz", "chirp_mass": "solMass", "strain": "",
                  "luminosity_distance": "Mpc", "inclination": "rad", "polarization": "rad", "phase": "rad",
                  "pulsar_phases": "rad", "reference_mjd": "d"},
        "reference_mjd": array.reference_time / DAY_SECONDS,
        "options": asdict(o),
        "background": (None if o.background_log10_amplitude is None else
                       {"log10_amplitude": o.background_log10_amplitude, "index": o.background_index,
                        "components": o.background_components}),
        "binaries": binary_records,
        "optimal_snr": engine.optimal_snr(signals_total) if binaries else 0.0,
        "true_noise": true_noise,
        "true_noise_units": {"sigma_scale": "", "sigma_added": "s", "log10_amplitude": "", "index": ""},
        "true_noise_meaning": ("the noise the residuals were drawn from: white sigma_true^2 = (sigma_scale x quoted)^2 "
                               "+ sigma_added^2 per backend; power-law red noise per pulsar"
                               + ("" if o.noise_in_files else "; none of it is in the files the analysis reads")),
    }
    written = simulated if o.noise_in_files else simulated.with_noise({p.name: PulsarNoise() for p in simulated})
    check_readable_residuals(written)
    write_dataset(written, outdir, injection=injection, overwrite=overwrite)
    return {"dataset": str(outdir), "n_pulsars": len(array), "n_toas": int(sum(p.n_toas for p in array)),
            "span_years": array.span / YEAR_SECONDS, **{k: injection[k] for k in
                                                        ("seed", "reference_mjd", "binaries", "optimal_snr")}}


__all__ = [
    "DESCRIPTION", "EXAMPLE", "add_arguments", "run", "SimulateOptions", "options_from_args",
    "simulate_dataset",
]
