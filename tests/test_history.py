"""History database: key, replace-on-rerun, WAL mode, atomic per-session transactions."""
from __future__ import annotations

import sqlite3
import threading

import numpy as np
import pandas as pd
import pytest

from fitting.errors import RelaxlineError
from qc import history


def _stats(n_labels: int = 3, shift: float = 0.0, series: str = "IRT1") -> pd.DataFrame:
    return pd.DataFrame({
        "session": "ses-x", "series": series, "map": "T1map",
        "label": np.arange(1, n_labels + 1), "name": [f"v{i}" for i in range(n_labels)],
        "n_voxels": 20, "mean": 1.0 + shift + 0.1 * np.arange(n_labels), "sd": 0.01,
        "median": 1.0, "iqr": 0.01, "cv_pct": 1.0, "reference": 1.0,
        "reference_at_temperature": 1.01, "bias_pct": 0.0, "tolerance_pct": 5.0,
        "status": "pass"})


def test_record_and_load(tmp_path):
    db = tmp_path / "h.sqlite"
    n = history.record_session(db, _stats(), site="A", scanner="S1", session="20260101",
                               subject="demo", temperature=21.5, source="x/roi_stats.tsv")
    assert n == 3
    h = history.load_history(db)
    assert len(h) == 3
    assert set(history.COLUMNS) == set(h.columns)
    assert h["site"].unique().tolist() == ["A"] and h["session"].unique().tolist() == ["20260101"]
    assert h["temperature"].tolist() == [21.5] * 3
    assert h["mean"].tolist() == pytest.approx([1.0, 1.1, 1.2])
    ses = history.recorded_sessions(db)
    assert ses[["site", "scanner", "session", "n_rows"]].values.tolist() == \
        [["A", "S1", "20260101", 3]]


def test_rerun_replaces_rows_no_duplicates(tmp_path):
    db = tmp_path / "h.sqlite"
    history.record_session(db, _stats(3), site="A", scanner="S1", session="1")
    history.record_session(db, _stats(3), site="A", scanner="S1", session="2")
    # rerun of session 1 with one vial fewer and new values: old rows of session 1 go
    history.record_session(db, _stats(2, shift=0.5), site="A", scanner="S1", session="1")
    h = history.load_history(db)
    assert len(h) == 5
    assert not h.duplicated(list(history.KEY)).any()
    s1 = h[h["session"] == "1"]
    assert s1["mean"].tolist() == pytest.approx([1.5, 1.6])
    # same session label at another scanner is a different key
    history.record_session(db, _stats(3), site="A", scanner="S2", session="1")
    assert len(history.load_history(db)) == 8
    assert len(history.load_history(db, scanner="S2")) == 3


def test_primary_key_enforced_by_sqlite(tmp_path):
    db = tmp_path / "h.sqlite"
    history.record_session(db, _stats(), site="A", scanner="S1", session="1")
    conn = sqlite3.connect(db)
    with pytest.raises(sqlite3.IntegrityError):
        conn.execute("INSERT INTO roi_history (site, scanner, session, series, map, label) "
                     "VALUES ('A', 'S1', '1', 'IRT1', 'T1map', 1)")
    conn.close()


def test_wal_mode(tmp_path):
    db = tmp_path / "h.sqlite"
    history.record_session(db, _stats(), site="A", scanner="S1", session="1")
    conn = sqlite3.connect(db)
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    conn.close()


def test_duplicate_key_in_input_is_error_and_leaves_db_unchanged(tmp_path):
    db = tmp_path / "h.sqlite"
    history.record_session(db, _stats(), site="A", scanner="S1", session="1")
    bad = pd.concat([_stats(), _stats()])
    with pytest.raises(RelaxlineError, match="repeat the key"):
        history.record_session(db, bad, site="A", scanner="S1", session="1")
    assert len(history.load_history(db)) == 3


def test_failed_transaction_rolls_back(tmp_path):
    # a row SQLite rejects (NULL label violates NOT NULL) aborts the whole session's
    # transaction: the old rows (deleted first inside it) are still there
    db = tmp_path / "h.sqlite"
    history.record_session(db, _stats(), site="A", scanner="S1", session="1")
    bad = _stats(shift=1.0).astype({"label": object})
    bad.loc[2, "label"] = None
    with pytest.raises(sqlite3.IntegrityError):
        history.record_session(db, bad, site="A", scanner="S1", session="1")
    h = history.load_history(db)
    assert h["mean"].tolist() == pytest.approx([1.0, 1.1, 1.2])


def test_concurrent_writers(tmp_path):
    db = tmp_path / "h.sqlite"
    history.connect(db).close()
    errors = []

    def write(i):
        try:
            history.record_session(db, _stats(5), site="A", scanner="S1", session=str(i))
        except Exception as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=write, args=(i,)) for i in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    assert len(history.load_history(db)) == 40


def test_not_a_database(tmp_path):
    db = tmp_path / "h.sqlite"
    db.write_bytes(b"this is not sqlite" * 100)
    with pytest.raises(RelaxlineError, match="history.database"):
        history.record_session(db, _stats(), site="A", scanner="S1", session="1")


def test_missing_file_loads_empty(tmp_path):
    assert history.load_history(tmp_path / "none.sqlite").empty


def test_model_is_part_of_the_key(tmp_path):
    # mese and mese-mono fit the same series: one row each, told apart by the model
    db = tmp_path / "h.sqlite"
    both = pd.concat([_stats(2).assign(model="mese", map="T2map"),
                      _stats(2).assign(model="mese-mono", map="T2map")])
    assert history.record_session(db, both, site="A", scanner="S1", session="1") == 4
    h = history.load_history(db)
    assert sorted(h["model"].unique()) == ["mese", "mese-mono"]


def _v1_database(db, series_keys):
    """A schema-1 database (no model column) with sessions 1 and 2, labels 1 and 2."""
    v1 = ["site", "scanner", "session", "series", "map", "label", "name", "n_voxels", "mean",
          "sd", "median", "iqr", "cv_pct", "reference", "reference_at_temperature",
          "bias_pct", "tolerance_pct", "status", "subject", "temperature", "recorded_at"]
    conn = sqlite3.connect(db)
    conn.executescript(
        f"CREATE TABLE roi_history ({', '.join(v1)}, PRIMARY KEY (site, scanner, session, "
        "series, map, label)); CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT); "
        "INSERT INTO meta VALUES ('schema_version', '1');")
    rows = [("A", "S", s, series, "T2map", lab) + (None,) * 2 + (0.1 * lab,) + (None,) * 12
            for s in ("1", "2") for series in series_keys for lab in (1, 2)]
    conn.executemany(f"INSERT INTO roi_history ({', '.join(v1)}) VALUES "
                     f"({', '.join('?' * len(v1))})", rows)
    conn.commit()
    conn.close()
    return rows


def test_migration_renames_series_keys_without_merging(tmp_path):
    # the caller's rename applies once, with the migration; a key whose new name another
    # key already holds (or would take) keeps its old name, so no two series merge
    db = tmp_path / "old.sqlite"
    _v1_database(db, ("ir:a_X", "ir:b_X", "ir:b", "mese:c_X", "mese:d_X"))
    rename = {"ir:a_X": "ir:a", "ir:b_X": "ir:b", "mese:c_X": "mese:e", "mese:d_X": "mese:e"}
    h = history.load_history(db, rename_series=lambda k: rename.get(k, k))
    assert len(h) == 20
    assert sorted(h["series"].unique()) == ["ir:a", "ir:b", "ir:b_X", "mese:c_X", "mese:d_X"]
    # applied once: a later open with another rename changes nothing
    h2 = history.load_history(db, rename_series=lambda k: k + "_again")
    assert sorted(h2["series"].unique()) == sorted(h["series"].unique())


def test_version_1_database_is_migrated_without_losing_rows(tmp_path):
    """A database written before the model column existed (schema 1) opens as schema 2:
    every row kept, the model taken from the series key's `model:` prefix."""
    db = tmp_path / "old.sqlite"
    rows = _v1_database(db, ("mese:sub-p_MESE", "mese-mono:sub-p_MESE", "IRT1"))
    h = history.load_history(db)
    assert len(h) == len(rows) == 12
    assert h.groupby("model").size().to_dict() == {"": 4, "mese": 4, "mese-mono": 4}
    conn = sqlite3.connect(db)
    assert conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()[0] \
        == str(history.SCHEMA_VERSION)
    conn.close()
    # new sessions go in next to the migrated ones
    history.record_session(db, _stats(2).assign(model="ir"), site="A", scanner="S",
                           session="3")
    assert len(history.load_history(db)) == 14
