"""One run at a time per output folder, however the workflow is started.

Whatever works in an output folder holds its lock, an exclusive ``flock`` on
``.snakemake/relaxline-run.lock``:

* ``relaxline run`` takes it before starting Snakemake and hands the open lock to the
  Snakemake process (an inherited file descriptor, named in ``RELAXLINE_RUN_LOCK_FD``),
  so killing only ``relaxline run`` leaves the lock held for as long as Snakemake works;
* Snakemake run directly on the packaged ``Snakefile`` (or the top-level one, which
  includes it) takes the same lock while the Snakefile is read, before it touches a file;
* every step process (``python -m pipeline.workflow STEP``) holds a shared lock on
  ``.snakemake/relaxline-jobs.lock``, so jobs left running by a killed Snakemake also
  keep a new run out until they end.

The kernel drops a ``flock`` when the last process holding it ends, even on SIGKILL, so
a killed run never leaves a stale lock behind (Snakemake's own file lock is switched off
with ``--nolock`` for that reason). Snakemake options that only read (a dry run, lint,
summaries) take no lock.
"""
from __future__ import annotations

import fcntl
import os
import sys
from pathlib import Path
from typing import IO, Sequence

from pipeline.errors import InputError

RUN_LOCK = Path(".snakemake") / "relaxline-run.lock"
JOBS_LOCK = Path(".snakemake") / "relaxline-jobs.lock"
FD_ENV = "RELAXLINE_RUN_LOCK_FD"
# Snakemake options after which nothing is written (and status.json is not this run's)
READ_ONLY_OPTIONS = frozenset({
    "-n", "--dry-run", "--dryrun", "--lint", "--unlock", "--list-rules", "-l", "--summary",
    "-S", "--detailed-summary", "-D", "--dag", "--rulegraph", "--filegraph", "--list-changes",
    "--lc", "--list-code-changes", "--list-input-changes", "--li", "--list-params-changes",
    "--lp", "--list-target-rules", "--lt", "--print-compilation", "--help", "-h",
    "--version", "-v"})


def _busy(out: Path) -> InputError:
    return InputError(f"{out}: another run is working in this output folder (`relaxline run`, "
                      "or Snakemake on the relaxline workflow); wait for it to finish. Its "
                      f"lock ({out / RUN_LOCK}) ends with it, even if it is killed.")


def _open(path: Path) -> IO:
    path.parent.mkdir(parents=True, exist_ok=True)
    return open(path, "a")


def acquire(out: str | Path) -> IO:
    """Take the run lock of output folder ``out``; keep the returned file open while working.

    Raises :class:`InputError` when another run holds it, or when step processes of an
    earlier (killed) run are still working there.
    """
    out = Path(out)
    lock = _open(out / RUN_LOCK)
    try:
        fcntl.flock(lock, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        lock.close()
        raise _busy(out) from None
    try:
        _check_no_jobs(out)
    except BaseException:
        lock.close()
        raise
    return lock


def _check_no_jobs(out: Path) -> None:
    """Raise if step processes hold the jobs lock (Snakemake gone, its jobs still working)."""
    jobs = _open(out / JOBS_LOCK)
    try:
        fcntl.flock(jobs, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        raise InputError(f"{out}: jobs of an earlier run are still working in this output "
                         "folder (their Snakemake was stopped, they were not); wait for them "
                         f"to finish (they hold {out / JOBS_LOCK}).") from None
    except OSError:   # a file system without locks: nothing to learn
        pass
    finally:
        jobs.close()


def inherited(out: str | Path) -> int | None:
    """The run lock's descriptor handed down by ``relaxline run``, if it is ``out``'s."""
    fd = os.environ.get(FD_ENV, "")
    if not fd.isdigit():
        return None
    try:
        held, wanted = os.fstat(int(fd)), os.stat(Path(out) / RUN_LOCK)
    except OSError:
        return None
    if (held.st_dev, held.st_ino) != (wanted.st_dev, wanted.st_ino):
        return None
    try:   # the same open file: succeeds at once when it really holds the lock
        fcntl.flock(int(fd), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return None
    return int(fd)


_HELD: list = []   # locks this process keeps until it ends


def hold_for_snakefile(main_process: bool, argv: Sequence[str] | None = None) -> None:
    """Called by the Snakefile: hold the run lock of Snakemake's working folder.

    Nothing to do in job processes (they run inside a holding Snakemake) or for options
    that only read; the lock is kept until the process ends.
    """
    argv = sys.argv[1:] if argv is None else argv
    if not main_process or READ_ONLY_OPTIONS & set(argv):
        return
    out = Path.cwd()
    fd = inherited(out)
    _HELD.append(fd if fd is not None else acquire(out))


def hold_for_job() -> None:
    """Called by each step process: a shared hold on the jobs lock of its working folder
    (Snakemake's working directory, which holds ``.snakemake/``). Best effort."""
    if not Path(".snakemake").is_dir():
        return
    try:
        jobs = _open(JOBS_LOCK)
        fcntl.flock(jobs, fcntl.LOCK_SH)   # waits only while a new run checks the lock
    except OSError:
        return
    _HELD.append(jobs)
