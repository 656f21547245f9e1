"""Workflow glue: the steps the rules run and the commands that call them.

The Snakefile (``pipeline/Snakefile`` + ``pipeline/rules/*.smk``) stays thin: it
validates the config (:mod:`pipeline.wfconfig`), asks :func:`pipeline.sessions.plan` for
the sessions and series (both re-exported here for the rules), and every rule
runs one step of this module as ``python -m pipeline.workflow STEP ...``, so the
logic lives (and is tested) here.

Layout of the output folder (the Snakemake working directory), a BIDS derivative
dataset (:mod:`pipeline.bidsderiv`; what is not BIDS is listed in its ``.bidsignore``)::

    dataset_description.json, README.md, .bidsignore      written by `relaxline run`
    sub-<p>/ses-<d>/anat/<dstem>_<suffix>.nii.gz          maps as `relaxline fit` names them
    sub-<p>/ses-<d>/fmap/<dstem>_TB1map.nii.gz            (B1 maps: fmap/)
    sub-<p>/ses-<d>/fits/<model>/<stem>.fit.json          manifest, written last (job done)
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

from fitting.errors import shorten_message
from pipeline.errors import EXIT_OK, EXIT_QC_FAIL, InputError, RelaxlineError
from pipeline.runlock import hold_for_job
# configuration and discovery live in their own modules; the rules reach them through here
from pipeline.sessions import (CHUNK, MANIFEST, Plan, SeriesJob, Session, datatypes,  # noqa: F401
                               plan, slab_bounds)
from pipeline.wfconfig import (SCHEMA, load, model_options, read_config,  # noqa: F401
                               validate_config)

from pipeline.reportjob import DRIFT, REPORT, SESSION_PAGE, STATUS  # noqa: E402,F401

SNAKEFILE = Path(__file__).with_name("Snakefile")
QC_SUMMARY = "{sub}/{ses}/qc/session.json"
RECORDED = "{sub}/{ses}/qc/history.json"


# ---- steps run by the rules -------------------------------------------------------------

def map_path(maps_manifest: str | Path, suffix: str) -> str:
    """The ``suffix`` map (e.g. TB1map, T1map) listed in a fit's manifest."""
    m = json.loads(Path(maps_manifest).read_text(encoding="utf-8"))
    hits = [p for p in m["files"] if p.endswith(f"_{suffix}.nii.gz") and "_desc-" not in p]
    if len(hits) != 1:
        raise InputError(f"{maps_manifest}: expected one {suffix} in the {m.get('model')} "
                         f"outputs, found {len(hits)}.")
    return os.path.normpath(Path(maps_manifest).parent / hits[0])


def b1_map_path(maps_manifest: str | Path) -> str:
    """The TB1map listed in a B1 fit's manifest (dam or afi)."""
    return map_path(maps_manifest, "TB1map")


def _t1_fill(model: str, options: dict) -> dict:
    """Options with ``t1_fixed`` set to the model's own default T1 when a T1 map feeds the
    fit and the config gives none: voxels the map has no value for (the source fit's
    failures, its background) use it and the sidecars count them."""
    from fitting.errors import RelaxlineError
    from fitting.spec import get_model
    from pipeline.fitjob import MODEL_OPTIONS
    if options.get("t1_fixed") is not None or model not in MODEL_OPTIONS["t1_fixed"][1]:
        return options
    spec = get_model(model)
    t1 = spec.extra.get("t1_fill")     # a model without a default T1 names its gap fill
    if t1 is None:
        try:   # the model's T1 without sidecar or options
            t1 = spec.fixed_from_meta({}, {}).get("t1")
        except RelaxlineError:
            t1 = None
    return options if t1 is None else {**options, "t1_fixed": float(t1)}


def session_dir(manifest: str | Path) -> Path:
    """The session folder of a fit manifest (``<sub>/<ses>/fits/<model>/<stem>.fit.json``),
    where the fit writes its maps into ``anat/`` and ``fmap/``."""
    return Path(manifest).parents[2]


def write_manifest(path: str | Path, files: Sequence[Path], inputs: Sequence[str],
                   model: str) -> None:
    """The fit's files, relative to the manifest's folder, with their sha256."""
    from pipeline.outputs import atomic_write_json
    from pipeline.series import sha256_file
    rel = {Path(os.path.relpath(f, Path(path).parent)).as_posix(): f for f in files}
    atomic_write_json(path, {"model": model, "inputs": list(inputs), "files": sorted(rel),
                             "sha256": {r: sha256_file(f) for r, f in rel.items()}})


def step_fit(model: str, inputs: Sequence[str], out_dir: str, manifest: str,
             b1_manifest: str | None, engine: str, threads: int, time_unit: str,
             chunks: Sequence[str] = (), options: dict | None = None,
             t1_manifest: str | None = None) -> None:
    """Fit one series (or gather its chunk results) and write the manifest last.

    ``out_dir``: the session folder; maps go into its ``anat/`` and ``fmap/`` folders.
    ``options``: model options from the config (:func:`model_options`). ``b1_manifest``,
    ``t1_manifest``: the fits whose TB1map / T1map feed this one."""
    from pipeline.fitjob import fit_command, fit_notes, prepare, write_fit_outputs
    from pipeline.t1map import load_t1_map
    b1 = b1_map_path(b1_manifest) if b1_manifest else None
    t1 = map_path(t1_manifest, "T1map") if t1_manifest else None
    if not chunks:
        files = fit_command(model, inputs, out_dir, b1=b1, engine=engine, jobs=threads,
                            time_unit=time_unit, show_progress=False,
                            model_options=_t1_fill(model, options or {}) if t1 else options,
                            datatype_folders=True, t1_map=t1)
    else:
        spec, series, _ = prepare(model, inputs, time_unit)
        parts = [np.load(c) for c in chunks]
        keys = parts[0]["__keys__"].tolist()
        options = json.loads(str(parts[0]["__options__"]))
        arrays = {k: np.concatenate([p[f"a{i}"] for p in parts], axis=2)
                  for i, k in enumerate(keys)}
        from fitting.spec import configure_model
        t1_arr = load_t1_map(configure_model(spec, options), series, t1) if t1 else None
        notes = fit_notes(arrays, options, t1_arr, spec, series)
        files = write_fit_outputs(arrays, series, out_dir, model, options["engine"], options,
                                  notes, datatype_folders=True)
    write_manifest(manifest, files, inputs, model)


def step_chunk(model: str, inputs: Sequence[str], z0: int, z1: int, out: str,
               b1_manifest: str | None, engine: str, threads: int, time_unit: str,
               options: dict | None = None, t1_manifest: str | None = None) -> None:
    """Fit slices z0:z1 of a series into an .npz (noise σ from the whole series)."""
    from fitting.spec import configure_model
    from pipeline.fitjob import acquisition, estimate_noise, fit_arrays, prepare, \
        resolve_noise, resolved_options
    from pipeline.outputs import atomic_write_bytes
    from pipeline.series import load_grid_map
    from pipeline.t1map import load_t1_map
    import io
    spec, series, _ = prepare(model, inputs, time_unit)
    b1 = b1_map_path(b1_manifest) if b1_manifest else None
    b1_arr = load_grid_map(b1, series, what="B1 map") if b1 else None
    t1 = map_path(t1_manifest, "T1map") if t1_manifest else None
    sigma = estimate_noise(series)     # whole series: every chunk resolves the same way
    options = dict(options or {})
    options["noise"] = resolve_noise(options.get("noise"), series, sigma, sys.stderr,
                                     command="workflow chunk", spec=spec)
    options = {"engine": engine, "jobs": int(threads), "time_unit": time_unit, "mask": None,
               "b1_map": str(b1) if b1 else None, "t1_map": t1, "noise_sigma": sigma,
               **options}
    if t1:
        options = _t1_fill(model, options)
    configured = configure_model(spec, options)
    options.update(resolved_options(configured, acquisition(configured, series, options)))
    t1_arr = load_t1_map(configured, series, t1) if t1 else None
    arrays = fit_arrays(model, series, None, b1_arr, options, z=slice(z0, z1), t1=t1_arr)
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
    maps_dir = session_dir(manifests[0]) if manifests else qc_root.parent  # anat/, fmap/
    for model in models:
        options["model"] = model
        if s["labels"]:
            res = run_qc(maps_dir, qc_root / model, labels_from_file(s["labels"]),
                         labels_desc=s["labels"], inputs=[s["labels"]], **options)
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
        summary["models"][model] = model_summary(res.table, qc_root / model, res.warnings,
                                                 res.exit_code)
    summary["fail"] = any(m["counts"].get("fail", 0) for m in summary["models"].values())
    write_session_page(summary, qc_root / SESSION_PAGE)
    atomic_write_json(out, summary)


def model_summary(table, qc_dir: Path, warnings: list[str], exit_code: int) -> dict:
    """One model's entry in a session summary: counts, failing and warning vials by name,
    temperature and its source."""
    from qc.report import vial_finding
    counts = table["status"].value_counts().to_dict()
    temps = table[["temperature", "temperature_source"]].dropna(subset=["temperature"])
    return {"roi_stats": str(qc_dir / "roi_stats.tsv"),
            "counts": {k: int(v) for k, v in counts.items()},
            "failing": [vial_finding(r) for r in table[table["status"] == "fail"].itertuples()],
            "warning_vials": [vial_finding(r) for r in
                              table[table["status"] == "warn"].itertuples()],
            "temperature": float(temps["temperature"].iloc[0]) if len(temps) else None,
            "temperature_source": str(temps["temperature_source"].iloc[0]) if len(temps)
            else "none: reference values uncorrected",
            "warnings": warnings, "exit_status": exit_code}


def write_session_page(summary: dict, path: Path) -> None:
    """One page for the session with every model's table, linking each model's detailed
    report (figures, curves, noise, provenance)."""
    import pandas as pd
    from pipeline.outputs import atomic_write_text
    from qc.report import build_report, esc
    tables = [pd.read_csv(m["roi_stats"], sep="\t") for m in summary["models"].values()
              if m["roi_stats"]]
    table = pd.concat(tables, ignore_index=True) if tables else pd.DataFrame(columns=["status"])
    links = "".join(
        f'<li><a href="{esc(model)}/report.html">{esc(model)}</a>: figures, signal curves, '
        "noise and provenance</li>" if m["roi_stats"] else
        f"<li>{esc(model)}: {esc('; '.join(m['warnings']))}</li>"
        for model, m in summary["models"].items())
    temps = {f"{m['temperature']:g} °C ({m['temperature_source']})" if m.get("temperature")
             is not None else m.get("temperature_source", "") for m in
             summary["models"].values()}
    page = build_report(table, title=f"relaxline session {summary['sub']}/{summary['ses']}",
                        summary={"session": summary["session"],
                                 "site / scanner": f"{summary['site']} / {summary['scanner']}",
                                 "phantom temperature": "; ".join(sorted(temps)) or "–",
                                 "models": ", ".join(summary["models"]) or "–"},
                        warnings=[summary["note"]] if summary.get("note") else (),
                        extra_sections=[("Per-model reports", f"<ul>{links}</ul>")])
    atomic_write_text(path, page)


def history_series(model: str, stem: str, ses: str) -> str:
    """Series key in the history: stable across sessions (``ses-`` entity removed) and
    distinct per model (mese and mese-mono fit the same series); the map stem's
    ``rec-<model>`` entity is dropped, the model being the key's prefix."""
    from pipeline.bidsderiv import model_label
    for entity in (ses, f"rec-{model_label(model)}"):
        if entity:
            stem = re.sub(rf"_?{re.escape(entity)}(?=_|$)", "", stem)
    return f"{model}:{stem}"


def upgrade_series_key(key: str) -> str:
    """A series key of the first release's history (``model:<series stem>``, the stem
    ending with the raw suffix: ``ir:sub-p_IRT1``) in today's form (:func:`history_series`
    of the BIDS derivative map stem: ``ir:sub-p``), so a trend continues across the
    upgrade. Applied once, when the database is migrated from schema 1
    (:func:`qc.history.migrate`)."""
    from pipeline.bidsderiv import derivative_stem
    model, sep, stem = key.partition(":")
    if not sep or not model:
        return key
    return history_series(model, derivative_stem(stem, model), "")


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
                       source=str(Path(summary_path).resolve()),
                       rename_series=upgrade_series_key)
    atomic_write_json(out, {"database": database, "rows": n,
                            "site": summary["site"], "scanner": summary["scanner"],
                            "session": summary["session"]})


# the report step and the run's verdict live in pipeline.reportjob (re-exported here)
from pipeline.reportjob import (drift_settings, report_settings, run_status,  # noqa: E402,F401
                                step_report)


# ---- the commands the rules run ---------------------------------------------------------

def _cmd(step: str, args: Sequence[str], log: Sequence[str]) -> str:
    import shlex
    cmd = (shlex.join([sys.executable, "-m", "pipeline.workflow", step, *map(str, args)])
           + f" > {shlex.quote(str(log[0]))} 2>&1")
    return cmd.replace("{", "{{").replace("}", "}}")  # Snakemake's shell() formats braces


def fit_inputs(cfg: dict, plan_: Plan, wc, chunks: bool = True) -> dict[str, list[str]]:
    """Inputs of a fit (or chunk) job: the series and its JSON sidecars (an edited
    acquisition parameter reruns the fit), its chunk files, the B1 fit's manifest."""
    from pipeline.series import sidecar_path
    job = plan_.job(wc.sub, wc.ses, wc.model, wc.stem)
    b1, t1 = plan_.b1_source(cfg, job), plan_.t1_source(cfg, job)
    sidecars = [str(sidecar_path(p)) for p in job.inputs if sidecar_path(p).is_file()]
    out = {"series": job.inputs, "sidecars": sidecars, "b1": [b1.manifest()] if b1 else [],
           "t1": [t1.manifest()] if t1 else []}
    if chunks:
        out["chunks"] = job.chunk_files()
    return out


def fit_params(cfg: dict, job_model: str, stem: str | None = None) -> dict:
    """The settings that change a fit's result (a rule parameter: a change reruns the fits
    of that model only, or of that series for a per-series slice profile)."""
    from pipeline.wfconfig import t1_setting
    m = cfg["models"][job_model]
    return {"engine": m.get("engine", cfg["fit"]["engine"]), "time_unit": m.get("time_unit", "s"),
            "b1": m.get("b1"), "t1": t1_setting(cfg, job_model),
            "options": model_options(cfg, job_model, stem)}


SMALL_FIT_VOXELS = 131072   # a fit job on fewer voxels runs on one thread (fit_threads)


def fit_threads(cfg: dict, plan_: Plan, wc) -> int:
    """Threads of a ``fit`` or ``chunk`` job: ``fit.threads``, except 1 for a volume (or
    chunk) of fewer than :data:`SMALL_FIT_VOXELS` voxels. Such a job spends its time
    starting Python and loading the compiled code (about 1 s on one core) rather than
    fitting, so two of them side by side finish sooner than each on two cores
    (benchmarks/README.md: the demo). The maps do not depend on the thread count."""
    job = plan_.job(wc.sub, wc.ses, wc.model, wc.stem)
    chunk = getattr(wc, "chunk", None)
    z0, z1 = job.slabs[int(chunk)] if chunk is not None else (0, job.shape[2])
    voxels = job.shape[0] * job.shape[1] * (z1 - z0)
    return 1 if voxels < SMALL_FIT_VOXELS else int(cfg["fit"]["threads"])


def fit_command(cfg: dict, plan_: Plan, step: str, wc, input, output, threads: int,
                log) -> str:
    """Shell command of a ``fit`` or ``chunk`` job (a separate process per job)."""
    job = plan_.job(wc.sub, wc.ses, wc.model, wc.stem)
    fp = fit_params(cfg, job.model, job.stem)
    args = ["--model", job.model, "--inputs", *input.series,
            "--engine", fp["engine"], "--threads", threads, "--time-unit", fp["time_unit"]]
    if input.b1:
        args += ["--b1-manifest", input.b1[0]]
    if input.t1:
        args += ["--t1-manifest", input.t1[0]]
    opts = fp["options"]
    if opts:
        args += ["--options", json.dumps(opts, sort_keys=True)]
    if step == "chunk":
        z0, z1 = job.slabs[int(wc.chunk)]
        args += ["--z", z0, z1, "--out", output[0]]
    else:
        args += ["--out", str(session_dir(output[0])), "--manifest", output[0]]
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
        p.add_argument("--t1-manifest")
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
    hold_for_job()   # a killed Snakemake's jobs still keep new runs out (pipeline.runlock)
    try:
        if a.step == "fit":
            step_fit(a.model, a.inputs, a.out, a.manifest, a.b1_manifest, a.engine, a.threads,
                     a.time_unit, a.chunks, a.options, a.t1_manifest)
        elif a.step == "chunk":
            step_chunk(a.model, a.inputs, a.z[0], a.z[1], a.out, a.b1_manifest, a.engine,
                       a.threads, a.time_unit, a.options, a.t1_manifest)
        else:
            settings = json.loads(a.settings)
            if a.step == "qc":
                step_qc(settings, a.inputs, a.out[0])
            elif a.step == "record":
                step_record(settings["database"], a.inputs[0], a.out[0])
            else:
                step_report(settings, a.inputs, *a.out)
    except RelaxlineError as exc:
        print(f"relaxline workflow {a.step}: error: {shorten_message(str(exc))}",
              file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
