"""MP2RAGE: two gradient-echo blocks after each inversion, the uniform image and T1.

Sequence (Marques et al. 2010, NeuroImage 49:1271): an inversion (efficiency η: Mz →
−η·Mz), a delay, a block of N spoiled excitations of angle α1 spaced τ (the
``RepetitionTimeExcitation``), a delay, a second block of N excitations of angle α2, and
a delay until the next inversion, ``RepetitionTimePreparation`` = TR_MP2RAGE after the
first. Image i is read at the k-space centre of block i, whose excitation is preceded by
N_before excitations of the block; the ``InversionTime`` TIi is the time from the
inversion to that excitation. Hence the delays

    TA = TI1 − N_before·τ,   TB = TI2 − TI1 − N·τ,   TC = TR_MP2RAGE − TI2 − (N − N_before)·τ.

Mz evolves by affine maps Mz → a·Mz + b·M0: relaxation over t (a = e^(−t/T1),
b = 1 − e^(−t/T1)); inversion (a = −η, b = 0); k excitations each followed by τ of
relaxation (a = q^k, b = (1 − E)·(1 − q^k)/(1 − q), E = e^(−τ/T1), q = E·cos α). The
steady state of the whole cycle, m* = b/(1 − a) of the composed map, then gives Mz just
before each centre excitation, and GREi = sin αi·Mz (the common receive, T2* and M0
factors cancel in the uniform image). This is the closed form of Marques et al. 2010,
appendix, written as a composition instead of expanded.

The uniform image UNI = GRE1·GRE2/(GRE1² + GRE2²) lies in [−0.5, 0.5] and is free of M0,
receive field and T2* (Marques et al. 2010, eq. 3); T1 follows by inverting UNI(T1) over
its monotonic range. B1 (actual/nominal angle) scales α1 and α2; the inversion is taken
as B1-insensitive (adiabatic) with the fixed efficiency η (Marques & Gruetter 2013,
PLoS ONE 8:e69294, correct T1 with a B1 map this way).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from fitting.errors import RelaxlineError
from fitting.recovery import compose as _then
from fitting.recovery import relax_map as _relax
from fitting.recovery import train_map as _block

LOOKUP_POINTS = 64          # coarse log grid of T1 on which UNI(T1) is tabulated per voxel
BISECTION_STEPS = 40        # refinement of log T1 inside the bracketing grid interval


@dataclass(frozen=True)
class Protocol:
    """MP2RAGE timing (seconds, degrees).

    ``n``: excitations per block (``NumberShots``); ``n_before``: those before the k-space
    centre; ``alphas``: (α1, α2); ``tis``: (TI1, TI2); ``tau``: excitation spacing;
    ``tr``: time between inversions; ``eff``: inversion efficiency η.
    """

    tis: tuple[float, float]
    alphas: tuple[float, float]
    tau: float
    tr: float
    n: int
    n_before: int
    eff: float = 1.0

    @property
    def delays(self) -> tuple[float, float, float]:
        """(TA, TB, TC) of the module docstring."""
        ti1, ti2 = self.tis
        return (ti1 - self.n_before * self.tau, ti2 - ti1 - self.n * self.tau,
                self.tr - ti2 - (self.n - self.n_before) * self.tau)

    def check(self) -> None:
        """RelaxlineError naming the sidecar keys when the timing is impossible."""
        ta, tb, tc = self.delays
        keys = ("'InversionTime', 'NumberShots', 'RepetitionTimeExcitation' and "
                "'RepetitionTimePreparation'")
        if min(ta, tb, tc) < -1e-9:
            which = ["the first block would start before the inversion (TA < 0)",
                     "the two blocks would overlap (TB < 0)",
                     "the second block would end after the next inversion (TC < 0)"]
            bad = [w for w, d in zip(which, (ta, tb, tc)) if d < -1e-9]
            raise RelaxlineError(
                f"MP2RAGE timing impossible: {'; '.join(bad)} (TA {ta:g} s, TB {tb:g} s, TC "
                f"{tc:g} s from TI {list(self.tis)}, {self.n} excitations spaced "
                f"{self.tau:g} s, {self.n_before} before the k-space centre, TR {self.tr:g} "
                f"s). Check {keys} (seconds).")
        for a in self.alphas:
            if not 0.0 < a < 90.0:
                raise RelaxlineError(f"MP2RAGE 'FlipAngle' {list(self.alphas)} degrees: each "
                                     f"readout angle must lie in (0, 90).")
        if not 0.0 < self.eff <= 1.0:
            raise RelaxlineError(f"inversion efficiency {self.eff:g}: must lie in (0, 1] "
                                 f"(option --inversion-efficiency).")


def mp2rage_signals(t1: ArrayLike, prot: Protocol, b1: ArrayLike = 1.0,
                    m0: ArrayLike = 1.0) -> np.ndarray:
    """Signed GRE1, GRE2 (last axis) of the steady state (module docstring); shape B + (2,)."""
    t1, b1, m0 = np.broadcast_arrays(*(np.asarray(v, float) for v in (t1, b1, m0)))
    a1, a2 = (np.deg2rad(a) * b1 for a in prot.alphas)
    ta, tb, tc = prot.delays
    inv = (-prot.eff * np.ones_like(t1), np.zeros_like(t1))
    to_centre1 = _then(_then(inv, _relax(ta, t1)), _block(prot.n_before, a1, prot.tau, t1))
    after1 = _then(_then(inv, _relax(ta, t1)), _block(prot.n, a1, prot.tau, t1))
    to_centre2 = _then(_then(after1, _relax(tb, t1)), _block(prot.n_before, a2, prot.tau, t1))
    cycle = _then(_then(_then(after1, _relax(tb, t1)), _block(prot.n, a2, prot.tau, t1)),
                  _relax(tc, t1))
    mstar = cycle[1] / (1.0 - cycle[0])
    mz1 = to_centre1[0] * mstar + to_centre1[1]
    mz2 = to_centre2[0] * mstar + to_centre2[1]
    return np.stack([m0 * np.sin(a1) * mz1, m0 * np.sin(a2) * mz2], axis=-1)


def uniform_image(gre1: ArrayLike, gre2: ArrayLike) -> np.ndarray:
    """UNI = GRE1·GRE2/(GRE1² + GRE2²) (Marques et al. 2010, eq. 3); real parts for signed
    data (for complex images use Re(GRE1·conj(GRE2)) in the numerator)."""
    g1 = np.asarray(gre1, float)
    g2 = np.asarray(gre2, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return g1 * g2 / (g1 * g1 + g2 * g2)


def uni_of_t1(t1: ArrayLike, prot: Protocol, b1: ArrayLike = 1.0) -> np.ndarray:
    """UNI(T1) of the protocol at the given B1."""
    s = mp2rage_signals(t1, prot, b1)
    return uniform_image(s[..., 0], s[..., 1])


def t1_from_uni(uni: ArrayLike, prot: Protocol, b1: ArrayLike = 1.0,
                t1_range: tuple[float, float] = (0.02, 10.0)) -> np.ndarray:
    """T1 per voxel from its UNI value by lookup over the protocol (and its B1).

    UNI(T1) is tabulated on a log grid of :data:`LOOKUP_POINTS` T1 values in ``t1_range``
    at each voxel's B1; its monotonic branch is the stretch between the grid's largest
    and smallest UNI (UNI falls with T1 there; Marques et al. 2010 use this branch). A UNI
    above that of the shortest T1 of the range is ambiguous (the curve folds: a shorter
    T1 gives the same value) and gets the lower end of ``t1_range``. The
    grid interval holding the voxel's UNI is refined by bisection in log T1 on the exact
    signal equations. UNI beyond the branch gives the nearer end of ``t1_range`` (the
    engine then marks the voxel at a bound); non-finite UNI gives NaN. Vectorised over
    voxels (no per-voxel loop).
    """
    uni = np.asarray(uni, float).reshape(-1)
    n = uni.size
    b1 = np.broadcast_to(np.asarray(b1, float), (n,)).reshape(-1, 1)
    grid = np.geomspace(t1_range[0], t1_range[1], LOOKUP_POINTS)
    table = uni_of_t1(grid[None, :], prot, b1)                  # (N, G)
    i_hi = np.argmax(table, axis=1)                             # start of the branch
    masked = np.where(np.arange(grid.size)[None, :] >= i_hi[:, None], table, np.inf)
    i_lo = np.argmin(masked, axis=1)                            # end of the branch
    rows = np.arange(n)
    top, bottom = table[rows, i_hi], table[rows, i_lo]
    u = np.clip(uni, bottom, top)
    # first grid point of the branch at or below u: the crossing lies just before it
    on_branch = (np.arange(grid.size)[None, :] >= i_hi[:, None]) & \
        (np.arange(grid.size)[None, :] <= i_lo[:, None]) & (table <= u[:, None])
    j = np.where(on_branch.any(axis=1), np.argmax(on_branch, axis=1), i_lo)
    j = np.clip(j, i_hi + 1, np.maximum(i_lo, i_hi + 1))
    lo = np.log(grid[np.clip(j - 1, 0, grid.size - 1)])
    hi = np.log(grid[np.clip(j, 0, grid.size - 1)])
    b = b1[:, 0]
    for _ in range(BISECTION_STEPS):
        mid = 0.5 * (lo + hi)
        higher = uni_of_t1(np.exp(mid), prot, b) > u   # UNI still above: T1 is longer
        lo = np.where(higher, mid, lo)
        hi = np.where(higher, hi, mid)
    t1 = np.exp(0.5 * (lo + hi))
    # Above UNI(shortest T1) the curve has folded: a T1 left of its maximum gives the same
    # UNI, so the value is ambiguous and reported at the lower bound.
    ambiguous = (uni > table[:, 0]) & (i_hi > 0)
    t1 = np.where((uni > top) | ambiguous, t1_range[0], np.where(uni < bottom, t1_range[1], t1))
    return np.where(np.isfinite(uni), t1, np.nan)


def protocol_from_meta(tis, alphas, tau: float, tr: float, shots, eff: float) -> Protocol:
    """A :class:`Protocol` from BIDS values; ``shots`` is NumberShots (an integer N, centre
    after N // 2 excitations, or [before, after]: from memory of the BIDS definition, the
    excitations before and after the k-space centre, the centre counted in 'after')."""
    if isinstance(shots, (list, tuple)):
        before, after = (int(v) for v in shots)
        if after < 1:
            raise RelaxlineError(f"'NumberShots' {list(shots)}: at least one excitation must "
                                 f"follow the k-space centre.")
        n, nb = before + after, before
    else:
        n, nb = int(shots), int(shots) // 2
    return Protocol(tis=(float(tis[0]), float(tis[1])),
                    alphas=(float(alphas[0]), float(alphas[1])), tau=float(tau), tr=float(tr),
                    n=n, n_before=nb, eff=float(eff))
