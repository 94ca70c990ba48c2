"""Options shared by the stage commands: dataset, output folder, seed, quiet, noise model."""

from __future__ import annotations

from ..core.options import add_options, options_from_args
from ..physics.noise_settings import NoiseSettings
from ..stages.noise.options import NoiseOptions


def add_noise_model_argument(parser):
    """``--noise-model estimate|dataset|FILE`` (the ``[noise] model`` field of the noise stage's options)."""
    add_options(parser, NoiseOptions, include=("model",))


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
    """Noise-model options (docs/design.md §5): ``--noise-model`` and every field of
    :class:`~cwsearch.physics.noise_settings.NoiseSettings` (the run file's ``[noise]`` keys)."""
    add_noise_model_argument(parser)
    add_options(parser, NoiseSettings)


def noise_settings(args):
    """:class:`~cwsearch.physics.noise_settings.NoiseSettings` from parsed noise options (options not on
    this command line take their defaults)."""
    return options_from_args(NoiseSettings, args)


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
    from ..job.runfolder import check_out_of_dataset, stage_guard

    if dataset is None:
        return stage_guard(run_dir)
    check_out_of_dataset(run_dir, dataset)
    checksum = dataset_checksum(dataset)
    return stage_guard(run_dir, checksum, dataset_record=lambda: dataset_summary(array, dataset, checksum))
