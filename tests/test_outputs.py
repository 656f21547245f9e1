"""Output writing (design §6): atomic, deterministic, sidecars with Units and provenance."""
from __future__ import annotations

import json
import os

import nibabel as nib
import numpy as np
import pytest

from pipeline import outputs
from pipeline.outputs import atomic_write_bytes, map_name, write_map

AFF = np.diag([1.5, 1.5, 3.0, 1.0])


def test_map_and_sidecar(tmp_path):
    arr = np.arange(24, dtype=np.float32).reshape(2, 3, 4)
    p = write_map(tmp_path, "sub-a_IRT1", "T1map", arr, AFF, {"Model": "ir", "Engine": "fast"})
    assert p.name == "sub-a_IRT1_T1map.nii.gz"
    img = nib.load(str(p))
    np.testing.assert_array_equal(np.asarray(img.dataobj), arr)
    np.testing.assert_allclose(img.affine, AFF)
    side = json.loads((tmp_path / "sub-a_IRT1_T1map.json").read_text())
    assert side["Units"] == "s" and side["Model"] == "ir"
    q = write_map(tmp_path, "sub-a_IRT1", "T1map", arr, AFF, {}, desc="stderr")
    assert q.name == "sub-a_IRT1_desc-stderr_T1map.nii.gz"
    assert map_name("x", "mask", "fitstatus") == "x_desc-fitstatus_mask.nii.gz"


def test_same_numbers_same_bytes(tmp_path):
    arr = np.random.default_rng(1).random((5, 5, 2)).astype(np.float32)
    a = write_map(tmp_path / "a", "s", "T1map", arr, AFF, {}).read_bytes()
    b = write_map(tmp_path / "b", "s", "T1map", arr, AFF, {}).read_bytes()
    assert a == b


def test_interrupted_write_leaves_nothing(tmp_path, monkeypatch):
    target = tmp_path / "x.nii.gz"
    target.write_bytes(b"old complete file")

    def boom(src, dst):
        raise KeyboardInterrupt  # the process is stopped between write and rename

    monkeypatch.setattr(outputs.os, "replace", boom)
    with pytest.raises(KeyboardInterrupt):
        atomic_write_bytes(target, b"new")
    assert target.read_bytes() == b"old complete file"
    assert os.listdir(tmp_path) == ["x.nii.gz"]  # no temporary file left behind


def test_written_files_follow_umask(tmp_path):
    old = os.umask(0o022)
    try:
        p = atomic_write_bytes(tmp_path / "r.html", b"x")
    finally:
        os.umask(old)
    assert (p.stat().st_mode & 0o777) == 0o644  # readable by the group and others, as open() would
