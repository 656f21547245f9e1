"""Background noise and signal-to-noise ratio per vial.

The noise σ comes from the air around the phantom with the background estimator of
:mod:`fitting.background` (magnitude images: background values follow a Rayleigh
distribution; Gudbjartsson & Patz 1995, Magn Reson Med 34:910; σ from the truncated
lower part of the background, so faint vials do not bias it). This assumes single-channel
magnitude noise (or an equivalent); parallel-imaging reconstructions and multi-coil
sum-of-squares images make the background non-Rayleigh (the estimator then declines
and says why).

The SNR of a vial is the mean signal of the series' brightest volume in that vial over σ.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import pandas as pd

from fitting.background import estimate, signal_mask
from qc.roi import roi_stats


@dataclass
class NoiseEstimate:
    sigma: float | None
    n_background: int
    volume_index: int
    table: pd.DataFrame = field(default_factory=pd.DataFrame)   # label, name, signal, snr
    note: str = ""


def estimate_noise(series: np.ndarray, labels: np.ndarray,
                   names: Mapping[int, str] | None = None) -> NoiseEstimate:
    """σ of the background and per-vial SNR from a series ``(x, y, z, n)`` (or one volume).

    Complex data: σ of the real and imaginary parts (:func:`fitting.background.estimate`);
    the vial signal is then the magnitude.
    """
    data = np.asarray(series)
    if data.ndim == 3:
        data = data[..., None]
    mag = np.abs(data).astype(float)
    lab = np.asarray(labels).astype(np.int64)
    names = names or {}
    # brightest volume inside the vials: best SNR, least affected by the noise floor
    inside = lab > 0
    means = [np.nanmean(mag[..., k][inside]) if inside.any() else np.nanmean(mag[..., k])
             for k in range(mag.shape[-1])]
    k = int(np.nanargmax(means))
    flat = data.reshape(-1, data.shape[-1])
    found = estimate(flat)
    sigma = None if found is None else found.sigma
    stats = roi_stats(mag[..., k], lab)   # finite voxels of each vial
    table = pd.DataFrame({"label": stats["label"],
                          "name": [names.get(v, f"label {v}") for v in stats["label"]],
                          "signal": stats["mean"].astype(float)})
    table["snr"] = table["signal"] / sigma if sigma else np.nan
    if sigma is None:
        return NoiseEstimate(None, 0, k, table,
                             "no usable background: too few air voxels, or their values do "
                             "not follow a Rayleigh distribution (zero-filled, masked or "
                             "multi-coil background); SNR not estimated")
    n_bg = int(np.sum(np.all(np.isfinite(flat), axis=1) & ~signal_mask(flat, sigma)))
    return NoiseEstimate(float(sigma), n_bg, k, table)
