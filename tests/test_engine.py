"""The voxelwise engines: batched LM vs lmfit vs scipy, chunk invariance, statuses, CRLB."""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy.optimize import curve_fit

from fitting import status as st
from fitting.lm import jacobian, levenberg_marquardt, solve_small
from fitting.lmfit_models import build_model
from fitting.signals import ir_signal, spgr_signal
from fitting.spec import get_model, model_names
from fitting.uncertainty import crlb, t1_crlb
from fitting.voxelwise import fit_voxels

TI = np.array([0.05, 0.1, 0.2, 0.35, 0.5, 0.75, 1.0, 1.5, 2.2, 3.5])
TR = 5.0


def _ir_data(n: int, snr: float, seed: int, b1_range=(0.8, 1.2)):
    rng = np.random.default_rng(seed)
    t1 = rng.uniform(0.1, 2.5, n)
    b1 = rng.uniform(*b1_range, n)
    s = ir_signal(TI, t1, 1.0, -np.cos(np.pi * b1), TR, 90.0 * b1)
    noise = rng.normal(0, 1 / snr, (2,) + s.shape)
    return t1, np.abs(s + noise[0] + 1j * noise[1])


@pytest.fixture(scope="module")
def ir():
    spec = get_model("ir")
    return spec, spec.fixed_from_meta({"RepetitionTime": TR}, {})


def test_registry_has_t1_models():
    assert {"ir", "vfa", "dam"} <= set(model_names())
    spec = get_model("ir")
    assert spec.outputs == {"T1": "T1map", "M0": "M0map", "eff": "InvEffmap"}


def test_fast_and_lmfit_engines_agree(ir):
    spec, fixed = ir
    t1, y = _ir_data(120, 100, seed=1)
    fast = fit_voxels(spec, TI, y, fixed, engine="fast")
    slow = fit_voxels(spec, TI, y, fixed, engine="lmfit")
    ok = np.isin(fast.status, st.USABLE) & np.isin(slow.status, st.USABLE)
    assert ok.mean() > 0.95
    rel = np.abs(fast.params["T1"][ok] / slow.params["T1"][ok] - 1)
    assert np.median(rel) <= 1e-3
    # same least-squares problem: standard errors agree too
    assert np.median(np.abs(fast.stderr["T1"][ok] / slow.stderr["T1"][ok] - 1)) < 1e-2


def test_curve_fit_independent_fitter_agrees(ir):
    spec, fixed = ir
    t1, y = _ir_data(60, 100, seed=2)
    fast = fit_voxels(spec, TI, y, fixed)

    # Independent reference: the three-parameter form |a + b·exp(−TI/T1)|
    # (Barral et al. 2010, Magn Reson Med 64:1057) fitted by scipy's curve_fit.
    def model(ti, t1_, a, b):
        return np.abs(a + b * np.exp(-ti / t1_))

    ref = []
    for yi, ti_true in zip(y, t1):
        best = None
        for start in (0.5 * ti_true, ti_true, 2 * ti_true):
            try:
                popt, _ = curve_fit(model, TI, yi, p0=[start, yi[-1], -2 * yi[-1]], maxfev=5000)
            except RuntimeError:
                continue
            cost = np.sum((model(TI, *popt) - yi) ** 2)
            if best is None or cost < best[0]:
                best = (cost, popt[0])
        ref.append(best[1])
    rel = np.abs(fast.params["T1"] / np.array(ref) - 1)
    assert np.median(rel) < 1e-4
    assert np.percentile(rel, 90) < 1e-3


def test_vfa_fast_and_lmfit_agree():
    spec = get_model("vfa")
    rng = np.random.default_rng(3)
    angles = np.array([3.0, 6.0, 10.0, 15.0, 20.0, 30.0])
    n = 80
    t1 = rng.uniform(0.2, 2.0, n)
    b1 = rng.uniform(0.8, 1.2, n)
    s = spgr_signal(angles, t1, 1.0, 0.015, b1)
    y = s + rng.normal(0, s.max(1, keepdims=True) / 100, s.shape)
    fixed = {**spec.fixed_from_meta({"RepetitionTime": 0.015}, {}), "b1": b1}
    fast = fit_voxels(spec, angles, y, fixed)
    slow = fit_voxels(spec, angles, y, fixed, engine="lmfit")
    assert np.all(fast.status == st.OK)
    assert np.median(np.abs(fast.params["T1"] / slow.params["T1"] - 1)) <= 1e-3


def test_chunk_invariance(ir):
    """A voxel's result must not depend on which voxels share its batch."""
    spec, fixed = ir
    _, y = _ir_data(700, 50, seed=4)
    whole = fit_voxels(spec, TI, y, fixed)
    parts = [fit_voxels(spec, TI, y[a:b], fixed) for a, b in ((0, 13), (13, 400), (400, 700))]
    for k in spec.params:
        joined = np.concatenate([p.params[k] for p in parts])
        assert np.array_equal(joined, whole.params[k], equal_nan=True)
    assert np.array_equal(np.concatenate([p.status for p in parts]), whole.status)


def test_bad_voxels_get_status_and_nan(ir):
    spec, fixed = ir
    _, y = _ir_data(5, 100, seed=5)
    y[1, 3] = np.nan
    y[2] = 0.0
    y[3, 0] = np.inf
    res = fit_voxels(spec, TI, y, fixed)
    assert res.status.tolist() == [st.OK, st.BAD_DATA, st.BAD_DATA, st.BAD_DATA, st.OK]
    assert np.isnan(res.params["T1"][1:4]).all() and np.isnan(res.rmse[1:4]).all()


def test_unconverged_voxels_fail_or_refit(ir):
    spec, fixed = ir
    _, y = _ir_data(20, 100, seed=6)
    # no iteration at all: the ir start (a refined reduced-dimension search) is often
    # converged after a single LM step already
    failed = fit_voxels(spec, TI, y, fixed, max_iter=0, refit=False)
    assert np.all(failed.status == st.FAILED) and np.isnan(failed.params["T1"]).all()
    refit = fit_voxels(spec, TI, y, fixed, max_iter=0, refit=True)
    assert np.all(refit.status == st.OK_REFIT)
    ref = fit_voxels(spec, TI, y, fixed)
    assert np.allclose(refit.params["T1"], ref.params["T1"], rtol=1e-3)


def test_lm_respects_bounds_and_flags_at_bound(ir):
    spec, fixed = ir
    # a voxel whose T1 is far above the upper bound ends on the bound, flagged
    y = np.abs(ir_signal(TI, 200.0, 1.0, 1.0, TR, 90.0))[None, :]
    res = fit_voxels(spec, TI, y, fixed)
    assert res.status[0] == st.AT_BOUND
    assert res.params["T1"][0] <= spec.upper[0]
    lm = levenberg_marquardt(spec, TI, y, np.array([[1.0, 1.0, 1.0]]), fixed)
    assert np.all(lm.params >= spec.lower_array) and np.all(lm.params <= spec.upper_array)


def test_solve_small_matches_lapack():
    rng = np.random.default_rng(7)
    a = rng.normal(size=(50, 3, 5))
    m = a @ a.transpose(0, 2, 1) + 0.1 * np.eye(3)
    b = rng.normal(size=(50, 3))
    assert np.allclose(solve_small(m, b), np.linalg.solve(m, b[..., None])[..., 0])


def test_finite_difference_jacobian_matches_closed_form(ir):
    spec, _ = ir
    fixed = {"tr": np.inf, "alpha": 90.0, "signed": True}
    p = np.array([[0.8, 2.0, 1.0]])
    jac = jacobian(spec, TI, p, fixed)[0]
    e = np.exp(-TI / 0.8)
    # S = M0(1 − (1+eff)e^(−TI/T1)) for TR → ∞ (textbook IR; Barral et al. 2010):
    # dS/dT1 = −M0(1+eff)·e·TI/T1², dS/dM0 = 1 − (1+eff)e, dS/deff = −M0·e
    assert np.allclose(jac[:, 0], -2.0 * 2 * e * TI / 0.8 ** 2, rtol=1e-5, atol=1e-7)
    assert np.allclose(jac[:, 1], 1 - 2 * e, rtol=1e-12)
    assert np.allclose(jac[:, 2], -2.0 * e, rtol=1e-5, atol=1e-7)


def test_lmfit_model_is_built_from_spec(ir):
    spec, fixed = ir
    model = build_model(spec, fixed)
    assert set(model.param_names) == set(spec.params)
    pars = model.make_params()
    assert pars["eff"].max == spec.upper[2] and pars["T1"].min == spec.lower[0]
    y = np.abs(ir_signal(TI, 0.9, 3.0, 0.95, TR, 90.0))
    g = model.guess(y, x=TI)
    assert abs(g["T1"].value / 0.9 - 1) < 0.08   # half a step of the reduced-dimension grid


def test_crlb_closed_form_two_parameter_case():
    """crlb() vs the Fisher matrix written out by hand for S = M0(1 − 2e^(−TI/T1))."""
    spec = get_model("ir")
    fixed = {"tr": np.inf, "alpha": 90.0, "signed": True}
    t1, m0, sigma = 0.7, 1.0, 0.02
    e = np.exp(-TI / t1)
    # Fisher information F = JᵀJ/σ² for Gaussian noise (Kay 1993, Fundamentals of
    # Statistical Signal Processing I, §3.7), with the textbook derivatives.
    j = np.stack([-2 * m0 * e * TI / t1 ** 2, 1 - 2 * e], axis=1)
    bound = np.sqrt(np.linalg.inv(j.T @ j / sigma ** 2)[0, 0])
    got = crlb(spec, TI, {"T1": t1, "M0": m0, "eff": 1.0}, fixed, sigma, free=["T1", "M0"])
    assert got["T1"][0] == pytest.approx(bound, rel=1e-6)
    full = t1_crlb(spec, TI, t1, 1 / sigma, fixed)
    assert full[0] > bound   # estimating eff too can only lose precision


def test_monte_carlo_variance_reaches_crlb(ir):
    """Fast engine at SNR 50: var(T1) over 4000 trials within 10 % of the CRLB."""
    spec, _ = ir
    fixed = {"tr": TR, "alpha": 90.0, "signed": True}   # Gaussian noise on the signed signal
    t1, m0, eff, snr, n = 1.0, 1.0, 0.95, 50.0, 4000
    rng = np.random.default_rng(8)
    s = ir_signal(TI, t1, m0, eff, TR, 90.0)
    y = s + rng.normal(0, m0 / snr, (n, TI.size))
    res = fit_voxels(spec, TI, y, fixed)
    assert np.all(np.isin(res.status, st.USABLE))
    bound = crlb(spec, TI, {"T1": t1, "M0": m0, "eff": eff}, fixed, m0 / snr)["T1"][0]
    # Cramér–Rao bound for Gaussian noise (Kay 1993, §3.7)
    assert np.var(res.params["T1"], ddof=1) == pytest.approx(bound ** 2, rel=0.10)
    # the Jacobian standard errors (σ² from RSS/(M − P), unbiased) estimate the same spread
    assert np.sqrt(np.mean(res.stderr["T1"] ** 2)) == pytest.approx(bound, rel=0.10)


def test_closed_form_model_skips_iteration():
    spec = get_model("dam")
    assert spec.closed_form
    b1 = np.linspace(0.7, 1.3, 7)
    from fitting.signals import dam_signals
    y = dam_signals(60.0, b1, 5.0)
    res = fit_voxels(spec, np.array([60.0, 120.0]), y, {})
    assert np.allclose(res.params["B1"], b1, rtol=1e-9)
    assert np.all(res.status == st.OK)


def test_spec_variant_without_efficiency_is_fit_by_same_engine(ir):
    """ModelSpec is generic: a two-parameter variant runs through the same engine."""
    spec, fixed = ir
    two = dataclasses.replace(
        spec, name="ir-ideal", params=("T1", "M0"), units=("s", "arbitrary"),
        lower=spec.lower[:2], upper=spec.upper[:2], min_volumes=2,
        outputs={"T1": "T1map", "M0": "M0map"},
        signal=lambda x, p, f: np.abs(ir_signal(x, p["T1"], p["M0"], 1.0, f["tr"], f["alpha"])),
        jacobian=None,   # the ir Jacobian is for (T1, M0, eff)
        init=lambda x, d, f: {k: v for k, v in spec.init(x, d, f).items() if k != "eff"})
    y = np.abs(ir_signal(TI, np.array([0.3, 1.2]), 2.0, 1.0, TR, 90.0))
    res = fit_voxels(two, TI, y, fixed)
    assert np.allclose(res.params["T1"], [0.3, 1.2], rtol=1e-6)


def test_lmfit_imported_without_pandas_and_matplotlib():
    """A fit process imports lmfit for its refits without pandas and matplotlib, which
    stay importable afterwards (a fresh interpreter: the test process has them loaded)."""
    import subprocess
    import sys
    code = ("import sys; from fitting.lmfit_models import import_lmfit; lm = import_lmfit(); "
            "assert 'pandas' not in sys.modules and 'matplotlib' not in sys.modules; "
            "assert lm.Model is not None; import pandas, matplotlib; print('ok')")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0 and out.stdout.strip() == "ok", out.stderr


def test_lmfit_import_from_two_threads_at_once():
    """Two slabs refit side by side: both threads get the fully imported lmfit (a second
    caller must not see the module half-initialised)."""
    import subprocess
    import sys
    code = ("import threading; from fitting.lmfit_models import import_lmfit\n"
            "got = []\n"
            "ts = [threading.Thread(target=lambda: got.append(import_lmfit().Model)) "
            "for _ in range(4)]\n"
            "[t.start() for t in ts]; [t.join() for t in ts]\n"
            "assert len(got) == 4 and all(g is got[0] for g in got); print('ok')")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0 and out.stdout.strip() == "ok", out.stderr
