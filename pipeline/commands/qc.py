"""`relaxline qc`: vial statistics against reference values, tolerances and an HTML report."""
from __future__ import annotations

import argparse

HELP = "Vial statistics against reference values, tolerances, figures and an HTML report"
DESCRIPTION = """\
Statistics of each map (T1map, T2map, T2starmap, TB1map found in MAPS_DIR by their BIDS
suffixes) inside each labelled vial, compared with the reference table corrected to the
phantom temperature, classified against tolerances (pass / warn / fail).

Writes OUT/roi_stats.tsv, OUT/figures/*.png and OUT/report.html (self-contained).
Voxels whose fit is not usable (fit-status mask) are excluded and counted.

Temperature: --temperature, else PhantomTemperature in the map or source-series
sidecars, else `temperature` in --config; without one, temperature-dependent reference
values are used uncorrected and the report says so.

Vials come from --labels, or (without --labels) are placed automatically from the phantom
--layout on the M0 map (or the source series' mean) plus the relaxation maps; when a
symmetric layout fits several placements equally, the one whose vial T1/T2 values agree in
rank with the --reference is taken (--no-mirror: no flipped placements). A placement that
does not match the layout convincingly, or a tie nothing decides, is a QC failure (exit 1,
overlay written).

Without --reference (scan sessions) only statistics are written and status is n/a,
unless --config gives `ranges`: an acceptable [low, high] of a region's mean per label and
map (map units, seconds for times); such regions pass inside and fail outside the range
(warn near an edge with `range_warn_margin_pct`). See sample_config/tolerances.yaml.
Exit status: 0 all pass/warn/n-a, 1 any vial or region fails or the vial placement is
poor, 2 bad input (e.g. label map on another grid, no phantom in the images, a bad range).

For quality assurance and research; not a medical device. Local codes, QA procedures
and the responsible licensed physicist take precedence."""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("maps_dir", metavar="MAPS_DIR",
                   help="folder of maps written by `relaxline fit`, or a session folder of the "
                        "workflow's results (maps in its anat/ and fmap/)")
    p.add_argument("--model", metavar="NAME",
                   help="only the maps of this model (a results session folder holds every "
                        "model's maps)")
    p.add_argument("--labels", metavar="F",
                   help="label map (NIfTI, same grid as the maps; 0 = background)")
    # --layout/--margin-mm: automatic vial localisation (pipeline/vialjob.py, issue 9)
    p.add_argument("--layout", metavar="F.tsv",
                   help="phantom layout (TSV: label, x_mm, y_mm, radius_mm[, z_mm]) to place "
                        "the vials automatically when no --labels map is given; writes "
                        "OUT/<session>_desc-vials_dseg.nii.gz and OUT/vials_overlay.png")
    p.add_argument("--margin-mm", metavar="MM", type=float, default=2.0,
                   help="with --layout: each vial region is the vial disc shrunk by this "
                        "margin (partial volume at the walls); default 2")
    p.add_argument("--no-mirror", dest="mirror", action="store_false",
                   help="with --layout: do not try mirror-flipped placements (for a phantom "
                        "that cannot be placed upside down; config key "
                        "phantom.mirror_search)")
    p.add_argument("--reference", metavar="F.tsv",
                   help="reference table (TSV: label, name, T1, T2, T1_sd, T2_sd, temperature, "
                        "field, T1_coef, T2_coef); omit for scan sessions")
    p.add_argument("--out", metavar="DIR", required=True, help="output folder")
    p.add_argument("--temperature", metavar="C", type=float,
                   help="phantom temperature in °C (overrides the sidecars)")
    p.add_argument("--session", metavar="S", help="session label (default: the ses- entity)")
    p.add_argument("--config", metavar="F.yaml",
                   help="QC config: tolerances per map/vial, fallback temperature, ranges "
                        "for regions without reference (default: illustrative built-in "
                        "tolerances, no ranges; see "
                        "sample_config/tolerances.yaml)")
    p.add_argument("--erode", metavar="MM", type=float, default=0.0,
                   help="shrink each vial by this margin in mm before statistics (partial "
                        "volume at the walls); default 0")
    p.add_argument("--no-figures", action="store_true",
                   help="skip figures (the report then holds the table only)")


def run(args: argparse.Namespace) -> int:
    import math

    from pipeline.errors import InputError
    from pipeline.qcjob import _temperature, labels_from_file, run_qc

    if args.temperature is not None:   # checked before any file is read
        _temperature(args.temperature, "--temperature")
    if not math.isfinite(args.erode) or args.erode < 0:
        raise InputError(f"--erode must be a non-negative margin in mm, got {args.erode}.")
    options = dict(reference_path=args.reference, config=args.config,
                   temperature=args.temperature, session=args.session, erode_mm=args.erode,
                   figures=not args.no_figures, model=args.model)
    if args.labels is not None:
        if args.layout is not None:
            print("relaxline qc: note: --labels given, so --layout is not used.")
        result = run_qc(args.maps_dir, args.out, labels_from_file(args.labels),
                        labels_desc=str(args.labels), inputs=[args.labels], **options)
    elif args.layout is not None:   # vials placed automatically (issue 9)
        import sys

        from pipeline.errors import EXIT_QC_FAIL
        from pipeline.vialjob import run_qc_with_layout
        from qc.localise import PoorMatchError
        try:
            result = run_qc_with_layout(args.maps_dir, args.out, args.layout, args.margin_mm,
                                        mirror=args.mirror, **options)
        except PoorMatchError as exc:
            print(f"relaxline qc: QC failure: {exc}", file=sys.stderr)
            return EXIT_QC_FAIL
    else:
        raise InputError("give the vial regions: --labels F (a label map on the maps' grid) "
                         "or --layout F.tsv (the phantom layout, vials placed automatically).")
    t = result.table
    counts = t["status"].value_counts().to_dict()
    summary = ", ".join(f"{counts.get(k, 0)} {k}" for k in ("pass", "warn", "fail", "n/a")
                        if counts.get(k))
    print(f"relaxline qc: {len(t)} vial/map rows ({summary}); wrote {args.out}/roi_stats.tsv "
          f"and report.html")
    from qc.report import vial_finding
    for r in t[t["status"] == "fail"].itertuples():
        f = vial_finding(r)
        print(f"relaxline qc: FAIL {f['map']} {f['vial']}: {f['detail']}")
    for w in result.warnings:
        print(f"relaxline qc: warning: {w}")
    return result.exit_code
