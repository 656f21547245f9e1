"""Slice-profile EPG (--slice-profile): pulse simulation, tables, fits of 2D data.

References outside the project's models: closed forms (hard-pulse rotation, the Rabi
formula off resonance, the small-tip Fourier relation), scipy's ODE solver on the Bloch
equations, and the independent spinor + isochromat simulation of a 2D CPMG slice in
tests/bloch_slice.py (which imports nothing from fitting).
"""
from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest
from scipy.integrate import solve_ivp

from bloch_slice import hanning_sinc_shape, pulse_rotations, slice_cpmg, so3, su2
from fitting.epg import cpmg_echoes
from fitting.rfpulse import flip_angle, half_width, hanning_sinc, profile_from_scales, \
    sinc_profile
from fitting.sliceprofile import get_table, profile_echoes, profile_echoes_direct
from pipeline.cli import main
from seriesio import write_4d, write_nifti
from test_bloch import rotation

N_ECHO, ESP = 32, 0.01
TE = ESP * np.arange(1, N_ECHO + 1)


# ----------------------------------------------------------------------------- the test simulator
def test_su2_to_so3_is_the_right_handed_rotation():
    # SU(2) -> SO(3) map against Rodrigues' formula (test_bloch.rotation; common practice)
    rng = np.random.default_rng(0)
    for _ in range(10):
        n = rng.normal(size=3)
        n /= np.linalg.norm(n)
        ang = rng.uniform(-np.pi, 2 * np.pi)
        np.testing.assert_allclose(so3(su2(n, ang)), rotation(n, np.degrees(ang)), atol=1e-13)


def test_simulated_pulse_matches_the_bloch_ode():
    # Piecewise-constant B1 under a slice gradient: the spinor product equals the
    # solution of the Bloch equations (Bloch 1946, Phys Rev 70:460; scipy DOP853)
    shape = hanning_sinc_shape(3.0, 64)
    amp = np.deg2rad(150.0) * shape / shape.sum()
    for x in (0.0, 0.3, 0.7):
        w = 2 * np.pi * x * 3.0 / 64
        r = pulse_rotations(shape, 150.0, np.array([2 * np.pi * x * 3.0]), centre=False)[0]
        m = np.array([0.0, 0.0, 1.0])
        for a in amp:   # one ODE per constant step, unit step length
            sol = solve_ivp(lambda _t, v, a=a: np.cross([a, 0.0, w], v), (0, 1), m,
                            method="DOP853", rtol=1e-12, atol=1e-13)
            m = sol.y[:, -1]
        np.testing.assert_allclose(r @ [0, 0, 1.0], m, atol=1e-9)


def test_simulated_small_tip_profile_is_the_fourier_transform():
    # Small-tip approximation: |Mxy(x)| ≈ |Σ_k b_k·e^{iωx·t_k}| (Pauly et al. 1989,
    # J Magn Reson 81:43), error O(α³)
    shape = hanning_sinc_shape(4.0, 256)
    x = np.linspace(-1.5, 1.5, 61)
    alpha = 2.0
    r = pulse_rotations(shape, alpha, 2 * np.pi * x * 4.0, centre=False)
    mxy = np.hypot(r[:, 0, 2], r[:, 1, 2])
    t = np.arange(256) + 0.5
    ft = np.abs(np.exp(1j * 2 * np.pi * x[:, None] * 4.0 * t / 256) @ shape) / shape.sum()
    np.testing.assert_allclose(mxy, np.sin(np.deg2rad(alpha)) * ft, atol=1e-6)


# ----------------------------------------------------------------------------- fitting.rfpulse
@pytest.mark.parametrize("angle", [30.0, 90.0, 180.0])
@pytest.mark.parametrize("offres", [0.0, 0.8, 3.0])
def test_hard_pulse_flip_angle_rabi_formula(angle, offres):
    # One constant step rotating by φ = √(a² + w²) about (a, 0, w)/φ: the flip angle θ
    # obeys cos θ = cos²χ + sin²χ·cos φ, sin χ = a/φ (Rabi formula; common practice)
    a = np.deg2rad(angle)
    x = offres / (2 * np.pi * 1.0)          # one step, TBW 1: offres = 2π·x rad per step
    got = flip_angle(1.0, angle, np.array([x]), n_steps=1)[0]
    phi = np.hypot(a, offres)
    chi = np.arcsin(a / phi)
    expect = np.arccos(np.cos(chi) ** 2 + np.sin(chi) ** 2 * np.cos(phi))
    assert got == pytest.approx(expect, abs=1e-12)


def test_profile_small_tip_is_the_fourier_transform():
    # small-tip: flip(x) ≈ α·|FT of the pulse| (Pauly et al. 1989, J Magn Reson 81:43),
    # relative error O(α²) ≈ 3e-4 at 1°
    x = np.linspace(-1.5, 1.5, 61)
    shape = hanning_sinc(3.0, 256)
    t = np.arange(256) + 0.5
    ft = np.abs(np.exp(1j * 2 * np.pi * x[:, None] * 3.0 * t / 256) @ shape) / shape.sum()
    np.testing.assert_allclose(flip_angle(3.0, 1.0, x) / np.deg2rad(1.0), ft, atol=1e-4)


@pytest.mark.parametrize("angle", [90.0, 150.0, 180.0])
def test_profile_matches_the_independent_spinor_simulation(angle):
    # fitting.rfpulse vs tests/bloch_slice (separate code): flip angle arccos(R_zz)
    x = np.linspace(-1.5, 1.5, 41)
    r = pulse_rotations(hanning_sinc_shape(3.0, 256), angle, 2 * np.pi * x * 3.0)
    np.testing.assert_allclose(flip_angle(3.0, angle, x), np.arccos(np.clip(r[:, 2, 2], -1, 1)),
                               atol=1e-9)


def test_sinc_profile_positions_and_ratio():
    prof = sinc_profile(3.0, 1.0, 90.0, 180.0)
    x = prof.pulse[2]
    # nominal angle at the centre (on resonance the rotation is the area; common practice)
    assert prof.excitation[np.argmin(np.abs(x))] == pytest.approx(1.0, abs=1e-3)
    assert x.max() < half_width(3.0) and prof.excitation[[0, -1]].max() < 2e-3
    # positions out to ±5 slice thicknesses change the echo train's shape by < 1e-4
    dx = x[1] - x[0]
    xw = np.arange(-5 + dx / 2, 5, dx)
    wide = profile_from_scales(flip_angle(3.0, 90.0, xw) / (np.pi / 2),
                               flip_angle(3.0, 180.0, xw) / np.pi, "wide")
    for t2 in (0.05, 0.5, 2.0):
        a = profile_echoes_direct(N_ECHO, ESP, t2, 1.0, 1.0, 180.0, 90.0, prof)[0]
        b = profile_echoes_direct(N_ECHO, ESP, t2, 1.0, 1.0, 180.0, 90.0, wide)[0]
        assert np.abs(a / a[0] - b / b[0]).max() < 1e-4
    wider = sinc_profile(3.0, 2.0, 90.0, 180.0)
    # RATIO 2: the refocusing profile at x is the RATIO-1 profile at x/2 (common practice)
    i = np.argmin(np.abs(x - 0.6))
    j = np.argmin(np.abs(x - 0.3))
    assert wider.refocusing[i] == pytest.approx(prof.refocusing[j], abs=2e-3)


# ----------------------------------------------------------------------------- the model
def test_uniform_profile_is_the_plain_epg():
    # e = r = 1 everywhere: the sum collapses to one train (module docstring identity),
    # itself checked against isochromats in test_epg.py
    flat = profile_from_scales(np.ones(5), np.ones(5), "uniform")
    rng = np.random.default_rng(2)
    t2 = np.exp(rng.uniform(np.log(2e-3), np.log(8.0), 300))
    b1 = rng.uniform(0.2, 1.8, 300)
    got = profile_echoes(N_ECHO, ESP, t2, 0.9, b1, 150.0, 90.0, flat, signed=True)
    ref = cpmg_echoes(N_ECHO, ESP, t2, 0.9, b1, 150.0, 90.0, signed=True)
    assert np.abs(got - ref).max() < 1e-5         # tabulation error (sliceprofile docstring)


@pytest.mark.parametrize("t1", [1.0, "map"])
def test_tables_match_the_direct_position_sum(t1):
    prof = sinc_profile(3.0, 1.0, 90.0, 180.0)
    rng = np.random.default_rng(4)
    n = 60
    t2 = np.exp(rng.uniform(np.log(1.2e-3), np.log(9.0), n))
    b1 = rng.uniform(0.21, 1.79, n)
    t1v = np.exp(rng.uniform(np.log(0.3), np.log(2.5), n)) if t1 == "map" else np.full(n, t1)
    s, dt2, db1 = profile_echoes(N_ECHO, ESP, t2, t1v, b1, 180.0, 90.0, prof, derivs=True,
                                 signed=True)
    r = profile_echoes_direct(N_ECHO, ESP, t2, t1v, b1, 180.0, 90.0, prof, derivs=True,
                              signed=True)
    tol = 2e-6 if t1 != "map" else 5e-5        # + cubic interpolation between T1 nodes
    assert np.abs(s - r[0]).max() < tol
    assert np.abs((dt2 - r[1]) * t2[:, None]).max() < 50 * tol
    assert np.abs(db1 - r[2]).max() < 1e-3


def test_model_matches_the_independent_2d_simulation():
    # tests/bloch_slice: isochromats at every slice position, full rotations (phase and
    # axis tilt included); the model keeps flip angles only: agreement to 0.3 % of the
    # first echo (shape; the scale is M0)
    prof = sinc_profile(3.0, 1.0, 90.0, 180.0)
    for t2, b1 in [(0.06, 1.0), (0.3, 0.8), (1.0, 0.9)]:
        sim = slice_cpmg(N_ECHO, ESP, t2, 1.0, b1=b1, n_steps=128)
        mod = profile_echoes(N_ECHO, ESP, t2, 1.0, b1, 180.0, 90.0, prof)[0]
        k = (sim @ mod) / (mod @ mod)
        assert np.abs(sim - k * mod).max() < 3e-3 * sim[0]
        plain = cpmg_echoes(N_ECHO, ESP, t2, 1.0, b1)
        kp = (sim @ plain) / (plain @ plain)
        assert np.abs(sim - kp * plain).max() > 1e-2 * sim[0]     # the plain model does not


# ----------------------------------------------------------------------------- fits of 2D data
T2S = (0.03, 0.1, 0.3, 1.0)
B1S = (0.75, 0.9, 1.0)
BLOCK = 4           # voxels per vial side
AIR = 4             # air rows for the background noise


@pytest.fixture(scope="module")
def mese2d(tmp_path_factory):
    """12 vials (T2 × B1) of 4×4 voxels, 2D CPMG simulated independently (TBW 3, T1 1 s),
    Rician noise at SNR 300 of the first echo, air rows; sidecar MRAcquisitionType 2D."""
    d = tmp_path_factory.mktemp("mese2d")
    rng = np.random.default_rng(7)
    trains = {(t2, b1): slice_cpmg(N_ECHO, ESP, t2, 1.0, b1=b1, n_steps=128)
              for t2 in T2S for b1 in B1S}
    scale = 1000.0 / max(t[0] for t in trains.values())
    nx, ny = len(T2S) * BLOCK, len(B1S) * BLOCK + AIR
    data = np.zeros((nx, ny, 1, N_ECHO))
    labels = np.zeros((nx, ny, 1), np.int16)
    truth = {}
    for i, t2 in enumerate(T2S):
        for j, b1 in enumerate(B1S):
            sl = (slice(i * BLOCK, (i + 1) * BLOCK), slice(j * BLOCK, (j + 1) * BLOCK), 0)
            data[sl] = scale * trains[(t2, b1)]
            labels[sl] = 1 + i * len(B1S) + j
            truth[int(labels[sl].flat[0])] = (t2, b1)
    sigma = 1000.0 / 300
    noisy = np.abs(data + sigma * (rng.normal(size=data.shape) + 1j * rng.normal(size=data.shape)))
    series = write_4d(d, "sub-01_ses-1_MESE", noisy.astype(np.float32), "EchoTime", TE,
                      {"MRAcquisitionType": "2D", "RefocusingFlipAngle": 180.0,
                       "FlipAngle": 90.0})
    lab = write_nifti(d / "sub-01_ses-1_dseg.nii.gz", labels)
    return d, series, lab, labels, truth


def _run(capsys, *argv):
    code = main([*map(str, argv)])
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def _vials(folder, suffix, labels, truth):
    m = np.asarray(nib.load(folder / f"sub-01_ses-1_rec-mese_{suffix}.nii.gz").get_fdata())
    return {lab: np.median(m[labels == lab]) for lab in truth}


@pytest.mark.slow
def test_2d_mese_t2_within_2_percent_with_the_profile(mese2d, tmp_path, capsys):
    d, series, lab, labels, truth = mese2d
    out = tmp_path / "plain"
    code, _, err = _run(capsys, "fit", "mese", series, "--out", out)
    assert code == 0, err
    assert "MRAcquisitionType 2D" in err and "--slice-profile" in err      # the warning
    side = json.loads((out / "sub-01_ses-1_rec-mese_T2map.json").read_text())
    assert any("MRAcquisitionType 2D" in w for w in side["Warnings"])
    before = _vials(out, "T2map", labels, truth)
    b1_before = _vials(out, "TB1map", labels, truth)
    # issue 14's figures without a profile: T2 about +10 % and more, TB1map far below truth
    assert np.median([before[k] / truth[k][0] - 1 for k in truth]) > 0.05
    assert max(b1_before[k] for k in truth if truth[k][1] == 1.0) < 0.8

    out = tmp_path / "profile"
    code, _, err = _run(capsys, "fit", "mese", series, "--out", out, "--slice-profile", "sinc:3")
    assert code == 0, err
    assert "MRAcquisitionType" not in err
    after = _vials(out, "T2map", labels, truth)
    b1_after = _vials(out, "TB1map", labels, truth)
    for k, (t2, b1) in truth.items():
        # independent 2D spinor/isochromat simulation (tests/bloch_slice.py): T2 within 2 %
        # per vial (issue 14), B1 within 0.05 of the RF scale simulated
        assert abs(after[k] / t2 - 1) < 0.02, (t2, b1, after[k])
        assert abs(b1_after[k] - b1) < 0.05, (t2, b1, b1_after[k])
    side = json.loads((out / "sub-01_ses-1_rec-mese_TB1map.json").read_text())
    assert side["Options"]["slice_profile"] == "sinc:3"
    assert "not folded" in side["Notes"][0] and "Warnings" not in side
    # the QC report shows the fit's warning (plain fit) and the TB1map note (profile fit)
    code, _, err = _run(capsys, "qc", tmp_path / "plain", "--labels", lab, "--out",
                        tmp_path / "qc")
    assert code == 0, err
    html = (tmp_path / "qc" / "report.html").read_text()
    assert "MRAcquisitionType 2D" in html and "B1 folded about 1" in html
    code, _, err = _run(capsys, "qc", out, "--labels", lab, "--out", tmp_path / "qc2")
    assert code == 0, err
    assert "not folded" in (tmp_path / "qc2" / "report.html").read_text()


# ----------------------------------------------------------------------------- bad input
@pytest.mark.parametrize("body,fragment", [
    ("position\texcitation\n0\t1\n", "has no column 'refocusing'"),
    ("position\texcitation\trefocusing\n0\t1\tnan\n", "column 'refocusing' holds a non-finite"),
    ("position\texcitation\trefocusing\n0\t-0.2\t1\n", "column 'excitation' holds the negative"),
    ("position\texcitation\trefocusing\n0\tabc\t1\n", "column 'excitation': 'abc' is not"),
    ("position\texcitation\trefocusing\n0\t90\t1\n", "not degrees or percent"),
    ("", "the slice profile is empty"),
])
def test_bad_profile_files(body, fragment, tmp_path, capsys):
    y = cpmg_echoes(N_ECHO, ESP, np.full((3, 3, 1), 0.1), 1.0, 0.9, m0=100.0)
    series = write_4d(tmp_path, "m", y.astype(np.float32), "EchoTime", TE)
    prof = tmp_path / "prof.tsv"
    prof.write_text(body)
    out = tmp_path / "out"
    code, _, err = _run(capsys, "fit", "mese", series, "--out", out, "--slice-profile", prof)
    assert code == 2, err
    assert str(prof) in err and fragment in err and "Traceback" not in err, err
    assert not out.exists() or not any(out.iterdir())


@pytest.mark.parametrize("spec,fragment", [
    ("sinc:", "expected sinc:TBW"), ("sinc:abc", "must be numbers"),
    ("sinc:0.5", "time-bandwidth product 0.5 outside"), ("sinc:3:9", "RATIO 9"),
    ("sinc:3:1:2", "expected sinc:TBW"), ("nofile.tsv", "nofile.tsv: file not found"),
])
def test_bad_profile_specs(spec, fragment, tmp_path, capsys):
    y = cpmg_echoes(N_ECHO, ESP, np.full((3, 3, 1), 0.1), 1.0, 0.9, m0=100.0)
    series = write_4d(tmp_path, "m", y.astype(np.float32), "EchoTime", TE)
    code, _, err = _run(capsys, "fit", "mese", series, "--out", tmp_path / "o",
                        "--slice-profile", spec)
    assert code == 2 and fragment in err and "Traceback" not in err, err
    code, _, err = _run(capsys, "fit", "mese-mono", series, "--out", tmp_path / "o",
                        "--slice-profile", "sinc:3")
    assert code == 2 and "--slice-profile applies to the mese and mese-multi models only" in err


def test_profile_file_fit_and_refit(tmp_path, capsys):
    # A TSV profile (a coarse uniform-centre profile): the model with it reproduces its own
    # direct position sum; fit and refit both read it
    rows = ["position\texcitation\trefocusing"]
    x = np.linspace(-1, 1, 21)
    e = np.clip(1.5 - 2 * np.abs(x), 0, 1)
    for xi, ei in zip(x, e):
        rows.append(f"{xi:g}\t{ei:g}\t{ei:g}")
    prof = tmp_path / "p.tsv"
    prof.write_text("\n".join(rows) + "\n")
    pobj = profile_from_scales(e, e, str(prof))
    t2 = np.array([0.05, 0.2, 0.6, 1.5]).reshape(2, 2, 1)
    y = profile_echoes_direct(N_ECHO, ESP, t2.ravel(), 1.0, 0.85, 180.0, 90.0, pobj, m0=500.0)
    series = write_4d(tmp_path, "sub-02_MESE", y.reshape(2, 2, 1, N_ECHO).astype(np.float32),
                      "EchoTime", TE)
    mask = write_nifti(tmp_path / "mask.nii.gz", np.ones((2, 2, 1), np.uint8))
    out = tmp_path / "maps"
    code, _, err = _run(capsys, "fit", "mese", series, "--out", out, "--mask", mask,
                        "--slice-profile", prof)
    assert code == 0, err
    got = np.asarray(nib.load(out / "sub-02_rec-mese_T2map.nii.gz").get_fdata())
    np.testing.assert_allclose(got, t2, rtol=1e-4)
    code, text, err = _run(capsys, "refit", "mese", series, "--voxel", "1,0,0", "--json",
                           "--slice-profile", prof)
    assert code == 0, err
    assert json.loads(text)["parameters"]["T2"]["value"] == pytest.approx(t2[1, 0, 0], rel=1e-4)


def test_table_is_cached_per_protocol_and_profile():
    prof = sinc_profile(3.0, 1.0, 90.0, 180.0)
    a = get_table(N_ECHO, ESP, 180.0, 90.0, 1.0, prof)
    assert get_table(N_ECHO, ESP + 1e-15, 180.0, 90.0, 1.0, sinc_profile(3.0, 1.0, 90.0, 180.0)) is a
    assert get_table(N_ECHO, ESP, 180.0, 90.0, 1.0, sinc_profile(2.0, 1.0, 90.0, 180.0)) is not a
