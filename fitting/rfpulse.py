"""Slice profiles of 2D spin-echo trains: the built-in Hanning-windowed sinc pulse.

A 2D multi-slice acquisition selects its slice with band-limited pulses, so the flip
angle varies across the slice: full in the middle, falling through the transition bands
to zero outside. :class:`SliceProfile` holds that variation as the *relative flip-angle
scale* (actual / nominal) of the excitation and of the refocusing pulses at equally
weighted positions across the slice (design §5); :mod:`fitting.sliceprofile` sums the
echo train over them.

``sinc:TBW[:RATIO]`` (:func:`sinc_profile`) computes both scales by spinor simulation:

* **Pulse.** B1(t) ∝ sinc(TBW·τ)·½(1 + cos 2πτ), τ = t/T − ½ ∈ [−½, ½] over the pulse
  duration T, sinc(x) = sin(πx)/(πx): a sinc of time-bandwidth product TBW (zero
  crossings every T/TBW, so TBW − 1 whole side lobes in total when TBW is an odd
  integer, a cut lobe otherwise) under a Hanning window. The excitation and the
  refocusing pulses have this same shape; each is scaled so that its on-resonance
  rotation (the area) is the nominal angle of the sidecar (``FlipAngle``,
  ``RefocusingFlipAngle``).
* **Slice.** A constant slice-select gradient during the pulse maps position x (in
  units of the excitation slice thickness, the nominal slice being |x| ≤ ½) to the
  off-resonance frequency x·TBW/T. RATIO is the refocusing slice width over the
  excitation slice width (default 1): the refocusing pulse plays under a gradient
  RATIO times weaker, so its profile at x is the excitation-shaped response at x/RATIO.
* **Simulation.** The pulse is cut into :data:`N_STEPS` piecewise-constant steps; each
  step is a rotation written as Cayley–Klein parameters (α, β) and the steps are
  composed per position (Pauly et al. 1991, IEEE Trans Med Imaging 10:53). The flip
  angle at x is 2·arcsin|β(x)|; relaxation during the pulse is neglected.
* **B1.** B1 scales the RF amplitude of both pulses. The pulse's response is not linear
  in its amplitude (a 180° pulse scaled by 0.8 has a wider relative profile than 0.8
  times the 180° profile), so the built-in profile is simulated at each B1 — at
  :data:`N_AMPLITUDES` scales from 0.1 to 2, interpolated by a cubic spline
  (:meth:`SliceProfile.angles`).
* **Gradient refocusing.** The excitation's slice-select gradient is assumed refocused
  (a rephasing lobe of half its area) and the refocusing pulses to sit between
  identical crusher pairs, as in a CPMG train. The model keeps only the flip angle at
  each position: the small residual phase of the excited magnetisation across the slice
  and the rotation-axis tilt of the refocusing pulses off resonance are not modelled.
* **Positions.** Equally spaced x over ±:func:`half_width` (beyond it only side lobes
  of ~1e-3 of nominal remain), :data:`POSITIONS_PER_SLICE`·max(TBW, 4) per slice
  thickness.

The relative scale depends on the nominal angle (the Bloch equations are not linear
in B1), so a built-in profile is computed for the protocol's angles.
"""
from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np

from fitting.errors import RelaxlineError

N_STEPS = 256                 # piecewise-constant steps per pulse (flip error < 0.004°)
N_AMPLITUDES = 33             # RF scales (B1) at which the built-in profile is simulated
POSITIONS_PER_SLICE = 50      # × max(TBW, 4) positions per slice thickness
TBW_RANGE = (1.0, 20.0)
RATIO_RANGE = (0.2, 5.0)
_SINC = re.compile(r"^sinc:([^:]+)(?::([^:]+))?$")


@dataclass(frozen=True, eq=False)
class SliceProfile:
    """Relative flip-angle scales at equally weighted positions across the slice.

    Attributes
    ----------
    excitation, refocusing : (P,) actual / nominal flip angle at each position (≥ 0),
        at the nominal RF amplitude (B1 = 1).
    source : where it came from (``sinc:3``, a file name), for messages and sidecars.
    key : digest identifying the profile (cache key of the tables built for it).
    pulse : for the built-in profile, (TBW, RATIO, positions x): the flip angles at any
        RF scale B1 then come from the spinor simulation itself (:meth:`angles`).
    """

    excitation: np.ndarray
    refocusing: np.ndarray
    source: str
    key: str = field(default="")
    pulse: tuple | None = None

    @property
    def n_positions(self) -> int:
        return int(self.excitation.size)

    def angles(self, b1: np.ndarray, excite_deg: float, refocus_deg: float
               ) -> tuple[np.ndarray, np.ndarray]:
        """Actual excitation and refocusing angles (rad), each (len(b1), P), at RF scales b1.

        A profile given as scales (a file) scales with B1: angle = B1·scale·nominal, exact
        where the pulse acts linearly (small angles), an approximation in the transition
        bands of large-angle pulses. The built-in pulse is simulated at each B1 (Bloch
        response of the scaled RF amplitude), through a cubic spline over
        :data:`N_AMPLITUDES` simulated scales.
        """
        b = np.asarray(b1, float).reshape(-1, 1)
        if self.pulse is None:
            return (b * self.excitation * np.deg2rad(excite_deg),
                    b * self.refocusing * np.deg2rad(refocus_deg))
        tbw, ratio, x = self.pulse
        return (_flip_at(tbw, excite_deg, x, b[:, 0]), _flip_at(tbw, refocus_deg, x / ratio,
                                                              b[:, 0]))


def profile_from_scales(excitation, refocusing, source: str) -> SliceProfile:
    """A :class:`SliceProfile` from two columns of scales; RelaxlineError naming the
    column on empty, non-finite or negative values or an excitation that is zero
    everywhere (messages say which column and row, counted from 1)."""
    cols = {}
    for name, v in (("excitation", excitation), ("refocusing", refocusing)):
        a = np.asarray(v, dtype=float).reshape(-1)
        if a.size == 0:
            raise RelaxlineError(f"{source}: the slice profile has no rows.")
        bad = ~np.isfinite(a)
        if bad.any():
            raise RelaxlineError(f"{source}: column '{name}' holds a non-finite value in row "
                                 f"{int(np.flatnonzero(bad)[0]) + 1}; give numbers (the flip "
                                 f"angle scale actual/nominal, about 0 to 1).")
        if np.any(a < 0):
            i = int(np.flatnonzero(a < 0)[0])
            raise RelaxlineError(f"{source}: column '{name}' holds the negative value "
                                 f"{a[i]:g} in row {i + 1}; a flip-angle scale is >= 0 "
                                 f"(actual/nominal).")
        if np.any(a > 3):
            i = int(np.flatnonzero(a > 3)[0])
            raise RelaxlineError(f"{source}: column '{name}' holds {a[i]:g} in row {i + 1}; "
                                 f"the scale is actual/nominal flip angle (about 0 to 1), not "
                                 f"degrees or percent.")
        cols[name] = a
    if cols["excitation"].size != cols["refocusing"].size:
        raise RelaxlineError(f"{source}: columns 'excitation' and 'refocusing' differ in "
                             f"length.")
    if not np.any(cols["excitation"] > 0):
        raise RelaxlineError(f"{source}: column 'excitation' is zero everywhere, so no "
                             f"signal would be excited.")
    h = hashlib.sha256(cols["excitation"].tobytes() + cols["refocusing"].tobytes())
    return SliceProfile(cols["excitation"], cols["refocusing"], source, h.hexdigest()[:16])


def parse_sinc(text: str) -> tuple[float, float] | None:
    """``sinc:TBW[:RATIO]`` -> (TBW, RATIO); None if ``text`` is not a ``sinc:`` spec."""
    if not text.startswith("sinc:"):
        return None
    m = _SINC.match(text)
    form = "sinc:TBW or sinc:TBW:RATIO, e.g. sinc:3 or sinc:3:1.5"
    if not m:
        raise RelaxlineError(f"slice profile {text!r}: expected {form}.")
    try:
        tbw = float(m.group(1))
        ratio = 1.0 if m.group(2) is None else float(m.group(2))
    except ValueError:
        raise RelaxlineError(f"slice profile {text!r}: TBW and RATIO must be numbers "
                             f"({form}).") from None
    if not TBW_RANGE[0] <= tbw <= TBW_RANGE[1]:
        raise RelaxlineError(f"slice profile {text!r}: time-bandwidth product {tbw:g} outside "
                             f"{TBW_RANGE[0]:g} to {TBW_RANGE[1]:g}.")
    if not RATIO_RANGE[0] <= ratio <= RATIO_RANGE[1]:
        raise RelaxlineError(f"slice profile {text!r}: RATIO {ratio:g} (refocusing / "
                             f"excitation slice width) outside {RATIO_RANGE[0]:g} to "
                             f"{RATIO_RANGE[1]:g}.")
    return tbw, ratio


def hanning_sinc(tbw: float, n_steps: int = N_STEPS) -> np.ndarray:
    """The pulse shape at the centres of ``n_steps`` equal steps (module docstring), peak 1."""
    tau = (np.arange(n_steps) + 0.5) / n_steps - 0.5
    return np.sinc(tbw * tau) * 0.5 * (1.0 + np.cos(2.0 * np.pi * tau))


def spinor(shape: np.ndarray, angle_rad, offres: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cayley–Klein parameters (α, β) of a pulse at each off-resonance.

    ``shape`` (n,) the B1 amplitude per step, scaled so that its sum is ``angle_rad`` (the
    on-resonance rotation; an array broadcasts against ``offres``); ``offres`` the
    precession per step (rad) about z. Each step rotates by φ = √(b² + w²) about
    (b, 0, w)/φ: α = cos(φ/2) − i·n_z·sin(φ/2), β = −i·n_x·sin(φ/2); steps compose as
    (α, β) ← (αₛα − β̄ₛβ, βₛα + ᾱₛβ) (Pauly et al. 1991, IEEE Trans Med Imaging 10:53).
    """
    unit = np.asarray(shape, float) / np.sum(shape)
    amp, w = np.broadcast_arrays(np.asarray(angle_rad, float), np.asarray(offres, float))
    a = np.ones(w.shape, complex)
    bb = np.zeros(w.shape, complex)
    for uk in unit:
        bk = amp * uk
        phi = np.sqrt(bk * bk + w * w)
        half = 0.5 * phi
        with np.errstate(invalid="ignore", divide="ignore"):
            sn = np.where(phi > 0, np.sin(half) / phi, 0.5)   # sin(φ/2)/φ
        a_s = np.cos(half) - 1j * w * sn
        b_s = -1j * bk * sn
        a, bb = a_s * a - np.conj(b_s) * bb, b_s * a + np.conj(a_s) * bb
    return a, bb


def flip_angle(tbw: float, angle_deg, x: np.ndarray, n_steps: int = N_STEPS) -> np.ndarray:
    """Flip angle (rad) 2·arcsin|β| of the Hanning sinc of on-resonance angle ``angle_deg``
    (scalar, or (A, 1) to broadcast) at positions ``x`` (slice thicknesses)."""
    offres = 2.0 * np.pi * np.asarray(x, float) * tbw / n_steps
    _, b = spinor(hanning_sinc(tbw, n_steps), np.deg2rad(angle_deg), offres)
    return 2.0 * np.arcsin(np.clip(np.abs(b), 0.0, 1.0))


def flip_scale(tbw: float, angle_deg: float, x: np.ndarray, n_steps: int = N_STEPS
               ) -> np.ndarray:
    """Actual/nominal flip angle of the Hanning sinc at positions ``x`` (slice thicknesses)."""
    return flip_angle(tbw, angle_deg, x, n_steps) / np.deg2rad(angle_deg)


@lru_cache(maxsize=32)
def _flip_spline(tbw: float, angle_deg: float, x_key: bytes):
    from scipy.interpolate import CubicSpline
    x = np.frombuffer(x_key)
    scales = np.linspace(0.1, 2.0, N_AMPLITUDES)
    return CubicSpline(scales, flip_angle(tbw, angle_deg * scales[:, None], x), axis=0)


def _flip_at(tbw: float, angle_deg: float, x: np.ndarray, b1: np.ndarray) -> np.ndarray:
    """(len(b1), P) flip angles (rad) at RF scales b1 (0.1–2) by the amplitude spline."""
    b = np.asarray(b1, float)
    if np.any((b < 0.1) | (b > 2.0)):
        raise RelaxlineError(f"B1 {b.min():g} to {b.max():g} outside the simulated 0.1 to 2.")
    return _flip_spline(float(tbw), float(angle_deg), np.ascontiguousarray(x, float).tobytes())(b)


def half_width(tbw: float) -> float:
    """Half-range of the positions (slice thicknesses): the transition band of a Hanning
    sinc ends within about 2/TBW of the nominal edge. Beyond 4/TBW only side lobes of
    about 1e-3 of the nominal angle remain, in excitation and refocusing alike, so they
    add ~1e-3 to the excited magnetisation but < 1e-4 to the echo train's shape
    (checked in tests/test_slice_profile.py)."""
    return 0.5 + 4.0 / tbw


@lru_cache(maxsize=16)
def sinc_profile(tbw: float, ratio: float, excite_deg: float, refocus_deg: float
                 ) -> SliceProfile:
    """Built-in ``sinc:TBW:RATIO`` profile for the given nominal angles (module docstring)."""
    xw = half_width(tbw)
    n = int(np.ceil(2 * xw * POSITIONS_PER_SLICE * max(tbw, 4.0)))
    x = -xw + (np.arange(n) + 0.5) * (2 * xw / n)
    exc = flip_scale(tbw, excite_deg, x)
    ref = flip_scale(tbw, refocus_deg, x / ratio)
    label = f"sinc:{tbw:g}" + (f":{ratio:g}" if ratio != 1.0 else "")
    prof = profile_from_scales(exc, ref, label)
    return SliceProfile(prof.excitation, prof.refocusing, label,
                        f"{prof.key}-sinc{tbw:g}-{ratio:g}", (float(tbw), float(ratio), x))
