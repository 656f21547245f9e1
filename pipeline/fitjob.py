"""Fit jobs: series -> voxelwise maps -> BIDS-derivative files (design §5, §6, §8).

The pieces are separate so the workflow can split a volume into slab jobs:

* :func:`prepare` validates the series and acquisition constants of a model;
* :func:`estimate_noise` finds the background σ over the *whole* series (pass the
  same value to every chunk via ``options["noise_sigma"]``);
* :func:`fit_arrays` fits a slab ``z`` (or the whole volume), reading it slab by slab;
* :func:`write_fit_outputs` writes the maps of a whole volume atomically;
* :func:`fit_command` is ``relaxline fit``.

Which voxels are fitted
-----------------------
With ``--mask``: the voxels where the mask is non-zero (others: status OUTSIDE).
Without: the object mask of :func:`fitting.background.signal_mask` — every voxel whose
½·Σ|m|² or largest magnitude over the volumes reaches the level that pure background
noise of the series' σ stays under with probability 0.9999 — when a background is found
(:func:`fitting.background.estimate`, which works down to an object peak/σ of about 5);
if the series has no recognisable background every voxel is fitted. Voxels with
non-finite or all-zero data get BAD_DATA.

Output names (``<stem>``: :func:`pipeline.bidsderiv.derivative_stem` of the input's
stem, e.g. ``sub-01_rec-ir``): one map per parameter with the model's
suffix (``T1map``, ``M0map``, ``InvEffmap`` for the ir inversion efficiency,
``TB1map``), ``desc-stderr_<suffix>`` per parameter, ``desc-rmse_<primary suffix>``
(root-mean-square residual √(RSS/M) in signal units, e.g. ``<stem>_desc-rmse_T1map``)
and ``desc-fitstatus_mask`` (uint8 codes of :mod:`fitting.status`).
"""
from __future__ import annotations

import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence, TextIO

import numpy as np

from fitting import status as st
from fitting.background import estimate as estimate_background
from fitting.background import signal_mask
from fitting.spec import Fixed, ModelSpec, configure_model, get_model, model_names
from fitting.voxelwise import ENGINES, fit_voxels
from pipeline.commands.run import available_cores
from pipeline import profiles
from pipeline.errors import InputError, RelaxlineError
from pipeline.outputs import (map_name, output_set, provenance, refuse_overwriting_inputs,
                              write_map)
from pipeline.series import Series, load_grid_map, read_series, sidecar_path
from pipeline.t1map import check_t1_map_model, gap_note, load_t1_map, t1_values

# model options of `relaxline fit` -> (flag, models it applies to; None: every model)
MODEL_OPTIONS = {"t1_fixed": ("--t1-fixed", ("mese", "mese-multi", "afi", "dam")),
                 "plateau": ("--plateau", ("mese-mono",)),
                 "skip_echoes": ("--skip-echoes", ("mese-mono",)),
                 "slice_profile": ("--slice-profile", ("mese", "mese-multi")),
                 "noise": ("--noise", None),
                 "ll_correction": ("--ll-correction", ("looklocker",)),
                 "inversion_efficiency": ("--inversion-efficiency", ("mp2rage",)),
                 "short_t2_cutoff": ("--short-t2-cutoff", ("mese-multi",)),
                 "spoiling": ("--spoiling", ("vfa",)),
                 "spoiling_increment": ("--spoiling-increment", ("vfa",)),
                 "assumed_t2": ("--assumed-t2", ("vfa",))}
NOISE_MODELS = ("auto", "gaussian", "rician")
SLAB_VOXELS = 131072           # voxels read and fitted at a time (bounds memory)
NOISE_SAMPLE_VOXELS = 200_000  # voxels sampled for the background-noise estimate
STATUS_KEY = "desc-fitstatus_mask"
PARALLEL_WRITE_BYTES = 64 << 20   # maps are compressed in parallel while this is in flight


def option_models(opt: str) -> tuple[str, ...]:
    """The models the option ``opt`` of :data:`MODEL_OPTIONS` applies to."""
    models = MODEL_OPTIONS[opt][1]
    return tuple(model_names()) if models is None else models


def check_model_options(model: str, options: Mapping[str, Any]) -> None:
    """Refuse a model option (:data:`MODEL_OPTIONS`) given for a model it does not apply to
    (an unknown model is named as such first)."""
    get_model(model)
    for opt, (flag, _) in MODEL_OPTIONS.items():
        models = option_models(opt)
        if options.get(opt) is not None and options.get(opt) is not False \
                and model not in models:
            which = f"the {models[0]} model" if len(models) == 1 else \
                f"the {', '.join(models[:-1])} and {models[-1]} models"
            raise InputError(f"option {flag} applies to {which} only, not to {model}; leave "
                             f"it out.")


def _spec(model: str | ModelSpec) -> ModelSpec:
    return model if isinstance(model, ModelSpec) else get_model(model)


def prepare(model: str | ModelSpec, inputs: Sequence[str | Path],
            time_unit: str = "s") -> tuple[ModelSpec, Series, Fixed]:
    """Read and validate the series for ``model``; returns (spec, series, fixed)."""
    spec = _spec(model)
    series = read_series(inputs, spec.xkey, time_unit=time_unit, min_volumes=spec.min_volumes,
                         volume_keys=spec.volume_keys)
    fixed = acquisition(spec, series)
    return spec, series, fixed


def acquisition(spec: ModelSpec, series: Series, options: Mapping[str, Any] | None = None
                ) -> Fixed:
    """The model's constants from the sidecars, validated against the varying values."""
    where = ", ".join(str(p) for p in series.paths)
    if spec.extra.get("needs_complex") and not series.is_complex:
        raise InputError(f"{where}: {spec.extra['needs_complex']}")
    try:
        fixed = spec.fixed_from_meta(series.meta, profiles.resolve(options or {}))
        spec.validate(series.values, fixed)
    except InputError:
        raise
    except RelaxlineError as exc:  # from fitting, which knows no file names
        raise InputError(f"{where}: {exc}") from None
    return fixed


def estimate_noise(series: Series, max_voxels: int = NOISE_SAMPLE_VOXELS) -> float | None:
    """Background noise σ of the whole series, or None when it has no background.

    Reads the series once, slab by slab, keeping a regular subsample of voxels (every
    k-th voxel in file order, so the value is reproducible), and applies
    :func:`fitting.background.estimate`.
    """
    stride = max(1, int(np.ceil(series.n_voxels / max_voxels)))
    rows = []
    for z in series.slabs(SLAB_VOXELS):
        block = series.read(z)
        nz = block.shape[2]
        # flat index in (x, y, z) C order of each slab voxel
        flat = (np.arange(series.shape[0])[:, None, None] * series.shape[1] * series.shape[2]
                + np.arange(series.shape[1])[None, :, None] * series.shape[2]
                + np.arange(z.start, z.start + nz)[None, None, :])
        pick = (flat % stride == 0).ravel()
        rows.append(np.abs(block.reshape(-1, block.shape[-1])[pick]).astype(np.float32))
        del block
    found = estimate_background(np.concatenate(rows))
    return None if found is None else found.sigma


def resolve_noise(choice: str | None, series: Series, sigma: float | None,
                  stream: TextIO | None, command: str = "fit",
                  spec: ModelSpec | None = None) -> str:
    """The noise model to fit for the user's ``choice`` (``auto`` when None).

    A model that fits Gaussian noise only (``spec.extra["noise_models"]``, e.g. the NNLS of
    ``mese-multi``) gets ``gaussian`` for ``auto`` and refuses ``rician``.

    ``auto``: ``rician`` for magnitude data whose background gave σ (a Gaussian fit reads
    the noise floor of decayed echoes as signal: T2 of a 10 ms vial at SNR 50 came out
    +10 % with B1 from a map, +0.4 % Rician), ``gaussian`` for complex data (their
    noise is Gaussian) and, with a warning on ``stream``, for magnitude data without a
    background. An explicit ``rician`` without a background is an error.
    """
    choice = choice or "auto"
    if choice not in NOISE_MODELS:
        raise InputError(f"noise model {choice!r}: choose one of {', '.join(NOISE_MODELS)}.")
    if spec is not None and "rician" not in spec.extra.get("noise_models", ("rician",)):
        if choice == "rician":
            raise InputError(f"--noise rician: the {spec.name} model fits with Gaussian noise "
                             f"only; use --noise gaussian or auto.")
        return "gaussian"
    if choice == "rician" and sigma is None:
        raise InputError(f"{series.paths[0]}: the Rician noise model needs the background "
                         f"noise, but no background region was found (too little air around "
                         f"the object, or a zero-filled, masked or multi-coil background); "
                         f"use the Gaussian model.")
    if choice != "auto":
        return choice
    if series.is_complex:
        return "gaussian"
    if sigma is None:
        if stream is not None:
            print(f"relaxline {command}: warning: {series.paths[0]}: no background (air) "
                  f"region found, so the noise level is unknown: every voxel is fitted and "
                  f"the Gaussian noise model is used, which biases short T2/T2* long at low "
                  f"SNR. Give a series with air around the object, or --mask to limit the "
                  f"fit.", file=stream)
        return "gaussian"
    return "rician"


def _z_slabs(series: Series, z: slice | None, max_voxels: int):
    z = z or slice(0, series.shape[2])
    start, stop, _ = z.indices(series.shape[2])
    step = max(1, max_voxels // max(series.shape[0] * series.shape[1], 1))
    for z0 in range(start, stop, step):
        yield slice(z0, min(z0 + step, stop))


def output_keys(spec: ModelSpec) -> list[str]:
    """Keys of :func:`fit_arrays`' result, which are also the file-name tails.

    The parameter maps (nuisance parameters without an output suffix are not written),
    their standard errors, the extra outputs, then the rmse and the status mask (last)."""
    keys = [spec.outputs[k] for k in spec.written]
    keys += [f"desc-stderr_{spec.outputs[k]}" for k in spec.written]
    keys += [e.suffix for e in spec.extra_outputs.values()]
    keys += [f"desc-rmse_{spec.outputs[spec.primary_param]}", STATUS_KEY]
    return keys


def _selected(flat: np.ndarray, mask_slab: np.ndarray | None, sigma: float | None
              ) -> np.ndarray:
    """Voxels of a slab (rows of ``flat``) to fit: the mask, else those with signal above
    the background noise (:func:`fitting.background.signal_mask`; air is OUTSIDE, NaN
    rows are kept and become BAD_DATA)."""
    if mask_slab is not None:
        return (mask_slab != 0).reshape(-1)
    return signal_mask(flat, sigma)


def fitted_region(series: Series, mask: np.ndarray | None, sigma: float | None) -> np.ndarray:
    """Boolean grid of the voxels :func:`fit_arrays` fits (reads the series without a mask)."""
    if mask is not None:
        return np.asarray(mask) != 0
    out = np.ones(series.shape, bool)
    if sigma is None:
        return out
    for zs in series.slabs(SLAB_VOXELS):
        block = series.read(zs)
        out[:, :, zs] = _selected(block.reshape(-1, series.n_volumes), None,
                                  sigma).reshape(block.shape[:3])
    return out


def fit_arrays(model: str | ModelSpec, series: Series, mask: np.ndarray | None = None,
               b1: np.ndarray | None = None, options: Mapping[str, Any] | None = None,
               z: slice | None = None, progress: Callable[[int], None] | None = None,
               t1: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Fit the slices ``z`` (default all) of ``series``; maps shaped (x, y, nz).

    ``mask``, ``b1`` and ``t1`` (a T1 map, s) are full-volume arrays on the series grid
    (or None). ``options``: ``engine`` ("fast"), ``jobs`` (cores; default all available),
    ``noise_sigma`` (float,
    None for residual-based errors, or absent to estimate it here over the whole series —
    chunked jobs should pass one value so all chunks agree), ``t1_map`` (the T1 map's
    path, for messages) and ``t1_fixed`` (T1 used in the map's gaps; :mod:`pipeline.t1map`).
    Returns ``{key: array}`` with keys from :func:`output_keys`.
    """
    options = dict(options or {})
    spec = configure_model(_spec(model), options)
    fixed = acquisition(spec, series, options)
    engine = options.get("engine", "fast")
    jobs = int(options.get("jobs") or available_cores())
    sigma = options["noise_sigma"] if "noise_sigma" in options else estimate_noise(series)
    if "sigma" in spec.voxel_fixed:   # noise-floor-aware variants need σ itself
        if sigma is None:
            raise InputError(f"{series.paths[0]}: the Rician noise model needs the background "
                             f"noise, but no background region was found; use a mask-free "
                             f"series with air around the object, or the Gaussian model.")
        fixed["sigma"] = float(sigma)
    x = series.values
    n = series.n_volumes
    z = z or slice(0, series.shape[2])
    zr = range(*z.indices(series.shape[2]))
    shape = series.shape[:2] + (len(zr),)
    keys = output_keys(spec)
    out = {k: np.full(shape, np.nan, np.float32) for k in keys[:-1]}
    out[STATUS_KEY] = np.full(shape, st.OUTSIDE, np.uint8)
    for e in spec.extra_outputs.values():     # vector outputs: one volume per axis point
        if e.axis is not None:
            out[e.suffix] = np.full(shape + (len(e.axis(x, fixed)),), np.nan, np.float32)

    def fit_slab(zs: slice) -> None:
        block = series.read(zs)
        oz = slice(zs.start - zr.start, zs.stop - zr.start)
        flat = block.reshape(-1, n)
        sel = _selected(flat, None if mask is None else mask[:, :, zs], sigma)
        idx = np.flatnonzero(sel)
        fx = dict(fixed)
        if b1 is not None and "b1" in spec.voxel_fixed:  # ratio map; <= 0 is invalid
            bv = b1[:, :, zs].reshape(-1)[idx].astype(float)
            fx["b1"] = np.where(bv > 0, bv, np.nan)
        if "t1" in spec.voxel_fixed:
            if t1 is None:
                raise ValueError(f"{spec.name} was configured for a T1 map but none was given")
            coords = np.column_stack(np.unravel_index(idx, block.shape[:3])) + [0, 0, zs.start]
            fx["t1"], _ = t1_values(t1[:, :, zs].reshape(-1)[idx], coords,
                                    str(options.get("t1_map")), options.get("t1_fixed"))
        res = fit_voxels(spec, x, flat[idx], fx, engine=engine, jobs=jobs, noise_sigma=sigma,
                         progress=progress)
        if progress is not None and flat.shape[0] > idx.size:
            progress(flat.shape[0] - idx.size)
        slab_shape = block.shape[:3]
        for k in spec.written:
            suffix = spec.outputs[k]
            _put(out[suffix], oz, slab_shape, idx, res.params[k])
            _put(out[f"desc-stderr_{suffix}"], oz, slab_shape, idx, res.stderr[k])
        for name, e in spec.extra_outputs.items():
            if name in res.extras:
                _put(out[e.suffix], oz, slab_shape, idx, res.extras[name])
        _put(out[keys[-2]], oz, slab_shape, idx, res.rmse)
        _put(out[STATUS_KEY], oz, slab_shape, idx, res.status)

    slabs = list(_z_slabs(series, z, SLAB_VOXELS))
    if jobs > 1 and len(slabs) > 1:
        # two slabs in flight: the next slab's voxels keep the fit threads busy while this
        # slab's refits and bookkeeping run in its own thread (each voxel's result is the
        # same either way; the slabs write disjoint slices of the maps)
        with ThreadPoolExecutor(max_workers=2, thread_name_prefix="relaxline-slab") as pool:
            for _ in pool.map(fit_slab, slabs):
                pass
    else:
        for zs in slabs:
            fit_slab(zs)
    return out


def _put(target: np.ndarray, oz: slice, slab_shape, idx: np.ndarray, values: np.ndarray):
    """Scatter the values of voxels ``idx`` of a slab into ``target`` (3D or 4D)."""
    tail = target.shape[3:]
    view = target[:, :, oz].reshape((-1,) + tail)   # a copy if not contiguous: write back
    view[idx] = values
    target[:, :, oz] = view.reshape(tuple(slab_shape) + tail)


def _split_key(key: str) -> tuple[str | None, str]:
    """``desc-stderr_T1map`` -> ("stderr", "T1map"); ``T1map`` -> (None, "T1map")."""
    if key.startswith("desc-"):
        desc, suffix = key.split("_", 1)
        return desc[len("desc-"):], suffix
    return None, key


def _map_folder(out_dir: str | Path, suffix: str, datatype_folders: bool) -> Path:
    from pipeline.bidsderiv import datatype
    return Path(out_dir) / datatype(suffix) if datatype_folders else Path(out_dir)


def output_paths(spec: ModelSpec, series_stem: str, out_dir: str | Path,
                 datatype_folders: bool = False) -> list[Path]:
    """Every file a fit of ``spec`` writes for a series into ``out_dir`` (maps, sidecars)."""
    from pipeline.bidsderiv import derivative_stem
    stem = derivative_stem(series_stem, spec.name)
    paths = []
    for key in output_keys(spec):
        desc, suffix = _split_key(key)
        p = _map_folder(out_dir, suffix, datatype_folders) / map_name(stem, suffix, desc)
        paths += [p, sidecar_path(p)]
    return paths


def input_files(series: Series, options: Mapping[str, Any]) -> list[Path]:
    """The files a fit reads: the series and its sidecars, the mask, B1 and T1 maps."""
    files = [q for p in series.paths for q in (p, sidecar_path(p))]
    return files + [Path(options[k]) for k in ("mask", "b1_map", "t1_map") if options.get(k)]


def write_fit_outputs(arrays: Mapping[str, np.ndarray], series: Series, out_dir: str | Path,
                      model: str | ModelSpec, engine: str, options: Mapping[str, Any],
                      notes: Sequence[str] = (), datatype_folders: bool = False) -> list[Path]:
    """Write every map of ``arrays`` (whole volume) with its JSON sidecar; returns paths.

    ``model`` and ``options`` as given to :func:`fit_arrays` (the spec is configured the
    same way, so the keys match). ``notes``: warnings about the fit every map's sidecar
    carries under ``Warnings`` (``relaxline qc`` shows them in its report). Names are the
    BIDS-derivative ones of :func:`pipeline.bidsderiv.derivative_stem`; with
    ``datatype_folders`` (the workflow) each map goes into ``out_dir/anat`` or
    ``out_dir/fmap`` as BIDS wants, else all into ``out_dir``. The maps are written as
    one set (:func:`pipeline.outputs.output_set`): all of them or, on an error or a full
    disk, none; no output may replace one of the fit's inputs.
    """
    from pipeline.bidsderiv import derivative_stem
    spec = configure_model(_spec(model), options)
    # the core count changes no number in the maps, so it stays out of their provenance
    prov = provenance(spec.name, engine, {k: v for k, v in options.items() if k != "jobs"},
                      series)
    units = {spec.outputs[k]: spec.unit(k) for k in spec.written}
    stem = derivative_stem(series.stem, spec.name)
    what = f"{spec.name} model fitted voxelwise to {series.stem}"
    output_notes = spec.extra.get("output_notes")
    fixed = acquisition(spec, series, options)
    per_map = output_notes(fixed) if output_notes else {}
    extra_out = {e.suffix: e for e in spec.extra_outputs.values()}
    axes = {s: [float(v) for v in e.axis(series.values, fixed)]
            for s, e in extra_out.items() if e.axis is not None}
    paths = []
    with output_set(out_dir, protect=input_files(series, options)):
        for key in output_keys(spec):
            arr = arrays[key]
            if arr.shape[:3] != tuple(series.shape):
                raise ValueError(f"{key}: array shape {arr.shape} is not the series grid "
                                 f"{series.shape}")
            desc, suffix = _split_key(key)
            u, extra = _map_sidecar(spec, units, desc, suffix, what, notes, options, extra_out)
            if suffix in axes:      # a vector output: the values of its fourth axis
                e = extra_out[suffix]
                extra.update({"AxisName": e.axis_name, "AxisUnits": e.axis_unit,
                              "AxisValues": axes[suffix]})
            if not desc and per_map.get(suffix):
                extra["Notes"] = list(per_map[suffix])
            paths.append((_map_folder(out_dir, suffix, datatype_folders), suffix, arr, desc,
                          u, extra))
        # gzip releases the GIL: the maps are compressed on the job's cores side by side,
        # as long as the maps in flight (each about 3x its size while written) stay small
        jobs = int(options.get("jobs") or available_cores())
        in_flight = 3 * max((a[2].nbytes for a in paths), default=0)
        workers = jobs if in_flight * jobs <= PARALLEL_WRITE_BYTES else 1
        with ThreadPoolExecutor(max_workers=workers) as pool:
            return list(pool.map(lambda a: write_map(a[0], stem, a[1], a[2], series.affine,
                                                     prov, desc=a[3], units=a[4],
                                                     extra=a[5]), paths))


def _map_sidecar(spec: ModelSpec, units: Mapping[str, str], desc: str | None, suffix: str,
                 what: str, notes: Sequence[str], options: Mapping[str, Any],
                 extra_out: Mapping[str, Any]) -> tuple[str, dict[str, Any]]:
    """Units and the extra sidecar keys (Description, StatusCodes, ...) of one map.

    Descriptions come from the spec where it gives them (``extra_outputs``,
    ``extra["map_descriptions"]``, ``extra["stderr_description"]``)."""
    from pipeline.bidsderiv import QUANTITY, is_parametric
    extra: dict[str, Any] = {"Warnings": list(notes)} if notes else {}
    if desc == "fitstatus":
        u = "code"
        extra["StatusCodes"] = {str(c): name for c, name in st.NAMES.items()}
        extra["Description"] = f"fit status code of each voxel (StatusCodes); {what}"
        extra["SpatialReference"] = "orig"   # BIDS: on the grid of the fitted series
    elif desc == "rmse":
        u = "arbitrary"
        extra["Description"] = ("root-mean-square fit residual sqrt(RSS/M), signal units; "
                                + what)
    elif not desc and suffix in extra_out:
        u = extra_out[suffix].unit
        extra["Description"] = f"{extra_out[suffix].description}; {what}"
    else:
        u = units[suffix]
        quantity = QUANTITY.get(suffix, f"parameter {suffix[:-3] or suffix}")
        extra["Description"] = f"{quantity}; {what}"
        if desc == "stderr":
            extra["Description"] = (spec.extra.get(
                "stderr_description", "standard error of the " + quantity + " from the "
                "Jacobian at the solution") + "; noise from " +
                ("background" if options.get("noise_sigma") is not None else "residuals")
                + "; " + what)
        elif suffix in spec.extra.get("map_descriptions", {}):
            extra["Description"] = f"{spec.extra['map_descriptions'][suffix]}; {what}"
        elif suffix == "InvEffmap":
            extra["Description"] = ("inversion efficiency -cos(inversion angle): 1 ideal, "
                                    "0 none (apparent; absorbs excitation errors too); "
                                    + what)
    if is_parametric(suffix):
        extra["SkullStripped"] = False   # BIDS: required on parametric maps
    return u, extra


def load_b1(spec: ModelSpec, series: Series, b1: str | Path | None, stream: TextIO,
            command: str = "fit") -> np.ndarray | None:
    """The ``--b1`` map of ``spec`` (configured for it) on the series grid, or None.

    Errors when the model uses no B1 map or the map looks like percent; warns on
    ``stream`` when the model uses one and none is given. Shared by ``fit`` and ``refit``.
    """
    if b1 and "b1" not in spec.voxel_fixed:
        raise InputError(f"--b1 {b1}: the {spec.name} model does not use a B1 map "
                         f"(it applies to: vfa, mese, mp2rage, looklocker with "
                         f"--ll-correction readout).")
    b1_arr = load_grid_map(b1, series, what="B1 map") if b1 else None
    if b1_arr is not None:
        finite = b1_arr[np.isfinite(b1_arr)]
        if not np.any(finite > 0):
            raise InputError(f"{b1}: the B1 map holds no positive finite value (all NaN, zero "
                             f"or negative); --b1 expects the ratio actual/nominal flip angle "
                             f"(about 1). Check that the right file is given.")
        if finite.size and np.nanmedian(finite) > 10:
            raise InputError(f"{b1}: B1 map median {np.nanmedian(finite):g} looks like a percent "
                             f"map; --b1 expects the ratio actual/nominal flip angle (about 1).")
    if "b1" in spec.voxel_fixed and b1_arr is None:
        print(f"relaxline {command}: warning: no --b1 map given; fitting {spec.name} with "
              f"B1 = 1. T1 is biased wherever the actual flip angle differs from the nominal "
              f"one (B1 != 1); pass a B1 map (e.g. from `relaxline fit dam`).", file=stream)
    return b1_arr


def fit_command(model: str, inputs: Sequence[str | Path], out: str | Path,
                mask: str | Path | None = None, b1: str | Path | None = None,
                engine: str = "fast", jobs: int | None = None, time_unit: str = "s",
                stream: TextIO | None = None, show_progress: bool = True,
                model_options: Mapping[str, Any] | None = None,
                t1_map: str | Path | None = None, datatype_folders: bool = False
                ) -> list[Path]:
    """``relaxline fit``: validate everything, fit, then write all maps.

    ``datatype_folders``: maps into ``out/anat`` and ``out/fmap`` (the workflow's
    session folders), else all into ``out``.

    ``jobs``: cores (threads of the fast engine, processes of lmfit fits); None: all
    available. ``model_options``: model variants and noise model (``t1_fixed``, ``plateau``,
    ``skip_echoes``, ``noise``: auto | gaussian | rician, :func:`resolve_noise`;
    :func:`fitting.spec.configure_model`). ``t1_map``: a per-voxel T1 map (s) for the
    models that use one (:mod:`pipeline.t1map`); with it, ``t1_fixed`` is the T1 used
    where the map has no value.
    """
    from pipeline.progress import Progress
    stream = stream or sys.stderr
    if engine not in ENGINES:
        raise InputError(f"--engine must be one of {', '.join(ENGINES)}, got {engine!r}.")
    if jobs is None:
        jobs = available_cores()
    if int(jobs) < 1:
        raise InputError(f"--jobs must be at least 1, got {jobs}.")
    extra = dict(model_options or {})
    check_model_options(model, extra)
    if extra.get("slice_profile"):
        profiles.check_spec(extra["slice_profile"])
    if engine == "lmfit" and get_model(model).extra.get("lmfit") is False:
        raise InputError(f"--engine lmfit: the {model} model has no lmfit engine (it is solved "
                         f"by its own method); use --engine fast.")
    spec, series, fixed = prepare(model, inputs, time_unit)
    check_t1_map_model(spec, t1_map)
    sigma = estimate_noise(series)
    extra["noise"] = resolve_noise(extra.get("noise"), series, sigma, stream, spec=spec)
    maps = {"b1_map": str(b1) if b1 else None, "t1_map": str(t1_map) if t1_map else None}
    spec = configure_model(spec, {**extra, **maps})
    fixed = acquisition(spec, series, extra)  # options checked before the masks and maps are read
    extra.update(resolved_options(spec, fixed))
    refuse_overwriting_inputs(input_files(series, {"mask": mask, **maps}),
                              output_paths(spec, series.stem, out, datatype_folders),
                              "`relaxline fit`")
    mask_arr = load_grid_map(mask, series, what="mask") if mask else None
    if mask_arr is not None:
        mask_arr = np.where(np.isfinite(mask_arr), mask_arr, 0)   # NaN is not "in the mask"
        if not mask_arr.any():
            raise InputError(f"--mask {mask}: the mask has no non-zero voxel, so nothing would "
                             f"be fitted; give a mask that is non-zero where to fit.")
    b1_arr = load_b1(spec, series, b1, stream)
    t1_arr = load_t1_map(spec, series, t1_map)
    if t1_arr is not None and extra.get("t1_fixed") is None:   # gaps are errors: find them now
        region = fitted_region(series, mask_arr, sigma)
        t1_values(t1_arr[region], np.argwhere(region), str(t1_map), None)
    options = {"engine": engine, "jobs": int(jobs), "time_unit": time_unit,
               "mask": str(mask) if mask else None, **maps, "noise_sigma": sigma, **extra}
    prog = Progress(series.n_voxels, f"fit {spec.name}", stream=stream, enabled=show_progress)
    arrays = fit_arrays(model, series, mask_arr, b1_arr, options, progress=prog, t1=t1_arr)
    counts = np.bincount(arrays[STATUS_KEY].ravel(), minlength=max(st.NAMES) + 1)
    summary = ", ".join(f"{st.NAMES[c]}: {int(counts[c])}" for c in sorted(st.NAMES)
                        if counts[c])
    print(f"relaxline fit {spec.name}: {summary}", file=stream)
    if counts[st.BAD_DATA] and counts[st.BAD_DATA] + counts[st.OUTSIDE] == series.n_voxels:
        # kept as output (the status map records it), but never silently
        print(f"relaxline fit: warning: {', '.join(map(str, series.paths))}: every fitted "
              f"voxel holds non-finite or all-zero data, so the maps hold only NaN; check "
              f"that these are the right images.", file=stream)
    notes = fit_notes(arrays, options, t1_arr, spec, series)
    for note in notes:
        print(f"relaxline fit: warning: {note}.", file=stream)
    return write_fit_outputs(arrays, series, out, model, engine, options, notes,
                             datatype_folders)


def resolved_options(spec: ModelSpec, fixed: Fixed) -> dict[str, Any]:
    """Model settings decided from the sidecars, for the maps' provenance (``Options``):
    the vfa spoiling model (rf with its increment and assumed T2, or ideal)."""
    if spec.name not in MODEL_OPTIONS["spoiling"][1]:
        return {}
    if fixed.get("increment") is None:
        return {"spoiling": "ideal"}
    return {"spoiling": "rf", "spoiling_increment": fixed["increment"],
            "assumed_t2": fixed["t2"]}


def _dam_recovery_note(spec: ModelSpec | None, series: Series | None,
                       options: Mapping[str, Any]) -> str | None:
    """dam without a T1 (map or fixed) at a TR too short for full recovery of T1 = 1 s."""
    from fitting.t1_models import DAM_RECOVERY_TR, dam_recovery_bias
    if spec is None or series is None or spec.name != "dam" or options.get("t1_map") \
            or options.get("t1_fixed") is not None:
        return None
    tr = series.meta.get("RepetitionTime")
    if tr is not None and tr >= DAM_RECOVERY_TR:
        return None
    alpha = float(series.values[0])
    if tr is None:
        what = "the sidecar gives no RepetitionTime"
    else:
        bias = ", ".join(f"{100 * dam_recovery_bias(alpha, tr, t1):+.0f} % at T1 {t1:g} s"
                         for t1 in (1.0, 2.0))
        what = f"at TR {tr:g} s the B1 reads high ({bias}, true B1 1)"
    return (f"dam assumes full recovery between pulses (TR ≫ T1), but {what}; give "
            f"--t1-map (e.g. the session's ir T1map) or --t1-fixed S for the finite-TR "
            f"correction")


SHORT_T2_MIN_VOXELS = 10   # fewer: isolated voxels at an edge, not a sample to warn about


def _short_t2_note(arrays: Mapping[str, np.ndarray], spec: ModelSpec | None,
                   series: Series | None, options: Mapping[str, Any]) -> str | None:
    """mese with B1 fitted: usable voxels in the ambiguous short-T2 range
    (:func:`fitting.t2_models.short_t2`)."""
    if spec is None or series is None or spec.name != "mese" or options.get("b1_map") \
            or "T2map" not in arrays:
        return None
    from fitting.t2_models import SHORT_T2_ESP, echo_spacing, short_t2
    usable = np.isin(arrays[STATUS_KEY], st.USABLE)
    n = int(np.count_nonzero(short_t2(arrays["T2map"], series.values) & usable))
    if n < SHORT_T2_MIN_VOXELS:
        return None
    esp_ms = 1e3 * echo_spacing(series.values)
    return (f"{n} of {int(usable.sum())} usable voxels have T2 below {SHORT_T2_ESP:g} echo "
            f"spacings ({SHORT_T2_ESP * esp_ms:.3g} ms), where the B1-fitted echo train is "
            f"ambiguous (a second solution with short T2 and low B1 fits the noise as well); "
            f"for short-T2 samples give a B1 map (--b1, or `b1: dam` in the workflow) or read "
            f"these T2 values as unreliable")


def fit_notes(arrays: Mapping[str, np.ndarray], options: Mapping[str, Any],
              t1: np.ndarray | None = None, spec: ModelSpec | None = None,
              series: Series | None = None) -> list[str]:
    """Warnings about a finished fit for the console and the map sidecars."""
    notes = []
    if spec is not None and series is not None and spec.name in MODEL_OPTIONS[
            "slice_profile"][1] and not options.get("slice_profile") \
            and str(series.meta.get("MRAcquisitionType", "")).upper() == "2D":
        notes.append(f"the sidecar says MRAcquisitionType 2D, but {spec.name} was fitted "
                     f"without a slice profile: the flip angle varies across a 2D slice, "
                     f"which biases T2 (about +10 % for a time-bandwidth 3 sinc) and B1; "
                     f"give --slice-profile (e.g. sinc:TBW of the protocol's pulses, or a "
                     f"profile TSV)")
    if spec is not None and series is not None and spec.name in MODEL_OPTIONS[
            "spoiling"][1] and options.get("spoiling") == "ideal" \
            and str(series.meta.get("SpoilingType", "")).upper() in ("RF", "COMBINED"):
        notes.append(f"the sidecar says SpoilingType {series.meta['SpoilingType']}, but "
                     f"{spec.name} was fitted with ideal spoiling (--spoiling ideal): the "
                     f"RF-spoiled steady state differs from the Ernst formula and T1 can be "
                     f"off by tens of percent (long T2, short TR); use --spoiling auto")
    for note in (_dam_recovery_note(spec, series, options),
                 _short_t2_note(arrays, spec, series, options)):
        if note:
            notes.append(note)
    if t1 is not None:
        fitted = arrays[STATUS_KEY] != st.OUTSIDE
        note = gap_note(t1, fitted, str(options.get("t1_map")), options.get("t1_fixed"))
        if note:
            notes.append(note)
    return notes
