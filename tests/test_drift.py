"""Drift rules against their published definitions (Westgard et al. 1981, Clin Chem 27:493).

Each series below is constructed so the answer follows by hand from the rule text:
1-3s "one control measurement exceeds the mean ± 3s"; 2-2s "two consecutive control
measurements exceed the same mean + 2s or the same mean − 2s limit"; R-4s "one control
measurement in a group exceeds the mean + 2s and another exceeds the mean − 2s";
4-1s "four consecutive control measurements exceed the same mean + 1s or mean − 1s";
10x "ten consecutive control measurements fall on one side of the mean".
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from qc import drift
from qc.drift import DriftSettings


# ---- rules on z sequences ----------------------------------------------------------------

def test_1_3s_and_1_2s():
    # Westgard et al. 1981, Clin Chem 27:493 (1-3s reject, 1-2s warning)
    z = np.array([0.5, -2.5, 3.01, -3.2, 2.99])
    assert drift.beyond(z, 3).tolist() == [False, False, True, True, False]
    assert drift.beyond(z, 2).tolist() == [False, True, True, True, True]


def test_2_2s_needs_same_side():
    # Westgard et al. 1981, Clin Chem 27:493: the *same* +2s or −2s limit
    z = np.array([2.1, 2.2, -2.1, 2.5, -2.4, -2.6, 1.9, 2.1])
    assert drift.consecutive_beyond(z, 2, 2).tolist() == \
        [False, True, False, False, False, True, False, False]


def test_4_1s():
    # Westgard et al. 1981, Clin Chem 27:493: four consecutive beyond the same 1s limit
    z = np.array([1.1, 1.5, 1.2, 0.9, 1.3, 1.4, 1.2, 1.1, -1.5])
    assert np.flatnonzero(drift.consecutive_beyond(z, 4, 1)).tolist() == [7]
    z = -np.array([1.1, 1.5, 1.2, 1.3])
    assert drift.consecutive_beyond(z, 4, 1).tolist() == [False, False, False, True]


def test_10x_one_side_of_mean():
    # Westgard et al. 1981, Clin Chem 27:493: ten consecutive on one side of the mean
    z = np.full(12, 0.3)
    z[5] = -0.1
    assert not drift.consecutive_beyond(z, 10, 0).any()  # broken at index 5
    z[5] = 0.1
    assert np.flatnonzero(drift.consecutive_beyond(z, 10, 0)).tolist() == [9, 10, 11]
    assert not drift.consecutive_beyond(np.full(9, -0.5), 10, 0).any()


def test_r_4s_within_run():
    # Westgard et al. 1981, Clin Chem 27:493: one above +2s and another below −2s in a run
    assert drift.range_4s([2.1, 0.0, -2.05])
    assert not drift.range_4s([2.1, 3.5, -1.9])  # range 5.4 SD but nothing below −2s
    assert not drift.range_4s([0.1])


# ---- evaluation on a history table -------------------------------------------------------

def _history(values_by_label: dict[int, list[float]], reference: float = 1.0,
             sessions: list[str] | None = None) -> pd.DataFrame:
    rows = []
    for label, values in values_by_label.items():
        ses = sessions or [f"2026{i + 1:04d}" for i in range(len(values))]
        for s, v in zip(ses, values):
            rows.append({"site": "A", "scanner": "S1", "session": s, "model": "ir",
                         "series": "IRT1",
                         "map": "T1map", "label": label, "name": f"vial{label}", "mean": v,
                         "reference": reference, "reference_at_temperature": reference})
    return pd.DataFrame(rows)


BASE = [0.99, 1.01, 0.99, 1.01]  # mean 1.0, sample SD 0.011547 (by hand: sqrt(4e-4/3))


def test_baseline_mean_sd_by_hand():
    h = _history({1: BASE + [1.0]})
    st = drift.baseline_stats(h, DriftSettings(baseline_sessions=4, min_sd_pct=0))
    assert st["baseline_mean"].item() == pytest.approx(1.0)
    assert st["baseline_sd"].item() == pytest.approx(np.sqrt(4e-4 / 3))
    assert st["baseline_n"].item() == 4
    # the floor: 2 % of the mean beats the sample SD
    st = drift.baseline_stats(h, DriftSettings(baseline_sessions=4, min_sd_pct=2))
    assert st["baseline_sd"].item() == pytest.approx(0.02)


def test_evaluate_flags_1_3s_only_after_baseline():
    sd = np.sqrt(4e-4 / 3)
    h = _history({1: BASE + [1.0 + 2.9 * sd, 1.0 + 3.5 * sd]})
    s = DriftSettings(baseline_sessions=4, min_sd_pct=0, rules=("1-3s",))
    scored, v = drift.evaluate(h, s)
    assert scored["judged"].tolist() == [False] * 4 + [True] * 2
    assert v["session"].tolist() == ["20260006"]
    assert v["rule"].tolist() == ["1-3s"]


def test_evaluate_2_2s_across_sessions_and_r4s_across_vials():
    sd = 0.01 / np.sqrt(3) * 2  # SD of BASE = 0.011547
    h = _history({1: BASE + [1 + 2.5 * sd, 1 + 2.2 * sd],
                  2: BASE + [1.0, 1 - 2.3 * sd]})
    s = DriftSettings(baseline_sessions=4, min_sd_pct=0,
                      rules=("2-2s", "R-4s", "1-3s", "4-1s", "10x"))
    _, v = drift.evaluate(h, s)
    got = sorted(zip(v["session"], v["label"], v["rule"]))
    assert got == [("20260006", 1, "2-2s"), ("20260006", 1, "R-4s"), ("20260006", 2, "R-4s")]


def test_warning_trigger_scheme():
    # 1981 chart scheme: 4-1s is only inspected when a 1-2s warning occurs in the run
    sd = np.sqrt(4e-4 / 3)
    h = _history({1: BASE + [1 + 1.5 * sd] * 4})
    free = DriftSettings(baseline_sessions=4, min_sd_pct=0, rules=("4-1s",))
    trig = DriftSettings(baseline_sessions=4, min_sd_pct=0, rules=("4-1s",),
                         warning_trigger=True)
    assert drift.evaluate(h, free)[1]["rule"].tolist() == ["4-1s"]
    assert drift.evaluate(h, trig)[1].empty


def test_no_baseline_yet_means_nothing_judged():
    h = _history({1: [1.0, 5.0]})
    scored, v = drift.evaluate(h, DriftSettings(baseline_sessions=5, rules=("1-3s",)))
    assert v.empty and not scored["judged"].any()


def test_explicit_baseline_sessions():
    sd = np.sqrt(4e-4 / 3)
    ses = ["20260101", "20260102", "20260103", "20260104", "20260105", "20260106"]
    h = _history({1: [1.2] + BASE + [1 + 3.2 * sd]}, sessions=ses)
    s = DriftSettings(baseline=tuple(ses[1:5]), min_sd_pct=0, rules=("1-3s",))
    _, v = drift.evaluate(h, s)
    assert v["session"].tolist() == ["20260106"]  # 20260101 is before the baseline


def test_reference_percent_rule():
    # 6 % above reference three sessions running; plain arithmetic
    h = _history({1: [1.0, 1.06, 1.06, 1.06, 1.02]})
    s = DriftSettings(rules=("ref-pct",), reference_pct=5, reference_consecutive=3)
    _, v = drift.evaluate(h, s)
    assert v["session"].tolist() == ["20260004"]
    assert "+6.0 %" in v["detail"].item()


def test_current_rejections_only_latest_session():
    sd = np.sqrt(4e-4 / 3)
    h = _history({1: BASE + [1 + 3.5 * sd, 1.0]})
    _, v = drift.evaluate(h, DriftSettings(baseline_sessions=4, min_sd_pct=0,
                                           rules=("1-3s",)))
    assert len(v) == 1
    assert drift.current_rejections(v, h).empty  # the violation is not on the newest session
    h2 = _history({1: BASE + [1.0, 1 + 3.5 * sd]})
    _, v2 = drift.evaluate(h2, DriftSettings(baseline_sessions=4, min_sd_pct=0,
                                             rules=("1-3s",)))
    assert len(drift.current_rejections(v2, h2)) == 1


def test_unknown_rule_rejected():
    with pytest.raises(ValueError, match="unknown drift rule"):
        DriftSettings(rules=("1-5s",))


# ---- false-rejection rates against the normal distribution ------------------------------

RULE_RATES = {  # rule -> (check on z, in-control firing rate per value)
    "1-3s": (lambda z: drift.beyond(z, 3), lambda sf: 2 * sf(3)),
    "2-2s": (lambda z: drift.consecutive_beyond(z, 2, 2), lambda sf: 2 * sf(2) ** 2),
    "4-1s": (lambda z: drift.consecutive_beyond(z, 4, 1), lambda sf: 2 * sf(1) ** 4),
}


def test_false_rejection_rate_of_each_rule_matches_the_normal_distribution():
    """In control (i.i.d. standard normal z), each rule fires at the rate the normal
    distribution gives: 1-3s 2(1 − Φ(3)); 2-2s 2(1 − Φ(2))²; 4-1s 2(1 − Φ(1))⁴
    (Westgard et al. 1981, Clin Chem 27:493 for the rules; Φ from scipy.stats). The
    machinery `tools/drift_false_alarms.py` measures the default rule set with."""
    from scipy.stats import norm
    z = np.random.default_rng(2026).standard_normal(4_000_000)
    for rule, (check, rate) in RULE_RATES.items():
        p = rate(norm.sf)
        hits = int(check(z)[3:].sum())       # from the 4th value on, every rule is defined
        n = z.size - 3
        assert abs(hits / n - p) < 4 * np.sqrt(p / n), (rule, hits / n, p)   # 4 SE


def test_evaluate_fires_exactly_where_the_rules_do_on_an_in_control_history():
    """evaluate() on a history whose baseline has mean/SD known exactly rejects exactly the
    judged values the rule functions flag (so the measured rates above carry over)."""
    rng = np.random.default_rng(7)
    n_base, n_judged = 20, 400
    sessions = [f"2{i:07d}" for i in range(n_base + n_judged)]
    values, zs = {}, {}
    for lab in range(1, 7):
        base = rng.standard_normal(n_base)
        base = (base - base.mean()) / base.std(ddof=1)   # baseline mean 0, SD 1 exactly
        zs[lab] = np.concatenate([base, rng.standard_normal(n_judged)])
        values[lab] = list(1.0 + 0.01 * zs[lab])
    h = _history(values, sessions=sessions)
    for rule, (check, _) in RULE_RATES.items():
        s = DriftSettings(baseline=tuple(sessions[:n_base]), min_sd_pct=0, rules=(rule,))
        _, v = drift.evaluate(h, s)
        expected = sorted((sessions[i], lab) for lab, z in zs.items()
                          for i in np.flatnonzero(check(z)) if i >= n_base)
        assert sorted(zip(v["session"], v["label"])) == expected, rule
