"""Per-voxel T1 maps given to a fit (``--t1-map F``): loading, checks, gap filling.

A T1 map accompanies a series like a B1 map: seconds, on the series' voxel grid (no
resampling). It is delivered to every model whose configured spec lists ``"t1"`` in
``voxel_fixed`` (:mod:`fitting.spec`) as ``fixed["t1"]``, one value per fitted voxel.

Checks (each an :class:`~pipeline.errors.InputError` naming the file):

* the model uses a T1 map; the map is 3D on the series grid;
* it does not look like milliseconds (median of its positive values above
  :data:`MS_MEDIAN_S` s);
* inside the fitted region (the mask, or the voxels above the background noise) every
  value is a positive number of seconds. A *gap* — NaN, ±inf or 0, the usual "no value"
  marks of a map (an ``ir`` fit writes NaN where it failed) — is an error unless a fill
  value is given (``--t1-fixed S``: T1 = S s in those voxels; the count is reported on
  the console and in the map sidecars). A negative T1 is always an error.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from fitting.spec import ModelSpec, t1_map_models
from pipeline.errors import InputError
from pipeline.series import MS_THRESHOLD_S, Series, load_grid_map

MS_MEDIAN_S = MS_THRESHOLD_S     # a T1 map whose median exceeds this is in milliseconds


def check_t1_map_model(spec: ModelSpec, path: str | Path | None) -> None:
    """Refuse ``--t1-map`` for a model that does not use one (before configuring it)."""
    if path and spec.name not in t1_map_models():
        raise InputError(f"--t1-map {path}: the {spec.name} model does not use a T1 map "
                         f"(it applies to: {', '.join(t1_map_models()) or 'none'}); leave "
                         f"it out.")


def load_t1_map(spec: ModelSpec, series: Series, path: str | Path | None) -> np.ndarray | None:
    """The ``--t1-map`` of ``spec`` (configured) on the series grid, float32, or None."""
    if not path:
        return None
    if "t1" not in spec.voxel_fixed:
        raise ValueError(f"{spec.name}: configure the spec with option t1_map first")
    arr = load_grid_map(path, series, what="T1 map")
    pos = arr[np.isfinite(arr) & (arr > 0)]
    if pos.size == 0:
        raise InputError(f"{path}: the T1 map holds no positive finite value (all NaN, zero "
                         f"or negative); --t1-map expects T1 in seconds. Check that the right "
                         f"file is given.")
    med = float(np.median(pos))
    if med > MS_MEDIAN_S:
        raise InputError(f"{path}: T1 map median {med:g} looks like milliseconds; --t1-map "
                         f"expects seconds (BIDS). Divide the map by 1000 first.")
    return arr


def _voxel_text(coords: np.ndarray) -> str:
    return "(" + ", ".join(str(int(c)) for c in coords) + ")"


def t1_values(values: np.ndarray, coords: np.ndarray, path: str, fill: float | None
              ) -> tuple[np.ndarray, int]:
    """Per-voxel T1 for the fitted voxels: (values with gaps filled, number of gaps).

    ``values`` (N,) the map at the fitted voxels, ``coords`` (N, 3) their voxel indices
    (for the message), ``fill`` the T1 (s) used in gaps, or None (gaps are errors).
    """
    v = np.asarray(values, float)
    neg = np.isfinite(v) & (v < 0)
    if neg.any():
        i = int(np.flatnonzero(neg)[0])
        raise InputError(f"{path}: the T1 map holds negative values in {int(neg.sum())} "
                         f"fitted voxel(s), e.g. {v[i]:g} at voxel {_voxel_text(coords[i])}; "
                         f"--t1-map expects T1 in seconds > 0. Check the file.")
    gap = ~(np.isfinite(v) & (v > 0))
    n = int(gap.sum())
    if n and fill is None:
        i = int(np.flatnonzero(gap)[0])
        raise InputError(
            f"{path}: the T1 map has no value (NaN or 0) in {n} of the {v.size} voxels to be "
            f"fitted, e.g. voxel {_voxel_text(coords[i])}. Fit only where the map holds a "
            f"T1 (--mask), or give --t1-fixed S to use S seconds in those voxels.")
    return (np.where(gap, float(fill), v) if n else v), n


def gap_note(t1_arr: np.ndarray, fitted: np.ndarray, path: str, fill: float | None
             ) -> str | None:
    """Console/sidecar note on the gaps of the T1 map filled within ``fitted`` (bool grid)."""
    v = t1_arr[fitted]
    n = int((~(np.isfinite(v) & (v > 0))).sum())
    if not n or fill is None:
        return None
    return (f"T1 map {path} has no value in {n} of the {int(fitted.sum())} fitted voxels; "
            f"T1 = {float(fill):g} s (the fixed T1: --t1-fixed, or t1_fixed in the workflow) "
            f"was used there")
