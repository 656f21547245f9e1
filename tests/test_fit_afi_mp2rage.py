"""afi and mp2rage against isochromat simulations of their sequences (tests/bloch_more.py)."""
from __future__ import annotations

import numpy as np
import pytest

from accuracy import VIAL_T1, bias_pct, noisy
from bloch_more import afi_pair, mp2rage_pair
from fitting import status as st
from fitting.errors import RelaxlineError
from fitting.spec import configure_model, get_model
from fitting.voxelwise import fit_voxels

N_NOISE = 150
# AFI: the protocol Yarnykh 2007 (Magn Reson Med 57:192) recommends, TR2/TR1 = 5, 60°
AFI_TR = np.array([0.020, 0.100])
AFI_ALPHA = 60.0
AFI_B1 = 0.9
# MP2RAGE: a 3 T-like protocol (invented numbers in the usual range)
MP_TI = np.array([0.7, 2.5])
MP_META = {"FlipAngle": [4.0, 5.0], "RepetitionTimeExcitation": 0.007,
           "RepetitionTimePreparation": 5.0, "NumberShots": 160}
MP_EFF = 0.96


def _afi_spec(t1=None):
    spec = get_model("afi")
    opts = {} if t1 is None else {"t1_fixed": t1}
    spec = configure_model(spec, opts)
    fixed = spec.fixed_from_meta({"FlipAngle": AFI_ALPHA}, opts)
    spec.validate(AFI_TR, fixed)
    return spec, fixed


@pytest.fixture(scope="module")
def afi_clean():
    return np.array([afi_pair(t1, AFI_ALPHA * AFI_B1, *AFI_TR) for t1 in VIAL_T1])


def test_afi_closed_form_is_the_tr_much_shorter_than_t1_limit(afi_clean):
    """The closed form cos α = (r·n − 1)/(n − r) (Yarnykh 2007) underestimates B1 as T1
    approaches the TRs; it is within 0.5 % from T1 = 0.5 s (TR2 = 100 ms)."""
    spec, fixed = _afi_spec()
    res = fit_voxels(spec, AFI_TR, afi_clean, fixed)
    err = res.params["B1"] / AFI_B1 - 1
    assert np.all(err < 0) and np.all(np.diff(err) > 0)      # shrinks as T1 grows
    assert np.max(np.abs(err[VIAL_T1 >= 0.5])) < 0.005
    assert err[0] < -0.02                                     # T1 = 0.105 s: TR2 ≈ T1


def test_afi_exact_with_known_t1(afi_clean):
    for i, t1 in enumerate(VIAL_T1):
        spec, fixed = _afi_spec(t1)
        res = fit_voxels(spec, AFI_TR, afi_clean[i:i + 1], fixed)
        assert res.params["B1"][0] == pytest.approx(AFI_B1, rel=1e-8)
        assert res.params["M0"][0] == pytest.approx(1.0, rel=1e-8)


@pytest.mark.parametrize("snr, vials, limit_pct", [(300, slice(0, 12), 2.0),
                                                    (100, slice(0, 9), 2.0)])
def test_afi_bias_per_vial(afi_clean, snr, vials, limit_pct):
    """Noise-induced bias of the closed-form B1 (the noiseless bias subtracted). At SNR 100
    the three longest-T1 vials have a per-vial SNR below 25 (the AFI signal scales with
    1 − e^(−TR1/T1)) and are left out."""
    spec, fixed = _afi_spec()
    base = fit_voxels(spec, AFI_TR, afi_clean, fixed).params["B1"]
    res = fit_voxels(spec, AFI_TR, noisy(afi_clean, snr, N_NOISE, seed=snr), fixed)
    b = res.params["B1"].reshape(VIAL_T1.size, N_NOISE)
    bias = 100 * (np.nanmean(b, axis=1) / base - 1)
    assert np.max(np.abs(bias[vials])) < limit_pct, bias


def test_afi_beyond_reach():
    # S2 > S1 only below α = 0 (noise at small angles): B1 at its bound; a ratio below
    # r(π) = −1 (no angle gives it) is a failed fit
    spec, fixed = _afi_spec()
    res = fit_voxels(spec, AFI_TR, np.array([[1.0, 1.2], [1.0, -2.0]]), fixed)
    assert res.status.tolist() == [st.AT_BOUND, st.FAILED]


# --------------------------------------------------------------------------- mp2rage
def _mp_clean(b1=1.0, n_before=80):
    inv = np.rad2deg(np.arccos(-MP_EFF))     # inversion angle of efficiency 0.96
    return np.array([mp2rage_pair(t1, *MP_TI, (4.0 * b1, 5.0 * b1), 0.007, 160, n_before,
                                  5.0, inversion_deg=inv) for t1 in VIAL_T1])


def _mp_spec(meta=MP_META, options=None):
    spec = get_model("mp2rage")
    fixed = spec.fixed_from_meta(meta, options or {})
    spec.validate(MP_TI, fixed)
    return spec, fixed


@pytest.fixture(scope="module")
def mp_clean():
    return _mp_clean()


def _complex(pair, phase=0.7):
    return pair.astype(complex) * np.exp(1j * phase)


def test_mp2rage_noiseless_identity(mp_clean):
    spec, fixed = _mp_spec()
    res = fit_voxels(spec, MP_TI, _complex(mp_clean), fixed)
    # vial 1 (0.105 s) lies left of the maximum of UNI(T1) for this protocol: its UNI is
    # shared with a longer T1 on the monotonic branch, so it is reported at the bound
    assert res.status[0] == st.AT_BOUND
    np.testing.assert_allclose(res.params["T1"][1:], VIAL_T1[1:], rtol=1e-6)
    np.testing.assert_allclose(res.params["M0"][1:], 1.0, rtol=1e-6)
    # UNI = GRE1·GRE2/(GRE1² + GRE2²) of the simulated pair (Marques et al. 2010, eq. 3)
    g1, g2 = mp_clean.T
    np.testing.assert_allclose(res.extras["UNI"], g1 * g2 / (g1 ** 2 + g2 ** 2), rtol=1e-9)


def test_mp2rage_uniform_image_free_of_m0_and_phase(mp_clean):
    # the receive field, M0 and T2* scale both images alike and cancel in UNI (Marques
    # et al. 2010); a voxel-wise phase too
    spec, fixed = _mp_spec()
    scale = np.linspace(0.3, 3.0, VIAL_T1.size)[:, None]
    a = fit_voxels(spec, MP_TI, _complex(mp_clean), fixed)
    b = fit_voxels(spec, MP_TI, _complex(mp_clean * scale, phase=-2.0), fixed)
    np.testing.assert_allclose(b.params["T1"][1:], a.params["T1"][1:], rtol=1e-9)
    np.testing.assert_allclose(b.params["M0"][1:], scale[1:, 0], rtol=1e-6)
    assert np.all((b.extras["UNI"] >= -0.5) & (b.extras["UNI"] <= 0.5))


def test_mp2rage_b1_correction():
    """Readout angles 15 % low: the lookup at B1 = 1 is biased for long T1, the lookup at
    the voxel's B1 (a B1 map) is exact (Marques & Gruetter 2013, PLoS ONE 8:e69294)."""
    clean = _complex(_mp_clean(b1=0.85))
    spec, fixed = _mp_spec()
    plain = fit_voxels(spec, MP_TI, clean, fixed)
    assert np.max(np.abs(plain.params["T1"][1:] / VIAL_T1[1:] - 1)) > 0.03
    fixed_b1 = {**fixed, "b1": np.full(VIAL_T1.size, 0.85)}
    res = fit_voxels(spec, MP_TI, clean, fixed_b1)
    np.testing.assert_allclose(res.params["T1"][2:], VIAL_T1[2:], rtol=1e-6)


def test_mp2rage_number_shots_before_and_after_the_centre():
    # partial-Fourier-like timing: 40 excitations before the k-space centre of 160
    clean = _complex(_mp_clean(n_before=40))
    spec, fixed = _mp_spec({**MP_META, "NumberShots": [40, 120]})
    res = fit_voxels(spec, MP_TI, clean, fixed)
    np.testing.assert_allclose(res.params["T1"][1:], VIAL_T1[1:], rtol=1e-6)
    # read as the symmetric default (80 before) the same data give another T1
    spec, fixed = _mp_spec()
    other = fit_voxels(spec, MP_TI, clean, fixed)
    assert np.max(np.abs(other.params["T1"][1:] / VIAL_T1[1:] - 1)) > 0.01


@pytest.mark.parametrize("snr, limit_pct", [(100, 1.0), (300, 0.5)])
def test_mp2rage_bias_per_vial(mp_clean, snr, limit_pct):
    """Mean T1 per vial over its usable voxels, vials 3–12 (0.26–2.45 s): the first two lie
    where UNI hardly changes with T1 for this protocol (reported separately in the
    accuracy benchmark). Standard errors from the image noise match the scatter."""
    spec, fixed = _mp_spec()
    sigma = np.max(np.abs(mp_clean)) / snr
    res = fit_voxels(spec, MP_TI, noisy(mp_clean, snr, N_NOISE, seed=snr, complex_data=True),
                     fixed, noise_sigma=sigma)
    t1 = np.where(np.isin(res.status, st.USABLE), res.params["T1"], np.nan)
    bias = bias_pct(VIAL_T1, t1, N_NOISE)
    assert np.max(np.abs(bias[2:])) < limit_pct, bias
    sd = np.nanstd(t1.reshape(VIAL_T1.size, N_NOISE), axis=1)
    se = np.nanmedian(res.stderr["T1"].reshape(VIAL_T1.size, N_NOISE), axis=1)
    np.testing.assert_allclose(se[2:], sd[2:], rtol=0.25)


@pytest.mark.parametrize("meta, match", [
    ({k: v for k, v in MP_META.items() if k != "NumberShots"}, "'NumberShots'"),
    ({k: v for k, v in MP_META.items() if k != "RepetitionTimeExcitation"},
     "'RepetitionTimeExcitation'"),
    ({k: v for k, v in MP_META.items() if k != "RepetitionTimePreparation"},
     "'RepetitionTimePreparation'"),
    ({**MP_META, "RepetitionTimePreparation": 3.0}, "second block would end after the next"),
    ({**MP_META, "NumberShots": 300}, "blocks would overlap"),
    ({**MP_META, "FlipAngle": [4.0, 5.0, 6.0]}, "one angle per inversion image"),
    ({**MP_META, "FlipAngle": [4.0, 95.0]}, "each readout angle must lie in"),
    ({**MP_META, "RepetitionTimeExcitation": 0.0}, "must be positive"),
])
def test_mp2rage_bad_protocols(meta, match):
    with pytest.raises(RelaxlineError, match=match):
        _mp_spec(meta)


def test_mp2rage_needs_complex_data(mp_clean):
    spec, fixed = _mp_spec()
    with pytest.raises(RelaxlineError, match="complex"):
        fit_voxels(spec, MP_TI, np.abs(mp_clean), fixed)


@pytest.mark.parametrize("x, meta, match", [
    ([0.02, 0.1, 0.2], {"FlipAngle": 60.0}, "exactly two volumes"),
    ([0.02, 0.025], {"FlipAngle": 60.0}, "too close to 1"),
    ([0.02, 0.1], {"FlipAngle": 190.0}, "must lie in"),
    ([0.02, 0.1], {}, "'FlipAngle'"),
])
def test_afi_bad_protocols(x, meta, match):
    spec = get_model("afi")
    with pytest.raises(RelaxlineError, match=match):
        spec.validate(np.asarray(x), spec.fixed_from_meta(meta, {}))


# --------------------------------------------------------------------------- simulators' models
def test_afi_signals_match_the_simulation(afi_clean):
    # the forward pair `relaxline simulate` writes, against the pulse-by-pulse steady
    # state of the interleaved sequence (tests/bloch_more.py)
    from fitting.afi import afi_signals
    amp = -np.expm1(-AFI_TR[0] / VIAL_T1)            # A = M0·(1 − e^(−TR1/T1)), M0 = 1
    got = afi_signals(AFI_TR, AFI_B1, amp[:, None], AFI_ALPHA, VIAL_T1[:, None])
    np.testing.assert_allclose(got.reshape(afi_clean.shape), afi_clean, atol=1e-12)


def test_mp2rage_signals_match_the_simulation(mp_clean):
    from fitting.mp2rage import Protocol, mp2rage_signals
    prot = Protocol(tis=tuple(MP_TI), alphas=(4.0, 5.0), tau=0.007, tr=5.0, n=160,
                    n_before=80, eff=MP_EFF)
    np.testing.assert_allclose(mp2rage_signals(VIAL_T1, prot), mp_clean, atol=1e-12)
