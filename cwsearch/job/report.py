"""The run report: one self-contained HTML page per run folder.

:func:`build_report` reads a run folder (docs/design.md §11) and writes
``report.html`` next to it: every PNG of every stage folder embedded as a
base64 ``data:`` URI, tables written out, inline CSS, no scripts and no
links to anything outside the page, so it opens offline, can be mailed as
one file, and never contacts the network.

Sections (each is present even when its stage did not run, saying why):

``headline``     the result in three lines
``dataset``      pulsars, TOAs, spans, backends, noise; pulsar sky positions
``scan``         Fe/Fp spectrum and sky map
``candidates``   candidate table with false-alarm probabilities
``followup``     posterior plots, Bayes factor, sampler diagnostics
``hosts``        host ranking
``limits``       strain limits versus frequency and sky, chirp-mass limits
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
import tomllib
from pathlib import Path

import numpy as np

from .. import __version__
from ..core.fileio import write_text_atomic
from .runfolder import read_json, read_record, read_table

#: (id, title) of every report section, in page order
SECTIONS = (
    ("headline", "Headline"),
    ("dataset", "Dataset"),
    ("noise", "Noise model"),
    ("scan", "Scan: spectrum and sky map"),
    ("candidates", "Candidates"),
    ("followup", "Follow-up: posterior and Bayes factor"),
    ("hosts", "Host galaxies"),
    ("limits", "Upper limits"),
    ("cautions", "Cautions"),
    ("provenance", "Provenance"),
)

#: run-folder files shown as tables: (stage, file, max rows, sort column, descending)
TABLES = {
    "candidates": ("scan", "candidates.ecsv", 25, "fap", False),
    "hosts": ("hosts", "ranking.ecsv", 15, "probability", True),
}

GENERAL_CAUTIONS = (
    "The noise model decides the answer: false-alarm probabilities, Bayes factors and limits are only as good "
    "as the white-noise factors, red-noise spectra and common process used. A mis-modelled red process "
    "produces low-frequency candidates; repeat the run with other noise settings and with pulsars left out.",
    "Trials: the scan tests every sky pixel and frequency. Quote the trials-corrected or empirical "
    "false-alarm probability, never the single-template one, as the significance of the loudest peak.",
    "Empirical false-alarm probabilities come from noise-only simulations drawn from the same noise model, "
    "so they do not protect against a wrong noise model.",
    "Pulsar distances are known to only 10-30 %, much worse than a gravitational wavelength, so pulsar-term "
    "phases are free nuisance parameters: the pulsar term sharpens frequency and chirp mass, not distance.",
    "A host ranking is a probability under the catalogue, its completeness and the mass relations used, "
    "not an identification; treat the top galaxy as a target for electromagnetic follow-up.",
    "Upper limits are conditional on the noise model and the priors of the limits stage (uniform strain "
    "prior, random orientation).",
)

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;
color:#1b1b1b;line-height:1.45}
h1{font-size:1.7em;margin-bottom:.2em}h2{border-bottom:2px solid #2b5c8a;padding-bottom:.2em;margin-top:2em}
.sub{color:#666;margin-top:0}nav a{margin-right:1em}
table{border-collapse:collapse;font-size:.85em;margin:.6em 0}
th,td{border:1px solid #ccc;padding:.25em .5em;text-align:right}th{background:#eef3f8}
td.t,th.t{text-align:left}
figure{display:inline-block;margin:.5em;vertical-align:top;max-width:100%}
figure img{max-width:100%;border:1px solid #ddd}figcaption{font-size:.85em;color:#555;text-align:center}
.headline{background:#f3f8ee;border-left:5px solid #5a9a2c;padding:.6em 1em;font-size:1.05em}
.note{color:#8a5a00;background:#fff7e6;border-left:4px solid #e0a030;padding:.3em .8em}
dl{display:grid;grid-template-columns:max-content auto;gap:.2em 1em;font-size:.9em}dt{font-weight:600}
"""


# ---------------------------------------------------------------- helpers


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _fmt(v) -> str:
    """A table cell: 4 significant digits for floats, plain text otherwise."""
    try:
        v = v.item()
    except AttributeError:
        pass
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        if v != v:
            return "–"
        return f"{v:.4g}"
    if isinstance(v, (list, tuple)):
        return ", ".join(_fmt(x) for x in v)
    return str(v)


def embed_png(path, caption=None) -> str:
    """An ``<figure>`` with the PNG at ``path`` embedded as a base64 data URI."""
    data = Path(path).read_bytes()
    b64 = base64.b64encode(data).decode("ascii")
    caption = caption if caption is not None else _caption(Path(path))
    return (f'<figure><img src="data:image/png;base64,{b64}" alt="{_e(caption)}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def _caption(path: Path) -> str:
    parts = list(path.parts[-2:]) if path.parent.name.startswith(("candidate", "galaxy")) else [path.name]
    text = " / ".join(parts)
    return text.removesuffix(".png").replace("_", " ")


def _images(folder) -> list:
    """PNG files of a stage folder (sub-folders too), sorted; hidden files left out."""
    folder = Path(folder)
    if not folder.is_dir():
        return []
    return sorted(p for p in folder.rglob("*.png")
                  if not any(part.startswith(".") for part in p.relative_to(folder).parts))


def _figures(folder) -> str:
    imgs = _images(folder)
    return "\n".join(embed_png(p) for p in imgs)


def html_table(table, max_rows=None, sort=None, descending=False) -> str:
    """An astropy Table (or list of dicts) as an HTML table, units in the header."""
    if table is None:
        return ""
    if isinstance(table, list):
        if not table:
            return ""
        cols = list(table[0].keys())
        rows = [[r.get(c) for c in cols] for r in table]
        units = [""] * len(cols)
    else:
        if sort and sort in table.colnames:
            table = table.copy()
            table.sort(sort, reverse=descending)
        cols = [c for c in table.colnames if table[c].ndim == 1]
        rows = [[row[c] for c in cols] for row in table]
        units = [f" [{table[c].unit}]" if getattr(table[c], "unit", None) not in (None, "") else "" for c in cols]
    shown = rows if max_rows is None else rows[:max_rows]
    out = ["<table><thead><tr>"]
    for c, u in zip(cols, units):
        out.append(f'<th class="t">{_e(c)}{_e(u)}</th>')
    out.append("</tr></thead><tbody>")
    for r in shown:
        cells = []
        for v in r:
            text = _fmt(v)
            cls = ' class="t"' if isinstance(v, str) or isinstance(v, (list, tuple)) else ""
            cells.append(f"<td{cls}>{_e(text)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    if max_rows is not None and len(rows) > max_rows:
        out.append(f"<p class=sub>Showing {max_rows} of {len(rows)} rows; the full table is in the run folder.</p>")
    return "".join(out)


def _dl(items) -> str:
    rows = [f"<dt>{_e(k)}</dt><dd>{_e(_fmt(v))}</dd>" for k, v in items if v is not None and v != ""]
    return "<dl>" + "".join(rows) + "</dl>" if rows else ""


def _summary_items(summary, skip=()):
    """Flat scalar items of a stage summary dict, for a definition list."""
    items = []
    for k, v in (summary or {}).items():
        if k in skip or isinstance(v, dict):
            continue
        if isinstance(v, list) and (len(v) > 8 or any(isinstance(x, (dict, list)) for x in v)):
            continue
        items.append((k.replace("_", " "), v))
    return items


# ---------------------------------------------------------------- sections
class _Run:
    """Everything the report needs, read once from a run folder."""

    def __init__(self, run_dir):
        self.dir = Path(run_dir)
        self.provenance = read_json(self.dir / "provenance.json") or {}
        self.dataset = read_json(self.dir / "dataset.json") or {}
        summary = read_json(self.dir / "summary.json") or {}
        self.headline = summary.get("headline") or {}
        self.stages = {s["stage"]: s for s in summary.get("stages", []) if isinstance(s, dict)}
        self.records = {}
        for stage in ("noise", "scan", "followup", "hosts", "limits"):
            rec = read_json(self.dir / stage / ".stage.json")
            if rec:
                self.records[stage] = rec
        try:

            self.config = tomllib.loads((self.dir / "run.toml").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            self.config = {}

    def stage_summary(self, stage) -> dict:
        rec = self.records.get(stage) or {}
        return rec.get("summary") or {}

    def status_note(self, stage) -> str:
        """A note when a stage has no result (not run, no candidate, unavailable)."""
        rec = self.records.get(stage)
        info = self.stages.get(stage, {})
        if rec and rec.get("status") == "complete":
            return ""
        if rec and rec.get("status") == "empty":
            return f'<p class="note">No result: {_e(rec.get("reason") or "nothing to compute")}.</p>'
        reason = info.get("reason") or ("interrupted; run again to resume" if rec else "not run")
        return f'<p class="note">Stage {_e(stage)}: {_e(info.get("status", "not run"))} — {_e(reason)}.</p>'


def _headline(run: _Run) -> str:
    head = run.headline
    if not head:
        return '<p class="note">No headline: the run has not finished.</p>'
    lines = format_headline(head).splitlines()
    return '<div class="headline">' + "<br>".join(_e(x) for x in lines) + "</div>"


def _dataset(run: _Run) -> str:
    d = run.dataset
    if not d:
        return '<p class="note">No dataset summary in this run folder.</p>'
    parts = [_dl([("folder", d.get("path")), ("pulsars", d.get("n_pulsars")), ("TOAs", d.get("n_toas")),
                  ("span [yr]", d.get("span_yr")), ("checksum (SHA-256)", d.get("checksum"))])]
    rows = []
    for p in d.get("pulsars", []):
        red = p.get("red_noise")
        rows.append({"name": p["name"], "ra [deg]": p["ra_deg"], "dec [deg]": p["dec_deg"],
                     "distance [kpc]": p["distance_kpc"], "± [kpc]": p["distance_err_kpc"],
                     "TOAs": p["n_toas"], "span [yr]": p["span_yr"], "backends": ", ".join(p["backends"]),
                     "median σ [ns]": p["median_sigma_ns"],
                     "red noise": (f"log10 A = {red['log10_amplitude']:.2f}, γ = {red['index']:.2f}"
                                   if red else "none")})
    parts.append(html_table(rows))
    for name in ("dataset.png",):
        if (run.dir / name).is_file():
            parts.append(embed_png(run.dir / name, "pulsar sky positions and observing spans"))
    return "\n".join(parts)


_STAGE_SUMMARY_FILES = {"scan": ("scan_summary.json",), "followup": ("summary.json",),
                        "hosts": ("hosts_summary.json",), "limits": ("limits_summary.json",)}


def stage_noise_models(run: _Run) -> dict:
    """stage -> the ``noise_model`` description its summary states (stages that ran)."""
    out = {}
    for stage, names in _STAGE_SUMMARY_FILES.items():
        summary = run.stage_summary(stage)
        desc = summary.get("noise_model")
        if desc is None:
            for name in names:
                desc = (read_json(run.dir / stage / name) or {}).get("noise_model")
                if desc is not None:
                    break
        if desc is not None:
            out[stage] = desc
    return out


def _noise(run: _Run) -> str:
    parts = []
    used = stage_noise_models(run)
    if used:
        rows = [{"stage": st, "source": d.get("source"), "meaning": d.get("meaning"),
                 "table": Path(d["table"]).name if d.get("table") else "-",
                 "table SHA-256": (d.get("table_checksum") or "-")[:16],
                 "pulsars with red noise": d.get("n_red_noise"),
                 "common process": (f"log10 A = {d['common']['log10_amplitude']:.2f}, γ = {d['common']['index']:.2f} "
                                    f"({d['common'].get('correlation')})" if d.get("common") else "none")}
                for st, d in used.items()]
        parts.append("<p>The noise model each stage used (source, values, checksum):</p>" + html_table(rows))
        keys = {(d.get("source"), d.get("table_checksum"), json.dumps(d.get("settings"), sort_keys=True))
                for d in used.values()}
        if len(keys) > 1:
            parts.append('<p class="note">The stages did not all use the same noise model: rerun with one '
                         '--noise-model (or [noise] model) for the whole run.</p>')
        notes = sorted({n for d in used.values() for n in d.get("notes", [])})
        parts.extend(f'<p class="note">{_e(n)}</p>' for n in notes)
    fit = read_json(run.dir / "noise" / "summary.json")
    if fit:
        c = fit.get("common")
        items = [("method", fit.get("method")), ("uncertainties", fit.get("uncertainties")),
                 ("priors", fit.get("priors")), ("red-noise test", fit.get("red_noise_test")),
                 ("red-noise threshold (2 ΔlnL)", fit.get("red_noise_threshold")),
                 ("pulsars with red noise", f"{fit.get('n_red_noise')} of {fit.get('n_pulsars')}"),
                 ("dataset checksum", fit.get("dataset_checksum"))]
        if c:
            items.append(("common process", f"log10 A = {c['log10_amplitude']:.3f} ± {c['log10_amplitude_err']:.3f}, "
                          f"γ = {c['index']:.2f} ± {c['index_err']:.2f} ({c.get('correlation')}); 2 ΔlnL against "
                          f"zero amplitude = {c['statistic']:.1f}"))
            cmp = c.get("correlated_vs_uncorrelated")
            if cmp:
                items.append(("correlated vs uncorrelated", f"2 ΔlnL = {cmp['statistic']:.2f}"))
        a = fit.get("array_low_frequency") or {}
        items.append(("array low-frequency excess p", a.get("pvalue")))
        parts.append(_dl(items))
        rows = []
        for p in fit.get("pulsars", []):
            red, gof = p["red_noise"], p.get("goodness_of_fit") or {}
            white = "; ".join(f"{b}: ×{w['sigma_scale']:.3f}±{w['sigma_scale_err']:.3f}, "
                              f"+{w['sigma_added_s'] * 1e9:.1f}±{w['sigma_added_err_s'] * 1e9:.1f} ns"
                              for b, w in p["white"].items())
            rows.append({"pulsar": p["name"], "white noise (scale, added)": white, "model": red["model"],
                         "2 ΔlnL": round(red["statistic"], 2),
                         "red log10 A": (f"{red['log10_amplitude']:.2f} ± {red['log10_amplitude_err']:.2f}"
                                         if red["claimed"] else "-"),
                         "red γ": f"{red['index']:.2f} ± {red['index_err']:.2f}" if red["claimed"] else "-",
                         "normality p": gof.get("normality_pvalue"), "low-freq. p": gof.get("low_frequency_pvalue"),
                         "check": "FAIL" if gof.get("flagged") else "ok", "converged": p["converged"]})
        parts.append(html_table(rows))
        parts.extend(f'<p class="note">{_e(w)}</p>' for w in fit.get("warnings", []))
        parts.append(_figures(run.dir / "noise"))
    elif not used:
        parts.append(run.status_note("noise") or '<p class="note">No noise model recorded.</p>')
    return "\n".join(p for p in parts if p)


def _scan(run: _Run) -> str:
    parts = [run.status_note("scan")]
    summary = run.stage_summary("scan")
    parts.append(_dl(_summary_items(summary)))
    parts.append(_figures(run.dir / "scan"))
    return "\n".join(p for p in parts if p)


def _candidates(run: _Run) -> str:
    stage, name, max_rows, sort, desc = TABLES["candidates"]
    table = read_table(run.dir / stage / name)
    if table is None:
        return run.status_note("scan") or '<p class="note">No candidate table.</p>'
    thr = (run.headline.get("candidate") or {}).get("fap_threshold")
    followed = run.stage_summary("followup").get("followed_rows")
    intro = (f"<p>Peaks of the scan, best first. Candidates with false-alarm probability (column fap) below "
             f"{_e(_fmt(thr))} are followed up, one per frequency bin, at most [followup] max_candidates"
             + (f"; followed up here: rank {_e(', '.join(str(r) for r in followed))}" if followed else "")
             + ".</p>" if thr is not None else "")
    if not len(table):
        return intro + "<p>The scan found no peaks.</p>"
    return intro + html_table(table, max_rows, sort, desc)


def _followup_targets(run: _Run):
    """(name, summary dict, folder) per followed-up candidate."""
    folder = run.dir / "followup"
    top = read_json(folder / "summary.json")
    if not isinstance(top, dict):
        summary = run.stage_summary("followup")
        return [("candidate", summary, folder)] if summary.get("log_bayes_factor") is not None else []
    if isinstance(top.get("targets"), list) and isinstance(top.get("log_bayes_factor"), list):
        out = []
        for name in top["targets"]:
            sub = folder / str(name)
            out.append((str(name), read_json(sub / "summary.json") or {}, sub))
        return out
    return [(str(top.get("target", "candidate")), top, folder)]


def _bayes_line(summary) -> str:
    bf = summary.get("log_bayes_factor")
    if bf is None:
        return ""
    err = summary.get("log_bayes_factor_error", summary.get("log_bayes_factor_err"))
    text = f"ln Bayes factor (signal vs noise) = {_fmt(bf)}" + (f" ± {_fmt(err)}" if err is not None else "")
    return f"<p><b>{_e(text)}</b></p>"


def _parameter_table(summary) -> str:
    params = summary.get("parameters")
    if not isinstance(params, dict) or not params:
        return ""
    rows = []
    for name, p in params.items():
        if not isinstance(p, dict):
            continue
        lo, hi = (p.get("interval_90") or [None, None])[:2]
        rows.append({"parameter": name, "median": p.get("median"), "5 %": lo, "95 %": hi,
                     "unit": p.get("unit", "")})
    return "<p>Posterior medians and 90 % intervals:</p>" + html_table(rows)


_FOLLOWUP_SKIP = ("log_bayes_factor", "log_bayes_factor_error", "log_bayes_factor_err", "target", "seed",
                  "parameters", "options", "folders", "targets")


def _followup(run: _Run) -> str:
    parts = [run.status_note("followup")]
    targets = _followup_targets(run)
    stage = run.dir / "followup"
    shown = set()
    for name, summary, folder in targets:
        if len(targets) > 1:
            parts.append(f"<h3>{_e(name)}</h3>")
        parts.append(_bayes_line(summary))
        parts.append(_parameter_table(summary))
        parts.append(_dl(_summary_items(summary, skip=_FOLLOWUP_SKIP)))
        imgs = sorted(folder.glob("*.png")) if folder != stage or len(targets) > 1 else _images(folder)
        parts.extend(embed_png(p) for p in imgs)
        shown.update(imgs)
    parts.extend(embed_png(p) for p in _images(stage) if p not in shown)
    return "\n".join(p for p in parts if p)


def _hosts(run: _Run) -> str:
    parts = [run.status_note("hosts")]
    stage, name, max_rows, sort, desc = TABLES["hosts"]
    table = read_table(run.dir / stage / name)
    if table is not None:
        parts.append(html_table(table, max_rows, sort, desc))
    parts.append(_dl(_summary_items(run.stage_summary("hosts"))))
    parts.append(_figures(run.dir / "hosts"))
    return "\n".join(p for p in parts if p)


def _limits(run: _Run) -> str:
    parts = [run.status_note("limits")]
    best = run.headline.get("best_limit")
    if best:
        parts.append(f"<p><b>Most sensitive frequency: {_e(_fmt(best['frequency']))} Hz, sky-averaged 95 % "
                     f"strain upper limit {_e(_fmt(best['strain_95']))}.</b></p>")
    parts.append(_dl(_summary_items(run.stage_summary("limits"))))
    for extra in ("galaxy_limits.ecsv", "chirp_mass_limits.ecsv"):
        table = read_table(run.dir / "limits" / extra)
        if table is not None and len(table):
            parts.append(f"<h3>{_e(extra.removesuffix('.ecsv').replace('_', ' '))}</h3>" + html_table(table, 20))
    parts.append(_figures(run.dir / "limits"))
    return "\n".join(p for p in parts if p)


def run_cautions(run: _Run) -> list:
    """Cautions that depend on this run's numbers (added to the general ones)."""
    out = []
    path = str(run.dataset.get("path", ""))
    if "data/demo" in path.replace("\\", "/") or run.config.get("title", "").lower().startswith("demo"):
        out.append("This is the bundled demo: the pulsars (SIMPSRnn), the binary and the galaxies are invented.")
    for stage, info in run.stages.items():
        if info.get("status") in ("unavailable", "blocked", "failed"):
            out.append(f"The {stage} stage did not run ({info.get('reason')}); its section is empty.")
    for name, fol, _ in _followup_targets(run):
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
    scan = run.stage_summary("scan")
    gof = (scan or {}).get("goodness_of_fit") or {}
    out.extend(f"Goodness of fit: {w}" for w in gof.get("warnings", []))
    if scan and not any("empirical" in k for k in scan):
        out.append("False-alarm probabilities are analytic (effective number of templates) only; "
                   "ask the scan for noise-only simulations for an empirical calibration.")
    return out


def _cautions(run: _Run) -> str:
    items = run_cautions(run) + list(GENERAL_CAUTIONS)
    return "<ul>" + "".join(f"<li>{_e(c)}</li>" for c in items) + "</ul>"


def provenance_record(run: _Run) -> str:
    p = run.provenance
    if not p:
        return '<p class="note">No provenance.json in this run folder.</p>'
    items = [("started", p.get("started")), ("finished", p.get("finished")), ("status", p.get("status")),
             ("seed", p.get("seed")), ("dataset checksum", p.get("dataset_checksum")), ("host", p.get("host")),
             ("CPUs", p.get("cpu_count")), ("run file", p.get("run_file"))]
    versions = p.get("versions") or {}
    items += [(f"{k}", v) for k, v in versions.items() if v]
    stage_rows = [{"stage": s.get("stage"), "status": s.get("status"), "seconds": s.get("seconds"),
                   "note": s.get("reason", "")} for s in run.stages.values()]
    return _dl(items) + html_table(stage_rows)


_BUILDERS = {"headline": _headline, "dataset": _dataset, "noise": _noise, "scan": _scan, "candidates": _candidates,
             "followup": _followup, "hosts": _hosts, "limits": _limits, "cautions": _cautions,
             "provenance": provenance_record}


def render_report(run_dir) -> str:
    """The report of ``run_dir`` as an HTML string."""
    run = _Run(run_dir)
    title = run.config.get("title") or f"cwsearch run {run.dir.name}"
    nav = "".join(f'<a href="#{sid}">{_e(t.split(":")[0])}</a>' for sid, t in SECTIONS)
    body = []
    for sid, heading in SECTIONS:
        content = _BUILDERS[sid](run)
        body.append(f'<section id="{sid}"><h2>{_e(heading)}</h2>\n{content}\n</section>')
    stamp = run.provenance.get("finished") or run.provenance.get("started") or ""
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f"<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"><title>{_e(title)}</title>"
        f"<style>{_CSS}</style></head><body>\n"
        f"<h1>{_e(title)}</h1><p class=\"sub\">cwsearch {_e(__version__)} · run folder {_e(run.dir)}"
        f"{' · ' + _e(stamp) if stamp else ''}</p><nav>{nav}</nav>\n" + "\n".join(body) + "\n</body></html>\n"
    )


def build_report(run_dir) -> Path:
    """Write ``run_dir/report.html`` (atomically) and return its path."""
    run_dir = Path(run_dir)
    path = run_dir / "report.html"
    write_text_atomic(path, render_report(run_dir))
    return path




# ---------------------------------------------------------------- headline
def headline_result(run_dir, reports=None) -> dict:
    """The headline: candidate found or not and its significance, best host, best limit.

    Read from the stage output files of docs/design.md §11, so it works for any
    run folder.
    """

    run_dir = Path(run_dir)
    statuses = {r.name: r for r in (reports or [])}
    head = {"candidate_found": False, "candidate": None, "best_host": None, "best_limit": None}

    fol = read_json(run_dir / "followup" / "summary.json")
    fol_rec = read_record(run_dir / "followup")
    followed = fol_rec.get("summary", {}) if fol_rec and fol_rec.get("status") == "complete" else {}
    cands = read_table(run_dir / "scan" / "candidates.ecsv")
    if cands is not None and len(cands):
        best = cands[int(np.argmin(cands["fap"]))] if "fap" in cands.colnames else cands[0]
        cand = {k: _num(best[k]) for k in ("frequency", "ra", "dec", "fe", "fap", "fap_empirical")
                if k in cands.colnames}
        threshold = _threshold(run_dir)
        cand["fap_threshold"] = threshold
        head["candidate_found"] = bool("fap" in cand and threshold is not None and cand["fap"] < threshold)
        if isinstance(fol, dict) and fol.get("log_bayes_factor") is not None:
            bf = fol["log_bayes_factor"]
            err = fol.get("log_bayes_factor_error", fol.get("log_bayes_factor_err"))
            if isinstance(bf, list):  # several candidates followed: the first is the best
                bf = bf[0] if bf else None
                err = err[0] if isinstance(err, list) and err else None
            cand["log_bayes_factor"] = _num(bf)
            if err is not None:
                cand["log_bayes_factor_err"] = _num(err)
        for key in ("log_bayes_factor", "log_bayes_factor_err"):
            if key not in cand and key in followed:
                cand[key] = _num(followed[key])
        head["candidate"] = cand
    hosts = read_table(run_dir / "hosts" / "ranking.ecsv")
    if hosts is not None and len(hosts) and "probability" in hosts.colnames:
        i = int(np.argmax(hosts["probability"]))
        head["best_host"] = {"name": str(hosts["name"][i]), "probability": _num(hosts["probability"][i])}
    lim = read_table(run_dir / "limits" / "frequency_limits.ecsv")
    if lim is not None and len(lim) and "strain_95" in lim.colnames:
        i = int(np.nanargmin(np.asarray(lim["strain_95"], dtype=float)))
        head["best_limit"] = {"frequency": _num(lim["frequency"][i]), "strain_95": _num(lim["strain_95"][i])}
    if statuses:
        head["stages"] = {name: r.status for name, r in statuses.items()}
    return head


def _threshold(run_dir):
    rec = read_record(Path(run_dir) / "followup")
    if rec:
        thr = rec.get("inputs", {}).get("options", {}).get("fap_threshold")
        if thr is not None:
            return float(thr)
    try:

        cfg = tomllib.loads((Path(run_dir) / "run.toml").read_text(encoding="utf-8"))
        return float(cfg.get("followup", {}).get("fap_threshold", 0.01))
    except (OSError, ValueError):
        return 0.01


def _num(v):
    try:
        v = v.item()
    except AttributeError:
        pass
    if isinstance(v, float) and v != v:
        return None
    return v


def format_headline(head: dict) -> str:
    """The headline as a few plain-English lines."""
    lines = []
    cand = head.get("candidate")
    if head.get("candidate_found") and cand:
        line = (f"Candidate found: f_gw = {cand['frequency']:.4g} Hz at ra = {cand.get('ra', float('nan')):.1f} deg, "
                f"dec = {cand.get('dec', float('nan')):.1f} deg, false-alarm probability {cand['fap']:.2g}")
        if cand.get("log_bayes_factor") is not None:
            line += f", ln Bayes factor {cand['log_bayes_factor']:.1f}"
            if cand.get("log_bayes_factor_err") is not None:
                line += f" ± {cand['log_bayes_factor_err']:.1f}"
        lines.append(line + ".")
    elif cand:
        lines.append(f"No candidate: the strongest peak (f_gw = {cand['frequency']:.4g} Hz) has false-alarm "
                     f"probability {cand.get('fap', float('nan')):.2g}, above the threshold "
                     f"{cand.get('fap_threshold')}.")
    else:
        lines.append("No candidate (no scan result).")
    host = head.get("best_host")
    if host:
        lines.append(f"Best host: {host['name']} with probability {host['probability']:.2f}.")
    lim = head.get("best_limit")
    if lim:
        lines.append(f"Sky-averaged 95% strain upper limit: {lim['strain_95']:.3g} at {lim['frequency']:.4g} Hz "
                     "(most sensitive frequency).")
    return "\n".join(lines)


__all__ = ["build_report", "render_report", "embed_png", "html_table", "SECTIONS", "GENERAL_CAUTIONS",
           "headline_result", "format_headline"]
