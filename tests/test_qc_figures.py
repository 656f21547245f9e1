"""QC figures: Bland–Altman limits and PNG output."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from qc.figures import bland_altman, bland_altman_stats, map_montage, measured_vs_reference

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def test_bland_altman_limits_are_bias_pm_1_96_sd():
    # Bland & Altman 1986, Lancet 1:307: limits of agreement = mean difference ± 1.96·SD
    # of the differences (sample SD). Worked by hand: d = 1, 2, 3, 6 → mean 3,
    # SD = √((4 + 1 + 0 + 9)/3) = √(14/3).
    st = bland_altman_stats([1.0, 2.0, 3.0, 6.0, np.nan])
    sd = np.sqrt(14 / 3)
    assert st["n"] == 4 and st["bias"] == pytest.approx(3.0) and st["sd"] == pytest.approx(sd)
    assert st["lower"] == pytest.approx(3 - 1.96 * sd) and st["upper"] == pytest.approx(3 + 1.96 * sd)
    d = np.random.default_rng(0).normal(2, 3, 50)
    st = bland_altman_stats(d)
    assert st["upper"] - st["lower"] == pytest.approx(2 * 1.96 * np.std(d, ddof=1))


def _table():
    rows = []
    for m, ref in (("T1map", [1.2, 0.6, 0.3]), ("T2map", [0.12, 0.06, 0.04])):
        for lab, (r, b) in enumerate(zip(ref, [1.0, -3.0, 12.0]), start=1):
            rows.append({"map": m, "label": lab, "mean": r * (1 + b / 100), "sd": 0.02 * r,
                         "reference_at_temperature": r, "bias_pct": b, "warn_pct": 5.0,
                         "tolerance_pct": 10.0, "units": "s",
                         "status": "pass" if abs(b) <= 5 else "fail"})
    return pd.DataFrame(rows)


def test_figures_are_png_and_ba_table_matches_stats():
    df = _table()
    png, stats = bland_altman(df)
    assert png.startswith(PNG_MAGIC)
    row = stats.set_index("map").loc["T1map"]
    assert row["bias"] == pytest.approx(np.mean([1.0, -3.0, 12.0]))
    assert measured_vs_reference(df).startswith(PNG_MAGIC)
    lab = np.zeros((12, 10, 2), int)
    lab[2:5, 2:5] = 1
    data = np.where(lab > 0, 1.0, np.nan)
    assert map_montage(data, "T1", "T1map", "s", lab).startswith(PNG_MAGIC)
    assert measured_vs_reference(df.assign(reference_at_temperature=np.nan)) is None
