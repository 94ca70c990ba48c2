"""``cwsearch noise``: estimate the noise model from the residuals (thin wrapper over
:func:`cwsearch.stages.noise.stage.run_noise`)."""

from __future__ import annotations

import json

from ..core.options import add_options, options_from_args as build_options
from ..physics.noise_settings import NoiseSettings
from ..stages.noise.options import NoiseOptions
from ._common import add_dataset_arguments, load_array, run_folder_guard

DESCRIPTION = """\
Fit the noise model from the residuals alone and write RUN_DIR/noise/:
white noise per pulsar and backend (sigma_scale, sigma_added, as in
noise.ecsv), power-law red noise per pulsar with a model choice (likelihood
ratio 2 dlnL against --red-noise-threshold), and a common red process
(log10 amplitude, index). Method: the exact timing-model-marginalised
likelihood maximised from several starts; uncertainties from the Hessian
and, for red amplitudes, a profile-likelihood interval. No log-uniform
priors: detection is a likelihood ratio, and 95% upper limits use a prior
uniform in amplitude.

Outputs: noise_model.ecsv (one row per pulsar and backend, units and
method in the header), summary.json (every value with its uncertainty,
bounds, model choices, goodness of fit, warnings, dataset checksum),
spectra.png and common_likelihood.png. Every later stage of the same run
folder uses this model by default (--noise-model estimate) when it was
fitted on the same dataset."""

EXAMPLE = """\
  cwsearch noise mydata --out runs/first
  cwsearch noise mydata --out runs/first --fixed-common-index 4.333 --red-noise-threshold 12
  cwsearch scan mydata --out runs/first          (uses runs/first/noise/noise_model.ecsv)"""


def add_arguments(parser):
    add_dataset_arguments(parser)
    # the noise command always fits (model 'estimate'); of the noise settings it uses the Fourier basis size
    add_options(parser, NoiseSettings, include=("red_components",), group="noise fit")
    add_options(parser, NoiseOptions, exclude=("model",))   # names, defaults and help: the fields of NoiseOptions


def options_from_args(args):
    """:class:`cwsearch.stages.noise.options.NoiseOptions` from parsed arguments (model: ``estimate``)."""
    return build_options(NoiseOptions, args, exclude=("model",), model="estimate").validate()


def format_fit(summary) -> str:
    """The fitted model as a plain-text table."""
    lines = [f"{'pulsar':<12} {'backend':<8} {'scale':>12} {'added [ns]':>14} {'red':>5} {'2dlnL':>7} "
             f"{'log10 A_red':>14} {'index':>10} {'GoF':>4}"]
    for p in summary["pulsars"]:
        red = p["red_noise"]
        gof = p["goodness_of_fit"]
        for i, (b, w) in enumerate(p["white"].items()):
            first = i == 0
            amp = f"{red['log10_amplitude']:.2f}±{red['log10_amplitude_err']:.2f}" if first and red["claimed"] else ""
            idx = f"{red['index']:.2f}±{red['index_err']:.2f}" if first and red["claimed"] else ""
            lines.append(f"{p['name'] if first else '':<12} {b:<8} "
                         f"{w['sigma_scale']:>6.3f}±{w['sigma_scale_err']:<5.3f} "
                         f"{w['sigma_added_s'] * 1e9:>7.1f}±{w['sigma_added_err_s'] * 1e9:<6.1f} "
                         f"{('yes' if red['claimed'] else 'no') if first else '':>5} "
                         f"{format(red['statistic'], '7.1f') if first else '':>7} {amp:>14} {idx:>10} "
                         f"{('FAIL' if gof and gof['flagged'] else 'ok') if first else '':>4}")
    c = summary["common"]
    if c:
        lines.append(f"common process ({c['correlation']}): log10 A = {c['log10_amplitude']:.2f} ± "
                     f"{c['log10_amplitude_err']:.2f}, index = {c['index']:.2f} ± {c['index_err']:.2f}, "
                     f"2 dlnL against zero amplitude = {c['statistic']:.1f}")
        cmp = c.get("correlated_vs_uncorrelated")
        if cmp:
            lines.append(f"  correlated vs uncorrelated: 2 dlnL = {cmp['statistic']:.2f}")
    a = summary["array_low_frequency"]
    lines.append(f"array low-frequency excess: p = {a['pvalue']:.2g}" + ("  (FLAGGED)" if a["flagged"] else ""))
    return "\n".join(lines)


def run(args) -> int:
    # lazy: keeps `cwsearch COMMAND --help` fast
    from ..data.dataset import dataset_checksum
    from ..job.pipeline import stage_seed
    from ..stages.noise.stage import run_noise

    options = options_from_args(args)
    noise = build_options(NoiseSettings, args)   # checks --red-components (an integer in 0..1000)
    array = load_array(args)
    with run_folder_guard(args.out, array, args.dataset):   # lock, .part clean-up, same dataset as the folder
        result = run_noise(array, args.out, options, noise=noise,
                           seed=stage_seed(args.seed, "noise"), progress=not args.quiet and not args.json,
                           dataset_checksum=dataset_checksum(args.dataset))
    summary = result.summary
    if args.json:
        print(json.dumps(summary, indent=2))
        return 0
    if not args.quiet:
        print(format_fit(summary))
        print(f"{summary['n_red_noise']} of {summary['n_pulsars']} pulsars with red noise; "
              f"{summary['n_failed_goodness_of_fit']} fail the goodness of fit; {summary['seconds']:.1f} s")
        print(f"outputs in {result.files['table'].parent}")
    return 0


__all__ = ["DESCRIPTION", "EXAMPLE", "add_arguments", "run", "options_from_args", "format_fit"]
