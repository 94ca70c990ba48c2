"""Subtract and rescan (docs/design.md §14): more than one binary, one confirmed source per round.

Round 1 is the run's own scan (``scan/``) and follow-up (``followup/``), unchanged. After it, the pipeline
step ``rounds`` (:func:`run_rounds`, called by :mod:`cwsearch.job.pipeline`) applies the *detection rule*
to the followed-up candidates, best first:

    a candidate is **confirmed** when its empirical false-alarm probability (the fraction (1 + k)/(1 + N) of
    the scan's N noise-only scans whose loudest statistic reaches the candidate's) is below
    ``[rounds] detection_fap`` **and** its follow-up ln Bayes factor (binary + background versus
    background, the one the follow-up reports) is above ``[rounds] detection_log_bayes_factor``.

A candidate within one frequency bin (1/T_span) of an already confirmed source is that source's remnant
(subtracting a posterior-median signal leaves some of its power) and is skipped. At most one source is
confirmed per round. The confirmed source's posterior-median signal at every TOA (Earth + pulsar term,
each posterior row's pulsar-term phases and distances, after the timing-model fit:
:func:`cwsearch.inference.posterior_signal.signal_draws`) is subtracted from the residuals, and round
K + 1 scans what is left (``rounds/round-K/scan/``), follows up its best candidate that is not a remnant,
whose analytic FAP is below ``[followup] fap_threshold`` and whose empirical FAP could pass the rule
(``rounds/round-K/followup/``), and applies the rule again, until no candidate passes or
``[rounds] max_sources`` sources are confirmed.

The noise-only scans are those of round 1 (``scan/null_maxima.ecsv``): they simulate noise only, so they
do not depend on the residuals, and a rescan with the same seed would repeat them. (Subtracting a fitted
signal also removes a little noise, so the null distribution of the rescanned data is, if anything, lower:
the rule stays conservative.)

Files (``RUN_DIR/rounds/``): ``rounds.json`` (the rule, one entry per round: candidate, FAPs, ln B,
decision, folders), ``confirmed_sources.ecsv`` (one row per confirmed source; copied to
``RUN_DIR/confirmed_sources.ecsv``), ``subtracted_signal.ecsv`` (per pulsar and TOA: each confirmed
source's subtracted signal and their sum [s], and sums of single posterior draws for the limits'
subtraction error; only when a source is confirmed), ``rounds.png`` and, with two or more confirmed sources,
``joint/`` (the joint follow-up, through the pipeline's hook).

Hosts of the later sources. When the run ranks host galaxies (a ``[hosts] catalog`` and the hosts stage in
the run's stages), the pipeline passes ``rank_hosts`` and :func:`rank_confirmed_hosts` ranks the catalogue's
galaxies as hosts of every source confirmed in round K >= 2 with the hosts stage's own function, on that
round's follow-up posterior, into ``round-K/hosts/`` (the hosts stage's file names), and of each source of
the joint follow-up on its block of the joint posterior, into ``joint/source-J/hosts/``. The round-1 source
is ranked by the hosts stage itself (``hosts/``). ``confirmed_sources.ecsv`` then has the columns
``best_host``, ``best_host_probability``, ``probability_not_in_catalogue``, ``hosts_folder`` (blank for
the round-1 source, whose ranking is the hosts stage's) and, after a joint follow-up, the same four
prefixed ``joint_``.

Examples
--------
>>> detection_decision(0.004, 7.5, detection_fap=0.01, detection_log_bayes_factor=5.0)
(True, 'empirical FAP 0.004 < 0.01 and ln B 7.5 > 5')
>>> detection_decision(float("nan"), 7.5, detection_fap=0.01, detection_log_bayes_factor=5.0)[1]
'no empirical FAP (the scan ran no noise-only scans: set [scan] null_sims)'
"""

from __future__ import annotations

import math
import os
import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
from astropy.table import Table

from ..core.errors import InputError
from ..core.fileio import write_json_atomic, write_table_atomic
from ..inference.correlated_likelihood import likelihood_for
from ..inference.posterior_signal import RESIDUAL_DRAWS, signal_draws
from .runfolder import read_json, read_table

#: the posterior columns of a confirmed source (confirmed_sources.ecsv), with their units
SOURCE_COLUMNS = (("ra", "deg"), ("dec", "deg"), ("frequency", "Hz"), ("chirp_mass", "solMass"), ("strain", ""),
                  ("inclination", "rad"), ("polarization", "rad"), ("phase", "rad"))
#: default of ``[rounds] subtraction_draws``: single posterior draws of the signal kept beside the median
#: (columns draw_1 .. of subtracted_signal.ecsv); the limits stage is rerun with each subtracted instead of the
#: median, and their spread is the limits' stated subtraction error (docs/design.md §14)
KEPT_DRAWS = 8
#: the files of RUN_DIR/rounds/ that later stages read (their hash enters the limits' and targets' inputs)
PRODUCTS = ("confirmed_sources.ecsv", "subtracted_signal.ecsv")


def detection_rule_text(detection_fap, detection_log_bayes_factor) -> str:
    """The detection rule in words (report, rounds.json)."""
    return (f"a followed-up candidate is confirmed when its empirical false-alarm probability (noise-only scans "
            f"of the scan stage) is below {detection_fap:g} and its follow-up ln Bayes factor (binary + background "
            f"versus background) is above {detection_log_bayes_factor:g}; a candidate within one frequency bin "
            "(1/T_span) of a confirmed source is that source's remnant and is skipped; one source per round")


def detection_decision(fap_empirical, log_bayes_factor, *, detection_fap, detection_log_bayes_factor):
    """``(confirmed, reason)`` of the detection rule for one candidate."""
    if fap_empirical is None or not math.isfinite(fap_empirical):
        return False, "no empirical FAP (the scan ran no noise-only scans: set [scan] null_sims)"
    if log_bayes_factor is None or not math.isfinite(log_bayes_factor):
        return False, "no follow-up ln Bayes factor"
    fap_ok, bf_ok = fap_empirical < detection_fap, log_bayes_factor > detection_log_bayes_factor
    text = (f"empirical FAP {fap_empirical:.2g} {'<' if fap_ok else '>='} {detection_fap:g} and ln B "
            f"{log_bayes_factor:.3g} {'>' if bf_ok else '<='} {detection_log_bayes_factor:g}")
    return bool(fap_ok and bf_ok), text


def empirical_fap_of(candidates, row, null_table):
    """Empirical FAP (1 + k)/(1 + N) of candidate ``row`` (0-based) against the round-1 null maxima
    (``scan/null_maxima.ecsv``: Fe maxima for an Fe candidate, Fp maxima for an Fp one); NaN without them."""
    if null_table is None or len(null_table) == 0:
        return float("nan")
    for stat, column in (("fe", "fe_max"), ("fp", "fp_max")):
        if stat in candidates.colnames and column in null_table.colnames:
            value = float(candidates[stat][row])
            if math.isfinite(value):
                null = np.sort(np.asarray(null_table[column], dtype=float))
                k = null.size - np.searchsorted(null, value, side="left")
                return float((1.0 + k) / (1.0 + null.size))
    return float("nan")


def posterior_summary(table) -> dict:
    """Median and 90 % interval (5th, 95th percentiles) of each column of :data:`SOURCE_COLUMNS`."""
    out = {}
    for name, _ in SOURCE_COLUMNS:
        x = np.asarray(table[name], dtype=float)
        x = x[np.isfinite(x)]
        if x.size:
            lo, med, hi = np.percentile(x, [5, 50, 95])
            out[name] = {"median": float(med), "interval_90": [float(lo), float(hi)]}
    return out


def read_posterior(folder) -> Table:
    """A follow-up's ``posterior.ecsv`` (our own run folder's file; an unreadable one is an InputError)."""
    path = Path(folder) / "posterior.ecsv"
    table = read_table(path)
    if table is None:
        raise InputError("cannot read the follow-up posterior (rerun with --force followup)", file=path)
    for name, _ in SOURCE_COLUMNS:
        if name not in table.colnames:
            raise InputError("missing column (rerun with --force followup)", file=path, column=name)
        try:
            values = np.asarray(table[name], dtype=float)
        except (TypeError, ValueError):
            raise InputError("not a number (rerun with --force followup)", file=path, column=name) from None
        if values.ndim != 1:
            raise InputError("not one number per row (rerun with --force followup)", file=path, column=name)
    if len(table) == 0:
        raise InputError("the posterior has no samples (rerun with --force followup)", file=path)
    return table


def subtracted_array(array, signals):
    """``array`` with ``signals`` (list, one array per pulsar [s]) subtracted from its residuals; the noise
    model description is kept, the dataset's truth (``source``) is not (other data)."""
    out = array.with_residuals([p.residuals - s for p, s in zip(array, signals)])
    out.noise_model = getattr(array, "noise_model", None)
    return out


def read_subtracted_signal(path, array, column="total"):
    """The summed subtracted signal per pulsar (list of arrays [s]) from ``subtracted_signal.ecsv``, checked
    against ``array`` (pulsar names, TOA counts, MJDs to 1e-9 d); ``column="draw_K"``: the K-th kept draw."""
    table = read_table(path)
    if table is None or not {"pulsar", "mjd", "total"} <= set(table.colnames):
        raise InputError("cannot read the subtracted signal of the confirmed sources (rerun with --force rounds)",
                         file=path)
    if column not in table.colnames:
        raise InputError("missing column (rerun with --force rounds)", file=path, column=column)
    try:
        names = np.asarray(table["pulsar"]).astype(str)
        mjd_all = np.asarray(table["mjd"], dtype=float)
        values = np.asarray(table[column], dtype=float)
    except (TypeError, ValueError):
        raise InputError("a column is not what it should be (pulsar names, numbers; rerun with --force rounds)",
                         file=path) from None
    if values.ndim != 1 or mjd_all.ndim != 1 or names.ndim != 1 or not np.all(np.isfinite(values)):
        raise InputError("the signal must be one finite number per row (rerun with --force rounds)", file=path,
                         column=column)
    out = []
    for p in array:
        rows = names == p.name
        mjd = mjd_all[rows]
        if mjd.size != p.n_toas or not np.allclose(mjd, p.mjd, rtol=0, atol=1e-9):
            raise InputError(f"the subtracted signal does not match the TOAs of pulsar {p.name} (rerun with "
                             "--force rounds)", file=path)
        out.append(values[rows])
    return out


def kept_draw_columns(path):
    """The ``draw_K`` columns of ``subtracted_signal.ecsv`` (empty when none or unreadable)."""
    table = read_table(path)
    return [] if table is None else [c for c in table.colnames if c.startswith("draw_")]


def _round_one(ctx, candidates, null_table):
    """The followed-up candidates of round 1 (``scan/``, ``followup/``), best first: list of dicts."""
    rec = ctx.upstream.get("followup") or {}
    summary = rec.get("summary") or {}
    rows = [int(r) for r in summary.get("followed_rows") or []]
    stage = ctx.run_dir / "followup"
    out = []
    for r in rows:
        folder = stage if len(rows) == 1 and (stage / "posterior.ecsv").is_file() else stage / f"candidate_{r}"
        fs = read_json(folder / "summary.json") or {}
        out.append(_candidate_entry(candidates, r - 1, null_table, folder, fs, ctx.run_dir))
    return out


def _candidate_entry(candidates, row, null_table, folder, followup_summary, run_dir):
    def num(name):
        if name not in candidates.colnames:
            return None
        v = float(candidates[name][row])
        return v if math.isfinite(v) else None

    fap_emp = num("fap_empirical")
    if fap_emp is None:
        fap_emp = empirical_fap_of(candidates, row, null_table)
    return {"row": row + 1, "frequency": num("frequency"), "ra": num("ra"), "dec": num("dec"), "fe": num("fe"),
            "fap": num("fap"), "fap_empirical": fap_emp if fap_emp is not None and math.isfinite(fap_emp) else None,
            "log_bayes_factor": followup_summary.get("log_bayes_factor"),
            "log_bayes_factor_error": followup_summary.get("log_bayes_factor_error"),
            "folder": None if folder is None else os.path.relpath(folder, run_dir)}


def _is_remnant(frequency, confirmed, span):
    """The confirmed source (1-based index) within one frequency bin of ``frequency``, or None."""
    for k, src in enumerate(confirmed, start=1):
        if frequency is not None and abs(frequency - src["frequency"]) <= (1.0 + 1e-9) / span:
            return k
    return None


def _rescan_choice(candidates, null_table, confirmed, span, fap_threshold, detection_fap):
    """Round K > 1: (row, reason) of the candidate to follow up: the best by analytic FAP that is not a
    remnant, below ``fap_threshold`` and whose empirical FAP could pass the rule; row None if none."""
    if candidates is None or len(candidates) == 0 or "fap" not in candidates.colnames:
        return None, "the rescan has no candidate"
    fap = np.asarray(candidates["fap"], dtype=float)
    remnants = []
    for r in np.argsort(fap, kind="stable"):
        f = float(candidates["frequency"][r])
        k = _is_remnant(f, confirmed, span)
        if k is not None:
            remnants.append(f"row {r + 1} (f = {f:.4g} Hz) is a remnant of source {k}")
            continue
        note = ("; skipped: " + ", ".join(remnants)) if remnants else ""
        if not fap[r] < fap_threshold:
            return None, (f"the best new candidate (row {r + 1}, f = {f:.4g} Hz) has analytic FAP {fap[r]:.2g}, "
                          f"not below [followup] fap_threshold {fap_threshold:g}" + note)
        emp = empirical_fap_of(candidates, r, null_table)
        if not math.isfinite(emp):
            return None, "no empirical FAP (the scan ran no noise-only scans: set [scan] null_sims)" + note
        if not emp < detection_fap:
            return None, (f"the best new candidate (row {r + 1}, f = {f:.4g} Hz) has empirical FAP {emp:.2g}, not "
                          f"below {detection_fap:g}" + note)
        return int(r), "followed up" + note
    return None, "every candidate of the rescan is a remnant of a confirmed source: " + ", ".join(remnants)


def _clear(stage_dir, keep=(".stage.json",)):
    """Empty ``stage_dir`` (a fresh start: rounds of an earlier run must not linger)."""
    for child in Path(stage_dir).iterdir():
        if child.name in keep:
            continue
        if child.is_dir() and not child.is_symlink():
            shutil.rmtree(child)
        else:
            child.unlink()


def run_rounds(ctx, *, scan_stage, followup_stage, runner_options, joint_followup=None, rank_hosts=None) -> dict:
    """The subtract-and-rescan loop (module docstring) into ``ctx.stage_dir`` (``RUN_DIR/rounds``).

    ``scan_stage``/``followup_stage``: the registry's :class:`~cwsearch.stages.base.Stage` entries (the
    pipeline passes them, so this module imports no stage); ``runner_options(options, execution)`` fills in
    the task-runner settings; ``joint_followup(ctx, sources)`` is called when two or more sources are
    confirmed; ``rank_hosts(ctx, folder, seed)`` (None: the run ranks no hosts) ranks host galaxies of the
    posterior ``folder/followup/posterior.ecsv`` into ``folder/hosts/`` (:func:`rank_confirmed_hosts`).
    Returns the step's summary (also ``rounds.json``).
    """
    settings = dict(ctx.config.rounds)
    max_sources = int(settings["max_sources"])
    detection_fap = float(settings["detection_fap"])
    detection_lnb = float(settings["detection_log_bayes_factor"])
    n_kept = int(settings.get("subtraction_draws", KEPT_DRAWS))
    fap_threshold = float((ctx.config.extra.get("followup") or {}).get("fap_threshold", 0.01))
    stage_dir = Path(ctx.stage_dir)
    if not ctx.resuming:
        _clear(stage_dir)
    base = ctx.model_array
    span = base.span
    candidates = read_table(ctx.run_dir / "scan" / "candidates.ecsv")
    null_table = read_table(ctx.run_dir / "scan" / "null_maxima.ecsv")
    followup_options = ctx.config.options.get("followup") or followup_stage.options()
    scan_options = ctx.config.options.get("scan") or scan_stage.options()
    model = dict(pulsar_term=not followup_options.earth_term_only, evolution=followup_options.evolution,
                 phase_grid=followup_options.phase_grid, uniform_strain=followup_options.strain_prior == "uniform")
    rule = detection_rule_text(detection_fap, detection_lnb)
    rounds, confirmed, signals = [], [], []      # signals: per confirmed source, list (per pulsar) of arrays
    kept = []                                    # per confirmed source, list (per pulsar) of (KEPT_DRAWS, TOAs)
    stopped = ""
    k = 1
    while True:
        seeds = np.random.SeedSequence([int(ctx.seed), k]).generate_state(3)
        data = subtracted_array(base, [sum(s[i] for s in signals) for i in range(len(base))]) if signals else base
        if k == 1:
            entry = {"round": 1, "scan": "scan", "subtracted_sources": 0}
            if (ctx.upstream.get("followup") or {}).get("status") == "empty" or candidates is None:
                followed = []
                entry["note"] = "no scan candidate was followed up (none below [followup] fap_threshold)"
            else:
                followed = _round_one(ctx, candidates, null_table)
        else:
            round_dir = stage_dir / f"round-{k}"
            round_dir.mkdir(parents=True, exist_ok=True)
            entry = {"round": k, "scan": os.path.relpath(round_dir / "scan", ctx.run_dir),
                     "subtracted_sources": len(confirmed)}
            scan_opts = replace(runner_options(scan_options, ctx.config.execution), null_sims=0)
            scan_stage.run(data, round_dir, scan_opts, noise=ctx.noise, seed=int(seeds[0]), progress=ctx.progress)
            cands_k = read_table(round_dir / "scan" / "candidates.ecsv")
            row, why = _rescan_choice(cands_k, null_table, confirmed, span, fap_threshold, detection_fap)
            entry["note"] = why
            followed = []
            if row is not None:
                opts = replace(followup_options, top=1, candidate=row + 1, resume=ctx.resuming)
                res = followup_stage.run(data, round_dir, opts, noise=ctx.noise, seed=int(seeds[1]),
                                         progress=ctx.progress)
                fs = dict(getattr(res, "summary", {}) or {})
                followed = [_candidate_entry(cands_k, row, null_table, round_dir / "followup", fs, ctx.run_dir)]
        decision = None
        for cand in followed:
            remnant = _is_remnant(cand["frequency"], confirmed, span)
            if remnant is not None:
                cand["decision"] = f"remnant of source {remnant} (within one frequency bin)"
                continue
            ok, why = detection_decision(cand["fap_empirical"], cand["log_bayes_factor"], detection_fap=detection_fap,
                                         detection_log_bayes_factor=detection_lnb)
            cand["decision"] = ("confirmed: " if ok else "not confirmed: ") + why
            if ok:
                decision = cand
                break
        entry["candidates"] = followed
        rounds.append(entry)
        if decision is None:
            stopped = f"round {k}: no candidate passes the detection rule"
            break
        folder = ctx.run_dir / decision["folder"]
        table = read_posterior(folder)
        like = likelihood_for(data, ctx.noise, **model)
        draws = signal_draws(like, data, table, n_draws=RESIDUAL_DRAWS, seed=int(seeds[2]))
        signal = [np.median(d, axis=0) if d.shape[0] else np.zeros(d.shape[1]) for d in draws]
        params = posterior_summary(table)
        source = {"source": len(confirmed) + 1, "round": k, "row": decision["row"],
                  **{name: params[name]["median"] for name, _ in SOURCE_COLUMNS},
                  "intervals_90": {name: params[name]["interval_90"] for name, _ in SOURCE_COLUMNS},
                  "fap_empirical": decision["fap_empirical"], "log_bayes_factor": decision["log_bayes_factor"],
                  "log_bayes_factor_error": decision["log_bayes_factor_error"], "folder": decision["folder"],
                  "signal_rms_ns": float(1e9 * np.sqrt(np.mean(np.concatenate(signal) ** 2)))}
        entry["confirmed_source"] = source["source"]
        confirmed.append(source)
        signals.append(signal)
        kept.append([d[:n_kept] for d in draws])
        if len(confirmed) >= max_sources:
            stopped = f"round {k}: max_sources = {max_sources} sources confirmed"
            break
        k += 1

    joint = None
    if len(confirmed) >= 2 and joint_followup is not None:
        joint = joint_followup(ctx, confirmed)
    if rank_hosts is not None:
        rank_confirmed_hosts(ctx, confirmed, joint, rank_hosts)
    _write_sources(stage_dir, ctx.run_dir, confirmed)
    if signals:
        _write_signal(stage_dir / "subtracted_signal.ecsv", base, signals, kept)
    summary = {"detection_rule": rule, "detection_fap": detection_fap, "detection_log_bayes_factor": detection_lnb,
               "max_sources": max_sources, "fap_threshold": fap_threshold, "n_rounds": len(rounds),
               "n_confirmed": len(confirmed), "stopped": stopped, "rounds": rounds, "confirmed": confirmed,
               "null_sims": 0 if null_table is None else len(null_table),
               "null_source": "scan/null_maxima.ecsv (round 1's noise-only scans, used by every round)",
               "subtraction": ("posterior-median signal per TOA (Earth + pulsar term with the posterior file's "
                               "pulsar-term phases and distances, or phases drawn from their conditional posterior "
                               f"for a file without them; {RESIDUAL_DRAWS} posterior draws; after the timing-model "
                               "fit)"),
               "joint_followup": joint,
               "hosts": (None if rank_hosts is None else
                         "host galaxies ranked for every source confirmed in round K >= 2 (rounds/round-K/hosts/) "
                         "and for each joint-follow-up source (rounds/joint/source-J/hosts/); the round-1 source's "
                         "ranking is the hosts stage's (hosts/)")}
    if not followup_options.no_plots:
        # lazy: matplotlib is loaded only when plots are drawn
        from .rounds_plots import rounds_figure

        rounds_figure(stage_dir / "rounds.png", ctx.run_dir, rounds, confirmed, base, signals)
    write_json_atomic(stage_dir / "rounds.json", summary)
    return summary


def hosts_seed(run_seed, round_k) -> int:
    """The seed of the host ranking of the source confirmed in round ``round_k`` (the fourth word of that
    round's ``SeedSequence([run_seed, round_k])``, whose first three seed its scan, follow-up and subtraction)."""
    return int(np.random.SeedSequence([int(run_seed), int(round_k)]).generate_state(4)[3])


def hosts_entry(summary, folder) -> dict:
    """What ``rounds.json`` and ``confirmed_sources.ecsv`` keep of one host ranking: ``summary`` is its
    ``hosts_summary.json`` (the first candidate's figures) or one candidate's entry of it; ``folder`` relative
    to the run folder."""
    first = (summary.get("candidates") or [summary])[0] or {}
    best = first.get("best_host") or {}
    return {"folder": folder, "best_host": best.get("name"), "best_host_probability": best.get("probability"),
            "probability_not_in_catalogue": first.get("probability_not_in_catalogue"),
            "n_galaxies_in_99_region": first.get("n_galaxies_in_99_region"),
            "sky_area_90_deg2": first.get("sky_area_90_deg2")}


def round_one_hosts(source_folder) -> dict:
    """Where the hosts stage ranks the round-1 source followed up in ``source_folder`` (``followup`` or
    ``followup/candidate_K``, relative to the run folder): ``hosts/``, as the candidate labelled ``followup``
    or ``candidate_K`` in its ``hosts_summary.json``."""
    return {"folder": "hosts", "candidate": Path(source_folder).name, "note": "ranked by the hosts stage"}


def _ranked(rank_hosts, ctx, folder, seed):
    """One host ranking into ``folder/hosts/`` as :func:`hosts_entry`; a user error (e.g. a catalogue without
    a galaxy within its distance limit) is recorded in the entry as ``error`` instead of failing the step (the
    hosts stage reports the same error for round 1)."""
    rel = os.path.relpath(Path(folder) / "hosts", ctx.run_dir)
    try:
        summary = rank_hosts(ctx, Path(folder), seed)
    except InputError as exc:
        return {"folder": rel, "error": str(exc)}
    return hosts_entry(summary or {}, rel)


def rank_confirmed_hosts(ctx, confirmed, joint, rank_hosts):
    """Host rankings of the confirmed sources (module docstring), into each source dict of ``confirmed``:
    ``hosts`` (its round's ranking; for the round-1 source only the hosts stage's folder) and, when the joint
    follow-up ranked its sources (the pipeline's hook puts ``hosts`` into each entry of ``joint["sources"]``),
    ``joint_hosts``."""
    for source in confirmed:
        if int(source["round"]) == 1:
            source["hosts"] = round_one_hosts(source["folder"])
            continue
        round_dir = (Path(ctx.run_dir) / source["folder"]).parent   # rounds/round-K (its followup/ inside)
        source["hosts"] = _ranked(rank_hosts, ctx, round_dir, hosts_seed(ctx.seed, source["round"]))
    entries = (joint or {}).get("sources") or []
    for source, entry in zip(confirmed, entries):
        if isinstance(entry, dict) and entry.get("hosts"):
            source["joint_hosts"] = entry["hosts"]


#: the host columns of confirmed_sources.ecsv (with a host ranking): (column, key of the entry, unit)
HOST_COLUMNS = (("best_host", "best_host", None), ("best_host_probability", "best_host_probability", ""),
                ("probability_not_in_catalogue", "probability_not_in_catalogue", ""),
                ("hosts_folder", "folder", None))


def _host_columns(t, confirmed, key, prefix=""):
    """Add the :data:`HOST_COLUMNS` of entry ``key`` (``hosts``/``joint_hosts``) of each source to ``t``."""
    for column, name, unit in HOST_COLUMNS:
        values = [(s.get(key) or {}).get(name) for s in confirmed]
        if unit is None:     # text: blank where the source has no such ranking
            t[prefix + column] = np.array([v if isinstance(v, str) else "" for v in values], dtype=str)
        else:
            t[prefix + column] = np.array([v if v is not None else np.nan for v in values], dtype=float)


def sources_table(confirmed) -> Table:
    """``confirmed_sources.ecsv``: one row per confirmed source (posterior medians; degrees, Hz, Msun, rad), with
    the host columns (:data:`HOST_COLUMNS`) when the sources were ranked as hosts."""
    t = Table()
    t["source"] = np.array([s["source"] for s in confirmed], dtype=np.int64)
    t["round"] = np.array([s["round"] for s in confirmed], dtype=np.int64)
    for name, unit in SOURCE_COLUMNS:
        t[name] = np.array([s[name] for s in confirmed], dtype=float)
        if unit:
            t[name].unit = unit
    t["fap_empirical"] = np.array([s["fap_empirical"] for s in confirmed], dtype=float)
    t["log_bayes_factor"] = np.array([s["log_bayes_factor"] for s in confirmed], dtype=float)
    t["folder"] = np.array([s["folder"] for s in confirmed], dtype=str) if confirmed else np.array([], dtype=str)
    description = ("sources confirmed by cwsearch's subtract-and-rescan rounds: posterior medians of each round's "
                   "follow-up (folder, relative to the run folder); ra, dec in degrees")
    if any("hosts" in s for s in confirmed):
        _host_columns(t, confirmed, "hosts")
        description += ("; best_host, best_host_probability, probability_not_in_catalogue: the host ranking of "
                        "the source's round in hosts_folder (blank for the round-1 source: its ranking is the "
                        "hosts stage's, hosts_folder)")
    if any("joint_hosts" in s for s in confirmed):
        _host_columns(t, confirmed, "joint_hosts", "joint_")
        description += "; joint_*: the same from the source's block of the joint follow-up's posterior"
    t.meta["description"] = description
    return t


def _write_sources(stage_dir, run_dir, confirmed):
    table = sources_table(confirmed)
    write_table_atomic(Path(stage_dir) / "confirmed_sources.ecsv", table)
    write_table_atomic(Path(run_dir) / "confirmed_sources.ecsv", table)


def _write_signal(path, array, signals, kept=()):
    names, mjd, total = [], [], []
    per_source = [[] for _ in signals]
    for i, p in enumerate(array):
        names.extend([p.name] * p.n_toas)
        mjd.append(np.asarray(p.mjd, dtype=float))
        for j, s in enumerate(signals):
            per_source[j].append(s[i])
        total.append(sum(s[i] for s in signals))
    t = Table()
    t["pulsar"] = np.array(names, dtype=str)
    t["mjd"] = np.concatenate(mjd)
    t["mjd"].unit = "d"
    for j, parts in enumerate(per_source, start=1):
        t[f"source_{j}"] = np.concatenate(parts)
        t[f"source_{j}"].unit = "s"
    t["total"] = np.concatenate(total)
    t["total"].unit = "s"
    n_kept = min((d.shape[0] for source in kept for d in source), default=0)
    for k in range(n_kept):   # one posterior draw of every source, summed: an alternative to the total
        t[f"draw_{k + 1}"] = np.concatenate([sum(source[i][k] for source in kept) for i in range(len(array))])
        t[f"draw_{k + 1}"].unit = "s"
    t.meta["description"] = ("signal subtracted from the residuals after each confirmed source (posterior-median "
                             "signal per TOA, Earth + pulsar term, after the timing-model fit) and their sum [s]; "
                             "draw_K: the sum of one posterior draw of each source (for the limits' subtraction "
                             "error)")
    write_table_atomic(path, t)


__all__ = ["run_rounds", "detection_decision", "detection_rule_text", "empirical_fap_of", "posterior_summary",
           "read_posterior", "subtracted_array", "read_subtracted_signal", "sources_table", "SOURCE_COLUMNS",
           "PRODUCTS", "KEPT_DRAWS", "kept_draw_columns", "rank_confirmed_hosts", "hosts_entry", "hosts_seed",
           "round_one_hosts", "HOST_COLUMNS"]
