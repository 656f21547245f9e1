"""`relaxline ingest DICOM_DIR --out RAW_DIR`: DICOM series -> BIDS raw dataset."""
from __future__ import annotations

import argparse

HELP = "Convert a folder of scanner DICOM files into the BIDS raw layout the workflow reads"
DESCRIPTION = """\
Find every DICOM series under DICOM_DIR (any nesting, several series, files in any
order), recognise its role from the DICOM tags and write it into RAW_DIR as BIDS raw
data, one 3D NIfTI and JSON sidecar per value (pixel data and sidecars by dcm2niix):

  IRT1    inversion times vary                      anat/..._inv-<n>_IRT1     (ir)
  VFA     flip angles vary                          anat/..._flip-<n>_VFA     (vfa)
  TB1DAM  two flip angles a and 2a, a >= 30 deg     fmap/..._flip-<n>_TB1DAM  (dam)
  MESE    echo times vary, spin echo (SE)           anat/..._echo-<n>_MESE    (mese)
  MEGRE   echo times vary, gradient echo (GR)       anat/..._echo-<n>_MEGRE   (megre)

Series it cannot recognise (nothing or several things vary, derived images such as
scanner-computed maps, Enhanced MR multi-frame files) are listed, not guessed. For
series whose tags do not tell, give a rule: --rule 'GLOB=KIND' matches the
SeriesDescription (case-insensitive glob; KIND one of the above or 'skip'), or put
the rules in the config's `dicom.rules` and pass --config.

A series converted once is not converted again (RAW_DIR/sourcedata/relaxline-
ingest.tsv lists what was converted). Nothing in DICOM_DIR is changed. Subject label:
--subject, else the PatientID (letters and digits); session label: --session, else
the StudyDate (YYYYMMDD).

With a `dicom.drop_dir` in the config, `relaxline run` does this itself before every
run, so a nightly run converts the new exports and fits them.

Exit status: 0 done (unrecognised series are listed, not an error); 2 no DICOM file,
a bad option, or a series that could not be converted (the others still are).
A QA and research tool, not a medical device."""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("dicom_dir", metavar="DICOM_DIR", help="folder of DICOM files (any nesting)")
    p.add_argument("--out", metavar="RAW_DIR",
                   help="BIDS raw dataset to write into (default with --config: its input_dir)")
    p.add_argument("--config", metavar="F",
                   help="workflow config whose `dicom` section (rules, subject) applies")
    p.add_argument("--subject", metavar="LABEL", help="sub- label (default: from PatientID)")
    p.add_argument("--session", metavar="LABEL", help="ses- label (default: the StudyDate)")
    p.add_argument("--rule", metavar="GLOB=KIND", action="append", default=[],
                   help="SeriesDescription glob -> IRT1, VFA, TB1DAM, MESE, MEGRE or skip "
                        "(repeatable; checked before the config's rules)")
    p.add_argument("--settle-minutes", type=float, default=0.0, metavar="M",
                   help="leave series whose newest file is younger than M minutes for the "
                        "next run (an export still arriving; default 0)")
    p.add_argument("--dry-run", action="store_true",
                   help="list what would be converted, write nothing")


def options_from(args: argparse.Namespace, cfg: dict | None):
    """IngestOptions from the command line, completed by the config's `dicom` section."""
    from pipeline.dicomscan import Rule
    from pipeline.errors import InputError
    from pipeline.ingest import IngestOptions
    rules = []
    for text in args.rule:
        if "=" not in text:
            raise InputError(f"--rule {text!r}: expected GLOB=KIND, e.g. '*t2*map*=MESE'.")
        glob, kind = text.rsplit("=", 1)
        rules += Rule.parse([{"match": glob, "kind": kind}], "--rule")
    d = (cfg or {}).get("dicom", {})
    rules += Rule.parse(d.get("rules"), str(args.config))
    if args.settle_minutes < 0:
        raise InputError(f"--settle-minutes must be 0 or more, got {args.settle_minutes:g}.")
    return IngestOptions(subject=args.subject or d.get("subject"), session=args.session,
                         rules=rules, settle_s=60.0 * args.settle_minutes,
                         dry_run=args.dry_run)


def run(args: argparse.Namespace) -> int:
    from pipeline.errors import EXIT_BAD_INPUT, InputError
    from pipeline.ingest import ingest
    cfg = None
    if args.config:
        from pipeline.wfconfig import load
        cfg = load(args.config, create_input=True)
    out = args.out or (cfg["input_dir"] if cfg else None)
    if not out:
        raise InputError("give --out RAW_DIR (or --config with an input_dir).")
    report = ingest(args.dicom_dir, out, options_from(args, cfg))
    for line in report.lines():
        print(f"relaxline ingest: {line}")
    print(f"relaxline ingest: {len(report.converted)} series converted, "
          f"{len(report.already)} already converted, {len(report.unclassified)} not "
          f"recognised, {len(report.problems)} with errors; BIDS raw data in {out}")
    return EXIT_BAD_INPUT if report.problems else 0
