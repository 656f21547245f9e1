"""Per-voxel fit-status codes written to ``<stem>_desc-fitstatus_mask.nii.gz`` (uint8).

QC keeps only voxels whose status is in :data:`USABLE` and counts the rest.
"""
from __future__ import annotations

OUTSIDE = 0      # not fitted: outside the mask
OK = 1           # converged in the engine that was asked for
OK_REFIT = 2     # fast engine did not converge; refit one by one with lmfit, converged
AT_BOUND = 3     # converged but a parameter sits on its bound (estimate unreliable)
FAILED = 4       # no converged fit; maps hold NaN
BAD_DATA = 5     # non-finite or all-zero data; maps hold NaN

NAMES = {OUTSIDE: "outside mask", OK: "converged", OK_REFIT: "converged after lmfit refit",
         AT_BOUND: "parameter at bound", FAILED: "fit failed", BAD_DATA: "non-finite or empty data"}
USABLE = (OK, OK_REFIT)
