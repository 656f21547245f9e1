"""Workflow glue: the steps the rules run and the commands that call them.

The Snakefile (``pipeline/Snakefile`` + ``pipeline/rules/*.smk``) stays thin: it
validates the config (:mod:`pipeline.wfconfig`), asks :func:`pipeline.sessions.plan` for
the sessions and series (both re-exported here for the rules), and every rule
runs one step of this module as ``python -m pipeline.workflow STEP ...``, so the
logic lives (and is tested) here.

Layout of the output folder (the Snakemake working directory)::

    sub-<p>/ses-<d>/maps/<model>/<stem>_<suffix>.nii.gz   maps as `relaxline fit` writes
    sub-<p>/ses-<d>/maps/<model>/<stem>.fit.json          manifest, written last (job done)
    sub-<p>/ses-<d>/chunks/<model>/<stem>/chunk-<i>.npz   slab results (temporary)
    sub-<p>/ses-<d>/qc/<model>/roi_stats.tsv ...          as `relaxline qc` writes
    sub-<p>/ses-<d>/qc/session.json                       QC summary of the session
    sub-<p>/ses-<d>/qc/history.json                       the session is in the database
    trend/drift.tsv, trend/scored.tsv, trend/*.png        drift rules and trend figures
    report.html, status.json                              the report; exit status of a run
    history.sqlite                                        (default) history database

Every file is written atomically, and each job's declared output is written last, so
an interrupted run leaves no partial file under a final name and resumes cleanly.
"""
from __future__ import annotations

import argparse
import json
import os
import re
import sys
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from pipeline.errors import EXIT_OK, EXIT_QC_FAIL, InputError
# configuration and discovery live in their own modules; the rules reach them through here
from pipeline.sessions import (CHUNK, MANIFEST, Plan, SeriesJob, Session, datatypes,  # noqa: F401
                               plan, slab_bounds)
from pipeline.wfconfig import (SCHEMA, load, model_options, read_config,  # noqa: F401
                               validate_config)

SNAKEFILE = Path(__file__).with_name("Snakefile")
QC_SUMMARY = "{sub}/{ses}/qc/session.json"
RECORDED = "{sub}/{ses}/qc/history.json"
REPORT, STATUS, DRIFT = "report.html", "status.json", "trend/drift.tsv"


# ---- steps run by the rules -------------------------------------------------------------

def b1_map_path(maps_manifest: str | Path) -> str:
    """The TB1map listed in a dam fit's manifest."""
    m = json.loads(Path(maps_manifest).read_text(encoding="utf-8"))
    hits = [p for p in m["files"] if p.endswith("_TB1map.nii.gz") and "_desc-" not in p]
    if len(hits) != 1:
        raise InputError(f"{maps_manifest}: expected one TB1map in the dam outputs, found "
                         f"{len(hits)}.")
    return str(Path(maps_manifest).parent / hits[0])


def write_manifest(path: str | Path, files: Sequence[Path], inputs: Sequence[str],
                   model: str) -> None:
    from pipeline.outputs import atomic_write_json
    from pipeline.series import sha256_file
    atomic_write_json(path, {"model": model, "inputs": list(inputs),
                             "files": sorted(Path(f).name for f in files),
                             "sha256": {Path(f).name: sha256_file(f) for f in files}})


def step_fit(model: str, inputs: Sequence[str], out_dir: str, manifest: str,
             b1_manifest: str | None, engine: str, threads: int, time_unit: str,
             chunks: Sequence[str] = (), options: dict | None = None) -> None:
    """Fit one series (or gather its chunk results) and write the manifest last.

    ``options``: model options from the config (:func:`model_options`)."""
    from pipeline.fitjob import fit_command, prepare, write_fit_outputs
    b1 = b1_map_path(b1_manifest) if b1_manifest else None
    if not chunks:
        files = fit_command(model, inputs, out_dir, b1=b1, engine=engine, jobs=threads,
                            time_unit=time_unit, show_progress=False, model_options=options)
    else:
        _, series, _ = prepare(model, inputs, time_unit)
        parts = [np.load(c) for c in chunks]
        keys = parts[0]["__keys__"].tolist()
        options = json.loads(str(parts[0]["__options__"]))
        arrays = {k: np.concatenate([p[f"a{i}"] for p in parts], axis=2)
                  for i, k in enumerate(keys)}
        files = write_fit_outputs(arrays, series, out_dir, model, options["engine"], options)
    write_manifest(manifest, files, inputs, model)


def step_chunk(model: str, inputs: Sequence[str], z0: int, z1: int, out: str,
               b1_manifest: str | None, engine: str, threads: int, time_unit: str,
               options: dict | None = None) -> None:
    """Fit slices z0:z1 of a series into an .npz (noise σ from the whole series)."""
    from pipeline.fitjob import estimate_noise, fit_arrays, prepare
    from pipeline.outputs import atomic_write_bytes
    from pipeline.series import load_grid_map
    import io
    _, series, _ = prepare(model, inputs, time_unit)
    b1 = b1_map_path(b1_manifest) if b1_manifest else None
    b1_arr = load_grid_map(b1, series, what="B1 map") if b1 else None
    options = {"engine": engine, "jobs": int(threads), "time_unit": time_unit, "mask": None,
               "b1_map": str(b1) if b1 else None, "noise_sigma": estimate_noise(series),
               **(options or {})}
    arrays = fit_arrays(model, series, None, b1_arr, options, z=slice(z0, z1))
    keys = list(arrays)
    buf = io.BytesIO()
    np.savez(buf, __keys__=np.array(keys), __options__=np.array(json.dumps(options)),
             **{f"a{i}": arrays[k] for i, k in enumerate(keys)})
    atomic_write_bytes(out, buf.getvalue())


def qc_settings(cfg: dict, s: Session) -> dict:
    """What the QC job of session ``s`` needs (passed as a rule parameter, so a change
    reruns exactly the jobs it affects: the layout's options only where it places vials,
    the temperature only of its session)."""
    ph = cfg["phantom"]
    out = {"sub": s.sub, "ses": s.ses, "session": s.label, "site": s.site,
           "scanner": s.scanner, "labels": s.labels, "labels_pattern": ph["labels"],
           "folder": str(s.folder), "reference": ph.get("reference"),
           "tolerances": ph.get("tolerances"), "erode_mm": ph.get("erode_mm", 0.0),
           "layout": None if s.labels else ph.get("layout"),
           "figures": cfg["report"]["figures"],
           "temperature": s.temperature, "temperature_source": s.temperature_source}
    if out["layout"]:
        out["margin_mm"] = ph.get("margin_mm", 2.0)
        out["mirror_search"] = ph.get("mirror_search", True)
    return out


def qc_inputs(cfg: dict, plan_: Plan, wc) -> dict[str, list[str]]:
    """Inputs of a session's QC job: its fit manifests and the files that judge them (the
    reference, tolerances, label map, and the layout where it places the vials), so
    editing any of them reruns the QC jobs it affects and nothing else."""
    s = plan_.session(wc.sub, wc.ses)
    ph = cfg["phantom"]
    judge = [ph[k] for k in ("reference", "tolerances") if ph.get(k)]
    judge += [s.labels] if s.labels else ([ph["layout"]] if ph.get("layout") else [])
    return {"manifests": [j.manifest() for j in s.series], "judge": judge}


def step_qc(settings: dict, manifests: Sequence[str], out: str) -> None:
    """QC of every model's maps of one session; the summary JSON is written last.

    Each model's maps folder gets the same treatment as ``relaxline qc MAPS --labels L
    --reference R --out qc/<model>`` (or ``--layout`` when the session has no label map
    and the config names a layout); a vial failure or a poor vial placement is
    recorded, not raised, so the other sessions and the trend still run
    (``relaxline run`` turns it into exit 1).
    """
    from pipeline.outputs import atomic_write_json
    from pipeline.qcjob import labels_from_file, run_qc
    from pipeline.vialjob import run_qc_with_layout
    from qc.localise import PoorMatchError
    s = settings
    qc_root = Path(out).parent
    summary: dict[str, Any] = {k: s[k] for k in ("sub", "ses", "session", "site", "scanner",
                                                  "labels")}
    summary["models"], summary["note"] = {}, ""
    models = sorted({json.loads(Path(m).read_text())["model"] for m in manifests})
    if not s["labels"] and not s["layout"]:  # e.g. a scan session without regions
        summary["note"] = (f"no label map matches phantom.labels = '{s['labels_pattern']}' "
                           f"in {s['folder']} and no phantom.layout; maps only, no ROI "
                           "statistics")
        models = []
    options = dict(reference_path=s["reference"], config=s["tolerances"],
                   session=s["session"], erode_mm=s["erode_mm"], figures=s["figures"])
    if s.get("temperature") is not None:
        options.update(temperature=s["temperature"],
                       temperature_source=s["temperature_source"])
    for model in models:
        maps_dir = Path(manifests[0]).parent.parent / model
        if s["labels"]:
            res = run_qc(maps_dir, qc_root / model, labels_from_file(s["labels"]),
                         labels_desc=s["labels"], **options)
        else:
            try:
                res = run_qc_with_layout(maps_dir, qc_root / model, s["layout"],
                                         s["margin_mm"], mirror=s.get("mirror_search", True),
                                         **options)
            except PoorMatchError as exc:
                summary["models"][model] = {"roi_stats": None, "counts": {"fail": 1},
                                            "warnings": [f"vial placement: {exc}"],
                                            "exit_status": EXIT_QC_FAIL}
                continue
        counts = res.table["status"].value_counts().to_dict()
        summary["models"][model] = {"roi_stats": str(qc_root / model / "roi_stats.tsv"),
                                    "counts": {k: int(v) for k, v in counts.items()},
                                    "warnings": res.warnings, "exit_status": res.exit_code}
    summary["fail"] = any(m["counts"].get("fail", 0) for m in summary["models"].values())
    atomic_write_json(out, summary)


def history_series(model: str, stem: str, ses: str) -> str:
    """Series key in the history: stable across sessions (``ses-`` entity removed) and
    distinct per model (mese and mese-mono fit the same series)."""
    return f"{model}:{re.sub(rf'_?{re.escape(ses)}(?=_|$)', '', stem)}"


def session_table(summary: dict) -> "pd.DataFrame":
    """All models' ROI statistics of a session with the history's series key."""
    import pandas as pd
    parts = []
    for model, m in summary["models"].items():
        if not m["roi_stats"]:  # vial placement failed: no statistics
            continue
        t = pd.read_csv(m["roi_stats"], sep="\t")
        t["model"] = model
        t["series"] = [history_series(model, str(st_), summary["ses"]) for st_ in t["series"]]
        parts.append(t)
    # no statistics (a session without label map or layout: maps only): an empty table
    # with the key columns, so the history holds the session with no rows
    return pd.concat(parts, ignore_index=True) if parts else \
        pd.DataFrame(columns=["model", "series", "map", "label"])


def step_record(database: str, summary_path: str, out: str) -> None:
    """Replace the session's rows in the history database (one transaction)."""
    from pipeline.outputs import atomic_write_json
    from qc.history import record_session
    summary = json.loads(Path(summary_path).read_text(encoding="utf-8"))
    table = session_table(summary)
    temps = table["temperature"].dropna() if "temperature" in table else []
    n = record_session(database, table, site=summary["site"],
                       scanner=summary["scanner"], session=summary["session"],
                       subject=summary["sub"],
                       temperature=float(temps.iloc[0]) if len(temps) else None,
                       source=str(Path(summary_path).resolve()))
    atomic_write_json(out, {"database": database, "rows": n,
                            "site": summary["site"], "scanner": summary["scanner"],
                            "session": summary["session"]})


def report_settings(cfg: dict) -> dict:
    """What the report job needs (a rule parameter)."""
    return {"database": cfg["history"]["database"], "drift": cfg["drift"],
            "title": cfg["report"]["title"]}


def drift_settings(d: dict):
    """:class:`qc.drift.DriftSettings` from the config's ``drift`` section."""
    from qc.drift import DriftSettings
    return DriftSettings(baseline_sessions=d["baseline_sessions"],
                         baseline=tuple(d["baseline"]) or None, rules=tuple(d["rules"]),
                         warning_trigger=d["warning_trigger"], min_sd_pct=d["min_sd_pct"],
                         reference_pct=d["reference_pct"],
                         reference_consecutive=d["reference_consecutive"], value=d["value"])


def step_report(cfg: dict, summaries: Sequence[str], report: str, status: str,
                drift_tsv: str) -> None:
    """Drift rules over the whole history, trend figures, the report and status.json."""
    import pandas as pd
    from pipeline.outputs import atomic_write_bytes, atomic_write_json, atomic_write_text, \
        atomic_write_tsv
    from qc import drift, trend
    from qc.history import load_history
    from qc.report import build_report
    settings = drift_settings(cfg["drift"])
    hist = load_history(cfg["database"])
    scored, violations = drift.evaluate(hist, settings)
    trend_dir = Path(drift_tsv).parent
    atomic_write_tsv(trend_dir / "scored.tsv", scored)
    figures = trend.trend_figures(scored, violations, settings.value) if not hist.empty else {}
    for key, png in figures.items():
        name = re.sub(r"[^0-9A-Za-z._-]+", "-", "_".join(str(k) for k in key))
        atomic_write_bytes(trend_dir / f"{name}.png", png)
    current = drift.current_rejections(violations, hist)
    base = drift.baseline_sessions(hist, settings)
    note = "; ".join(f"{site}/{scanner}: baseline " +
                     (f"{len(b)} session(s) {b[0]} to {b[-1]}" if b else
                      f"not yet established (needs {settings.baseline_sessions} sessions "
                      "or the configured baseline list); drift rules other than ref-pct "
                      "wait for it")
                     for (site, scanner), b in base.items()) or "no history yet"
    sess = [json.loads(Path(p).read_text(encoding="utf-8")) for p in summaries]
    latest = _latest(sess)
    qc_fail_latest = _latest_fails(sess)
    rows = []
    for s in sess:
        for model, m in s["models"].items():
            c = m["counts"]
            link = _relative_link(Path(m["roi_stats"]).with_name("report.html"),
                                  Path(report).parent) if m["roi_stats"] else ""
            rows.append({"site": s["site"], "scanner": s["scanner"], "session": s["session"],
                         "subject": s["sub"], "model": model, "pass": c.get("pass", 0),
                         "warn": c.get("warn", 0), "fail": c.get("fail", 0),
                         "n/a": c.get("n/a", 0),
                         "qc report": link or "; ".join(m["warnings"]), "_href": link})
    sessions_df = pd.DataFrame(rows)
    exit_status = EXIT_QC_FAIL if (len(current) or qc_fail_latest) else EXIT_OK
    atomic_write_tsv(drift_tsv, violations)
    newest = [s for s in sess if not s["models"] or f"{s['sub']}/{s['ses']}" in latest]
    table = pd.concat([pd.read_csv(m["roi_stats"], sep="\t") for s in newest
                       for m in s["models"].values() if m["roi_stats"]]
                      or [pd.DataFrame(columns=["status"])],
                      ignore_index=True)
    warnings = [f"QC failure in the newest session {x}" for x in qc_fail_latest]
    warnings += [f"drift rule {r.rule} rejects {r.site}/{r.scanner} session {r.session}, "
                 f"{r.series} {r.map} label {r.label}: {r.detail}" for r in current.itertuples()]
    warnings += [f"{s['sub']}/{s['ses']}: {s['note']}" for s in sess if s.get("note")]
    warnings += [f"{s['sub']}/{s['ses']} {model}: {w}" for s in sess if
                 f"{s['sub']}/{s['ses']}" in latest
                 for model, m in s["models"].items() if not m["roi_stats"]
                 for w in m["warnings"]]
    shown = [c for c in sessions_df.columns if c != "_href"]
    sections = [("Sessions", trend.html_table(sessions_df, shown, {"qc report": "_href"})
                 if not sessions_df.empty else "<p>No session.</p>"),
                ("History and drift", trend.history_section_html(scored, violations, figures,
                                                                 note))]
    page = build_report(table, title=cfg["title"], summary={
        "sessions": len(sess), "newest": ", ".join(sorted(latest)),
        "history database": cfg["database"], "drift rules": ", ".join(settings.rules)},
        warnings=warnings, extra_sections=sections)
    atomic_write_text(report, page)
    atomic_write_json(status, {
        "exit_status": exit_status, "sessions": len(sess),
        "qc_fail_latest": qc_fail_latest,
        "drift_rejections_latest": current[["site", "scanner", "session", "series", "map",
                                            "label", "rule"]].to_dict("records")
        if len(current) else [],
        "drift_rejections_total": int((violations["severity"] == "reject").sum())
        if len(violations) else 0,
        "report": str(Path(report).resolve()), "database": cfg["database"]})


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


def _latest_fails(summaries: list[dict]) -> list[str]:
    """Newest sessions (of their site/scanner) with a QC fail."""
    newest = _latest(summaries)
    return sorted(f"{s['sub']}/{s['ses']}" for s in summaries
                  if s["fail"] and f"{s['sub']}/{s['ses']}" in newest)


def run_status(output_dir: str | Path) -> tuple[int, str]:
    """Exit status and a one-line summary from a finished run's ``status.json``."""
    p = Path(output_dir) / STATUS
    if not p.is_file():
        return EXIT_OK, ""
    st_ = json.loads(p.read_text(encoding="utf-8"))
    parts = []
    if st_.get("qc_fail_latest"):
        parts.append("QC failure in " + ", ".join(st_["qc_fail_latest"]))
    if st_.get("drift_rejections_latest"):
        parts.append(f"{len(st_['drift_rejections_latest'])} drift-rule rejection(s) in the "
                     "newest session(s)")
    return int(st_.get("exit_status", 0)), "; ".join(parts)


# ---- the commands the rules run ---------------------------------------------------------

def _cmd(step: str, args: Sequence[str], log: Sequence[str]) -> str:
    import shlex
    cmd = (shlex.join([sys.executable, "-m", "pipeline.workflow", step, *map(str, args)])
           + f" > {shlex.quote(str(log[0]))} 2>&1")
    return cmd.replace("{", "{{").replace("}", "}}")  # Snakemake's shell() formats braces


def fit_inputs(cfg: dict, plan_: Plan, wc, chunks: bool = True) -> dict[str, list[str]]:
    """Inputs of a fit (or chunk) job: the series and its JSON sidecars (an edited
    acquisition parameter reruns the fit), its chunk files, the dam manifest."""
    from pipeline.series import sidecar_path
    job = plan_.job(wc.sub, wc.ses, wc.model, wc.stem)
    src = plan_.b1_source(cfg, job)
    sidecars = [str(sidecar_path(p)) for p in job.inputs if sidecar_path(p).is_file()]
    out = {"series": job.inputs, "sidecars": sidecars, "b1": [src.manifest()] if src else []}
    if chunks:
        out["chunks"] = job.chunk_files()
    return out


def fit_params(cfg: dict, job_model: str) -> dict:
    """The settings that change a fit's result (a rule parameter: a change reruns the fits
    of that model only)."""
    m = cfg["models"][job_model]
    return {"engine": m.get("engine", cfg["fit"]["engine"]), "time_unit": m.get("time_unit", "s"),
            "b1": m.get("b1"), "options": model_options(cfg, job_model)}


def fit_command(cfg: dict, plan_: Plan, step: str, wc, input, output, threads: int,
                log) -> str:
    """Shell command of a ``fit`` or ``chunk`` job (a separate process per job)."""
    job = plan_.job(wc.sub, wc.ses, wc.model, wc.stem)
    fp = fit_params(cfg, job.model)
    args = ["--model", job.model, "--inputs", *input.series,
            "--engine", fp["engine"], "--threads", threads, "--time-unit", fp["time_unit"]]
    if input.b1:
        args += ["--b1-manifest", input.b1[0]]
    opts = fp["options"]
    if opts:
        args += ["--options", json.dumps(opts, sort_keys=True)]
    if step == "chunk":
        z0, z1 = job.slabs[int(wc.chunk)]
        args += ["--z", z0, z1, "--out", output[0]]
    else:
        args += ["--out", str(Path(output[0]).parent), "--manifest", output[0]]
        if input.chunks:
            args += ["--chunks", *input.chunks]
    return _cmd(step, args, log)


def step_command(step: str, settings: dict, inputs: Sequence[str], outputs: Sequence[str],
                 log) -> str:
    """Shell command of a ``qc``, ``record`` or ``report`` job."""
    return _cmd(step, ["--settings", json.dumps(settings, sort_keys=True), "--inputs",
                       *inputs, "--out", *outputs], log)


# ---- `python -m pipeline.workflow STEP` ------------------------------------------------

def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m pipeline.workflow",
                                 description="One step of the relaxline workflow (called by "
                                             "the Snakemake rules).")
    sub = ap.add_subparsers(dest="step", required=True)
    for name in ("fit", "chunk"):
        p = sub.add_parser(name)
        p.add_argument("--model", required=True)
        p.add_argument("--inputs", nargs="+", required=True)
        p.add_argument("--b1-manifest")
        p.add_argument("--engine", default="fast")
        p.add_argument("--threads", type=int, default=1)
        p.add_argument("--time-unit", default="s")
        p.add_argument("--options", type=json.loads, default={},
                       help="model options as a JSON object (see model_options)")
        p.add_argument("--out", required=True)
        if name == "fit":
            p.add_argument("--manifest", required=True)
            p.add_argument("--chunks", nargs="*", default=[])
        else:
            p.add_argument("--z", type=int, nargs=2, required=True)
    for name in ("qc", "record", "report"):
        p = sub.add_parser(name)
        p.add_argument("--settings", required=True, help="JSON object")
        p.add_argument("--inputs", nargs="*", default=[])
        p.add_argument("--out", nargs="+", required=True)
    a = ap.parse_args(argv)
    try:
        if a.step == "fit":
            step_fit(a.model, a.inputs, a.out, a.manifest, a.b1_manifest, a.engine, a.threads,
                     a.time_unit, a.chunks, a.options)
        elif a.step == "chunk":
            step_chunk(a.model, a.inputs, a.z[0], a.z[1], a.out, a.b1_manifest, a.engine,
                       a.threads, a.time_unit, a.options)
        else:
            settings = json.loads(a.settings)
            if a.step == "qc":
                step_qc(settings, a.inputs, a.out[0])
            elif a.step == "record":
                step_record(settings["database"], a.inputs[0], a.out[0])
            else:
                step_report(settings, a.inputs, *a.out)
    except InputError as exc:
        print(f"relaxline workflow {a.step}: error: {exc}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
