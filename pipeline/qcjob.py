"""Glue for `relaxline qc`: find maps, load them, run the qc layer, write outputs atomically.

The qc layer (``qc.*``) works on arrays and tables; this module does the file handling:
discovering ``<stem>_<suffix>.nii.gz`` maps by their BIDS suffixes, reading sidecars,
resolving the phantom temperature, reading the source series for signal curves and
background noise, and writing ``roi_stats.tsv``, ``figures/*.png`` and ``report.html``.

The label map comes from a :data:`LabelSource` callable, so a vial map can be read from a
file (:func:`labels_from_file`) or placed automatically from a layout by another function.
"""
from __future__ import annotations

import json
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence, TextIO

import numpy as np
import pandas as pd

from pipeline.errors import EXIT_OK, EXIT_QC_FAIL, InputError
from pipeline.series import (_load_image, load_grid_map, load_label_map, read_json_file,
                             sidecar_path)

QC_MAPS = ("T1map", "T2map", "T2starmap", "TB1map", "MWFmap", "T1starmap")
ALL_MAPS = QC_MAPS + ("M0map",)
TSV_COLUMNS = ["session", "model", "series", "map", "label", "name", "n_voxels", "n_excluded", "mean",
               "sd", "median", "iqr", "cv_pct", "median_stderr", "units", "reference",
               "reference_sd", "reference_temperature", "temperature", "temperature_source",
               "reference_at_temperature", "bias_pct", "warn_pct", "tolerance_pct", "range_low",
               "range_high", "status", "note"]
_MAP_NAME = re.compile(r"^(?P<stem>.+?)_(?P<suffix>" + "|".join(ALL_MAPS) + r")\.nii(\.gz)?$")
_SESSION = re.compile(r"(?:^|_)ses-([0-9A-Za-z]+)")


@dataclass
class MapFile:
    """One parameter map found in MAPS_DIR with its sidecar and companion files."""

    stem: str
    suffix: str
    path: Path
    sidecar: dict[str, Any]
    status_path: Path | None = None
    stderr_path: Path | None = None
    _img: Any = field(default=None, repr=False)

    @property
    def image(self):
        if self._img is None:
            self._img = _load_image(self.path)
        return self._img

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(int(s) for s in self.image.shape[:3])

    @property
    def affine(self) -> np.ndarray:
        return np.asarray(self.image.affine, float)

    @property
    def voxel_size(self) -> tuple[float, ...]:
        """Voxel spacing (mm) along each axis, from the affine that places the map in space
        (the header's pixdim fields may disagree with it, or be 0)."""
        return tuple(float(v) for v in np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0)))

    def data(self) -> np.ndarray:
        arr = np.asarray(self.image.dataobj, dtype=np.float32)
        if arr.ndim > 3:
            if any(s > 1 for s in arr.shape[3:]):
                raise InputError(f"{self.path}: a parameter map must be 3D, got shape "
                                 f"{arr.shape}.")
            arr = arr.reshape(arr.shape[:3])
        return arr.reshape(self.shape)

    def companion(self, path: Path | None, what: str, dtype=np.float32) -> np.ndarray | None:
        if path is None:
            return None
        return load_grid_map(path, self.shape, self.affine, what=what).astype(dtype)


LabelSource = Callable[[MapFile], np.ndarray]
"""Returns the integer label map on a map's grid (raises InputError when impossible)."""


def _read_json(path: Path) -> dict[str, Any]:
    obj = read_json_file(path, "map's JSON sidecar")
    if not isinstance(obj, dict):
        raise InputError(f"{path}: sidecar must hold a JSON object; rerun `relaxline fit` to "
                         "rewrite it.")
    return obj


def map_folders(maps_dir: str | Path) -> list[Path]:
    """Where maps are looked for: ``maps_dir`` and its BIDS datatype folders ``anat/`` and
    ``fmap/`` (a session folder of the workflow's results)."""
    d = Path(maps_dir)
    return [d] + [d / t for t in ("anat", "fmap") if (d / t).is_dir()]


def discover_maps(maps_dir: str | Path, model: str | None = None) -> list[MapFile]:
    """Parameter maps in ``maps_dir`` (``<stem>_<suffix>.nii[.gz]``, no ``desc-`` entity),
    also in its ``anat/`` and ``fmap/`` folders; only those of ``model`` (sidecar ``Model``)
    when given."""
    d = Path(maps_dir)
    if not d.is_dir():
        raise InputError(f"{d}: maps folder not found (MAPS_DIR is the --out folder of "
                         "`relaxline fit`, or a session folder of the workflow's results).")
    files = {p.name: p for f in map_folders(d) for p in sorted(f.iterdir())}

    def companion(name: str) -> Path | None:
        return next((files[n] for n in (name + ".nii.gz", name + ".nii") if n in files), None)

    found = []
    for name, p in sorted(files.items()):
        m = _MAP_NAME.match(name)
        if not m or "_desc-" in name:
            continue
        stem, suffix = m.group("stem"), m.group("suffix")
        side = sidecar_path(p)
        sidecar = _read_json(side) if side.is_file() else {}
        if model is not None and sidecar.get("Model") != model:
            continue
        found.append(MapFile(stem, suffix, p, sidecar, companion(f"{stem}_desc-fitstatus_mask"),
                             companion(f"{stem}_desc-stderr_{suffix}")))
    found.sort(key=lambda f: (f.stem, ALL_MAPS.index(f.suffix)))
    if not any(f.suffix in QC_MAPS for f in found):
        of = f" of the {model} model" if model else ""
        raise InputError(f"{d}: no parameter maps{of} found; expected files named "
                         f"<stem>_{{{','.join(QC_MAPS)}}}.nii.gz as written by `relaxline fit`.")
    return found


def session_of(stem: str) -> str:
    """The BIDS ``ses-`` label of a stem, or '' when it has none."""
    m = _SESSION.search(stem)
    return m.group(1) if m else ""


def labels_from_file(path: str | Path) -> LabelSource:
    """A label source reading one label map that must lie on every map's grid."""
    p = Path(path)
    cache: dict[str, np.ndarray] = {}

    def source(mf: MapFile) -> np.ndarray:
        key = f"{mf.shape}|{mf.affine.round(4).tolist()}"
        if key not in cache:
            arr = load_label_map(p, mf.shape, mf.affine, what="label map")
            if not arr.any():
                raise InputError(f"{p}: the label map holds no region (every voxel is 0, the "
                                 "background), so there is nothing to measure; give the label "
                                 "map of the vials or regions (1, 2, ...).")
            cache[key] = arr
        return cache[key]

    return source


def source_paths(mf: MapFile) -> list[Path]:
    """Paths in the map sidecar's ``Sources``, resolved: as written (absolute or relative to
    the working folder), else relative to the maps folder or its parent."""
    out = []
    # SourceFiles: paths and sha256 (Sources holds BIDS URIs); older maps: Sources as paths
    for src in mf.sidecar.get("SourceFiles") or mf.sidecar.get("Sources") or []:
        p = Path(src.get("path", "")) if isinstance(src, dict) else Path(str(src))
        if not p.is_absolute() and not p.exists():
            for base in (mf.path.parent, mf.path.parent.parent):
                if (base / p).exists():
                    p = base / p
                    break
        out.append(p)
    return out


def source_sidecars(mf: MapFile) -> list[dict[str, Any]]:
    """JSON sidecars of the series a map was fitted from (those that still exist)."""
    out = []
    for p in source_paths(mf):
        if p.suffix == ".json" and p.is_file():
            try:
                out.append(_read_json(p))
            except InputError:
                continue
    return out


def resolve_temperature(option: float | None, maps: list[MapFile],
                        fallback: float | None, option_source: str = "--temperature"
                        ) -> tuple[float | None, str]:
    """Phantom temperature (°C) and where it came from: the option (``--temperature``, or
    the BIDS sessions file in the workflow, named by ``option_source``), the sidecars
    (``PhantomTemperature``), the config fallback, or none."""
    if option is not None:
        return _temperature(option, option_source), option_source
    for mf in maps:
        t = mf.sidecar.get("PhantomTemperature")
        if t is not None:
            return _temperature(t, f"{sidecar_path(mf.path)}: key 'PhantomTemperature'"), \
                f"sidecar {mf.path.name}"
    for mf in maps:
        for p in source_paths(mf):
            if p.suffix != ".json" or not p.is_file():
                continue
            try:
                t = _read_json(p).get("PhantomTemperature")
            except InputError:
                continue
            if t is not None:
                return _temperature(t, f"{p}: key 'PhantomTemperature'"), f"sidecar {p.name}"
    if fallback is not None:
        return float(fallback), "config"
    return None, "none"


B1_FOLD_KEY = "B1Folded"   # TB1map sidecar key (bool) the mese fit records its fold in


def mese_b1_fold(sidecar: dict[str, Any]) -> str:
    """The row note of a mese B1 (refocusing-efficiency estimate) with its fold as recorded
    in the TB1map sidecar (:data:`B1_FOLD_KEY`)."""
    from qc.report import MESE_B1_FOLDED
    fold = sidecar.get(B1_FOLD_KEY)
    what = (MESE_B1_FOLDED if fold is True else f"not {MESE_B1_FOLDED}" if fold is False
            else "fold not recorded")
    return f"refocusing-efficiency estimate, {what}"


def _temperature(t: Any, source: str) -> float:
    """A phantom temperature checked for plausibility (°C), or an InputError naming ``source``."""
    from fitting.errors import RelaxlineError
    from qc.reference import check_temperature
    try:
        return check_temperature(t, source)
    except RelaxlineError as exc:
        raise InputError(str(exc)) from None


def field_strength(maps: list[MapFile]) -> float | None:
    for mf in maps:
        for sc in [mf.sidecar, *source_sidecars(mf)]:
            b0 = sc.get("MagneticFieldStrength")
            if isinstance(b0, (int, float)) and not isinstance(b0, bool):
                return float(b0)
    return None


@dataclass
class QCResult:
    table: pd.DataFrame
    warnings: list[str]
    maps: list[MapFile]
    labels: dict[str, np.ndarray]          # stem -> label map used (after erosion)
    temperatures: dict[str, tuple[float | None, str]]

    @property
    def exit_code(self) -> int:
        return EXIT_QC_FAIL if (self.table["status"] == "fail").any() else EXIT_OK


def compute(maps: list[MapFile], label_source: LabelSource, reference=None, tolerances=None,
            temperature: float | None = None, session: str | None = None,
            erode_mm: float = 0.0, temperature_source: str = "--temperature") -> QCResult:
    """ROI statistics, reference comparison and status for every map (no writing).

    ``temperature`` (°C) overrides the sidecars; ``temperature_source`` says where it came
    from (reported in the ``temperature_source`` column)."""
    from qc.reference import MAP_QUANTITY
    from qc.roi import erode_labels, roi_stats
    from qc.tolerance import load_tolerances

    tol = tolerances if tolerances is not None else load_tolerances(None)
    warnings: list[str] = []
    rows = []
    labels_used: dict[str, np.ndarray] = {}
    temps: dict[str, tuple[float | None, str]] = {}
    by_stem: dict[str, list[MapFile]] = {}
    for mf in maps:
        by_stem.setdefault(mf.stem, []).append(mf)
    names = reference.names() if reference is not None else {}
    for stem, group in by_stem.items():
        t, t_src = resolve_temperature(temperature, group, tol.temperature,
                                       temperature_source)
        temps[stem] = (t, t_src)
        ses = session if session else session_of(stem)
        if reference is not None:
            w = reference.field_warning(field_strength(group))
            if w:
                warnings.append(f"{stem}: {w}")
        for mf in group:
            if mf.suffix not in QC_MAPS:
                continue
            # warnings the fit wrote into the map sidecars (same on every map of a series)
            warnings += [f"{stem}: {w}" for w in mf.sidecar.get("Warnings") or []
                         if isinstance(w, str)]
            labels = label_source(mf)
            if erode_mm > 0:
                if min(mf.voxel_size) <= 0:
                    raise InputError(f"{mf.path}: the affine gives a zero voxel size "
                                     f"{mf.voxel_size} mm, so vials cannot be eroded by "
                                     f"{erode_mm:g} mm; fix the header or leave out the "
                                     "erosion.")
                labels = erode_labels(labels, erode_mm, mf.voxel_size)
            labels_used.setdefault(stem, labels)
            status_map = mf.companion(mf.status_path, "fit-status mask", np.uint8)
            if status_map is None:
                warnings.append(f"{stem}: no fit-status mask ({stem}_desc-fitstatus_mask.nii.gz)"
                                f"; only non-finite voxels were excluded from {mf.suffix}.")
            from qc.roi import label_values
            wanted = sorted(set(label_values(labels)) |
                            set(reference.labels if reference is not None else []))
            stats = roi_stats(mf.data(), labels, status_map, only=wanted)
            stderr = mf.companion(mf.stderr_path, "standard-error map")
            stats["median_stderr"] = np.nan
            if stderr is not None:
                from fitting.status import USABLE
                keep = np.isfinite(stderr) if status_map is None else \
                    np.isfinite(stderr) & np.isin(status_map, USABLE)
                for i, lab in enumerate(stats["label"]):
                    v = stderr[(labels == lab) & keep]
                    stats.loc[i, "median_stderr"] = float(np.median(v)) if v.size else np.nan
            quantity = MAP_QUANTITY.get(mf.suffix)
            if reference is not None and quantity and reference.has(quantity):
                ref = reference.at_temperature(quantity, t).drop(columns="name")
                if t is None and reference.needs_temperature(quantity):
                    warnings.append(
                        f"{stem} {mf.suffix}: no phantom temperature (no --temperature, no "
                        "PhantomTemperature in the sidecars, none in the config); the "
                        "temperature-dependent reference values were used uncorrected at "
                        "their own temperature. Give --temperature to correct them.")
            else:
                ref = pd.DataFrame({"label": stats["label"]})
                for c in ("reference", "reference_sd", "reference_temperature",
                          "reference_at_temperature"):
                    ref[c] = np.nan
                ref["reference_note"] = ""
            df = stats.merge(ref, on="label", how="left")
            df["session"], df["series"], df["map"] = ses, stem, mf.suffix
            df["model"] = str(mf.sidecar.get("Model", ""))
            df["name"] = [names.get(int(v), f"label {int(v)}") for v in df["label"]]
            df["units"] = mf.sidecar.get("Units", "")
            df["temperature"] = t if t is not None else np.nan
            df["temperature_source"] = t_src
            refT = df["reference_at_temperature"].astype(float)
            df["bias_pct"] = 100.0 * (df["mean"] - refT) / refT
            lims = [tol.limits(mf.suffix, int(v)) for v in df["label"]]
            has_ref = np.isfinite(refT)
            df["warn_pct"] = [w if h else np.nan for (w, _), h in zip(lims, has_ref)]
            df["tolerance_pct"] = [f if h else np.nan for (_, f), h in zip(lims, has_ref)]
            # a configured range judges a region only where no reference value applies
            rngs = [tol.range_for(mf.suffix, int(v)) for v in df["label"]]
            use_rng = [r is not None and not h for r, h in zip(rngs, has_ref)]
            df["range_low"] = [r[0] if u else np.nan for r, u in zip(rngs, use_rng)]
            df["range_high"] = [r[1] if u else np.nan for r, u in zip(rngs, use_rng)]
            df["status"] = [tol.range_status(m, mf.suffix, int(v)) if u else
                            tol.status(b, mf.suffix, int(v), bool(h))
                            for m, b, v, h, u in zip(df["mean"], df["bias_pct"], df["label"],
                                                     has_ref, use_rng)]
            unit = f" {df['units'].iloc[0]}" if len(df) and df["units"].iloc[0] else ""
            notes = []
            for r, rng, u in zip(df.itertuples(), rngs, use_rng):
                n = [r.reference_note] if isinstance(r.reference_note, str) and \
                    r.reference_note else []
                if rng is not None:
                    n.append(f"range [{rng[0]:g}, {rng[1]:g}]{unit}" if u else
                             f"reference used; configured range [{rng[0]:g}, {rng[1]:g}]"
                             f"{unit} not applied")
                if r.n_voxels == 0:
                    n.append("no usable voxel in this vial")
                elif r.n_excluded > 0:
                    n.append(f"{r.n_excluded} voxel(s) excluded (fit not usable)")
                notes.append("; ".join(n))
            if mf.suffix == "TB1map" and df["model"].iloc[0] == "mese" if len(df) else False:
                notes = [f"{mese_b1_fold(mf.sidecar)}" + (f"; {n}" if n else "") for n in notes]
            df["note"] = notes
            rows.append(df)
            absent = sorted(lab for lab, per_map in tol.ranges.items()
                            if mf.suffix in per_map and lab not in set(df["label"]))
            if absent:
                warnings.append(f"{stem} {mf.suffix}: label(s) {absent} have a range in "
                                f"{tol.source} but are not in the label map; not judged.")
            empty = df[df["n_voxels"] == 0]["label"].tolist()
            if empty:
                warnings.append(f"{stem} {mf.suffix}: no usable voxel in label(s) {empty}"
                                + (" after erosion" if erode_mm > 0 else "") + ".")
    table = pd.concat(rows, ignore_index=True)[TSV_COLUMNS] if rows else \
        pd.DataFrame(columns=TSV_COLUMNS)
    if reference is not None:
        extra = sorted(set(table["label"]) - set(reference.labels))
        if extra:
            warnings.append(f"label(s) {extra} of the label map have no row in "
                            f"{reference.source}; they are reported without reference.")
    return QCResult(table, list(dict.fromkeys(warnings)), maps, labels_used, temps)


def run_qc(maps_dir: str | Path, out_dir: str | Path, label_source: LabelSource,
           reference_path: str | Path | None = None, config: Any = None,
           temperature: float | None = None, session: str | None = None,
           erode_mm: float = 0.0, figures: bool = True,
           temperature_source: str = "--temperature",
           labels_desc: str = "label map",
           extra_sections: Sequence[tuple[str, str]] = (),
           extra_warnings: Sequence[str] = (), model: str | None = None,
           stream: TextIO | None = None, show_progress: bool = True,
           inputs: Sequence[str | Path | None] = ()) -> QCResult:
    """Full QC of one maps folder: compute, then write roi_stats.tsv, figures and report.

    ``model``: only that model's maps (the workflow's session folders hold every model's).

    Everything is computed before anything is written, so bad input leaves no output;
    the outputs are written as one set (:func:`pipeline.outputs.output_set`), so a full
    disk leaves none either. ``label_source`` gives the label map per map grid
    (:func:`labels_from_file`, or a function placing vials from a layout);
    ``extra_sections`` (title, HTML) and ``extra_warnings`` are passed to the report
    (history, drift); ``inputs``: further files read (label map, layout) that no output
    may replace. Progress of the figures and curves goes to ``stream`` (stderr by
    default) unless ``show_progress`` is false.
    """
    from pipeline.progress import Progress
    from pipeline.outputs import (atomic_write_bytes, atomic_write_text, atomic_write_tsv,
                                  output_set, refuse_overwriting_inputs)
    from qc.reference import Reference
    from qc.tolerance import load_tolerances

    from pipeline.qcrender import render
    out = Path(out_dir)
    given = [p for p in (*inputs, reference_path,
                         config if isinstance(config, (str, Path)) else None) if p]
    refuse_overwriting_inputs(given, [out / "roi_stats.tsv", out / "report.html"],
                              "`relaxline qc`")
    maps = discover_maps(maps_dir, model)
    reference = Reference.load(reference_path) if reference_path is not None else None
    tol = load_tolerances(config)
    result = compute(maps, label_source, reference, tol, temperature, session, erode_mm,
                     temperature_source)
    page, files = render(result, reference, tol, figures, erode_mm, Path(maps_dir),
                         labels_desc, str(reference_path) if reference_path else
                         "none (scan session: statistics only" + (
                             ", regions with a configured range judged against it)"
                             if tol.ranges else ")"), extra_sections, extra_warnings,
                         progress=lambda total: Progress(
                             total, f"qc {model or Path(maps_dir).name}", stream=stream,
                             enabled=show_progress))
    with output_set(out, protect=given + [m.path for m in maps]):
        atomic_write_tsv(out / "roi_stats.tsv", result.table)
        for name, png in files.items():
            atomic_write_bytes(out / "figures" / name, png)
        atomic_write_text(out / "report.html", page)
    return result
