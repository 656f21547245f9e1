"""History database of ROI statistics across sessions (design §6).

One SQLite file holds every session's ROI statistics keyed by
``(site, scanner, session, model, series, map, label)``: each fitted model is its own
history series (``mese`` and ``mese-mono`` fit the same images but are judged apart). Recording a session is one
transaction that first deletes the session's rows and then inserts the new
ones, so a rerun *replaces* a session instead of duplicating it, and a crash
mid-way leaves the previous state intact (SQLite's atomic commit).

The database runs in write-ahead-log mode so the trend job can read while a
session job writes; writers wait (``busy_timeout``) rather than fail when two
session jobs finish at once. WAL needs a local file system: on a cluster keep the
database on a node-local or properly locking shared disk (not plain NFS).

Schema versions: 1 had no ``model`` column (the key lacked it); opening such a file
migrates it in one transaction (:func:`migrate`), taking each row's model from the
``model:`` prefix of its series key and keeping every row. The caller may also pass a
``rename_series`` function that turns the first release's series keys into today's (the
workflow's map names changed with them); this module does not know how keys are made.

The database is checked (``PRAGMA quick_check``) every time it is opened, and a damaged,
truncated or foreign file is refused with an error that names it and the way back
(:func:`check_database`); it is never silently replaced by an empty history. Before each
session is recorded (and before a migration), a copy of the checked database is kept
(``<name>.backup-1``, the newest, to ``<name>.backup-3``), so a damaged file never costs
the history.
"""
from __future__ import annotations

import os
import sqlite3
from collections import Counter
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable
from urllib.parse import quote

import numpy as np
import pandas as pd

from fitting.errors import RelaxlineError, excerpt, is_no_space, no_space_error

KEY = ("site", "scanner", "session", "model", "series", "map", "label")
# roi_stats.tsv columns kept in the history (design §6), after the key.
STATS = ("name", "n_voxels", "mean", "sd", "median", "iqr", "cv_pct", "units", "reference",
         "reference_at_temperature", "bias_pct", "tolerance_pct", "status")
EXTRA = ("subject", "temperature", "temperature_source", "recorded_at")
COLUMNS = KEY + STATS + EXTRA
_TEXT = {"site", "scanner", "session", "model", "series", "map", "name", "units", "status",
         "subject", "temperature_source", "recorded_at"}
_INT = {"label", "n_voxels"}
SCHEMA_VERSION = 2
SeriesRename = Callable[[str], str]   # old series key -> new one (migrate)
BUSY_TIMEOUT_MS = 120_000
BACKUPS = 3                      # copies kept: <name>.backup-1 (newest) .. -3
SQLITE_MAGIC = b"SQLite format 3\x00"


def _sql_type(col: str) -> str:
    return "TEXT" if col in _TEXT else "INTEGER" if col in _INT else "REAL"


def _table_sql(name: str) -> str:
    cols = ", ".join(f"{c} {_sql_type(c)}{' NOT NULL' if c in KEY else ''}" for c in COLUMNS)
    return f"CREATE TABLE IF NOT EXISTS {name} ({cols}, PRIMARY KEY ({', '.join(KEY)}))"


_CREATE = f"""
{_table_sql("roi_history")};
CREATE TABLE IF NOT EXISTS sessions (
    site TEXT NOT NULL, scanner TEXT NOT NULL, session TEXT NOT NULL,
    subject TEXT, source TEXT, n_rows INTEGER, recorded_at TEXT,
    PRIMARY KEY (site, scanner, session)
);
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT);
"""


def backup_paths(db: str | Path) -> list[Path]:
    """The backup copies of ``db``, newest first (they may not exist)."""
    db = Path(db)
    return [db.with_name(f"{db.name}.backup-{i}") for i in range(1, BACKUPS + 1)]


def _problem(path: Path) -> str | None:
    """Why ``path`` is not a usable history database (None: it is, or it does not exist)."""
    if path.is_dir():
        return "it is a folder; `history.database` must name a file"
    if not path.exists():
        return None
    try:
        with open(path, "rb") as fh:
            head = fh.read(len(SQLITE_MAGIC))
    except OSError as exc:
        return f"it cannot be read ({exc.strerror})"
    if not head:
        return "it is empty (0 bytes): a history database is never empty, so it was cut short"
    if head != SQLITE_MAGIC:
        return f"it is not an SQLite database (it starts with {excerpt(head[:16])})"
    conn = None
    try:
        conn = sqlite3.connect(f"file:{quote(str(path.resolve()))}?mode=rw", uri=True,
                               timeout=BUSY_TIMEOUT_MS / 1000)
        rows = [r[0] for r in conn.execute("PRAGMA quick_check").fetchall()]
        if rows != ["ok"]:
            found = "; ".join(r.replace("\n", "; ") for r in rows)
            return f"SQLite's integrity check fails ({excerpt(found, 200)})"
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    except sqlite3.Error as exc:
        if getattr(exc, "sqlite_errorname", "") in ("SQLITE_CORRUPT", "SQLITE_NOTADB"):
            return f"SQLite cannot read it ({exc})"
        raise _cannot_open(path, exc) from None   # the file may be fine: say what failed
    finally:
        if conn is not None:
            conn.close()
    if tables and "roi_history" not in tables:
        return (f"it is an SQLite database but not a relaxline history (its tables are "
                f"{excerpt(sorted(tables))})")
    return None


def _cannot_open(path: Path, exc: BaseException) -> RelaxlineError:
    """The error for a database that cannot be opened for reasons other than its content:
    a full disk (WAL needs room for its side files), permissions, a failing disk."""
    if _disk_full(exc) or _free_bytes(path.parent) < 64 * 1024:
        return no_space_error(path.parent)
    return RelaxlineError(f"{path}: cannot open the history database ({exc}); check that "
                          f"{path.parent} is writable and its disk healthy (SQLite writes "
                          f"{path.name}-wal and {path.name}-shm beside it).")


def _free_bytes(folder: Path) -> int:
    try:
        st = os.statvfs(folder)
    except OSError:
        return 1 << 62
    return st.f_bavail * st.f_frsize


def _last_good_backup(path: Path) -> Path | None:
    for b in backup_paths(path):
        try:
            if b.is_file() and _problem(b) is None:
                return b
        except RelaxlineError:
            continue
    return None


def check_database(path: str | Path) -> None:
    """Raise :class:`RelaxlineError` unless ``path`` is a sound history database (or absent).

    The message names the file, what is wrong with it, and how to recover: the newest
    backup that passes the check, if there is one.
    """
    path = Path(path)
    why = _problem(path)
    if why is None:
        return
    good = _last_good_backup(path)
    if good is not None:
        when = datetime.fromtimestamp(good.stat().st_mtime, timezone.utc)
        way = (f"The last good copy is {good} (made {when:%Y-%m-%d %H:%M} UTC, before a "
               f"session was recorded). To recover: move {path.name} aside, copy that backup "
               f"to {path}, and rerun the workflow with `relaxline run --config <config> "
               "--forcerun record` so that the sessions recorded since are recorded again.")
    else:
        way = ("There is no backup beside it. If it holds the history of earlier runs, "
               "restore it from your own backups; if the path is wrong, point "
               "`history.database` in the config at the right file; to start a new history, "
               "move this file aside.")
    raise RelaxlineError(f"{path}: cannot be used as the history database: {why}. It was "
                         f"left unchanged. {way}")


def _create(path: Path) -> None:
    """Create an empty history database at ``path`` all at once (never a 0-byte file)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.new-{os.getpid()}.tmp")
    try:
        conn = sqlite3.connect(str(tmp), isolation_level=None)
        try:
            conn.execute("PRAGMA journal_mode=WAL")
            conn.executescript(_CREATE)
            conn.execute("INSERT OR IGNORE INTO meta VALUES ('schema_version', ?)",
                         (str(SCHEMA_VERSION),))
        finally:
            conn.close()
        try:
            os.link(tmp, path)        # atomic, and never replaces one made meanwhile
        except FileExistsError:
            pass
    finally:
        for p in (tmp, Path(f"{tmp}-wal"), Path(f"{tmp}-shm")):
            try:
                p.unlink()
            except FileNotFoundError:
                pass


def _disk_full(exc: BaseException) -> bool:
    return isinstance(exc, sqlite3.OperationalError) and "full" in str(exc) or is_no_space(exc)


def connect(path: str | Path, rename_series: SeriesRename | None = None
            ) -> sqlite3.Connection:
    """Open (creating if needed) the history database in WAL mode, after checking it;
    an older schema is migrated (:func:`migrate`, with ``rename_series``)."""
    path = Path(path)
    check_database(path)
    try:
        if not path.exists():
            _create(path)
        conn = sqlite3.connect(str(path), timeout=BUSY_TIMEOUT_MS / 1000,
                               isolation_level=None)  # explicit BEGIN/COMMIT below
        conn.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_MS}")
        mode = conn.execute("PRAGMA journal_mode=WAL").fetchone()[0]
        conn.execute("PRAGMA synchronous=NORMAL")  # durable enough with WAL, much faster
        fresh = not conn.execute("SELECT 1 FROM sqlite_master WHERE name='roi_history'"
                                 ).fetchone()
        conn.executescript(_CREATE)
        if fresh:
            conn.execute("INSERT OR IGNORE INTO meta VALUES ('schema_version', ?)",
                         (str(SCHEMA_VERSION),))
        else:
            migrate(conn, backup_of=path, rename_series=rename_series)
    except (sqlite3.DatabaseError, OSError) as exc:
        raise _cannot_open(path, exc) from None
    if str(mode).lower() != "wal":
        conn.close()
        raise RelaxlineError(f"{path}: the file system does not support SQLite's WAL mode "
                             f"(got journal mode '{mode}'); put the history database on a "
                             "local disk (config key `history.database`).")
    return conn


def model_of_series(series: str) -> str:
    """The model of a history series key ``model:stem`` ('' for a bare stem)."""
    return series.split(":", 1)[0] if ":" in series else ""


def migrate(conn: sqlite3.Connection, backup_of: Path | None = None,
            rename_series: SeriesRename | None = None) -> int:
    """Bring an older history database to :data:`SCHEMA_VERSION`, keeping every row.

    Version 1 lacked the ``model`` column (and ``units``, ``temperature_source``). The
    table is rebuilt with the new key in one transaction: rows are copied with the model
    taken from the series key's ``model:`` prefix; the row count is checked before the
    commit, so a failure leaves the old table untouched; ``backup_of``: the database file,
    copied first (:func:`_backup`); ``rename_series``: old series key -> new one, applied in
    the same transaction (:func:`_rename_series`). Returns the rows migrated (0 when
    already current).
    """
    cols = [r[1] for r in conn.execute("PRAGMA table_info(roi_history)")]
    if "model" in cols:
        return 0
    conn.execute("BEGIN IMMEDIATE")
    try:
        cols = [r[1] for r in conn.execute("PRAGMA table_info(roi_history)")]
        if "model" in cols:   # another process migrated it meanwhile
            conn.execute("ROLLBACK")
            return 0
        if backup_of is not None:
            _backup(backup_of)
        n = conn.execute("SELECT COUNT(*) FROM roi_history").fetchone()[0]
        conn.execute("DROP TABLE IF EXISTS roi_history_new")
        conn.execute(_table_sql("roi_history_new"))
        keep = [c for c in COLUMNS if c in cols]
        conn.execute(
            f"INSERT INTO roi_history_new (model, {', '.join(keep)}) SELECT "
            "CASE WHEN instr(series, ':') > 0 THEN substr(series, 1, instr(series, ':') - 1) "
            f"ELSE '' END, {', '.join(keep)} FROM roi_history")
        if rename_series is not None:
            _rename_series(conn, "roi_history_new", rename_series)
        if conn.execute("SELECT COUNT(*) FROM roi_history_new").fetchone()[0] != n:
            raise RelaxlineError("history migration lost rows; the database was left as it "
                                 "was.")
        conn.execute("DROP TABLE roi_history")
        conn.execute("ALTER TABLE roi_history_new RENAME TO roi_history")
        conn.execute("INSERT OR REPLACE INTO meta VALUES ('schema_version', ?)",
                     (str(SCHEMA_VERSION),))
        conn.execute("COMMIT")
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    return n


def _rename_series(conn: sqlite3.Connection, table: str, rename: SeriesRename) -> int:
    """Rename series keys in ``table``; a key whose new name would meet another key's (old
    or new) keeps its name, so no two series merge. Returns the keys renamed."""
    old = [r[0] for r in conn.execute(f"SELECT DISTINCT series FROM {table}")]
    new = {o: rename(str(o)) for o in old}
    taken = Counter(new.values())
    changes = [(n, o) for o, n in new.items() if n != o and taken[n] == 1 and n not in new]
    conn.executemany(f"UPDATE {table} SET series=? WHERE series=?", changes)
    return len(changes)


def _backup(db: Path) -> None:
    """Copy the (checked) database to ``<name>.backup-1``, shifting older copies along.

    Called while the recording connection holds the write lock (and has changed nothing),
    so backups of concurrent writers never interleave; the copy is read through a second
    connection (WAL lets it read beside the writer) and is complete before it takes a
    backup name.
    """
    tmp = db.with_name(f".{db.name}.backup.tmp")
    try:
        src = sqlite3.connect(str(db), timeout=BUSY_TIMEOUT_MS / 1000)
        dst = sqlite3.connect(str(tmp))
        try:
            src.backup(dst)
        finally:
            dst.close()
            src.close()
        names = backup_paths(db)
        for older, newer in zip(reversed(names[1:]), reversed(names[:-1])):
            if newer.exists():
                os.replace(newer, older)
        os.replace(tmp, names[0])
    except BaseException:
        try:
            tmp.unlink()
        except FileNotFoundError:
            pass
        raise


def _rows(df: pd.DataFrame, site: str, scanner: str, session: str, subject: str | None,
          temperature: float | None, when: str) -> list[tuple]:
    missing = [c for c in ("series", "map", "label") if c not in df.columns]
    if missing:
        raise RelaxlineError(f"ROI statistics lack column(s) {', '.join(missing)}; expected "
                             "the roi_stats.tsv columns of design §6.")
    out = df.copy()
    out["site"], out["scanner"], out["session"] = site, scanner, session
    out["subject"], out["recorded_at"] = subject, when
    if "model" not in out.columns:
        out["model"] = [model_of_series(str(v)) for v in out["series"]]
    if "temperature" not in out.columns:
        out["temperature"] = temperature
    for c in COLUMNS:
        if c not in out.columns:
            out[c] = None
    dup = out.duplicated(list(KEY))
    if dup.any():
        first = out.loc[dup, list(KEY)].iloc[0].to_dict()
        raise RelaxlineError(f"ROI statistics of session {session} repeat the key {first}; "
                             "each (model, series, map, label) may appear once per session.")

    def conv(c: str, v):
        if v is None or (isinstance(v, float) and np.isnan(v)) or v is pd.NA:
            return None
        if c in _TEXT:
            return str(v)
        return int(v) if c in _INT else float(v)

    return [tuple(conv(c, r[c]) for c in COLUMNS) for r in out[list(COLUMNS)].to_dict("records")]


def record_session(db: str | Path, stats: pd.DataFrame, *, site: str, scanner: str,
                   session: str, subject: str | None = None, temperature: float | None = None,
                   source: str = "", rename_series: SeriesRename | None = None) -> int:
    """Replace one session's rows by ``stats`` in a single transaction.

    Parameters
    ----------
    db : path of the SQLite file (created if missing).
    stats : ROI statistics with at least ``series, map, label`` and the design §6 columns;
        ``model`` (else taken from a ``model:`` prefix of ``series``).
    site, scanner, session : the session's identity (part of the key).
    subject, temperature, source : stored alongside for the report.
    rename_series : for the migration of an older database (:func:`connect`).

    Returns
    -------
    Number of rows now held for the session.
    """
    when = datetime.now(timezone.utc).isoformat(timespec="seconds")
    rows = _rows(stats, site, scanner, session, subject, temperature, when)
    conn = connect(db, rename_series)
    try:
        conn.execute("BEGIN IMMEDIATE")  # take the write lock now, not halfway through
        try:
            _backup(Path(db))     # the last good copy, before anything changes
            conn.execute("DELETE FROM roi_history WHERE site=? AND scanner=? AND session=?",
                         (site, scanner, session))
            conn.executemany(f"INSERT INTO roi_history ({', '.join(COLUMNS)}) VALUES "
                             f"({', '.join('?' * len(COLUMNS))})", rows)
            conn.execute("INSERT OR REPLACE INTO sessions VALUES (?, ?, ?, ?, ?, ?, ?)",
                         (site, scanner, session, subject, source, len(rows), when))
            conn.execute("COMMIT")
        except BaseException as exc:
            if conn.in_transaction:   # SQLite may already have rolled back (disk full)
                conn.execute("ROLLBACK")
            if _disk_full(exc):
                raise no_space_error(Path(db).parent) from None
            raise
    finally:
        conn.close()
    return len(rows)


def load_history(db: str | Path, site: str | None = None, scanner: str | None = None,
                 rename_series: SeriesRename | None = None) -> pd.DataFrame:
    """All rows (optionally of one site/scanner), ordered by key; empty frame if no file.
    ``rename_series``: for the migration of an older database (:func:`connect`)."""
    if not Path(db).is_file():
        return pd.DataFrame(columns=list(COLUMNS))
    conn = connect(db, rename_series)
    try:
        where, args = [], []
        for col, val in (("site", site), ("scanner", scanner)):
            if val is not None:
                where.append(f"{col}=?")
                args.append(val)
        sql = "SELECT * FROM roi_history" + (f" WHERE {' AND '.join(where)}" if where else "")
        df = pd.read_sql_query(sql + f" ORDER BY {', '.join(KEY)}", conn, params=args)
    finally:
        conn.close()
    return df


def recorded_sessions(db: str | Path) -> pd.DataFrame:
    """The ``sessions`` table: one row per recorded (site, scanner, session)."""
    if not Path(db).is_file():
        return pd.DataFrame(columns=["site", "scanner", "session", "subject", "source",
                                     "n_rows", "recorded_at"])
    conn = connect(db)
    try:
        return pd.read_sql_query("SELECT * FROM sessions ORDER BY site, scanner, session", conn)
    finally:
        conn.close()

