"""Standard errors, noise estimation and Cramér–Rao bounds.

* Standard errors come from the Jacobian at the solution: cov = σ²·(JᵀJ)⁻¹ (the
  Gauss–Newton approximation of the inverse Fisher information for Gaussian noise).
* σ is estimated from the residuals, σ² = RSS/(M − P), or taken from a background
  (air) region when the series has one (:mod:`fitting.background`).
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
