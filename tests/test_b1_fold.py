"""mese's B1 fold: only about the true symmetry point of the echo train.

The shape of a CPMG magnitude train is the same for refocusing angles θ and 360° − θ
(the excitation only scales it). So B1 and 2·B1c − B1 with B1c = 180°/nominal refocusing
angle fit equally well: about 1 only for a nominal 180° pulse (issue 14: at 150° nominal
a true B1 of 1.1 was reported as 0.90). References: the independent isochromat CPMG of
tests/test_bloch.py (Hennig 1988, J Magn Reson 78:397 sampled by isochromats).
"""
from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest

from fitting import status as st
from fitting.spec import get_model
from fitting.t2_models import b1_symmetry
from fitting.voxelwise import fit_voxels
from pipeline.cli import main
from seriesio import write_4d, write_nifti
from test_bloch import isochromat_cpmg

N_ECHO, ESP = 24, 0.01
TE = ESP * np.arange(1, N_ECHO + 1)


def iso(t2, b1, refocus, excite=90.0, t1=1.0, m0=1.0):
    return np.abs(isochromat_cpmg(N_ECHO, ESP, t2, t1, b1, refocus, excite, m0=m0,
                                  n_iso=4 * N_ECHO + 3))


@pytest.mark.parametrize("refocus,excite", [(150.0, 90.0), (180.0, 120.0), (120.0, 70.0)])
@pytest.mark.parametrize("b1", [0.8, 1.1])
def test_train_shape_is_symmetric_about_180_over_the_nominal_angle(refocus, excite, b1):
    # isochromats (Hennig 1988): θ and 360° − θ give one shape; amplitude ratio = the
    # excitation sines' ratio
    c = 180.0 / refocus
    mirror = 2 * c - b1
    a, b = iso(0.08, b1, refocus, excite, t1=0.7), iso(0.08, mirror, refocus, excite, t1=0.7)
    ratio = np.sin(np.deg2rad(b1 * excite)) / np.sin(np.deg2rad(mirror * excite))
    np.testing.assert_allclose(a, ratio * b, rtol=0, atol=1e-12)
    # ... and no such symmetry about 1 unless the nominal pulse is 180°
    if refocus != 180.0:
        other = iso(0.08, 2 - b1, refocus, excite, t1=0.7)
        assert np.abs(a / a[0] - other / other[0]).max() > 1e-3


@pytest.mark.parametrize("refocus,truth,reported", [
    (150.0, 1.1, 1.1),     # issue 14: was reported 0.90
    (150.0, 0.85, 0.85),
    (150.0, 1.3, 1.1),     # the mirror of 1.1 about 1.2: indistinguishable, folded below
    (180.0, 0.85, 0.85),
    (180.0, 1.15, 0.85),   # about 1 at 180°
])
def test_fold_about_the_symmetry_point(refocus, truth, reported):
    spec = get_model("mese")
    fixed = spec.fixed_from_meta({"RefocusingFlipAngle": refocus}, {})
    assert b1_symmetry(fixed) == pytest.approx(180.0 / refocus)
    y = np.array([iso(t2, truth, refocus, m0=2.0) for t2 in (0.04, 0.15, 0.5)])
    fit = fit_voxels(spec, TE, y, fixed)
    assert np.all(np.isin(fit.status, st.USABLE))
    # isochromat reference, noiseless: T2 exact; B1 the branch with refocusing <= 180°
    np.testing.assert_allclose(fit.params["T2"], [0.04, 0.15, 0.5], rtol=1e-5)
    np.testing.assert_allclose(fit.params["B1"], reported, atol=1e-5)
    # M0 of the reported branch: M0·sin(B1·90°) is what the echoes fix
    m0 = 2.0 * np.sin(np.deg2rad(truth * 90.0)) / np.sin(np.deg2rad(reported * 90.0))
    np.testing.assert_allclose(fit.params["M0"], m0, rtol=1e-5)


def test_tb1map_sidecar_says_how_b1_was_reported(tmp_path, capsys):
    y = np.stack([iso(0.1, 1.1, 150.0, m0=500.0)] * 4).reshape(2, 2, 1, N_ECHO)
    series = write_4d(tmp_path, "sub-01_MESE", y.astype(np.float32), "EchoTime", TE,
                      {"RefocusingFlipAngle": 150.0})
    mask = write_nifti(tmp_path / "mask.nii.gz", np.ones((2, 2, 1), np.uint8))
    out = tmp_path / "maps"
    assert main(["fit", "mese", str(series), "--out", str(out), "--mask", str(mask)]) == 0
    capsys.readouterr()
    b1 = np.asarray(nib.load(out / "sub-01_rec-mese_TB1map.nii.gz").get_fdata())
    np.testing.assert_allclose(b1, 1.1, atol=1e-4)          # isochromat truth (Hennig 1988)
    side = json.loads((out / "sub-01_rec-mese_TB1map.json").read_text())
    assert "B1 folded about 1.2" in side["Notes"][0] and "nominal refocusing 150°" in side["Notes"][0]
    assert "Notes" not in json.loads((out / "sub-01_rec-mese_T2map.json").read_text())
