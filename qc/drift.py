"""Drift rules over sessions: Westgard multi-rules and a percent-from-reference rule.

Each vial's value (ROI mean by default) in each map is a control measurement and each
session a run, as in laboratory quality control. A baseline period (the first K
sessions of a site/scanner, or a configured list) gives the control mean and SD per
(site, scanner, series, map, label); every later session is scored ``z = (x − mean)/SD``
and checked against the rules of Westgard et al. 1981 (Clin Chem 27:493):

========  ======================================================================
``1-2s``  warning: one measurement beyond mean ± 2 SD
``1-3s``  reject: one measurement beyond mean ± 3 SD
``2-2s``  reject: two consecutive measurements beyond the *same* limit, mean + 2 SD
          or mean − 2 SD (applied across consecutive sessions of one vial)
``R-4s``  reject: within one run, one measurement beyond mean + 2 SD and another
          beyond mean − 2 SD (applied across the vials of one session and map)
``4-1s``  reject: four consecutive measurements beyond the same limit, mean + 1 SD
          or mean − 1 SD (across sessions of one vial)
``10x``   reject: ten consecutive measurements on the same side of the mean
          (across sessions of one vial)
========  ======================================================================

In the 1981 chart scheme the 1-2s warning triggers the inspection by the other
rules; ``warning_trigger=True`` reproduces that (a run with no value beyond 2 SD is
accepted). By default every rejection rule is applied to every run, the more
sensitive and now common practice. Windows of consecutive measurements may reach
back into the baseline period; only sessions after it are judged.

The ``ref-pct`` rule is a plain trend rule without a baseline: a vial whose value
differs from its (temperature-corrected) reference by more than ``reference_pct``
percent in ``reference_consecutive`` consecutive sessions.

**What is judged.** Only *monitored* quantities: by default the primary map of each
model that measures a phantom property (:data:`DEFAULT_MONITORED`: T1 of ``ir``,
``vfa``, ``looklocker``, ``sr`` and ``mp2rage``, T2 of ``mese`` and ``mese-multi`` (the
geometric mean of the distribution), T2* of ``megre``, B1 of the dedicated ``dam`` and
``afi`` methods). Nuisance parameters (M0, inversion or saturation efficiency, the
``mese``/``mese-multi`` B1, which is a refocusing efficiency estimate, the Look-Locker
T1*, the short-T2 fraction) and comparison models (``mese-mono``) are scored and shown
but never fire a rule; ``monitor`` in the settings changes the set.

**What is tracked.** A vial's relaxation times follow the phantom temperature (about
1–2 %/°C for doped gels), which changes from session to session. The tracked value is
therefore the measured value referred to the reference temperature,
``x · reference / reference_at_temperature`` (the reference table's own temperature
model, :mod:`qc.reference`), wherever the reference gives both; elsewhere the value as
measured (``temperature_corrected=False`` tracks raw values everywhere).

All functions are pure: DataFrames in, DataFrames out.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

GROUP = ("site", "scanner", "model", "series", "map", "label")
RUN = ("site", "scanner", "session", "model", "series", "map")
WESTGARD_RULES = ("1-3s", "2-2s", "R-4s", "4-1s", "10x")
WARNING_RULE = "1-2s"
REFERENCE_RULE = "ref-pct"
ALL_RULES = WESTGARD_RULES + (WARNING_RULE, REFERENCE_RULE)
# The default set, chosen by tools/drift_false_alarms.py (DEVELOPERS.md): with ~60 judged
# series per session, R-4s (12 vials in one run), 10x (a baseline mean from a few sessions
# puts ten on one side often) and ref-pct (a method's constant bias is the tolerances'
# business) gave false rejections in most drift-free sessions.
DEFAULT_RULES = (WARNING_RULE, "1-3s", "2-2s", "4-1s")
VIOLATION_COLUMNS = ["site", "scanner", "session", "model", "series", "map", "label", "name",
                     "rule", "severity", "value", "tracked", "z", "baseline_mean",
                     "baseline_sd", "units", "detail"]
# model -> maps judged by default: the quantity each method exists to measure. Models not
# listed (mese-mono: the mono-exponential comparison of mese) are shown, not judged.
DEFAULT_MONITORED: dict[str, tuple[str, ...]] = {
    "ir": ("T1map",), "vfa": ("T1map",), "mese": ("T2map",), "megre": ("T2starmap",),
    "dam": ("TB1map",), "looklocker": ("T1map",), "sr": ("T1map",), "mp2rage": ("T1map",),
    "afi": ("TB1map",), "mese-multi": ("T2map",)}


@dataclass(frozen=True)
class DriftSettings:
    """How drift is judged (config section ``drift``)."""

    baseline_sessions: int = 10              # first K sessions of each site/scanner
    baseline: tuple[str, ...] | None = None  # or these session labels
    rules: tuple[str, ...] = DEFAULT_RULES
    warning_trigger: bool = False            # 1981 scheme: judge only runs with a 1-2s value
    min_sd_pct: float = 1.5                  # SD floor, % of the baseline mean
    reference_pct: float = 5.0
    reference_consecutive: int = 3
    value: str = "mean"
    monitor: tuple[tuple[str, tuple[str, ...]], ...] | None = None  # None: DEFAULT_MONITORED
    temperature_corrected: bool = True

    def monitored(self) -> dict[str, tuple[str, ...]]:
        """model -> judged maps: the defaults, with ``monitor`` entries replacing a model's."""
        out = dict(DEFAULT_MONITORED)
        out.update({m: tuple(maps) for m, maps in (self.monitor or ())})
        return out

    def __post_init__(self):
        unknown = set(self.rules) - set(ALL_RULES)
        if unknown:
            raise ValueError(f"unknown drift rule(s) {sorted(unknown)}; known: {ALL_RULES}")


# ---- the rules on one sequence of z-scores (oldest first) -------------------------------

def beyond(z: np.ndarray, k: float) -> np.ndarray:
    """``1-ks``: |z| > k at each point."""
    return np.abs(np.asarray(z, float)) > k


def consecutive_beyond(z: np.ndarray, n: int, limit: float) -> np.ndarray:
    """True at i when z[i-n+1..i] all exceed +limit, or all fall below −limit.

    ``2-2s`` is ``(n=2, limit=2)``, ``4-1s`` ``(4, 1)`` and ``10x`` ``(10, 0)``
    (ten on one side of the mean; a value exactly at the mean breaks the run).
    """
    z = np.asarray(z, float)
    out = np.zeros(z.size, bool)
    if z.size < n:
        return out
    hi, lo = z > limit, z < -limit
    # windowed "all": sum of a boolean over the last n points equals n
    k = np.ones(n, int)
    all_hi = np.convolve(hi.astype(int), k, "valid") == n
    all_lo = np.convolve(lo.astype(int), k, "valid") == n
    out[n - 1:] = all_hi | all_lo
    return out


def range_4s(z_run: np.ndarray) -> bool:
    """``R-4s`` within one run: some value > +2 SD and another < −2 SD."""
    z = np.asarray(z_run, float)
    return bool(np.any(z > 2) and np.any(z < -2))


# ---- baseline and evaluation -------------------------------------------------------------

def session_order(history: pd.DataFrame) -> dict[tuple[str, str], list[str]]:
    """Sessions of each (site, scanner) in time order (labels sort in time: ses-YYYYMMDD)."""
    out: dict[tuple[str, str], list[str]] = {}
    for (site, scanner), g in history.groupby(["site", "scanner"], sort=True):
        out[(site, scanner)] = sorted(g["session"].astype(str).unique())
    return out


def baseline_sessions(history: pd.DataFrame, settings: DriftSettings
                      ) -> dict[tuple[str, str], list[str]]:
    """Baseline sessions per (site, scanner); empty if there are not yet enough."""
    out = {}
    for key, sessions in session_order(history).items():
        if settings.baseline:
            base = [s for s in sessions if s in set(settings.baseline)]
        else:
            base = sessions[: settings.baseline_sessions] \
                if len(sessions) >= settings.baseline_sessions else []
        out[key] = base if len(base) >= 2 else []
    return out


def baseline_stats(history: pd.DataFrame, settings: DriftSettings) -> pd.DataFrame:
    """Control mean and SD per (site, scanner, series, map, label) over the baseline.

    SD is the sample SD (ddof 1), floored at ``min_sd_pct`` % of |mean| so that a very
    stable phantom does not turn rounding noise into rule violations.
    """
    base = baseline_sessions(history, settings)
    if "model" not in history or "tracked" not in history:
        history = history.assign(model=history.get("model", ""),
                                 tracked=tracked_values(history, settings))
    cols = list(GROUP) + ["baseline_mean", "baseline_sd", "baseline_n", "baseline_last"]
    parts = []
    for (site, scanner), sessions in base.items():
        if not sessions:
            continue
        sel = history[(history["site"] == site) & (history["scanner"] == scanner)
                      & history["session"].isin(sessions)]
        for key, g in sel.groupby(list(GROUP), sort=True):
            x = g["tracked"].astype(float).dropna().to_numpy()
            if x.size < 2:
                continue
            mean, sd = float(np.mean(x)), float(np.std(x, ddof=1))
            sd = max(sd, settings.min_sd_pct / 100 * abs(mean))
            parts.append(list(key) + [mean, sd, int(x.size), max(sessions)])
    return pd.DataFrame(parts, columns=cols)


def tracked_values(history: pd.DataFrame, settings: DriftSettings) -> pd.Series:
    """The value the rules follow: referred to the reference temperature where possible."""
    x = history[settings.value].astype(float)
    if not settings.temperature_corrected or "reference_at_temperature" not in history:
        return x
    ratio = history["reference"].astype(float) / history["reference_at_temperature"].astype(float)
    return (x * ratio).where(np.isfinite(ratio) & (ratio > 0), x)


def is_monitored(history: pd.DataFrame, settings: DriftSettings) -> pd.Series:
    """True for rows of a monitored (model, map)."""
    mon = settings.monitored()
    return pd.Series([str(m) in mon and str(mp) in mon[str(m)] for m, mp in
                      zip(history["model"], history["map"])], index=history.index, dtype=bool)


def score(history: pd.DataFrame, settings: DriftSettings) -> pd.DataFrame:
    """History rows with ``tracked``, ``z``, baseline columns, ``monitored`` and ``judged``
    (a monitored row after the baseline)."""
    h = history.copy()
    h["label"] = h["label"].astype(int)
    if "model" not in h:
        h["model"] = ""
    h["model"] = h["model"].fillna("").astype(str)
    h["tracked"] = tracked_values(h, settings)
    stats = baseline_stats(h, settings)
    if stats.empty:
        h["baseline_mean"] = h["baseline_sd"] = np.nan
        h["baseline_n"], h["baseline_last"] = 0, None
    else:
        h = h.merge(stats, on=list(GROUP), how="left")
    h["z"] = (h["tracked"] - h["baseline_mean"]) / h["baseline_sd"]
    h["monitored"] = is_monitored(h, settings)
    h["judged"] = h["monitored"] & h["baseline_last"].notna() & (
        h["session"].astype(str) > h["baseline_last"].astype(str))
    return h.sort_values(list(GROUP) + ["session"]).reset_index(drop=True)


def _violation(row, rule: str, severity: str, detail: str, value_col: str) -> dict:
    return {"site": row["site"], "scanner": row["scanner"], "session": row["session"],
            "model": row.get("model", ""), "series": row["series"], "map": row["map"],
            "label": int(row["label"]), "name": row.get("name"), "rule": rule,
            "severity": severity, "value": row[value_col], "tracked": row.get("tracked"),
            "z": row.get("z"), "baseline_mean": row.get("baseline_mean"),
            "baseline_sd": row.get("baseline_sd"), "units": row.get("units"),
            "detail": detail}


def evaluate(history: pd.DataFrame, settings: DriftSettings = DriftSettings()
             ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Judge every session after the baseline period.

    Parameters
    ----------
    history : rows of the history database (``qc.history.COLUMNS``).
    settings : rules, baseline and limits.

    Returns
    -------
    scored : ``history`` with ``z``, baseline columns and ``judged``.
    violations : one row per (measurement, violated rule), columns
        :data:`VIOLATION_COLUMNS`; ``severity`` is ``reject`` or ``warning``.
    """
    if history.empty:
        return (history.assign(tracked=[], z=[], monitored=[], judged=[]),
                pd.DataFrame(columns=VIOLATION_COLUMNS))
    s = score(history, settings)
    rules, v = set(settings.rules), settings.value
    found: list[dict] = []
    # 1-2s trigger per run (1981 chart scheme): any value of the run beyond 2 SD
    triggered = s.groupby(list(RUN))["z"].transform(lambda z: bool(np.any(np.abs(z) > 2)))
    run_ok = triggered.astype(bool) | (not settings.warning_trigger)

    for _, g in s[s["monitored"]].groupby(list(GROUP), sort=False):
        if not g["judged"].any():
            continue
        z = g["z"].to_numpy(float)
        checks = {"1-3s": beyond(z, 3), "2-2s": consecutive_beyond(z, 2, 2),
                  "4-1s": consecutive_beyond(z, 4, 1), "10x": consecutive_beyond(z, 10, 0)}
        judged = g["judged"].to_numpy(bool)
        for i, (idx, row) in enumerate(g.iterrows()):
            if not judged[i]:
                continue
            if WARNING_RULE in rules and beyond(z[i:i + 1], 2)[0]:
                found.append(_violation(row, WARNING_RULE, "warning",
                                        f"z = {z[i]:+.2f} beyond ±2 SD", v))
            if not run_ok.loc[idx]:
                continue
            for rule, hit in checks.items():
                if rule in rules and hit[i]:
                    found.append(_violation(row, rule, "reject", _detail(rule, z, i), v))

    if "R-4s" in rules:
        for _, run in s[s["judged"]].groupby(list(RUN), sort=False):
            z = run["z"].to_numpy(float)
            if range_4s(z) and (run_ok.loc[run.index].all()):
                hi, lo = run.loc[run["z"].idxmax()], run.loc[run["z"].idxmin()]
                for row in (hi, lo):
                    found.append(_violation(row, "R-4s", "reject",
                                            f"label {int(hi['label'])} at {hi['z']:+.2f} SD and "
                                            f"label {int(lo['label'])} at {lo['z']:+.2f} SD in "
                                            "the same session", v))

    if REFERENCE_RULE in rules:
        found.extend(reference_rule(s, settings))
    out = pd.DataFrame(found, columns=VIOLATION_COLUMNS)
    return s, out.sort_values(["site", "scanner", "session", "model", "series", "map",
                               "label", "rule"]).reset_index(drop=True)


def _detail(rule: str, z: np.ndarray, i: int) -> str:
    n = {"1-3s": 1, "2-2s": 2, "4-1s": 4, "10x": 10}[rule]
    last = ", ".join(f"{x:+.2f}" for x in z[max(0, i - n + 1): i + 1])
    return {"1-3s": f"z = {last} beyond ±3 SD",
            "2-2s": f"last 2 z = {last} beyond the same 2 SD limit",
            "4-1s": f"last 4 z = {last} beyond the same 1 SD limit",
            "10x": f"last 10 on one side of the mean (z = {last})"}[rule]


def percent_from_reference(df: pd.DataFrame, value: str = "mean") -> pd.Series:
    """100·(value − reference)/reference, using the temperature-corrected reference if any."""
    ref = df["reference_at_temperature"].astype(float) \
        if "reference_at_temperature" in df.columns else pd.Series(np.nan, index=df.index)
    if "reference" in df.columns:
        ref = ref.fillna(df["reference"].astype(float))
    return 100 * (df[value].astype(float) - ref) / ref


def reference_rule(scored: pd.DataFrame, settings: DriftSettings) -> list[dict]:
    """``ref-pct``: |deviation from reference| > ``reference_pct`` in the last N sessions."""
    out = []
    n, lim = settings.reference_consecutive, settings.reference_pct
    for _, g in scored[scored["monitored"]].groupby(list(GROUP), sort=False):
        pct = percent_from_reference(g, settings.value).to_numpy(float)
        off = np.abs(pct) > lim  # NaN (no reference) compares False
        run = np.convolve(off.astype(int), np.ones(n, int), "valid") == n
        for j in np.flatnonzero(run):
            i = j + n - 1
            row = g.iloc[i]
            out.append(_violation(row, REFERENCE_RULE, "reject",
                                  f"{n} consecutive sessions beyond ±{lim:g} % of the "
                                  f"reference (latest {pct[i]:+.1f} %)", settings.value))
    return out


def latest_sessions(history: pd.DataFrame) -> pd.DataFrame:
    """The newest session of each (site, scanner): what a nightly run is judging."""
    return pd.DataFrame([(site, scanner, sessions[-1]) for (site, scanner), sessions
                         in session_order(history).items()],
                        columns=["site", "scanner", "session"])


def current_rejections(violations: pd.DataFrame, history: pd.DataFrame,
                       sessions: Sequence[tuple[str, str, str]] | None = None) -> pd.DataFrame:
    """Rejections on the newest session of each site/scanner (or on ``sessions``)."""
    if violations.empty:
        return violations
    keys = latest_sessions(history) if sessions is None else \
        pd.DataFrame(list(sessions), columns=["site", "scanner", "session"])
    rej = violations[violations["severity"] == "reject"]
    return rej.merge(keys, on=["site", "scanner", "session"], how="inner")
