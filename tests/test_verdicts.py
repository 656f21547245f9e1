"""Nightly verdicts through `relaxline run` on simulated histories (issue 15).

A drift-free history of 12 sessions of the invented demo phantom, then a 13th session in
which one vial's T1 has stepped by +5 %; and dry runs after editing a sidecar, the
reference table or the tolerances. The step is put into the simulated *truth*
(``relaxline simulate --step``), so what the rules must find is known from outside the
fit: the rule text of Westgard et al. 1981 (Clin Chem 27:493) with a baseline SD floored
at 1.5 % — a +5 % step is 3.3 floored SD, beyond the 1-3s limit.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from pipeline.cli import main

pytestmark = pytest.mark.slow
N_FREE = 12


def _run(config: Path, *extra: str) -> tuple[int, str]:
    r = subprocess.run([sys.executable, "-m", "pipeline.cli", "run", "--config", str(config),
                        "--cores", "2", *extra], capture_output=True, text=True, timeout=900,
                       cwd="/")
    return r.returncode, r.stdout + r.stderr


def _headline(report: Path) -> str:
    page = report.read_text()
    return page[page.index('<div class="banner'):page.index("<h2>")]


@pytest.fixture(scope="module")
def history(tmp_path_factory):
    root = tmp_path_factory.mktemp("verdicts")
    sim = root / "sim"
    assert main(["simulate", str(sim), "--sessions", str(N_FREE + 1), "--slices", "2",
                 "--matrix", "80", "--seed", "11", "--step", f"7:5:{N_FREE + 1}"]) == 0
    raw = root / "rawdata" / "sub-relaxlinedemo"
    sessions = sorted(p.name for p in (sim / "sub-relaxlinedemo").glob("ses-*"))
    for ses in sessions[:N_FREE]:
        shutil.copytree(sim / "sub-relaxlinedemo" / ses, raw / ses)
    for f in (sim / "sub-relaxlinedemo").glob("*_sessions.*"):   # phantom temperatures
        shutil.copy(f, raw / f.name)
    (root / "tol.yaml").write_text("maps:\n  T1map: {warn_pct: 7.5, fail_pct: 15}\n")
    cfg = {"input_dir": "rawdata", "output_dir": "results",
           "models": {"ir": {"pattern": "*_IRT1.nii.gz"}},
           "phantom": {"reference": str(sim / "phantom" / "reference.tsv"),
                       "tolerances": "tol.yaml"},
           "fit": {"threads": 1}, "report": {"figures": False}}   # default drift rules
    config = root / "config.yaml"
    config.write_text(yaml.safe_dump(cfg))
    rc, log = _run(config)
    return {"root": root, "sim": sim, "config": config, "raw": raw, "sessions": sessions,
            "rc": rc, "log": log, "out": root / "results"}


def test_drift_free_history_passes(history):
    # N_FREE sessions, the default baseline of 10: the last two are judged
    assert history["rc"] == 0, history["log"]
    head = _headline(history["out"] / "report.html")
    assert "PASS" in head and "exit status 0" in head
    status = json.loads((history["out"] / "status.json").read_text())
    assert status["verdict"] == "pass" and status["drift_rejections_total"] == 0
    # the temperature came from the BIDS sessions file, and the report says so
    page = (history["out"] / "report.html").read_text()
    assert "sub-relaxlinedemo_sessions.tsv (phantom_temperature)" in page
    # console: one line per session and model, then the verdict, then the report path
    lines = [ln for ln in history["log"].splitlines() if re.search(r"ses-\d+ ir: ", ln)]
    assert len(lines) == N_FREE and all("pass" in ln for ln in lines)
    tail = history["log"].strip().splitlines()[-1]
    assert tail.startswith("relaxline run: report: ")


def test_dry_run_after_edits_lists_exactly_the_affected_jobs(history):
    """A sidecar edit reruns that series' fit and its session's QC; the reference or the
    tolerances rerun every session's QC and no fit."""
    config, raw = history["config"], history["raw"]

    def planned(*extra) -> dict[str, int]:
        rc, log = _run(config, "-n", *extra)
        assert rc == 0, log
        counts = dict(re.findall(r"^(fit|fit_chunk|qc|record|report)\s+(\d+)$", log, re.M))
        jobs = {k: int(v) for k, v in counts.items()}
        jobs["_sessions"] = sorted(set(re.findall(r"ses=(ses-\d+)", log)))
        return jobs

    side = sorted((raw / history["sessions"][0] / "anat").glob("*_IRT1.json"))[0]
    keep, st = side.read_text(), side.stat()
    meta = json.loads(keep)
    meta["InversionTime"] = meta["InversionTime"] * 1.1
    side.write_text(json.dumps(meta))
    jobs = planned()
    assert {k: v for k, v in jobs.items() if k != "_sessions"} == \
        {"fit": 1, "qc": 1, "record": 1, "report": 1}
    assert jobs["_sessions"] == [history["sessions"][0]]
    side.write_text(keep)
    os.utime(side, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert "Nothing to be done" in _run(config, "-n")[1]
    for edited in (history["sim"] / "phantom" / "reference.tsv", history["root"] / "tol.yaml"):
        keep, st = edited.read_text(), edited.stat()
        edited.write_text(keep + "\n")
        jobs = planned()
        assert {k: v for k, v in jobs.items() if k != "_sessions"} == \
            {"qc": N_FREE, "record": N_FREE, "report": 1}, edited
        edited.write_text(keep)
        os.utime(edited, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert "Nothing to be done" in _run(config, "-n")[1]


def test_step_in_one_vial_is_rejected_and_named(history):
    new = history["sessions"][N_FREE]
    shutil.copytree(history["sim"] / "sub-relaxlinedemo" / new, history["raw"] / new)
    rc, log = _run(history["config"])
    assert rc == 1, log
    head = _headline(history["out"] / "report.html")
    assert "DRIFT REJECTION" in head and "exit status 1" in head
    # the vial, the map (and model) and the rule are on the first screen
    assert "vial07 (label 7)" in head and "T1 (ir)" in head
    assert re.search(r"drift rule (1-3s|2-2s|4-1s)", head)
    assert f"session {new[4:]}" in head
    status = json.loads((history["out"] / "status.json").read_text())
    assert {r["label"] for r in status["drift_rejections_latest"]} == {7}
    assert re.search(rf"{new} ir: .*1 drift rejection", log)
    assert "verdict: DRIFT REJECTION (exit status 1)" in log


def test_sessions_table_shows_unjudged_models_as_statistics_only():
    # a model without reference values (dam, megre in the demo) has statistics but no
    # pass/warn/fail: the table says so instead of "0 0 0"
    import pandas as pd
    from pipeline.reportjob import NO_REFERENCE
    from qc.verdict import sessions_html
    rows = pd.DataFrame([
        {"session": "1", "model": "ir", "n_pass": 12, "n_warn": 0, "n_fail": 0, "judged": True,
         "failing": "", "rejections": 0, "temperature": 20.0, "temperature_source": "",
         "href": ""},
        {"session": "1", "model": "dam", "n_pass": 0, "n_warn": 0, "n_fail": 0,
         "judged": False, "failing": NO_REFERENCE, "rejections": 0, "temperature": 20.0,
         "temperature_source": "", "href": ""}])
    page = sessions_html(rows)
    dam = page[page.index(">dam<"):]
    assert dam.count("<td>–</td>") == 3 and NO_REFERENCE in dam
    assert "<td>12</td>" in page[:page.index(">dam<")]
