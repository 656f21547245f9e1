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
real. Writing c² = cos²(α/2), s² = sin²(α/2),
a refocusing pulse of angle α acts on (F_k, F_−k, Z̃_k) as

    F_k'  = c²·F_k + s²·F_−k − sin α·Z̃_k
    F_−k' = s²·F_k + c²·F_−k + sin α·Z̃_k
    Z̃_k'  = ½ sin α·(F_k − F_−k) + cos α·Z̃_k

(the EPG rotation matrix of Weigel 2015 for pulse phase 0, rewritten with
Z̃ = i·Z; F_−k here is the conjugate state F⁻_k, real in this convention). Relaxation over a time t
multiplies F by e^(−t/T2) and Z by e^(−t/T1).

Implementation notes
--------------------
* Dephasing is one order per ESP/2 lobe, so just before each refocusing pulse
  only odd orders k = 2j+1 exist and at echo times only even ones. States are
  stored at the pulse times (positive orders, negative orders, Z̃), one voxel at a
  time in a compiled kernel (:func:`epg_train`, :mod:`fitting.jit`) that the numpy
  functions here run over all voxels and the compiled fitting engine calls directly.
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

import math

import numpy as np
from numpy.typing import ArrayLike

from fitting.errors import RelaxlineError
from fitting.jit import jit


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
    """Both angles scaled by ``b1``; S (and dS/dT2, dS/dB1 if ``derivs``), see :func:`_trains`."""
    b1, m0 = (np.asarray(p, dtype=float) for p in (b1, m0))
    a_ref, a_exc = np.deg2rad(float(refocus_deg)), np.deg2rad(float(excite_deg))
    return _trains(n_echoes, esp, t2, t1, b1 * a_ref, a_ref, m0 * np.sin(b1 * a_exc),
                   m0 * a_exc * np.cos(b1 * a_exc), derivs, signed)


def _trains(n_echoes: int, esp: float, t2: ArrayLike, t1: ArrayLike, alpha: ArrayLike,
            dalpha: ArrayLike, f0: ArrayLike, df0: ArrayLike, derivs: bool, signed: bool):
    """Broadcast, run the recursion block by block.

    ``alpha`` is the actual refocusing angle (rad), ``f0`` the transverse magnetisation
    the excitation leaves on the CPMG axis; ``dalpha``, ``df0`` their derivatives with
    respect to the scale parameter ("B1") whose derivative is returned. Returns S, or
    (S, dS/dT2, dS/dB1) if ``derivs``, each of the broadcast shape + (n_echoes,).
    """
    n, esp = _check(n_echoes, esp)
    arrs = np.broadcast_arrays(*(np.asarray(p, dtype=float)
                                 for p in (t2, t1, alpha, dalpha, f0, df0)))
    shape = arrs[0].shape
    t2, t1, alpha, dalpha, f0, df0 = (p.reshape(-1) for p in arrs)
    nv = t2.size
    out = np.empty((3 if derivs else 1, nv, n))
    _recursion(n, esp, *(np.ascontiguousarray(a) for a in (t2, t1, alpha, dalpha, f0, df0)),
               derivs, out)
    if not signed:                             # magnitude; d|S| = sign(S)·dS (sign 0 taken as +)
        neg = out[0] < 0
        out = np.where(neg, -out, out)
    res = [o.reshape(shape + (n,)) for o in out]
    return tuple(res) if derivs else res[0]


@jit
def epg_train(n, esp, t2, t1, alpha, dalpha, f0, dfdb, derivs, s, dt2, db1, pos, neg, zz,
              gpos, gneg, gzz):
    """EPG state recursion of one voxel: the signed echoes into ``s`` and, if ``derivs``,
    dS/dT2 and dS/dB1 into ``dt2``, ``db1`` (forward-mode: the derivative states are
    carried through the same recursion, so they are exact to rounding).

    ``alpha``: the actual refocusing angle (rad); ``f0``: the transverse magnetisation
    the excitation leaves on the CPMG axis; ``dalpha``, ``dfdb``: their derivatives by
    the scale parameter B1. A refocusing pulse of angle α acts on (F_+, F_−, Z̃) of each
    order as in the module docstring; relaxation over ESP is folded into its
    coefficients: F_+ ← e2·(F_+ + s²·u − sin α·Z̃), F_− ← e2·(F_− − s²·u + sin α·Z̃),
    Z̃ ← e1·(cos α·Z̃ − ½ sin α·u) with u = F_− − F_+. Positive orders F_+(2j+1) live at
    ``pos[pp + j]`` (pp falls by one per pulse, the new F_+1 being the old F_−1),
    negative orders at ``neg[qq + j]`` (qq rises by one), Z̃_(2j+1) at ``zz[j]``, so the
    order shift between pulses is a change of offset; after pulse p only
    min(p, n − p + 1) states can still reach an echo. ``pos``, ``neg`` (n + 1,), ``zz``
    (⌈n/2⌉ + 1,) are work arrays, and ``gpos``, ``gneg`` (2, n + 1), ``gzz``
    (2, ⌈n/2⌉ + 1) for the derivative states (d/dT2, d/dB1).
    """
    sa = math.sin(alpha)
    ca = math.cos(alpha)
    s2 = math.sin(0.5 * alpha) ** 2
    hsa = 0.5 * sa
    e2h = math.exp(-0.5 * esp / t2)
    e1 = math.exp(-esp / t1)
    r2 = esp / t2 ** 2
    if not math.isfinite(r2):
        r2 = 0.0
    e2 = e2h * e2h
    s2e2 = s2 * e2
    sae2 = sa * e2
    ca1 = ca * e1
    hsa1 = hsa * e1
    for i in range(n + 1):
        pos[i] = 0.0
        neg[i] = 0.0
    for i in range(zz.size):
        zz[i] = 0.0
    pp = n
    qq = 0
    pos[pp] = f0 * e2h
    if derivs:
        for k in range(2):
            for i in range(n + 1):
                gpos[k, i] = 0.0
                gneg[k, i] = 0.0
            for i in range(zz.size):
                gzz[k, i] = 0.0
        gpos[0, pp] = f0 * e2h * (0.5 * r2)
        gpos[1, pp] = dfdb * e2h
    ds2 = hsa * dalpha
    dsa = ca * dalpha
    dca = -sa * dalpha
    ds2e2 = ds2 * e2
    dsae2 = dsa * e2
    dca1 = dca * e1
    hdsa1 = 0.5 * dsa * e1
    de2h = e2h * (0.5 * r2)
    for p in range(1, n + 1):
        m = min(p, n - p + 1)
        u0 = neg[qq] - pos[pp]
        fm1 = neg[qq] - s2 * u0 + sa * zz[0]
        s[p - 1] = e2h * fm1
        if derivs:
            gu0 = gneg[0, qq] - gpos[0, pp]
            gu1 = gneg[1, qq] - gpos[1, pp]
            g0 = gneg[0, qq] - s2 * gu0 + sa * gzz[0, 0]
            g1 = gneg[1, qq] - s2 * gu1 + sa * gzz[1, 0]
            dt2[p - 1] = e2h * g0 + de2h * fm1
            db1[p - 1] = e2h * (g1 - ds2 * u0 + dsa * zz[0])
        if p == n:
            break
        for j in range(m):
            a = pos[pp + j]
            b = neg[qq + j]
            z = zz[j]
            u = b - a
            d = s2e2 * u
            w = sae2 * z
            na = a * e2 + d - w
            nb = b * e2 - d + w
            nz = z * ca1 - hsa1 * u
            if derivs:
                # d/dT2: the same pulse, plus d(e2)/dT2 = e2·r2 times the new (relaxed) F
                ga = gpos[0, pp + j]
                gb = gneg[0, qq + j]
                gz = gzz[0, j]
                gu = gb - ga
                gd = s2e2 * gu
                gw = sae2 * gz
                gpos[0, pp + j] = ga * e2 + gd - gw + r2 * na
                gneg[0, qq + j] = gb * e2 - gd + gw + r2 * nb
                gzz[0, j] = gz * ca1 - hsa1 * gu
                # d/dB1: the same pulse, plus the pulse coefficients' derivatives
                ga = gpos[1, pp + j]
                gb = gneg[1, qq + j]
                gz = gzz[1, j]
                gu = gb - ga
                gd = s2e2 * gu
                gw = sae2 * gz
                t = ds2e2 * u - dsae2 * z
                gpos[1, pp + j] = ga * e2 + gd - gw + t
                gneg[1, qq + j] = gb * e2 - gd + gw - t
                gzz[1, j] = gz * ca1 - hsa1 * gu + (dca1 * z - hdsa1 * u)
            pos[pp + j] = na
            neg[qq + j] = nb
            zz[j] = nz
        pp -= 1
        pos[pp] = neg[qq]
        if derivs:
            gpos[0, pp] = gneg[0, qq]
            gpos[1, pp] = gneg[1, qq]
        qq += 1


@jit
def _recursion(n, esp, t2, t1, alpha, dalpha, f0, dfdb, derivs, out):
    """:func:`epg_train` of every voxel: ``out`` (1 or 3, N, n) gets S (and dS/dT2, dS/dB1)."""
    nj = (n + 1) // 2 + 1
    pos, neg, zz = np.empty(n + 1), np.empty(n + 1), np.empty(nj)
    gpos, gneg, gzz = np.empty((2, n + 1)), np.empty((2, n + 1)), np.empty((2, nj))
    for i in range(t2.size):
        k = 1 if derivs else 0
        epg_train(n, esp, t2[i], t1[i], alpha[i], dalpha[i], f0[i], dfdb[i], derivs, out[0, i],
                  out[k, i], out[2 * k, i], pos, neg, zz, gpos, gneg, gzz)


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
