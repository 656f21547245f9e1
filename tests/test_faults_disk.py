"""Fault suite, part 3: a full disk (issue 16).

Each case writes onto a small tmpfs (root only: CI runs as root; elsewhere the tests
skip with the reason). A full disk must give exit 2 and "no space left on <folder>",
leave no partial output set (nothing new, an earlier set untouched, no temporary
files) and never cost the history database its rows.
"""
from __future__ import annotations

import os
import subprocess
import uuid
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from faultkit import Kit, run_cli, simulate_session, tree_digest
from fitting.errors import RelaxlineError
from qc import history


def _mount(size: str, where: Path) -> None:
    where.mkdir(parents=True)
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here ({r.stderr.strip() or r.returncode})")


@pytest.fixture
def small_disk(tmp_path):
    """A function mounting a tmpfs of the given size; all are unmounted afterwards."""
    if os.geteuid() != 0:
        pytest.skip("a full disk is simulated with a tmpfs, which needs root (CI runs as root)")
    mounted: list[Path] = []

    def mount(size: str) -> Path:
        where = tmp_path / f"disk-{uuid.uuid4().hex[:6]}"
        _mount(size, where)
        mounted.append(where)
        return where

    yield mount
    for where in mounted:
        if subprocess.run(["umount", str(where)]).returncode != 0:
            subprocess.run(["umount", "-l", str(where)])


def fill(disk: Path, leave: int = 0) -> None:
    """Fill ``disk`` until only about ``leave`` bytes are free."""
    st = os.statvfs(disk)
    free = st.f_bavail * st.f_frsize
    with open(disk / "filler.bin", "wb") as fh:
        fh.write(b"\0" * max(free - leave, 0))


@pytest.fixture(scope="module")
def sim(tmp_path_factory) -> Path:
    return simulate_session(tmp_path_factory.mktemp("sim"))


def _hidden(folder: Path) -> list[str]:
    return [p.name for p in folder.rglob(".*")]


def test_fit_on_a_full_disk_writes_no_partial_set(sim, small_disk, tmp_path, capsys):
    kit = Kit(sim, tmp_path)
    disk = small_disk("40k")      # room for some of the 12 files of a megre fit, not all
    out = disk / "o"
    before = tree_digest(sim)
    code, err = run_cli(["fit", "megre", kit.s("MEGRE"), "--out", str(out)], capsys)
    assert code == 2 and f"no space left on {out}" in err, err
    assert "Traceback" not in err and "internal error" not in err
    assert not [p for p in disk.rglob("*") if p.is_file()]       # nothing, not even hidden
    assert tree_digest(sim) == before


def test_refit_on_a_full_disk_keeps_the_earlier_set(sim, small_disk, tmp_path, capsys):
    kit = Kit(sim, tmp_path)
    disk = small_disk("256k")
    out = disk / "o"
    code, err = run_cli(["fit", "megre", kit.s("MEGRE"), "--out", str(out)], capsys)
    assert code == 0, err
    earlier = tree_digest(out)
    fill(disk, leave=16 * 1024)
    code, err = run_cli(["fit", "megre", kit.s("MEGRE"), "--out", str(out), "--mask",
                         kit.s("dseg")], capsys)      # a new set that differs from the old
    assert code == 2 and f"no space left on {out}" in err, err
    assert tree_digest(out) == earlier and not _hidden(out)      # the earlier set, whole


def test_qc_on_a_full_disk_writes_no_partial_set(sim, small_disk, tmp_path, capsys):
    kit = Kit(sim, tmp_path)
    maps = tmp_path / "maps"
    assert run_cli(["fit", "megre", kit.s("MEGRE"), "--out", str(maps)], capsys)[0] == 0
    disk = small_disk("64k")      # the tables fit, the figures and report do not
    out = disk / "qc"
    code, err = run_cli(["qc", str(maps), "--labels", kit.s("dseg"), "--reference",
                         str(kit.phantom / "reference.tsv"), "--out", str(out)], capsys)
    assert code == 2 and f"no space left on {out}" in err, err
    assert not [p for p in disk.rglob("*") if p.is_file()]


def _stats(n: int) -> pd.DataFrame:
    return pd.DataFrame({"session": "x", "series": "megre:s", "map": "T2starmap",
                         "label": np.arange(1, n + 1), "name": "v", "n_voxels": 20,
                         "mean": 0.05, "sd": 0.001, "median": 0.05, "iqr": 0.001,
                         "cv_pct": 2.0, "reference": 0.05, "reference_at_temperature": 0.05,
                         "bias_pct": 0.0, "tolerance_pct": 5.0, "status": "pass"})


def _rows(db: Path) -> list[tuple]:
    return history.load_history(db).drop(columns="recorded_at").itertuples(index=False)


@pytest.mark.parametrize("leave, stage", [(0, "backup"), (None, "insert")])
def test_history_on_a_full_disk_keeps_its_rows(small_disk, leave, stage):
    disk = small_disk("1m")
    db = disk / "history.sqlite"
    for s in ("1", "2"):
        history.record_session(db, _stats(50), site="A", scanner="S", session=s)
    rows = list(_rows(db))
    # "backup": no room even for the copy; "insert": room for the copy, not for the rows
    fill(disk, leave=db.stat().st_size + 96 * 1024 if leave is None else leave)
    with pytest.raises(RelaxlineError) as exc:
        history.record_session(db, _stats(20000), site="A", scanner="S", session="3")
    assert f"no space left on {disk}" in str(exc.value), str(exc.value)
    (disk / "filler.bin").unlink()
    history.check_database(db)                              # sound
    assert list(_rows(db)) == rows                          # and every row still there
    if stage == "insert":   # the copy made before the failed step is complete and sound
        assert list(_rows(history.backup_paths(db)[0])) == rows
    assert not [p.name for p in disk.iterdir() if p.name.endswith(".tmp")]
