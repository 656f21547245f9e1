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
grid of T1 and then refined between the grid neighbours of its best point (successive
parabolic interpolation), and the hypothesis with the lowest refined residual wins (a
pattern whose fit decays with TI only when none recovers). Choosing on the coarse grid alone picked the wrong side
of the null whenever a TI sat within a few percent of it, and the engine then
converged to that wrong local minimum (see tests/test_ir_minima.py).

Grid points whose exponential is numerically constant over the TIs (e = 0 at every
TI for T1 ≪ TI, as with TIs of 4–13 s at low field) explain nothing beyond a constant
and are given the residual of the constant fit instead of a singular solve.

The search runs voxel by voxel in a compiled kernel (:mod:`fitting.jit`, GIL released,
so the fast engine's threads share it); the grid tables are computed once per protocol.
"""
from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from fitting.jit import jit

GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0
PARABOLA_STEPS = 5          # from a bracket of two grid steps: ~1e-7 in ln T1
PARABOLA_MIN_STEP = 1e-9    # relative to the bracket: closer trial points are not distinct
HYPOTHESIS_OFFSETS = np.array([-1, 0, 1, 2])   # k − argmin|y| of the sign patterns tried
_FLAT = 1e-12               # D/M² below this: e is constant over the TIs


@lru_cache(maxsize=16)
def t1_grid(ti: tuple[float, ...], lower: float, upper: float, n: int):
    """ln T1 of a log grid (G,), the centred exponentials e − ē as (M, G) and M/D per grid
    point (0 where e is flat)."""
    t = np.asarray(ti)
    grid = np.geomspace(lower, upper, n)
    e = np.exp(-t[None, :] / grid[:, None])
    se = e.sum(axis=1)
    den = t.size * np.einsum("gm,gm->g", e, e) - se * se
    flat = den <= _FLAT * t.size ** 2
    weight = np.where(flat, 0.0, t.size / np.where(flat, 1.0, den))
    centred = np.ascontiguousarray((e - se[:, None] / t.size).T)
    return np.log(grid), centred, weight


@jit
def _residual_at(ti, yc, yy, u):
    """(residual, a-offset slope b) of the best S = a + b·e^(−TI/T1) at ln T1 = u, for
    centred data ``yc`` with ||yc||² = ``yy``; b = 0 where e is flat."""
    m = ti.size
    t1 = math.exp(u)
    se = 0.0
    see = 0.0
    c = 0.0
    for j in range(m):
        e = math.exp(-ti[j] / t1)
        se += e
        see += e * e
        c += e * yc[j]
    den = m * see - se * se
    if den <= _FLAT * m * m:
        return yy, 0.0, se
    return yy - m * c * c / den, m * c / den, se


@jit
def _refine(ti, yc, yy, a, x, b, fa, fx, fb):
    """Minimum of the residual over u = ln T1 in the bracket a < x < b (f(x) ≤ f(a), f(b)).

    Successive parabolic interpolation kept inside the bracket (Brent 1973, Algorithms
    for Minimization without Derivatives, ch. 5): the vertex of the parabola through
    the three points is evaluated and the bracket shrunk around the lowest point; a
    vertex outside the bracket or too close to x is replaced by the golden-section point
    of the larger side. Returns u of the lowest point.
    """
    for _ in range(PARABOLA_STEPS):
        p = (x - a) ** 2 * (fx - fb) - (x - b) ** 2 * (fx - fa)
        q = 2.0 * ((x - a) * (fx - fb) - (x - b) * (fx - fa))
        tiny = PARABOLA_MIN_STEP * (b - a)
        v = x - p / q if q != 0.0 else np.nan
        if not (math.isfinite(v) and a + tiny < v < b - tiny and abs(v - x) > tiny):
            v = x + (1.0 - GOLDEN) * (b - x) if (b - x) > (x - a) else \
                x - (1.0 - GOLDEN) * (x - a)
        fv = _residual_at(ti, yc, yy, v)[0]
        if fv < fx:             # v becomes x, x a bracket end
            if v < x:
                b, fb = x, fx
            else:
                a, fa = x, fx
            x, fx = v, fv
        elif v < x:
            a, fa = v, fv
        else:
            b, fb = v, fv
    return x


@jit
def _search_block(ti, data, signed, lgrid, centred, weight, offsets, out):
    """Per voxel (rows of ``data``): best (T1, a, b, residual) into ``out`` (N, 4)."""
    n, m = data.shape
    g = lgrid.size
    y = np.empty(m)
    yc = np.empty(m)
    r_grid = np.empty(g)
    c_base = np.empty(g)
    c_hyp = np.empty(g)
    for v in range(n):
        imin = 0
        for j in range(1, m):
            if data[v, j] < data[v, imin]:
                imin = j
        k0 = 0 if signed else imin
        # Σ (e − ē)·y = Σ e·y_c of the pattern "first k0 negative" at every grid point;
        # the other patterns differ from it in one or two points. The grid is the inner
        # loop (vectorised by the compiler); each sum still adds its terms in TI order.
        for i in range(g):
            c_base[i] = 0.0
        for j in range(m):
            yj = -data[v, j] if j < k0 else data[v, j]
            for i in range(g):
                c_base[i] += yj * centred[j, i]
        best, best_ok = np.inf, False
        t1b, ab, bb = np.nan, np.nan, np.nan
        n_hyp = 1 if signed else offsets.size
        last = -1
        for h in range(n_hyp):
            k = 0 if signed else min(max(imin + offsets[h], 0), m)
            if k == last:           # clipped onto the pattern just tried
                continue
            last = k
            ybar = 0.0
            for j in range(m):
                y[j] = -data[v, j] if j < k else data[v, j]
                ybar += y[j]
            ybar /= m
            yy = 0.0
            for j in range(m):
                yc[j] = y[j] - ybar
                yy += yc[j] * yc[j]
            lo, hi = min(k, k0), max(k, k0)
            for i in range(g):
                c_hyp[i] = c_base[i]
            for j in range(lo, hi):
                yj2 = 2.0 * y[j]                      # y[j] flipped sign against the base
                for i in range(g):
                    c_hyp[i] += yj2 * centred[j, i]
            for i in range(g):
                r_grid[i] = yy - c_hyp[i] * c_hyp[i] * weight[i]
            gi = 0
            for i in range(1, g):
                if r_grid[i] < r_grid[gi]:
                    gi = i
            u = lgrid[gi]
            if 0 < gi < g - 1:   # an interior grid minimum brackets a local minimum
                u = _refine(ti, yc, yy, lgrid[gi - 1], lgrid[gi], lgrid[gi + 1],
                            r_grid[gi - 1], r_grid[gi], r_grid[gi + 1])
            res, slope, se = _residual_at(ti, yc, yy, u)
            offset = ybar - slope * se / m
            feasible = offset * slope < 0.0          # recovers with TI
            if (feasible and not best_ok) or (feasible == best_ok and res < best):
                best, best_ok = res, feasible
                t1b, ab, bb = math.exp(u), offset, slope
        if not signed and ab < 0.0:   # |S| cannot tell the global sign: asymptote positive
            ab, bb = -ab, -bb
        out[v, 0] = t1b
        out[v, 1] = ab
        out[v, 2] = bb
        out[v, 3] = best


def search(ti: np.ndarray, data: np.ndarray, signed: bool, lower: float, upper: float,
           points: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Best (T1, a, b) of S = a + b·e^(−TI/T1) per voxel, and its residual.

    ``data`` (N, M): signed data (``signed``) are fitted as they are; magnitude data
    over the plausible sign patterns (module docstring). For magnitude data the global
    sign is chosen so that the asymptote a is positive. T1 is searched on ``points``
    log-spaced values in [``lower``, ``upper``] and refined between grid neighbours.
    """
    ti = np.ascontiguousarray(ti, dtype=float)
    lgrid, centred, weight = t1_grid(tuple(ti.tolist()), lower, upper, points)
    out = np.empty((data.shape[0], 4))
    _search_block(ti, np.ascontiguousarray(data, dtype=float), bool(signed), lgrid, centred,
                  weight, HYPOTHESIS_OFFSETS, out)
    return out[:, 0], out[:, 1], out[:, 2], out[:, 3]
