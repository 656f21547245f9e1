"""Actual flip-angle imaging (AFI): the interleaved two-TR steady state and its B1.

Two identical excitations α alternate with the intervals TR1 < TR2 (n = TR2/TR1) in a
spoiled gradient-echo sequence; image 1 is read in the TR1 interval, image 2 in TR2.
Solving the Bloch recursion for the steady state with ideal spoiling gives

    S1 = M0·sin α·(1 − E2 + (1 − E1)·E2·cos α) / (1 − E1·E2·cos² α)
    S2 = M0·sin α·(1 − E1 + (1 − E2)·E1·cos α) / (1 − E1·E2·cos² α)

with Ei = e^(−TRi/T1) (Yarnykh 2007, Magn Reson Med 57:192, eqs. 2–3). For TR1, TR2 ≪ T1
the ratio r = S2/S1 depends on α alone,

    r = (1 + n·cos α)/(n + cos α),   so   cos α = (r·n − 1)/(n − r)

the published closed form. Written with the amplitude A = M0·(1 − E1), the pair is

    S1 = A·sin α·(ρ + E2·cos α)/(1 − E1·E2·cos² α),
    S2 = A·sin α·(1 + ρ·E1·cos α)/(1 − E1·E2·cos² α),   ρ = (1 − E2)/(1 − E1),

which stays finite as T1 → ∞ (ρ → n, Ei → 1), where it is exactly the closed form's
model. α is the actual angle: the nominal angle times B1. Imperfect spoiling (which the
published method also neglects) is not modelled.
"""
from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

BISECTION_STEPS = 48     # of α on (0, π): 2⁻⁴⁸·π rad, far below any B1 precision


def _terms(tr1, tr2, t1):
    """(E1, E2, ρ) with the T1 → ∞ limit taken exactly (ρ = TR2/TR1, Ei = 1)."""
    t1 = np.asarray(t1, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        e1, e2 = np.exp(-tr1 / t1), np.exp(-tr2 / t1)
        rho = np.expm1(-tr2 / t1) / np.expm1(-tr1 / t1)
    rho = np.where(np.isfinite(t1), rho, tr2 / tr1)
    return e1, e2, rho


def afi_signals(tr: ArrayLike, b1: ArrayLike, amp: ArrayLike, alpha_deg: float,
                t1: ArrayLike = np.inf) -> np.ndarray:
    """The AFI pair [S1, S2] (last axis) for the intervals ``tr`` = (TR1, TR2), TR1 < TR2.

    ``amp`` is A = M0·(1 − e^(−TR1/T1)) (see the module docstring); ``b1`` scales the
    nominal angle ``alpha_deg``; ``t1`` may be ``np.inf`` (the TR ≪ T1 limit).
    """
    tr1, tr2 = (float(v) for v in np.asarray(tr, float).reshape(-1)[:2])
    b1, amp, t1 = np.broadcast_arrays(*(np.asarray(v, float) for v in (b1, amp, t1)))
    a = np.deg2rad(alpha_deg) * b1
    e1, e2, rho = _terms(tr1, tr2, t1)
    c, s = np.cos(a), np.sin(a)
    den = 1.0 - e1 * e2 * c * c
    with np.errstate(divide="ignore", invalid="ignore"):   # α = 0 or π at T1 = ∞: singular
        return np.stack([amp * s * (rho + e2 * c) / den, amp * s * (1.0 + rho * e1 * c) / den],
                        axis=-1)


def afi_amplitude_to_m0(amp: ArrayLike, tr1: float, t1: ArrayLike) -> np.ndarray:
    """M0 = A/(1 − e^(−TR1/T1))."""
    return np.asarray(amp, float) / -np.expm1(-tr1 / np.asarray(t1, float))


def afi_ratio(alpha_rad: ArrayLike, tr1: float, tr2: float, t1: ArrayLike = np.inf
              ) -> np.ndarray:
    """r = S2/S1 at the actual angle (radians); Yarnykh 2007 eqs. 2–3."""
    e1, e2, rho = _terms(tr1, tr2, t1)
    c = np.cos(alpha_rad)
    return (1.0 + rho * e1 * c) / (rho + e2 * c)


def afi_b1(s1: ArrayLike, s2: ArrayLike, tr1: float, tr2: float, alpha_deg: float,
           t1: ArrayLike = np.inf) -> np.ndarray:
    """B1 (actual/nominal angle) from an AFI pair.

    T1 = ∞: the closed form cos α = (r·n − 1)/(n − r) (Yarnykh 2007). Finite T1 (scalar
    or per voxel): r(α) of :func:`afi_ratio` is inverted by bisection on (0, π) (it
    falls monotonically from r(0) to r(π)). A ratio above r(0) gives α = 0 (the caller
    flags it); one below r(π), which no angle produces, and S1 ≤ 0 give NaN.
    """
    s1 = np.asarray(s1, float)
    s2 = np.asarray(s2, float)
    t1 = np.broadcast_to(np.asarray(t1, float), s1.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = s2 / s1
        n = tr2 / tr1
        closed = np.arccos(np.clip((r * n - 1.0) / (n - r), -1.0, 1.0))
    finite = np.isfinite(t1)
    alpha = closed
    if np.any(finite):
        lo = np.zeros(s1.shape)
        hi = np.full(s1.shape, np.pi)
        for _ in range(BISECTION_STEPS):
            mid = 0.5 * (lo + hi)
            above = afi_ratio(mid, tr1, tr2, t1) > r     # ratio still too high: larger α
            lo = np.where(above, mid, lo)
            hi = np.where(above, hi, mid)
        alpha = np.where(finite, 0.5 * (lo + hi), closed)
    reachable = r >= afi_ratio(np.pi, tr1, tr2, t1)
    return np.where((s1 > 0) & np.isfinite(r) & reachable, alpha / np.deg2rad(alpha_deg),
                    np.nan)
