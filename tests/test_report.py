"""The self-contained HTML report.

Checks: the page parses with html5lib in strict mode (the WHATWG HTML parsing
algorithm: any parse error raises) and with Python's ``html.parser``; every section
is present; every PNG of every stage folder is embedded as a base64 data URI
whose bytes are exactly the file (PNG signature from the PNG specification,
W3C/ISO 15948); nothing refers to the network. If Chromium is installed the
page is also rendered headless (skipped cleanly otherwise).
"""

from __future__ import annotations

import base64
import json
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from cwsearch.job.report import SECTIONS, build_report

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


class PageParser(HTMLParser):
    """Collects section ids, images, links and text."""

    def __init__(self):
        super().__init__()
        self.sections, self.images, self.links, self.scripts, self.text = [], [], [], [], []
        self.alts = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "section":
            self.sections.append(a.get("id"))
        if tag == "img":
            self.images.append(a.get("src", ""))
            self.alts.append(a.get("alt", ""))
        if tag in ("a", "link") and "href" in a:
            self.links.append(a["href"])
        if tag in ("script", "iframe", "object", "embed"):
            self.scripts.append(a)
        for key, value in a.items():
            if key in ("src", "href", "srcset", "data") and value and "://" in value.split(",")[0]:
                self.links.append(value)

    def handle_data(self, data):
        self.text.append(data)


def parse(path):
    parser = PageParser()
    parser.feed(Path(path).read_text(encoding="utf-8"))
    parser.close()
    parser.joined = " ".join(parser.text)
    return parser


def _png(path, seed):
    from cwsearch.core.plotting import pyplot, save_figure

    plt = pyplot()
    fig, ax = plt.subplots(figsize=(2, 1.5))
    ax.plot(np.random.default_rng(seed).standard_normal(10))
    save_figure(fig, path)


def _table(path, **cols):
    from astropy.table import Table

    from cwsearch.core.fileio import write_table_atomic

    write_table_atomic(path, Table(cols))


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory):
    """A complete invented run folder (dummy numbers, real file formats of docs/design.md §11)."""
    run = tmp_path_factory.mktemp("report") / "run"
    for stage in ("scan", "followup", "hosts", "limits"):
        (run / stage).mkdir(parents=True)
    _png(run / "scan" / "spectrum.png", 1)
    _png(run / "scan" / "sky_map.png", 2)
    (run / "followup" / "candidate_1").mkdir()
    _png(run / "followup" / "candidate_1" / "corner.png", 3)
    _png(run / "followup" / "candidate_1" / "trace.png", 4)
    _png(run / "hosts" / "hosts_sky.png", 5)
    _png(run / "limits" / "frequency_limits.png", 6)
    _png(run / "limits" / "sky_limits.png", 7)
    _png(run / "dataset.png", 8)
    _png(run / "scan" / ".hidden.png", 9)  # hidden files are not part of the results
    _table(run / "scan" / "candidates.ecsv", frequency=[1.2e-8, 3e-8], ra=[141.0, 20.0], dec=[-27.5, 5.0],
           fe=[60.0, 9.0], fap=[1e-9, 0.4])
    _table(run / "scan" / "spectrum.ecsv", frequency=[1e-8, 2e-8], fe_max=[3.0, 4.0], fp=[40.0, 41.0])
    _table(run / "hosts" / "ranking.ecsv", name=["GALX0001", "GALX0002"], ra=[141.1, 140.0], dec=[-27.4, -26.0],
           probability=[0.2, 0.7], n_effective=[40.0, 2.1])
    # chirp-mass limits of two galaxies at three frequencies each: the preview shows one row per galaxy
    _table(run / "limits" / "galaxy_limits.ecsv", name=["GALA"] * 3 + ["GALB"] * 3, ra=[10.0] * 3 + [20.0] * 3,
           dec=[5.0] * 6, distance=[16.0] * 3 + [80.0] * 3, frequency=[5e-9, 1e-8, 2e-8] * 2,
           strain_95=[3e-14, 1e-14, 2e-14] * 2, chirp_mass_95=[3e9, 1e9, 2e9, 9e9, 7e9, 8e9])
    _table(run / "limits" / "frequency_limits.ecsv", frequency=[5e-9, 1e-8, 2e-8], strain_95=[3e-14, 1e-14, 2e-14])
    # follow-up of several candidates: a top summary with lists, one sub-folder per candidate
    (run / "followup" / "summary.json").write_text(json.dumps({
        "targets": ["candidate_1"], "log_bayes_factor": [55.2], "log_bayes_factor_error": [1.8],
        "effective_sample_size": [600.0], "folders": [str(run / "followup" / "candidate_1")]}))
    (run / "followup" / "candidate_1" / "summary.json").write_text(json.dumps({
        "target": "candidate_1", "log_bayes_factor": 55.2, "log_bayes_factor_error": 1.8,
        "effective_sample_size": 600.0, "stopped_by": "ess", "iterations": 3000,
        "swap_acceptance": [0.0055, 0.3], "temperatures": [1.0, 2.0, 4.0],
        "start": {"frequency": 1.2e-8, "candidate_row": {"rank": 1.0}},
        "background_comparison": {"run_model": "hellings-downs", "n_samples": 400,
                                  "log_bayes_factor": {"hellings-downs": 55.2, "uncorrelated": 61.9},
                                  "importance_effective_sample_size": 180.0, "reweighting_error": 0.4},
        "sky": {"ra": 140.0, "dec": -28.0, "radius_90_deg": 5.0, "credible_area_90_deg2": 80.0, "map_nside": 32,
                "pixel_area_deg2": 3.36},
        "parameters": {"frequency": {"median": 1.2e-8, "interval_90": [1.19e-8, 1.21e-8], "unit": "Hz"},
                       "inclination": {"median": 1.1, "interval_90": [0.5, 1.5], "unit": "rad"}}}))
    for stage, summary in {"scan": {"n_frequencies": 40, "nside": 4}, "followup": {"candidates": 1},
                           "hosts": {"galaxies": 2}, "limits": {"n_frequencies": 3}}.items():
        (run / stage / ".stage.json").write_text(json.dumps({"stage": stage, "status": "complete",
                                                             "summary": summary}))
    data = run.parent / "data" / "demo"
    data.mkdir(parents=True)
    (data / "injection.json").write_text(json.dumps({"binaries": [{
        "ra": 141.0, "dec": -27.5, "gw_frequency": 1.2e-8, "chirp_mass": 2e9, "strain": 1.2e-14,
        "inclination": 1.0, "polarization": 0.6, "phase": 2.0, "optimal_snr": 15.0}]}))
    (run / "dataset.json").write_text(json.dumps({
        "path": str(data), "checksum": "0" * 64, "n_pulsars": 1, "n_toas": 10, "span_yr": 12.5,
        "pulsars": [{"name": "SIMPSR01", "ra_deg": 10.0, "dec_deg": -5.0, "distance_kpc": 1.0,
                     "distance_err_kpc": 0.1, "n_toas": 10, "span_yr": 12.5, "backends": ["RCVR1"],
                     "median_sigma_ns": 100.0, "red_noise": {"log10_amplitude": -14.0, "index": 3.0}}]}))
    (run / "provenance.json").write_text(json.dumps({"seed": 1, "started": "2026-01-01T00:00:00+00:00",
                                                     "versions": {"numpy": "2.0"}, "host": "h", "cpu_count": 2}))
    from cwsearch.job.pipeline import headline_result

    (run / "summary.json").write_text(json.dumps({"headline": headline_result(run), "stages": [
        {"stage": s, "status": "ran", "seconds": 1.0, "reason": ""} for s in ("scan", "followup", "hosts", "limits")]}))
    (run / "run.toml").write_text('title = "Test <run> & co"\n[followup]\nfap_threshold = 0.01\n')
    return run


def test_every_section_and_every_image(run_folder):
    path = build_report(run_folder)
    page = parse(path)
    assert page.sections == [sid for sid, _ in SECTIONS]
    pngs = sorted(p for p in run_folder.rglob("*.png") if not p.name.startswith("."))
    assert len(page.images) == len(pngs) == 8
    embedded = []
    for src in page.images:
        assert src.startswith("data:image/png;base64,")
        data = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert data.startswith(PNG_SIGNATURE)
        embedded.append(data)
    assert sorted(embedded) == sorted(p.read_bytes() for p in pngs)  # byte-exact, each once


def test_strict_html5_parse(run_folder):
    """html5lib's strict parser raises on any parse error of the WHATWG HTML algorithm."""
    import html5lib

    text = build_report(run_folder).read_text(encoding="utf-8")
    doc = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(text)
    assert doc.find("head/title").text == "Test <run> & co"
    tables = doc.findall(".//table[@class='sortable']")
    assert tables and all(t.find("thead/tr/th") is not None for t in tables)
    # every sortable table sits in a scrolling box (wide tables are never clipped)
    parents = {c: p for p in doc.iter() for c in p}
    assert all(parents[t].get("class") == "scroll" for t in tables)


def test_page_is_self_contained(run_folder):
    page = parse(build_report(run_folder))
    assert all(not a.get("src") for a in page.scripts)  # only the inline table-sorting script
    assert [a for a in page.scripts if a] == [] and len(page.scripts) == 1
    assert all(link.startswith("#") for link in page.links), page.links
    text = (run_folder / "report.html").read_text()
    assert "http://" not in text and "https://" not in text and "@import" not in text


def test_content_of_the_sections(run_folder):
    page = parse(build_report(run_folder))
    text = page.joined
    html_text = (run_folder / "report.html").read_text()
    assert "Test <run> & co" in text  # title escaped in the source, shown as written
    assert "<run>" not in html_text
    assert "SIMPSR01" in text and "GALX0002" in text
    assert "55.2" in text and "± 1.8" in text  # Bayes factor and its error
    # first screen: the questions answered in words, with the posterior position and the truth beside it
    for question in ("Is there a binary?", "Where?", "Which host?", "What limits?"):
        assert question in text
    assert "ra 140.0°, dec -28.0° (posterior mean direction; 90 % credible area 80 deg²)" in text
    assert "(truth ra 141.0°, dec -27.5°)" in text and "(truth 12 nHz)" in text
    assert "GALX0002, probability 0.7 from 2.1 effective posterior samples" in text
    assert "10 nHz" in text and "1e-14" in text  # most sensitive frequency and its limit
    assert "(truth: h0 = 1.2e-14 at 12 nHz, where the limit is 1.2e-14)" in text  # the h ∝ f line, as below
    # warnings on the first screen: cold-chain swaps, few effective host samples
    first = html_text[html_text.index('<section id="headline">'):html_text.index('<section id="dataset">')]
    assert "cold-chain swap acceptance 0.0055" in first and "2.1 effective posterior samples" in first
    # posterior table: frequency in nHz, angles in degrees (1.1 rad = 63.0°), truth column
    assert "11.9" in text and "12.1" in text and "63.0" in text and "truth (injection.json)" in text
    # human labels with units, not raw column names
    assert "GW frequency" in text and "[Hz]" in text and "host probability" in text
    # galaxy-limits preview: one row per galaxy with its tightest limit (1e9 at 1e-8 Hz for GALA)
    assert text.count("GALA") == 1 and text.count("GALB") == 1 and "1e+09" in text and "7e+09" in text
    # issue 15: every estimate lists the truth beside it. Sky: the truth (141.0, -27.5) lies 1.016° from the
    # posterior mean direction (140.0, -28.0) (spherical law of cosines, evaluated independently of the report)
    assert "truth (injection.json) ra 141.00°, dec -27.50°, 1.02° from the mean direction" in text
    assert "inside the 90 % radius" in text
    # hosts: a shaded truth row with the injected position
    hosts = html_text[html_text.index('<section id="hosts">'):html_text.index('<section id="limits">')]
    assert '<tr class="truth">' in hosts and "141.00" in hosts
    # limits: the injected strain 1.2e-14 at 12 nHz beside the limit there; the limits (1e-14 at 10 nHz,
    # 2e-14 at 20 nHz) lie on h ∝ f, a straight line in log-log, so log-log interpolation gives 1.2e-14 at 12 nHz
    assert "Truth (injection.json): strain amplitude h0 = 1.2e-14 at 12 nHz" in text
    assert "the sky-averaged 95 % limit there is 1.2e-14" in text
    # issue 14: the Bayes factor under both backgrounds side by side, human labels, and which one decides
    assert "Hellings–Downs-correlated background" in text and "uncorrelated common background" in text
    # the reweighted figure carries the sampled error and the reweighting one: sqrt(1.8² + 0.4²) = 1.84; their
    # difference only the reweighting one (ln B_unc - ln B_HD = ln mean(w)): 61.9 - 55.2 = 6.70 ± 0.4
    assert "61.90 ± 1.84" in text and "55.20 ± 1.80" in text and "importance ESS 180 of 400" in text
    assert "Difference (uncorrelated minus Hellings–Downs): 6.70 ± 0.4" in text
    assert "The Hellings–Downs row decides" in text and "the binary is preferred" in text
    # the noise-model section is there even without a noise stage
    assert "noise/summary.json" in text
    # run-specific cautions: invented demo data, large evidence error, few effective samples
    assert "invented" in text and "thermodynamic-integration error" in text and "600 effective" in text


def test_noise_section_renders_a_noise_summary(run_folder, tmp_path):
    import shutil as sh

    run = tmp_path / "run"
    sh.copytree(run_folder, run)
    (run / "noise").mkdir()
    (run / "noise" / "summary.json").write_text(json.dumps({
        "source": "fitted <here>", "pulsars": [{"name": "SIMPSR01", "white_factor": 1.05, "p_value": 0.4}]}))
    text = parse(build_report(run)).joined
    assert "fitted <here>" in text and "white factor" in text and "1.05" in text


def test_missing_stages_are_explained(tmp_path):
    run = tmp_path / "empty_run"
    run.mkdir()
    (run / "summary.json").write_text(json.dumps({"headline": {}, "stages": [
        {"stage": "followup", "status": "unavailable", "reason": "stage not available: cwsearch.stages.followup.stage"}]}))
    page = parse(build_report(run))
    assert page.sections == [sid for sid, _ in SECTIONS]
    assert "stage not available: cwsearch.stages.followup.stage" in page.joined
    assert page.images == []


def test_renders_in_headless_chromium(run_folder, tmp_path):
    exe = next((shutil.which(n) for n in ("chromium", "chromium-browser", "google-chrome")
                if shutil.which(n)), None)
    if exe is None and Path("/usr/bin/chromium").exists():
        exe = "/usr/bin/chromium"
    if exe is None:
        pytest.skip("Chromium not installed: the HTML checks above still ran")
    path = build_report(run_folder)
    shot = tmp_path / "shot.png"
    proc = subprocess.run([exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-network-access",
                           f"--screenshot={shot}", "--window-size=1200,3000", path.as_uri()],
                          capture_output=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert shot.read_bytes().startswith(PNG_SIGNATURE)
    dom = subprocess.run([exe, "--headless", "--no-sandbox", "--disable-gpu", "--dump-dom", path.as_uri()],
                         capture_output=True, timeout=120, text=True)
    assert 'id="cautions"' in dom.stdout and dom.stdout.count("<img") == 8


def test_background_comparison_names_the_deciding_model():
    """Support only without the Hellings–Downs correlations is the background, not a binary (a nanohertz
    background is correlated by the Hellings & Downs 1983 curve; common practice, no source)."""
    from cwsearch.job.report import background_comparison_view

    table, text = background_comparison_view({"log_bayes_factor_error": 0.3, "background_comparison": {
        "run_model": "hellings-downs", "log_bayes_factor": {"hellings-downs": -0.7, "uncorrelated": 4.2},
        "n_samples": 300, "importance_effective_sample_size": 9.0, "reweighting_error": 1.1,
        "warning": "importance ESS 9 of 300 samples: unreliable"}})
    labels = [row["cells"][0]["text"] for row in table["rows"]]
    assert labels == ["Hellings–Downs-correlated background", "uncorrelated common background (pulsars independent)"]
    assert [row["cells"][2]["text"] for row in table["rows"]] == ["background alone preferred", "binary preferred"]
    joined = " ".join(text)
    assert "not a binary candidate" in joined and "Warning: importance ESS 9 of 300" in joined
    # without a common process there is nothing to compare: one row and the stage's note
    table, text = background_comparison_view({"background_comparison": {
        "run_model": "none", "log_bayes_factor": {"none": 3.0}, "note": "no common process in the noise model"}})
    assert len(table["rows"]) == 1 and "Only one background model" in " ".join(text)
    assert background_comparison_view({}) == (None, [])


def test_noise_table_lists_the_true_noise(run_folder, tmp_path):
    """Fitted noise per pulsar with the true noise of injection.json beside it (issue 15: every estimate
    lists the truth); the common process with the injected background."""
    import shutil as sh

    run = tmp_path / "run"
    sh.copytree(run_folder, run)
    data = tmp_path / "data"
    sh.copytree(run_folder.parent / "data", data)
    dataset = json.loads((run / "dataset.json").read_text())
    dataset["path"] = str(data / "demo")
    (run / "dataset.json").write_text(json.dumps(dataset))
    injection = json.loads((data / "demo" / "injection.json").read_text())
    injection["true_noise"] = {"SIMPSR01": {"white": {"RCVR1": {"sigma_scale": 1.3, "sigma_added": 0.0}},
                                            "red": {"log10_amplitude": -14.1, "index": 3.5}}}
    injection["background"] = {"log10_amplitude": -14.5, "index": 13 / 3, "components": 30}
    (data / "demo" / "injection.json").write_text(json.dumps(injection))
    (run / "noise").mkdir()
    (run / "noise" / "summary.json").write_text(json.dumps({
        "common": {"log10_amplitude": -14.4, "log10_amplitude_err": 0.2, "index": 13 / 3},
        "pulsars": [{"name": "SIMPSR01", "white": {"RCVR1": {"sigma_scale": 1.27, "sigma_scale_err": 0.04}},
                     "red_noise": {"model": "white + red", "claimed": True, "log10_amplitude": -14.2,
                                   "log10_amplitude_err": 0.3, "index": 3.3, "index_err": 0.6},
                     "goodness_of_fit": {"flagged": False}}]}))
    text = parse(build_report(run)).joined
    assert "red log10 amplitude" in text and "-14.2 ± 0.3" in text and "3.3 ± 0.6" in text
    assert "true red noise (injection.json)" in text and "log10 A -14.1, index 3.5" in text
    assert "RCVR1: 1.27 ± 0.04" in text and "RCVR1: 1.3" in text
    assert "log10 amplitude -14.5, index 4.33" in text


def _captured(monkeypatch, *modules):
    """Replace save_figure in ``modules`` so that the figures are kept for inspection (and closed later)."""
    figures = []
    for module in modules:
        monkeypatch.setattr(module, "save_figure", lambda fig, path: figures.append(fig))
    return figures


def _truth_artists(fig):
    """Artists labelled as the truth, across every axes and legend of ``fig``."""
    found = []
    for ax in fig.axes:
        for artist in list(ax.lines) + list(ax.collections):
            label = str(artist.get_label())
            if "injection.json" in label or label.startswith("true"):
                found.append(artist)
    return found


def test_report_figures_overplot_the_truth(monkeypatch):
    """Issue 15: the scan spectrum, the dataset sky and the galaxy chirp-mass limits draw the injected binary
    at its true values (frequency, position, chirp mass); invented inputs, the check is the position drawn."""
    from astropy.table import Table

    import cwsearch.data.plots as data_plots
    import cwsearch.stages.limits.plots as limits_plots
    import cwsearch.stages.scan.plots as scan_plots
    from cwsearch.core.plotting import _wrap_ra, pyplot

    truth = {"ra": 141.0, "dec": -27.5, "frequency": 1.2e-8, "chirp_mass": 2e9, "strain": 1.2e-14}
    figures = _captured(monkeypatch, data_plots, limits_plots, scan_plots)
    spectrum = Table({"frequency": [5e-9, 1e-8, 2e-8], "fe_max": [3.0, 9.0, 4.0], "fp": [40.0, 41.0, 39.0]})
    candidates = Table({"frequency": [1e-8], "fe": [9.0]})
    scan_plots.spectrum_plot("x.png", spectrum, candidates, {"fe": [("t", 8.0)], "fp": [("t", 50.0)]}, truth=truth)
    lines = _truth_artists(figures[-1])
    assert len(lines) == 2 and all(np.allclose(line.get_xdata(), 1.2e-8, rtol=1e-12) for line in lines)
    galaxies = Table({"name": ["GALA", "GALA"], "distance": [16.0, 16.0], "frequency": [5e-9, 2e-8],
                      "chirp_mass_95": [3e9, 1e9]})
    limits_plots.galaxy_plot("y.png", galaxies, truth)
    (points,) = _truth_artists(figures[-1])
    assert np.allclose(points.get_offsets(), [[12.0, 2e9]], rtol=1e-12)
    monkeypatch.setattr(data_plots, "injected_binary", lambda array: truth)
    from conftest import make_tiny_array

    data_plots.dataset_overview(make_tiny_array(), "z.png")
    (points,) = _truth_artists(figures[-1])
    assert np.allclose(points.get_offsets(), [[_wrap_ra(np.radians(141.0)), np.radians(-27.5)]], rtol=1e-12)
    for fig in figures:
        pyplot().close(fig)


def test_noise_figures_overplot_the_true_noise(monkeypatch):
    """The common-process likelihood map marks the injected background; the per-pulsar power spectra draw the
    true red noise as a power law P(f) of the injected amplitude and index (invented inputs)."""
    from types import SimpleNamespace

    import cwsearch.stages.noise.plots as noise_plots
    from cwsearch.core.plotting import pyplot

    figures = _captured(monkeypatch, noise_plots)
    truth = {"background": {"log10_amplitude": -14.5, "index": 13 / 3}, "pulsars": {}}
    common = SimpleNamespace(log10_amplitude=-14.4, log10_amplitude_err=0.1, index=13 / 3, index_err=0.3,
                             index_fixed=False, log_likelihood=0.0, statistic=12.0)
    fit = SimpleNamespace(common=common, bounds=SimpleNamespace(common_log10_amplitude=(-18.0, -11.0),
                                                                common_index=(0.0, 7.0)))
    noise_plots.common_contour_plot("c.png", lambda a, g: -0.5 * ((a + 14.4) / 0.1) ** 2 - 0.5 * (g - 4.3) ** 2,
                                    fit, 6, "hellings-downs", truth=truth)
    (points,) = _truth_artists(figures[-1])
    assert np.allclose(points.get_offsets(), [[-14.5, 13 / 3]], rtol=1e-12)
    for fig in figures:
        pyplot().close(fig)


def test_joint_section_lists_every_source(run_folder, tmp_path):
    """The joint follow-up section (followup/joint/summary.json): one subsection per source with its
    joint-posterior table and corner plot; strict html5lib parse; the joint figures are not repeated in the
    follow-up section; the truth column only for the source whose frequency window holds the injection."""
    import html5lib

    run = tmp_path / "run"
    shutil.copytree(run_folder, run)
    joint = run / "followup" / "joint"
    joint.mkdir()
    _png(joint / "corner_source_1.png", 11)
    _png(joint / "corner_source_2.png", 12)
    par = {"frequency": {"median": 1.2e-8, "interval_90": [1.19e-8, 1.21e-8], "unit": "Hz"},
           "strain": {"median": 1.3e-14, "interval_90": [1.0e-14, 1.6e-14], "unit": ""}}
    par2 = {"frequency": {"median": 3.1e-8, "interval_90": [3.05e-8, 3.15e-8], "unit": "Hz"},
            "strain": {"median": 7.5e-15, "interval_90": [5e-15, 9e-15], "unit": ""}}
    (joint / "summary.json").write_text(json.dumps({
        "n_sources": 2, "log_bayes_factor": 81.5, "log_bayes_factor_error": 2.5, "effective_sample_size": 1100.0,
        "n_samples": 3000, "iterations": 4000, "walkers": 34, "stopped_by": "converged", "wall_time": 700.0,
        "swap_acceptance": [0.3, 0.4], "temperatures": [1.0, 3.0, 9.0],
        "model": {"pulsar_phases": "marginalised exactly, K phases per pulsar", "sky_prior": "isotropic"},
        "sources": [{"source": 1, "round": 1, "start": {"frequency": 1.2e-8, "ra": 141.0, "dec": -27.0},
                     "log10_frequency_band": [-7.95, -7.9], "parameters": par,
                     "sky": {"ra": 140.5, "dec": -27.8, "radius_90_deg": 4.0, "credible_area_90_deg2": 60.0}},
                    {"source": 2, "round": 2, "start": {"frequency": 3.1e-8, "ra": 20.0, "dec": 10.0},
                     "log10_frequency_band": [-7.52, -7.49], "parameters": par2,
                     "sky": {"ra": 21.0, "dec": 11.0, "radius_90_deg": 9.0, "credible_area_90_deg2": 250.0}}]}))
    text = build_report(run).read_text(encoding="utf-8")
    doc = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(text)
    section = next(s for s in doc.iter("section") if s.get("id") == "joint")
    words = " ".join(section.itertext())
    assert "2 confirmed source(s) sampled together" in words and "81.50 ± 2.50" in words
    assert "source 1 (round 1)" in words and "source 2 (round 2)" in words
    assert "31" in words and "7.5e-15" in words            # source 2's frequency in nHz and its strain
    assert len(section.findall(".//img")) == 2
    followup = next(s for s in doc.iter("section") if s.get("id") == "followup")
    assert len(followup.findall(".//img")) == 2             # candidate_1's corner and trace only
    tables = section.findall(".//table")
    heads = [" ".join(t.find("thead").itertext()) for t in tables]
    # 10**-7.95 = 1.12e-8 <= 1.2e-8 (injection) <= 10**-7.9 = 1.26e-8: source 1 gets the truth column
    assert sum("truth (injection.json)" in h for h in heads) == 1


def test_rounds_section_lists_each_confirmed_sources_best_host(run_folder, tmp_path):
    """The rounds section's host table (rounds/rounds.json ``confirmed``): the round-1 source's best host read
    from the hosts stage's hosts_summary.json (its candidate label), a later round's and the joint follow-up's
    from the entries the rounds step recorded, a recorded error as a note; strict html5lib parse. The numbers
    are invented (no check value): the table must show what the files say."""
    import html5lib

    run = tmp_path / "run"
    shutil.copytree(run_folder, run)
    (run / "hosts" / "hosts_summary.json").write_text(json.dumps({"candidates": [
        {"candidate": "candidate_1", "best_host": {"name": "GALX0002", "probability": 0.7},
         "probability_not_in_catalogue": 0.125}]}))
    (run / "rounds").mkdir()
    source = {"ra": 141.0, "dec": -27.5, "frequency": 1.2e-8, "chirp_mass": 1e9, "strain": 1e-14,
              "fap_empirical": 0.01, "log_bayes_factor": 30.0}
    confirmed = [
        {**source, "source": 1, "round": 1, "folder": "followup/candidate_1",
         "hosts": {"folder": "hosts", "candidate": "candidate_1", "note": "ranked by the hosts stage"}},
        {**source, "source": 2, "round": 2, "folder": "rounds/round-2/followup",
         "hosts": {"folder": "rounds/round-2/hosts", "best_host": "GALR0007", "best_host_probability": 0.4375,
                   "probability_not_in_catalogue": 0.3125},
         "joint_hosts": {"folder": "rounds/joint/source-2/hosts", "best_host": "GALR0008",
                         "best_host_probability": 0.5625, "probability_not_in_catalogue": 0.1875}},
        {**source, "source": 3, "round": 3, "folder": "rounds/round-3/followup",
         "hosts": {"folder": "rounds/round-3/hosts", "error": "no catalogue galaxy lies within the distance limit"}}]
    rounds = {"detection_rule": "a rule", "n_confirmed": 3, "n_rounds": 4, "max_sources": 3, "stopped": "round 3",
              "rounds": [{"round": k, "subtracted_sources": k - 1, "candidates": []} for k in (1, 2, 3)],
              "confirmed": confirmed, "joint_followup": None}
    (run / "rounds" / "rounds.json").write_text(json.dumps(rounds))
    text = build_report(run).read_text(encoding="utf-8")
    doc = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(text)
    section = next(s for s in doc.iter("section") if s.get("id") == "rounds")
    titles = [" ".join(h.itertext()) for h in section.iter("h3")]
    k = next(i for i, t in enumerate(titles) if t.startswith("Host galaxies of the confirmed sources"))
    table = section.findall(".//table")[k]
    heads = [" ".join(th.itertext()) for th in table.find("thead").iter("th")]
    assert heads[:7] == ["source", "round", "posterior", "best host", "P(best host)", "P(host not in catalogue)",
                         "ranking"]
    rows = [[" ".join(td.itertext()).strip() for td in tr.iter("td")] for tr in table.find("tbody").iter("tr")]
    assert [r[:4] for r in rows] == [["1", "1", "its round's follow-up", "GALX0002"],
                                     ["2", "2", "its round's follow-up", "GALR0007"],
                                     ["2", "2", "joint follow-up", "GALR0008"],
                                     ["3", "3", "its round's follow-up", "–"]]
    # probabilities to three significant figures ("g3"): 0.7, 0.125 from hosts_summary.json; 0.4375 -> 0.438
    assert [r[4:7] for r in rows[:3]] == [["0.7", "0.125", "hosts"], ["0.438", "0.312", "rounds/round-2/hosts"],
                                          ["0.562", "0.188", "rounds/joint/source-2/hosts"]]
    assert "distance limit" in rows[3][7]
    words = " ".join(section.itertext())
    assert "rounds/round-K/hosts/" in words and "not an identification" in words
