"""Tolerances on the percent difference between measured and reference values.

The config is a mapping (or a YAML file holding one)::

    maps:                      # per map, percent of the temperature-corrected reference
      T1map: {warn_pct: 5, fail_pct: 10}
      T2map: {warn_pct: 7.5, fail_pct: 15}
    vials:                     # optional per-vial overrides, keyed by label
      "3": {T2map: {warn_pct: 10, fail_pct: 20}}
    temperature: 20.0          # optional fallback phantom temperature (°C)

|bias| ≤ warn_pct → ``pass``; ≤ fail_pct → ``warn``; otherwise ``fail``. A vial with a
reference but no usable voxel is ``fail``; no reference → ``n/a``.

The defaults below are ILLUSTRATIVE only (common practice is a few percent for T1 and
somewhat more for T2, which is harder to measure); each site sets its own from its local
QA procedure and the responsible physicist's judgement.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from fitting.errors import RelaxlineError

DEFAULT_TOLERANCES: dict[str, dict[str, float]] = {
    "T1map": {"warn_pct": 5.0, "fail_pct": 10.0},
    "T2map": {"warn_pct": 7.5, "fail_pct": 15.0},
    "T2starmap": {"warn_pct": 10.0, "fail_pct": 20.0},
}
"""Illustrative defaults; set real values in the config from the local QA procedure."""

KNOWN_MAPS = ("T1map", "T2map", "T2starmap", "TB1map", "M0map")
PASS, WARN, FAIL, NA = "pass", "warn", "fail", "n/a"


@dataclass
class Tolerances:
    maps: dict[str, dict[str, float]] = field(default_factory=lambda: {
        k: dict(v) for k, v in DEFAULT_TOLERANCES.items()})
    vials: dict[int, dict[str, dict[str, float]]] = field(default_factory=dict)
    temperature: float | None = None
    source: str = "built-in illustrative defaults"

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


def _limits(obj: Any, where: str) -> dict[str, float]:
    if not isinstance(obj, Mapping):
        raise RelaxlineError(f"{where}: expected a mapping {{warn_pct: N, fail_pct: N}}, got "
                             f"{obj!r}.")
    extra = set(obj) - {"warn_pct", "fail_pct"}
    if extra:
        raise RelaxlineError(f"{where}: unknown key(s) {sorted(extra)}; use warn_pct and "
                             "fail_pct (percent of the reference).")
    out = {}
    for k in ("warn_pct", "fail_pct"):
        if k not in obj:
            raise RelaxlineError(f"{where}: missing '{k}' (percent of the reference).")
        v = obj[k]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) \
                or v < 0:
            raise RelaxlineError(f"{where}: '{k}' must be a non-negative number, got {v!r}.")
        out[k] = float(v)
    if out["warn_pct"] > out["fail_pct"]:
        raise RelaxlineError(f"{where}: warn_pct ({out['warn_pct']:g}) is larger than fail_pct "
                             f"({out['fail_pct']:g}); the warning band must lie inside the "
                             "failure band.")
    return out


def _maps_block(obj: Any, where: str) -> dict[str, dict[str, float]]:
    if not isinstance(obj, Mapping):
        raise RelaxlineError(f"{where}: expected a mapping of map names ({', '.join(KNOWN_MAPS)})"
                             f" to tolerances, got {obj!r}.")
    out = {}
    for name, lim in obj.items():
        if name not in KNOWN_MAPS:
            raise RelaxlineError(f"{where}: unknown map '{name}'; expected one of "
                                 f"{list(KNOWN_MAPS)}.")
        out[name] = _limits(lim, f"{where}.{name}")
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
        import yaml
        p = Path(config)
        if not p.is_file():
            raise RelaxlineError(f"{p}: QC config not found.")
        try:
            config = yaml.safe_load(p.read_text(encoding="utf-8")) or {}
        except yaml.YAMLError as exc:
            raise RelaxlineError(f"{p}: not valid YAML ({exc}).") from None
        source = str(p)
    if not isinstance(config, Mapping):
        raise RelaxlineError(f"{source}: expected a mapping with 'maps', 'vials' and/or "
                             f"'temperature', got {type(config).__name__}.")
    extra = set(config) - {"maps", "vials", "temperature"}
    if extra:
        raise RelaxlineError(f"{source}: unknown key(s) {sorted(extra)}; expected 'maps', "
                             "'vials', 'temperature'.")
    tol = Tolerances(source=source)
    tol.maps.update(_maps_block(config.get("maps") or {}, f"{source}: maps"))
    for lab, block in (config.get("vials") or {}).items():
        try:
            ilab = int(lab)
        except (TypeError, ValueError):
            raise RelaxlineError(f"{source}: vials: key {lab!r} is not a vial label "
                                 "(a positive integer).") from None
        tol.vials[ilab] = _maps_block(block, f"{source}: vials.{lab}")
    t = config.get("temperature")
    if t is not None:
        if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t):
            raise RelaxlineError(f"{source}: 'temperature' must be a number in °C, got {t!r}.")
        tol.temperature = float(t)
    return tol
