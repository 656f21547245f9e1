"""Model specifications shared by every engine, and the model registry.

A :class:`ModelSpec` says everything an engine needs to fit one model voxelwise:
parameter names, units and bounds, the forward signal (always a thin wrapper around
:mod:`fitting.signals` / :mod:`fitting.epg`, so a model is written once), a vectorised
initialiser, the BIDS key of the varying acquisition value, the output suffix of
each parameter and how the fixed acquisition constants come from the sidecars.

Conventions
-----------
* ``x`` is the varying acquisition value, shape (M,), sorted ascending (seconds or
  degrees, as read by ``pipeline.series``).
* ``p`` is a dict ``name -> (N,)`` array; ``signal(x, p, fixed)`` returns (N, M).
* ``fixed`` is a dict of constants. Scalars (and tuples) are global; the names in
  ``voxel_fixed`` hold (N,) arrays, one value per voxel (for example a B1 map), and
  engines subset them together with the data.
* Per-voxel T1 (``--t1-map``): a model that can use a T1 map returns, from its
  ``configure`` with option ``t1_map`` set, a variant that lists ``"t1"`` in
  ``voxel_fixed`` (:func:`per_voxel` adds it); the pipeline then delivers the map as
  ``fixed["t1"]``, (N,) seconds. :func:`configure_model` refuses ``t1_map`` for a model
  whose configured variant does not list ``"t1"``.
* ``init(x, data, fixed)`` returns a dict ``name -> (N,)`` of starting values inside
  the bounds, computed without Python loops over voxels.

Registering a model
-------------------
Model modules build their specs and call :func:`register` at import time
(``fitting/t1_models.py`` registers ``ir``, ``vfa``, ``dam``; a T2 module does the
same for ``mese``, ``mese-mono``, ``megre``). :func:`get_model` imports every module
listed in :data:`MODEL_MODULES` on first use, so adding a model family is one line
there plus its module.
"""
from __future__ import annotations

import dataclasses
import importlib
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping

import numpy as np

from fitting.errors import RelaxlineError

Params = dict[str, np.ndarray]
Fixed = dict[str, Any]

# Modules that register models when imported (see module docstring).
MODEL_MODULES: list[str] = ["fitting.t1_models", "fitting.t2_models", "fitting.recovery_models",
                             "fitting.afi_models", "fitting.mp2rage_models",
                             "fitting.t2dist_models"]

MODELS: dict[str, "ModelSpec"] = {}


def _no_validate(x: np.ndarray, fixed: Fixed) -> None:
    return None


@dataclass(frozen=True)
class ExtraOutput:
    """A map a model writes besides its parameters (no standard-error map).

    ``suffix``: BIDS-like suffix of the file; ``unit``: its ``Units``; ``description``:
    the sidecar's ``Description``; ``axis``: for a vector output (one 4D volume per
    point, e.g. a T2 distribution), ``axis(x, fixed) -> (K,)`` values of the fourth axis,
    written to the sidecar as ``AxisValues`` with ``axis_name``/``axis_unit``.
    """

    suffix: str
    unit: str
    description: str
    axis: Callable[[np.ndarray, Any], np.ndarray] | None = None
    axis_name: str = ""
    axis_unit: str = ""


@dataclass
class Solved:
    """What a model's own solver (``ModelSpec.solver``) returns for N voxels.

    ``params`` (N, P) in parameter order; ``cost`` (N,) the sum of squared residuals;
    ``status`` (N,) codes of :mod:`fitting.status` (converged or failed; the engine
    marks parameters at their bounds); ``stderr`` (N, P) or None to let the engine
    compute it from the Jacobian of ``signal``; ``extras`` ``{name: (N,) or (N, K)}``.
    """

    params: np.ndarray
    cost: np.ndarray
    status: np.ndarray
    stderr: np.ndarray | None = None
    extras: dict[str, np.ndarray] = field(default_factory=dict)


def _no_prepare(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> tuple[np.ndarray, Fixed]:
    """Default data preparation: complex data are fitted as magnitude."""
    if np.iscomplexobj(data):
        data = np.abs(data)
    return np.asarray(data, dtype=float), fixed


@dataclass(frozen=True)
class Kernel:
    """The compiled form of a model's ``signal`` (:mod:`fitting.kernels`).

    ``build(x, fixed, n) -> (kind, x_used, constants)``: the model kind, the acquisition
    values the kernel evaluates and an (n, K) array of each voxel's constants
    (:func:`fitting.kernels.constants`), or None when these constants have no compiled
    form (the engine then runs the numpy iteration). ``signal`` is the numpy signal it
    computes.
    """

    signal: Callable[[np.ndarray, Params, Fixed], np.ndarray]
    build: Callable[[np.ndarray, Fixed, int], tuple[int, np.ndarray, np.ndarray]]


@dataclass(frozen=True)
class ModelSpec:
    """Everything an engine needs to fit one model (see module docstring).

    Attributes
    ----------
    name : model name as used on the command line (``ir``, ``vfa``, ...).
    params : fitted parameter names, in engine order (valid Python identifiers).
    units : unit of each parameter (``"s"``, ``"arbitrary"``, ``"ratio"``).
    lower, upper : bounds per parameter (``np.inf`` allowed).
    xkey : BIDS sidecar key of the varying acquisition value.
    signal : ``signal(x, p, fixed) -> (N, M)``.
    init : ``init(x, data, fixed) -> {name: (N,)}`` vectorised starting values.
    outputs : parameter -> BIDS suffix of its map (``T1map``, ``M0map``, ...).
    min_volumes : fewest volumes a fit needs (at least the number of parameters).
    fixed_from_meta : ``(meta, options) -> fixed`` reads TR, angles, ... from the
        series' sidecar metadata; raises RelaxlineError naming a missing key.
    validate : ``(x, fixed) -> None`` raises RelaxlineError on impossible protocols
        (for example TI >= TR), naming the key.
    prepare : ``(x, data, fixed) -> (real data, fixed)`` turns raw (possibly complex)
        data into what ``signal`` models; default takes the magnitude.
    jacobian : optional ``(x, p, fixed) -> (N, M, P)``; engines fall back to forward
        differences when it is None.
    scale_param : a parameter the signal is proportional to (``M0``); engines use
        dS/dM0 = S/M0 exactly instead of a finite difference.
    voxel_fixed : names in ``fixed`` that hold per-voxel (N,) arrays.
    closed_form : True when ``init`` already is the estimate (e.g. ``dam``); engines
        then skip the iterative fit.
    primary : the parameter whose map names the rmse map (``<stem>_desc-rmse_<suffix>``).
    description : one line for ``--help`` and sidecars.
    finalize : optional ``(p, fixed) -> p`` applied by the engines to the converged
        estimates before they are reported (for example ``mese`` folds B1 below the
        symmetry point of its echo train, 180°/nominal refocusing angle); bound checks
        and standard errors use the fitted values.
    extra : free-form model settings; ``extra["lm_options"]`` holds keyword arguments
        for :func:`fitting.lm.levenberg_marquardt` (for example ``damping``);
        ``extra["output_notes"]``: ``(fixed) -> {suffix: [text]}`` notes for the map
        sidecars (``Notes``), e.g. how ``mese`` reports B1; ``extra["sampled_only"]``:
        the signal is defined only at the acquired values (an echo train), so plots
        draw it there and do not resample it.
    configure : optional ``(spec, options) -> spec``: the variant to fit for the user's
        options (for example ``mese`` with a B1 map fits T2 and M0 only); use
        :func:`configure_model`, which also applies the noise model.
    kernel : optional :class:`Kernel`: how the compiled per-voxel engine
        (:mod:`fitting.kernels`) evaluates ``signal``. Used only while ``signal`` is the
        function the kernel was declared for (:attr:`compiled`), so a variant built with
        ``dataclasses.replace(spec, signal=...)`` falls back to the numpy iteration.
    volume_keys : sidecar keys that may differ between the volumes of a series (for
        example ``FlipAngle`` of the two MP2RAGE inversions); ``fixed_from_meta`` then
        receives them as a list in volume order (sorted by ``xkey``), or as one number
        when every volume has the same value.
    solver : optional ``(x, data, fixed, noise_sigma) -> Solved``: the model's own fast
        method, used by the fast engine instead of ``init`` + Levenberg–Marquardt (for
        example a regularised NNLS over a basis). Models whose ``signal`` cannot be
        fitted by lmfit set ``extra["lmfit"] = False``.
    extra_outputs : ``{name: ExtraOutput}`` maps written besides the parameters; their
        values come from ``Solved.extras`` or from ``extras``.
    extras : optional ``(x, data, fixed, params (N, P)) -> {name: array}`` computing the
        extra outputs after a fit (any engine); ``data`` is the prepared data.

    A parameter missing from ``outputs`` is a nuisance parameter: fitted (and in the
    region reports) but written as no map.
    """

    name: str
    params: tuple[str, ...]
    units: tuple[str, ...]
    lower: tuple[float, ...]
    upper: tuple[float, ...]
    xkey: str
    signal: Callable[[np.ndarray, Params, Fixed], np.ndarray]
    init: Callable[[np.ndarray, np.ndarray, Fixed], Params]
    outputs: Mapping[str, str]
    min_volumes: int
    fixed_from_meta: Callable[[Mapping[str, Any], Mapping[str, Any]], Fixed]
    validate: Callable[[np.ndarray, Fixed], None] = _no_validate
    prepare: Callable[[np.ndarray, np.ndarray, Fixed], tuple[np.ndarray, Fixed]] = _no_prepare
    jacobian: Callable[[np.ndarray, Params, Fixed], np.ndarray] | None = None
    scale_param: str | None = None
    voxel_fixed: tuple[str, ...] = ()
    closed_form: bool = False
    primary: str = ""
    description: str = ""
    extra: Mapping[str, Any] = field(default_factory=dict)
    finalize: Callable[[Params, Fixed], Params] | None = None
    configure: Callable[["ModelSpec", Mapping[str, Any]], "ModelSpec"] | None = None
    kernel: "Kernel | None" = None
    volume_keys: tuple[str, ...] = ()
    solver: Callable[[np.ndarray, np.ndarray, Fixed, float | None], Solved] | None = None
    extra_outputs: Mapping[str, ExtraOutput] = field(default_factory=dict)
    extras: Callable[[np.ndarray, np.ndarray, Fixed, np.ndarray], dict[str, np.ndarray]] \
        | None = None

    def __post_init__(self) -> None:
        n = len(self.params)
        if not (len(self.units) == len(self.lower) == len(self.upper) == n):
            raise ValueError(f"model {self.name}: units/bounds must have one entry per parameter")
        if self.min_volumes < n and not self.closed_form:
            raise ValueError(f"model {self.name}: min_volumes below the parameter count")
        if self.scale_param is not None and self.scale_param not in self.params:
            raise ValueError(f"model {self.name}: scale_param {self.scale_param} not a parameter")
        if self.primary_param not in self.outputs:
            raise ValueError(f"model {self.name}: the primary parameter needs an output map")

    @property
    def written(self) -> tuple[str, ...]:
        """Parameters written as maps (those with an output suffix), in parameter order."""
        return tuple(k for k in self.params if k in self.outputs)

    @property
    def compiled(self) -> "Callable[[np.ndarray, Fixed, int], tuple] | None":
        """The kernel's ``build`` when it compiles this spec's ``signal``, else None."""
        k = self.kernel
        return k.build if k is not None and k.signal is self.signal else None

    @property
    def map_suffixes(self) -> tuple[str, ...]:
        """Suffixes of every map the model writes: its parameters' and its extra outputs'."""
        return tuple(self.outputs[k] for k in self.written) + tuple(
            e.suffix for e in self.extra_outputs.values())

    @property
    def n_params(self) -> int:
        return len(self.params)

    @property
    def lower_array(self) -> np.ndarray:
        return np.asarray(self.lower, dtype=float)

    @property
    def upper_array(self) -> np.ndarray:
        return np.asarray(self.upper, dtype=float)

    @property
    def primary_param(self) -> str:
        return self.primary or self.params[0]

    def unit(self, param: str) -> str:
        return self.units[self.params.index(param)]

    def pack(self, p: Params) -> np.ndarray:
        """dict of (N,) -> (N, P) array in parameter order."""
        return np.stack([np.asarray(p[k], dtype=float) for k in self.params], axis=-1)

    def unpack(self, arr: np.ndarray) -> Params:
        """(N, P) -> dict of (N,)."""
        return {k: arr[..., i] for i, k in enumerate(self.params)}

    def evaluate(self, x: np.ndarray, arr: np.ndarray, fixed: Fixed) -> np.ndarray:
        """Signal (N, M) for packed parameters (N, P)."""
        return self.signal(np.asarray(x, float), self.unpack(arr), fixed)


def subset_fixed(spec: ModelSpec, fixed: Fixed, idx) -> Fixed:
    """``fixed`` restricted to the voxels ``idx`` (per-voxel entries only are indexed)."""
    if not spec.voxel_fixed:
        return fixed
    out = dict(fixed)
    for k in spec.voxel_fixed:
        if k in out and np.ndim(out[k]) >= 1:
            out[k] = np.asarray(out[k])[idx]
    return out


def per_voxel(spec: ModelSpec, name: str) -> ModelSpec:
    """``spec`` with the constant ``fixed[name]`` given per voxel (added to ``voxel_fixed``)."""
    if name in spec.voxel_fixed:
        return spec
    return dataclasses.replace(spec, voxel_fixed=tuple(spec.voxel_fixed) + (name,))


def configure_model(spec: ModelSpec, options: Mapping[str, Any]) -> ModelSpec:
    """The spec to fit for the user's ``options``: the model's own variant
    (``spec.configure``), then ``options["noise"] == "rician"`` wraps the forward signal in
    the Rician expectation given ``fixed["sigma"]`` (:func:`fitting.noise.rician_spec`).

    ``options["t1_map"]`` (a per-voxel T1 is given) is refused unless the configured
    variant lists ``"t1"`` in ``voxel_fixed`` (module docstring).
    """
    name = spec.name
    if spec.configure is not None:
        spec = spec.configure(spec, options)
    if options.get("t1_map") and "t1" not in spec.voxel_fixed:
        raise RelaxlineError(f"the {name} model does not use a T1 map (option --t1-map "
                             f"applies to: {', '.join(t1_map_models()) or 'none'}); leave "
                             f"it out.")
    noise = options.get("noise") or "gaussian"
    if noise == "rician":
        from fitting.noise import rician_spec  # noise imports this module
        spec = rician_spec(spec)
    elif noise != "gaussian":
        raise RelaxlineError(f"unknown noise model {noise!r}; choose gaussian or rician.")
    return spec


def t1_map_models() -> list[str]:
    """Names of the registered models that take a per-voxel T1 (``t1_map``)."""
    _load_all()
    out = []
    for m in MODELS.values():
        try:
            if m.configure is not None and "t1" in m.configure(m, {"t1_map": "-"}).voxel_fixed:
                out.append(m.name)
        except RelaxlineError:
            pass
    return sorted(out)


def register(spec: ModelSpec) -> ModelSpec:
    """Add ``spec`` to :data:`MODELS` (a later registration of the same name replaces it)."""
    MODELS[spec.name] = spec
    return spec


def _load_all() -> None:
    for mod in MODEL_MODULES:
        try:
            importlib.import_module(mod)
        except ModuleNotFoundError as exc:
            if exc.name != mod:  # a real import error inside the module: surface it
                raise


def model_names() -> list[str]:
    _load_all()
    return sorted(MODELS)


def get_model(name: str) -> ModelSpec:
    """The registered model ``name``; RelaxlineError listing the known names otherwise."""
    _load_all()
    try:
        return MODELS[name]
    except KeyError:
        raise RelaxlineError(f"unknown model {name!r}; choose one of: "
                             f"{', '.join(sorted(MODELS)) or '(none registered)'}.") from None
