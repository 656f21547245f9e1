"""Tolerances on the percent difference between measured and reference values.

The config is a mapping (or a YAML file holding one)::

    maps:                      # per map, percent of the temperature-corrected reference
      T1map: {warn_pct: 5, fail_pct: 10}
      T2map: {warn_pct: 7.5, fail_pct: 15}
    vials:                     # optional per-vial overrides, keyed by label
      "3": {T2map: {warn_pct: 10, fail_pct: 20}}
    temperature: 20.0          # optional fallback phantom temperature (°C)
    ranges:                    # optional acceptable [low, high] of a region's mean, per label
      "2": {T1map: [0.70, 0.95], T2map: [0.060, 0.085]}   # in the map's units (s for times)
    range_warn_margin_pct: 10  # optional: within 10 % of the range width of an edge → warn

|bias| ≤ warn_pct → ``pass``; ≤ fail_pct → ``warn``; otherwise ``fail``. A vial with a
reference but no usable voxel is ``fail``; no reference → ``n/a``.

Ranges serve scan (non-phantom) sessions, whose regions have no reference value (design
§1): a region with a range for a map and no reference value for it is judged on its
**mean** (the statistic the bias of vials uses): inside [low + m, high − m] → ``pass``,
inside [low, high] but within the margin m = range_warn_margin_pct % of (high − low) of an
edge → ``warn`` (no warn band by default), outside → ``fail``; no usable voxel → ``fail``.
Where a reference value applies, it is used and the range is not.

The defaults below, and any range in a sample config, are ILLUSTRATIVE only (common practice is a few percent for T1 and
somewhat more for T2, which is harder to measure); each site sets its own from its local
QA procedure and the responsible physicist's judgement.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from fitting.errors import RelaxlineError, excerpt
from qc.reference import MAX_RELAXATION_S

DEFAULT_TOLERANCES: dict[str, dict[str, float]] = {
    "T1map": {"warn_pct": 5.0, "fail_pct": 10.0},
    "T2map": {"warn_pct": 7.5, "fail_pct": 15.0},
    "T2starmap": {"warn_pct": 10.0, "fail_pct": 20.0},
}
"""Illustrative defaults; set real values in the config from the local QA procedure."""

KNOWN_MAPS = ("T1map", "T2map", "T2starmap", "TB1map", "M0map", "MWFmap", "T1starmap")
RANGE_MAPS = ("T1map", "T2map", "T2starmap", "TB1map", "MWFmap", "T1starmap")
"""Maps the QC evaluates, so the maps a range may be given for."""
TIME_MAPS = ("T1map", "T2map", "T2starmap", "T1starmap")
PASS, WARN, FAIL, NA = "pass", "warn", "fail", "n/a"
CONFIG_KEYS = ("maps", "vials", "temperature", "ranges", "range_warn_margin_pct")


@dataclass
class Tolerances:
    maps: dict[str, dict[str, float]] = field(default_factory=lambda: {
        k: dict(v) for k, v in DEFAULT_TOLERANCES.items()})
    vials: dict[int, dict[str, dict[str, float]]] = field(default_factory=dict)
    temperature: float | None = None
    source: str = "built-in illustrative defaults"
    ranges: dict[int, dict[str, tuple[float, float]]] = field(default_factory=dict)
    range_warn_margin_pct: float = 0.0

    def limits(self, map_name: str, label: int | None = None) -> tuple[float, float]:
        """(warn_pct, fail_pct) for a map and vial; NaN when none is configured."""
        lim = self.maps.get(map_name)
        if label is not None and map_name in self.vials.get(int(label), {}):
            lim = self.vials[int(label)][map_name]
        if not lim:
            return math.nan, math.nan
        return lim["warn_pct"], lim["fail_pct"]

    def status(self, bias_pct: float, map_name: str, label: int | None = None,
               has_reference: bool = True) -> str:
        """pass / warn / fail for a percent bias; ``n/a`` without reference or tolerance."""
        warn, fail = self.limits(map_name, label)
        if not has_reference or not math.isfinite(fail):
            return NA
        if not math.isfinite(bias_pct):
            return FAIL  # a reference but nothing measurable in the vial
        b = abs(bias_pct)
        return PASS if b <= warn else WARN if b <= fail else FAIL

    def range_for(self, map_name: str, label: int) -> tuple[float, float] | None:
        """The configured acceptable [low, high] of a region's mean, or ``None``."""
        return self.ranges.get(int(label), {}).get(map_name)

    def range_status(self, mean: float, map_name: str, label: int) -> str:
        """pass / warn / fail of a region mean against its range; ``n/a`` without one."""
        r = self.range_for(map_name, label)
        if r is None:
            return NA
        if not math.isfinite(mean):
            return FAIL  # a range but nothing measurable in the region
        low, high = r
        if not low <= mean <= high:
            return FAIL
        margin = self.range_warn_margin_pct / 100.0 * (high - low)
        return PASS if low + margin <= mean <= high - margin else WARN


def _limits(obj: Any, where: str) -> dict[str, float]:
    if not isinstance(obj, Mapping):
        raise RelaxlineError(f"{where}: expected a mapping {{warn_pct: N, fail_pct: N}}, got "
                             f"{excerpt(obj)}.")
    extra = set(obj) - {"warn_pct", "fail_pct"}
    if extra:
        raise RelaxlineError(f"{where}: unknown key(s) {excerpt(sorted(map(str, extra)))}; use "
                             "warn_pct and fail_pct (percent of the reference).")
    out = {}
    for k in ("warn_pct", "fail_pct"):
        if k not in obj:
            raise RelaxlineError(f"{where}: missing '{k}' (percent of the reference).")
        v = obj[k]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) \
                or v < 0:
            raise RelaxlineError(f"{where}: '{k}' must be a non-negative number, got {excerpt(v)}.")
        out[k] = float(v)
    if out["warn_pct"] > out["fail_pct"]:
        raise RelaxlineError(f"{where}: warn_pct ({out['warn_pct']:g}) is larger than fail_pct "
                             f"({out['fail_pct']:g}); the warning band must lie inside the "
                             "failure band.")
    return out


def _maps_block(obj: Any, where: str) -> dict[str, dict[str, float]]:
    if not isinstance(obj, Mapping):
        raise RelaxlineError(f"{where}: expected a mapping of map names ({', '.join(KNOWN_MAPS)})"
                             f" to tolerances, got {excerpt(obj)}.")
    out = {}
    for name, lim in obj.items():
        if name not in KNOWN_MAPS:
            raise RelaxlineError(f"{where}: unknown map '{name}'; expected one of "
                                 f"{list(KNOWN_MAPS)}.")
        out[name] = _limits(lim, f"{where}.{name}")
    return out


def _range(obj: Any, map_name: str, where: str) -> tuple[float, float]:
    if isinstance(obj, (str, bytes)) or not isinstance(obj, (list, tuple)) or len(obj) != 2:
        raise RelaxlineError(f"{where}: expected a list [low, high] of two numbers in the "
                             f"map's units, got {excerpt(obj)}.")
    for v in obj:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise RelaxlineError(f"{where}: {excerpt(v)} is not a number; give [low, high] as two "
                                 "numbers (no units, dot as decimal separator).")
    low, high = float(obj[0]), float(obj[1])
    if low >= high:
        raise RelaxlineError(f"{where}: low ({low:g}) must be below high ({high:g}); write "
                             "the range as [low, high].")
    if map_name in TIME_MAPS and high > MAX_RELAXATION_S:
        raise RelaxlineError(f"{where}: [{low:g}, {high:g}] looks like milliseconds; ranges "
                             f"of {map_name} are in seconds (divide by 1000).")
    if map_name in TIME_MAPS and low < 0:
        raise RelaxlineError(f"{where}: low ({low:g}) is negative; relaxation times are "
                             "positive (seconds).")
    return low, high


def _ranges_block(obj: Any, source: str) -> dict[int, dict[str, tuple[float, float]]]:
    if not isinstance(obj, Mapping):
        raise RelaxlineError(f"{source}: ranges: expected a mapping of region labels to "
                             f"{{map: [low, high]}}, got {excerpt(obj)}.")
    out: dict[int, dict[str, tuple[float, float]]] = {}
    for lab, block in obj.items():
        where = f"{source}: ranges.{lab}"
        try:
            ilab = int(lab) if not isinstance(lab, bool) else 0
        except (TypeError, ValueError):
            ilab = 0
        if ilab <= 0 or str(ilab) != str(lab).strip():
            raise RelaxlineError(f"{source}: ranges: key {excerpt(lab)} is not a region label (a "
                                 "positive integer of the label map).")
        if not isinstance(block, Mapping):
            raise RelaxlineError(f"{where}: expected a mapping of map names "
                                 f"({', '.join(RANGE_MAPS)}) to [low, high], got {excerpt(block)}.")
        for name, r in block.items():
            if name not in RANGE_MAPS:
                raise RelaxlineError(f"{where}: unknown map '{name}'; expected one of "
                                     f"{list(RANGE_MAPS)}.")
            out.setdefault(ilab, {})[name] = _range(r, name, f"{where}.{name}")
    return out


def load_tolerances(config: Mapping[str, Any] | str | Path | None = None) -> Tolerances:
    """Tolerances from a mapping, a YAML file, or ``None`` (illustrative defaults).

    Map entries in the config replace the defaults for that map; maps not named keep
    the defaults.
    """
    if config is None:
        return Tolerances()
    source = "config"
    if isinstance(config, (str, Path)):
        from qc.userfiles import read_yaml
        p = Path(config)
        if not p.is_file():
            raise RelaxlineError(f"{p}: QC config not found.")
        config = read_yaml(p, "QC config") or {}
        source = str(p)
    if not isinstance(config, Mapping):
        raise RelaxlineError(f"{source}: expected a mapping with {list(CONFIG_KEYS)}, got "
                             f"{type(config).__name__}.")
    extra = set(config) - set(CONFIG_KEYS)
    if extra:
        raise RelaxlineError(f"{source}: unknown key(s) {excerpt(sorted(map(str, extra)))}; "
                             f"expected {list(CONFIG_KEYS)}.")
    tol = Tolerances(source=source)
    tol.maps.update(_maps_block(config.get("maps") or {}, f"{source}: maps"))
    for lab, block in (config.get("vials") or {}).items():
        try:
            ilab = int(lab)
        except (TypeError, ValueError):
            raise RelaxlineError(f"{source}: vials: key {excerpt(lab)} is not a vial label "
                                 "(a positive integer).") from None
        tol.vials[ilab] = _maps_block(block, f"{source}: vials.{lab}")
    t = config.get("temperature")
    if t is not None:
        from qc.reference import check_temperature
        tol.temperature = check_temperature(t, f"{source}: 'temperature'")
    tol.ranges = _ranges_block(config.get("ranges") or {}, source)
    m = config.get("range_warn_margin_pct")
    if m is not None:
        if isinstance(m, bool) or not isinstance(m, (int, float)) or not 0 <= m < 50:
            raise RelaxlineError(f"{source}: 'range_warn_margin_pct' must be a number from 0 "
                                 f"up to (not including) 50 (percent of the range width), "
                                 f"got {excerpt(m)}.")
        tol.range_warn_margin_pct = float(m)
    return tol
