"""Cubic Hermite interpolation on uniform grids, shared by the tabulated models
(:mod:`fitting.spoiling`, :mod:`fitting.sliceprofile`): the basis and the grid derivatives
the tables store beside their values."""
from __future__ import annotations

import numpy as np


def hermite(s: np.ndarray):
    """Cubic Hermite basis (h00, h10, h01, h11) at s, and its derivative in s."""
    s2, s3 = s * s, s * s * s
    val = (2 * s3 - 3 * s2 + 1, s3 - 2 * s2 + s, -2 * s3 + 3 * s2, s3 - s2)
    der = (6 * s2 - 6 * s, 3 * s2 - 4 * s + 1, -6 * s2 + 6 * s, 3 * s2 - 2 * s)
    return val, der


def grid_derivative(f: np.ndarray, h: float, axis: int) -> np.ndarray:
    """Derivative along ``axis`` of a uniform grid: fourth-order central differences
    inside, second-order (numpy.gradient) on the two nodes at each end."""
    d = np.gradient(f, h, axis=axis, edge_order=2)
    g = np.moveaxis(f, axis, 0)
    inner = (g[:-4] - 8 * g[1:-3] + 8 * g[3:-1] - g[4:]) / (12 * h)
    np.moveaxis(d, axis, 0)[2:-2] = inner
    return d
