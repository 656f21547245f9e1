"""Series input contract (design §3): both forms, sorting, units and every validation."""
from __future__ import annotations

import json

import numpy as np
import pytest

from pipeline.errors import InputError
from pipeline.series import load_grid_map, read_series
from seriesio import AFFINE, write_3d_set, write_4d, write_json, write_nifti

TIS = [0.05, 0.4, 0.1, 1.6, 0.8]  # unsorted on purpose


@pytest.fixture()
def data():
    rng = np.random.default_rng(0)
    return rng.normal(100, 10, size=(4, 3, 2, len(TIS))).astype(np.float32)


def test_4d_round_trip_sorted(tmp_path, data):
    p = write_4d(tmp_path, "sub-a_ses-1_IRT1", data, "InversionTime", TIS,
                 {"RepetitionTime": 3.0, "MagneticFieldStrength": 3})
    s = read_series([p], "InversionTime")
    order = np.argsort(TIS)
    assert s.values.tolist() == sorted(TIS)
    assert s.shape == (4, 3, 2) and s.n_volumes == 5 and s.stem == "sub-a_ses-1_IRT1"
    np.testing.assert_array_equal(s.read(), data[..., order])
    np.testing.assert_array_equal(s.read(slice(1, 2)), data[:, :, 1:2][..., order])
    assert s.meta["RepetitionTime"] == 3.0
    np.testing.assert_allclose(s.affine, AFFINE)
    assert s.read().dtype == np.float32


def test_3d_set_round_trip_sorted(tmp_path, data):
    paths = write_3d_set(tmp_path, "sub-a_IRT1", data, "InversionTime", TIS,
                         {"RepetitionTime": 3.0})
    s = read_series(paths[::-1], "InversionTime")
    order = np.argsort(TIS)
    assert s.values.tolist() == sorted(TIS)
    np.testing.assert_array_equal(s.read(), data[..., order])
    assert s.stem == "sub-a_IRT1"  # the index entity is dropped from the output stem


def test_time_unit_ms(tmp_path, data):
    p = write_4d(tmp_path, "x", data, "InversionTime", [t * 1000 for t in TIS],
                 {"RepetitionTime": 3000})
    s = read_series([p], "InversionTime", time_unit="ms")
    np.testing.assert_allclose(s.values, sorted(TIS))
    assert s.meta["RepetitionTime"] == pytest.approx(3.0)


def _err(fn, *args, **kw) -> str:
    with pytest.raises(InputError) as exc:
        fn(*args, **kw)
    return str(exc.value)


def test_milliseconds_detected(tmp_path, data):
    p = write_4d(tmp_path, "x", data, "InversionTime", [t * 1000 for t in TIS])
    msg = _err(read_series, [p], "InversionTime")
    assert "x.json" in msg and "InversionTime" in msg and "milliseconds" in msg
    assert "--time-unit ms" in msg


def test_wrong_count(tmp_path, data):
    p = write_4d(tmp_path, "x", data, "InversionTime", TIS[:-1])
    msg = _err(read_series, [p], "InversionTime")
    assert "x.json" in msg and "4 values" in msg and "5 volumes" in msg


def test_missing_key_and_sidecar(tmp_path, data):
    p = write_4d(tmp_path, "x", data, "EchoTime", TIS)
    assert "missing key 'InversionTime'" in _err(read_series, [p], "InversionTime")
    (tmp_path / "x.json").unlink()
    assert "sidecar not found" in _err(read_series, [p], "InversionTime")


def test_duplicates_and_nonfinite(tmp_path, data):
    p = write_4d(tmp_path, "x", data, "InversionTime", [0.1, 0.1, 0.2, 0.3, 0.4])
    assert "duplicate" in _err(read_series, [p], "InversionTime")
    (tmp_path / "x.json").write_text('{"InversionTime": [0.1, NaN, 0.2, 0.3, 0.4]}')
    assert "not finite" in _err(read_series, [p], "InversionTime")
    (tmp_path / "x.json").write_text('{"InversionTime": [0.1, "a", 0.2, 0.3, 0.4]}')
    assert "must be a number" in _err(read_series, [p], "InversionTime")
    (tmp_path / "x.json").write_text('{"InversionTime": [0.1, ')
    assert "not valid JSON" in _err(read_series, [p], "InversionTime")


def test_mismatched_shapes_and_affines(tmp_path, data):
    paths = write_3d_set(tmp_path, "s_IRT1", data, "InversionTime", TIS)
    write_nifti(paths[2], np.zeros((4, 3, 3), np.float32))
    msg = _err(read_series, paths, "InversionTime")
    assert paths[2].name in msg and "grid" in msg
    write_nifti(paths[2], data[..., 2], affine=np.diag([2.0, 2.0, 5.0, 1.0]))
    assert "affine" in _err(read_series, paths, "InversionTime")


def test_inconsistent_fixed_parameter(tmp_path, data):
    paths = write_3d_set(tmp_path, "s_IRT1", data, "InversionTime", TIS, {"RepetitionTime": 3.0})
    write_json(paths[1].with_name(paths[1].name.replace(".nii.gz", ".json")),
               {"InversionTime": TIS[1], "RepetitionTime": 2.0})
    assert "RepetitionTime" in _err(read_series, paths, "InversionTime")


def test_not_nifti_and_missing_file(tmp_path):
    bad = tmp_path / "x.nii.gz"
    bad.write_bytes(b"not a nifti")
    write_json(tmp_path / "x.json", {"InversionTime": [0.1]})
    assert "cannot be read as NIfTI" in _err(read_series, [bad], "InversionTime")
    assert "file not found" in _err(read_series, [tmp_path / "nope.nii"], "InversionTime")


def test_too_few_volumes(tmp_path, data):
    p = write_4d(tmp_path, "x", data[..., :2], "InversionTime", TIS[:2])
    assert "at least 3" in _err(read_series, [p], "InversionTime", min_volumes=3)


def test_grid_maps(tmp_path, data):
    p = write_4d(tmp_path, "x", data, "InversionTime", TIS)
    s = read_series([p], "InversionTime")
    b1 = write_nifti(tmp_path / "b1.nii.gz", np.ones((4, 3, 2), np.float32))
    assert load_grid_map(b1, s, what="B1 map").shape == (4, 3, 2)
    off = write_nifti(tmp_path / "b1off.nii.gz", np.ones((4, 3, 2), np.float32),
                      affine=np.diag([2.0, 2.0, 4.0, 1.0]) + np.eye(4) * 0 + _shift(1.0))
    msg = _err(load_grid_map, off, s, what="B1 map")
    assert "b1off.nii.gz" in msg and "B1 map" in msg and "resample" in msg
    small = write_nifti(tmp_path / "mask.nii.gz", np.ones((4, 3, 1), np.uint8))
    assert "grid" in _err(load_grid_map, small, s, what="mask")


def _shift(mm: float) -> np.ndarray:
    m = np.zeros((4, 4))
    m[0, 3] = mm
    return m


def test_sidecar_not_object(tmp_path, data):
    p = write_4d(tmp_path, "x", data, "InversionTime", TIS)
    (tmp_path / "x.json").write_text(json.dumps([1, 2, 3]))
    assert "JSON object" in _err(read_series, [p], "InversionTime")


def test_truncated_data_is_an_error_naming_the_file(tmp_path):
    big = np.random.default_rng(1).normal(size=(24, 24, 4, len(TIS))).astype(np.float32)
    p = write_4d(tmp_path, "x", big, "InversionTime", TIS)
    raw = p.read_bytes()
    p.write_bytes(raw[: len(raw) // 2])  # header intact, data cut short
    s = read_series([p], "InversionTime")  # opening reads the header only
    msg = _err(s.read)
    assert "x.nii.gz" in msg and "truncated or corrupt" in msg
