"""Non-negative least squares for many small problems at once (numpy, no per-problem loop).

Each problem n is min ||A_n·w − y_n||² + μ_n²·||w||² subject to w ≥ 0, given through its
normal equations H_n = A_nᵀA_n (+ μ_n²·I) and f_n = A_nᵀy_n: the Lawson–Hanson active-set
algorithm (Lawson & Hanson 1974, Solving Least Squares Problems, ch. 23) in the
normal-equation form of Bro & De Jong 1997 (J Chemometrics 11:393). All problems advance
together; each iteration moves one index into the passive set of every problem that is not
yet optimal, and the unconstrained solutions on the passive sets are computed by one
batched solve of size K = the largest passive set (indices gathered, padding made
identity), which keeps the cost at N·K³ instead of N·G³. A problem's iterates do not depend
on the other problems of the batch.
"""
from __future__ import annotations

import numpy as np

RIDGE = 1e-12        # relative ridge on the passive-set systems (keeps them solvable)


def _gather(h: np.ndarray, rows: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """H[rows][:, idx, idx] as (R, K, K) for a shared (G, G) or per-problem (N, G, G) H."""
    if h.ndim == 2:
        return h[idx[:, :, None], idx[:, None, :]]
    return h[rows[:, None, None], idx[:, :, None], idx[:, None, :]]


def passive_solve(h: np.ndarray, f: np.ndarray, passive: np.ndarray, rows: np.ndarray,
                  mu2: np.ndarray | None = None) -> np.ndarray:
    """Unconstrained minimiser on each problem's passive set, zero elsewhere: (R, G).

    ``h`` (G, G) or (N, G, G); ``f`` (N, G); ``passive`` (N, G) bool; ``rows`` the problems
    to solve; ``mu2`` (N,) adds μ²·I to H.
    """
    g = f.shape[1]
    p = passive[rows]
    count = p.sum(axis=1)
    k = max(int(count.max()) if rows.size else 0, 1)
    idx = np.argsort(~p, axis=1, kind="stable")[:, :k]          # passive indices first
    valid = np.arange(k)[None, :] < count[:, None]
    hk = _gather(h, rows, idx)
    if mu2 is not None:
        hk += mu2[rows, None, None] * np.eye(k)[None]
    both = valid[:, :, None] & valid[:, None, :]
    hk *= both                                               # padding rows/columns: zero ...
    diag = np.einsum("rii->ri", hk)                          # (a writable view)
    scale = np.maximum(diag.sum(axis=1) / np.maximum(count, 1), 1e-300)
    diag += np.where(valid, RIDGE, 1.0) * scale[:, None]     # ... with a unit-scale diagonal
    fk = np.where(valid, np.take_along_axis(f[rows], idx, axis=1), 0.0)
    sk = np.linalg.solve(hk, fk[..., None])[..., 0]
    out = np.zeros((rows.size, g))
    np.put_along_axis(out, idx, np.where(valid, sk, 0.0), axis=1)
    return np.where(p, out, 0.0)


def _hw(h: np.ndarray, w: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """H·w of the problems ``rows``."""
    if h.ndim == 2:
        return w[rows] @ h.T
    hr = h if rows.size == h.shape[0] else h[rows]
    return np.matmul(hr, w[rows, :, None])[..., 0]


def nnls(h: np.ndarray, f: np.ndarray, mu2: np.ndarray | None = None,
         passive: np.ndarray | None = None, max_iter: int | None = None,
         tol: float = 1e-10) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Batched NNLS on the normal equations; returns (w (N, G), passive (N, G), converged (N,)).

    Parameters
    ----------
    h : (G, G) shared or (N, G, G) per problem, AᵀA.
    f : (N, G), Aᵀy.
    mu2 : (N,) Tikhonov weights μ² (the problem is then NNLS of [A; μI]·w ≈ [y; 0]).
    passive : (N, G) starting passive set (a warm start, e.g. the solution for a nearby
        μ); infeasible starts are repaired by the inner loop.
    tol : a problem is optimal when every gradient component outside its passive set is
        at most ``tol`` × max|f_n| (Karush–Kuhn–Tucker conditions).
    """
    n, g = f.shape
    mu2 = None if mu2 is None else np.broadcast_to(np.asarray(mu2, float), (n,))
    w = np.zeros((n, g))
    p = np.zeros((n, g), bool) if passive is None else passive.copy()
    thr = tol * np.maximum(np.abs(f).max(axis=1), 1e-300)
    converged = np.zeros(n, bool)
    max_iter = 3 * g if max_iter is None else max_iter
    rows = np.arange(n)
    todo = rows[p.any(axis=1)]
    if todo.size:
        w[todo] = 0.0
        _inner(h, f, mu2, w, p, todo, warm=True)
    active = rows
    for _ in range(max_iter):
        grad = f[active] - _hw(h, w, active)
        if mu2 is not None:
            grad = grad - mu2[active, None] * w[active]
        cand = np.where(p[active], -np.inf, grad)
        j = np.argmax(cand, axis=1)
        need = cand[np.arange(active.size), j] > thr[active]
        converged[active[~need]] = True
        active = active[need]
        if active.size == 0:
            break
        p[active, j[need]] = True
        _inner(h, f, mu2, w, p, active)
    return w, p, converged


def _inner(h, f, mu2, w, p, rows, warm: bool = False) -> None:
    """Solve on the passive sets of ``rows``; step back and drop indices until feasible."""
    rows = rows.copy()
    for _ in range(f.shape[1] + 1):
        if rows.size == 0:
            return
        s = passive_solve(h, f, p, rows, mu2)
        bad = p[rows] & (s <= 0)
        ok = ~bad.any(axis=1)
        w[rows[ok]] = s[ok]
        rows, s, bad = rows[~ok], s[~ok], bad[~ok]
        if rows.size == 0:
            return
        wr = w[rows]
        if warm:    # a warm start that is not feasible: drop the offending indices outright
            p[rows] &= ~bad     # (the outer loop restores optimality from the feasible rest)
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(bad, wr / (wr - s), np.inf)
        alpha = np.clip(ratio.min(axis=1), 0.0, 1.0)
        wr = wr + alpha[:, None] * (s - wr)
        drop = p[rows] & (wr <= 1e-14 * np.maximum(np.abs(wr).max(axis=1, keepdims=True),
                                                    1e-300))
        drop[np.arange(rows.size), np.argmin(np.where(bad, ratio, np.inf), axis=1)] = True
        p[rows] &= ~drop
        w[rows] = np.where(p[rows], wr, 0.0)
