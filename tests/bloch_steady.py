"""Independent pulse-by-pulse simulations of steady-state sequences (reference data for tests).

Nothing here uses the project's forward models: magnetisation vectors are rotated by
hard pulses and relaxed by the solutions of the Bloch equations (vectorised over
conditions; tests/test_bloch_steady.py checks each step against the hard pulse and free
precession of tests/test_bloch.py, which are checked there against scipy's ODE solver,
Bloch 1946, Phys Rev 70:460), and the sequence is simply played out until its signal
stops changing.

* :func:`inversion_recovery` — inversion pulse, crusher, wait TI, excitation, readout,
  crusher, wait until the next inversion TR after the previous one.
* :func:`gradient_echo` — a train of excitations every TR, each followed by a spoiler
  gradient that winds the transverse magnetisation through one full cycle across the
  voxel (isochromats spread uniformly over 2π). With ``phase_increment_deg`` the pulse
  phase follows the quadratic schedule θ_k = θ_{k−1} + k·Φ0 of RF spoiling (Zur, Wood &
  Neuringer 1991, Magn Reson Med 21:251) and the receiver follows the pulse phase; with
  ``None`` the transverse magnetisation is destroyed before every pulse (ideal spoiling,
  the textbook assumption; also what a long TR with a crusher does).

The signal is read immediately after the pulse (TE → 0; T2* decay to the echo time only
scales M0). Times in seconds, angles in degrees, B1 scales every pulse.
"""
from __future__ import annotations

import numpy as np


def _rotate_x(m: np.ndarray, angle_rad: np.ndarray) -> np.ndarray:
    """Right-handed rotation about x by per-condition angles; m (N, ..., 3), angles (N,)."""
    shape = (-1,) + (1,) * (m.ndim - 2)
    c, s = np.cos(angle_rad).reshape(shape), np.sin(angle_rad).reshape(shape)
    x, y, z = m[..., 0], m[..., 1], m[..., 2]
    return np.stack([x, c * y - s * z, s * y + c * z], axis=-1)


def _rotate_z(m: np.ndarray, angle_rad) -> np.ndarray:
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    x, y, z = m[..., 0], m[..., 1], m[..., 2]
    return np.stack([c * x - s * y, s * x + c * y, z], axis=-1)


def _relax(m: np.ndarray, t: float, t1: np.ndarray, t2: np.ndarray, m0: float = 1.0):
    """Relaxation only (no precession) for per-condition T1, T2 (N,)."""
    shape = (-1,) + (1,) * (m.ndim - 2)
    e1 = np.exp(-t / t1).reshape(shape)
    e2 = np.exp(-t / t2).reshape(shape)
    return np.stack([m[..., 0] * e2, m[..., 1] * e2, m[..., 2] * e1 + m0 * (1 - e1)], axis=-1)


def inversion_recovery(ti: np.ndarray, t1: np.ndarray, b1: np.ndarray, tr: float,
                       excite_deg: float = 90.0, repetitions: int | None = None) -> np.ndarray:
    """Magnitude steady-state IR signal (N, M) for conditions (T1, B1) (N,) at each TI.

    Inversion B1·180° and excitation B1·``excite_deg`` about x; transverse magnetisation
    crushed after the inversion and after the readout. Repetitions until
    e^(−repetitions·TR/T1) < 1e-12 unless given.
    """
    t1 = np.asarray(t1, float)
    b1 = np.asarray(b1, float)
    reps = repetitions or int(np.ceil(12 * np.log(10) * t1.max() / tr)) + 2
    out = np.empty((t1.size, len(ti)))
    for j, t in enumerate(ti):
        m = np.zeros((t1.size, 3))
        m[:, 2] = 1.0
        for _ in range(reps):
            m = _rotate_x(m, np.deg2rad(180.0 * b1))
            m[:, :2] = 0.0                                 # crusher after the inversion
            m = _relax(m, t, t1, np.full_like(t1, np.inf))
            m = _rotate_x(m, np.deg2rad(excite_deg * b1))
            sig = np.hypot(m[:, 0], m[:, 1])
            m[:, :2] = 0.0                                 # readout, then crusher
            m = _relax(m, tr - t, t1, np.full_like(t1, np.inf))
        out[:, j] = sig
    return out


def gradient_echo(alpha_deg: float, t1: np.ndarray, t2: np.ndarray, tr: float,
                  b1: np.ndarray, phase_increment_deg: float | None = None,
                  isochromats: int = 400, pulses: int | None = None) -> np.ndarray:
    """Steady-state spoiled gradient-echo magnitude (N,) for conditions T1, T2, B1 (N,).

    ``pulses`` defaults to enough excitations for e^(−k·TR/T1) < 1e-6. With RF spoiling
    the isochromats must resolve the coherence orders that survive T2 (order·TR/T2 up to
    about 25): keep ``isochromats`` above 25·T2/TR.
    """
    t1, t2, b1 = np.broadcast_arrays(*(np.asarray(v, float) for v in (t1, t2, b1)))
    n = t1.size
    k_max = pulses or int(np.ceil(6 * np.log(10) * t1.max() / tr)) + 10
    phi = 2.0 * np.pi * np.arange(isochromats) / isochromats     # spoiler: one cycle per TR
    m = np.zeros((n, isochromats, 3))
    m[..., 2] = 1.0
    angle = np.deg2rad(alpha_deg * b1)
    theta = 0.0
    sig = np.zeros(n)
    for k in range(k_max):
        if phase_increment_deg is None:
            m[..., :2] = 0.0                               # ideal spoiling
            m = _rotate_x(m, angle)
            sig = np.hypot(m[..., 0].mean(1), m[..., 1].mean(1))
        else:
            theta = theta + np.deg2rad(phase_increment_deg) * k   # quadratic phase
            # pulse about the axis at angle θ in the transverse plane: R_z(θ)·R_x·R_z(−θ)
            m = _rotate_z(_rotate_x(_rotate_z(m, -theta), angle), theta)
            mxy = (m[..., 0] + 1j * m[..., 1]).mean(1) * np.exp(-1j * theta)  # receiver
            sig = np.abs(mxy)
        m = _relax(_rotate_z(m, phi[None, :]), tr, t1, t2)   # spoiler, then relaxation
    return sig
