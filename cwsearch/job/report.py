"""The run report: one self-contained HTML page per run folder, built with Jinja2 (autoescaping).

:func:`build_report` reads a run folder (docs/design.md §11) and writes
``report.html`` next to it: every PNG of every stage folder embedded as a
base64 ``data:`` URI, inline CSS and a small inline script that makes the
tables sortable (click a column header); no links to anything outside the
page, so it opens offline, can be mailed as one file, and never contacts the
network. The page is rendered from ``templates/report.html.j2`` with
autoescaping on: every value read from the run folder is shown as text.

The first screen answers, in words with numbers and units: is there a
binary, where, how sure, which host, what limits, and lists every warning
(sampler health, few effective samples behind a host probability). When the
dataset folder holds ``injection.json`` (simulated data), the true values are
listed beside every estimate.

Sections (each is present even when its stage did not run, saying why):

``headline``     the first screen: the answers and the warnings
``dataset``      pulsars, TOAs, spans, backends, noise; pulsar sky positions
``noise``        the noise model used (``RUN/noise/summary.json`` when the noise stage ran)
``scan``         Fe/Fp spectrum, sky map, noise-only calibration
``candidates``   candidate table with false-alarm probabilities
``followup``     posterior (with the truth when known), Bayes factor, sampler health
``hosts``        host ranking
``limits``       strain limits versus frequency and sky, chirp-mass limits per galaxy
``cautions``     what the numbers do not say
``provenance``   versions, seed, checksum, times, host

Examples
--------
>>> import tempfile, pathlib
>>> from cwsearch.job.report import build_report
>>> run = pathlib.Path(tempfile.mkdtemp())
>>> path = build_report(run)          # an empty run folder still gives a complete page
>>> '<section id="cautions">' in path.read_text()
True
"""

from __future__ import annotations

import base64
import html
import json
import math
import tomllib
from pathlib import Path

import numpy as np
from markupsafe import escape

from .. import __version__
from ..core.fileio import write_text_atomic
from ..data.truth import injected_noise
from .headline import COLD_SWAP_MIN, PAIR_SWAP_MIN, areas_text, followup_targets, format_headline, headline_result, merge_sources, sampler_health
from .runfolder import read_json as _read_json
from .runfolder import read_table as _read_table

#: (id, title) of every report section, in page order
SECTIONS = (
    ("headline", "Result at a glance"),
    ("dataset", "Dataset"),
    ("noise", "Noise model"),
    ("scan", "Scan: spectrum and sky map"),
    ("candidates", "Candidates"),
    ("followup", "Follow-up: posterior and Bayes factor"),
    ("rounds", "Rounds: detection rule, subtract and rescan"),
    ("joint", "Joint follow-up: every confirmed source in one fit"),
    ("hosts", "Host galaxies"),
    ("limits", "Upper limits"),
    ("targets", "Targeted searches of the catalogue"),
    ("cautions", "Cautions"),
    ("provenance", "Provenance"),
)

GENERAL_CAUTIONS = (
    "The noise model decides the answer: false-alarm probabilities, Bayes factors and limits are only as good "
    "as the white-noise factors, red-noise spectra and common process used. A mis-modelled red process "
    "produces low-frequency candidates; repeat the run with other noise settings and with pulsars left out.",
    "Trials: the scan tests every sky pixel and frequency. Quote the trials-corrected or empirical "
    "false-alarm probability, never the single-template one, as the significance of the loudest peak.",
    "Empirical false-alarm probabilities come from noise-only simulations drawn from the same noise model, "
    "so they do not protect against a wrong noise model; with N simulations nothing below 1/(N+1) can be "
    "resolved.",
    "Pulsar distances are known to only 10-30 %, much worse than a gravitational wavelength, so pulsar-term "
    "phases are free nuisance parameters: the pulsar term sharpens frequency and chirp mass, not distance.",
    "A host ranking is a probability under the catalogue, its completeness and the mass relations used, "
    "not an identification; treat the top galaxy as a target for electromagnetic follow-up.",
    "Upper limits are conditional on the noise model and the priors of the limits stage (uniform strain "
    "prior, random orientation).",
)

# column name -> (label, unit shown, kind); kind decides the number format (see _cell)
LABELS = {
    "rank": ("rank", "", "int"), "name": ("name", "", "text"), "candidate": ("candidate", "", "text"),
    "frequency": ("GW frequency", "Hz", "g4"), "ra": ("right ascension", "deg", "f2"),
    "dec": ("declination", "deg", "f2"), "pixel": ("sky pixel", "", "int"),
    "frequency_index": ("frequency bin", "", "int"), "fe": ("Fe", "", "g4"), "snr": ("S/N", "", "f1"),
    "fap": ("FAP (analytic, trials-corrected)", "", "g2"), "n_eff": ("effective trials", "", "g3"),
    "fap_empirical": ("FAP (empirical)", "", "g2"), "fap_single": ("FAP (one template)", "", "g2"),
    "fp": ("Fp", "", "g4"), "fp_fap": ("FAP of Fp (one frequency)", "", "g2"),
    "strain": ("strain amplitude h0", "", "g3"), "inclination": ("inclination", "deg", "rad2deg"),
    "polarization": ("polarization", "deg", "rad2deg"), "phase": ("phase", "deg", "rad2deg"),
    "distance": ("distance", "Mpc", "g4"), "redshift": ("redshift", "", "g3"),
    "probability": ("host probability", "", "g2"), "log_bayes_factor": ("ln Bayes factor", "", "f2"),
    "sky_density": ("sky factor", "", "g3"), "distance_consistency": ("distance factor", "", "g3"),
    "mass_consistency": ("mass factor", "", "g3"), "period_consistency": ("period factor", "", "g3"),
    "coalescence_ok": ("coalescence factor", "", "g2"), "n_effective": ("effective samples", "", "f1"),
    "log10_bh_mass": ("log10 black-hole mass", "Msun", "f2"), "mass_proxy": ("mass from", "", "text"),
    "has_period": ("period known", "", "bool"), "strain_95": ("95 % strain limit", "", "g3"),
    "chirp_mass_95": ("95 % chirp-mass limit", "Msun", "g3"), "chirp_mass": ("chirp mass", "Msun", "g3"),
    "luminosity_distance": ("luminosity distance", "Mpc", "g3"), "orbital_period": ("orbital period", "yr", "g3"),
}

#: descriptive captions of the stage figures (file name -> caption)
CAPTIONS = {
    "dataset.png": "Pulsar sky positions and observing spans.",
    "spectrum.png": "Scan: maximum over the sky of Fe, and Fp, against GW frequency, with false-alarm thresholds.",
    "sky_fe.png": "Scan: Fe over the sky at the best candidate's frequency; stars are the pulsars.",
    "null_fe.png": "Scan calibration: loudest Fe of each noise-only scan, with the observed loudest Fe marked.",
    "corner.png": "Follow-up posterior: one- and two-dimensional marginals (dashed: 5 %, 50 %, 95 %).",
    "sky.png": "Follow-up: posterior sky position with its 50 % and 90 % credible regions.",
    "trace.png": "Follow-up: T = 1 chains of a few walkers (burn-in shaded), in physical units.",
    "residuals.png": "Follow-up: timing residuals per pulsar with the fitted binary signal (Earth + pulsar term; "
                     "posterior median and 90 % band of 100 draws, after the timing-model fit); dashed magenta: "
                     "the true signal when injection.json exists.",
    "hosts_sky.png": "Host galaxies: the binary's sky density with the catalogue galaxies.",
    "hosts_sky_zoom.png": "Host galaxies: zoom around the candidate, top hosts labelled.",
    "hosts_followup_sky.png": "Host galaxies: the follow-up posterior sky map with its 90 % credible region, the "
                              "pulsars (stars) and the top-ranked hosts (numbered, names listed under the map), "
                              "with a zoom around the candidate.",
    "hosts_chirp_mass.png": "Host galaxies: chirp mass implied by each galaxy against the posterior.",
    "strain_limits.png": "Upper limits: 95 % strain limit against GW frequency (sky average, best and worst sky position).",
    "sky_limits.png": "Upper limits: 95 % strain limit over the sky at the most sensitive frequency.",
    "galaxy_limits.png": "Upper limits: 95 % chirp-mass limit against GW frequency for the chosen galaxies.",
    "pp_plot.png": "Targets: every target's p-value against its expectation under the null (uniform), with the "
                   "95 % band of uniform order statistics and the Bonferroni 5 % line.",
    "sky_targets.png": "Targets: the catalogue targets on the sky coloured by -log10 p-value; followed-up ones "
                       "circled; stars are the pulsars.",
}

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1150px;margin:2em auto;padding:0 1em;
color:#1b1b1b;background:#fff;line-height:1.45}
h1{font-size:1.7em;margin-bottom:.2em}h2{border-bottom:2px solid #2b5c8a;padding-bottom:.2em;margin-top:2em}
.sub{color:#666;margin-top:0;font-size:.9em}nav a{margin-right:1em}
.scroll{max-height:28em;overflow:auto;border:1px solid #ddd;margin:.6em 0;max-width:100%}
table{border-collapse:collapse;font-size:.85em}
th,td{border:1px solid #ccc;padding:.25em .5em;white-space:nowrap}
th{background:#eef3f8;position:sticky;top:0;cursor:pointer}th .unit{font-weight:normal;color:#555}
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums}td.t,th.t{text-align:left}
th.asc::after{content:" \\25B2"}th.desc::after{content:" \\25BC"}
tr.truth td{background:#fff4d6}
table.answers{font-size:1.02em;margin:.6em 0;border:none}
table.answers th{text-align:left;vertical-align:top;background:#f3f8ee;cursor:default;position:static;
width:12em;white-space:normal}
table.answers td{white-space:normal;border-color:#dde5d5}
figure{display:inline-block;margin:.5em;vertical-align:top;max-width:100%}
figure img{max-width:100%;border:1px solid #ddd}figcaption{font-size:.85em;color:#333;max-width:44em}
.note{color:#8a5a00;background:#fff7e6;border-left:4px solid #e0a030;padding:.3em .8em}
.warn{color:#7a1010;background:#fdecec;border-left:5px solid #c03030;padding:.4em 1em;margin:.8em 0}
.warn ul{margin:.3em 0}
dl{display:grid;grid-template-columns:max-content auto;gap:.2em 1em;font-size:.9em}dt{font-weight:600}
pre{white-space:pre-wrap;font-size:.85em;background:#f6f6f6;padding:.5em}
@media print{.scroll{max-height:none;overflow:visible}nav{display:none}}
"""

# sortable tables: click a header to sort by that column (numbers by data-sort, text otherwise)
_JS = """
document.querySelectorAll('table.sortable').forEach(function(table){
  table.querySelectorAll('th').forEach(function(th, col){
    th.addEventListener('click', function(){
      var body = table.tBodies[0], rows = Array.prototype.slice.call(body.rows);
      var asc = !th.classList.contains('asc');
      table.querySelectorAll('th').forEach(function(h){h.classList.remove('asc','desc');});
      th.classList.add(asc ? 'asc' : 'desc');
      function key(r){var c = r.cells[col]; if(!c) return ''; var s = c.getAttribute('data-sort');
        return s === null ? c.textContent.trim().toLowerCase() : parseFloat(s);}
      rows.sort(function(a, b){var x = key(a), y = key(b);
        if (typeof x === 'number' && isNaN(x)) return 1; if (typeof y === 'number' && isNaN(y)) return -1;
        return (x < y ? -1 : x > y ? 1 : 0) * (asc ? 1 : -1);});
      rows.forEach(function(r){body.appendChild(r);});
    });
  });
});
"""


# ---------------------------------------------------------------- helpers
def _scalar(v):
    try:
        return v.item()
    except (AttributeError, ValueError):
        return v


def fmt_number(v, kind="g4") -> str:
    """A number with sensible significant figures for its kind (see :data:`LABELS`)."""
    v = _scalar(v)
    if v is None:
        return "–"
    if isinstance(v, bool) or kind == "bool":
        return "yes" if v else "no"
    if isinstance(v, str):
        return v
    if isinstance(v, (list, tuple)):
        return ", ".join(fmt_number(x, kind) for x in v)
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    if not math.isfinite(x):
        return "–"
    if kind == "int":
        return f"{int(round(x))}"
    if kind == "rad2deg":
        return f"{math.degrees(x):.1f}"
    if kind.startswith("f"):
        return f"{x:.{int(kind[1:])}f}"
    digits = int(kind[1:]) if kind.startswith("g") else 4
    return f"{x:.{digits}g}"


def _cell(v, kind):
    v = _scalar(v)
    numeric = kind not in ("text", "bool") and isinstance(v, (int, float)) and not isinstance(v, bool)
    sort = None
    if numeric:
        x = float(v)
        sort = repr(math.degrees(x) if kind == "rad2deg" else x) if math.isfinite(x) else "NaN"
    return {"text": fmt_number(v, kind), "numeric": numeric, "sort": sort}


def _label(name, unit=None):
    label, shown, kind = LABELS.get(name, (name.replace("_", " "), None, None))
    if shown is None:
        shown = "" if unit in (None, "") else str(unit)
    if kind is None:
        kind = "g4"
    return label, shown, kind


def table_view(table, columns=None, max_rows=None, sort=None, descending=False, title=None, truth=None):
    """A table for the template: human labels and units in the header, formatted cells, sortable.

    ``table``: an astropy Table or a list of dicts; ``columns``: names to show (default all 1-D ones);
    ``truth``: optional dict (column -> true value) shown as a highlighted first row.
    """
    if table is None:
        return None
    if isinstance(table, list):
        if not table:
            return None
        names = columns or list(table[0].keys())
        units = {}
        rows = [[r.get(c) for c in names] for r in table]
    else:
        if sort and sort in table.colnames:
            table = table.copy()
            table.sort(sort, reverse=descending)
        names = [c for c in (columns or table.colnames) if c in table.colnames and table[c].ndim == 1]
        units = {c: table[c].unit for c in names}
        rows = [[row[c] for c in names] for row in table]
    cols, kinds = [], []
    for c in names:
        label, unit, kind = _label(c, units.get(c))
        kinds.append(kind)
        cols.append({"label": label, "unit": unit, "numeric": kind not in ("text", "bool")})
    shown = rows if max_rows is None else rows[:max_rows]
    out_rows = []
    if truth:
        cells = [_cell(truth.get(c), k) if c in truth else {"text": "truth" if i == 0 else "", "numeric": False,
                                                               "sort": None} for i, (c, k) in
                 enumerate(zip(names, kinds))]
        out_rows.append({"cells": cells, "cls": "truth"})
    for r in shown:
        out_rows.append({"cells": [_cell(v, k) for v, k in zip(r, kinds)], "cls": ""})
    note = (f"Showing {max_rows} of {len(rows)} rows; the full table is in the run folder."
            if max_rows is not None and len(rows) > max_rows else "")
    return {"title": title, "columns": cols, "rows": out_rows, "note": note}


def _figure(path, caption=None):
    path = Path(path)
    caption = caption or CAPTIONS.get(path.name) or path.stem.replace("_", " ")
    if path.parent.name.startswith(("candidate", "galaxy")):
        caption = f"{path.parent.name.replace('_', ' ')}: {caption}"
    return {"data": base64.b64encode(path.read_bytes()).decode("ascii"), "caption": caption, "alt": caption}


def embed_png(path, caption=None) -> str:
    """An ``<figure>`` with the PNG at ``path`` embedded as a base64 data URI (escaped caption)."""
    f = _figure(path, caption)
    return (f'<figure><img src="data:image/png;base64,{f["data"]}" alt="{escape(f["alt"])}">'
            f"<figcaption>{escape(f['caption'])}</figcaption></figure>")


def _images(folder, recursive=True) -> list:
    """PNG files of a stage folder (sub-folders too), sorted; hidden files left out."""
    folder = Path(folder)
    if not folder.is_dir():
        return []
    found = folder.rglob("*.png") if recursive else folder.glob("*.png")
    return sorted(p for p in found if not any(part.startswith(".") for part in p.relative_to(folder).parts))


def _items(summary, skip=()):
    """Flat scalar items of a stage summary dict, for a definition list (human keys, formatted numbers)."""
    items = []
    for k, v in (summary or {}).items():
        if k in skip or isinstance(v, dict) or v is None or v == "":
            continue
        if isinstance(v, list) and (len(v) > 8 or any(isinstance(x, (dict, list)) for x in v)):
            continue
        items.append((k.replace("_", " "), fmt_number(v, "g4")))
    return items


# ---------------------------------------------------------------- the run folder
class _Run:
    """Everything the report needs, read once from a run folder."""

    def __init__(self, run_dir):
        self.dir = Path(run_dir)
        self.provenance = _read_json(self.dir / "provenance.json") or {}
        self.dataset = _read_json(self.dir / "dataset.json") or {}
        summary = _read_json(self.dir / "summary.json") or {}
        self.stages = {s["stage"]: s for s in summary.get("stages", []) if isinstance(s, dict)}
        self.records = {}
        for stage in ("scan", "noise", "followup", "rounds", "hosts", "limits", "targets"):
            rec = _read_json(self.dir / stage / ".stage.json")
            if rec:
                self.records[stage] = rec
        try:
            self.config = tomllib.loads((self.dir / "run.toml").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            self.config = {}
        # the headline is recomputed from the files (it is cheap) so that old run folders get the new rules
        stored = summary.get("headline") or {}
        self.headline = headline_result(self.dir) if stored or any(self.records) else {}
        if stored.get("stages"):
            self.headline["stages"] = stored["stages"]
        self.targets = followup_targets(self.dir)
        self.truth = self._truth()

    def _truth(self):
        """The injected binary (first one) from the dataset's ``injection.json``, or None."""
        path = self.dataset.get("path")
        inj = _read_json(Path(path) / "injection.json") if path else None
        if not isinstance(inj, dict) or not inj.get("binaries"):
            return None
        b = inj["binaries"][0]
        out = {k: b[k] for k in ("ra", "dec", "chirp_mass", "strain", "luminosity_distance", "inclination",
                                 "polarization", "phase") if k in b}
        if "gw_frequency" in b:
            out["frequency"] = b["gw_frequency"]
        if "orbital_period_yr" in b:
            out["orbital_period"] = b["orbital_period_yr"]
        out["optimal_snr"] = b.get("optimal_snr", inj.get("optimal_snr"))
        return out

    def stage_summary(self, stage) -> dict:
        rec = self.records.get(stage) or {}
        return rec.get("summary") or {}

    def status_notes(self, stage) -> list:
        """A note when a stage has no result (not run, no candidate, unavailable)."""
        rec = self.records.get(stage)
        info = self.stages.get(stage, {})
        if rec and rec.get("status") == "complete":
            return []
        if rec and rec.get("status") == "empty":
            return [f"No result: {rec.get('reason') or 'nothing to compute'}."]
        reason = info.get("reason") or ("interrupted; run again to resume" if rec else "not run")
        return [f"Stage {stage}: {info.get('status', 'not run')} — {reason}."]


def _sec(sid, title, **kw):
    base = {"id": sid, "title": title, "notes": [], "paragraphs": [], "items": [], "tables": [], "subsections": [],
            "figures": [], "list": []}
    base.update(kw)
    return base


def _separation_deg(ra1, dec1, ra2, dec2):
    """Great-circle angle [deg] between two directions given in degrees (haversine formula)."""
    r1, d1, r2, d2 = (math.radians(x) for x in (ra1, dec1, ra2, dec2))
    h = math.sin((d2 - d1) / 2) ** 2 + math.cos(d1) * math.cos(d2) * math.sin((r2 - r1) / 2) ** 2
    return math.degrees(2 * math.asin(min(1.0, math.sqrt(h))))


def _sky_truth_text(sky, truth):
    """'; truth ra …, dec …, X° from the mean direction (inside/outside the 90 % radius)' or ''."""
    if not truth or truth.get("ra") is None or truth.get("dec") is None:
        return ""
    sep = _separation_deg(sky["ra"], sky["dec"], truth["ra"], truth["dec"])
    where = "inside" if sep <= sky.get("radius_90_deg", float("inf")) else "outside"
    return (f"; truth (injection.json) ra {truth['ra']:.2f}°, dec {truth['dec']:.2f}°, {sep:.3g}° from the mean "
            f"direction ({where} the 90 % radius)")


def _truth_text(truth, key, fmt):
    return f" (truth {fmt(truth[key])})" if truth and truth.get(key) is not None else ""


# ---------------------------------------------------------------- first screen
def first_screen(run: _Run) -> dict:
    """The answers of the first screen: (question, answer) pairs in words with numbers and units."""
    head, truth = run.headline, run.truth
    if not head:
        return {"answers": [], "warnings": [], "lines": ""}
    answers = []
    cand = head.get("candidate")
    if cand is None:
        answers.append(("Is there a binary?", "No scan result in this run folder."))
    else:
        found = head.get("candidate_found")
        src = (head.get("sources") or [None])[0]
        fap = cand.get("fap_text") or ""
        if found:
            yes = "Yes, a candidate: " + fap
            if cand.get("log_bayes_factor") is not None:
                err = cand.get("log_bayes_factor_err")
                yes += (f"; the follow-up prefers a binary over noise by ln B = {cand['log_bayes_factor']:.1f}"
                        + (f" ± {err:.1f}" if err is not None else ""))
            n_src = len(head.get("sources") or [])
            if n_src > 1:
                yes += f"; {n_src} distinct sources were followed up (see Follow-up)"
            answers.append(("Is there a binary?", yes + "."))
        else:
            answers.append(("Is there a binary?",
                            f"No: the loudest peak has {fap}, above the follow-up threshold "
                            f"{cand.get('fap_threshold')}."))
        pos = cand.get("position") or {}
        if pos.get("ra") is not None:
            where = f"ra {pos['ra']:.1f}°, dec {pos['dec']:.1f}°"
            if pos.get("source") == "posterior":
                areas = areas_text(pos)
                where += " (posterior mean direction" + (f"; {areas})" if areas else ")")
            else:
                where += " (scan pixel; no follow-up posterior)"
            where += (f" (truth ra {truth['ra']:.1f}°, dec {truth['dec']:.1f}°)" if truth and "ra" in truth else "")
            pf = cand.get("posterior_frequency")
            if pf and pf.get("interval_90"):
                lo, hi = pf["interval_90"][:2]
                where += (f"; GW frequency {pf['median'] * 1e9:.3g} nHz (90 %: {lo * 1e9:.3g}–{hi * 1e9:.3g} nHz)")
            else:
                where += f"; GW frequency {cand['frequency'] * 1e9:.3g} nHz (scan peak)"
            where += _truth_text(truth, "frequency", lambda f: f"{f * 1e9:.3g} nHz")
            if src and src.get("chirp_mass") and src["chirp_mass"].get("interval_90"):
                cm = src["chirp_mass"]
                where += (f"; chirp mass {cm['median']:.2g} Msun (90 %: {cm['interval_90'][0]:.2g}–"
                          f"{cm['interval_90'][1]:.2g})" + _truth_text(truth, "chirp_mass", lambda m: f"{m:.2g} Msun"))
            answers.append(("Where?", where + "."))
        if src and len(src.get("scan_peaks", [])) > 1:
            answers.append(("One source or several?",
                            "One source: the follow-ups of scan peaks "
                            + ", ".join(f"#{p}" for p in src["scan_peaks"]) + " converged on the same posterior."))
    host = head.get("best_host")
    if host:
        text = f"{host['name']}, probability {host['probability']:.2g}"
        if host.get("n_effective") is not None:
            text += f" from {host['n_effective']:.1f} effective posterior samples"
        if host.get("probability_not_in_catalogue") is not None:
            text += f"; probability that the host is not in the catalogue {host['probability_not_in_catalogue']:.2g}"
        answers.append(("Which host?", text + "."))
    lim = head.get("best_limit")
    if lim:
        text = (f"Sky-averaged 95 % strain upper limit {lim['strain_95']:.3g} at {lim['frequency'] * 1e9:.3g} nHz, "
                "the most sensitive frequency (see Upper limits for every frequency and sky position)")
        at_truth = _limit_at(_read_table(run.dir / "limits" / "frequency_limits.ecsv"), (truth or {}).get("frequency"))
        if truth and truth.get("strain") is not None and truth.get("frequency") is not None:
            text += (f" (truth: h0 = {truth['strain']:.3g} at {truth['frequency'] * 1e9:.3g} nHz"
                     + (f", where the limit is {at_truth:.3g})" if at_truth is not None else ")"))
        answers.append(("What limits?", text + "."))
    if truth:
        snr = truth.get("optimal_snr")
        answers.append(("Simulated data?", "Yes: the dataset holds injection.json; true values are listed beside "
                                           "the estimates" + (f" (optimal S/N {snr:.1f})" if snr else "") + "."))
    return {"answers": answers, "warnings": list(head.get("warnings") or []), "lines": format_headline(head)}


# ---------------------------------------------------------------- sections
def _dataset(run: _Run):
    d = run.dataset
    s = _sec("dataset", dict(SECTIONS)["dataset"])
    if not d:
        s["notes"].append("No dataset summary in this run folder.")
        return s
    s["items"] = [(k, fmt_number(v)) for k, v in (("folder", d.get("path")), ("pulsars", d.get("n_pulsars")),
                                                  ("TOAs", d.get("n_toas")), ("span [yr]", d.get("span_yr")),
                                                  ("checksum (SHA-256)", d.get("checksum"))) if v is not None]
    rows = []
    for p in d.get("pulsars", []):
        red = p.get("red_noise")
        rows.append({"name": p["name"], "ra": p["ra_deg"], "dec": p["dec_deg"], "distance_kpc": p["distance_kpc"],
                     "distance_err_kpc": p["distance_err_kpc"], "n_toas": p["n_toas"], "span_yr": p["span_yr"],
                     "backends": ", ".join(p["backends"]), "median_sigma_ns": p["median_sigma_ns"],
                     "red_noise": (f"log10 A = {red['log10_amplitude']:.2f}, γ = {red['index']:.2f}"
                                   if red else "none")})
    extra = {"distance_kpc": ("distance", "kpc", "g3"), "distance_err_kpc": ("distance error", "kpc", "g2"),
             "n_toas": ("TOAs", "", "int"), "span_yr": ("span", "yr", "f1"), "backends": ("backends", "", "text"),
             "median_sigma_ns": ("median TOA error", "ns", "g3"), "red_noise": ("red noise", "", "text")}
    with _extra_labels(extra):
        s["tables"].append(table_view(rows))
    if (run.dir / "dataset.png").is_file():
        s["figures"].append(_figure(run.dir / "dataset.png"))
    return s


class _extra_labels:
    """Temporarily add labels to :data:`LABELS` (for tables built in this module)."""

    def __init__(self, extra):
        self.extra = extra

    def __enter__(self):
        self.saved = {k: LABELS[k] for k in self.extra if k in LABELS}
        LABELS.update(self.extra)

    def __exit__(self, *exc):
        for k in self.extra:
            LABELS.pop(k, None)
        LABELS.update(self.saved)


def _pm(value, error, digits=3):
    if not isinstance(value, (int, float)) or not math.isfinite(value):
        return "–"
    text = f"{value:.{digits}g}"
    return text + (f" ± {error:.2g}" if isinstance(error, (int, float)) and math.isfinite(error) else "")


def noise_pulsar_view(pulsars, true_noise=None):
    """Per pulsar, the fitted noise of ``noise/summary.json`` (white factors per backend, red-noise
    amplitude and index with their errors, goodness of fit) and, with ``true_noise``
    (:func:`cwsearch.data.truth.injected_noise`), the true values beside them; None when the entries are
    not in the noise stage's format."""
    if not isinstance(pulsars, list) or not pulsars or not all(
            isinstance(p, dict) and isinstance(p.get("white"), dict) for p in pulsars):
        return None
    truths = (true_noise or {}).get("pulsars") or {}
    rows = []
    for p in pulsars:
        red = p.get("red_noise") if isinstance(p.get("red_noise"), dict) else {}
        white = "; ".join(f"{b}: {_pm(w.get('sigma_scale'), w.get('sigma_scale_err'))}"
                          for b, w in p["white"].items() if isinstance(w, dict))
        gof = p.get("goodness_of_fit") or {}
        row = {"name": p.get("name"), "model": red.get("model", ""),
               "red_amplitude": _pm(red.get("log10_amplitude"), red.get("log10_amplitude_err")) if red.get("claimed")
               else "–", "red_index": _pm(red.get("index"), red.get("index_err")) if red.get("claimed") else "–"}
        if true_noise is not None:
            t = truths.get(p.get("name")) or {}
            t_red = t.get("red")
            row["true_red"] = (f"log10 A {t_red['log10_amplitude']:.3g}, index {t_red['index']:.3g}" if t_red
                               else "none")
        row["white"] = white
        if true_noise is not None:
            t_white = (truths.get(p.get("name")) or {}).get("white") or {}
            row["true_white"] = "; ".join(f"{b}: {w.get('sigma_scale', 1.0):.3g}" for b, w in t_white.items()
                                          if isinstance(w, dict)) or "–"
        row["flagged"] = "FAILED" if gof.get("flagged") else ("ok" if gof else "–")
        rows.append(row)
    extra = {"model": ("noise model", "", "text"), "red_amplitude": ("red log10 amplitude", "", "text"),
             "red_index": ("red spectral index", "", "text"),
             "true_red": ("true red noise (injection.json)", "", "text"),
             "white": ("white-noise factor per backend", "", "text"),
             "true_white": ("true white-noise factor", "", "text"), "flagged": ("goodness of fit", "", "text")}
    with _extra_labels(extra):
        return table_view(rows, title="Per pulsar: fitted noise" + (" and the truth (injection.json)" if true_noise
                                                                    else ""))


def _noise(run: _Run):
    """The noise model: RUN/noise/summary.json rendered generically (scalars, per-pulsar table, figures)."""
    s = _sec("noise", dict(SECTIONS)["noise"])
    folder = run.dir / "noise"
    summary = _read_json(folder / "summary.json")
    if not isinstance(summary, dict):
        noise = run.config.get("noise") or {}
        s["paragraphs"].append("No noise-model stage output in this run folder (noise/summary.json): the noise "
                               "model is the dataset's own noise table and the [noise] settings of the run file.")
        if noise:
            s["items"] = [(k.replace("_", " "), fmt_number(v)) for k, v in noise.items()
                          if not isinstance(v, (dict, list))]
        return s
    s["notes"] = run.status_notes("noise") if "noise" in run.records else []
    s["items"] = _items(summary, skip=("pulsars", "options"))
    pulsars = summary.get("pulsars")
    true_noise = injected_noise(run.dir)
    fitted = noise_pulsar_view(pulsars, true_noise)
    if fitted:
        s["tables"].append(fitted)
    elif isinstance(pulsars, list) and pulsars and all(isinstance(p, dict) for p in pulsars):
        flat = [{k: v for k, v in p.items() if not isinstance(v, (dict, list))} for p in pulsars]
        s["tables"].append(table_view(flat, title="Per pulsar"))
    elif isinstance(pulsars, dict):
        flat = [{"name": name, **{k: v for k, v in p.items() if not isinstance(v, (dict, list))}}
                for name, p in pulsars.items() if isinstance(p, dict)]
        s["tables"].append(table_view(flat, title="Per pulsar"))
    for k, v in summary.items():
        if isinstance(v, dict) and k not in ("options", "pulsars"):
            items = _items(v)
            if k == "common" and true_noise is not None:
                bg = true_noise.get("background")
                items.append(("truth (injection.json)", "no background injected" if not bg else
                              f"log10 amplitude {bg['log10_amplitude']:.3g}, index {bg['index']:.3g}"))
            s["subsections"].append({"title": k.replace("_", " "), "notes": [], "paragraphs": [],
                                     "tables": [], "items": items, "figures": []})
    s["figures"] = [_figure(p) for p in _images(folder)]
    return s


def _null_table(run):
    t = _read_table(run.dir / "scan" / "null_maxima.ecsv")
    return t


def _scan(run: _Run):
    s = _sec("scan", dict(SECTIONS)["scan"], notes=run.status_notes("scan"))
    summary = run.stage_summary("scan") or _read_json(run.dir / "scan" / "scan_summary.json") or {}
    if summary:
        items = []
        for key, label, kind in (("n_pulsars", "pulsars", "int"), ("span_years", "span [yr]", "f2"),
                                 ("fmin", "lowest frequency [Hz]", "g4"), ("fmax", "highest frequency [Hz]", "g4"),
                                 ("n_frequencies", "frequencies", "int"), ("nside", "HEALPix nside", "int"),
                                 ("n_pixels", "sky pixels", "int"), ("null_sims", "noise-only scans", "int"),
                                 ("null_max_median", "median loudest noise-only Fe", "g3"),
                                 ("n_eff_fitted_from_null_sims", "effective trials fitted to the noise-only scans",
                                  "g3")):
            if summary.get(key) is not None:
                items.append((label, fmt_number(summary[key], kind)))
        s["items"] = items
        if summary.get("fap_meaning"):
            s["paragraphs"].append(summary["fap_meaning"] + ".")
        if summary.get("fap_empirical_meaning"):
            s["paragraphs"].append(summary["fap_empirical_meaning"] + ".")
        elif summary:
            s["paragraphs"].append("No noise-only scans were run, so the false-alarm probabilities are analytic "
                                   "only (set [scan] null_sims for an empirical calibration).")
    s["figures"] = [_figure(p) for p in _images(run.dir / "scan")]
    return s


def _candidates(run: _Run):
    s = _sec("candidates", dict(SECTIONS)["candidates"])
    table = _read_table(run.dir / "scan" / "candidates.ecsv")
    if table is None:
        s["notes"] = run.status_notes("scan") or ["No candidate table."]
        return s
    cand = run.headline.get("candidate") or {}
    thr = cand.get("fap_threshold")
    followed = run.stage_summary("followup").get("followed_rows")
    if thr is not None:
        s["paragraphs"].append(
            f"Peaks of the scan, best first. Candidates whose analytic false-alarm probability is below {thr:g} "
            "are followed up, one per frequency bin, at most [followup] max_candidates"
            + (f"; followed up here: rank {', '.join(str(r) for r in followed)}" if followed else "") + ".")
    if not len(table):
        s["paragraphs"].append("The scan found no peaks.")
        return s
    cols = [c for c in ("rank", "frequency", "ra", "dec", "fe", "snr", "fap", "fap_empirical", "fap_single", "fp",
                        "fp_fap", "strain", "inclination", "polarization", "phase") if c in table.colnames]
    s["tables"].append(table_view(table, cols, 25, "fap", False, truth=run.truth))
    return s


_PARAM_ORDER = (("ra", "right ascension", "deg", "f2"), ("dec", "declination", "deg", "f2"),
                ("frequency", "GW frequency", "nHz", "nHz"), ("chirp_mass", "chirp mass", "Msun", "g3"),
                ("strain", "strain amplitude h0", "", "g3"), ("inclination", "inclination", "deg", "rad2deg"),
                ("polarization", "polarization", "deg", "rad2deg"), ("phase", "phase", "deg", "rad2deg"),
                ("luminosity_distance", "luminosity distance", "Mpc", "g3"),
                ("orbital_period", "orbital period", "yr", "g3"))


def _pfmt(v, kind):
    if v is None:
        return "–"
    if kind == "nHz":
        return f"{float(v) * 1e9:.4g}"
    return fmt_number(v, kind)


def _parameter_table(summary, truth):
    params = summary.get("parameters")
    if not isinstance(params, dict) or not params:
        return None
    rows = []
    for name, label, unit, kind in _PARAM_ORDER:
        p = params.get(name)
        if not isinstance(p, dict):
            continue
        lo, hi = (p.get("interval_90") or [None, None])[:2]
        rows.append({"cells": [{"text": label, "numeric": False, "sort": None},
                               {"text": unit, "numeric": False, "sort": None}] +
                     [{"text": _pfmt(v, kind), "numeric": True, "sort": repr(float(v)) if v is not None else None}
                      for v in (p.get("median"), lo, hi)] +
                     ([{"text": _pfmt(truth.get(name), kind) if truth.get(name) is not None else "–",
                        "numeric": True, "sort": None}] if truth else []),
                     "cls": ""})
    cols = [{"label": "parameter", "unit": "", "numeric": False}, {"label": "unit", "unit": "", "numeric": False},
            {"label": "median", "unit": "", "numeric": True}, {"label": "5 %", "unit": "", "numeric": True},
            {"label": "95 %", "unit": "", "numeric": True}]
    if truth:
        cols.append({"label": "truth (injection.json)", "unit": "", "numeric": True})
    return {"title": "Posterior medians and 90 % intervals", "columns": cols, "rows": rows, "note": ""}


def _health_table(summary):
    swaps = summary.get("swap_acceptance") or []
    temps = summary.get("temperatures") or []
    if not swaps:
        return None
    rows = []
    for i, a in enumerate(swaps):
        pair = f"{temps[i]:.3g} ↔ {temps[i + 1]:.3g}" if len(temps) > i + 1 else str(i + 1)
        limit = COLD_SWAP_MIN if i == 0 else PAIR_SWAP_MIN
        ok = a is not None and a >= limit
        rows.append({"cells": [{"text": pair, "numeric": False, "sort": None},
                               {"text": fmt_number(a, "g2"), "numeric": True,
                                "sort": repr(float(a)) if a is not None else None},
                               {"text": f"{limit:g}", "numeric": True, "sort": None},
                               {"text": "ok" if ok else "LOW", "numeric": False, "sort": None}], "cls": ""})
    return {"title": "Temperature swaps (adjacent pairs, cold chain first)",
            "columns": [{"label": "temperatures", "unit": "", "numeric": False},
                        {"label": "swap acceptance", "unit": "", "numeric": True},
                        {"label": "warn below", "unit": "", "numeric": True},
                        {"label": "", "unit": "", "numeric": False}], "rows": rows, "note": ""}


#: human labels of the common-background models of ``background_comparison`` (follow-up summary.json)
BACKGROUND_LABELS = {"uncorrelated": "uncorrelated common background (pulsars independent)",
                     "hellings-downs": "Hellings–Downs-correlated background",
                     "none": "no common background (pulsar noise only)"}


def _finite(x):
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def background_comparison_view(summary):
    """Per candidate, the Bayes factor of binary versus background under each background model of the
    follow-up's ``background_comparison`` (docs/design.md §5b) as a small table, and the sentences saying
    which one decides and what it says here. Returns ``(table or None, [sentences])``."""
    comp = summary.get("background_comparison")
    if not isinstance(comp, dict) or not isinstance(comp.get("log_bayes_factor"), dict):
        return None, []
    values = {k: v for k, v in comp["log_bayes_factor"].items() if isinstance(v, (int, float))}
    run_model = comp.get("run_model")
    if not values:
        return None, []
    err = summary.get("log_bayes_factor_error", summary.get("log_bayes_factor_err"))
    order = [k for k in ("hellings-downs", "uncorrelated", "none") if k in values] + \
        [k for k in values if k not in ("hellings-downs", "uncorrelated", "none")]
    rows = []
    for k in order:
        v = float(values[k])
        if k == run_model:
            how = "sampled (thermodynamic integration over the tempered chains)"
            unc = err
        else:
            ess, n = comp.get("importance_effective_sample_size"), comp.get("n_samples")
            how = "importance reweighting of the posterior samples"
            if isinstance(ess, (int, float)) and n:
                how += f" (importance ESS {ess:.0f} of {int(n)})"
            rw = comp.get("reweighting_error")
            # ln B_other = ln B + ln mean(w): its error holds the sampled one and the reweighting one
            unc = math.hypot(err, rw) if _finite(err) and _finite(rw) else (rw if _finite(rw) else None)
            if _finite(rw):
                how += f"; error: the sampled one and ±{rw:.2g} from the reweighting"
        text = f"{v:.2f}" + (f" ± {float(unc):.2f}" if _finite(unc) else "")
        verdict = "binary preferred" if v > 0 else "background alone preferred"
        rows.append({"cells": [{"text": BACKGROUND_LABELS.get(k, k), "numeric": False, "sort": None},
                               {"text": text, "numeric": True, "sort": repr(v)},
                               {"text": verdict, "numeric": False, "sort": None},
                               {"text": how, "numeric": False, "sort": None}], "cls": ""})
    table = {"title": "Bayes factor of a binary against the background, under each background model",
             "columns": [{"label": "background model", "unit": "", "numeric": False},
                         {"label": "ln Bayes factor (binary + background vs background)", "unit": "",
                          "numeric": True},
                         {"label": "verdict", "unit": "", "numeric": False},
                         {"label": "how computed", "unit": "", "numeric": False}],
             "rows": rows, "note": ""}
    sentences = []
    hd, unc = values.get("hellings-downs"), values.get("uncorrelated")
    if hd is not None:
        sentences.append(
            "The Hellings–Downs row decides: a gravitational-wave background is correlated between pulsars by "
            "the Hellings–Downs curve, so a binary must stand out against that background; support that holds "
            "only under the uncorrelated background is the background itself, not a binary.")
        if unc is not None:
            if hd > 0:
                sentences.append(f"Here ln B = {hd:.2f} under the Hellings–Downs background"
                                 f" ({unc:.2f} uncorrelated): the binary is preferred.")
            elif unc > 0:
                sentences.append(f"Here ln B = {hd:.2f} under the Hellings–Downs background but {unc:.2f} "
                                 "uncorrelated: the support holds only without the correlations, so this is "
                                 "not a binary candidate.")
            else:
                sentences.append(f"Here ln B = {hd:.2f} under the Hellings–Downs background and {unc:.2f} "
                                 "uncorrelated: neither prefers a binary.")
            rw = comp.get("reweighting_error")
            sentences.append(f"Difference (uncorrelated minus Hellings–Downs): {unc - hd:.2f}"
                             + (f" ± {rw:.2g} (the sampled error is common to both and cancels)" if _finite(rw)
                                else "") + ".")
    if comp.get("warning"):
        sentences.append("Warning: " + str(comp["warning"]) + ".")
    if comp.get("note") and len(values) < 2:
        sentences.append(f"Only one background model: {comp['note']}.")
    return table, sentences


def _followup(run: _Run):
    s = _sec("followup", dict(SECTIONS)["followup"], notes=run.status_notes("followup"))
    targets = [t for t in run.targets if t[1]]
    stage = run.dir / "followup"
    groups = merge_sources(targets) if targets else []
    if len(targets) > 1:
        s["paragraphs"].append(
            f"{len(targets)} follow-ups, {len(groups)} distinct source(s): follow-ups whose 90 % frequency "
            "intervals overlap and whose sky positions lie within their 90 % radii are one source.")
    shown = set()
    for gi, group in enumerate(groups):
        for i in group:
            name, summary, folder = targets[i]
            sub = {"title": name + (f" (source {gi + 1})" if len(groups) > 1 or len(group) > 1 else ""),
                   "notes": [f"Sampler: {h}." for h in sampler_health(summary)], "paragraphs": [], "tables": [],
                   "items": [], "figures": []}
            bf = summary.get("log_bayes_factor")
            if bf is not None:
                err = summary.get("log_bayes_factor_error", summary.get("log_bayes_factor_err"))
                sub["paragraphs"].append(f"ln Bayes factor (signal vs noise) = {bf:.2f}"
                                         + (f" ± {err:.2f}" if err is not None else "") + ".")
            bg_table, bg_text = background_comparison_view(summary)
            start = summary.get("start") or {}
            row = start.get("candidate_row")
            if isinstance(row, dict) and row.get("rank") is not None:
                sub["paragraphs"].append(f"Started from scan peak #{int(row['rank'])} "
                                         f"(f = {start.get('frequency', float('nan')):.4g} Hz).")
            sky = summary.get("sky")
            if sky:
                sub["paragraphs"].append(
                    f"Sky position: ra {sky['ra']:.2f}°, dec {sky['dec']:.2f}° (mean direction of the samples), "
                    f"90 % of the samples within {sky['radius_90_deg']:.3g}° of it, "
                    + (f"50 % credible area {sky['credible_area_50_deg2']:.3g} deg², "
                       if sky.get("credible_area_50_deg2") is not None else "")
                    + f"90 % credible area {sky['credible_area_90_deg2']:.3g} deg² (HEALPix nside {sky['map_nside']}, "
                    f"{sky['pixel_area_deg2']:.3g} deg² pixels; map in {sky.get('map_file', 'the run folder')})"
                    + _sky_truth_text(sky, run.truth) + ".")
            sub["paragraphs"].extend(bg_text)
            sub["tables"] = [t for t in (bg_table, _parameter_table(summary, run.truth or {}), _health_table(summary))
                             if t]
            for key, label, kind in (("effective_sample_size", "effective samples", "f0"),
                                     ("n_samples", "posterior samples", "int"), ("iterations", "iterations", "int"),
                                     ("burn_in", "burn-in iterations", "int"), ("stopped_by", "stopped by", "text"),
                                     ("waiting_for", "stopping rule waiting for", "text"),
                                     ("wall_time", "wall time [s]", "f0")):
                if summary.get(key) not in (None, ""):
                    sub["items"].append((label, fmt_number(summary[key], kind)))
            for w in summary.get("warnings") or []:
                sub["notes"].append(w)
            imgs = _images(folder, recursive=folder != stage)
            sub["figures"] = [_figure(p) for p in imgs]
            shown.update(imgs)
            s["subsections"].append(sub)
    joint = stage / "joint"          # the joint follow-up's figures are in its own section
    s["figures"] = [_figure(p) for p in _images(stage) if p not in shown and joint not in p.parents]
    return s


def _joint(run: _Run):
    """The joint follow-up (``rounds/joint/summary.json`` in a pipeline run, ``followup/joint/`` when run on
    its own): each confirmed source's parameters from the
    joint posterior, the joint Bayes factor, the sampler's health and one corner plot per source."""
    s = _sec("joint", dict(SECTIONS)["joint"])
    folder = next((f for f in (run.dir / "rounds" / "joint", run.dir / "followup" / "joint")
                   if (f / "summary.json").is_file()), run.dir / "followup" / "joint")
    summary = _read_json(folder / "summary.json")
    if not isinstance(summary, dict) or not isinstance(summary.get("sources"), list):
        s["notes"].append("No joint follow-up in this run (it runs once the rounds have confirmed sources).")
        return s
    sources = [e for e in summary["sources"] if isinstance(e, dict)]
    bf, err = summary.get("log_bayes_factor"), summary.get("log_bayes_factor_error")
    s["paragraphs"].append(
        f"{len(sources)} confirmed source(s) sampled together: one likelihood for the sum of their signals "
        "(Earth and pulsar terms) in the run's noise model; "
        + (f"ln Bayes factor ({summary.get('bayes_factor_meaning', 'signals versus noise')}) = {bf:.2f}"
           + (f" ± {err:.2f}" if err is not None else "") + "." if bf is not None else "no Bayes factor."))
    model = summary.get("model") or {}
    if model.get("pulsar_phases"):
        s["paragraphs"].append(f"Pulsar-term phases: {model['pulsar_phases']}; sky prior: "
                               f"{model.get('sky_prior', '–')}; frequency prior: {model.get('frequency_prior', '–')}.")
    s["notes"] = [f"Sampler: {h}." for h in sampler_health(summary)] + list(summary.get("warnings") or [])
    for key, label, kind in (("effective_sample_size", "effective samples", "f0"),
                             ("n_samples", "posterior samples", "int"), ("iterations", "iterations", "int"),
                             ("walkers", "walkers per temperature", "int"), ("stopped_by", "stopped by", "text"),
                             ("wall_time", "wall time [s]", "f0")):
        if summary.get(key) not in (None, ""):
            s["items"].append((label, fmt_number(summary[key], kind)))
    for entry in sources:
        k = entry.get("source")
        band = entry.get("log10_frequency_band") or [None, None]
        truth = run.truth if (run.truth and band[0] is not None and run.truth.get("frequency")
                              and 10 ** band[0] <= run.truth["frequency"] <= 10 ** band[1]) else None
        sub = {"title": f"source {k}" + (f" (round {entry['round']})" if entry.get("round") is not None else ""),
               "notes": [], "paragraphs": [], "tables": [], "items": [], "figures": []}
        start = entry.get("start") or {}
        if start.get("frequency") is not None:
            sub["paragraphs"].append(f"Round estimate: f = {start['frequency']:.4g} Hz, ra {start.get('ra', 0):.2f}°, "
                                     f"dec {start.get('dec', 0):.2f}°.")
        sky = entry.get("sky")
        if sky:
            sub["paragraphs"].append(
                f"Sky position: ra {sky['ra']:.2f}°, dec {sky['dec']:.2f}°, 90 % of the samples within "
                f"{sky['radius_90_deg']:.3g}°, 90 % credible area {sky['credible_area_90_deg2']:.3g} deg²"
                + _sky_truth_text(sky, truth) + ".")
        table = _parameter_table(entry, truth or {})
        if table:
            table["title"] = f"Source {k}: joint-posterior medians and 90 % intervals"
            sub["tables"].append(table)
        png = folder / f"corner_source_{k}.png"
        if png.is_file():
            sub["figures"].append(_figure(png, f"Joint follow-up, source {k}: one- and two-dimensional marginals of "
                                               "its parameters, the other sources marginalised (dashed: 5 %, "
                                               "50 %, 95 %; magenta: truth from injection.json)"))
        for png in _images(folder / f"source-{k}" / "hosts"):   # its host ranking on its joint-posterior block
            sub["figures"].append(_figure(png, f"Joint follow-up, source {k}: "
                                               + (CAPTIONS.get(png.name) or png.stem.replace("_", " "))))
        s["subsections"].append(sub)
    s["tables"] = [_health_table(summary)]
    return s


def _rounds(run: _Run):
    """The rounds step (docs/design.md §14): the rule, one row per round, the confirmed sources, the figures
    (rounds.png and every rescan's scan and follow-up figures)."""
    s = _sec("rounds", dict(SECTIONS)["rounds"], notes=run.status_notes("rounds"))
    summ = _read_json(run.dir / "rounds" / "rounds.json") or run.stage_summary("rounds")
    if not summ.get("rounds"):
        s["figures"] = [_figure(p) for p in _images(run.dir / "rounds") if run.dir / "rounds" / "joint" not in p.parents]
        return s
    s["paragraphs"].append(f"Detection rule: {summ['detection_rule']}.")
    s["paragraphs"].append(
        f"{summ['n_confirmed']} source(s) confirmed in {summ['n_rounds']} round(s) (at most {summ['max_sources']}); "
        f"stopped: {summ.get('stopped') or 'not recorded'}. Round 1 is the scan and follow-up above; round K > 1 "
        "rescans the residuals after subtracting the K - 1 sources confirmed before it (rounds/round-K/). "
        f"Empirical FAPs of every round from {summ.get('null_sims', 0)} noise-only scans "
        f"({summ.get('null_source', 'scan/null_maxima.ecsv')}).")
    if summ.get("n_confirmed"):
        s["paragraphs"].append(
            f"Subtracted: the {summ.get('subtraction', 'posterior-median signal')} of each confirmed source "
            "(rounds/subtracted_signal.ecsv). A posterior-median signal is not the true one: some of the source's "
            "power stays in the residuals (a rescan candidate within one frequency bin of a confirmed source is "
            "taken as its remnant, not as a new source). The limits and the targeted searches use the "
            "subtracted data.")
    rows = []
    for entry in summ["rounds"]:
        cands = entry.get("candidates") or []
        if not cands:
            rows.append({"round": entry["round"], "subtracted": entry.get("subtracted_sources"),
                         "candidate_frequency": None, "fe": None, "fap": None, "fap_empirical": None,
                         "log_bayes_factor": None, "decision": entry.get("note") or "no candidate followed up",
                         "folder": entry.get("scan")})
        for c in cands:
            rows.append({"round": entry["round"], "subtracted": entry.get("subtracted_sources"),
                         "candidate_frequency": c.get("frequency"), "fe": c.get("fe"), "fap": c.get("fap"),
                         "fap_empirical": c.get("fap_empirical"), "log_bayes_factor": c.get("log_bayes_factor"),
                         "decision": c.get("decision", ""), "folder": c.get("folder")})
    with _extra_labels({"round": ("round", "", "int"), "subtracted": ("sources subtracted before", "", "int"),
                        "candidate_frequency": ("candidate frequency", "Hz", "g4"), "fe": ("Fe", "", "g4"),
                        "fap": ("FAP (analytic)", "", "g2"), "decision": ("detection rule", "", "text"),
                        "folder": ("folder", "", "text")}):
        s["tables"].append(table_view(rows, title="Rounds (one row per followed-up candidate)"))
    conf = summ.get("confirmed") or []
    if conf:
        srows = [{"source": c["source"], "round": c["round"], "frequency": c["frequency"], "ra": c["ra"],
                  "dec": c["dec"], "chirp_mass": c["chirp_mass"], "strain": c["strain"],
                  "fap_empirical": c["fap_empirical"], "log_bayes_factor": c["log_bayes_factor"],
                  "signal_rms_ns": c.get("signal_rms_ns"), "folder": c["folder"]} for c in conf]
        with _extra_labels({"source": ("source", "", "int"), "round": ("round", "", "int"),
                            "frequency": ("frequency (median)", "Hz", "g4"), "ra": ("ra (median)", "deg", "f2"),
                            "dec": ("dec (median)", "deg", "f2"), "signal_rms_ns": ("subtracted rms", "ns", "g3"),
                            "folder": ("follow-up", "", "text")}):
            s["tables"].append(table_view(srows, title="Confirmed sources (confirmed_sources.ecsv; posterior "
                                                       "medians of each round's follow-up)"))
        hosts = rounds_hosts_view(run.dir, conf)
        if hosts is not None:
            s["tables"].append(hosts)
            s["paragraphs"].append(
                "Host galaxies of every confirmed source: the hosts stage's ranking (the catalogue's galaxies "
                "weighted by the source's follow-up posterior in sky, distance and chirp mass, with the "
                "probability that the host is not in the catalogue) on the posterior of the round that confirmed "
                "it (round 1: hosts/; round K: rounds/round-K/hosts/) and, after a joint follow-up, on the "
                "source's block of the joint posterior (rounds/joint/source-J/hosts/). "
                "A host association is a probability under the stated priors, not an identification.")
        if len(conf) >= 2:
            joint = summ.get("joint_followup")
            s["paragraphs"].append("Joint follow-up of the confirmed sources: " + (
                "not run ([rounds] joint_followup = false); each source's parameters are from its own round's "
                "follow-up, with the sources confirmed before it subtracted." if not joint else
                str(joint.get("text", joint)) + "."))
    s["figures"] = [_figure(p, ("Rounds: loudest Fe over the sky per round, and the subtracted signal of the "
                                "pulsars where it is largest." if p.name == "rounds.png" else
                                f"{p.relative_to(run.dir / 'rounds').parts[0].replace('-', ' ')}: "
                                + (CAPTIONS.get(p.name) or p.stem.replace('_', ' '))))
                    for p in _images(run.dir / "rounds") if run.dir / "rounds" / "joint" not in p.parents]
    return s


def _hosts_record(run_dir, entry):
    """One confirmed source's host ranking as the report shows it: ``entry`` (rounds.json's ``hosts`` or
    ``joint_hosts`` of the source) with, for the round-1 source (ranked by the hosts stage, only its folder and
    candidate label recorded), the best host and probabilities of that candidate in ``hosts/hosts_summary.json``."""
    if not isinstance(entry, dict):
        return None
    if entry.get("note") and entry.get("folder"):
        summary = _read_json(Path(run_dir) / entry["folder"] / "hosts_summary.json")
        found = [c for c in (summary or {}).get("candidates") or []
                 if isinstance(c, dict) and c.get("candidate") == entry.get("candidate")]
        if not found:
            return dict(entry, error="the hosts stage has no ranking of this source (not run or no result)")
        # lazy: rounds.py loads the likelihood code; hosts_entry is the record the rounds step keeps of its rankings
        from .rounds import hosts_entry

        return hosts_entry(found[0], entry["folder"])
    return entry


def rounds_hosts_view(run_dir, confirmed):
    """The rounds section's table of each confirmed source's best host (rounds.json ``confirmed``: per source
    ``hosts`` and, after a joint follow-up, ``joint_hosts``); None when no source was ranked."""
    rows = []
    for c in confirmed:
        for key, what in (("hosts", "its round's follow-up"), ("joint_hosts", "joint follow-up")):
            rec = _hosts_record(run_dir, c.get(key))
            if rec is None:
                continue
            name = rec.get("best_host")
            rows.append({"source": c.get("source"), "round": c.get("round"), "posterior": what,
                         "best_host": name if name else ("–" if rec.get("error") else
                                                         "no catalogue galaxy in the 99 % sky region"),
                         "best_host_probability": rec.get("best_host_probability"),
                         "probability_not_in_catalogue": rec.get("probability_not_in_catalogue"),
                         "hosts_folder": rec.get("folder"), "note": rec.get("error") or ""})
    if not rows:
        return None
    with _extra_labels({"source": ("source", "", "int"), "round": ("round", "", "int"),
                        "posterior": ("posterior", "", "text"), "best_host": ("best host", "", "text"),
                        "best_host_probability": ("P(best host)", "", "g3"),
                        "probability_not_in_catalogue": ("P(host not in catalogue)", "", "g3"),
                        "hosts_folder": ("ranking", "", "text"), "note": ("note", "", "text")}):
        return table_view(rows, title="Host galaxies of the confirmed sources (best host and its probability; "
                                      "confirmed_sources.ecsv, full rankings in each folder's ranking.ecsv)")


def _subtraction_note(summ):
    """The statement of what the limits or targets stage subtracted (and the limits' subtraction error)."""
    note = (summ or {}).get("subtracted_sources")
    if not isinstance(note, dict) or not note.get("text"):
        return []
    out = [note["text"][0].upper() + note["text"][1:] + "."]
    err = note.get("subtraction_error") or {}
    if err.get("median_relative") is not None:
        out.append(f"Subtraction error of the limits ({err['method']}): median {100 * err['median_relative']:.2g} %, "
                   f"largest {100 * err['max_relative']:.2g} % ({err.get('file')}).")
    return out


def _hosts(run: _Run):
    s = _sec("hosts", dict(SECTIONS)["hosts"], notes=run.status_notes("hosts"))
    table = _read_table(run.dir / "hosts" / "ranking.ecsv")
    host = run.headline.get("best_host") or {}
    if host.get("warning"):
        s["notes"].append("Warning: " + host["warning"] + ".")
    summ = _read_json(run.dir / "hosts" / "hosts_summary.json") or {}
    for key, label, kind in (("n_catalogue", "galaxies in the catalogue", "int"),
                             ("distance_limit_mpc", "catalogue distance limit [Mpc]", "g4"),
                             ("completeness", "catalogue completeness", "g2"),
                             ("probability_not_in_catalogue", "probability the host is not catalogued", "g2"),
                             ("relation", "black-hole mass relation", "text"),
                             ("localisation_description", "localisation", "text")):
        if summ.get(key) is not None:
            s["items"].append((label, fmt_number(summ[key], kind)))
    if table is not None:
        cols = [c for c in ("name", "candidate", "probability", "ra", "dec", "distance", "redshift", "log_bayes_factor",
                            "n_effective", "sky_density", "distance_consistency", "mass_consistency",
                            "period_consistency", "log10_bh_mass", "mass_proxy") if c in table.colnames]
        truth = None
        if run.truth and run.truth.get("ra") is not None:
            truth = {k: run.truth[k] for k in ("ra", "dec") if k in run.truth}
            if run.truth.get("luminosity_distance") is not None:
                truth["distance"] = run.truth["luminosity_distance"]
            s["paragraphs"].append("First row (shaded): the injected binary's position and luminosity distance "
                                   "(injection.json), to compare with the ranked galaxies.")
        s["tables"].append(table_view(table, cols, 15, "probability", True, truth=truth))
    if summ.get("caution"):
        s["paragraphs"].append(summ["caution"])
    s["figures"] = [_figure(p) for p in _images(run.dir / "hosts")]
    return s


def galaxy_limits_view(table):
    """One row per galaxy: its position, distance and its tightest chirp-mass limit (and where in frequency)."""
    if table is None or not len(table) or "name" not in table.colnames:
        return None
    rows = []
    names = list(dict.fromkeys(str(n) for n in table["name"]))
    for name in names:
        sel = table[np.asarray([str(n) == name for n in table["name"]])]
        mc = np.asarray(sel["chirp_mass_95"], dtype=float) if "chirp_mass_95" in sel.colnames else None
        i = int(np.nanargmin(mc)) if mc is not None and np.isfinite(mc).any() else 0
        row = {"name": name}
        for c in ("ra", "dec", "distance"):
            if c in sel.colnames:
                row[c] = float(sel[c][i])
        row["chirp_mass_95"] = float(mc[i]) if mc is not None else None
        row["frequency"] = float(sel["frequency"][i])
        row["strain_95"] = float(sel["strain_95"][i]) if "strain_95" in sel.colnames else None
        rows.append(row)
    with _extra_labels({"chirp_mass_95": ("tightest 95 % chirp-mass limit", "Msun", "g3"),
                        "frequency": ("at GW frequency", "Hz", "g4")}):
        return table_view(rows, title="Chirp-mass limits per galaxy (tightest over frequency; the full "
                                      "table against frequency is galaxy_limits.ecsv)")


def _limit_at(table, frequency):
    """The sky-averaged 95 % strain limit at ``frequency`` [Hz], log-log interpolated in
    ``frequency_limits.ecsv``; None outside its frequencies or without a table."""
    if table is None or not len(table) or frequency is None or "strain_95" not in table.colnames:
        return None
    f = np.asarray(table["frequency"], dtype=float)
    h = np.asarray(table["strain_95"], dtype=float)
    ok = np.isfinite(f) & np.isfinite(h) & (f > 0) & (h > 0)
    if not ok.any() or not f[ok].min() <= frequency <= f[ok].max():
        return None
    order = np.argsort(f[ok])
    return float(10 ** np.interp(np.log10(frequency), np.log10(f[ok][order]), np.log10(h[ok][order])))


def limits_truth_text(table, truth):
    """The injected strain beside the sky-averaged 95 % limit at the injected frequency (log-log
    interpolation of ``frequency_limits.ecsv``), or '' without a truth or a table."""
    if table is None or not len(table) or not truth or truth.get("strain") is None or truth.get("frequency") is None:
        return ""
    f0, h0 = float(truth["frequency"]), float(truth["strain"])
    text = f"Truth (injection.json): strain amplitude h0 = {h0:.3g} at {f0 * 1e9:.3g} nHz"
    limit = _limit_at(table, f0)
    if limit is not None:
        relation = "above" if h0 > limit else "below"
        text += (f"; the sky-averaged 95 % limit there is {limit:.3g}: the injected strain lies {relation} it "
                 "(a calibrated 95 % limit sits above a present signal in about 95 % of datasets)")
    else:
        text += " (outside the frequencies of the limits stage)"
    return text + "."


def _limits(run: _Run):
    s = _sec("limits", dict(SECTIONS)["limits"], notes=run.status_notes("limits"))
    best = run.headline.get("best_limit")
    if best:
        s["paragraphs"].append(f"Most sensitive frequency {best['frequency'] * 1e9:.3g} nHz: sky-averaged 95 % strain "
                               f"upper limit {best['strain_95']:.3g}.")
    summ = _read_json(run.dir / "limits" / "limits_summary.json") or run.stage_summary("limits")
    s["notes"].extend(_subtraction_note(summ))
    for key, label, kind in (("method", "method", "text"), ("n_frequencies", "frequencies", "int"),
                             ("nside", "HEALPix nside", "int"), ("quadrature", "quadrature", "text"),
                             ("sky_frequency", "sky map at frequency [Hz]", "g4")):
        if summ.get(key) is not None:
            s["items"].append((label, fmt_number(summ[key], kind)))
    if summ.get("fmax_note"):
        s["paragraphs"].append("Note: " + summ["fmax_note"] + ".")
    for method in ("bayes", "frequentist"):
        m = summ.get(method)
        if isinstance(m, dict):
            text = (f"{method}: sky-averaged {fmt_number(m.get('strain_95_at_best_frequency'), 'g3')}, best sky "
                    f"position {fmt_number(m.get('best_pixel_strain_95'), 'g3')}")
            if m.get("pixels_with_empty_limit"):
                text += (f"; {m['pixels_with_empty_limit']} pixels have an empty limit (observed Fe below the "
                         "noise-only 95 % range)")
            s["paragraphs"].append(text + ".")
    ftab = _read_table(run.dir / "limits" / "frequency_limits.ecsv")
    truth_line = limits_truth_text(ftab, run.truth)
    if truth_line:
        s["paragraphs"].append(truth_line)
    if ftab is not None and len(ftab):
        cols = [c for c in ("frequency", "strain_95", "strain_95_best", "strain_95_median", "strain_95_worst",
                            "strain_95_frequentist", "fe_max") if c in ftab.colnames]
        with _extra_labels({"strain_95": ("95 % limit, sky average", "", "g3"),
                            "strain_95_best": ("best sky position", "", "g3"),
                            "strain_95_median": ("median sky position", "", "g3"),
                            "strain_95_worst": ("worst sky position", "", "g3"),
                            "strain_95_frequentist": ("frequentist, sky average", "", "g3"),
                            "fe_max": ("loudest Fe over the sky", "", "g3")}):
            s["tables"].append(table_view(ftab, cols, title="Strain limits against frequency"))
    g = galaxy_limits_view(_read_table(run.dir / "limits" / "galaxy_limits.ecsv"))
    if g:
        s["tables"].append(g)
    s["figures"] = [_figure(p) for p in _images(run.dir / "limits")]
    return s


def _targeted(run: _Run):
    """The targets stage: counts, corrections, the best targets and the two figures."""
    s = _sec("targets", dict(SECTIONS)["targets"], notes=run.status_notes("targets"))
    summ = _read_json(run.dir / "targets" / "targets_summary.json") or run.stage_summary("targets")
    s["notes"].extend(_subtraction_note(summ))
    if summ.get("n_targets") is not None:
        s["paragraphs"].append(
            f"{summ.get('n_searched')} of {summ['n_targets']} catalogue targets tested at their own sky position "
            f"({summ.get('n_period_targets')} in a window around the frequency of their catalogued period, "
            f"{summ.get('n_band_targets')} over the whole band; {summ.get('n_outside_band')} with a period "
            f"outside the band). p-values from {summ.get('p_value_from')}; Holm family-wise p < 0.05: "
            f"{summ.get('n_family_below_0.05')}; false-discovery-rate q < 0.05: {summ.get('n_fdr_below_0.05')}.")
        s["paragraphs"].append(
            "Every target adds a trial: read the family-wise or FDR corrected value, not the per-target p-value. "
            "The p-values assume the run's noise model; the catalogue's missing galaxies are not tested.")
    for key, label, kind in (("frequency_convention", "period convention", "text"), ("null", "null", "text"),
                             ("null_sims", "noise-only simulations", "int"), ("scrambles", "sky scrambles", "int"),
                             ("fdr_method", "false-discovery-rate method", "text")):
        if summ.get(key) not in (None, "", 0):
            s["items"].append((label, fmt_number(summ[key], kind)))
    if summ.get("followup"):
        s["paragraphs"].append("Handed to the follow-up (sky bounded to a cap around the target): " + ", ".join(
            f["name"] + (f" (ln Bayes factor {f['log_bayes_factor']:.1f} ± {f.get('log_bayes_factor_error') or 0:.1f}, "
                         f"{f['folder']})" if isinstance(f.get("log_bayes_factor"), (int, float)) else "")
            for f in summ["followup"]) + ".")
    elif summ.get("n_targets") is not None:
        s["paragraphs"].append(f"No target has a family-wise p-value below {summ.get('followup_threshold')}.")
    tab = _read_table(run.dir / "targets" / "results.ecsv")
    if tab is not None and len(tab):
        cols = [c for c in ("rank", "name", "window", "fe", "best_frequency", "p_value", "p_family", "q_fdr",
                            "distance", "chirp_mass_95") if c in tab.colnames]
        with _extra_labels({"window": ("window", "", "text"), "best_frequency": ("loudest frequency", "Hz", "g4"),
                            "p_value": ("p-value", "", "g2"), "p_family": ("family-wise p (Holm)", "", "g2"),
                            "q_fdr": ("FDR q", "", "g2")}):
            s["tables"].append(table_view(tab[tab["status"] == "searched"][:20], cols,
                                          title="The 20 most significant targets (all in targets/results.ecsv)"))
    s["figures"] = [_figure(p) for p in _images(run.dir / "targets")]
    return s


def run_cautions(run: _Run) -> list:
    """Cautions that depend on this run's numbers (added to the general ones)."""
    out = []
    path = str(run.dataset.get("path", ""))
    if "data/demo" in path.replace("\\", "/") or str(run.config.get("title", "")).lower().startswith(
            ("demo", "cwsearch demo")):
        out.append("This is the bundled demo: the pulsars (SIMPSRnn), the binary and the galaxies are invented.")
    for stage, info in run.stages.items():
        if info.get("status") in ("unavailable", "blocked", "failed"):
            out.append(f"The {stage} stage did not run ({info.get('reason')}); its section is empty.")
    for name, fol, _ in run.targets:
        err = fol.get("log_bayes_factor_error", fol.get("log_bayes_factor_err"))
        if isinstance(err, (int, float)) and err > 1:
            out.append(f"{name}: the Bayes factor's thermodynamic-integration error (±{err:.1f} in ln) is large; "
                       "raise [followup] temperatures for a firmer value.")
        ess = fol.get("effective_sample_size", fol.get("ess"))
        if isinstance(ess, (int, float)) and ess < 1000:
            out.append(f"{name}: only {ess:.0f} effective posterior samples; posterior tails and the host "
                       "probabilities are rough; raise [followup] ess.")
        if fol.get("stopped_by") not in (None, "ess", "converged"):
            out.append(f"{name}: the sampler stopped by {fol.get('stopped_by')}, not by reaching its "
                       "effective-sample target.")
    cand = run.headline.get("candidate") or {}
    if cand and not cand.get("null_sims"):
        out.append("False-alarm probabilities are analytic (effective number of templates) only; "
                   "ask the scan for noise-only simulations for an empirical calibration.")
    return out


def _cautions(run: _Run):
    return _sec("cautions", dict(SECTIONS)["cautions"], list=run_cautions(run) + list(GENERAL_CAUTIONS))


def _provenance(run: _Run):
    s = _sec("provenance", dict(SECTIONS)["provenance"])
    p = run.provenance
    if not p:
        s["notes"].append("No provenance.json in this run folder.")
        return s
    items = [("started", p.get("started")), ("finished", p.get("finished")), ("status", p.get("status")),
             ("seed", p.get("seed")), ("dataset checksum", p.get("dataset_checksum")), ("host", p.get("host")),
             ("CPUs", p.get("cpu_count")), ("run file", p.get("run_file"))]
    items += list((p.get("versions") or {}).items())
    s["items"] = [(k, fmt_number(v, "text")) for k, v in items if v not in (None, "")]
    rows = [{"stage": st.get("stage"), "status": st.get("status"), "seconds": st.get("seconds"),
             "note": st.get("reason", "")} for st in run.stages.values()]
    with _extra_labels({"stage": ("stage", "", "text"), "status": ("status", "", "text"),
                        "seconds": ("wall time", "s", "f1"), "note": ("note", "", "text")}):
        t = table_view(rows)
    if t:
        s["tables"].append(t)
    return s


_BUILDERS = {"dataset": _dataset, "noise": _noise, "scan": _scan, "candidates": _candidates,
             "followup": _followup, "rounds": _rounds, "joint": _joint, "hosts": _hosts, "limits": _limits,
             "targets": _targeted, "cautions": _cautions,
             "provenance": _provenance}


def _environment():
    # lazy: a heavy import, loaded only when this runs
    import jinja2

    return jinja2.Environment(loader=jinja2.FileSystemLoader(str(Path(__file__).parent / "templates")),
                              autoescape=True, undefined=jinja2.StrictUndefined, trim_blocks=False)


def render_report(run_dir) -> str:
    """The report of ``run_dir`` as an HTML string."""
    run = _Run(run_dir)
    title = run.config.get("title") or f"cwsearch run {run.dir.name}"
    sections = []
    for sid, heading in SECTIONS:
        if sid == "headline":
            sections.append(_sec("headline", heading))
        else:
            sections.append(_BUILDERS[sid](run))
    for s in sections:
        s["tables"] = [t for t in s["tables"] if t]
    stamp = run.provenance.get("finished") or run.provenance.get("started") or ""
    nav = [(sid, t.split(":")[0]) for sid, t in SECTIONS]
    return _environment().get_template("report.html.j2").render(
        title=title, version=__version__, run_dir=str(run.dir), stamp=stamp, nav=nav, sections=sections,
        first=first_screen(run), css=_CSS, js=_JS)


def build_report(run_dir) -> Path:
    """Write ``run_dir/report.html`` (atomically) and return its path."""
    run_dir = Path(run_dir)
    path = run_dir / "report.html"
    write_text_atomic(path, render_report(run_dir))
    return path


__all__ = ["build_report", "render_report", "embed_png", "table_view", "fmt_number", "first_screen",
           "headline_result", "format_headline",
           "galaxy_limits_view", "limits_truth_text", "rounds_hosts_view", "noise_pulsar_view", "background_comparison_view", "BACKGROUND_LABELS", "SECTIONS", "GENERAL_CAUTIONS",
           "LABELS", "CAPTIONS"]
