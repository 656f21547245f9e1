"""Atomic, reproducible output writing (design §6).

Every file is written to a temporary name in its destination folder and renamed
into place, so an interrupted run never leaves a half-written file under its
final name. NIfTI maps are gzip-compressed with a zero timestamp so the same
numbers give the same bytes (reruns and cluster runs compare bitwise).

Files that belong together (the maps of one fit, the tables, figures and report of
one QC) are written as a set with :func:`output_set`: staged in a hidden folder
inside the destination and moved into place only once every file of the set is
written, so a full disk or an error half-way leaves the earlier set (or nothing),
never a mixture. Temporary names carry the host and process id of their writer
(``.<name>.~<host>~<pid>~<random>.tmp``), so the leftovers of a killed process are
recognised and removed by the next write into that folder (:func:`clean_stale`).
"""
from __future__ import annotations

import gzip
import io
import json
import os
import re
import secrets
import shutil
import socket
import threading
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Iterator

import numpy as np

from fitting.errors import is_no_space, no_space_error
from pipeline.errors import InputError

BIDS_UNITS = {"T1map": "s", "T2map": "s", "T2starmap": "s", "M0map": "arbitrary",
              "TB1map": "ratio"}
_HOST = re.sub(r"[^A-Za-z0-9_-]", "_", socket.gethostname())[:40] or "host"
_TEMP = re.compile(r"\.~(?P<host>[A-Za-z0-9_-]+)~(?P<pid>[0-9]+)~[0-9a-f]+\.tmp$")
# temporary names of earlier versions (tempfile.mkstemp): no owner recorded, so only
# removed once surely abandoned
_LEGACY_TEMP = re.compile(r"^\..+\.[a-z0-9_]{8}\.tmp$")
STALE_AFTER_S = 24 * 3600   # no write takes this long: any temporary this old is a leftover
_cleaned: set[str] = set()   # folders already cleaned by this process


def _temp_token() -> str:
    return f"~{_HOST}~{os.getpid()}~{secrets.token_hex(4)}.tmp"


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:      # another user's process
        return True
    return True


def clean_stale(folder: str | Path) -> list[Path]:
    """Remove temporary files and staging folders left in ``folder`` by killed writers.

    A temporary belongs to a dead writer when it was made on this host by a process that
    no longer exists, or when it is older than :data:`STALE_AFTER_S` (any host). Returns
    what was removed.
    """
    removed: list[Path] = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    now = time.time()
    for e in entries:
        m = _TEMP.search(e.name)
        if not (m or _LEGACY_TEMP.match(e.name)):
            continue
        try:
            old = now - e.stat(follow_symlinks=False).st_mtime > STALE_AFTER_S
        except OSError:
            continue
        dead = bool(m) and m.group("host") == _HOST and not _pid_alive(int(m.group("pid")))
        if not (dead or old):
            continue
        try:
            if e.is_dir(follow_symlinks=False):
                shutil.rmtree(e.path)
            else:
                os.unlink(e.path)
            removed.append(Path(e.path))
        except OSError:
            pass   # another process cleaned it first, or no permission: leave it
    return removed


def _clean_once(folder: Path) -> None:
    key = str(folder.resolve())
    if key not in _cleaned:
        _cleaned.add(key)
        clean_stale(folder)


def _no_space(exc: OSError, folder: Path) -> InputError | None:
    """The user-facing error for a full disk (or quota), else None."""
    if is_no_space(exc):
        return InputError(str(no_space_error(folder)))
    return None


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
        full = _no_space(exc, p.parent)
        if full is not None:
            raise full from None
        raise InputError(f"{p}: cannot create output folder ({exc.strerror}); give a folder "
                         f"you can write to.") from None
    return p


def atomic_write_bytes(path: str | Path, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder.

    Inside :func:`output_set` the file goes to the set's staging folder and reaches
    ``path`` when the set is complete. Returns ``path``. A full disk becomes an
    :class:`InputError` naming the folder ("no space left on ..."), with nothing left.
    """
    path = Path(path)
    if path.is_dir():
        raise InputError(f"{path}: is a folder; give a file name to write.")
    stage = _active_stage(path)
    target = stage.staged(path) if stage else path
    folder = ensure_dir(target.parent)
    if stage is None:
        _clean_once(folder)
    tmp = folder / f".{target.name}.{_temp_token()}"
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)  # umask applies
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException as exc:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        full = _no_space(exc, path.parent) if isinstance(exc, OSError) else None
        if full is not None:
            raise full from None
        raise
    return path


@dataclass
class _Stage:
    """An output set being written: ``root`` (hidden, inside ``dest``) mirrors ``dest``."""

    dest: Path
    root: Path
    protect: list[Path]
    order: dict[Path, None] = field(default_factory=dict)   # relative paths, write order

    def covers(self, path: Path) -> bool:
        return _inside(_absolute(path), self.dest)

    def staged(self, path: Path) -> Path:
        rel = _absolute(path).relative_to(self.dest)
        with _STAGE_LOCK:
            self.order.pop(rel, None)
            self.order[rel] = None
        return self.root / rel

    def commit(self) -> None:
        """Move every staged file into place: data first, then sidecars and reports, so
        a map whose sidecar exists (and a report) is complete."""
        rels = sorted(self.order, key=lambda r: r.suffix in (".json", ".html"))
        finals = [self.dest / r for r in rels]
        refuse_overwriting_inputs(self.protect, finals)
        try:
            for d in sorted({f.parent for f in finals}):
                d.mkdir(parents=True, exist_ok=True)
            for rel, final in zip(rels, finals):
                os.replace(self.root / rel, final)
            _fsync_dirs({f.parent for f in finals})
        except OSError as exc:
            full = _no_space(exc, self.dest)
            if full is not None:
                raise full from None
            raise


# open output sets of this process: process-wide (not per thread), so maps compressed on
# worker threads are staged like the rest; the lock guards staging from several threads
_STAGES: list[_Stage] = []
_STAGE_LOCK = threading.Lock()


def _absolute(path: str | Path) -> Path:
    return Path(os.path.abspath(path))


def _inside(path: Path, folder: Path) -> bool:
    return path == folder or folder in path.parents


def _active_stage(path: Path) -> _Stage | None:
    with _STAGE_LOCK:
        stages = list(_STAGES)
    for stage in reversed(stages):
        if stage.covers(path):
            return stage
    return None


def _fsync_dirs(folders: Iterable[Path]) -> None:
    for d in folders:
        try:
            fd = os.open(d, os.O_RDONLY)
        except OSError:
            continue
        try:
            os.fsync(fd)
        except OSError:
            pass
        finally:
            os.close(fd)


@contextmanager
def output_set(dest: str | Path, protect: Iterable[str | Path] = ()) -> Iterator[Path]:
    """Write a set of files under ``dest`` all-or-nothing.

    Inside the block, every :func:`atomic_write_bytes` (and the writers built on it) to a
    path under ``dest`` is staged in a hidden folder inside ``dest``; when the block
    ends normally the staged files are moved into place, else they are removed, so an
    error or a full disk half-way never leaves part of a new set beside (or instead of)
    the old one. ``protect``: input files that no output may replace (checked before
    anything is moved). A set opened inside another set for the same folder joins it.
    """
    dest_abs = _absolute(dest)
    outer = _active_stage(dest_abs)
    if outer is not None:
        outer.protect.extend(Path(p) for p in protect)
        yield dest_abs
        return
    ensure_dir(dest_abs)
    _clean_once(dest_abs)
    root = dest_abs / f".relaxline-set.{_temp_token()}"
    try:
        root.mkdir()
    except OSError as exc:
        full = _no_space(exc, dest_abs)
        if full is not None:
            raise full from None
        raise
    stage = _Stage(dest_abs, root, [Path(p) for p in protect])
    with _STAGE_LOCK:
        _STAGES.append(stage)
    active = True
    try:
        yield dest_abs
        _leave(stage)
        active = False
        stage.commit()
    finally:
        if active:
            _leave(stage)
        shutil.rmtree(root, ignore_errors=True)


def _leave(stage: _Stage) -> None:
    with _STAGE_LOCK:
        _STAGES.remove(stage)


def refuse_overwriting_inputs(inputs: Iterable[str | Path], outputs: Iterable[str | Path],
                              command: str = "relaxline") -> None:
    """Raise :class:`InputError` if any output path is one of the ``inputs``.

    Compares resolved paths (symbolic links followed) and, for files that exist, their
    identity on disk (hard links). Call it before any work starts.
    """
    ins = []
    for p in inputs:
        if p is None:
            continue
        q = Path(p)
        try:
            st = q.stat()
            ident = (st.st_dev, st.st_ino)
        except OSError:
            ident = None
        ins.append((q, os.path.realpath(q), ident))
    for out in outputs:
        o = Path(out)
        real = os.path.realpath(o)
        try:
            st = o.stat()
            ident = (st.st_dev, st.st_ino)
        except OSError:
            ident = None
        for q, q_real, q_ident in ins:
            if real == q_real or (ident is not None and ident == q_ident):
                raise InputError(
                    f"{q}: this input is also where {command} writes its output {o.name}, "
                    f"so it would be overwritten. Nothing was written; choose another output "
                    f"folder (or move the input out of it).")


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


def nifti_bytes(array: np.ndarray, affine: np.ndarray) -> memoryview:
    """Deterministic .nii.gz bytes for ``array`` on ``affine``."""
    import nibabel as nib
    img = nib.Nifti1Image(np.asarray(array), np.asarray(affine, float))
    img.header.set_xyzt_units("mm", "sec")
    if np.issubdtype(array.dtype, np.floating):
        img.header.set_slope_inter(1.0, 0.0)
    raw = img.to_bytes()
    buf = io.BytesIO()
    # level 1: float maps barely compress further at higher levels (a 128x128x64 ir fit's
    # 8 maps: 13.06 MB at level 1, 12.82 MB at 6) but take 35 % longer to write
    with gzip.GzipFile(fileobj=buf, mode="wb", compresslevel=1, mtime=0, filename="") as gz:
        gz.write(raw)
    del raw
    return buf.getbuffer()   # the compressed bytes without a copy (maps are written in
                             # threads side by side: each copy is memory at the peak)


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
