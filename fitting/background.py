"""Noise σ from the image background (air), and the mask of voxels that hold signal.

Statistic
    In air a magnitude sample m is Rayleigh(σ) and a complex sample z has |z|²/(2σ²)
    exponential with mean 1 (Gudbjartsson & Patz 1995, Magn Reson Med 34:910). Over the
    n volumes of a series, a background voxel's

        s = ½·Σ |m|²   follows a Gamma(n, θ = σ²) distribution,

    for magnitude and complex data alike.

σ from a truncated sample
    The lowest voxels of s are air, but how far up air reaches is unknown, and at low SNR
    faint object voxels overlap its upper tail (a fixed fraction of the brightest voxel,
    the earlier rule, cut into the Rayleigh body itself once the object's peak/σ fell
    below 20–30, and then no background was found at all). Here σ² is the maximum
    likelihood estimate of a Gamma(n, θ) truncated at T, using only the voxels with
    s < T; for a truncated Gamma that estimate equates the sample mean with the truncated
    mean θ·(n − h(T/θ)), h(x) = xⁿ·e^(−x)/(Γ(n)·P(n, x)), P the regularised incomplete
    gamma function (Cohen 1950, Ann Math Stat 21:557, for truncated samples; the
    partial-histogram approach to background noise of Sijbers et al. 2007, Phys Med
    Biol 52:1335). Starting from T at a low quantile of s (air dominates the darkest
    voxels), T is moved to the :data:`TRUNCATION_QUANTILE` of the current background
    distribution and σ re-estimated until it settles. Keeping only the lower part of
    the background makes the estimate insensitive to faint object voxels.

    The background is rejected (``None``) when it has fewer than
    :data:`MIN_BACKGROUND_SAMPLES` samples, when it is smaller than the share of voxels
    the start assumed to be air, when the truncated sample does not follow the truncated
    Gamma distribution (Kolmogorov distance above :data:`MAX_KS_DISTANCE`: zero-filled,
    masked, smoothed or multi-coil backgrounds), or when its volumes differ (in air each
    volume holds the same noise; dark tissue of an object filling the field recovers or
    decays from volume to volume).

Signal mask
    A voxel holds signal when its s or its largest magnitude over the volumes exceeds
    what background noise reaches with probability :data:`MASK_QUANTILE` (Gamma(n, σ²)
    quantile for s; σ·√(−2 ln(1 − q^(1/n))) for the maximum of n Rayleigh samples). The
    sum catches signals spread over many volumes, the maximum a signal in a few (a short
    T2 seen only in the first echoes). Air then costs no fitting time, and a fit never
    reports noise as a relaxation time.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
import numpy as np
from scipy.special import gammainc, gammaincinv, gammaln

MIN_BACKGROUND_SAMPLES = 1000    # voxels × volumes
MIN_BACKGROUND_VOXELS = 50      # the darkest START_QUANTILE, but at least these, start
START_QUANTILE = 0.05            # of all voxels: the darkest are air
TRUNCATION_QUANTILE = 0.9        # of the background distribution
MAX_KS_DISTANCE = 0.05           # plus 1.36/√K, Kolmogorov's 5 % critical value
VOLUME_Z_MAX = 5.0              # per-volume mean of |m|² in air: |z| above this and ...
VOLUME_RATIO_MAX = 1.25         # ... a max/min ratio above this is not air
MASK_QUANTILE = 0.9999
MAX_ITERATIONS = 50


@dataclass
class Background:
    """Background estimate: σ, voxels used (below the truncation) and the truncation."""

    sigma: float
    n_voxels: int
    truncation: float            # T on s = ½·Σ|m|²


def voxel_energy(data: np.ndarray) -> np.ndarray:
    """s = ½·Σ|m|² over the last axis (volumes), (N, M) -> (N,)."""
    a = np.abs(np.asarray(data)).astype(float)
    return 0.5 * np.einsum("nm,nm->n", a, a)


def _h(x: float, n: int) -> float:
    """h(x) = xⁿ·e^(−x)/(Γ(n)·P(n, x)), the truncated Gamma's mean deficit (θ·(n − h)).

    Below x = n from the series P(n, x) = xⁿ·e^(−x)·Σₖ xᵏ/Γ(n + k + 1) (Abramowitz &
    Stegun 1964, 6.5.29), h = 1/Σₖ xᵏ/(n·(n + 1)···(n + k)), which cannot underflow;
    above, directly.
    """
    if x >= n:
        return float(np.exp(n * np.log(x) - x - gammaln(n)) / gammainc(n, x))
    total, term, k = 0.0, 1.0 / n, 0
    while term > 1e-17 * total:
        total += term
        k += 1
        term *= x / (n + k)
    return 1.0 / total


def brent_root(f, xa: float, xb: float, xtol: float, rtol: float, maxiter: int = 100) -> float:
    """Root of ``f`` in [xa, xb] (f(xa), f(xb) of opposite signs) by Brent's method (Brent
    1973, Algorithms for Minimization without Derivatives, ch. 4): inverse quadratic or
    secant steps kept inside the bracket, bisection when they would not shrink it fast
    enough; stops when the bracket is below xtol + rtol·|x|.

    The same sequence of steps as ``scipy.optimize.brentq`` (tests/test_background.py
    checks they return the same float), written here because importing
    ``scipy.optimize`` costs every ``relaxline fit`` process about 0.3 s.
    """
    xpre, xcur = float(xa), float(xb)
    fpre, fcur = f(xpre), f(xcur)
    if fpre == 0:
        return xpre
    if fcur == 0:
        return xcur
    xblk = fblk = spre = scur = 0.0
    for _ in range(maxiter):
        if fpre != 0 and fcur != 0 and (math.copysign(1.0, fpre) != math.copysign(1.0, fcur)):
            xblk, fblk = xpre, fpre
            spre = scur = xcur - xpre
        if abs(fblk) < abs(fcur):
            xpre, xcur, xblk = xcur, xblk, xcur
            fpre, fcur, fblk = fcur, fblk, fcur
        delta = (xtol + rtol * abs(xcur)) / 2
        sbis = (xblk - xcur) / 2
        if fcur == 0 or abs(sbis) < delta:
            return xcur
        if abs(spre) > delta and abs(fcur) < abs(fpre):
            if xpre == xblk:          # secant
                stry = -fcur * (xcur - xpre) / (fcur - fpre)
            else:                     # inverse quadratic interpolation
                dpre = (fpre - fcur) / (xpre - xcur)
                dblk = (fblk - fcur) / (xblk - xcur)
                stry = -fcur * (fblk * dblk - fpre * dpre) / (dblk * dpre * (fblk - fpre))
            if 2 * abs(stry) < min(abs(spre), 3 * abs(sbis) - delta):
                spre, scur = scur, stry      # a good short step
            else:
                spre = scur = sbis           # bisect
        else:
            spre = scur = sbis
        xpre, fpre = xcur, fcur
        xcur += scur if abs(scur) > delta else (delta if sbis > 0 else -delta)
        fcur = f(xcur)
    return xcur


def truncated_gamma_scale(s: np.ndarray, n: int, cut: float) -> float | None:
    """ML scale θ of Gamma(n, θ) from the samples ``s`` below ``cut`` (module docstring).

    None when no θ up to 400·cut reaches the sample mean (a flat, non-Gamma sample).
    """
    mean = float(np.mean(s))
    if not 0.0 < mean < cut * n / (n + 1.0):
        return None

    def excess(log_theta: float) -> float:
        th = np.exp(log_theta)
        return th * (n - _h(cut / th, n)) - mean

    # the truncated mean rises monotonically with θ from 0 to cut·n/(n + 1); below
    # θ = mean/n it is below the mean, and a θ beyond 400·cut means an almost flat sample
    lo, hi = np.log(mean / n), np.log(cut) + 6.0
    if not (excess(lo) < 0 < excess(hi)):
        return None
    return float(np.exp(brent_root(excess, lo, hi, xtol=1e-12, rtol=1e-12)))


def _ks_distance(s: np.ndarray, n: int, theta: float, cut: float) -> float:
    """Kolmogorov distance of ``s`` (all below ``cut``) from the truncated Gamma(n, θ)."""
    x = np.sort(s)
    model = gammainc(n, x / theta) / gammainc(n, cut / theta)
    k = x.size
    emp_hi = np.arange(1, k + 1) / k
    emp_lo = np.arange(k) / k
    return float(max(np.max(emp_hi - model), np.max(model - emp_lo)))


def _volumes_differ(sq: np.ndarray) -> bool:
    """True when the per-volume means of |m|² (rows: background voxels, (K, n)) differ
    more than air allows: in air every volume holds the same noise, so the means agree
    within sampling error (sd ≈ mean/√K for exponential |m|²); a smooth signal (dark
    tissue of an object that fills the field) rises or decays from volume to volume."""
    if sq.shape[1] < 2:
        return False
    q = sq.mean(axis=0)
    z = np.abs(q / q.mean() - 1.0) * np.sqrt(sq.shape[0])
    return bool(z.max() > VOLUME_Z_MAX and q.max() > VOLUME_RATIO_MAX * q.min())


def estimate(samples: np.ndarray) -> Background | None:
    """σ from (a sample of) the series' voxels, ``samples`` (N, n volumes).

    Voxels with s = ½·Σ|m|² = 0 (zero-filled or masked) and non-finite s are ignored.
    """
    sq = np.abs(np.asarray(samples)).astype(float) ** 2
    s = 0.5 * sq.sum(axis=1)
    keep = np.isfinite(s) & (s > 0)
    s, sq = s[keep], sq[keep]
    n = sq.shape[1]
    if s.size < 2 * MIN_BACKGROUND_VOXELS:
        return None
    start = max(START_QUANTILE, MIN_BACKGROUND_VOXELS / s.size)   # small images
    cut = float(np.quantile(s, start))
    theta = None
    for _ in range(MAX_ITERATIONS):
        below = s[s < cut]
        if below.size < MIN_BACKGROUND_VOXELS // 2:
            return None
        new = truncated_gamma_scale(below, n, cut)
        if new is None and theta is None:
            # the darkest few may be too flat to fit (one volume): start from the scale
            # that puts the cut at the START_QUANTILE of the background itself
            new = cut / float(gammaincinv(n, START_QUANTILE))
        elif new is None:
            return None
        converged = theta is not None and abs(new - theta) <= 1e-4 * theta
        theta = new
        cut = theta * float(gammaincinv(n, TRUNCATION_QUANTILE))
        if converged:
            break
    inside = s < cut
    below = s[inside]
    # the start assumed the darkest share of the voxels is air: a background smaller
    # than that was something else (a faint vial in a zero-filled image)
    if below.size / TRUNCATION_QUANTILE < start * s.size or \
            below.size * n < MIN_BACKGROUND_SAMPLES:
        return None
    if _ks_distance(below, n, theta, cut) > MAX_KS_DISTANCE + 1.36 / np.sqrt(below.size):
        return None
    if _volumes_differ(sq[inside]):
        return None
    return Background(float(np.sqrt(theta)), int(below.size), cut)


def rayleigh_max_threshold(sigma: float, n_volumes: int, quantile: float = MASK_QUANTILE
                           ) -> float:
    """Level the maximum of ``n_volumes`` independent Rayleigh(σ) samples stays below with
    probability ``quantile``: σ·√(−2·ln(1 − q^(1/n))) (Rayleigh CDF 1 − e^(−m²/2σ²))."""
    return float(sigma * np.sqrt(-2.0 * np.log(1.0 - quantile ** (1.0 / max(n_volumes, 1)))))


def energy_threshold(sigma: float, n_volumes: int, quantile: float = MASK_QUANTILE) -> float:
    """Level s = ½·Σ|m|² of a background voxel stays below with probability ``quantile``."""
    return float(sigma ** 2 * gammaincinv(max(int(n_volumes), 1), quantile))


def signal_mask(data: np.ndarray, sigma: float | None) -> np.ndarray:
    """Voxels (rows of ``data`` (N, M)) that hold signal above the background noise.

    Non-finite rows are kept (the engines mark them BAD_DATA); every row is kept when
    ``sigma`` is None (no background to compare with).
    """
    d = np.abs(np.asarray(data))
    if sigma is None:
        return np.ones(d.shape[0], bool)
    n = d.shape[1]
    with np.errstate(invalid="ignore"):
        quiet = (np.max(d, axis=1) < rayleigh_max_threshold(sigma, n)) & \
            (voxel_energy(d) < energy_threshold(sigma, n))
    return ~quiet

