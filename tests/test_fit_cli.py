"""`relaxline fit`: outputs, statuses, engines, chunked jobs and bad input (design §5, §6)."""
from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from fitting import status as st
from fitting.signals import dam_signals, ir_signal, spgr_signal
from pipeline.cli import main
from pipeline.fitjob import estimate_noise, fit_arrays, output_keys, prepare
from seriesio import AFFINE, write_3d_set, write_4d, write_nifti

TI = [0.05, 0.1, 0.2, 0.35, 0.5, 0.8, 1.2, 1.8, 2.6, 3.5]
TR = 5.0
SHAPE = (24, 24, 3)
SIGMA = 4.0


def _object():
    xx, yy = np.mgrid[: SHAPE[0], : SHAPE[1]]
    disk = (xx - 12) ** 2 + (yy - 12) ** 2 < 8 ** 2
    return np.repeat(disk[:, :, None], SHAPE[2], axis=2)


def _ir_volume(seed: int = 0):
    rng = np.random.default_rng(seed)
    obj = _object()
    t1 = np.where(obj, rng.uniform(0.2, 2.0, SHAPE), 1.0)
    m0 = np.where(obj, 1000.0, 0.0)
    s = ir_signal(np.array(TI), t1, m0, 0.95, TR, 90.0)
    noise = rng.normal(0, SIGMA, (2,) + s.shape)
    return obj, t1, np.abs(s + noise[0] + 1j * noise[1]).astype(np.float32)


@pytest.fixture(scope="module")
def ir_series(tmp_path_factory):
    d = tmp_path_factory.mktemp("ir")
    obj, t1, y = _ir_volume()
    path = write_4d(d, "sub-01_IRT1", y, "InversionTime", TI, {"RepetitionTime": TR})
    return d, path, obj, t1, y


def _run(capsys, *argv):
    code = main(["fit", *map(str, argv)])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_ir_cli_writes_maps(ir_series, tmp_path, capsys):
    d, path, obj, t1, _ = ir_series
    out = tmp_path / "maps"
    code, stdout, err = _run(capsys, "ir", path, "--out", out)
    assert code == 0, err
    stem = "sub-01_rec-ir"   # BIDS-derivative name: raw suffix dropped, model in rec-
    names = {p.name for p in out.iterdir()}
    for key in ("T1map", "M0map", "InvEffmap", "desc-stderr_T1map", "desc-stderr_M0map",
                "desc-stderr_InvEffmap", "desc-rmse_T1map", "desc-fitstatus_mask"):
        assert f"{stem}_{key}.nii.gz" in names and f"{stem}_{key}.json" in names
    t1map = nib.load(out / f"{stem}_T1map.nii.gz")
    assert np.allclose(t1map.affine, AFFINE) and t1map.shape == SHAPE
    status = np.asarray(nib.load(out / f"{stem}_desc-fitstatus_mask.nii.gz").dataobj)
    assert status.dtype == np.uint8
    # background (air) is recognised and marked outside; maps hold NaN there
    assert np.mean(status[~obj] == st.OUTSIDE) > 0.99
    assert np.all(np.isin(status[obj], st.USABLE))
    t1_fit = t1map.get_fdata()
    assert np.isnan(t1_fit[status == st.OUTSIDE]).all()
    assert abs(np.median(t1_fit[obj] / t1[obj] - 1)) < 0.01
    side = json.loads((out / f"{stem}_T1map.json").read_text())
    assert side["Units"] == "s" and side["Model"] == "ir" and side["Engine"] == "fast"
    assert side["Options"]["noise_sigma"] == pytest.approx(SIGMA, rel=0.05)
    assert any(s["path"].endswith(".nii.gz") for s in side["SourceFiles"])
    # Sources: URIs (inputs outside a BIDS dataset: file://); BIDS wants a Description
    assert all(u.startswith("file:///") for u in side["Sources"]) and side["Description"]
    eff = json.loads((out / f"{stem}_InvEffmap.json").read_text())
    assert eff["Units"] == "ratio"
    codes = json.loads((out / f"{stem}_desc-fitstatus_mask.json").read_text())["StatusCodes"]
    assert codes[str(st.OK_REFIT)] == st.NAMES[st.OK_REFIT]
    # standard errors use the background σ: compare with the spread of T1 itself
    se = nib.load(out / f"{stem}_desc-stderr_T1map.nii.gz").get_fdata()
    assert np.all(se[obj] > 0)


def test_chunked_jobs_match_whole_volume(ir_series):
    d, path, obj, _, _ = ir_series
    spec, series, _ = prepare("ir", [path])
    sigma = estimate_noise(series)
    opts = {"engine": "fast", "noise_sigma": sigma}
    whole = fit_arrays("ir", series, options=opts)
    parts = [fit_arrays("ir", series, options=opts, z=slice(a, b)) for a, b in ((0, 1), (1, 3))]
    for key in output_keys(spec):
        joined = np.concatenate([p[key] for p in parts], axis=2)
        assert np.array_equal(joined, whole[key], equal_nan=True), key


def test_slabs_in_flight_on_two_threads_match_one_thread(ir_series, monkeypatch):
    """One slice per slab, two slabs fitted side by side (jobs 2): the same maps as one
    slab after the other on one thread."""
    import pipeline.fitjob as fj
    d, path, obj, _, _ = ir_series
    spec, series, _ = prepare("ir", [path])
    opts = {"engine": "fast", "noise_sigma": estimate_noise(series)}
    monkeypatch.setattr(fj, "SLAB_VOXELS", SHAPE[0] * SHAPE[1])
    one = fit_arrays("ir", series, options={**opts, "jobs": 1})
    two = fit_arrays("ir", series, options={**opts, "jobs": 2})
    for key in output_keys(spec):
        assert np.array_equal(one[key], two[key], equal_nan=True), key


def test_mask_and_lmfit_engine(ir_series, tmp_path, capsys):
    d, path, obj, _, y = ir_series
    mask = np.zeros(SHAPE, np.uint8)
    mask[10:13, 10:13, 1] = 1           # 9 voxels inside the object
    mpath = write_nifti(tmp_path / "mask.nii.gz", mask)
    code, _, err = _run(capsys, "ir", path, "--out", tmp_path / "lm", "--mask", mpath,
                        "--engine", "lmfit", "--jobs", "2")
    assert code == 0, err
    code, _, err = _run(capsys, "ir", path, "--out", tmp_path / "fast", "--mask", mpath)
    assert code == 0, err
    a = nib.load(tmp_path / "lm" / "sub-01_rec-ir_T1map.nii.gz").get_fdata()
    b = nib.load(tmp_path / "fast" / "sub-01_rec-ir_T1map.nii.gz").get_fdata()
    st_lm = np.asarray(nib.load(tmp_path / "lm" / "sub-01_rec-ir_desc-fitstatus_mask.nii.gz")
                       .dataobj)
    assert np.all(st_lm[mask == 0] == st.OUTSIDE) and np.all(st_lm[mask == 1] == st.OK)
    assert np.nanmax(np.abs(a[mask == 1] / b[mask == 1] - 1)) < 1e-3


def test_bad_voxels_are_flagged_not_fatal(tmp_path, capsys):
    obj, _, y = _ir_volume(seed=1)
    y[12, 12, 0, 4] = np.nan
    y[11, 12, 0, :] = 0.0
    path = write_4d(tmp_path, "bad", y, "InversionTime", TI, {"RepetitionTime": TR})
    mask = write_nifti(tmp_path / "m.nii.gz", obj.astype(np.uint8))
    code, _, err = _run(capsys, "ir", path, "--out", tmp_path / "o", "--mask", mask)
    assert code == 0, err
    status = np.asarray(nib.load(tmp_path / "o" / "bad_rec-ir_desc-fitstatus_mask.nii.gz").dataobj)
    t1 = nib.load(tmp_path / "o" / "bad_rec-ir_T1map.nii.gz").get_fdata()
    assert status[12, 12, 0] == st.BAD_DATA and status[11, 12, 0] == st.BAD_DATA
    assert np.isnan(t1[12, 12, 0]) and np.isnan(t1[11, 12, 0])


def _expect_error(capsys, out: Path, *argv, match: str):
    code, _, err = _run(capsys, *argv, "--out", out)
    assert code == 2, err
    assert match in err and "Traceback" not in err
    assert not out.exists() or not any(out.iterdir())


def test_bad_input_errors(tmp_path, capsys):
    _, _, y = _ir_volume(seed=2)
    # TI list length != volumes
    p = write_4d(tmp_path / "a", "s", y, "InversionTime", TI[:-1], {"RepetitionTime": TR})
    _expect_error(capsys, tmp_path / "o1", "ir", p, match="InversionTime")
    # TI >= TR
    p = write_4d(tmp_path / "b", "s", y, "InversionTime", TI, {"RepetitionTime": 3.0})
    _expect_error(capsys, tmp_path / "o2", "ir", p, match="RepetitionTime")
    # missing TR
    p = write_4d(tmp_path / "c", "s", y, "InversionTime", TI)
    _expect_error(capsys, tmp_path / "o3", "ir", p, match="RepetitionTime")
    # fewer volumes than parameters
    p = write_4d(tmp_path / "d", "s", y[..., :2], "InversionTime", TI[:2],
                 {"RepetitionTime": TR})
    _expect_error(capsys, tmp_path / "o4", "ir", p, match="at least 3")
    # B1 / mask on another grid
    good = write_4d(tmp_path / "e", "s", y, "InversionTime", TI, {"RepetitionTime": TR})
    other = write_nifti(tmp_path / "b1.nii.gz", np.ones((10, 10, 3), np.float32))
    _expect_error(capsys, tmp_path / "o5", "ir", good, "--mask", other, match="grid")
    # --b1 with a model that has no use for it
    b1 = write_nifti(tmp_path / "b1ok.nii.gz", np.ones(SHAPE, np.float32))
    _expect_error(capsys, tmp_path / "o6", "ir", good, "--b1", b1, match="does not use")
    # unknown model
    _expect_error(capsys, tmp_path / "o7", "nosuchmodel", good, match="unknown model")


def test_all_zero_series_gives_bad_data_everywhere(tmp_path, capsys):
    y = np.zeros(SHAPE + (len(TI),), np.float32)
    p = write_4d(tmp_path, "zero", y, "InversionTime", TI, {"RepetitionTime": TR})
    code, _, err = _run(capsys, "ir", p, "--out", tmp_path / "o")
    assert code == 0, err
    status = np.asarray(nib.load(tmp_path / "o" / "zero_rec-ir_desc-fitstatus_mask.nii.gz").dataobj)
    assert np.all(status == st.BAD_DATA)


def _vfa_series(folder: Path, b1: np.ndarray):
    angles = [3.0, 6.0, 10.0, 15.0, 20.0, 30.0]
    obj = _object()
    s = spgr_signal(np.array(angles), np.where(obj, 1.0, 1.0), np.where(obj, 3000.0, 0.0),
                    0.015, b1)
    rng = np.random.default_rng(3)
    y = np.abs(s + rng.normal(0, 2.0, s.shape)).astype(np.float32)
    return obj, write_3d_set(folder, "sub-01_VFA", y, "FlipAngle", angles,
                             {"RepetitionTime": 0.015}, entity="flip")


def test_vfa_with_and_without_b1(tmp_path, capsys):
    b1 = np.full(SHAPE, 0.85, np.float32)
    obj, paths = _vfa_series(tmp_path / "in", b1)
    b1p = write_nifti(tmp_path / "b1.nii.gz", b1)
    code, _, err = _run(capsys, "vfa", *paths, "--out", tmp_path / "o1", "--b1", b1p)
    assert code == 0, err
    assert "biased" not in err
    t1 = nib.load(tmp_path / "o1" / "sub-01_rec-vfa_T1map.nii.gz").get_fdata()
    assert abs(np.nanmedian(t1[obj]) - 1.0) < 0.02
    code, _, err = _run(capsys, "vfa", *paths, "--out", tmp_path / "o2")
    assert code == 0
    assert "warning" in err and "biased" in err and "B1" in err
    t1_nob1 = nib.load(tmp_path / "o2" / "sub-01_rec-vfa_T1map.nii.gz").get_fdata()
    assert np.nanmedian(t1_nob1[obj]) < 0.85
    # B1 map on another grid: exit 2, nothing written
    bad = write_nifti(tmp_path / "b1bad.nii.gz", np.ones((5, 5, 3), np.float32))
    _expect_error(capsys, tmp_path / "o3", "vfa", *paths, "--b1", bad, match="grid")


def test_dam_two_3d_inputs(tmp_path, capsys):
    obj = _object()
    b1 = np.where(obj, np.linspace(0.8, 1.2, SHAPE[0])[:, None, None], 1.0)
    s = dam_signals(60.0, b1, np.where(obj, 2000.0, 0.0))
    y = (s + np.random.default_rng(4).normal(0, 1.0, s.shape)).astype(np.float32)
    paths = write_3d_set(tmp_path / "in", "sub-01_DAM", np.abs(y), "FlipAngle", [60.0, 120.0],
                         {"RepetitionTime": 10.0}, entity="flip")
    code, _, err = _run(capsys, "dam", *paths, "--out", tmp_path / "o")
    assert code == 0, err
    tb1 = nib.load(tmp_path / "o" / "sub-01_rec-dam_TB1map.nii.gz").get_fdata()
    # Insko & Bolinger 1993, J Magn Reson A 103:82
    assert np.nanmedian(np.abs(tb1[obj] / b1[obj] - 1)) < 0.01
    assert json.loads((tmp_path / "o" / "sub-01_rec-dam_TB1map.json").read_text())["Units"] == "ratio"
    bad = write_3d_set(tmp_path / "in2", "sub-01_DAM", np.abs(y), "FlipAngle", [60.0, 100.0],
                       {"RepetitionTime": 10.0}, entity="flip")
    _expect_error(capsys, tmp_path / "o2", "dam", *bad, match="2:1")


def test_time_unit_ms(tmp_path, capsys):
    _, _, y = _ir_volume(seed=5)
    p = write_4d(tmp_path, "ms", y, "InversionTime", [t * 1000 for t in TI],
                 {"RepetitionTime": TR * 1000})
    _expect_error(capsys, tmp_path / "o1", "ir", p, match="--time-unit ms")
    code, _, err = _run(capsys, "ir", p, "--out", tmp_path / "o2", "--time-unit", "ms")
    assert code == 0, err
