"""Reduced-dimension search of the inversion-recovery fit over polarity hypotheses.

For a fixed T1 the model S = a + b·e^(−TI/T1) is linear in (a, b), so the least-squares
residual depends on T1 alone (variable projection: Golub & Pereyra 1973, SIAM J Numer
Anal 10:413; for inversion recovery Barral et al. 2010, Magn Reson Med 64:1057). With
e = e^(−TI/T1), centred data y_c = y − ȳ and D = M·Σe² − (Σe)² the residual is

    r(T1) = ||y_c||² − M·(Σ e·y_c)² / D,

and the best (a, b) are b = M·(Σ e·y_c)/D, a = ȳ − b·Σe/M.

Magnitude data lose the sign of the points before the null. An IR signal is monotone
in TI, so the signs follow one of M + 1 patterns "the first k points negative"; the
magnitude least-squares problem is the minimum over k of the signed problem with those
points negated (for any T1, the best pattern is the signs of the fitted curve). The
noiseless null lies next to the smallest magnitude, so k is the index of that point
(it is the last negative one) or one more (it is the first positive one); with noise
the neighbours on both sides are plausible too. Every hypothesis is searched on a log
grid of T1 and then refined by golden-section search between the grid neighbours of
its best point (successive parabolic interpolation), and the hypothesis with the
lowest refined residual wins. Choosing on the coarse grid alone picked the wrong side
of the null whenever a TI sat within a few percent of it, and the engine then
converged to that wrong local minimum (see tests/test_ir_minima.py).

Grid points whose exponential is numerically constant over the TIs (e = 0 at every
TI for T1 ≪ TI, as with TIs of 4–13 s at low field) explain nothing beyond a constant
and are given the residual of the constant fit instead of a singular solve.
"""
from __future__ import annotations

from functools import lru_cache

import numpy as np

GOLDEN = (np.sqrt(5.0) - 1.0) / 2.0
PARABOLA_STEPS = 5          # from a bracket of two grid steps: ~1e-7 in ln T1
PARABOLA_MIN_STEP = 1e-9    # relative to the bracket: closer trial points are not distinct
HYPOTHESIS_OFFSETS = (-1, 0, 1, 2)   # k − argmin|y| of the sign patterns tried
_FLAT = 1e-12               # D/M² below this: e is constant over the TIs


@lru_cache(maxsize=16)
def t1_grid(ti: tuple[float, ...], lower: float, upper: float, n: int):
    """Log grid of T1 (G,), the centred exponentials e − ē as (M, G) and M/D per grid point
    (0 where e is flat)."""
    t = np.asarray(ti)
    grid = np.geomspace(lower, upper, n)
    e = np.exp(-t[None, :] / grid[:, None])
    se = e.sum(axis=1)
    den = t.size * np.einsum("gm,gm->g", e, e) - se * se
    flat = den <= _FLAT * t.size ** 2
    weight = np.where(flat, 0.0, t.size / np.where(flat, 1.0, den))
    centred = np.ascontiguousarray((e - se[:, None] / t.size).T)
    return grid, centred, weight


def _explained(c: np.ndarray, den: np.ndarray, m: int) -> np.ndarray:
    """M·c²/D, the part of ||y_c||² the exponential explains (0 where e is flat)."""
    flat = den <= _FLAT * m * m
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(flat, 0.0, m * c * c / np.where(flat, 1.0, den))


def _residual_at(ti: np.ndarray, yc: np.ndarray, yy: np.ndarray, t1: np.ndarray):
    """Residual, Σe·y_c, Σe and D for one T1 per voxel (``t1`` (N,))."""
    e = np.exp(-ti[None, :] / t1[:, None])
    se = e.sum(axis=1)
    den = ti.size * np.einsum("nm,nm->n", e, e) - se * se
    c = np.einsum("nm,nm->n", e, yc)
    return yy - _explained(c, den, ti.size), c, se, den


def _refine(ti: np.ndarray, yc: np.ndarray, yy: np.ndarray, a: np.ndarray, x: np.ndarray,
            b: np.ndarray, fa: np.ndarray, fx: np.ndarray, fb: np.ndarray):
    """Minimum of the residual over u = ln T1 in the bracket a < x < b (f(x) ≤ f(a), f(b)).

    Successive parabolic interpolation kept inside the bracket (Brent 1973, Algorithms
    for Minimization without Derivatives, ch. 5): the vertex of the parabola through
    the three points is evaluated and the bracket shrunk around the lowest point; a
    vertex outside the bracket or too close to x is replaced by the golden-section point
    of the larger side. Returns (u, residual) of the lowest point.
    """
    for _ in range(PARABOLA_STEPS):
        p = (x - a) ** 2 * (fx - fb) - (x - b) ** 2 * (fx - fa)
        q = 2.0 * ((x - a) * (fx - fb) - (x - b) * (fx - fa))
        with np.errstate(divide="ignore", invalid="ignore"):
            v = x - p / q
        right = (b - x) > (x - a)
        golden = np.where(right, x + (1.0 - GOLDEN) * (b - x), x - (1.0 - GOLDEN) * (x - a))
        tiny = PARABOLA_MIN_STEP * (b - a)
        ok = np.isfinite(v) & (v > a + tiny) & (v < b - tiny) & (np.abs(v - x) > tiny)
        v = np.where(ok, v, golden)
        fv = _residual_at(ti, yc, yy, np.exp(v))[0]
        lower = fv < fx
        below = v < x
        # the lowest point becomes x; the other one of (v, x) becomes the bracket end
        a_new = np.where(lower, np.where(below, a, x), np.where(below, v, a))
        b_new = np.where(lower, np.where(below, x, b), np.where(below, b, v))
        fa_new = np.where(lower, np.where(below, fa, fx), np.where(below, fv, fa))
        fb_new = np.where(lower, np.where(below, fx, fb), np.where(below, fb, fv))
        x, fx = np.where(lower, v, x), np.where(lower, fv, fx)
        a, b, fa, fb = a_new, b_new, fa_new, fb_new
    return x, fx


def search(ti: np.ndarray, data: np.ndarray, signed: bool, lower: float, upper: float,
           points: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Best (T1, a, b) of S = a + b·e^(−TI/T1) per voxel, and its residual.

    ``data`` (N, M): signed data (``signed``) are fitted as they are; magnitude data
    over the plausible sign patterns (module docstring). For magnitude data the global
    sign is chosen so that the asymptote a is positive. T1 is searched on ``points``
    log-spaced values in [``lower``, ``upper``] and refined between grid neighbours.
    """
    ti = np.asarray(ti, float)
    grid, centred, weight = t1_grid(tuple(ti.tolist()), lower, upper, points)
    n, m = data.shape
    lgrid = np.log(grid)
    cols = np.arange(m)[None, :]
    rows = np.arange(n)
    if signed:
        base_k = np.zeros(n, int)
        offsets: tuple[int, ...] = (0,)
    else:
        base_k = np.argmin(data, axis=1)
        offsets = HYPOTHESIS_OFFSETS
    base = np.where(cols < base_k[:, None], -data, data)
    # Σ e·y_c = Σ (e − ē)·y; einsum (not BLAS) keeps each voxel's arithmetic independent
    # of the batch size. The other patterns differ from the base in one or two points.
    c_base = np.einsum("nm,mg->ng", base, centred)
    best = np.full(n, np.inf)
    best_ok = np.zeros(n, bool)       # best pattern so far recovers with TI
    out = np.zeros((4, n))
    tried: list[np.ndarray] = []
    for off in offsets:
        k = np.clip(base_k + off, 0, m)
        fresh = np.ones(n, bool)   # a pattern clipped onto one tried already adds nothing
        for k_old in tried:
            fresh &= k != k_old
        tried.append(k)
        idx = np.flatnonzero(fresh)
        if idx.size == 0:
            continue
        y = np.where(cols < k[idx, None], -data[idx], data[idx])
        c = c_base[idx]
        for j in range(min(off, 0), max(off, 0)):     # the points whose sign differs
            pt = np.clip(base_k[idx] + j, 0, m - 1)
            changed = (pt >= np.minimum(k[idx], base_k[idx])) & \
                (pt < np.maximum(k[idx], base_k[idx]))
            delta = np.where(changed, y[rows[:idx.size], pt] - base[idx, pt], 0.0)
            c = c + delta[:, None] * centred[pt]
        ybar = y.mean(axis=1)
        yc = y - ybar[:, None]
        yy = np.einsum("nm,nm->n", yc, yc)
        r_grid = yy[:, None] - c * c * weight[None, :]
        gi = np.argmin(r_grid, axis=1)
        # an interior grid minimum brackets a local minimum; at a grid end T1 sits on
        # its bound and the engine takes it from there
        inner = np.flatnonzero((gi > 0) & (gi < grid.size - 1))
        u = lgrid[gi]
        if inner.size:
            g = gi[inner]
            u[inner] = _refine(ti, yc[inner], yy[inner], lgrid[g - 1], lgrid[g], lgrid[g + 1],
                               r_grid[inner, g - 1], r_grid[inner, g], r_grid[inner, g + 1])[0]
        t1 = np.exp(u)
        res, c1, se, den = _residual_at(ti, yc, yy, t1)
        flat = den <= _FLAT * m * m
        with np.errstate(divide="ignore", invalid="ignore"):
            bb = np.where(flat, 0.0, m * c1 / np.where(flat, 1.0, den))
        aa = ybar - bb * se / m
        # a fit that decays with TI (a, b of one sign) is no inversion recovery: it
        # only wins when no pattern recovers
        feasible = aa * bb < 0
        better = (feasible & ~best_ok[idx]) | ((feasible == best_ok[idx]) & (res < best[idx]))
        sel = idx[better]
        best[sel] = res[better]
        best_ok[sel] = feasible[better]
        out[:, sel] = np.stack([t1, aa, bb, res])[:, better]
    t1, a, b, res = out
    if not signed:  # |S| cannot tell the global sign: make the asymptote positive
        flip = a < 0
        a, b = np.where(flip, -a, a), np.where(flip, -b, b)
    return t1, a, b, res
