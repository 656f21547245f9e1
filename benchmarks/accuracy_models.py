"""Accuracy of looklocker, sr, afi, mp2rage and mese-multi against independent Bloch simulations.

For each model the signals of the twelve vials of the demo phantom (their T1/T2 values at the
reference temperature, used only as a spread of truths) come from the event-by-event
isochromat simulations of ``tests/bloch_more.py`` (not from the project's forward models).
Printed per vial: the noiseless error (identity), and the bias of the mean over the usable
voxels (status converged) of ``--voxels`` noisy copies at SNR 100 and 300 (complex Gaussian
noise, σ = largest noise-free magnitude of the series / SNR, magnitude data except MP2RAGE),
with the count of voxels not usable. The protocols are those of the tests
(tests/test_fit_recovery.py, test_fit_afi_mp2rage.py, test_fit_t2dist.py) and the demo.

    .venv/bin/python benchmarks/accuracy_models.py [--voxels 300] [--json out.json]
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from accuracy import VIAL_T1, VIAL_T2, noisy   # noqa: E402
from bloch_more import (afi_pair, cpmg_pools, looklocker, mp2rage_pair,  # noqa: E402
                        saturation_recovery)
from fitting import status as st   # noqa: E402
from fitting.spec import configure_model, get_model   # noqa: E402
from fitting.voxelwise import fit_voxels   # noqa: E402

SNRS = (100, 300)


def _fit(model, x, y, meta, options=None, fixed_extra=None, sigma=None):
    spec = configure_model(get_model(model), options or {})
    fixed = {**spec.fixed_from_meta(meta, options or {}), **(fixed_extra or {})}
    spec.validate(np.asarray(x, float), fixed)
    return fit_voxels(spec, np.asarray(x, float), y, fixed, noise_sigma=sigma)


def _row(name, truth, clean, run, param, n, complex_data=False, scale=1.0):
    """Noiseless identity and noisy bias per vial for one model setting."""
    base = run(clean if not complex_data else clean.astype(complex), None)
    out = {"name": name, "param": param,
           "noiseless_pct": (100 * (base.params[param] * scale / truth - 1)).tolist(),
           "noiseless_status": base.status.tolist()}
    for snr in SNRS:
        y = noisy(clean, snr, n, seed=snr, complex_data=complex_data)
        res = run(y, np.max(np.abs(clean)) / snr)
        use = np.isin(res.status, st.USABLE).reshape(truth.size, n)
        v = np.where(use, res.params[param].reshape(truth.size, n) * scale, np.nan)
        with np.errstate(invalid="ignore"):
            out[f"bias_pct_snr{snr}"] = (100 * (np.nanmean(v, axis=1) / truth - 1)).tolist()
        out[f"not_usable_snr{snr}"] = (n - use.sum(axis=1)).tolist()
    return out


def looklocker_rows(n):
    tau, alpha, pulses, first = 0.1, 8.0, 48, 0.05
    ti, _ = looklocker(1.0, alpha, tau, pulses, first, 20.0)
    clean = np.abs(np.array([looklocker(t, alpha, tau, pulses, first, 20.0)[1]
                             for t in VIAL_T1]))
    meta = {"FlipAngle": alpha, "RepetitionTimeExcitation": tau}
    imperfect = np.abs(np.array([looklocker(t, alpha, tau, pulses, first, 20.0, 161.8)[1]
                                 for t in VIAL_T1]))
    return [_row("looklocker ratio (ideal inversion)", VIAL_T1, clean,
                 lambda y, s: _fit("looklocker", ti, y, meta, sigma=s), "T1", n),
            _row("looklocker readout (ideal inversion)", VIAL_T1, clean,
                 lambda y, s: _fit("looklocker", ti, y, meta, {"ll_correction": "readout"},
                                   sigma=s), "T1", n),
            _row("looklocker ratio (inversion efficiency 0.95)", VIAL_T1, imperfect,
                 lambda y, s: _fit("looklocker", ti, y, meta, sigma=s), "T1", n),
            _row("looklocker readout (inversion efficiency 0.95)", VIAL_T1, imperfect,
                 lambda y, s: _fit("looklocker", ti, y, meta, {"ll_correction": "readout"},
                                   sigma=s), "T1", n)]


def sr_rows(n):
    td = np.array([0.02, 0.05, 0.1, 0.2, 0.4, 0.8, 1.5, 3.0, 6.0])
    clean = np.abs(np.array([saturation_recovery(t, td, sat_deg=80.0) for t in VIAL_T1]))
    return [_row("sr (80° saturation)", VIAL_T1, clean,
                 lambda y, s: _fit("sr", td, y, {}, sigma=s), "T1", n)]


def afi_rows(n):
    tr, alpha, b1 = np.array([0.02, 0.1]), 60.0, 0.9
    clean = np.array([afi_pair(t, alpha * b1, *tr) for t in VIAL_T1])
    truth = np.full(VIAL_T1.size, b1)
    exact = [_row(f"afi exact (T1 known) vial {i + 1}", truth[i:i + 1], clean[i:i + 1],
                  lambda y, s, t=t: _fit("afi", tr, y, {"FlipAngle": alpha},
                                         {"t1_fixed": float(t)}, sigma=s), "B1", n)
             for i, t in enumerate(VIAL_T1)]
    merged = {"name": "afi exact (T1 known)", "param": "B1"}
    for k in exact[0]:
        if k not in ("name", "param"):
            merged[k] = [r[k][0] for r in exact]
    return [_row("afi closed form (TR << T1)", truth, clean,
                 lambda y, s: _fit("afi", tr, y, {"FlipAngle": alpha}, sigma=s), "B1", n),
            merged]


def mp2rage_rows(n):
    rows = []
    for label, ti, shots, nb in (("demo protocol TI 0.35/2.5 s", (0.35, 2.5), [40, 88], 40),
                                 ("TI 0.7/2.5 s", (0.7, 2.5), 160, 80)):
        inv = np.rad2deg(np.arccos(-0.96))
        n_sh = sum(shots) if isinstance(shots, list) else shots
        clean = np.array([mp2rage_pair(t, ti[0], ti[1], (4.0, 5.0), 0.007, n_sh, nb, 5.0,
                                       inversion_deg=inv) for t in VIAL_T1])
        meta = {"FlipAngle": [4.0, 5.0], "RepetitionTimeExcitation": 0.007,
                "RepetitionTimePreparation": 5.0, "NumberShots": shots}
        rows.append(_row(f"mp2rage {label}", VIAL_T1, clean,
                         lambda y, s, m=meta, t=ti: _fit("mp2rage", t, y, m, sigma=s), "T1", n,
                         complex_data=True))
    return rows


def mese_multi_rows(n):
    m, esp = 32, 0.01
    te = esp * np.arange(1, m + 1)
    clean = np.array([cpmg_pools(m, esp, [(1.0, t2)], t1=t1, b1=0.85)
                      for t1, t2 in zip(VIAL_T1, VIAL_T2)])
    rows = [_row("mese-multi geometric-mean T2 (one pool, B1 0.85)", VIAL_T2, clean,
                 lambda y, s: _fit("mese-multi", te, y, {}, sigma=s or 1e-6), "T2", n)]
    pools = np.array([cpmg_pools(m, esp, [(0.15, 0.02), (0.85, 0.08)], b1=b)
                      for b in (0.7, 0.85, 1.0)])
    rows.append(_row("mese-multi short-T2 fraction 15 % (B1 0.7, 0.85, 1.0)",
                     np.full(3, 15.0), pools,
                     lambda y, s: _fit("mese-multi", te, y, {}, sigma=s or 1e-6), "MWF", n))
    return rows


def _fmt(v):
    return " ".join(f"{x:7.2f}" if np.isfinite(x) else "    nan" for x in v)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--voxels", type=int, default=300, help="noisy copies per vial")
    ap.add_argument("--json", metavar="F", help="write the numbers as JSON")
    args = ap.parse_args(argv)
    t0 = time.perf_counter()
    rows = []
    for group in (looklocker_rows, sr_rows, afi_rows, mp2rage_rows, mese_multi_rows):
        rows += group(args.voxels)
    for r in rows:
        print(f"\n{r['name']} — {r['param']}, % error of the mean per vial")
        print(f"  noiseless        {_fmt(r['noiseless_pct'])}")
        for snr in SNRS:
            print(f"  bias SNR {snr:<4}    {_fmt(r[f'bias_pct_snr{snr}'])}"
                  f"   (not usable: {sum(r[f'not_usable_snr{snr}'])} of "
                  f"{len(r['noiseless_pct']) * args.voxels})")
    print(f"\n{time.perf_counter() - t0:.1f} s")
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
