"""`relaxline run`: the Snakemake workflow over every session of a config."""
from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path
from typing import Sequence

HELP = "Run the workflow (fit, QC, history, drift rules, report) over all sessions"
DESCRIPTION = """\
Run the relaxline Snakemake workflow installed with the package (works from any
directory) on the sessions found under the config's input_dir:
every configured model is fitted on every series (large volumes split into z-slab
jobs), each session is QC'd against the reference, its rows replace any earlier
ones in the history database, and the drift rules and trend figures are updated in
OUTPUT_DIR/report.html.

Snakemake's working directory is the config's output_dir: its .snakemake/ folder,
logs/ and all outputs live there. output_dir is a BIDS derivative dataset: maps in
sub-*/ses-*/anat/ (B1 maps in fmap/) named sub-<s>_ses-<d>_rec-<model>_<map>, QC
tables and reports beside them (listed in its .bidsignore). Relative paths in the config are relative to the
config file. Re-running after a new session arrives runs only that session's jobs
and the trend update; an interrupted run resumes where it stopped.

Options not listed here go to Snakemake unchanged (e.g. -n for a dry run,
--keep-going, --forcerun qc). For a SLURM cluster: --profile
sample_config/profiles/slurm (needs the snakemake-executor-plugin-slurm package).

With a `dicom` section naming a drop_dir, the new DICOM series there are first
converted into input_dir (as `relaxline ingest` does; a series converted once is not
converted again), so a nightly run goes from the scanner's export to the report.

At the end it prints one line per session and model (pass/warn/fail counts, failing
vials by name, drift rejections), the verdict with what fired, and the report path.

Exit status: 0 all well (verdict PASS or WARN); 1 a QC failure or a drift-rule
rejection in the newest session of a site/scanner (verdict FAIL or DRIFT REJECTION; see
status.json and the report's headline); 2 bad config or input (checked before any job
runs) or a failed job."""
PASSTHROUGH = True

def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", metavar="F", default="config.yaml",
                   help="workflow config (YAML; default ./config.yaml; documented example: "
                        "sample_config/config.yaml)")
    p.add_argument("--cores", metavar="N", type=int,
                   help="cores for local jobs (default: all available)")
    p.add_argument("--profile", metavar="DIR",
                   help="Snakemake profile folder, e.g. sample_config/profiles/slurm")


def available_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def snakemake_command(config: str | Path, cfg: dict, cores: int | None, profile: str | None,
                      extra: Sequence[str]) -> list[str]:
    """The Snakemake command line ``run`` executes (``--nolock``: see :func:`run_workflow`)."""
    from pipeline.workflow import SNAKEFILE
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(SNAKEFILE),
           "--configfile", str(Path(config).resolve()),
           "--config", f"config_dir={cfg['config_dir']}",
           "--directory", cfg["output_dir"], "--rerun-incomplete", "--nolock",
           # run-directive jobs in threads (each starts its step as its own process)
           # instead of one fresh Snakemake interpreter per job
           "--force-use-threads"]
    if profile:
        cmd += ["--profile", str(Path(profile).resolve())]
    if cores is not None or not profile:
        cmd += ["--cores", str(cores or available_cores())]
    return cmd + list(extra)


def check_options(cores: int | None, profile: str | None) -> None:
    """Reject a bad --cores / --profile (shared with ``relaxline demo``)."""
    from pipeline.errors import InputError
    if cores is not None and cores < 1:
        raise InputError(f"--cores must be at least 1, got {cores}.")
    if profile and not Path(profile, "config.yaml").is_file():
        raise InputError(f"--profile {profile}: no config.yaml in that folder; a Snakemake "
                         "profile is a folder holding config.yaml (see "
                         "sample_config/profiles/slurm).")


def run_workflow(config: str | Path, cores: int | None = None, profile: str | None = None,
                 extra: Sequence[str] = (), stream=None) -> int:
    """Validate, run Snakemake, and return the exit status of design §5.

    ``stream``: where messages go (default: ``sys.stderr`` at call time, not at import)."""
    stream = stream or sys.stderr
    import signal
    import subprocess

    from pipeline import workflow
    from pipeline.errors import EXIT_BAD_INPUT, InputError

    check_options(cores, profile)
    cfg = workflow.load(config)              # schema, names the key; paths exist
    from pipeline.ingest import ingest_for_run
    dicom_failed = ingest_for_run(cfg, stream)   # new DICOM exports -> input_dir
    plan = workflow.plan(cfg)                # discovery errors before any job
    if not plan.sessions:
        d = cfg["discovery"]
        kinds = ",".join(workflow.datatypes(cfg))
        raise InputError(f"{config}: key `input_dir`: no session under {cfg['input_dir']} "
                         f"({d['subject_glob']}/{d['session_glob']}/{{{kinds}}}/) has a "
                         f"series matching any `models.*.pattern`.")
    from pipeline import runlock
    from pipeline.bidsderiv import configured_suffixes, write_dataset_files
    from pipeline.outputs import ensure_dir, package_version
    out = ensure_dir(cfg["output_dir"])
    for warning in plan.skipped:
        print(f"relaxline run: warning: {warning}", file=stream)
    # One run per output folder (pipeline.runlock): the lock is handed to Snakemake, so it
    # stays held while Snakemake works even if this process is killed.
    lock = runlock.acquire(out)
    try:   # the results folder is a BIDS derivative dataset (design §6)
        write_dataset_files(out, cfg["input_dir"], package_version(),
                            configured_suffixes(cfg["models"]))
    except BaseException:
        lock.close()
        raise
    cmd = snakemake_command(config, cfg, cores, profile, extra)
    print(f"relaxline run: {len(plan.sessions)} session(s), "
          f"{sum(len(s.series) for s in plan.sessions)} series; output in {out}",
          file=stream)
    proc = subprocess.Popen(cmd, pass_fds=(lock.fileno(),),
                            env={**os.environ, runlock.FD_ENV: str(lock.fileno())})
    previous = signal.signal(signal.SIGTERM, lambda *_: proc.terminate())
    try:
        rc = proc.wait()
    except KeyboardInterrupt:  # Snakemake got the same SIGINT; let it clean up
        rc = proc.wait()
        raise
    finally:
        signal.signal(signal.SIGTERM, previous)
        lock.close()
    if rc != 0:
        for rule, log, tail in failed_job_logs(out):
            print(f"relaxline run: job {rule} failed; last lines of {log}:", file=stream)
            for line in tail:
                print(f"    {line}", file=stream)
        print(f"relaxline run: error: Snakemake stopped with status {rc}; the messages "
              f"above name the failing job and its log (under {out}/logs/). Fix the cause "
              "and run again: finished jobs are not repeated.", file=stream)
        return EXIT_BAD_INPUT
    if runlock.READ_ONLY_OPTIONS & set(extra):
        return 0
    status, lines = workflow.run_status(out)
    for line in lines:   # one per session and model, then the verdict (what cron mails)
        print(f"relaxline run: {line}", file=stream)
    report = out / workflow.REPORT
    if report.is_file():
        print(f"relaxline run: report: {report}", file=stream)
    if dicom_failed:
        print("relaxline run: error: some DICOM series could not be converted (see the "
              "messages above); the others were fitted.", file=stream)
        return max(status, EXIT_BAD_INPUT)
    return status


def failed_job_logs(out: Path, lines: int = 12) -> list[tuple[str, Path, list[str]]]:
    """(rule, log file, last lines) of each job that failed in the newest Snakemake run.

    Read from Snakemake's own log of the run (``.snakemake/log/``): every ``Error in rule``
    block names the job's log file. Shown to the user so a failure on a cluster node is
    readable from the submitting terminal without hunting for files.
    """
    import re
    logs = sorted((out / ".snakemake" / "log").glob("*.snakemake.log"),
                  key=lambda p: p.stat().st_mtime)
    if not logs:
        return []
    found: list[tuple[str, Path, list[str]]] = []
    rule = None
    for line in logs[-1].read_text(errors="replace").splitlines():
        m = re.match(r"\s*Error in rule (\S+?):", line)
        if m:
            rule = m.group(1)
            continue
        m = re.match(r"\s*log: (.+?) \(check log file", line)
        if m and rule:
            for name in m.group(1).split(", "):
                path = Path(name) if Path(name).is_absolute() else out / name
                if path.is_file() and all(path != f[1] for f in found):
                    tail = path.read_text(errors="replace").splitlines()[-lines:]
                    found.append((rule, path, tail))
            rule = None
    return found


def run(args: argparse.Namespace) -> int:
    return run_workflow(args.config, args.cores, args.profile, args.extra)
