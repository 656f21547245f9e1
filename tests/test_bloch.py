"""Independent isochromat (Bloch) simulator used as a reference, and its own checks.

Helpers here are imported by test_epg.py and test_signals.py: a right-handed hard-pulse
rotation, free precession with relaxation, and a CPMG simulation with many isochromats.
They are checked against scipy's ODE solver on the Bloch equations (Bloch 1946,
Phys Rev 70:460) so the references for the models do not rest on the models.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

_AXES = {"x": (1.0, 0.0, 0.0), "y": (0.0, 1.0, 0.0), "z": (0.0, 0.0, 1.0)}


def rotation(axis, angle_deg: float) -> np.ndarray:
    """Right-handed rotation matrix by ``angle_deg`` about ``axis`` ('x'/'y'/'z' or a 3-vector).

    Rodrigues' formula R = cos θ·I + sin θ·[n]× + (1 − cos θ)·n nᵀ.
    """
    n = np.asarray(_AXES.get(axis, axis) if isinstance(axis, str) else axis, dtype=float)
    n = n / np.linalg.norm(n)
    th = np.deg2rad(angle_deg)
    k = np.array([[0.0, -n[2], n[1]], [n[2], 0.0, -n[0]], [-n[1], n[0], 0.0]])
    return np.cos(th) * np.eye(3) + np.sin(th) * k + (1.0 - np.cos(th)) * np.outer(n, n)


def hard_pulse(m: np.ndarray, axis, angle_deg: float) -> np.ndarray:
    """Instantaneous pulse: rotate magnetisation vectors ``m`` (..., 3)."""
    return np.asarray(m, float) @ rotation(axis, angle_deg).T


def free_precession(m: np.ndarray, phi: np.ndarray, t: float, t1: float, t2: float,
                    m0: float = 1.0) -> np.ndarray:
    """Precess vectors m (..., 3) by angles phi about z (right-handed) and relax for time t."""
    e1 = np.exp(-t / t1)
    e2 = np.exp(-t / t2)
    c, s = np.cos(phi), np.sin(phi)
    x, y, z = m[..., 0], m[..., 1], m[..., 2]
    return np.stack([(c * x - s * y) * e2, (s * x + c * y) * e2, z * e1 + m0 * (1.0 - e1)], axis=-1)


def isochromat_cpmg(n_echoes: int, esp: float, t2: float, t1: float, b1: float = 1.0,
                    refocus_deg: float = 180.0, excite_deg: float = 90.0, m0: float = 1.0,
                    n_iso: int = 101, quadrature: bool = False) -> np.ndarray:
    """CPMG echo train from ``n_iso`` isochromats, dephasing spread uniformly over 2π per ESP/2.

    Excitation about x (b1·excite_deg) puts M on −y; refocusing about y (b1·refocus_deg),
    90° out of phase: the CPMG condition (Carr & Purcell 1954, Phys Rev 94:630; Meiboom &
    Gill 1958, Rev Sci Instrum 29:688). Full relaxation including T1 regrowth. Returns the
    mean magnetisation along the CPMG axis (−y) at each echo, or along x if ``quadrature``.
    """
    phi = 2.0 * np.pi * np.arange(n_iso) / n_iso
    m = np.zeros((n_iso, 3))
    m[:, 2] = m0
    m = hard_pulse(m, "x", b1 * excite_deg)
    out = []
    for _ in range(n_echoes):
        m = free_precession(m, phi, esp / 2, t1, t2, m0)
        m = hard_pulse(m, "y", b1 * refocus_deg)
        m = free_precession(m, phi, esp / 2, t1, t2, m0)
        out.append(m[:, 0].mean() if quadrature else -m[:, 1].mean())
    return np.array(out)


def _bloch_ode(omega: np.ndarray, t1: float, t2: float, m0: float):
    """Rotating-frame Bloch equations dM/dt = γ M×B − relaxation, written with the rotation
    vector Ω = −γB (so that dM/dt = Ω×M, a right-handed rotation about Ω; Bloch 1946)."""
    def rhs(_t, m):
        d = np.cross(omega, m)
        d[0] -= m[0] / t2
        d[1] -= m[1] / t2
        d[2] -= (m[2] - m0) / t1
        return d
    return rhs


@pytest.mark.parametrize("alpha", [90.0, 180.0, 360.0, 30.0, 150.0])
@pytest.mark.parametrize("axis", ["x", "y"])
def test_hard_pulse_on_equilibrium(alpha, axis):
    # Mz = M0·cos α, |Mxy| = M0·|sin α| after a hard pulse α on equilibrium (common practice)
    m0 = 2.0
    m = hard_pulse(np.array([0.0, 0.0, m0]), axis, alpha)
    a = np.deg2rad(alpha)
    assert m[2] == pytest.approx(m0 * np.cos(a), abs=1e-14)
    assert np.hypot(m[0], m[1]) == pytest.approx(m0 * abs(np.sin(a)), abs=1e-14)


@pytest.mark.parametrize("alpha", [90.0, 180.0, 360.0, 123.0])
@pytest.mark.parametrize("axis", ["x", "y", (1.0, 1.0, 0.0)])
def test_hard_pulse_matches_bloch_ode(alpha, axis):
    # Constant B1 on resonance in the rotating frame, no relaxation: integrate the Bloch
    # equations (Bloch 1946, Phys Rev 70:460) with scipy's DOP853 and compare.
    tau = 1e-3                                      # pulse length, s
    n = np.asarray(_AXES.get(axis, axis) if isinstance(axis, str) else axis, float)
    omega = n / np.linalg.norm(n) * np.deg2rad(alpha) / tau
    m_start = np.array([0.3, -0.2, 0.9])
    sol = solve_ivp(_bloch_ode(omega, np.inf, np.inf, 0.0), (0.0, tau), m_start,
                    method="DOP853", rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(hard_pulse(m_start, axis, alpha), sol.y[:, -1], atol=1e-9)


def test_hard_pulse_with_slow_relaxation_matches_bloch_ode():
    # Relaxation much slower than the pulse (T1, T2 = 1e4 × pulse length): the
    # instantaneous rotation agrees with the ODE to O(τ/T2) (Bloch 1946).
    tau = 1e-3
    omega = np.array([np.pi / 2 / tau, 0.0, 0.0])
    sol = solve_ivp(_bloch_ode(omega, 10.0, 10.0, 1.0), (0.0, tau), [0.0, 0.0, 1.0],
                    method="DOP853", rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(hard_pulse(np.array([0.0, 0.0, 1.0]), "x", 90.0), sol.y[:, -1],
                               atol=2e-4)


@pytest.mark.parametrize("phi_deg", [0.0, 37.0, -140.0])
def test_free_precession_matches_bloch_ode(phi_deg):
    # Off-resonance precession about z with T1 regrowth and T2 decay vs the Bloch ODE
    t, t1, t2, m0 = 0.02, 0.3, 0.05, 1.4
    omega = np.array([0.0, 0.0, np.deg2rad(phi_deg) / t])
    m_start = np.array([0.5, -0.7, -0.4])
    sol = solve_ivp(_bloch_ode(omega, t1, t2, m0), (0.0, t), m_start,
                    method="DOP853", rtol=1e-12, atol=1e-13)
    got = free_precession(m_start, np.deg2rad(phi_deg), t, t1, t2, m0)
    np.testing.assert_allclose(got, sol.y[:, -1], atol=1e-9)


def test_isochromat_cpmg_perfect_refocusing():
    # Perfect 180° CPMG: echoes M0·e^(−k·ESP/T2) (Carr & Purcell 1954; Meiboom & Gill 1958)
    s = isochromat_cpmg(10, 0.01, 0.05, 0.7, m0=1.3, n_iso=31)
    np.testing.assert_allclose(s, 1.3 * np.exp(-0.01 * np.arange(1, 11) / 0.05), rtol=1e-12)
    np.testing.assert_allclose(isochromat_cpmg(10, 0.01, 0.05, 0.7, n_iso=31, quadrature=True),
                               0.0, atol=1e-13)
