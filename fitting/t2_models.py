"""T2 models ``mese``, ``mese-mono`` and the T2* model ``megre`` (:class:`~fitting.spec.ModelSpec`).

Signal formulas come from :mod:`fitting.epg` and :mod:`fitting.signals`; this module adds
bounds, vectorised initialisation, sidecar handling, protocol validation and the option
variants (:func:`configure`).

* ``mese`` — T2 (s), M0 and B1 (refocusing-angle scale, ratio to nominal; it scales the
  excitation too) from a CPMG echo train by extended phase graphs (Lebel & Wilman 2010,
  Magn Reson Med 64:1005). Imperfect refocusing pulses add stimulated echoes that make
  the train decay non-exponentially; modelling them removes the T2 bias of the
  mono-exponential fit. Echo k must sit at TE = k·ESP (CPMG spacing). Initialisation
  is dictionary matching (:mod:`fitting.dictionary`), refined by the engine.
  With a B1 map (option ``b1_map``), B1 comes from ``fixed["b1"]`` and only T2 and M0 are
  fitted.

  *B1 is identifiable only up to a fold about B1c = 180°/nominal refocusing angle*
  (:func:`b1_symmetry`): refocusing angles θ and 360° − θ give the same shape of the
  magnitude train, and the excitation only scales it (absorbed by M0), so B1 and
  2·B1c − B1 fit equally well (checked against isochromats in tests/test_b1_fold.py).
  The fit runs on [0.2, 1.8] (so B1 near B1c is not pinned on a bound) and reports the
  branch whose actual refocusing angle is at most 180°, B1c − |B1c − B1|, with that
  branch's M0 (``ModelSpec.finalize``; M0·sin(B1·α_exc) is what the echoes fix). For a
  nominal 180° pulse B1c = 1 and the TB1map is 1 − |1 − B1|, the refocusing efficiency;
  at 150° nominal B1c = 1.2, so a true B1 of 1.1 is reported as 1.1 (a true 1.3 is
  indistinguishable from it). T2 does not depend on the fold. With a slice profile the
  angle scales differently at each position, the symmetry is broken and B1 is reported
  as fitted. The TB1map sidecar says which was done (:func:`b1_note`). A B1 map given
  with ``--b1`` may hold values above B1c; they enter the model unchanged.

  *Slice profile* (option ``slice_profile``, 2D acquisitions): ``fixed["profile"]`` holds
  a :class:`fitting.rfpulse.SliceProfile` and the train is the slice-profile EPG of
  :mod:`fitting.sliceprofile` (tabulated; dictionary starts from its table).

  *T1* (default :data:`T1_FIXED_DEFAULT` = 1 s, option ``t1_fixed``; or per voxel from a
  T1 map, option ``t1_map``: ``fixed["t1"]`` is then (N,) and ``"t1"`` is listed in
  ``voxel_fixed``) only weights the stimulated-echo pathways stored as Z between pulses.
  Measured on noiseless
  32-echo, 10 ms trains (T2 0.02–0.4 s, B1 0.75–1) fitted with T1 fixed at 1 s while the
  true T1 is 0.5 / 2 / 3 s: median T2 error 0.12 / 0.06 / 0.08 %, worst 3.1 / 1.6 / 2.2 %,
  the worst case being the longest T2 (0.4 s, approaching T1) at the lowest B1 (0.75).
  Longer trains and poorer refocusing weigh T1 more: on isochromat-simulated 32-echo,
  10 ms trains a fixed 1 s gives T2 +16.4 % (T2 1 s, T1 3 s, B1 0.6), +11.1 % (T2 0.7 s)
  and −4.1 % (T2 0.07 s, T1 0.28 s); with each voxel's true T1 (a T1 map) the error is
  below 1e-5 (tests/test_t1_map.py). Give a T1 map, or set ``t1_fixed`` near the expected
  T1, when long T2 and poor refocusing meet. With a T1 map, the dictionary start uses the
  nearest of a set of T1 nodes (:func:`fitting.dictionary.match_protocol`) and the
  refinement each voxel's own T1.

* ``mese-mono`` — S = M0·e^(−TE/T2) (+ a constant plateau, option ``plateau``: the level
  the decay tends to, absorbing a noise floor or a non-decaying component; map suffix
  ``Plateaumap``, relaxline's name, signal units), optionally without the first N echoes
  (option ``skip_echoes``). The first echo carries no stimulated-echo contribution and so
  breaks the train's pattern under imperfect refocusing (Milford et al. 2015, PLoS ONE
  10:e0145255); ``skip_echoes=1`` leaves it out. It overestimates T2 when B1 < 1 (Lebel & Wilman 2010); provided for
  comparison and for users who need it.

* ``megre`` — T2* and M0 from multi-echo gradient-echo magnitudes, S = M0·e^(−TE/T2*).

Noise floor: with option ``noise="rician"`` (:func:`fitting.spec.configure_model`) and the
noise σ in ``fixed["sigma"]`` (scalar, or per voxel) the forward signal of any model is the
Rician expectation (:mod:`fitting.noise`, Gudbjartsson & Patz 1995, Magn Reson Med 34:910).
"""
from __future__ import annotations

import dataclasses
from functools import partial
from typing import Any, Mapping

import numpy as np

from fitting import kernels
from fitting.dictionary import get_dictionary, match_protocol
from fitting.epg import cpmg_echoes, cpmg_echoes_jacobian
from fitting.errors import RelaxlineError
from fitting.rfpulse import SliceProfile, parse_sinc, sinc_profile
from fitting.signals import mono_exp
from fitting.sliceprofile import get_table, profile_echoes, profile_echoes_direct
from fitting.spec import Fixed, Kernel, ModelSpec, Params, per_voxel, register

T2_LOWER, T2_UPPER = 1e-3, 10.0     # s (also T2*)
B1_LOWER, B1_UPPER = 0.2, 1.8       # symmetric about 1: the echo train is even in B1 − 1
T1_FIXED_DEFAULT = 1.0              # s
ESP_RTOL = 0.01                     # allowed deviation of TE_k from k·ESP, relative to ESP
SHORT_T2_ESP = 0.4                  # B1-fitted T2 below this many echo spacings: ambiguous


# --------------------------------------------------------------------------- shared
def echo_spacing(x: np.ndarray) -> float:
    """ESP from TE_k = k·ESP by least squares through the origin."""
    k = np.arange(1, x.size + 1, dtype=float)
    return float(np.dot(k, x) / np.dot(k, k))


def short_t2(t2: np.ndarray, x: np.ndarray) -> np.ndarray:
    """True where a B1-fitted ``mese`` T2 lies below :data:`SHORT_T2_ESP` echo spacings.

    When T2 is about one echo spacing or less, only the first few echoes rise above the
    noise and the B1-fitted train has a second minimum: T2 of a few ms with B1 near 0.7
    and a large M0, whose echoes after the first come from stimulated-echo pathways
    stored as Z (decaying with T1). With a short T1 it fits noisy data better than the
    true solution. Measured on the demo phantom's vial01 (T2 12 ms, T1 0.105 s, ESP
    10 ms, 32 echoes, peak/σ ≈ 80; 123 voxels, four simulated sessions), fitted with its
    T1 map: 12-20 voxels per session at T2 1-4 ms, vial mean -9 to -14 % (median -1 to
    -4 %); with B1 from a B1 map none, mean within ±2.5 %. Such voxels are flagged to
    the user (:func:`pipeline.fitjob.fit_notes`), not altered: the data alone cannot
    decide.
    """
    return np.asarray(t2, float) < SHORT_T2_ESP * echo_spacing(np.asarray(x, float))


def _check_echo_times(x: np.ndarray, name: str) -> None:
    if np.any(~np.isfinite(x)) or np.any(x <= 0):
        raise RelaxlineError(f"'EchoTime' values must be positive seconds; the {name} model got "
                             f"{x.tolist()}.")


def _log_linear(x: np.ndarray, data: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted log-linear fit ln S = ln M0 − TE/T2 per voxel (weights S², which undo the
    log transform's noise amplification; common practice), vectorised; returns (T2, M0)."""
    pos = data > 0
    s = np.where(pos, data, 1.0)
    w = np.where(pos, s * s, 0.0)
    y = np.log(s)
    sw = w.sum(1)
    with np.errstate(divide="ignore", invalid="ignore"):
        xm = (w * x).sum(1) / sw
        ym = (w * y).sum(1) / sw
        sxx = (w * (x - xm[:, None]) ** 2).sum(1)
        slope = (w * (x - xm[:, None]) * (y - ym[:, None])).sum(1) / sxx
        t2 = -1.0 / slope
        m0 = np.exp(ym - slope * xm)
    good = np.isfinite(t2) & (t2 > 0)
    t2 = np.clip(np.where(good, t2, T2_UPPER), T2_LOWER, T2_UPPER)
    fallback = np.max(np.abs(data), axis=1)
    m0 = np.where(good & np.isfinite(m0) & (m0 > 0), m0, fallback)
    return t2, m0


def _min_echoes(x: np.ndarray, n_params: int, name: str) -> None:
    if x.size < n_params + 1:
        raise RelaxlineError(f"the {name} model fits {n_params} parameters and needs at least "
                             f"{n_params + 1} echoes (one left for the noise); the series has "
                             f"{x.size} 'EchoTime' value(s).")


def _configure(spec: ModelSpec, options: Mapping[str, Any]) -> ModelSpec:
    return configure(spec, options)     # defined below, after the specs it chooses from


# --------------------------------------------------------------------------- mese
def _mese_fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    t1 = options.get("t1_fixed")
    fixed = {"refocus": float(meta.get("RefocusingFlipAngle", 180.0)),
             "excite": float(meta.get("FlipAngle", 90.0)),
             "t1": T1_FIXED_DEFAULT if t1 is None else float(t1)}
    prof = options.get("slice_profile")
    if prof is not None and prof is not False:
        fixed["profile"] = _profile(prof, fixed)
    return fixed


def _profile(prof: Any, fixed: Fixed) -> SliceProfile:
    """The slice profile of option ``slice_profile``: a :class:`SliceProfile` (e.g. read
    from a file by the caller) or a ``sinc:TBW[:RATIO]`` spec, computed for the angles."""
    if isinstance(prof, SliceProfile):
        return prof
    sinc = parse_sinc(str(prof))
    if sinc is None:
        raise RelaxlineError(f"slice profile {prof!r}: expected sinc:TBW[:RATIO] or a profile "
                             f"read from a TSV file (columns position, excitation, refocusing).")
    return sinc_profile(sinc[0], sinc[1], fixed["excite"], fixed["refocus"])


def _mese_validate(x: np.ndarray, fixed: Fixed, n_params: int = 3) -> None:
    _check_echo_times(x, "mese")
    ref = fixed["refocus"]
    if not (np.isfinite(ref) and 0.0 < ref <= 180.0):
        raise RelaxlineError(f"'RefocusingFlipAngle' = {ref:g} degrees: the refocusing angle "
                             f"must lie in (0, 180]. Fix the sidecar (degrees, default 180).")
    if not 0.0 < fixed["excite"] < 180.0:
        raise RelaxlineError(f"'FlipAngle' = {fixed['excite']:g} degrees: the excitation angle "
                             f"of the spin-echo train must lie in (0, 180).")
    if not (np.isfinite(fixed["t1"]) and fixed["t1"] > 0):
        raise RelaxlineError(f"fixed T1 = {fixed['t1']!r} s must be a positive number of "
                             f"seconds (option --t1-fixed).")
    _min_echoes(x, n_params, "mese")
    esp = echo_spacing(x)
    k = np.arange(1, x.size + 1)
    dev = np.abs(x - k * esp)
    if dev.max() > ESP_RTOL * esp:
        i = int(dev.argmax())
        raise RelaxlineError(
            f"'EchoTime' values are not evenly spaced as TE_k = k·ESP: echo {i + 1} is at "
            f"{x[i]:g} s, expected {k[i] * esp:g} s (ESP {esp:g} s); values {x.tolist()}. "
            f"The mese model simulates a CPMG train whose echoes sit at multiples of the "
            f"echo spacing; give the complete train from the first echo, or use mese-mono.")


def _mese_b1(p: Params, fixed: Fixed):
    return p["B1"] if "B1" in p else fixed["b1"]


def _train(x: np.ndarray, p: Params, fixed: Fixed, m0, derivs: bool):
    """The mese echo train: plain EPG, or the slice-profile EPG when ``fixed["profile"]``."""
    esp, b1, prof = echo_spacing(x), _mese_b1(p, fixed), fixed.get("profile")
    if prof is not None:
        # "profile_direct": sum the positions' trains instead of building tables, for
        # callers that evaluate few voxels at many protocols (relaxline design)
        f = profile_echoes_direct if fixed.get("profile_direct") else profile_echoes
        return f(x.size, esp, p["T2"], fixed["t1"], b1, fixed["refocus"], fixed["excite"],
                 prof, m0=m0, derivs=derivs)
    f = cpmg_echoes_jacobian if derivs else cpmg_echoes
    return f(x.size, esp, p["T2"], fixed["t1"], b1=b1, refocus_deg=fixed["refocus"],
             excite_deg=fixed["excite"], m0=m0)


def _mese_kernel(x: np.ndarray, fixed: Fixed, n: int):
    """The compiled form of the plain EPG train; None with a slice profile (its tabulated
    model is evaluated by the numpy iteration)."""
    if fixed.get("profile") is not None:
        return None
    return kernels.EPG, x, kernels.constants(
        n, echo_spacing(x), fixed["t1"], np.deg2rad(fixed["refocus"]),
        np.deg2rad(fixed["excite"]), fixed.get("b1", np.nan))


def _mese_signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    return _train(x, p, fixed, p["M0"], derivs=False)


def _mese_jacobian(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    """(N, M, P) in parameter order (T2, M0[, B1]); dS/dM0 = S/M0 evaluated at M0 = 1."""
    s1, dt2, db1 = _train(x, p, fixed, 1.0, derivs=True)
    m0 = np.asarray(p["M0"], float)[:, None]
    cols = [dt2 * m0, s1]
    if "B1" in p:
        cols.append(db1 * m0)
    return np.stack(cols, axis=-1)


def b1_symmetry(fixed: Fixed) -> float | None:
    """The B1 about which the magnitude echo train's *shape* is symmetric, or None.

    The train depends on the refocusing angle θ = B1·α_ref only through cos²(θ/2),
    sin²(θ/2) and cos θ, and on sin θ only through the sign of the longitudinal states,
    which never reaches an echo: θ and 360° − θ give the same train (checked to
    rounding in tests/test_b1_fold.py). The excitation only scales the train by
    sin(B1·α_exc), which M0 absorbs. So B1 and 2·B1c − B1, with B1c = 180°/α_ref, fit
    the echoes equally well (M0 differing by the ratio of the excitation sines): an
    exact symmetry for any nominal angles, about 1 only for a 180° refocusing pulse.
    A slice profile scales the angle differently at each position and breaks it (None).
    """
    if fixed.get("profile") is not None:
        return None
    return 180.0 / float(fixed["refocus"])


def _mese_dictionary(x: np.ndarray, fixed: Fixed):
    """``t1 -> EpgDictionary`` of this protocol (plain or slice-profile model)."""
    n, esp, prof = x.size, round(echo_spacing(x), 9), fixed.get("profile")
    ref, exc = fixed["refocus"], fixed["excite"]
    if prof is not None:
        return lambda t1: get_table(n, esp, ref, exc, t1, prof).dictionary()
    return lambda t1: get_dictionary(n, esp, ref, t1, exc)


def _mese_init(x: np.ndarray, data: np.ndarray, fixed: Fixed, b1_fixed: bool = False) -> Params:
    """Best dictionary atom per voxel (normalised inner product), M0 by projection.

    With ``b1_fixed`` the match runs over T2 only, at each voxel's B1 from ``fixed["b1"]``.
    """
    b1 = np.broadcast_to(np.asarray(fixed["b1"], float), (data.shape[0],)) if b1_fixed else None
    r = match_protocol(data, fixed["t1"], _mese_dictionary(x, fixed), b1=b1)
    t2 = np.clip(np.where(np.isfinite(r.t2), r.t2, 0.1), T2_LOWER, T2_UPPER)
    m0 = np.where(np.isfinite(r.m0) & (r.m0 > 0), r.m0, np.max(np.abs(data), axis=1))
    if b1_fixed:
        return {"T2": t2, "M0": m0}
    return {"T2": t2, "M0": m0, "B1": np.clip(np.where(np.isfinite(r.b1), r.b1, 0.9),
                                              B1_LOWER, B1_UPPER)}


def _mese_finalize(p: Params, fixed: Fixed) -> Params:
    """Report the B1 branch below the symmetry point :func:`b1_symmetry` (the actual
    refocusing angle ≤ 180°) and the M0 of that branch; without a symmetry, as fitted."""
    c = b1_symmetry(fixed)
    if "B1" not in p or c is None:
        return p
    b1 = np.asarray(p["B1"], float)
    folded = c - np.abs(c - b1)
    a_exc = np.deg2rad(fixed["excite"])
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.sin(b1 * a_exc) / np.sin(folded * a_exc)
    ratio = np.where(np.isfinite(ratio) & (ratio > 0), ratio, 1.0)
    return {**p, "B1": folded, "M0": np.asarray(p["M0"], float) * ratio}


def b1_note(fixed: Fixed) -> str:
    """How the TB1map of ``mese`` was reported (its sidecar and the QC report say it)."""
    c = b1_symmetry(fixed)
    if c is None:
        return (f"B1 fitted on its physical range [{B1_LOWER:g}, {B1_UPPER:g}] and not folded: "
                f"the slice profile breaks the symmetry of the echo train in B1.")
    return (f"B1 folded about {c:g}: the echo train's shape is the same at B1 and {2 * c:g} − B1 "
            f"(refocusing angle θ and 360° − θ; nominal refocusing "
            f"{fixed['refocus']:g}°), so the branch with the actual refocusing angle at most "
            f"180° (B1 <= {c:g}) is reported, with its M0.")


def _mese_output_notes(fixed: Fixed) -> dict[str, list[str]]:
    """Notes for the map sidecars (``ModelSpec.extra["output_notes"]``)."""
    return {"TB1map": [b1_note(fixed)]}


MESE = register(ModelSpec(
    name="mese",
    params=("T2", "M0", "B1"),
    units=("s", "arbitrary", "ratio"),
    lower=(T2_LOWER, 0.0, B1_LOWER),
    upper=(T2_UPPER, np.inf, B1_UPPER),
    xkey="EchoTime",
    signal=_mese_signal,
    init=_mese_init,
    outputs={"T2": "T2map", "M0": "M0map", "B1": "TB1map"},
    min_volumes=4,
    fixed_from_meta=_mese_fixed,
    validate=_mese_validate,
    jacobian=_mese_jacobian,
    kernel=Kernel(_mese_signal, _mese_kernel),
    scale_param="M0",
    primary="T2",
    description="multi-echo spin echo (CPMG) by extended phase graphs: T2, M0, B1",
    finalize=_mese_finalize,
    configure=_configure,
    # The T2–B1–M0 valley is long and curved at moderate SNR; Nielsen's damping crosses it
    # without zig-zagging (measured at SNR 50: 2 of 2000 voxels unconverged after 60
    # iterations, against 183 with the ×10/÷10 rule). Near B1 = 1 the cost is quartic in
    # B1 − 1 and B1 creeps; ftol 1e-9 (still 15× tighter than MINPACK's default) stops
    # there: 2 instead of 33 of 5000 voxels unconverged at SNR 300, T2 within 1e-8
    # (median) of a fit run to ftol 1e-14.
    extra={"lm_options": {"damping": "nielsen", "ftol": 1e-9},
           "output_notes": _mese_output_notes, "sampled_only": True},
))

MESE_B1_FIXED = dataclasses.replace(
    MESE, params=("T2", "M0"), units=("s", "arbitrary"), lower=(T2_LOWER, 0.0),
    upper=(T2_UPPER, np.inf), outputs={"T2": "T2map", "M0": "M0map"}, min_volumes=3,
    init=partial(_mese_init, b1_fixed=True),
    validate=partial(_mese_validate, n_params=2), voxel_fixed=("b1",),
    description="multi-echo spin echo (CPMG) by extended phase graphs: T2, M0 (B1 from a map)",
    finalize=None, configure=None)


# --------------------------------------------------------------------------- mese-mono / megre
def _mono_fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    skip = options.get("skip_echoes")
    if skip is None:
        return {"skip_echoes": 0}
    if isinstance(skip, bool) or not isinstance(skip, (int, np.integer)) or skip < 0:
        raise RelaxlineError(f"skip_echoes = {skip!r}: the number of leading echoes to leave "
                             f"out must be a whole number >= 0 (option --skip-echoes).")
    return {"skip_echoes": int(skip)}


def _used(x: np.ndarray, fixed: Fixed) -> np.ndarray:
    return x[int(fixed.get("skip_echoes", 0)):]


def _mono_prepare(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> tuple[np.ndarray, Fixed]:
    data = np.abs(data) if np.iscomplexobj(data) else np.asarray(data, float)
    return data[:, int(fixed.get("skip_echoes", 0)):], fixed


def _mono_signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    t2 = p["T2"] if "T2" in p else p["T2star"]
    return mono_exp(_used(x, fixed), t2, p["M0"], p.get("plateau", 0.0))


def _mono_kernel(x: np.ndarray, fixed: Fixed, n: int):
    return kernels.MONO, np.ascontiguousarray(_used(x, fixed)), np.empty((n, 0))


def _mono_jacobian(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    """d/d(T2, M0[, plateau]) of M0·e^(−TE/T2) + plateau."""
    te = _used(x, fixed)[None, :]
    t2 = np.asarray(p["T2"] if "T2" in p else p["T2star"], float)[:, None]
    e = np.exp(-te / t2)
    cols = [np.asarray(p["M0"], float)[:, None] * e * te / t2 ** 2, e]
    if "plateau" in p:
        cols.append(np.ones_like(e))
    return np.stack(cols, axis=-1)


def _mono_init(x: np.ndarray, data: np.ndarray, fixed: Fixed, t2_name: str = "T2",
               plateau: bool = False) -> Params:
    # The plateau starts at zero: the log-linear T2 is then a slight overestimate, well
    # inside the basin of the fitted minimum.
    t2, m0 = _log_linear(_used(x, fixed), data)
    return {t2_name: t2, "M0": m0, "plateau": np.zeros(data.shape[0])} if plateau \
        else {t2_name: t2, "M0": m0}


def _megre_fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    return {}


def _mono_validate(x: np.ndarray, fixed: Fixed, n_params: int, name: str) -> None:
    _check_echo_times(x, name)
    _min_echoes(_used(x, fixed), n_params, name)


MESE_MONO = register(ModelSpec(
    name="mese-mono",
    params=("T2", "M0"),
    units=("s", "arbitrary"),
    lower=(T2_LOWER, 0.0),
    upper=(T2_UPPER, np.inf),
    xkey="EchoTime",
    signal=_mono_signal,
    init=_mono_init,
    outputs={"T2": "T2map", "M0": "M0map"},
    min_volumes=3,
    fixed_from_meta=_mono_fixed,
    validate=partial(_mono_validate, n_params=2, name="mese-mono"),
    prepare=_mono_prepare,
    jacobian=_mono_jacobian,
    scale_param="M0",
    kernel=Kernel(_mono_signal, _mono_kernel),
    primary="T2",
    description="multi-echo spin echo, mono-exponential T2 (optional plateau, leading echoes "
                "skipped)",
    configure=_configure,
))

MESE_MONO_PLATEAU = dataclasses.replace(
    MESE_MONO, params=("T2", "M0", "plateau"), units=("s", "arbitrary", "arbitrary"),
    lower=(T2_LOWER, 0.0, -np.inf), upper=(T2_UPPER, np.inf, np.inf), min_volumes=4,
    outputs={"T2": "T2map", "M0": "M0map", "plateau": "Plateaumap"},
    init=partial(_mono_init, plateau=True),
    validate=partial(_mono_validate, n_params=3, name="mese-mono"),
    scale_param=None)

MEGRE = register(ModelSpec(
    name="megre",
    params=("T2star", "M0"),
    units=("s", "arbitrary"),
    lower=(T2_LOWER, 0.0),
    upper=(T2_UPPER, np.inf),
    xkey="EchoTime",
    signal=_mono_signal,
    init=partial(_mono_init, t2_name="T2star"),
    outputs={"T2star": "T2starmap", "M0": "M0map"},
    min_volumes=3,
    fixed_from_meta=_megre_fixed,
    validate=partial(_mono_validate, n_params=2, name="megre"),
    jacobian=_mono_jacobian,
    scale_param="M0",
    kernel=Kernel(_mono_signal, _mono_kernel),
    primary="T2star",
    description="multi-echo gradient echo: T2* and M0 (magnitude, mono-exponential)",
    configure=_configure,
))


# --------------------------------------------------------------------------- options
def configure(spec: ModelSpec, options: Mapping[str, Any]) -> ModelSpec:
    """The variant of a T2 model to fit for these options (``ModelSpec.configure``).

    ``b1_map`` (a B1 map is given): ``mese`` fits T2 and M0 only, B1 from ``fixed["b1"]``.
    ``t1_map`` (a T1 map is given): ``mese`` takes each voxel's T1 from ``fixed["t1"]``
    (``"t1"`` in ``voxel_fixed``; see :mod:`fitting.spec`).
    ``plateau``: ``mese-mono`` gains a constant plateau parameter. ``skip_echoes`` is
    read by ``mese-mono``'s ``fixed_from_meta``. The noise model is applied by
    :func:`fitting.spec.configure_model`.
    """
    for opt, flag in (("plateau", "--plateau"), ("skip_echoes", "--skip-echoes")):
        if options.get(opt) is not None and options.get(opt) is not False \
                and spec.name != "mese-mono":
            raise RelaxlineError(f"option {flag} applies to the mese-mono model only, not to "
                                 f"{spec.name}.")
    if spec.name == "mese":
        out = MESE_B1_FIXED if options.get("b1_map") else spec
        return per_voxel(out, "t1") if options.get("t1_map") else out
    if spec.name == "mese-mono" and options.get("plateau"):
        return MESE_MONO_PLATEAU
    return spec
