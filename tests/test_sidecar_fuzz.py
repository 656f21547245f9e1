"""Random sidecar contents either read correctly or raise the project's own error type."""
from __future__ import annotations

import json
import shutil
import tempfile
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fitting.errors import RelaxlineError
from pipeline.series import read_series
from seriesio import write_nifti

json_leaf = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6),
                      st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8))
json_any = st.recursive(json_leaf, lambda inner: st.one_of(
    st.lists(inner, max_size=5), st.dictionaries(st.text(max_size=6), inner, max_size=4)),
    max_leaves=12)
keys = st.sampled_from(["InversionTime", "RepetitionTime", "FlipAngle", "EchoTime",
                        "MagneticFieldStrength", "junk"])
sidecar = st.one_of(json_any, st.dictionaries(keys, st.one_of(
    json_any, st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=3, max_size=3),
    st.lists(st.floats(0.001, 40.0), min_size=3, max_size=3, unique=True)), max_size=5))


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(content=sidecar)
def test_random_sidecars(content):
    folder = Path(tempfile.mkdtemp())
    try:
        p = write_nifti(folder / "s.nii", np.ones((2, 2, 1, 3), np.float32))
        text = json.dumps(content, allow_nan=True)
        (folder / "s.json").write_text(text)
        try:
            s = read_series([p], "InversionTime")
        except RelaxlineError as exc:
            assert "s.json" in str(exc) or "s.nii" in str(exc)
            return
        # Accepted: the values must be exactly the finite, sorted, distinct list given.
        raw = content["InversionTime"]
        assert isinstance(raw, list) and len(raw) == 3
        assert np.all(np.isfinite(s.values)) and np.all(np.diff(s.values) > 0)
        np.testing.assert_allclose(s.values, sorted(float(v) for v in raw))
        assert s.read().shape == (2, 2, 1, 3)
    finally:
        shutil.rmtree(folder)
