"""Standard errors, noise estimation and Cramér–Rao bounds.

* Standard errors come from the Jacobian at the solution: cov = σ²·(JᵀJ)⁻¹ (the
  Gauss–Newton approximation of the inverse Fisher information for Gaussian noise).
* σ is estimated from the residuals, σ² = RSS/(M − P), or taken from a background
  (air) region when the series has one (:func:`background_sigma`).
* :func:`crlb` gives the Cramér–Rao lower bound on the standard deviation of each
  parameter for a protocol, true parameters and Gaussian noise σ (Kay 1993,
  Fundamentals of Statistical Signal Processing I, ch. 3); :func:`t1_crlb` is the
  T1 convenience at a given SNR = M0/σ.
"""
from __future__ import annotations

from typing import Iterable, Mapping

import numpy as np

from fitting.lm import jacobian, normal_matrix
from fitting.spec import Fixed, ModelSpec

# Rayleigh background of a magnitude image: E[m²] = 2σ² (Henkelman 1985, Med Phys 12:232).
RAYLEIGH_MEAN_SD_RATIO = np.sqrt(np.pi / 2) / np.sqrt((4 - np.pi) / 2)   # ≈ 1.913
BACKGROUND_QUANTILE = 0.999
MIN_BACKGROUND_SAMPLES = 1000


def covariance(jac: np.ndarray, sigma: np.ndarray | float) -> np.ndarray:
    """σ²·(JᵀJ)⁻¹ per voxel, (N, P, P); NaN where JᵀJ is singular."""
    jtj = normal_matrix(jac)
    out = np.full_like(jtj, np.nan)
    det_ok = np.isfinite(jtj).all(axis=(1, 2))
    if det_ok.any():
        sub = jtj[det_ok]
        # scale to unit diagonal for a well-conditioned inverse
        d = np.sqrt(np.einsum("nii->ni", sub))
        d = np.where(d > 0, d, 1.0)
        scaled = sub / (d[:, :, None] * d[:, None, :])
        # unit diagonal: a determinant near 0 means (numerically) dependent columns
        with np.errstate(invalid="ignore", over="ignore"):
            det = np.linalg.det(scaled)
        good = np.isfinite(det) & (det > 1e-13)
        inv = np.full_like(sub, np.nan)
        if good.any():
            inv[good] = np.linalg.inv(scaled[good]) / (d[good][:, :, None] * d[good][:, None, :])
        out[det_ok] = inv
    s2 = np.asarray(sigma, float) ** 2
    return out * np.reshape(s2, (-1, 1, 1)) if np.ndim(s2) else out * s2


def stderr_from_jacobian(jac: np.ndarray, sigma: np.ndarray | float) -> np.ndarray:
    """Standard errors (N, P) = √diag(σ²·(JᵀJ)⁻¹)."""
    cov = covariance(jac, sigma)
    with np.errstate(invalid="ignore"):
        return np.sqrt(np.einsum("nii->ni", cov))


def sigma_from_residuals(cost: np.ndarray, n_points: int, n_params: int) -> np.ndarray:
    """σ̂ = √(RSS/(M − P)); NaN when there are no residual degrees of freedom."""
    dof = n_points - n_params
    if dof <= 0:
        return np.full(np.shape(cost), np.nan)
    return np.sqrt(np.asarray(cost, float) / dof)


def background_sigma(values: np.ndarray, is_complex: bool = False) -> float | None:
    """Noise σ from background samples, or None if they do not look like noise.

    ``values``: samples (any shape) from voxels believed to hold no signal. Complex
    data: σ is the standard deviation of the real and imaginary parts. Magnitude data:
    Rayleigh-distributed, σ = √(mean(m²)/2) (Henkelman 1985, Med Phys 12:232; Gudbjartsson
    & Patz 1995, Magn Reson Med 34:910). Rejected (None) when there are fewer than
    :data:`MIN_BACKGROUND_SAMPLES` samples or, for magnitude, when mean/sd is more than
    25 % off the Rayleigh value 1.913 (structured signal, zero-filled background).
    """
    v = np.asarray(values).ravel()
    v = v[np.isfinite(v)]
    if v.size < MIN_BACKGROUND_SAMPLES:
        return None
    if is_complex:
        parts = np.concatenate([v.real, v.imag]).astype(float)
        s = float(np.std(parts))
        return s if s > 0 else None
    m = np.abs(v).astype(float)
    sd = m.std()
    if not sd > 0:
        return None
    ratio = m.mean() / sd
    if abs(ratio / RAYLEIGH_MEAN_SD_RATIO - 1) > 0.25:
        return None
    return float(np.sqrt(np.mean(m * m) / 2.0))


def rayleigh_max_threshold(sigma: float, n_volumes: int,
                           quantile: float = BACKGROUND_QUANTILE) -> float:
    """Level the maximum of ``n_volumes`` independent Rayleigh(σ) samples stays below with
    probability ``quantile``: σ·√(−2·ln(1 − q^(1/n))) (Rayleigh CDF 1 − e^(−m²/2σ²))."""
    return float(sigma * np.sqrt(-2.0 * np.log(1.0 - quantile ** (1.0 / max(n_volumes, 1)))))


def background_from_max(vmax: np.ndarray, samples_fn, n_volumes: int, is_complex: bool,
                        iterations: int = 5) -> float | None:
    """Find the background of a series and its σ iteratively.

    ``vmax``: per-voxel maximum magnitude over the volumes (any shape). Starting from
    the voxels below 5 % of the 99th percentile of ``vmax`` (background is far darker
    than the object: common practice), σ is estimated, the background is redefined as
    the voxels whose maximum stays under the Rayleigh max-of-n threshold
    (:func:`rayleigh_max_threshold`) and σ re-estimated. ``samples_fn(sel)`` returns the
    data samples of the voxels selected by the boolean array ``sel``.
    """
    vmax = np.asarray(vmax, float)
    finite = np.isfinite(vmax) & (vmax > 0)
    if finite.sum() < 10:
        return None
    top = np.percentile(vmax[finite], 99)
    sel = finite & (vmax < 0.05 * top)
    sigma = None
    for _ in range(iterations):
        if sel.sum() * n_volumes < MIN_BACKGROUND_SAMPLES:
            return None
        s = background_sigma(samples_fn(sel), is_complex)
        if s is None:
            return None
        if sigma is not None and abs(s - sigma) <= 1e-3 * sigma:
            sigma = s
            break
        sigma = s
        sel = finite & (vmax < rayleigh_max_threshold(sigma, n_volumes))
    return sigma


def crlb(spec: ModelSpec, x: np.ndarray, params: Mapping[str, np.ndarray | float],
         fixed: Fixed, sigma: float | np.ndarray,
         free: Iterable[str] | None = None) -> dict[str, np.ndarray]:
    """Cramér–Rao lower bound on the standard deviation of each free parameter.

    For Gaussian noise of standard deviation σ the Fisher information of the model
    S(x; θ) is F = JᵀJ/σ², and var(θ̂ᵢ) ≥ (F⁻¹)ᵢᵢ for any unbiased estimator
    (Kay 1993, Fundamentals of Statistical Signal Processing I, §3.7). ``params``
    holds scalars or (N,) arrays (true values); ``free`` restricts the estimated
    parameters (the others are treated as known). Returns ``{name: (N,) sd bound}``.
    """
    names = list(spec.params)
    free = list(free) if free is not None else names
    arrs = np.broadcast_arrays(*[np.atleast_1d(np.asarray(params[k], float)) for k in names])
    p = np.stack(arrs, axis=-1)
    jac = jacobian(spec, np.asarray(x, float), p, fixed, central=True)
    cols = [names.index(k) for k in free]
    sd = stderr_from_jacobian(jac[..., cols], np.broadcast_to(np.asarray(sigma, float),
                                                              (p.shape[0],)))
    return {k: sd[:, i] for i, k in enumerate(free)}


def t1_crlb(spec: ModelSpec, x: np.ndarray, t1: float | np.ndarray, snr: float,
            fixed: Fixed, **others: float) -> np.ndarray:
    """Cramér–Rao bound on sd(T1) (s) at SNR = M0/σ for a protocol ``x``.

    M0 = 1 and σ = 1/SNR; the remaining parameters default to their ideal values
    (``eff`` = 1) unless given in ``others``. All parameters of ``spec`` are estimated.
    """
    defaults = {"M0": 1.0, "eff": 1.0}
    vals = {k: others.get(k, defaults.get(k)) for k in spec.params if k != "T1"}
    missing = [k for k, v in vals.items() if v is None]
    if missing:
        raise ValueError(f"t1_crlb: give values for {missing}")
    return crlb(spec, x, {"T1": t1, **vals}, fixed, 1.0 / snr)["T1"]
