"""Multi-component T2: the T2 distribution of a CPMG echo train by regularised NNLS over an
extended-phase-graph basis with a fitted refocusing angle.

The echo train of a voxel is modelled as a non-negative sum over a fixed grid of T2
values, each component's echoes computed by extended phase graphs
(:func:`fitting.epg.cpmg_echoes`) at the voxel's refocusing angle, so stimulated echoes
from imperfect refocusing are not mistaken for short-T2 water (Prasloski et al. 2012,
Magn Reson Med 67:1803). Per voxel:

1. **Refocusing angle.** The unregularised NNLS misfit χ²(B1) is computed at
   :data:`ANGLE_SEARCH` angles (B1 = actual/nominal angle, searched on [B1_MIN, 1]: the
   train is even in B1 − 1), interpolated by a cubic spline and minimised (Prasloski et
   al. 2012). The basis at that B1 is interpolated from a fine table.
2. **Distribution.** NNLS with Tikhonov regularisation, min ||A·w − y||² + μ²·||w||²,
   w ≥ 0, with μ chosen per voxel so that the misfit is :data:`CHI2_FACTOR` times the
   unregularised one (Whittall & MacKay 1989, J Magn Reson 84:134; factor 1.02 as in
   Prasloski et al. 2012). μ is found by a secant in log–log coordinates on the misfit
   of the warm-started NNLS, from a first guess that is the closed form for the
   unregularised passive set (through the eigendecomposition of its normal matrix).
3. **Summaries.** Total amplitude M0 = Σw; the short-T2 (myelin water) fraction
   Σ_{T2 ≤ cutoff} w / Σw; the geometric-mean T2 exp(Σ w·ln T2 / Σw) (Whittall & MacKay
   1989). Standard errors are linearised on the final passive set and μ (the distribution
   is then linear in the data: cov(w) = σ²·K·Kᵀ, K = (A_PᵀA_P + μ²I)⁻¹A_Pᵀ), and for B1
   from the curvature of χ²(B1) at its minimum (var = 2σ²/χ²''); they ignore the
   uncertainty of the passive set and of μ.

Everything is vectorised over voxels (no per-voxel Python loop).
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from fitting.epg import cpmg_echoes
from fitting.nnls import nnls
from fitting.rfpulse import SliceProfile
from fitting.sliceprofile import profile_echoes

B1_MIN = 0.3                 # smallest refocusing scale searched (54° of a nominal 180°)
B1_MAX_PROFILE = 1.6         # largest one with a slice profile (no fold; table up to 1.8)
ANGLE_SEARCH = 8             # angles of the χ² search over [B1_MIN, 1] (Prasloski et al.
                             # 2012 search a grid); wider ranges get proportionally more
ANGLE_SEARCH_STRIDE = 2      # the search uses every other T2 of the grid (half the cost;
                             # the misfit's dependence on the angle is unchanged, see tests)
ANGLE_TABLE_STEP = 0.0025    # B1 step of the basis table (linear interpolation between)
SPLINE_POINTS = 401          # fine B1 grid on which the spline of χ² is minimised
CHI2_FACTOR = 1.02           # regularised misfit / unregularised (Prasloski et al. 2012)
MU_BISECTION = 60            # steps of the bisection in ln μ² of the first guess
MU_STEPS = 24                # NNLS evaluations of the μ search at most
MU_RTOL = 0.002              # |χ²/χ²_min − factor| relative to the factor that ends the search
MU_ACCEPT = 0.02             # ... and that is still accepted when the steps run out
SUB_BATCH = 2048             # voxels per block (the per-voxel normal matrices are G×G)


@dataclass(frozen=True)
class Basis:
    """EPG basis of one protocol: ``t2`` (G,), ``b1`` (A,) table grid, ``table`` (A, M, G)."""

    t2: np.ndarray
    b1: np.ndarray
    table: np.ndarray

    def at(self, b1: np.ndarray) -> np.ndarray:
        """(N, M, G) basis at each voxel's B1, linearly interpolated in the table."""
        pos = np.clip((np.asarray(b1, float) - self.b1[0]) / (self.b1[1] - self.b1[0]), 0,
                      self.b1.size - 1 - 1e-9)
        i = np.floor(pos).astype(int)
        w = (pos - i)[:, None, None]
        return (1.0 - w) * self.table[i] + w * self.table[i + 1]


def basis(n_echoes: int, esp: float, t2_lo: float, t2_hi: float, n_t2: int, t1: float,
          refocus_deg: float, excite_deg: float, profile: SliceProfile | None = None) -> Basis:
    """The basis table for a CPMG protocol (cached): unit-amplitude echo trains.

    Without a slice profile the train is symmetric about the refocusing scale that makes
    the angle 180° (180°/nominal), so B1 is searched up to there; a slice profile (2D
    data, :mod:`fitting.sliceprofile`) breaks the symmetry and B1 is searched up to
    :data:`B1_MAX_PROFILE`, the trains being the slice-profile EPG sums.
    """
    b1_hi = B1_MAX_PROFILE if profile is not None else min(180.0 / refocus_deg,
                                                            B1_MAX_PROFILE)
    return _basis(int(n_echoes), float(esp), float(t2_lo), float(t2_hi), int(n_t2), float(t1),
                  float(refocus_deg), float(excite_deg), round(b1_hi, 9),
                  profile.key if profile is not None else "", profile)


@lru_cache(maxsize=8)
def _basis(n_echoes, esp, t2_lo, t2_hi, n_t2, t1, refocus_deg, excite_deg, b1_hi, key,
           profile) -> Basis:
    t2 = np.geomspace(t2_lo, t2_hi, n_t2)
    b1 = np.linspace(B1_MIN, b1_hi, int(round((b1_hi - B1_MIN) / ANGLE_TABLE_STEP)) + 1)
    if profile is None:
        table = cpmg_echoes(n_echoes, esp, t2[None, :], t1, b1=b1[:, None],
                            refocus_deg=refocus_deg, excite_deg=excite_deg)  # (A, G, M)
    else:
        tt, bb = np.meshgrid(t2, b1)                                         # (A, G)
        table = profile_echoes(n_echoes, esp, tt.ravel(), t1, bb.ravel(), refocus_deg,
                               excite_deg, profile).reshape(b1.size, t2.size, n_echoes)
    return Basis(t2=t2, b1=b1, table=np.ascontiguousarray(table.transpose(0, 2, 1)))


@lru_cache(maxsize=4)
def _spline_matrix(n_search: int, n_fine: int, lo: float, hi: float
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Search grid, fine grid and the (F, K) matrix taking χ² at the search angles to the
    natural cubic spline's values on the fine grid (the spline is linear in the data)."""
    from scipy.interpolate import CubicSpline
    coarse = np.linspace(lo, hi, n_search)
    fine = np.linspace(lo, hi, n_fine)
    mat = CubicSpline(coarse, np.eye(n_search), bc_type="natural")(fine)
    return coarse, fine, mat


def _misfit(a: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """||y − A·w||² per voxel, A (N, M, G) or (M, G)."""
    fit = np.einsum("nmg,ng->nm", a, w) if a.ndim == 3 else w @ a.T
    r = y - fit
    return np.einsum("nm,nm->n", r, r)


@dataclass
class Distribution:
    """Per-voxel result of :func:`fit_distribution` (arrays over N voxels)."""

    weights: np.ndarray      # (N, G) component amplitudes
    b1: np.ndarray           # refocusing scale (actual/nominal)
    b1_curvature: np.ndarray  # χ''(B1) of the spline at the minimum
    mu2: np.ndarray          # Tikhonov weight μ²
    chi2: np.ndarray         # misfit of the regularised distribution
    chi2_min: np.ndarray     # misfit of the unregularised NNLS at the chosen B1
    passive: np.ndarray      # (N, G) components left free (positive)
    converged: np.ndarray


def choose_b1(bas: Basis, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Refocusing scale minimising the unregularised misfit (spline through the search
    angles), the spline's curvature there, and the passive set of the nearest search angle."""
    lo, hi = float(bas.b1[0]), float(bas.b1[-1])
    scale = max(1.0, (hi - lo) / (1.0 - B1_MIN))
    coarse, fine, smat = _spline_matrix(int(round(ANGLE_SEARCH * scale)),
                                        int(round(SPLINE_POINTS * scale)), lo, hi)
    n = y.shape[0]
    chi2 = np.empty((n, coarse.size))
    passive = None
    passives = []
    for k, b in enumerate(coarse):        # a loop over search angles, not voxels
        a = bas.at(np.array([b]))[0][:, ::ANGLE_SEARCH_STRIDE]
        w, passive, _ = nnls(a.T @ a, y @ a, passive=passive)
        chi2[:, k] = _misfit(a, y, w)
        passives.append(passive)
    curve = chi2 @ smat.T                 # (N, F)
    j = np.argmin(curve, axis=1)
    h = fine[1] - fine[0]
    jj = np.clip(j, 1, fine.size - 2)
    rows = np.arange(n)
    curv = (curve[rows, jj + 1] - 2 * curve[rows, jj] + curve[rows, jj - 1]) / (h * h)
    nearest = np.rint((fine[j] - coarse[0]) / (coarse[1] - coarse[0])).astype(int)
    start = np.zeros((n, bas.t2.size), bool)      # warm start on the full grid
    start[:, ::ANGLE_SEARCH_STRIDE] = np.stack(passives)[nearest, rows]
    return fine[j], curv, start


def _mu_for_target(lam: np.ndarray, c: np.ndarray, target: np.ndarray) -> np.ndarray:
    """μ² ≥ 0 with Δχ²(μ²) = Σ c²·μ⁴/(λ·(λ + μ²)²) equal to ``target`` (per voxel), by
    bisection in ln μ² (Δχ² rises monotonically with μ²); 0 where the target is ≤ 0."""
    scale = np.maximum(lam.max(axis=1), 1e-300)
    lo = np.log(scale * 1e-16)
    hi = np.log(scale * 1e4)
    lam_safe = np.maximum(lam, 1e-300 + 1e-14 * scale[:, None])
    for _ in range(MU_BISECTION):
        mid = 0.5 * (lo + hi)
        m2 = np.exp(mid)[:, None]
        d = np.sum(c * c * m2 * m2 / (lam_safe * (lam_safe + m2) ** 2), axis=1)
        over = d > target
        hi = np.where(over, mid, hi)
        lo = np.where(over, lo, mid)
    return np.where(target > 0, np.exp(0.5 * (lo + hi)), 0.0)


def _eig_on_passive(h: np.ndarray, f: np.ndarray, p: np.ndarray):
    """Eigenpairs of H restricted to each passive set (padded with unit eigenvalues that
    carry no signal) and the projections c = Vᵀf; plus the gather indices."""
    n, g = f.shape
    count = p.sum(axis=1)
    k = max(int(count.max()), 1)
    idx = np.argsort(~p, axis=1, kind="stable")[:, :k]
    valid = np.arange(k)[None, :] < count[:, None]
    rows = np.arange(n)
    hk = h[rows[:, None, None], idx[:, :, None], idx[:, None, :]]
    both = valid[:, :, None] & valid[:, None, :]
    hk = np.where(both, hk, np.eye(k)[None])
    fk = np.where(valid, np.take_along_axis(f, idx, axis=1), 0.0)
    lam, vec = np.linalg.eigh(hk)
    c = np.einsum("nkj,nk->nj", vec, fk)
    return lam, vec, c, idx, valid


def _mu_guess(h: np.ndarray, f: np.ndarray, a: np.ndarray, y: np.ndarray,
              passive: np.ndarray, target: np.ndarray) -> np.ndarray:
    """First guess of μ²: the closed form for the unregularised passive set (ignoring the
    constraint), floored at a small fraction of the largest eigenvalue."""
    n, g = f.shape
    lam, vec, c, idx, valid = _eig_on_passive(h, f, passive)
    wk = np.einsum("nkj,nj->nk", vec, c / np.maximum(lam, 1e-300))
    w0 = np.zeros((n, g))
    np.put_along_axis(w0, idx, np.where(valid, wk, 0.0), axis=1)
    base = _misfit(a, y, w0)
    m2 = _mu_for_target(np.where(valid, lam, 1.0), np.where(valid, c, 0.0), target - base)
    return np.maximum(m2, 1e-8 * lam.max(axis=1))


def regularise(a: np.ndarray, y: np.ndarray, h: np.ndarray, f: np.ndarray,
               chi2_min: np.ndarray, passive: np.ndarray, factor: float = CHI2_FACTOR):
    """Regularised NNLS with μ chosen so that χ² = factor·χ²_min (module docstring).

    The misfit of the regularised NNLS rises monotonically with μ, roughly as a power of
    μ² at small μ, so μ² is found by a secant in (ln μ², ln(χ² − χ²_min)), kept inside the
    bracket found so far (bisection when the secant leaves it), each step an NNLS warm-
    started from the previous passive set; the first guess is the closed form of
    :func:`_mu_guess`. Stops when χ²/χ²_min is within :data:`MU_RTOL` of the factor.
    Returns (w, μ², χ², passive, converged).
    """
    n, g = f.shape
    goal = np.log(np.maximum((factor - 1.0) * chi2_min, 1e-300))
    x = np.log(_mu_guess(h, f, a, y, passive, factor * chi2_min))
    lo = np.full(n, -np.inf)     # ln μ² known to give too small a misfit
    hi = np.full(n, np.inf)      # ... too large
    prev = None
    p = passive.copy()
    w = np.zeros((n, g))
    mu2 = np.zeros(n)
    chi2 = np.full(n, np.inf)
    done = chi2_min <= 1e-24 * np.einsum("nm,nm->n", y, y)   # exact fit: no regularisation
    converged = done.copy()
    solved = done.copy()
    if done.any():
        w[done], p[done], _ = nnls(h[done], f[done], passive=p[done])
        chi2[done] = chi2_min[done]
    for _ in range(MU_STEPS):
        todo = np.flatnonzero(~done)
        if todo.size == 0:
            break
        m2 = np.exp(x[todo])
        wn, pn, conv = nnls(h[todo], f[todo], mu2=m2, passive=p[todo])
        c2 = _misfit(a[todo], y[todo], wn)
        w[todo], p[todo], mu2[todo], chi2[todo] = wn, pn, m2, c2
        solved[todo] = conv
        ratio = c2 / chi2_min[todo]
        ok = np.abs(ratio - factor) <= MU_RTOL * factor
        converged[todo] = conv & ok
        done[todo[ok]] = True
        fval = np.log(np.maximum(c2 - chi2_min[todo], 1e-300)) - goal[todo]
        xt = x[todo]
        lo[todo] = np.where(fval < 0, np.maximum(lo[todo], xt), lo[todo])
        hi[todo] = np.where(fval > 0, np.minimum(hi[todo], xt), hi[todo])
        if prev is None:
            slope = np.full(todo.size, 2.0)          # Δχ² ∝ μ⁴ at small μ
        else:
            px, pf = prev[0][todo], prev[1][todo]
            with np.errstate(divide="ignore", invalid="ignore"):
                slope = (fval - pf) / (xt - px)
            slope = np.where(np.isfinite(slope) & (slope > 0.05), slope, 2.0)
        step = np.clip(-fval / slope, -4.0, 4.0)
        nx = xt + step
        both = np.isfinite(lo[todo]) & np.isfinite(hi[todo])
        outside = both & ((nx <= lo[todo]) | (nx >= hi[todo]))
        nx = np.where(outside, 0.5 * (lo[todo] + hi[todo]), nx)
        fx_all = np.full(n, np.nan)
        fx_all[todo] = fval
        prev = (x.copy(), fx_all)
        x[todo] = nx
    last = ~done     # kinks of χ²(μ) where the passive set changes can stall the secant
    converged[last] = solved[last] & (np.abs(chi2[last] / chi2_min[last] - factor)
                                      <= MU_ACCEPT * factor)
    return w, mu2, chi2, p, converged


def fit_distribution(bas: Basis, y: np.ndarray) -> Distribution:
    """Refocusing angle, then the regularised distribution, for echo trains ``y`` (N, M)."""
    b1, curv, start = choose_b1(bas, y)
    a = bas.at(b1)                                     # (N, M, G)
    h = np.matmul(a.transpose(0, 2, 1), a)
    f = np.einsum("nmg,nm->ng", a, y)
    w0, p0, conv0 = nnls(h, f, passive=start)
    chi2_min = _misfit(a, y, w0)
    w, mu2, chi2, p, conv = regularise(a, y, h, f, chi2_min, p0)
    return Distribution(weights=w, b1=b1, b1_curvature=curv, mu2=mu2, chi2=chi2,
                        chi2_min=chi2_min, passive=p, converged=conv & conv0)


def summaries(t2: np.ndarray, w: np.ndarray, cutoff: float):
    """(gmT2, short-T2 fraction, M0) per voxel and their gradients with respect to w."""
    total = w.sum(axis=1)
    lt = np.log(t2)[None, :]
    short = (t2 <= cutoff)[None, :].astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_log = (w * lt).sum(axis=1) / total
        frac = (w * short).sum(axis=1) / total
        gm = np.exp(mean_log)
        d_gm = gm[:, None] * (lt - mean_log[:, None]) / total[:, None]
        d_frac = (short - frac[:, None]) / total[:, None]
    return gm, frac, total, d_gm, d_frac


def linear_stderr(a: np.ndarray, p: np.ndarray, mu2: np.ndarray, sigma: np.ndarray,
                  grads: list[np.ndarray]) -> list[np.ndarray]:
    """√(gᵀ·cov(w)·g) for each gradient g (N, G), cov(w) = σ²·K·Kᵀ on the passive set,
    K = (A_PᵀA_P + μ²I)⁻¹A_Pᵀ (module docstring)."""
    n, m, g = a.shape
    count = p.sum(axis=1)
    k = max(int(count.max()), 1)
    idx = np.argsort(~p, axis=1, kind="stable")[:, :k]
    valid = np.arange(k)[None, :] < count[:, None]
    ap = np.take_along_axis(a, idx[:, None, :], axis=2) * valid[:, None, :]   # (N, M, K)
    hk = np.matmul(ap.transpose(0, 2, 1), ap) + mu2[:, None, None] * np.eye(k)[None]
    hk = np.where(valid[:, :, None] & valid[:, None, :], hk, np.eye(k)[None])
    out = []
    for grad in grads:
        gk = np.where(valid, np.take_along_axis(np.nan_to_num(grad), idx, axis=1), 0.0)
        z = np.linalg.solve(hk, gk[..., None])[..., 0]          # H⁻¹g
        u = np.einsum("nmk,nk->nm", ap, z)                      # Kᵀg = A_P·H⁻¹g
        out.append(sigma * np.sqrt(np.einsum("nm,nm->n", u, u)))
    return out
