"""Checks of the steady-state simulator tests/bloch_steady.py (itself reference data)."""
from __future__ import annotations

import numpy as np
import pytest

import bloch_steady as bs
from test_bloch import free_precession, hard_pulse


def test_vectorised_steps_match_the_ode_checked_ones():
    # _rotate_x / _rotate_z / _relax against hard_pulse and free_precession of
    # tests/test_bloch.py (checked there against scipy's ODE solver; Bloch 1946)
    rng = np.random.default_rng(0)
    m = rng.normal(size=(3, 5, 3))
    ang = np.array([10.0, 95.0, 200.0])
    got = bs._rotate_x(m, np.deg2rad(ang))
    for i, a in enumerate(ang):
        np.testing.assert_allclose(got[i], hard_pulse(m[i], "x", a), atol=1e-14)
    phi = np.linspace(0, 2 * np.pi, 5, endpoint=False)
    t1, t2 = np.array([0.3, 1.0, 2.0]), np.array([0.05, 0.1, 0.4])
    got = bs._relax(bs._rotate_z(m, phi[None, :]), 0.02, t1, t2)
    for i in range(3):
        np.testing.assert_allclose(got[i], free_precession(m[i], phi, 0.02, t1[i], t2[i]),
                                   atol=1e-14)


def test_ideal_spoiling_gives_the_ernst_steady_state():
    # S = sin α·(1 − E1)/(1 − cos α·E1), E1 = e^(−TR/T1) (Ernst & Anderson 1966, Rev Sci
    # Instrum 37:93), written out here, not taken from the project
    t1 = np.array([0.3, 1.0, 2.0])
    b1 = np.array([0.8, 1.0, 1.2])
    tr, alpha = 0.015, 15.0
    s = bs.gradient_echo(alpha, t1, 0.05, tr, b1, isochromats=8)
    a, e1 = np.deg2rad(alpha * b1), np.exp(-tr / t1)
    np.testing.assert_allclose(s, np.sin(a) * (1 - e1) / (1 - np.cos(a) * e1), rtol=1e-6)


@pytest.mark.parametrize("b1", [0.7, 1.0, 1.25])
def test_inversion_recovery_matches_the_closed_form(b1):
    # Steady-state IR with inversion efficiency −cos(B1·180°), excitation B1·90°, finite
    # TR, crushers (Barral et al. 2010, Magn Reson Med 64:1057, eq. 1 family)
    ti, tr = np.array([0.05, 0.3, 0.9, 2.0]), 3.0
    t1 = np.array([0.2, 0.8, 2.5])
    s = bs.inversion_recovery(ti, t1, np.full(3, b1), tr)
    eff, a = -np.cos(np.pi * b1), np.deg2rad(90 * b1)
    e = np.exp(-tr / t1)[:, None]
    ref = np.sin(a) * (1 - (1 + eff) * np.exp(-ti / t1[:, None]) + eff * e) \
        / (1 + eff * np.cos(a) * e)
    np.testing.assert_allclose(s, np.abs(ref), atol=1e-12)


def test_rf_spoiling_differs_from_ideal_spoiling():
    # RF spoiling at 117° leaves a small residual transverse coherence, so the signal
    # departs from the Ernst value by a few percent at moderate angles, more at large
    # angles and long T2 (Preibisch & Deichmann 2009, Magn Reson Med 61:125, Fig. 1)
    t1, t2, tr = np.array([1.0, 1.0]), np.array([0.05, 0.1]), 0.015
    ideal = bs.gradient_echo(20.0, t1, t2, tr, 1.0)
    rf = bs.gradient_echo(20.0, t1, t2, tr, 1.0, phase_increment_deg=117.0)
    dev = rf / ideal - 1
    assert np.all(np.abs(dev) > 0.003) and np.all(np.abs(dev) < 0.2)
