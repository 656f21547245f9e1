"""Series discovery, validation and lazy loading (design §3).

A *series* is the set of images one fit needs, in one of two forms:

1. one 4D NIfTI ``X.nii[.gz]`` with a sidecar ``X.json`` whose varying key holds a
   list with one value per volume;
2. several 3D NIfTIs, each with its own sidecar holding a scalar for that key.

Times are in seconds (BIDS), angles in degrees. Volumes are sorted by the varying
value. Every problem is a :class:`~pipeline.errors.InputError` naming the file,
the key, what was expected and how to fix it. Image data stay on disk behind
nibabel's array proxies until a slab is asked for.
"""
from __future__ import annotations

import hashlib
import json
import math
import re
import threading
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator, Sequence

import numpy as np

from fitting.errors import excerpt
from pipeline.errors import InputError

# RepetitionTimeExcitation / RepetitionTimePreparation: BIDS keys of the MP2RAGE family
# (readout pulse spacing; time between preparations). SaturationDelay is relaxline's key
# for the time from a saturation pulse to the readout (BIDS defines none).
TIME_KEYS = ("InversionTime", "EchoTime", "RepetitionTime", "RepetitionTimeExcitation",
             "RepetitionTimePreparation", "SaturationDelay")
ANGLE_KEYS = ("FlipAngle", "RefocusingFlipAngle")
SCALAR_KEYS = TIME_KEYS + ANGLE_KEYS + ("MagneticFieldStrength", "SpoilingRFPhaseIncrement")
# BIDS NumberShots: excitations per readout block; a number, or a list of two numbers
# (excitations before and after the k-space centre line)
SHOT_KEYS = ("NumberShots",)
MS_THRESHOLD_S = 30.0  # a "time" above this is almost certainly milliseconds
# with --time-unit ms, a longest time (ms) below this is really seconds (common practice:
# no T1-mapping IR ends its TIs under 10 ms, no echo train or TR under 1 ms)
MS_FLOOR = {"InversionTime": 10.0, "EchoTime": 1.0, "RepetitionTime": 1.0,
            "SaturationDelay": 10.0, "RepetitionTimePreparation": 10.0,
            "RepetitionTimeExcitation": 1.0}
AFFINE_ATOL_MM = 1e-3
# BIDS anat sidecars may give the excitation TR as RepetitionTimeExcitation (BIDS qMRI
# requires it for VFA); it stands in for RepetitionTime when that key is absent.
KEY_ALIASES = {"RepetitionTime": ("RepetitionTimeExcitation",)}
# ... and the other way round for a varying key: TB1AFI (BIDS) gives each image's TR as
# RepetitionTimeExcitation, scanner converters write RepetitionTime.
VARYING_ALIASES = {"RepetitionTimeExcitation": ("RepetitionTime",)}
# BIDS entities that index the volumes of a split series; dropped to form the stem.
# acq-tr<k>: the two interleaved TRs of actual flip-angle imaging (TB1AFI), from memory
# of the BIDS qMRI appendix.
_INDEX_ENTITY = re.compile(r"_(inv|echo|flip|part|mt)-[0-9A-Za-z]+|_acq-tr[0-9]+")


def nifti_stem(path: str | Path) -> str:
    """File name without ``.nii`` / ``.nii.gz``."""
    name = Path(path).name
    for ext in (".nii.gz", ".nii"):
        if name.endswith(ext):
            return name[: -len(ext)]
    return Path(name).stem


def sidecar_path(path: str | Path) -> Path:
    p = Path(path)
    return p.with_name(nifti_stem(p) + ".json")


def sha256_file(path: str | Path, chunk: int = 1 << 20) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(chunk), b""):
            h.update(block)
    return h.hexdigest()


def read_json_file(path: Path, what: str = "sidecar") -> Any:
    """Parse a JSON file the user gave; every problem is an :class:`InputError` naming it."""
    from qc.userfiles import read_text
    text = read_text(path, what, "JSON", InputError)
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}: not valid JSON (line {exc.lineno}, column {exc.colno}: "
                         f"{exc.msg}); fix the {what}.") from None
    except RecursionError:
        raise InputError(f"{path}: the {what} nests lists or objects too deeply to be a "
                         f"sidecar of acquisition parameters; fix the file.") from None


def read_sidecar(path: Path) -> dict[str, Any]:
    """Read a JSON sidecar; it must hold a JSON object."""
    if not path.is_file():
        raise InputError(f"{path}: sidecar not found. Every NIfTI needs a JSON sidecar of the "
                         f"same name holding its acquisition parameters (BIDS keys).")
    obj = read_json_file(path)
    if not isinstance(obj, dict):
        raise InputError(f"{path}: expected a JSON object of BIDS keys, got "
                         f"{type(obj).__name__}.")
    return obj


def _as_number(value: Any, where: str, key: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(f"{where}: key '{key}' must be a number, got {excerpt(value)} "
                         f"({type(value).__name__}).")
    v = float(value)
    if not math.isfinite(v):
        raise InputError(f"{where}: key '{key}' is not finite ({excerpt(value)}); give a real "
                         f"value.")
    return v


def _check_unit(key: str, v: float, where: str, time_unit: str) -> float:
    """Convert to seconds and reject values that look like milliseconds."""
    if key in TIME_KEYS:
        if time_unit == "ms":
            v = v / 1000.0
        elif v > MS_THRESHOLD_S:
            raise InputError(
                f"{where}: key '{key}' = {v:g} looks like milliseconds (BIDS times are in "
                f"seconds; anything above {MS_THRESHOLD_S:g} s is taken as a unit mistake). "
                f"Fix the sidecar, or pass --time-unit ms if all its times are in ms.")
        if v < 0:
            raise InputError(f"{where}: key '{key}' = {v:g} s is negative.")
    elif key == "MagneticFieldStrength" and not v > 0:
        raise InputError(f"{where}: key '{key}' = {v:g} must be a positive field in tesla "
                         f"(e.g. 3); fix the sidecar.")
    return v


def _check_looks_like_seconds(key: str, raw: Sequence[float], where: str) -> None:
    """With ``--time-unit ms``, a longest time under :data:`MS_FLOOR` is really seconds."""
    floor = MS_FLOOR.get(key)
    if floor and len(raw) and 0 < max(raw) < floor:
        raise InputError(f"{where}: key '{key}' is {max(raw):g} at most, which looks like "
                         f"seconds, not milliseconds (a longest {key} under {floor:g} ms is "
                         f"not a real protocol); drop --time-unit ms.")


@dataclass
class Series:
    """A validated series; image data are read lazily with :meth:`read`."""

    paths: list[Path]            # NIfTI files as given (4D: one file)
    key: str                     # varying key, e.g. "InversionTime"
    values: np.ndarray           # varying values, sorted ascending (s or degrees)
    shape: tuple[int, int, int]  # spatial grid
    affine: np.ndarray
    meta: dict[str, Any]         # scalar acquisition parameters (seconds, degrees, tesla)
    stem: str                    # output name stem
    is_complex: bool = False
    _order: np.ndarray = field(default_factory=lambda: np.zeros(0, int), repr=False)
    _images: list[Any] = field(default_factory=list, repr=False)
    _cache: np.ndarray | None = field(default=None, repr=False)

    @property
    def n_volumes(self) -> int:
        return int(self.values.size)

    @property
    def n_voxels(self) -> int:
        return int(np.prod(self.shape))

    @property
    def nbytes_float32(self) -> int:
        return self.n_voxels * self.n_volumes * (8 if self.is_complex else 4)

    @property
    def compressed(self) -> bool:
        """True when a file of the series is gzip-compressed (``.nii.gz``)."""
        return any(p.name.endswith(".gz") for p in self.paths)

    def read(self, z: slice | None = None) -> np.ndarray:
        """Volumes sorted by the varying value as ``(x, y, z, n)``, read-only.

        ``z`` selects a slab of slices. Uncompressed files: only that slab is read from
        disk. Compressed files cannot be read in the middle without decompressing
        everything before it, so the first call decompresses the whole series once
        (float32, the series' size in memory) and every call returns a view of it.
        float32 (complex64 for complex data).
        """
        z = z or slice(0, self.shape[2])
        if self.compressed:
            with _DECOMPRESS_LOCK:   # slabs read from two threads: decompress once
                if self._cache is None:
                    self._cache = self._read(slice(0, self.shape[2]))
                    self._cache.flags.writeable = False
            return self._cache[:, :, z]
        out = self._read(z)
        out.flags.writeable = False
        return out

    def _read(self, z: slice) -> np.ndarray:
        dtype = np.complex64 if self.is_complex else np.float32
        if len(self._images) == 1 and len(self.paths) == 1 and self.n_volumes > 1:
            raw = _read_proxy(self._images[0], self.paths[0], (slice(None), slice(None), z,
                                                               slice(None)))
            out = raw[..., self._order].astype(dtype, copy=False)
        else:
            nz = len(range(*z.indices(self.shape[2])))
            out = np.empty(self.shape[:2] + (nz, self.n_volumes), dtype)
            for j, i in enumerate(self._order):
                vol = _read_proxy(self._images[i], self.paths[i], (slice(None), slice(None), z))
                out[..., j] = vol.reshape(self.shape[:2] + (nz,))
        return out

    def slabs(self, max_voxels: int) -> Iterator[slice]:
        """Slabs of whole slices holding at most ``max_voxels`` voxels (at least one slice)."""
        per_slice = self.shape[0] * self.shape[1]
        step = max(1, max_voxels // max(per_slice, 1))
        for z0 in range(0, self.shape[2], step):
            yield slice(z0, min(z0 + step, self.shape[2]))

    def checksums(self) -> list[dict[str, str]]:
        out = []
        for p in self.paths:
            out.append({"path": str(p), "sha256": sha256_file(p)})
            sc = sidecar_path(p)
            if sc.is_file():
                out.append({"path": str(sc), "sha256": sha256_file(sc)})
        return out


_DECOMPRESS_LOCK = threading.Lock()


def _read_proxy(img, path: Path, index: tuple) -> np.ndarray:
    """Read part of an image's data; a damaged file becomes an error naming it.

    The header is read when the series is opened, the data only here, so a file cut
    short (an interrupted copy) is first noticed at this point. A 2D image is read as
    one slice (x, y, 1).
    """
    try:
        if len(img.shape) == 2 and len(index) >= 3:
            return np.asarray(img.dataobj[index[:2]])[:, :, None][(slice(None),) * 2
                                                                  + index[2:3]]
        return np.asarray(img.dataobj[index])
    except (EOFError, OSError, ValueError, zlib.error) as exc:
        raise InputError(f"{path}: the image data cannot be read ({type(exc).__name__}: "
                         f"{excerpt(str(exc), 200)}). The file is probably truncated or "
                         f"corrupt; copy it again from the scanner or archive.") from None


def _load_image(path: Path):
    """Open a NIfTI (header only) after checking that the header describes a usable grid
    and that the file holds as much image data as the header declares."""
    import nibabel as nib
    if not path.exists():
        raise InputError(f"{path}: file not found.")
    if not (path.name.endswith(".nii") or path.name.endswith(".nii.gz")):
        raise InputError(f"{path}: expected a NIfTI file ending in .nii or .nii.gz.")
    try:
        # no memory map: slab reads fetch only their bytes, and the pages of a mapped
        # file would count in the resident set of a large fit
        img = nib.load(str(path), mmap=False)
        shape = tuple(int(s) for s in img.shape)
        affine = np.asarray(img.affine, float)
    except Exception as exc:
        raise InputError(f"{path}: cannot be read as NIfTI ({excerpt(str(exc), 200)}). Check "
                         f"that the file is complete and really NIfTI.") from None
    if any(n < 1 for n in shape):
        raise InputError(f"{path}: the header declares the image shape {shape}, with a zero "
                         f"dimension, so there is no voxel to read; the header is damaged or "
                         f"was written wrongly. Convert the images from the scanner again.")
    if not np.all(np.isfinite(affine)):
        raise InputError(f"{path}: the header's voxel-to-world transform (sform/qform) holds "
                         f"non-finite values (NaN or infinity), so the maps could not be placed "
                         f"in space; fix the header (convert the images again).")
    _check_data_size(img, path, shape)
    return img


def _check_data_size(img, path: Path, shape: tuple[int, ...]) -> None:
    """Raise when the file holds less image data than the header's shape needs.

    Uncompressed: the file size. ``.nii.gz``: the gzip trailer's uncompressed size (a
    four-byte read), and only when that disagrees (several gzip members, or really too
    short) the data are decompressed and counted.
    """
    try:
        offset = int(img.header.get_data_offset())
        itemsize = int(img.header.get_data_dtype().itemsize)
    except Exception:   # not a plain single-file NIfTI header: nibabel checks on reading
        return
    need = offset + int(np.prod(shape, dtype=object)) * itemsize
    try:
        if path.name.endswith(".gz"):
            with open(path, "rb") as fh:
                fh.seek(-4, 2)
                isize = int.from_bytes(fh.read(4), "little")
            # ISIZE is the length modulo 2^32 (of the last gzip member, usually the only one)
            if isize == need % 2 ** 32 or (need < 2 ** 32 and isize >= need):
                return
            have = _gzip_length(path, need)
        else:
            have = path.stat().st_size
    except (OSError, EOFError, zlib.error):
        raise InputError(f"{path}: the file is damaged (its compressed data cannot be read "
                         f"to the end); copy it again from the scanner or archive.") from None
    if have < need:
        dtype = img.header.get_data_dtype()
        raise InputError(f"{path}: the header declares an image of {' x '.join(map(str, shape))} "
                         f"voxels of {dtype} ({need - offset} bytes of data), but the file holds "
                         f"only {max(have - offset, 0)} bytes of data. The header does not match "
                         f"the data (a damaged or wrongly edited header, or a truncated copy); "
                         f"convert or copy the images again.")


def _gzip_length(path: Path, need: int) -> int:
    """Uncompressed length of a gzip file, counted up to ``need`` bytes."""
    import gzip
    have = 0
    with gzip.open(path, "rb") as fh:
        while have < need:
            block = fh.read(1 << 22)
            if not block:
                break
            have += len(block)
    return have


def _spatial(img, path: Path) -> tuple[int, int, int]:
    shp = tuple(int(s) for s in img.shape)
    if len(shp) > 4 and any(s > 1 for s in shp[4:]):
        raise InputError(f"{path}: image has shape {shp}; expected a 3D volume or a 4D series "
                         f"(x, y, z, volume).")
    if len(shp) == 2:
        shp = shp + (1,)
    if len(shp) < 3:
        raise InputError(f"{path}: image has shape {shp}; expected a 3D volume or 4D series.")
    return shp[:3]  # type: ignore[return-value]


def check_same_grid(ref_shape: Sequence[int], ref_affine: np.ndarray, img, path: Path,
                    what: str) -> None:
    """Raise unless ``img`` lies on the voxel grid ``(ref_shape, ref_affine)``."""
    shp = _spatial(img, path)
    if tuple(shp) != tuple(ref_shape):
        raise InputError(f"{path}: {what} has grid {shp}, but the series has "
                         f"{tuple(ref_shape)}. Maps and masks must share the series' voxel grid "
                         f"(relaxline does not resample); resample it to the series first.")
    if not np.allclose(img.affine, ref_affine, atol=AFFINE_ATOL_MM):
        raise InputError(f"{path}: {what} has a different affine (voxel-to-world) from the "
                         f"series. It must share the series' voxel grid; resample it first.")


def _with_alias(sidecar: dict[str, Any], key: str) -> dict[str, Any]:
    """The sidecar with the varying ``key`` taken from an alias (:data:`VARYING_ALIASES`)
    when it lacks the key itself."""
    if key in sidecar:
        return sidecar
    alias = next((a for a in VARYING_ALIASES.get(key, ()) if a in sidecar), None)
    return {**sidecar, key: sidecar[alias]} if alias else sidecar


def read_series(inputs: Sequence[str | Path], key: str, time_unit: str = "s",
                min_volumes: int = 1, volume_keys: Sequence[str] = ()) -> Series:
    """Validate and open a series whose volumes vary in ``key``.

    Parameters
    ----------
    inputs : one 4D NIfTI, or several 3D NIfTIs, each with a JSON sidecar.
    key : the varying BIDS key (``InversionTime``, ``FlipAngle``, ``EchoTime``).
    time_unit : ``"s"`` (BIDS) or ``"ms"`` for sidecars written in milliseconds.
    min_volumes : fewer volumes than this is an error (e.g. the model's parameter count).
    volume_keys : scalar keys that may differ between volumes (e.g. the ``FlipAngle`` of
        each MP2RAGE inversion); ``meta`` then holds a list in sorted volume order when
        they differ (a 4D sidecar may give them as a list with one value per volume).
    """
    if time_unit not in ("s", "ms"):
        raise InputError(f"--time-unit must be 's' or 'ms', got {time_unit!r}.")
    paths = [Path(p) for p in inputs]
    if not paths:
        raise InputError("no input series given.")
    if len(set(map(str, paths))) != len(paths):
        raise InputError("the same input file is given twice: "
                         + ", ".join(sorted({str(p) for p in paths if paths.count(p) > 1})))
    images = [_load_image(p) for p in paths]
    sidecars = [_with_alias(read_sidecar(sidecar_path(p)), key) for p in paths]
    ndims = [len(img.shape) for img in images]

    if len(paths) == 1 and ndims[0] == 4 and images[0].shape[3] > 1:
        p, img, sc = paths[0], images[0], sidecars[0]
        n = int(img.shape[3])
        where = str(sidecar_path(p))
        if key not in sc:
            raise InputError(f"{where}: missing key '{key}'. A 4D series needs '{key}' as a list "
                             f"with one value per volume ({n} volumes).")
        raw = sc[key]
        if not isinstance(raw, list):
            raise InputError(f"{where}: key '{key}' must be a list of {n} values (one per "
                             f"volume of the 4D image), got {excerpt(raw)}.")
        if len(raw) != n:
            raise InputError(f"{where}: key '{key}' has {len(raw)} values but {p.name} has "
                             f"{n} volumes; give one value per volume.")
        values = [_check_unit(key, _as_number(v, where, key), where, time_unit) for v in raw]
        if time_unit == "ms":
            _check_looks_like_seconds(key, [float(v) for v in raw], where)
        metas = [sc]
        shape, affine = _spatial(img, p), img.affine
    else:
        if any(d == 4 and img.shape[3] > 1 for d, img in zip(ndims, images)):
            bad = [str(p) for p, d, img in zip(paths, ndims, images) if d == 4 and img.shape[3] > 1]
            raise InputError(f"{', '.join(bad)}: a 4D image must be the only input of its series; "
                             f"give either one 4D NIfTI or several 3D NIfTIs.")
        shape, affine = _spatial(images[0], paths[0]), images[0].affine
        values = []
        for p, img, sc in zip(paths, images, sidecars):
            where = str(sidecar_path(p))
            check_same_grid(shape, affine, img, p, "this volume")
            if key not in sc:
                raise InputError(f"{where}: missing key '{key}'; each 3D volume's sidecar needs "
                                 f"its '{key}' as a number.")
            if isinstance(sc[key], list):
                raise InputError(f"{where}: key '{key}' is a list, but {p.name} is a single 3D "
                                 f"volume; give one number.")
            values.append(_check_unit(key, _as_number(sc[key], where, key), where, time_unit))
        metas = sidecars
        if time_unit == "ms":
            _check_looks_like_seconds(key, [v * 1000.0 for v in values],
                                      ", ".join(str(sidecar_path(p)) for p in paths))

    vals = np.asarray(values, dtype=float)
    if vals.size < min_volumes:
        raise InputError(f"{paths[0]}: {vals.size} volume(s) in the series but the model needs "
                         f"at least {min_volumes} values of '{key}'.")
    uniq, counts = np.unique(vals, return_counts=True)
    if np.any(counts > 1):
        raise InputError(f"{', '.join(map(str, paths))}: duplicate '{key}' value(s) "
                         f"{uniq[counts > 1].tolist()}; each volume needs a distinct value.")

    order = np.argsort(vals, kind="stable")
    meta = _common_meta(paths, metas, key, time_unit, volume_keys, order, len(vals))
    dt = images[0].get_data_dtype()
    stem = _series_stem(paths)
    return Series(paths=paths, key=key, values=vals[order], shape=shape,
                  affine=np.asarray(affine, float), meta=meta, stem=stem,
                  is_complex=np.issubdtype(dt, np.complexfloating),
                  _order=order if len(paths) > 1 or ndims[0] == 4 else np.arange(1),
                  _images=images)


def _volume_values(paths: list[Path], metas: list[dict], k: str, time_unit: str,
                   order: np.ndarray, n: int) -> Any:
    """Per-volume values of key ``k`` in sorted order (one number when they all agree),
    or None when no sidecar gives it. A 4D sidecar may hold a list of ``n`` values."""
    if len(metas) == 1 and isinstance(metas[0].get(k), list):
        where = str(sidecar_path(paths[0]))
        raw = metas[0][k]
        if len(raw) != n:
            raise InputError(f"{where}: key '{k}' has {len(raw)} values but the series has "
                             f"{n} volumes; give one value per volume (or a single number).")
        vals = [_check_unit(k, _as_number(v, where, k), where, time_unit) for v in raw]
    else:
        found = [(p, sc[k]) for p, sc in zip(paths, metas) if sc.get(k) is not None]
        if not found:
            return None
        if len(found) != len(metas) and len(metas) > 1:
            missing = [str(sidecar_path(p)) for p, sc in zip(paths, metas) if sc.get(k) is None]
            raise InputError(f"{missing[0]}: key '{k}' is missing here but given in the other "
                             f"volumes' sidecars; give it for every volume.")
        vals = []
        for p, v in found:
            where = str(sidecar_path(p))
            if isinstance(v, list):
                raise InputError(f"{where}: key '{k}' must be a single number for this volume, "
                                 f"got a list.")
            vals.append(_check_unit(k, _as_number(v, where, k), where, time_unit))
        if len(vals) == 1:
            return vals[0]
    vals = [vals[i] for i in order]
    return vals[0] if all(math.isclose(v, vals[0], rel_tol=1e-6, abs_tol=1e-9)
                          for v in vals) else vals


def _shots(value: Any, where: str, key: str) -> Any:
    """A BIDS NumberShots value: a positive whole number or a list of two whole numbers
    (excitations before and after the k-space centre)."""
    def whole(v: Any) -> int:
        x = _as_number(v, where, key)
        if x != round(x) or x < 0:
            raise InputError(f"{where}: key '{key}' must hold whole numbers of excitations, "
                             f"got {v!r}.")
        return int(round(x))
    if isinstance(value, list):
        if len(value) != 2:
            raise InputError(f"{where}: key '{key}' as a list must hold two numbers (the "
                             f"excitations before and after the k-space centre), got "
                             f"{value!r}.")
        return [whole(v) for v in value]
    n = whole(value)
    if n < 1:
        raise InputError(f"{where}: key '{key}' = {value!r} must be at least 1.")
    return n


def _common_meta(paths: list[Path], metas: list[dict], key: str, time_unit: str,
                 volume_keys: Sequence[str] = (), order: np.ndarray | None = None,
                 n: int = 0) -> dict:
    """Scalar acquisition parameters; they must agree across the volumes of a series,
    except ``volume_keys`` (:func:`_volume_values`)."""
    meta: dict[str, Any] = {}
    for k in volume_keys:
        if k != key:
            v = _volume_values(paths, metas, k, time_unit, order, n)
            if v is not None:
                meta[k] = v
    for k in SHOT_KEYS:
        seen = [(p, _shots(sc[k], str(sidecar_path(p)), k)) for p, sc in zip(paths, metas)
                if sc.get(k) is not None]
        for p, v in seen[1:]:
            if v != seen[0][1]:
                raise InputError(f"{sidecar_path(p)}: key '{k}' = {v!r} differs from "
                                 f"{seen[0][1]!r} in {sidecar_path(seen[0][0])}; all volumes "
                                 f"of a series must share it.")
        if seen:
            meta[k] = seen[0][1]
    for k in SCALAR_KEYS:
        if k == key or k in volume_keys or k in VARYING_ALIASES.get(key, ()):
            continue      # (the varying key may be read from an alias: that one varies too)
        seen = []
        for p, sc in zip(paths, metas):
            name = k if sc.get(k) is not None else next(
                (a for a in KEY_ALIASES.get(k, ()) if a != key and sc.get(a) is not None), k)
            if sc.get(name) is not None:
                where = str(sidecar_path(p))
                if isinstance(sc[name], list):
                    raise InputError(f"{where}: key '{name}' must be a single number for this "
                                     f"series (it varies in '{key}'), got a list.")
                v = _as_number(sc[name], where, name)
                if time_unit == "ms" and k == "RepetitionTime":
                    _check_looks_like_seconds(k, [v], where)
                seen.append((p, _check_unit(name, v, where, time_unit)))
        if seen:
            v0 = seen[0][1]
            for p, v in seen[1:]:
                if not math.isclose(v, v0, rel_tol=1e-6, abs_tol=1e-9):
                    raise InputError(f"{sidecar_path(p)}: key '{k}' = {v:g} differs from "
                                     f"{v0:g} in {sidecar_path(seen[0][0])}; all volumes of a "
                                     f"series must share it.")
            meta[k] = v0
    for k in ("PhantomTemperature", "Site", "Scanner", "MRAcquisitionType",  # context
              "SpoilingType"):
        if k in metas[0]:
            meta[k] = metas[0][k]
    return meta


def _series_stem(paths: list[Path]) -> str:
    if len(paths) == 1:
        return nifti_stem(paths[0])
    stems = {_INDEX_ENTITY.sub("", nifti_stem(p)) for p in paths}
    if len(stems) == 1:
        return stems.pop()
    import os
    prefix = os.path.commonprefix([nifti_stem(p) for p in paths]).rstrip("_-")
    return prefix or nifti_stem(paths[0])


def load_grid_map(path: str | Path, series_or_shape, affine: np.ndarray | None = None,
                  what: str = "map", dtype=np.float32) -> np.ndarray:
    """Load a 3D map (B1, mask, labels) that must share the series' voxel grid.

    Returns ``dtype`` (float32 by default; label maps use :func:`load_label_map`).
    """
    p = Path(path)
    img = _load_image(p)
    if isinstance(series_or_shape, Series):
        shape, affine = series_or_shape.shape, series_or_shape.affine
    else:
        shape = tuple(series_or_shape)
    if len(img.shape) > 3 and any(s > 1 for s in img.shape[3:]):
        raise InputError(f"{p}: {what} must be a 3D image, got shape {tuple(img.shape)}.")
    check_same_grid(shape, affine, img, p, what)
    data = _read_proxy(img, p, (slice(None),) * min(len(img.shape), 3))
    return np.asarray(data, dtype=dtype).reshape(shape)


def load_label_map(path: str | Path, series_or_shape, affine: np.ndarray | None = None,
                   what: str = "label map") -> np.ndarray:
    """A label map on the series' grid as int64 (0 = background), every label kept distinct.

    Read as float64, which holds every whole number up to :data:`qc.roi.MAX_LABEL` (2^53)
    exactly, integer or float files alike (a float32 cast would merge labels above
    2^24); values must be whole numbers (no interpolated or probability map) from 0 to
    that limit.
    """
    from qc.roi import MAX_LABEL
    arr = load_grid_map(path, series_or_shape, affine, what=what, dtype=np.float64)
    bad = ~np.isfinite(arr)
    if bad.any():
        raise InputError(f"{path}: the {what} holds non-finite values (NaN or infinity) in "
                         f"{int(bad.sum())} voxel(s); labels are whole numbers (0 = background, "
                         f"1, 2, ... = regions).")
    odd = arr != np.round(arr)
    if odd.any():
        shown = ", ".join(f"{v:g}" for v in np.unique(arr[odd])[:5])
        raise InputError(f"{path}: the {what} holds non-integer values ({shown}); labels must "
                         f"be whole numbers (0 = background). Was it resampled with "
                         f"interpolation? Resample label maps with nearest neighbour.")
    if arr.size and (arr.min() < 0 or arr.max() > MAX_LABEL):
        v = arr.min() if arr.min() < 0 else arr.max()
        raise InputError(f"{path}: the {what} holds the label {v:g}; labels are whole numbers "
                         f"from 0 (background) up to 2^53. Check that this is a label map.")
    return arr.astype(np.int64)
