"""Glue for automatic vial localisation in `relaxline qc --layout` (design §7).

Reads the layout and the maps folder's images, calls :func:`qc.localise.localise` once per
voxel grid, and hands the placed label map to :func:`pipeline.qcjob.run_qc` as its label
source. The label map used (``<name>_desc-vials_dseg.nii.gz``) and an overlay PNG
(``vials_overlay.png``) are written atomically after the QC has been computed, or — for a
poor match, which is a QC failure — the rejected placement's overlay alone, so a person
can see what went wrong.
"""
from __future__ import annotations

import base64
import html
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from pipeline.errors import InputError
from pipeline.qcjob import MapFile, LabelSource, discover_maps, session_of
from pipeline.qcrender import open_source_series

# Images that show vial contrast: the proton-density-like M0 map first (it finds the
# phantom), then relaxation maps whose contrast complements it.
_CONTRAST_MAPS = ("T1map", "T2map", "T2starmap")


@dataclass
class GridPlacement:
    """The placement on one voxel grid of a maps folder."""

    name: str               # <session-or-stem>, the label map's file-name prefix
    key: str                # grid key (shape and affine)
    affine: np.ndarray
    image: np.ndarray       # the image the phantom was found on (for the overlay)
    placement: object       # qc.localise.Placement
    used: str               # which images were used, for the report

    @property
    def labels_file(self) -> str:
        return f"{self.name}_desc-vials_dseg.nii.gz"

    def overlay(self, title: str | None = None) -> bytes:
        from qc.localise import overlay_png
        if title is not None:
            return overlay_png(self.image, self.placement, title=title)
        if getattr(self, "_png", None) is None:
            self._png = overlay_png(self.image, self.placement)
        return self._png


def _grid_key(mf: MapFile) -> str:
    return f"{mf.shape}|{mf.affine.round(4).tolist()}"


def _name(stems: list[str], session: str | None) -> str:
    ses = session or (session_of(stems[0]) if len({session_of(s) for s in stems}) == 1 else "")
    if ses:
        return ses if ses.startswith("ses-") else f"ses-{ses}"
    return stems[0]


def localisation_images(group: list[MapFile]) -> tuple[list[np.ndarray], list[str]]:
    """Images for localisation on one grid: M0 maps (or a source-series mean), then maps."""
    first = [mf for mf in group if mf.suffix == "M0map"]
    images = [mf.data() for mf in first]
    used = [mf.path.name for mf in first]
    if not images:
        for mf in group:
            series, _ = open_source_series(mf)
            if series is not None:
                images.append(series.read().mean(axis=-1))
                used.append(f"mean of the {mf.stem} series")
                break
    if not images:
        raise InputError(
            f"{group[0].path.parent}: --layout needs a proton-density-like image to find the "
            "phantom: an M0map in the maps folder, or a map whose sidecar names its source "
            "series. Give a label map with --labels instead.")
    for mf in group:
        if mf.suffix in _CONTRAST_MAPS:
            images.append(mf.data())
            used.append(mf.path.name)
    return images, used


def contrast_maps(group: list[MapFile], reference) -> list[tuple[np.ndarray, dict[int, float]]]:
    """(map, {label: reference value}) for each relaxation map of a grid that the reference
    table gives values for: what decides vial identity on a symmetric layout."""
    from qc.reference import MAP_QUANTITY
    out = []
    for mf in group:
        q = MAP_QUANTITY.get(mf.suffix)
        if reference is None or q is None or not reference.has(q):
            continue
        ref = reference.at_temperature(q, None)
        vals = {int(r.label): float(r.reference) for r in ref.itertuples()
                if np.isfinite(float(r.reference))}
        if vals:
            out.append((mf.data(), vals))
    return out


def place_vials(maps_dir: str | Path, layout_path: str | Path, margin_mm: float,
                session: str | None = None, reference_path: str | Path | None = None,
                mirror: bool = True, model: str | None = None
                ) -> list[GridPlacement]:
    """Localise the layout's vials on every voxel grid found in ``maps_dir``.

    With a reference table, the relaxation maps' vial values decide between placements
    the geometry cannot tell apart (a symmetric layout); ``mirror=False`` searches
    unflipped placements only.

    Raises :class:`qc.localise.PhantomNotFoundError` (bad input) or
    :class:`qc.localise.PoorMatchError` (a QC failure; ``.placement`` holds what was found).
    """
    from qc.layout import read_layout
    from qc.localise import LocalisationError, PoorMatchError, localise
    from qc.reference import Reference

    layout = read_layout(layout_path)
    reference = Reference.load(reference_path) if reference_path is not None else None
    grids: dict[str, list[MapFile]] = {}
    for mf in discover_maps(maps_dir, model):
        grids.setdefault(_grid_key(mf), []).append(mf)
    out = []
    for key, group in grids.items():
        images, used = localisation_images(group)
        name = _name(sorted({mf.stem for mf in group}), session)
        if any(g.name == name for g in out):
            name = f"{name}_grid-{len(out) + 1}"
        where = f"{group[0].path.parent} ({', '.join(used)})"
        try:
            pl = localise(images, group[0].affine, layout, margin_mm, allow_mirror=mirror,
                          contrast=contrast_maps(group, reference))
        except PoorMatchError as exc:
            err = PoorMatchError(f"{where}: {exc}", exc.placement)
            err.grid = GridPlacement(name, key, group[0].affine, images[0], exc.placement,
                                     ", ".join(used))
            raise err from None
        except LocalisationError as exc:
            raise type(exc)(f"{where}: {exc}") from None
        out.append(GridPlacement(name, key, group[0].affine, images[0], pl, ", ".join(used)))
    return out


def label_source(placements: list[GridPlacement]) -> LabelSource:
    """A :data:`pipeline.qcjob.LabelSource` returning the placed label map of a map's grid."""
    by_key = {g.key: g for g in placements}

    def source(mf: MapFile) -> np.ndarray:
        g = by_key.get(_grid_key(mf))
        if g is None:   # discover_maps found it, so this is a bug rather than bad input
            raise InputError(f"{mf.path}: no vial placement for this map's grid.")
        return g.placement.labels.astype(np.int64)

    return source


def overlay_name(g: GridPlacement, placements: list[GridPlacement]) -> str:
    return "vials_overlay.png" if g is placements[0] else f"vials_overlay_{g.name}.png"


def write_placements(out_dir: str | Path, placements: list[GridPlacement]) -> list[Path]:
    """Write each grid's label map (NIfTI, the maps' grid) and overlay PNG atomically."""
    from pipeline.outputs import atomic_write_bytes, atomic_write_nifti

    out = Path(out_dir)
    written = []
    for g in placements:
        written.append(atomic_write_nifti(out / g.labels_file, g.placement.labels, g.affine))
        written.append(atomic_write_bytes(out / overlay_name(g, placements),
                                          g.overlay()))
    return written


def write_rejected(out_dir: str | Path, grid: GridPlacement) -> Path:
    """Overlay of a rejected placement (a poor match), for a person to inspect."""
    from pipeline.outputs import atomic_write_bytes

    return atomic_write_bytes(Path(out_dir) / "vials_overlay.png",
                              grid.overlay(title="REJECTED vial placement (poor match)"))


def report_section(placements: list[GridPlacement], layout_path: str | Path) -> tuple[str, str]:
    """(title, HTML) for the QC report: pose, score and the overlay of each grid."""
    parts = []
    for g in placements:
        pl = g.placement
        png = base64.b64encode(g.overlay()).decode("ascii")
        parts.append(
            f"<p>Vials placed automatically from the layout <code>{html.escape(str(layout_path))}"
            f"</code> on {html.escape(g.used)}: {html.escape(pl.summary())}; regions are the vial "
            f"discs shrunk by {pl.margin_mm:g} mm. Label map: <code>{html.escape(g.labels_file)}"
            f"</code>. Check the overlay: a misplaced region invalidates that vial's rows.</p>"
            f"<img alt=\"vial regions\" style=\"max-width:480px\" "
            f"src=\"data:image/png;base64,{png}\">")
    return "Vial localisation", "\n".join(parts)



def run_qc_with_layout(maps_dir: str | Path, out_dir: str | Path, layout_path: str | Path,
                       margin_mm: float, session: str | None = None, mirror: bool = True,
                       **run_qc_options):
    """:func:`pipeline.qcjob.run_qc` with the vials placed from a layout (workflow and CLI).

    Writes the label map and overlay after the QC outputs. A poor placement raises
    :class:`qc.localise.PoorMatchError` — a QC failure for the caller to report (exit 1) —
    after writing the rejected placement's overlay, whose path the message names.
    ``mirror``: also try mirror-flipped placements. ``run_qc_options`` are passed on
    (reference_path, config, temperature, erode_mm, ...); the reference also decides vial
    identity on a symmetric layout.
    """
    import math

    from pipeline.outputs import output_set
    from pipeline.qcjob import run_qc
    from qc.localise import PoorMatchError

    if not math.isfinite(margin_mm) or margin_mm < 0:
        raise InputError(f"--margin-mm must be a non-negative margin in mm, got {margin_mm}.")
    try:
        grids = place_vials(maps_dir, layout_path, margin_mm, session,
                            run_qc_options.get("reference_path"), mirror,
                            run_qc_options.get("model"))
    except PoorMatchError as exc:
        grid = getattr(exc, "grid", None)
        if grid is None:
            raise
        png = write_rejected(out_dir, grid)
        raise PoorMatchError(f"{exc} The rejected placement is drawn in {png}.",
                             exc.placement) from None
    extra = list(run_qc_options.pop("extra_sections", ()))
    with output_set(out_dir, protect=[layout_path]):   # QC outputs and placements: one set
        result = run_qc(maps_dir, out_dir, label_source(grids), session=session,
                        labels_desc=f"placed from the layout {layout_path} (regions shrunk "
                                    f"by {margin_mm:g} mm)",
                        extra_sections=[report_section(grids, layout_path), *extra],
                        inputs=[layout_path], **run_qc_options)
        write_placements(out_dir, grids)
    return result
