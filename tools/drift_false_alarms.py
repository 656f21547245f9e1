"""False-rejection rate and detection delay of drift rule sets on long simulated histories.

Usage::

    .venv/bin/relaxline demo /tmp/fa --sessions 14          # drift-free sessions (once)
    .venv/bin/python tools/drift_false_alarms.py /tmp/fa/results/history.sqlite \\
        [--sessions 100] [--seeds 5] [--baseline 5 10] [--floor 0.5 1.0]

Realism. Fitting 30+ sessions × several seeds through the whole workflow takes hours on
two cores, so the long histories are drawn from what the real pipeline shows: the
history database of a drift-free simulated run (``relaxline demo``: full image
simulation, fits, QC) gives, for every monitored (model, map, vial), the tracked value
(:func:`qc.drift.tracked_values`, temperature-referred) in each session. Its session ×
series residual matrix ``R`` (n sessions, each series' mean removed) carries both the
between-session spread of every vial and the correlation between vials and maps of one
session (a shared temperature error, phantom position in the B1 field). A synthetic
session is ``mean + wᵀR / √(n − 1)`` with ``w ~ N(0, I_n)``: Gaussian with exactly the
measured covariance. A step of +s % in one vial multiplies that vial's tracked value
from a given session on.

Counts. A *false rejection* is a judged session (after the baseline) of a drift-free
history in which any rule rejects anything, over the whole phantom (every monitored
map and vial). The *detection delay* of a step is the number of sessions from the step
(1 = the first stepped session) until a rule rejects that vial and map; steps are put
into each monitored map's vials in turn.
"""
from __future__ import annotations

import argparse
import itertools
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from qc import drift  # noqa: E402
from qc.history import load_history  # noqa: E402

CANDIDATES = {   # name -> rules
    "all (1981 set + R-4s + 10x)": ("1-2s", "1-3s", "2-2s", "R-4s", "4-1s", "10x"),
    "1-3s 2-2s 4-1s 10x": ("1-2s", "1-3s", "2-2s", "4-1s", "10x"),
    "1-3s 2-2s 4-1s": ("1-2s", "1-3s", "2-2s", "4-1s"),
    "1-3s 2-2s": ("1-2s", "1-3s", "2-2s"),
}


def residuals(history: pd.DataFrame, settings: drift.DriftSettings
              ) -> tuple[pd.DataFrame, pd.Series, np.ndarray]:
    """Monitored rows: (series key table, per-series mean, residual matrix sessions × series)."""
    h = drift.score(history, settings)
    h = h[h["monitored"]]
    wide = h.pivot_table(index="session", columns=list(drift.GROUP), values="tracked")
    wide = wide.dropna(axis=1)
    mean = wide.mean(axis=0)
    return wide, mean, (wide - mean).to_numpy(float)


def synth(mean: pd.Series, resid: np.ndarray, n: int, rng: np.random.Generator,
          template: pd.DataFrame, step: tuple[tuple, float, int] | None = None) -> pd.DataFrame:
    """A history of ``n`` sessions drawn with the measured covariance (module docstring)."""
    w = rng.standard_normal((n, resid.shape[0]))
    x = mean.to_numpy(float)[None, :] + w @ resid / np.sqrt(resid.shape[0] - 1)
    cols = list(mean.index)
    if step is not None:
        key, pct, first = step
        x[first:, cols.index(key)] *= 1 + pct / 100
    sessions = [f"s{i:04d}" for i in range(n)]
    frame = pd.DataFrame(x, index=sessions, columns=pd.MultiIndex.from_tuples(
        cols, names=list(drift.GROUP)))
    long = frame.stack(list(range(len(drift.GROUP))), future_stack=True).rename("mean")
    long = long.reset_index().rename(columns={"level_0": "session", "index": "session"})
    long = long.merge(template, on=list(drift.GROUP), how="left")
    # tracked values are already temperature-referred: reference = reference at T
    long["reference_at_temperature"] = long["reference"]
    return long


def false_rejections(mean, resid, template, settings, n, seeds) -> tuple[int, int]:
    bad = judged = 0
    for seed in seeds:
        h = synth(mean, resid, n, np.random.default_rng(seed), template)
        scored, v = drift.evaluate(h, settings)
        js = scored.loc[scored["judged"], "session"].unique()
        rej = v.loc[v["severity"] == "reject", "session"].unique()
        judged += len(js)
        bad += len(set(rej) & set(js))
    return bad, judged


def delays(mean, resid, template, settings, n_after, pct, seeds, keys) -> list[float]:
    """Sessions from the step to the first rejection of the stepped series (inf: none)."""
    out = []
    first = settings.baseline_sessions + 2
    for seed, key in itertools.product(seeds, keys):
        h = synth(mean, resid, first + n_after, np.random.default_rng(10_000 + seed), template,
                  (key, pct, first))
        _, v = drift.evaluate(h, settings)
        sel = v[(v["severity"] == "reject") & (v["series"] == key[3]) & (v["map"] == key[4])
                & (v["label"] == key[5]) & (v["session"] >= f"s{first:04d}")]
        out.append(int(sel["session"].min()[1:]) - first + 1 if len(sel) else np.inf)
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("database", help="history.sqlite of a drift-free simulated run")
    ap.add_argument("--sessions", type=int, default=100, help="sessions per history")
    ap.add_argument("--seeds", type=int, default=5)
    ap.add_argument("--baseline", type=int, nargs="+", default=[5, 10])
    ap.add_argument("--floor", type=float, nargs="+", default=[0.5, 1.0],
                    help="min_sd_pct values to try")
    ap.add_argument("--rules", nargs="+", default=list(CANDIDATES), help="candidate names")
    ap.add_argument("--delay-seeds", type=int, default=3)
    a = ap.parse_args(argv)
    hist = load_history(a.database)
    _, mean, resid = residuals(hist, drift.DriftSettings())
    keys = list(mean.index)
    tmpl = hist.assign(model=hist["model"].fillna(""))[list(drift.GROUP) + [
        "name", "reference", "units"]].drop_duplicates(list(drift.GROUP))
    n_ses = resid.shape[0]
    sd_pct = 100 * resid.std(axis=0, ddof=1) / mean.to_numpy(float)
    print(f"measured on {a.database}: {n_ses} drift-free sessions, {len(keys)} monitored "
          f"series; between-session SD of the tracked value: median {np.median(sd_pct):.2f} %, "
          f"max {sd_pct.max():.2f} % of the mean")
    by_map = pd.Series(sd_pct, index=pd.MultiIndex.from_tuples(keys, names=drift.GROUP))
    print(by_map.groupby(level=["model", "map"]).agg(["median", "max"]).round(2).to_string())
    # detection: one vial per monitored map (its median-SD vial), every map
    step_keys = [k for (_, g) in by_map.groupby(level=["model", "map"])
                 for k in [g.sort_values().index[len(g) // 2]]]
    print(f"\n{a.seeds} seeds x {a.sessions} sessions per rule set; delays over "
          f"{a.delay_seeds} seeds x {len(step_keys)} maps (one vial each), step after "
          "baseline + 2 sessions")
    print("rules | baseline | SD floor % | false rejections / judged sessions | per 100 | "
          "delay 2 % (median, max) | delay 5 % (median, max)")
    seeds = range(a.seeds)
    for name, base, floor in itertools.product(a.rules, a.baseline, a.floor):
        t0 = time.time()
        st = drift.DriftSettings(baseline_sessions=base, rules=CANDIDATES[name],
                                 min_sd_pct=floor)
        bad, judged = false_rejections(mean, resid, tmpl, st, a.sessions, seeds)
        d2 = delays(mean, resid, tmpl, st, 15, 2.0, range(a.delay_seeds), step_keys)
        d5 = delays(mean, resid, tmpl, st, 15, 5.0, range(a.delay_seeds), step_keys)
        fmt = lambda d: f"{np.median(d):g}, {np.max(d):g}"  # noqa: E731
        print(f"{name} | {base} | {floor:g} | {bad} / {judged} | {100 * bad / judged:.2f} | "
              f"{fmt(d2)} | {fmt(d5)}   ({time.time() - t0:.0f} s)", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
