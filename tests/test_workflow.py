"""Workflow: config validation, discovery, chunking, and `relaxline run` end to end.

The end-to-end checks compare the workflow's outputs with the per-command results
(`relaxline fit`, `relaxline qc`) on a small simulated dataset, and check Snakemake's
incremental behaviour (nothing to do on a second run; a new session runs only its
jobs), replace-on-rerun in the history database and recovery from a killed run.
"""
from __future__ import annotations

import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from pipeline import workflow as W
from pipeline.cli import main
from pipeline.errors import InputError
from pipeline.simulate import series_paths

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_config" / "config.yaml"


# ---- config ----------------------------------------------------------------------------

def _cfg(tmp_path: Path, **over) -> dict:
    (tmp_path / "in").mkdir(exist_ok=True)
    ref = tmp_path / "ref.tsv"
    ref.write_text("label\tname\tT1\ttemperature\n1\ta\t1.0\t20\n")
    cfg = {"input_dir": "in", "output_dir": "out",
           "models": {"ir": {"pattern": "*_IRT1.nii.gz"}},
           "phantom": {"reference": "ref.tsv"}}
    cfg.update(over)
    return cfg


def _write(tmp_path: Path, cfg: dict) -> Path:
    p = tmp_path / "config.yaml"
    p.write_text(yaml.safe_dump(cfg))
    return p


def test_sample_config_is_valid():
    cfg = W.validate_config(W.read_config(SAMPLE), str(SAMPLE))
    assert set(cfg["models"]) == {"ir", "dam", "vfa", "mese", "mese-mono", "megre"}
    assert cfg["drift"]["rules"][0] == "1-2s"


def test_defaults_filled_and_paths_resolved(tmp_path):
    cfg = W.load(_write(tmp_path, _cfg(tmp_path)))
    assert cfg["fit"]["engine"] == "fast" and cfg["drift"]["baseline_sessions"] == 10
    assert cfg["input_dir"] == str((tmp_path / "in").resolve())
    assert cfg["history"]["database"] == str((tmp_path / "out" / "history.sqlite").resolve())


@pytest.mark.parametrize("change, key", [
    (lambda c: c["models"].update({"t3": {"pattern": "x"}}), "models"),       # unknown model
    (lambda c: c.update({"fit": {"chunk_voxels": "many"}}), "fit.chunk_voxels"),  # wrong type
    (lambda c: c.update({"fit": {"threads": 0}}), "fit.threads"),
    (lambda c: c.update({"input_dir": "nowhere"}), "input_dir"),              # missing path
    (lambda c: c["phantom"].update({"reference": "none.tsv"}), "phantom.reference"),
    (lambda c: c.pop("output_dir"), "output_dir"),                            # missing key
    (lambda c: c.update({"outptu_dir": "x"}), "(top level)"),                 # misspelt key
    (lambda c: c["models"].update({"vfa": {"pattern": "*_VFA.nii.gz", "b1": "dam"}}),
     "models.vfa.b1"),                                                        # no dam model
    (lambda c: c.update({"drift": {"rules": ["1-5s"]}}), "drift.rules.0"),
    (lambda c: c["models"].update({"ir": {"pattern": "x", "skip_echoes": 1}}),
     "models.ir.skip_echoes"),                                                # wrong model
    (lambda c: c["models"].update({"mese-mono": {"pattern": "x", "skip_echoes": -1}}),
     "models.mese-mono.skip_echoes"),
])
def test_bad_config_names_the_key(tmp_path, change, key):
    cfg = _cfg(tmp_path)
    change(cfg)
    with pytest.raises(InputError) as exc:
        W.load(_write(tmp_path, cfg))
    assert f"`{key}`" in str(exc.value)


def test_bad_ranges_in_tolerances_fail_at_load(tmp_path):
    # a bad range in the tolerance file stops the run before any fit, naming both keys
    cfg = _cfg(tmp_path)
    (tmp_path / "tol.yaml").write_text("ranges:\n  '2': {T2map: [0.085, 0.060]}\n")
    cfg["phantom"]["tolerances"] = "tol.yaml"
    with pytest.raises(InputError) as exc:
        W.load(_write(tmp_path, cfg))
    assert "`phantom.tolerances`" in str(exc.value) and "ranges.2.T2map" in str(exc.value)
    (tmp_path / "tol.yaml").write_text("ranges:\n  '2': {T2map: [0.060, 0.085]}\n")
    assert W.load(_write(tmp_path, cfg))["phantom"]["tolerances"].endswith("tol.yaml")


def test_bad_config_fails_before_any_job(tmp_path, capsys):
    cfg = _cfg(tmp_path)
    cfg["models"]["t3"] = {"pattern": "x"}
    rc = main(["run", "--config", str(_write(tmp_path, cfg))])
    err = capsys.readouterr().err
    assert rc == 2 and "`models`" in err and "'t3'" in err
    assert not (tmp_path / "out").exists()  # nothing ran, nothing written


def test_snakemake_validate_rejects_bad_config(tmp_path):
    # the Snakefile's own `validate` (plain `snakemake` users) also names the key
    cfg = _cfg(tmp_path)
    cfg["fit"] = {"chunk_voxels": "many"}
    r = subprocess.run([sys.executable, "-m", "snakemake", "-s", str(W.SNAKEFILE),
                        "--configfile", str(_write(tmp_path, cfg)), "-d", str(tmp_path / "o"),
                        "-n", "--cores", "1"], capture_output=True, text=True, timeout=120)
    assert r.returncode != 0
    assert "chunk_voxels" in r.stdout + r.stderr


# ---- discovery and planning --------------------------------------------------------------

@pytest.fixture(scope="module")
def sim3(tmp_path_factory) -> Path:
    """Three small simulated sessions (2 slices, 40x40)."""
    d = tmp_path_factory.mktemp("sim")
    assert main(["simulate", str(d), "--sessions", "3", "--slices", "2", "--matrix", "40",
                 "--seed", "3"]) == 0
    return d


def test_plan_discovers_sessions_series_and_chunks(sim3, tmp_path):
    cfg = _cfg(tmp_path, input_dir=str(sim3),
               models={"ir": {"pattern": "*_IRT1.nii.gz"}, "dam": {"pattern": "*_TB1DAM.nii.gz"},
                       "vfa": {"pattern": "*_VFA.nii.gz", "b1": "dam"}},
               fit={"chunk_voxels": 1000},
               discovery={"sessions": ["ses-20261101", "ses-20261102"]})
    cfg = W.load(_write(tmp_path, cfg))
    plan = W.plan(cfg)
    assert [s.ses for s in plan.sessions] == ["ses-20261101", "ses-20261102"]
    s = plan.sessions[0]
    assert (s.site, s.scanner) == ("northfield-lab", "bay2")  # from the sidecars
    assert s.labels.endswith("_dseg.nii.gz")
    dam = [j for j in s.series if j.model == "dam"]
    assert len(dam) == 1 and len(dam[0].inputs) == 2  # flip-1 + flip-2 form one series
    assert dam[0].stem == "sub-relaxlinedemo_ses-20261101_TB1DAM"
    ir = [j for j in s.series if j.model == "ir"][0]
    # 40*40 = 1600 voxels per slice > 1000: one slice per chunk
    assert ir.shape == (40, 40, 2) and ir.slabs == [(0, 1), (1, 2)] and ir.chunked
    vfa = [j for j in s.series if j.model == "vfa"][0]
    assert plan.b1_source(cfg, vfa) is dam[0]


def test_slab_bounds():
    assert W.slab_bounds(5, 100, 250) == [(0, 2), (2, 4), (4, 5)]
    assert W.slab_bounds(3, 100, 50) == [(0, 1), (1, 2), (2, 3)]  # at least one slice


def test_history_series_key_drops_session():
    assert W.history_series("ir", "sub-p_ses-20261101_IRT1", "ses-20261101") == "ir:sub-p_IRT1"
    assert W.history_series("mese-mono", "sub-p_ses-1_MESE", "ses-1") == "mese-mono:sub-p_MESE"
    # derivative stems: the model's rec- entity is dropped (the model is the prefix)
    assert W.history_series("ir", "sub-p_ses-20261101_rec-ir", "ses-20261101") == "ir:sub-p"
    assert W.history_series("mese-mono", "sub-p_ses-1_rec-mesemono_run-2", "ses-1") == \
        "mese-mono:sub-p_run-2"


def test_chunked_fit_identical_to_unsplit(sim3, tmp_path):
    """z-slab chunk jobs + gather give the same bytes as one `relaxline fit`."""
    series = [str(p) for p in series_paths(sim3, 0, "IRT1")]
    assert main(["fit", "ir", *series, "--out", str(tmp_path / "whole"), "--jobs", "1"]) == 0
    chunks = []
    for i, (z0, z1) in enumerate(W.slab_bounds(2, 1600, 1600)):
        c = tmp_path / f"chunk-{i}.npz"
        W.step_chunk("ir", series, z0, z1, str(c), None, "fast", 1, "s")
        chunks.append(str(c))
    assert len(chunks) == 2
    W.step_fit("ir", series, str(tmp_path / "split"), str(tmp_path / "m.json"), None, "fast",
               1, "s", chunks)
    whole = sorted(p.name for p in (tmp_path / "whole").glob("*.nii.gz"))
    # the workflow puts the maps in the session's datatype folder (anat/ for ir)
    assert whole and whole == sorted(p.name for p in (tmp_path / "split" / "anat")
                                     .glob("*.nii.gz"))
    for name in whole:
        assert (tmp_path / "whole" / name).read_bytes() == \
            (tmp_path / "split" / "anat" / name).read_bytes(), name
    manifest = json.loads((tmp_path / "m.json").read_text())
    assert sorted(f for f in manifest["files"] if f.endswith(".nii.gz")) == \
        [f"split/anat/{n}" for n in whole]


def test_model_options_reach_the_fit_job(sim3, tmp_path):
    """`models.mese-mono.plateau/skip_echoes` give the maps of `relaxline fit --plateau
    --skip-echoes 1`, through the chunked path too."""
    series = [str(p) for p in series_paths(sim3, 0, "MESE")]
    assert main(["fit", "mese-mono", *series, "--out", str(tmp_path / "cli"), "--plateau",
                 "--skip-echoes", "1"]) == 0
    cfg = {"models": {"mese-mono": {"pattern": "x", "plateau": True, "skip_echoes": 1}}}
    opts = W.model_options(cfg, "mese-mono")
    assert opts == {"plateau": True, "skip_echoes": 1}
    c = tmp_path / "chunk-0.npz"
    W.step_chunk("mese-mono", series, 0, 2, str(c), None, "fast", 1, "s", opts)
    W.step_fit("mese-mono", series, str(tmp_path / "wf"), str(tmp_path / "m.json"), None,
               "fast", 1, "s", [str(c)], opts)
    names = sorted(p.name for p in (tmp_path / "cli").glob("*.nii.gz"))
    assert any(n.endswith("_Plateaumap.nii.gz") for n in names)
    assert names == sorted(p.name for p in (tmp_path / "wf" / "anat").glob("*.nii.gz"))
    for name in names:
        assert (tmp_path / "cli" / name).read_bytes() == \
            (tmp_path / "wf" / "anat" / name).read_bytes()


def test_profiles_name_real_rules():
    slurm = yaml.safe_load((ROOT / "sample_config/profiles/slurm/config.yaml").read_text())
    assert slurm["executor"] == "slurm" and slurm["slurm-no-account"] is True
    rules = {"fit", "fit_chunk", "qc"}
    assert set(slurm["set-resources"]) <= rules and set(slurm["set-threads"]) <= rules
    smk = (ROOT / "pipeline/rules/fit.smk").read_text() + \
        (ROOT / "pipeline/rules/qc.smk").read_text()
    for r in rules:
        assert f"rule {r}:" in smk
    for r in slurm["set-resources"].values():
        assert {"mem_mb", "runtime"} <= set(r)


def test_lint_clean(sim3, tmp_path):
    cfg = _write(tmp_path, _cfg(tmp_path, input_dir=str(sim3)))
    r = subprocess.run([sys.executable, "-m", "snakemake", "-s", str(W.SNAKEFILE),
                        "--configfile", str(cfg), "--config", f"config_dir={tmp_path}",
                        "-d", str(tmp_path / "out"), "--lint"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "Lints for" not in r.stdout + r.stderr


# ---- end to end --------------------------------------------------------------------------

E2E_MODELS = {"ir": {"pattern": "*_IRT1.nii.gz"}, "dam": {"pattern": "*_TB1DAM.nii.gz"},
              "vfa": {"pattern": "*_VFA.nii.gz", "b1": "dam"}}


def _e2e_config(root: Path, sim: Path, out: str) -> Path:
    cfg = {"input_dir": "rawdata", "output_dir": out, "models": E2E_MODELS,
           "phantom": {"reference": str(sim / "phantom" / "reference.tsv")},
           "fit": {"chunk_voxels": 2000, "threads": 1},   # ir/vfa 40x40x2: 2 chunks each
           "drift": {"baseline_sessions": 2}, "report": {"figures": False}}
    p = root / f"{out}.yaml"
    p.write_text(yaml.safe_dump(cfg))
    return p


def _run(config: Path, *extra: str) -> tuple[int, str]:
    r = subprocess.run([sys.executable, "-m", "pipeline.cli", "run", "--config", str(config),
                        "--cores", "2", *extra], capture_output=True, text=True, timeout=600,
                       cwd="/")  # any directory
    return r.returncode, r.stdout + r.stderr


@pytest.fixture(scope="module")
def e2e(sim3, tmp_path_factory):
    root = tmp_path_factory.mktemp("e2e")
    raw = root / "rawdata" / "sub-relaxlinedemo"
    raw.mkdir(parents=True)
    for ses in ("ses-20261101", "ses-20261102"):
        shutil.copytree(sim3 / "sub-relaxlinedemo" / ses, raw / ses)
    config = _e2e_config(root, sim3, "results")
    t0 = time.monotonic()
    rc, log = _run(config)
    assert rc in (0, 1), log
    return {"root": root, "config": config, "out": root / "results", "log": log,
            "rc": rc, "seconds": time.monotonic() - t0}


def _outputs(out: Path) -> dict[str, float]:
    return {str(p.relative_to(out)): p.stat().st_mtime_ns for p in out.rglob("*")
            if p.is_file() and ".snakemake" not in p.parts and "logs" not in p.parts}


@pytest.mark.slow
def test_e2e_outputs_agree_with_commands(e2e, sim3, tmp_path):
    out = e2e["out"]
    for rel in ("report.html", "status.json", "trend/drift.tsv", "history.sqlite"):
        assert (out / rel).is_file(), rel
    status = json.loads((out / "status.json").read_text())
    assert status["sessions"] == 2 and status["exit_status"] == e2e["rc"]
    ses = out / "sub-relaxlinedemo" / "ses-20261101"
    anat = e2e["root"] / "rawdata" / "sub-relaxlinedemo" / "ses-20261101" / "anat"
    # maps: the (chunked) workflow fit equals `relaxline fit` byte for byte
    ir_in = [str(p) for p in series_paths(e2e["root"] / "rawdata", 0, "IRT1")]
    assert main(["fit", "ir", *ir_in, "--out", str(tmp_path / "ir"), "--jobs", "1"]) == 0
    for p in (tmp_path / "ir").glob("*.nii.gz"):
        assert p.read_bytes() == (ses / "anat" / p.name).read_bytes(), p.name
    # vfa got the session's dam B1 map (BIDS: B1 maps in fmap/)
    side = json.loads((ses / "anat" / "sub-relaxlinedemo_ses-20261101_rec-vfa_T1map.json")
                      .read_text())
    assert side["Options"]["b1_map"].endswith("fmap/sub-relaxlinedemo_ses-20261101_rec-dam_"
                                              "TB1map.nii.gz")
    # tables: the workflow's QC equals `relaxline qc` on the same maps
    rc = main(["qc", str(ses), "--model", "ir", "--labels",
               str(anat / "sub-relaxlinedemo_ses-20261101_dseg.nii.gz"), "--reference",
               str(sim3 / "phantom" / "reference.tsv"), "--out", str(tmp_path / "qc"),
               "--no-figures"])
    assert rc in (0, 1)
    mine = pd.read_csv(ses / "qc" / "ir" / "roi_stats.tsv", sep="\t")
    theirs = pd.read_csv(tmp_path / "qc" / "roi_stats.tsv", sep="\t")
    pd.testing.assert_frame_equal(mine, theirs)
    # database: one row per roi_stats row of every session and model, same numbers
    con = sqlite3.connect(out / "history.sqlite")
    db = pd.read_sql_query("SELECT * FROM roi_history", con)
    con.close()
    n = sum(len(pd.read_csv(p, sep="\t")) for p in out.glob("sub-*/ses-*/qc/*/roi_stats.tsv"))
    assert len(db) == n and n > 0
    row = db[(db["session"] == "20261101") & (db["series"] == "ir:sub-relaxlinedemo")
             & (db["map"] == "T1map")].sort_values("label")
    assert np.allclose(row["mean"].to_numpy(), theirs.sort_values("label")["mean"].to_numpy(),
                       rtol=1e-6, equal_nan=True)
    assert (row["site"] == "northfield-lab").all()
    assert "Drift rules" in (out / "report.html").read_text()


@pytest.mark.slow
def test_qc_step_places_vials_from_layout_without_label_map(e2e, sim3, tmp_path):
    """A session without a label map is QC'd with the configured layout instead."""
    ses = e2e["out"] / "sub-relaxlinedemo" / "ses-20261101"
    manifest = next((ses / "fits" / "ir").glob("*.fit.json"))
    settings = {"sub": "sub-relaxlinedemo", "ses": "ses-20261101", "session": "20261101",
                "site": "s", "scanner": "x", "labels": None, "labels_pattern": "*_dseg.nii.gz",
                "folder": "f", "reference": str(sim3 / "phantom" / "reference.tsv"),
                "tolerances": None, "erode_mm": 0.0, "figures": False,
                "layout": str(sim3 / "phantom" / "layout.tsv"), "margin_mm": 2.0}
    W.step_qc(settings, [str(manifest)], str(tmp_path / "qc" / "session.json"))
    summary = json.loads((tmp_path / "qc" / "session.json").read_text())
    placed = pd.read_csv(summary["models"]["ir"]["roi_stats"], sep="\t")
    given = pd.read_csv(ses / "qc" / "ir" / "roi_stats.tsv", sep="\t")
    t1 = placed[placed["map"] == "T1map"].set_index("label")["mean"]
    ref = given[given["map"] == "T1map"].set_index("label")["mean"]
    assert len(t1) == len(ref) == 12
    assert np.allclose(t1, ref.loc[t1.index], rtol=0.05)  # same vials, slightly other voxels


@pytest.mark.slow
def test_e2e_second_run_nothing_to_do_then_new_session_only(e2e, sim3):
    out = e2e["out"]
    before = _outputs(out)
    rc, log = _run(e2e["config"])
    assert rc == e2e["rc"], log
    assert "Nothing to be done" in log
    assert _outputs(out) == before  # not a file touched
    # a third session arrives: only its jobs and the trend update run
    shutil.copytree(sim3 / "sub-relaxlinedemo" / "ses-20261103",
                    e2e["root"] / "rawdata" / "sub-relaxlinedemo" / "ses-20261103")
    rc, log = _run(e2e["config"])
    assert rc in (0, 1), log
    after = _outputs(out)
    changed = {k for k in after if before.get(k) != after[k]}
    old = {k for k in changed if "ses-20261101" in k or "ses-20261102" in k}
    assert not old, sorted(old)[:5]
    assert any("ses-20261103/anat/" in k and "_rec-ir_" in k for k in changed)
    assert {"report.html", "status.json", "trend/drift.tsv"} <= changed
    # rerun every session's history record: rows are replaced, never duplicated
    rc, log = _run(e2e["config"], "--forcerun", "record")
    assert rc in (0, 1), log
    con = sqlite3.connect(out / "history.sqlite")
    dup = con.execute("SELECT COUNT(*) FROM (SELECT 1 FROM roi_history GROUP BY site, scanner,"
                      " session, series, map, label HAVING COUNT(*) > 1)").fetchone()[0]
    sessions = con.execute("SELECT COUNT(DISTINCT session) FROM roi_history").fetchone()[0]
    con.close()
    assert dup == 0 and sessions == 3
    assert json.loads((out / "status.json").read_text())["sessions"] == 3


@pytest.mark.slow
def test_e2e_killed_run_restarts_cleanly(e2e, sim3):
    """Kill a run mid-way (its whole process group), restart: complete, nothing partial."""
    config = _e2e_config(e2e["root"], sim3, "killed")
    out = e2e["root"] / "killed"
    proc = subprocess.Popen([sys.executable, "-m", "pipeline.cli", "run", "--config",
                             str(config), "--cores", "2"], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline and not list(out.glob("sub-*/ses-*/fits/*/*.fit.json")):
        time.sleep(0.2)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    assert not (out / "report.html").exists()  # it really was interrupted
    rc, log = _run(config)
    # same data as the main run (which by now has the third session too): same verdict
    assert rc == json.loads((e2e["out"] / "status.json").read_text())["exit_status"], log
    import nibabel as nib
    for p in out.rglob("*.nii.gz"):
        np.asarray(nib.load(str(p)).dataobj)  # every final-name map reads completely
    for p in out.rglob("*.json"):
        if ".snakemake" not in p.parts:
            json.loads(p.read_text())
    # and the results equal the uninterrupted run's
    ref = e2e["out"]
    for p in ref.glob("sub-*/ses-*/*/*.nii.gz"):   # anat/ and fmap/
        assert p.read_bytes() == (out / p.relative_to(ref)).read_bytes(), p.name


@pytest.mark.slow
@pytest.mark.slurm
@pytest.mark.skipif(not os.environ.get("RELAXLINE_TEST_SLURM"),
                    reason="needs a running SLURM cluster (.ci/slurm-up up; "
                           "RELAXLINE_TEST_SLURM=1)")
def test_e2e_slurm_profile_gives_the_same_maps(e2e, sim3):
    """The documented SLURM profile on a real (one-node) cluster: every fit and QC job is a
    SLURM job; maps and tables equal the local run's; a job that fails on the cluster (a
    series cut short) fails the run with its own error message shown, and the other
    sessions' outputs are complete and unchanged."""
    import re
    root = e2e["root"]
    raw = root / "rawdata-slurm" / "sub-relaxlinedemo"
    for ses in ("ses-20261101", "ses-20261102"):
        shutil.copytree(root / "rawdata" / "sub-relaxlinedemo" / ses, raw / ses)
    bad = raw / "ses-20261103"
    shutil.copytree(sim3 / "sub-relaxlinedemo" / "ses-20261103", bad)
    cut = bad / "anat" / "sub-relaxlinedemo_ses-20261103_inv-4_IRT1.nii.gz"
    cut.write_bytes(cut.read_bytes()[: cut.stat().st_size // 2])   # header intact, data cut
    config = _e2e_config(root, sim3, "slurm")
    cfg = yaml.safe_load(config.read_text())
    cfg["input_dir"] = "rawdata-slurm"
    config.write_text(yaml.safe_dump(cfg))
    rc, log = _run(config, "--profile", str(ROOT / "sample_config" / "profiles" / "slurm"))
    # the failed job fails the run, and its own message reaches the user
    assert rc == 2, log
    assert "truncated or corrupt" in log and cut.name in log, log
    # every cluster job was a SLURM job: each fit/fit_chunk/qc jobid was submitted by sbatch
    jobs = re.findall(r"^rule (fit|fit_chunk|qc):\n(?:\s+\S.*\n)*?\s+jobid: (\d+)", log, re.M)
    submitted = dict(re.findall(r"Job (\d+) has been submitted with SLURM jobid (\d+)", log))
    assert {r for r, _ in jobs} >= {"fit", "fit_chunk", "qc"}, log
    assert all(j in submitted for _, j in jobs), (jobs, submitted)
    # the good sessions: maps bitwise and tables equal to the local run
    out, ref = root / "slurm", e2e["out"]
    good = ("ses-20261101", "ses-20261102")  # the local run may hold more sessions by now
    maps = [p for ses in good for p in ref.glob(f"sub-*/{ses}/*/*.nii.gz")]
    tables = [p for ses in good for p in ref.glob(f"sub-*/{ses}/qc/*/roi_stats.tsv")]
    assert maps and tables
    for p in maps:
        assert p.read_bytes() == (out / p.relative_to(ref)).read_bytes(), p.name
    for p in tables:
        pd.testing.assert_frame_equal(pd.read_csv(p, sep="\t"),
                                      pd.read_csv(out / p.relative_to(ref), sep="\t"))
    # nothing partial under a final name for the failed series
    failed = out / "sub-relaxlinedemo" / "ses-20261103" / "anat"
    assert not list(failed.glob("*_rec-ir_*.nii.gz")) if failed.exists() else True


# ---- report job and exit status (constructed history) -------------------------------------

def _session(tmp_path: Path, ses: str, t1: list[float], status: str = "pass") -> str:
    """A QC summary + roi_stats.tsv of one session (two vials, reference 1.0 s)."""
    from pipeline.qcjob import TSV_COLUMNS
    d = tmp_path / ses
    d.mkdir()
    rows = [{c: np.nan for c in TSV_COLUMNS} | {
        "session": ses, "series": f"sub-p_ses-{ses}_IRT1", "map": "T1map", "label": i + 1,
        "name": f"v{i + 1}", "n_voxels": 30, "n_excluded": 0, "mean": v, "sd": 0.01,
        "median": v, "iqr": 0.01, "cv_pct": 1.0, "units": "s", "reference": 1.0,
        "reference_at_temperature": 1.0, "bias_pct": 100 * (v - 1), "warn_pct": 5,
        "tolerance_pct": 10, "status": status if i == 0 else "pass", "note": "",
        "temperature": 20.0} for i, v in enumerate(t1)]
    pd.DataFrame(rows)[TSV_COLUMNS].to_csv(d / "roi_stats.tsv", sep="\t", index=False)
    summary = {"sub": "sub-p", "ses": f"ses-{ses}", "session": ses, "site": "A",
               "scanner": "S", "labels": "l", "note": "", "fail": status == "fail",
               "models": {"ir": {"roi_stats": str(d / "roi_stats.tsv"),
                                 "counts": {status: 1, "pass": 1} if status != "pass"
                                 else {"pass": 2}, "warnings": [], "exit_status": 0}}}
    (d / "session.json").write_text(json.dumps(summary))
    return str(d / "session.json")


def _report(tmp_path: Path, sessions: list[str]) -> tuple[int, dict]:
    db = tmp_path / "h.sqlite"
    for s in sessions:
        W.step_record(str(db), s, str(Path(s).with_name("history.json")))
    settings = {"database": str(db), "title": "t", "drift": W.validate_config(
        {"input_dir": "i", "output_dir": "o", "models": {"ir": {"pattern": "x"}},
         "drift": {"baseline_sessions": 4, "min_sd_pct": 0.0}})["drift"]}
    out = tmp_path / "out"
    W.step_report(settings, sessions, str(out / "report.html"), str(out / "status.json"),
                  str(out / "trend" / "drift.tsv"))
    return W.run_status(out)[0], json.loads((out / "status.json").read_text())


BASE_T1 = [0.99, 1.01, 0.99, 1.01]   # baseline mean 1.0, SD 0.011547


def test_report_exit_1_on_drift_rejection_in_newest_session(tmp_path):
    # newest value 1.05: z = 4.3 > 3 (1-3s, Westgard et al. 1981, Clin Chem 27:493)
    sessions = [_session(tmp_path, f"2026110{i + 1}", [v, 1.0]) for i, v in
                enumerate(BASE_T1 + [1.05])]
    rc, status = _report(tmp_path, sessions)
    assert rc == 1
    assert {"rule": "1-3s", "label": 1, "session": "20261105"}.items() <= \
        status["drift_rejections_latest"][0].items()
    html = (tmp_path / "out" / "report.html").read_text()
    assert "1-3s" in html and "Drift rules" in html
    # the headline states the verdict the exit status gives, naming rule, vial and map
    head = html[html.index('<div class="banner'):html.index("<h2>")]
    assert "DRIFT REJECTION" in head and "exit status 1" in head
    assert "1-3s" in head and "v1 (label 1)" in head and "T1 (ir)" in head
    drift = pd.read_csv(tmp_path / "out" / "trend" / "drift.tsv", sep="\t")
    assert "1-3s" in set(drift["rule"])
    assert list((tmp_path / "out" / "trend").glob("*.png"))


def test_report_exit_0_when_only_an_old_session_was_off(tmp_path):
    sessions = [_session(tmp_path, f"2026110{i + 1}", [v, 1.0]) for i, v in
                enumerate(BASE_T1 + [1.05, 1.0])]
    rc, status = _report(tmp_path, sessions)
    assert rc == 0 and status["drift_rejections_total"] == 1
    assert status["drift_rejections_latest"] == []


def test_report_exit_1_on_qc_fail_in_newest_session_only(tmp_path):
    old_fail = [_session(tmp_path, "20261101", [1.2, 1.0], "fail"),
                _session(tmp_path, "20261102", [1.0, 1.0])]
    assert _report(tmp_path, old_fail)[0] == 0
    shutil.rmtree(tmp_path / "out")
    (tmp_path / "h.sqlite").unlink()
    new_fail = old_fail + [_session(tmp_path, "20261103", [1.2, 1.0], "fail")]
    rc, status = _report(tmp_path, new_fail)
    assert rc == 1 and status["qc_fail_latest"] == ["sub-p/ses-20261103"]


def test_report_links_each_session_report_relatively(tmp_path):
    """The Sessions table links each session's QC report by a relative path that exists."""
    import re
    from html.parser import HTMLParser
    from urllib.parse import unquote, urlsplit
    sessions = [_session(tmp_path, f"2026110{i + 1}", [1.0, 1.0]) for i in range(2)]
    for s in sessions:
        Path(s).with_name("report.html").write_text("<!DOCTYPE html><p>session</p>")
    _report(tmp_path, sessions)
    page = (tmp_path / "out" / "report.html").read_text()

    class Links(HTMLParser):
        def __init__(self):
            super().__init__()
            self.hrefs: list[str] = []

        def handle_starttag(self, tag, attrs):
            self.hrefs += [v for k, v in attrs if tag == "a" and k == "href"]

    parser = Links()
    parser.feed(page)
    assert len(parser.hrefs) == len(sessions)
    for href in parser.hrefs:
        parts = urlsplit(href)
        assert not parts.scheme and not parts.netloc and not href.startswith("/"), href
        target = (tmp_path / "out" / unquote(parts.path)).resolve()
        assert target.is_file() and target.name == "report.html", href
    assert {(tmp_path / "out" / unquote(h)).resolve() for h in parser.hrefs} == \
        {Path(s).with_name("report.html").resolve() for s in sessions}
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", page)


def test_qc_step_scan_session_judged_by_configured_ranges(tmp_path):
    """A scan session (no reference) in the workflow: the tolerance file's ranges decide."""
    import nibabel as nib
    from fitting import status as fit_status
    lab = np.zeros((8, 8, 2), np.int16)
    lab[1:4, 1:4] = 1
    lab[5:8, 5:8] = 2
    t1 = np.where(lab == 1, 0.80, np.where(lab == 2, 1.50, np.nan)).astype(np.float32)
    ses = tmp_path / "sub-scan" / "ses-20261101"    # a session folder of the results
    maps, fits = ses / "anat", ses / "fits" / "ir"
    maps.mkdir(parents=True)
    fits.mkdir(parents=True)
    stem = "sub-scan_ses-20261101_rec-ir"
    nib.save(nib.Nifti1Image(t1, np.eye(4)), str(maps / f"{stem}_T1map.nii.gz"))
    (maps / f"{stem}_T1map.json").write_text(json.dumps({"Units": "s", "Model": "ir"}))
    nib.save(nib.Nifti1Image(np.full(lab.shape, fit_status.OK, np.uint8), np.eye(4)),
             str(maps / f"{stem}_desc-fitstatus_mask.nii.gz"))
    (fits / "manifest.json").write_text(json.dumps({"model": "ir"}))
    nib.save(nib.Nifti1Image(lab, np.eye(4)), str(tmp_path / "regions_dseg.nii.gz"))
    tol = tmp_path / "tol.yaml"
    tol.write_text("ranges:\n  '1': {T1map: [0.70, 0.95]}\n  '2': {T1map: [0.70, 0.95]}\n")
    settings = {"sub": "sub-scan", "ses": "ses-20261101", "session": "20261101", "site": "A",
                "scanner": "S", "labels": str(tmp_path / "regions_dseg.nii.gz"),
                "labels_pattern": "*_dseg.nii.gz", "folder": str(tmp_path), "reference": None,
                "tolerances": str(tol), "erode_mm": 0.0, "layout": None, "margin_mm": 2.0,
                "figures": False}
    out = tmp_path / "qc" / "session.json"
    W.step_qc(settings, [str(fits / "manifest.json")], str(out))
    summary = json.loads(out.read_text())
    assert summary["fail"] and summary["models"]["ir"]["counts"] == {"pass": 1, "fail": 1}
    df = pd.read_csv(tmp_path / "qc" / "ir" / "roi_stats.tsv", sep="\t").set_index("label")
    # 0.80 s lies in [0.70, 0.95]; 1.50 s does not
    assert df.loc[1, "status"] == "pass" and df.loc[2, "status"] == "fail"
    assert summary["models"]["ir"]["exit_status"] == 1


def test_fit_threads_one_for_small_volumes_and_chunks():
    """Small fit jobs run on one thread (two side by side on two cores); large volumes and
    large chunks get fit.threads."""
    from types import SimpleNamespace

    from pipeline.sessions import SeriesJob
    small = SeriesJob("sub-a", "ses-1", "ir", "s", [], (40, 40, 12), [(0, 12)])
    big = SeriesJob("sub-a", "ses-1", "ir", "b", [], (256, 256, 64), [(0, 32), (32, 64)])
    jobs = {"s": small, "b": big}
    plan_ = SimpleNamespace(job=lambda sub, ses, model, stem: jobs[stem])
    cfg = {"fit": {"threads": 4}}
    wc = lambda stem, **kw: SimpleNamespace(sub="sub-a", ses="ses-1", model="ir", stem=stem,  # noqa: E731
                                            **kw)
    assert W.fit_threads(cfg, plan_, wc("s")) == 1
    assert W.fit_threads(cfg, plan_, wc("b")) == 4              # gathers 4M voxels' maps
    assert W.fit_threads(cfg, plan_, wc("b", chunk="1")) == 4   # 2M voxels
    big.slabs = [(0, 1), (1, 64)]
    assert W.fit_threads(cfg, plan_, wc("b", chunk="0")) == 1   # one slice: 65 536 voxels
