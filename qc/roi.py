"""Per-vial (per-region) statistics of parameter maps.

Voxels whose fit did not converge (fit-status code outside ``fitting.status.USABLE``) or
whose value is not finite are left out of every statistic and counted in ``n_excluded``.
Vials may be eroded by a margin in millimetres first, to keep partial-volume voxels at
the vial wall out of the statistics.
"""
from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from fitting import status as fit_status
from fitting.errors import RelaxlineError

MAX_LABEL = 2 ** 53   # float64 holds every whole number up to here exactly
STAT_COLUMNS = ["label", "n_voxels", "n_excluded", "mean", "sd", "median", "iqr", "cv_pct"]


def label_values(labels: np.ndarray) -> list[int]:
    """Positive integer labels present in a label map (0 is background)."""
    lab = np.asarray(labels)
    if lab.size and not np.all(np.isfinite(lab)):
        raise RelaxlineError("label map holds non-finite values; labels must be integers "
                             "(0 = background, 1, 2, ... = vials or regions).")
    if lab.size and not np.all(lab == np.round(lab)):
        raise RelaxlineError("label map holds non-integer values; labels must be integers "
                             "(0 = background). Was it resampled with interpolation?")
    if lab.size and np.issubdtype(lab.dtype, np.floating) and np.abs(lab).max() > MAX_LABEL:
        raise RelaxlineError(f"label map holds the label {lab.flat[np.abs(lab).argmax()]:g}, "
                             "beyond the whole numbers a label map can hold exactly (2^53); "
                             "check that this is a label map.")
    vals = np.unique(lab.astype(np.int64))
    if np.any(vals < 0):
        raise RelaxlineError(f"label map holds negative labels {vals[vals < 0].tolist()}; "
                             "use 0 for background and positive integers for regions.")
    return [int(v) for v in vals if v > 0]


def erode_labels(labels: np.ndarray, margin_mm: float,
                 voxel_size_mm: Sequence[float] = (1.0, 1.0, 1.0)) -> np.ndarray:
    """Shrink every region by ``margin_mm``: keep voxels whose centre lies more than the
    margin from the centre of the nearest voxel outside the region.

    The distance to the region's outside is the Euclidean distance transform on the real
    voxel spacing, so anisotropic voxels erode correctly. The border of the image is not
    an edge (a vial that runs through the imaged slab is not eroded at the first and last
    slice). Regions that would vanish come
    back empty (their ``n_voxels`` becomes 0, which the caller reports).
    """
    from scipy import ndimage

    lab = np.asarray(labels).astype(np.int64)
    if margin_mm <= 0:
        return lab
    out = np.zeros_like(lab)
    sampling = [float(s) for s in voxel_size_mm][: lab.ndim]
    for v in label_values(lab):
        region = lab == v
        # the array border is not an edge: vials usually run on beyond the imaged slab
        dist = ndimage.distance_transform_edt(region, sampling=sampling)
        out[region & (dist > margin_mm)] = v
    return out


def region_stats(values: np.ndarray) -> dict[str, float]:
    """mean, sample SD (ddof=1), median, interquartile range and CV (%) of a 1D sample."""
    v = np.asarray(values, dtype=float)
    n = v.size
    if n == 0:
        return {"n_voxels": 0, "mean": np.nan, "sd": np.nan, "median": np.nan,
                "iqr": np.nan, "cv_pct": np.nan}
    mean = float(v.mean())
    sd = float(v.std(ddof=1)) if n > 1 else np.nan
    q25, q50, q75 = np.percentile(v, [25, 50, 75])
    cv = 100.0 * sd / abs(mean) if mean != 0 and np.isfinite(sd) else np.nan
    return {"n_voxels": n, "mean": mean, "sd": sd, "median": float(q50),
            "iqr": float(q75 - q25), "cv_pct": cv}


def roi_stats(values: np.ndarray, labels: np.ndarray,
              fit_status_map: np.ndarray | None = None,
              usable: Sequence[int] = fit_status.USABLE,
              only: Sequence[int] | None = None) -> pd.DataFrame:
    """Statistics of one map inside every labelled region.

    Parameters
    ----------
    values : the map (any shape, same as ``labels``).
    labels : integer label map, 0 = background.
    fit_status_map : per-voxel fit-status codes; voxels whose code is not in ``usable``
        are excluded. ``None`` keeps every finite voxel.
    only : restrict to these labels (e.g. the vials of the reference table); labels
        absent from the map give a row with ``n_voxels`` = 0.

    Returns
    -------
    DataFrame with columns :data:`STAT_COLUMNS`, one row per label.
    """
    vals = np.asarray(values)
    lab = np.asarray(labels)
    if vals.shape != lab.shape:
        raise RelaxlineError(f"map has shape {vals.shape} but the label map has {lab.shape}; "
                             "they must share the voxel grid.")
    keep = np.isfinite(vals)
    if fit_status_map is not None:
        st = np.asarray(fit_status_map)
        if st.shape != vals.shape:
            raise RelaxlineError(f"fit-status mask has shape {st.shape} but the map has "
                                 f"{vals.shape}; they must come from the same fit.")
        keep &= np.isin(st, np.asarray(usable))
    lab_i = lab.astype(np.int64)
    wanted = label_values(lab) if only is None else [int(v) for v in only]
    rows = []
    for v in wanted:
        region = lab_i == v
        row = {"label": v, **region_stats(vals[region & keep])}
        row["n_excluded"] = int(region.sum()) - row["n_voxels"]
        rows.append(row)
    return pd.DataFrame(rows, columns=STAT_COLUMNS)


def vial_medians(maps: Mapping[str, np.ndarray], labels: np.ndarray,
                 keep: np.ndarray | None = None) -> dict[int, dict[str, float]]:
    """Median of each named map inside each label (used for fitted-curve overlays)."""
    lab = np.asarray(labels).astype(np.int64)
    out: dict[int, dict[str, float]] = {}
    for v in label_values(lab):
        region = lab == v
        if keep is not None:
            region &= keep
        out[v] = {}
        for name, arr in maps.items():
            a = np.asarray(arr)[region]
            a = a[np.isfinite(a)]
            out[v][name] = float(np.median(a)) if a.size else np.nan
    return out
