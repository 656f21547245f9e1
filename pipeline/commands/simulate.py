"""`relaxline simulate`: write demo sessions of the invented relaxline demo phantom."""
from __future__ import annotations

import argparse

HELP = "Write demo sessions of the invented relaxline demo phantom as NIfTI series"
DESCRIPTION = """\
Simulate sessions of the relaxline demo phantom (an INVENTED phantom: 12 gel vials,
T1 0.1-2.5 s, T2 0.01-0.6 s, in a water-filled cylinder) as a BIDS raw dataset that
the official BIDS validator accepts: OUTDIR/sub-relaxlinedemo/ses-<date>/anat/ with one
3D image and sidecar per inversion time, flip angle or echo (_inv-<n>_IRT1,
_flip-<n>_VFA, _echo-<n>_MESE, _echo-<n>_MEGRE), fmap/ with _flip-1/2_TB1DAM (double
angle B1), a vial label map (anat/_dseg); dataset_description.json, README.md,
.bidsignore, sub-relaxlinedemo_sessions.tsv (phantom temperature per session), and
OUTDIR/phantom/ with reference.tsv, layout.tsv and the per-session truth
(truth_ses-<date>.tsv/.json, true B1 map).

Sessions differ by phantom temperature, a small phantom motion and an optional drift.
Noise is complex Gaussian (magnitude stored: Rician); sigma = largest noise-free
magnitude of the series / SNR. The same options give byte-identical files.
Files of the same names in OUTDIR are replaced; nothing else there is touched."""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("outdir", metavar="OUTDIR", help="folder to write the sessions into")
    p.add_argument("--sessions", type=int, default=3, help="number of sessions (default 3)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--snr", type=float, default=100.0,
                   help="peak signal / noise sigma per series (default 100; inf = no noise)")
    p.add_argument("--drift", type=float, default=0.0, metavar="PCT",
                   help="vial T1/T2 drift in %% per session after the first (default 0)")
    p.add_argument("--step", metavar="VIAL:PCT:FROM",
                   help="a step change of one vial's T1 and T2 by PCT %% from session FROM "
                        "(1-based) on, e.g. 7:5:12 (to try the drift rules)")
    p.add_argument("--slices", type=int, default=3, help="slices of 5 mm (default 3)")
    p.add_argument("--matrix", type=int, default=80,
                   help="in-plane matrix over a 200 mm field of view (default 80: 2.5 mm)")


def run(args: argparse.Namespace) -> int:
    import time

    from pipeline.progress import Progress
    from pipeline.simulate import SimOptions, session_kinds, simulate

    from pipeline.errors import InputError
    step = (0, 0.0, 1)
    if args.step:
        try:
            v, pct, first = args.step.split(":")
            step = (int(v), float(pct), int(first))
        except ValueError:
            raise InputError(f"--step must be VIAL:PCT:FROM, e.g. 7:5:12 (vial 7, +5 %, from "
                             f"session 12), got {args.step!r}.") from None
    opts = SimOptions(sessions=args.sessions, seed=args.seed, snr=args.snr,
                      drift_pct=args.drift, slices=args.slices, matrix=args.matrix,
                      step_vial=step[0], step_pct=step[1], step_from=step[2])
    opts.validate()
    t0 = time.monotonic()
    files = simulate(args.outdir, opts,
                     progress=Progress(sum(len(session_kinds(i)) for i in range(opts.sessions)),
                                       "simulate"))
    print(f"relaxline simulate: wrote {opts.sessions} session(s), {len(files)} files to "
          f"{args.outdir} in {time.monotonic() - t0:.1f} s")
    return 0
