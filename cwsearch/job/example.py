"""``runs/example.toml``, generated from the option dataclasses (issue 15 §4).

Every key of every section is written with its default *taken from the
options dataclass of its stage* (:func:`cwsearch.job.config.section_keys`), so
the example can never claim a default the code does not have. The only
values that are not defaults are those in :data:`EXAMPLE_VALUES` (the demo
dataset, catalogue and galaxies, so the file runs as it is); each of them is
labelled "example value" with the default beside it. Keys whose default is
"not set" are written commented out, with a sample value from
:data:`SAMPLES` where one helps.

Regenerate with ``python scripts/make_example_run.py`` (``--check`` compares);
``tests/test_example_run.py`` checks that the file and the dataclasses agree.

Examples
--------
>>> import tomllib
>>> from cwsearch.job.example import example_toml
>>> from cwsearch.stages.scan.stage import ScanOptions
>>> tomllib.loads(example_toml())["scan"]["nside"] == ScanOptions().nside
True
"""

from __future__ import annotations

import textwrap

from .config import STAGES, TOP_KEYS, section_keys, toml_value

HEADER = """\
# cwsearch run file: every key, with its default, explained.
#
# GENERATED from the option dataclasses by `python scripts/make_example_run.py`: do not edit by hand.
# Every value below is the code's default, except the few marked "example value" (the bundled demo
# data, so that this file runs as it is).
#
#   cwsearch run runs/example.toml            run the whole job (this file runs on the bundled demo data)
#   cwsearch run runs/example.toml --check    only validate, and print the file fully resolved
#
# Relative paths are relative to the folder holding this file. Keys you leave out take the default shown
# here. Unknown keys and wrong types are errors before any work starts. A value of "not set" is written by
# leaving the key out (TOML has no null). Section keys are the options of the matching command, with
# dashes turned into underscores: [scan] nside is `cwsearch scan --nside`.
"""

SECTION_TITLES = {"engine": "where the work runs", "noise": "noise model (docs/design.md §5)",
                  "scan": "1. all-sky F-statistic scan", "followup": "2. follow-up of candidates",
                  "hosts": "3. host galaxies", "limits": "4. upper limits"}

#: (section, key) -> explanation written above the key ("" section: top-level keys)
DOCS = {('', 'dataset'): 'dataset folder: pulsars.ecsv, residuals/NAME.ecsv, optional noise.ecsv (required)',
 ('', 'out'): 'run folder; default: runs/<name of this file> next to this file',
 ('', 'seed'): 'random seed of the whole run; each stage gets its own seed derived from it (provenance.json lists '
               'them)',
 ('', 'stages'): 'stages to run, any of "noise", "scan", "followup", "hosts", "limits" (always run in this order). A stage '
                 'left out keeps its earlier results in the run folder, and later stages may use them.',
 ('', 'title'): 'title shown at the top of report.html',
 ('', 'mjd_range'): 'plausible TOA dates [LO, HI] in MJD; TOAs outside are refused as implausible (a unit mix-up). '
                    'Default: 40000-70000 (as the stage commands\' --mjd-range)',
 ('engine', 'address'): 'Dask scheduler address, e.g. "tcp://10.0.0.5:8786" (only with kind = "dask")',
 ('engine', 'kind'): '"local": worker processes on this machine; "dask": a running Dask scheduler (needs address)',
 ('engine', 'workers'): 'local worker processes; 0 means one per CPU',
 ('followup', 'adapt_iterations'): 'adapt the temperature ladder during the first this many iterations',
 ('followup', 'checkpoint_every'): 'write the sampler checkpoint every this many iterations (a killed run resumes '
                                   'from it)',
 ('followup', 'earth_term_only'): 'drop the pulsar term (Earth term only)',
 ('followup', 'ess'): 'the sampler stops at this effective sample size (the demo uses 250; 1000 for results you '
                      'publish) ...',
 ('followup', 'evolution'): 'frequency evolution: "full", "pulsar-frequency" or "monochromatic"',
 ('followup', 'fap_threshold'): 'follow up every scan candidate whose trials-corrected analytic FAP '
                                '(candidates.ecsv column fap) is below this; candidates within one frequency bin '
                                '1/T_span of a better one are the same source and are skipped',
 ('followup', 'frequency_window'): 'prior on the GW frequency: this many bins of 1/T_span either side of the '
                                   "candidate's frequency",
 ('followup', 'max_candidates'): 'follow up at most this many candidates, best first (one sub-folder each when '
                                 'there are several)',
 ('followup', 'max_frequency'): 'upper edge of the frequency band [Hz] of an all-sky follow-up (`cwsearch '
                                'followup --all-sky`)',
 ('followup', 'max_iterations'): '... or after this many iterations',
 ('followup', 'max_temperature'): 'hottest temperature of the ladder',
 ('followup', 'max_time'): '... or after this many seconds of wall time (leave out for no limit; a time limit '
                           "makes the result depend on the machine's speed)",
 ('followup', 'phase_grid'): 'points of the pulsar-phase marginalisation grid; 0: chosen per pulsar (error < '
                             '1e-13)',
 ('followup', 'strain_prior'): 'strain prior: "log-uniform" for detection, "uniform" for upper limits',
 ('followup', 'temperatures'): "temperatures of the parallel-tempered ladder (raise if the Bayes factor's error "
                               'is large)',
 ('followup', 'walkers'): 'walkers per temperature (even, at least 18)',
 ('hosts', 'catalog'): 'galaxy catalogue, ECSV or CSV (name, ra, dec, distance [Mpc] or redshift, optional mass '
                       'proxy and EM period); leave out to skip the host stage',
 ('hosts', 'columns'): 'column-name mapping for a catalogue with other column names, e.g. '
                       '"ra=RAJ2000,dec=DEJ2000,distance=Dist"',
 ('hosts', 'completeness'): 'prior probability that the host is in the catalogue (within its distance limit)',
 ('hosts', 'distance_error'): 'fractional distance error where the catalogue gives none',
 ('hosts', 'distance_limit'): "catalogue distance limit [Mpc]; leave out for the catalogue's largest distance",
 ('hosts', 'mass_ratio_min'): 'smallest mass ratio q of the log-uniform mass-ratio prior',
 ('hosts', 'max_samples'): 'use at most this many posterior samples (random subset)',
 ('hosts', 'observed_span'): 'observed span [yr]; leave out to take it from the dataset',
 ('hosts', 'period_factor'): 'EM period = period_factor x orbital period (1: the EM period is the orbital period '
                             '2/f_gw; 0.5: the GW period)',
 ('hosts', 'relation'): 'black-hole mass - bulge mass relation: "mcconnell-ma" or "kormendy-ho"',
 ('hosts', 'resolution'): 'sky resolution [deg, 1 sigma] for a scan candidate without an Fe map',
 ('hosts', 'sky_bandwidth'): "sky kernel bandwidth [deg]; leave out for Scott's rule",
 ('hosts', 'sky_map'): "Fe sky map (ECSV with pixel, fe) for a scan candidate; leave out to use the scan's own",
 ('hosts', 'top'): 'rows in the printed table and hosts in the chirp-mass plot (at most 6 there)',
 ('limits', 'catalog'): '... and for these galaxies of a catalogue (ECSV or CSV)',
 ('limits', 'fmax'): 'highest GW frequency [Hz]; leave out for min(1e-7, 1/(2 x median TOA spacing))',
 ('limits', 'fmin'): 'lowest GW frequency [Hz]; leave out for 1/T_span',
 ('limits', 'galaxy'): 'chirp-mass limits for galaxies given by hand: [name, ra [deg], dec [deg], distance '
                       '[Mpc]], ...',
 ('limits', 'mcmc_check'): 'also sample the posterior at this pixel (sky frequency) and compare it with the '
                           'quadrature limit',
 ('limits', 'method'): '"bayes" (quadrature posterior, uniform strain prior), "frequentist" (Fe-based) or "both"',
 ('limits', 'no_plots'): 'skip the PNG plots',
 ('limits', 'nside'): 'HEALPix resolution of the sky map, a power of two (12 nside^2 pixels)',
 ('limits', 'oversample'): 'frequency spacing 1/(oversample x T_span)',
 ('limits', 'quadrature'): 'angle-grid size of the Bayesian quadrature: "fast", "standard" or "fine"',
 ('limits', 'select'): '',
 ('limits', 'sky_frequency'): 'frequency [Hz] of sky_limits.ecsv and the sky map; leave out for the most '
                              'sensitive frequency',
 ('noise', 'model'): 'the noise model every stage uses: "estimate" (fit it from the residuals in the noise stage, the '
                     'first stage; a fit of the same dataset in RUN_DIR/noise/ is reused), "dataset" (the values of '
                     'the dataset files with the keys above, fixed) or the path of a noise table (noise_model.ecsv)',
 ('noise', 'common_correlation'): 'correlation of the common process between pulsars: "hellings-downs", '
                                  '"uncorrelated" or "none"',
 ('noise', 'common_components'): 'Fourier frequencies of the common process (at most red_components; not set: the '
                                 'same as red_components)',
 ('noise', 'fit_common'): 'the noise fit (model = "estimate"): fit a common red process',
 ('noise', 'fixed_common_index'): 'the common spectral index, fixed (13/3: a background of circular binaries; a '
                                  'fitted index can absorb a loud binary into the noise model)',
 ('noise', 'free_common_index'): 'fit the common index as well, within [0.5, 7]',
 ('noise', 'red_noise_threshold'): '2 dlnL (white + red against white only) needed to claim red noise in a pulsar',
 ('noise', 'min_toas_red'): 'pulsars with fewer TOAs are fitted with white noise only (with a warning)',
 ('noise', 'starts'): 'optimiser starts per fit',
 ('noise', 'iterations'): 'extra rounds of (common fit, pulsar refit)',
 ('noise', 'upper_limits'): '95 % amplitude upper limits (prior uniform in amplitude)',
 ('noise', 'contour_points'): 'grid points per axis of the common-process likelihood plot',
 ('noise', 'no_plots'): 'skip the noise-stage plots (PNG)',
 ('noise', 'common_index'): 'spectral index gamma of the common process (13/3: a background of circular binaries)',
 ('noise', 'common_log10_amplitude'): 'log10 amplitude of a common red process added to every pulsar; leave the '
                                      'key out for none',
 ('noise', 'pulsar_red_noise'): 'use the per-pulsar red noise given in the dataset',
 ('noise', 'red_components'): 'Fourier frequencies k/T_span, k = 1..red_components, for red processes',
 ('noise', 'white_noise_factors'): "apply the dataset's per-backend white-noise factors (noise.ecsv sigma_scale, "
                                   'sigma_added)',
 ('scan', 'fap_threshold'): 'list candidates whose trials-corrected FAP is below this (the loudest is always '
                            'listed)',
 ('scan', 'fmax'): 'highest frequency [Hz]; leave out for 1/(2 x median TOA spacing), at most 1e-6 Hz',
 ('scan', 'fmin'): 'lowest frequency [Hz]; leave out for 1/T_span',
 ('scan', 'max_candidates'): 'at most this many rows in scan/candidates.ecsv',
 ('scan', 'merge_angle'): 'peaks closer than this [deg] and within one frequency bin 1/T_span are one candidate',
 ('scan', 'no_plots'): 'skip the PNG plots',
 ('scan', 'nside'): 'HEALPix sky resolution, a power of two: 12 nside^2 pixels',
 ('scan', 'null_sims'): 'noise-only scans of the same array for an empirical false-alarm probability (0: analytic '
                        'FAP only)',
 ('scan', 'oversample'): 'frequency spacing 1/(oversample x T_span)',
 ('scan', 'statistic'): '"fe" (Earth-term sky scan), "fp" (pulsar-term, no sky) or "both"'}

DOCS.update({
    ("followup", "plots"): "draw the corner, sky and trace plots",
    ("hosts", "no_plots"): "skip the PNG plots",
    ("scan", "fmax"): "highest frequency [Hz]; leave out for 1/(2 x median TOA spacing), at most 1e-6 Hz",
    ("limits", "fmax"): "highest GW frequency [Hz]; leave out for min(1e-7, 1/(2 x median TOA spacing)): lower "
                        "than the scan's default because every limit frequency costs a quadrature over every "
                        "sky pixel (the limits stage prints this reason)",
})

#: (section, key) -> a sample value (TOML text) for keys whose default is "not set"
SAMPLES = {("", "mjd_range"): "[30000.0, 80000.0]", ("scan", "fmax"): "1.0e-7", ('followup', 'max_time'): '3600.0',
 ('hosts', 'columns'): '"ra=RAJ2000,dec=DEJ2000"',
 ('hosts', 'distance_limit'): '300.0',
 ('hosts', 'observed_span'): '12.5',
 ('hosts', 'sky_bandwidth'): '2.0',
 ('hosts', 'sky_map'): '"my_fe_map.ecsv"',
 ('limits', 'fmax'): '1.0e-7',
 ('limits', 'fmin'): '2.5e-9',
 ('limits', 'mcmc_check'): '10',
 ('limits', 'sky_frequency'): '1.0e-8',
 ('noise', 'common_log10_amplitude'): '-14.7',
 ('scan', 'fmin'): '2.5e-9'}

#: (section, key) -> value that is NOT the default, so that the example runs on the bundled demo data
EXAMPLE_VALUES = {
    ("", "dataset"): "../cwsearch/data/demo",
    ("", "out"): "example",
    ("", "title"): "Example run on the invented demo data",
    ("hosts", "catalog"): "../catalogs/demo_galaxies.ecsv",
    ("limits", "galaxy"): [["MYGAL-1", 150.0, -20.0, 25.0]],
    ("limits", "catalog"): "../catalogs/demo_galaxies.ecsv",
    ("limits", "select"): ["SIMGAL-01187", "SIMGAL-00009"],
}


def _rule(title):
    return f"# {'-' * 64} {title}"


def _comment_lines(text):
    return [f"# {line}" for line in textwrap.wrap(text, 104)] if text else []


def example_toml() -> str:
    """The text of ``runs/example.toml``: every key with its dataclass default (see the module docstring)."""
    lines = [HEADER.rstrip("\n"), "", _rule("the run")]

    def emit(section, name, default):
        doc = DOCS.get((section, name), "")
        if (section, name) in EXAMPLE_VALUES:
            value = EXAMPLE_VALUES[(section, name)]
            shown = "not set" if default is None or default == "" or default == () or default == [] else \
                toml_value(default)
            doc = (doc + " " if doc else "") + f"[example value; default: {shown}]"
            lines.extend(_comment_lines(doc))
            lines.append(f"{name} = {toml_value(value)}")
            return
        lines.extend(_comment_lines(doc))
        if default is None:
            sample = SAMPLES.get((section, name))
            lines.append(f"# {name} = {sample}" if sample else f"# {name} is not set by default")
        else:
            lines.append(f"{name} = {toml_value(default)}")

    for name, key in TOP_KEYS.items():
        default = None if key.required else key.default
        emit("", name, default)
    for section in dict.fromkeys(("engine", "noise") + tuple(STAGES)):  # the noise stage shares [noise]
        keys = section_keys(section)
        if keys is None:
            continue
        lines += ["", _rule(SECTION_TITLES.get(section, section)), f"[{section}]"]
        for name, key in keys.items():
            emit(section, name, key.default)
        if section == "limits":
            lines.append("# (the limits' worker processes or Dask scheduler come from [engine])")
    return "\n".join(lines) + "\n"


__all__ = ["example_toml", "EXAMPLE_VALUES", "DOCS", "SAMPLES"]
