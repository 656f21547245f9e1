"""CPMG multi-echo spin-echo signal by extended phase graphs (EPG).

The magnetisation of a voxel whose spins are dephased by identical gradient lobes
is written as a sum of configuration states (Hennig 1988, J Magn Reson 78:397;
Weigel 2015, J Magn Reson Imaging 41:266): transverse states F_k (dephasing order
k, positive and negative) and longitudinal states Z_k. Between pulses every
state relaxes and each gradient lobe moves F_k to F_(k+1); a pulse mixes the
three states of the same |k|. Echoes are the F_0 state at the echo times.

Phase convention used here (the CPMG condition): the refocusing pulses rotate
about the axis on which the excitation put the magnetisation. With that choice
the matrix of every pulse is real and the states F_k that build the echoes stay
real (Weigel 2015, section on CPMG). Writing c² = cos²(α/2), s² = sin²(α/2),
a refocusing pulse of angle α acts on (F_k, F_−k, Z̃_k) as

    F_k'  = c²·F_k + s²·F_−k − sin α·Z̃_k
    F_−k' = s²·F_k + c²·F_−k + sin α·Z̃_k
    Z̃_k'  = ½ sin α·(F_k − F_−k) + cos α·Z̃_k

(Weigel 2015, eq. 15 with phase 0 and Z̃ = i·Z). Relaxation over a time t
multiplies F by e^(−t/T2) and Z by e^(−t/T1).

Implementation notes
--------------------
* Dephasing is one order per ESP/2 lobe, so just before each refocusing pulse
  only odd orders k = 2j+1 exist and at echo times only even ones. States are
  stored at the pulse times as three arrays over j (positive orders F_+, negative
  orders F_−, Z̃), state-major and voxel-minor for contiguous slices.
* After pulse n (1-based) of N, a state of order 2j+1 cannot reach F_0 before
  echo n + j, so only j ≤ N − n is propagated: at most ⌈N/2⌉ states, and a loop
  over echoes (never over voxels or states).
* Longitudinal magnetisation present when a refocusing pulse arrives (left by an
  excitation that is not exactly 90°, or regrown by T1) is tipped onto the axis
  perpendicular to the CPMG axis as an order-0 state at the *pulse* time. Such
  states have even orders at pulse times and hence odd orders at echo times, so
  they never reach F_0 at an echo: the echo lies entirely on the CPMG axis, and
  Z_0 need not be tracked (checked against isochromats in ``tests/test_epg.py``).
* The echo on the CPMG axis is real but not always positive: with T2 of the
  order of ESP, T1 ≫ T2 and α < 180°, late echoes can change sign (stimulated
  pathways stored in Z outlast the spin echoes). Magnitude images record |S|,
  which is what :func:`cpmg_echoes` returns by default (``signed=True`` gives S).
"""
from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from fitting.errors import RelaxlineError


def _check(n_echoes: int, esp: float) -> tuple[int, float]:
    if int(n_echoes) != n_echoes or n_echoes < 1:
        raise RelaxlineError(f"cpmg_echoes: n_echoes must be a positive integer, got {n_echoes!r}")
    esp = float(esp)
    if not esp > 0 or not np.isfinite(esp):
        raise RelaxlineError(f"cpmg_echoes: echo spacing must be a positive number of seconds, got {esp!r}")
    return int(n_echoes), esp


def _simulate(n_echoes: int, esp: float, t2: ArrayLike, t1: ArrayLike, b1: ArrayLike,
              refocus_deg: float, excite_deg: float, m0: ArrayLike, derivs: bool,
              signed: bool):
    """Run the state recursion; returns S (and dS/dT2, dS/dB1 if ``derivs``)."""
    n, esp = _check(n_echoes, esp)
    t2, t1, b1, m0 = np.broadcast_arrays(*(np.asarray(p, dtype=float) for p in (t2, t1, b1, m0)))
    shape = t2.shape
    t2, t1, b1, m0 = (p.reshape(-1) for p in (t2, t1, b1, m0))
    nv = t2.size

    a_ref = np.deg2rad(float(refocus_deg))
    a_exc = np.deg2rad(float(excite_deg))
    alpha = b1 * a_ref
    sa, ca = np.sin(alpha), np.cos(alpha)
    s2 = np.sin(0.5 * alpha) ** 2
    hsa = 0.5 * sa
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        e2h = np.exp(-0.5 * esp / t2)          # F relaxation over ESP/2
        e1 = np.exp(-esp / t1)                 # Z relaxation over ESP (no regrowth: see module doc)
        de2h = e2h * (0.5 * esp) / t2 ** 2      # d e2h / dT2
        de2h = np.where(np.isfinite(de2h), de2h, 0.0)
    e2 = e2h * e2h
    de2 = 2.0 * e2h * de2h

    nj = (n + 1) // 2 + 1                      # max active states is min(n, N − n + 1) ≤ ⌈N/2⌉
    fp = np.zeros((nj, nv))                    # F_(+(2j+1)) just before a pulse
    fm = np.zeros((nj, nv))                    # F_(−(2j+1))
    zz = np.zeros((nj, nv))                    # Z̃_(2j+1)
    out = np.empty((n, nv))
    # Excitation (angle b1·α_exc) puts M0·sin(b1·α_exc) on the CPMG axis, then ESP/2 to pulse 1.
    f0 = m0 * np.sin(b1 * a_exc)
    fp[0] = f0 * e2h
    if derivs:
        gp = np.zeros((2, nj, nv))             # d/dT2, d/dB1 of fp, fm, zz
        gm = np.zeros((2, nj, nv))
        gz = np.zeros((2, nj, nv))
        d_out = np.empty((2, n, nv))
        gp[0, 0] = f0 * de2h
        gp[1, 0] = m0 * a_exc * np.cos(b1 * a_exc) * e2h
        ds2 = hsa * a_ref                      # d s² / dB1
        dsa = ca * a_ref
        dca = -sa * a_ref

    for p in range(1, n + 1):
        m = min(p, n - p + 1)                  # states that can still reach an echo
        a, b, z = fp[:m], fm[:m], zz[:m]
        u = b - a
        d = s2 * u
        w = sa * z
        new_a = a + d - w
        new_b = b - d + w
        new_z = ca * z - hsa * u
        if derivs:
            ga, gb, gzz = gp[:, :m], gm[:, :m], gz[:, :m]
            gu = gb - ga
            gd = s2 * gu
            gw = sa * gzz
            gd[1] += ds2 * u
            gw[1] += dsa * z
            g_new_a = ga + gd - gw
            g_new_b = gb - gd + gw
            g_new_z = ca * gzz - hsa * gu
            g_new_z[1] += dca * z - 0.5 * dsa * u
        # Echo p: F_−1 after the pulse, relaxed over ESP/2, is F_0.
        out[p - 1] = e2h * new_b[0]
        if derivs:
            d_out[:, p - 1] = e2h * g_new_b[:, 0]
            d_out[0, p - 1] += de2h * new_b[0]
        if p == n:
            break
        # ESP to the next pulse: orders move by +2 (F_−1 becomes F_+1), F relaxes by e2, Z by e1.
        mm = min(p + 1, n - p)                 # states needed at the next pulse
        fp[1:mm] = new_a[:mm - 1] * e2
        fp[0] = new_b[0] * e2
        k = min(m - 1, mm)
        fm[:k] = new_b[1:k + 1] * e2
        fm[k:mm] = 0.0
        zz[:min(m, mm)] = new_z[:mm] * e1
        zz[m:mm] = 0.0
        if derivs:
            gp[:, 1:mm] = g_new_a[:, :mm - 1] * e2
            gp[0, 1:mm] += new_a[:mm - 1] * de2
            gp[:, 0] = g_new_b[:, 0] * e2
            gp[0, 0] += new_b[0] * de2
            gm[:, :k] = g_new_b[:, 1:k + 1] * e2
            gm[0, :k] += new_b[1:k + 1] * de2
            gm[:, k:mm] = 0.0
            gz[:, :min(m, mm)] = g_new_z[:, :mm] * e1
            gz[:, m:mm] = 0.0

    if not signed:                             # magnitude; d|S| = sign(S)·dS (sign 0 taken as +)
        neg = out < 0
        out = np.abs(out)
        if derivs:
            d_out = np.where(neg, -d_out, d_out)
    s = out.T.reshape(shape + (n,))
    if not derivs:
        return s
    return (s, d_out[0].T.reshape(shape + (n,)), d_out[1].T.reshape(shape + (n,)))


def cpmg_echoes(n_echoes: int, esp: float, t2: ArrayLike, t1: ArrayLike, b1: ArrayLike = 1.0,
                refocus_deg: float = 180.0, excite_deg: float = 90.0,
                m0: ArrayLike = 1.0, *, signed: bool = False) -> np.ndarray:
    """CPMG echo train by extended phase graphs.

    Excitation of nominal angle ``excite_deg``, then ``n_echoes`` refocusing pulses
    of nominal angle ``refocus_deg`` at times (k − ½)·ESP, echo k at TE = k·ESP.
    Both pulse angles are scaled by ``b1`` (actual/nominal flip angle). Each
    refocusing pulse is flanked by ESP/2 of free precession with relaxation and
    one unit of dephasing (crushers/readout), so that stimulated and indirect
    echoes are modelled (Hennig 1988, J Magn Reson 78:397; Weigel 2015,
    J Magn Reson Imaging 41:266). Special cases: refocusing angle 180° (b1 = 1)
    gives M0·e^(−k·ESP/T2); the first echo is M0·sin(b1·α_exc)·sin²(b1·α/2)·e^(−ESP/T2).

    Parameters
    ----------
    n_echoes : number of echoes N.
    esp : echo spacing in seconds.
    t2, t1 : relaxation times in seconds (``np.inf`` allowed); broadcast with b1, m0 to B.
    b1 : actual/nominal flip-angle ratio.
    refocus_deg, excite_deg : nominal pulse angles in degrees.
    m0 : equilibrium magnetisation (signal scale).
    signed : if True return the signed echo S on the CPMG axis instead of |S|.

    Returns
    -------
    ndarray, shape B + (n_echoes,)
        Echo magnitude |S| (real, nonnegative), the model for magnitude images. The
        whole echo lies on the CPMG axis (see module docstring); S itself is positive
        except in late echoes of trains with T2 ~ ESP ≪ T1 and α < 180°, or when
        b1·excite_deg exceeds 180°.
    """
    return _simulate(n_echoes, esp, t2, t1, b1, refocus_deg, excite_deg, m0, derivs=False,
                     signed=signed)


def cpmg_echoes_jacobian(n_echoes: int, esp: float, t2: ArrayLike, t1: ArrayLike,
                         b1: ArrayLike = 1.0, refocus_deg: float = 180.0,
                         excite_deg: float = 90.0, m0: ArrayLike = 1.0, *,
                         signed: bool = False):
    """Echo train and its exact derivatives with respect to T2 and B1.

    The derivative states d/dT2 and d/dB1 of every configuration state are carried
    through the same recursion (forward-mode differentiation: pulse matrices
    differentiated in b1, relaxation factors in T2), so they are exact to
    rounding. dS/dM0 is S/M0. With the default ``signed=False`` S is |S| and the
    derivatives are those of |S| (sign(S)·dS; at S = 0 the one-sided + branch).

    Returns
    -------
    (S, dS_dT2, dS_dB1), each of shape B + (n_echoes,); see :func:`cpmg_echoes`.
    """
    return _simulate(n_echoes, esp, t2, t1, b1, refocus_deg, excite_deg, m0, derivs=True,
                     signed=signed)
