"""Test helpers: write small series in both input forms of design §3."""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Sequence

import nibabel as nib
import numpy as np

AFFINE = np.diag([2.0, 2.0, 4.0, 1.0])


def write_nifti(path: Path, data: np.ndarray, affine: np.ndarray = AFFINE) -> Path:
    nib.save(nib.Nifti1Image(np.asarray(data), affine), str(path))
    return path


def write_json(path: Path, obj: Any) -> Path:
    path.write_text(json.dumps(obj))
    return path


def write_4d(folder: Path, stem: str, data: np.ndarray, key: str, values: Sequence[float],
             extra: dict | None = None, affine: np.ndarray = AFFINE) -> Path:
    """One 4D NIfTI ``stem.nii.gz`` plus ``stem.json`` holding ``key`` as a list."""
    folder.mkdir(parents=True, exist_ok=True)
    p = write_nifti(folder / f"{stem}.nii.gz", data, affine)
    write_json(folder / f"{stem}.json", {key: list(map(float, values)), **(extra or {})})
    return p


def write_3d_set(folder: Path, stem: str, data: np.ndarray, key: str, values: Sequence[float],
                 extra: dict | None = None, entity: str = "inv",
                 affine: np.ndarray = AFFINE) -> list[Path]:
    """Several 3D NIfTIs ``stem_<entity>-<k>.nii.gz`` each with a scalar sidecar."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for k, v in enumerate(values):
        name = stem.replace("_", f"_{entity}-{k + 1}_", 1) if "_" in stem else f"{stem}_{entity}-{k + 1}"
        p = write_nifti(folder / f"{name}.nii.gz", data[..., k], affine)
        write_json(folder / f"{name}.json", {key: float(v), **(extra or {})})
        paths.append(p)
    return paths
