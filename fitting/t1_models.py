"""T1 models ``ir``, ``vfa`` and the B1 model ``dam`` as :class:`~fitting.spec.ModelSpec` entries.

Signal formulas come from :mod:`fitting.signals`; this module adds bounds, vectorised
initialisation, sidecar handling and protocol validation.

* ``ir`` — parameters T1 (s), M0, ``eff`` (inversion efficiency, −cos θ_inv; 1 for an
  ideal 180° pulse). Output suffixes ``T1map``, ``M0map`` and ``InvEffmap`` (not a BIDS
  suffix: relaxline's name for the inversion-efficiency map, unitless). The finite-TR
  steady state is exact (:func:`fitting.signals.ir_signal`), and because (M0, eff) map
  one-to-one onto the linear constants (a, b) of S = a + b·e^(−TI/T1), T1 is unbiased for
  any inversion angle, excitation angle or TR; ``eff`` then is the *apparent* efficiency
  (it also absorbs an excitation-angle error). Magnitude data are modelled as |S| with
  polarity restored in the initialisation, which refines every plausible position of
  the null and keeps the lowest residual (:mod:`fitting.ir_search`), so the engines start
  in the global minimum's basin even when a TI sits at the null; complex data are phase-corrected
  (φ = ½·arg Σ y², the sign chosen so the signal recovers with TI) and fitted as the
  signed real signal.
* ``vfa`` — T1, M0 from spoiled gradient echoes at several flip angles, each nominal
  angle scaled by a per-voxel B1 (``fixed["b1"]``, default 1). Ideal spoiling (the Ernst
  steady state) or, when the sidecar's BIDS ``SpoilingType`` is RF/COMBINED (option
  ``spoiling``), the RF-spoiled steady state of :mod:`fitting.spoiling` for the increment
  ``SpoilingRFPhaseIncrement`` (or option ``spoiling_increment``) and an assumed T2 (option
  ``assumed_t2``, default :data:`ASSUMED_T2_DEFAULT`); that variant runs on the numpy
  iteration with its tabulated model.
* ``dam`` — B1 (actual/nominal angle ratio) and M0 from an α/2α pair in closed form;
  output ``TB1map``. At finite TR with a T1 (a T1 map, option ``t1_map``; or one value,
  ``t1_fixed``) both signals are spoiled steady states and B1 solves a quadratic in
  cos(B1·α) (:func:`fitting.signals.dam_b1`); without one, full recovery is assumed (the
  method's classic form; the pipeline warns when TR < :data:`DAM_RECOVERY_TR`).
"""
from __future__ import annotations

from typing import Any, Mapping

import numpy as np

from fitting import ir_search, kernels, spoiling
from fitting.errors import RelaxlineError
from fitting.signals import (dam_b1, dam_signals, ir_params_from_ab, ir_signal,
                             ir_signal_jacobian, spgr_signal, spgr_signal_jacobian)
from fitting.spec import Fixed, Kernel, ModelSpec, Params, per_voxel, register

T1_LOWER, T1_UPPER = 0.005, 20.0   # s; wide enough for phantoms and tissue at any field
EFF_LOWER, EFF_UPPER = 0.0, 1.5    # above 1 is unphysical, but a margin keeps noisy ideal
                                    # inversions off the bound
IR_GRID_POINTS = 64                # log-spaced T1 values of the reduced-dimension search


# --------------------------------------------------------------------------- ir
def _ir_fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    if "RepetitionTime" not in meta:
        raise RelaxlineError(
            "inversion-recovery series: sidecar key 'RepetitionTime' is missing. The ir model "
            "needs the time between inversions (s) for its exact finite-TR steady state; "
            "add RepetitionTime to the JSON sidecar(s).")
    return {"tr": float(meta["RepetitionTime"]), "alpha": float(meta.get("FlipAngle", 90.0)),
            "signed": False}


def _ir_validate(x: np.ndarray, fixed: Fixed) -> None:
    tr = fixed["tr"]
    if np.any(x >= tr):
        raise RelaxlineError(
            f"'InversionTime' values {x[x >= tr].tolist()} s are not shorter than "
            f"'RepetitionTime' = {tr:g} s. Every TI must be below TR; check the sidecar units "
            f"(seconds) and values.")
    if np.any(x < 0):
        raise RelaxlineError("'InversionTime' must not be negative.")
    if not 0.0 < fixed["alpha"] < 180.0:
        raise RelaxlineError(f"'FlipAngle' = {fixed['alpha']:g} degrees: the excitation angle "
                             f"must lie in (0, 180).")


def _ir_prepare(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> tuple[np.ndarray, Fixed]:
    """Complex data -> signed real signal by per-voxel phase correction."""
    if not np.iscomplexobj(data):
        return np.asarray(data, float), fixed
    data = np.asarray(data, np.complex128)
    # y = S·e^{iφ} with S real: y² = S²·e^{2iφ}, so φ = ½·arg Σ y² (mod π).
    phi = 0.5 * np.angle(np.sum(data * data, axis=1))
    real = np.real(data * np.exp(-1j * phi)[:, None])
    # The mod-π ambiguity is a global sign: an IR signal rises with TI (M0, eff > 0).
    sign = np.where(real[:, -1] - real[:, 0] < 0, -1.0, 1.0)
    return real * sign[:, None], {**fixed, "signed": True}


def _ir_signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    s = ir_signal(x, p["T1"], p["M0"], p["eff"], fixed["tr"], fixed["alpha"])
    return s if fixed.get("signed") else np.abs(s)


def _ir_kernel(x: np.ndarray, fixed: Fixed, n: int):
    return kernels.IR, x, kernels.constants(n, fixed["tr"], fixed["alpha"],
                                            1.0 if fixed.get("signed") else 0.0)


def _ir_jacobian(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    """(N, M, 3) in the order (T1, M0, eff); magnitude data: d|S| = sign(S)·dS, the sign
    of S being that of ∂S/∂M0 = S/M0."""
    jac = ir_signal_jacobian(x, p["T1"], p["M0"], p["eff"], fixed["tr"], fixed["alpha"])
    return jac if fixed.get("signed") else np.where(jac[..., 1:2] < 0, -1.0, 1.0) * jac


def _ir_init(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> Params:
    """Reduced-dimension non-linear least squares over the polarity hypotheses.

    T1 and the linear constants (a, b) of S = a + b·e^(−TI/T1) come from
    :func:`fitting.ir_search.search` (Barral et al. 2010, Magn Reson Med 64:1057): every
    plausible sign pattern of magnitude data is refined and the lowest residual kept,
    so the engines start in the global minimum's basin. (M0, eff) follow exactly from
    (a, b) at finite TR.
    """
    t1, a, b, _ = ir_search.search(x, data, bool(fixed.get("signed")), T1_LOWER, T1_UPPER,
                                   IR_GRID_POINTS)
    m0, eff = ir_params_from_ab(t1, a, b, fixed["tr"], fixed["alpha"])
    fallback = np.max(np.abs(data), axis=1)
    m0 = np.where(np.isfinite(m0) & (m0 > 0), m0, fallback)
    eff = np.clip(np.where(np.isfinite(eff), eff, 1.0), 0.05, EFF_UPPER)
    return {"T1": t1, "M0": m0, "eff": eff}


IR = register(ModelSpec(
    name="ir",
    params=("T1", "M0", "eff"),
    units=("s", "arbitrary", "ratio"),
    lower=(T1_LOWER, 0.0, EFF_LOWER),
    upper=(T1_UPPER, np.inf, EFF_UPPER),
    xkey="InversionTime",
    signal=_ir_signal,
    init=_ir_init,
    jacobian=_ir_jacobian,
    outputs={"T1": "T1map", "M0": "M0map", "eff": "InvEffmap"},
    min_volumes=3,   # = parameters; standard errors then need a background noise estimate
    fixed_from_meta=_ir_fixed,
    validate=_ir_validate,
    prepare=_ir_prepare,
    scale_param="M0",
    kernel=Kernel(_ir_signal, _ir_kernel),
    primary="T1",
    description="inversion recovery: T1, M0 and inversion efficiency, exact finite TR",
))


# --------------------------------------------------------------------------- vfa
SPOILING_CHOICES = ("auto", "ideal", "rf")
ASSUMED_T2_DEFAULT = 0.05           # s; T2 of the RF-spoiled model (option assumed_t2)
SPOILING_TYPES = ("RF", "GRADIENT", "COMBINED")   # BIDS SpoilingType values
B1_TABLE_MAX = 2.0                  # the spoiling table covers actual angles to 2 × nominal


def _vfa_spoiling(meta: Mapping[str, Any], options: Mapping[str, Any]) -> float | None:
    """The RF phase increment Φ0 (degrees) of the RF-spoiled model, or None (ideal).

    ``spoiling`` (option): ``auto`` (default) models RF spoiling when the sidecar's BIDS
    ``SpoilingType`` is RF or COMBINED, or when it gives ``SpoilingRFPhaseIncrement``;
    ``ideal`` always uses the Ernst steady state; ``rf`` requires an increment. The
    increment comes from ``SpoilingRFPhaseIncrement`` or the option ``spoiling_increment``.
    """
    choice = options.get("spoiling") or "auto"
    if choice not in SPOILING_CHOICES:
        raise RelaxlineError(f"spoiling {choice!r}: choose one of {', '.join(SPOILING_CHOICES)} "
                             f"(option --spoiling).")
    kind = meta.get("SpoilingType")
    if kind is not None and (not isinstance(kind, str) or kind.upper() not in SPOILING_TYPES):
        raise RelaxlineError(f"'SpoilingType' = {str(kind)[:40]!r}: BIDS allows "
                             f"{', '.join(SPOILING_TYPES)}; fix the sidecar.")
    side = meta.get("SpoilingRFPhaseIncrement")
    opt = options.get("spoiling_increment")
    if side is not None and opt is not None and not np.isclose(float(side), float(opt)):
        raise RelaxlineError(f"'SpoilingRFPhaseIncrement' = {float(side):g} degrees in the "
                             f"sidecar but --spoiling-increment {float(opt):g}; give one.")
    inc = side if side is not None else opt
    if inc is not None and not np.isfinite(float(inc)):
        raise RelaxlineError(f"RF phase increment {inc!r}: expected a number of degrees "
                             f"('SpoilingRFPhaseIncrement' or --spoiling-increment).")
    rf_said = kind is not None and kind.upper() in ("RF", "COMBINED")
    if choice == "ideal":
        return None
    if choice == "rf" or rf_said:
        if inc is None:
            raise RelaxlineError(
                f"the series is RF-spoiled ({'SpoilingType ' + kind if rf_said else '--spoiling rf'}"
                f") but its RF phase increment is unknown: add 'SpoilingRFPhaseIncrement' "
                f"(degrees) to the sidecar or give --spoiling-increment DEG; --spoiling ideal "
                f"fits the Ernst steady state instead (T1 can then be biased by tens of "
                f"percent).")
        return float(inc) % 360.0
    return None if inc is None else float(inc) % 360.0


def _vfa_fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    if "RepetitionTime" not in meta:
        raise RelaxlineError(
            "variable-flip-angle series: sidecar key 'RepetitionTime' is missing; the vfa "
            "model needs TR (s). Add it to the JSON sidecar(s).")
    t2 = options.get("assumed_t2")
    t2 = ASSUMED_T2_DEFAULT if t2 is None else t2
    if not (isinstance(t2, (int, float)) and np.isfinite(t2) and t2 > 0):
        raise RelaxlineError(f"assumed T2 {t2!r}: expected a positive number of seconds "
                             f"(option --assumed-t2).")
    return {"tr": float(meta["RepetitionTime"]), "b1": 1.0,
            "increment": _vfa_spoiling(meta, options), "t2": float(t2)}


def _vfa_validate(x: np.ndarray, fixed: Fixed) -> None:
    if np.any((x <= 0) | (x >= 180)):
        raise RelaxlineError(f"'FlipAngle' values {x.tolist()} degrees: each must lie in "
                             f"(0, 180).")
    if not fixed["tr"] > 0:
        raise RelaxlineError(f"'RepetitionTime' = {fixed['tr']:g} s must be positive.")


def _spoiling_ratio(x: np.ndarray, t1: np.ndarray, fixed: Fixed):
    """r and ∂r/∂T1 of the RF-spoiled steady state (:mod:`fitting.spoiling`), (N, M)."""
    alpha_max = min(179.0, B1_TABLE_MAX * float(np.max(x)))
    tab = spoiling.table(fixed["tr"], fixed["t2"], fixed["increment"], alpha_max)
    b1 = np.asarray(fixed.get("b1", 1.0), float)
    act = np.asarray(x, float)[None, :] * np.reshape(b1, (-1, 1))
    return tab.evaluate(act, np.asarray(t1, float)[:, None])


def _vfa_signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    s = spgr_signal(x, p["T1"], p["M0"], fixed["tr"], fixed.get("b1", 1.0))
    if fixed.get("increment") is None:
        return s
    return s * _spoiling_ratio(x, p["T1"], fixed)[0]


def _vfa_jacobian(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    """(N, M, 2) in the order (T1, M0); RF spoiling: S·r with r from the table."""
    jac = spgr_signal_jacobian(x, p["T1"], p["M0"], fixed["tr"], fixed.get("b1", 1.0))
    if fixed.get("increment") is None:
        return jac
    r, dr = _spoiling_ratio(x, p["T1"], fixed)
    s = jac[..., 1] * np.asarray(p["M0"], float)[:, None]      # ∂S/∂M0 = S/M0
    return np.stack([jac[..., 0] * r + s * dr, jac[..., 1] * r], axis=-1)


def _vfa_kernel(x: np.ndarray, fixed: Fixed, n: int):
    """The compiled ideal-spoiling train; None with RF spoiling (its tabulated model is
    evaluated by the numpy iteration)."""
    if fixed.get("increment") is not None:
        return None
    return kernels.SPGR, x, kernels.constants(n, fixed["tr"], fixed.get("b1", 1.0))


def _vfa_init(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> Params:
    """Linearised fit S/sin α = E1·S/tan α + M0·(1 − E1) per voxel (closed-form regression).

    (Gupta 1977, J Magn Reson 25:231; Deoni, Rutt & Peters 2003, Magn Reson Med 49:515.)
    Angles are the actual ones, B1·α. With RF spoiling the data are divided by the
    spoiling ratio r at that first T1 and the regression repeated once.
    """
    p = _vfa_linear(x, data, fixed)
    if fixed.get("increment") is None:
        return p
    with np.errstate(invalid="ignore", divide="ignore"):
        corrected = data / _spoiling_ratio(x, p["T1"], fixed)[0]
    q = _vfa_linear(x, corrected, fixed)
    ok = np.isfinite(q["T1"]) & np.isfinite(q["M0"])
    return {k: np.where(ok, q[k], p[k]) for k in p}


def _vfa_linear(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> Params:
    n = data.shape[0]
    b1 = np.broadcast_to(np.asarray(fixed.get("b1", 1.0), float), (n,))
    a = np.deg2rad(np.asarray(x, float))[None, :] * b1[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        yv = data / np.sin(a)
        xv = data / np.tan(a)
        xm, ym = xv.mean(1, keepdims=True), yv.mean(1, keepdims=True)
        sxx = ((xv - xm) ** 2).sum(1)
        e1 = ((xv - xm) * (yv - ym)).sum(1) / sxx
        e1 = np.clip(np.where(np.isfinite(e1), e1, 0.5), 1e-6, 1 - 1e-6)
        m0 = (ym[:, 0] - e1 * xm[:, 0]) / (1.0 - e1)
    t1 = np.clip(-fixed["tr"] / np.log(e1), T1_LOWER, T1_UPPER)
    fallback = np.max(np.abs(data), axis=1) / np.maximum(np.sin(a).max(1), 1e-6)
    m0 = np.where(np.isfinite(m0) & (m0 > 0), m0, fallback)
    return {"T1": t1, "M0": m0}


VFA = register(ModelSpec(
    name="vfa",
    params=("T1", "M0"),
    units=("s", "arbitrary"),
    lower=(T1_LOWER, 0.0),
    upper=(T1_UPPER, np.inf),
    xkey="FlipAngle",
    signal=_vfa_signal,
    init=_vfa_init,
    outputs={"T1": "T1map", "M0": "M0map"},
    min_volumes=2,
    fixed_from_meta=_vfa_fixed,
    validate=_vfa_validate,
    scale_param="M0",
    jacobian=_vfa_jacobian,
    kernel=Kernel(_vfa_signal, _vfa_kernel),
    voxel_fixed=("b1",),
    primary="T1",
    description="variable flip angle spoiled gradient echo: T1 and M0, B1-scaled angles",
))


# --------------------------------------------------------------------------- dam
DAM_RATIO_RTOL = 0.01
DAM_T1_FILL = 1.0        # s; a workflow T1 map's gaps (voxels it has no value for) use it
DAM_RECOVERY_TR = 5.0    # s; below this TR, full recovery fails for T1 of 1 s (warning)


def _dam_fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    """TR and the T1 of the finite-TR correction: per voxel from a T1 map (option
    ``t1_map``; the pipeline sets ``fixed["t1"]``), or one value (option ``t1_fixed``), or
    None (full recovery assumed, the method's classic form)."""
    t1 = options.get("t1_fixed")
    if t1 is not None and not (isinstance(t1, (int, float)) and np.isfinite(t1) and t1 > 0):
        raise RelaxlineError(f"fixed T1 {t1!r}: expected a positive number of seconds "
                             f"(option --t1-fixed).")
    tr = meta.get("RepetitionTime")
    if tr is None and (options.get("t1_map") or t1 is not None):
        raise RelaxlineError("double-angle series: sidecar key 'RepetitionTime' is missing, "
                             "but the finite-TR correction (a T1 map or --t1-fixed) needs "
                             "the TR (s); add it to the JSON sidecar(s).")
    return {"tr": np.inf if tr is None else float(tr),
            "t1": None if t1 is None else float(t1)}


def _dam_validate(x: np.ndarray, fixed: Fixed) -> None:
    if x.size != 2:
        raise RelaxlineError(f"dam needs exactly two volumes (flip angles α and 2α), got "
                             f"{x.size} 'FlipAngle' values {x.tolist()}.")
    if not abs(x[1] / x[0] - 2.0) <= 2.0 * DAM_RATIO_RTOL:
        raise RelaxlineError(f"'FlipAngle' values {x.tolist()} degrees: the double-angle method "
                             f"needs a 2:1 pair (α and 2α); got a ratio of {x[1] / x[0]:.3g}.")
    if not 0 < x[0] < 90:
        raise RelaxlineError(f"'FlipAngle' α = {x[0]:g} degrees must lie in (0, 90).")
    if not fixed["tr"] > 0:
        raise RelaxlineError(f"'RepetitionTime' = {fixed['tr']:g} s must be positive.")


def _dam_recovery(fixed: Fixed):
    """(T1, TR) for the steady state: the given T1, or full recovery (TR = ∞)."""
    t1 = fixed.get("t1")
    if t1 is None:
        return 1.0, np.inf
    return np.asarray(t1, float), fixed["tr"]


def _dam_signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    t1, tr = _dam_recovery(fixed)
    return dam_signals(float(x[0]), p["B1"], p["M0"], t1, tr)


def _dam_init(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> Params:
    """B1 from the pair in closed form (:func:`fitting.signals.dam_b1`: Insko & Bolinger
    1993, J Magn Reson A 103:82, with the finite-TR steady state when a T1 is known),
    M0 = S(α)·(1 − cos a·E1)/(sin a·(1 − E1)) with a = B1·α."""
    alpha = float(x[0])
    t1, tr = _dam_recovery(fixed)
    e1 = np.exp(-tr / t1) if np.isfinite(tr) else np.zeros(np.shape(t1))
    b1 = dam_b1(data[:, 0], data[:, 1], alpha, e1)
    a = np.deg2rad(alpha) * b1
    with np.errstate(divide="ignore", invalid="ignore"):
        m0 = data[:, 0] * (1.0 - np.cos(a) * e1) / (np.sin(a) * (1.0 - e1))
    return {"B1": b1, "M0": m0}


def dam_recovery_bias(alpha_deg: float, tr: float, t1: float) -> float:
    """Relative B1 error of the full-recovery formula at true B1 = 1 for this TR and T1."""
    s = dam_signals(alpha_deg, 1.0, 1.0, t1, tr)
    return float(dam_b1(s[0], s[1], alpha_deg)) - 1.0


def _dam_configure(spec: ModelSpec, options: Mapping[str, Any]) -> ModelSpec:
    """``t1_map``: each voxel's T1 from ``fixed["t1"]`` (:mod:`fitting.spec`)."""
    return per_voxel(spec, "t1") if options.get("t1_map") else spec


DAM = register(ModelSpec(
    name="dam",
    params=("B1", "M0"),
    units=("ratio", "arbitrary"),
    lower=(0.0, 0.0),
    upper=(3.0, np.inf),
    xkey="FlipAngle",
    signal=_dam_signal,
    init=_dam_init,
    outputs={"B1": "TB1map", "M0": "M0map"},
    min_volumes=2,
    fixed_from_meta=_dam_fixed,
    validate=_dam_validate,
    closed_form=True,
    scale_param="M0",
    primary="B1",
    description="double-angle B1 map (actual/nominal flip-angle ratio) from an α/2α pair",
    configure=_dam_configure,
    extra={"t1_fill": DAM_T1_FILL},
))
