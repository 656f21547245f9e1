"""Closed-form signal equations (fitting.signals) against independent references."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq, minimize_scalar

from fitting.epg import cpmg_echoes
from fitting.signals import (dam_b1, dam_signals, ernst_angle_deg, ir_ab_from_params,
                             ir_params_from_ab, ir_signal, ir_signal_ab, mono_exp, spgr_signal)
from test_bloch import free_precession, hard_pulse


def _spoil(m: np.ndarray) -> np.ndarray:
    """Ideal spoiling: transverse magnetisation destroyed."""
    return np.array([0.0, 0.0, m[2]])


def _ir_steady_state_sim(ti, t1, m0, eff, tr, alpha_deg, max_cycles=2000):
    """Inversion recovery played pulse by pulse with the Bloch helpers until steady state.

    Inversion of angle arccos(−eff) about x, spoil, wait TI, excitation α about x (signal =
    |Mxy| on the realistic, pre-spoil magnetisation, signed by Mz before the pulse), spoil,
    wait until TR after the inversion; repeat.
    """
    theta_inv = np.rad2deg(np.arccos(-eff))
    m = np.array([0.0, 0.0, m0])
    prev = np.inf
    for _ in range(max_cycles):
        m = _spoil(hard_pulse(m, "x", theta_inv))
        m = free_precession(m, 0.0, ti, t1, 1e9, m0)
        mz_before = m[2]
        m = hard_pulse(m, "x", alpha_deg)
        sig = np.copysign(np.hypot(m[0], m[1]), mz_before)
        m = free_precession(_spoil(m), 0.0, tr - ti, t1, 1e9, m0)
        if abs(sig - prev) < 1e-15:
            break
        prev = sig
    return sig


def test_ir_ideal_long_tr_zero_crossing():
    # S = M0·(1 − 2·e^(−TI/T1)) crosses zero at TI = T1·ln 2 (common practice)
    for t1 in (0.25, 0.8, 1.9):
        root = brentq(lambda ti: ir_signal(np.array([ti]), t1, 1.0)[0], 1e-4, 10.0, xtol=1e-14)
        assert root == pytest.approx(t1 * np.log(2.0), rel=1e-10)
    ti = np.array([0.0, 0.3, 5.0])
    np.testing.assert_allclose(ir_signal(ti, 0.7, 2.0), 2.0 * (1 - 2 * np.exp(-ti / 0.7)), rtol=1e-14)


@pytest.mark.parametrize("eff,tr,alpha", [(1.0, 2.0, 90.0), (0.92, 1.5, 90.0),
                                          (0.85, 3.0, 70.0), (1.0, 0.9, 120.0)])
def test_ir_finite_tr_matches_pulse_by_pulse_simulation(eff, tr, alpha):
    # Exact steady state of imperfect-inversion, finite-TR IR (Barral et al. 2010, Magn Reson
    # Med 64:1057) vs the sequence played out with the Bloch helpers until steady state.
    t1, m0 = 0.8, 1.3
    ti = np.array([0.05, 0.3, 0.55, 0.85])
    sim = [_ir_steady_state_sim(t, t1, m0, eff, tr, alpha) for t in ti]
    np.testing.assert_allclose(ir_signal(ti, t1, m0, eff, tr, alpha), sim, rtol=1e-9, atol=1e-12)


def test_ir_ab_round_trip():
    # S = a + b·e^(−TI/T1) for any inversion/excitation angle and TR (Barral et al. 2010)
    t1 = np.array([0.3, 0.9, 1.6])
    m0 = np.array([1.0, 2.5, 0.4])
    eff = np.array([1.0, 0.9, 0.75])
    tr = np.array([np.inf, 2.5, 1.8])
    alpha = np.array([90.0, 80.0, 110.0])
    a, b = ir_ab_from_params(t1, m0, eff, tr, alpha)
    ti = np.linspace(0.02, 1.5, 9)
    np.testing.assert_allclose(ir_signal_ab(ti, t1, a, b), ir_signal(ti, t1, m0, eff, tr, alpha),
                               rtol=1e-13, atol=1e-15)
    m0_back, eff_back = ir_params_from_ab(t1, a, b, tr, alpha)
    np.testing.assert_allclose(m0_back, m0, rtol=1e-12)
    np.testing.assert_allclose(eff_back, eff, rtol=1e-12)


@pytest.mark.parametrize("tr,t1", [(0.005, 1.0), (0.015, 0.8), (0.03, 0.4)])
@pytest.mark.parametrize("b1", [1.0, 0.8])
def test_spgr_peaks_at_ernst_angle(tr, t1, b1):
    # Maximum of the spoiled steady state at arccos(e^(−TR/T1)) (Ernst & Anderson 1966,
    # Rev Sci Instrum 37:93); with a B1 scale the nominal optimum is the Ernst angle / B1.
    res = minimize_scalar(lambda a: -spgr_signal(np.array([a]), t1, 1.0, tr, b1)[0],
                          bounds=(0.1, 89.0 / b1), method="bounded",
                          options={"xatol": 1e-9})
    assert res.x == pytest.approx(float(ernst_angle_deg(tr, t1)) / b1, abs=1e-4)


@pytest.mark.parametrize("alpha", [3.0, 12.0, 40.0])
def test_spgr_matches_pulse_by_pulse_simulation(alpha):
    # Spoiled GRE played pulse by pulse (hard pulse, ideal spoiling, T1 recovery over TR)
    # until steady state; formula of Ernst & Anderson 1966 with B1 scaling.
    t1, tr, m0, b1 = 0.9, 0.012, 1.7, 1.1
    m = np.array([0.0, 0.0, m0])
    prev = np.inf
    for _ in range(20000):
        m = hard_pulse(m, "y", b1 * alpha)
        sig = np.hypot(m[0], m[1])
        m = free_precession(_spoil(m), 0.0, tr, t1, 1e9, m0)
        if abs(sig - prev) < 1e-16:
            break
        prev = sig
    assert spgr_signal(np.array([alpha]), t1, m0, tr, b1)[0] == pytest.approx(sig, rel=1e-10)


@pytest.mark.parametrize("alpha", [45.0, 60.0])
def test_double_angle_b1_recovery(alpha):
    # S(2α)/S(α) = 2·cos(B1·α) with full recovery → B1 = arccos(ratio/2)/α
    # (Insko & Bolinger 1993, J Magn Reson A 103:82)
    b1 = np.linspace(0.5, 89.0 / alpha, 13)
    s = dam_signals(alpha, b1, m0=3.0)
    # each signal is |Mxy| after one hard pulse on equilibrium (common practice)
    for i, b in enumerate(b1):
        for k, ang in enumerate((alpha, 2 * alpha)):
            m = hard_pulse(np.array([0.0, 0.0, 3.0]), "x", b * ang)
            assert s[i, k] == pytest.approx(np.hypot(m[0], m[1]), abs=1e-13)
    np.testing.assert_allclose(s[:, 1] / s[:, 0], 2 * np.cos(np.deg2rad(b1 * alpha)), rtol=1e-12)
    np.testing.assert_allclose(dam_b1(s[:, 0], s[:, 1], alpha), b1, rtol=1e-10)


def test_dam_b1_edge_cases():
    # Noise can push the ratio outside [−1, 1]: clipped; S(α) = 0 has no B1 (NaN).
    out = dam_b1(np.array([1.0, 1.0, 0.0]), np.array([2.5, -2.5, 0.3]), 60.0)
    assert out[0] == pytest.approx(0.0, abs=1e-15)
    assert out[1] == pytest.approx(3.0)            # arccos(−1)/60° = 180°/60°
    assert np.isnan(out[2])


def test_mono_exp_equals_epg_with_perfect_refocusing():
    # M0·e^(−TE/T2) is the 180° CPMG echo train (Carr & Purcell 1954, Phys Rev 94:630)
    te = 0.01 * np.arange(1, 17)
    t2 = np.array([0.02, 0.09, 0.4])
    np.testing.assert_allclose(mono_exp(te, t2, 1.4), cpmg_echoes(16, 0.01, t2, 1.0, m0=1.4),
                               rtol=1e-13)
    np.testing.assert_allclose(mono_exp(te, 0.05, 1.0, 0.2), np.exp(-te / 0.05) + 0.2, rtol=1e-14)


@pytest.mark.parametrize("tr", [np.inf, 3.0])
def test_ir_jacobian_matches_central_differences(tr):
    # analytic derivatives of the steady-state IR signal against central differences
    # (numerical differentiation, common practice)
    from fitting.signals import ir_signal, ir_signal_jacobian
    ti = np.array([0.05, 0.3, 1.0, 2.5])
    p = {"t1": np.array([0.3, 1.2]), "m0": np.array([2.0, 0.7]), "eff": np.array([0.9, 0.6])}
    jac = ir_signal_jacobian(ti, p["t1"], p["m0"], p["eff"], tr, 70.0)
    for i, k in enumerate(("t1", "m0", "eff")):
        h = 1e-6
        up, dn = dict(p), dict(p)
        up[k], dn[k] = p[k] + h, p[k] - h
        fd = (ir_signal(ti, **up, tr=tr, alpha_deg=70.0)
              - ir_signal(ti, **dn, tr=tr, alpha_deg=70.0)) / (2 * h)
        np.testing.assert_allclose(jac[..., i], fd, atol=1e-8)
