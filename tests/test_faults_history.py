"""Fault suite, part 2: a damaged history database never costs the history (issue 16).

The database is checked before it is read or written; a damaged, truncated, emptied or
foreign file is refused (exit 2 from the workflow steps and from `relaxline run`, before
any fit) with a message naming it and the newest good backup, and it is left unchanged.
A backup is kept before every record step, and following the message's recovery path
restores the history.
"""
from __future__ import annotations

import hashlib
import json
import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from faultkit import run_cli, simulate_session, tree_digest
from fitting.errors import RelaxlineError
from pipeline import workflow as W
from qc import history


def _stats(n: int = 3, shift: float = 0.0) -> pd.DataFrame:
    return pd.DataFrame({"session": "x", "series": "megre:IRT1", "map": "T1map",
                         "label": np.arange(1, n + 1), "name": [f"v{i}" for i in range(n)],
                         "n_voxels": 20, "mean": 1.0 + shift + 0.1 * np.arange(n),
                         "sd": 0.01, "median": 1.0, "iqr": 0.01, "cv_pct": 1.0,
                         "reference": 1.0, "reference_at_temperature": 1.0, "bias_pct": 0.0,
                         "tolerance_pct": 5.0, "status": "pass"})


def _record(db: Path, session: str, n: int = 3) -> None:
    history.record_session(db, _stats(n), site="A", scanner="S", session=session)


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def zero(p: Path) -> None:
    p.write_bytes(b"")


def garbage_header(p: Path) -> None:
    b = bytearray(p.read_bytes())
    b[:16] = b"garbage garbage!"
    p.write_bytes(bytes(b))


def truncated(p: Path) -> None:
    p.write_bytes(p.read_bytes()[: p.stat().st_size // 2])


def scribbled(p: Path) -> None:
    b = bytearray(p.read_bytes())
    for i in range(4096 + 100, len(b), 7):   # page 1 (header, schema) intact
        b[i] = 0xAB
    p.write_bytes(bytes(b))


DAMAGE = {"emptied": (zero, "it is empty (0 bytes)"),
          "garbage header": (garbage_header, "it is not an SQLite database"),
          "truncated": (truncated, "cannot be used as the history database"),
          "scribbled pages": (scribbled, "cannot be used as the history database")}


@pytest.fixture
def db(tmp_path) -> Path:
    p = tmp_path / "history.sqlite"
    for i in range(1, 6):
        _record(p, f"2026010{i}", n=40)
    return p


def test_backups_kept_before_each_record_and_rotated(db):
    names = history.backup_paths(db)
    assert [b.name for b in names] == [f"history.sqlite.backup-{i}" for i in (1, 2, 3)]
    assert all(b.is_file() for b in names)
    # newest backup: the history as it was before the last (5th) session was recorded
    sessions = [sorted(history.load_history(b)["session"].unique()) for b in names]
    assert sessions == [[f"2026010{i}" for i in range(1, k)] for k in (5, 4, 3)]
    assert sorted(history.load_history(db)["session"].unique())[-1] == "20260105"


@pytest.mark.parametrize("how", list(DAMAGE))
def test_damaged_database_refused_then_recovered(db, how):
    damage, fragment = DAMAGE[how]
    damage(db)
    before = _sha(db)
    for attempt in (lambda: _record(db, "20260106"), lambda: history.load_history(db)):
        with pytest.raises(RelaxlineError) as exc:
            attempt()
        msg = str(exc.value)
        assert str(db) in msg and fragment in msg, msg
        assert "history.sqlite.backup-1" in msg and "--forcerun record" in msg, msg
        assert len(msg) < 1500
    assert _sha(db) == before          # the damaged file is evidence: left as it was
    # the recovery path the message gives: the backup back in place, record again
    shutil.copy(history.backup_paths(db)[0], db)
    _record(db, "20260105", n=40)
    _record(db, "20260106", n=40)
    h = history.load_history(db)
    assert sorted(h["session"].unique()) == [f"2026010{i}" for i in range(1, 7)]
    assert len(h) == 6 * 40 and not h.duplicated(list(history.KEY)).any()


def test_damaged_database_without_backup_says_so(tmp_path):
    p = tmp_path / "h.sqlite"
    p.write_bytes(b"")
    with pytest.raises(RelaxlineError) as exc:
        history.load_history(p)
    assert "no backup beside it" in str(exc.value)


def test_database_never_created_as_an_empty_file(tmp_path):
    p = tmp_path / "new" / "h.sqlite"
    conn = history.connect(p)
    conn.close()
    assert p.stat().st_size > 0 and history.check_database(p) is None
    assert sorted(q.name for q in p.parent.iterdir()) == ["h.sqlite"]


def _summary(tmp_path: Path) -> Path:
    stats = tmp_path / "roi_stats.tsv"
    _stats().to_csv(stats, sep="\t", index=False)
    summary = {"sub": "sub-a", "ses": "ses-20260107", "session": "20260107", "site": "A",
               "scanner": "S", "labels": None, "note": "", "fail": False,
               "models": {"megre": {"roi_stats": str(stats), "counts": {"pass": 3},
                                    "warnings": [], "exit_status": 0}}}
    p = tmp_path / "session.json"
    p.write_text(json.dumps(summary))
    return p


@pytest.mark.parametrize("step", ["record", "report"])
def test_workflow_steps_refuse_a_damaged_database(db, tmp_path, step, capsys):
    truncated(db)
    before = _sha(db)
    summary = _summary(tmp_path)
    if step == "record":
        settings = {"database": str(db)}
        outs = [str(tmp_path / "history.json")]
    else:
        settings = W.report_settings(W.validate_config(
            {"input_dir": "i", "output_dir": "o", "models": {"megre": {"pattern": "*"}},
             "history": {"database": str(db)}}))
        outs = [str(tmp_path / n) for n in ("report.html", "status.json", "drift.tsv")]
    rc = W.main([step, "--settings", json.dumps(settings), "--inputs", str(summary),
                 "--out", *outs])
    err = capsys.readouterr().err
    assert rc == 2 and str(db) in err and "backup-1" in err, err
    assert "Traceback" not in err
    assert _sha(db) == before and not any(Path(o).exists() for o in outs)


def test_run_refuses_a_damaged_database_before_any_fit(db, tmp_path_factory, tmp_path,
                                                        capsys):
    sim = simulate_session(tmp_path_factory.mktemp("sim"))
    scribbled(db)
    before = _sha(db)
    cfg = {"input_dir": str(sim), "output_dir": str(tmp_path / "res"),
           "models": {"megre": {"pattern": "*_MEGRE.nii.gz"}},
           "history": {"database": str(db)}}
    config = tmp_path / "config.yaml"
    config.write_text(yaml.safe_dump(cfg))
    given = tree_digest(tmp_path)
    code, err = run_cli(["run", "--config", str(config)], capsys)
    assert code == 2 and "key `history.database`" in err and "backup-1" in err, err
    assert _sha(db) == before and tree_digest(tmp_path) == given
    assert not (tmp_path / "res").exists()        # before any fit: nothing was written


def test_foreign_sqlite_database_left_alone(tmp_path):
    p = tmp_path / "other.sqlite"
    con = sqlite3.connect(p)
    con.execute("CREATE TABLE t (x)")
    con.commit()
    con.close()
    before = _sha(p)
    with pytest.raises(RelaxlineError, match="not a relaxline history"):
        _record(p, "1")
    assert _sha(p) == before and not history.backup_paths(p)[0].exists()
