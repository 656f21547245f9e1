"""Batched Levenberg–Marquardt over voxels (numpy), with per-voxel damping and stopping.

Every voxel runs its own damped Gauss–Newton iteration (Levenberg 1944, Q Appl Math
2:164; Marquardt 1963, J Soc Ind Appl Math 11:431): the step solves

    (JᵀJ + λ·diag(JᵀJ)) δ = −Jᵀr

and is accepted only if it lowers that voxel's cost (λ ← λ/10), otherwise it is
rejected (λ ← λ·10). Bounds are kept by projecting the trial point into the box.
All work is vectorised over the voxels still iterating; a voxel's trajectory does not
depend on which other voxels share its batch (no cross-voxel state), so chunked and
unchunked fits give identical results.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fitting.spec import Fixed, ModelSpec, subset_fixed

FD_REL_STEP = 1e-6
# A voxel whose cost fell by less than STALL_RTOL (relative) over STALL_ITER iterations has
# stopped improving (every trial step rejected, none small enough to call it a minimum):
# it stops, not converged, instead of running to the iteration limit.
STALL_ITER = 10
STALL_RTOL = 1e-9
MAX_ITER, XTOL, FTOL, LAM0 = 60, 1e-8, 1e-10, 1e-3    # defaults of both iterations


@dataclass
class LMResult:
    params: np.ndarray      # (N, P)
    cost: np.ndarray        # (N,) sum of squared residuals
    converged: np.ndarray   # (N,) bool
    n_iter: np.ndarray      # (N,) iterations used


def jacobian(spec: ModelSpec, x: np.ndarray, p: np.ndarray, fixed: Fixed,
             f0: np.ndarray | None = None, central: bool = False) -> np.ndarray:
    """dS/dp as (N, M, P): the spec's analytic Jacobian, else finite differences.

    A ``scale_param`` (S ∝ M0) is differentiated exactly as S/M0 (evaluated at M0 = 1
    so M0 = 0 is safe). Other columns use forward (or central) differences with a
    relative step, pulled back inside the bounds.
    """
    if spec.jacobian is not None:
        return spec.jacobian(x, spec.unpack(p), fixed)
    if f0 is None:
        f0 = spec.evaluate(x, p, fixed)
    jac = np.empty(f0.shape + (p.shape[1],))
    hi = spec.upper_array
    for i, name in enumerate(spec.params):
        if name == spec.scale_param:
            q = p.copy()
            q[:, i] = 1.0
            jac[..., i] = spec.evaluate(x, q, fixed)
            continue
        h = FD_REL_STEP * np.maximum(np.abs(p[:, i]), 1e-3)
        if central:
            qp, qm = p.copy(), p.copy()
            qp[:, i] += h
            qm[:, i] -= h
            jac[..., i] = (spec.evaluate(x, qp, fixed) - spec.evaluate(x, qm, fixed)) \
                / (2 * h)[:, None]
            continue
        # step away from the upper bound when a forward step would cross it
        h = np.where(p[:, i] + h > hi[i], -h, h)
        q = p.copy()
        q[:, i] += h
        jac[..., i] = (spec.evaluate(x, q, fixed) - f0) / h[:, None]
    return jac


def normal_matrix(jac: np.ndarray) -> np.ndarray:
    """JᵀJ per voxel, (N, M, P) -> (N, P, P); column pairs are faster than a 3-index einsum."""
    n, _, npar = jac.shape
    out = np.empty((n, npar, npar))
    for i in range(npar):
        for k in range(i, npar):
            out[:, i, k] = out[:, k, i] = np.einsum("nm,nm->n", jac[:, :, i], jac[:, :, k])
    return out


def solve_small(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve batched symmetric positive (semi)definite systems (N, P, P) x = (N, P).

    Cholesky-free Gaussian elimination vectorised over N (P is tiny, so a Python loop
    over P beats per-matrix LAPACK calls); singular pivots give a zero component.
    """
    a = a.copy()
    b = b.copy()
    n, p = b.shape
    for k in range(p):
        piv = a[:, k, k]
        safe = np.where(np.abs(piv) > 1e-300, piv, np.inf)
        for i in range(k + 1, p):
            f = a[:, i, k] / safe
            a[:, i, k:] -= f[:, None] * a[:, k, k:]
            b[:, i] -= f * b[:, k]
    out = np.zeros_like(b)
    for k in range(p - 1, -1, -1):
        s = b[:, k] - np.einsum("nj,nj->n", a[:, k, k + 1:], out[:, k + 1:])
        piv = a[:, k, k]
        out[:, k] = np.where(np.abs(piv) > 1e-300, s / np.where(piv == 0, 1.0, piv), 0.0)
    return out


def levenberg_marquardt(spec: ModelSpec, x: np.ndarray, data: np.ndarray, p0: np.ndarray,
                        fixed: Fixed, max_iter: int = MAX_ITER, xtol: float = XTOL,
                        ftol: float = FTOL, lam0: float = LAM0,
                        damping: str = "marquardt") -> LMResult:
    """Fit ``spec`` to ``data`` (N, M) from ``p0`` (N, P) voxel by voxel, batched.

    ``damping``: ``"marquardt"`` divides λ by 10 after an accepted step and multiplies it
    by 10 after a rejected one; ``"nielsen"`` scales λ by max(1/3, 1 − (2ρ − 1)³) after an
    accepted step (ρ: actual over predicted cost reduction) and by 2, 4, 8, ... after
    successive rejections (Nielsen 1999, IMM-REP-1999-05; Madsen, Nielsen & Tingleff 2004,
    Methods for non-linear least squares problems, eq. 2.21). Nielsen's rule avoids the
    accept/reject zig-zag in long curved valleys (``mese``'s T2–B1–M0 trade-off at
    moderate SNR) and is opted into per model (``ModelSpec.extra["lm_options"]``).

    Stops a voxel when an accepted step changes the cost by less than ``ftol`` (relative)
    or every parameter by less than ``xtol`` (relative), or when a rejected trial step
    is already below ``xtol`` (the point is a minimum within tolerance). Voxels still
    running after ``max_iter``, or whose cost fell by less than :data:`STALL_RTOL` over
    :data:`STALL_ITER` iterations, are reported as not converged.
    :func:`fitting.kernels.lm_voxel` is the compiled per-voxel form of this iteration.
    """
    x = np.asarray(x, float)
    y = np.asarray(data, float)
    lo, hi = spec.lower_array, spec.upper_array
    p = np.clip(np.asarray(p0, float), lo, hi)
    n, npar = p.shape
    f = spec.evaluate(x, p, fixed)
    r = f - y
    cost = np.einsum("nm,nm->n", r, r)
    lam = np.full(n, lam0)
    nu = np.full(n, 2.0)          # Nielsen's rejection multiplier
    converged = np.zeros(n, bool)
    n_iter = np.zeros(n, int)
    bad = ~np.isfinite(cost)
    active = np.flatnonzero(~bad)
    need_jac = np.ones(n, bool)
    jtj = np.zeros((n, npar, npar))
    jtr = np.zeros((n, npar))
    stall_ref = cost.copy()
    for it in range(max_iter):
        if active.size == 0:
            break
        fx = subset_fixed(spec, fixed, active)
        # Jacobian only where the point moved since the last evaluation
        upd = active[need_jac[active]]
        if upd.size:
            fxu = subset_fixed(spec, fixed, upd)
            j = jacobian(spec, x, p[upd], fxu, f0=f[upd])
            jtj[upd] = normal_matrix(j)
            jtr[upd] = np.einsum("nmi,nm->ni", j, r[upd])
            need_jac[upd] = False
        a = jtj[active]
        d = np.einsum("nii->ni", a)
        d = np.maximum(d, 1e-12 * np.maximum(d.max(axis=1, keepdims=True), 1e-300))
        la = lam[active]
        a = a + (la[:, None] * d)[:, :, None] * np.eye(npar)[None]
        step = solve_small(a, -jtr[active])
        pa = p[active]
        trial = np.clip(pa + step, lo, hi)
        f_t = spec.evaluate(x, trial, fx)
        r_t = f_t - y[active]
        cost_t = np.einsum("nm,nm->n", r_t, r_t)
        ca = cost[active]
        ok = np.isfinite(cost_t) & (cost_t < ca)
        rel_step = np.max(np.abs(trial - pa) / (np.abs(pa) + xtol), axis=1)
        small_step = rel_step <= xtol
        small_cost = ok & ((ca - cost_t) <= ftol * ca)
        idx_ok = active[ok]
        p[idx_ok] = trial[ok]
        f[idx_ok] = f_t[ok]
        r[idx_ok] = r_t[ok]
        cost[idx_ok] = cost_t[ok]
        need_jac[idx_ok] = True
        if damping == "nielsen":
            dstep = trial - pa
            pred = -2.0 * np.einsum("ni,ni->n", dstep, jtr[active]) \
                - np.einsum("ni,nij,nj->n", dstep, jtj[active], dstep)
            with np.errstate(invalid="ignore", divide="ignore"):
                rho = (ca - cost_t) / pred
            rho = np.where(np.isfinite(rho), rho, 0.0)
            fac = np.maximum(1.0 / 3.0, 1.0 - (2.0 * rho - 1.0) ** 3)
            lam[active] = np.where(ok, la * fac, la * nu[active])
            nu[active] = np.where(ok, 2.0, 2.0 * nu[active])
        else:
            lam[active] = np.where(ok, la * 0.1, la * 10.0)
        lam[active] = np.clip(lam[active], 1e-12, 1e12)
        n_iter[active] += 1
        done = small_step | small_cost | (cost_t == 0) | (ca == 0)
        converged[active[done]] = True
        keep = ~done
        if (it + 1) % STALL_ITER == 0:
            ia = active[keep]
            keep[keep] = ~(cost[ia] > stall_ref[ia] * (1.0 - STALL_RTOL))
            stall_ref[active] = cost[active]
        active = active[keep]
    return LMResult(params=p, cost=cost, converged=converged & ~bad, n_iter=n_iter)
