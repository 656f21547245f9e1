"""`relaxline simulate`: determinism, input-contract form, label map, noise law, truth."""
from __future__ import annotations

import json
import math
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from fitting.epg import cpmg_echoes
from fitting.signals import spgr_signal
from pipeline import phantom
from pipeline.cli import main
from pipeline.series import load_grid_map, read_series
from pipeline.simulate import (DAM_ALPHA, IR_TI, MEGRE_TE, MESE_ECHOES, MESE_ESP, VFA_FLIPS,
                               VFA_TR, SimOptions, series_paths, session_label,
                               simulate)

REPO = Path(__file__).resolve().parents[1]
SUB = f"sub-{phantom.SUBJECT_LABEL}"


def _anat(root: Path, index: int) -> tuple[Path, str]:
    ses = f"ses-{session_label(index)}"
    return root / SUB / ses / "anat", f"{SUB}_{ses}"


def _files(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*"))
            if p.is_file()}


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    """Default grid (80×80×3, SNR 100), two sessions."""
    root = tmp_path_factory.mktemp("sim")
    simulate(root, SimOptions(sessions=2, seed=11))
    return root


# ---------------------------------------------------------------- determinism

def test_same_seed_same_bytes_different_seed_different(tmp_path):
    small = dict(sessions=2, matrix=40, slices=2)
    simulate(tmp_path / "a", SimOptions(seed=5, **small))
    simulate(tmp_path / "b", SimOptions(seed=5, **small))
    simulate(tmp_path / "c", SimOptions(seed=6, **small))
    a, b, c = (_files(tmp_path / k) for k in "abc")
    # per session: 56 volumes + sidecars, dseg image + table, 3 truth files; the first
    # session also 6 files of further methods (LLT1, SRT1 4D; AFI and MP2RAGE pairs) +
    # sidecars; dataset: description, README, .bidsignore, sessions table + sidecar,
    # reference, layout
    n_vol = len(IR_TI) + len(VFA_FLIPS) + 2 + MESE_ECHOES + len(MEGRE_TE)
    n_methods = 1 + 1 + 2 + 2
    assert len(a) == 2 * (2 * n_vol + 2 + 3) + 2 * n_methods + 7
    assert a.keys() == b.keys() == c.keys()
    assert a == b
    images = [k for k in a if k.startswith("sub-") and k.endswith(".nii.gz") and "dseg" not in k]
    assert len(images) == 2 * n_vol + n_methods
    assert all(a[k] != c[k] for k in images)
    # Session k does not depend on how many sessions were asked for.
    simulate(tmp_path / "d", SimOptions(seed=5, sessions=1, matrix=40, slices=2))
    d = _files(tmp_path / "d")
    assert all(d[k] == a[k] for k in d if ("phantom/" not in k or "truth" in k)
               and "_sessions.tsv" not in k)


def test_writes_into_outdir_without_touching_other_files(tmp_path):
    (tmp_path / "notes.txt").write_text("keep me")
    simulate(tmp_path, SimOptions(sessions=1, matrix=40, slices=1))
    assert (tmp_path / "notes.txt").read_text() == "keep me"
    simulate(tmp_path, SimOptions(sessions=1, matrix=40, slices=1))  # rerun replaces own files
    assert not list(tmp_path.rglob("*.tmp"))


# ---------------------------------------------------------------- input contract

def test_series_read_back_with_keys_values_and_sorting(demo):
    anat, stem = _anat(demo, 0)
    truth = json.loads((demo / "phantom" / f"truth_ses-{session_label(0)}.json").read_text())
    ir = read_series(series_paths(demo, 0, "IRT1"), "InversionTime")
    np.testing.assert_allclose(ir.values, sorted(IR_TI))
    assert ir.meta["RepetitionTime"] == 2.5 and ir.meta["FlipAngle"] == 90.0
    vfa = read_series(series_paths(demo, 0, "VFA"), "FlipAngle")
    np.testing.assert_allclose(vfa.values, sorted(VFA_FLIPS))
    assert VFA_FLIPS != sorted(VFA_FLIPS)  # written in acquisition order: sorting is exercised
    fmap = anat.parent / "fmap"   # BIDS: B1 mapping series are field maps
    dam = read_series([fmap / f"{stem}_flip-2_TB1DAM.nii.gz", fmap / f"{stem}_flip-1_TB1DAM.nii.gz"],
                      "FlipAngle")
    np.testing.assert_allclose(dam.values, [DAM_ALPHA, 2 * DAM_ALPHA])
    assert dam.stem == f"{stem}_TB1DAM"
    mese = read_series(series_paths(demo, 0, "MESE"), "EchoTime")
    np.testing.assert_allclose(mese.values, MESE_ESP * np.arange(1, MESE_ECHOES + 1))
    assert mese.meta["RefocusingFlipAngle"] == 180.0
    megre = read_series(series_paths(demo, 0, "MEGRE"), "EchoTime")
    np.testing.assert_allclose(megre.values, MEGRE_TE)
    for s in (ir, vfa, dam, mese, megre):
        assert s.shape == (80, 80, 3)
        np.testing.assert_allclose(np.diag(s.affine)[:3], [2.5, 2.5, 5.0])
        assert s.meta["MagneticFieldStrength"] == 3.0
        assert s.meta["PhantomTemperature"] == truth["temperature"]
        assert s.meta["Site"] == "northfield-lab" and s.meta["Scanner"] == "bay2"
        assert s.read().dtype == np.float32

    # Sorted volumes follow their values: vial means rise with flip angle up to the
    # Ernst angle, arccos(e^(−TR/T1)) (Ernst & Anderson 1966, Rev Sci Instrum 37:93).
    labels = load_grid_map(anat / f"{stem}_dseg.nii.gz", vfa, what="label map")
    data = vfa.read()
    tt = pd.read_csv(demo / "phantom" / f"truth_ses-{session_label(0)}.tsv", sep="\t")
    for row in tt.itertuples():
        means = data[labels == row.label].mean(axis=0)
        ernst = math.degrees(math.acos(math.exp(-VFA_TR / row.T1))) / row.B1_mean
        below = vfa.values < ernst
        assert np.all(np.diff(means[below]) > 0)


def test_label_map_on_grid_matches_layout_and_truth(demo):
    layout = pd.read_csv(demo / "phantom" / "layout.tsv", sep="\t")
    for k in range(2):
        anat, stem = _anat(demo, k)
        ses = f"ses-{session_label(k)}"
        ir = read_series(series_paths(demo, k, "IRT1"), "InversionTime")
        labels = load_grid_map(anat / f"{stem}_dseg.nii.gz", ir, what="label map").astype(int)
        b1 = load_grid_map(demo / "phantom" / f"truth_{ses}_TB1map.nii.gz", ir, what="B1 map")
        assert set(np.unique(labels)) == set(range(13))
        dseg = pd.read_csv(anat / f"{stem}_dseg.tsv", sep="\t")
        assert list(dseg.columns) == ["index", "name"] and list(dseg["index"]) == list(range(1, 13))
        g = json.loads((demo / "phantom" / f"truth_{ses}.json").read_text())
        th = math.radians(g["rotation_deg"])
        ijk = np.argwhere(labels > 0)
        world = ijk @ ir.affine[:3, :3].T + ir.affine[:3, 3]
        truth = pd.read_csv(demo / "phantom" / f"truth_{ses}.tsv", sep="\t")
        for row in layout.itertuples():
            sel = labels[tuple(ijk.T)] == row.label
            expect = (math.cos(th) * row.x_mm - math.sin(th) * row.y_mm + g["shift_mm"][0],
                      math.sin(th) * row.x_mm + math.cos(th) * row.y_mm + g["shift_mm"][1])
            np.testing.assert_allclose(world[sel, :2].mean(axis=0), expect, atol=0.6)
            # area of a 9 mm disc over 2.5 mm voxels, 3 slices
            assert abs(sel.sum() - 3 * math.pi * 81 / 6.25) < 0.1 * 3 * math.pi * 81 / 6.25
            t = truth[truth.label == row.label].iloc[0]
            assert t.n_voxels == sel.sum()
            assert math.isclose(t.B1_mean, b1[labels == row.label].mean(), rel_tol=1e-5)
        assert 0.8 < b1[labels > 0].min() and b1[labels > 0].max() < 1.25
        assert abs(g["rotation_deg"]) <= 3 and math.hypot(*g["shift_mm"]) <= 3


def test_noise_free_images_equal_truth(tmp_path):
    # Ties the truth table, truth B1 map and label map to the image values.
    simulate(tmp_path, SimOptions(sessions=1, matrix=40, slices=1, snr=math.inf))
    anat, stem = _anat(tmp_path, 0)
    vfa = read_series(series_paths(tmp_path, 0, "VFA"), "FlipAngle")
    labels = load_grid_map(anat / f"{stem}_dseg.nii.gz", vfa).astype(int)
    b1 = load_grid_map(tmp_path / "phantom" / f"truth_ses-{session_label(0)}_TB1map.nii.gz", vfa)
    truth = pd.read_csv(tmp_path / "phantom" / f"truth_ses-{session_label(0)}.tsv", sep="\t")
    data = vfa.read()
    for row in truth.itertuples():
        sel = labels == row.label
        want = spgr_signal(vfa.values, row.T1, row.PD, VFA_TR, b1[sel])
        np.testing.assert_allclose(data[sel], want, rtol=2e-5)
    assert np.all(data[0, 0] == 0)  # air corner: no signal without noise
    sidecar = json.loads((anat / f"{stem}_flip-1_VFA.json").read_text())
    assert sidecar["SimulationNoiseSigma"] == 0


# ---------------------------------------------------------------- noise law

def _sigma(anat: Path, name: str) -> float:
    return json.loads((anat / f"{name}.json").read_text())["SimulationNoiseSigma"]


def test_air_noise_is_rayleigh(demo):
    # Magnitude of zero-mean complex Gaussian noise is Rayleigh = Rice with ν = 0
    # (Rice 1944, Bell Syst Tech J 23:282; Gudbjartsson & Patz 1995, Magn Reson Med 34:910).
    anat, stem = _anat(demo, 0)
    mese = read_series(series_paths(demo, 0, "MESE"), "EchoTime")
    sigma = _sigma(anat, f"{stem}_echo-1_MESE")
    x, y = np.meshgrid(*(np.arange(80) * 2.5 - 98.75,) * 2, indexing="ij")
    air = np.hypot(x, y) > phantom.CYLINDER_RADIUS_MM + 8.0  # shift ≤ 3 mm, margin for safety
    m = mese.read()[air][:, :, ::4].ravel() / sigma
    assert m.size > 5000
    assert stats.kstest(m, stats.rice(b=0.0).cdf).pvalue > 0.01
    assert stats.kstest(m, stats.rayleigh.cdf).pvalue > 0.01
    # The check has power: a 10 % wrong σ is rejected.
    assert stats.kstest(m / 1.1, stats.rice(b=0.0).cdf).pvalue < 1e-3


def test_vial_noise_is_rician_with_known_nu(demo):
    # Inside vial 1 (T2 ≈ 12 ms) the echoes at 30–80 ms have ν/σ from about 5 down to 0.1,
    # where Rician and Gaussian laws differ. ν per voxel from the truth (T1, T2, PD, B1)
    # through the EPG model; probability-integral transform through scipy.stats.rice
    # gives uniform values if the magnitudes are Rician (Gudbjartsson & Patz 1995).
    anat, stem = _anat(demo, 0)
    ses = f"ses-{session_label(0)}"
    mese = read_series(series_paths(demo, 0, "MESE"), "EchoTime")
    sigma = _sigma(anat, f"{stem}_echo-1_MESE")
    labels = load_grid_map(anat / f"{stem}_dseg.nii.gz", mese).astype(int)
    b1 = load_grid_map(demo / "phantom" / f"truth_{ses}_TB1map.nii.gz", mese)
    t = pd.read_csv(demo / "phantom" / f"truth_{ses}.tsv", sep="\t").set_index("label").loc[1]
    sel = labels == 1
    echoes = slice(2, 8)
    nu = cpmg_echoes(MESE_ECHOES, MESE_ESP, t.T2, t.T1, b1=b1[sel], m0=t.PD)[:, echoes] / sigma
    m = mese.read()[sel][:, echoes] / sigma
    assert nu.min() < 0.5 and nu.max() > 3
    u = stats.rice.cdf(m, b=nu)
    assert stats.kstest(u.ravel(), "uniform").pvalue > 0.01
    # Power check: the Gaussian law N(ν, σ) is rejected on the same samples.
    g = stats.norm.cdf(m - nu)
    assert stats.kstest(g.ravel(), "uniform").pvalue < 1e-3


# ---------------------------------------------------------------- phantom and truth

def test_sample_config_matches_phantom_definition():
    ref = pd.read_csv(REPO / "sample_config" / "phantom" / "reference.tsv", sep="\t")
    lay = pd.read_csv(REPO / "sample_config" / "phantom" / "layout.tsv", sep="\t")
    pd.testing.assert_frame_equal(ref, phantom.reference_table(), check_dtype=False)
    pd.testing.assert_frame_equal(lay, phantom.layout_table(), check_dtype=False)
    assert list(ref.columns) == ["label", "name", "T1", "T2", "T1_sd", "T2_sd", "temperature",
                                 "field", "T1_coef", "T2_coef"]
    assert len(ref) == 12 and ref.T1.min() >= 0.1 and ref.T1.max() <= 2.5
    assert ref.T2.min() >= 0.01 and ref.T2.max() <= 0.6 and np.all(ref.T2 <= ref.T1)
    assert lay.radius_mm.between(8, 10).all()


def test_layout_has_no_rotation_or_mirror_symmetry():
    # Rotations by 0.5° steps and mirror images; nearest-neighbour matching (common practice).
    p = phantom.layout_table()[["x_mm", "y_mm"]].to_numpy()
    r = phantom.layout_table().radius_mm.to_numpy()
    d = np.hypot(*(p[:, None] - p[None]).transpose(2, 0, 1))
    assert np.all(d[~np.eye(12, dtype=bool)] > 2 * r.max() + 5)  # vials well apart
    assert np.all(np.hypot(*p.T) + r < phantom.CYLINDER_RADIUS_MM - 5)
    for mirror in (False, True):
        q = p * [-1, 1] if mirror else p
        for deg in np.arange(0.0, 360.0, 0.5):
            th = math.radians(deg)
            rot = q @ np.array([[math.cos(th), math.sin(th)], [-math.sin(th), math.cos(th)]])
            dist = np.hypot(*(rot[:, None] - p[None]).transpose(2, 0, 1))
            # A transform that puts every vial within 15 mm of some vial must be a small
            # rotation that keeps each vial on itself; otherwise labels would be ambiguous.
            if dist.min(axis=1).max() < 15.0:
                assert not mirror and np.array_equal(dist.argmin(axis=1), np.arange(12)), deg


def test_truth_follows_temperature_coefficients_and_drift(tmp_path):
    simulate(tmp_path, SimOptions(sessions=3, matrix=40, slices=1, drift_pct=2.0, seed=4))
    ref = pd.read_csv(tmp_path / "phantom" / "reference.tsv", sep="\t").set_index("label")
    temps = []
    for k in range(3):
        anat, stem = _anat(tmp_path, k)
        temp = json.loads((anat / f"{stem}_echo-1_MESE.json").read_text())["PhantomTemperature"]
        temps.append(temp)
        truth = pd.read_csv(tmp_path / "phantom" / f"truth_ses-{session_label(k)}.tsv",
                            sep="\t").set_index("label")
        assert np.all(truth.temperature == temp) and abs(temp - 20.0) <= 2.0
        for q in ("T1", "T2"):
            # value(T) = value·(1 + coef·(T − T_ref)), then the linear drift 1 + 2 %·k
            expect = ref[q] * (1 + ref[f"{q}_coef"] * (temp - ref.temperature)) * (1 + 0.02 * k)
            np.testing.assert_allclose(truth[q], expect, rtol=1e-5)
        assert np.all(truth.T2star < truth.T2)
    assert len(set(temps)) > 1  # sessions differ in temperature


# ---------------------------------------------------------------- command line

def test_cli_writes_and_reports(tmp_path, capsys):
    assert main(["simulate", str(tmp_path), "--sessions", "1", "--matrix", "40",
                 "--slices", "1", "--seed", "3", "--snr", "50"]) == 0
    assert "wrote 1 session(s)" in capsys.readouterr().out
    ir = series_paths(tmp_path, 0, "IRT1")
    assert len(ir) == len(IR_TI) and all(nib.load(p).shape == (40, 40, 1) for p in ir)


@pytest.mark.parametrize("opts, words", [
    (["--sessions", "0"], "--sessions"),
    (["--matrix", "10"], "--matrix"),
    (["--slices", "200"], "--slices"),
    (["--snr", "-1"], "--snr"),
    (["--snr", "nan"], "--snr"),
    (["--drift", "80"], "--drift"),
    (["--seed", "-2"], "--seed"),
])
def test_cli_bad_options_exit_2(tmp_path, capsys, opts, words):
    assert main(["simulate", str(tmp_path / "out"), *opts]) == 2
    err = capsys.readouterr().err
    assert err.startswith("relaxline simulate: error:") and words in err
    assert not (tmp_path / "out").exists()  # nothing written on bad input


def test_cli_outdir_is_a_file_and_unparsable_number(tmp_path, capsys):
    f = tmp_path / "file"
    f.write_text("x")
    assert main(["simulate", str(f), "--matrix", "40", "--slices", "1"]) == 2
    assert "not a folder" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["simulate", str(tmp_path), "--sessions", "three"])
    assert exc.value.code == 2
