"""Rendering of `relaxline qc` results: figures, signal curves, noise and the report page.

:func:`render` turns a :class:`pipeline.qcjob.QCResult` into the report HTML and the
figure PNGs (it reads the source series for signal curves and background noise); the
HTML itself is built by :mod:`qc.report`. Split from :mod:`pipeline.qcjob`, which finds,
loads and judges the maps.
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from pipeline import profiles
from pipeline.errors import InputError
from pipeline.qcjob import QC_MAPS, MapFile, QCResult, source_paths


MAX_SERIES_BYTES = 1 << 30   # read a whole source series for curves/noise up to 1 GiB


def open_source_series(mf: MapFile):
    """The series a map was fitted from (via its sidecar ``Sources``), or (None, reason)."""
    from pipeline.series import read_series

    key = mf.sidecar.get("VaryingKey")
    paths = [p for p in source_paths(mf) if p.name.endswith((".nii", ".nii.gz"))]
    if not paths or not key:
        return None, "the map's sidecar lists no source series"
    missing = [str(p) for p in paths if not p.is_file()]
    if missing:
        return None, f"source series not found ({missing[0]})"
    try:
        from fitting.errors import RelaxlineError
        from fitting.spec import get_model
        try:   # keys that may differ per volume (e.g. the MP2RAGE flip angles)
            volume_keys = get_model(str(mf.sidecar.get("Model"))).volume_keys
        except RelaxlineError:
            volume_keys = ()
        series = read_series(paths, key, volume_keys=volume_keys)
        if tuple(series.shape) != mf.shape or not np.allclose(series.affine, mf.affine,
                                                              atol=1e-3):
            return None, "the source series is not on the map's grid"
    except InputError as exc:
        return None, f"source series unreadable ({exc})"
    if series.nbytes_float32 > MAX_SERIES_BYTES:
        return None, "source series too large to read whole for curves and noise"
    return series, ""


def vial_curves(data: np.ndarray, labels: np.ndarray, keep: np.ndarray
                ) -> dict[int, tuple[np.ndarray, np.ndarray]]:
    """Mean and SD of the (magnitude) signal over each vial's usable voxels, per volume."""
    mag = np.abs(data)
    out = {}
    for v in sorted(int(x) for x in np.unique(labels) if x > 0):
        vox = mag[(labels == v) & keep]
        if vox.shape[0]:
            out[v] = (vox.mean(axis=0), vox.std(axis=0, ddof=1) if vox.shape[0] > 1
                      else np.zeros(vox.shape[1]))
    return out


def fitted_curves(mf: MapFile, series, labels: np.ndarray, keep: np.ndarray,
                  magnitude: bool) -> tuple[dict[int, tuple[np.ndarray, np.ndarray]], str]:
    """Model curves at each vial's median parameters, via the model registry's forward signal.

    Returns ({label: (x, signal)}, note); the note says why curves are missing.
    """
    try:
        from fitting.spec import get_model
    except ImportError:
        return {}, "model registry not available: fitted curves omitted"
    from fitting.errors import RelaxlineError
    from qc.roi import vial_medians

    name = mf.sidecar.get("Model")
    try:
        spec = get_model(str(name))
    except RelaxlineError:
        return {}, f"model {name!r} unknown to this version: fitted curves omitted"
    params = {}
    for p in spec.params:
        suffix = spec.outputs.get(p)
        path = mf.path.with_name(f"{mf.stem}_{suffix}.nii.gz") if suffix else None
        if path is None or not path.is_file():
            return {}, f"no map for parameter {p} ({mf.stem}_{suffix}): fitted curves omitted"
        params[p] = mf.companion(path, f"{p} map", float)
    options = mf.sidecar.get("Options") or {}
    try:
        fixed = dict(spec.fixed_from_meta(series.meta, profiles.resolve(options)))
    except (RelaxlineError, InputError) as exc:
        return {}, f"fitted curves omitted ({exc})"
    per_voxel = [k for k in (*spec.voxel_fixed, "t1")
                 if isinstance(options.get(k) or options.get(f"{k}_map"), str)]
    if per_voxel:
        return {}, (f"the fit used a per-voxel {per_voxel[0]} map; fitted curves omitted")
    medians = vial_medians(params, labels, keep)
    x = np.asarray(series.values, float)
    xf = np.linspace(x.min(), x.max(), 200)
    out = {}
    for lab, med in medians.items():
        if not all(np.isfinite(v) for v in med.values()):
            continue
        p = {k: np.array([v]) for k, v in med.items()}
        try:
            y_at_x = np.asarray(spec.signal(x, p, fixed))[0]
            # a model defined only at its acquired points (an echo train) is not resampled
            y = y_at_x if spec.extra.get("sampled_only") else \
                np.asarray(spec.signal(xf, p, fixed))[0]
        except Exception as exc:  # an overlay must not stop the QC; the note says why
            return {}, f"fitted curves omitted ({type(exc).__name__}: {exc})"
        # Some models are defined only at the acquired points (an echo train at k·ESP, a
        # double-angle pair): a smooth curve is drawn only where it agrees with them.
        smooth = y.shape == xf.shape and np.allclose(
            np.interp(x, xf, y), y_at_x, rtol=1e-2, atol=1e-3 * np.nanmax(np.abs(y_at_x)))
        xs, ys = (xf, y) if smooth else (x, y_at_x)
        out[lab] = (xs, np.abs(ys) if magnitude else ys)
    return out, ""


XLABEL = {"InversionTime": ("inversion time", 1000.0, "ms"), "EchoTime": ("echo time", 1000.0,
          "ms"), "FlipAngle": ("flip angle", 1.0, "degrees"),
          "RepetitionTime": ("repetition time", 1000.0, "ms"),
          "RepetitionTimeExcitation": ("repetition time", 1000.0, "ms"),
          "SaturationDelay": ("saturation delay", 1000.0, "ms")}


def render(result: QCResult, reference, tol, out_figures: bool, erode_mm: float,
           maps_dir: Path, labels_desc: str, reference_desc: str,
           extra_sections: Sequence[tuple[str, str]] = (),
           extra_warnings: Sequence[str] = (),
           progress: Callable[[int], Callable[[int], None]] | None = None
           ) -> tuple[str, dict[str, bytes]]:
    """Figures and the report page. Returns (html, {figure file name: png}).

    ``progress(total)`` returns the counter called with 1 after each of the ``total``
    steps (a figure, or a source series' noise and curves)."""
    from fitting.status import USABLE
    from pipeline.outputs import package_version
    from qc import figures as F
    from qc.report import AGREEMENT, Figure, build_report

    table = result.table
    disp = F.for_display(table) if len(table) else table
    figs: list[Figure] = []
    files: dict[str, bytes] = {}
    warnings = list(result.warnings) + list(extra_warnings)
    agreement = None
    names = reference.names() if reference is not None else {}
    noise_parts: list[str] = []
    noise_ests: list[tuple[str, Any, Any]] = []

    def add(fname: str, fig: Figure) -> None:
        figs.append(fig)
        files[fname] = fig.png
        step(1)

    by_stem: dict[str, list[MapFile]] = {}
    for mf in result.maps:
        by_stem.setdefault(mf.stem, []).append(mf)
    total = (2 if out_figures and len(table) else 0) + sum(
        (len([m for m in g if m.suffix in QC_MAPS]) if out_figures else 0)
        + len({json.dumps(m.sidecar.get("Sources") or [], sort_keys=True)
               for m in g if m.suffix in QC_MAPS})
        for stem, g in by_stem.items() if result.labels.get(stem) is not None)
    step = progress(total) if progress is not None else (lambda n: None)

    if out_figures and len(table):
        png = F.measured_vs_reference(disp)
        if png:
            add("measured_vs_reference.png", Figure(
                "Measured against reference", png,
                "Vial mean ± SD against the reference corrected to the phantom temperature, "
                "log–log. Black line: identity; shaded: warn and fail bands of the map's "
                "tolerance (per-vial overrides apply in the table). Marker shape gives the "
                "status: circle pass, square warn, cross fail.", AGREEMENT))
        png, agreement = F.bland_altman(disp)
        if png:
            add("bland_altman.png", Figure(
                "Bland–Altman plot", png,
                "Percent difference from the reference against the mean of measured and "
                "reference; solid blue: bias, dashed: 95 % limits of agreement "
                "(bias ± 1.96·SD; Bland & Altman 1986, Lancet 1:307); dotted grey: the map's "
                "fail limit (stated instead when far beyond the differences). With few vials the limits of agreement are themselves "
                "uncertain.", AGREEMENT))
    for stem, group in by_stem.items():
        labels = result.labels.get(stem)
        if labels is None:
            continue
        qc_maps = [m for m in group if m.suffix in QC_MAPS]
        status_map = qc_maps[0].companion(qc_maps[0].status_path, "fit-status mask", np.uint8) \
            if qc_maps else None
        keep = np.ones(labels.shape, bool) if status_map is None else np.isin(status_map, USABLE)
        if out_figures:
            for mf in qc_maps:
                k, u = F.display_scale(mf.suffix, str(mf.sidecar.get("Units", "s")))
                shown = np.where(keep, mf.data(), np.nan) if status_map is not None \
                    else mf.data()
                png = F.map_montage(shown * k, f"{mf.suffix} — {stem}", mf.suffix, u,
                                    labels)
                add(f"{stem}_{mf.suffix}_montage.png", Figure(
                    f"{F.QUANTITY_LABEL.get(mf.suffix, mf.suffix)} map, {stem}", png,
                    "Evenly spaced slices; vial outlines (white) with their labels"
                    + (f" after {erode_mm:g} mm erosion" if erode_mm > 0 else "")
                    + "; grey: no value (outside the mask or fit not usable). Colour range: "
                      "1st–99th percentile inside the vials, on a log scale when they span "
                      "more than a decade.", "Maps"))
        # one series per model: curves and noise from each distinct source series
        seen_sources: set[str] = set()
        for mf in qc_maps:
            src_key = json.dumps(mf.sidecar.get("Sources") or [], sort_keys=True)
            if src_key in seen_sources:   # maps of one fit share their series
                continue
            seen_sources.add(src_key)
            fig = _source_step(mf, stem, labels, keep, names, out_figures, noise_parts,
                               noise_ests)
            if fig is not None:
                figs.append(fig[1])
                files[fig[0]] = fig[1].png
            step(1)
    by_value: dict[str, list[str]] = {}
    for t, src in result.temperatures.values():
        key = f"{t:g} °C" if t is not None else "not known: reference values uncorrected"
        by_value.setdefault(key, [])
        if src != "none" and src not in by_value[key]:
            by_value[key].append(src)
    temps = [f"{k} (from {', '.join(v)})" if v else k for k, v in by_value.items()]
    tol_src = ("built-in defaults, ILLUSTRATIVE only: set tolerances from your local QA "
               "procedure (--config)" if tol.source.startswith("built-in") else tol.source)
    summary = {
        "session": ", ".join(sorted(set(map(str, table["session"])))) or "–",
        "series": ", ".join(by_stem),
        "maps folder": str(maps_dir),
        "vial labels": labels_desc + (f" (eroded by {erode_mm:g} mm)" if erode_mm > 0 else ""),
        "reference": reference_desc,
        "phantom temperature": "; ".join(sorted(temps)),
        "tolerances": tol_src if reference is not None else "not used (no reference)",
    }
    if tol.ranges:
        margin = (f"; within {tol.range_warn_margin_pct:g} % of the range width of an edge → "
                  "warn" if tol.range_warn_margin_pct > 0 else "")
        summary["ranges"] = (f"{tol.source}: region mean inside [low, high] → pass, outside "
                             f"→ fail{margin}; only where no reference value applies. Ranges "
                             "are set by the local procedure.")
    for mf in result.maps:   # how the fit reported the map (e.g. the TB1map's B1 fold)
        notes = [n for n in mf.sidecar.get("Notes") or [] if isinstance(n, str)]
        if notes and mf.suffix in QC_MAPS:
            summary[f"{mf.suffix} of {mf.stem}"] = " ".join(notes)
    # the report shows the inputs' paths and sha256 (SourceFiles; older maps: Sources)
    provenance = [{"file": mf.path.name, **{k: mf.sidecar.get(k) for k in
                  ("Model", "Engine", "Options", "RelaxlineVersion")},
                   "Sources": mf.sidecar.get("SourceFiles") or mf.sidecar.get("Sources")}
                  for mf in result.maps if mf.suffix in QC_MAPS]
    import datetime
    footer = (f"relaxline {package_version()}, report generated "
              f"{datetime.datetime.now(datetime.timezone.utc):%Y-%m-%d %H:%M} UTC.")
    title = "relaxline phantom QC" if reference is not None else "relaxline ROI statistics"
    page = build_report(table, title=title, summary=summary, figures=figs, agreement=agreement,
                        noise_html=_noise_html(noise_ests) + "\n".join(noise_parts),
                        provenance=provenance,
                        warnings=warnings, extra_sections=extra_sections, footer=footer)
    return page, files


def _source_step(mf: MapFile, stem: str, labels: np.ndarray, keep: np.ndarray, names: dict,
                 out_figures: bool, noise_parts: list[str], noise_ests: list):
    """Noise estimate (appended to ``noise_ests``, or why not to ``noise_parts``) and the
    signal-curve figure of the series ``mf`` was fitted from: (file name, Figure) or None."""
    from qc import figures as F
    from qc.noise import estimate_noise
    from qc.report import Figure
    series, why = open_source_series(mf)
    if series is None:
        noise_parts.append(f"<p>{esc_(stem)} ({esc_(mf.sidecar.get('Model', '?'))}): "
                           f"no noise estimate or signal curves — {esc_(why)}.</p>")
        return None
    data = series.read()
    noise_ests.append((stem, series, estimate_noise(data, labels, names)))
    if not out_figures:
        return None
    curves = vial_curves(data, labels, keep)
    if not curves:
        return None
    magnitude = not series.is_complex
    fitted, note = fitted_curves(mf, series, labels, keep, magnitude)
    what, kx, ux = XLABEL.get(series.key, (series.key, 1.0, ""))
    fitted_disp = {lab: (x * kx, y) for lab, (x, y) in fitted.items()}
    png = F.signal_curves(series.values * kx, f"{what} ({ux})" if ux else what,
                          curves, names or {v: f"label {v}" for v in curves},
                          f"Mean signal per vial — {stem} ({mf.sidecar.get('Model')})",
                          fitted_disp, note)
    return f"{stem}_{series.key}_curves.png", Figure(
        f"Signal curves, {stem}", png,
        "Vial mean ± SD of the (magnitude) signal over the usable voxels; lines: the "
        "model at the vial's median fitted parameters" + (f" ({note})" if note else "")
        + ".", "Signal curves")


def esc_(x: Any) -> str:
    import html
    return html.escape(str(x))


def _noise_html(ests: list[tuple[str, Any, Any]]) -> str:
    """One table of σ per series and one of SNR per vial (a column per series)."""
    if not ests:
        return ""
    head = ("<table><thead><tr><th class=\"t\">series</th><th>σ (signal units)</th>"
            "<th>air voxels</th><th class=\"t\">brightest volume (used for SNR)</th></tr>"
            "</thead><tbody>")
    rows, cols = [], []
    for stem, series, est in ests:
        if est.sigma is None:
            rows.append(f"<tr><td class=\"t\">{esc_(stem)}</td><td colspan=\"3\" class=\"t\">"
                        f"{esc_(est.note)}</td></tr>")
            continue
        what, k, unit = XLABEL.get(series.key, (series.key, 1.0, ""))
        vol = series.values[est.volume_index] * k
        rows.append(f"<tr><td class=\"t\">{esc_(stem)}</td><td>{est.sigma:.4g}</td>"
                    f"<td>{est.n_background}</td><td class=\"t\">{esc_(what)} {vol:g} "
                    f"{esc_(unit)}</td></tr>")
        cols.append((stem, est.table.set_index("label")))
    out = ("<p>σ from the air around the phantom (Rayleigh estimator for magnitude data; "
           "assumes single-channel-like noise). SNR = vial mean signal of the series' "
           "brightest volume / σ.</p>" + head + "".join(rows) + "</tbody></table>")
    if cols:
        labels = sorted(set().union(*[set(t.index) for _, t in cols]))
        names = {}
        for _, t in cols:
            names.update(t["name"].to_dict())
        short = [stem.rsplit("_", 1)[-1] for stem, _ in cols]
        ths = "".join(f"<th>SNR {esc_(sh)}</th>" for sh in short)
        body = "".join(
            f"<tr><td>{lab}</td><td class=\"t\">{esc_(names.get(lab, ''))}</td>"
            + "".join(f"<td>{t.loc[lab, 'snr']:.1f}</td>" if lab in t.index else "<td>–</td>"
                      for _, t in cols) + "</tr>" for lab in labels)
        out += (f"<table><thead><tr><th>vial</th><th class=\"t\">name</th>{ths}</tr></thead>"
                f"<tbody>{body}</tbody></table>")
    return out
