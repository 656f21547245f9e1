"""The multi-component T2 model ``mese-multi`` (:class:`~fitting.spec.ModelSpec`).

Input: a CPMG multi-echo spin-echo train (echo k at k·ESP, as for ``mese``), ideally long
(32 echoes or more). The numerics are :mod:`fitting.t2dist`: the refocusing angle by the
NNLS misfit over angles, then the T2 distribution by regularised NNLS over an EPG basis
(Prasloski et al. 2012, Magn Reson Med 67:1803; Whittall & MacKay 1989, J Magn Reson
84:134). This is the model's own fast method (``ModelSpec.solver``); there is no lmfit
engine for it and no closed-form signal.

Outputs: ``T2map`` the geometric-mean T2 of the distribution; ``MWFmap`` the short-T2
fraction in percent (components with T2 ≤ ``short_t2_cutoff``, default
:data:`SHORT_T2_CUTOFF`: the myelin water fraction in white matter; BIDS suffix MWFmap,
whose values the specification recommends in percent, 0–100); ``M0map`` the
total amplitude; ``TB1map`` the refocusing scale (searched up to the fold at 180°/nominal
refocusing, as ``mese`` reports it; with a slice profile, option ``slice_profile`` for 2D
data, the basis is the slice-profile EPG of :mod:`fitting.sliceprofile` and B1 is searched
up to :data:`fitting.t2dist.B1_MAX_PROFILE`); and the
distribution itself, ``T2distmap`` (relaxline's name): 4D, one volume per T2 of the grid
(listed in the sidecar's ``AxisValues``). The basis uses a fixed T1 (option ``t1_fixed``,
default 1 s, as ``mese``).
"""
from __future__ import annotations

from typing import Any, Mapping

import numpy as np

from fitting import status as st
from fitting.errors import RelaxlineError
from fitting.spec import ExtraOutput, Fixed, ModelSpec, Params, Solved, register
from fitting.t2_models import _mese_fixed, _mese_validate, echo_spacing
from fitting.t2dist import (B1_MIN, SUB_BATCH, basis, fit_distribution, linear_stderr,
                            summaries)

SHORT_T2_CUTOFF = 0.040      # s; upper end of the short-T2 (myelin water) window, common practice
T2_GRID_POINTS = 40          # log-spaced T2 values of the basis (common practice)
T2_GRID_HIGH = 2.0           # s, longest T2 of the grid; the shortest is the echo spacing
MIN_ECHOES = 8


def _fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    """mese's constants (angles, T1, slice profile) and the short-T2 cutoff."""
    cut = options.get("short_t2_cutoff")
    return {**_mese_fixed(meta, options),
            "cutoff": SHORT_T2_CUTOFF if cut is None else float(cut)}


def _validate(x: np.ndarray, fixed: Fixed) -> None:
    _mese_validate(x, fixed, n_params=3)
    if x.size < MIN_ECHOES:
        raise RelaxlineError(f"the mese-multi model resolves a T2 distribution and needs a "
                             f"long echo train (at least {MIN_ECHOES} echoes, 32 or more "
                             f"recommended); the series has {x.size} 'EchoTime' values.")
    esp = echo_spacing(x)
    if not esp < fixed["cutoff"] < T2_GRID_HIGH:
        raise RelaxlineError(f"short-T2 cutoff {fixed['cutoff']:g} s must lie between the echo "
                             f"spacing {esp:g} s and {T2_GRID_HIGH:g} s (option "
                             f"--short-t2-cutoff).")


def _basis(x: np.ndarray, fixed: Fixed):
    esp = round(echo_spacing(x), 9)
    return basis(x.size, esp, esp, T2_GRID_HIGH, T2_GRID_POINTS, float(fixed["t1"]),
                 float(fixed["refocus"]), float(fixed["excite"]), fixed.get("profile"))


def t2_axis(x: np.ndarray, fixed: Fixed) -> np.ndarray:
    return _basis(x, fixed).t2


def _solve(x: np.ndarray, y: np.ndarray, fixed: Fixed, noise_sigma: float | None) -> Solved:
    """Distribution, summaries and linearised standard errors, block by block."""
    bas = _basis(x, fixed)
    n, m = y.shape
    params = np.full((n, 4), np.nan)
    err = np.full((n, 4), np.nan)
    cost = np.full(n, np.nan)
    dist = np.full((n, bas.t2.size), np.nan)
    status = np.full(n, st.FAILED, np.uint8)
    for lo in range(0, n, SUB_BATCH):     # bounds the (voxels × G × G) normal matrices
        sl = slice(lo, min(lo + SUB_BATCH, n))
        yy = y[sl]
        d = fit_distribution(bas, yy)
        gm, frac, total, d_gm, d_frac = summaries(bas.t2, d.weights, fixed["cutoff"])
        dof = max(m - 2, 1)
        sigma = np.full(yy.shape[0], float(noise_sigma)) if noise_sigma is not None \
            else np.sqrt(d.chi2_min / dof)
        a = bas.at(d.b1)
        se_gm, se_frac, se_m0 = linear_stderr(a, d.passive, d.mu2, sigma,
                                              [d_gm, d_frac, np.ones_like(d_gm)])
        with np.errstate(divide="ignore", invalid="ignore"):
            se_b1 = np.where(d.b1_curvature > 0, sigma * np.sqrt(2.0 / d.b1_curvature), np.nan)
        ok = d.converged & (total > 0) & np.isfinite(gm)
        params[sl] = np.stack([gm, 100.0 * frac, total, d.b1], axis=1)     # MWF in percent
        err[sl] = np.stack([se_gm, 100.0 * se_frac, se_m0, se_b1], axis=1)
        cost[sl] = d.chi2
        dist[sl] = d.weights
        status[sl] = np.where(ok, st.OK, st.FAILED)
    return Solved(params=params, cost=cost, status=status, stderr=err, extras={"dist": dist})


def _no_signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    raise RelaxlineError("mese-multi has no closed-form signal of its summary parameters (the "
                         "echo train is the sum over its fitted T2 distribution).")


def _no_init(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> Params:
    raise RelaxlineError("mese-multi is solved by its own NNLS method, not from a start.")


MESE_MULTI = register(ModelSpec(
    name="mese-multi",
    params=("T2", "MWF", "M0", "B1"),
    units=("s", "percent", "arbitrary", "ratio"),
    # MWF and B1 bounds lie outside what the solver returns ([0, 100], [B1_MIN, 1]), so a
    # single-component voxel (MWF 0) or a perfect refocusing (B1 1) is not "at a bound".
    lower=(1e-3, -100.0, 0.0, B1_MIN - 0.1),
    upper=(10.0, 200.0, np.inf, 2.0),
    xkey="EchoTime",
    signal=_no_signal,
    init=_no_init,
    outputs={"T2": "T2map", "MWF": "MWFmap", "M0": "M0map", "B1": "TB1map"},
    min_volumes=MIN_ECHOES,
    fixed_from_meta=_fixed,
    validate=_validate,
    primary="T2",
    description="multi-component T2 by regularised NNLS over an EPG basis with fitted "
                "refocusing angle: geometric-mean T2, short-T2 fraction, M0, B1",
    solver=_solve,
    extra_outputs={"dist": ExtraOutput("T2distmap", "arbitrary",
                                       "T2 distribution: amplitude of each T2 of the grid "
                                       "(AxisValues, s)", axis=t2_axis,
                                       axis_name="T2", axis_unit="s")},
    extra={"lmfit": False, "noise_models": ("gaussian",),   # NNLS: no Rician expectation
           "stderr_description": "standard error linearised on the final NNLS passive set "
                                 "and regularisation (B1: curvature of the misfit)",
           "map_descriptions": {"MWFmap": "short-T2 fraction of the T2 distribution, percent "
                                          "(T2 up to the cutoff in the sidecar's Options, "
                                          "default 0.040 s)"}},
))
