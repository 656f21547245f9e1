"""The B1 model ``afi`` (actual flip-angle imaging) as a :class:`~fitting.spec.ModelSpec`.

The series is the AFI pair: two volumes whose ``RepetitionTimeExcitation`` is the interval
in which each was read (TR1 < TR2; the key the BIDS validator requires of ``TB1AFI``;
``RepetitionTime`` is accepted in its place), in BIDS the files ``acq-tr1``/``acq-tr2``
(from memory of the qMRI appendix), with the nominal ``FlipAngle``. The signal formulas are
:mod:`fitting.afi`; B1 is solved in closed form (no iterative fit), like ``dam``.

* Default: the published closed form, valid for TR1, TR2 ≪ T1 (Yarnykh 2007, Magn Reson
  Med 57:192). Parameters B1 (``TB1map``) and the amplitude A = M0·(1 − e^(−TR1/T1)), a
  nuisance parameter written as no map (without T1 it is not M0).
* With a T1 (option ``t1_fixed``, seconds, or per voxel from a T1 map, option ``t1_map``):
  the exact finite-TR steady state is inverted for that T1, and M0 is identifiable
  (``M0map``).
"""
from __future__ import annotations

import dataclasses
from typing import Any, Mapping

import numpy as np

from fitting.afi import afi_amplitude_to_m0, afi_b1, afi_signals
from fitting.errors import RelaxlineError
from fitting.spec import Fixed, ModelSpec, Params, per_voxel, register

B1_LOWER, B1_UPPER = 0.01, 3.0    # B1 → 0: the TR ≪ T1 signal is singular (sin α → 0)


def _afi_fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    if "FlipAngle" not in meta:
        raise RelaxlineError("actual flip-angle series: sidecar key 'FlipAngle' (the nominal "
                             "angle of both excitations, degrees) is missing; add it to the "
                             "JSON sidecar(s).")
    t1 = options.get("t1_fixed")
    return {"alpha": float(meta["FlipAngle"]), "t1": np.inf if t1 is None else float(t1)}


def _afi_validate(x: np.ndarray, fixed: Fixed) -> None:
    if x.size != 2:
        raise RelaxlineError(f"afi needs exactly two volumes (the images read in the TR1 and "
                             f"TR2 intervals), got {x.size} 'RepetitionTimeExcitation' values "
                             f"{x.tolist()}.")
    if not x[0] > 0:
        raise RelaxlineError(f"'RepetitionTimeExcitation' values {x.tolist()} s must be "
                             f"positive.")
    if x[1] / x[0] < 1.5:
        raise RelaxlineError(f"'RepetitionTimeExcitation' values {x.tolist()} s: the ratio "
                             f"TR2/TR1 = "
                             f"{x[1] / x[0]:.3g} is too close to 1 for a B1 estimate (the "
                             f"method uses n = TR2/TR1 of about 5; at least 1.5 is required).")
    if not 0.0 < fixed["alpha"] < 180.0:
        raise RelaxlineError(f"'FlipAngle' = {fixed['alpha']:g} degrees: the nominal angle must "
                             f"lie in (0, 180).")
    t1 = fixed["t1"]
    if np.ndim(t1) == 0 and not t1 > 0:
        raise RelaxlineError(f"fixed T1 = {t1!r} s must be a positive number of seconds "
                             f"(option --t1-fixed).")


def _amp(p: Params, fixed: Fixed, tr1: float) -> np.ndarray:
    """A from the fitted amplitude parameter (A itself, or M0 when T1 is known)."""
    if "A" in p:
        return p["A"]
    return np.asarray(p["M0"], float) * -np.expm1(-tr1 / np.asarray(fixed["t1"], float))


def _afi_signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    return afi_signals(x, p["B1"], _amp(p, fixed, float(x[0])), fixed["alpha"], fixed["t1"])


def _afi_init(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> Params:
    """B1 by :func:`fitting.afi.afi_b1`; the amplitude by projection of the pair."""
    tr1, tr2 = float(x[0]), float(x[1])
    t1 = fixed["t1"]
    b1 = afi_b1(data[:, 0], data[:, 1], tr1, tr2, fixed["alpha"], t1)
    b1 = np.clip(b1, B1_LOWER, B1_UPPER)      # beyond the reachable ratios: at a bound
    unit = afi_signals(x, np.where(np.isfinite(b1), b1, 1.0), 1.0, fixed["alpha"], t1)
    with np.errstate(divide="ignore", invalid="ignore"):
        amp = np.einsum("nm,nm->n", data, unit) / np.einsum("nm,nm->n", unit, unit)
    amp = np.where(np.isfinite(b1), amp, np.nan)
    if np.all(np.isinf(t1)):
        return {"B1": b1, "A": amp}
    return {"B1": b1, "M0": afi_amplitude_to_m0(amp, tr1, t1)}


def _afi_configure(spec: ModelSpec, options: Mapping[str, Any]) -> ModelSpec:
    if options.get("t1_map"):             # each voxel's T1 from a T1 map (fixed["t1"] (N,))
        return per_voxel(AFI_T1, "t1")
    return AFI_T1 if options.get("t1_fixed") is not None else spec


AFI = register(ModelSpec(
    name="afi",
    params=("B1", "A"),
    units=("ratio", "arbitrary"),
    lower=(B1_LOWER, 0.0),
    upper=(B1_UPPER, np.inf),
    xkey="RepetitionTimeExcitation",
    signal=_afi_signal,
    init=_afi_init,
    outputs={"B1": "TB1map"},           # A is a nuisance parameter (module docstring)
    min_volumes=2,
    fixed_from_meta=_afi_fixed,
    validate=_afi_validate,
    closed_form=True,
    scale_param="A",
    primary="B1",
    description="actual flip-angle imaging B1 map (ratio actual/nominal) from two "
                "interleaved TRs",
    configure=_afi_configure,
    # the workflow feeds a T1 map only when asked (models.afi.t1: ir|vfa), not by default
    extra={"t1_feed": "fixed"},
))

AFI_T1 = dataclasses.replace(
    AFI, params=("B1", "M0"), outputs={"B1": "TB1map", "M0": "M0map"}, scale_param="M0",
    description="actual flip-angle imaging B1 map and M0 for a given T1 (exact finite-TR "
                "steady state)", configure=None)
