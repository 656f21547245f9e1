"""The RF-spoiled gradient-echo steady state (extended phase graphs), tabulated for fitting.

Ideal spoiling (:func:`fitting.signals.spgr_signal`) assumes every transverse magnetisation
is destroyed before the next pulse. Real sequences spoil with a gradient (one dephasing
cycle per TR) and a quadratic RF phase schedule θ_k = θ_(k−1) + k·Φ0 (Zur, Wood &
Neuringer 1991, Magn Reson Med 21:251); some transverse coherence survives and the
steady state departs from the Ernst formula by an amount that depends on the actual
angle, T1, T2, TR and Φ0 (Preibisch & Deichmann 2009, Magn Reson Med 61:125: T1 from
two angles off by tens of percent at common settings).

Model
    The configuration states F_n (n = −N..N, transverse) and Z_n (n = 0..N,
    longitudinal) of the extended phase graph (Weigel 2015, J Magn Reson Imaging 41:266)
    evolve per TR by: the pulse (rotation by α about the RF axis, mixing F_n, F*_−n and
    Z_n), the read-out of F_0 (TE → 0; T2* decay to the echo is folded into M0),
    relaxation (F·E2, Z·E1, Z_0 + 1 − E1) and the spoiler gradient (F_n → F_(n+1)).
    Writing every state of order n in a frame that turns with the RF phase makes the
    quadratic schedule time-invariant: each TR the order-n states gain the phase n·Φ0
    before the gradient shifts them (the RF phase increment acts as an off-resonance
    proportional to the order). The steady state is then the fixed point x = A·x + b of
    one TR, a sparse real-linear system solved directly (no run-in of thousands of TRs).
    States beyond N = :data:`STATE_DECADES`·ln(10)·T2/TR are dropped (E2^N below
    1e-:data:`STATE_DECADES`). Diffusion is neglected (it damps high orders and brings
    the signal closer to ideal spoiling), so the correction is an upper bound.
    tests/test_spoiling.py checks the model against a pulse-by-pulse isochromat
    simulation of the sequence (tests/bloch_steady.py).

Table
    Fits evaluate the ratio r(α, T1) = S_RF/S_ideal on a grid of the actual angle α
    (:data:`ALPHA_STEP`) and u = ln T1 (:data:`U_STEP`) for the protocol's TR, the
    assumed T2 and Φ0, by bicubic Hermite interpolation with the interpolant's own
    derivative in u (so the Levenberg–Marquardt Jacobian is consistent). r → 1 as α → 0.
"""
from __future__ import annotations

from functools import lru_cache
from typing import TYPE_CHECKING

import numpy as np

from fitting.gridtables import grid_derivative, hermite
from fitting.signals import spgr_signal

if TYPE_CHECKING:
    import scipy.sparse as sp

STATE_DECADES = 8
MIN_STATES = 8
MAX_STATES = 4000
ALPHA_STEP = 1.0          # degrees
U_STEP = 0.25             # ln T1
T1_RANGE = (0.005, 20.0)  # s, the fit's bounds (fitting.t1_models)


def n_states(tr: float, t2: float) -> int:
    """Configuration orders kept: E2^N below 10^−STATE_DECADES."""
    n = int(np.ceil(STATE_DECADES * np.log(10.0) * t2 / tr))
    return int(min(max(n, MIN_STATES), MAX_STATES))


def _blocks(n: int, lin: list, anti: list):
    """Rows, columns and values of the 2×2 real blocks of complex-linear (out += c·in) and
    anti-linear (out += c·conj(in)) couplings: lists of (out, in, c) index/value arrays."""
    rows, cols, vals = [], [], []
    for (o, i, c), conj in [(t, False) for t in lin] + [(t, True) for t in anti]:
        o, i = np.asarray(o), np.asarray(i)
        c = np.broadcast_to(np.asarray(c, complex), o.shape)
        s = -1.0 if conj else 1.0
        rows += [2 * o, 2 * o, 2 * o + 1, 2 * o + 1]
        cols += [2 * i, 2 * i + 1, 2 * i, 2 * i + 1]
        vals += [c.real, -s * c.imag, c.imag, s * c.real]
    return np.concatenate(rows), np.concatenate(cols), np.concatenate(vals)


def _index(nmax: int):
    """Slots of F_k, F_−k and Z_k (k = 0..N): three per order, so that the pulse couples
    within a slot triple and the gradient only neighbouring triples (a banded system;
    F_−0 is F_0, its slot stays unused)."""
    k = np.arange(nmax + 1)
    return k, 3 * k, 3 * k + 1, 3 * k + 2


def _pulse(alpha_rad: float, nmax: int) -> sp.csr_matrix:
    """One pulse about the RF axis on the states, real 2×2-block form (slots of _index)."""
    import scipy.sparse as sp   # here, not at the top: every fit process imports this module
    size = 6 * (nmax + 1)
    c2, s2 = np.cos(alpha_rad / 2) ** 2, np.sin(alpha_rad / 2) ** 2
    sa, ca = np.sin(alpha_rad), np.cos(alpha_rad)
    k, f, fm, z = _index(nmax)
    fm = np.where(k == 0, f, fm)                  # F_−0 is F_0
    pos = k > 0
    # F_k' = c²·F_k + s²·F*_−k − i·sinα·Z_k;  Z_k' = −(i/2)·sinα·F_k + (i/2)·sinα·F*_−k
    # + cosα·Z_k;  F_−k' = s²·F*_k + c²·F_−k − i·sinα·Z*_k  (k > 0; Weigel 2015, eq. 15)
    lin = [(f, f, c2), (f, z, -1j * sa), (z, f, -0.5j * sa), (z, z, ca),
           (fm[pos], fm[pos], c2), (3 * k[~pos] + 1, 3 * k[~pos] + 1, 1.0)]
    anti = [(f, fm, s2), (z, fm, 0.5j * sa), (fm[pos], f[pos], s2),
            (fm[pos], z[pos], -1j * sa)]
    r, c, v = _blocks(size, lin, anti)
    return sp.csr_matrix((v, (r, c)), shape=(size, size))


def _period(e2: float, increment_rad: float, nmax: int):
    """One TR after the pulse as (G, D): G relaxes (E2), ramps (n·Φ0) and shifts the F
    states (F_n → F_(n+1)); D ramps the Z states, which relax by E1·D (module docstring)."""
    import scipy.sparse as sp
    size = 6 * (nmax + 1)
    k, f, fm, z = _index(nmax)
    ramp = np.exp(1j * k * increment_rad)
    g = _blocks(size, [(f[1:], f[:-1], e2 * ramp[:-1]),              # F_k -> F_(k+1)
                       (fm[1:-1], fm[2:], e2 * np.conj(ramp[2:])),   # F_−k -> F_−(k−1)
                       (f[:1], fm[1:2], e2 * np.conj(ramp[1:2]))],   # F_−1 -> F_0
                [])
    d = _blocks(size, [(z, z, ramp)], [])
    return (sp.csr_matrix((g[2], (g[0], g[1])), shape=(size, size)),
            sp.csr_matrix((d[2], (d[0], d[1])), shape=(size, size)))


def steady_state(alpha_deg: float, t1: np.ndarray, t2: float, tr: float,
                 increment_deg: float) -> np.ndarray:
    """RF-spoiled steady-state magnitudes (M0 = 1) right after the pulse, one per T1 of
    ``t1`` (module docstring); all T1 values in one block-diagonal banded solve."""
    import scipy.sparse as sp
    from scipy.linalg import solve_banded
    t1 = np.atleast_1d(np.asarray(t1, float))
    nmax = n_states(tr, t2)
    p = _pulse(np.deg2rad(alpha_deg), nmax)
    g, d = _period(np.exp(-tr / t2), np.deg2rad(increment_deg), nmax)
    e1 = np.exp(-tr / t1)
    eye = sp.identity(t1.size, format="csr")
    a = sp.kron(eye, g @ p) + sp.kron(sp.diags(e1), d @ p)
    size = p.shape[0]
    b = np.zeros((t1.size, size))
    b[:, 2 * 2] = 1.0 - e1                        # Re Z_0 regrowth (slot 2)
    m = (sp.identity(a.shape[0], format="csr") - a).tocoo()
    lower, upper = int(max(0, (m.row - m.col).max())), int(max(0, (m.col - m.row).max()))
    band = np.zeros((lower + upper + 1, m.shape[0]))
    np.add.at(band, (upper + m.row - m.col, m.col), m.data)
    x = solve_banded((lower, upper), band, b.reshape(-1), check_finite=False)
    y = (sp.kron(eye, p) @ x).reshape(t1.size, size)
    return np.hypot(y[:, 0], y[:, 1])             # F_0 (slot 0)


class SpoilingTable:
    """r(α, T1) = S_RF/S_ideal on the (α, ln T1) grid of one TR, assumed T2 and Φ0.

    ``tab[i, j]`` holds (r, ∂r/∂α, ∂r/∂u, ∂²r/∂α∂u) at α_i (degrees), u_j = ln T1_j; the
    derivatives by finite differences along the grid (fourth order inside).
    """

    def __init__(self, tr: float, t2: float, increment_deg: float, alpha_max: float) -> None:
        self.tr, self.t2, self.increment = float(tr), float(t2), float(increment_deg)
        self.alpha = ALPHA_STEP * np.arange(int(np.ceil(alpha_max / ALPHA_STEP)) + 3)
        lo, hi = np.log(T1_RANGE[0]) - U_STEP, np.log(T1_RANGE[1]) + U_STEP
        self.u = lo + U_STEP * np.arange(int(np.ceil((hi - lo) / U_STEP)) + 1)
        t1 = np.exp(self.u)
        r = np.ones((self.alpha.size, self.u.size))
        for i, a in enumerate(self.alpha[1:], start=1):
            ideal = spgr_signal(np.array([a]), t1, 1.0, self.tr)[:, 0]
            r[i] = steady_state(a, t1, self.t2, self.tr, self.increment) / ideal
        r_a = grid_derivative(r, ALPHA_STEP, 0)
        r_u = grid_derivative(r, U_STEP, 1)
        self.tab = np.stack([r, r_a, r_u, grid_derivative(r_a, U_STEP, 1)], axis=2)

    def evaluate(self, alpha_deg: np.ndarray, t1: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """r and ∂r/∂T1 at actual angles ``alpha_deg`` and ``t1`` (broadcast together)."""
        a, t = np.broadcast_arrays(np.asarray(alpha_deg, float), np.asarray(t1, float))
        u = np.log(t)
        fa = np.clip(a / ALPHA_STEP, 0.0, self.alpha.size - 1.0)
        fu = np.clip((u - self.u[0]) / U_STEP, 0.0, self.u.size - 1.0)
        i = np.minimum(fa.astype(int), self.alpha.size - 2)
        j = np.minimum(fu.astype(int), self.u.size - 2)
        (a0, a1, a2, a3), _ = hermite(fa - i)
        (c0, c1, c2, c3), (d0, d1, d2, d3) = hermite(fu - j)
        ha, hu = ALPHA_STEP, U_STEP
        wa = ((a0, a1 * ha), (a2, a3 * ha))
        wu = ((c0, c1 * hu, d0 / hu, d1), (c2, c3 * hu, d2 / hu, d3))
        r = np.zeros(a.shape)
        dr = np.zeros(a.shape)
        for di, (av, ad) in enumerate(wa):
            for dj, (uv, ud, uvd, udd) in enumerate(wu):
                q = self.tab[i + di, j + dj]
                r += av * uv * q[..., 0] + ad * uv * q[..., 1] + av * ud * q[..., 2] \
                    + ad * ud * q[..., 3]
                dr += av * uvd * q[..., 0] + ad * uvd * q[..., 1] + av * udd * q[..., 2] \
                    + ad * udd * q[..., 3]
        return r, dr / t


@lru_cache(maxsize=8)
def table(tr: float, t2: float, increment_deg: float, alpha_max: float) -> SpoilingTable:
    """The (cached) table of one protocol."""
    return SpoilingTable(tr, t2, increment_deg, alpha_max)
