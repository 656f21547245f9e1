"""T2 models mese / mese-mono / megre, the EPG dictionary and the noise-aware fit.

Data are simulated with fitting.epg.cpmg_echoes (itself checked against a Bloch
isochromat simulation in tests/test_epg.py) plus complex Gaussian noise, so magnitude
data carry the Rician floor of real scans.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import curve_fit

from fitting import status as st
from fitting.dictionary import EpgDictionary, get_dictionary
from fitting.epg import cpmg_echoes
from fitting.errors import RelaxlineError
from fitting.spec import configure_model, get_model
from fitting.t2_models import T1_FIXED_DEFAULT
from fitting.voxelwise import fit_voxels

N_ECHO, ESP = 32, 0.01
TE = ESP * np.arange(1, N_ECHO + 1)
T2_LEVELS = np.geomspace(0.02, 0.4, 8)
B1_LEVELS = np.array([0.75, 0.8, 0.85, 0.9, 0.95, 1.0, 1.05, 1.1])


def magnitude(signal: np.ndarray, sigma: float, rng) -> np.ndarray:
    noise = rng.normal(0.0, sigma, (2,) + signal.shape)
    return np.abs(signal + noise[0] + 1j * noise[1])


def model(name: str, **options):
    spec = configure_model(get_model(name), options)
    return spec, spec.fixed_from_meta({}, options)


@pytest.fixture(scope="module")
def cpmg():
    """32 echoes, 10 ms, T2 0.02–0.4 s × B1 0.75–1.1, 4 voxels each, SNR 300 (M0 = 1)."""
    t2, b1 = (a.ravel() for a in np.meshgrid(T2_LEVELS, B1_LEVELS, indexing="ij"))
    t2, b1 = np.repeat(t2, 4), np.repeat(b1, 4)
    y = magnitude(cpmg_echoes(N_ECHO, ESP, t2, T1_FIXED_DEFAULT, b1=b1), 1 / 300,
                  np.random.default_rng(11))
    spec, fixed = model("mese")
    fit = fit_voxels(spec, TE, y, fixed)
    return t2, b1, y, fit


# ----------------------------------------------------------------------------- accuracy
def test_mese_accuracy_at_snr_300(cpmg):
    t2, b1, _, fit = cpmg
    assert np.all(np.isin(fit.status, st.USABLE))
    rel = fit.params["T2"] / t2 - 1
    # Lebel & Wilman 2010, Magn Reson Med 64:1005: the EPG fit with a B1 term removes the
    # refocusing bias of T2 — median |bias| <= 2 % overall and at every B1 level.
    assert abs(np.median(rel)) <= 0.02
    for b in B1_LEVELS:
        assert abs(np.median(rel[b1 == b])) <= 0.02, b
    # B1 within 3 %. The magnitude train is even in B1 − 1 (see test_b1_fold_symmetry),
    # so the reported B1 is the fold 1 − |1 − B1|: the truth is compared folded.
    folded = 1 - np.abs(1 - b1)
    for b in B1_LEVELS:
        s = b1 == b
        assert np.median(np.abs(fit.params["B1"][s] / folded[s] - 1)) <= 0.03, b
    assert np.all(fit.params["B1"] <= 1.0)
    assert np.all(np.isfinite(fit.stderr["T2"])) and np.all(np.isfinite(fit.rmse))


def test_mese_mono_shows_published_overestimation(cpmg):
    t2, b1, y, fit = cpmg
    spec, fixed = model("mese-mono")
    mono = fit_voxels(spec, TE, y, fixed)
    rel = mono.params["T2"] / t2 - 1
    # Lebel & Wilman 2010 (Magn Reson Med 64:1005) and Milford et al. 2015 (PLoS ONE
    # 10:e0145255): the mono-exponential overestimates T2 when refocusing is imperfect,
    # by more than 5 % at B1 = 0.8 for a 32-echo, 10 ms train.
    assert np.median(rel[b1 == 0.8]) > 0.05
    assert np.median(rel[b1 == 0.75]) > np.median(rel[b1 == 0.9]) > 0
    # ... while the EPG fit of the same voxels is unbiased (previous test)
    assert abs(np.median(fit.params["T2"][b1 == 0.8] / t2[b1 == 0.8] - 1)) < 0.01


def test_fast_and_lmfit_engines_agree(cpmg):
    t2, b1, y, fit = cpmg
    pick = np.arange(0, t2.size, 8)             # 32 voxels spanning the grid
    spec, fixed = model("mese")
    slow = fit_voxels(spec, TE, y[pick], fixed, engine="lmfit")
    assert np.all(np.isin(slow.status, st.USABLE))
    d = np.abs(slow.params["T2"] / fit.params["T2"][pick] - 1)
    assert np.median(d) <= 0.002
    np.testing.assert_allclose(slow.params["M0"], fit.params["M0"][pick], rtol=0.02)


def test_b1_from_correct_map_matches_b1_fitted(cpmg):
    t2, b1, y, fit = cpmg
    spec, fixed = model("mese", b1_map=True)
    assert spec.params == ("T2", "M0") and "b1" in spec.voxel_fixed
    fixed["b1"] = b1                            # the true map, values above 1 included
    fb = fit_voxels(spec, TE, y, fixed)
    assert np.all(np.isin(fb.status, st.USABLE))
    diff = np.abs(fb.params["T2"] - fit.params["T2"])
    # within noise: the B1-fitted estimate's own standard error bounds the difference
    assert np.mean(diff <= 3 * fit.stderr["T2"]) >= 0.95
    assert np.median(fb.stderr["T2"] / fit.stderr["T2"]) <= 1.0   # fixing B1 cannot hurt
    assert abs(np.median(fb.params["T2"] / t2 - 1)) <= 0.01


# ----------------------------------------------------------------------------- model facts
def test_b1_fold_symmetry():
    # A refocusing angle α and 360° − α (and excitations of equal sine) give the same CPMG
    # magnitudes: rotations by ±θ about the pulse axis differ only by a 180° shift of the
    # pulse phase, which leaves the CPMG echo amplitudes unchanged (Hennig 1988, J Magn
    # Reson 78:397, phase-graph symmetry; derived).
    t2 = np.array([0.03, 0.1, 0.3])
    for d in (0.05, 0.2, 0.35):
        np.testing.assert_allclose(cpmg_echoes(N_ECHO, ESP, t2, 1.0, b1=1 - d),
                                   cpmg_echoes(N_ECHO, ESP, t2, 1.0, b1=1 + d), atol=1e-14)


def test_mese_reduces_to_mono_exponential_at_ideal_refocusing():
    # Closed form: ideal 180° refocusing gives S_k = M0·e^(−k·ESP/T2) (Hahn/CPMG).
    t2 = np.array([0.05, 0.15])
    y = 2.0 * np.exp(-TE[None, :] / t2[:, None])
    spec, fixed = model("mese")
    fit = fit_voxels(spec, TE, y, fixed)
    np.testing.assert_allclose(fit.params["T2"], t2, rtol=1e-6)
    np.testing.assert_allclose(fit.params["B1"], 1.0, atol=2e-3)   # flat (even) in B1 at 1
    np.testing.assert_allclose(fit.params["M0"], 2.0, rtol=1e-6)


def test_fixed_t1_has_small_influence():
    # Lebel & Wilman 2010 fix T1 in the EPG fit because it only weights the stimulated
    # echoes; measured bound documented in fitting/t2_models.py (≤ 3.1 % worst, ≤ 0.2 % median).
    t2, b1 = (a.ravel() for a in np.meshgrid(np.geomspace(0.02, 0.4, 6),
                                             np.linspace(0.75, 1.0, 6), indexing="ij"))
    spec, fixed = model("mese")
    for t1_true in (0.5, 3.0):
        y = cpmg_echoes(N_ECHO, ESP, t2, t1_true, b1=b1)
        rel = np.abs(fit_voxels(spec, TE, y, fixed).params["T2"] / t2 - 1)
        assert np.median(rel) < 0.002 and rel.max() < 0.035
    # the option reaches the model: with the true T1 the fit is exact
    spec, fixed = model("mese", t1_fixed=0.5)
    assert fixed["t1"] == 0.5
    y = cpmg_echoes(N_ECHO, ESP, t2, 0.5, b1=b1)
    np.testing.assert_allclose(fit_voxels(spec, TE, y, fixed).params["T2"], t2, rtol=1e-6)


def test_mese_mono_plateau_and_skipped_first_echo_match_curve_fit():
    rng = np.random.default_rng(4)
    t2 = np.array([0.04, 0.08, 0.2])
    y = 1.5 * np.exp(-TE[None, :] / t2[:, None]) + 0.05
    y = y + rng.normal(0, 0.002, y.shape)
    spec, fixed = model("mese-mono", plateau=True, skip_echoes=1)
    assert spec.params == ("T2", "M0", "plateau")
    fit = fit_voxels(spec, TE, y, fixed)
    # Independent reference: scipy.optimize.curve_fit of M0·e^(−TE/T2) + c on echoes 2..N
    # (Milford et al. 2015, PLoS ONE 10:e0145255: first echo excluded).
    for i in range(t2.size):
        ref, _ = curve_fit(lambda te, a, m, c: m * np.exp(-te / a) + c, TE[1:], y[i, 1:],
                           p0=[0.1, 1.0, 0.0])
        np.testing.assert_allclose([fit.params[k][i] for k in ("T2", "M0", "plateau")], ref,
                                   rtol=1e-5, atol=1e-7)


def test_megre_log_linear_init_is_exact_and_fit_matches_curve_fit():
    t2s = np.array([0.005, 0.02, 0.06])
    te = np.array([0.002, 0.005, 0.008, 0.012, 0.016, 0.02])
    y = 3.0 * np.exp(-te[None, :] / t2s[:, None])
    spec, fixed = model("megre")
    start = spec.init(te, y, fixed)
    # closed form: ln S is linear in TE, so the log-linear start is exact on noiseless data
    np.testing.assert_allclose(start["T2star"], t2s, rtol=1e-10)
    noisy = magnitude(y, 0.01, np.random.default_rng(8))
    fit = fit_voxels(spec, te, noisy, fixed)
    for i in range(t2s.size):   # scipy.optimize.curve_fit as the reference least squares
        ref, _ = curve_fit(lambda t, a, m: m * np.exp(-t / a), te, noisy[i], p0=[0.02, 3.0])
        np.testing.assert_allclose([fit.params["T2star"][i], fit.params["M0"][i]], ref,
                                   rtol=1e-5)
    assert spec.outputs == {"T2star": "T2starmap", "M0": "M0map"}


# ----------------------------------------------------------------------------- dictionary
def test_dictionary_match_is_exact_on_atoms_and_block_invariant():
    d = EpgDictionary(N_ECHO, ESP, t2_grid=np.geomspace(0.01, 1.0, 40),
                      b1_grid=np.linspace(0.6, 1.0, 9))
    k = np.array([5, 77, 200, 359])
    y = 3.0 * cpmg_echoes(N_ECHO, ESP, d.t2[k], 1.0, b1=d.b1[k])
    for block in (1 << 22, 50):                 # many tiny blocks give the same answer
        r = d.match(y, block_elements=block)
        np.testing.assert_array_equal(r.t2, d.t2[k])
        np.testing.assert_array_equal(r.b1, d.b1[k])
        np.testing.assert_allclose(r.m0, 3.0, rtol=1e-12)
        np.testing.assert_allclose(r.score, 1.0, rtol=1e-12)
    # fixed B1 (values above 1 fold onto the stored half)
    r = d.match(y, b1=2.0 - d.b1[k])
    np.testing.assert_array_equal(r.t2, d.t2[k])
    bad = d.match(np.zeros((2, N_ECHO)))
    assert np.all(np.isnan(bad.t2))


def test_dictionary_discretisation_error_and_refinement():
    rng = np.random.default_rng(2)
    t2 = np.exp(rng.uniform(np.log(0.02), np.log(0.4), 300))
    b1 = rng.uniform(0.75, 1.0, 300)
    y = cpmg_echoes(N_ECHO, ESP, t2, 1.0, b1=b1)
    d = get_dictionary(N_ECHO, ESP)
    assert get_dictionary(N_ECHO, ESP) is d     # cached per protocol
    r = d.match(y)
    # documented in fitting/dictionary.py: matching alone within 2.4 % in T2
    assert np.max(np.abs(r.t2 / t2 - 1)) <= 0.025
    spec, fixed = model("mese")
    fit = fit_voxels(spec, TE, y, fixed)
    # ... and refinement removes it (noiseless data)
    assert np.max(np.abs(fit.params["T2"] / t2 - 1)) < 1e-6


# ----------------------------------------------------------------------------- noise floor
@pytest.mark.parametrize("name", ["mese", "mese-mono"])
def test_rician_fit_reduces_long_t2_bias_at_low_snr(name):
    # Gudbjartsson & Patz 1995, Magn Reson Med 34:910: the magnitude floor biases plain
    # least squares towards long T2; fitting the Rician expectation removes the bias.
    # Long-T2 vials, SNR 5 on the last echo, each model on data of its own form. mese runs
    # with B1 from the (true) map: at this SNR a free B1 trades off against T2 and would
    # mask the noise-floor effect.
    rng = np.random.default_rng(21)
    n, b1 = 300, 0.9
    opts = {"b1_map": True} if name == "mese" else {}
    for t2_true in (0.3, 0.4):
        train = cpmg_echoes(N_ECHO, ESP, t2_true, 1.0, b1=b1) if name == "mese" \
            else np.exp(-TE / t2_true)
        y = magnitude(np.broadcast_to(train * 5.0 / train[-1], (n, N_ECHO)), 1.0, rng)
        bias = {}
        for noise in ("gaussian", "rician"):
            spec, fixed = model(name, noise=noise, **opts)
            fixed["b1"] = np.full(n, b1)
            fixed["sigma"] = 1.0
            fit = fit_voxels(spec, TE, y, fixed)
            bias[noise] = np.median(fit.params["T2"] / t2_true - 1)
        assert bias["gaussian"] > 0.005, bias
        assert abs(bias["rician"]) < 0.5 * bias["gaussian"], bias


# ----------------------------------------------------------------------------- bad input
def test_uneven_echo_times_are_rejected_with_reason():
    spec, fixed = model("mese")
    te = TE.copy()
    te[5] += 0.004
    with pytest.raises(RelaxlineError, match=r"EchoTime.*evenly spaced.*CPMG"):
        spec.validate(te, fixed)
    with pytest.raises(RelaxlineError, match="EchoTime"):   # train not starting at ESP
        spec.validate(TE[2:], fixed)
    spec.validate(np.round(TE, 3), fixed)                   # rounding in sidecars is fine
    mono, mfixed = model("mese-mono")
    mono.validate(te, mfixed)                               # mono-exponential: any TEs


@pytest.mark.parametrize("angle", [0.0, -10.0, 180.5, 200.0, float("nan")])
def test_refocusing_angle_outside_range(angle):
    spec = get_model("mese")
    fixed = spec.fixed_from_meta({"RefocusingFlipAngle": angle}, {})
    with pytest.raises(RelaxlineError, match=r"RefocusingFlipAngle.*\(0, 180\]"):
        spec.validate(TE, fixed)


def test_refocusing_angle_180_and_below_accepted_and_used():
    spec = get_model("mese")
    fixed = spec.fixed_from_meta({"RefocusingFlipAngle": 150.0}, {})
    spec.validate(TE, fixed)
    y = cpmg_echoes(N_ECHO, ESP, np.array([0.1]), 1.0, b1=0.9, refocus_deg=150.0)
    fit = fit_voxels(spec, TE, y, fixed)
    assert fit.params["T2"][0] == pytest.approx(0.1, rel=1e-6)
    assert fit.params["B1"][0] == pytest.approx(0.9, rel=1e-6)


@pytest.mark.parametrize("name,opts,n_ok", [("mese", {}, 4), ("mese", {"b1_map": True}, 3),
                                            ("mese-mono", {}, 3),
                                            ("mese-mono", {"plateau": True}, 4),
                                            ("mese-mono", {"skip_echoes": 1}, 4),
                                            ("mese-mono", {"skip_echoes": 2}, 5),
                                            ("megre", {}, 3)])
def test_fewer_echoes_than_parameters(name, opts, n_ok):
    spec, fixed = model(name, **opts)
    spec.validate(TE[:n_ok], fixed)
    with pytest.raises(RelaxlineError, match="at least"):
        spec.validate(TE[:n_ok - 1], fixed)


def test_options_for_the_wrong_model_and_bad_t1():
    with pytest.raises(RelaxlineError, match="mese-mono"):
        configure_model(get_model("mese"), {"plateau": True})
    with pytest.raises(RelaxlineError, match="mese-mono"):
        configure_model(get_model("megre"), {"skip_echoes": 1})
    spec, fixed = model("mese", t1_fixed=-1.0)
    with pytest.raises(RelaxlineError, match="t1-fixed"):
        spec.validate(TE, fixed)


def test_variants_are_picklable_for_the_process_parallel_lmfit_engine():
    import pickle
    for name, opts in [("mese", {"b1_map": True, "noise": "rician"}), ("megre", {}),
                       ("mese-mono", {"plateau": True, "noise": "rician"})]:
        spec = configure_model(get_model(name), opts)
        assert pickle.loads(pickle.dumps(spec)).params == spec.params
    rng = np.random.default_rng(9)
    te = np.array([0.003, 0.006, 0.01, 0.015, 0.02, 0.03])
    t2s = rng.uniform(0.01, 0.05, 8)
    y = magnitude(100.0 * np.exp(-te[None, :] / t2s[:, None]), 1.0, rng)
    spec, fixed = model("megre", noise="rician")
    fixed["sigma"] = 1.0
    par = fit_voxels(spec, te, y, fixed, engine="lmfit", jobs=2)
    one = fit_voxels(spec, te, y, fixed, engine="lmfit", jobs=1)
    np.testing.assert_allclose(par.params["T2star"], one.params["T2star"], rtol=1e-12)


# ----------------------------------------------------------------------------- command line
CLI_SHAPE = (16, 16, 2)
CLI_SIGMA = 2.0


def _cli_phantom(rng, te=TE, refocus=180.0):
    """Disk of four T2/B1 quadrants in air; magnitude CPMG data, SNR 500 at M0."""
    xx, yy = np.mgrid[: CLI_SHAPE[0], : CLI_SHAPE[1]]
    disk = ((xx - 7.5) ** 2 + (yy - 7.5) ** 2 < 6.5 ** 2)[:, :, None].repeat(CLI_SHAPE[2], 2)
    quad = (xx >= 8)[:, :, None] * 2 + (yy >= 8)[:, :, None]
    t2 = np.choose(quad.repeat(CLI_SHAPE[2], 2), [0.04, 0.08, 0.15, 0.3])
    b1 = np.choose(quad.repeat(CLI_SHAPE[2], 2), [0.8, 0.9, 1.0, 0.85])
    m0 = np.where(disk, 1000.0, 0.0)
    s = cpmg_echoes(te.size, te[0], t2, 1.0, b1=b1, refocus_deg=refocus, m0=m0)
    return disk, t2, b1, magnitude(s, CLI_SIGMA, rng).astype(np.float32)


@pytest.fixture(scope="module")
def mese_series(tmp_path_factory):
    from seriesio import write_4d
    d = tmp_path_factory.mktemp("mese")
    disk, t2, b1, y = _cli_phantom(np.random.default_rng(5))
    path = write_4d(d, "sub-01_MESE", y, "EchoTime", TE, {"RefocusingFlipAngle": 180.0})
    return d, path, disk, t2, b1


def _fit_cli(capsys, *argv):
    from pipeline.cli import main
    code = main(["fit", *map(str, argv)])
    out = capsys.readouterr()
    return code, out.err


def _load(folder, name):
    import nibabel as nib
    return np.asarray(nib.load(folder / name).get_fdata())


def test_cli_mese_writes_maps(mese_series, tmp_path, capsys):
    import json
    _, path, disk, t2, b1 = mese_series
    out = tmp_path / "maps"
    code, err = _fit_cli(capsys, "mese", path, "--out", out)
    assert code == 0, err
    stem = "sub-01_rec-mese"   # BIDS-derivative name of the mese fit of sub-01_MESE
    for key in ("T2map", "M0map", "TB1map", "desc-stderr_T2map", "desc-stderr_TB1map",
                "desc-rmse_T2map", "desc-fitstatus_mask"):
        assert (out / f"{stem}_{key}.nii.gz").is_file(), key
        assert (out / f"{stem}_{key}.json").is_file(), key
    status = _load(out, f"{stem}_desc-fitstatus_mask.nii.gz")
    assert np.all(np.isin(status[disk], st.USABLE)) and np.all(status[~disk] == st.OUTSIDE)
    t2map = _load(out, f"{stem}_T2map.nii.gz")
    # design §6 units; accuracy as in test_mese_accuracy_at_snr_300 (Lebel & Wilman 2010)
    assert abs(np.median(t2map[disk] / t2[disk] - 1)) < 0.02
    tb1 = _load(out, f"{stem}_TB1map.nii.gz")
    assert np.all(tb1[disk] <= 1.0) and abs(np.median(tb1[disk & (b1 == 0.8)]) - 0.8) < 0.02
    side = json.loads((out / f"{stem}_T2map.json").read_text())
    assert side["Units"] == "s"


def test_cli_mese_with_b1_map_and_options(mese_series, tmp_path, capsys):
    from seriesio import write_nifti
    d, path, disk, t2, b1 = mese_series
    b1_path = write_nifti(tmp_path / "b1.nii.gz", b1.astype(np.float32))
    out = tmp_path / "b1fixed"
    code, err = _fit_cli(capsys, "mese", path, "--out", out, "--b1", b1_path, "--t1-fixed", "0.8")
    assert code == 0, err
    assert not (out / "sub-01_rec-mese_TB1map.nii.gz").exists()   # B1 is an input here
    t2map = _load(out, "sub-01_rec-mese_T2map.nii.gz")
    assert abs(np.median(t2map[disk] / t2[disk] - 1)) < 0.02
    out = tmp_path / "mono"
    code, err = _fit_cli(capsys, "mese-mono", path, "--out", out, "--plateau", "--skip-echoes", "1")
    assert code == 0, err
    mono = _load(out, "sub-01_rec-mesemono_T2map.nii.gz")
    # Lebel & Wilman 2010: mono-exponential T2 too long where B1 = 0.8
    assert np.median(mono[disk & (b1 == 0.8)] / t2[disk & (b1 == 0.8)]) > 1.0
    out = tmp_path / "rician"
    code, err = _fit_cli(capsys, "megre", path, "--out", out, "--noise", "rician")
    assert code == 0, err
    assert (out / "sub-01_rec-megre_T2starmap.nii.gz").is_file()


def test_cli_bad_input(tmp_path, capsys):
    from seriesio import write_4d
    _, _, _, y = _cli_phantom(np.random.default_rng(6))

    def expect(argv, match):
        out = tmp_path / f"o{len(list(tmp_path.iterdir()))}"
        code, err = _fit_cli(capsys, *argv, "--out", out)
        assert code == 2, err
        assert match in err and "Traceback" not in err
        assert not out.exists() or not any(out.iterdir())

    te = TE.copy()
    te[10] += 0.003
    p = write_4d(tmp_path / "a", "uneven", y, "EchoTime", te)
    expect(["mese", p], "evenly spaced")
    p = write_4d(tmp_path / "b", "angle", y, "EchoTime", TE, {"RefocusingFlipAngle": 190.0})
    expect(["mese", p], "RefocusingFlipAngle")
    p = write_4d(tmp_path / "c", "few", y[..., :3], "EchoTime", TE[:3])
    expect(["mese", p], "at least")
    p = write_4d(tmp_path / "d", "ok", y, "EchoTime", TE)
    expect(["mese", p, "--plateau"], "mese-mono")
    expect(["mese-mono", p, "--skip-echoes", "-1"], "whole number >= 0")
    expect(["mese-mono", p, "--skip-echoes", "30"], "at least")
