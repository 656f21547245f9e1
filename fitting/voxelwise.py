"""Voxelwise fitting: the ``fast`` engine (compiled, or its numpy reference) and ``lmfit``.

:func:`fit_voxels` takes data as (N, M) and returns parameter maps, standard errors,
the rms residual and a fit-status code per voxel (:mod:`fitting.status`).

``fast`` (default)
    vectorised initialisation (``spec.init``: a grid / closed form over all voxels),
    then, for a model with a compiled form (``ModelSpec.kernel``), the per-voxel
    Levenberg–Marquardt and standard errors of :mod:`fitting.kernels` in blocks of
    :data:`KERNEL_BLOCK` voxels on ``jobs`` threads; for other models the batched numpy
    iteration of :mod:`fitting.lm`. Voxels it cannot converge are refit one by one
    with lmfit (status ``OK_REFIT`` if that converges, ``FAILED`` otherwise) — except
    hopeless ones (:func:`hopeless`: a parameter on its bound, or the signal below
    :data:`SIGNAL_FLOOR` times the noise), which keep their status (``AT_BOUND`` or
    ``FAILED``) without the refit.
``numpy``
    the numpy reference of ``fast``: the same initialisation, the batched numpy
    iteration for every model, serially. Tests compare ``fast`` against it; the
    command line offers ``fast`` and ``lmfit`` (:data:`ENGINES`).
``lmfit``
    one ``lmfit.Model.fit`` per voxel (model built from the spec by
    :mod:`fitting.lmfit_models`), in ``jobs`` processes.

A model with its own fast method (``ModelSpec.solver``, e.g. a regularised NNLS) is
solved by it in the fast engines (no refit); one whose signal lmfit cannot fit
(``spec.extra["lmfit"] is False``) refuses the ``lmfit`` engine. Extra outputs
(``spec.extra_outputs``) come from the solver or from ``spec.extras`` after the fit.

All engines report standard errors the same way: √diag(σ²(JᵀJ)⁻¹) from the Jacobian
at the solution, with σ the background noise when given, else √(RSS/(M − P)).
Voxels with non-finite or all-zero data (or a non-finite per-voxel constant) get
``BAD_DATA``; failed and bad voxels hold NaN. No state is shared between voxels
except the explicitly passed ``noise_sigma``, so results do not depend on batching
or on the number of threads or processes.
"""
from __future__ import annotations

import threading
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Callable, Iterator

import numpy as np

from fitting import status as st
from fitting.errors import RelaxlineError
from fitting.lm import FTOL, LAM0, MAX_ITER, XTOL, jacobian, levenberg_marquardt
from fitting.spec import Fixed, ModelSpec, subset_fixed
from fitting.uncertainty import sigma_from_residuals, stderr_from_jacobian

ENGINES = ("fast", "lmfit")  # the command line's choices
REFERENCE = "numpy"          # the numpy reference form of ``fast`` (tests, benchmarks)
BATCH_VOXELS = 8192          # voxels per vectorised batch (bounds the engine's memory)
KERNEL_BLOCK = 2048          # voxels per compiled block: one thread's unit of work
LMFIT_BATCH_VOXELS = 256     # per process, lmfit engine
LMFIT_SERIAL_BELOW = 16      # fewer lmfit fits per process than this run in this process
BOUND_RTOL = 1e-6
SIGNAL_FLOOR = 5.0           # peak signal / background σ below which no refit is tried


@dataclass
class VoxelFit:
    """Per-voxel results, each (N,)."""

    params: dict[str, np.ndarray]
    stderr: dict[str, np.ndarray]
    rmse: np.ndarray
    status: np.ndarray     # uint8 codes of fitting.status
    extras: dict[str, np.ndarray] = field(default_factory=dict)   # (N,) or (N, K)

    @classmethod
    def empty(cls, spec: ModelSpec, n: int) -> "VoxelFit":
        nan = lambda: np.full(n, np.nan)  # noqa: E731
        return cls({k: nan() for k in spec.params}, {k: nan() for k in spec.params}, nan(),
                   np.full(n, st.OUTSIDE, np.uint8))

    def put_extras(self, extras: dict[str, np.ndarray], idx: np.ndarray, n: int) -> None:
        """Store extra outputs of the voxels ``idx`` (arrays allocated on first use)."""
        for k, v in extras.items():
            v = np.asarray(v, float)
            if k not in self.extras:
                self.extras[k] = np.full((n,) + v.shape[1:], np.nan)
            self.extras[k][idx] = v


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
               max_iter: int = MAX_ITER, refit: bool = True) -> VoxelFit:
    """Fit ``spec`` to every row of ``data`` (N, M); ``x`` (M,) ascending.

    Parameters
    ----------
    fixed : constants from ``spec.fixed_from_meta`` (+ per-voxel arrays for
        ``spec.voxel_fixed`` names, shape (N,)).
    engine : ``"fast"``, ``"lmfit"`` or the reference ``"numpy"`` (module docstring).
    jobs : threads of the compiled fast engine; processes of the lmfit engine and of
        the fast engine's lmfit refits.
    noise_sigma : background noise σ for the standard errors (None: from residuals)
        and the signal floor of the refits.
    progress : called with the number of voxels finished.
    refit : fast engines only; refit non-converged voxels with lmfit (else FAILED).
    """
    if engine not in ENGINES + (REFERENCE,):
        raise ValueError(f"engine must be one of {ENGINES}, got {engine!r}")
    if engine == "lmfit" and spec.extra.get("lmfit") is False:
        raise RelaxlineError(f"the {spec.name} model has no lmfit engine ({spec.description});"
                             f" use --engine fast.")
    x = np.asarray(x, float)
    jobs = max(1, int(jobs))
    n = data.shape[0]
    out = VoxelFit.empty(spec, n)
    if n == 0:
        return out
    bad = bad_data(spec, np.asarray(data), fixed)
    out.status[bad] = st.BAD_DATA
    if progress is not None and bad.any():
        progress(int(bad.sum()))
    good = np.flatnonzero(~bad)
    compiled = engine == "fast" and spec.compiled is not None and not spec.closed_form
    if compiled:
        batch = KERNEL_BLOCK
    elif engine == "lmfit":   # ~1000x slower per voxel: small batches keep the progress moving
        batch = LMFIT_BATCH_VOXELS * jobs
    else:
        batch = BATCH_VOXELS

    def work(idx: np.ndarray):
        fx = subset_fixed(spec, fixed, idx)
        y, fx = spec.prepare(x, np.asarray(data[idx]), fx)
        extras: dict[str, np.ndarray] = {}
        done = _compiled(spec, x, y, fx, max_iter, noise_sigma) if compiled else None
        if engine != "lmfit" and spec.solver is not None:
            solved = spec.solver(x, y, fx, noise_sigma)
            p, cost, stat = solved.params, solved.cost, solved.status.astype(np.uint8)
            err, extras = solved.stderr, dict(solved.extras)
        elif done is not None:
            p, cost, stat, err = done
        elif engine == "lmfit":
            vals, cost, ok = _lmfit_voxels(spec, x, y, fx, jobs)
            p, stat, err = vals, np.where(ok, st.OK, st.FAILED).astype(np.uint8), None
        else:
            p, cost, stat = _numpy_fast(spec, x, y, fx, max_iter)
            err = None
        return idx, y, fx, p, cost, stat, err, extras

    chunks = [good[s:s + batch] for s in range(0, good.size, batch)]
    for idx, y, fx, p, cost, stat, err, extras in _in_threads(work, chunks,
                                                              jobs if compiled else 1):
        if engine != "lmfit" and spec.solver is None:
            _refit(spec, x, y, fx, p, cost, stat, noise_sigma, jobs if refit else 0)
        if spec.extras is not None:
            extras.update(spec.extras(x, y, fx, p))
        _finish(spec, x, y, fx, p, cost, stat, noise_sigma, out, idx, err)
        if extras:   # nothing is reported for a voxel whose fit failed
            failed = out.status[idx] == st.FAILED
            out.put_extras({k: np.where(failed.reshape((-1,) + (1,) * (np.ndim(v) - 1)),
                                        np.nan, v) for k, v in extras.items()}, idx, n)
        if progress is not None:
            progress(idx.size)
    return out


_THREADS: dict[int, ThreadPoolExecutor] = {}
_THREADS_LOCK = threading.Lock()


def _in_threads(fn, items: list, jobs: int) -> Iterator:
    """``map(fn, items)`` in order, on ``jobs`` threads (one reused pool per count)."""
    if jobs <= 1 or len(items) <= 1:
        return map(fn, items)
    with _THREADS_LOCK:   # fit_voxels may be called from several threads at once
        pool = _THREADS.get(jobs)
        if pool is None:
            pool = _THREADS[jobs] = ThreadPoolExecutor(max_workers=jobs,
                                                      thread_name_prefix="relaxline-fit")
    return pool.map(fn, items)


def _lm_settings(spec: ModelSpec, max_iter: int) -> dict:
    opts = dict(spec.extra.get("lm_options", {}))
    return {"max_iter": int(opts.get("max_iter", max_iter)), "xtol": float(opts.get("xtol", XTOL)),
            "ftol": float(opts.get("ftol", FTOL)), "lam0": float(opts.get("lam0", LAM0)),
            "damping": opts.get("damping", "marquardt")}


def _closed_form(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed):
    p = spec.pack(spec.init(x, y, fx))
    with np.errstate(invalid="ignore", over="ignore"):  # NaN/inf estimates -> FAILED
        f = spec.evaluate(x, p, fx)
        cost = np.einsum("nm,nm->n", f - y, f - y)
    stat = np.where(np.all(np.isfinite(p), axis=1), st.OK, st.FAILED).astype(np.uint8)
    return p, cost, stat


def _numpy_fast(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed, max_iter: int):
    """Initialisation and the batched numpy iteration (the reference of the compiled one)."""
    if spec.closed_form:
        return _closed_form(spec, x, y, fx)
    start = spec.pack(spec.init(x, y, fx))
    res = levenberg_marquardt(spec, x, y, start, fx, **_lm_settings(spec, max_iter))
    return res.params, res.cost, np.where(res.converged, st.OK, st.FAILED).astype(np.uint8)


def _compiled(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed, max_iter: int,
              noise_sigma: float | None):
    """Initialisation, then :func:`fitting.kernels.fit_block`: estimates, cost, status and
    the standard errors of the converged voxels (NaN rows elsewhere); None when the
    kernel declines these constants (e.g. ``mese`` with a slice profile)."""
    from fitting import kernels
    n = y.shape[0]
    form = spec.compiled(x, fx, n)
    if form is None:          # this configuration has no compiled form (numpy iteration)
        return None
    kind, xk, consts = form
    p = np.array(spec.pack(spec.init(x, y, fx)), dtype=float, order="C")
    opt = _lm_settings(spec, max_iter)
    scale = spec.params.index(spec.scale_param) if spec.scale_param else -1
    cost = np.empty(n)
    state = np.empty(n, np.int64)
    n_iter = np.empty(n, np.int64)
    err = np.empty((n, spec.n_params))
    kernels.fit_block(int(kind), np.ascontiguousarray(xk, dtype=float),
                      np.ascontiguousarray(y, dtype=float), p, spec.lower_array,
                      spec.upper_array, np.ascontiguousarray(consts, dtype=float), int(scale),
                      opt["max_iter"], opt["xtol"], opt["ftol"], opt["lam0"],
                      opt["damping"] == "nielsen",
                      np.nan if noise_sigma is None else float(noise_sigma),
                      cost, state, n_iter, err)
    stat = np.where(state == kernels.CONVERGED, st.OK, st.FAILED).astype(np.uint8)
    return p, cost, stat, err


def at_bound(spec: ModelSpec, p: np.ndarray) -> np.ndarray:
    """Rows of ``p`` (N, P) with a parameter within :data:`BOUND_RTOL` of its bound."""
    lo, hi = spec.lower_array, spec.upper_array
    tol_lo = BOUND_RTOL * np.maximum(1.0, np.abs(np.where(np.isfinite(lo), lo, 0)))
    tol_hi = BOUND_RTOL * np.maximum(1.0, np.abs(np.where(np.isfinite(hi), hi, 0)))
    with np.errstate(invalid="ignore"):
        return np.any((p <= lo + tol_lo) | (p >= hi - tol_hi), axis=1)


def hopeless(spec: ModelSpec, y: np.ndarray, p: np.ndarray,
             noise_sigma: float | None) -> np.ndarray:
    """Unconverged voxels a per-voxel refit would not rescue: the iteration ended with a
    parameter on its bound, or the peak signal is below :data:`SIGNAL_FLOOR` σ (noise)."""
    out = at_bound(spec, p)
    if noise_sigma is not None and noise_sigma > 0:
        with np.errstate(invalid="ignore"):
            out |= np.max(np.abs(y), axis=1) < SIGNAL_FLOOR * float(noise_sigma)
    return out


def _refit(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed, p: np.ndarray,
           cost: np.ndarray, stat: np.ndarray, noise_sigma: float | None, jobs: int) -> None:
    """In place: unconverged voxels refit by lmfit (``jobs`` = 0: none), hopeless ones
    (:func:`hopeless`) marked AT_BOUND (on a bound) or left FAILED without a refit."""
    todo = np.flatnonzero(stat == st.FAILED)
    if todo.size == 0 or jobs < 1 or spec.closed_form:
        return
    lost = hopeless(spec, y[todo], p[todo], noise_sigma)
    stat[todo[lost & at_bound(spec, p[todo])]] = st.AT_BOUND
    go = todo[~lost]
    if go.size:
        vals, costs, ok = _lmfit_voxels(spec, x, y[go], subset_fixed(spec, fx, go), jobs)
        p[go] = vals
        cost[go] = costs
        stat[go] = np.where(ok, st.OK_REFIT, st.FAILED)


def _lmfit_chunk(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed):
    """Worker: lmfit fits of the rows of ``y`` (runs in a child process for jobs > 1)."""
    from fitting.lmfit_models import build_model, fit_one, voxel_kwargs
    model = build_model(spec, fx)
    n = y.shape[0]
    vals = np.full((n, spec.n_params), np.nan)
    costs = np.full(n, np.nan)
    ok = np.zeros(n, bool)
    starts = spec.init(x, y, fx)           # one vectorised call, the same per-voxel values
    for i in range(n):
        v, _, success, c = fit_one(model, x, y[i], voxel=voxel_kwargs(spec, fx, i),
                                   start={k: float(starts[k][i]) for k in spec.params})
        vals[i], costs[i], ok[i] = v, c, success
    return vals, costs, ok


_PROCESSES: dict[int, ProcessPoolExecutor] = {}


def _process_pool(jobs: int) -> ProcessPoolExecutor:
    """One pool of ``jobs`` worker processes per process, started on first use."""
    with _THREADS_LOCK:   # slabs refit from two threads
        pool = _PROCESSES.get(jobs)
        if pool is None:
            pool = _PROCESSES[jobs] = ProcessPoolExecutor(max_workers=jobs)
    return pool


def _lmfit_voxels(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed, jobs: int):
    n = y.shape[0]
    jobs = max(1, int(jobs))
    if jobs == 1 or n < LMFIT_SERIAL_BELOW * jobs:
        return _lmfit_chunk(spec, x, y, fx)
    bounds = np.linspace(0, n, min(n, 4 * jobs) + 1).astype(int)
    parts = [np.arange(a, b) for a, b in zip(bounds[:-1], bounds[1:]) if b > a]
    pool = _process_pool(jobs)
    futs = [pool.submit(_lmfit_chunk, spec, x, y[ix], subset_fixed(spec, fx, ix))
            for ix in parts]
    results = [f.result() for f in futs]
    vals = np.concatenate([r[0] for r in results])
    costs = np.concatenate([r[1] for r in results])
    ok = np.concatenate([r[2] for r in results])
    return vals, costs, ok


def _finish(spec: ModelSpec, x: np.ndarray, y: np.ndarray, fx: Fixed, p: np.ndarray,
            cost: np.ndarray, stat: np.ndarray, noise_sigma: float | None,
            out: VoxelFit, idx: np.ndarray, err: np.ndarray | None = None) -> None:
    """Status at bounds, rmse, standard errors; NaN where the fit failed.

    ``err``: standard errors already computed for the voxels whose status is OK (the
    compiled engine's, or a model's own solver's); the others are computed here from the
    numpy Jacobian.
    """
    fin = np.all(np.isfinite(p), axis=1) & np.isfinite(cost)
    done = stat == st.OK
    stat = np.where(fin, stat, st.FAILED).astype(np.uint8)
    stat = np.where(np.isin(stat, st.USABLE) & at_bound(spec, p), st.AT_BOUND,
                    stat).astype(np.uint8)
    keep = stat != st.FAILED
    m, npar = y.shape[1], spec.n_params
    rmse = np.sqrt(cost / m)
    if noise_sigma is not None:
        sigma = np.full(idx.size, float(noise_sigma))
    else:
        sigma = sigma_from_residuals(cost, m, npar)
    if err is None:
        err = np.full((idx.size, npar), np.nan)
        todo = keep
    else:
        err = np.where(keep[:, None], err, np.nan)
        todo = keep & ~done
    ki = np.flatnonzero(todo)
    if ki.size:
        jac = jacobian(spec, x, p[ki], subset_fixed(spec, fx, ki))
        err[ki] = stderr_from_jacobian(jac, sigma[ki])
    p = np.where(keep[:, None], p, np.nan)
    if spec.finalize is not None:
        fitted = p
        p = spec.pack(spec.finalize(spec.unpack(p), fx))
        if spec.scale_param is not None:   # a rescaled scale keeps its relative error
            i = spec.params.index(spec.scale_param)
            with np.errstate(invalid="ignore", divide="ignore"):
                err[:, i] *= np.abs(np.where(fitted[:, i] != 0, p[:, i] / fitted[:, i], 1.0))
    for i, k in enumerate(spec.params):
        out.params[k][idx] = p[:, i]
        out.stderr[k][idx] = err[:, i]
    out.rmse[idx] = np.where(keep, rmse, np.nan)
    out.status[idx] = stat
