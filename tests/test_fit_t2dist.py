"""mese-multi: batched NNLS against scipy's, and the model against isochromat CPMG trains."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import nnls as scipy_nnls

from accuracy import VIAL_T1, VIAL_T2, bias_pct, noisy
from bloch_more import cpmg_pools
from fitting import status as st
from fitting.errors import RelaxlineError
from fitting.nnls import nnls
from fitting.spec import get_model
from fitting.voxelwise import fit_voxels

M, ESP = 32, 0.010
TE = ESP * np.arange(1, M + 1)
B1 = 0.85                                   # refocusing 153° instead of 180°
POOLS = [(0.15, 0.020), (0.85, 0.080)]      # a short-T2 pool of 15 % and a long one
GM_POOLS = np.exp(sum(f * np.log(t2) for f, t2 in POOLS))
N_NOISE = 100


def _problems(n=300, seed=0):
    rng = np.random.default_rng(seed)
    g = 40
    a = np.exp(-TE[:, None] / np.geomspace(0.01, 2.0, g)[None, :])
    w = np.zeros((n, g))
    for i in range(n):
        w[i, rng.choice(g, 3, replace=False)] = rng.uniform(0.1, 1.0, 3)
    return a, w @ a.T + rng.normal(0, 0.01, (n, M))


@pytest.mark.parametrize("mu", [0.0, 0.05])
def test_nnls_matches_scipy(mu):
    # the Lawson–Hanson solution of scipy.optimize.nnls (Lawson & Hanson 1974) on the
    # augmented system [A; μI]·w ≈ [y; 0], problem by problem
    a, y = _problems()
    g = a.shape[1]
    w, _, conv = nnls(a.T @ a, y @ a, mu2=np.full(y.shape[0], mu ** 2))
    assert conv.all()
    aug = np.vstack([a, mu * np.eye(g)])
    ref = np.array([scipy_nnls(aug, np.concatenate([v, np.zeros(g)]))[0] for v in y])
    cost = lambda v: np.sum((y - v @ a.T) ** 2, axis=1) + mu ** 2 * np.sum(v * v, axis=1)  # noqa: E731
    np.testing.assert_allclose(cost(w), cost(ref), rtol=1e-6)
    assert np.all(w >= 0)
    if mu > 0:    # strictly convex: the same minimiser
        np.testing.assert_allclose(w, ref, atol=1e-6)


def test_nnls_warm_start_gives_the_same_solution():
    a, y = _problems(seed=1)
    h, f = a.T @ a, y @ a
    w1, p1, _ = nnls(h, f, mu2=np.full(y.shape[0], 0.02 ** 2))
    w2, _, conv = nnls(h, f, mu2=np.full(y.shape[0], 0.03 ** 2), passive=p1)
    w3, _, _ = nnls(h, f, mu2=np.full(y.shape[0], 0.03 ** 2))
    assert conv.all()
    np.testing.assert_allclose(w2, w3, atol=1e-8)


def _spec():
    spec = get_model("mese-multi")
    fixed = spec.fixed_from_meta({"RefocusingFlipAngle": 180.0}, {})
    spec.validate(TE, fixed)
    return spec, fixed


@pytest.fixture(scope="module")
def vials():
    # one T2 per vial (T1 of the vial), refocusing 15 % low: isochromat CPMG
    return np.array([cpmg_pools(M, ESP, [(1.0, t2)], t1=t1, b1=B1)
                     for t1, t2 in zip(VIAL_T1, VIAL_T2)])


def test_single_component_vials_noiseless(vials):
    spec, fixed = _spec()
    res = fit_voxels(spec, TE, vials, fixed, noise_sigma=1e-6)
    assert np.all(res.status == st.OK)
    long_ = VIAL_T2 > 0.02     # the 12 ms vial is barely longer than the echo spacing
    np.testing.assert_allclose(res.params["T2"][long_], VIAL_T2[long_], rtol=0.01)
    # the angle is read from how the echoes alternate: short trains (T2 ≤ 40 ms) carry
    # less of it and the T2 grid's discreteness shifts their misfit minimum a little
    np.testing.assert_allclose(res.params["B1"][long_], B1, rtol=0.02)
    np.testing.assert_allclose(res.params["B1"][VIAL_T2 > 0.05], B1, rtol=0.005)
    np.testing.assert_allclose(res.params["M0"][long_], 1.0, rtol=0.02)
    assert np.all(res.params["MWF"][VIAL_T2 > 0.06] < 1.0)        # percent
    assert np.all(res.params["MWF"][VIAL_T2 < 0.03] > 99.0)
    dist = res.extras["dist"]
    assert dist.shape == (VIAL_T2.size, 40) and np.all(dist >= 0)


@pytest.mark.parametrize("snr, limit_pct", [(100, 5.0), (300, 2.5)])
def test_single_component_bias_per_vial(vials, snr, limit_pct):
    """Geometric-mean T2 per vial (vials 2–12) with Rician noise: regularisation and the
    noise floor pull it by a few percent at most (most for the 0.58 s vial, seen over a
    train of only 0.32 s)."""
    spec, fixed = _spec()
    res = fit_voxels(spec, TE, noisy(vials, snr, N_NOISE, seed=snr), fixed,
                     noise_sigma=np.max(vials) / snr)
    assert np.isin(res.status, st.USABLE).mean() > 0.98
    bias = bias_pct(VIAL_T2, res.params["T2"], N_NOISE)
    assert np.max(np.abs(bias[1:])) < limit_pct, bias


@pytest.fixture(scope="module")
def pools():
    b1 = np.array([0.7, 0.85, 1.0])
    return b1, np.array([cpmg_pools(M, ESP, POOLS, t1=1.0, b1=b) for b in b1])


def test_two_pools_noiseless(pools):
    b1, clean = pools
    spec, fixed = _spec()
    res = fit_voxels(spec, TE, clean, fixed, noise_sigma=1e-6)
    np.testing.assert_allclose(res.params["MWF"], 15.0, atol=1.2)        # percent
    np.testing.assert_allclose(res.params["B1"], b1, atol=0.003)
    np.testing.assert_allclose(res.params["T2"], GM_POOLS, rtol=0.015)


def test_two_pools_with_noise(pools):
    """SNR 300: the short-T2 fraction keeps within 0.03 of 0.15 on average (regularisation
    smooths part of the short peak past the cutoff), and its linearised standard error
    describes the scatter to within 30 %."""
    b1, clean = pools
    spec, fixed = _spec()
    sigma = np.max(clean) / 300
    res = fit_voxels(spec, TE, noisy(clean, 300, 300, seed=7), fixed, noise_sigma=sigma)
    mwf = res.params["MWF"].reshape(3, 300) / 100.0
    assert np.all(np.abs(mwf.mean(axis=1) - 0.15) < 0.03), mwf.mean(axis=1)
    se = np.nanmedian(res.stderr["MWF"].reshape(3, 300), axis=1) / 100.0
    np.testing.assert_allclose(se, mwf.std(axis=1), rtol=0.3)
    b1_sd = res.params["B1"].reshape(3, 300).std(axis=1)
    np.testing.assert_allclose(np.nanmedian(res.stderr["B1"].reshape(3, 300), axis=1)[:2],
                               b1_sd[:2], rtol=0.5)


def test_no_lmfit_engine(pools):
    spec, fixed = _spec()
    with pytest.raises(RelaxlineError, match="no lmfit engine"):
        fit_voxels(spec, TE, pools[1], fixed, engine="lmfit")


@pytest.mark.parametrize("x, options, match", [
    (TE[:6], {}, "long echo train"),
    (TE, {"short_t2_cutoff": 0.005}, "short-T2 cutoff"),
    (TE + 0.003, {}, "not evenly spaced"),
])
def test_bad_protocols(x, options, match):
    spec = get_model("mese-multi")
    with pytest.raises(RelaxlineError, match=match):
        spec.validate(np.asarray(x), spec.fixed_from_meta({}, options))


def test_2d_data_need_the_slice_profile():
    """A two-pool mixture in a 2D slice (Hanning sinc, time-bandwidth 3), simulated with
    spinors and isochromats across the slice (tests/bloch_slice.py, written apart from
    the project's models): with the slice-profile basis the short-T2 fraction is within
    3 points of 15 % and the refocusing scale within 1 %; the plain basis reads the
    profile's stimulated echoes as a low refocusing angle and finds no short-T2 water."""
    from bloch_slice import slice_cpmg
    b1 = np.array([1.0, 1.15])
    trains = np.array([sum(f * slice_cpmg(M, ESP, t2, 1.0, b1=b, n_steps=128)
                           for f, t2 in POOLS) for b in b1])
    spec = get_model("mese-multi")
    prof = fit_voxels(spec, TE, trains, spec.fixed_from_meta({}, {"slice_profile": "sinc:3"}),
                      noise_sigma=1e-6)
    np.testing.assert_allclose(prof.params["MWF"], 15.0, atol=3.0)
    np.testing.assert_allclose(prof.params["B1"], b1, rtol=0.01)
    np.testing.assert_allclose(prof.params["T2"], GM_POOLS, rtol=0.05)
    plain = fit_voxels(spec, TE, trains, spec.fixed_from_meta({}, {}), noise_sigma=1e-6)
    assert np.all(plain.params["MWF"] < 5.0)
