"""End-to-end speed of ``relaxline fit`` against per-voxel loops, cores, memory, the demo.

    .venv/bin/python benchmarks/bench_speed.py                 # ir + mese end to end (~3 min)
    .venv/bin/python benchmarks/bench_speed.py --memory --demo # + peak memory and demo wall time
    .venv/bin/python benchmarks/bench_speed.py --json out.json

Everything is measured in one run on data written here, so the ratios compare like with
like on whatever load the machine carries (the load average is printed):

* ``fit ir`` end to end — the CLI in a child process (start-up, reading the .nii.gz
  series, noise estimate, fit, writing every map) on a 4D series of a disc-shaped
  object in noise-only air (T1 0.1–2.5 s, B1 0.8–1.2 scaling both pulses, 10 TIs,
  TR 5 s, SNR 100 at M0), against a per-voxel ``lmfit.Model.fit`` loop (the model
  relaxline's lmfit engine builds from the spec) and a per-voxel
  ``scipy.optimize.curve_fit`` loop, both on object voxels of the same data. Ratio =
  fitted voxels per second of the CLI / voxels per second of the loop, by wall clock
  and by CPU time (the loops use one core; the CLI as many as ``--jobs``).
* ``fit mese`` end to end the same way (32 echoes, ESP 10 ms, T2 0.02–0.4 s, B1 0.75–1.1,
  B1 fitted) against an lmfit loop (the slice-profile EPG's cost relative to the plain
  EPG's: ``bench_slice_profile.py``).
* cores used: CPU time / wall time of each CLI run, and the wall-time ratio of
  ``--jobs 1`` over ``--jobs 2``.
* ``--memory``: peak memory of ``fit ir`` on a 256×256×64×10 float32 series (uncompressed
  NIfTI) as a multiple of the series size (peak resident set growth over the imports,
  and traced numpy/Python allocations), in a child process (``bench_fit.py``'s part 2).
* ``--demo``: wall time of ``relaxline demo`` (simulate + workflow + reports) on ``--cores``.

The first CLI run of each model is a warm-up (it fills numba's on-disk cache), not timed.
Runs unchanged against an older checkout's virtual environment (it only uses the CLI and
public functions), which is how the "before" figures in benchmarks/README.md were taken.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from bench_fit import _Clock  # noqa: E402  (benchmarks/ is on sys.path when run as a script)
from bench_fit import memory as fit_memory  # noqa: E402

TI = np.array([0.05, 0.1, 0.2, 0.35, 0.5, 0.75, 1.0, 1.5, 2.2, 3.5])
TR = 5.0
N_ECHO, ESP = 32, 0.01


def _relaxline() -> str:
    exe = Path(sys.executable).with_name("relaxline")
    return str(exe) if exe.exists() else "relaxline"


def run_child(argv: list[str], env: dict | None = None, ok: tuple[int, ...] = (0,)) -> dict:
    """Run a command; wall time, CPU time (user + sys of the child and its children) and
    peak resident set of the child itself. An exit status outside ``ok`` is an error."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            env={**os.environ, **(env or {})})
    out, err = proc.communicate()
    wall = time.perf_counter() - t0
    if proc.returncode not in ok:
        raise SystemExit(f"{' '.join(argv)} failed ({proc.returncode}):\n{err.decode()[-3000:]}")
    return {"wall": wall, "stdout": out.decode(), "stderr": err.decode()}


def timed_child(argv: list[str], ok: tuple[int, ...] = (0,)) -> dict:
    """``run_child`` with CPU time from RUSAGE_CHILDREN (all descendants, e.g. Snakemake jobs)."""
    import resource
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    res = run_child(argv, ok=ok)
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    res["cpu"] = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return res


def _disc(shape, frac=0.8):
    xx, yy = np.mgrid[: shape[0], : shape[1]]
    r = np.hypot(xx - shape[0] / 2, yy - shape[1] / 2) / (shape[0] / 2)
    return r, r < frac


def write_ir(folder: Path, shape, snr: float, seed: int = 0, gz: bool = True):
    """4D ir series: smooth T1 (0.1–2.5 s) and B1 (0.8–1.2) across a disc, air outside."""
    import nibabel as nib

    from fitting.signals import ir_signal
    rng = np.random.default_rng(seed)
    r, obj = _disc(shape)
    data = np.empty(tuple(shape) + (TI.size,), np.float32)
    for z in range(shape[2]):
        t1 = 0.1 + 2.4 * np.clip(r + 0.1 * np.sin(z + r * 7), 0, 1)
        b1 = 0.8 + 0.4 * np.clip(r * (0.5 + 0.5 * np.cos(z)), 0, 1)
        s = ir_signal(TI, t1, np.where(obj, 1.0, 0.0), -np.cos(np.pi * b1), TR, 90.0 * b1)
        noise = rng.normal(0, 1.0 / snr, (2,) + s.shape)
        data[:, :, z] = np.abs(s + noise[0] + 1j * noise[1])
    path = folder / ("bench_IRT1.nii.gz" if gz else "bench_IRT1.nii")
    nib.save(nib.Nifti1Image(data, np.eye(4)), str(path))
    (folder / "bench_IRT1.json").write_text(json.dumps(
        {"InversionTime": TI.tolist(), "RepetitionTime": TR}))
    return path, data[obj].reshape(-1, data.shape[-1])


def write_mese(folder: Path, shape, snr: float, seed: int = 1):
    import nibabel as nib

    from fitting.epg import cpmg_echoes
    rng = np.random.default_rng(seed)
    r, obj = _disc(shape)
    data = np.empty(tuple(shape) + (N_ECHO,), np.float32)
    for z in range(shape[2]):
        t2 = np.exp(np.log(0.02) + np.log(20.0) * np.clip(r + 0.05 * z / shape[2], 0, 1))
        b1 = 0.75 + 0.35 * np.clip(1 - r, 0, 1)
        s = cpmg_echoes(N_ECHO, ESP, t2, 1.0, b1=b1, m0=np.where(obj, 1.0, 0.0))
        noise = rng.normal(0, 1.0 / snr, (2,) + s.shape)
        data[:, :, z] = np.abs(s + noise[0] + 1j * noise[1])
    path = folder / "bench_MESE.nii.gz"
    nib.save(nib.Nifti1Image(data, np.eye(4)), str(path))
    (folder / "bench_MESE.json").write_text(json.dumps(
        {"EchoTime": (ESP * np.arange(1, N_ECHO + 1)).tolist(), "RefocusingFlipAngle": 180.0}))
    return path, data[obj].reshape(-1, data.shape[-1])


def fitted_voxels(out_dir: Path) -> int:
    import nibabel as nib
    status = next(out_dir.glob("*_desc-fitstatus_mask.nii.gz"))
    return int(np.count_nonzero(np.asarray(nib.load(str(status)).dataobj)))


def cli_fit(model: str, path: Path, out: Path, jobs: int | None, extra=()) -> dict:
    argv = [_relaxline(), "fit", model, str(path), "--out", str(out), *extra]
    if jobs is not None:
        argv += ["--jobs", str(jobs)]
    if out.exists():
        shutil.rmtree(out)
    res = timed_child(argv)
    res["fitted"] = fitted_voxels(out)
    return res


def loop_rates(model: str, x: np.ndarray, y: np.ndarray, meta: dict, curve) -> dict:
    """Per-voxel lmfit and curve_fit loops over the rows of ``y``; voxels/s wall and CPU."""
    from scipy.optimize import curve_fit

    from fitting.lmfit_models import build_model, fit_one
    from fitting.spec import get_model
    spec = get_model(model)
    fixed = spec.fixed_from_meta(meta, {})
    lm = build_model(spec, fixed)
    fit_one(lm, x, y[0])                        # warm-up (imports, caches)
    out = {}
    with _Clock() as c:
        for row in y:
            fit_one(lm, x, row)
    out["lmfit"] = (y.shape[0] / c.wall, y.shape[0] / c.cpu)
    if curve is not None:
        starts = spec.init(x, y, fixed)
        with _Clock() as c:
            for i, row in enumerate(y):
                try:
                    curve_fit(curve, x, row, p0=[float(starts[k][i]) for k in spec.params],
                              maxfev=2000)
                except RuntimeError:
                    pass
        out["curve_fit"] = (y.shape[0] / c.wall, y.shape[0] / c.cpu)
    return out


def _cpu_count() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:
        return os.cpu_count() or 1


def end_to_end(model: str, path: Path, obj_rows: np.ndarray, x: np.ndarray, meta: dict,
               curve, sample: int, work: Path, jobs: list[int], figures: dict,
               extra=()) -> None:
    cli_fit(model, path, work / f"warm-{model}", jobs[0], extra)          # warm-up, not timed
    runs = {j: cli_fit(model, path, work / f"{model}-j{j}", j, extra) for j in jobs}
    pick = np.linspace(0, obj_rows.shape[0] - 1, sample).astype(int)
    loops = loop_rates(model, x, obj_rows[pick].astype(float), meta, curve)
    best = runs[max(jobs)]
    rate_w, rate_c = best["fitted"] / best["wall"], best["fitted"] / best["cpu"]
    fig = {"fitted_voxels": best["fitted"],
           "cli": {str(j): {"wall_s": r["wall"], "cpu_s": r["cpu"], "cores_used": r["cpu"] / r["wall"]}
                   for j, r in runs.items()}}
    print(f"fit {model}{' ' + ' '.join(extra) if extra else ''}: {best['fitted']} fitted voxels "
          f"of {path.name}")
    for j, r in runs.items():
        print(f"  CLI --jobs {j}: {r['wall']:6.1f} s wall, {r['cpu']:6.1f} s CPU, cores used "
              f"{r['cpu'] / r['wall']:.2f}, {r['fitted'] / r['wall']:8.0f} voxels/s wall")
    if len(jobs) > 1:
        s = runs[min(jobs)]["wall"] / runs[max(jobs)]["wall"]
        fig["jobs_speedup"] = s
        print(f"  --jobs {min(jobs)} / --jobs {max(jobs)} wall time: {s:.2f}x")
    for name, (w, c) in loops.items():
        fig[f"vs_{name}"] = {"loop_voxels_per_s_wall": w, "loop_voxels_per_s_cpu": c,
                             "ratio_wall": rate_w / w, "ratio_cpu": rate_c / c}
        print(f"  {name:9s} loop: {w:7.1f} voxels/s wall, {c:7.1f} CPU ({pick.size} voxels) -> "
              f"CLI is {rate_w / w:6.0f}x (wall), {rate_c / c:6.0f}x (CPU)")
    figures[model + ("-" + "-".join(e.strip("-") for e in extra) if extra else "")] = fig


def demo(work: Path, cores: int) -> dict:
    # exit status 1 is the QC verdict (a drift rule or tolerance), not a failed run
    res = timed_child([_relaxline(), "demo", str(work / "demo"), "--cores", str(cores)],
                      ok=(0, 1))
    print(f"relaxline demo (4 sessions, --cores {cores}): {res['wall']:.1f} s wall, "
          f"{res['cpu']:.1f} s CPU")
    return {"wall_s": res["wall"], "cpu_s": res["cpu"], "cores": cores}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--ir-shape", default="128,128,64", help="x,y,z of the ir series")
    p.add_argument("--mese-shape", default="64,64,12", help="x,y,z of the mese series")
    p.add_argument("--sample", type=int, default=200, help="voxels of each per-voxel loop")
    p.add_argument("--jobs", default="1,2", help="--jobs values of the CLI runs")
    p.add_argument("--models", default="ir,mese")
    p.add_argument("--memory", action="store_true", help="peak memory on 256x256x64x10")
    p.add_argument("--memory-shape", default="256,256,64")
    p.add_argument("--demo", action="store_true", help="time `relaxline demo`")
    p.add_argument("--cores", type=int, default=_cpu_count(), help="demo cores")
    p.add_argument("--json", metavar="F")
    args = p.parse_args(argv)
    jobs = [int(j) for j in args.jobs.split(",")]
    print(f"cores available {_cpu_count()}, load average before "
          f"{' '.join(f'{v:.2f}' for v in os.getloadavg())}")
    figures: dict = {"load_before": os.getloadavg()}
    models = args.models.split(",")
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        if "ir" in models:
            from fitting.signals import ir_signal
            shape = tuple(int(v) for v in args.ir_shape.split(","))
            path, rows = write_ir(work, shape, 100.0)
            end_to_end("ir", path, rows, TI, {"RepetitionTime": TR},
                       lambda ti, t1, m0, eff: np.abs(ir_signal(ti, t1, m0, eff, TR, 90.0)),
                       args.sample, work, jobs, figures)
        if "mese" in models:
            from fitting.epg import cpmg_echoes
            shape = tuple(int(v) for v in args.mese_shape.split(","))
            path, rows = write_mese(work, shape, 300.0)
            te = ESP * np.arange(1, N_ECHO + 1)
            end_to_end("mese", path, rows, te, {}, lambda te_, t2, m0, b1: cpmg_echoes(
                N_ECHO, ESP, t2, 1.0, b1=b1, m0=m0), max(20, args.sample // 4), work, jobs,
                figures)
            # the slice-profile EPG's cost: benchmarks/bench_slice_profile.py, which fits
            # each model to data of its own (a profile fit of plain-EPG trains does not
            # converge in a third of the voxels, and their lmfit refits dominate)
        if args.memory:
            figures["memory"] = fit_memory(args)   # bench_fit's child-process measurement
        if args.demo:
            figures["demo"] = demo(work, args.cores)
    figures["load_after"] = os.getloadavg()
    print(f"load average after {' '.join(f'{v:.2f}' for v in os.getloadavg())}")
    if args.json:
        Path(args.json).write_text(json.dumps(figures, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
