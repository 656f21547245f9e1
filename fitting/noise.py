"""Noise-floor handling for magnitude data: the Rician expectation.

A magnitude image of a complex signal ν with Gaussian noise of standard deviation σ
in each channel follows the Rice distribution; its mean is (Gudbjartsson & Patz 1995,
Magn Reson Med 34:910, eq. 6)

    E|S| = σ·√(π/2)·L_{1/2}(−ν²/2σ²),
    L_{1/2}(−a) = e^{−a/2}·[(1 + a)·I₀(a/2) + a·I₁(a/2)],   a = ν²/2σ²,

with I₀, I₁ modified Bessel functions. It is evaluated here with the exponentially
scaled Bessel functions ``i0e``/``i1e`` (i0e(z) = e^{−z}·I₀(z)), so it neither
overflows at high SNR nor loses precision at low SNR. Its derivative is

    dE/dν = √(π/2)·(ν/2σ)·[i0e(a/2) + i1e(a/2)],

which tends to 1 at high SNR (E → √(ν² + σ²) ≈ ν) and to 0 at ν = 0 (E → σ·√(π/2),
the Rayleigh mean of pure noise).

At high SNR (a ≥ :data:`ASYMPTOTIC_FROM`) the compiled form uses the asymptotic series
of L_{1/2}(−a) = ₁F₁(−½; 1; −a) instead of the Bessel functions (Abramowitz & Stegun
1964, 13.5.1; the other part of that expansion is of order e^{−a}, below 1e−17 here):

    E|S| = |ν|·Σₖ cₖ·a^{−k},   dE|S|/dν = sign(ν)·Σₖ (1 − 2k)·cₖ·a^{−k},
    cₖ = [(−½)ₖ]²/k!   (Pochhammer symbol; c = 1, 1/4, 1/32, 3/128, ...),

the derivative from d(ν·S(a))/dν = S + 2a·S'(a). From a = 40 on, the terms left out
(k ≥ :data:`_ASYMPTOTIC_TERMS`) are below 2e−17 of the sum (mean and derivative), so
the branch is exact to float64 rounding; it costs a fifth of the Bessel form, and
almost every sample of a fit above SNR ≈ 10 takes it (tests/test_noise.py checks it
against ``scipy.special`` at the switch point and above).

When it matters (measured with :func:`rician_mean`): the relative bias E|S|/ν − 1 is
about 14 % at ν/σ = 2, 5.8 % at ν/σ = 3, 2.0 % at ν/σ = 5, 0.5 % at ν/σ = 10 and
0.13 % at ν/σ = 20.
A plain least-squares fit therefore reads a decay that flattens into the noise floor as
a too long T2 (or T2*) once the late echoes fall below about ν/σ ≈ 5 — typical for long
T2 vials sampled far into their tail, or for low-SNR scans. Fitting the Rician
expectation instead of ν removes that bias given σ (for example the background σ
estimated from the Rayleigh mean of an air region, :mod:`fitting.uncertainty`).
At high SNR both fits agree; the noise-aware one is then only slightly slower.

Any model of this package can be wrapped: :func:`rician_wrap` turns the forward
signal ν(x; p) and its Jacobian into the expectation and its Jacobian by the chain
rule, dE/dp = dE/dν · dν/dp.
"""
from __future__ import annotations

import dataclasses
import math
from functools import partial

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import i0e, i1e

from fitting.errors import RelaxlineError
from fitting.jit import broadcast_apply, jit
from fitting.spec import Kernel, ModelSpec

_SQRT_HALF_PI = math.sqrt(math.pi / 2.0)
RICIAN = 100    # added to a model kind of fitting.kernels: its signal is then E|S| given σ

# --------------------------------------------------------------------------- compiled
# i0e and i1e as Chebyshev series on [0, 8] in u = x/4 − 1 (i0e(x), i1e(x)/x) and on (8, ∞)
# in v = 16/x − 1 (√x·i0e(x), √x·i1e(x)), the split of the Cephes library's tables
# (Moshier 1989, Methods and Programs for Mathematical Functions); the coefficients are
# interpolated here from scipy's i0e/i1e at import, so this module holds no second table.
# Agreement with scipy: below 1e-13 relative (tests/test_noise.py).
_NEAR_DEGREE, _FAR_DEGREE = 30, 20     # each ~3e-14 relative or better


def _chebyshev_coefficients(f, lo: float, hi: float, degree: int) -> np.ndarray:
    c = np.polynomial.chebyshev.chebinterpolate(lambda u: f(lo + (u + 1.0) * (hi - lo) / 2.0),
                                                degree)
    return np.array(c, dtype=float)   # an array: numba indexes a global tuple ~4x slower


def _over_x(f):
    return lambda x: np.where(x > 0, f(x) / np.where(x > 0, x, 1.0), 0.5)


def _far(f):
    return lambda v: np.sqrt(16.0 / (v + 1.0)) * f(16.0 / (v + 1.0))


_I0_NEAR = _chebyshev_coefficients(i0e, 0.0, 8.0, _NEAR_DEGREE)
_I1_NEAR = _chebyshev_coefficients(_over_x(i1e), 0.0, 8.0, _NEAR_DEGREE)
_I0_FAR = _chebyshev_coefficients(_far(i0e), -1.0, 1.0, _FAR_DEGREE)
_I1_FAR = _chebyshev_coefficients(_far(i1e), -1.0, 1.0, _FAR_DEGREE)


ASYMPTOTIC_FROM = 40.0     # a = ν²/2σ² from which the asymptotic series is used
_ASYMPTOTIC_TERMS = 20     # k = 0..19: the first term left out is < 2e-17 of the sum at a = 40


def _asymptotic_coefficients(terms: int) -> tuple[np.ndarray, np.ndarray]:
    """cₖ = [(−½)ₖ]²/k! (module docstring) and (1 − 2k)·cₖ, exact rationals rounded once."""
    from fractions import Fraction
    mean, slope, poch = [], [], Fraction(1)
    for k in range(terms):
        if k:
            poch *= Fraction(2 * k - 3, 2)          # (−½)ₖ = (−½)ₖ₋₁·(k − 3/2)
        c = poch * poch / math.factorial(k)
        mean.append(float(c))
        slope.append(float((1 - 2 * k) * c))
    return np.array(mean), np.array(slope)


_ASYM_MEAN, _ASYM_SLOPE = _asymptotic_coefficients(_ASYMPTOTIC_TERMS)


@jit
def _rician_asymptotic(nu: float, a: float):
    """(E|S|, dE|S|/dν) from the asymptotic series (module docstring), for a ≥ 40."""
    t = 1.0 / a
    s = _ASYM_MEAN[_ASYMPTOTIC_TERMS - 1]
    d = _ASYM_SLOPE[_ASYMPTOTIC_TERMS - 1]
    for k in range(_ASYMPTOTIC_TERMS - 2, -1, -1):
        s = s * t + _ASYM_MEAN[k]
        d = d * t + _ASYM_SLOPE[k]
    return abs(nu) * s, (d if nu > 0 else -d)


@jit
def _chebyshev(c, u):
    """Σ c_k·T_k(u) by Clenshaw's recurrence."""
    b0 = 0.0
    b1 = 0.0
    for k in range(len(c) - 1, 0, -1):
        b0, b1 = 2.0 * u * b0 - b1 + c[k], b0
    return u * b0 - b1 + c[0]


@jit
def bessel_i0e(x: float) -> float:
    """e^(−|x|)·I₀(x), compiled (agrees with ``scipy.special.i0e``)."""
    x = abs(x)
    if x <= 8.0:
        return _chebyshev(_I0_NEAR, x / 4.0 - 1.0)
    return _chebyshev(_I0_FAR, 16.0 / x - 1.0) / math.sqrt(x)


@jit
def bessel_i1e(x: float) -> float:
    """e^(−|x|)·I₁(x), compiled (odd in x; agrees with ``scipy.special.i1e``)."""
    ax = abs(x)
    if ax <= 8.0:
        v = ax * _chebyshev(_I1_NEAR, ax / 4.0 - 1.0)
    else:
        v = _chebyshev(_I1_FAR, 16.0 / ax - 1.0) / math.sqrt(ax)
    return -v if x < 0 else v


@jit
def rician_value(nu: float, sigma: float):
    """(E|S|, dE|S|/dν) of one sample: the formulas of the module docstring, compiled.

    σ ≤ 0 gives (|ν|, sign ν)."""
    if sigma <= 0.0:
        sign = 1.0 if nu > 0 else (-1.0 if nu < 0 else (0.0 if nu == 0 else np.nan))
        return abs(nu), sign
    r = nu / sigma
    half_a = 0.25 * r * r                     # a/2 with a = ν²/2σ²
    if half_a >= 0.5 * ASYMPTOTIC_FROM:
        return _rician_asymptotic(nu, 2.0 * half_a)
    b0 = bessel_i0e(half_a)
    b1 = bessel_i1e(half_a)
    mean = sigma * _SQRT_HALF_PI * ((1.0 + 2.0 * half_a) * b0 + 2.0 * half_a * b1)
    return mean, _SQRT_HALF_PI * 0.5 * r * (b0 + b1)


@jit
def _rician_loop(nu, sigma, mean, deriv):
    for i in range(mean.size):
        mean[i], deriv[i] = rician_value(nu[i], sigma[i])



def rician_mean(nu: ArrayLike, sigma: ArrayLike) -> np.ndarray:
    """Mean magnitude E|S| of a Rician variable with signal ``nu`` and noise ``sigma``.

    Formula in the module docstring (Gudbjartsson & Patz 1995). ``nu`` and ``sigma``
    broadcast together (give σ a trailing axis to pair a per-voxel σ with B+(M,)
    signals). ``sigma`` = 0 returns |ν| exactly.
    """
    return rician_mean_and_derivative(nu, sigma)[0]


def rician_mean_and_derivative(nu: ArrayLike, sigma: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """E|S| and dE|S|/dν (module docstring); odd in ν for the derivative, even for E."""
    return broadcast_apply(_rician_loop, nu, sigma, outputs=2)


def rician_wrap(signal: np.ndarray, jacobian: np.ndarray | None, sigma: ArrayLike,
                param_axis: int = -1) -> tuple[np.ndarray, np.ndarray | None]:
    """Expectation of a magnitude measurement of ``signal`` and its Jacobian.

    Parameters
    ----------
    signal : B+(M,) forward signal ν.
    jacobian : dν/dp with one extra parameter axis at ``param_axis`` (for example
        B+(M, P) with ``param_axis=-1``, or B+(P, M) with ``param_axis=-2``), or None.
    sigma : noise standard deviation, broadcastable to ``signal``.

    Returns
    -------
    (E|S|, dE/dp) — the Jacobian by the chain rule, None if none was given.
    """
    mean, d = rician_mean_and_derivative(signal, sigma)
    if jacobian is None:
        return mean, None
    return mean, np.expand_dims(d, param_axis) * jacobian


def _sigma(fixed) -> np.ndarray:
    if fixed.get("sigma") is None:
        raise RelaxlineError("the noise-aware (Rician) fit needs the noise standard deviation "
                             "sigma of the magnitude images: give it, or a background region "
                             "from which it is estimated.")
    s = np.asarray(fixed["sigma"], dtype=float)
    return s[:, None] if s.ndim == 1 else s


def _rician_signal(base_signal, x, p, fixed):
    return rician_mean(base_signal(x, p, fixed), _sigma(fixed))


def _rician_jacobian(base_signal, base_jac, x, p, fixed):
    return rician_wrap(base_signal(x, p, fixed), base_jac(x, p, fixed), _sigma(fixed))[1]


def _rician_prepare(base_prepare, x, data, fixed):
    return base_prepare(x, np.abs(data) if np.iscomplexobj(data) else data, fixed)


def _rician_kernel(base_build, x, fixed, n):
    """The compiled form: the base kind + :data:`RICIAN`, σ appended to the constants."""
    form = base_build(x, fixed, n)
    if form is None:
        return None
    kind, xk, consts = form
    sigma = np.broadcast_to(_sigma(fixed).reshape(-1) if np.ndim(fixed["sigma"])
                            else _sigma(fixed), (n,))
    return kind + RICIAN, xk, np.column_stack([consts, sigma])


def rician_spec(spec: ModelSpec) -> ModelSpec:
    """``spec`` fitted as a magnitude measurement: its signal ν becomes E|S| given σ.

    σ comes from ``fixed["sigma"]`` (scalar, or (N,) per voxel). The analytic Jacobian,
    if the model has one, is carried through by :func:`rician_wrap`; otherwise the
    engine differentiates the wrapped signal numerically. A model with a compiled form
    keeps one (its kind + :data:`RICIAN`, σ the last constant). Complex data are fitted as
    their magnitude (the Rice distribution describes the magnitude). The result is
    picklable (partials of module functions) for the process-parallel lmfit engine.
    """
    jac = None if spec.jacobian is None else partial(_rician_jacobian, spec.signal, spec.jacobian)
    signal = partial(_rician_signal, spec.signal)
    kernel = None if spec.compiled is None else Kernel(signal, partial(_rician_kernel,
                                                                       spec.compiled))
    return dataclasses.replace(
        spec, signal=signal, jacobian=jac, kernel=kernel,
        prepare=partial(_rician_prepare, spec.prepare), scale_param=None,
        voxel_fixed=tuple(spec.voxel_fixed) + ("sigma",),
        description=spec.description + " (Rician noise floor modelled)")
