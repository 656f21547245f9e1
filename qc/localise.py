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
   **Contrast decides a geometric tie**: given quantitative maps with reference values
   (``contrast``), the tied placements are ranked by the Spearman rank correlation of
   the placed vials' medians with the reference values (Spearman 1904, Am J Psychol
   15:72); the best is taken when ρ ≥ 0.8 and it beats the next by 0.3.
   Failing the score, or an unresolved tie, is :class:`PoorMatchError` (a QC failure,
   never a silent misplacement).
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

from qc.figures import to_png
from qc.layout import check_layout
from qc.vialimage import (GAP, LocalisationError, PhantomNotFoundError,  # noqa: F401
                          _as_stack, _contrast_slice, _Group, _ncc, _place, _render,
                          _spacing, find_phantom)

MIN_SCORE = 0.35        # refined Pearson r below this: no convincing vial pattern
MAX_AMBIGUITY = 0.7     # runner-up evidence / best evidence above this: identities unclear
MIN_RANK_RHO = 0.8      # contrast decides only with this rank agreement with the reference
RANK_MARGIN = 0.3       # ... and this much better than the next placement


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
    identity: str = ""      # how vial identities were decided when geometry could not

    def summary(self) -> str:
        return (f"rotation {self.angle_deg:+.1f} deg{', mirrored' if self.mirrored else ''}, "
                f"centre at voxel ({self.centre_ij[0]:.1f}, {self.centre_ij[1]:.1f}), "
                f"match score {self.score:.2f} (minimum {MIN_SCORE}), "
                f"ambiguity {self.ambiguity:.2f} (maximum {MAX_AMBIGUITY})"
                + (f"; {self.identity}" if self.identity else ""))


# --------------------------------------------------------------------- public API

def localise(images: np.ndarray | Sequence[np.ndarray], affine: np.ndarray,
             layout: pd.DataFrame, margin_mm: float = 1.0, *, allow_mirror: bool = True,
             search_mm: float = 12.0, min_score: float = MIN_SCORE,
             max_ambiguity: float = MAX_AMBIGUITY,
             contrast: Sequence[tuple[np.ndarray, dict[int, float]]] = ()) -> Placement:
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
    contrast : (quantitative map on the grid, {label: reference value}) pairs, e.g. the
        T1 map with the reference T1 of each vial. When several placements fit the
        geometry about equally (a rotation- or mirror-symmetric layout), the one whose
        vial medians agree best in rank with the reference (Spearman's ρ, averaged over
        the maps) is chosen, if ρ ≥ ``MIN_RANK_RHO`` and beats the next by
        ``RANK_MARGIN``; otherwise the placement stays ambiguous (PoorMatchError).

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
    # runner-ups: the best distinct coarse candidates, refined; one that climbs back into
    # the winning pose (or another runner-up) is the same placement, not a rival
    rivals: list[tuple] = []
    seen = [best]
    for cand in coarse[1:]:
        if len(seen) > (7 if contrast else 3):
            break
        if any(not distinct(cand, c) for c in seen):
            continue
        seen.append(cand)
        ref = refine(cand)
        if distinct(ref, top) and all(distinct(ref, r) for r in rivals):
            rivals.append(ref)

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

    def ambiguity_of(a: tuple, b: tuple) -> float:
        """Evidence of ``b`` over that of ``a``, only where the two placements differ (vial
        positions of one not shared by the other); shared positions say nothing."""
        pa, pb = _place(p_mm, a[1], a[2], a[3]), _place(p_mm, b[1], b[2], b[3])
        gap = np.hypot(pa[:, None, 0] - pb[None, :, 0], pa[:, None, 1] - pb[None, :, 1])
        own, theirs = gap.min(axis=1) >= 0.5 * radii, gap.min(axis=0) >= 0.5 * radii
        e_a = float(np.nanmean(evidence(pa)[own])) if own.any() else 0.0
        e_b = float(np.nanmean(evidence(pb)[theirs])) if theirs.any() else e_a
        return float(np.clip(max(e_b, 0.0) / e_a, 0, 9.99)) if e_a > 0 else 1.0

    def rank_agreement(pose: tuple) -> float:
        """Mean Spearman rank correlation of the placed vials' map medians with their
        reference values (over the ``contrast`` maps); -1 when nothing to compare."""
        from scipy.stats import spearmanr
        pts_ = _place(p_mm, pose[1], pose[2], pose[3])
        rhos = []
        for img, ref in contrast:
            vol = np.asarray(img, float).reshape(shape)
            med, want = [], []
            for n in range(len(lay)):
                lab = int(labels_arr[n])
                sl = [k for k, rows in rows_on.items() if n in rows]
                if lab not in ref or not sl:
                    continue
                disc_n = np.hypot(ii - pts_[n, 0], jj - pts_[n, 1]) <= region_r[n]
                v = vol[..., sl][disc_n]
                v = v[np.isfinite(v)]
                if v.size:
                    med.append(float(np.median(v)))
                    want.append(float(ref[lab]))
            if len(med) >= 4:   # constant values (no contrast) agree with nothing
                rho = spearmanr(med, want).statistic if np.ptp(med) > 0 and \
                    np.ptp(want) > 0 else 0.0
                rhos.append(float(rho) if np.isfinite(rho) else 0.0)
        return float(np.mean(rhos)) if rhos else -1.0

    ambiguities = [ambiguity_of(top, r) for r in rivals]
    ambiguity = max(ambiguities, default=0.0)
    identity = ""
    if ambiguity > max_ambiguity and contrast:
        # geometry cannot tell these placements apart: the vials' values can
        ties = [top] + [r for r, a in zip(rivals, ambiguities) if a > max_ambiguity]
        rho = [rank_agreement(t) for t in ties]
        order = np.argsort(rho)[::-1]
        first, second = rho[order[0]], rho[order[1]]
        identity = (f"{len(ties)} placements fit the layout's geometry about equally; rank "
                    f"correlation of the vials' values with the reference: best {first:.2f}, "
                    f"next {second:.2f}")
        if first >= MIN_RANK_RHO and first - second >= RANK_MARGIN:
            top = ties[int(order[0])]
            identity = f"vial identities from contrast ({identity})"
            ambiguity_decided = True
        else:
            ambiguity_decided = False
    else:
        ambiguity_decided = ambiguity <= max_ambiguity
    score, angle, mirrored, centre = top
    angle = float((angle + 180.0) % 360.0 - 180.0)
    pts = _place(p_mm, angle, mirrored, centre)
    ev = evidence(pts)

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
                          voxel_mm=(dx, dy, dz), identity=identity)

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
    if not ambiguity_decided:
        rival = rivals[int(np.argmax(ambiguities))]
        hint = (" The layout looks symmetric under a mirror flip; if the phantom cannot be "
                "placed mirrored in practice, turn mirror search off (`relaxline qc "
                "--no-mirror`, config key `phantom.mirror_search: false`)."
                if rival[2] != mirrored else
                " The layout may be (nearly) symmetric under rotation; vial identities "
                "need an asymmetric feature in the layout.")
        contrast_note = (f" Contrast did not decide either: {identity}." if identity else
                         " No quantitative map with reference values was available to "
                         "tell the vials apart by their values.")
        raise PoorMatchError(
            f"vial localisation is ambiguous: a different placement matches almost as well "
            f"({placement.summary()}).{hint}{contrast_note}", placement)
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
