"""Atomic, reproducible output writing (design §6).

Every file is written to a temporary name in its destination folder and renamed
into place, so an interrupted run never leaves a half-written file under its
final name. NIfTI maps are gzip-compressed with a zero timestamp so the same
numbers give the same bytes (reruns and cluster runs compare bitwise).
"""
from __future__ import annotations

import gzip
import io
import json
import os
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import InputError

BIDS_UNITS = {"T1map": "s", "T2map": "s", "T2starmap": "s", "M0map": "arbitrary",
              "TB1map": "ratio"}


def package_version() -> str:
    try:
        from importlib.metadata import version
        return version("relaxline")
    except Exception:
        return "unknown"


def ensure_dir(path: str | Path) -> Path:
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise InputError(f"{p}: exists and is not a folder; give a folder name for the "
                         f"outputs (a new one is created).")
    try:
        p.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{p}: cannot create output folder ({exc.strerror}); give a folder "
                         f"you can write to.") from None
    return p


def atomic_write_bytes(path: str | Path, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder."""
    path = Path(path)
    if path.is_dir():
        raise InputError(f"{path}: is a folder; give a file name to write.")
    ensure_dir(path.parent)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        # mkstemp creates 0600; give the file the permissions a plain open() would (umask)
        os.fchmod(fd, 0o666 & ~_umask())
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return path


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write_text(path: str | Path, text: str) -> Path:
    return atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_json(path: str | Path, obj: Any) -> Path:
    return atomic_write_text(path, json.dumps(obj, indent=2, sort_keys=True, default=_jsonable)
                             + "\n")


def atomic_write_tsv(path: str | Path, df) -> Path:
    """Write a pandas DataFrame as TSV (no index, fixed float format)."""
    return atomic_write_text(path, df.to_csv(sep="\t", index=False, float_format="%.6g",
                                             lineterminator="\n"))


def _jsonable(o: Any):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def nifti_bytes(array: np.ndarray, affine: np.ndarray) -> bytes:
    """Deterministic .nii.gz bytes for ``array`` on ``affine``."""
    import nibabel as nib
    img = nib.Nifti1Image(np.asarray(array), np.asarray(affine, float))
    img.header.set_xyzt_units("mm", "sec")
    if np.issubdtype(array.dtype, np.floating):
        img.header.set_slope_inter(1.0, 0.0)
    raw = img.to_bytes()
    buf = io.BytesIO()
    with gzip.GzipFile(fileobj=buf, mode="wb", compresslevel=6, mtime=0, filename="") as gz:
        gz.write(raw)
    return buf.getvalue()


def atomic_write_nifti(path: str | Path, array: np.ndarray, affine: np.ndarray) -> Path:
    path = Path(path)
    if path.name.endswith(".nii.gz"):
        return atomic_write_bytes(path, nifti_bytes(array, affine))
    import nibabel as nib
    return atomic_write_bytes(path, nib.Nifti1Image(np.asarray(array), affine).to_bytes())


def map_name(stem: str, suffix: str, desc: str | None = None) -> str:
    """BIDS-derivative file name: ``<stem>[_desc-<desc>]_<suffix>.nii.gz``."""
    return f"{stem}_desc-{desc}_{suffix}.nii.gz" if desc else f"{stem}_{suffix}.nii.gz"


def write_map(out_dir: str | Path, stem: str, suffix: str, array: np.ndarray,
              affine: np.ndarray, provenance: dict[str, Any], desc: str | None = None,
              units: str | None = None, extra: dict[str, Any] | None = None) -> Path:
    """Write one map and its JSON sidecar (``Units`` + provenance) atomically.

    The sidecar is written after the image, so a map whose sidecar exists is complete.
    """
    out_dir = ensure_dir(out_dir)
    path = out_dir / map_name(stem, suffix, desc)
    if units is None:
        units = "s" if desc == "stderr" and suffix in ("T1map", "T2map", "T2starmap") else \
            BIDS_UNITS.get(suffix, "arbitrary")
    atomic_write_nifti(path, array, affine)
    sidecar = {"Units": units, **provenance, **(extra or {})}
    atomic_write_json(path.with_name(path.name[: -len(".nii.gz")] + ".json"), sidecar)
    return path


def provenance(model: str, engine: str, options: dict[str, Any], series) -> dict[str, Any]:
    """Provenance block for map sidecars: model, engine, options, version, input checksums."""
    from pipeline.bidsderiv import source_uri
    checksums = series.checksums() if series is not None else []
    return {
        "Model": model,
        "Engine": engine,
        "Options": options,
        "RelaxlineVersion": package_version(),
        # BIDS URIs of the input files (design §6); SourceFiles: where they were and sha256
        "Sources": [source_uri(c["path"]) for c in checksums],
        "SourceFiles": checksums,
        "VaryingKey": getattr(series, "key", None),
        "VaryingValues": getattr(series, "values", np.zeros(0)).tolist(),
    }
