"""Voxelwise fitting: the batched ``fast`` engine and the per-voxel ``lmfit`` engine.

:func:`fit_voxels` takes data as (N, M) and returns parameter maps, standard errors,
the rms residual and a fit-status code per voxel (:mod:`fitting.status`).

``fast`` (default)
    vectorised initialisation (``spec.init``: a grid / closed form over all voxels),
    then the batched Levenberg–Marquardt of :mod:`fitting.lm` with per-voxel damping
    and stopping; voxels it cannot converge are refit one by one with lmfit
    (status ``OK_REFIT`` if that converges, ``FAILED`` otherwise).
``lmfit``
    one ``lmfit.Model.fit`` per voxel (model built from the spec by
    :mod:`fitting.lmfit_models`), in ``jobs`` processes.

Both engines report standard errors the same way: √diag(σ²(JᵀJ)⁻¹) from the Jacobian
at the solution, with σ the background noise when given, else √(RSS/(M − P)).
Voxels with non-finite or all-zero data (or a non-finite per-voxel constant) get
``BAD_DATA``; failed and bad voxels hold NaN. No state is shared between voxels
except the explicitly passed ``noise_sigma``, so results do not depend on batching.
"""
from __future__ import annotations

from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from typing import Callable

import numpy as np

from fitting import status as st
from fitting.lm import jacobian, levenberg_marquardt
from fitting.spec import Fixed, ModelSpec, subset_fixed
from fitting.uncertainty import sigma_from_residuals, stderr_from_jacobian

ENGINES = ("fast", "lmfit")
BATCH_VOXELS = 8192          # voxels per vectorised batch (bounds the engine's memory)
LMFIT_BATCH_VOXELS = 256    # per process, lmfit engine
BOUND_RTOL = 1e-6


@dataclass
class VoxelFit:
    """Per-voxel results, each (N,)."""

    params: dict[str, np.ndarray]
    stderr: dict[str, np.ndarray]
    rmse: np.ndarray
    status: np.ndarray     # uint8 codes of fitting.status

    @classmethod
    def empty(cls, spec: ModelSpec, n: int) -> "VoxelFit":
        nan = lambda: np.full(n, np.nan)  # noqa: E731
        return cls({k: nan() for k in spec.params}, {k: nan() for k in spec.params}, nan(),
                   np.full(n, st.OUTSIDE, np.uint8))


def bad_data(spec: ModelSpec, data: np.ndarray, fixed: Fixed) -> np.ndarray:
    """Voxels that cannot be fitted: non-finite or all-zero data, invalid per-voxel constants."""
    bad = ~np.all(np.isfinite(data), axis=1) | np.all(data == 0, axis=1)
    for k in spec.voxel_fixed:
        v = fixed.get(k)
        if v is not None and np.ndim(v) >= 1:
            bad |= ~np.isfinite(np.asarray(v, float))
    return bad


def fit_voxels(spec: ModelSpec, x: np.ndarray, data: np.ndarray, fixed: Fixed,
               engine: str = "fast", jobs: int = 1, noise_sigma: float | None = None,
               progress: Callable[[int], None] | None = None,
               max_iter: int = 60, refit: bool = True) -> VoxelFit:
    """Fit ``spec`` to every row of ``data`` (N, M); ``x`` (M,) ascending.

    Parameters
    ----------
    fixed : constants from ``spec.fixed_from_meta`` (+ per-voxel arrays for
        ``spec.voxel_fixed`` names, shape (N,)).
    engine : ``"fast"`` or ``"lmfit"``.
    jobs : processes for the lmfit engine (and for the fast engine's refits).
    noise_sigma : background noise σ for the standard errors (None: from residuals).
    progress : called with the number of voxels finished.
    refit : fast engine only; refit non-converged voxels with lmfit (else FAILED).
    """
    if engine not in ENGINES:
        raise ValueError(f"engine must be one of {ENGINES}, got {engine!r}")
    x = np.asarray(x, float)
    n = data.shape[0]
    out = VoxelFit.empty(spec, n)
    if n == 0:
        return out
    bad = bad_data(spec, np.asarray(data), fixed)
    out.status[bad] = st.BAD_DATA
    if progress is not None and bad.any():
        progress(int(bad.sum()))
    good = np.flatnonzero(~bad)
    # lmfit is ~1000x slower per voxel: smaller batches keep the progress bar moving
    batch = BATCH_VOXELS if engine == "fast" else LMFIT_BATCH_VOXELS * max(1, int(jobs))
    for start in range(0, good.size, batch):
        idx = good[start:start + batch]
        fx = subset_fixed(spec, fixed, idx)
        y, fx = spec.prepare(x, np.asarray(data[idx]), fx)
        if engine == "fast":
            p, cost, stat = _fast(spec, x, y, fx, jobs, max_iter, refit)
        else:
            p, cost, stat = _lmfit_engine(spec, x, y, fx, jobs)
        _finish(spec, x, y, fx, p, cost, stat, noise_sigma, out, idx)
        if progress is not None:
            progress(idx.size)
    return out


def _fast(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed, jobs: int,
          max_iter: int, refit: bool):
    start = spec.pack(spec.init(x, y, fx))
    if spec.closed_form:
        p = start
        with np.errstate(invalid="ignore", over="ignore"):  # NaN/inf estimates -> FAILED
            f = spec.evaluate(x, p, fx)
            cost = np.einsum("nm,nm->n", f - y, f - y)
        stat = np.where(np.all(np.isfinite(p), axis=1), st.OK, st.FAILED).astype(np.uint8)
        return p, cost, stat
    res = levenberg_marquardt(spec, x, y, start, fx, max_iter=max_iter,
                              **dict(spec.extra.get("lm_options", {})))
    p, cost = res.params, res.cost
    stat = np.where(res.converged, st.OK, st.FAILED).astype(np.uint8)
    todo = np.flatnonzero(~res.converged)
    if refit and todo.size:
        vals, costs, ok = _lmfit_voxels(spec, x, y[todo], subset_fixed(spec, fx, todo), jobs)
        p[todo] = vals
        cost[todo] = costs
        stat[todo] = np.where(ok, st.OK_REFIT, st.FAILED)
    return p, cost, stat


def _lmfit_engine(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed, jobs: int):
    vals, costs, ok = _lmfit_voxels(spec, x, y, fx, jobs)
    return vals, costs, np.where(ok, st.OK, st.FAILED).astype(np.uint8)


def _lmfit_chunk(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed):
    """Worker: lmfit fits of the rows of ``y`` (runs in a child process for jobs > 1)."""
    from fitting.lmfit_models import build_model, fit_one, voxel_kwargs
    model = build_model(spec, fx)
    n = y.shape[0]
    vals = np.full((n, spec.n_params), np.nan)
    costs = np.full(n, np.nan)
    ok = np.zeros(n, bool)
    for i in range(n):
        v, _, success, c = fit_one(model, x, y[i], voxel=voxel_kwargs(spec, fx, i))
        vals[i], costs[i], ok[i] = v, c, success
    return vals, costs, ok


def _lmfit_voxels(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed, jobs: int):
    n = y.shape[0]
    jobs = max(1, int(jobs))
    if jobs == 1 or n < 2 * jobs:
        return _lmfit_chunk(spec, x, y, fx)
    bounds = np.linspace(0, n, min(n, 4 * jobs) + 1).astype(int)
    parts = [np.arange(a, b) for a, b in zip(bounds[:-1], bounds[1:]) if b > a]
    with ProcessPoolExecutor(max_workers=jobs) as pool:
        futs = [pool.submit(_lmfit_chunk, spec, x, y[ix], subset_fixed(spec, fx, ix))
                for ix in parts]
        results = [f.result() for f in futs]
    vals = np.concatenate([r[0] for r in results])
    costs = np.concatenate([r[1] for r in results])
    ok = np.concatenate([r[2] for r in results])
    return vals, costs, ok


def _finish(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed, p: np.ndarray,
            cost: np.ndarray, stat: np.ndarray, noise_sigma: float | None,
            out: VoxelFit, idx: np.ndarray) -> None:
    """Status at bounds, rmse, standard errors; NaN where the fit failed."""
    lo, hi = spec.lower_array, spec.upper_array
    fin = np.all(np.isfinite(p), axis=1) & np.isfinite(cost)
    stat = np.where(fin, stat, st.FAILED).astype(np.uint8)
    tol_lo = BOUND_RTOL * np.maximum(1.0, np.abs(np.where(np.isfinite(lo), lo, 0)))
    tol_hi = BOUND_RTOL * np.maximum(1.0, np.abs(np.where(np.isfinite(hi), hi, 0)))
    with np.errstate(invalid="ignore"):
        at_bound = np.any((p <= lo + tol_lo) | (p >= hi - tol_hi), axis=1)
    stat = np.where(np.isin(stat, st.USABLE) & at_bound, st.AT_BOUND, stat).astype(np.uint8)
    keep = stat != st.FAILED
    m, npar = y.shape[1], spec.n_params
    rmse = np.sqrt(cost / m)
    if noise_sigma is not None:
        sigma = np.full(idx.size, float(noise_sigma))
    else:
        sigma = sigma_from_residuals(cost, m, npar)
    err = np.full((idx.size, npar), np.nan)
    ki = np.flatnonzero(keep)
    if ki.size:
        jac = jacobian(spec, x, p[ki], subset_fixed(spec, fx, ki))
        err[ki] = stderr_from_jacobian(jac, sigma[ki])
    p = np.where(keep[:, None], p, np.nan)
    if spec.finalize is not None:
        p = spec.pack(spec.finalize(spec.unpack(p), fx))
    for i, k in enumerate(spec.params):
        out.params[k][idx] = p[:, i]
        out.stderr[k][idx] = err[:, i]
    out.rmse[idx] = np.where(keep, rmse, np.nan)
    out.status[idx] = stat
