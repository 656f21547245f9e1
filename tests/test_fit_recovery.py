"""looklocker and sr against isochromat simulations of their sequences (tests/bloch_more.py)."""
from __future__ import annotations

import numpy as np
import pytest

from accuracy import VIAL_T1, bias_pct, noisy
from bloch_more import looklocker, saturation_recovery, spoiled_steady_state
from fitting import status as st
from fitting.errors import RelaxlineError
from fitting.recovery import ll_t1_from_ab, ll_t1star
from fitting.spec import configure_model, get_model
from fitting.voxelwise import fit_voxels

# Continuous spoiled Look-Locker: 48 readouts of 8° every 100 ms from 50 ms after the
# inversion, inversions every 20 s (full recovery of every vial), all readouts imaged.
TAU, ALPHA, N_PULSES, FIRST, T_PREP = 0.1, 8.0, 48, 0.05, 20.0
SD = np.array([0.02, 0.05, 0.1, 0.2, 0.4, 0.8, 1.5, 3.0, 6.0])   # saturation delays (s)
N_NOISE = 150


def test_helper_matches_the_ernst_steady_state():
    # spoiled steady state M0·sin α·(1 − E1)/(1 − cos α·E1) (Ernst & Anderson 1966,
    # Rev Sci Instrum 37:93), written out here, against the event-by-event helper
    t1, a, tr = 0.8, 15.0, 0.02
    e = np.exp(-tr / t1)
    ref = np.sin(np.deg2rad(a)) * (1 - e) / (1 - np.cos(np.deg2rad(a)) * e)
    assert spoiled_steady_state(t1, a, tr) == pytest.approx(ref, rel=1e-9)


def _ll(inversion_deg=180.0, t_prep=T_PREP):
    sims = [looklocker(t1, ALPHA, TAU, N_PULSES, FIRST, t_prep, inversion_deg)
            for t1 in VIAL_T1]
    return sims[0][0], np.array([s for _, s in sims])          # signed


@pytest.fixture(scope="module")
def ll_signed():
    return _ll()


@pytest.fixture(scope="module")
def ll_ideal(ll_signed):
    return ll_signed[0], np.abs(ll_signed[1])                   # magnitude images


def _readout_spec():
    spec = configure_model(get_model("looklocker"), {"ll_correction": "readout"})
    meta = {"FlipAngle": ALPHA, "RepetitionTimeExcitation": TAU}
    return spec, spec.fixed_from_meta(meta, {"ll_correction": "readout"})


def test_apparent_t1_relation_of_the_readout():
    # 1/T1* = 1/T1 − ln(cos α)/τ (Deichmann & Haase 1992, J Magn Reson 96:608): successive
    # differences of the simulated readouts shrink by e^(−τ/T1)·cos α per pulse
    t1 = 1.2
    _, s = looklocker(t1, ALPHA, TAU, N_PULSES, FIRST, T_PREP)
    lam = np.exp(-TAU / t1) * np.cos(np.deg2rad(ALPHA))
    np.testing.assert_allclose(np.diff(s)[1:] / np.diff(s)[:-1], lam, rtol=1e-8)
    assert ll_t1star(t1, ALPHA, TAU) == pytest.approx(-TAU / np.log(lam), rel=1e-12)


def test_ratio_correction_in_its_domain(ll_ideal):
    """Ideal inversion, full recovery, readout from (almost) the inversion on: T1*·(B/A − 1)
    is T1 up to the discreteness of the readout (Deichmann & Haase 1992)."""
    ti, clean = ll_ideal
    spec = get_model("looklocker")
    res = fit_voxels(spec, ti, clean, spec.fixed_from_meta({}, {}))
    err = res.params["T1"] / VIAL_T1 - 1
    assert np.all(np.isin(res.status, st.USABLE))
    assert np.max(np.abs(err)) < 0.003, err
    # the fitted curve itself is exact: A − B·e^(−TI/T1*) with T1* of the readout
    np.testing.assert_allclose(res.params["T1star"], ll_t1star(VIAL_T1, ALPHA, TAU), rtol=1e-6)


def test_readout_correction_exact_noiseless(ll_ideal):
    ti, clean = ll_ideal
    spec, fixed = _readout_spec()
    spec.validate(ti, fixed)
    res = fit_voxels(spec, ti, clean, fixed)
    np.testing.assert_allclose(res.params["T1"], VIAL_T1, rtol=1e-6)
    np.testing.assert_allclose(res.params["eff"], 1.0, atol=0.03)   # pause of 50 ms before the train
    np.testing.assert_allclose(res.extras["T1star"], ll_t1star(VIAL_T1, ALPHA, TAU), rtol=1e-6)


def test_imperfect_inversion_biases_only_the_ratio_correction():
    """A 160° inversion (efficiency −cos 160° = 0.94): T1*·(B/A − 1) falls by about 6 %, the
    readout correction stays exact (it needs T1* only)."""
    ti, clean = _ll(inversion_deg=160.0)
    clean = np.abs(clean)
    ratio = fit_voxels(get_model("looklocker"), ti, clean, {"correction": "ratio",
                                                           "signed": False})
    assert np.all(ratio.params["T1"] / VIAL_T1 - 1 < -0.05)
    spec, fixed = _readout_spec()
    res = fit_voxels(spec, ti, clean, fixed)
    np.testing.assert_allclose(res.params["T1"], VIAL_T1, rtol=1e-6)
    np.testing.assert_allclose(res.params["eff"], -np.cos(np.deg2rad(160.0)), rtol=0.02)


@pytest.mark.parametrize("snr, limit_pct", [(100, 0.5), (300, 0.2)])
def test_looklocker_bias_per_vial(ll_ideal, snr, limit_pct):
    # magnitude data with Rician noise, per vial mean over 150 voxels: readout correction
    ti, clean = ll_ideal
    spec, fixed = _readout_spec()
    res = fit_voxels(spec, ti, noisy(clean, snr, N_NOISE, seed=snr), fixed)
    assert np.isin(res.status, st.USABLE).mean() > 0.99
    bias = bias_pct(VIAL_T1, res.params["T1"], N_NOISE)
    assert np.max(np.abs(bias)) < limit_pct, bias


def test_looklocker_complex_data_phase_corrected(ll_signed):
    ti, clean = ll_signed
    rng = np.random.default_rng(4)
    z = noisy(clean, 300, 20, seed=5, complex_data=True) * np.exp(
        1j * rng.uniform(-np.pi, np.pi, (clean.shape[0] * 20, 1)))
    spec, fixed = _readout_spec()
    res = fit_voxels(spec, ti, z, fixed)
    assert np.max(np.abs(bias_pct(VIAL_T1, res.params["T1"], 20))) < 0.5


def test_ll_t1_from_ab_closed_form():
    # T1 = T1*·(B/A − 1) (Messroghli et al. 2004, Magn Reson Med 52:141): A = 1, B = 2
    # (ideal inversion, no readout) gives T1 = T1*
    assert ll_t1_from_ab(1.3, 1.0, 2.0) == pytest.approx(1.3)


# --------------------------------------------------------------------------- sr
@pytest.fixture(scope="module")
def sr_clean():
    # saturation pulse 80° (a 10 % B1 error), exact 90° readout resetting the history
    return np.abs(np.array([saturation_recovery(t1, SD, sat_deg=80.0) for t1 in VIAL_T1]))


def test_sr_noiseless_identity(sr_clean):
    spec = get_model("sr")
    fixed = spec.fixed_from_meta({}, {})
    spec.validate(SD, fixed)
    res = fit_voxels(spec, SD, sr_clean, fixed)
    np.testing.assert_allclose(res.params["T1"], VIAL_T1, rtol=1e-6)
    # Mz after the pulse: cos 80°·Mz(before), Mz(before) = 1 − e^(−0.5/T1) after the 90°
    # readout and 0.5 s of recovery: η = 1 − cos 80°·(1 − e^(−0.5/T1)) (this simulation)
    eta = 1 - np.cos(np.deg2rad(80.0)) * (1 - np.exp(-0.5 / VIAL_T1))
    np.testing.assert_allclose(res.params["eff"], eta, rtol=1e-5)


@pytest.mark.parametrize("snr, limit_pct", [(100, 1.0), (300, 0.3)])
def test_sr_bias_per_vial(sr_clean, snr, limit_pct):
    spec = get_model("sr")
    res = fit_voxels(spec, SD, noisy(sr_clean, snr, N_NOISE, seed=snr + 1),
                     spec.fixed_from_meta({}, {}))
    assert np.all(np.isin(res.status, st.USABLE))
    bias = bias_pct(VIAL_T1, res.params["T1"], N_NOISE)
    assert np.max(np.abs(bias)) < limit_pct, bias


# --------------------------------------------------------------------------- validation
@pytest.mark.parametrize("model, meta, options, x, match", [
    ("looklocker", {}, {"ll_correction": "readout"}, [0.1, 0.2, 0.3],
     "'FlipAngle', 'RepetitionTimeExcitation' missing"),
    ("looklocker", {"FlipAngle": 8.0}, {"ll_correction": "readout"}, [0.1, 0.2, 0.3],
     "'RepetitionTimeExcitation' missing"),
    ("looklocker", {"FlipAngle": 95.0, "RepetitionTimeExcitation": 0.1},
     {"ll_correction": "readout"}, [0.1, 0.2, 0.3], "readout angle must lie in"),
    ("looklocker", {"FlipAngle": 8.0, "RepetitionTimeExcitation": 0.5},
     {"ll_correction": "readout"}, [0.1, 0.2, 0.3], "longer than every gap"),
    ("looklocker", {}, {"ll_correction": "bogus"}, [0.1, 0.2, 0.3], "choose one of ratio"),
    ("sr", {}, {}, [0.1, 0.1, 0.2], "at least three different delays"),
])
def test_bad_protocols(model, meta, options, x, match):
    spec = configure_model(get_model(model), options) if model == "looklocker" and \
        options.get("ll_correction") == "readout" else get_model(model)
    with pytest.raises(RelaxlineError, match=match):
        fixed = spec.fixed_from_meta(meta, options)
        spec.validate(np.asarray(x, float), fixed)


# --------------------------------------------------------------------------- simulators' models
@pytest.mark.parametrize("t1", [0.2, 1.0, 2.5])
def test_ll_cycle_signals_match_the_simulation(t1):
    # the whole steady-state cycle (pause, train, incomplete recovery, 164° inversion)
    # that `relaxline simulate` uses, against the event-by-event simulation
    from fitting.recovery import ll_cycle_signals
    ti, s = looklocker(t1, ALPHA, TAU, 40, FIRST, 12.0, inversion_deg=164.0)
    got = ll_cycle_signals(t1, 1.0, ALPHA, TAU, 40, FIRST, 12.0, -np.cos(np.deg2rad(164.0)))
    np.testing.assert_allclose(got, s, atol=1e-12)


@pytest.mark.parametrize("t1", [0.2, 1.0, 2.5])
def test_sr_efficiency_matches_the_simulation(t1):
    from fitting.recovery import sr_efficiency, sr_signal
    got = sr_signal(SD, t1, 1.0, sr_efficiency(t1, 81.0, 0.4))
    np.testing.assert_allclose(got, saturation_recovery(t1, SD, sat_deg=81.0, pre_wait=0.4),
                               atol=1e-12)
