"""Phantom reference values and their correction to the session's temperature (design §7).

The reference table is TSV with a header row::

    label  name  T1  T2  T1_sd  T2_sd  temperature  field  T1_coef  T2_coef

T1/T2 (and an optional ``T2star``) in seconds at ``temperature`` (°C), ``field`` in tesla,
``*_sd`` the reference uncertainty (s), ``*_coef`` the fractional change per °C. An empty
cell means "no reference value". Lines starting with ``#`` are comments.

Two ways to describe the temperature dependence, per vial:

* one row with a linear coefficient: value(T) = value·(1 + coef·(T − temperature));
* several rows for the same label at different temperatures: linear interpolation between
  these knots. Outside the knots the value is extrapolated (from the nearest end knot with
  its coefficient if one is given, else along the end segment) and flagged.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from fitting.errors import RelaxlineError, excerpt

QUANTITIES = ("T1", "T2", "T2star")
MAP_QUANTITY = {"T1map": "T1", "T2map": "T2", "T2starmap": "T2star"}
REQUIRED = ("label", "name", "temperature")
NUMERIC = QUANTITIES + tuple(f"{q}_sd" for q in QUANTITIES) + \
    tuple(f"{q}_coef" for q in QUANTITIES) + ("temperature", "field")
MAX_RELAXATION_S = 30.0   # a "time" above this is taken as milliseconds (design §3)
FIELD_ATOL_T = 0.05
# phantom temperatures the reference values may be corrected to (°C). Common practice:
# relaxometry phantoms are measured near room temperature (or warmed to body temperature);
# their gels and solutions are liquid, and linear temperature coefficients are measured,
# only in that neighbourhood. Outside it a value is a unit or typing mistake.
PHANTOM_T_RANGE_C = (0.0, 50.0)
REF_COLUMNS = ["label", "name", "reference", "reference_sd", "reference_temperature",
               "reference_at_temperature", "reference_note"]


def _number(text: str, where: str, col: str, allow_empty: bool) -> float:
    t = text.strip()
    if t == "" or t.lower() in ("n/a", "na", "nan"):
        if allow_empty:
            return math.nan
        raise RelaxlineError(f"{where}: column '{col}' is empty; it needs a number.")
    try:
        v = float(t)
    except ValueError:
        raise RelaxlineError(f"{where}: column '{col}' holds {excerpt(t)}, which is not a number "
                             f"(use a dot as decimal separator, no units).") from None
    if not math.isfinite(v):
        raise RelaxlineError(f"{where}: column '{col}' is not finite ({excerpt(t)}).")
    return v


def check_temperature(t: float, source: str) -> float:
    """A phantom temperature (°C) from ``source``, or an error naming it and the remedy."""
    lo, hi = PHANTOM_T_RANGE_C
    if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t):
        raise RelaxlineError(f"{source}: the phantom temperature must be a finite number in "
                             f"°C, got {excerpt(t)}.")
    if lo <= t <= hi:
        return float(t)
    hint = (f" It looks like kelvin: {t:g} K is {t - 273.15:.1f} °C." if 250 <= t <= 330
            else "")
    raise RelaxlineError(f"{source}: phantom temperature {t:g} °C is outside {lo:g}–{hi:g} °C, "
                         f"where reference values can be corrected for temperature.{hint} Give "
                         f"the phantom's temperature in °C.")


def parse_reference(text: str, source: str = "reference table") -> pd.DataFrame:
    """Parse and validate reference-table text; errors name the file, row and column."""
    lines = [(i + 1, ln.rstrip("\r\n")) for i, ln in enumerate(text.splitlines())]
    lines = [(i, ln) for i, ln in lines if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise RelaxlineError(f"{source}: empty reference table; expected a tab-separated "
                             f"header '{chr(9).join(('label', 'name', 'T1', 'T2', 'temperature'))}"
                             "' and one row per vial.")
    header = [h.strip() for h in lines[0][1].split("\t")]
    if len(header) == 1 and ("," in header[0] or " " in header[0].strip()):
        raise RelaxlineError(f"{source}: the header has a single column ({excerpt(header[0])}); "
                             "the reference table must be TAB-separated.")
    dup = sorted({h for h in header if header.count(h) > 1})
    if dup:
        raise RelaxlineError(f"{source}: column(s) {dup} appear more than once in the header.")
    missing = [c for c in REQUIRED if c not in header]
    if missing:
        raise RelaxlineError(f"{source}: missing column(s) {missing}; the reference table needs "
                             f"{list(REQUIRED)} and at least one of {list(QUANTITIES)} "
                             f"(found {header}).")
    if not any(q in header for q in QUANTITIES):
        raise RelaxlineError(f"{source}: no reference-value column; give at least one of "
                             f"{list(QUANTITIES)} (seconds).")
    rows = []
    for lineno, ln in lines[1:]:
        cells = ln.split("\t")
        where = f"{source}, line {lineno}"
        if len(cells) != len(header):
            raise RelaxlineError(f"{where}: {len(cells)} tab-separated cells but the header has "
                                 f"{len(header)}; fill empty cells with nothing between tabs.")
        raw = dict(zip(header, cells))
        try:
            label = int(raw["label"].strip())
        except ValueError:
            raise RelaxlineError(f"{where}: column 'label' holds {excerpt(raw['label'])}; labels "
                                 "are positive integers matching the label map.") from None
        if label <= 0:
            raise RelaxlineError(f"{where}: label {label} must be a positive integer "
                                 "(0 is background in the label map).")
        row = {"label": label, "name": raw["name"].strip() or f"vial {label}"}
        for col in NUMERIC:
            if col in raw:
                row[col] = _number(raw[col], where, col, allow_empty=(col != "temperature"))
        for q in QUANTITIES:
            v = row.get(q, math.nan)
            if math.isfinite(v) and v <= 0:
                raise RelaxlineError(f"{where}: {q} = {v:g} s must be positive.")
            if math.isfinite(v) and v > MAX_RELAXATION_S:
                raise RelaxlineError(f"{where}: {q} = {v:g} looks like milliseconds; reference "
                                     "values are in seconds (divide by 1000).")
        rows.append(row)
    if not rows:
        raise RelaxlineError(f"{source}: the reference table has a header but no rows.")
    df = pd.DataFrame(rows)
    for col in NUMERIC:
        if col not in df:
            df[col] = math.nan
    key = df[["label", "temperature"]]
    dups = df[key.duplicated(keep=False)]
    if not dups.empty:
        lab, temp = dups.iloc[0][["label", "temperature"]]
        raise RelaxlineError(f"{source}: label {int(lab)} appears twice at temperature "
                             f"{temp:g} °C; give one row per vial and temperature.")
    names = df.groupby("label")["name"].nunique()
    if (names > 1).any():
        lab = int(names[names > 1].index[0])
        raise RelaxlineError(f"{source}: label {lab} has different names on different rows "
                             f"({sorted(set(df.loc[df.label == lab, 'name']))}); one vial, "
                             "one name.")
    return df


@dataclass
class Reference:
    """A validated reference table (see the module docstring)."""

    table: pd.DataFrame
    source: str = "reference table"

    @classmethod
    def load(cls, path: str | Path) -> "Reference":
        p = Path(path)
        if not p.is_file():
            raise RelaxlineError(f"{p}: reference table not found.")
        try:
            text = p.read_text(encoding="utf-8")
        except UnicodeDecodeError:
            raise RelaxlineError(f"{p}: not UTF-8 text; save the reference table as "
                                 "tab-separated UTF-8.") from None
        return cls(parse_reference(text, str(p)), str(p))

    @property
    def labels(self) -> list[int]:
        return sorted(int(v) for v in self.table["label"].unique())

    def names(self) -> dict[int, str]:
        return {int(r.label): str(r.name) for r in self.table.itertuples()}

    def has(self, quantity: str) -> bool:
        return quantity in self.table and bool(np.isfinite(self.table[quantity]).any())

    def needs_temperature(self, quantity: str) -> bool:
        """True when the reference for ``quantity`` depends on temperature."""
        t = self.table[np.isfinite(self.table[quantity])] if quantity in self.table else []
        if len(t) == 0:
            return False
        coef = t[f"{quantity}_coef"].fillna(0.0)
        return bool((coef != 0).any() or t["label"].duplicated().any())

    def field_warning(self, field_t: float | None) -> str | None:
        """A warning if the table's field strength differs from the scanner's."""
        f = self.table["field"].dropna().unique()
        if field_t is None or f.size == 0:
            return None
        off = [x for x in f if abs(x - field_t) > FIELD_ATOL_T]
        if off:
            return (f"the reference values in {self.source} are for {', '.join(f'{x:g}' for x in off)} T "
                    f"but the maps were acquired at {field_t:g} T; relaxation times depend on "
                    "field strength, so the comparison may not be meaningful.")
        return None

    def at_temperature(self, quantity: str, temperature: float | None) -> pd.DataFrame:
        """Reference values for ``quantity`` per vial, corrected to ``temperature`` (°C).

        Returns one row per label with :data:`REF_COLUMNS`: ``reference`` is the tabulated
        value (at ``reference_temperature``; for a multi-temperature table the knot nearest
        to ``temperature``), ``reference_at_temperature`` the corrected value and
        ``reference_note`` a flag when no correction, or an extrapolation, was made.
        ``temperature=None`` uses the reference at its own temperature (first listed row).
        """
        rows = []
        for lab in self.labels:
            sub = self.table[self.table["label"] == lab]
            name = str(sub["name"].iloc[0])
            if quantity not in sub or not np.isfinite(sub[quantity]).any():
                rows.append({"label": lab, "name": name, "reference": math.nan,
                             "reference_sd": math.nan, "reference_temperature": math.nan,
                             "reference_at_temperature": math.nan, "reference_note": ""})
                continue
            sub = sub[np.isfinite(sub[quantity])]
            rows.append({"label": lab, "name": name,
                         **_correct(sub, quantity, temperature)})
        return pd.DataFrame(rows, columns=REF_COLUMNS)


def _correct(sub: pd.DataFrame, q: str, temperature: float | None) -> dict:
    """Temperature correction for one vial (rows with a finite value of ``q``)."""
    temps = sub["temperature"].to_numpy(float)
    vals = sub[q].to_numpy(float)
    sds = sub[f"{q}_sd"].to_numpy(float)
    coefs = sub[f"{q}_coef"].to_numpy(float)
    if temperature is None:
        i = 0
        coef = coefs[0]
        needs = len(sub) > 1 or (np.isfinite(coef) and coef != 0)
        note = (f"no phantom temperature: reference at {temps[0]:g} °C used uncorrected"
                if needs else "")
        return _row(vals[i], sds[i], temps[i], vals[i], note)
    t = float(temperature)
    if len(sub) == 1:
        coef = coefs[0]
        if not np.isfinite(coef):
            note = ("" if math.isclose(t, temps[0], abs_tol=0.05) else
                    f"no temperature coefficient: reference at {temps[0]:g} °C used for "
                    f"{t:g} °C")
            return _row(vals[0], sds[0], temps[0], vals[0], note)
        value = vals[0] * (1.0 + coef * (t - temps[0]))
        if value <= 0:   # a coefficient far outside its measured range: no value, said so
            return _row(vals[0], sds[0], temps[0], math.nan,
                        f"correction to {t:g} °C with coefficient {coef:g}/°C gave a "
                        "non-positive value; not compared")
        return _row(vals[0], sds[0], temps[0], value, "")
    order = np.argsort(temps)
    temps, vals, sds, coefs = temps[order], vals[order], sds[order], coefs[order]
    near = int(np.argmin(np.abs(temps - t)))
    lo, hi = temps[0], temps[-1]
    if lo <= t <= hi:
        return _row(vals[near], sds[near], temps[near], float(np.interp(t, temps, vals)), "")
    end = 0 if t < lo else -1
    if np.isfinite(coefs[end]):
        value = vals[end] * (1.0 + coefs[end] * (t - temps[end]))
        how = f"with the {temps[end]:g} °C row's coefficient"
    else:
        a, b = (0, 1) if end == 0 else (-2, -1)
        slope = (vals[b] - vals[a]) / (temps[b] - temps[a])
        value = vals[end] + slope * (t - temps[end])
        how = "along the end segment"
    note = f"extrapolated {how}: {t:g} °C is outside the table ({lo:g}–{hi:g} °C)"
    if value <= 0:
        value, note = math.nan, note + "; extrapolation gave a non-positive value"
    return _row(vals[near], sds[near], temps[near], value, note)


def _row(ref: float, sd: float, tref: float, at_t: float, note: str) -> dict:
    return {"reference": float(ref), "reference_sd": float(sd),
            "reference_temperature": float(tref), "reference_at_temperature": float(at_t),
            "reference_note": note}
