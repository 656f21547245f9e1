"""Compilation settings shared by every compiled kernel (numba).

Every compiled function of ``fitting`` is declared with :data:`jit` (``njit`` with an
on-disk cache and the GIL released, so Python threads run kernels side by side). A
kernel reaches numpy callers through a compiled loop over flattened arguments
(:func:`train_apply` for a voxel's train, :func:`broadcast_apply` elementwise); numba's
own ufuncs are not used, as a cached ufunc built from
a function that is also compiled on its own shares its cache entry and loads the wrong
machine code.

The on-disk cache lives in one folder per version of the package's sources: numba
checks only the time stamp of the file that defines a cached function, not of the
files it calls, so a kernel calling a changed formula in another module would load
stale machine code. The folder name therefore holds a hash of every ``fitting/*.py``
(and of the numba, numpy, scipy and Python versions); editing any of them compiles afresh. It is
``$RELAXLINE_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/relaxline`` (default
``~/.cache/relaxline``), falling back to the temporary folder when that is not
writable. ``NUMBA_CACHE_DIR``, when set, wins (numba's own setting).
"""
from __future__ import annotations

import hashlib
import os
import sys
import tempfile
from functools import partial
from pathlib import Path

import numba
import numpy as np

_HERE = Path(__file__).resolve().parent


def _source_hash() -> str:
    import scipy   # compiled constants are interpolated from scipy functions (fitting.noise)
    h = hashlib.sha256(f"{numba.__version__} {np.__version__} {scipy.__version__} "
                       f"{sys.version_info[:2]}".encode())
    for path in sorted(_HERE.glob("*.py")):
        h.update(path.name.encode())
        h.update(path.read_bytes())
    return h.hexdigest()[:16]


def _cache_dir() -> str | None:
    if os.environ.get("NUMBA_CACHE_DIR"):
        return None
    base = os.environ.get("RELAXLINE_CACHE_DIR") or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache"),
        "relaxline")
    for root in (base, os.path.join(tempfile.gettempdir(), "relaxline-cache")):
        folder = os.path.join(root, "numba-" + _source_hash())
        try:
            os.makedirs(folder, exist_ok=True)
            if os.access(folder, os.W_OK):
                return folder
        except OSError:
            continue
    return None


_DIR = _cache_dir()
if _DIR is not None:
    numba.config.CACHE_DIR = _DIR   # read by each cached dispatcher when it is declared

jit = partial(numba.njit, cache=True, nogil=True, error_model="numpy")
"""Decorator of the compiled kernels: cached on disk, GIL released, IEEE arithmetic
(division by zero gives inf/NaN as in numpy, no exception)."""




def _flat_broadcast(args):
    """The broadcast shape of ``args`` and each of them as a fresh, writable, C-ordered
    float64 copy of that shape, flattened (one compiled signature for every call)."""
    arrs = [np.asarray(a, dtype=float) for a in args]
    shape = np.broadcast_shapes(*(a.shape for a in arrs))
    flat = []
    for a in arrs:
        buf = np.empty(shape)
        buf[...] = a
        flat.append(buf.reshape(-1))
    return shape, flat


def train_apply(loop, x, *params) -> "np.ndarray":
    """Call the compiled ``loop(x, *flat_params, out)`` of a train kernel on numpy arrays.

    ``x`` (the acquisition values) is flattened to (M,); the parameters broadcast to a
    shape B and are flattened to (N,); the result has shape B + (M,) (the broadcasting
    convention of :mod:`fitting.signals`). ``loop`` fills row i of ``out`` (N, M) with the
    train of voxel i.
    """
    xs = np.ascontiguousarray(np.asarray(x, dtype=float).reshape(-1))
    shape, flat = _flat_broadcast(params)
    out = np.empty(shape + (xs.size,))
    loop(xs, *flat, out.reshape(-1, xs.size))
    return out


def broadcast_apply(loop, *args: "np.ndarray", outputs: int = 1):
    """Call the compiled elementwise ``loop(*flat_args, *outs)`` on numpy arrays.

    The arguments are broadcast together and flattened (float64); each of the
    ``outputs`` results has their broadcast shape (a tuple of them when ``outputs`` > 1).
    This is how numpy callers reach a scalar kernel: each kernel has a small compiled
    loop over its arguments (a numba ufunc cannot be cached safely).
    """
    shape, flat = _flat_broadcast(args)
    outs = [np.empty(shape) for _ in range(outputs)]
    loop(*flat, *(o.reshape(-1) for o in outs))
    return outs[0] if outputs == 1 else tuple(outs)
