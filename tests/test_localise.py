"""Automatic vial localisation (qc.localise, qc.layout): issue 9.

Synthetic phantoms are built here from an invented layout (not the demo's): a cylinder
with ten vials of different radii, rendered with partial volume (4x4 supersampling),
placed with a known shift (<= 15 mm), rotation (<= 30 deg) and optional mirror flip,
multiplied by a smooth B1-like field and given Rician noise.

Comparison with the truth (documented here because it defines the test): the true region
of a vial is the set of voxels whose centre lies within ``radius - margin`` of the vial's
true centre — exactly the rule the localiser applies at its estimated centre. Dice is
computed per vial between these two voxel sets; medians are taken over each set of the
same image (and of a T1-like map with 1 % voxel noise).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from fitting.errors import RelaxlineError
from qc.layout import LayoutError, check_layout, read_layout
from qc.vialimage import _otsu
from qc.localise import (LocalisationError, PhantomNotFoundError, PoorMatchError,
                         localise, overlay_png)

VOX = 1.5
MARGIN = 1.5
_OUT = [0, 36, 72, 108, 144, 180, 216]     # outer ring with a 144 deg gap
_IN = [20, 140, 250]
LAYOUT = pd.DataFrame({
    "label": np.arange(1, 11),
    "x_mm": [44 * np.cos(np.deg2rad(a)) for a in _OUT] + [18 * np.cos(np.deg2rad(a)) for a in _IN],
    "y_mm": [44 * np.sin(np.deg2rad(a)) for a in _OUT] + [18 * np.sin(np.deg2rad(a)) for a in _IN],
    "radius_mm": [9.0, 8.0, 10.0, 8.0, 9.0, 11.0, 8.0, 7.0, 9.0, 8.0],
})
# Two vials (2 and 6) iso-intense with the fill (1.0) in the M0-like image.
M0 = np.array([0.55, 1.0, 0.75, 1.35, 0.9, 1.0, 1.6, 0.65, 1.2, 0.8])
T1 = np.array([0.30, 0.45, 0.62, 0.80, 1.00, 1.20, 1.45, 1.70, 2.00, 2.40])
FILL_T1 = 2.8


def make_phantom(shift=(0.0, 0.0), angle=0.0, mirror=False, values=M0, fill=1.0,
                 shape=(112, 112, 3), snr=50.0, seed=0, layout=LAYOUT, radius=62.0,
                 b1=True):
    """Image, affine, true label map (eroded by MARGIN) and true vial centres (mm)."""
    rng = np.random.default_rng(seed)
    nx, ny, nz = shape
    c = np.array([nx * VOX / 2 + shift[0], ny * VOX / 2 + shift[1]])
    t = np.deg2rad(angle)
    rot = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    if mirror:
        rot = rot @ np.diag([1.0, -1.0])
    pts = c + layout[["x_mm", "y_mm"]].to_numpy(float) @ rot.T
    r = layout["radius_mm"].to_numpy(float)
    ss = 4
    off = (np.arange(ss) + 0.5) / ss - 0.5
    u = (np.arange(nx)[:, None] + off).ravel() * VOX
    v = (np.arange(ny)[:, None] + off).ravel() * VOX
    uu, vv = np.meshgrid(u, v, indexing="ij")
    img = np.where(np.hypot(uu - c[0], vv - c[1]) <= radius, fill, 0.0)
    for (pu, pv), rn, val in zip(pts, r, values):
        img = np.where(np.hypot(uu - pu, vv - pv) <= rn, val, img)
    img = img.reshape(nx, ss, ny, ss).mean(axis=(1, 3))
    ui, vi = np.meshgrid(np.arange(nx) * VOX, np.arange(ny) * VOX, indexing="ij")
    field = np.ones_like(ui)
    if b1:  # smooth multiplicative shading, about 0.75..1.35 over the phantom (invented)
        field = (1 + 0.25 * (ui - nx * VOX / 2) / (nx * VOX / 2)
                 - 0.1 * (vi - ny * VOX / 2) / (ny * VOX / 2)
                 + 0.15 * np.exp(-((ui - 50) ** 2 + (vi - 110) ** 2) / (2 * 45.0 ** 2)))
    truth = np.zeros((nx, ny), np.int16)
    for (pu, pv), rn, lab in zip(pts, r, layout["label"]):
        truth[np.hypot(ui - pu, vi - pv) <= rn - MARGIN] = lab
    clean = np.repeat((img * field)[..., None], nz, axis=2)
    sigma = fill / snr
    noisy = np.hypot(clean + rng.normal(0, sigma, clean.shape), rng.normal(0, sigma, clean.shape))
    affine = np.diag([VOX, VOX, 4.0, 1.0])
    affine[:3, 3] = [-80.0, -90.0, 10.0]
    return noisy, affine, np.repeat(truth[..., None], nz, axis=2), pts


def dice(a: np.ndarray, b: np.ndarray) -> float:
    return 2.0 * float((a & b).sum()) / float(a.sum() + b.sum())


POSES = [((12.0, -9.0), 27.0, False), ((-15.0, 4.0), -30.0, True), ((0.0, 15.0), 8.0, False),
         ((-6.0, -11.0), -17.0, True), ((10.6, 10.6), -4.0, False)]


@pytest.mark.parametrize("shift,angle,mirror", POSES)
def test_shifted_rotated_phantom_regions_match_truth(shift, angle, mirror):
    img, aff, truth, pts = make_phantom(shift, angle, mirror, seed=int(angle) % 7)
    pl = localise(img, aff, LAYOUT, margin_mm=MARGIN)
    assert pl.mirrored == mirror
    assert abs((pl.angle_deg - angle + 180) % 360 - 180) < 1.0
    centres = np.c_[pl.vials["centre_i"], pl.vials["centre_j"]] * VOX
    assert np.max(np.hypot(*(centres - pts).T)) < 0.75   # mm
    # a T1-like map on the same geometry, 1 % voxel noise
    t1map, *_ = make_phantom(shift, angle, mirror, values=T1, fill=FILL_T1, snr=100, b1=False,
                             seed=99)
    for lab in LAYOUT["label"]:
        est, tru = pl.labels == lab, truth == lab
        assert dice(est, tru) >= 0.9, (lab, dice(est, tru))
        for im in (img, t1map):
            m_est, m_tru = np.median(im[est]), np.median(im[tru])
            assert abs(m_est / m_tru - 1) < 0.005, (lab, m_est, m_tru)
    assert set(np.unique(pl.labels)) == {0, *LAYOUT["label"]}


def test_several_images_complement_each_other():
    """Five vials iso-intense in the M0-like image; a T1-like map shows them."""
    m0 = np.where(np.arange(10) % 2 == 0, 1.0, M0)
    img, aff, truth, _ = make_phantom((7.0, -12.0), 22.0, False, values=m0, seed=5)
    t1map, *_ = make_phantom((7.0, -12.0), 22.0, False, values=T1, fill=FILL_T1, seed=6)
    pl = localise([img, t1map], aff, LAYOUT, margin_mm=MARGIN)
    for lab in LAYOUT["label"]:
        assert dice(pl.labels == lab, truth == lab) >= 0.9
    # per-vial contrast evidence: every vial visible in at least one image
    assert (pl.vials["contrast"] > 0.5).all()


def test_noise_only_image_is_a_clear_error():
    rng = np.random.default_rng(3)
    noise = np.hypot(rng.normal(0, 0.02, (112, 112, 3)), rng.normal(0, 0.02, (112, 112, 3)))
    with pytest.raises(PhantomNotFoundError, match="no phantom found"):
        localise(noise, np.diag([VOX, VOX, 4, 1]), LAYOUT, MARGIN)
    assert issubclass(PhantomNotFoundError, RelaxlineError)   # the CLI's exit-2 error


@pytest.mark.parametrize("shift,match", [((130.0, 0.0), "no phantom found"),
                                         ((60.0, 0.0), "not fully inside the field of view")])
def test_phantom_out_of_field_of_view_is_a_clear_error(shift, match):
    img, aff, *_ = make_phantom(shift, 10.0)
    with pytest.raises(PhantomNotFoundError, match=match):
        localise(img, aff, LAYOUT, MARGIN)


def test_object_without_vials_and_constant_image_are_errors():
    img, aff, *_ = make_phantom(values=np.ones(10))
    with pytest.raises(PhantomNotFoundError, match="no vials found"):
        localise(img, aff, LAYOUT, MARGIN)
    with pytest.raises(PhantomNotFoundError, match="constant"):
        localise(np.zeros((40, 40, 2)), aff, LAYOUT, MARGIN)


def test_wrong_layout_is_a_poor_match_not_a_silent_placement():
    img, aff, *_ = make_phantom((5.0, 5.0), 12.0)
    other = LAYOUT.copy()   # same vials, but the outer ring spread evenly: not this phantom
    ang = np.deg2rad(np.arange(7) * 360 / 7 + 10)
    other.loc[:6, "x_mm"], other.loc[:6, "y_mm"] = 44 * np.cos(ang), 44 * np.sin(ang)
    with pytest.raises(PoorMatchError) as err:
        localise(img, aff, other, MARGIN)
    assert err.value.placement is not None   # kept so a person can look at the overlay
    assert not isinstance(err.value, PhantomNotFoundError)


def test_symmetric_layout_is_ambiguous():
    sym = pd.DataFrame({"label": [1, 2, 3, 4], "x_mm": [30.0, 0, -30, 0],
                        "y_mm": [0, 30.0, 0, -30], "radius_mm": [9.0] * 4})
    img, aff, *_ = make_phantom((3.0, -2.0), 20.0, layout=sym, values=[0.5, 1.5, 0.7, 1.3])
    with pytest.raises(PoorMatchError, match="ambiguous"):
        localise(img, aff, sym, MARGIN)


MIRROR_LAYOUT = pd.DataFrame({   # symmetric under x -> -x: a flip maps it onto itself
    "label": [1, 2, 3, 4, 5, 6], "x_mm": [0.0, -32, 32, -22, 22, 0],
    "y_mm": [40.0, 10, 10, -32, -32, -8], "radius_mm": [9.0] * 6})
MIRROR_T1 = [1.0, 0.3, 2.0, 0.5, 1.6, 1.2]     # mirror partners far apart in rank


@pytest.mark.parametrize("angle,mirror", [(12.0, False), (-25.0, True)])
def test_mirror_symmetric_layout_placed_by_contrast(angle, mirror):
    """Geometry cannot tell a mirror-symmetric layout from its flip; the vials' T1 values
    against the reference can (rank correlation), so every vial lands on its own disc."""
    img, aff, truth, pts = make_phantom((4.0, -3.0), angle, mirror, layout=MIRROR_LAYOUT,
                                        values=[0.6, 1.4, 0.8, 1.3, 0.7, 1.5])
    t1map, *_ = make_phantom((4.0, -3.0), angle, mirror, layout=MIRROR_LAYOUT,
                             values=MIRROR_T1, fill=2.8, snr=100, b1=False)
    ref = dict(zip(MIRROR_LAYOUT["label"], MIRROR_T1))
    with pytest.raises(PoorMatchError, match="ambiguous"):   # geometry alone: a toss-up
        localise([img, t1map], aff, MIRROR_LAYOUT, MARGIN)
    pl = localise([img, t1map], aff, MIRROR_LAYOUT, MARGIN, contrast=[(t1map, ref)])
    # the truth is the construction itself: each label's region inside its own vial disc
    for lab in MIRROR_LAYOUT["label"]:
        assert dice(pl.labels == lab, truth == lab) > 0.9, lab
    assert pl.ambiguity > 0.7 and "vial identities from contrast" in pl.identity
    # without mirror search only the unflipped placement is considered
    if not mirror:
        assert localise([img, t1map], aff, MIRROR_LAYOUT, MARGIN,
                        allow_mirror=False).ambiguity < 0.7


def test_symmetric_layout_undecided_by_contrast_still_fails():
    # a 4-fold symmetric layout whose vials all share one value: nothing decides
    sym = pd.DataFrame({"label": [1, 2, 3, 4], "x_mm": [30.0, 0, -30, 0],
                        "y_mm": [0, 30.0, 0, -30], "radius_mm": [9.0] * 4})
    img, aff, *_ = make_phantom((3.0, -2.0), 20.0, layout=sym, values=[0.5, 0.5, 0.5, 0.5])
    with pytest.raises(PoorMatchError, match="Contrast did not decide") as err:
        localise(img, aff, sym, MARGIN, contrast=[(img, {1: 1.0, 2: 1.0, 3: 1.0, 4: 1.0})])
    assert err.value.placement is not None


def test_margin_larger_than_vial_is_rejected():
    img, aff, *_ = make_phantom()
    with pytest.raises(LocalisationError, match="margin"):
        localise(img, aff, LAYOUT, margin_mm=7.5)


def test_vial_planes_from_z_mm():
    """Rows with z_mm sit on the slice nearest their plane; the others on every slice."""
    lay = LAYOUT.copy()
    lay["z_mm"] = np.nan
    lay.loc[9, "z_mm"] = 4.0    # one slice (4 mm) above the centre slice of 3
    img, aff, truth, _ = make_phantom((4.0, 2.0), 15.0, seed=8)
    pl = localise(img, aff, lay, MARGIN)
    assert (pl.labels[..., 2] == 10).sum() > 0
    assert (pl.labels[..., :2] == 10).sum() == 0
    for lab in range(1, 10):
        assert all((pl.labels[..., k] == lab).sum() > 0 for k in range(3))
    assert dice(pl.labels[..., 2] == 10, truth[..., 2] == 10) >= 0.9


def test_overlay_is_a_png():
    img, aff, *_ = make_phantom((2.0, 3.0), 5.0)
    pl = localise(img, aff, LAYOUT, MARGIN)
    png = overlay_png(img, pl)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    assert overlay_png(img, pl) == png   # deterministic bytes


def test_otsu_threshold_of_symmetric_bimodal_data_is_the_midpoint():
    # Otsu 1979, IEEE Trans Syst Man Cybern 9:62: for two equal, equally weighted modes
    # the between-class variance is symmetric about, and peaks at, the midpoint.
    rng = np.random.default_rng(0)
    x = np.r_[rng.normal(10, 4, 200_000), rng.normal(30, 4, 200_000)]
    assert abs(_otsu(x) - 20.0) < 0.5
    two = np.r_[np.full(100, 1.0), np.full(100, 5.0)]   # separated: any cut in the gap splits
    assert 1.0 < _otsu(two) < 5.0


def test_layout_file_validation(tmp_path):
    good = tmp_path / "layout.tsv"
    good.write_text("label\tx_mm\ty_mm\tradius_mm\tname\n1\t0\t20\t5\ta\n2\t0\t-20\t6\tb\n")
    lay = read_layout(good)
    assert list(lay["label"]) == [1, 2] and lay["z_mm"].isna().all()
    cases = {
        "label\tx_mm\ty_mm\n1\t0\t0\n": "missing column",
        "label\tx_mm\ty_mm\tradius_mm\n1\t0\t0\t5\n1\t20\t0\t5\n": "appears twice",
        "label\tx_mm\ty_mm\tradius_mm\n1\t0\t0\t5\n2\t6\t0\t5\n": "overlap",
        "label\tx_mm\ty_mm\tradius_mm\n1\tabc\t0\t5\n": "expected a number",
        "label\tx_mm\ty_mm\tradius_mm\n0\t0\t0\t5\n": "integers",
        "label\tx_mm\ty_mm\tradius_mm\n1\t0\t0\t-5\n": "radius",
    }
    for k, (text, match) in enumerate(cases.items()):
        p = tmp_path / f"bad{k}.tsv"
        p.write_text(text)
        with pytest.raises(LayoutError, match=match):
            read_layout(p)
    with pytest.raises(LayoutError, match="not found"):
        read_layout(tmp_path / "missing.tsv")
    # vials on different planes may overlap in x, y
    two = pd.DataFrame({"label": [1, 2], "x_mm": [0, 0], "y_mm": [0, 0], "radius_mm": [5, 5],
                        "z_mm": [-10, 10]})
    assert len(check_layout(two)) == 2


# ----------------------------------------------------------------------------------------
# The demo simulator's phantom, and `relaxline qc --layout`


def _demo_session(tmp_path, matrix=80, noise_only=False):
    """A maps folder (M0map, T1map) built from the demo simulator's truth of one session."""
    import nibabel as nib

    from pipeline import phantom as ph
    from pipeline import simulate as sim

    opts = sim.SimOptions(sessions=1, matrix=matrix, slices=2, seed=11)
    st = sim.session_state(0, opts)
    _, affine, (x, y, _) = sim.grid(opts)
    rng = np.random.default_rng(1)
    maps = tmp_path / "maps"
    maps.mkdir(parents=True)
    stem = f"sub-demo_ses-{st.label}_IRT1"
    m0 = np.abs(st.pd * st.b1 + rng.normal(0, 0.01, st.pd.shape))
    if noise_only:
        m0 = np.abs(rng.normal(0, 0.01, st.pd.shape))
    t1 = np.where(st.inside, st.t1 * (1 + rng.normal(0, 0.01, st.t1.shape)),
                  rng.uniform(0, 5, st.t1.shape))
    for suffix, arr in (("M0map", m0), ("T1map", t1)):
        nib.save(nib.Nifti1Image(arr.astype(np.float32), affine),
                 str(maps / f"{stem}_{suffix}.nii.gz"))
    layout = tmp_path / "layout.tsv"
    ph.layout_table().to_csv(layout, sep="\t", index=False)
    reference = tmp_path / "reference.tsv"
    ph.reference_table().to_csv(reference, sep="\t", index=False)
    px, py = ph.world_to_phantom(x, y, st.shift_mm, st.rotation_deg)
    return st, maps, layout, reference, affine, (px, py)


def test_demo_simulator_series_mean():
    """The demo phantom's inversion-recovery series mean (Rician noise, B1 shading)."""
    from pipeline import phantom as ph
    from pipeline import simulate as sim

    opts = sim.SimOptions(sessions=2, matrix=80, slices=2, seed=4)
    st = sim.session_state(1, opts)
    _, affine, (x, y, _) = sim.grid(opts)
    sig = sim.clean_signals(st)["IRT1"]
    mag = sim.rician_magnitude(sig, float(np.abs(sig).max()) / opts.snr,
                               np.random.default_rng(0))
    mean = mag.mean(axis=-1)
    layout = ph.layout_table()
    pl = localise(mean, affine, layout, margin_mm=MARGIN)
    assert abs(pl.angle_deg - st.rotation_deg) < 1.0 and not pl.mirrored
    px, py = ph.world_to_phantom(x, y, st.shift_mm, st.rotation_deg)
    for row in layout.itertuples():
        tru = (px - row.x_mm) ** 2 + (py - row.y_mm) ** 2 <= (row.radius_mm - MARGIN) ** 2
        est = pl.labels == row.label
        assert dice(est, tru) >= 0.9, (row.label, dice(est, tru))
        assert abs(np.median(mean[est]) / np.median(mean[tru]) - 1) < 0.005


def test_qc_command_with_layout(tmp_path):
    import nibabel as nib

    from pipeline.cli import main

    st, maps, layout, reference, affine, (px, py) = _demo_session(tmp_path)
    out = tmp_path / "qc"
    code = main(["qc", str(maps), "--layout", str(layout), "--reference", str(reference),
                 "--out", str(out), "--temperature", str(st.temperature), "--margin-mm", "2",
                 "--no-figures"])
    assert code == 0
    lab_file = out / f"ses-{st.label}_desc-vials_dseg.nii.gz"
    img = nib.load(str(lab_file))
    assert np.allclose(img.affine, affine)
    labels = np.asarray(img.dataobj)
    assert (out / "vials_overlay.png").read_bytes()[:4] == b"\x89PNG"
    stats = pd.read_csv(out / "roi_stats.tsv", sep="\t")
    from pipeline import phantom as ph
    for row in ph.layout_table().itertuples():
        tru = (px - row.x_mm) ** 2 + (py - row.y_mm) ** 2 <= (row.radius_mm - 2.0) ** 2
        assert dice(labels == row.label, tru) >= 0.9
        med = stats.loc[(stats["label"] == row.label) & (stats["map"] == "T1map"), "median"]
        truth_t1 = st.t1[(st.labels == row.label) & st.inside].mean()
        assert abs(float(med.iloc[0]) / truth_t1 - 1) < 0.005
    assert "Vial localisation" in (out / "report.html").read_text()


def test_qc_command_layout_failures(tmp_path, capsys):
    from pipeline.cli import main

    # noise only: bad input, exit 2, nothing written
    st, maps, layout, reference, *_ = _demo_session(tmp_path / "a", noise_only=True)
    out = tmp_path / "a" / "qc"
    assert main(["qc", str(maps), "--layout", str(layout), "--out", str(out)]) == 2
    assert "no phantom found" in capsys.readouterr().err
    assert not (out / "roi_stats.tsv").exists()
    # a layout that is not this phantom's: a QC failure (exit 1) with the overlay to look at
    st, maps, layout, reference, *_ = _demo_session(tmp_path / "b")
    wrong = tmp_path / "b" / "wrong.tsv"
    other = pd.DataFrame({"label": range(1, 13), "x_mm": [40.0 * np.cos(a) for a in
                                                          np.linspace(0, 2 * np.pi, 13)[:-1]],
                          "y_mm": [40.0 * np.sin(a) for a in np.linspace(0, 2 * np.pi, 13)[:-1]],
                          "radius_mm": 9.0})
    other.to_csv(wrong, sep="\t", index=False)
    out = tmp_path / "b" / "qc"
    assert main(["qc", str(maps), "--layout", str(wrong), "--out", str(out)]) == 1
    err = capsys.readouterr().err
    assert "QC failure" in err and "vials_overlay.png" in err
    assert (out / "vials_overlay.png").is_file() and not (out / "roi_stats.tsv").exists()
    # neither --labels nor --layout
    assert main(["qc", str(maps), "--out", str(out)]) == 2
