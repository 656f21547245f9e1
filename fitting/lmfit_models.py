"""lmfit ``Model`` objects built generically from a :class:`~fitting.spec.ModelSpec`.

The model function calls ``spec.signal`` (so no model is written twice); parameter
names, bounds and the ``guess`` (from ``spec.init``) come from the spec. Global
constants (TR, angles) are bound when the model is built; per-voxel constants
(``spec.voxel_fixed``, e.g. a B1 value) are independent variables passed to ``fit``.
"""
from __future__ import annotations

import inspect
import sys
import threading
from typing import Any

import numpy as np

from fitting.spec import Fixed, ModelSpec


# lmfit imports these optional packages only for its plots and its JSON form of data
# frames, which relaxline never uses; a fit process that needs lmfit for a few refits
# would spend 0.15-0.7 s importing them (measured)
_LMFIT_OPTIONAL = ("pandas", "matplotlib")


_IMPORT_LOCK = threading.Lock()


def import_lmfit():
    """``lmfit``, imported (once per process) without pandas and matplotlib unless they
    are loaded already: while lmfit is imported they are hidden (their import fails,
    which lmfit handles), then made importable again. Thread-safe (slabs are fitted in
    threads side by side): a second caller waits for the first import to finish."""
    with _IMPORT_LOCK:
        if "lmfit" not in sys.modules:
            hidden = [m for m in _LMFIT_OPTIONAL if m not in sys.modules]
            for m in hidden:
                sys.modules[m] = None        # an import of m now raises ImportError
            try:
                import lmfit  # noqa: F401
            finally:
                for m in hidden:
                    if sys.modules.get(m, 0) is None:
                        del sys.modules[m]
    return sys.modules["lmfit"]


def _model_class():
    lmfit = import_lmfit()

    class SpecModel(lmfit.Model):
        """lmfit Model whose function, bounds and guess come from a ModelSpec."""

        def __init__(self, spec: ModelSpec, fixed: Fixed, **kws: Any) -> None:
            self.spec = spec
            self.fixed = dict(fixed)
            voxel = [k for k in spec.voxel_fixed]

            def func(x, **kw):
                fx = dict(self.fixed)
                for k in voxel:
                    fx[k] = np.atleast_1d(np.asarray(kw.pop(k), float))
                p = {k: np.atleast_1d(np.asarray(kw[k], float)) for k in spec.params}
                return spec.signal(np.asarray(x, float), p, fx)[0]

            sig = [inspect.Parameter("x", inspect.Parameter.POSITIONAL_OR_KEYWORD)]
            sig += [inspect.Parameter(k, inspect.Parameter.POSITIONAL_OR_KEYWORD)
                    for k in voxel]
            sig += [inspect.Parameter(k, inspect.Parameter.POSITIONAL_OR_KEYWORD, default=1.0)
                    for k in spec.params]
            func.__signature__ = inspect.Signature(sig)
            func.__name__ = f"{spec.name.replace('-', '_')}_signal"
            super().__init__(func, independent_vars=["x", *voxel], **kws)
            for k, lo, hi in zip(spec.params, spec.lower, spec.upper):
                self.set_param_hint(k, min=lo, max=hi)

        def guess(self, data, x=None, **kws):
            """Starting values from ``spec.init`` (the engines' vectorised initialiser)."""
            fx = dict(self.fixed)
            for k in self.spec.voxel_fixed:
                if k in kws:
                    fx[k] = np.atleast_1d(np.asarray(kws[k], float))
            y = np.asarray(data, float)[None, :]
            start = self.spec.init(np.asarray(x, float), y, fx)
            pars = self.make_params()
            for k, lo, hi in zip(self.spec.params, self.spec.lower, self.spec.upper):
                v = float(np.asarray(start[k]).reshape(-1)[0])
                if not np.isfinite(v):
                    v = 1.0
                pars[k].set(value=float(np.clip(v, lo, hi)), min=lo, max=hi)
            return pars

    return SpecModel


_CLASS = None


def build_model(spec: ModelSpec, fixed: Fixed) -> Any:
    """An ``lmfit.Model`` for ``spec`` with the global constants ``fixed`` bound."""
    global _CLASS
    if _CLASS is None:
        _CLASS = _model_class()
    glob = {k: v for k, v in fixed.items() if k not in spec.voxel_fixed or np.ndim(v) == 0}
    return _CLASS(spec, glob)


def voxel_kwargs(spec: ModelSpec, fixed: Fixed, i: int) -> dict[str, float]:
    """Per-voxel independent variables of voxel ``i`` for ``model.fit``."""
    out = {}
    for k in spec.voxel_fixed:
        v = fixed.get(k, 1.0)
        out[k] = float(np.asarray(v).reshape(-1)[i]) if np.ndim(v) else float(v)
    return out


def fit_one(model: Any, x: np.ndarray, y: np.ndarray, start: dict[str, float] | None = None,
            voxel: dict[str, float] | None = None):
    """Fit one voxel; returns (values (P,), stderr (P,) or NaN, success, redchi-free cost).

    ``start`` overrides the model's own ``guess`` (which is skipped when ``start`` holds
    every parameter: engines compute the starts of a whole batch in one vectorised call).
    """
    spec = model.spec
    voxel = voxel or {}
    if start is not None and all(k in start for k in spec.params):
        pars = model.make_params()       # bounds from the hints; values set below
    else:
        pars = model.guess(y, x=x, **voxel)
    if start is not None:
        for k in spec.params:
            v = start.get(k)
            if v is not None and np.isfinite(v):
                pars[k].set(value=float(np.clip(v, pars[k].min, pars[k].max)))
    try:
        res = model.fit(y, pars, x=x, **voxel)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError):
        nan = np.full(spec.n_params, np.nan)
        return nan, nan, False, np.nan
    vals = np.array([res.params[k].value for k in spec.params], float)
    errs = np.array([res.params[k].stderr if res.params[k].stderr is not None else np.nan
                     for k in spec.params], float)
    cost = float(np.sum(res.residual ** 2))
    return vals, errs, bool(res.success) and np.all(np.isfinite(vals)), cost
