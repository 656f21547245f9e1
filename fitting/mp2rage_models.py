"""The T1 model ``mp2rage`` (:class:`~fitting.spec.ModelSpec`): lookup, not iteration.

Input: the two inversion images of an MP2RAGE (BIDS ``inv-1``/``inv-2`` of the
``MP2RAGE`` suffix) as *complex* data, with the BIDS keys ``InversionTime`` (one per
image), ``FlipAngle`` (one per image, or shared), ``RepetitionTimeExcitation``,
``RepetitionTimePreparation`` and ``NumberShots`` (from memory of the BIDS qMRI appendix,
which lists these for MP2RAGE). Magnitude images alone cannot give T1: the sign of the
first image relative to the second is lost, and the magnitude ratio is not monotonic
in T1.

Each voxel's complex pair is rotated onto the phase of the second image, giving the
signed pair (GRE1, GRE2). The uniform image UNI (``UNIT1``, the BIDS suffix) and T1
(``T1map``) by lookup over the sequence parameters at the voxel's B1 (:mod:`fitting.mp2rage`),
then M0 (``M0map``, proton density times receive field and T2* weighting) by projecting
the pair on the model. The fit is closed-form: with two images and two parameters the
model passes through the data, and the standard errors propagate the image noise
through the Jacobian. A B1 map (``--b1``) scales both readout angles (Marques &
Gruetter 2013, PLoS ONE 8:e69294). The inversion efficiency is fixed (option
``inversion_efficiency``, default :data:`DEFAULT_INVERSION_EFFICIENCY`).
"""
from __future__ import annotations

from typing import Any, Mapping

import numpy as np

from fitting.errors import RelaxlineError
from fitting.mp2rage import mp2rage_signals, protocol_from_meta, t1_from_uni, uniform_image
from fitting.spec import ExtraOutput, Fixed, ModelSpec, Params, register

# An adiabatic inversion is not perfect; 0.96 is the value used by Marques & Gruetter 2013
# (from memory). Set it for your pulse with --inversion-efficiency.
DEFAULT_INVERSION_EFFICIENCY = 0.96
LOOKUP_RANGE = (0.02, 10.0)     # s, T1 grid of the lookup; also the T1 bounds
KEYS = ("RepetitionTimeExcitation", "RepetitionTimePreparation", "NumberShots", "FlipAngle")


def _fixed(meta: Mapping[str, Any], options: Mapping[str, Any]) -> Fixed:
    missing = [k for k in KEYS if k not in meta]
    if missing:
        raise RelaxlineError(
            f"MP2RAGE series: sidecar key(s) {', '.join(repr(k) for k in missing)} missing. "
            f"The lookup needs the readout angle of each inversion image 'FlipAngle' "
            f"(degrees), the excitation spacing 'RepetitionTimeExcitation' (s), the time "
            f"between inversions 'RepetitionTimePreparation' (s) and the excitations per "
            f"block 'NumberShots' (a number, or [before, after] the k-space centre).")
    eff = options.get("inversion_efficiency")
    alphas = meta["FlipAngle"]
    alphas = list(alphas) if isinstance(alphas, (list, tuple)) else [alphas, alphas]
    return {"alphas": tuple(float(a) for a in alphas),
            "tau": float(meta["RepetitionTimeExcitation"]),
            "tr": float(meta["RepetitionTimePreparation"]), "shots": meta["NumberShots"],
            "eff": DEFAULT_INVERSION_EFFICIENCY if eff is None else float(eff), "b1": 1.0}


def protocol(x: np.ndarray, fixed: Fixed):
    """The :class:`fitting.mp2rage.Protocol` of the series (TIs from ``x``)."""
    return protocol_from_meta(x, fixed["alphas"], fixed["tau"], fixed["tr"], fixed["shots"],
                              fixed["eff"])


def _validate(x: np.ndarray, fixed: Fixed) -> None:
    if x.size != 2:
        raise RelaxlineError(f"mp2rage needs exactly two volumes (the inv-1 and inv-2 images), "
                             f"got {x.size} 'InversionTime' values {x.tolist()}.")
    if len(fixed["alphas"]) != 2:
        raise RelaxlineError(f"'FlipAngle' {list(fixed['alphas'])}: give one angle per "
                             f"inversion image (two), or one shared angle.")
    if not fixed["tau"] > 0:
        raise RelaxlineError(f"'RepetitionTimeExcitation' = {fixed['tau']:g} s must be positive.")
    protocol(x, fixed).check()


def _prepare(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> tuple[np.ndarray, Fixed]:
    """Complex pair -> signed (GRE1, GRE2) on the phase of the second image (GRE2 ≥ 0)."""
    if not np.iscomplexobj(data):
        raise RelaxlineError("mp2rage needs complex inversion images (magnitude and phase): "
                             "the sign of the first image relative to the second is needed "
                             "for T1.")
    z = np.asarray(data, np.complex128)
    mag2 = np.abs(z[:, 1])
    with np.errstate(divide="ignore", invalid="ignore"):
        g1 = np.real(z[:, 0] * np.conj(z[:, 1])) / mag2
    return np.stack([np.where(mag2 > 0, g1, np.abs(z[:, 0])), mag2], axis=1), fixed


def _signal(x: np.ndarray, p: Params, fixed: Fixed) -> np.ndarray:
    s = mp2rage_signals(p["T1"], protocol(x, fixed), fixed.get("b1", 1.0), p["M0"])
    return s * np.where(s[..., 1:] < 0, -1.0, 1.0)     # GRE2 taken as positive (prepare)


def _init(x: np.ndarray, data: np.ndarray, fixed: Fixed) -> Params:
    """T1 by lookup of the measured UNI; M0 by projection of the pair on the model."""
    prot = protocol(x, fixed)
    n = data.shape[0]
    b1 = np.broadcast_to(np.asarray(fixed.get("b1", 1.0), float), (n,))
    t1 = t1_from_uni(uniform_image(data[:, 0], data[:, 1]), prot, b1, LOOKUP_RANGE)
    unit = _signal(x, {"T1": np.where(np.isfinite(t1), t1, 1.0), "M0": np.ones(n)},
                   {**fixed, "b1": b1})
    with np.errstate(divide="ignore", invalid="ignore"):
        m0 = np.einsum("nm,nm->n", data, unit) / np.einsum("nm,nm->n", unit, unit)
    return {"T1": t1, "M0": np.where(np.isfinite(t1), m0, np.nan)}


def _extras(x: np.ndarray, data: np.ndarray, fixed: Fixed, p: np.ndarray
            ) -> dict[str, np.ndarray]:
    return {"UNI": uniform_image(data[:, 0], data[:, 1])}


MP2RAGE = register(ModelSpec(
    name="mp2rage",
    params=("T1", "M0"),
    units=("s", "arbitrary"),
    lower=(LOOKUP_RANGE[0], 0.0),
    upper=(LOOKUP_RANGE[1], np.inf),
    xkey="InversionTime",
    signal=_signal,
    init=_init,
    outputs={"T1": "T1map", "M0": "M0map"},
    min_volumes=2,
    fixed_from_meta=_fixed,
    validate=_validate,
    prepare=_prepare,
    closed_form=True,
    scale_param="M0",
    voxel_fixed=("b1",),
    primary="T1",
    description="MP2RAGE: T1 and the uniform image by lookup over the sequence parameters "
                "(B1-corrected with a B1 map), M0",
    volume_keys=("FlipAngle",),
    extra_outputs={"UNI": ExtraOutput("UNIT1", "arbitrary",
                                      "uniform image GRE1·GRE2/(GRE1²+GRE2²) in [-0.5, 0.5], "
                                      "from the complex inversion images")},
    extras=_extras,
    extra={"needs_complex": "mp2rage needs the inversion images as complex data (magnitude "
                            "and phase): magnitude alone loses the sign of the first image "
                            "relative to the second, and with it T1. Give complex NIfTIs."},
))
