"""`relaxline demo`: simulate the demo phantom sessions, run the workflow, show the report."""
from __future__ import annotations

import argparse
from pathlib import Path

HELP = "Simulate demo phantom sessions, run the workflow on them and print the report path"
DESCRIPTION = """\
Simulate sessions of the invented relaxline demo phantom into OUTDIR/rawdata, write
the workflow config used into OUTDIR/config.yaml and run the workflow (as
`relaxline run --config OUTDIR/config.yaml`, which repeats it). Results go to
OUTDIR/results; the report is OUTDIR/results/report.html.

If OUTDIR/rawdata already holds sessions they are kept (not simulated again), so a
second `relaxline demo OUTDIR` has nothing to do. Options not listed here go to
Snakemake unchanged. Exit status as for `relaxline run`."""
PASSTHROUGH = True
DEMO_MODELS = {
    "ir": {"pattern": "*_IRT1.nii.gz"},
    "dam": {"pattern": "*_TB1DAM.nii.gz"},
    "vfa": {"pattern": "*_VFA.nii.gz", "b1": "dam"},
    # B1 from the dam map: with B1 fitted from the echoes, vial01 (T2 12 ms = 1.2 echo
    # spacings, T1 0.1 s) leaves 4-6 % of its voxels in a second minimum (T2 1-4 ms, B1
    # ~0.7) with a lower residual, and its mean swung by 6 % between drift-free sessions
    # (DEVELOPERS.md, "Short T2 in mese")
    "mese": {"pattern": "*_MESE.nii.gz", "b1": "dam"},
    "mese-mono": {"pattern": "*_MESE.nii.gz"},
    "megre": {"pattern": "*_MEGRE.nii.gz"},
    # further methods, simulated in the first session only (pipeline.simulate)
    "afi": {"pattern": "*_TB1AFI.nii.gz"},
    "looklocker": {"pattern": "*_LLT1.nii.gz", "ll_correction": "readout", "b1": "afi"},
    "sr": {"pattern": "*_SRT1.nii.gz"},
    "mp2rage": {"pattern": "*_MP2RAGE.nii.gz", "b1": "afi"},
}
# mese-multi on the MESE train of the first session only (a T2 distribution per voxel
# costs more than the other fits); the pattern names that session (demo_models)


def demo_models() -> dict:
    """The demo's models: :data:`DEMO_MODELS` plus mese-multi on the first session's MESE."""
    from pipeline.simulate import METHODS_SESSION, session_label
    first = session_label(METHODS_SESSION)
    return {**DEMO_MODELS, "mese-multi": {"pattern": f"*_ses-{first}_echo-*_MESE.nii.gz"}}


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("outdir", metavar="OUTDIR", nargs="?", default="demo_out",
                   help="folder for the demo (default ./demo_out)")
    p.add_argument("--profile", metavar="DIR", help="Snakemake profile folder")
    p.add_argument("--cores", metavar="N", type=int, help="cores (default: all available)")
    p.add_argument("--sessions", type=int, default=4,
                   help="sessions to simulate (default 4; the first 3 form the drift baseline)")
    p.add_argument("--seed", type=int, default=0, help="simulation seed (default 0)")


def demo_config(sessions: int) -> dict:
    """The config the demo runs (paths relative to OUTDIR, where it is written)."""
    return {
        "input_dir": "rawdata",
        "output_dir": "results",
        "models": demo_models(),
        "phantom": {"reference": "rawdata/phantom/reference.tsv", "labels": "*_dseg.nii.gz"},
        # the first sessions form the baseline; the mono-exponential mese-mono T2 of the
        # long-T2 vials sits about 6 % above the reference (stimulated echoes), so the
        # demo's ref-pct limit is 10 % rather than the sample config's 5 %
        "drift": {"baseline_sessions": max(2, min(3, sessions - 1)), "reference_pct": 10},
        "report": {"title": "relaxline demo: invented phantom, simulated sessions"},
    }


def run(args: argparse.Namespace) -> int:
    import yaml

    from pipeline.commands.run import check_options, run_workflow
    from pipeline.errors import InputError
    from pipeline.outputs import atomic_write_text, ensure_dir
    from pipeline.simulate import SimOptions, simulate

    if args.sessions < 1:
        raise InputError(f"--sessions must be at least 1, got {args.sessions}.")
    # every option is checked before anything is simulated or written
    opts = SimOptions(sessions=args.sessions, seed=args.seed)
    opts.validate()
    check_options(args.cores, args.profile)
    out = ensure_dir(args.outdir)
    raw = out / "rawdata"
    if any(raw.glob("sub-*/ses-*/anat")):
        print(f"relaxline demo: keeping the sessions already in {raw}")
    else:
        files = simulate(raw, opts)
        print(f"relaxline demo: simulated {args.sessions} session(s) ({len(files)} files) "
              f"in {raw}")
    config = out / "config.yaml"
    text = ("# Written by `relaxline demo`; `relaxline run --config " + str(config) +
            "` repeats the run.\n# Documented keys: sample_config/config.yaml\n"
            + yaml.safe_dump(demo_config(args.sessions), sort_keys=False))
    if not config.is_file() or config.read_text(encoding="utf-8") != text:
        atomic_write_text(config, text)
    rc = run_workflow(config, args.cores, args.profile, args.extra)
    report = out / "results" / "report.html"
    if report.is_file():
        print(f"relaxline demo: report: {report.resolve()}")
    return rc
