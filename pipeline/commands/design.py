"""`relaxline design`: choose an acquisition from the Cramér–Rao bound (design §5).

The problem and its bound are :mod:`fitting.design` (constraints, budget and SNR
definitions are documented there), the search :mod:`fitting.design_search`; this module
parses options, prints the proposed protocol beside the compared one, writes the optional
figure atomically and runs the optional Monte-Carlo check with the project's fitting
engine.
"""
from __future__ import annotations

import argparse
import io
import json
import sys

from pipeline.errors import InputError
from pipeline.series import MS_THRESHOLD_S

HELP = "Protocol design: TIs, flip angles or echo spacing from the Cramér–Rao bound"
DESCRIPTION = """\
Propose the acquisition that minimises the worst-case coefficient of variation (CV) of
T1 (ir, sr, vfa) or T2 (mese) over a range, predicted by the Cramér–Rao bound with every
model parameter estimated (M0, inversion or saturation efficiency, B1 included).

  ir    inversion times in [0.01 s, TR − 0.01 s]; --tr is the time between inversions.
        Budget: N·TR·LINES ≤ --budget.
  sr    saturation delays in [0.01 s, TR − 0.01 s]; --tr is the time between saturation
        pulses. Budget as for ir.
  vfa   flip angles in [1, 90] degrees of a spoiled gradient echo with repetition time
        --tr, B1 = --b1 known. Budget: each angle is one volume of LINES TRs,
        N·TR·LINES ≤ --budget (LINES = 1: the budget counts TRs).
  mese  one CPMG train, echo k at k·ESP, ESP ≥ --min-esp; the train N·ESP must fit in
        --budget (the budget is the train duration) and in --tr when given. True B1 =
        --b1 (default 0.9; at exactly 1 the train is stationary in B1 and the bound is
        undefined), T1 = --t1. Without --points, N and ESP are optimised together.
        2D multi-slice: give --slice-profile (the profile raises the bound 2-3 times).

SNR is M0/σ: the signal of a fully relaxed, 90°-excited voxel over the noise sd of one
image. The proposal is never predicted worse than the starting protocol or than a
feasible --compare protocol (a shorter ir/sr/vfa one is padded by repeating its points).
Predictions assume Gaussian noise and an efficient estimator; at CVs above about 10 %
real fits scatter more than the bound (check with --verify).
This is a QA and research tool, not a medical device; local procedures and the
responsible physicist take precedence.

Example:
  relaxline design ir --range 0.1:2.5 --points 8 --tr 3 --snr 50 \\
      --compare 0.05,0.1,0.2,0.4,0.8,1.6,2.4 --plot cv.png
"""

PLOT_POINTS = 60          # relaxation times on the figure's curves
VERIFY_POINTS = 5         # relaxation times of the Monte-Carlo check


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", metavar="MODEL", help="ir, sr, vfa or mese")
    p.add_argument("--range", required=True, metavar="LO:HI", dest="range_",
                   help="range of T1 (ir, sr, vfa) or T2 (mese) in seconds, e.g. 0.1:2.5")
    p.add_argument("--points", type=int, metavar="N",
                   help="number of TIs / flip angles / echoes (default: from --budget, "
                        "else 8 TIs, 4 angles, 32 echoes)")
    p.add_argument("--tr", type=float, metavar="S",
                   help="repetition time in seconds (required for ir and vfa)")
    p.add_argument("--snr", type=float, default=50.0, metavar="X",
                   help="M0/σ of one image (default 50)")
    p.add_argument("--budget", type=float, metavar="S",
                   help="scan-time budget in seconds (see above for each model)")
    p.add_argument("--lines", type=int, default=1, metavar="L",
                   help="TRs per image for the ir/sr/vfa budget (phase encodes × partitions; "
                        "default 1)")
    p.add_argument("--compare", metavar="LIST",
                   help="current protocol, comma-separated: TIs (s), angles (degrees) or "
                        "echo times (s)")
    p.add_argument("--b1", type=float, metavar="R",
                   help="true flip-angle ratio (vfa: known, default 1; mese: default 0.9)")
    p.add_argument("--t1", type=float, metavar="S",
                   help="mese: assumed T1 in seconds (default max(1, HI))")
    p.add_argument("--min-esp", type=float, default=0.005, metavar="S",
                   help="mese: shortest echo spacing in seconds (default 0.005)")
    p.add_argument("--slice-profile", metavar="SPEC",
                   help="mese, 2D multi-slice: the slice profile, as for `relaxline fit mese` "
                        "(sinc:TBW[:RATIO] or a TSV file)")
    p.add_argument("--verify", action="store_true",
                   help="check the predictions by Monte Carlo with the fast fitting engine")
    p.add_argument("--trials", type=int, default=1000, metavar="N",
                   help="Monte-Carlo trials per relaxation time (default 1000)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--plot", metavar="F.png", help="write the CV figure to this PNG file")
    p.add_argument("--json", action="store_true", help="print one JSON object")


def _parse_range(text: str) -> tuple[float, float]:
    try:
        lo_s, hi_s = text.split(":")
        lo, hi = float(lo_s), float(hi_s)
    except ValueError:
        raise InputError(f"--range {text!r}: expected LO:HI in seconds, e.g. 0.1:2.5.") from None
    if not (lo > 0 and hi > lo and hi < float("inf")):
        raise InputError(f"--range {text!r}: need 0 < LO < HI (seconds).")
    if hi > MS_THRESHOLD_S:
        raise InputError(f"--range {text!r}: HI = {hi:g} s looks like milliseconds; give the "
                         f"range in seconds (e.g. 0.1:2.5).")
    return lo, hi


def _protocol_dict(model: str, ev, unit: str) -> dict:
    d = {"values": _nums(ev.values, 6), "unit": unit, "n_points": int(ev.values.size),
         "predicted_cv_pct": _nums(ev.cv_pct), "worst_cv_pct": _num(ev.worst)}
    if model == "mese":
        d["esp_s"] = round(float(ev.values[0]), 6)
        d["train_s"] = round(float(ev.values[-1]), 6)
    return d


def _figure(result, compared_values, sim) -> bytes:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    from fitting.design import predicted_cv

    prob = result.problem
    g = np.geomspace(prob.lo, prob.hi, PLOT_POINTS)
    what = "T2" if prob.model == "mese" else "T1"
    fig, ax = plt.subplots(figsize=(6.4, 4.2), dpi=110)
    ax.plot(g, predicted_cv(prob, result.proposed.values, g), "-", color="C0",
            label=f"proposed ({result.proposed.values.size} points)")
    if compared_values is not None:
        ax.plot(g, predicted_cv(prob, compared_values, g), "--", color="C1",
                label=f"compared ({len(compared_values)} points)")
    if sim is not None:
        ax.plot(sim.grid, sim.simulated_cv_pct, "o", color="C0", mfc="none",
                label=f"proposed, Monte Carlo ({sim.trials} trials)")
    ax.set_xscale("log")
    ax.set_xlabel(f"{what} (s)")
    ax.set_ylabel(f"CV of {what} (%)")
    ax.set_title(f"{prob.model}: Cramér–Rao CV at SNR {prob.snr:g}")
    ax.grid(True, which="both", alpha=0.3)
    ax.set_ylim(bottom=0)
    ax.legend()
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    plt.close(fig)
    return buf.getvalue()


def run(args: argparse.Namespace) -> int:
    import numpy as np

    from fitting.design import (DESIGN_MODELS, UNITS, VERIFY_TRIALS_MIN, make_problem,
                                parse_values, simulate_cv)
    from fitting.design_search import design
    from pipeline.outputs import atomic_write_bytes

    model = args.model
    if model not in DESIGN_MODELS:
        raise InputError(f"unknown model {model!r} for design; choose one of "
                         f"{', '.join(DESIGN_MODELS)}.")
    lo, hi = _parse_range(args.range_)
    if args.trials < VERIFY_TRIALS_MIN:
        raise InputError(f"--trials {args.trials}: use at least {VERIFY_TRIALS_MIN}.")
    compare = parse_values(model, args.compare) if args.compare is not None else None
    if compare is not None and model == "vfa" and np.any(compare >= 180):
        raise InputError(f"--compare {args.compare!r}: flip angles must lie in (0, 180) "
                         f"degrees.")
    if compare is not None and model in ("ir", "sr") and args.tr is not None and np.any(
            compare >= args.tr):
        raise InputError(f"--compare {args.compare!r}: every {'TI' if model == 'ir' else 'delay'}"
                         f" must be shorter than --tr {args.tr:g} s.")
    if args.plot and not args.plot.lower().endswith(".png"):
        raise InputError(f"--plot {args.plot}: the figure is a PNG; give a name ending .png.")
    profile = None
    if args.slice_profile is not None:
        from pipeline.profiles import check_spec, is_file_spec, read_profile
        check_spec(args.slice_profile)
        profile = read_profile(args.slice_profile) if is_file_spec(args.slice_profile) \
            else args.slice_profile
    problem = make_problem(model, lo, hi, points=args.points, tr=args.tr, snr=args.snr,
                           budget=args.budget, lines=args.lines, b1=args.b1, t1=args.t1,
                           min_esp=args.min_esp, seed=args.seed, slice_profile=profile)
    result = design(problem, compare)
    unit = UNITS[model]
    sim = None
    if args.verify:
        vgrid = np.geomspace(lo, hi, VERIFY_POINTS)
        sim = simulate_cv(problem, result.proposed.values, vgrid, trials=args.trials,
                          seed=args.seed)
    if args.plot:
        atomic_write_bytes(args.plot, _figure(result, compare, sim))

    out = {
        "model": model,
        "proposed": _protocol_dict(model, result.proposed, unit),
        "predicted_cv_pct": _nums(result.proposed.cv_pct),
        "range": [lo, hi],
        "grid": _nums(problem.grid, 6),
        "grid_unit": "s",
        "parameter": problem.spec.primary_param,
        "snr": problem.snr,
        "constraints": {"tr_s": problem.tr, "budget_s": problem.budget, "lines": problem.lines,
                        "points": problem.points, "b1": problem.b1,
                        **({"t1_s": problem.t1, "min_esp_s": problem.min_esp,
                            "max_train_s": problem.max_train,
                            "slice_profile": problem.slice_profile.source
                            if problem.slice_profile is not None else None}
                           if model == "mese" else {})},
        "start": _protocol_dict(model, result.start, unit),
        "compared": ({} if result.compared is None else
                     {**_protocol_dict(model, result.compared, unit),
                      "feasible": result.compared.feasible, "note": result.compared.note}),
    }
    if model in ("ir", "sr", "vfa"):
        out["proposed"]["scan_time_s"] = round(result.proposed.values.size * problem.tr
                                               * problem.lines, 6)
    if sim is not None:
        out["verify"] = {"grid": _nums(sim.grid, 6),
                         "predicted_cv_pct": _nums(sim.predicted_cv_pct),
                         "simulated_cv_pct": _nums(sim.simulated_cv_pct),
                         "bias_pct": _nums(sim.bias_pct),
                         "failed_fits": [int(f) for f in sim.failed], "trials": sim.trials,
                         "engine": "fast"}
    if args.plot:
        out["plot"] = args.plot
    if args.json:
        print(json.dumps(out, allow_nan=False))
    else:
        _print_text(out, sim)
    return 0


def _num(v: float, digits: int = 4) -> float | None:
    """JSON number; an infinite bound (unidentifiable protocol) becomes null."""
    v = float(v)
    return round(v, digits) if v == v and abs(v) != float("inf") else None


def _nums(vs, digits: int = 4) -> list:
    return [_num(v, digits) for v in vs]


def _fmt(v: float | None) -> str:
    return "inf" if v is None else f"{v:.2f}"


def _print_text(out: dict, sim) -> None:
    w = sys.stdout.write
    unit = out["proposed"]["unit"]
    what = out["parameter"]
    prof = out["constraints"].get("slice_profile")
    w(f"relaxline design {out['model']}: {what} range {out['range'][0]:g}–{out['range'][1]:g} s, "
      f"SNR {out['snr']:g} (M0/σ)" + (f", slice profile {prof}" if prof else "") + "\n")
    w(f"proposed ({out['proposed']['n_points']} points, {unit}): "
      f"{', '.join(f'{v:g}' for v in out['proposed']['values'])}\n")
    if "esp_s" in out["proposed"]:
        w(f"  echo spacing {out['proposed']['esp_s']:g} s, train {out['proposed']['train_s']:g} s\n")
    if "scan_time_s" in out["proposed"]:
        w(f"  scan time {out['proposed']['scan_time_s']:g} s\n")
    comp = out["compared"]
    if comp:
        w(f"compared ({comp['n_points']} points, {unit}): "
          f"{', '.join(f'{v:g}' for v in comp['values'])}\n")
        if comp["note"]:
            w(f"  note: {comp['note']}\n")
    w(f"\n{what + ' (s)':>10}  {'proposed CV %':>13}  {'compared CV %':>13}\n")
    for i, t in enumerate(out["grid"]):
        c = _fmt(comp["predicted_cv_pct"][i]) if comp else "-"
        w(f"{t:>10.4g}  {_fmt(out['predicted_cv_pct'][i]):>13}  {c:>13}\n")
    w(f"{'worst':>10}  {_fmt(out['proposed']['worst_cv_pct']):>13}  "
      f"{_fmt(comp['worst_cv_pct']) if comp else '-':>13}\n")
    if sim is not None:
        v = out["verify"]
        w(f"\nMonte Carlo ({v['trials']} trials per value, fast engine, Gaussian noise):\n")
        w(f"{what + ' (s)':>10}  {'predicted CV %':>14}  {'simulated CV %':>14}  {'bias %':>7}  "
          f"{'failed':>6}\n")
        for i, t in enumerate(v["grid"]):
            w(f"{t:>10.4g}  {_fmt(v['predicted_cv_pct'][i]):>14}  "
              f"{_fmt(v['simulated_cv_pct'][i]):>14}  {_fmt(v['bias_pct'][i]):>7}  "
              f"{v['failed_fits'][i]:>6}\n")
    if "plot" in out:
        w(f"\nfigure: {out['plot']}\n")
