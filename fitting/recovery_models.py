"""Look-Locker (``looklocker``) and saturation-recovery (``sr``) T1 models.

Signal formulas come from :mod:`fitting.recovery`; this module adds bounds, vectorised
initialisation (the reduced-dimension search of ``ir``, :mod:`fitting.ir_search`), sidecar
handling and protocol validation.

* ``looklocker`` — inversion recovery sampled by a continuous readout train, and the
  modified sequences used for cardiac T1 (several inversions, images at their times after
  their own inversion). The series' ``InversionTime`` lists the time of each image (its
  k-space centre) after its inversion. The recovery S = A − B·e^(−TI/T1*) is fitted; the
  corrected T1 comes from one of two corrections (option ``ll_correction``):

  - ``ratio`` (default): T1 = T1*·(B/A − 1) (Deichmann & Haase 1992; Messroghli et al.
    2004). Parameters T1, M0 (= B − A) and the apparent T1* (map ``T1starmap``,
    relaxline's name), so the standard error of T1 comes straight from the fit. Needs no
    readout parameters; assumes an ideal inversion followed at once by the readout.
  - ``readout``: from the readout train, 1/T1 = 1/T1* + ln(cos(B1·α))/τ with the readout
    angle α (``FlipAngle``) and pulse spacing τ (``RepetitionTimeExcitation``, the BIDS
    key of the interval between excitations), and a B1 map when given (``--b1``).
    Parameters T1, M0 and the apparent inversion efficiency (``InvEffmap``), which
    absorbs an imperfect inversion or a pause before the first readout; T1* is written
    as an extra map. Only for continuous spoiled-gradient-echo readouts (every pulse
    spaced τ from the inversion on): not for balanced or paused readouts.

* ``sr`` — saturation recovery S = M0·(1 − η·e^(−TD/T1)) with the saturation efficiency η
  (``SatEffmap``, relaxline's name; 1 = complete saturation). The delay after the
  saturation pulse is read from the sidecar key ``SaturationDelay`` (seconds; relaxline's
  key, the BIDS specification defines none for saturation recovery).

Both take magnitude data (polarity restored in the initialisation) or complex data
(phase-corrected like ``ir``).
"""
from __future__ import annotations

import dataclasses
from typing import Any, Mapping

import numpy as np

from fitting.errors import RelaxlineError
from fitting.recovery import (ll_signal, ll_signal_readout, ll_steady_fraction, ll_t1_from_ab,
                              ll_t1_from_readout, ll_t1star, sr_signal)
from fitting.spec import ExtraOutput, Fixed, ModelSpec, Params, register
from fitting import ir_search
from fitting.t1_models import IR_GRID_POINTS, T1_LOWER, T1_UPPER, _ir_prepare

LL_CORRECTIONS = ("ratio", "readout")
EFF_UPPER = 2.0          # saturation/inversion efficiency: margin above the ideal 1


def ab_search(x: np.ndarray, data: np.ndarray, signed: bool):
    """(T, a, b) of S = a + b·e^(−x/T) per voxel by the reduced-dimension search over the
    polarity hypotheses that ``ir`` uses (:func:`fitting.ir_search.search`)."""
    return ir_search.search(x, data, signed, T1_LOWER, T1_UPPER, IR_GRID_POINTS)[:3]


def _magnitude(s: np.ndarray, fixed: Fixed) -> np.ndarray:
    return s if fixed.get("signed") else np.abs(s)


def _check_times(x: np.ndarray, key: str, name: str, n_params: int = 3) -> None:
    if np.any(~np.isfinite(x)) or np.any(x < 0):
        raise RelaxlineError(f"'{key}' values {x.tolist()} s: the {name} model needs times of "
                             f"zero or more seconds.")
    if x.size < n_params:
        raise RelaxlineError(f"the {name} model fits {n_params} parameters and needs at least "
                             f"{n_params} '{key}' values; the series has {x.size}.")


def _clip_init(t1: np.ndarray, m0: np.ndarray, data: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    t1 = np.clip(np.where(np.isfinite(t1) & (t1 > 0), t1, 1.0), T1_LOWER, T1_UPPER)
    m0 = np.where(np.isfinite(m0) & (m0 > 0), m0, np.max(np.abs(data), axis=1))
    return t1, m0


# --------------------------------------------------------------------------- looklocker
def _ll_fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    corr = options.get("ll_correction") or "ratio"
    if corr not in LL_CORRECTIONS:
        raise RelaxlineError(f"ll_correction = {corr!r}: choose one of "
                             f"{', '.join(LL_CORRECTIONS)} (option --ll-correction).")
    fixed: Fixed = {"correction": corr, "signed": False, "b1": 1.0}
    if corr == "readout":
        missing = [k for k in ("FlipAngle", "RepetitionTimeExcitation") if k not in meta]
        if missing:
            raise RelaxlineError(
                f"sidecar key(s) {', '.join(repr(k) for k in missing)} missing: the readout "
                f"correction of looklocker needs the readout angle 'FlipAngle' (degrees) and "
                f"the pulse spacing 'RepetitionTimeExcitation' (s). Add them, or use "
                f"--ll-correction ratio (T1 = T1*·(B/A − 1), no readout parameters).")
        fixed.update(alpha=float(meta["FlipAngle"]), tau=float(meta["RepetitionTimeExcitation"]))
    return fixed


def _ll_validate(x: np.ndarray, fixed: Fixed) -> None:
    _check_times(x, "InversionTime", "looklocker")
    if fixed["correction"] == "readout":
        if not 0.0 < fixed["alpha"] < 90.0:
            raise RelaxlineError(f"'FlipAngle' = {fixed['alpha']:g} degrees: the Look-Locker "
                                 f"readout angle must lie in (0, 90).")
        if not fixed["tau"] > 0:
            raise RelaxlineError(f"'RepetitionTimeExcitation' = {fixed['tau']:g} s: the readout "
                                 f"pulse spacing must be positive.")
        gaps = np.diff(np.concatenate([[0.0], x]))
        if fixed["tau"] > gaps.max() * (1 + 1e-6):
            raise RelaxlineError(
                f"'RepetitionTimeExcitation' = {fixed['tau']:g} s is longer than every gap "
                f"between the 'InversionTime' values {x.tolist()}; the readout correction "
                f"needs the spacing of the readout pulses (s), which is at most the image "
                f"spacing. Check the units and the key.")


def _ll_signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    return _magnitude(ll_signal(x, p["T1"], p["M0"], p["T1star"]), fixed)


def _ll_init(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> Params:
    """T1*, A, B by the reduced-dimension search; T1 = T1*·(B/A − 1), M0 = B − A."""
    t1s, a, b = ab_search(x, data, bool(fixed.get("signed")))
    big_b = -b
    t1, m0 = _clip_init(ll_t1_from_ab(t1s, a, big_b), big_b - a, data)
    return {"T1": t1, "M0": m0, "T1star": np.clip(t1s, T1_LOWER, T1_UPPER)}


def _ll_b1(fixed: Fixed) -> np.ndarray | float:
    return fixed["alpha"] * np.asarray(fixed.get("b1", 1.0), float)


def _ll_readout_signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    return _magnitude(ll_signal_readout(x, p["T1"], p["M0"], p["eff"], _ll_b1(fixed),
                                        fixed["tau"]), fixed)


def _ll_readout_init(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> Params:
    """T1* by the search; T1 from the readout train; M0 and eff from A and B."""
    t1s, a, b = ab_search(x, data, bool(fixed.get("signed")))
    n = data.shape[0]
    alpha = np.broadcast_to(_ll_b1(fixed), (n,))
    t1 = ll_t1_from_readout(t1s, alpha, fixed["tau"])
    t1, _ = _clip_init(t1, np.ones(n), data)
    mss = ll_steady_fraction(t1, alpha, fixed["tau"])
    with np.errstate(divide="ignore", invalid="ignore"):
        m0 = a / mss
        eff = -b / m0 - mss
    t1, m0 = _clip_init(t1, m0, data)
    eff = np.clip(np.where(np.isfinite(eff), eff, 1.0), 0.05, EFF_UPPER)
    return {"T1": t1, "M0": m0, "eff": eff}


def _ll_extras(x: np.ndarray, data: np.ndarray, fixed: Fixed, p: np.ndarray
               ) -> dict[str, np.ndarray]:
    """T1* of the readout variant, from its fitted T1 and the readout train."""
    alpha = np.broadcast_to(_ll_b1(fixed), (p.shape[0],))
    return {"T1star": ll_t1star(p[:, 0], alpha, fixed["tau"])}


def _ll_configure(spec: ModelSpec, options: Mapping[str, Any]) -> ModelSpec:
    if options.get("ll_correction") == "readout":
        return LOOKLOCKER_READOUT
    return spec


LOOKLOCKER = register(ModelSpec(
    name="looklocker",
    params=("T1", "M0", "T1star"),
    units=("s", "arbitrary", "s"),
    lower=(T1_LOWER, 0.0, T1_LOWER),
    upper=(T1_UPPER, np.inf, T1_UPPER),
    xkey="InversionTime",
    signal=_ll_signal,
    init=_ll_init,
    outputs={"T1": "T1map", "M0": "M0map", "T1star": "T1starmap"},
    min_volumes=3,
    fixed_from_meta=_ll_fixed,
    validate=_ll_validate,
    prepare=_ir_prepare,
    scale_param="M0",
    primary="T1",
    description="Look-Locker inversion recovery (continuous or modified readout): T1 = "
                "T1*·(B/A − 1), M0, apparent T1*",
    configure=_ll_configure,
    extra={"map_descriptions": {"T1starmap": "apparent recovery time T1* of S = A − "
                                             "B·exp(−TI/T1*) under the readout (s)"}},
))

LOOKLOCKER_READOUT = dataclasses.replace(
    LOOKLOCKER, params=("T1", "M0", "eff"), units=("s", "arbitrary", "ratio"),
    lower=(T1_LOWER, 0.0, 0.0), upper=(T1_UPPER, np.inf, EFF_UPPER),
    outputs={"T1": "T1map", "M0": "M0map", "eff": "InvEffmap"},
    signal=_ll_readout_signal, init=_ll_readout_init, voxel_fixed=("b1",),
    description="Look-Locker inversion recovery, T1 from T1* and the readout train "
                "(angle, pulse spacing, B1): T1, M0, apparent inversion efficiency",
    configure=None, extras=_ll_extras,
    extra_outputs={"T1star": ExtraOutput("T1starmap", "s", "apparent recovery time T1* under "
                                         "the readout, from the fitted T1 and the train")},
    extra={"map_descriptions": {"InvEffmap": "apparent inversion efficiency: Mz after the "
                                             "inversion over -M0 as seen by the readout (1 "
                                             "ideal); absorbs a pause before the first "
                                             "readout"}})


# --------------------------------------------------------------------------- sr
def _sr_fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    return {"signed": False}


def _sr_validate(x: np.ndarray, fixed: Fixed) -> None:
    _check_times(x, "SaturationDelay", "sr")
    if np.unique(x).size < 3:
        raise RelaxlineError(f"'SaturationDelay' values {x.tolist()}: the sr model needs at "
                             f"least three different delays.")


def _sr_signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    return _magnitude(sr_signal(x, p["T1"], p["M0"], p["eff"]), fixed)


def _sr_init(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> Params:
    """T1, a, b by the reduced-dimension search; M0 = a, η = −b/a."""
    t1, a, b = ab_search(x, data, bool(fixed.get("signed")))
    with np.errstate(divide="ignore", invalid="ignore"):
        eff = -b / a
    t1, m0 = _clip_init(t1, a, data)
    return {"T1": t1, "M0": m0, "eff": np.clip(np.where(np.isfinite(eff), eff, 1.0), 0.0,
                                               EFF_UPPER)}


SR = register(ModelSpec(
    name="sr",
    params=("T1", "M0", "eff"),
    units=("s", "arbitrary", "ratio"),
    lower=(T1_LOWER, 0.0, 0.0),
    upper=(T1_UPPER, np.inf, EFF_UPPER),
    xkey="SaturationDelay",
    signal=_sr_signal,
    init=_sr_init,
    outputs={"T1": "T1map", "M0": "M0map", "eff": "SatEffmap"},
    min_volumes=3,
    fixed_from_meta=_sr_fixed,
    validate=_sr_validate,
    prepare=_ir_prepare,
    scale_param="M0",
    primary="T1",
    description="saturation recovery: T1, M0 and saturation efficiency",
    # With the Rician noise model (the default for magnitude data with air) the ×10/÷10
    # damping left 210 of 9665 voxels of the demo's first session unconverged after 60
    # iterations (then refit one by one by lmfit, 2 s); Nielsen's rule: 2.
    extra={"lm_options": {"damping": "nielsen"},
           "map_descriptions": {"SatEffmap": "saturation efficiency: 1 − Mz/M0 right after "
                                             "the saturation pulse (1 = complete)"}},
))
