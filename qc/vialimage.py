"""Image features for vial localisation (see :mod:`qc.localise` for the method).

The phantom mask (Otsu threshold, largest component), the vial-contrast image ``F`` per
slice (log intensity minus a robust quadratic fill trend), the blurred-disc template of a
layout and its normalised correlation with ``F``. Split from :mod:`qc.localise`, which
searches the pose and decides.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from fitting.errors import RelaxlineError

GAP = 2.5                # gap between a vial and its template ring, in blur widths
MIN_CONTRAST = 0.03     # log-contrast that counts as fully visible even in noiseless data


class LocalisationError(RelaxlineError):
    """Vials could not be localised."""


class PhantomNotFoundError(LocalisationError):
    """No phantom that could hold the layout is in the image (bad input: exit 2)."""


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
