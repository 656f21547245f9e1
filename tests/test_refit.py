"""`relaxline refit` and fitting.region: honest standard errors, profile intervals against
the analytic linear-model interval, model comparison, --json/--plot, bad regions."""
from __future__ import annotations

import json
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from fitting import region as R
from fitting.signals import ir_signal, mono_exp
from fitting.spec import get_model
from pipeline.cli import main
from seriesio import combine_4d, write_4d

TI = np.array([0.035, 0.07, 0.12, 0.2, 0.3, 0.45, 0.65, 0.9, 1.3, 1.9])
TR = 2.5
IR_FIXED = {"tr": TR, "alpha": 90.0, "signed": False}
TE = 0.01 * np.arange(1, 17)
N_TRIALS = 80
COVERAGE_MIN = 0.90   # ±2σ of a normal estimate covers 95.4 % (common practice)


def _ir_region(rng, n=16, sigma=20.0, t1=0.8, m0=1000.0, eff=0.95):
    clean = np.abs(ir_signal(TI, t1, m0, eff, TR, 90.0))
    return clean[None, :] + rng.normal(0.0, sigma, (n, TI.size))


def _coverage(z: np.ndarray) -> float:
    return float(np.mean(np.abs(z) <= 2.0))


@pytest.mark.parametrize("noise_known", [True, False], ids=["background", "spread"])
def test_ir_t1_stderr_is_honest(noise_known):
    # Magnitude IR voxels (polarity restored by the ir spec's init), 16 per region; truth known.
    spec = get_model("ir")
    z, sources = [], set()
    for seed in range(N_TRIALS):
        rng = np.random.default_rng(seed)
        data = _ir_region(rng)
        ms = R.mean_signal(spec, TI, data, IR_FIXED, 20.0 if noise_known else None)
        sources.add(ms.source)
        f = R.fit_mean(spec, ms, ci=False)
        z.append((f.values["T1"] - 0.8) / f.stderr["T1"])
    z = np.asarray(z)
    assert sources == {"background" if noise_known else "spread"}
    assert _coverage(z) >= COVERAGE_MIN
    # and not honest by being inflated: z should scatter like N(0, 1)
    assert 0.75 <= np.std(z) <= 1.3


def test_t2_stderr_is_honest_mono_and_epg():
    from fitting.epg import cpmg_echoes
    for name in ("mese-mono", "mese"):
        spec = get_model(name)
        fixed = spec.fixed_from_meta({}, {})
        if name == "mese":
            clean = cpmg_echoes(TE.size, 0.01, 0.08, 1.0, b1=0.9, m0=1000.0)
        else:
            clean = mono_exp(TE, 0.08, 1000.0)
        z = []
        for seed in range(N_TRIALS if name == "mese-mono" else 60):
            rng = np.random.default_rng(1000 + seed)
            data = clean[None, :] + rng.normal(0.0, 20.0, (16, TE.size))
            f = R.fit_mean(spec, R.mean_signal(spec, TE, data, fixed, 20.0), ci=False)
            z.append((f.values["T2"] - 0.08) / f.stderr["T2"])
        assert _coverage(np.asarray(z)) >= COVERAGE_MIN, name
        assert 0.75 <= np.std(z) <= 1.3, name


def test_complex_ir_region_mean_is_phase_corrected_per_voxel():
    # Random phase per voxel: the raw complex mean would cancel; prepare() first fixes it.
    spec = get_model("ir")
    rng = np.random.default_rng(5)
    s = ir_signal(TI, 0.5, 1000.0, 0.97, TR, 90.0)
    phase = np.exp(1j * rng.uniform(-np.pi, np.pi, 12))[:, None]
    data = s[None, :] * phase + rng.normal(0, 5, (12, TI.size)) + 1j * rng.normal(0, 5, (12, TI.size))
    f = R.fit_mean(spec, R.mean_signal(spec, TI, data, IR_FIXED, 5.0), ci=False)
    assert abs(f.values["T1"] - 0.5) < 3 * f.stderr["T1"]


def _line(x, a, b):
    return a + b * x


@pytest.mark.parametrize("known", [False, True], ids=["residual-sigma", "known-sigma"])
def test_profile_interval_of_a_line_matches_analytic(known):
    # For a model linear in its parameters the profile of χ² is exactly quadratic, so the
    # profile interval equals β̂ ± q·se: q from Student's t on n − 2 degrees of freedom when σ
    # comes from the residuals (Draper & Smith, Applied Regression Analysis, 3rd ed., §3.4),
    # the normal quantile when σ is known (Press et al., Numerical Recipes, 3rd ed., §15.6).
    import lmfit
    rng = np.random.default_rng(3)
    x = np.linspace(0.0, 10.0, 12)
    sigma = 0.7
    y = 1.5 + 0.3 * x + rng.normal(0.0, sigma, x.size)
    model = lmfit.Model(_line)   # test-only helper, not a project model
    pars = model.make_params(a=0.0, b=1.0)
    if known:
        res = model.fit(y, pars, x=x, weights=np.full(x.size, 1 / sigma), scale_covar=False)
    else:
        res = model.fit(y, pars, x=x)
    stderr = {k: res.params[k].stderr for k in ("a", "b")}
    ci = R.profile_intervals(res, ["a", "b"], stderr, known)
    # analytic standard errors from (XᵀX)⁻¹ (Draper & Smith §1.4), independent of lmfit
    X = np.stack([np.ones_like(x), x], axis=1)
    beta = np.linalg.lstsq(X, y, rcond=None)[0]
    s2 = sigma ** 2 if known else np.sum((y - X @ beta) ** 2) / (x.size - 2)
    se = np.sqrt(np.diag(s2 * np.linalg.inv(X.T @ X)))
    for i, k in enumerate(("a", "b")):
        for s in (1, 2):
            p = math.erf(s / math.sqrt(2))
            q = stats.norm.ppf(0.5 + p / 2) if known else stats.t.ppf(0.5 + p / 2, x.size - 2)
            lo, hi = ci[k][f"{s}sigma"]
            assert lo == pytest.approx(beta[i] - q * se[i], rel=1e-4, abs=1e-4 * se[i])
            assert hi == pytest.approx(beta[i] + q * se[i], rel=1e-4, abs=1e-4 * se[i])


def test_comparison_prefers_eff_only_when_inversion_is_imperfect():
    spec = get_model("ir")
    alts = [(s, IR_FIXED, f, lab) for s, f, lab in R.alternatives(spec)]
    for eff, expect_ir in ((0.85, True), (1.0, False)):
        data = _ir_region(np.random.default_rng(11), sigma=10.0, eff=eff)
        rep = R.fit_region(spec, TI, data, IR_FIXED, 10.0, alts, ci=False, voxelwise=False)
        c = rep.comparisons[0]
        assert rep.competitors[0].values["eff"] == 1.0 and not rep.competitors[0].vary["eff"]
        if expect_ir:
            assert c["delta_aic"] > R.DELTA_STRONG and c["verdict"].startswith("ir fits")
        else:
            assert c["delta_aic"] < R.DELTA_CLEAR and "ir (eff = 1) suffices" in c["verdict"]


# --------------------------------------------------------------------------- CLI
@pytest.fixture(scope="module")
def session(tmp_path_factory):
    root = tmp_path_factory.mktemp("sim")
    assert main(["simulate", str(root), "--sessions", "1", "--slices", "1",
                 "--matrix", "48"]) == 0
    anat = next(root.glob("sub-*/ses-*/anat"))
    combine_4d(anat.parent)   # refit takes the 4D-with-list form here
    stem = next(anat.glob("*_IRT1.nii.gz")).name[: -len("_IRT1.nii.gz")]
    truth = pd.read_csv(next((root / "phantom").glob("truth_*.tsv")), sep="\t")
    return anat, stem, truth


def _refit(capsys, *argv):
    code = main(["refit", *map(str, argv)])
    out = capsys.readouterr()
    return code, out.out, out.err


NUMBER = re.compile(r"(?<![\w./\-])-?\d+(?:\.\d+)?(?:e[-+]?\d+)?(?![\w/\-]|\.\d)")


def _json_numbers(o) -> list[float]:
    if isinstance(o, bool) or o is None:
        return []
    if isinstance(o, (int, float)):
        return [float(o)]
    if isinstance(o, dict):
        return [v for x in o.values() for v in _json_numbers(x)]
    if isinstance(o, list):
        return [v for x in o for v in _json_numbers(x)]
    return []


def _half_ulp(token: str) -> float:
    """Half a unit in the last printed place of ``token``."""
    mant, _, exp = token.lower().partition("e")
    dec = len(mant.split(".")[1]) if "." in mant else 0
    return 0.5 * 10.0 ** (-dec + (int(exp) if exp else 0))


def test_ir_vial_text_and_json(session, tmp_path, capsys):
    anat, stem, truth = session
    args = ("ir", anat / f"{stem}_IRT1.nii.gz", "--label-map", anat / f"{stem}_dseg.nii.gz",
            "--label", 3)
    code, text, err = _refit(capsys, *args)
    assert code == 0, err
    code, out, err = _refit(capsys, *args, "--json")
    assert code == 0, err
    doc = json.loads(out)
    for key in ("model", "region", "n_voxels", "parameters", "correlation", "chisqr", "redchi",
                "aic", "bic", "voxelwise", "comparison", "noise"):
        assert key in doc
    t1 = doc["parameters"]["T1"]
    assert set(t1["ci"]) == {"1sigma", "2sigma"}
    lo1, hi1 = t1["ci"]["1sigma"]
    lo2, hi2 = t1["ci"]["2sigma"]
    assert lo2 < lo1 < t1["value"] < hi1 < hi2
    true_t1 = float(truth.loc[truth.label == 3, "T1"].iloc[0])
    assert abs(t1["value"] - true_t1) < 3 * t1["stderr"]
    assert doc["region"] == {"kind": "label", "label_map": str(anat / f"{stem}_dseg.nii.gz"),
                             "label": 3, "n_voxels_in_region": doc["n_voxels"]}
    assert doc["comparison"][0]["alternative"] == "ir (eff = 1)"
    assert doc["voxelwise"]["n_failed"] == 0
    # every figure printed in the text report is (a rounding of) a number in the JSON
    numbers = np.asarray(_json_numbers(doc))
    tokens = NUMBER.findall(text)
    assert len(tokens) > 60
    for tok in tokens:
        v = float(tok)
        assert np.any(np.abs(numbers - v) <= _half_ulp(tok) * (1 + 1e-9) + 1e-12), tok


def test_mese_against_mono_and_plot(session, tmp_path, capsys):
    anat, stem, truth = session
    png = tmp_path / "vial.png"
    code, out, err = _refit(capsys, "mese", anat / f"{stem}_MESE.nii.gz", "--label-map",
                            anat / f"{stem}_dseg.nii.gz", "--label", 6, "--json", "--plot", png)
    assert code == 0, err
    doc = json.loads(out)
    c = doc["comparison"][0]
    assert c["alternative"] == "mese-mono" and c["delta_aic"] > 0
    t2 = doc["parameters"]["T2"]
    true_t2 = float(truth.loc[truth.label == 6, "T2"].iloc[0])
    assert abs(t2["value"] - true_t2) < 4 * t2["stderr"]
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert [p.name for p in tmp_path.iterdir()] == ["vial.png"]   # no temporary left


def test_box_and_single_voxel_without_background(tmp_path, capsys):
    # A series filled with signal has no background: one voxel falls back to residuals,
    # a box of 16 voxels to the across-voxel spread.
    rng = np.random.default_rng(2)
    y = mono_exp(TE, 0.06, 500.0)[None, None, None, :] + rng.normal(0, 5, (6, 6, 2, TE.size))
    path = write_4d(tmp_path, "sub-01_MESE", y.astype(np.float32), "EchoTime", TE)
    code, out, err = _refit(capsys, "mese-mono", path, "--voxel", "2,3,1", "--json")
    assert code == 0, err
    doc = json.loads(out)
    assert doc["noise"]["source"] == "residuals" and doc["n_voxels"] == 1
    assert doc["region"]["voxel"] == [2, 3, 1]
    code, out, err = _refit(capsys, "mese-mono", path, "--box", "0:4,0:4,1:2", "--json")
    assert code == 0, err
    doc = json.loads(out)
    assert doc["noise"]["source"] == "spread" and doc["n_voxels"] == 16
    assert doc["region"]["box"] == [[0, 4], [0, 4], [1, 2]]
    assert abs(doc["parameters"]["T2"]["value"] - 0.06) < 4 * doc["parameters"]["T2"]["stderr"]


@pytest.mark.parametrize("region, message", [
    (("--label", 30), "label absent"),
    (("--box", "0:4,0:4,0:2"), "outside the image"),
    (("--box", "5:5,0:4,0:1"), "empty"),
    (("--box", "0:4,0:4"), "three ranges"),
    (("--voxel", "48,0,0"), "outside the image"),
    (("--voxel", "1,2,x"), "whole-number"),
    (("--label", 3, "--box", "0:2,0:2,0:1"), "--label applies to --label-map"),
])
def test_bad_region_exits_2(session, tmp_path, capsys, region, message):
    anat, stem, _ = session
    png = tmp_path / "never.png"
    argv = ["ir", anat / f"{stem}_IRT1.nii.gz", *region, "--plot", png]
    if region[0] == "--label" and "--box" not in region:
        argv += ["--label-map", anat / f"{stem}_dseg.nii.gz"]
    code, out, err = _refit(capsys, *argv)
    assert code == 2
    assert message in err and "Traceback" not in err
    assert not png.exists()


def test_label_map_needs_label(session, capsys):
    anat, stem, _ = session
    code, out, err = _refit(capsys, "ir", anat / f"{stem}_IRT1.nii.gz", "--label-map",
                            anat / f"{stem}_dseg.nii.gz")
    assert code == 2 and "--label N" in err


def test_vfa_with_b1_map_and_rician_noise(session, capsys):
    # The simulator's true B1 map removes the flip-angle bias (shared --b1 handling of fit).
    anat, stem, truth = session
    b1 = next(anat.parent.parent.parent.glob("phantom/truth_*_TB1map.nii.gz"))
    vial = ("--label-map", anat / f"{stem}_dseg.nii.gz", "--label", 7)
    code, out, err = _refit(capsys, "vfa", anat / f"{stem}_VFA.nii.gz", *vial, "--b1", b1,
                            "--noise", "rician", "--json")
    assert code == 0, err
    t1 = json.loads(out)["parameters"]["T1"]
    true_t1 = float(truth.loc[truth.label == 7, "T1"].iloc[0])
    assert abs(t1["value"] - true_t1) < 3 * t1["stderr"]
    code, out, err = _refit(capsys, "vfa", anat / f"{stem}_VFA.nii.gz", *vial, "--json")
    assert code == 0 and "no --b1 map given" in err


def test_mese_b1_reported_folded_like_the_maps():
    # The magnitude CPMG train is even in B1 − 1 (refocusing 180·B1 and 180·(2 − B1) give the
    # same echoes; Hennig 1988, J Magn Reson 78:397), so a region fit reports B1 folded to ≤ 1,
    # as the TB1map does, and its intervals too.
    from fitting.epg import cpmg_echoes
    spec = get_model("mese")
    fixed = spec.fixed_from_meta({}, {})
    clean = cpmg_echoes(TE.size, 0.01, 0.08, 1.0, b1=1.12, m0=1000.0)
    data = clean[None, :] + np.random.default_rng(7).normal(0.0, 5.0, (16, TE.size))
    f = R.fit_mean(spec, R.mean_signal(spec, TE, data, fixed, 5.0), ci=True)
    assert f.values["B1"] <= 1.0 and abs(f.values["B1"] - 0.88) < 0.02
    lo, hi = f.ci["B1"]["1sigma"]
    assert lo <= f.values["B1"] <= hi <= 1.0
    assert abs(f.values["T2"] - 0.08) / 0.08 < 0.02
