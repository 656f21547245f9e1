"""The compiled fast engine against the numpy reference engine, on every registered model.

These are checks of engine equivalence (the compiled per-voxel iteration must give the
maps of the batched numpy iteration it replaces, to the iterations' tolerances), not of
the models' accuracy: the data are noisy trains of each model's own forward function, on
purpose, so both engines fit the same, exactly representable problem. The models'
accuracy is checked against outside references in test_fit_t1.py, test_fit_t2.py,
test_epg.py and test_t1_map.py.
"""
from __future__ import annotations

import numpy as np
import pytest

from fitting import status as st
from fitting import voxelwise
from fitting.spec import configure_model, get_model, model_names
from fitting.voxelwise import fit_voxels

TI = np.array([0.05, 0.1, 0.2, 0.35, 0.5, 0.75, 1.0, 1.5, 2.2, 3.5])
TE32 = 0.01 * np.arange(1, 33)
N = 400


def _rng(name: str) -> np.random.Generator:
    return np.random.default_rng(sum(map(ord, name)))


def _case(name: str):
    """(x, meta, options, true parameters, per-voxel fixed) for model ``name``."""
    r = _rng(name)
    u = lambda lo, hi: r.uniform(lo, hi, N)  # noqa: E731
    if name == "ir":
        return TI, {"RepetitionTime": 5.0}, {}, {"T1": u(0.1, 2.5), "M0": u(0.5, 2),
                                                 "eff": u(0.8, 1.0)}, {}
    if name == "vfa":
        return (np.array([2.0, 5.0, 10.0, 15.0, 20.0]), {"RepetitionTime": 0.015}, {},
                {"T1": u(0.2, 2.5), "M0": u(0.5, 2)}, {"b1": u(0.8, 1.2)})
    if name == "dam":
        return np.array([60.0, 120.0]), {}, {}, {"B1": u(0.7, 1.2), "M0": u(0.5, 2)}, {}
    if name == "mese":
        return TE32, {"RefocusingFlipAngle": 180.0}, {}, {"T2": np.exp(u(np.log(0.02), np.log(0.4))),
                                                          "M0": u(0.5, 2), "B1": u(0.75, 0.98)}, {}
    if name in ("mese-mono", "megre"):
        t2 = "T2" if name == "mese-mono" else "T2star"
        return TE32, {}, {}, {t2: np.exp(u(np.log(0.02), np.log(0.3))), "M0": u(0.5, 2)}, {}
    if name == "looklocker":
        t1 = u(0.2, 2.5)
        return 0.05 + 0.1 * np.arange(40), {}, {}, {"T1": t1, "M0": u(0.5, 2),
                                                    "T1star": t1 * u(0.6, 0.9)}, {}
    if name == "sr":
        return TI, {}, {}, {"T1": u(0.1, 2.5), "M0": u(0.5, 2), "eff": u(0.8, 1.0)}, {}
    if name == "afi":
        return np.array([0.02, 0.1]), {"FlipAngle": 60.0}, {}, {"B1": u(0.7, 1.2),
                                                                "A": u(0.02, 0.05)}, {}
    if name == "mp2rage":     # complex inversion images (_data keeps the noise complex)
        return (np.array([0.7, 2.5]), {"FlipAngle": [4.0, 5.0], "RepetitionTimeExcitation":
                0.007, "RepetitionTimePreparation": 5.0, "NumberShots": 160}, {},
                {"T1": u(0.3, 3.0), "M0": u(0.5, 2)}, {"b1": u(0.8, 1.2)})
    if name == "mese-multi":  # its own NNLS solver in every engine; trains from the EPG basis
        return TE32, {}, {}, {"T2": np.exp(u(np.log(0.03), np.log(0.3))), "M0": u(0.5, 2),
                              "B1": u(0.75, 0.98)}, {}
    raise AssertionError(f"model {name!r} has no case in tests/test_compiled.py; add one so "
                         f"the compiled engine is compared with the numpy engine on it")


def _data(name: str, options: dict | None = None, snr: float = 50.0):
    x, meta, opts, params, voxel = _case(name)
    opts = {**opts, **(options or {})}
    spec = configure_model(get_model(name), opts)
    fixed = {**spec.fixed_from_meta(meta, opts), **voxel}
    if opts.get("b1_map"):                  # B1 from a map: the true B1 per voxel
        fixed["b1"] = params["B1"]
    if opts.get("t1_map"):                  # per-voxel T1
        fixed["t1"] = _rng(name + "t1").uniform(0.3, 3.0, N)
    if opts.get("noise") == "rician":
        fixed["sigma"] = 1.0 / snr
    p = {k: params[k] for k in spec.params if k in params}
    if "plateau" in spec.params:
        p["plateau"] = _rng(name).uniform(0.0, 0.05, N)
    if spec.solver is not None:      # no closed signal of the summary parameters
        from fitting.epg import cpmg_echoes
        clean = cpmg_echoes(x.size, x[0], params["T2"], 1.0, b1=params["B1"], m0=params["M0"])
    else:
        clean = spec.signal(x, p, {**fixed, "skip_echoes": 0})  # all echoes; the fit may skip
    r = _rng(name + "noise")
    y = clean + r.normal(0, 1 / snr, clean.shape) + 1j * r.normal(0, 1 / snr, clean.shape)
    return spec, x, (y if spec.extra.get("needs_complex") else np.abs(y)), fixed


VARIANTS = [(name, {}) for name in model_names()] + [
    ("mese-mono", {"plateau": True}), ("mese-mono", {"skip_echoes": 1}),
    ("ir", {"noise": "rician"}), ("vfa", {"noise": "rician"}), ("megre", {"noise": "rician"}),
    ("mese", {"noise": "rician"}), ("mese", {"b1_map": "map"}), ("mese", {"t1_map": "map"})]


@pytest.mark.parametrize("name,options", VARIANTS, ids=lambda v: str(v))
def test_compiled_engine_gives_the_numpy_engines_maps(name, options):
    spec, x, y, fixed = _data(name, options)
    fast = fit_voxels(spec, x, y, fixed, engine="fast")
    ref = fit_voxels(spec, x, y, fixed, engine="numpy")
    assert np.mean(ref.status == st.OK) > 0.9
    same = (fast.status == ref.status)
    assert same.mean() >= 0.99, np.bincount(fast.status[~same])
    ok = same & (ref.status == st.OK)
    if spec.extra_outputs:
        assert fast.extras.keys() == ref.extras.keys() == spec.extra_outputs.keys()
    for k in spec.params:
        # the two iterations stop within their tolerances of the same minimum: estimates
        # agree to 2e-6 relative, or (a parameter near 0) to 1/1000 of its standard error
        a, b, se = fast.params[k][ok], ref.params[k][ok], ref.stderr[k][ok]
        assert np.all(np.abs(a - b) <= np.fmax(2e-6 * np.abs(b), 1e-3 * se)), k
        # standard errors wherever they are an uncertainty at all (below the value: at
        # mese's B1 = 1, where dS/dB1 = 0, they are ~1e2-1e3 and rounding-sensitive)
        meaningful = se < np.abs(b)
        np.testing.assert_allclose(fast.stderr[k][ok][meaningful], se[meaningful], rtol=1e-3)
    np.testing.assert_allclose(fast.rmse[ok], ref.rmse[ok], rtol=1e-6)


@pytest.mark.parametrize("name", ["ir", "megre"])
def test_compiled_results_do_not_depend_on_block_size_or_threads(name, monkeypatch):
    spec, x, y, fixed = _data(name)
    one = fit_voxels(spec, x, y, fixed, jobs=1, noise_sigma=0.005)
    monkeypatch.setattr(voxelwise, "KERNEL_BLOCK", 37)
    two = fit_voxels(spec, x, y, fixed, jobs=2, noise_sigma=0.005)
    assert np.array_equal(one.status, two.status)
    for k in spec.params:
        assert np.array_equal(one.params[k], two.params[k], equal_nan=True)
        assert np.array_equal(one.stderr[k], two.stderr[k], equal_nan=True)
    assert np.array_equal(one.rmse, two.rmse, equal_nan=True)


def test_hopeless_voxels_get_their_status_without_an_lmfit_refit(monkeypatch):
    """Air (pure noise) rows: no lmfit call; at-bound ones AT_BOUND, the rest FAILED."""
    spec = get_model("ir")
    fixed = spec.fixed_from_meta({"RepetitionTime": 5.0}, {})
    r = np.random.default_rng(3)
    sigma = 0.01
    air = np.abs(r.normal(0, sigma, (300, TI.size)) + 1j * r.normal(0, sigma, (300, TI.size)))
    calls = []
    monkeypatch.setattr(voxelwise, "_lmfit_chunk",
                        lambda *a: calls.append(a) or (_ for _ in ()).throw(AssertionError))
    res = fit_voxels(spec, TI, air, fixed, noise_sigma=sigma)
    assert not calls
    assert set(np.unique(res.status)) <= {st.OK, st.AT_BOUND, st.FAILED}
