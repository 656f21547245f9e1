"""Extended-phase-graph CPMG model against an isochromat simulation and closed forms."""
from __future__ import annotations

import numpy as np
import pytest

from fitting.epg import cpmg_echoes, cpmg_echoes_jacobian
from fitting.errors import RelaxlineError
from test_bloch import hard_pulse, isochromat_cpmg


@pytest.mark.parametrize("refocus_deg", [180.0, 150.0, 120.0, 90.0])
@pytest.mark.parametrize("b1", [1.0, 0.8, 1.15])
def test_epg_matches_isochromat_simulation(refocus_deg, b1):
    # Independent reference: explicit rotations of many isochromats whose phase is spread
    # uniformly over 2π per ESP/2 lobe (the configuration-state model of Hennig 1988,
    # J Magn Reson 78:397, sampled in space). b1 != 1 also scales the excitation, so the
    # longitudinal part left by it, and T1 regrowth, are present in the simulation.
    n, esp, t2, t1 = 12, 0.01, 0.06, 0.4
    ref = isochromat_cpmg(n, esp, t2, t1, b1=b1, refocus_deg=refocus_deg, n_iso=4 * n + 3)
    got = cpmg_echoes(n, esp, t2, t1, b1=b1, refocus_deg=refocus_deg, signed=True)
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9)
    # The perpendicular axis carries no echo at TE = k·ESP (even/odd order argument), so
    # the CPMG-axis value is the whole echo.
    quad = isochromat_cpmg(n, esp, t2, t1, b1=b1, refocus_deg=refocus_deg, n_iso=4 * n + 3,
                           quadrature=True)
    np.testing.assert_allclose(quad, 0.0, atol=1e-12)


def test_sign_change_of_late_echoes_matches_isochromats():
    # T2 ~ ESP ≪ T1 with α < 180°: late CPMG-axis echoes alternate in sign (stimulated
    # pathways outlast spin echoes); the isochromat reference (Hennig 1988 model) agrees,
    # and the default output is the magnitude.
    args = (32, 0.01, 0.0107, 0.6)
    kw = dict(b1=1.12, refocus_deg=150.0)
    ref = isochromat_cpmg(*args, **kw, n_iso=131)
    assert ref.min() < -1e-3
    np.testing.assert_allclose(cpmg_echoes(*args, **kw, signed=True), ref, rtol=0, atol=1e-12)
    np.testing.assert_allclose(cpmg_echoes(*args, **kw), np.abs(ref), rtol=0, atol=1e-12)


def test_epg_matches_isochromats_random_protocols():
    # Same independent reference (Hennig 1988 model sampled by isochromats) over random
    # echo counts, spacings, relaxation times (T1 = ∞ included), B1 and both pulse angles.
    rng = np.random.default_rng(5)
    for _ in range(15):
        n = int(rng.integers(1, 20))
        esp, t2 = rng.uniform(0.003, 0.02), rng.uniform(0.005, 0.5)
        t1 = np.inf if rng.random() < 0.3 else rng.uniform(0.1, 3.0)
        b1, ref, exc = rng.uniform(0.3, 1.7), rng.uniform(60.0, 180.0), rng.uniform(30.0, 150.0)
        expected = isochromat_cpmg(n, esp, t2, t1, b1, ref, exc, m0=1.3, n_iso=4 * n + 3)
        got = cpmg_echoes(n, esp, t2, t1, b1, ref, exc, m0=1.3, signed=True)
        np.testing.assert_allclose(got, expected, rtol=0, atol=1e-9)


def test_isochromat_count_converged():
    # Uniform dephasing over N isochromats averages harmonics below N exactly, so more
    # isochromats must not change the answer (guards the reference itself).
    a = isochromat_cpmg(10, 0.01, 0.05, 0.5, b1=0.9, refocus_deg=130.0, n_iso=41)
    b = isochromat_cpmg(10, 0.01, 0.05, 0.5, b1=0.9, refocus_deg=130.0, n_iso=173)
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-12)


def test_perfect_refocusing_is_monoexponential():
    # 180° refocusing: S_k = M0·e^(−k·ESP/T2) (Hennig 1988; Weigel 2015, J Magn Reson Imaging 41:266)
    t2 = np.array([0.02, 0.07, 0.3, np.inf])
    s = cpmg_echoes(32, 0.008, t2, 1.1, m0=2.5)
    te = 0.008 * np.arange(1, 33)
    np.testing.assert_allclose(s, 2.5 * np.exp(-te / t2[:, None]), rtol=1e-13, atol=0)


@pytest.mark.parametrize("alpha", [30.0, 90.0, 120.0, 160.0, 200.0])
def test_first_echo_closed_form(alpha):
    # First echo with refocusing angle α: M0·sin²(α/2)·e^(−ESP/T2) (Hennig 1988; Weigel 2015)
    s = cpmg_echoes(5, 0.01, 0.05, 1.0, refocus_deg=alpha, m0=3.0)
    assert s[0] == pytest.approx(3.0 * np.sin(np.deg2rad(alpha) / 2) ** 2 * np.exp(-0.2), rel=1e-13)


def test_second_echo_closed_form():
    # No relaxation, 90° excitation, refocusing α: echo 2 is the double spin echo of the
    # F→F→F path, sin²(α/2)·sin²(α/2), plus the stimulated echo of the 90°-α-α triple,
    # ½·sin 90°·sin α·sin α (Hahn 1950, Phys Rev 80:580; pathways as in Hennig 1988).
    for alpha in (60.0, 120.0, 150.0):
        a = np.deg2rad(alpha)
        expected = np.sin(a / 2) ** 4 + 0.5 * np.sin(a) ** 2
        s = cpmg_echoes(2, 0.01, np.inf, np.inf, refocus_deg=alpha)
        assert s[1] == pytest.approx(expected, rel=1e-13)
    # the classic second-echo overshoot of sub-180° trains
    assert cpmg_echoes(2, 0.01, np.inf, np.inf, refocus_deg=120.0)[1] > np.sin(np.deg2rad(60)) ** 2


def test_truncation_keeps_leading_echoes():
    # Dropping states that cannot refocus by the last echo must not change earlier echoes.
    full = cpmg_echoes(40, 0.01, 0.08, 0.9, b1=0.85, refocus_deg=150.0)
    for n in (1, 2, 7, 19):
        np.testing.assert_allclose(cpmg_echoes(n, 0.01, 0.08, 0.9, b1=0.85, refocus_deg=150.0),
                                   full[:n], rtol=0, atol=1e-15)


def test_broadcasting_and_shapes():
    t2 = np.array([0.03, 0.06, 0.12])[:, None]
    b1 = np.array([0.7, 0.9, 1.0, 1.2])[None, :]
    s = cpmg_echoes(6, 0.01, t2, 1.0, b1=b1)
    assert s.shape == (3, 4, 6)
    for i in range(3):
        for j in range(4):
            np.testing.assert_allclose(s[i, j], cpmg_echoes(6, 0.01, t2[i, 0], 1.0, b1=b1[0, j]),
                                       rtol=0, atol=1e-15)
    assert cpmg_echoes(3, 0.01, 0.05, 1.0).shape == (3,)
    jac = cpmg_echoes_jacobian(6, 0.01, t2, 1.0, b1=b1)
    assert [x.shape for x in jac] == [(3, 4, 6)] * 3
    np.testing.assert_array_equal(jac[0], s)


def test_nonnegative_for_cpmg():
    rng = np.random.default_rng(3)
    s = cpmg_echoes(32, 0.01, rng.uniform(0.01, 0.5, 500), rng.uniform(0.2, 3.0, 500),
                    b1=rng.uniform(0.4, 1.6, 500), refocus_deg=rng.choice([180.0, 150.0]))
    assert np.all(s >= 0)


@pytest.mark.parametrize("signed", [False, True])
@pytest.mark.parametrize("refocus_deg", [180.0, 140.0])
def test_jacobian_matches_central_differences(refocus_deg, signed):
    # Forward-mode derivatives vs central differences (step h·x, error O(h²) ≈ 1e-10 relative)
    t2 = np.array([0.015, 0.05, 0.12, 0.4])
    b1 = np.array([0.6, 0.95, 1.0, 1.3])
    t1 = np.array([0.3, 1.0, np.inf, 2.0])
    n, esp = 24, 0.009
    s, d_t2, d_b1 = cpmg_echoes_jacobian(n, esp, t2, t1, b1, refocus_deg, m0=1.7, signed=signed)
    h = 1e-5
    f = lambda t2_, b1_: cpmg_echoes(n, esp, t2_, t1, b1_, refocus_deg, m0=1.7,  # noqa: E731
                                     signed=signed)
    fd_t2 = (f(t2 * (1 + h), b1) - f(t2 * (1 - h), b1)) / (2 * h * t2[:, None])
    fd_b1 = (f(t2, b1 + h) - f(t2, b1 - h)) / (2 * h)
    np.testing.assert_array_equal(s, f(t2, b1))
    # relative to each voxel's largest derivative, or to its signal scale where the
    # derivative vanishes (dS/dB1 ≡ 0 at 180°, b1 = 1: a stationary point)
    scale = np.abs(s).max(axis=1, keepdims=True)
    scale_t2 = np.maximum(np.abs(d_t2).max(axis=1, keepdims=True), scale / t2[:, None])
    scale_b1 = np.maximum(np.abs(d_b1).max(axis=1, keepdims=True), scale)
    assert np.max(np.abs(d_t2 - fd_t2) / scale_t2) < 1e-6
    assert np.max(np.abs(d_b1 - fd_b1) / scale_b1) < 1e-6


def test_jacobian_closed_form_at_180():
    # Perfect refocusing: dS/dT2 = S·k·ESP/T2² (from S = M0·e^(−k·ESP/T2), Hennig 1988)
    s, d_t2, _ = cpmg_echoes_jacobian(8, 0.01, 0.05, 1.0)
    te = 0.01 * np.arange(1, 9)
    np.testing.assert_allclose(d_t2, s * te / 0.05 ** 2, rtol=1e-12)


@pytest.mark.parametrize("bad", [dict(n_echoes=0), dict(n_echoes=2.5), dict(esp=0.0),
                                 dict(esp=-0.01), dict(esp=np.nan)])
def test_bad_arguments_raise(bad):
    args = dict(n_echoes=4, esp=0.01) | bad
    with pytest.raises(RelaxlineError):
        cpmg_echoes(args["n_echoes"], args["esp"], 0.05, 1.0)


def test_hard_pulse_helper_is_consistent_with_epg_first_echo():
    # The isochromat helper's excitation: 90° about x puts M0 on −y (right-handed rotation).
    m = hard_pulse(np.array([0.0, 0.0, 1.0]), "x", 90.0)
    np.testing.assert_allclose(m, [0.0, -1.0, 0.0], atol=1e-15)


def test_block_boundaries_and_empty_input():
    # Voxels are processed in blocks; results must not depend on a voxel's block.
    rng = np.random.default_rng(11)
    nv = 9001
    t2, b1 = rng.uniform(0.02, 0.3, nv), rng.uniform(0.6, 1.3, nv)
    s, d_t2, d_b1 = cpmg_echoes_jacobian(9, 0.01, t2, 1.0, b1, 150.0)
    for i in (0, 4095, 4096, 8191, 8192, 9000):
        one = cpmg_echoes_jacobian(9, 0.01, t2[i], 1.0, b1[i], 150.0)
        for full, single in zip((s, d_t2, d_b1), one):
            np.testing.assert_allclose(full[i], single, rtol=1e-14, atol=1e-15)
    assert cpmg_echoes(5, 0.01, np.empty(0), 1.0).shape == (0, 5)
    assert cpmg_echoes(1, 0.01, 0.05, 1.0, refocus_deg=150.0).shape == (1,)
