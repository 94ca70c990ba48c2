"""The headline of a run: what the data support, in a few lines (issue 15 §2).

:func:`headline_result` reads a run folder (docs/design.md §11) and returns a
JSON-serialisable dict; :func:`format_headline` turns it into plain-English
lines for the terminal, ``summary.json`` and the report's first screen.

Rules:

- **False-alarm probability.** Where noise-only scans ran, the headline quotes
  the *empirical* false-alarm probability ``(1 + k)/(1 + N)``; when no noise-only
  scan reached the candidate (k = 0) that is the resolution floor, written as
  an upper bound ``FAP < 1/(N+1)``, never as a value. The analytic figure
  (effective-trials estimate) stays, labelled as analytic.
- **Position.** Once a follow-up ran, the position is its posterior (mean
  direction of the samples and the 90 % credible sky area in deg²), not the
  scan pixel.
- **One source, one line.** Follow-ups whose posteriors overlap (90 %
  frequency intervals overlap and sky positions within the sum of their 90 %
  radii) are one source; the line says which scan peaks fed it.
- **Health.** Sampler problems (cold-chain swap acceptance below
  :data:`COLD_SWAP_MIN`, any adjacent pair below :data:`PAIR_SWAP_MIN`, an
  effective sample size below the target, a stop by the iteration or time cap)
  and a best host resting on few effective samples are warnings shown in the
  headline itself.

Examples
--------
>>> fap_text(0.047619, 20, 1e-31)
'FAP < 0.048 (20 noise-only scans; analytic estimate 1e-31)'
>>> fap_text(0.2, 20, 0.3)
'FAP = 0.2 (empirical, 20 noise-only scans; analytic estimate 0.3)'
>>> fap_text(None, 0, 4e-31)
'FAP 4e-31 (analytic, effective-trials estimate; no noise-only scans were run)'
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np

from ..physics.sky import angular_separation
from .runfolder import read_json as _read_json
from .runfolder import read_table as _read_table

#: cold-chain (T = 1 ↔ next) swap acceptance below this is a sampler-health warning
COLD_SWAP_MIN = 0.01
#: any adjacent temperature pair below this is a sampler-health warning
PAIR_SWAP_MIN = 0.05
#: a best host resting on fewer effective posterior samples than this is flagged
HOST_MIN_EFFECTIVE = 10.0


def _num(v):
    try:
        v = v.item()
    except AttributeError:
        pass
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def _g(v, digits=2):
    return f"{v:.{digits}g}"


def fap_text(fap_empirical, null_sims, fap_analytic) -> str:
    """The false-alarm probability as the headline states it (see module docstring)."""
    n = int(null_sims or 0)
    analytic = f"analytic estimate {_g(fap_analytic)}" if fap_analytic is not None else ""
    if n > 0 and fap_empirical is not None:
        floor = 1.0 / (n + 1)
        if fap_empirical <= floor * (1 + 1e-9):
            return f"FAP < {_g(floor)} ({n} noise-only scans" + (f"; {analytic})" if analytic else ")")
        return f"FAP = {_g(fap_empirical)} (empirical, {n} noise-only scans" + (f"; {analytic})" if analytic else ")")
    if fap_analytic is None:
        return "FAP unknown"
    return f"FAP {_g(fap_analytic)} (analytic, effective-trials estimate; no noise-only scans were run)"


# ---------------------------------------------------------------- follow-up targets
def followup_targets(run_dir) -> list:
    """``[(name, summary dict, folder)]`` of every followed-up candidate of ``run_dir``."""
    folder = Path(run_dir) / "followup"
    top = _read_json(folder / "summary.json")
    if not isinstance(top, dict):
        rec = _read_json(folder / ".stage.json") or {}
        summary = rec.get("summary") or {}
        return [("candidate", summary, folder)] if summary.get("log_bayes_factor") is not None else []
    if isinstance(top.get("targets"), list) and isinstance(top.get("log_bayes_factor"), list):
        return [(str(n), _read_json(folder / str(n) / "summary.json") or {}, folder / str(n))
                for n in top["targets"]]
    return [(str(top.get("target", "candidate")), top, folder)]


def sampler_health(summary) -> list:
    """Short warnings about one follow-up's sampler (swap acceptance, ESS, stop by a cap)."""
    out = []
    swaps = [a for a in (summary.get("swap_acceptance") or [])]
    temps = summary.get("temperatures") or []
    if swaps and swaps[0] is not None and swaps[0] < COLD_SWAP_MIN:
        out.append(f"cold-chain swap acceptance {swaps[0]:.2g} (< {COLD_SWAP_MIN:g}): the T = 1 chain barely "
                   "exchanges with the hotter ones")
    for i, a in enumerate(swaps):
        if a is not None and a < PAIR_SWAP_MIN and not (i == 0 and a < COLD_SWAP_MIN):
            pair = (f"T = {temps[i]:.3g}↔{temps[i + 1]:.3g}" if len(temps) > i + 1 else f"pair {i + 1}")
            out.append(f"swap acceptance {a:.2g} between {pair} (< {PAIR_SWAP_MIN:g})")
    ess = summary.get("effective_sample_size")
    target = (summary.get("stopping_rule") or {}).get("ess")
    if isinstance(ess, (int, float)) and isinstance(target, (int, float)) and ess < target:
        out.append(f"effective sample size {ess:.0f} of the {target:g} asked for")
    stop = summary.get("stopped_by")
    if stop in ("iterations", "time"):
        cap = "iteration cap" if stop == "iterations" else "wall-time cap"
        out.append(f"stopped by its {cap} after {summary.get('iterations', '?')} iterations, not by its "
                   "stopping rule: posterior and Bayes factor may not be converged")
    return out


def _interval(summary, name):
    p = (summary.get("parameters") or {}).get(name) or {}
    iv = p.get("interval_90")
    return (float(iv[0]), float(iv[1])) if iv and None not in iv[:2] else None


def same_source(a: dict, b: dict) -> bool:
    """Two follow-up summaries describe one source: 90 % frequency intervals overlap and the posterior sky
    positions lie within the sum of their 90 % radii."""
    fa, fb = _interval(a, "frequency"), _interval(b, "frequency")
    if fa is None or fb is None or fa[1] < fb[0] or fb[1] < fa[0]:
        return False
    sa, sb = a.get("sky") or {}, b.get("sky") or {}
    if not sa or not sb:
        return True  # frequency overlap alone (no sky summary: an older run folder)
    sep = math.degrees(float(angular_separation(math.radians(sa["ra"]), math.radians(sa["dec"]),
                                                math.radians(sb["ra"]), math.radians(sb["dec"]))))
    return sep <= sa.get("radius_90_deg", 0.0) + sb.get("radius_90_deg", 0.0)


def merge_sources(targets) -> list:
    """Group follow-ups that converged on the same source (see :func:`same_source`), best Bayes factor first.

    ``targets`` is ``[(name, summary, folder)]``; returns ``[[index, ...], ...]``.
    """
    n = len(targets)
    parent = list(range(n))

    def find(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for i in range(n):
        for j in range(i + 1, n):
            if same_source(targets[i][1], targets[j][1]):
                parent[find(j)] = find(i)
    groups = {}
    for i in range(n):
        groups.setdefault(find(i), []).append(i)

    def key(g):
        bf = [targets[i][1].get("log_bayes_factor") for i in g]
        bf = [b for b in bf if isinstance(b, (int, float))]
        return -max(bf) if bf else 0.0

    return sorted(groups.values(), key=key)


def _source(targets, group) -> dict:
    """One source from a group of follow-ups: the member with the highest Bayes factor speaks for it."""
    members = [targets[i] for i in group]
    best = max(members, key=lambda t: t[1].get("log_bayes_factor") if isinstance(
        t[1].get("log_bayes_factor"), (int, float)) else -math.inf)
    name, summary, folder = best
    fed = []
    for _, s, _ in members:
        row = (s.get("start") or {}).get("candidate_row")
        if isinstance(row, dict):
            row = row.get("rank")
        if isinstance(row, (int, float)) and math.isfinite(row):
            fed.append(int(row))
    src = {"name": name, "followups": [m[0] for m in members], "scan_peaks": sorted(set(fed)),
           "log_bayes_factor": _num(summary.get("log_bayes_factor")),
           "log_bayes_factor_err": _num(summary.get("log_bayes_factor_error", summary.get("log_bayes_factor_err"))),
           "effective_sample_size": _num(summary.get("effective_sample_size")),
           "health": sampler_health(summary)}
    params = summary.get("parameters") or {}
    for key in ("frequency", "chirp_mass", "strain", "luminosity_distance"):
        p = params.get(key)
        if isinstance(p, dict) and p.get("median") is not None:
            src[key] = {"median": p["median"], "interval_90": p.get("interval_90"), "unit": p.get("unit", "")}
    sky = summary.get("sky")
    if sky:
        src["position"] = {"source": "posterior", "ra": sky["ra"], "dec": sky["dec"],
                           "credible_area_50_deg2": sky.get("credible_area_50_deg2"),
                           "credible_area_90_deg2": sky.get("credible_area_90_deg2"),
                           "radius_90_deg": sky.get("radius_90_deg")}
    elif params.get("ra") and params.get("dec"):
        src["position"] = {"source": "posterior", "ra": params["ra"]["median"], "dec": params["dec"]["median"]}
    return src


# ---------------------------------------------------------------- the headline
def _scan_summary(run_dir):
    run_dir = Path(run_dir)
    summ = _read_json(run_dir / "scan" / "scan_summary.json")
    if not isinstance(summ, dict):
        summ = (_read_json(run_dir / "scan" / ".stage.json") or {}).get("summary") or {}
    return summ


def _threshold(run_dir):
    rec = _read_json(Path(run_dir) / "followup" / ".stage.json")
    if rec:
        thr = (rec.get("inputs") or {}).get("options", {}).get("fap_threshold")
        if thr is None:
            thr = (rec.get("summary") or {}).get("fap_threshold")
        if thr is not None:
            return float(thr)
    try:
        cfg = tomllib.loads((Path(run_dir) / "run.toml").read_text(encoding="utf-8"))
        return float(cfg.get("followup", {}).get("fap_threshold", 0.01))
    except (OSError, ValueError):
        return 0.01


def headline_result(run_dir, reports=None) -> dict:
    """The headline: candidate or not and how sure, where, which host, what limits, and warnings."""
    run_dir = Path(run_dir)
    head = {"candidate_found": False, "candidate": None, "sources": [], "best_host": None, "best_limit": None,
            "warnings": []}
    cands = _read_table(run_dir / "scan" / "candidates.ecsv")
    scan = _scan_summary(run_dir)
    if cands is not None and len(cands):
        best = cands[int(np.argmin(cands["fap"]))] if "fap" in cands.colnames else cands[0]
        cand = {k: _num(best[k]) for k in ("frequency", "ra", "dec", "fe", "fap", "fap_empirical")
                if k in cands.colnames}
        cand["null_sims"] = int(scan.get("null_sims") or 0)
        cand["fap_text"] = fap_text(cand.get("fap_empirical"), cand["null_sims"], cand.get("fap"))
        cand["position"] = {"source": "scan pixel", "ra": cand.get("ra"), "dec": cand.get("dec"),
                            "nside": scan.get("nside")}
        threshold = _threshold(run_dir)
        cand["fap_threshold"] = threshold
        head["candidate_found"] = bool(cand.get("fap") is not None and threshold is not None
                                       and cand["fap"] < threshold)
        rec = _read_json(run_dir / "followup" / ".stage.json") or {}
        targets = followup_targets(run_dir) if rec.get("status") == "complete" or not rec else []
        targets = [t for t in targets if t[1]]
        sources = [_source(targets, g) for g in merge_sources(targets)] if targets else []
        head["sources"] = sources
        if sources:
            top = sources[0]
            for key in ("log_bayes_factor", "log_bayes_factor_err"):
                if top.get(key) is not None:
                    cand[key] = top[key]
            if top.get("position"):
                cand["position"] = top["position"]
            if top.get("frequency"):
                cand["posterior_frequency"] = top["frequency"]
            for h in top["health"]:
                head["warnings"].append(f"sampler ({top['name']}): {h}")
        head["candidate"] = cand
    hosts = _read_table(run_dir / "hosts" / "ranking.ecsv")
    if hosts is not None and len(hosts) and "probability" in hosts.colnames:
        i = int(np.argmax(hosts["probability"]))
        host = {"name": str(hosts["name"][i]), "probability": _num(hosts["probability"][i])}
        if "n_effective" in hosts.colnames:
            host["n_effective"] = _num(hosts["n_effective"][i])
        hs = _read_json(run_dir / "hosts" / "hosts_summary.json") or {}
        if isinstance(hs.get("probability_not_in_catalogue"), (int, float)):
            host["probability_not_in_catalogue"] = hs["probability_not_in_catalogue"]
        ne = host.get("n_effective")
        if isinstance(ne, (int, float)) and ne < HOST_MIN_EFFECTIVE:
            host["warning"] = (f"the best host's probability rests on {ne:.1f} effective posterior samples: "
                               "it is noisy; follow up with more effective samples before quoting it")
            head["warnings"].append(f"host ranking: {host['warning']}")
        head["best_host"] = host
    rounds = _read_json(run_dir / "rounds" / "rounds.json") or {}
    if rounds.get("rounds"):
        head["confirmed_sources"] = [{k: c.get(k) for k in ("source", "round", "frequency", "ra", "dec", "strain",
                                                            "chirp_mass", "fap_empirical", "log_bayes_factor")}
                                     for c in rounds.get("confirmed") or []]
        head["rounds"] = {"n_rounds": rounds.get("n_rounds"), "stopped": rounds.get("stopped"),
                          "detection_rule": rounds.get("detection_rule")}
    lim = _read_table(run_dir / "limits" / "frequency_limits.ecsv")
    if lim is not None and len(lim) and "strain_95" in lim.colnames:
        vals = np.asarray(lim["strain_95"], dtype=float)
        if np.isfinite(vals).any():
            i = int(np.nanargmin(vals))
            head["best_limit"] = {"frequency": _num(lim["frequency"][i]), "strain_95": _num(lim["strain_95"][i])}
    if reports:
        head["stages"] = {r.name: r.status for r in reports}
    return head


def areas_text(pos) -> str:
    """'50 % / 90 % credible areas A / B deg²' (or just the 90 % one from an older summary)."""
    a50, a90 = pos.get("credible_area_50_deg2"), pos.get("credible_area_90_deg2")
    if a90 is None:
        return ""
    if a50 is None:
        return f"90 % credible area {a90:.3g} deg²"
    return f"50 % / 90 % credible areas {a50:.3g} / {a90:.3g} deg²"


def _pos_text(pos) -> str:
    if not pos or pos.get("ra") is None:
        return ""
    text = f"ra = {pos['ra']:.1f}°, dec = {pos['dec']:.1f}°"
    if pos.get("source") == "posterior":
        text += " (posterior mean direction" + (f", {areas_text(pos)})" if areas_text(pos) else ")")
    else:
        text += " (scan pixel" + (f", nside {pos['nside']})" if pos.get("nside") else ")")
    return text


def format_headline(head: dict) -> str:
    """The headline as a few plain-English lines (terminal, report first screen)."""
    lines = []
    cand = head.get("candidate")
    if head.get("candidate_found") and cand:
        fap = cand.get("fap_text") or f"FAP {cand['fap']:.2g} (analytic)"
        pf = cand.get("posterior_frequency")
        if pf and pf.get("interval_90"):
            freq = (f"f_gw = {pf['median']:.4g} Hz (posterior median, 90 % interval {pf['interval_90'][0]:.3g}–"
                    f"{pf['interval_90'][1]:.3g} Hz)")
        else:
            freq = f"f_gw = {cand['frequency']:.4g} Hz (scan peak)"
        line = f"Candidate found: {freq} at {_pos_text(cand.get('position') or cand)}; {fap}"
        if cand.get("log_bayes_factor") is not None:
            line += f"; ln Bayes factor {cand['log_bayes_factor']:.1f}"
            if cand.get("log_bayes_factor_err") is not None:
                line += f" ± {cand['log_bayes_factor_err']:.1f}"
        lines.append(line + ".")
        sources = head.get("sources") or []
        for src in sources:
            if len(src.get("followups", [])) > 1 or len(src.get("scan_peaks", [])) > 1:
                peaks = ", ".join(f"#{p}" for p in src.get("scan_peaks", [])) or ", ".join(src["followups"])
                lines.append(f"One source: the follow-ups of scan peaks {peaks} converged on the same posterior.")
        if len(sources) > 1:
            lines.append(f"{len(sources)} distinct sources were followed up (see the report).")
    elif cand:
        lines.append(f"No candidate: the strongest peak (f_gw = {cand['frequency']:.4g} Hz) has "
                     f"{cand.get('fap_text') or 'FAP %.2g' % cand.get('fap', float('nan'))}, above the "
                     f"threshold {cand.get('fap_threshold')}.")
    else:
        lines.append("No candidate (no scan result).")
    if head.get("rounds"):
        conf = head.get("confirmed_sources") or []
        lines.append(f"Confirmed by the detection rule: {len(conf)} source(s)" + (": " + "; ".join(
            f"f_gw = {c['frequency']:.4g} Hz (round {c['round']}, empirical FAP {c['fap_empirical']:.2g}, ln B "
            f"{c['log_bayes_factor']:.1f})" for c in conf) if conf else "") + f" ({head['rounds']['stopped']}).")
    host = head.get("best_host")
    if host:
        line = f"Best host: {host['name']} with probability {host['probability']:.2f}"
        if host.get("n_effective") is not None:
            line += f" ({host['n_effective']:.1f} effective samples)"
        lines.append(line + ".")
    lim = head.get("best_limit")
    if lim:
        lines.append(f"Sky-averaged 95% strain upper limit: {lim['strain_95']:.3g} at {lim['frequency']:.4g} Hz "
                     "(most sensitive frequency)" + (f", after subtracting the {len(head['confirmed_sources'])} "
                                                     "confirmed source(s)" if head.get("confirmed_sources") else "")
                     + ".")
    for w in head.get("warnings") or []:
        lines.append(f"WARNING: {w}.")
    return "\n".join(lines)


__all__ = ["headline_result", "areas_text", "format_headline", "fap_text", "sampler_health", "merge_sources", "same_source",
           "followup_targets", "COLD_SWAP_MIN", "PAIR_SWAP_MIN", "HOST_MIN_EFFECTIVE"]
