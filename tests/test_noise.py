"""Rician expectation and the noise-aware model wrapper (fitting/noise.py)."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import rice

from fitting.errors import RelaxlineError
from fitting.noise import rician_mean, rician_mean_and_derivative, rician_spec, rician_wrap
from fitting.spec import configure_model, get_model

# scipy.stats.rice.mean overflows beyond b ≈ 35; higher SNR is checked by the asymptote.
SNR = np.array([0.0, 0.1, 0.5, 1.0, 2.0, 3.0, 5.0, 10.0, 20.0, 30.0])


@pytest.mark.parametrize("sigma", [1.0, 0.37, 250.0])
def test_mean_matches_scipy_rice(sigma):
    # Independent reference library: scipy.stats.rice(b = ν/σ, scale = σ).mean()
    # (Gudbjartsson & Patz 1995, Magn Reson Med 34:910, eq. 6 is the same expectation).
    nu = SNR * sigma
    ref = np.array([rice.mean(b, scale=sigma) for b in SNR])
    np.testing.assert_allclose(rician_mean(nu, sigma), ref, rtol=1e-10)


def test_derivative_matches_scipy_rice_finite_difference():
    # Central difference of scipy.stats.rice's mean (independent reference library).
    h = 1e-5
    b = SNR[1:]      # rice needs b ≥ 0 on both sides of the difference
    ref = np.array([(rice.mean(v + h) - rice.mean(v - h)) / (2 * h) for v in b])
    _, d = rician_mean_and_derivative(b, 1.0)
    np.testing.assert_allclose(d, ref, rtol=1e-6, atol=1e-8)


def test_limits():
    # ν = 0: the Rayleigh mean σ·√(π/2) (closed form; Gudbjartsson & Patz 1995).
    assert rician_mean(0.0, 2.0) == pytest.approx(2.0 * np.sqrt(np.pi / 2), rel=1e-14)
    assert rician_mean_and_derivative(0.0, 2.0)[1] == 0.0     # E is even in ν
    # High SNR: E ≈ √(ν² + σ²) (Gudbjartsson & Patz 1995, eq. 8), also far beyond
    # where unscaled Bessel functions overflow (ν/σ = 1e4).
    for r in (50.0, 1e3, 1e4):
        assert rician_mean(r, 1.0) == pytest.approx(np.sqrt(r * r + 1.0), rel=1e-6)
    _, d = rician_mean_and_derivative(np.array([1e4]), 1.0)
    assert d[0] == pytest.approx(1.0, abs=1e-6)
    # σ = 0: noiseless magnitude.
    np.testing.assert_array_equal(rician_mean([-3.0, 0.0, 2.0], 0.0), [3.0, 0.0, 2.0])
    # even in ν (the magnitude of −ν is the same)
    assert rician_mean(-2.5, 1.0) == pytest.approx(rician_mean(2.5, 1.0), rel=1e-15)


def test_monte_carlo_mean():
    # Magnitude of ν + complex Gaussian noise (definition of the Rice distribution).
    rng = np.random.default_rng(3)
    nu, sigma, n = 1.5, 1.0, 400_000
    m = np.abs(nu + sigma * (rng.standard_normal(n) + 1j * rng.standard_normal(n)))
    se = m.std() / np.sqrt(n)
    assert abs(m.mean() - rician_mean(nu, sigma)) < 4 * se


def test_wrap_chain_rule_against_finite_differences():
    spec = rician_spec(get_model("mese"))
    x = 0.01 * np.arange(1, 17)
    fixed = {**spec.fixed_from_meta({}, {}), "sigma": np.array([0.05, 0.2])}
    p = np.array([[0.08, 1.0, 0.85], [0.3, 0.7, 0.95]])
    jac = spec.jacobian(x, spec.unpack(p), fixed)
    assert jac.shape == (2, 16, 3)
    for i in range(3):
        h = 1e-6 * max(abs(p[0, i]), 1e-3)
        dp = np.zeros_like(p)
        dp[:, i] = h
        fd = (spec.evaluate(x, p + dp, fixed) - spec.evaluate(x, p - dp, fixed)) / (2 * h)
        np.testing.assert_allclose(jac[..., i], fd, rtol=1e-5, atol=1e-7)
    # the (B, P, M) layout: dE/dν broadcast along the parameter axis
    e, j2 = rician_wrap(np.full((2, 16), 2.0), np.ones((2, 3, 16)), 1.0, param_axis=-2)
    d = rician_mean_and_derivative(2.0, 1.0)[1]
    assert j2.shape == (2, 3, 16) and np.allclose(j2, d) and np.allclose(e, rician_mean(2.0, 1.0))


def test_wrapped_model_needs_sigma_and_known_noise_name():
    spec = configure_model(get_model("megre"), {"noise": "rician"})
    assert "sigma" in spec.voxel_fixed and spec.scale_param is None
    with pytest.raises(RelaxlineError, match="sigma"):
        spec.evaluate(np.array([0.01, 0.02, 0.03]), np.array([[0.05, 1.0]]), {})
    with pytest.raises(RelaxlineError, match="gaussian or rician"):
        configure_model(get_model("megre"), {"noise": "poisson"})


def test_compiled_bessel_functions_match_scipy():
    """The compiled i0e/i1e behind the Rician expectation against scipy.special."""
    from scipy.special import i0e, i1e

    from fitting.noise import bessel_i0e, bessel_i1e
    x = np.concatenate([np.linspace(0.0, 30.0, 3001), np.geomspace(30.0, 1e8, 300)])
    a = np.array([bessel_i0e(v) for v in x])
    b = np.array([bessel_i1e(v) for v in x])
    # reference library: scipy.special (Cephes)
    np.testing.assert_allclose(a, i0e(x), rtol=1e-13)
    np.testing.assert_allclose(b[1:], i1e(x[1:]), rtol=1e-13)
    assert b[0] == 0.0 and bessel_i1e(-2.0) == -bessel_i1e(2.0)


def test_high_snr_series_matches_scipy_at_and_above_the_switch():
    """The asymptotic branch of the compiled Rician expectation (a = ν²/2σ² ≥ 40) against
    the Bessel-function form evaluated with scipy.special, from just below the switch
    point to a = 1e12: within a few float64 rounding errors, mean and derivative."""
    from scipy.special import i0e, i1e

    from fitting.noise import ASYMPTOTIC_FROM
    a = np.concatenate([np.linspace(ASYMPTOTIC_FROM - 2.0, ASYMPTOTIC_FROM + 2.0, 4001),
                        np.geomspace(ASYMPTOTIC_FROM + 2.0, 1e12, 2000)])
    sigma = 0.37
    nu = sigma * np.sqrt(2.0 * a)
    z = a / 2.0
    # Gudbjartsson & Patz 1995, Magn Reson Med 34:910, eq. 6, with scipy.special (Cephes)
    ref_mean = sigma * np.sqrt(np.pi / 2) * ((1 + 2 * z) * i0e(z) + 2 * z * i1e(z))
    ref_slope = np.sqrt(np.pi / 2) * 0.5 * (nu / sigma) * (i0e(z) + i1e(z))
    mean, slope = rician_mean_and_derivative(nu, sigma)
    np.testing.assert_allclose(mean, ref_mean, rtol=2e-15, atol=0)
    np.testing.assert_allclose(slope, ref_slope, rtol=2e-15, atol=0)
    neg_mean, neg_slope = rician_mean_and_derivative(-nu, sigma)
    np.testing.assert_array_equal(neg_mean, mean)       # E even, dE/dν odd in ν
    np.testing.assert_array_equal(neg_slope, -slope)
