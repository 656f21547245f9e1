"""Trend figures: the y axis names the quantity, the statistic and the unit plotted."""
from __future__ import annotations

import pandas as pd

from qc import trend


def test_y_label_has_quantity_statistic_and_display_unit():
    # the history keeps seconds; the figures show the report's unit, ms (one convention
    # everywhere a person reads)
    assert trend.y_label("T2map", "mean") == "T2, ROI mean ± SD (ms)"
    assert trend.y_label("T1map", "median") == "T1, ROI median ± SD (ms)"
    assert trend.y_label("T2starmap") == "T2*, ROI mean ± SD (ms)"
    assert trend.y_label("TB1map") == "B1 (ratio), ROI mean ± SD"   # a ratio has no unit


def test_trend_figure_uses_the_label(monkeypatch):
    seen = []
    import matplotlib.figure
    orig = matplotlib.figure.Figure.supylabel

    def spy(self, text, **kw):
        seen.append(text)
        return orig(self, text, **kw)

    monkeypatch.setattr(matplotlib.figure.Figure, "supylabel", spy)
    scored = pd.DataFrame({"session": ["20261101", "20261102"], "label": [1, 1],
                           "name": ["v1", "v1"], "map": ["T2map"] * 2, "mean": [0.06, 0.061],
                           "sd": [0.001, 0.001], "reference_at_temperature": [0.06, 0.06],
                           "tolerance_pct": [10.0, 10.0]})
    png = trend.trend_figure(scored, None, "mean")
    assert png.startswith(b"\x89PNG") and seen == ["T2, ROI mean ± SD (ms)"]
