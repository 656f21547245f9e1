"""Automatic vial localisation from a phantom layout (design §7).

The phantom sits a few millimetres and degrees differently in every session, so the
vials are found from the layout (vial centres and radii in the phantom's own frame,
see :mod:`qc.layout`) instead of a hand-drawn label map.

Method
------
1. **Find the phantom** in the first image: Otsu threshold (Otsu 1979, IEEE Trans Syst
   Man Cybern 9:62), an in-plane 3×3 opening to remove noise specks, the largest
   6-connected component, holes filled slice by slice. Its centroid is the first guess
   of the phantom centre. An object too small to hold the layout (noise only, phantom
   out of the field of view) is an error.
2. **Vial-contrast image** per input image and slice: ``log`` intensity (so a smooth
   multiplicative B1 shading becomes additive), lightly smoothed inside the phantom, minus
   a robust quadratic fill trend (iteratively reweighted least squares with Tukey's
   bisquare weights; Holland & Welsch 1977, Commun Stat Theory Methods 6:813);
   ``F = tanh(|residual| / s)`` with ``s`` four times the noise level (from
   neighbour differences, common practice) but at least 3 % contrast, so every vial that
   stands out from the fill counts about equally however strong its contrast. Several
   images (e.g. an M0-like image and a T1 map) are combined by the voxelwise maximum:
   a vial iso-intense with the fill in one image may stand out in another.
3. **Match the whole layout**: a template of blurred discs (one per vial) is rotated over
   [−180°, 180°) in steps of about 2°, with and without a mirror flip; for each angle the
   best in-plane shift within ``search_mm`` of the centroid comes from one FFT
   cross-correlation. The best pose and the best *distinct* pose (one that puts some vial
   more than its own radius away) are refined by Nelder–Mead on the normalised
   correlation (Pearson r between the contrast image and the template over the phantom).
   Matching the whole pattern tolerates vials that do not stand out in a given image.
4. **Accept or reject**: ``score`` (the refined correlation) must reach ``min_score``.
   ``ambiguity`` compares the runner-up with the winner where they differ: each vial's
   evidence is the mean of ``F`` over its disc minus over its ring; over the vial
   positions of the winner not shared by the runner-up (and vice versa) the runner-up's
   mean evidence divided by the winner's must stay below ``max_ambiguity``. A layout
   that a rotation or flip maps onto itself has no differing positions: ambiguity 1.
   Failing either is :class:`PoorMatchError` (a QC failure, never a silent misplacement).
5. **Regions**: a disc of radius ``radius_mm − margin_mm`` around each placed centre (a
   voxel belongs to it when its centre lies inside), on every phantom slice (slices where
   the phantom covers at least half its largest cross-section) or, for rows with
   ``z_mm``, on the slice nearest that plane (none if the plane is not imaged).

Geometry: in-plane millimetres are ``u = i·dx, v = j·dy`` with ``dx, dy`` the lengths of
the affine's first two columns (orthogonal in-plane axes assumed, as in scanner images);
the third array axis is the slice axis. A layout point ``p`` maps to
``centre + R(angle) · M · p`` with ``M = diag(1, −1)`` when mirrored. Because rotation
and mirror are searched, the orientation convention of the scan does not matter.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd
from scipy import ndimage, optimize

from fitting.errors import RelaxlineError
from qc.figures import to_png
from qc.layout import check_layout

MIN_SCORE = 0.35        # refined Pearson r below this: no convincing vial pattern
MAX_AMBIGUITY = 0.7     # runner-up evidence / best evidence above this: identities unclear
GAP = 2.5                # gap between a vial and its template ring, in blur widths
MIN_CONTRAST = 0.03     # log-contrast that counts as fully visible even in noiseless data


class LocalisationError(RelaxlineError):
    """Vials could not be localised."""


class PhantomNotFoundError(LocalisationError):
    """No phantom that could hold the layout is in the image (bad input: exit 2)."""


class PoorMatchError(LocalisationError):
    """The best placement does not match the layout well enough (a QC failure).

    ``placement`` holds the rejected placement so a person can look at its overlay.
    """

    def __init__(self, message: str, placement: "Placement | None" = None):
        super().__init__(message)
        self.placement = placement


@dataclass
class Placement:
    """Where the layout was placed on an image grid.

    Attributes
    ----------
    labels : int16 array on the image grid (0 = background, else the vial's label).
    vials : one row per layout vial: ``label``, ``centre_i``, ``centre_j`` (voxel
        coordinates of the placed centre), ``centre_x_mm``/``_y_mm``/``_z_mm`` (world,
        at the phantom's centre slice), ``radius_mm``, ``region_radius_mm``,
        ``n_voxels``, ``n_slices``, ``contrast`` (mean vial-contrast inside minus in a
        ring just outside: evidence the vial is visible, 0..1), plus layout extras.
    angle_deg, mirrored : rotation (counter-clockwise in the (i, j) plane) and flip.
    centre_ij : phantom centre in voxel coordinates (i, j); ``centre_k`` its slice.
    centre_world_mm : phantom centre in world (scanner) millimetres via the affine.
    shift_mm : placed centre minus the phantom's centroid (mm, in-plane).
    score : normalised correlation of the contrast image with the layout template.
    ambiguity : vial evidence of the runner-up placement divided by that of this one,
        both over the vial positions where the two differ (0 = clear, 1 = a toss-up).
    """

    labels: np.ndarray
    vials: pd.DataFrame
    angle_deg: float
    mirrored: bool
    centre_ij: tuple[float, float]
    centre_k: float
    centre_world_mm: tuple[float, float, float]
    shift_mm: tuple[float, float]
    score: float
    ambiguity: float
    margin_mm: float
    overlay_slice: int = 0
    voxel_mm: tuple[float, float, float] = (1.0, 1.0, 1.0)

    def summary(self) -> str:
        return (f"rotation {self.angle_deg:+.1f} deg{', mirrored' if self.mirrored else ''}, "
                f"centre at voxel ({self.centre_ij[0]:.1f}, {self.centre_ij[1]:.1f}), "
                f"match score {self.score:.2f} (minimum {MIN_SCORE}), "
                f"ambiguity {self.ambiguity:.2f} (maximum {MAX_AMBIGUITY})")


# ----------------------------------------------------------------------------- helpers

def _spacing(affine: np.ndarray) -> tuple[float, float, float]:
    a = np.asarray(affine, float)
    if a.shape != (4, 4) or not np.all(np.isfinite(a)):
        raise LocalisationError("the image affine must be a finite 4x4 matrix.")
    d = np.linalg.norm(a[:3, :3], axis=0)
    if np.any(d <= 0):
        raise LocalisationError("the image affine has a zero voxel size; check the NIfTI header.")
    return float(d[0]), float(d[1]), float(d[2])


def _as_stack(images) -> list[np.ndarray]:
    if isinstance(images, np.ndarray):
        images = [images]
    out = []
    for im in images:
        a = np.asarray(im, dtype=np.float64)
        while a.ndim > 3 and a.shape[-1] == 1:
            a = a[..., 0]
        if a.ndim == 2:
            a = a[..., None]
        if a.ndim != 3:
            raise LocalisationError(f"localisation needs 2D or 3D images, got shape {a.shape}.")
        out.append(np.where(np.isfinite(a), a, 0.0))
    if not out:
        raise LocalisationError("no image given to localise the vials on.")
    if any(a.shape != out[0].shape for a in out):
        raise LocalisationError("the images used for localisation are not on one grid: "
                                f"shapes {[a.shape for a in out]}.")
    return out


def _otsu(values: np.ndarray, bins: int = 256) -> float:
    """Otsu's threshold: maximise the between-class variance (Otsu 1979)."""
    lo, hi = np.percentile(values, [0.0, 99.9])
    hist, edges = np.histogram(np.clip(values, lo, hi), bins=bins, range=(lo, hi))
    mids = 0.5 * (edges[1:] + edges[:-1])
    w0 = np.cumsum(hist)
    w1 = w0[-1] - w0
    m0 = np.cumsum(hist * mids)
    mu0 = m0 / np.maximum(w0, 1)
    mu1 = (m0[-1] - m0) / np.maximum(w1, 1)
    between = (w0 * w1 * (mu0 - mu1) ** 2)[:-1]
    # a gap between the modes gives a plateau of equal maxima: take its middle
    top = np.flatnonzero(between >= between.max() * (1 - 1e-12))
    return float(0.5 * (edges[top[0] + 1] + edges[top[-1] + 1]))


def _rot(angle_deg: float, mirrored: bool) -> np.ndarray:
    t = np.deg2rad(angle_deg)
    r = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    return r @ np.diag([1.0, -1.0]) if mirrored else r


def _place(p_mm: np.ndarray, angle_deg: float, mirrored: bool, centre: np.ndarray) -> np.ndarray:
    """Layout points (n, 2) in the phantom frame -> in-plane image mm (n, 2)."""
    return centre + p_mm @ _rot(angle_deg, mirrored).T


# ----------------------------------------------------------------------- the phantom

def find_phantom(image: np.ndarray, spacing: tuple[float, float, float],
                 footprint_mm: float) -> np.ndarray:
    """Boolean mask of the phantom (largest bright object, holes filled per slice).

    Raises :class:`PhantomNotFoundError` when no object is large enough to hold a disc of
    radius ``footprint_mm`` (the layout's extent).
    """
    dx, dy, _ = spacing
    vals = image[np.isfinite(image)]
    if vals.size == 0 or np.ptp(vals) <= 0:
        raise PhantomNotFoundError("the image is constant (no phantom in it); check that the "
                                   "right image was given.")
    fg = image > _otsu(vals)
    fg = ndimage.binary_opening(fg, structure=np.ones((3, 3, 1), bool))
    lab, n = ndimage.label(fg)
    need = 0.7 * np.pi * footprint_mm ** 2
    if n == 0:
        biggest = 0.0
        mask = np.zeros_like(fg)
    else:
        sizes = ndimage.sum_labels(fg, lab, index=np.arange(1, n + 1))
        mask = lab == (1 + int(np.argmax(sizes)))
        for k in range(mask.shape[2]):
            mask[..., k] = ndimage.binary_fill_holes(mask[..., k])
        biggest = float(mask.sum(axis=(0, 1)).max()) * dx * dy
    if biggest < need:
        raise PhantomNotFoundError(
            f"no phantom found: the largest object in the image covers {biggest:.0f} mm^2 in "
            f"one slice, but the layout needs a phantom at least {2 * footprint_mm:.0f} mm "
            f"across (about {need:.0f} mm^2). Is the phantom inside the field of view, is "
            "this the right image (not noise only), and is this the right layout?")
    return mask


# -------------------------------------------------------------- vial-contrast image

def _robust_quadratic(u: np.ndarray, v: np.ndarray, y: np.ndarray, floor: float,
                      iters: int = 10) -> np.ndarray:
    """Quadratic fill trend fitted by IRLS with Tukey bisquare weights.

    The residual scale is re-estimated each pass from the current inliers only (never
    below ``floor``, the noise level), so the fit settles on the fill even when vials
    cover nearly half of the slice and would inflate an all-pixel scale estimate.
    """
    su, sv = max(np.ptp(u), 1e-9), max(np.ptp(v), 1e-9)
    uu, vv = (u - u.mean()) / su, (v - v.mean()) / sv
    a = np.stack([np.ones_like(uu), uu, vv, uu * uu, uu * vv, vv * vv], axis=1)
    w = np.ones_like(y)
    for _ in range(iters):
        aw = a * w[:, None]
        coef = np.linalg.solve(aw.T @ a + 1e-9 * np.eye(a.shape[1]), aw.T @ y)
        res = y - a @ coef
        scale = max(1.4826 * np.median(np.abs(res[w > 0.5])), floor)
        z = res / (4.685 * scale)   # the usual bisquare tuning constant
        w_new = np.where(np.abs(z) < 1, (1 - z * z) ** 2, 0.0)
        if (w_new > 0.5).sum() < a.shape[1] * 5:
            break
        w = w_new
    return a @ coef


def _contrast_slice(img: np.ndarray, mask: np.ndarray, inner: np.ndarray, sigma_px: tuple,
                    ) -> np.ndarray:
    """Vial-contrast F in [0, 1) on one slice (0 outside ``inner``)."""
    out = np.zeros(img.shape)
    if inner.sum() < 20:
        return out
    inside = img[mask]
    pos = inside > 0
    if pos.mean() > 0.95:
        floor = 1e-3 * np.median(inside[pos])
        y = np.log(np.maximum(img, floor))
    else:   # signed data (e.g. a map with negative values): relative linear contrast
        y = img / (np.median(np.abs(inside)) + 1e-12)
    # neighbour differences give the noise level of the unsmoothed slice
    d = np.diff(y, axis=0)[mask[1:] & mask[:-1]]
    noise = 1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(2) if d.size else 0.0
    noise *= 1.0 / np.sqrt(4 * np.pi * sigma_px[0] * sigma_px[1])  # after Gaussian smoothing
    m = mask.astype(float)
    num = ndimage.gaussian_filter(y * m, sigma_px, mode="constant")
    den = ndimage.gaussian_filter(m, sigma_px, mode="constant")
    ys = np.where(den > 1e-6, num / np.maximum(den, 1e-6), 0.0)
    ii, jj = np.nonzero(inner)
    trend = _robust_quadratic(ii.astype(float), jj.astype(float), ys[inner], noise)
    scale = max(4.0 * noise, MIN_CONTRAST)
    out[inner] = np.tanh(np.abs(ys[inner] - trend) / scale)
    return out


# ------------------------------------------------------------------- the template

def _ramp(x: np.ndarray, sigma: float) -> np.ndarray:
    """Smooth step from 0 to 1 around x = 0: a linear ramp with the slope of Φ(x/σ) at 0."""
    return np.clip(x / (sigma * np.sqrt(2 * np.pi)) + 0.5, 0.0, 1.0)


def _profile(r: float | np.ndarray, d: np.ndarray, sigma: float) -> np.ndarray:
    """One vial of the template: its disc minus an equal-area ring around it.

    The ring makes each vial's template sum to zero, so the match rewards a vial that
    stands out from its *surroundings* (a smooth shading residual scores nothing) and
    penalises a placement half a radius off, which keeps distinct placements apart. The
    ring starts ``GAP`` blur widths outside the vial so the blurred edge is not counted.
    """
    r_in = r + GAP * sigma
    r_out = np.sqrt(r_in ** 2 + r ** 2)
    return _ramp(r - d, sigma) - (_ramp(r_out - d, sigma) - _ramp(r_in - d, sigma))


def _render(shape: tuple[int, int], spacing2: tuple[float, float], centres: np.ndarray,
            radii: np.ndarray, sigma_mm: float) -> np.ndarray:
    """Sum of blurred discs Φ((r − d)/σ) on a 2D grid (each within its bounding box)."""
    dx, dy = spacing2
    t = np.zeros(shape)
    for (cu, cv), r in zip(centres, radii):
        ext = np.sqrt((r + GAP * sigma_mm) ** 2 + r ** 2) + 2 * sigma_mm
        i0, i1 = max(int(np.floor((cu - ext) / dx)), 0), min(int(np.ceil((cu + ext) / dx)) + 1, shape[0])
        j0, j1 = max(int(np.floor((cv - ext) / dy)), 0), min(int(np.ceil((cv + ext) / dy)) + 1, shape[1])
        if i0 >= i1 or j0 >= j1:
            continue
        du = np.arange(i0, i1)[:, None] * dx - cu
        dv = np.arange(j0, j1)[None, :] * dy - cv
        t[i0:i1, j0:j1] += _profile(r, np.hypot(du, dv), sigma_mm)
    return t


@dataclass
class _Group:
    rows: np.ndarray        # indices into the layout
    slices: list[int]
    feature: np.ndarray     # 2D, zero-mean inside mask, 0 outside
    mask: np.ndarray        # 2D bool
    fvals: np.ndarray       # (N,) feature at mask pixels (zero-mean)
    raw: np.ndarray         # (N,) feature at mask pixels before centring


def _ncc(groups: list[_Group], spacing2: tuple[float, float], p_mm: np.ndarray,
         radii: np.ndarray, angle: float, mirrored: bool, centre: np.ndarray,
         sigma_t: float) -> float:
    """Pearson correlation of feature and template over the phantom, all groups pooled."""
    num = ff = tt = 0.0
    for g in groups:
        t = _render(g.mask.shape, spacing2, _place(p_mm[g.rows], angle, mirrored, centre),
                    radii[g.rows], sigma_t)
        # feature is zero outside the mask and sums to zero inside, so
        # sum_mask F (T - mean T) = sum F T and sum_mask (T - mean T)^2 = S2 - S1^2 / N
        tm = t * g.mask
        w = len(g.slices)
        num += w * float(np.vdot(g.feature, t))
        ff += w * float(g.fvals @ g.fvals)
        tt += w * float(np.vdot(tm, t) - tm.sum() ** 2 / len(g.fvals))
    return num / np.sqrt(ff * tt) if ff > 0 and tt > 0 else 0.0


# --------------------------------------------------------------------- public API

def localise(images: np.ndarray | Sequence[np.ndarray], affine: np.ndarray,
             layout: pd.DataFrame, margin_mm: float = 1.0, *, allow_mirror: bool = True,
             search_mm: float = 12.0, min_score: float = MIN_SCORE,
             max_ambiguity: float = MAX_AMBIGUITY) -> Placement:
    """Place the layout's vials on an image grid.

    Parameters
    ----------
    images : one 2D/3D image or several on the same grid. The first finds the phantom
        (an M0 or proton-density-like image, or the series mean); all contribute vial
        contrast (e.g. add a T1 map).
    affine : the images' 4x4 voxel-to-world affine (for millimetres).
    layout : table as returned by :func:`qc.layout.read_layout`.
    margin_mm : each region is the vial disc eroded by this margin (partial volume, wall).
    allow_mirror : also consider the phantom's mirror image (flip); turn off for a layout
        that is mirror-symmetric but whose labels are not.
    search_mm : how far the phantom centre may lie from the bright object's centroid.

    Returns
    -------
    Placement (label map on the grid of ``images``, pose, score).

    Raises
    ------
    PhantomNotFoundError : no object that could hold the layout (exit 2 in the CLI).
    PoorMatchError : a placement was found but is not convincing (a QC failure).
    LocalisationError : bad arguments (e.g. margin larger than a vial).
    """
    stack = _as_stack(images)
    lay = check_layout(layout)
    dx, dy, dz = _spacing(affine)
    shape = stack[0].shape
    p_mm = lay[["x_mm", "y_mm"]].to_numpy(float)
    radii = lay["radius_mm"].to_numpy(float)
    labels_arr = lay["label"].to_numpy(int)
    if not np.isfinite(margin_mm) or margin_mm < 0:
        raise LocalisationError(f"the vial margin must be a number >= 0 mm, got {margin_mm}.")
    region_r = radii - float(margin_mm)
    if np.any(region_r < 0.5 * max(dx, dy)):
        bad = labels_arr[region_r < 0.5 * max(dx, dy)]
        raise LocalisationError(
            f"margin {margin_mm:g} mm leaves no region inside vial(s) {', '.join(map(str, bad))} "
            f"(radius {radii[region_r < 0.5 * max(dx, dy)].min():g} mm, voxels {dx:.2g} mm); "
            "use a smaller --margin-mm.")
    footprint = float(np.max(np.hypot(p_mm[:, 0], p_mm[:, 1]) + radii))

    mask3 = find_phantom(stack[0], (dx, dy, dz), footprint)
    area = mask3.sum(axis=(0, 1))
    phantom_slices = [k for k in range(shape[2]) if area[k] >= 0.5 * area.max()]
    kk = np.arange(shape[2])
    centre_k = float((area * kk).sum() / area.sum())

    # which rows live on which slice
    z = lay["z_mm"].to_numpy(float)
    rows_on: dict[int, list[int]] = {k: [] for k in phantom_slices}
    for n in range(len(lay)):
        if np.isnan(z[n]):
            for k in phantom_slices:
                rows_on[k].append(n)
        else:
            k = int(np.round(centre_k + z[n] / dz))
            if k in rows_on and abs((k - centre_k) * dz - z[n]) <= dz:
                rows_on[k].append(n)
    by_rows: dict[tuple, list[int]] = {}
    for k, rows in rows_on.items():
        if rows:
            by_rows.setdefault(tuple(rows), []).append(k)
    if not by_rows:
        raise PhantomNotFoundError("none of the layout's vial planes (z_mm) lies inside the "
                                   "imaged slices; check the layout's z_mm and the slice coverage.")

    # vial-contrast images, averaged over the slices of each group
    sigma_mm = max(dx, dy)            # light smoothing: one (largest) voxel
    sigma_px = (sigma_mm / dx, sigma_mm / dy)
    sigma_t = float(np.hypot(sigma_mm, max(dx, dy) / np.sqrt(12)))
    erode = int(np.ceil(2 * max(sigma_px) + 1))
    ii, jj = np.meshgrid(np.arange(shape[0]) * dx, np.arange(shape[1]) * dy, indexing="ij")
    groups: list[_Group] = []
    for rows, slices in by_rows.items():
        feat = np.zeros(shape[:2])
        gmask = np.ones(shape[:2], bool)
        for k in slices:
            m = mask3[..., k]
            inner = ndimage.binary_erosion(m, iterations=erode)
            gmask &= inner
            f = np.zeros(shape[:2])
            for im in stack:
                f = np.maximum(f, _contrast_slice(im[..., k], m, inner, sigma_px))
            feat += f / len(slices)
        if gmask.sum() < 20:
            continue
        raw = feat[gmask]
        fv = raw - raw.mean()
        feat = np.zeros(shape[:2])
        feat[gmask] = fv
        groups.append(_Group(np.array(rows), slices, feat, gmask, fv, raw))
    if not groups:
        raise PhantomNotFoundError("the phantom is too small in the image to look for vials.")
    # an object with no contrast structure at all is not the phantom (e.g. a plain bottle)
    seen = max(float((g.raw > 0.5).sum()) * dx * dy / float(np.sum(np.pi * radii[g.rows] ** 2))
               for g in groups)
    if seen < 0.15:
        raise PhantomNotFoundError(
            "no vials found: the object in the image shows no structure that stands out from "
            "its fill. Is this the phantom described by the layout, and an image where its "
            "vials are visible (M0/proton-density-like, or the series mean)?")

    m2 = mask3[..., phantom_slices].any(axis=2)
    centroid = np.array([ii[m2].mean(), jj[m2].mean()])

    # ---- coarse search: angle x mirror, FFT over in-plane shifts
    rho = float(np.max(np.hypot(p_mm[:, 0], p_mm[:, 1])))
    step = float(np.clip(np.rad2deg(0.4 * radii.min() / max(rho, 1e-6)), 0.5, 3.0))
    angles = np.arange(-180.0, 180.0, step)
    wi, wj = int(np.ceil(search_mm / dx)), int(np.ceil(search_mm / dy))
    fshape = (_fast_len(shape[0] + wi + 1), _fast_len(shape[1] + wj + 1))
    fft_f = [np.fft.rfft2(g.feature, fshape) for g in groups]
    ff = sum(len(g.slices) * float(g.fvals @ g.fvals) for g in groups)
    si = np.r_[0:wi + 1, -wi:0]
    sj = np.r_[0:wj + 1, -wj:0]
    disc = (si[:, None] * dx) ** 2 + (sj[None, :] * dy) ** 2 <= search_mm ** 2
    coarse = []   # (score, angle, mirrored, centre)
    for mirrored in ((False, True) if allow_mirror else (False,)):
        for ang in angles:
            corr = 0.0
            tt = 0.0
            for g, F in zip(groups, fft_f):
                t = _render(shape[:2], (dx, dy), _place(p_mm[g.rows], ang, mirrored, centroid),
                            radii[g.rows], sigma_t)
                tm = t[g.mask]
                tt += len(g.slices) * float(((tm - tm.mean()) ** 2).sum())
                c = np.fft.irfft2(F * np.conj(np.fft.rfft2(t, fshape)), fshape)
                corr = corr + len(g.slices) * c[np.ix_(si % fshape[0], sj % fshape[1])]
            corr = np.where(disc, corr, -np.inf)
            a, b = np.unravel_index(int(np.argmax(corr)), corr.shape)
            score = float(corr[a, b]) / np.sqrt(ff * tt) if tt > 0 and ff > 0 else 0.0
            coarse.append((score, float(ang), mirrored,
                           centroid + np.array([si[a] * dx, sj[b] * dy])))
    coarse.sort(key=lambda c: -c[0])
    best = coarse[0]

    def distinct(a, b) -> bool:   # some vial placed more than its radius apart
        d = _place(p_mm, a[1], a[2], a[3]) - _place(p_mm, b[1], b[2], b[3])
        return bool(np.any(np.hypot(d[:, 0], d[:, 1]) > radii))

    def refine(cand):
        _, ang0, mir, c0 = cand

        def cost(x):
            return -_ncc(groups, (dx, dy), p_mm, radii, x[0], mir, np.array(x[1:]), sigma_t)
        x0 = np.array([ang0, *c0])
        simplex = np.array([x0, x0 + [step / 2, 0, 0], x0 + [0, dx, 0], x0 + [0, 0, dy]])
        res = optimize.minimize(cost, x0, method="Nelder-Mead",
                                options={"initial_simplex": simplex, "xatol": 0.01,
                                         "fatol": 1e-5, "maxiter": 400})
        return -float(res.fun), float(res.x[0]), mir, np.array(res.x[1:])

    top = refine(best)
    score, angle, mirrored, centre = top
    # runner-up: the best distinct coarse candidates, refined; one that climbs back into
    # the winning pose is the same placement, not a rival
    rival, rival_score, tried = None, 0.0, 0
    for cand in coarse[1:]:
        if tried == 3:
            break
        if not distinct(cand, best) or (rival is not None and not distinct(cand, rival)):
            continue
        tried += 1
        ref = refine(cand)
        if distinct(ref, top) and ref[0] > rival_score:
            rival, rival_score = ref, ref[0]
    angle = float((angle + 180.0) % 360.0 - 180.0)

    def evidence(pts: np.ndarray) -> np.ndarray:
        """Per-vial contrast (disc mean minus ring mean of F) at placed centres."""
        out = np.full(len(pts), np.nan)
        for n, (cu, cv) in enumerate(pts):
            g = next((g for g in groups if n in g.rows), None)
            if g is None:
                continue
            dist = np.hypot(ii - cu, jj - cv)
            r_in = radii[n] + GAP * sigma_t
            disc = (dist <= max(radii[n] - GAP * sigma_t / 2, radii[n] / 2)) & g.mask
            ring = (dist > r_in) & (dist <= np.sqrt(r_in ** 2 + radii[n] ** 2)) & g.mask
            if disc.any() and ring.any():
                out[n] = float(g.feature[disc].mean() - g.feature[ring].mean())
        return out

    # ambiguity: compare the vial evidence only where the two placements differ (vial
    # positions of one not shared by the other); shared positions say nothing
    pts = _place(p_mm, angle, mirrored, centre)
    ev = evidence(pts)
    ambiguity = 0.0
    if rival is not None:
        rpts = _place(p_mm, rival[1], rival[2], rival[3])
        gap = np.hypot(pts[:, None, 0] - rpts[None, :, 0], pts[:, None, 1] - rpts[None, :, 1])
        own = gap.min(axis=1) >= 0.5 * radii
        theirs = gap.min(axis=0) >= 0.5 * radii
        e_best = float(np.nanmean(ev[own])) if own.any() else 0.0
        e_rival = float(np.nanmean(evidence(rpts)[theirs])) if theirs.any() else e_best
        ambiguity = float(np.clip(max(e_rival, 0.0) / e_best, 0, 9.99)) if e_best > 0 else 1.0

    # ---- regions
    labels = np.zeros(shape, np.int16)
    n_vox = np.zeros(len(lay), int)
    n_sl = np.zeros(len(lay), int)
    inside_frac = np.ones(len(lay))
    outside_fov = []
    for n in range(len(lay)):
        cu, cv = pts[n]
        if (cu - radii[n] < -0.5 * dx or cv - radii[n] < -0.5 * dy
                or cu + radii[n] > (shape[0] - 0.5) * dx or cv + radii[n] > (shape[1] - 0.5) * dy):
            outside_fov.append(int(labels_arr[n]))
        dist = np.hypot(ii - cu, jj - cv)
        disc_n, full_n = dist <= region_r[n], dist <= radii[n]
        slices = [k for k, rows in rows_on.items() if n in rows]
        fr = []
        for k in slices:
            fr.append(float(mask3[..., k][full_n].mean()) if full_n.any() else 0.0)
            labels[..., k][disc_n] = labels_arr[n]
        if fr:
            inside_frac[n] = float(np.mean(fr))
        n_vox[n] = int(disc_n.sum()) * len(slices)
        n_sl[n] = len(slices)

    world = np.asarray(affine, float) @ np.array([centre[0] / dx, centre[1] / dy, centre_k, 1.0])
    vials = lay.copy()
    vials["centre_i"] = pts[:, 0] / dx
    vials["centre_j"] = pts[:, 1] / dy
    wv = (np.asarray(affine, float) @ np.stack([pts[:, 0] / dx, pts[:, 1] / dy,
                                                 np.full(len(pts), centre_k),
                                                 np.ones(len(pts))]))[:3]
    vials["centre_x_mm"], vials["centre_y_mm"], vials["centre_z_mm"] = wv
    vials["region_radius_mm"] = region_r
    vials["n_voxels"] = n_vox
    vials["n_slices"] = n_sl
    vials["contrast"] = ev
    overlay_k = int(min(phantom_slices, key=lambda k: abs(k - centre_k)))
    placement = Placement(labels=labels, vials=vials, angle_deg=angle, mirrored=bool(mirrored),
                          centre_ij=(float(centre[0] / dx), float(centre[1] / dy)),
                          centre_k=centre_k, centre_world_mm=tuple(float(w) for w in world[:3]),
                          shift_mm=(float(centre[0] - centroid[0]), float(centre[1] - centroid[1])),
                          score=float(score), ambiguity=float(ambiguity),
                          margin_mm=float(margin_mm), overlay_slice=overlay_k,
                          voxel_mm=(dx, dy, dz))

    if outside_fov:
        raise PhantomNotFoundError(
            f"the phantom is not fully inside the field of view: vial(s) "
            f"{', '.join(map(str, outside_fov))} would lie (partly) outside the image "
            f"({placement.summary()}). Reposition the phantom or enlarge the field of view.")
    if score < min_score:
        raise PoorMatchError(
            f"vial localisation failed: the image does not show the layout's vial pattern "
            f"convincingly ({placement.summary()}). Check that the layout belongs to this "
            "phantom and look at the overlay; or give a label map instead.", placement)
    if ambiguity > max_ambiguity:
        hint = (" The layout looks symmetric under a mirror flip; if the phantom cannot be "
                "mirrored in practice, disable mirror search." if rival is not None and rival[2] != mirrored
                else " The layout may be (nearly) symmetric under rotation; vial identities "
                "need an asymmetric feature in the layout.")
        raise PoorMatchError(
            f"vial localisation is ambiguous: a different placement matches almost as well "
            f"({placement.summary()}).{hint}", placement)
    poor = [int(labels_arr[n]) for n in range(len(lay)) if inside_frac[n] < 0.9]
    if poor:
        raise PoorMatchError(
            f"vial localisation failed: vial(s) {', '.join(map(str, poor))} would lie outside "
            f"the phantom ({placement.summary()}). Check the layout against this phantom.",
            placement)
    return placement


def _fast_len(n: int) -> int:
    from scipy.fft import next_fast_len
    return int(next_fast_len(int(n), real=True))


def overlay_png(image: np.ndarray, placement: Placement, title: str | None = None,
                dpi: int = 100) -> bytes:
    """PNG of the image slice through the phantom centre with each region outlined.

    Drawn from ``placement.labels`` (the regions actually used), each labelled with its
    vial label; the title states the pose and match score.
    """
    from matplotlib.figure import Figure
    from matplotlib.patches import Ellipse

    img = _as_stack(image)[0]
    k = placement.overlay_slice
    sl = img[..., k]
    lab = placement.labels[..., k]
    fig = Figure(figsize=(6, 6.4), dpi=dpi)
    ax = fig.add_subplot(1, 1, 1)
    vmax = np.percentile(sl, 99.5) if np.any(sl > 0) else 1.0
    ax.imshow(sl.T, origin="lower", cmap="gray", vmin=0, vmax=vmax, interpolation="nearest")
    dx, dy, _ = placement.voxel_mm
    for _, v in placement.vials.iterrows():
        if v["n_voxels"] == 0 or not np.any(lab == v["label"]):
            continue
        # the whole vial (dashed) around the region actually used (solid)
        ax.add_patch(Ellipse((v["centre_i"], v["centre_j"]), 2 * v["radius_mm"] / dx,
                             2 * v["radius_mm"] / dy, fill=False, ls="--", lw=0.8,
                             ec="#ff9900"))
        ax.contour((lab == v["label"]).T.astype(float), levels=[0.5], colors=["#ffcc00"],
                   linewidths=1.2)
        ax.text(v["centre_i"], v["centre_j"], str(int(v["label"])), color="#00e5ff",
                ha="center", va="center", fontsize=9, fontweight="bold")
    ax.plot([placement.centre_ij[0]], [placement.centre_ij[1]], "+", color="#ff4040", ms=10)
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_title(title or f"vial regions, slice {k} (margin {placement.margin_mm:g} mm)",
                 fontsize=10)
    ax.set_xlabel(f"rotation {placement.angle_deg:+.1f}°"
                  f"{', mirrored' if placement.mirrored else ''}; score {placement.score:.2f}, "
                  f"ambiguity {placement.ambiguity:.2f}", fontsize=9)
    fig.tight_layout()
    return to_png(fig, dpi=dpi)
