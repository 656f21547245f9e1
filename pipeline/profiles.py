"""The ``--slice-profile`` option: a built-in ``sinc:TBW[:RATIO]`` or a TSV file.

A profile file is tab-separated with a header naming at least the columns ``position``,
``excitation`` and ``refocusing`` (design §5): the relative flip-angle scale (actual /
nominal) of the excitation and of the refocusing pulses at equally weighted positions
across the slice; ``position`` is in any unit and only orders the rows. Other columns
are ignored. The model itself is :mod:`fitting.sliceprofile`; ``sinc:`` specs are
computed by :mod:`fitting.rfpulse` for the series' nominal angles.
"""
from __future__ import annotations

import csv
from functools import lru_cache
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from fitting.errors import RelaxlineError
from fitting.rfpulse import SliceProfile, parse_sinc, profile_from_scales
from pipeline.errors import InputError
from pipeline.series import sha256_file

COLUMNS = ("position", "excitation", "refocusing")


def is_file_spec(text: str) -> bool:
    """True unless ``text`` is a built-in ``sinc:`` profile."""
    return not str(text).startswith("sinc:")


def check_spec(text: str) -> None:
    """Validate a profile option before any reading: sinc syntax, or an existing file."""
    if not is_file_spec(text):
        try:
            parse_sinc(text)
        except RelaxlineError as exc:
            raise InputError(str(exc)) from None
        return
    p = Path(text)
    if not p.is_file():
        raise InputError(f"{text}: file not found; a slice profile is a TSV file with "
                         f"columns {', '.join(COLUMNS)}, or sinc:TBW[:RATIO] (e.g. sinc:3).")


def read_profile(path: str | Path) -> SliceProfile:
    """Read and check a profile TSV (module docstring); errors name the file and column."""
    p = Path(path)
    return _read(str(p), sha256_file(p) if p.is_file() else "")


@lru_cache(maxsize=8)
def _read(path: str, digest: str) -> SliceProfile:
    check_spec(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{path}: slice profile is not UTF-8 text; write it as a TSV file "
                         f"with columns {', '.join(COLUMNS)}.") from None
    rows = list(csv.reader(text.splitlines(), delimiter="\t"))
    rows = [r for r in rows if any(c.strip() for c in r)]
    if not rows:
        raise InputError(f"{path}: the slice profile is empty; give a header line "
                         f"({chr(9).join(COLUMNS)}) and one row per position.")
    header = [c.strip() for c in rows[0]]
    missing = [c for c in COLUMNS if c not in header]
    if missing:
        raise InputError(f"{path}: the slice profile has no column '{missing[0]}' (header: "
                         f"{', '.join(header) or 'empty'}); it needs the tab-separated columns "
                         f"{', '.join(COLUMNS)}.")
    if len(rows) < 2:
        raise InputError(f"{path}: the slice profile has a header but no rows.")
    cols: dict[str, list[float]] = {c: [] for c in COLUMNS}
    for n, row in enumerate(rows[1:], start=2):
        for c in COLUMNS:
            i = header.index(c)
            cell = row[i].strip() if i < len(row) else ""
            try:
                cols[c].append(float(cell))
            except ValueError:
                raise InputError(f"{path}: line {n}, column '{c}': {cell!r} is not a number."
                                 ) from None
    pos = np.asarray(cols["position"])
    if not np.all(np.isfinite(pos)):
        i = int(np.flatnonzero(~np.isfinite(pos))[0])
        raise InputError(f"{path}: line {i + 2}, column 'position': not a finite number.")
    order = np.argsort(pos, kind="stable")
    try:
        return profile_from_scales(np.asarray(cols["excitation"])[order],
                                   np.asarray(cols["refocusing"])[order], path)
    except RelaxlineError as exc:   # names the column; rows are counted after the header
        raise InputError(str(exc).replace(" in row ", " in data row ")) from None


def resolve(options: Mapping[str, Any]) -> dict[str, Any]:
    """``options`` with a file-valued ``slice_profile`` replaced by the profile read from it
    (``sinc:`` specs are left for the model, which computes them for its angles)."""
    out = dict(options)
    prof = out.get("slice_profile")
    if isinstance(prof, str) and is_file_spec(prof):
        out["slice_profile"] = read_profile(prof)
    return out
