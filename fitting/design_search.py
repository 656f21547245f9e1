"""The protocol search of ``relaxline design`` (problem and bound: :mod:`fitting.design`).

Objective
---------
The predicted coefficient of variation CV(T) = √CRLB(T)/T is evaluated on a log grid of
``grid_points`` relaxation times spanning the range [LO, HI]; the design minimises the
*worst* CV over that grid. The optimiser works on a smooth surrogate (the log-sum-exp
"soft maximum" of log CV, which tends to the maximum as its sharpness grows) with
L-BFGS-B from several starts (deterministic spreads plus seeded random ones, so the same
request gives the same protocol); every candidate is then scored on the true maximum.
The start, and the compared protocol when it is feasible under the same constraints, are
candidates too, so the result is never worse than either.
"""
from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
from scipy.optimize import minimize, minimize_scalar

from fitting.design import (INFEASIBLE_CV, MAX_ANGLE, MAX_ECHOES, MIN_ANGLE, MIN_GAP, MIN_TI,
                            N_RANDOM_STARTS, RECOVERY, SOFTMAX_POLISH, SOFTMAX_SHARPNESS,
                            DesignProblem, DesignResult, Evaluated, echo_times, evaluate,
                            min_echoes, predicted_cv, value_bounds)
from fitting.signals import ernst_angle_deg


def _soft_max_log(cv: np.ndarray, k: float = SOFTMAX_SHARPNESS) -> float:
    """Log-sum-exp surrogate of max(log CV), ≥ the true maximum and within ln(G)/k of it."""
    lc = np.log(np.minimum(cv, INFEASIBLE_CV))
    m = lc.max()
    return float(m + np.log(np.sum(np.exp(k * (lc - m)))) / k)


def _box(problem: DesignProblem) -> tuple[Callable, Callable, float, float]:
    """to_values, to_coords and coordinate bounds of the ir/vfa optimiser."""
    lo, hi = value_bounds(problem)
    if problem.model in RECOVERY:   # log delay: delays span decades
        return np.exp, np.log, float(np.log(lo)), float(np.log(hi))
    return np.asarray, np.asarray, lo, hi


def start_protocol(problem: DesignProblem) -> np.ndarray:
    """The deterministic starting protocol (also a fallback candidate).

    ir, sr: delays log-spaced from LO/4 to 2·HI (clipped to the allowed window), a common
    spread around the zero crossings T1·ln 2 (ir) and the recovery (sr); vfa: angles linearly spaced between half
    the Ernst angle of HI and twice that of LO (clipped); mese: ESP = LO/2 (clipped) with
    the largest N the limits allow.
    """
    n = problem.points
    if problem.model in RECOVERY:
        a = np.clip(problem.lo / 4, MIN_TI, problem.tr - MIN_TI)
        b = np.clip(2 * problem.hi, a, problem.tr - MIN_TI)
        return np.geomspace(a, b, n)
    if problem.model == "vfa":
        ernst = ernst_angle_deg(problem.tr, np.array([problem.hi, problem.lo])) / problem.b1
        a = np.clip(ernst[0] / 2, MIN_ANGLE, MAX_ANGLE)
        b = np.clip(2 * ernst[1], a, MAX_ANGLE)
        return np.linspace(a, b, n)
    n_max, esp_hi = _mese_limits(problem)
    if n is None:
        esp = max(problem.min_esp, min(problem.lo / 2, problem.max_train / n_max))
        n = int(np.clip(np.floor(problem.max_train / esp + 1e-9), min_echoes(problem), n_max))
    else:
        esp = float(np.clip(problem.lo / 2, problem.min_esp, esp_hi(n)))
    return echo_times(n, esp)


def spread(problem: DesignProblem, values: Sequence[float]) -> np.ndarray:
    """Sorted values pushed apart to the minimum gap (:data:`MIN_GAP`) inside the bounds.

    The bound favours clustered points (several TIs near one optimum); a protocol must
    still list distinct values, so clusters are opened up to the smallest gap a scanner
    protocol would use. Values already far enough apart are unchanged.
    """
    v = np.sort(np.asarray(values, float)).copy()
    if problem.model not in MIN_GAP or v.size < 2:
        return v
    a, r = MIN_GAP[problem.model]
    lo, hi = value_bounds(problem)
    for i in range(1, v.size):  # forward: open clusters upwards
        v[i] = max(v[i], v[i - 1] + max(a, r * v[i - 1]))
    v[-1] = min(v[-1], hi)
    for i in range(v.size - 2, -1, -1):  # backward: respect the upper bound
        v[i] = min(v[i], v[i + 1] - max(a, r * v[i]))
    return v if v[0] >= lo - 1e-12 else np.sort(np.asarray(values, float))


def _optimise_points(problem: DesignProblem) -> list[Evaluated]:
    """Multi-start L-BFGS-B on the soft maximum, for N values (ir, vfa)."""
    to_v, to_c, lo, hi = _box(problem)
    n = problem.points
    rng = np.random.default_rng(problem.seed)

    def f(c: np.ndarray, k: float = SOFTMAX_SHARPNESS) -> float:
        return _soft_max_log(predicted_cv(problem, spread(problem, to_v(c))), k)

    starts = [to_c(start_protocol(problem)),
              np.linspace(lo, hi, n + 2)[1:-1],
              np.concatenate([np.full(n // 2, lo + 0.25 * (hi - lo)),
                              np.full(n - n // 2, lo + 0.75 * (hi - lo))])]
    starts += [np.sort(rng.uniform(lo, hi, n)) for _ in range(N_RANDOM_STARTS)]
    out = []
    for c0 in starts:
        res = minimize(f, np.clip(c0, lo, hi), method="L-BFGS-B", bounds=[(lo, hi)] * n,
                       options={"maxiter": 300, "eps": 1e-5})
        out.append(evaluate(problem, spread(problem, to_v(np.clip(res.x, lo, hi))), "optimised"))
    # Continuation: a sharper surrogate from the best point approaches the true minimax.
    best = min(out, key=lambda e: e.worst)
    res = minimize(f, np.clip(to_c(best.values), lo, hi), args=(SOFTMAX_POLISH,),
                   method="L-BFGS-B", bounds=[(lo, hi)] * n, options={"maxiter": 300, "eps": 1e-5})
    out.append(evaluate(problem, spread(problem, to_v(np.clip(res.x, lo, hi))), "optimised"))
    return out


def _mese_limits(problem: DesignProblem) -> tuple[int, Callable[[int], float]]:
    """Largest N and the longest ESP for a given N."""
    if problem.max_train is None:
        return MAX_ECHOES, lambda n: max(problem.min_esp, problem.hi)
    n_max = int(min(MAX_ECHOES, np.floor(problem.max_train / problem.min_esp + 1e-9)))
    return n_max, lambda n: max(problem.min_esp, problem.max_train / n)


def _optimise_train(problem: DesignProblem) -> list[Evaluated]:
    """ESP by a log grid then bounded refinement, for each N searched (mese)."""
    n_max, esp_hi = _mese_limits(problem)
    if problem.points is not None:
        ns = [problem.points]
    else:
        ns = sorted(set(np.unique(np.round(np.geomspace(min_echoes(problem), n_max, 10))
                                  .astype(int)).tolist()))
    out = []

    def best_for(n: int) -> Evaluated:
        a, b = np.log(problem.min_esp), np.log(esp_hi(n))
        if b - a < 1e-9:
            return evaluate(problem, echo_times(n, problem.min_esp), "optimised")

        def f(le: float) -> float:
            return _soft_max_log(predicted_cv(problem, echo_times(n, np.exp(le))))

        coarse = np.linspace(a, b, 12)
        vals = [f(c) for c in coarse]
        i = int(np.argmin(vals))
        res = minimize_scalar(f, bounds=(coarse[max(i - 1, 0)], coarse[min(i + 1, 11)]),
                              method="bounded", options={"xatol": 1e-4})
        le = res.x if res.fun <= vals[i] else coarse[i]
        esp = float(np.clip(np.exp(le), problem.min_esp, esp_hi(n)))
        return evaluate(problem, echo_times(n, esp), "optimised")

    for n in ns:
        out.append(best_for(n))
    if problem.points is None:  # refine N around the best of the coarse N search
        best_n = out[int(np.argmin([e.worst for e in out]))].values.size
        for n in range(max(min_echoes(problem), best_n - 3), min(n_max, best_n + 3) + 1):
            if n not in ns:
                out.append(best_for(n))
    return out


def pad_protocol(problem: DesignProblem, values: Sequence[float]) -> np.ndarray:
    """Grow a protocol with fewer than N points to N by repeating its values greedily.

    Repeating a measurement only adds Fisher information, so the padded protocol is
    never predicted worse than the original; used to make a shorter compared protocol
    a fair candidate.
    """
    v = list(np.sort(np.asarray(values, float)))
    while problem.points is not None and len(v) < problem.points:
        trials = [np.array(v + [u]) for u in sorted(set(v))]
        scores = [float(np.max(predicted_cv(problem, t))) for t in trials]
        v = list(np.sort(trials[int(np.argmin(scores))]))
    return np.array(v)


def design(problem: DesignProblem, compare: Sequence[float] | None = None) -> DesignResult:
    """Optimise the protocol; the best of optimised, start and (feasible) compared.

    The compared protocol, if shorter than N (ir/vfa), enters padded by repetition
    (:func:`pad_protocol`); if it breaks a constraint it is reported with a note and is
    not a candidate.
    """
    start = evaluate(problem, start_protocol(problem), "start")
    cands = (_optimise_points(problem) if problem.model in RECOVERY + ("vfa",)
             else _optimise_train(problem))
    cands.append(start)
    comp = None
    if compare is not None and len(compare):
        comp = evaluate(problem, compare, "compared")
        if problem.model != "mese" and comp.values.size < (problem.points or 0):
            padded = spread(problem, np.clip(pad_protocol(problem, comp.values),
                                             *value_bounds(problem)))
            pe = evaluate(problem, padded, "compared, repeated to N points")
            if pe.feasible:
                cands.append(pe)
                comp.note = (f"{comp.values.size} points where the design has {problem.points}; "
                             f"entered the search repeated to {problem.points}: "
                             f"{', '.join(f'{v:g}' for v in pe.values)} "
                             f"(worst CV {pe.worst:.2f} %)")
        elif comp.feasible:
            cands.append(comp)
    feasible = [c for c in cands if c.feasible]
    best = min(feasible, key=lambda e: (e.worst, e.values.size))
    return DesignResult(problem=problem, proposed=best, start=start, compared=comp,
                        candidates=cands)
