"""Careful fit of one region: the region's mean signal by lmfit with full statistics.

Used by ``relaxline refit``. Everything here works on arrays; the region's voxels
arrive as ``data`` (N, M) with the model's ``fixed`` constants.

Mean signal
    Each voxel is first put through ``spec.prepare`` (complex data are phase-corrected
    per voxel, as in the voxelwise fits) and voxels with non-finite or all-zero data are
    dropped (:func:`fitting.voxelwise.bad_data`); the mean over the remaining voxels is
    fitted with the generic lmfit model of :mod:`fitting.lmfit_models` (signal, bounds
    and start from the spec; magnitude ``ir`` polarity is restored by the spec's init).
    Per-voxel constants (a B1 value) enter as their region mean.

Honest standard errors
    lmfit by default scales the covariance by the reduced χ², i.e. it estimates the noise
    from only M − P residuals, and its intervals then follow Student's t with few degrees
    of freedom. Here the noise of the mean signal is given instead and the fit is
    weighted by 1/σ without rescaling (``scale_covar=False``), so the standard errors are
    those of cov = (JᵀWJ)⁻¹ and χ² becomes a goodness-of-fit test. σ of the mean comes,
    in order of preference, from

    1. ``background``: the background noise σ of the series (per voxel) over √N;
    2. ``spread``: the sample standard deviation across the region's voxels at each
       point over √N (N ≥ :data:`MIN_SPREAD_VOXELS`; no background needed);
    3. ``residuals``: lmfit's default, σ from the residuals (a single voxel and no
       background).

    With a known σ the profile-likelihood intervals use Δχ² ~ χ²(1) (Wilks' theorem;
    Δχ² = 1 and 4 for 1σ and 2σ: Press et al., Numerical Recipes, 3rd ed., §15.6);
    with σ from the residuals lmfit's F-test is kept, whose one-parameter form is
    Student's t on M − P degrees of freedom. AIC and BIC likewise take the known-σ form
    (χ² + 2k, χ² + k·ln M; :func:`information_criteria`), lmfit's otherwise.

Model comparison
    :func:`alternatives` names the competing model on the same data: ``ir`` against
    ``ir`` with the inversion efficiency fixed at 1 (the same spec, lmfit parameter
    ``vary=False``), ``sr`` likewise with the saturation efficiency fixed at 1, ``mese``
    against ``mese-mono`` and back. Both are fitted to the same
    mean signal with the same weights; ΔAIC and ΔBIC are read with the usual scale
    (|Δ| < 2 no real difference, > 10 decisive: Burnham & Anderson 2002, Model Selection
    and Multimodel Inference, §2.6 — common practice).
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Mapping, Sequence

import numpy as np

from fitting import status as st
from fitting.errors import RelaxlineError
from fitting.lmfit_models import build_model, import_lmfit, voxel_kwargs
from fitting.spec import Fixed, ModelSpec, get_model, subset_fixed
from fitting.voxelwise import bad_data, fit_voxels

SIGMAS = (1, 2)                 # confidence levels of the profile intervals, in σ
MIN_SPREAD_VOXELS = 8           # fewest voxels for σ from the across-voxel spread
REDCHI_P_WARN = 0.001           # χ² tail probability below which the fit is flagged
DELTA_CLEAR = 2.0               # |ΔAIC| below this: no real difference
DELTA_STRONG = 10.0             # |ΔAIC| above this: decisive


@dataclass
class MeanSignal:
    """The prepared region mean signal and its noise."""

    x: np.ndarray
    y: np.ndarray               # (M,) mean of the prepared voxel signals
    sigma: np.ndarray | None    # (M,) σ of the mean, None: from residuals
    source: str                 # background | spread | residuals
    n_used: int                 # voxels averaged
    n_excluded: int             # voxels dropped (non-finite or all-zero data)
    fixed: Fixed                # constants with per-voxel entries replaced by region means
    keep: np.ndarray            # indices of the averaged voxels in the region


@dataclass
class RegionFit:
    """One lmfit fit of the mean signal with its statistics."""

    label: str
    spec: ModelSpec
    values: dict[str, float]
    stderr: dict[str, float]
    vary: dict[str, bool]
    ci: dict[str, dict[str, tuple[float, float]]]
    correlation: dict[str, dict[str, float]]
    chisqr: float
    redchi: float
    aic: float
    bic: float
    ndata: int
    nvarys: int
    nfree: int
    chi2_p: float               # P(χ²_ν ≥ χ²) for a known σ; NaN otherwise
    best_fit: np.ndarray
    result: Any = field(repr=False, default=None)   # the lmfit ModelResult

    def to_dict(self) -> dict[str, Any]:
        units = dict(zip(self.spec.params, self.spec.units))
        return {
            "label": self.label,
            "parameters": {k: {"value": self.values[k], "stderr": self.stderr[k],
                               "unit": units[k], "vary": self.vary[k],
                               "ci": {f"{s}sigma": list(self.ci[k][f"{s}sigma"])
                                      for s in SIGMAS} if k in self.ci else None}
                           for k in self.spec.params},
            "correlation": self.correlation, "chisqr": self.chisqr, "redchi": self.redchi,
            "aic": self.aic, "bic": self.bic, "ndata": self.ndata, "nvarys": self.nvarys,
            "nfree": self.nfree, "chi2_p": self.chi2_p}


# --------------------------------------------------------------------------- mean signal
def mean_signal(spec: ModelSpec, x: np.ndarray, data: np.ndarray, fixed: Fixed,
                noise_sigma: float | None = None) -> MeanSignal:
    """Prepare the region's voxels (N, M) and average them (module docstring)."""
    x = np.asarray(x, float)
    data = np.asarray(data)
    if data.ndim != 2 or data.shape[0] == 0:
        raise RelaxlineError("the region holds no voxels; choose a region inside the image.")
    bad = bad_data(spec, data, fixed)
    keep = np.flatnonzero(~bad)
    if keep.size == 0:
        raise RelaxlineError(f"all {data.shape[0]} voxel(s) of the region hold non-finite or "
                             f"all-zero data; choose a region with signal.")
    y, fx = spec.prepare(x, data[keep], subset_fixed(spec, fixed, keep))
    fx = region_constants(spec, fx)
    n = y.shape[0]
    mean = y.mean(axis=0)
    sigma, source = None, "residuals"
    if noise_sigma is not None and np.isfinite(noise_sigma) and noise_sigma > 0:
        sigma, source = np.full(mean.shape, float(noise_sigma) / np.sqrt(n)), "background"
    elif n >= MIN_SPREAD_VOXELS:
        sd = y.std(axis=0, ddof=1) / np.sqrt(n)
        if np.all(np.isfinite(sd) & (sd > 0)):
            sigma, source = sd, "spread"
    return MeanSignal(x, mean, sigma, source, n, int(bad.sum()), fx, keep)


def region_constants(spec: ModelSpec, fixed: Fixed, keep: np.ndarray | None = None) -> Fixed:
    """``fixed`` with each per-voxel constant (restricted to ``keep``) replaced by its mean:
    the mean signal is fitted with the region's mean B1 (an approximation for a region
    small against the B1 field's variation)."""
    fx = subset_fixed(spec, fixed, keep) if keep is not None else dict(fixed)
    for k in spec.voxel_fixed:
        if k in fx and np.ndim(fx[k]) >= 1:
            fx[k] = float(np.nanmean(np.asarray(fx[k], float)))
    return fx


# --------------------------------------------------------------------------- one fit
def _chi2_prob(best, new) -> float:
    """Confidence of a profile point when σ is known: Δχ² ~ χ²(nfix) (Wilks)."""
    from scipy.stats import chi2
    nfix = best.nvarys - new.nvarys
    return float(chi2.cdf(max(new.chisqr - best.chisqr, 0.0), nfix))


def fit_mean(spec: ModelSpec, ms: MeanSignal, fix: Mapping[str, float] | None = None,
             label: str | None = None, ci: bool = True) -> RegionFit:
    """lmfit fit of the mean signal ``ms`` with ``spec``; parameters in ``fix`` are held at
    the given value (lmfit ``vary=False``). ``ci``: profile intervals at :data:`SIGMAS`."""
    from scipy.stats import chi2

    fix = dict(fix or {})
    known = ms.sigma is not None
    model = build_model(spec, ms.fixed)
    voxel = voxel_kwargs(spec, ms.fixed, 0)
    pars = model.guess(ms.y, x=ms.x, **voxel)
    for k, v in fix.items():
        pars[k].set(value=float(v), vary=False)
    weights = 1.0 / ms.sigma if known else None
    try:
        res = model.fit(ms.y, pars, x=ms.x, weights=weights, scale_covar=not known, **voxel)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
        raise RelaxlineError(f"the {label or spec.name} fit of the region's mean signal "
                             f"failed ({exc}); check that the region holds signal.") from None
    names = list(spec.params)
    free = [k for k in names if res.params[k].vary]
    values = {k: float(res.params[k].value) for k in names}
    stderr = {k: (float(res.params[k].stderr) if res.params[k].stderr is not None
                  else float("nan")) if k in free else 0.0 for k in names}
    corr = {a: {b: 1.0 if a == b else float((res.params[a].correl or {}).get(b, np.nan))
                for b in free} for a in free}
    intervals: dict[str, dict[str, tuple[float, float]]] = {}
    if ci:
        intervals = profile_intervals(res, free, stderr, known)
    if spec.finalize is not None:
        values, intervals = _finalized(spec, ms.fixed, values, intervals)
    chi2_p = float(chi2.sf(res.chisqr, res.nfree)) if known and res.nfree > 0 else float("nan")
    aic, bic = information_criteria(res.chisqr, res.ndata, res.nvarys, known,
                                    (res.aic, res.bic))
    return RegionFit(label=label or spec.name, spec=spec, values=values, stderr=stderr,
                     vary={k: k in free for k in names}, ci=intervals, correlation=corr,
                     chisqr=float(res.chisqr), redchi=float(res.redchi), aic=aic, bic=bic, ndata=int(res.ndata), nvarys=int(res.nvarys),
                     nfree=int(res.nfree), chi2_p=chi2_p,
                     best_fit=np.asarray(res.best_fit, float), result=res)


def _finalized(spec: ModelSpec, fixed: Fixed, values: dict[str, float],
               intervals: dict[str, dict[str, tuple[float, float]]]):
    """Values and intervals as the maps report them (``ModelSpec.finalize``, e.g. the
    ``mese`` B1 folded below its symmetry point). An interval becomes the range of the reported quantity
    over the fitted interval (sampled, so a fold inside the interval is honoured)."""
    def fin(k: str, v: np.ndarray) -> np.ndarray:
        p = {n: np.full(v.shape, values[n]) for n in values}
        p[k] = v
        return np.asarray(spec.finalize(p, fixed)[k], float)

    new_values = {k: float(fin(k, np.array([v]))[0]) for k, v in values.items()}
    new_ci = {}
    for k, levels in intervals.items():
        new_ci[k] = {}
        for level, (lo, hi) in levels.items():
            if np.isfinite(lo) and np.isfinite(hi):
                f = fin(k, np.linspace(lo, hi, 201))
                new_ci[k][level] = (float(f.min()), float(f.max()))
            else:
                new_ci[k][level] = (lo, hi)
    return new_values, new_ci


def information_criteria(chisqr: float, ndata: int, nvarys: int, known: bool,
                         lmfit_values: tuple[float, float]) -> tuple[float, float]:
    """(AIC, BIC). With a known σ the Gaussian log-likelihood is −χ²/2 + const, so
    AIC = χ² + 2k and BIC = χ² + k·ln n (Akaike 1974, IEEE Trans Autom Control 19:716;
    Schwarz 1978, Ann Stat 6:461; the constant is common to all models on the same data).
    lmfit's n·ln(χ²/n) + 2k profiles out an unknown σ and is kept for that case only: with
    a known σ it overstates differences when χ² is small."""
    if known:
        return float(chisqr + 2 * nvarys), float(chisqr + nvarys * np.log(ndata))
    return float(lmfit_values[0]), float(lmfit_values[1])


def profile_intervals(res, free: Sequence[str], stderr: Mapping[str, float], known: bool
                       ) -> dict[str, dict[str, tuple[float, float]]]:
    """Profile-likelihood intervals by ``lmfit.conf_interval`` at :data:`SIGMAS` per
    parameter: ``{name: {"1sigma": (lo, hi), "2sigma": (lo, hi)}}``. ``known``: σ is known
    (Δχ² test, :func:`_chi2_prob`), else lmfit's F-test. (NaN, NaN) where the profile
    cannot be traced (no standard error, no degrees of freedom, or lmfit gives up)."""
    import warnings

    lmfit = import_lmfit()
    nan = (float("nan"), float("nan"))
    out = {k: {f"{s}sigma": nan for s in SIGMAS} for k in free}
    ok = [k for k in free if stderr.get(k) is not None and np.isfinite(stderr[k])
          and stderr[k] > 0]
    if res.nfree <= 0:
        return out
    for k in ok:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                table = lmfit.conf_interval(res, res, p_names=[k], sigmas=list(SIGMAS),
                                            prob_func=_chi2_prob if known else None)
        except Exception:   # lmfit raises plain Exceptions when a profile leaves the bounds
            continue
        rows = table[k]
        for s in SIGMAS:
            p = float(np.round(_erf_level(s), 6))
            lo = [v for q, v in rows if np.isclose(q, p) and v <= res.params[k].value]
            hi = [v for q, v in rows if np.isclose(q, p) and v >= res.params[k].value]
            if lo and hi:
                pair = (float(min(lo)), float(max(hi)))
                out[k][f"{s}sigma"] = tuple(v if np.isfinite(v) else float("nan") for v in pair)
    return out


def _erf_level(s: float) -> float:
    """Two-sided probability content of ±s·σ of a normal distribution."""
    from math import erf, sqrt
    return erf(s / sqrt(2.0))


# --------------------------------------------------------------------------- comparison
def alternatives(spec: ModelSpec) -> list[tuple[ModelSpec, dict[str, float], str]]:
    """Competing models for the same data: ``(spec, fixed parameters, label)``.

    ``ir``, ``sr``: the same spec with ``eff`` fixed at 1 (ideal inversion or saturation).
    ``mese`` (with or
    without a B1 map): ``mese-mono``. ``mese-mono``: ``mese``. Others: none. The caller
    configures the returned spec for its options and supplies its constants.
    """
    base = spec.name
    if base in ("ir", "sr") and "eff" in spec.params:     # ideal inversion / saturation
        return [(spec, {"eff": 1.0}, f"{base} (eff = 1)")]
    if base == "mese":
        return [(get_model("mese-mono"), {}, "mese-mono")]
    if base == "mese-mono":
        return [(get_model("mese"), {}, "mese")]
    return []


def compare(a: RegionFit, b: RegionFit) -> dict[str, Any]:
    """ΔAIC and ΔBIC of ``b`` relative to ``a`` (positive: ``a`` fits better) and a verdict."""
    d_aic, d_bic = b.aic - a.aic, b.bic - a.bic
    simpler = a if a.nvarys < b.nvarys else b
    if abs(d_aic) < DELTA_CLEAR:
        verdict = (f"no real difference (|ΔAIC| < {DELTA_CLEAR:g}); the simpler "
                   f"{simpler.label} suffices")
    else:
        best, other = (a, b) if d_aic > 0 else (b, a)
        strength = "decisively" if abs(d_aic) > DELTA_STRONG else "clearly"
        verdict = f"{best.label} fits {strength} better than {other.label}"
        if d_bic != 0 and (d_bic > 0) != (d_aic > 0):
            verdict += " by AIC, but BIC prefers the other"
    return {"model": a.label, "alternative": b.label, "delta_aic": float(d_aic),
            "delta_bic": float(d_bic), "verdict": verdict}


# --------------------------------------------------------------------------- voxelwise
def voxelwise_summary(spec: ModelSpec, x: np.ndarray, data: np.ndarray, fixed: Fixed,
                      noise_sigma: float | None = None, engine: str = "fast"
                      ) -> dict[str, Any]:
    """Fit every voxel of the region; median and IQR (q75 − q25) of the usable estimates.

    Counts: ``n_usable`` (status converged), ``n_at_bound``, ``n_failed``, ``n_bad_data``.
    """
    res = fit_voxels(spec, np.asarray(x, float), np.asarray(data), fixed, engine=engine,
                     noise_sigma=noise_sigma)
    use = np.isin(res.status, st.USABLE)
    params = {}
    for k in spec.params:
        v = res.params[k][use]
        if v.size:
            q1, med, q3 = (float(q) for q in np.percentile(v, [25, 50, 75]))
        else:
            q1 = med = q3 = float("nan")
        params[k] = {"median": med, "iqr": q3 - q1, "q1": q1, "q3": q3}
    return {"engine": engine, "n_voxels": int(res.status.size), "n_usable": int(use.sum()),
            "n_at_bound": int(np.sum(res.status == st.AT_BOUND)),
            "n_failed": int(np.sum(res.status == st.FAILED)),
            "n_bad_data": int(np.sum(res.status == st.BAD_DATA)), "parameters": params}


# --------------------------------------------------------------------------- whole region
@dataclass
class RegionReport:
    """Everything ``relaxline refit`` reports for one region."""

    mean: MeanSignal
    fit: RegionFit
    competitors: list[RegionFit]
    comparisons: list[dict[str, Any]]
    voxelwise: dict[str, Any] | None
    noise_sigma: float | None

    def to_dict(self) -> dict[str, Any]:
        """Numbers with stable keys (the ``--json`` body without command-level keys)."""
        f = self.fit.to_dict()
        return {
            "model": self.fit.spec.name, "n_voxels": self.mean.n_used,
            "n_excluded": self.mean.n_excluded,
            "noise": {"source": self.mean.source, "sigma_voxel": self.noise_sigma,
                      "sigma_mean": None if self.mean.sigma is None
                      else [float(v) for v in self.mean.sigma]},
            "x": [float(v) for v in self.mean.x], "mean_signal": [float(v) for v in self.mean.y],
            "best_fit": [float(v) for v in self.fit.best_fit],
            "parameters": f["parameters"], "correlation": f["correlation"],
            **{k: f[k] for k in ("chisqr", "redchi", "aic", "bic", "ndata", "nvarys", "nfree",
                                 "chi2_p")},
            "voxelwise": self.voxelwise,
            "comparison": [{**c, "fit": o.to_dict()}
                           for c, o in zip(self.comparisons, self.competitors)],
        }


def fit_region(spec: ModelSpec, x: np.ndarray, data: np.ndarray, fixed: Fixed,
               noise_sigma: float | None = None,
               competitors: Sequence[tuple[ModelSpec, Fixed, Mapping[str, float], str]] = (),
               ci: bool = True, voxelwise: bool = True, engine: str = "fast") -> RegionReport:
    """Mean-signal fit, competing fits on the same mean signal, and voxelwise fits.

    ``data`` (N, M) raw region voxels; ``fixed`` the model constants (per-voxel arrays
    (N,) for ``spec.voxel_fixed``); ``noise_sigma`` the per-voxel background noise or
    None; ``competitors``: ``(spec, its constants, fixed parameters, label)`` as built
    from :func:`alternatives`.
    """
    ms = mean_signal(spec, x, data, fixed, noise_sigma)
    main = fit_mean(spec, ms, ci=ci)
    others, comps = [], []
    for alt, alt_fixed, fix, label in competitors:
        alt_ms = replace(ms, fixed=region_constants(alt, alt_fixed, ms.keep))
        other = fit_mean(alt, alt_ms, fix=fix, label=label, ci=False)
        others.append(other)
        comps.append(compare(main, other))
    vox = voxelwise_summary(spec, x, data, fixed, noise_sigma, engine) if voxelwise else None
    return RegionReport(ms, main, others, comps, vox, noise_sigma)
