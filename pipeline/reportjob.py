"""The workflow's report step and the run's verdict (exit status, headline, console lines).

:func:`step_report` evaluates the drift rules over the whole history, writes the trend
figures, ``trend/drift.tsv`` (SI units, described in ``trend/drift.json``), the report and
``status.json``; :func:`run_status` turns ``status.json`` into the exit status and the
console lines of ``relaxline run``. The verdict itself is :func:`qc.verdict.verdict`, so
the headline, the exit status and the console always agree.
"""
from __future__ import annotations

import json
import os
import re
from pathlib import Path
from typing import Any, Sequence

from pipeline.errors import EXIT_OK

REPORT, STATUS, DRIFT = "report.html", "status.json", "trend/drift.tsv"
SESSION_PAGE = "report.html"     # in each session's qc/ folder: all models of the session
DRIFT_COLUMNS = {
    "value": "vial statistic as measured (config drift.value), in the unit of column units",
    "tracked": "value referred to the reference temperature (value x reference / reference "
               "at the session's temperature) where the reference gives it; what the rules "
               "follow; unit of column units",
    "baseline_mean": "mean of tracked over the baseline sessions; unit of column units",
    "baseline_sd": "SD of tracked over the baseline sessions, floored at drift.min_sd_pct; "
                   "unit of column units",
    "z": "(tracked - baseline_mean) / baseline_sd, dimensionless",
    "units": "unit of value, tracked, baseline_mean and baseline_sd: s (SI seconds) for "
             "T1/T2/T2* maps, ratio for B1",
}


def report_settings(cfg: dict) -> dict:
    """What the report job needs (a rule parameter)."""
    return {"database": cfg["history"]["database"], "drift": cfg["drift"],
            "title": cfg["report"]["title"]}


def drift_settings(d: dict):
    """:class:`qc.drift.DriftSettings` from the config's ``drift`` section."""
    from qc.drift import DriftSettings
    monitor = tuple((m, tuple(v)) for m, v in sorted((d.get("monitor") or {}).items()))
    return DriftSettings(baseline_sessions=d["baseline_sessions"],
                         baseline=tuple(d["baseline"]) or None, rules=tuple(d["rules"]),
                         warning_trigger=d["warning_trigger"], min_sd_pct=d["min_sd_pct"],
                         reference_pct=d["reference_pct"],
                         reference_consecutive=d["reference_consecutive"], value=d["value"],
                         monitor=monitor or None,
                         temperature_corrected=d.get("temperature_corrected", True))


def _relative_link(target: Path, base: Path) -> str:
    """``target`` relative to ``base`` ("/"-separated), so the link keeps working wherever
    the output tree is moved or opened from disk; '' when no relative path exists."""
    try:
        return Path(os.path.relpath(target, base)).as_posix()
    except ValueError:   # another drive (Windows): leave the cell as text
        return ""


def _latest(summaries: list[dict]) -> set[str]:
    """``sub/ses`` of the newest session of each site/scanner."""
    latest: dict[tuple[str, str], dict] = {}
    for s in summaries:
        k = (s["site"], s["scanner"])
        if k not in latest or s["session"] > latest[k]["session"]:
            latest[k] = s
    return {f"{s['sub']}/{s['ses']}" for s in latest.values()}


def _findings(sess: list[dict], latest: set[str], current, warn_latest) -> tuple[list, list,
                                                                                   list]:
    """(rejections, QC failures, warnings) of the newest sessions as verdict findings."""
    from qc.verdict import Finding, vial_name, with_unit
    rej = [Finding("rejection", str(r.session), str(r.model), str(r.map),
                   vial_name(r.name, r.label), str(r.rule),
                   f"{r.detail}; tracked {with_unit(r.tracked, r.map, r.units)} against the "
                   f"baseline {with_unit(r.baseline_mean, r.map, r.units)} ± "
                   f"{with_unit(r.baseline_sd, r.map, r.units)}")
           for r in current.itertuples()]
    fails, warns = [], []
    for s in sess:
        if f"{s['sub']}/{s['ses']}" not in latest:
            continue
        for model, m in s["models"].items():
            if not m["roi_stats"]:
                fails += [Finding("fail", s["session"], model, "", "", "placement", w)
                          for w in m["warnings"]]
            for f in m.get("failing", []):
                fails.append(Finding("fail", s["session"], model, f["map"], f["vial"],
                                     "tolerance", f["detail"]))
            n_fail = m["counts"].get("fail", 0)
            if n_fail and m["roi_stats"] and not m.get("failing"):   # older summaries
                fails.append(Finding("fail", s["session"], model, "", "", "tolerance",
                                     f"{n_fail} vial/map result(s) fail"))
            for f in m.get("warning_vials", []):
                warns.append(Finding("warn", s["session"], model, f["map"], f["vial"],
                                     "tolerance", f["detail"]))
    rejected = {(f.session, f.model, f.map, f.vial) for f in rej}   # no 1-2s echo of these
    warns += [Finding("warn", str(r.session), str(r.model), str(r.map),
                      vial_name(r.name, r.label), str(r.rule), str(r.detail))
              for r in warn_latest.itertuples()
              if (str(r.session), str(r.model), str(r.map), vial_name(r.name, r.label))
              not in rejected]
    return rej, fails, warns


NO_REFERENCE = "no reference values (statistics only)"


def step_report(cfg: dict, summaries: Sequence[str], report: str, status: str,
                drift_tsv: str) -> None:
    """Drift rules over the whole history, trend figures, the report and status.json."""
    import pandas as pd
    from pipeline.outputs import (atomic_write_bytes, atomic_write_json, atomic_write_text,
                                  atomic_write_tsv)
    from qc import drift, trend, verdict as V
    from qc.history import load_history
    from qc.report import build_report
    settings = drift_settings(cfg["drift"])
    from pipeline.workflow import upgrade_series_key
    hist = load_history(cfg["database"], rename_series=upgrade_series_key)
    scored, violations = drift.evaluate(hist, settings)
    trend_dir = Path(drift_tsv).parent
    atomic_write_tsv(trend_dir / "scored.tsv", scored)
    figures = trend.trend_figures(scored, violations, settings.value) if not hist.empty else {}
    for key, png in figures.items():
        name = re.sub(r"[^0-9A-Za-z._-]+", "-", "_".join(str(k) for k in key))
        atomic_write_bytes(trend_dir / f"{name}.png", png)
    current = drift.current_rejections(violations, hist)
    newest = drift.latest_sessions(hist)
    warn_latest = violations[violations["severity"] == "warning"].merge(
        newest, on=["site", "scanner", "session"]) if len(violations) else violations
    base = drift.baseline_sessions(hist, settings)
    note = "; ".join(f"{site}/{scanner}: baseline " +
                     (f"{len(b)} session(s) {b[0]} to {b[-1]}" if b else
                      f"not yet established (needs {settings.baseline_sessions} sessions "
                      "or the configured baseline list); drift rules other than ref-pct "
                      "wait for it")
                     for (site, scanner), b in base.items()) or "no history yet"
    sess = [json.loads(Path(p).read_text(encoding="utf-8")) for p in summaries]
    latest = _latest(sess)
    v = V.verdict(*_findings(sess, latest, current, warn_latest),
                  judged=sorted(f"{s['sub']}/{s['ses']}" for s in sess
                                if f"{s['sub']}/{s['ses']}" in latest))
    rejected = violations[violations["severity"] == "reject"] if len(violations) else violations
    rows, lines = [], []
    for s in sorted(sess, key=lambda s: (s["site"], s["scanner"], s["session"])):
        page = Path(summaries[sess.index(s)]).with_name(SESSION_PAGE)
        href = _relative_link(page, Path(report).parent) if page.is_file() else ""
        for model, m in s["models"].items():
            c = m["counts"]
            n_rej = int(((rejected["session"] == s["session"]) & (rejected["model"] == model)
                         & (rejected["site"] == s["site"])).sum()) if len(rejected) else 0
            judged = sum(c.get(k, 0) for k in ("pass", "warn", "fail"))
            unjudged = not judged and sum(c.values()) > 0   # statistics, no reference
            failing = ", ".join(dict.fromkeys(f["vial"] for f in m.get("failing", []))) or \
                ("vials not placed" if not m["roi_stats"] else "")
            rows.append({"session": s["session"], "model": model, "n_pass": c.get("pass", 0),
                         "n_warn": c.get("warn", 0), "n_fail": c.get("fail", 0),
                         "judged": not unjudged,
                         "failing": NO_REFERENCE if unjudged else failing, "rejections": n_rej,
                         "temperature": m.get("temperature"),
                         "temperature_source": m.get("temperature_source", ""), "href": href})
            lines.append(f"{s['sub']}/{s['ses']} {model}: " + (
                f"{sum(c.values())} vial/map results, {NO_REFERENCE}" if unjudged else
                f"{c.get('pass', 0)} pass, {c.get('warn', 0)} warn, {c.get('fail', 0)} fail")
                         + (f"; failing: {failing}" if failing else "")
                         + (f"; {n_rej} drift rejection(s)" if n_rej else ""))
    atomic_write_tsv(drift_tsv, violations)
    atomic_write_json(Path(drift_tsv).with_suffix(".json"), DRIFT_COLUMNS)
    newest_tables = [pd.read_csv(m["roi_stats"], sep="\t") for s in sess
                     if f"{s['sub']}/{s['ses']}" in latest for m in s["models"].values()
                     if m["roi_stats"]]
    table = pd.concat(newest_tables, ignore_index=True) if newest_tables else \
        pd.DataFrame(columns=["status"])
    warnings = [f"{s['sub']}/{s['ses']}: {s['note']}" for s in sess if s.get("note")]
    sections = [("All sessions", V.sessions_html(pd.DataFrame(rows))),
                ("Drift rules", V.drift_html(violations, settings.monitored(), scored,
                                             settings.value)
                 + trend.history_section_html(scored, figures, note))]
    page = build_report(
        table, title=cfg["title"], headline=V.headline_html(v),
        results_title="Newest session(s): results per vial",
        summary={"sessions": len(sess), "newest (judged)": ", ".join(v.judged) or "–",
                 "history database": cfg["database"],
                 "drift rules": ", ".join(settings.rules)},
        warnings=warnings, extra_sections=sections, sections_first=True)
    atomic_write_text(report, page)
    atomic_write_json(status, {
        "exit_status": v.exit_status, "verdict": v.state, "headline": v.word,
        "findings": [f.text() for f in v.findings], "lines": lines, "sessions": len(sess),
        "qc_fail_latest": sorted({f"{s['sub']}/{s['ses']}" for s in sess
                                  if s["fail"] and f"{s['sub']}/{s['ses']}" in latest}),
        "drift_rejections_latest": current[["site", "scanner", "session", "model", "series",
                                            "map", "label", "rule"]].to_dict("records")
        if len(current) else [],
        "drift_rejections_total": int(len(rejected)),
        "report": str(Path(report).resolve()), "database": cfg["database"]})


def run_status(output_dir: str | Path) -> tuple[int, list[str]]:
    """Exit status and the console lines of a finished run, from its ``status.json``:
    one line per session and model, then the verdict with what fired."""
    p = Path(output_dir) / STATUS
    if not p.is_file():
        return EXIT_OK, []
    st: dict[str, Any] = json.loads(p.read_text(encoding="utf-8"))
    lines = list(st.get("lines", []))
    if st.get("headline"):
        lines.append(f"verdict: {st['headline']} (exit status {st.get('exit_status', 0)})")
        lines += [f"  {f}" for f in st.get("findings", [])[:20]]
    return int(st.get("exit_status", 0)), lines
