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
  stored at the pulse times (positive orders, negative orders, Z̃), state-major
  and voxel-minor, in blocks of voxels small enough to stay in cache.
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


_CHUNK = 4096  # voxels per block: keeps the (states × voxels) arrays in cache


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
    out = np.empty((3 if derivs else 1, n, nv))
    for lo in range(0, nv, _CHUNK):
        sl = slice(lo, min(lo + _CHUNK, nv))
        _recursion(n, esp, t2[sl], t1[sl], alpha[sl], dalpha[sl], f0[sl], df0[sl],
                   out[:, :, sl])
    if not signed:                             # magnitude; d|S| = sign(S)·dS (sign 0 taken as +)
        neg = out[0] < 0
        out = np.where(neg, -out, out)
    res = [np.ascontiguousarray(o.T).reshape(shape + (n,)) for o in out]
    return tuple(res) if derivs else res[0]


def _pulse_relax(a, b, z, u, d, w, s2e2, sae2, e2, ca1, hsa1) -> None:
    """Refocusing pulse then ESP of relaxation, in place on (F_+, F_−, Z̃) given u = F_− − F_+.

    F_+ ← e2·(F_+ + s²·u − sin α·Z̃), F_− ← e2·(F_− − s²·u + sin α·Z̃),
    Z̃ ← e1·(cos α·Z̃ − ½ sin α·u), the relaxation factors folded into the coefficients.
    ``d`` and ``w`` are scratch arrays of the same shape.
    """
    np.multiply(s2e2, u, out=d)
    np.multiply(sae2, z, out=w)
    a *= e2
    a += d
    a -= w
    b *= e2
    b -= d
    b += w
    z *= ca1
    np.multiply(hsa1, u, out=d)
    z -= d


def _recursion(n: int, esp: float, t2, t1, alpha, dalpha, f0, dfdb, out) -> None:
    """EPG state recursion for one block of voxels, written into ``out`` (1 or 3, n, nv).

    ``alpha``: refocusing angle (rad) per voxel; ``f0``: transverse magnetisation after the
    excitation; ``dalpha``, ``dfdb``: their derivatives in the scale parameter B1.
    States live in buffers indexed so that the order shift between pulses is a change
    of offset, not a copy: positive orders F_+(2j+1) at ``pos[pp + j]`` (pp falls by one
    per pulse, the new F_+1 being the old F_−1), negative orders F_−(2j+1) at
    ``neg[qq + j]`` (qq rises by one), Z̃_(2j+1) at ``zz[j]``. Relaxation over ESP is
    folded into the pulse coefficients. Derivative states (d/dT2, d/dB1) are carried
    in the same layout with a leading axis of 2.
    """
    derivs = out.shape[0] == 3
    nv = t2.size
    sa, ca = np.sin(alpha), np.cos(alpha)
    s2 = np.sin(0.5 * alpha) ** 2
    hsa = 0.5 * sa
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        e2h = np.exp(-0.5 * esp / t2)          # F relaxation over ESP/2
        e1 = np.exp(-esp / t1)                 # Z relaxation over ESP (regrowth never echoes)
        r2 = esp / t2 ** 2                     # d ln(e2)/dT2 (e2 = e2h²)
        r2 = np.where(np.isfinite(r2), r2, 0.0)
    e2 = e2h * e2h
    s2e2, sae2 = s2 * e2, sa * e2
    ca1, hsa1 = ca * e1, hsa * e1

    nj = (n + 1) // 2 + 1                      # active states min(p, N − p + 1) ≤ ⌈N/2⌉
    pos = np.zeros((n + 1, nv))                # slots pp + j ≤ n
    neg = np.zeros((n + 1, nv))                # slots qq + j ≤ n − 1; never-used slots stay 0
    zz = np.zeros((nj, nv))
    tu = np.empty((nj, nv))
    td = np.empty((nj, nv))
    tw = np.empty((nj, nv))
    pp, qq = n, 0
    # The excitation puts f0 on the CPMG axis, then ESP/2 to pulse 1.
    pos[pp] = f0 * e2h
    if derivs:
        gpos = np.zeros((2,) + pos.shape)
        gneg = np.zeros((2,) + neg.shape)
        gzz = np.zeros((2,) + zz.shape)
        gu = np.empty((2, nj, nv))
        gd = np.empty((2, nj, nv))
        gw = np.empty((2, nj, nv))
        gpos[0, pp] = f0 * e2h * (0.5 * r2)    # d e2h/dT2 = e2h·ESP/(2·T2²)
        gpos[1, pp] = dfdb * e2h
        ds2 = hsa * dalpha                     # d s²/dB1
        dsa = ca * dalpha
        dca = -sa * dalpha
        ds2e2, dsae2 = ds2 * e2, dsa * e2
        dca1, hdsa1 = dca * e1, 0.5 * dsa * e1
        de2h = e2h * (0.5 * r2)

    for p in range(1, n + 1):
        m = min(p, n - p + 1)                  # states that can still reach an echo
        a, b, z = pos[pp:pp + m], neg[qq:qq + m], zz[:m]
        u, d, w = tu[:m], td[:m], tw[:m]
        np.subtract(b, a, out=u)
        # Echo p: F_−1 just after the pulse, relaxed over ESP/2, is F_0.
        fm1 = b[0] - s2 * u[0] + sa * z[0]
        out[0, p - 1] = e2h * fm1
        if derivs:
            ga, gb, gz = gpos[:, pp:pp + m], gneg[:, qq:qq + m], gzz[:, :m]
            gu_, gd_, gw_ = gu[:, :m], gd[:, :m], gw[:, :m]
            np.subtract(gb, ga, out=gu_)
            g_fm1 = gb[:, 0] - s2 * gu_[:, 0] + sa * gz[:, 0]
            out[1, p - 1] = e2h * g_fm1[0] + de2h * fm1
            out[2, p - 1] = e2h * (g_fm1[1] - ds2 * u[0] + dsa * z[0])
            if p < n:
                # linear part, then the pulse-coefficient terms of d/dB1 (need old a, b, z, u)
                _pulse_relax(ga, gb, gz, gu_, gd_, gw_, s2e2, sae2, e2, ca1, hsa1)
                np.multiply(ds2e2, u, out=gd_[0])
                np.multiply(dsae2, z, out=gw_[0])
                gd_[0] -= gw_[0]
                ga[1] += gd_[0]
                gb[1] -= gd_[0]
                np.multiply(dca1, z, out=gd_[0])
                np.multiply(hdsa1, u, out=gw_[0])
                gd_[0] -= gw_[0]
                gz[1] += gd_[0]
        if p == n:
            break
        _pulse_relax(a, b, z, u, d, w, s2e2, sae2, e2, ca1, hsa1)
        if derivs:                             # d(e2)/dT2 = e2·r2 times the new (relaxed) F
            np.multiply(r2, a, out=d)
            ga[0] += d
            np.multiply(r2, b, out=d)
            gb[0] += d
        # Orders move by +2: the old F_−1 becomes F_+1, every other state keeps its slot.
        pp -= 1
        pos[pp] = b[0]
        if derivs:
            gpos[:, pp] = gb[:, 0]
        qq += 1


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
