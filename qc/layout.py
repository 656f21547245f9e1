"""Phantom layout: where the vials sit in the phantom's own frame (design §7).

A layout is a TSV with one row per vial::

    label   x_mm    y_mm    radius_mm   [z_mm]  [name]  ...

``x_mm``, ``y_mm`` are the vial centre relative to the phantom centre, in the phantom's
own frame (the localiser finds the rotation, translation and a possible mirror flip);
``radius_mm`` is the vial's inner radius. The optional ``z_mm`` puts a vial on a plane
offset along the slice axis from the phantom centre (phantoms with several planes of
vials); rows without it (or an empty cell) extend through every slice of the phantom.
Other columns (e.g. ``name``) are kept and ignored.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from fitting.errors import RelaxlineError, excerpt

REQUIRED = ("label", "x_mm", "y_mm", "radius_mm")


class LayoutError(RelaxlineError):
    """A layout file or table that cannot describe a phantom."""


def read_layout(path: str | Path) -> pd.DataFrame:
    """Read and validate a layout TSV; see :func:`check_layout` for the rules."""
    p = Path(path)
    try:
        df = pd.read_csv(p, sep="\t", comment="#", dtype=str, keep_default_na=False)
    except FileNotFoundError:
        raise LayoutError(f"{p}: layout file not found; give the phantom's layout TSV "
                          f"(columns {', '.join(REQUIRED)}[, z_mm]).") from None
    except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise LayoutError(f"{p}: cannot read the layout as a tab-separated table ({exc}).") \
            from None
    df.columns = [c.strip() for c in df.columns]
    return check_layout(df, where=str(p))


def check_layout(df: pd.DataFrame, where: str = "layout") -> pd.DataFrame:
    """Validate a layout table and return a clean copy.

    Rules: columns ``label, x_mm, y_mm, radius_mm`` present; labels are distinct
    positive integers (0 is background in a label map); coordinates finite numbers;
    radii positive; two vials on the same plane do not overlap. ``z_mm`` is optional
    (a blank cell means "through every slice").
    """
    missing = [c for c in REQUIRED if c not in df.columns]
    if missing:
        raise LayoutError(f"{where}: missing column(s) {', '.join(missing)}; a layout needs "
                          f"{', '.join(REQUIRED)} (optional z_mm), tab-separated.")
    if len(df) == 0:
        raise LayoutError(f"{where}: the layout has no vials; add one row per vial.")
    out = df.copy()
    for col in (*REQUIRED, *(("z_mm",) if "z_mm" in df.columns else ())):
        text = out[col].astype(object).where(out[col].notna(), "").astype(str).str.strip()
        blank = text.isin(["", "nan", "NaN", "n/a", "NA"])
        vals = pd.to_numeric(text.where(~blank, "nan"), errors="coerce")
        bad = (vals.isna() & ~blank) | np.isinf(vals) | (blank & (col != "z_mm"))
        if bad.any():
            row = int(np.flatnonzero(bad.to_numpy())[0])
            raise LayoutError(f"{where}: column {col}, row {row + 1}: expected a number, got "
                              f"{excerpt(df[col].iloc[row])}.")
        out[col] = vals.astype(float)
    lab = out["label"].to_numpy()
    if np.any(lab != np.round(lab)) or np.any(lab < 1) or np.any(lab > 32767):
        raise LayoutError(f"{where}: column label: labels must be integers 1..32767 "
                          "(0 is the background of a label map).")
    out["label"] = out["label"].astype(int)
    dup = out["label"][out["label"].duplicated()]
    if len(dup):
        raise LayoutError(f"{where}: label {int(dup.iloc[0])} appears twice; each vial needs "
                          "its own label.")
    if np.any(out["radius_mm"] <= 0):
        row = int(np.flatnonzero(out["radius_mm"].to_numpy() <= 0)[0])
        raise LayoutError(f"{where}: column radius_mm, row {row + 1}: the radius must be > 0 mm.")
    if "z_mm" not in out.columns:
        out["z_mm"] = np.nan
    _check_overlap(out, where)
    return out.reset_index(drop=True)


def _check_overlap(df: pd.DataFrame, where: str) -> None:
    xy = df[["x_mm", "y_mm"]].to_numpy(float)
    r = df["radius_mm"].to_numpy(float)
    z = df["z_mm"].to_numpy(float)
    lab = df["label"].to_numpy()
    for a in range(len(df)):
        for b in range(a + 1, len(df)):
            same_plane = np.isnan(z[a]) or np.isnan(z[b]) or abs(z[a] - z[b]) < 1e-6
            if same_plane and np.hypot(*(xy[a] - xy[b])) < r[a] + r[b]:
                raise LayoutError(f"{where}: vials {lab[a]} and {lab[b]} overlap (centres "
                                  f"{np.hypot(*(xy[a] - xy[b])):.1f} mm apart, radii "
                                  f"{r[a]:g} + {r[b]:g} mm); check x_mm, y_mm, radius_mm.")
