"""Options shared by the stage commands: dataset, output folder, seed, quiet, noise model."""

from __future__ import annotations

NOISE_MODEL_HELP = ("noise model every stage uses: 'estimate' (default: fit it from the residuals, or reuse "
                    "RUN_DIR/noise/ fitted on the same dataset), 'dataset' (the values in the dataset files, "
                    "fixed) or the path of a noise table (noise_model.ecsv)")


def add_noise_model_argument(parser):
    """``--noise-model estimate|dataset|FILE``."""
    parser.add_argument("--noise-model", default="estimate", metavar="estimate|dataset|FILE", help=NOISE_MODEL_HELP)




def add_dataset_arguments(parser, out_required=True):
    """Positional dataset folder, ``--out``, ``--seed``, ``--quiet``, ``--json``."""
    parser.add_argument("dataset", help="dataset folder (pulsars.ecsv, residuals/, optional noise.ecsv)")
    parser.add_argument("--out", required=out_required, metavar="RUN_DIR",
                        help="run folder to write into (created if missing)")
    parser.add_argument("--seed", type=int, default=0, help="random seed for the whole run (default 0)")
    parser.add_argument("--quiet", action="store_true", help="no progress bars or tables")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    add_mjd_range_argument(parser)


def add_mjd_range_argument(parser):
    """``--mjd-range LO HI``: widen the plausible TOA dates (default MJD 40000-70000)."""
    parser.add_argument("--mjd-range", nargs=2, type=float, default=None, metavar=("LO", "HI"),
                        help="accept TOAs between MJD LO and HI (default 40000 70000; TOAs outside are "
                             "refused as implausible)")


def add_noise_arguments(parser):
    """Noise-model options (docs/design.md §5)."""
    g = parser.add_argument_group("noise model")
    add_noise_model_argument(g)
    g.add_argument("--red-components", type=int, default=30, metavar="K",
                   help="Fourier frequencies k/T_span, k=1..K, for red processes (default 30)")
    g.add_argument("--no-pulsar-red-noise", action="store_true",
                   help="ignore per-pulsar red noise given in the dataset (--noise-model dataset)")
    g.add_argument("--common-log10-amplitude", type=float, default=None, metavar="LOG10A",
                   help="add a common red process with this log10 amplitude (--noise-model dataset; default: none)")
    g.add_argument("--common-index", type=float, default=13 / 3, metavar="GAMMA",
                   help="spectral index of the common process (default 13/3)")
    g.add_argument("--no-white-noise-factors", action="store_true",
                   help="ignore the dataset's per-backend white-noise factors (noise.ecsv sigma_scale, "
                        "sigma_added); run-file key [noise] white_noise_factors")

    g.add_argument("--common-correlation", choices=("hellings-downs", "uncorrelated", "none"),
                   default="hellings-downs",
                   help="how the common process couples the pulsars: hellings-downs (default; array-level "
                        "engine), uncorrelated (same spectrum, independent pulsars) or none (leave it out)")
    g.add_argument("--common-components", type=int, default=None, metavar="K",
                   help="Fourier frequencies of the common process, at most --red-components (default: the same; "
                        "fewer make the correlated engine much faster where the background is below the white noise)")


def noise_settings(args):
    """:class:`~cwsearch.physics.noise.NoiseSettings` from parsed noise options."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..physics.noise import NoiseSettings

    return NoiseSettings(red_components=args.red_components,
                         pulsar_red_noise=not args.no_pulsar_red_noise,
                         common_log10_amplitude=args.common_log10_amplitude,
                         common_index=args.common_index,
                         white_noise_factors=not getattr(args, "no_white_noise_factors", False),
                         common_correlation=getattr(args, "common_correlation", "hellings-downs"),
                         common_components=getattr(args, "common_components", None))


def resolve_noise(args, array, *, progress=None):
    """The run's noise model for a stage command (:func:`cwsearch.job.noisemodel.resolve_noise_model`):
    ``(array with noise, NoiseSettings, description)``; prints which model is used unless ``--quiet``."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    import sys
    from pathlib import Path
    from ..data.dataset import dataset_checksum
    from ..job.noisemodel import format_description, resolve_noise_model
    from ..job.pipeline import stage_seed

    quiet = getattr(args, "quiet", False)
    out = getattr(args, "out", None)
    created = []
    if out is not None and getattr(args, "noise_model", "dataset") == "estimate":
        for path in (Path(out), Path(out) / "noise"):
            if not path.exists():
                created.append(path)
    resolved = resolve_noise_model(array, getattr(args, "out", None), getattr(args, "noise_model", "dataset"),
                                   noise=noise_settings(args), dataset_checksum=dataset_checksum(args.dataset),
                                   seed=stage_seed(getattr(args, "seed", 0), "noise"),
                                   progress=not quiet if progress is None else progress)
    if not quiet and not getattr(args, "json", False):
        print(format_description(resolved.description), file=sys.stderr)
    check_same_model(getattr(args, "out", None), resolved)
    resolved.created = created
    return resolved


def run_stage_with_noise(resolved, call):
    """``call()`` (a stage run); when it refuses its input (InputError), the noise fit made for it is removed
    again, so that a refused command leaves the run folder as it was."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    import shutil
    from ..core.errors import InputError
    try:
        return call()
    except InputError:
        for path in getattr(resolved, "created", []):
            if path.name == "noise":
                shutil.rmtree(path, ignore_errors=True)
        for path in getattr(resolved, "created", []):
            if path.name != "noise" and path.is_dir() and not any(path.iterdir()):
                path.rmdir()
        raise


def check_same_model(run_dir, resolved):
    """Warn when the scan already in ``run_dir`` used another noise model than ``resolved``."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    import json
    import warnings
    from pathlib import Path
    from ..job.noisemodel import NoiseModelWarning

    if run_dir is None:
        return
    try:
        used = json.loads((Path(run_dir) / "scan" / "scan_summary.json").read_text(encoding="utf-8")).get("noise_model")
    except (OSError, ValueError):
        return
    if not used:
        return
    mine = resolved.fingerprint()
    theirs = {"source": used.get("source"), "table_checksum": used.get("table_checksum"),
              "settings": used.get("settings")}
    if theirs != mine:
        warnings.warn(f"the scan in {run_dir} used another noise model ({used.get('source')}, table checksum "
                      f"{str(used.get('table_checksum'))[:12]}) than this stage ({mine['source']}, "
                      f"{str(mine['table_checksum'])[:12]}); rerun the scan with the same --noise-model",
                      NoiseModelWarning, stacklevel=2)


def load_array(args):
    """Read and validate the dataset named on the command line."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..data.dataset import read_dataset

    return read_dataset(args.dataset, mjd_range=getattr(args, "mjd_range", None))


def run_folder_guard(run_dir, array=None, dataset=None):
    """The pipeline's run-folder guard for a stage command (:func:`cwsearch.job.runfolder.stage_guard`):
    lock, ``.part`` clean-up, and (with ``dataset``) the dataset-checksum check; ``dataset.json`` is
    recorded when the stage succeeds."""
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..data.dataset import dataset_checksum
    from ..job.pipeline import dataset_summary
    from ..job.runfolder import stage_guard

    if dataset is None:
        return stage_guard(run_dir)
    checksum = dataset_checksum(dataset)
    return stage_guard(run_dir, checksum, dataset_record=lambda: dataset_summary(array, dataset, checksum))


def add_grid_arguments(group, defaults, fmax_help):
    """Frequency grid and sky resolution options shared by ``scan`` and ``limits``."""
    group.add_argument("--fmin", type=float, default=None, metavar="HZ",
                       help="lowest GW frequency (default 1/T_span)")
    group.add_argument("--fmax", type=float, default=None, metavar="HZ", help=fmax_help)
    group.add_argument("--oversample", type=int, default=defaults["oversample"], metavar="N",
                       help=f"frequency spacing 1/(N*T_span) (default {defaults['oversample']})")
    group.add_argument("--nside", type=int, default=defaults["nside"],
                       help=f"HEALPix resolution, a power of two; 12*nside^2 pixels (default {defaults['nside']})")
