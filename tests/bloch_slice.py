"""Independent simulation of a 2D (slice-selective) CPMG train: spinors and isochromats.

Written separately from the project's models (fitting.rfpulse / fitting.sliceprofile /
fitting.epg are not imported here): the reference that slice-profile fits are checked
against.

* :func:`pulse_rotations` — a shaped RF pulse under a slice-select gradient, by spinor
  (Cayley–Klein) simulation: each time step is the SU(2) matrix
  U = cos(φ/2)·I − i·sin(φ/2)·(n·σ) of a rotation by φ about n (Pauli matrices σ),
  composed over the pulse, then referred to the pulse centre (the free precession of
  the gradient's two halves removed) and converted to a 3×3 rotation
  R_ij = ½·tr(σ_i U σ_j U†) (e.g. Pauly et al. 1991, IEEE Trans Med Imaging 10:53;
  Sakurai, Modern Quantum Mechanics, for the SU(2)→SO(3) map).
* :func:`slice_cpmg` — the CPMG train of a slice: at each position across the slice,
  isochromats dephased uniformly over 2π per half echo spacing (crushers), excited and
  refocused by the actual rotations at that position (the full rotation, its phase and
  axis tilt included), with T1/T2 relaxation; the signal is the magnitude of the
  complex transverse magnetisation summed over the slice.

The pulse is the Hanning-windowed sinc of design §5: B1(t) ∝ sinc(TBW·τ)·½(1 + cos 2πτ),
τ = t/T − ½, on-resonance area = nominal angle; position x in excitation slice
thicknesses maps to the off-resonance x·TBW/T; the refocusing gradient is RATIO times
weaker. The true B1 scales the RF amplitude of both pulses.
"""
from __future__ import annotations

import numpy as np

_SIGMA = np.array([[[0, 1], [1, 0]], [[0, -1j], [1j, 0]], [[1, 0], [0, -1]]], complex)


def su2(axis: np.ndarray, angle: np.ndarray) -> np.ndarray:
    """SU(2) matrices (..., 2, 2) of rotations by ``angle`` about unit ``axis`` (..., 3)."""
    ns = np.einsum("...i,ijk->...jk", axis, _SIGMA)
    half = np.asarray(angle)[..., None, None] / 2
    return np.cos(half) * np.eye(2) - 1j * np.sin(half) * ns


def so3(u: np.ndarray) -> np.ndarray:
    """3×3 rotation of each SU(2) matrix: R_ij = ½·tr(σ_i U σ_j U†)."""
    ud = np.conj(np.swapaxes(u, -1, -2))
    return 0.5 * np.real(np.einsum("iab,...bc,jcd,...da->...ij", _SIGMA, u, _SIGMA, ud))


def hanning_sinc_shape(tbw: float, n_steps: int) -> np.ndarray:
    tau = (np.arange(n_steps) + 0.5) / n_steps - 0.5
    return np.sinc(tbw * tau) * 0.5 * (1 + np.cos(2 * np.pi * tau))


def pulse_rotations(shape: np.ndarray, angle_deg: float, offres: np.ndarray,
                    phase_deg: float = 0.0, centre: bool = True) -> np.ndarray:
    """(P, 3, 3) rotations of a pulse at off-resonances ``offres`` (rad of precession over
    the whole pulse), referred to the pulse centre (``centre``; else from its start to its
    end). B1 along x rotated by ``phase_deg`` about z; ``shape`` scaled so that the
    on-resonance rotation is ``angle_deg``."""
    n = shape.size
    amp = np.deg2rad(angle_deg) * shape / shape.sum()            # rotation per step
    w = np.asarray(offres, float)[:, None] / n * np.ones(n)       # precession per step
    ph = np.deg2rad(phase_deg)
    u = np.broadcast_to(np.eye(2, dtype=complex), (w.shape[0], 2, 2)).copy()
    for k in range(n):
        vec = np.stack([amp[k] * np.cos(ph) * np.ones_like(w[:, k]),
                        amp[k] * np.sin(ph) * np.ones_like(w[:, k]), w[:, k]], -1)
        phi = np.linalg.norm(vec, axis=-1)
        axis = vec / np.where(phi > 0, phi, 1.0)[:, None]
        u = su2(axis, phi) @ u
    if not centre:
        return so3(u)
    back = su2(np.array([0.0, 0.0, 1.0]), -0.5 * np.asarray(offres, float))  # undo T/2 each side
    return so3(back @ u @ back)


def slice_cpmg(n_echoes: int, esp: float, t2: float, t1: float, b1: float = 1.0,
               tbw: float = 3.0, ratio: float = 1.0, excite_deg: float = 90.0,
               refocus_deg: float = 180.0, positions: int = 801, half_width: float = 2.0,
               n_iso: int | None = None, n_steps: int = 256) -> np.ndarray:
    """Magnitude echo train of a slice (module docstring); echo k at k·ESP.

    ``positions`` equally spaced across ±``half_width`` excitation slice thicknesses;
    ``n_iso`` isochromats per position (default 4·n_echoes + 3).
    """
    n_iso = n_iso or 4 * n_echoes + 3
    x = np.linspace(-half_width, half_width, positions)
    shape = hanning_sinc_shape(tbw, n_steps)
    r_exc = pulse_rotations(shape, b1 * excite_deg, 2 * np.pi * x * tbw, phase_deg=0.0)
    r_ref = pulse_rotations(shape, b1 * refocus_deg, 2 * np.pi * x / ratio * tbw,
                            phase_deg=90.0)
    phi = 2 * np.pi * np.arange(n_iso) / n_iso
    c, s = np.cos(phi), np.sin(phi)
    m = np.zeros((positions, n_iso, 3))
    m[..., 2] = 1.0
    m = np.einsum("pij,pnj->pni", r_exc, m)
    e1, e2 = np.exp(-esp / 2 / t1), np.exp(-esp / 2 / t2)

    def relax(v):
        mx, my, mz = v[..., 0], v[..., 1], v[..., 2]
        return np.stack([(c * mx - s * my) * e2, (s * mx + c * my) * e2,
                         mz * e1 + (1 - e1)], -1)

    out = []
    for _ in range(n_echoes):
        m = relax(m)
        m = np.einsum("pij,pnj->pni", r_ref, m)
        m = relax(m)
        out.append(abs(m[..., 0].sum() + 1j * m[..., 1].sum()) / (positions * n_iso))
    return np.array(out)
