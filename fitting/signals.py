"""Closed-form signal equations (pure, vectorised numpy).

Broadcasting convention used throughout ``fitting``: the acquisition variable
(TI, flip angle or TE) is a 1D array of length M that maps to the *last* axis;
the tissue/scanner parameters broadcast together to a shape B (for example
(N,) voxels, or scalars). The result has shape ``B + (M,)``. Times in seconds,
angles in degrees.

Each formula is written once, as a compiled kernel of one voxel's train (``*_train``,
:mod:`fitting.jit`: the signal at every acquisition value and, on request, its exact
derivatives by the parameters) that the compiled per-voxel engine (:mod:`fitting.kernels`)
calls directly; the numpy functions here run the same kernel over the broadcast
parameters, and every other caller (the numpy reference engine, the lmfit models, QC
curves, protocol design) goes through them.

The extended-phase-graph CPMG model lives in :mod:`fitting.epg`.
"""
from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike

from fitting.jit import _flat_broadcast, jit, train_apply

_DEG = math.pi / 180.0


def _prep(x: ArrayLike, *params: ArrayLike):
    """x as (M,), parameters broadcast to B and given a trailing axis."""
    x = np.asarray(x, dtype=float)
    if x.ndim != 1:
        x = x.reshape(-1)
    ps = np.broadcast_arrays(*[np.asarray(p) for p in params])
    return x, [p[..., None] for p in ps]


def ir_signal(ti: ArrayLike, t1: ArrayLike, m0: ArrayLike, eff: ArrayLike = 1.0,
              tr: ArrayLike = np.inf, alpha_deg: ArrayLike = 90.0) -> np.ndarray:
    """Steady-state inversion recovery with imperfect inversion and finite TR.

    One inversion pulse, a wait TI, one excitation of angle α (spoiled afterwards)
    and recovery until the next inversion TR after the previous one. The inversion
    efficiency ``eff`` = −cos θ_inv (1 for an ideal 180° pulse, 0 for none) turns
    Mz into −eff·Mz. Solving the Bloch recursion for the steady state gives

        S(TI) = M0·sin α · [1 − (1 + eff)·e^(−TI/T1) + eff·e^(−TR/T1)]
                / [1 + eff·cos α·e^(−TR/T1)]

    (Barral et al. 2010, Magn Reson Med 64:1057, eq. 1 family; with eff = 1,
    α = 90° and TR → ∞ this is the textbook S = M0·(1 − 2·e^(−TI/T1)), which
    crosses zero at TI = T1·ln 2). For fixed T1 it is linear in two constants:
    S = a + b·e^(−TI/T1) (see :func:`ir_signal_ab`), the basis of the
    reduced-dimension fit. The signal is signed (real); magnitude data are |S|.
    TI, TR and T1 in seconds, α in degrees.
    """
    return train_apply(_ir_loop, ti, t1, m0, eff, tr, alpha_deg)


@jit
def ir_train(ti, t1: float, m0: float, eff: float, tr: float, alpha_deg: float, out, jac):
    """:func:`ir_signal` of one voxel at every TI of ``ti`` into ``out`` (the compiled
    kernel; formula in its docstring); with ``jac`` of shape (M, 3) also the exact
    derivatives by (T1, M0, eff) (a (0, 0) ``jac`` skips them).

    With E = e^(−TI/T1), E_R = e^(−TR/T1), N = 1 − (1 + eff)·E + eff·E_R and
    D = 1 + eff·cos α·E_R: S = M0·sin α·N/D, dE/dT1 = E·TI/T1², dE_R/dT1 = E_R·TR/T1².
    """
    a = alpha_deg * _DEG
    sa = math.sin(a)
    ca = math.cos(a)
    e_tr = math.exp(-tr / t1)
    den = 1.0 + eff * ca * e_tr
    grad = jac.shape[0] > 0
    if grad:
        de_tr = e_tr * tr / (t1 * t1) if e_tr > 0.0 else 0.0     # TR = inf: E_R = 0
        dden_t1 = eff * ca * de_tr
        dden_eff = ca * e_tr
    for j in range(ti.size):
        e = math.exp(-ti[j] / t1)
        num = 1.0 - (1.0 + eff) * e + eff * e_tr
        out[j] = m0 * sa * num / den
        if grad:
            dnum_t1 = -(1.0 + eff) * e * ti[j] / (t1 * t1) + eff * de_tr
            jac[j, 0] = m0 * sa * (dnum_t1 * den - num * dden_t1) / (den * den)
            jac[j, 1] = sa * num / den
            jac[j, 2] = m0 * sa * ((e_tr - e) * den - num * dden_eff) / (den * den)


@jit
def _ir_loop(ti, t1, m0, eff, tr, alpha, out):
    none = np.empty((0, 0))
    for i in range(out.shape[0]):
        ir_train(ti, t1[i], m0[i], eff[i], tr[i], alpha[i], out[i], none)


def ir_signal_jacobian(ti: ArrayLike, t1: ArrayLike, m0: ArrayLike, eff: ArrayLike = 1.0,
                       tr: ArrayLike = np.inf, alpha_deg: ArrayLike = 90.0) -> np.ndarray:
    """Exact derivatives of :func:`ir_signal` by (T1, M0, eff), B + (M, 3), from the
    compiled :func:`ir_train` (∂S/∂M0 = S/M0 carries the sign of S)."""
    return _jacobian_apply(_ir_jac_loop, 3, ti, t1, m0, eff, tr, alpha_deg)


def _jacobian_apply(loop, n_params: int, x, *params) -> np.ndarray:
    """Derivatives B + (M, P) from a train kernel's compiled ``loop(x, *flat, out)``."""
    xs = np.ascontiguousarray(np.asarray(x, dtype=float).reshape(-1))
    shape, flat = _flat_broadcast(params)
    out = np.empty(shape + (xs.size, n_params))
    loop(xs, *flat, out.reshape(-1, xs.size, n_params))
    return out


@jit
def _ir_jac_loop(ti, t1, m0, eff, tr, alpha, out):
    s = np.empty(ti.size)
    for i in range(out.shape[0]):
        ir_train(ti, t1[i], m0[i], eff[i], tr[i], alpha[i], s, out[i])


def ir_ab_from_params(t1: ArrayLike, m0: ArrayLike, eff: ArrayLike = 1.0,
                      tr: ArrayLike = np.inf, alpha_deg: ArrayLike = 90.0):
    """The constants (a, b) of S = a + b·e^(−TI/T1) for :func:`ir_signal`'s parameters."""
    t1, m0, eff, tr, alpha = np.broadcast_arrays(*map(np.asarray, (t1, m0, eff, tr, alpha_deg)))
    a_ = np.deg2rad(alpha)
    e_tr = np.exp(-tr / t1)
    k = m0 * np.sin(a_) / (1.0 + eff * np.cos(a_) * e_tr)
    return k * (1.0 + eff * e_tr), -k * (1.0 + eff)


def ir_params_from_ab(t1: ArrayLike, a: ArrayLike, b: ArrayLike, tr: ArrayLike = np.inf,
                      alpha_deg: ArrayLike = 90.0):
    """Invert :func:`ir_ab_from_params`: (M0, eff) from (T1, a, b); exact for finite TR.

    With E = e^(−TR/T1) and K = M0·sin α/(1 + eff·cos α·E):
    K·eff = −(a + b)/(1 − E), K = −b − K·eff.
    """
    t1, a, b, tr, alpha = np.broadcast_arrays(*map(np.asarray, (t1, a, b, tr, alpha_deg)))
    al = np.deg2rad(alpha)
    e_tr = np.exp(-tr / t1)
    with np.errstate(divide="ignore", invalid="ignore"):
        k_eff = -(a + b) / (1.0 - e_tr)
        k = -b - k_eff
        eff = k_eff / k
        m0 = k * (1.0 + eff * np.cos(al) * e_tr) / np.sin(al)
    return m0, eff


def ir_signal_ab(ti: ArrayLike, t1: ArrayLike, a: ArrayLike, b: ArrayLike) -> np.ndarray:
    """Three-parameter inversion recovery S = a + b·e^(−TI/T1).

    The general form to which :func:`ir_signal` reduces for any inversion angle,
    excitation angle and finite TR (Barral et al. 2010, Magn Reson Med 64:1057).
    """
    ti, (t1, a, b) = _prep(ti, t1, a, b)
    return a + b * np.exp(-ti / t1)


def spgr_signal(alpha_deg: ArrayLike, t1: ArrayLike, m0: ArrayLike, tr: ArrayLike,
                b1: ArrayLike = 1.0) -> np.ndarray:
    """Spoiled gradient echo (variable flip angle) steady state.

        S(α) = M0·sin(B1·α)·(1 − E1) / (1 − cos(B1·α)·E1),  E1 = e^(−TR/T1)

    B1 is the ratio of actual to nominal flip angle (Ernst & Anderson 1966,
    Rev Sci Instrum 37:93; Deoni, Rutt & Peters 2003, Magn Reson Med 49:515).
    Peaks at the Ernst angle arccos(E1). T2* decay at the echo time is folded into M0.
    """
    return train_apply(_spgr_loop, alpha_deg, t1, m0, tr, b1)


@jit
def spgr_train(alpha_deg, t1: float, m0: float, tr: float, b1: float, out, jac):
    """:func:`spgr_signal` of one voxel at every flip angle into ``out`` (the compiled
    kernel); with ``jac`` (M, 2) also the exact derivatives by (T1, M0):
    dS/dE1 = M0·sin a·(cos a − 1)/(1 − cos a·E1)², dE1/dT1 = E1·TR/T1²."""
    # TR = inf (full recovery) gives E1 = 0 even for T1 = inf
    e1 = 0.0 if math.isinf(tr) else math.exp(-tr / t1)
    grad = jac.shape[0] > 0
    de1 = e1 * tr / (t1 * t1) if e1 > 0.0 else 0.0
    for j in range(alpha_deg.size):
        a = alpha_deg[j] * _DEG * b1
        sa = math.sin(a)
        ca = math.cos(a)
        out[j] = m0 * sa * (1.0 - e1) / (1.0 - ca * e1)
        if grad:
            den = 1.0 - ca * e1
            jac[j, 0] = m0 * sa * (ca - 1.0) / (den * den) * de1
            jac[j, 1] = sa * (1.0 - e1) / den


@jit
def _spgr_loop(alpha, t1, m0, tr, b1, out):
    none = np.empty((0, 0))
    for i in range(out.shape[0]):
        spgr_train(alpha, t1[i], m0[i], tr[i], b1[i], out[i], none)


def spgr_signal_jacobian(alpha_deg: ArrayLike, t1: ArrayLike, m0: ArrayLike, tr: ArrayLike,
                         b1: ArrayLike = 1.0) -> np.ndarray:
    """Exact derivatives of :func:`spgr_signal` by (T1, M0), B + (M, 2), from the compiled
    :func:`spgr_train`."""
    return _jacobian_apply(_spgr_jac_loop, 2, alpha_deg, t1, m0, tr, b1)


@jit
def _spgr_jac_loop(alpha, t1, m0, tr, b1, out):
    s = np.empty(alpha.size)
    for i in range(out.shape[0]):
        spgr_train(alpha, t1[i], m0[i], tr[i], b1[i], s, out[i])


def ernst_angle_deg(tr: ArrayLike, t1: ArrayLike) -> np.ndarray:
    """Ernst angle arccos(e^(−TR/T1)) in degrees (Ernst & Anderson 1966)."""
    return np.rad2deg(np.arccos(np.exp(-np.asarray(tr, float) / np.asarray(t1, float))))


def dam_signals(alpha_deg: ArrayLike, b1: ArrayLike, m0: ArrayLike = 1.0,
                t1: ArrayLike = np.inf, tr: ArrayLike = np.inf) -> np.ndarray:
    """Double-angle pair [S(α), S(2α)] of a spoiled acquisition, last axis of length 2.

    With TR ≫ T1 (full recovery, the method's assumption) S(θ) = M0·sin(B1·θ), so
    S(2α)/S(α) = 2·cos(B1·α) and B1 = arccos(S(2α)/(2·S(α)))/α
    (Insko & Bolinger 1993, J Magn Reson A 103:82). Finite TR uses :func:`spgr_signal`.
    """
    alpha = float(np.asarray(alpha_deg))
    return spgr_signal(np.array([alpha, 2.0 * alpha]), t1, m0, tr, b1)


def dam_b1(s_alpha: ArrayLike, s_2alpha: ArrayLike, alpha_deg: float,
           e1: ArrayLike = 0.0) -> np.ndarray:
    """B1 ratio from a double-angle pair of spoiled acquisitions with E1 = e^(−TR/T1).

    Full recovery (E1 = 0): B1 = arccos(S(2α)/(2·S(α)))/α (Insko & Bolinger 1993,
    J Magn Reson A 103:82). At finite TR the pair follows :func:`spgr_signal`; with
    c = cos(B1·α) the ratio R = S(2α)/S(α) = 2c·(1 − c·E1)/(1 − (2c² − 1)·E1), a quadratic
    in c: 2·E1·(1 − R)·c² − 2c + R·(1 + E1) = 0, whose root in [0, 1] (c = 1 at R = 2,
    c = 0 at R = 0) is c = C/(1 + √(1 − A·C)) with A = 2·E1·(1 − R), C = R·(1 + E1) —
    derived here from the spoiled steady state (Ernst & Anderson 1966, Rev Sci Instrum
    37:93); E1 = 0 gives the full-recovery formula. Noise pushing the discriminant below 0
    or c out of [−1, 1] is clipped; S(α) ≤ 0 gives NaN.
    """
    s1 = np.asarray(s_alpha, float)
    s2 = np.asarray(s_2alpha, float)
    e1 = np.asarray(e1, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = s2 / s1
        a, c = 2.0 * e1 * (1.0 - r), r * (1.0 + e1)
        cos = np.clip(c / (1.0 + np.sqrt(np.maximum(1.0 - a * c, 0.0))), -1.0, 1.0)
        out = np.arccos(cos) / np.deg2rad(alpha_deg)
    return np.where(s1 > 0, out, np.nan)


def mono_exp(te: ArrayLike, t2: ArrayLike, m0: ArrayLike, plateau: ArrayLike = 0.0) -> np.ndarray:
    """Mono-exponential decay S(TE) = M0·e^(−TE/T2) + plateau.

    The classic multi-echo spin-echo T2 model (``mese-mono``, optional constant
    plateau) and the T2* model of multi-echo gradient echo (``megre``) with T2 → T2*.
    """
    return train_apply(_mono_loop, te, t2, m0, plateau)


@jit
def mono_train(te, t2: float, m0: float, plateau: float, out, jac):
    """:func:`mono_exp` of one voxel at every echo time into ``out`` (the compiled kernel);
    with ``jac`` (M, 2) or (M, 3) also the exact derivatives by (T2, M0[, plateau])."""
    grad = jac.shape[0] > 0
    for j in range(te.size):
        e = math.exp(-te[j] / t2)
        out[j] = m0 * e + plateau
        if grad:
            jac[j, 0] = m0 * e * te[j] / (t2 * t2)
            jac[j, 1] = e
            if jac.shape[1] > 2:
                jac[j, 2] = 1.0


@jit
def _mono_loop(te, t2, m0, plateau, out):
    none = np.empty((0, 0))
    for i in range(out.shape[0]):
        mono_train(te, t2[i], m0[i], plateau[i], out[i], none)
