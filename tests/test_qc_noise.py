"""Background σ and SNR (qc.noise) against scipy's Rayleigh fit."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from qc.noise import estimate_noise


def test_sigma_and_snr_from_rayleigh_background():
    rng = np.random.default_rng(3)
    sigma = 2.0
    shape = (40, 40, 2, 3)
    truth = np.zeros(shape)
    labels = np.zeros(shape[:3], int)
    labels[10:20, 10:20] = 1
    labels[22:30, 12:28] = 2
    truth[labels == 1] = [30.0, 60.0, 90.0]
    truth[labels == 2] = [20.0, 40.0, 50.0]
    cplx = truth + sigma * (rng.standard_normal(shape) + 1j * rng.standard_normal(shape))
    mag = np.abs(cplx)
    est = estimate_noise(mag, labels, {1: "one"})
    # Magnitude of complex Gaussian noise is Rayleigh(σ) (Gudbjartsson & Patz 1995,
    # Magn Reson Med 34:910); scipy's maximum-likelihood fit is the outside reference.
    bg = mag[labels == 0][truth[labels == 0].max(axis=-1) == 0].ravel()
    _, scale = scipy.stats.rayleigh.fit(bg, floc=0)
    assert est.sigma == pytest.approx(scale, rel=0.02)
    assert est.sigma == pytest.approx(sigma, rel=0.05)
    assert est.volume_index == 2
    t = est.table.set_index("label")
    assert t.loc[1, "name"] == "one" and t.loc[2, "name"] == "label 2"
    assert t.loc[1, "snr"] == pytest.approx(90.0 / sigma, rel=0.05)
    assert est.n_background > 0.9 * bg.size / 3


def test_zero_filled_background_declines_with_reason():
    labels = np.zeros((30, 30, 2), int)
    labels[5:15, 5:15] = 1
    img = np.where(labels > 0, 100.0, 0.0)
    est = estimate_noise(img, labels)
    assert est.sigma is None and "background" in est.note
    assert np.isnan(est.table["snr"]).all()
