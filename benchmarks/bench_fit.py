"""Benchmark of the ``ir`` fit (design §8): fast engine vs per-voxel lmfit and curve_fit loops,
and peak memory of ``relaxline fit`` on a large series.

    .venv/bin/python benchmarks/bench_fit.py                 # all parts
    .venv/bin/python benchmarks/bench_fit.py --skip-memory   # throughput/accuracy only
    .venv/bin/python benchmarks/bench_fit.py --memory-shape 128,128,32

Part 1 simulates one ``ir`` volume (``--voxels``, default 30 000; 10 TIs, TR = 5 s,
T1 0.1–2.5 s, B1 0.8–1.2 scaling both pulses, magnitude data with Rician noise at
SNR ``--snr``), fits all of it with the fast engine and a sample (``--sample``) with a
per-voxel ``lmfit.Model.fit`` loop (the model relaxline's lmfit engine builds) and a
per-voxel ``scipy.optimize.curve_fit`` loop (Levenberg–Marquardt, the same |ir_signal|
model), both started from the same initialiser run once over the sample (as the lmfit
engine does). It prints voxels/s by wall clock and by
process CPU time (on a machine shared with other jobs the wall clock of one part can be
inflated by load the others did not see; all three are single-threaded), the ratios and
the T1 accuracy of each on the common sample.

Part 2 writes a 256×256×64×10 float32 series (uncompressed NIfTI, an object filling
about half the field of view) and runs ``fit_command`` in child processes, reporting
the growth of the peak resident set (VmHWM) over the resident set after the imports and
the compiled kernels' loading, and (in a second child, as tracing inflates the resident
set) the peak traced numpy/Python allocation (tracemalloc), each relative to the series
size. Targets: ≥ 300× lmfit, ≥ 30× curve_fit at equal accuracy (engine alone; the
end-to-end figures are bench_speed.py's); peak memory < 2× series.
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

TI = np.array([0.05, 0.1, 0.2, 0.35, 0.5, 0.75, 1.0, 1.5, 2.2, 3.5])
TR = 5.0


class _Clock:
    """Wall-clock and process CPU time of a block (CPU time is robust on a shared machine)."""

    def __enter__(self):
        self._w, self._c = time.perf_counter(), time.process_time()
        return self

    def __exit__(self, *exc):
        self.wall = time.perf_counter() - self._w
        self.cpu = time.process_time() - self._c


def simulate(n: int, snr: float, seed: int = 0):
    from fitting.signals import ir_signal
    rng = np.random.default_rng(seed)
    t1 = rng.uniform(0.1, 2.5, n)
    b1 = rng.uniform(0.8, 1.2, n)
    s = ir_signal(TI, t1, 1.0, -np.cos(np.pi * b1), TR, 90.0 * b1)
    noise = rng.normal(0, 1.0 / snr, (2,) + s.shape)
    return t1, np.abs(s + noise[0] + 1j * noise[1])


def accuracy(t1_true: np.ndarray, t1_fit: np.ndarray) -> str:
    rel = np.abs(t1_fit / t1_true - 1)
    ok = np.isfinite(rel)
    return (f"median |dT1|/T1 {100 * np.median(rel[ok]):.3f} %, 90th pct "
            f"{100 * np.percentile(rel[ok], 90):.3f} %, failed {int((~ok).sum())}")


def throughput(args) -> dict:
    from scipy.optimize import curve_fit

    from fitting.lmfit_models import build_model, fit_one
    from fitting.signals import ir_signal
    from fitting.spec import get_model
    from fitting.voxelwise import fit_voxels

    spec = get_model("ir")
    fixed = spec.fixed_from_meta({"RepetitionTime": TR}, {})
    t1, y = simulate(args.voxels, args.snr)
    fit_voxels(spec, TI, y[:200], fixed)            # warm caches (T1 grid)
    clock = _Clock()
    with clock:
        fast = fit_voxels(spec, TI, y, fixed)
    t_fast = clock.wall
    rate_fast, cpu_fast = args.voxels / clock.wall, args.voxels / clock.cpu

    sample = np.linspace(0, args.voxels - 1, args.sample).astype(int)
    model = build_model(spec, fixed)
    with clock:   # starts from one vectorised init call, as the lmfit engine does
        st = spec.init(TI, y[sample], fixed)
        t1_lm = np.array([fit_one(model, TI, y[i], start={k: st[k][j] for k in spec.params})[0][0]
                          for j, i in enumerate(sample)])
    rate_lmfit, cpu_lmfit = sample.size / clock.wall, sample.size / clock.cpu

    def f(ti, t1_, m0, eff):
        return np.abs(ir_signal(ti, t1_, m0, eff, TR, 90.0))

    t1_cf = np.full(sample.size, np.nan)
    with clock:
        st = spec.init(TI, y[sample], fixed)
        for j, i in enumerate(sample):
            p0 = [float(st[k][j]) for k in spec.params]
            try:
                popt, _ = curve_fit(f, TI, y[i], p0=p0, maxfev=2000)
                t1_cf[j] = popt[0]
            except RuntimeError:
                pass
    rate_cf, cpu_cf = sample.size / clock.wall, sample.size / clock.cpu

    out = {
        "voxels": args.voxels, "sample": int(sample.size), "snr": args.snr,
        "fast_voxels_per_s": rate_fast, "lmfit_voxels_per_s": rate_lmfit,
        "curve_fit_voxels_per_s": rate_cf,
        "ratio_vs_lmfit": rate_fast / rate_lmfit, "ratio_vs_curve_fit": rate_fast / rate_cf,
        "cpu_ratio_vs_lmfit": cpu_fast / cpu_lmfit, "cpu_ratio_vs_curve_fit": cpu_fast / cpu_cf,
        "status_counts": np.bincount(fast.status, minlength=6).tolist(),
    }
    print(f"ir fit, {args.voxels} voxels x {TI.size} TIs, SNR {args.snr:g} "
          f"(B1 0.8-1.2, TR = {TR:g} s = 2x longest T1)")
    print("  voxels/s      wall-clock   CPU-time   (ratios: fast / loop; targets 300x, 30x)")
    print(f"  fast engine : {rate_fast:10.0f}  {cpu_fast:10.0f}   ({t_fast:.2f} s wall for all)")
    print(f"  lmfit loop  : {rate_lmfit:10.1f}  {cpu_lmfit:10.1f}   -> "
          f"{out['ratio_vs_lmfit']:.0f}x wall, {out['cpu_ratio_vs_lmfit']:.0f}x CPU")
    print(f"  curve_fit   : {rate_cf:10.1f}  {cpu_cf:10.1f}   -> "
          f"{out['ratio_vs_curve_fit']:.0f}x wall, {out['cpu_ratio_vs_curve_fit']:.0f}x CPU")
    print(f"  fit status counts (0..5): {out['status_counts']}")
    print(f"  accuracy on the {sample.size}-voxel sample:")
    for name, est in (("fast", fast.params["T1"][sample]), ("lmfit", t1_lm),
                      ("curve_fit", t1_cf)):
        print(f"    {name:9s}: {accuracy(t1[sample], est)}")
    print(f"    fast (all {args.voxels}): {accuracy(t1, fast.params['T1'])}")
    print(f"    fast vs lmfit: median |dT1|/T1 "
          f"{100 * np.nanmedian(np.abs(fast.params['T1'][sample] / t1_lm - 1)):.2e} %")
    out["accuracy"] = {name: float(np.nanmedian(np.abs(est / t1[sample] - 1)))
                       for name, est in (("fast", fast.params["T1"][sample]),
                                         ("lmfit", t1_lm), ("curve_fit", t1_cf))}
    return out


def _proc_status(key: str) -> int:
    """Bytes of ``key`` (VmRSS: now, VmHWM: peak) from /proc/self/status (Linux).

    Not ``ru_maxrss``: that keeps the parent's size across fork + exec.
    """
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(key + ":"):
            return int(line.split()[1]) * 1024
    return 0


def _memory_child(folder: str, traced: bool) -> None:
    """Run in a child: fit the series in ``folder`` and print memory figures as JSON.

    The compiled kernels are loaded on a few voxels before the baseline is taken (a fixed
    cost of the process, like numpy's import, not a multiple of the series). ``traced``:
    measure the peak of tracemalloc's traced allocations instead of the resident set
    (tracemalloc's own bookkeeping inflates the resident set, so the two are separate
    runs)."""
    import tracemalloc

    from fitting.spec import get_model
    from fitting.voxelwise import fit_voxels
    from pipeline.fitjob import fit_command
    from pipeline.series import read_series
    spec = get_model("ir")
    fit_voxels(spec, TI, np.abs(np.sin(np.arange(40.0)).reshape(4, 10)) + 0.1,
               spec.fixed_from_meta({"RepetitionTime": TR}, {}))
    base = _proc_status("VmRSS")
    path = Path(folder) / "bench_IRT1.nii"
    series = read_series([path], "InversionTime")
    if traced:
        tracemalloc.start()
    t0 = time.perf_counter()
    with open(Path(folder) / "log.txt", "w") as log:
        fit_command("ir", [path], Path(folder) / ("out-traced" if traced else "out"),
                    stream=log)
    elapsed = time.perf_counter() - t0
    peak = tracemalloc.get_traced_memory()[1] if traced else None
    rss = _proc_status("VmHWM")
    print(json.dumps({"series_bytes": series.nbytes_float32, "traced_peak": peak,
                      "rss_base": base, "rss_peak": rss, "seconds": elapsed,
                      "voxels": series.n_voxels}))


def memory(args) -> dict:
    import nibabel as nib

    from fitting.signals import ir_signal
    shape = tuple(int(v) for v in args.memory_shape.split(","))
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        rng = np.random.default_rng(1)
        data = np.empty(shape + (TI.size,), np.float32)
        xx, yy = np.mgrid[: shape[0], : shape[1]]
        r = np.hypot(xx - shape[0] / 2, yy - shape[1] / 2) / (shape[0] / 2)
        obj = r < 0.8                                   # ~50 % of the field of view
        t1_slice = np.where(obj, 0.3 + 2.0 * r, 1.0)
        for z in range(shape[2]):                       # slice by slice: bounded memory here too
            s = ir_signal(TI, t1_slice, np.where(obj, 1000.0, 0.0), 0.95, TR, 90.0)
            noise = rng.normal(0, 10.0, (2,) + s.shape)
            data[:, :, z] = np.abs(s + noise[0] + 1j * noise[1])
        nib.save(nib.Nifti1Image(data, np.eye(4)), str(folder / "bench_IRT1.nii"))
        (folder / "bench_IRT1.json").write_text(json.dumps(
            {"InversionTime": TI.tolist(), "RepetitionTime": TR}))
        del data
        runs = []
        for mode in ("rss", "traced"):
            proc = subprocess.run([sys.executable, str(Path(__file__).resolve()),
                                   "--memory-child", str(folder), mode],
                                  capture_output=True, text=True)
            if proc.returncode != 0:
                raise SystemExit(proc.stderr)
            runs.append(json.loads(proc.stdout.strip().splitlines()[-1]))
        res = {**runs[0], "traced_peak": runs[1]["traced_peak"]}
    size = res["series_bytes"]
    res["traced_ratio"] = res["traced_peak"] / size
    res["rss_growth_ratio"] = (res["rss_peak"] - res["rss_base"]) / size
    res["rss_peak_ratio"] = res["rss_peak"] / size
    print(f"relaxline fit ir on {shape}x{TI.size} float32 ({size / 1e6:.0f} MB series), "
          f"{res['seconds']:.0f} s ({res['voxels'] / res['seconds']:.0f} voxels/s incl. I/O):")
    print(f"  peak traced allocations : {res['traced_peak'] / 1e6:7.0f} MB = "
          f"{res['traced_ratio']:.2f}x series")
    print(f"  peak RSS growth         : {(res['rss_peak'] - res['rss_base']) / 1e6:7.0f} MB = "
          f"{res['rss_growth_ratio']:.2f}x series  (target < 2x)")
    print(f"  peak RSS (whole process): {res['rss_peak'] / 1e6:7.0f} MB = "
          f"{res['rss_peak_ratio']:.2f}x series")
    return res


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--voxels", type=int, default=30000)
    p.add_argument("--sample", type=int, default=300)
    p.add_argument("--snr", type=float, default=100.0)
    p.add_argument("--memory-shape", default="256,256,64")
    p.add_argument("--skip-memory", action="store_true")
    p.add_argument("--skip-throughput", action="store_true")
    p.add_argument("--json", metavar="F", help="also write the figures to this JSON file")
    p.add_argument("--memory-child", nargs=2, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.memory_child:
        _memory_child(args.memory_child[0], args.memory_child[1] == "traced")
        return 0
    figures = {}
    if not args.skip_throughput:
        figures["throughput"] = throughput(args)
    if not args.skip_memory:
        figures["memory"] = memory(args)
    if args.json:
        Path(args.json).write_text(json.dumps(figures, indent=2))
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    sys.exit(main())
