"""ROI statistics, reference temperature correction and tolerances (qc layer, no files)."""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import scipy.stats

from fitting import status
from fitting.errors import RelaxlineError
from qc.reference import Reference, parse_reference
from qc.roi import erode_labels, roi_stats
from qc.tolerance import DEFAULT_TOLERANCES, load_tolerances


def _constructed(seed: int = 0):
    rng = np.random.default_rng(seed)
    labels = np.zeros((10, 9, 3), int)
    labels[1:4, 1:4, :] = 1
    labels[5:9, 2:7, 1:] = 2
    labels[0, 8, 0] = 3                      # a one-voxel region
    values = rng.normal(1.0, 0.05, labels.shape)
    st = np.full(labels.shape, status.OK, np.uint8)
    st[1, 1, 0] = status.FAILED
    st[2, 2, 2] = status.AT_BOUND
    st[6, 3, 1] = status.OK_REFIT             # usable
    values[6, 4, 2] = np.nan                  # non-finite but status OK: also excluded
    return values, labels, st


def test_roi_stats_match_numpy_and_count_exclusions():
    values, labels, st = _constructed()
    df = roi_stats(values, labels, st).set_index("label")
    for lab, n_excl in ((1, 2), (2, 1), (3, 0)):
        keep = (labels == lab) & np.isin(st, status.USABLE) & np.isfinite(values)
        v = values[keep]
        row = df.loc[lab]
        assert row.n_voxels == v.size and row.n_excluded == n_excl
        assert row["mean"] == pytest.approx(np.mean(v))
        assert row["median"] == pytest.approx(np.median(v))
        # general-purpose references: scipy.stats for the IQR and the sample SD
        assert row["iqr"] == pytest.approx(scipy.stats.iqr(v))
        if v.size > 1:
            assert row["sd"] == pytest.approx(scipy.stats.tstd(v))
            assert row["cv_pct"] == pytest.approx(100 * np.std(v, ddof=1) / np.mean(v))
        else:
            assert math.isnan(row["sd"])


def test_roi_stats_without_status_and_absent_label():
    values, labels, _ = _constructed()
    df = roi_stats(values, labels, None, only=[1, 2, 7]).set_index("label")
    assert df.loc[1].n_voxels == 27 and df.loc[1].n_excluded == 0
    assert df.loc[2].n_excluded == 1          # the NaN voxel
    assert df.loc[7].n_voxels == 0 and math.isnan(df.loc[7]["mean"])


def test_roi_stats_rejects_non_integer_labels_and_grid_mismatch():
    values, labels, st = _constructed()
    with pytest.raises(RelaxlineError, match="non-integer"):
        roi_stats(values, labels + 0.5, st)
    with pytest.raises(RelaxlineError, match="shape"):
        roi_stats(values[:-1], labels, None)


def test_erosion_on_anisotropic_grid():
    labels = np.zeros((21, 21, 3), int)
    yy, xx = np.mgrid[:21, :21]
    disc = (yy - 10) ** 2 + (xx - 10) ** 2 <= 8 ** 2
    labels[disc, :] = 1
    # 1 mm in-plane, 1 mm slices, margin 2 mm: the vial runs through the slab, so it
    # shrinks in plane only (the array border is not its edge) and every slice keeps it.
    er = erode_labels(labels, 2.0, (1.0, 1.0, 1.0))
    assert all((er[..., z] == er[..., 1]).all() for z in range(3))
    kept = er[..., 1] == 1
    r = np.sqrt((yy - 10) ** 2 + (xx - 10) ** 2)
    assert kept.sum() < disc.sum()
    # Euclidean distance to the nearest outside voxel > 2 mm  <=>  r < 8 + 1 − 2 (approx.)
    assert np.all(r[kept] <= 7.0) and kept[10, 10] and kept[10, 3] == False  # noqa: E712
    # anisotropic: 1 mm rows, 3 mm columns; a voxel stays when its centre is more than
    # 2 mm from the nearest outside voxel centre: 2 rows go at each side, no column
    box = np.zeros((12, 12, 1), int)
    box[2:10, 2:10] = 1
    eb = erode_labels(box, 2.0, (1.0, 3.0, 1.0))
    rows, cols = np.nonzero(eb[..., 0])
    assert (rows.min(), rows.max(), cols.min(), cols.max()) == (4, 7, 2, 9)
    assert np.array_equal(erode_labels(labels, 0.0), labels)


REF = ("label\tname\tT1\tT2\tT1_sd\tT2_sd\ttemperature\tfield\tT1_coef\tT2_coef\n"
       "1\tvial A\t1.000\t0.100\t0.01\t0.002\t20\t3\t0.02\t-0.01\n"
       "2\tvial B\t0.500\t0.050\t0.01\t0.002\t20\t3\t\t\n"
       "3\tvial C\t0.300\t0.040\t\t\t15\t3\t\t\n"
       "3\tvial C\t0.400\t0.050\t\t\t25\t3\t\t\n"
       "3\tvial C\t0.420\t0.060\t\t\t30\t3\t\t\n")


def test_linear_coefficient_correction():
    ref = Reference(parse_reference(REF))
    df = ref.at_temperature("T1", 23.0).set_index("label")
    # value(T) = value·(1 + coef·(T − T0)) — the table's definition (module docstring)
    assert df.loc[1, "reference_at_temperature"] == pytest.approx(1.0 * (1 + 0.02 * 3))
    assert df.loc[1, "reference"] == 1.0 and df.loc[1, "reference_temperature"] == 20
    t2 = ref.at_temperature("T2", 17.0).set_index("label")
    assert t2.loc[1, "reference_at_temperature"] == pytest.approx(0.1 * (1 - 0.01 * -3))
    # no coefficient: uncorrected and flagged
    assert df.loc[2, "reference_at_temperature"] == 0.5
    assert "no temperature coefficient" in df.loc[2, "reference_note"]


def test_interpolation_at_and_between_knots_and_extrapolation_flag():
    ref = Reference(parse_reference(REF))
    at = lambda t: ref.at_temperature("T1", t).set_index("label").loc[3]  # noqa: E731
    assert at(25.0)["reference_at_temperature"] == pytest.approx(0.400)      # at a knot
    assert at(15.0)["reference_at_temperature"] == pytest.approx(0.300)
    assert at(20.0)["reference_at_temperature"] == pytest.approx(0.350)      # midway
    assert at(27.5)["reference_at_temperature"] == pytest.approx(0.410)
    assert at(22.0)["reference_at_temperature"] == pytest.approx(0.3 + 0.1 * 7 / 10)
    assert at(22.0)["reference_note"] == ""
    ext = at(35.0)   # beyond the last knot: along the 25–30 °C segment, flagged
    assert ext["reference_at_temperature"] == pytest.approx(0.42 + 0.004 * 5)
    assert "extrapolated" in ext["reference_note"]


def test_missing_temperature_is_flagged_not_silent():
    ref = Reference(parse_reference(REF))
    assert ref.needs_temperature("T1")
    df = ref.at_temperature("T1", None).set_index("label")
    assert df.loc[1, "reference_at_temperature"] == 1.0
    assert "no phantom temperature" in df.loc[1, "reference_note"]
    assert df.loc[3, "reference_at_temperature"] == 0.300       # first listed row
    assert "no phantom temperature" in df.loc[3, "reference_note"]
    assert df.loc[2, "reference_note"] == ""                   # nothing to correct


@pytest.mark.parametrize("text, match", [
    ("label\tname\tT1\n1\ta\t1.0\n", "temperature"),
    ("label\tname\ttemperature\n1\ta\t20\n", "reference-value column"),
    ("label\tname\tT1\ttemperature\n1\ta\tfast\t20\n", "'T1' holds 'fast'"),
    ("label\tname\tT1\ttemperature\n1\ta\t1.0\t20\n1\ta\t1.1\t20\n", "twice at temperature 20"),
    ("label\tname\tT1\ttemperature\n1\ta\t1.0\t20\n1\tb\t1.1\t25\n", "different names"),
    ("label\tname\tT1\ttemperature\n1\ta\t1000\t20\n", "milliseconds"),
    ("label\tname\tT1\ttemperature\nx\ta\t1.0\t20\n", "label"),
    ("label,name,T1,temperature\n1,a,1.0,20\n", "TAB-separated"),
    ("label\tname\tT1\ttemperature\n1\ta\t1.0\n", "cells"),
    ("label\tname\tT1\ttemperature\n1\ta\t1.0\t\n", "'temperature' is empty"),
])
def test_reference_validation_errors(text, match):
    with pytest.raises(RelaxlineError, match=match):
        parse_reference(text, "ref.tsv")


def test_tolerances_defaults_overrides_and_status():
    tol = load_tolerances(None)
    assert tol.limits("T1map") == (DEFAULT_TOLERANCES["T1map"]["warn_pct"],
                                   DEFAULT_TOLERANCES["T1map"]["fail_pct"])
    tol = load_tolerances({"maps": {"T1map": {"warn_pct": 2, "fail_pct": 4}},
                           "vials": {"3": {"T1map": {"warn_pct": 10, "fail_pct": 20}}},
                           "temperature": 21})
    assert tol.limits("T1map", 1) == (2, 4) and tol.limits("T1map", 3) == (10, 20)
    assert tol.limits("T2map") == (7.5, 15.0) and tol.temperature == 21
    assert [tol.status(b, "T1map", 1) for b in (1.9, -2.0, 3.0, -4.5)] == \
        ["pass", "pass", "warn", "fail"]
    assert tol.status(15.0, "T1map", 3) == "warn"
    assert tol.status(float("nan"), "T1map", 1) == "fail"            # nothing measured
    assert tol.status(1.0, "T1map", 1, has_reference=False) == "n/a"
    assert tol.status(1.0, "TB1map", 1) == "n/a"                     # no tolerance


@pytest.mark.parametrize("cfg, match", [
    ({"maps": {"T1map": {"warn_pct": 5}}}, "fail_pct"),
    ({"maps": {"T1map": {"warn_pct": 12, "fail_pct": 10}}}, "larger than"),
    ({"maps": {"T3map": {"warn_pct": 1, "fail_pct": 2}}}, "unknown map"),
    ({"vials": {"x": {}}}, "not a vial label"),
    ({"tolerance": {}}, "unknown key"),
    ({"maps": {"T1map": {"warn_pct": "5", "fail_pct": 10}}}, "number"),
])
def test_tolerance_validation(cfg, match):
    with pytest.raises(RelaxlineError, match=match):
        load_tolerances(cfg)


def test_sample_tolerance_file_loads():
    from pathlib import Path
    tol = load_tolerances(Path(__file__).parents[1] / "sample_config" / "tolerances.yaml")
    assert set(DEFAULT_TOLERANCES) <= set(tol.maps)


def test_field_mismatch_is_reported():
    ref = Reference(parse_reference(REF), "ref.tsv")
    assert ref.field_warning(3.0) is None and ref.field_warning(None) is None
    assert "1.5 T" in ref.field_warning(1.5) and "ref.tsv" in ref.field_warning(1.5)
