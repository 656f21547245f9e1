"""Shared pieces of the accuracy checks of the added models (tests and benchmarks).

Per vial of the demo phantom's T1/T2 values (used only as a spread of plausible truths;
the truths of each check are the values its own simulation was run with), noise is added
to noiseless signals from ``tests/bloch_more.py`` and the fits are compared with the
simulated truth. SNR is defined as in ``relaxline simulate``: σ = (largest noise-free
magnitude of the series) / SNR on the real and the imaginary part.
"""
from __future__ import annotations

import warnings

import numpy as np

from pipeline import phantom

VIAL_T1 = np.array([v.t1 for v in phantom.VIALS])
VIAL_T2 = np.array([v.t2 for v in phantom.VIALS])


def noisy(clean: np.ndarray, snr: float, n: int, seed: int, complex_data: bool = False
          ) -> np.ndarray:
    """``n`` noisy copies of each row of ``clean`` (V, M): (V·n, M), rows grouped by vial.

    Complex Gaussian noise of σ = max|clean|/SNR; magnitude returned unless ``complex_data``.
    """
    rng = np.random.default_rng(seed)
    rep = np.repeat(np.asarray(clean), n, axis=0)
    sigma = np.max(np.abs(clean)) / snr
    z = rep + sigma * (rng.standard_normal(rep.shape) + 1j * rng.standard_normal(rep.shape))
    return z if complex_data else np.abs(z)


def bias_pct(truth: np.ndarray, est: np.ndarray, n: int) -> np.ndarray:
    """Percent bias of the mean estimate per vial (estimates grouped by vial, ``n`` each);
    non-finite estimates are left out."""
    e = np.asarray(est, float).reshape(truth.size, n)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)     # a vial without any estimate
        return 100.0 * (np.nanmean(e, axis=1) / truth - 1.0)

