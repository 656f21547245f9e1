"""Fault suite, part 4: the workflow under concurrency, odd file names and direct
Snakemake use (issue 16).

One lock per output folder, held by whatever works there: `relaxline run` (and the
Snakemake it starts, even when `relaxline run` itself is killed), Snakemake run directly
on either Snakefile, and the step processes of a run. A file whose name Snakemake cannot
use is skipped with a warning naming it, and the other sessions are processed.
"""
from __future__ import annotations

import fcntl
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml

from faultkit import P, run_cli, simulate_session, tree_digest
from pipeline import workflow as W
from pipeline.runlock import JOBS_LOCK, RUN_LOCK

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def sim(tmp_path_factory) -> Path:
    return simulate_session(tmp_path_factory.mktemp("sim"))


def _config(tmp_path: Path, input_dir: Path, out: str = "res", **models) -> Path:
    cfg = {"input_dir": str(input_dir), "output_dir": str(tmp_path / out),
           "models": models or {"megre": {"pattern": "*_MEGRE.nii.gz"}},
           "phantom": {"reference": str(input_dir / "phantom" / "reference.tsv")
                       if (input_dir / "phantom").is_dir() else None},
           "report": {"figures": False}}
    if cfg["phantom"]["reference"] is None:
        del cfg["phantom"]
    p = tmp_path / f"{out}.yaml"
    p.write_text(yaml.safe_dump(cfg))
    return p


def _hold(path: Path, how: int):
    path.parent.mkdir(parents=True, exist_ok=True)
    f = open(path, "a")
    fcntl.flock(f, how | fcntl.LOCK_NB)
    return f


def test_run_refused_while_another_run_holds_the_folder(sim, tmp_path, capsys):
    config = _config(tmp_path, sim)
    with _hold(tmp_path / "res" / RUN_LOCK, fcntl.LOCK_EX):
        before = tree_digest(tmp_path)
        code, err = run_cli(["run", "--config", str(config)], capsys)
    assert code == 2 and "another run is working in this output folder" in err, err
    assert tree_digest(tmp_path) == before


def test_run_refused_while_jobs_of_a_killed_run_still_work(sim, tmp_path, capsys):
    config = _config(tmp_path, sim)
    with _hold(tmp_path / "res" / JOBS_LOCK, fcntl.LOCK_SH):   # as a step process does
        code, err = run_cli(["run", "--config", str(config)], capsys)
    assert code == 2 and "jobs of an earlier run are still working" in err, err
    assert not list((tmp_path / "res").glob("sub-*"))


@pytest.mark.parametrize("snakefile", [W.SNAKEFILE, ROOT / "Snakefile"],
                         ids=["packaged", "top-level"])
def test_snakemake_run_directly_takes_the_same_lock(sim, tmp_path, snakefile):
    config = _config(tmp_path, sim)
    with _hold(tmp_path / "res" / RUN_LOCK, fcntl.LOCK_EX):
        r = subprocess.run([sys.executable, "-m", "snakemake", "-s", str(snakefile),
                            "--configfile", str(config), "-d", str(tmp_path / "res"),
                            "--cores", "1"], capture_output=True, text=True, timeout=300)
    assert r.returncode != 0
    assert "another run is working in this output folder" in r.stdout + r.stderr
    assert not list((tmp_path / "res").glob("sub-*"))


def test_dry_run_takes_no_lock(sim, tmp_path):
    config = _config(tmp_path, sim)
    with _hold(tmp_path / "res" / RUN_LOCK, fcntl.LOCK_EX):
        r = subprocess.run([sys.executable, "-m", "snakemake", "-s", str(W.SNAKEFILE),
                            "--configfile", str(config), "-d", str(tmp_path / "res"),
                            "--cores", "1", "-n"], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stdout + r.stderr


def _lock_is_held(out: Path) -> bool:
    try:
        f = _hold(out / RUN_LOCK, fcntl.LOCK_EX)
    except BlockingIOError:
        return True
    f.close()
    return False


@pytest.mark.slow
def test_killing_only_relaxline_run_keeps_the_folder_locked(sim, tmp_path, capsys):
    """SIGKILL to `relaxline run` alone: its Snakemake goes on working and keeps the lock,
    so a second run is refused until it ends."""
    config = _config(tmp_path, sim, ir={"pattern": "*_IRT1.nii.gz", "engine": "lmfit"})
    out = tmp_path / "res"
    first = subprocess.Popen([sys.executable, "-m", "pipeline.cli", "run", "--config",
                              str(config), "--cores", "1"], stdout=subprocess.DEVNULL,
                             stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and not list(out.glob("logs/*/*/fit_ir_*.log")):
            time.sleep(0.1)
        assert list(out.glob("logs/*/*/fit_ir_*.log")), "the fit job never started"
        os.kill(first.pid, signal.SIGKILL)          # only relaxline run, not its group
        first.wait()
        assert _lock_is_held(out)                    # Snakemake holds the lock it was given
        code, err = run_cli(["run", "--config", str(config)], capsys)
        assert code == 2 and "another run is working" in err, err
        assert not (out / "report.html").exists()    # the first run really was still busy
    finally:
        os.killpg(first.pid, signal.SIGKILL)         # Snakemake and its job
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline and _lock_is_held(out):
        time.sleep(0.1)
    assert not _lock_is_held(out)                    # released with the last holder


@pytest.mark.slow
def test_top_level_snakefile_does_the_work(sim, tmp_path):
    config = _config(tmp_path, sim)
    r = subprocess.run([sys.executable, "-m", "snakemake", "-s", str(ROOT / "Snakefile"),
                        "--configfile", str(config), "-d", str(tmp_path / "res"), "--cores",
                        "1"], capture_output=True, text=True, timeout=600)
    log = r.stdout + r.stderr
    assert r.returncode == 0, log[-3000:]
    assert "Nothing to be done" not in log
    out = tmp_path / "res"
    assert (out / "report.html").is_file() and (out / "history.sqlite").is_file()
    assert list(out.glob(f"sub-*/ses-*/anat/{P}rec-megre_T2starmap.nii.gz"))


@pytest.mark.slow
def test_file_name_with_braces_is_skipped_not_fatal(sim, tmp_path, capsys):
    raw = tmp_path / "raw"
    shutil.copytree(sim / "sub-relaxlinedemo", raw / "sub-relaxlinedemo")
    shutil.copytree(sim / "phantom", raw / "phantom")
    anat = raw / "sub-relaxlinedemo" / "ses-20261101" / "anat"
    odd = anat / f"{P}run-{{1}}_MEGRE.nii.gz"
    shutil.copy(anat / f"{P}MEGRE.nii.gz", odd)
    shutil.copy(anat / f"{P}MEGRE.json", anat / f"{P}run-{{1}}_MEGRE.json")
    given = tree_digest(raw)
    code, err = run_cli(["run", "--config", str(_config(tmp_path, raw)), "--cores", "1"],
                        capsys)
    assert code in (0, 1), err[-3000:]
    assert f"warning: {odd}: skipped" in err
    assert "WildcardError" not in err and "Traceback" not in err
    maps = list((tmp_path / "res").glob("sub-*/ses-*/anat/*rec-megre_T2starmap.nii.gz"))
    assert [p.name for p in maps] == [f"{P}rec-megre_T2starmap.nii.gz"]
    assert json.loads((tmp_path / "res" / "status.json").read_text())["sessions"] == 1
    assert tree_digest(raw) == given
