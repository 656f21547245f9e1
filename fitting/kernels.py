"""Compiled per-voxel fitting: Levenberg–Marquardt with bounds and standard errors (numba).

The ``fast`` engine (:mod:`fitting.voxelwise`) hands a block of voxels to
:func:`fit_block`, which fits them one after the other with the GIL released, so
Python threads fit blocks side by side on every core. Each voxel runs the same damped
Gauss–Newton iteration as the numpy reference engine :func:`fitting.lm.levenberg_marquardt`
(same damping rules, stopping tests and bound projection; exact derivatives from the
model's train kernel where it has them, else the reference's finite differences), then,
if it converged, its standard errors
√diag(σ²(JᵀJ)⁻¹) from the Jacobian at the solution as :func:`fitting.uncertainty.covariance`
computes them. Nothing is shared between voxels, so results are bitwise independent of
the block size and of the number of threads.

Models reach the kernels through :func:`model_train`, which dispatches on a model kind
(:data:`IR`, :data:`SPGR`, :data:`MONO`, ...) to the compiled scalar formulas of
:mod:`fitting.signals` and :mod:`fitting.epg` — the same kernels the numpy functions
apply — so no formula exists twice. Per-voxel constants (TR, angles, a B1 or T1 value)
arrive as one row of a constants array; a model's ``ModelSpec.kernel`` builds it.
Kinds are integers, not function arguments: numba cannot cache a compiled function that
takes another compiled function as an argument.
"""
from __future__ import annotations

import math

import numpy as np

from fitting.jit import jit
from fitting.lm import FD_REL_STEP, STALL_ITER, STALL_RTOL
from fitting.epg import epg_train
from fitting.noise import RICIAN, rician_value
from fitting.signals import ir_train, mono_train, spgr_train

# model kinds (the constants row of each, in order); kind + RICIAN: the Rician expectation
# of the kind's signal given σ, the last constant (fitting.noise.rician_spec)
IR = 1      # inversion recovery: TR, α, signed (0: magnitude |S|)
SPGR = 2    # spoiled gradient echo (vfa): TR, B1
MONO = 3    # mono-exponential (+ plateau when a third parameter is fitted): none
EPG = 4     # CPMG echo train (T2, M0[, B1]): ESP, T1, α_ref, α_exc (rad), B1 when not fitted

CONVERGED, NOT_CONVERGED, BAD_START = 1, 0, -1


def constants(n: int, *columns) -> np.ndarray:
    """The (n, K) constants array of a model kind from K scalars or (n,) arrays."""
    out = np.empty((n, len(columns)))
    for k, col in enumerate(columns):
        out[:, k] = np.broadcast_to(np.asarray(col, dtype=float), (n,))
    return out


@jit
def model_train(kind, x, p, c, out, jac):
    """Signal of one voxel at every acquisition value ``x`` into ``out``; with ``jac``
    (M, P) also its exact derivatives by the parameters (a (0, 0) ``jac``: signal only).
    Returns whether the kind has exact derivatives (else ``jac`` is left untouched)."""
    m = x.size
    base = kind % RICIAN
    exact = True
    if base == IR:
        ir_train(x, p[0], p[1], p[2], c[0], c[1], out, jac)
        if c[2] == 0.0:                     # magnitude |S|; d|S| = sign(S)·dS, + at 0
            for j in range(m):
                if out[j] < 0.0:
                    out[j] = -out[j]
                    for k in range(jac.shape[1] if jac.shape[0] else 0):
                        jac[j, k] = -jac[j, k]
    elif base == SPGR:
        spgr_train(x, p[0], p[1], c[0], c[1], out, jac)
    elif base == MONO:
        mono_train(x, p[0], p[1], p[2] if p.size > 2 else 0.0, out, jac)
    elif base == EPG:
        _epg(x, p, c, out, jac)
    else:
        exact = False
        for j in range(m):
            out[j] = np.nan
    if kind >= RICIAN:                      # E|S| given σ; dE/dp = dE/dν·dν/dp
        sigma = c[c.size - 1]
        for j in range(m):
            mean, slope = rician_value(out[j], sigma)
            out[j] = mean
            if exact:
                for k in range(jac.shape[1] if jac.shape[0] else 0):
                    jac[j, k] *= slope
    return exact


@jit
def _epg(x, p, c, out, jac):
    """|S| of the CPMG train (:func:`fitting.epg.epg_train`, both pulses scaled by B1) and,
    with ``jac`` (M, 2 or 3), d|S|/d(T2, M0[, B1]) — the columns of the numpy model's
    Jacobian: the train at M0 = 1 and its T2/B1 derivatives times M0."""
    n = x.size
    grad = jac.shape[0] > 0
    t2, m0 = p[0], p[1]
    b1 = p[2] if p.size > 2 else c[4]
    a_ref, a_exc = c[2], c[3]
    nj = (n + 1) // 2 + 1
    pos, neg, zz = np.empty(n + 1), np.empty(n + 1), np.empty(nj)
    if not grad:
        gpos, gneg, gzz = np.empty((2, 0)), np.empty((2, 0)), np.empty((2, 0))
        epg_train(n, c[0], t2, c[1], b1 * a_ref, a_ref, m0 * math.sin(b1 * a_exc), 0.0,
                  False, out, out, out, pos, neg, zz, gpos, gneg, gzz)
        for j in range(n):
            out[j] = abs(out[j])
        return
    gpos, gneg, gzz = np.empty((2, n + 1)), np.empty((2, n + 1)), np.empty((2, nj))
    dt2, db1 = np.empty(n), np.empty(n)
    epg_train(n, c[0], t2, c[1], b1 * a_ref, a_ref, math.sin(b1 * a_exc),
              a_exc * math.cos(b1 * a_exc), True, out, dt2, db1, pos, neg, zz, gpos, gneg, gzz)
    for j in range(n):
        sign = -1.0 if out[j] < 0.0 else 1.0     # d|S| = sign(S)·dS, + at 0
        s1 = sign * out[j]
        jac[j, 0] = sign * dt2[j] * m0
        jac[j, 1] = s1
        if jac.shape[1] > 2:
            jac[j, 2] = sign * db1[j] * m0
        out[j] = m0 * s1


@jit
def _jacobian(kind, x, p, c, f0, hi, scale, jac, q, fq, none):
    """dS/dp (M, P) at ``p`` (``f0``: the signal there): exact where the kind has
    derivatives, else forward differences pulled inside the upper bound with the scale
    parameter exact as S at M0 = 1 (as :func:`fitting.lm.jacobian`)."""
    if model_train(kind, x, p, c, fq, jac):
        return
    npar = p.size
    m = x.size
    for i in range(npar):
        for k in range(npar):
            q[k] = p[k]
        if i == scale:
            q[i] = 1.0
            model_train(kind, x, q, c, fq, none)
            for j in range(m):
                jac[j, i] = fq[j]
            continue
        h = FD_REL_STEP * max(abs(p[i]), 1e-3)
        if p[i] + h > hi[i]:
            h = -h
        q[i] += h
        model_train(kind, x, q, c, fq, none)
        for j in range(m):
            jac[j, i] = (fq[j] - f0[j]) / h


@jit
def _normal(jac, r, jtj, jtr):
    m, npar = jac.shape
    for i in range(npar):
        s = 0.0
        for j in range(m):
            s += jac[j, i] * r[j]
        jtr[i] = s
        for k in range(i, npar):
            s = 0.0
            for j in range(m):
                s += jac[j, i] * jac[j, k]
            jtj[i, k] = s
            jtj[k, i] = s


@jit
def _solve(a, b, out):
    """Gaussian elimination without pivoting on (P, P) ``a`` (overwritten), as
    :func:`fitting.lm.solve_small`: singular pivots give a zero component."""
    npar = b.size
    for k in range(npar):
        piv = a[k, k]
        safe = piv if abs(piv) > 1e-300 else np.inf
        for i in range(k + 1, npar):
            f = a[i, k] / safe
            for j in range(k, npar):
                a[i, j] -= f * a[k, j]
            b[i] -= f * b[k]
    for k in range(npar - 1, -1, -1):
        s = 0.0
        for j in range(k + 1, npar):
            s += a[k, j] * out[j]
        s = b[k] - s
        piv = a[k, k]
        out[k] = s / piv if abs(piv) > 1e-300 else 0.0


@jit
def _cost(f, y, r):
    s = 0.0
    for j in range(y.size):
        r[j] = f[j] - y[j]
        s += r[j] * r[j]
    return s


@jit
def lm_voxel(kind, x, y, p, lo, hi, c, scale, max_iter, xtol, ftol, lam0, nielsen,
             f, r, ft, rt, trial, jac, q, fq, none, jtj, jtr, a, b, step):
    """Fit one voxel in place (``p`` holds the start, then the estimate).

    Returns (cost, state, iterations) with state :data:`CONVERGED`,
    :data:`NOT_CONVERGED` (iteration limit, or no relative cost decrease of
    ``STALL_RTOL`` over ``STALL_ITER`` iterations) or :data:`BAD_START` (non-finite
    cost at the start). The remaining arguments are work arrays.
    """
    npar = p.size
    for i in range(npar):
        p[i] = min(max(p[i], lo[i]), hi[i])
    model_train(kind, x, p, c, f, none)
    cost = _cost(f, y, r)
    if not math.isfinite(cost):
        return cost, BAD_START, 0
    lam = lam0
    nu = 2.0
    need_jac = True
    stall_ref = cost
    for it in range(max_iter):
        if need_jac:
            _jacobian(kind, x, p, c, f, hi, scale, jac, q, fq, none)
            _normal(jac, r, jtj, jtr)
            need_jac = False
        dmax = 0.0
        for i in range(npar):
            dmax = max(dmax, jtj[i, i])
        dfloor = 1e-12 * max(dmax, 1e-300)
        for i in range(npar):
            for k in range(npar):
                a[i, k] = jtj[i, k]
            a[i, i] += lam * max(jtj[i, i], dfloor)
            b[i] = -jtr[i]
        _solve(a, b, step)
        rel_step = 0.0
        for i in range(npar):
            trial[i] = min(max(p[i] + step[i], lo[i]), hi[i])
            rel_step = max(rel_step, abs(trial[i] - p[i]) / (abs(p[i]) + xtol))
        model_train(kind, x, trial, c, ft, none)
        cost_t = _cost(ft, y, rt)
        ok = math.isfinite(cost_t) and cost_t < cost
        small_cost = ok and (cost - cost_t) <= ftol * cost
        done = rel_step <= xtol or small_cost or cost_t == 0.0 or cost == 0.0
        if nielsen:
            pred = 0.0
            for i in range(npar):
                d = trial[i] - p[i]
                pred -= 2.0 * d * jtr[i]
                for k in range(npar):
                    pred -= d * jtj[i, k] * (trial[k] - p[k])
            rho = (cost - cost_t) / pred
            if not math.isfinite(rho):
                rho = 0.0
            if ok:
                lam *= max(1.0 / 3.0, 1.0 - (2.0 * rho - 1.0) ** 3)
                nu = 2.0
            else:
                lam *= nu
                nu *= 2.0
        else:
            lam = lam * 0.1 if ok else lam * 10.0
        lam = min(max(lam, 1e-12), 1e12)
        if ok:
            for i in range(npar):
                p[i] = trial[i]
            for j in range(y.size):
                f[j] = ft[j]
                r[j] = rt[j]
            cost = cost_t
            need_jac = True
        if done:
            return cost, CONVERGED, it + 1
        if (it + 1) % STALL_ITER == 0:
            if cost > stall_ref * (1.0 - STALL_RTOL):
                return cost, NOT_CONVERGED, it + 1
            stall_ref = cost
    return cost, NOT_CONVERGED, max_iter


@jit
def stderr_voxel(kind, x, p, c, hi, scale, sigma, f, jac, q, fq, none, jtj, inv, err):
    """√diag(σ²·(JᵀJ)⁻¹) at ``p`` into ``err`` (NaN where JᵀJ is singular), inverting
    JᵀJ scaled to unit diagonal as :func:`fitting.uncertainty.covariance` does."""
    npar = p.size
    m = x.size
    model_train(kind, x, p, c, f, none)
    _jacobian(kind, x, p, c, f, hi, scale, jac, q, fq, none)
    finite = True
    for i in range(npar):
        for k in range(npar):
            s = 0.0
            for j in range(m):
                s += jac[j, i] * jac[j, k]
            jtj[i, k] = s
            finite = finite and math.isfinite(s)
    if not finite:
        for i in range(npar):
            err[i] = np.nan
        return
    d = np.empty(npar)
    for i in range(npar):
        v = math.sqrt(jtj[i, i]) if jtj[i, i] > 0 else 0.0
        d[i] = v if v > 0 else 1.0
    for i in range(npar):
        for k in range(npar):
            jtj[i, k] /= d[i] * d[k]
            inv[i, k] = 1.0 if i == k else 0.0
    # Gauss–Jordan with partial pivoting; the determinant is the pivots' product
    det = 1.0
    for k in range(npar):
        piv_row = k
        for i in range(k + 1, npar):
            if abs(jtj[i, k]) > abs(jtj[piv_row, k]):
                piv_row = i
        if piv_row != k:
            det = -det
            for j in range(npar):
                t = jtj[k, j]
                jtj[k, j] = jtj[piv_row, j]
                jtj[piv_row, j] = t
                t = inv[k, j]
                inv[k, j] = inv[piv_row, j]
                inv[piv_row, j] = t
        piv = jtj[k, k]
        det *= piv
        if piv == 0.0:
            break
        for j in range(npar):
            jtj[k, j] /= piv
            inv[k, j] /= piv
        for i in range(npar):
            if i != k:
                fct = jtj[i, k]
                for j in range(npar):
                    jtj[i, j] -= fct * jtj[k, j]
                    inv[i, j] -= fct * inv[k, j]
    if not (math.isfinite(det) and det > 1e-13):
        for i in range(npar):
            err[i] = np.nan
        return
    s2 = sigma * sigma
    for i in range(npar):
        err[i] = np.sqrt(s2 * inv[i, i] / (d[i] * d[i]))


@jit
def fit_block(kind, x, y, p, lo, hi, c, scale, max_iter, xtol, ftol, lam0, nielsen,
              noise_sigma, cost, state, n_iter, err):
    """Fit every row of ``y`` (N, M) from the starts ``p`` (N, P, overwritten).

    ``c`` (N, K) holds each voxel's constants; ``noise_sigma`` the background noise
    (NaN: σ from the residuals, √(RSS/(M − P))). Outputs per voxel: ``cost`` (RSS),
    ``state`` (:func:`lm_voxel`), ``n_iter`` and, for converged voxels, ``err`` (N, P).
    """
    n, m = y.shape
    npar = p.shape[1]
    f, r, ft, rt, fq = np.empty(m), np.empty(m), np.empty(m), np.empty(m), np.empty(m)
    none = np.empty((0, 0))
    trial, q, jtr = np.empty(npar), np.empty(npar), np.empty(npar)
    b, step = np.empty(npar), np.empty(npar)
    jac = np.empty((m, npar))
    jtj, a, inv = np.empty((npar, npar)), np.empty((npar, npar)), np.empty((npar, npar))
    dof = m - npar
    for i in range(n):
        pi = p[i]
        cost[i], state[i], n_iter[i] = lm_voxel(
            kind, x, y[i], pi, lo, hi, c[i], scale, max_iter, xtol, ftol, lam0, nielsen,
            f, r, ft, rt, trial, jac, q, fq, none, jtj, jtr, a, b, step)
        if state[i] != CONVERGED:
            for k in range(npar):
                err[i, k] = np.nan
            continue
        if math.isfinite(noise_sigma):
            sigma = noise_sigma
        elif dof > 0:
            sigma = math.sqrt(cost[i] / dof)
        else:
            sigma = np.nan
        stderr_voxel(kind, x, pi, c[i], hi, scale, sigma, f, jac, q, fq, none, jtj, inv, err[i])
