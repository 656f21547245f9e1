"""Demo data: simulated sessions of the invented relaxline demo phantom.

Each session is a BIDS-like folder ``OUTDIR/sub-relaxlinedemo/ses-<date>/anat/``
holding one series per model in the design §3 input form (inversion recovery,
variable flip angle, double angle, multi-echo spin echo, multi-echo gradient echo),
a vial label map (``_dseg``) on the scan grid, and under ``OUTDIR/phantom/`` the
reference table, the layout and the per-session ground truth. The first session
(:data:`METHODS_SESSION`) also holds one series of each further method: continuous
Look-Locker (``LLT1``), saturation recovery (``SRT1``), actual flip-angle imaging
(``fmap/…_acq-tr1/tr2_TB1AFI``) and MP2RAGE (complex ``inv-1/inv-2``); its MESE train
serves the multi-component T2 model.

Physics
-------
* Signals come from the forward functions of :mod:`fitting.signals` and
  :func:`fitting.epg.cpmg_echoes`; no signal equation is written here.
* One smooth B1 field (ratio of actual to nominal flip angle, about 0.85–1.23
  over the phantom) scales every excitation and refocusing angle of a session.
  The inversion pulse is taken as adiabatic (B1-insensitive) with an efficiency
  of 0.92–0.96 drawn per session.
* Sessions differ by phantom temperature (reference ± 2 °C; T1 and T2 follow the
  reference table's coefficients), an optional linear drift of the vial T1 and T2
  (``drift_pct`` per session after the first), and a small rigid motion of the
  phantom (≤ 3 mm, ≤ 3°) that the label map follows.
* Noise: complex Gaussian of standard deviation σ on the real and imaginary parts,
  magnitude stored, so magnitudes are Rician (Rice 1944; Gudbjartsson & Patz 1995,
  Magn Reson Med 34:910) and the air around the phantom is Rayleigh. σ is set per
  series as (largest noise-free magnitude in the series)/SNR and is recorded in
  each sidecar as ``SimulationNoiseSigma``. SNR = inf gives noise-free images.

Determinism: the same options give the same bytes. Every session and series draws
from its own ``numpy.random.SeedSequence(seed, spawn_key=(session, stream))``, so
session k does not depend on how many sessions are requested.

Writing policy: files are written atomically into OUTDIR; existing files of the
same names are replaced, nothing else in OUTDIR is touched or deleted.
"""
from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from pipeline import phantom
from pipeline.errors import InputError
from pipeline.outputs import (atomic_write_json, atomic_write_nifti, atomic_write_text,
                              atomic_write_tsv, ensure_dir, package_version)

FOV_MM = 200.0
SLICE_MM = 5.0
SITE = "northfield-lab"
SCANNER = "bay2"
FIRST_SESSION = _dt.date(2026, 11, 1)

# Protocol (times in s, angles in degrees).
IR_TI = [0.035, 0.07, 0.12, 0.2, 0.3, 0.45, 0.65, 0.9, 1.3, 1.9]
IR_TR = 2.5                 # finite: the long-T1 vials do not recover between inversions
VFA_FLIPS = [12.0, 2.0, 25.0, 4.0, 18.0, 8.0]  # acquisition order (not sorted on purpose)
VFA_TR = 0.015
DAM_ALPHA = 60.0
DAM_TR = 10.0
MESE_ECHOES = 32
MESE_ESP = 0.010
MESE_TR = 10.0              # ≥ 4·T1 of every compartment: full recovery assumed
MEGRE_TE = [0.003, 0.008, 0.015, 0.025, 0.040, 0.060]
MEGRE_FLIP = 20.0
MEGRE_TR = 0.08
# Further acquisition methods, simulated in the first session only (METHODS_SESSION).
LL_TAU = 0.1                # Look-Locker: readouts of LL_ALPHA every LL_TAU from LL_FIRST
LL_ALPHA = 8.0
LL_IMAGES = 40
LL_FIRST = 0.05
LL_TR = 12.0                # time between inversions: every vial recovers
SR_DELAYS = [0.03, 0.08, 0.15, 0.3, 0.6, 1.2, 2.4, 5.0]
SR_WAIT = 0.4               # from the previous (90°) readout to the saturation pulse
AFI_TR = [0.020, 0.100]     # TR1, TR2 (Yarnykh 2007's recommended n = 5)
AFI_ALPHA = 60.0
MP2RAGE_TI = [0.35, 2.5]   # TI1 short enough that the 0.1 s vial lies on the monotonic branch
MP2RAGE_ALPHA = [4.0, 5.0]
MP2RAGE_TAU = 0.007
MP2RAGE_SHOTS = [40, 88]    # excitations before and after the k-space centre (partial Fourier)
MP2RAGE_TR = 5.0
METHODS_SESSION = 0

# Independent random streams inside a session (order fixed: part of the output contract);
# a series' noise stream is named by its BIDS suffix.
_STREAMS = ("geometry", "IRT1", "VFA", "TB1DAM", "MESE", "MEGRE", "LLT1", "SRT1", "TB1AFI",
            "MP2RAGE")
ACQ_CLOCK = "07:30:00"      # invented time of day of every simulated session
BIDS_VERSION = "1.10.0"

LIMITS = {"sessions": (1, 60), "slices": (1, 64), "matrix": (40, 512)}


@dataclass(frozen=True)
class SimOptions:
    """Options of ``relaxline simulate`` (see the command's help)."""

    sessions: int = 3
    seed: int = 0
    snr: float = 100.0
    drift_pct: float = 0.0
    slices: int = 3
    matrix: int = 80
    step_vial: int = 0          # vial label with a step change (0: none) ...
    step_pct: float = 0.0       # ... of its T1 and T2 by this percentage ...
    step_from: int = 1          # ... from this session on (1-based)

    def vial_factor(self, index: int, label: int) -> float:
        """Extra factor on a vial's T1/T2 in session ``index`` (0-based): the step change."""
        return 1.0 + self.step_pct / 100.0 if (label == self.step_vial and
                                               index + 1 >= self.step_from) else 1.0

    def validate(self) -> None:
        for name, (lo, hi) in LIMITS.items():
            v = getattr(self, name)
            if not lo <= v <= hi:
                raise InputError(f"--{name} must be an integer from {lo} to {hi}, got {v}.")
        if self.seed < 0:
            raise InputError(f"--seed must be a non-negative integer, got {self.seed}.")
        if not (self.snr > 0):  # also rejects NaN; inf means noise-free
            raise InputError(f"--snr must be positive (inf for noise-free images), "
                             f"got {self.snr:g}.")
        if self.step_vial and (self.step_vial not in [v.label for v in phantom.VIALS] or
                               not (math.isfinite(self.step_pct) and abs(self.step_pct) < 50)
                               or self.step_from < 1):
            raise InputError(f"--step must be VIAL:PCT:FROM with a vial label of the demo "
                             f"phantom (1-{len(phantom.VIALS)}), a percentage between -50 and "
                             "50 and the first stepped session (from 1), got "
                             f"{self.step_vial}:{self.step_pct:g}:{self.step_from}.")
        if not (math.isfinite(self.drift_pct) and abs(self.drift_pct) < 50.0):
            raise InputError(f"--drift must be a percentage per session between -50 and 50, "
                             f"got {self.drift_pct:g}.")

    @property
    def voxel_mm(self) -> tuple[float, float, float]:
        return (FOV_MM / self.matrix, FOV_MM / self.matrix, SLICE_MM)


def session_label(index: int) -> str:
    """BIDS session label of session ``index`` (0-based): consecutive days from 2026-11-01."""
    return (FIRST_SESSION + _dt.timedelta(days=index)).strftime("%Y%m%d")


def grid(options: SimOptions) -> tuple[tuple[int, int, int], np.ndarray, tuple[np.ndarray, ...]]:
    """Shape, affine (RAS+, FOV centred on the world origin) and world x, y, z of voxel centres."""
    shape = (options.matrix, options.matrix, options.slices)
    vox = options.voxel_mm
    affine = np.diag([*vox, 1.0])
    affine[:3, 3] = [-(n - 1) / 2.0 * v for n, v in zip(shape, vox)]
    ijk = np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij")
    xyz = tuple(affine[a, a] * ijk[a] + affine[a, 3] for a in range(3))
    return shape, affine, xyz


def b1_field(x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Smooth transmit field (ratio to nominal) in scanner coordinates (mm).

    An off-centre Gaussian bump on a slight left–right and head–foot slope:
    about 1.23 near (12, −8) mm falling to about 0.85 at the phantom's rim (invented).
    """
    bump = np.exp(-((x - 12.0) ** 2 + (y + 8.0) ** 2) / (2.0 * 65.0 ** 2))
    return 0.80 + 0.42 * bump + 0.0006 * x + 0.002 * z


def _rng(seed: int, session: int, stream: str) -> np.random.Generator:
    ss = np.random.SeedSequence(seed, spawn_key=(session, _STREAMS.index(stream)))
    return np.random.default_rng(ss)


@dataclass
class SessionState:
    """Geometry, temperature and per-voxel truth of one session."""

    label: str
    temperature: float
    shift_mm: tuple[float, float]
    rotation_deg: float
    inversion_efficiency: float
    drift_factor: float
    labels: np.ndarray   # int16 (x, y, z)
    vial_factors: dict   # label -> step factor on T1/T2 (1 = none)
    inside: np.ndarray   # bool, inside the cylinder
    b1: np.ndarray       # (x, y, z)
    pd: np.ndarray       # (x, y, z), 0 in air
    t1: np.ndarray
    t2: np.ndarray
    t2s: np.ndarray


def session_state(index: int, options: SimOptions) -> SessionState:
    """Draw a session's temperature, motion and inversion efficiency; build truth maps."""
    rng = _rng(options.seed, index, "geometry")
    temperature = round(phantom.REFERENCE_TEMPERATURE_C + rng.uniform(-2.0, 2.0), 1)
    radius, angle = 3.0 * math.sqrt(rng.uniform()), rng.uniform(0.0, 2.0 * math.pi)
    shift = (round(radius * math.cos(angle), 2), round(radius * math.sin(angle), 2))
    rotation = round(rng.uniform(-3.0, 3.0), 2)
    eff = round(rng.uniform(0.92, 0.96), 3)
    drift = 1.0 + options.drift_pct / 100.0 * index

    _, _, (x, y, z) = grid(options)
    labels, inside = phantom.label_map(x, y, shift, rotation)
    shape = labels.shape
    pd, t1, t2, t2s = (np.zeros(shape) for _ in range(4))
    t1[:], t2[:], t2s[:] = 1.0, 1.0, 1.0  # finite placeholders in air (pd = 0 there)
    for comp in (phantom.FILL, *phantom.VIALS):
        sel = (labels == comp.label) & inside
        c_t1, c_t2 = comp.at(temperature)
        if comp.label:  # drift ages the gels, not the fill
            f = drift * options.vial_factor(index, comp.label)
            c_t1, c_t2 = c_t1 * f, c_t2 * f
        pd[sel], t1[sel], t2[sel] = comp.pd, c_t1, c_t2
        t2s[sel] = 1.0 / (1.0 / c_t2 + comp.r2_prime)
    return SessionState(label=session_label(index), temperature=temperature, shift_mm=shift,
                        rotation_deg=rotation, inversion_efficiency=eff, drift_factor=drift,
                        vial_factors={v.label: options.vial_factor(index, v.label)
                                      for v in phantom.VIALS}, labels=labels, inside=inside, b1=b1_field(x, y, z), pd=pd, t1=t1,
                        t2=t2, t2s=t2s)


@dataclass(frozen=True)
class SimSeries:
    """One simulated series as BIDS raw data holds it: one 3D file per value of ``key``.

    ``signals`` are noise-free and signed, ``(x, y, z, n)``, zero outside the phantom,
    volumes in acquisition order (the order of ``values``), which is also the order
    of the index entity ``<entity>-1 … <entity>-n``.
    """

    suffix: str           # BIDS suffix, also the noise stream's name (IRT1, VFA, ...)
    datatype: str         # BIDS datatype folder: anat, or fmap for B1 mapping
    entity: str           # BIDS index entity of the volumes: inv, flip or echo
    key: str              # varying sidecar key
    values: list[float]   # one per volume (s or degrees)
    sidecar: dict         # keys shared by every volume (BIDS units)
    description: str      # SeriesDescription
    signals: np.ndarray
    labels: tuple[str, ...] = ()    # entity labels (default 1 … n)
    per_volume: dict = field(default_factory=dict)   # key -> one value per volume
    complex_data: bool = False      # store complex images (magnitude and phase)
    split: bool = True              # one 3D file per volume (False: one 4D file)


def _inside(st: SessionState, signal: Callable[..., np.ndarray]) -> np.ndarray:
    """Evaluate ``signal(t1, t2, t2s, pd, b1)`` inside the phantom; zero in air."""
    m = st.inside
    sig = signal(st.t1[m], st.t2[m], st.t2s[m], st.pd[m], st.b1[m])
    full = np.zeros(m.shape + (sig.shape[-1],), sig.dtype)
    full[m] = sig
    return full


# One function per series kind (signals from fitting.signals / fitting.epg only). To add a
# kind: write a function returning a SimSeries, append it to SERIES_KINDS and its suffix
# to _STREAMS (at the end, so the existing series keep their noise).

def ir_series(st: SessionState) -> SimSeries:
    """Inversion recovery, magnitude, finite TR, adiabatic inversion of efficiency ``eff``."""
    from fitting.signals import ir_signal
    return SimSeries("IRT1", "anat", "inv", "InversionTime", _round(IR_TI),
                     {"RepetitionTime": IR_TR, "FlipAngle": 90.0, "MRAcquisitionType": "2D",
                      "PulseSequenceType": "inversion recovery spin echo",
                      "ScanningSequence": "IR", "SequenceVariant": "NONE"},
                     "inversion recovery",
                     _inside(st, lambda t1, t2, t2s, pd, b1: ir_signal(
                         IR_TI, t1, pd, eff=st.inversion_efficiency, tr=IR_TR,
                         alpha_deg=90.0 * b1)))


def vfa_series(st: SessionState) -> SimSeries:
    """Spoiled gradient echo at several flip angles (BIDS qMRI VFA keys)."""
    from fitting.signals import spgr_signal
    return SimSeries("VFA", "anat", "flip", "FlipAngle", _round(VFA_FLIPS),
                     {"RepetitionTime": VFA_TR, "RepetitionTimeExcitation": VFA_TR,
                      "PulseSequenceType": "spoiled gradient echo",
                      "ScanningSequence": "GR", "SequenceVariant": "SP",
                      "MRAcquisitionType": "3D"},
                     "variable flip angle",
                     _inside(st, lambda t1, t2, t2s, pd, b1: spgr_signal(VFA_FLIPS, t1, pd,
                                                                         VFA_TR, b1)))


def dam_series(st: SessionState) -> SimSeries:
    """Double angle α, 2α (B1 mapping: BIDS puts it in fmap/)."""
    from fitting.signals import dam_signals
    return SimSeries("TB1DAM", "fmap", "flip", "FlipAngle", [DAM_ALPHA, 2.0 * DAM_ALPHA],
                     {"RepetitionTime": DAM_TR, "MRAcquisitionType": "2D",
                      "PulseSequenceType": "spin echo", "ScanningSequence": "SE",
                      "SequenceVariant": "NONE"},
                     "double angle B1",
                     _inside(st, lambda t1, t2, t2s, pd, b1: dam_signals(DAM_ALPHA, b1, pd, t1,
                                                                         DAM_TR)))


def mese_series(st: SessionState) -> SimSeries:
    """CPMG multi-echo spin echo by extended phase graphs, full recovery (TR ≥ 4·T1)."""
    from fitting.epg import cpmg_echoes
    return SimSeries("MESE", "anat", "echo", "EchoTime",
                     _round(MESE_ESP * (np.arange(MESE_ECHOES) + 1)),
                     # 3D: simulated with a uniform flip angle across the slab (no slice
                     # profile); a 2D label would be untrue, and mese warns on 2D series
                     # fitted without --slice-profile
                     {"RepetitionTime": MESE_TR, "FlipAngle": 90.0, "RefocusingFlipAngle": 180.0,
                      "MRAcquisitionType": "3D", "PulseSequenceType": "multi-echo spin echo "
                      "(CPMG)", "ScanningSequence": "SE", "SequenceVariant": "NONE"},
                     "multi-echo spin echo",
                     _inside(st, lambda t1, t2, t2s, pd, b1: cpmg_echoes(
                         MESE_ECHOES, MESE_ESP, t2, t1, b1=b1, refocus_deg=180.0,
                         excite_deg=90.0, m0=pd)))


def megre_series(st: SessionState) -> SimSeries:
    """Multi-echo spoiled gradient echo: steady state at TE = 0, then T2* decay."""
    from fitting.signals import mono_exp, spgr_signal
    return SimSeries("MEGRE", "anat", "echo", "EchoTime", _round(MEGRE_TE),
                     {"RepetitionTime": MEGRE_TR, "FlipAngle": MEGRE_FLIP,
                      "MRAcquisitionType": "3D", "PulseSequenceType": "multi-echo spoiled "
                      "gradient echo", "ScanningSequence": "GR", "SequenceVariant": "SP"},
                     "multi-echo gradient echo",
                     _inside(st, lambda t1, t2, t2s, pd, b1: mono_exp(
                         MEGRE_TE, t2s, spgr_signal([MEGRE_FLIP], t1, pd, MEGRE_TR, b1)[:, 0])))


def looklocker_series(st: SessionState) -> SimSeries:
    """Continuous Look-Locker: adiabatic inversion, spoiled readouts every LL_TAU (B1 scales
    their angle); relaxline's suffix LLT1 (BIDS has none), one 4D file."""
    from fitting.recovery import ll_cycle_signals
    ti = LL_FIRST + LL_TAU * np.arange(LL_IMAGES)
    return SimSeries("LLT1", "anat", "", "InversionTime", _round(ti),
                     {"FlipAngle": LL_ALPHA, "RepetitionTimeExcitation": LL_TAU,
                      "RepetitionTimePreparation": LL_TR, "MRAcquisitionType": "2D",
                      "PulseSequenceType": "inversion recovery, continuous spoiled gradient-"
                      "echo readout (Look-Locker)", "ScanningSequence": "IR\\GR",
                      "SequenceVariant": "SP"},
                     "Look-Locker inversion recovery",
                     _inside(st, lambda t1, t2, t2s, pd, b1: ll_cycle_signals(
                         t1, pd, LL_ALPHA * b1, LL_TAU, LL_IMAGES, LL_FIRST, LL_TR,
                         st.inversion_efficiency)), split=False)


def sr_series(st: SessionState) -> SimSeries:
    """Saturation recovery: a 90°·B1 saturation pulse SR_WAIT after the previous 90° readout;
    relaxline's suffix SRT1 and key SaturationDelay (BIDS has neither), one 4D file."""
    from fitting.recovery import sr_efficiency, sr_signal
    return SimSeries("SRT1", "anat", "", "SaturationDelay", _round(SR_DELAYS),
                     {"FlipAngle": 90.0, "MRAcquisitionType": "2D",
                      "PulseSequenceType": "saturation recovery", "ScanningSequence": "GR",
                      "SequenceVariant": "SP"},
                     "saturation recovery",
                     _inside(st, lambda t1, t2, t2s, pd, b1: sr_signal(
                         SR_DELAYS, t1, pd, sr_efficiency(t1, 90.0 * b1, SR_WAIT))),
                     split=False)


def afi_series(st: SessionState) -> SimSeries:
    """Actual flip-angle imaging pair (BIDS TB1AFI in fmap/, files acq-tr1 and acq-tr2, each
    with its interval as RepetitionTimeExcitation)."""
    from fitting.afi import afi_signals
    return SimSeries("TB1AFI", "fmap", "acq", "RepetitionTimeExcitation", _round(AFI_TR),
                     {"FlipAngle": AFI_ALPHA, "MRAcquisitionType": "3D",
                      "PulseSequenceType": "actual flip-angle imaging (interleaved TRs)",
                      "ScanningSequence": "GR", "SequenceVariant": "SP"},
                     "actual flip-angle imaging B1",
                     _inside(st, lambda t1, t2, t2s, pd, b1: afi_signals(
                         AFI_TR, b1, pd * -np.expm1(-AFI_TR[0] / t1), AFI_ALPHA, t1)),
                     labels=("tr1", "tr2"))


def mp2rage_series(st: SessionState) -> SimSeries:
    """MP2RAGE inversion images (BIDS MP2RAGE, inv-1/inv-2), complex: the receive phase is a
    smooth invented field; B1 scales both readout angles, the inversion is adiabatic."""
    from fitting.mp2rage import mp2rage_signals, protocol_from_meta
    prot = protocol_from_meta(MP2RAGE_TI, MP2RAGE_ALPHA, MP2RAGE_TAU, MP2RAGE_TR,
                              MP2RAGE_SHOTS, st.inversion_efficiency)
    phase = _receive_phase(st)[st.inside][:, None]
    return SimSeries("MP2RAGE", "anat", "inv", "InversionTime", _round(MP2RAGE_TI),
                     {"RepetitionTimeExcitation": MP2RAGE_TAU,
                      "RepetitionTimePreparation": MP2RAGE_TR, "NumberShots": MP2RAGE_SHOTS,
                      "MRAcquisitionType": "3D", "PulseSequenceType": "MP2RAGE",
                      "ScanningSequence": "IR\\GR", "SequenceVariant": "SP\\MP"},
                     "MP2RAGE",
                     _inside(st, lambda t1, t2, t2s, pd, b1: mp2rage_signals(t1, prot, b1, pd)
                             * np.exp(1j * phase)),
                     per_volume={"FlipAngle": list(MP2RAGE_ALPHA)}, complex_data=True)


def _receive_phase(st: SessionState) -> np.ndarray:
    """A smooth receive phase (radians) over the grid (invented): a gentle tilt."""
    i, j, k = np.meshgrid(*[np.linspace(-1, 1, n) for n in st.labels.shape], indexing="ij")
    return 0.6 + 1.1 * i - 0.7 * j + 0.2 * k


SERIES_KINDS: tuple[Callable[[SessionState], SimSeries], ...] = (
    ir_series, vfa_series, dam_series, mese_series, megre_series)
# written in session METHODS_SESSION only (further methods, one session of each)
METHOD_KINDS: tuple[Callable[[SessionState], SimSeries], ...] = (
    looklocker_series, sr_series, afi_series, mp2rage_series)


def session_kinds(index: int) -> tuple[Callable[[SessionState], SimSeries], ...]:
    """The series kinds simulated in session ``index``."""
    return SERIES_KINDS + (METHOD_KINDS if index == METHODS_SESSION else ())


def clean_signals(st: SessionState, index: int = -1) -> dict[str, np.ndarray]:
    """Noise-free (signed) signals of every series by suffix, ``(x, y, z, n)``, of the
    session ``index`` (default: the series every session has).

    Volumes are in acquisition order (the order of the protocol lists above).
    """
    return {s.suffix: s.signals for s in (kind(st) for kind in session_kinds(index))}


def rician_magnitude(clean: np.ndarray, sigma: float, rng: np.random.Generator) -> np.ndarray:
    """|S + n_re + i·n_im| with n ~ N(0, σ²) on each part: Rician magnitude (Rice 1944)."""
    if sigma == 0.0:
        return np.abs(clean).astype(np.float32)
    noise = rng.standard_normal((2,) + clean.shape)
    return np.hypot(clean + sigma * noise[0], sigma * noise[1]).astype(np.float32)


def complex_noisy(clean: np.ndarray, sigma: float, rng: np.random.Generator) -> np.ndarray:
    """S + n_re + i·n_im with n ~ N(0, σ²) on each part, complex64."""
    if sigma == 0.0:
        return clean.astype(np.complex64)
    noise = rng.standard_normal((2,) + clean.shape)
    return (clean + sigma * (noise[0] + 1j * noise[1])).astype(np.complex64)


def _common_sidecar(st: SessionState, sigma: float, desc: str) -> dict:
    # the BIDS hardware keys say truthfully where the images come from: a simulation
    return {"MagneticFieldStrength": phantom.FIELD_T, "PhantomTemperature": st.temperature,
            "Site": SITE, "Scanner": SCANNER, "SeriesDescription": desc,
            "InstitutionName": SITE, "StationName": SCANNER,
            "Manufacturer": "none (simulated by relaxline)",
            "ManufacturersModelName": "relaxline simulate", "SoftwareVersions": package_version(),
            "SimulationNoiseSigma": round(sigma, 8),
            "GeneratedBy": f"relaxline simulate {package_version()} ({phantom.PHANTOM_NAME}, "
                           f"invented)"}


def _round(values) -> list[float]:
    return [round(float(v), 6) for v in values]


def series_paths(outdir: str | Path, index: int, suffix: str) -> list[Path]:
    """The NIfTI files of series ``suffix`` (e.g. ``"IRT1"``) of session ``index``."""
    ses_dir = Path(outdir) / f"sub-{phantom.SUBJECT_LABEL}" / f"ses-{session_label(index)}"
    return sorted(ses_dir.glob(f"*/*_{suffix}.nii.gz"))


def write_session(outdir: Path, index: int, options: SimOptions,
                  progress: Callable[[int], None] | None = None) -> list[Path]:
    """Simulate and write one session; returns the files written."""
    st = session_state(index, options)
    _, affine, _ = grid(options)
    sub = f"sub-{phantom.SUBJECT_LABEL}"
    ses = f"ses-{st.label}"
    stem = f"{sub}_{ses}"
    written: list[Path] = []

    def put(folder: Path, name: str, data: np.ndarray, sidecar: dict | None) -> None:
        path = folder / f"{name}.nii.gz"
        atomic_write_nifti(path, data, affine)
        written.append(path)
        if sidecar is not None:
            written.append(atomic_write_json(folder / f"{name}.json", sidecar))

    for kind in session_kinds(index):
        s = kind(st)
        sigma = 0.0 if math.isinf(options.snr) else float(np.abs(s.signals).max()) / options.snr
        noisy = complex_noisy if s.complex_data else rician_magnitude
        mag = noisy(s.signals, sigma, _rng(options.seed, index, s.suffix))
        folder = ensure_dir(outdir / sub / ses / s.datatype)
        common = {**_common_sidecar(st, sigma, s.description), **s.sidecar}
        if not s.split:
            put(folder, f"{stem}_{s.suffix}", mag, {**common, s.key: s.values,
                                                     **s.per_volume})
        for k, value in enumerate(s.values if s.split else ()):
            label = s.labels[k] if s.labels else str(k + 1)
            put(folder, f"{stem}_{s.entity}-{label}_{s.suffix}", mag[..., k],
                {**common, s.key: value, **{key: v[k] for key, v in s.per_volume.items()}})
        if progress:
            progress(1)

    import pandas as pd
    anat = ensure_dir(outdir / sub / ses / "anat")
    put(anat, f"{stem}_dseg", st.labels, None)
    written.append(atomic_write_tsv(anat / f"{stem}_dseg.tsv", pd.DataFrame(
        {"index": [v.label for v in phantom.VIALS], "name": [v.name for v in phantom.VIALS]})))

    pdir = ensure_dir(outdir / "phantom")
    truth_path = pdir / f"truth_{ses}"
    atomic_write_nifti(pdir / f"truth_{ses}_TB1map.nii.gz", st.b1.astype(np.float32), affine)
    written.append(pdir / f"truth_{ses}_TB1map.nii.gz")
    written.append(atomic_write_tsv(truth_path.with_suffix(".tsv"), truth_table(st)))
    written.append(atomic_write_json(truth_path.with_suffix(".json"), {
        "session": ses, "temperature": st.temperature, "shift_mm": list(st.shift_mm),
        "rotation_deg": st.rotation_deg, "inversion_efficiency": st.inversion_efficiency,
        "drift_factor": st.drift_factor, "snr": None if math.isinf(options.snr) else options.snr,
        "seed": options.seed,
        "note": "world = R(rotation)·p + shift for a phantom-frame point p (layout.tsv); "
                "R rotates counter-clockwise seen from +z."}))
    return written


def truth_table(st: SessionState):
    """Per-vial truth of a session: T1, T2, T2* (s), PD, temperature, B1 within the vial."""
    import pandas as pd
    rows = []
    for v in phantom.VIALS:
        sel = st.labels == v.label
        t1, t2 = v.at(st.temperature)
        f = st.drift_factor * st.vial_factors.get(v.label, 1.0)
        t1, t2 = t1 * f, t2 * f
        rows.append({"label": v.label, "name": v.name, "temperature": st.temperature,
                     "drift_factor": st.drift_factor, "T1": t1, "T2": t2,
                     "T2star": 1.0 / (1.0 / t2 + v.r2_prime), "PD": v.pd,
                     "B1_mean": float(st.b1[sel].mean()) if sel.any() else float("nan"),
                     "n_voxels": int(sel.sum())})
    return pd.DataFrame(rows)


README_TEXT = f"""\
# {phantom.PHANTOM_NAME} (simulated)

Simulated sessions of the relaxline demo phantom, an INVENTED test object (12 doped-gel
vials in a water-filled cylinder), written by `relaxline simulate`. Not data of any real
phantom, scanner or person. Site and scanner names are invented.

Every series is BIDS qMRI raw data: one 3D image per inversion time (`inv-`), flip angle
(`flip-`) or echo (`echo-`), with its sidecar giving that value in BIDS units (seconds,
degrees). Series: inversion recovery (`IRT1`), variable flip angle (`VFA`), multi-echo
spin echo (`MESE`), multi-echo gradient echo (`MEGRE`) in `anat/`; the double-angle B1
series (`TB1DAM`) in `fmap/`.

Beside the BIDS data (listed in `.bidsignore`):
- `anat/*_dseg.nii.gz` / `_dseg.tsv`: the vial label map of each session on the scan
  grid (the simulation's truth, used as the ROI definition);
- `phantom/`: the reference table, the vial layout and each session's ground truth.

`sub-{phantom.SUBJECT_LABEL}_sessions.tsv` gives each session's phantom temperature.

For quality assurance and research only; not a medical device.
"""
# LLT1/SRT1: relaxline's suffixes for Look-Locker and saturation recovery (not BIDS)
BIDSIGNORE = "phantom\n*_dseg.nii.gz\n*_dseg.tsv\n*_LLT1.*\n*_SRT1.*\n"


def _sessions_table(path: Path, states: list[SessionState]):
    """``sub-<label>_sessions.tsv`` rows for ``states``, merged with rows already there
    for other sessions (a rerun with fewer sessions keeps the others' rows)."""
    import pandas as pd
    rows = pd.DataFrame([{"session_id": f"ses-{st.label}",
                          "acq_time": f"{st.label[:4]}-{st.label[4:6]}-{st.label[6:]}T"
                                      f"{ACQ_CLOCK}",
                          "phantom_temperature": st.temperature} for st in states])
    if path.is_file():
        old = pd.read_csv(path, sep="\t", dtype=str)
        if "session_id" in old.columns:
            old = old[~old["session_id"].isin(rows["session_id"])]
            rows = pd.concat([old.astype(object), rows.astype(object)], ignore_index=True)
    return rows.sort_values("session_id", kind="stable").reset_index(drop=True)


def simulate(outdir: str | Path, options: SimOptions,
             progress: Callable[[int], None] | None = None) -> list[Path]:
    """Write ``options.sessions`` sessions plus the phantom files into ``outdir``.

    ``outdir`` becomes a BIDS raw dataset (``dataset_description.json``, README,
    ``.bidsignore``, ``sub-<label>_sessions.tsv``) that the official validator accepts.
    """
    options.validate()
    outdir = Path(outdir)
    if outdir.exists() and not outdir.is_dir():
        raise InputError(f"{outdir}: exists and is not a folder; give a folder for the "
                         f"simulated sessions.")
    ensure_dir(outdir)
    written = [atomic_write_json(outdir / "dataset_description.json", {
        "Name": f"{phantom.PHANTOM_NAME} (simulated, invented phantom)",
        "BIDSVersion": BIDS_VERSION, "DatasetType": "raw", "License": "CC0",
        "GeneratedBy": [{"Name": "relaxline simulate", "Version": package_version(),
                         "Description": "simulated sessions of an invented phantom"}]}),
        atomic_write_text(outdir / "README.md", README_TEXT),
        atomic_write_text(outdir / ".bidsignore", BIDSIGNORE)]
    pdir = ensure_dir(outdir / "phantom")
    written.append(atomic_write_tsv(pdir / "reference.tsv", phantom.reference_table()))
    written.append(atomic_write_tsv(pdir / "layout.tsv", phantom.layout_table()))
    for i in range(options.sessions):
        written += write_session(outdir, i, options, progress)
    sub = f"sub-{phantom.SUBJECT_LABEL}"
    table = outdir / sub / f"{sub}_sessions.tsv"
    written.append(atomic_write_tsv(table, _sessions_table(
        table, [session_state(i, options) for i in range(options.sessions)])))
    written.append(atomic_write_json(table.with_suffix(".json"), {
        "acq_time": {"Description": "date and time of the session (invented clock time)"},
        "phantom_temperature": {"Description": "phantom temperature during the session",
                                "Units": "oC"}}))
    return written
