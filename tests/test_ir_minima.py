"""``ir`` never converges to a wrong local minimum near the signal null (issue 14, item 6)."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import least_squares

import bloch_steady as bs
from fitting import status as st
from fitting.spec import get_model
from fitting.voxelwise import fit_voxels

TI = np.array([0.05, 0.1, 0.2, 0.35, 0.5, 0.75, 1.0, 1.5, 2.2, 3.5])   # benchmarks/bench_fit.py
TR = 5.0


@pytest.fixture(scope="module")
def grid():
    """Noiseless magnitude IR over T1 0.05–4 s × B1 0.6–1.3, B1 scaling both pulses,
    simulated pulse by pulse (tests/bloch_steady.py)."""
    t1, b1 = np.meshgrid(np.geomspace(0.05, 4.0, 60), np.linspace(0.6, 1.3, 36),
                         indexing="ij")
    t1, b1 = t1.ravel(), b1.ravel()
    return t1, b1, bs.inversion_recovery(TI, t1, b1, TR)


def _fixed():
    spec = get_model("ir")
    return spec, spec.fixed_from_meta({"RepetitionTime": TR, "FlipAngle": 90.0}, {})


def test_fast_engine_finds_the_global_minimum_everywhere(grid):
    # Noiseless data: the global minimum is the true T1 (cost 0). Before the polarity
    # hypotheses were refined, 1.11 % of these conditions converged elsewhere (up to 8 %).
    t1, b1, y = grid
    spec, fixed = _fixed()
    res = fit_voxels(spec, TI, y, fixed, refit=False)
    assert np.all(res.status == st.OK)
    err = np.abs(res.params["T1"] / t1 - 1)
    assert err.max() < 1e-5, (t1[err.argmax()], b1[err.argmax()], err.max())


def test_lmfit_engine_near_the_null(grid):
    # The lmfit engine starts from the same initialiser; checked where a TI lies within
    # 3 % of the signal's peak from the null (where the wrong minima were: 1.06 % before)
    t1, b1, y = grid
    near = np.flatnonzero(y.min(axis=1) < 0.03 * y.max(axis=1))[::3]
    spec, fixed = _fixed()
    res = fit_voxels(spec, TI, y[near], fixed, engine="lmfit")
    assert np.all(np.isin(res.status, st.USABLE))
    assert np.max(np.abs(res.params["T1"] / t1[near] - 1)) < 1e-4


def test_noisy_fit_reaches_the_multistart_global_minimum():
    # With noise the global minimum is no longer the true T1: compare the cost with a
    # brute-force multi-start of scipy's bounded least squares (reference library) from
    # 8 log-spaced T1 starts, on voxels whose null lies near a TI (SNR 200; before the
    # polarity hypotheses were refined 3 of these 100 voxels ended in a local minimum).
    rng = np.random.default_rng(5)
    t1 = rng.uniform(0.06, 1.2, 2000)
    b1 = rng.uniform(0.6, 1.3, 2000)
    clean = bs.inversion_recovery(TI, t1, b1, TR)
    near = np.flatnonzero(clean.min(axis=1) < 0.05 * clean.max(axis=1))[:100]
    noise = rng.normal(0, 1 / 200, (2, near.size, TI.size))
    y = np.abs(clean[near] + noise[0] + 1j * noise[1])
    spec, fixed = _fixed()
    res = fit_voxels(spec, TI, y, fixed)
    ours = (res.rmse ** 2) * TI.size

    def resid(p, yv):
        return spec.evaluate(TI, p[None, :], fixed)[0] - yv

    for i in range(near.size):
        best = min(least_squares(resid, [s, y[i].max(), 1.0], args=(y[i],),
                                 bounds=(spec.lower_array, spec.upper_array)).cost * 2
                   for s in np.geomspace(0.02, 8.0, 8))
        assert ours[i] <= best * (1 + 1e-6) + 1e-12, (i, ours[i], best)
