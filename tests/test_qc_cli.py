"""`relaxline qc` end to end on constructed maps (known values written with nibabel)."""
from __future__ import annotations

import json
import re
from html.parser import HTMLParser
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from fitting import status
from pipeline.cli import main

AFFINE = np.diag([1.0, 1.0, 3.0, 1.0])
SHAPE = (16, 16, 2)
T1_TRUE = {1: 1.20, 2: 0.60, 3: 0.30}   # s, invented vials
T2_TRUE = {1: 0.12, 2: 0.06, 3: 0.04}


def _labels() -> np.ndarray:
    lab = np.zeros(SHAPE, np.int16)
    lab[2:6, 2:6] = 1
    lab[9:13, 2:6] = 2
    lab[5:10, 9:14] = 3
    return lab


def _write(path: Path, arr: np.ndarray, sidecar: dict | None = None,
           affine: np.ndarray = AFFINE) -> None:
    nib.save(nib.Nifti1Image(arr, affine), str(path))
    if sidecar is not None:
        path.with_name(path.name.replace(".nii.gz", ".json")).write_text(json.dumps(sidecar))


def make_maps(d: Path, stem: str = "sub-phantom_ses-20260101_IR", scale: dict | None = None,
              temperature: float | None = 22.0, seed: int = 1) -> dict:
    """T1map/T2map with known vial values (× ``scale[label]``), failed voxels, status mask."""
    d.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    lab = _labels()
    scale = scale or {}
    t1 = np.full(SHAPE, np.nan, np.float32)
    t2 = np.full(SHAPE, np.nan, np.float32)
    for v in (1, 2, 3):
        m = lab == v
        t1[m] = T1_TRUE[v] * scale.get(v, 1.0) * (1 + 0.01 * rng.standard_normal(m.sum()))
        t2[m] = T2_TRUE[v] * (1 + 0.01 * rng.standard_normal(m.sum()))
    st = np.where(lab > 0, status.OK, status.OUTSIDE).astype(np.uint8)
    st[3, 3, 0] = status.FAILED
    t1[3, 3, 0] = 55.0          # garbage in a failed voxel must not reach the statistics
    st[10, 3, 1] = status.AT_BOUND
    side = {"Units": "s", "Model": "ir", "Engine": "fast", "Options": {},
            "RelaxlineVersion": "test", "Sources": []}
    if temperature is not None:
        side["PhantomTemperature"] = temperature
    _write(d / f"{stem}_T1map.nii.gz", t1, side)
    _write(d / f"{stem}_T2map.nii.gz", t2, {**side, "Model": "mese-mono"})
    _write(d / f"{stem}_desc-fitstatus_mask.nii.gz", st, {"Units": "code"})
    return {"labels": lab, "T1": t1, "status": st}


REF = ("label\tname\tT1\tT2\tT1_sd\tT2_sd\ttemperature\tfield\tT1_coef\tT2_coef\n"
       "1\tdemo vial one\t1.20\t0.12\t0.01\t0.002\t22\t3\t0.01\t\n"
       "2\tdemo vial two\t0.60\t0.06\t0.01\t0.002\t22\t3\t0.01\t\n"
       "3\tdemo vial three\t0.30\t0.04\t0.01\t0.002\t22\t3\t0.01\t\n")


@pytest.fixture
def case(tmp_path: Path):
    def build(**kw):
        maps = tmp_path / "maps"
        info = make_maps(maps, **kw)
        lab_path = tmp_path / "labels.nii.gz"
        _write(lab_path, info["labels"])
        ref = tmp_path / "reference.tsv"
        ref.write_text(REF)
        return maps, lab_path, ref, tmp_path / "qc", info
    return build


def _qc(maps, lab, ref, out, *extra) -> int:
    args = ["qc", str(maps), "--labels", str(lab), "--out", str(out), "--no-figures", *extra]
    if ref is not None:
        args += ["--reference", str(ref)]
    return main(args)


def test_pass_writes_table_with_contract_columns(case):
    maps, lab, ref, out, info = case()
    assert _qc(maps, lab, ref, out) == 0
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", dtype={"session": str})
    for col in ("session, series, map, label, name, n_voxels, mean, sd, median, iqr, cv_pct, "
                "reference, reference_at_temperature, bias_pct, tolerance_pct, status").split(", "):
        assert col in df.columns
    assert set(df["status"]) == {"pass"}
    assert set(df["session"]) == {"20260101"} and set(df["map"]) == {"T1map", "T2map"}
    r = df[(df["map"] == "T1map") & (df["label"] == 1)].iloc[0]
    keep = (info["labels"] == 1) & np.isin(info["status"], status.USABLE)
    assert r.n_excluded == 1 and r.n_voxels == keep.sum()
    assert r["mean"] == pytest.approx(info["T1"][keep].mean(), rel=1e-5)
    assert r.temperature == 22 and r.temperature_source.startswith("sidecar")


def test_fail_exit_1_and_temperature_correction(case):
    maps, lab, ref, out, _ = case(scale={2: 1.2})          # vial 2 reads 20 % long
    assert _qc(maps, lab, ref, out) == 1
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", dtype={"session": str})
    t1 = df[df["map"] == "T1map"].set_index("label")
    assert t1.loc[2, "status"] == "fail" and t1.loc[1, "status"] == "pass"
    # --temperature overrides the sidecar; the coefficient makes vial 1 need 1.2·(1+0.01·5)
    assert _qc(maps, lab, ref, out, "--temperature", "27") == 1
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", dtype={"session": str})
    r = df[(df["map"] == "T1map") & (df["label"] == 1)].iloc[0]
    assert r.reference_at_temperature == pytest.approx(1.20 * 1.05, rel=1e-6)
    assert r.temperature_source == "--temperature"
    assert r.bias_pct == pytest.approx(100 * (r["mean"] / (1.26) - 1), rel=1e-4)


def test_missing_temperature_warns(case, capsys):
    maps, lab, ref, out, _ = case(temperature=None)
    assert _qc(maps, lab, ref, out) == 0
    assert "no phantom temperature" in capsys.readouterr().out
    report = (out / "report.html").read_text()
    assert 'class="warnings"' in report and "no phantom temperature" in report
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", dtype={"session": str})
    t1 = df[df["map"] == "T1map"]
    assert t1["note"].str.contains("no phantom temperature").all()
    assert (t1["reference_at_temperature"] == t1["reference"]).all()
    # T2 has no coefficient in this table: nothing to correct, nothing flagged
    assert not df[df["map"] == "T2map"]["note"].fillna("").str.contains("temperature").any()


def test_scan_session_without_reference(case):
    maps, lab, _, out, _ = case(scale={2: 1.5})
    assert _qc(maps, lab, None, out, "--session", "scan01") == 0
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", keep_default_na=False)
    assert set(df["status"]) == {"n/a"} and set(df["session"]) == {"scan01"}


def test_label_map_on_other_grid_exit_2(case, capsys):
    maps, lab, ref, out, info = case()
    other = lab.with_name("other.nii.gz")
    _write(other, info["labels"], affine=np.diag([2.0, 1.0, 3.0, 1.0]))
    assert _qc(maps, other, ref, out) == 2
    err = capsys.readouterr().err
    assert "label map" in err and "grid" in err or "affine" in err
    assert not (out / "roi_stats.tsv").exists()


def test_bad_reference_exit_2(case, capsys):
    maps, lab, ref, out, _ = case()
    ref.write_text(REF.replace("0.60", "fast"))
    assert _qc(maps, lab, ref, out) == 2
    assert "not a number" in capsys.readouterr().err


def make_ir_session(d: Path, seed: int = 4, sigma: float = 20.0) -> dict:
    """Maps plus the IR series they "came from": background noise, vials with known T1."""
    from fitting.signals import ir_signal
    info = make_maps(d, seed=seed)
    rng = np.random.default_rng(seed)
    lab = info["labels"]
    ti = np.array([0.05, 0.2, 0.5, 1.0, 2.0, 4.0])
    tr = 8.0
    t1 = np.where(lab > 0, np.nan_to_num(info["T1"], nan=1.0), 1.0)
    t1 = np.where(info["T1"] > 10, 1.0, t1)
    m0 = np.where(lab > 0, 1000.0, 0.0)
    clean = ir_signal(ti, t1, m0, 1.0, tr)
    noisy = np.abs(clean + sigma * (rng.standard_normal(clean.shape)
                                    + 1j * rng.standard_normal(clean.shape)))
    series = d.parent / "raw" / "sub-phantom_ses-20260101_IR.nii.gz"
    series.parent.mkdir(exist_ok=True)
    _write(series, noisy.astype(np.float32),
           {"InversionTime": ti.tolist(), "RepetitionTime": tr, "MagneticFieldStrength": 3.0})
    stem = "sub-phantom_ses-20260101_IR"
    for suffix, arr in (("M0map", m0), ("InvEffmap", np.ones(SHAPE))):
        _write(d / f"{stem}_{suffix}.nii.gz", arr.astype(np.float32), {"Units": "arbitrary"})
    side = json.loads((d / f"{stem}_T1map.json").read_text())
    side.update({"Sources": [{"path": str(series), "sha256": "0" * 64},
                             {"path": str(series).replace(".nii.gz", ".json"),
                              "sha256": "0" * 64}],
                 "VaryingKey": "InversionTime"})
    (d / f"{stem}_T1map.json").write_text(json.dumps(side))
    return {**info, "sigma": sigma}


class _Refs(HTMLParser):
    def __init__(self):
        super().__init__()
        self.urls: list[str] = []
        self.tags: list[str] = []
        self.open: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag not in ("meta", "img", "br", "link", "hr", "input"):
            self.open.append(tag)
        self.urls += [v for k, v in attrs if k in ("src", "href") and v]

    def handle_endtag(self, tag):
        assert self.open and self.open[-1] == tag, f"unbalanced </{tag}>"
        self.open.pop()


def test_report_self_contained_with_figures(case, tmp_path):
    maps, lab, ref, out, _ = case()
    make_ir_session(maps)
    rc = main(["qc", str(maps), "--labels", str(lab), "--reference", str(ref), "--out", str(out)])
    assert rc == 0
    html_text = (out / "report.html").read_text()
    parser = _Refs()
    parser.feed(html_text)
    parser.close()
    assert html_text.startswith("<!DOCTYPE html>") and parser.open == []
    assert parser.urls and all(u.startswith("data:image/png;base64,") for u in parser.urls)
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", html_text)
    assert "not a medical device" in html_text and "PASS" in html_text
    figs = sorted(p.name for p in (out / "figures").iterdir())
    assert "bland_altman.png" in figs and "measured_vs_reference.png" in figs
    assert any(f.endswith("_curves.png") for f in figs)
    assert "fitted curves omitted" not in html_text
    assert "Rayleigh estimator" in html_text and "SNR IR" in html_text


def test_config_temperature_tolerances_and_erosion(case, tmp_path):
    maps, lab, ref, out, info = case(temperature=None, scale={2: 1.09})
    cfg = tmp_path / "qc.yaml"
    cfg.write_text("maps:\n  T1map: {warn_pct: 2, fail_pct: 5}\n"
                   "vials:\n  '2': {T1map: {warn_pct: 5, fail_pct: 8}}\ntemperature: 24\n")
    assert _qc(maps, lab, ref, out, "--config", str(cfg), "--erode", "1") == 0
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", dtype={"session": str})
    t1 = df[df["map"] == "T1map"].set_index("label")
    assert set(t1["temperature_source"]) == {"config"} and (t1["temperature"] == 24).all()
    # 1.2 s · (1 + 0.01 · (24 − 22))
    assert t1.loc[1, "reference_at_temperature"] == pytest.approx(1.2 * 1.02)
    # vial 2: 1.09/1.02 − 1 = +6.9 %: beyond its own warn limit (5), inside its fail limit (8)
    assert t1.loc[2, "status"] == "warn" and t1.loc[2, "tolerance_pct"] == 8
    # erosion by 1 mm on a 1×1×3 mm grid removes the in-plane rim: a 4×4 square keeps 2×2
    lab_arr = info["labels"]
    assert t1.loc[1, "n_voxels"] + t1.loc[1, "n_excluded"] == 2 * 2 * SHAPE[2]
    assert (lab_arr == 1).sum() == 4 * 4 * SHAPE[2]


def test_vial_without_usable_voxels_fails(case, tmp_path):
    maps, lab, ref, out, info = case()
    st_path = maps / "sub-phantom_ses-20260101_IR_desc-fitstatus_mask.nii.gz"
    st = info["status"].copy()
    st[info["labels"] == 3] = status.FAILED
    _write(st_path, st)
    assert _qc(maps, lab, ref, out) == 1
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", dtype={"session": str})
    r = df[(df["map"] == "T1map") & (df["label"] == 3)].iloc[0]
    assert r.status == "fail" and r.n_voxels == 0 and r.n_excluded == (info["labels"] == 3).sum()
    assert "no usable voxel" in r.note


# ---- scan sessions: configured ranges instead of a reference (design §1) -------------------
# The comparison is plain arithmetic on the region mean; the expected mean is computed here
# with numpy from the constructed map, never taken from the code under test.

def _ranges_cfg(tmp_path: Path, body: str) -> Path:
    cfg = tmp_path / "ranges.yaml"
    cfg.write_text(body)
    return cfg


def test_scan_session_ranges_pass_and_fail(case, tmp_path, capsys):
    maps, lab, _, out, info = case()
    keep = (info["labels"] == 2) & np.isin(info["status"], status.USABLE)
    mean2 = float(info["T1"][keep].mean())               # ≈ 0.60 s
    assert 0.55 < mean2 < 0.65
    cfg = _ranges_cfg(tmp_path, "ranges:\n  '2': {T1map: [0.55, 0.65], T2map: [0.05, 0.07]}\n"
                                "  3: {T1map: [0.20, 0.40]}\n")
    assert _qc(maps, lab, None, out, "--config", str(cfg)) == 0
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", keep_default_na=False,
                     na_values=[""])
    t1 = df[df["map"] == "T1map"].set_index("label")
    assert t1.loc[2, "status"] == "pass" and t1.loc[3, "status"] == "pass"
    assert t1.loc[1, "status"] == "n/a"                   # no range for label 1
    assert t1.loc[2, "mean"] == pytest.approx(mean2, rel=1e-5)
    assert (t1.loc[2, "range_low"], t1.loc[2, "range_high"]) == (0.55, 0.65)
    assert np.isnan(t1.loc[2, "reference"]) and np.isnan(t1.loc[2, "bias_pct"])
    assert "range [0.55, 0.65] s" in t1.loc[2, "note"]
    html_text = (out / "report.html").read_text()
    assert "range of mean (ms)" in html_text and "550 – 650" in html_text
    # the same region read 20 % long lies above the range: fail, exit 1
    maps, lab, _, out, info = case(scale={2: 1.2})
    mean2 = float(info["T1"][keep].mean())
    assert mean2 > 0.65
    capsys.readouterr()
    assert _qc(maps, lab, None, out, "--config", str(cfg)) == 1
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", keep_default_na=False, na_values=[""])
    t1 = df[df["map"] == "T1map"].set_index("label")
    assert t1.loc[2, "status"] == "fail" and t1.loc[3, "status"] == "pass"
    assert "1 fail" in capsys.readouterr().out
    html_text = (out / "report.html").read_text()
    assert "✖ FAIL" in html_text and "outside the range 550 – 650 ms" in html_text


def test_range_warn_margin_and_reference_precedence(case, tmp_path):
    maps, lab, ref, out, info = case()
    keep = (info["labels"] == 2) & np.isin(info["status"], status.USABLE)
    mean2 = float(info["T1"][keep].mean())
    # mean2 lies 0.01 s inside the low edge; a 20 % margin of a 0.2 s wide range is 0.04 s
    lo = round(mean2 - 0.01, 6)
    cfg = _ranges_cfg(tmp_path, f"range_warn_margin_pct: 20\nranges:\n"
                                f"  '2': {{T1map: [{lo}, {lo + 0.2}]}}\n")
    assert _qc(maps, lab, None, out, "--config", str(cfg)) == 0
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", keep_default_na=False, na_values=[""])
    assert df[(df["map"] == "T1map") & (df["label"] == 2)]["status"].item() == "warn"
    # with a reference table the reference value applies and the range is not used
    assert _qc(maps, lab, ref, out, "--config", str(cfg)) == 0
    df = pd.read_csv(out / "roi_stats.tsv", sep="\t", keep_default_na=False, na_values=[""])
    r = df[(df["map"] == "T1map") & (df["label"] == 2)].iloc[0]
    assert r.status == "pass" and np.isfinite(r.bias_pct) and np.isnan(r.range_low)
    assert "range" in r.note and "not applied" in r.note


@pytest.mark.parametrize("body, key", [
    ("ranges:\n  '2': {T1map: [0.95, 0.70]}\n", "ranges.2.T1map"),
    ("ranges:\n  '2': {T1map: [0.7, fast]}\n", "ranges.2.T1map"),
    ("ranges:\n  '2': {T1map: 0.7}\n", "ranges.2.T1map"),
    ("ranges:\n  '2': {T1: [0.7, 0.9]}\n", "ranges.2"),
    ("ranges:\n  '2': {T1map: [700, 950]}\n", "milliseconds"),
    ("ranges:\n  tissue: {T1map: [0.7, 0.9]}\n", "ranges"),
    ("range_warn_margin_pct: 70\nranges:\n  '2': {T1map: [0.7, 0.9]}\n",
     "range_warn_margin_pct"),
])
def test_bad_ranges_exit_2_naming_the_key(case, tmp_path, capsys, body, key):
    maps, lab, _, out, _ = case()
    cfg = _ranges_cfg(tmp_path, body)
    assert _qc(maps, lab, None, out, "--config", str(cfg)) == 2
    err = capsys.readouterr().err
    assert key in err and str(cfg) in err and "Traceback" not in err
    assert not (out / "roi_stats.tsv").exists()
