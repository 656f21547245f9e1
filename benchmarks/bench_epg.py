"""Speed of the EPG CPMG model: 1e5 voxels × 32 echoes, its Jacobian and a dictionary.

Prints absolute times and ratios against the closed-form mono-exponential model on the
same voxels in the same run (the cheapest model the engine evaluates).
Run: .venv/bin/python benchmarks/bench_epg.py
"""
from __future__ import annotations

import time

import numpy as np

from fitting.epg import cpmg_echoes, cpmg_echoes_jacobian
from fitting.signals import mono_exp


def _best(fn, repeats: int = 5) -> float:
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def main() -> None:
    n_vox, n_echo, esp = 100_000, 32, 0.01
    rng = np.random.default_rng(0)
    t2 = rng.uniform(0.02, 0.3, n_vox)
    b1 = rng.uniform(0.6, 1.3, n_vox)
    te = esp * np.arange(1, n_echo + 1)
    t_mono = _best(lambda: mono_exp(te, t2, 1.0))
    t_fwd = _best(lambda: cpmg_echoes(n_echo, esp, t2, 1.0, b1, refocus_deg=160.0))
    t_jac = _best(lambda: cpmg_echoes_jacobian(n_echo, esp, t2, 1.0, b1, refocus_deg=160.0))
    t2_grid = np.geomspace(0.005, 2.0, 200)[:, None]
    b1_grid = np.linspace(0.5, 1.5, 60)[None, :]
    t_dict = _best(lambda: cpmg_echoes(n_echo, esp, t2_grid, 1.0, b1_grid, refocus_deg=160.0))
    print(f"voxels {n_vox}, echoes {n_echo}")
    print(f"mono_exp              {t_mono * 1e3:8.1f} ms")
    print(f"cpmg_echoes           {t_fwd * 1e3:8.1f} ms  ({t_fwd / t_mono:5.1f}x mono_exp)")
    print(f"cpmg_echoes_jacobian  {t_jac * 1e3:8.1f} ms  ({t_jac / t_fwd:5.1f}x cpmg_echoes)")
    print(f"dictionary 200 T2 x 60 B1 {t_dict * 1e3:6.1f} ms")


if __name__ == "__main__":
    main()
