"""`relaxline refit MODEL INPUT... REGION`: careful lmfit fit of one region (design §5).

The fitting itself is :mod:`fitting.region`; this module parses the region, reads its
voxels, prints the report and writes the optional plot.

``--json`` prints one object to stdout instead of the text report. Keys (stable):
``model``, ``series`` {stem, inputs, key, values}, ``region`` {kind, label_map, label,
box, voxel, n_voxels_in_region}, ``n_voxels`` (averaged), ``n_excluded``, ``noise``
{source, sigma_voxel, sigma_mean}, ``x``, ``mean_signal``, ``best_fit``, ``parameters``
{name: {value, stderr, unit, vary, ci: {"1sigma": [lo, hi], "2sigma": [lo, hi]}}},
``correlation`` {name: {name: r}}, ``chisqr``, ``redchi``, ``aic``, ``bic``, ``ndata``,
``nvarys``, ``nfree``, ``chi2_p``, ``voxelwise`` {engine, n_voxels, n_usable,
n_at_bound, n_failed, n_bad_data, parameters: {name: {median, iqr, q1, q3}}},
``comparison`` [{model, alternative, delta_aic, delta_bic, verdict, thresholds, fit}],
``comparison_skipped`` [text], ``warnings`` [text]. NaN is written as null.
"""
from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

from pipeline.commands.fit import add_series_arguments, series_options
from pipeline.errors import InputError

HELP = "Careful lmfit refit of one region with full fit statistics and model comparison"
DESCRIPTION = """Fit one region carefully: the region's mean signal with lmfit, with every
parameter's standard error, the correlation matrix, chi-square and reduced chi-square,
AIC and BIC, and profile-likelihood confidence intervals (lmfit.conf_interval) at 1 and
2 sigma; every voxel of the region is also fitted (median and IQR reported), and
competing models are fitted to the same data (ir and sr with the inversion or
saturation efficiency fixed at 1; mese against mese-mono) with delta-AIC/BIC and a
verdict. Not for mese-multi (solved by NNLS, not a curve fit).

Region (exactly one):
  --label-map F --label N   the voxels where the label map equals N
  --box x0:x1,y0:y1,z0:z1   voxel indices from 0, half-open (x0 <= x < x1, as in Python
                            slices), e.g. --box 10:14,20:24,0:1 is a 4 x 4 x 1 block
  --voxel x,y,z             one voxel (indices from 0)

Standard errors use the noise of the mean signal: the image background noise divided
by sqrt(number of voxels) when the series has a background, else the spread across the
region's voxels, else (one voxel, no background) the residuals. A QA and research tool,
not a medical device."""


def add_arguments(p: argparse.ArgumentParser) -> None:
    add_series_arguments(p)
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--label-map", metavar="F", help="label map on the series grid (with --label)")
    g.add_argument("--box", metavar="x0:x1,y0:y1,z0:z1",
                   help="half-open box of voxel indices from 0")
    g.add_argument("--voxel", metavar="x,y,z", help="one voxel (indices from 0)")
    p.add_argument("--label", type=int, metavar="N", help="label value (with --label-map)")
    p.add_argument("--noise", choices=("auto", "gaussian", "rician"), default="auto",
                   help="rician: model the magnitude noise floor (needs an image background); "
                        "auto (default): rician for magnitude data with a background")
    p.add_argument("--json", action="store_true", help="print the numbers as one JSON object")
    p.add_argument("--plot", metavar="F.png", help="write data, fitted curve and residuals")


# --------------------------------------------------------------------------- region
def _ints(text: str, n: int, sep: str, option: str, form: str) -> list[int]:
    parts = text.split(sep)
    try:
        vals = [int(v) for v in parts]
    except ValueError:
        vals = []
    if len(vals) != n:
        raise InputError(f"{option} {text!r}: expected {form} with whole-number voxel indices.")
    return vals


def parse_box(text: str, shape) -> list[tuple[int, int]]:
    """``x0:x1,y0:y1,z0:z1`` -> [(x0, x1), ...], half-open, checked against ``shape``."""
    axes = text.split(",")
    if len(axes) != 3:
        raise InputError(f"--box {text!r}: expected x0:x1,y0:y1,z0:z1 (three ranges).")
    box = []
    for name, part, size in zip("xyz", axes, shape[:3]):
        a, b = _ints(part, 2, ":", "--box", "x0:x1,y0:y1,z0:z1")
        if not 0 <= a < b <= size:
            raise InputError(f"--box {text!r}: the {name} range {a}:{b} is empty or outside the "
                             f"image (0:{size}); ranges are half-open, 0 <= {name}0 < {name}1 "
                             f"<= {size}.")
        box.append((a, b))
    return box


def parse_voxel(text: str, shape) -> tuple[int, int, int]:
    v = _ints(text, 3, ",", "--voxel", "x,y,z")
    for name, i, size in zip("xyz", v, shape[:3]):
        if not 0 <= i < size:
            raise InputError(f"--voxel {text!r}: {name} = {i} is outside the image "
                             f"(0 to {size - 1}).")
    return tuple(v)


def select_region(args: argparse.Namespace, series):
    """(boolean mask over the grid, region description for the report)."""
    import numpy as np
    from pipeline.series import load_label_map
    shape = tuple(series.shape[:3])
    sel = np.zeros(shape, bool)
    if args.label_map:
        if args.label is None:
            raise InputError("--label-map needs --label N (the label value of the region).")
        if args.label <= 0:
            raise InputError(f"--label {args.label}: label 0 is the background of a label map "
                             "(and labels are never negative); give the label of a region "
                             "(1, 2, ...).")
        labels = load_label_map(args.label_map, series, what="label map")
        sel = labels == args.label
        if not sel.any():
            present = np.unique(labels[labels != 0])
            shown = ", ".join(str(v) for v in present[:30]) or "none"
            raise InputError(f"--label {args.label}: label absent from {args.label_map} "
                             f"(labels present: {shown}); choose one of those.")
        region = {"kind": "label", "label_map": str(args.label_map), "label": int(args.label)}
    elif args.label is not None:
        raise InputError("--label applies to --label-map only.")
    elif args.box:
        box = parse_box(args.box, shape)
        sel[tuple(slice(a, b) for a, b in box)] = True
        region = {"kind": "box", "box": [list(r) for r in box]}
    else:
        v = parse_voxel(args.voxel, shape)
        sel[v] = True
        region = {"kind": "voxel", "voxel": list(v)}
    region["n_voxels_in_region"] = int(sel.sum())
    return sel, region


def read_region(series, sel):
    """(N, M) data of the voxels in ``sel`` (only the slabs holding them are read)."""
    import numpy as np
    zs = np.flatnonzero(sel.any(axis=(0, 1)))
    z = slice(int(zs[0]), int(zs[-1]) + 1)
    return series.read(z)[sel[:, :, z]], z


# --------------------------------------------------------------------------- report
def fmt(v: Any, digits: int = 6) -> str:
    """A number as printed (and as the --json test reads it back); NaN as n/a."""
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "n/a"
    if isinstance(v, (int,)) and not isinstance(v, bool):
        return str(v)
    return f"{v:.{digits}g}"


def _region_text(region: dict[str, Any]) -> str:
    if region["kind"] == "label":
        return f"label {region['label']} of {region['label_map']}"
    if region["kind"] == "box":
        return "box " + ", ".join(f"{n} {a}:{b}" for n, (a, b) in zip("xyz", region["box"]))
    return "voxel (" + ", ".join(str(i) for i in region["voxel"]) + ")"


def render_text(doc: dict[str, Any]) -> str:
    """The human-readable report; every figure in it is a rounding of a ``doc`` value."""
    lines = []
    s, r, nz = doc["series"], doc["region"], doc["noise"]
    lines.append(f"relaxline refit {doc['model']}: {s['stem']}")
    lines.append(f"region: {_region_text(r)}; {r['n_voxels_in_region']} voxels, "
                 f"{doc['n_voxels']} averaged, {doc['n_excluded']} excluded (non-finite or zero)")
    lines.append(f"{s['key']}: " + " ".join(fmt(v) for v in s["values"]))
    if nz["source"] == "background":
        lines.append(f"noise: background sigma per voxel {fmt(nz['sigma_voxel'])}, of the mean "
                     f"{fmt(nz['sigma_mean'][0])} (known: errors not rescaled by reduced chi2)")
    elif nz["source"] == "spread":
        lines.append(f"noise: spread across the region's voxels / sqrt(N), "
                     f"{fmt(min(nz['sigma_mean']))} to {fmt(max(nz['sigma_mean']))}")
    else:
        lines.append("noise: from the residuals (no background, one voxel): errors scaled by "
                     "reduced chi2, intervals by the F-test")
    lines.append("")
    lines.append(f"Mean-signal fit (lmfit): {doc['ndata']} points, {doc['nvarys']} free "
                 f"parameters, {doc['nfree']} degrees of freedom")
    lines.append(f"  {'parameter':<10} {'value':>12} {'stderr':>12}   {'1σ interval (profile)':<27}"
                 f" {'2σ interval (profile)':<27}")
    for name, p in doc["parameters"].items():
        label = f"{name} [{p['unit']}]" if p["unit"] == "s" else name
        if not p["vary"]:
            lines.append(f"  {label:<10} {fmt(p['value']):>12} {'fixed':>12}")
            continue
        ci = p["ci"] or {}
        iv = ["[" + ", ".join(fmt(v) for v in ci.get(k, [None, None])) + "]"
              for k in ("1sigma", "2sigma")]
        lines.append(f"  {label:<10} {fmt(p['value']):>12} {fmt(p['stderr']):>12}   "
                     f"{iv[0]:<27} {iv[1]:<27}")
    names = list(doc["correlation"])
    if len(names) > 1:
        lines.append("Correlation")
        lines.append("  " + " " * 8 + "".join(f"{n:>9}" for n in names))
        for a in names:
            lines.append(f"  {a:<8}" + "".join(f"{fmt(doc['correlation'][a][b], 3):>9}"
                                               for b in names))
    p_text = f" (P(chi2 >= observed) = {fmt(doc['chi2_p'], 3)})" \
        if doc["chi2_p"] is not None else ""
    lines.append(f"chi2 = {fmt(doc['chisqr'])}, reduced chi2 = {fmt(doc['redchi'])}{p_text}")
    lines.append(f"AIC = {fmt(doc['aic'])}, BIC = {fmt(doc['bic'])}")
    vw = doc.get("voxelwise")
    if vw:
        lines.append("")
        lines.append(f"Voxelwise fits ({vw['engine']} engine): {vw['n_voxels']} voxels, "
                     f"{vw['n_usable']} converged, {vw['n_at_bound']} at a bound, "
                     f"{vw['n_failed']} failed, {vw['n_bad_data']} with bad data")
        lines.append(f"  {'parameter':<10} {'median':>12} {'IQR':>12}   (q1 to q3)")
        for name, q in vw["parameters"].items():
            lines.append(f"  {name:<10} {fmt(q['median']):>12} {fmt(q['iqr']):>12}   "
                         f"({fmt(q['q1'])} to {fmt(q['q3'])})")
    if doc["comparison"] or doc["comparison_skipped"]:
        lines.append("")
        lines.append(f"Model comparison (same mean signal and weights; Δ = alternative − "
                     f"{doc['model']}, positive favours {doc['model']})")
        for c in doc["comparison"]:
            f = c["fit"]
            lines.append(f"  {c['alternative']}: chi2 {fmt(f['chisqr'])}, AIC {fmt(f['aic'])}, "
                         f"BIC {fmt(f['bic'])}; ΔAIC {fmt(c['delta_aic'])}, "
                         f"ΔBIC {fmt(c['delta_bic'])}")
            lines.append(f"  verdict: {c['verdict']}")
        for text in doc["comparison_skipped"]:
            lines.append(f"  skipped: {text}")
    for w in doc["warnings"]:
        lines.append(f"warning: {w}")
    return "\n".join(lines) + "\n"


def _clean(o: Any) -> Any:
    """JSON-safe copy: NaN/inf -> None, numpy scalars -> Python, tuples -> lists."""
    import numpy as np
    if isinstance(o, dict):
        return {str(k): _clean(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_clean(v) for v in o]
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (float, np.floating)):
        return float(o) if math.isfinite(o) else None
    return o


# --------------------------------------------------------------------------- plot
def plot_png(rep, title: str) -> bytes:
    """Data (± σ of the mean), fitted curve(s) and residuals as PNG bytes."""
    import matplotlib
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    from qc.figures import to_png

    ms, fit = rep.mean, rep.fit
    fig, (ax, axr) = plt.subplots(2, 1, figsize=(6.4, 5.6), sharex=True,
                                  gridspec_kw={"height_ratios": [3, 1]})
    err = ms.sigma if ms.sigma is not None else None
    ax.errorbar(ms.x, ms.y, yerr=err, fmt="o", color="k", ms=4, label="region mean")
    for f, style in [(fit, "-"), *[(o, "--") for o in rep.competitors]]:
        xs, ys = _curve(f, ms)
        ax.plot(xs, ys, style, label=f.label)
    ax.set_ylabel("signal")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=8)
    res = ms.y - fit.best_fit
    scale = err if err is not None else 1.0
    axr.axhline(0, color="0.6", lw=0.8)
    axr.plot(ms.x, res / scale, "o", color="k", ms=4)
    axr.set_ylabel("residual / σ" if err is not None else "residual")
    axr.set_xlabel(f"{fit.spec.xkey}")
    return to_png(fig)


def _curve(f, ms):
    """A smooth curve when the model is a pointwise function of x (checked: evaluated on a
    dense grid it reproduces the fitted points); else the fitted points themselves."""
    import numpy as np
    from fitting.lmfit_models import voxel_kwargs
    dense = np.union1d(ms.x, np.linspace(ms.x.min(), ms.x.max(), 200))
    try:
        yd = f.result.eval(x=dense, **voxel_kwargs(f.spec, f.result.model.fixed, 0))
        at = yd[np.searchsorted(dense, ms.x)]
        if np.allclose(at, f.best_fit, rtol=1e-6, atol=1e-9 * np.abs(f.best_fit).max()):
            return dense, yd
    except Exception:   # a model tied to its sampling (an echo train): plot the points
        pass
    return ms.x, f.best_fit


# --------------------------------------------------------------------------- run
def run(args: argparse.Namespace) -> int:
    import numpy as np

    from fitting.region import DELTA_CLEAR, DELTA_STRONG, REDCHI_P_WARN, alternatives, \
        fit_region
    from fitting.spec import configure_model, t1_map_models
    from pipeline.fitjob import acquisition, check_model_options, estimate_noise, input_files, \
        load_b1, prepare, resolve_noise
    from pipeline import profiles
    from pipeline.t1map import check_t1_map_model, load_t1_map, t1_values
    from pipeline.outputs import atomic_write_bytes, refuse_overwriting_inputs

    spec, series, _ = prepare(args.model, args.inputs, args.time_unit)
    if spec.solver is not None:
        raise InputError(f"refit does not apply to {spec.name}: the model is solved by its own "
                         f"method (regularised NNLS over a basis), not by a curve fit with "
                         f"lmfit statistics. Fit the voxels with `relaxline fit {spec.name}` "
                         f"and read the region's statistics with `relaxline qc`.")
    sigma = estimate_noise(series)
    noise = resolve_noise(args.noise, series, sigma, sys.stderr, command="refit", spec=spec)
    options = {"b1_map": str(args.b1) if args.b1 else None, "noise": noise,
               "t1_map": str(args.t1_map) if args.t1_map else None, **series_options(args)}
    if args.plot:
        refuse_overwriting_inputs([*input_files(series, options), args.label_map],
                                  [Path(args.plot)], "`relaxline refit --plot`")
    check_model_options(args.model, options)
    if args.slice_profile:
        profiles.check_spec(args.slice_profile)
    check_t1_map_model(spec, args.t1_map)
    spec = configure_model(spec, options)
    fixed = acquisition(spec, series, options)
    b1_arr = load_b1(spec, series, args.b1, sys.stderr, command="refit")
    t1_arr = load_t1_map(spec, series, args.t1_map)
    sel, region = select_region(args, series)
    data, z = read_region(series, sel)
    per_voxel: dict[str, Any] = {}
    if b1_arr is not None:
        bv = b1_arr[:, :, z][sel[:, :, z]].astype(float)
        per_voxel["b1"] = np.where(bv > 0, bv, np.nan)
    if t1_arr is not None:
        per_voxel["t1"], gaps = t1_values(t1_arr[sel], np.argwhere(sel), str(args.t1_map),
                                          args.t1_fixed)
        if gaps:
            print(f"relaxline refit: warning: the T1 map {args.t1_map} has no value in {gaps} "
                  f"voxel(s) of the region; T1 = {args.t1_fixed:g} s (--t1-fixed) used there.",
                  file=sys.stderr)
    if noise == "rician":
        per_voxel["sigma"] = float(sigma)

    def constants(s, base):
        return {**base, **{k: v for k, v in per_voxel.items() if k in s.voxel_fixed}}

    competitors, skipped = [], []
    for alt, fix, label in alternatives(spec):
        # a competitor without a per-voxel T1 (mese-mono) is fitted without the map
        alt_opts = options if alt.name in t1_map_models() else {**options, "t1_map": None}
        alt_spec = alt if alt is spec else configure_model(alt, alt_opts)
        try:
            alt_fixed = fixed if alt is spec else acquisition(alt_spec, series, alt_opts)
        except InputError as exc:
            skipped.append(f"{label}: {exc}")
            continue
        competitors.append((alt_spec, constants(alt_spec, alt_fixed), fix, label))
    rep = fit_region(spec, series.values, data, constants(spec, fixed), noise_sigma=sigma,
                     competitors=competitors)

    doc = {"model": spec.name,
           "series": {"stem": series.stem, "inputs": [str(p) for p in series.paths],
                      "key": spec.xkey, "values": [float(v) for v in series.values]},
           "region": region, **rep.to_dict(), "comparison_skipped": skipped, "warnings": [],
           "noise_model": noise}
    for c in doc["comparison"]:
        c["thresholds"] = {"delta_clear": DELTA_CLEAR, "delta_strong": DELTA_STRONG}
    if rep.mean.sigma is not None and np.isfinite(rep.fit.chi2_p) \
            and rep.fit.chi2_p < REDCHI_P_WARN:
        doc["warnings"].append(
            f"chi2 is too large for the noise (P below {fmt(REDCHI_P_WARN)}): the model does "
            f"not describe the mean signal within its noise, so the standard errors are "
            f"optimistic; inspect the residuals (--plot) and the model comparison")
        doc["chi2_p_warn"] = REDCHI_P_WARN
    doc = _clean(doc)
    if args.plot:
        title = f"relaxline refit {spec.name}: {series.stem}, {_region_text(region)}"
        atomic_write_bytes(Path(args.plot), plot_png(rep, title))
    if args.json:
        sys.stdout.write(json.dumps(doc, indent=2, sort_keys=True) + "\n")
    else:
        sys.stdout.write(render_text(doc))
        if args.plot:
            sys.stdout.write(f"plot: {args.plot}\n")
    return 0
