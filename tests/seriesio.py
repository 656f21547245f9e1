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


def combine_4d(session_dir: Path, suffixes: Sequence[str] = ("IRT1", "VFA", "MESE", "MEGRE"),
               entities: str = "inv|flip|echo") -> None:
    """Turn the split BIDS series of a session (one 3D file per ``inv-``/``flip-``/``echo-``)
    into the 4D-with-list form of design §3, in place: ``<stem>_<suffix>.nii.gz`` whose
    sidecar lists the varying key. Volumes keep the index order; TB1DAM (fmap) is kept split.
    For tests of the 4D form on simulated data (work on a copy: files are removed)."""
    import re
    pat = re.compile(rf"^(?P<pre>.+)_(?P<ent>{entities})-(?P<k>[0-9]+)_(?P<suf>[A-Za-z0-9]+)"
                     r"\.nii\.gz$")
    for folder in sorted(p for p in Path(session_dir).iterdir() if p.is_dir()):
        groups: dict[tuple[str, str], list[tuple[int, Path]]] = {}
        for p in folder.glob("*.nii.gz"):
            m = pat.match(p.name)
            if m and m["suf"] in suffixes:
                groups.setdefault((m["pre"], m["suf"]), []).append((int(m["k"]), p))
        for (pre, suf), items in groups.items():
            items.sort()
            sides = [json.loads(p.with_name(p.name[:-7] + ".json").read_text()) for _, p in items]
            varying = [k for k in sides[0] if any(s.get(k) != sides[0][k] for s in sides)]
            first = nib.load(str(items[0][1]))
            data = np.stack([np.asarray(nib.load(str(p)).dataobj) for _, p in items], axis=-1)
            nib.save(nib.Nifti1Image(data, first.affine), str(folder / f"{pre}_{suf}.nii.gz"))
            merged = {**sides[0], **{k: [s[k] for s in sides] for k in varying}}
            write_json(folder / f"{pre}_{suf}.json", merged)
            for _, p in items:
                p.unlink()
                p.with_name(p.name[:-7] + ".json").unlink()
