"""The HTML report builder on its own (also called by the workflow's report step)."""
from __future__ import annotations

import re

import pandas as pd

from qc.report import CAUTION, Figure, build_report, overall_status


def test_empty_table_extra_sections_and_warnings():
    page = build_report(pd.DataFrame(columns=["status"]), title="T <1>",
                        warnings=["drift rule X rejects <vial 3>"],
                        extra_sections=[("History and drift", "<p id='h'>history</p>")])
    assert "No ROI statistics" in page and "<p id='h'>history</p>" in page
    assert "drift rule X rejects &lt;vial 3&gt;" in page and "T &lt;1&gt;" in page
    assert CAUTION in page and "N/A" in page


def test_status_text_without_colour_and_no_external_resources():
    t = pd.DataFrame({"session": ["1"] * 3, "series": ["s"] * 3, "map": ["T1map"] * 3,
                      "label": [1, 2, 3], "name": ["a", "b", "c"], "n_voxels": [9, 9, 0],
                      "n_excluded": [0, 0, 9], "mean": [1.0, 0.5, float("nan")],
                      "sd": [0.01] * 3, "median": [1.0, 0.5, float("nan")], "iqr": [0.01] * 3,
                      "cv_pct": [1.0] * 3, "median_stderr": [0.001] * 3, "units": ["s"] * 3,
                      "reference": [1.0, 0.45, 0.3], "reference_sd": [0.0] * 3,
                      "reference_temperature": [20.0] * 3, "temperature": [20.0] * 3,
                      "temperature_source": ["--temperature"] * 3,
                      "reference_at_temperature": [1.0, 0.45, 0.3],
                      "bias_pct": [0.0, 11.1, float("nan")], "warn_pct": [5.0] * 3,
                      "tolerance_pct": [10.0] * 3, "status": ["pass", "fail", "fail"],
                      "note": ["", "", "no usable voxel in this vial"]})
    assert overall_status(t) == "fail"
    page = build_report(t, figures=[Figure("f", b"\x89PNG\r\n\x1a\nxx", "cap")])
    # the status is written out, not only coloured
    assert page.count("✖ FAIL") >= 3 and "✔ PASS" in page
    assert "+11.1" in page and "1000" in page          # bias and ms display
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", page)
    assert 'src="data:image/png;base64,' in page
