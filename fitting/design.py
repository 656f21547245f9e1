"""Protocol design from the Cramér–Rao bound (``relaxline design``).

For a model, a protocol (its acquisition values x and fixed constants) and true
parameters θ, the Fisher information under Gaussian noise of standard deviation σ is
F = JᵀJ/σ² with J = ∂S/∂θ over *all* fitted parameters (nuisance ones included: M0,
inversion efficiency, B1), and var(T̂) ≥ (F⁻¹)_TT for any unbiased estimator
(Kay 1993, Fundamentals of Statistical Signal Processing I, §3.7). The bound is
computed by :func:`fitting.uncertainty.crlb` from the model's own
:class:`~fitting.spec.ModelSpec`, so the signal equations are the fitting code's.

The search for the protocol that minimises the worst predicted CV is
:mod:`fitting.design_search`.

Acquisition, constraints and scan-time budget
---------------------------------------------
SNR is M0/σ: M0 = 1 and σ = 1/SNR in every model (the signal of a fully relaxed,
90°-excited voxel over the noise sd of one image).

* ``ir`` — N inversion times in [``MIN_TI``, TR − ``MIN_TI``] (TR = time between
  inversions, ``tr``); excitation 90°, ideal inversion (eff = 1) assumed true; T1, M0 and
  eff are estimated. Budget: each TI is one image of one TR per line, counted as N·TR ≤
  budget (``lines`` phase-encode lines per image multiply it: N·TR·lines ≤ budget).
* ``sr`` — N saturation delays in [``MIN_TI``, TR − ``MIN_TI``] (TR = time between
  saturation pulses, ``tr``), ideal saturation (eff = 1) assumed true; T1, M0 and eff
  estimated. Budget as for ``ir``.
* ``vfa`` — N flip angles in [``MIN_ANGLE``, 90]°, spoiled gradient echo of repetition
  time TR, true B1 = ``b1`` (known, as from a B1 map); T1 and M0 estimated. Budget: each
  angle is one volume of ``lines`` TRs (phase encodes × partitions), N·TR·lines ≤ budget;
  with the default lines = 1 the budget simply counts TRs (seconds of N·TR).
* ``mese`` — one CPMG train, echo k at TE = k·ESP, k = 1..N; ESP ≥ ``min_esp``; the train
  N·ESP must fit in the budget (the budget *is* the train duration) and within TR if TR is
  given. Refocusing 180° nominal, true B1 = ``b1`` (default 0.9) and T1 = ``t1`` fixed;
  T2, M0 and B1 are estimated. B1 = 1 exactly is not allowed as the truth: there the echo
  train is stationary in B1 (it is even in B1 − 1, see :mod:`fitting.t2_models`), so
  the Fisher information is singular and the bound infinite. With N free (no ``points``)
  N and ESP are optimised together; without a budget or TR, ESP ≤ HI. With a
  ``slice_profile`` (2D multi-slice) the train is the slice-profile EPG that ``fit mese
  --slice-profile`` fits, summed over the profile's positions directly (no tables: each
  candidate protocol has its own ESP); the symmetry about B1 = 1 is broken, so B1 = 1 is
  allowed.

For ir and vfa N is ``points``; if it is not given it follows from the budget (capped at
``MAX_POINTS``), else a default (8 TIs, 4 angles). Repeated values are allowed (the
optimum often repeats points).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from fitting.errors import RelaxlineError
from fitting.rfpulse import SliceProfile
from fitting.spec import ModelSpec, get_model
from fitting.uncertainty import crlb

DESIGN_MODELS = ("ir", "sr", "vfa", "mese")
RECOVERY = ("ir", "sr")   # N delays after a preparation in each period TR (same constraints)
GRID_POINTS = 16          # log-spaced relaxation times on which the worst CV is taken
SOFTMAX_SHARPNESS = 40.0  # of the log-sum-exp surrogate of max log CV ...
SOFTMAX_POLISH = 400.0    # ... and of the continuation run from the best point
MIN_TI = 0.01             # s; shortest TI and shortest gap TR − TI (readout, spoiling)
MIN_ANGLE = 1.0           # degrees
# Proposed TIs/angles are distinct (a series with a repeated value is rejected on input):
# neighbours differ by at least max(abs, rel·value).
MIN_GAP = {"ir": (0.005, 0.02), "sr": (0.005, 0.02), "vfa": (1.0, 0.0)}
MAX_ANGLE = 90.0
MIN_ESP = 0.005           # s; default shortest echo spacing
MAX_POINTS = 32           # TIs/angles derived from a budget (or --points) are capped here
MAX_POINTS_ECHOES = 256   # longest echo train --points may ask for (mese)
MAX_ECHOES = 64           # echo trains searched up to this length
DEFAULT_POINTS = {"ir": 8, "sr": 8, "vfa": 4, "mese": 32}
N_RANDOM_STARTS = 2
INFEASIBLE_CV = 1e6       # % ; stands for an infinite bound inside the optimiser
UNITS = {"ir": "s", "sr": "s", "vfa": "degrees", "mese": "s"}
VERIFY_TRIALS_MIN = 2


@dataclass(frozen=True)
class DesignProblem:
    """A design request; build it with :func:`make_problem` (which validates it)."""

    model: str
    lo: float
    hi: float
    snr: float
    points: int | None            # N (always set for ir/vfa; None = free for mese)
    tr: float | None
    budget: float | None
    lines: int = 1
    b1: float = 1.0
    t1: float = 1.0               # mese: assumed T1 (s)
    min_esp: float = MIN_ESP
    max_train: float | None = None  # mese: longest echo train (s)
    grid_points: int = GRID_POINTS
    seed: int = 0
    slice_profile: SliceProfile | None = None  # mese: 2D slice profile (fitting.rfpulse)

    @property
    def spec(self) -> ModelSpec:
        return get_model(self.model)

    @property
    def grid(self) -> np.ndarray:
        if self.lo == self.hi:
            return np.array([self.lo])
        return np.geomspace(self.lo, self.hi, self.grid_points)

    @property
    def sigma(self) -> float:
        return 1.0 / self.snr


@dataclass
class Evaluated:
    """A protocol with its predicted CV over the grid."""

    values: np.ndarray            # TIs (s), angles (deg) or echo times (s)
    cv_pct: np.ndarray            # (G,) predicted CV of T1/T2, %
    label: str = ""
    feasible: bool = True
    note: str = ""

    @property
    def worst(self) -> float:
        return float(np.max(self.cv_pct))


@dataclass
class DesignResult:
    problem: DesignProblem
    proposed: Evaluated
    start: Evaluated
    compared: Evaluated | None
    candidates: list[Evaluated] = field(default_factory=list)


# --------------------------------------------------------------------------- setup
def _bad(msg: str) -> RelaxlineError:
    return RelaxlineError(msg)


def make_problem(model: str, lo: float, hi: float, *, points: int | None = None,
                 tr: float | None = None, snr: float = 50.0, budget: float | None = None,
                 lines: int = 1, b1: float | None = None, t1: float | None = None,
                 min_esp: float = MIN_ESP, grid_points: int = GRID_POINTS,
                 seed: int = 0, slice_profile: SliceProfile | str | None = None
                 ) -> DesignProblem:
    """Validate a design request and fix N (see module docstring for the rules).

    ``lo == hi`` designs for a single relaxation time. ``slice_profile`` (mese only): a
    :class:`~fitting.rfpulse.SliceProfile` or ``sinc:TBW[:RATIO]`` for the nominal 90°/180°
    pulses. Raises RelaxlineError naming the option at fault.
    """
    if model not in DESIGN_MODELS:
        raise _bad(f"design supports the models {', '.join(DESIGN_MODELS)}; got {model!r}.")
    if slice_profile is not None and model != "mese":
        raise _bad(f"--slice-profile applies to mese only (the echo train of a 2D "
                   f"multi-slice acquisition), not to {model}.")
    if slice_profile is not None:   # the model's own route from the option to the profile
        slice_profile = get_model("mese").fixed_from_meta(
            {}, {"slice_profile": slice_profile})["profile"]
    spec = get_model(model)
    if not (np.isfinite(lo) and np.isfinite(hi) and 0 < lo <= hi):
        raise _bad(f"--range {lo:g}:{hi:g}: need 0 < LO < HI (seconds of "
                   f"{spec.primary_param}).")
    if not (np.isfinite(snr) and snr > 0):
        raise _bad(f"--snr {snr:g}: the SNR (M0/σ) must be a positive number.")
    if tr is not None and not (np.isfinite(tr) and tr > 0):
        raise _bad(f"--tr {tr:g}: the repetition time must be a positive number of seconds.")
    if budget is not None and not (np.isfinite(budget) and budget > 0):
        raise _bad(f"--budget {budget:g}: the scan-time budget must be a positive number of "
                   f"seconds.")
    if int(lines) != lines or lines < 1:
        raise _bad(f"--lines {lines!r}: must be a positive integer.")
    need = max(spec.n_params, spec.min_volumes)   # what the fitting engine accepts
    if points is not None and (int(points) != points or points < need):
        raise _bad(f"--points {points!r}: the {model} model estimates {spec.n_params} "
                   f"parameters ({', '.join(spec.params)}) and its fit needs at least "
                   f"{need} points.")
    most = MAX_POINTS_ECHOES if model == "mese" else MAX_POINTS
    if points is not None and points > most:
        raise _bad(f"--points {points!r}: at most {most} "
                   f"{'echoes' if model == 'mese' else 'points'} can be designed for {model}; "
                   f"give a smaller --points.")
    if grid_points < 2 and lo != hi:
        raise _bad("grid_points must be at least 2.")
    max_train = None
    if model in RECOVERY + ("vfa",):
        period = {"ir": "time between inversions", "sr": "time between saturation pulses",
                  "vfa": "repetition time"}[model]
        if tr is None:
            raise _bad(f"--tr is required for {model}: the {period} in seconds.")
        if model in RECOVERY and tr <= 2 * MIN_TI:
            raise _bad(f"--tr {tr:g}: the {period} must exceed {2 * MIN_TI:g} s (delays lie "
                       f"in [{MIN_TI:g} s, TR − {MIN_TI:g} s]).")
        cost = tr * lines
        if points is None:
            points = (min(MAX_POINTS, int(np.floor(budget / cost + 1e-9)))
                      if budget is not None else DEFAULT_POINTS[model])
        if points < need:
            raise _bad(f"--budget {budget:g} s allows only {points} image(s) of "
                       f"{cost:g} s (TR × lines) but {model} needs at least {need}; "
                       f"raise the budget to ≥ {need * cost:g} s or shorten TR.")
        if budget is not None and points * cost > budget * (1 + 1e-9):
            raise _bad(f"--points {points} × {cost:g} s (TR × lines) = {points * cost:g} s "
                       f"exceeds --budget {budget:g} s; lower --points, shorten TR or raise "
                       f"the budget.")
        b1_true = 1.0 if b1 is None else float(b1)
        t1_true = 1.0
    else:
        b1_true = 0.9 if b1 is None else float(b1)
        if abs(b1_true - 1.0) < 1e-3 and slice_profile is None:
            raise _bad("--b1 1 for mese: the echo train does not change to first order in B1 "
                       "at B1 = 1, so B1 (fitted) and the bound are undefined there; give the "
                       "expected B1 away from 1 (e.g. 0.9).")
        t1_true = max(1.0, hi) if t1 is None else float(t1)
        if not (np.isfinite(t1_true) and t1_true > 0):
            raise _bad(f"--t1 {t1_true:g}: must be a positive number of seconds.")
        if not (np.isfinite(min_esp) and min_esp > 0):
            raise _bad(f"--min-esp {min_esp:g}: must be a positive number of seconds.")
        limits = [v for v in (budget, tr) if v is not None]
        max_train = min(limits) if limits else None
        n_min = points if points is not None else need
        if max_train is not None and n_min * min_esp > max_train * (1 + 1e-9):
            which = "--budget" if budget is not None and max_train == budget else "--tr"
            raise _bad(f"{which} {max_train:g} s: an echo train of {n_min} echoes at the "
                       f"minimum spacing {min_esp:g} s lasts {n_min * min_esp:g} s, longer "
                       f"than allowed; raise the budget, lower --points or --min-esp.")
        if points is None and max_train is None:
            points = DEFAULT_POINTS["mese"]
    if not (np.isfinite(b1_true) and b1_true > 0):
        raise _bad(f"--b1 {b1_true:g}: must be a positive ratio.")
    return DesignProblem(model=model, lo=float(lo), hi=float(hi), snr=float(snr),
                         points=None if points is None else int(points), tr=tr, budget=budget,
                         lines=int(lines), b1=b1_true, t1=t1_true, min_esp=float(min_esp),
                         max_train=max_train, grid_points=int(grid_points), seed=int(seed),
                         slice_profile=slice_profile)


# --------------------------------------------------------------------------- the bound
def acquisition(problem: DesignProblem, values: np.ndarray) -> tuple[np.ndarray, dict[str, Any]]:
    """(x, fixed) of the model's spec for a protocol's values."""
    x = np.sort(np.asarray(values, float))
    if problem.model == "ir":
        return x, {"tr": problem.tr, "alpha": 90.0, "signed": True}
    if problem.model == "sr":
        return x, {"signed": True}
    if problem.model == "vfa":
        return x, {"tr": problem.tr, "b1": problem.b1}
    fixed: dict[str, Any] = {"refocus": 180.0, "excite": 90.0, "t1": problem.t1}
    if problem.slice_profile is not None:   # few voxels, many protocols: no tables
        fixed.update(profile=problem.slice_profile, profile_direct=True)
    return x, fixed


def truth(problem: DesignProblem, grid: np.ndarray) -> dict[str, np.ndarray]:
    """True parameters at each relaxation time of ``grid`` (M0 = 1, see module docstring)."""
    g = np.asarray(grid, float)
    one = np.ones_like(g)
    if problem.model in RECOVERY:
        return {"T1": g, "M0": one, "eff": one}
    if problem.model == "vfa":
        return {"T1": g, "M0": one}
    return {"T2": g, "M0": one, "B1": problem.b1 * one}


def predicted_cv(problem: DesignProblem, values: Sequence[float],
                 grid: np.ndarray | None = None) -> np.ndarray:
    """Cramér–Rao CV (%) of T1/T2 at each relaxation time of ``grid`` for a protocol.

    All model parameters are estimated (nuisance ones included); σ = 1/SNR, M0 = 1.
    An unidentifiable protocol gives ``inf``.
    """
    g = problem.grid if grid is None else np.asarray(grid, float)
    x, fixed = acquisition(problem, values)
    spec = problem.spec
    sd = crlb(spec, x, truth(problem, g), fixed, problem.sigma)[spec.primary_param]
    cv = 100.0 * sd / g
    return np.where(np.isfinite(cv), cv, np.inf)


def echo_times(n: int, esp: float) -> np.ndarray:
    """CPMG echo times k·ESP, k = 1..n."""
    return esp * np.arange(1, int(n) + 1)


def _is_train(v: np.ndarray) -> bool:
    """Sorted finite ``v`` are CPMG echo times k·ESP, k = 1..N, with ESP = v[0] (to 1 % of ESP)."""
    return not np.max(np.abs(v - echo_times(v.size, v[0]))) > 0.01 * v[0]


# --------------------------------------------------------------------------- feasibility
def check_protocol(problem: DesignProblem, values: Sequence[float]) -> str:
    """Why ``values`` break the problem's constraints ('' when feasible)."""
    v = np.sort(np.asarray(values, float))
    if v.size == 0 or not np.all(np.isfinite(v)):
        return "empty or non-finite values"
    if problem.model in RECOVERY:
        lo, hi = MIN_TI, problem.tr - MIN_TI
        if v[0] < lo - 1e-12 or v[-1] > hi + 1e-12:
            return f"delays must lie in [{lo:g}, {hi:g}] s (TR {problem.tr:g} s)"
    elif problem.model == "vfa":
        if v[0] < MIN_ANGLE - 1e-12 or v[-1] > MAX_ANGLE + 1e-12:
            return f"angles must lie in [{MIN_ANGLE:g}, {MAX_ANGLE:g}] degrees"
    else:
        esp = v[0]
        if not _is_train(v):
            return "echo times are not k·ESP, k = 1..N"
        if esp < problem.min_esp * (1 - 1e-9):
            return f"ESP {esp:g} s is below the minimum {problem.min_esp:g} s"
        if problem.max_train is not None and v[-1] > problem.max_train * (1 + 1e-9):
            return f"train {v[-1]:g} s exceeds the allowed {problem.max_train:g} s"
    if problem.model in MIN_GAP and v.size > 1 and np.any(np.diff(v) <= 0):
        return "values repeat; each TI or angle must be distinct"
    if problem.points is not None and v.size != problem.points:
        return f"{v.size} points where the design has {problem.points}"
    if problem.model == "mese" and v.size < min_echoes(problem):
        return f"{v.size} echoes are too few"
    return ""


def evaluate(problem: DesignProblem, values: Sequence[float], label: str = "") -> Evaluated:
    v = np.sort(np.asarray(values, float))
    note = check_protocol(problem, v)
    return Evaluated(values=v, cv_pct=predicted_cv(problem, v), label=label,
                     feasible=not note, note=note)


def min_echoes(problem: DesignProblem) -> int:
    """Fewest echoes a mese train may have (the parameters it fits, the model's minimum)."""
    spec = problem.spec
    return max(spec.n_params, spec.min_volumes)


def value_bounds(problem: DesignProblem) -> tuple[float, float]:
    if problem.model in RECOVERY:
        return MIN_TI, problem.tr - MIN_TI
    return MIN_ANGLE, MAX_ANGLE


def parse_values(model: str, text: str) -> np.ndarray:
    """A comma-separated protocol (TIs s, angles degrees, echo times s) as a sorted array."""
    try:
        v = np.array([float(t) for t in text.split(",") if t.strip()], float)
    except ValueError:
        raise _bad(f"--compare {text!r}: expected comma-separated numbers "
                   f"({'seconds' if UNITS[model] == 's' else 'degrees'}).") from None
    if v.size == 0 or not np.all(np.isfinite(v)) or np.any(v <= 0):
        raise _bad(f"--compare {text!r}: expected positive finite numbers.")
    if model == "mese" and not _is_train(np.sort(v)):
        raise _bad(f"--compare {text!r}: mese echo times must be k·ESP, k = 1..N (a CPMG "
                   f"train from its first echo).")
    return np.sort(v)


# --------------------------------------------------------------------------- Monte Carlo
@dataclass
class Simulated:
    """Monte-Carlo check of a prediction at a few relaxation times."""

    grid: np.ndarray          # (K,) true T1/T2 (s)
    predicted_cv_pct: np.ndarray
    simulated_cv_pct: np.ndarray   # sd of the estimates / true value, %
    bias_pct: np.ndarray           # (mean − true)/true, %
    trials: int
    failed: np.ndarray             # (K,) fits that returned no value


def simulate_cv(problem: DesignProblem, values: Sequence[float], grid: Sequence[float],
                trials: int = 1000, seed: int = 0, max_iter: int = 200,
                refit: bool = True) -> Simulated:
    """Fit ``trials`` noisy copies per relaxation time with the project's voxelwise engine.

    The noise is Gaussian with σ = 1/SNR added to the real signal, the noise model of
    the bound (magnitude data add Rician bias at low signal, which the bound does not
    describe); ir is simulated and fitted as signed (phase-corrected) data. The
    simulated CV is sd(T̂)/T over the trials whose fit returned a value. ``max_iter`` and
    ``refit`` are passed to the fast engine (``refit=False`` leaves the voxels its batched
    Levenberg–Marquardt does not converge as failed instead of refitting them with lmfit).
    """
    from fitting.voxelwise import fit_voxels   # the fitting engine (heavier import)

    if int(trials) < VERIFY_TRIALS_MIN:
        raise RelaxlineError(f"--trials {trials!r}: need at least 2 Monte-Carlo trials.")
    g = np.asarray(grid, float)
    spec = problem.spec
    x, fixed = acquisition(problem, values)
    fixed.pop("profile_direct", None)   # thousands of voxels at one protocol: the tables
    p = {k: np.repeat(v, trials) for k, v in truth(problem, g).items()}
    clean = spec.signal(x, p, fixed)
    rng = np.random.default_rng(seed)
    data = clean + rng.normal(0.0, problem.sigma, clean.shape)
    fit = fit_voxels(spec, x, data, fixed, engine="fast", max_iter=max_iter, refit=refit)
    est = fit.params[spec.primary_param].reshape(g.size, trials)
    ok = np.isfinite(est)
    n_ok = ok.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.nansum(est, axis=1) / n_ok
        sd = np.sqrt(np.nansum((est - mean[:, None]) ** 2, axis=1) / (n_ok - 1))
    return Simulated(grid=g, predicted_cv_pct=predicted_cv(problem, values, g),
                     simulated_cv_pct=100.0 * sd / g, bias_pct=100.0 * (mean / g - 1.0),
                     trials=int(trials), failed=trials - n_ok)
