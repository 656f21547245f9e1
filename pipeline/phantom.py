"""The relaxline demo phantom: an INVENTED test object for the simulator.

Not a model of any commercial phantom. A water-filled cylinder (radius 80 mm,
axis along z) holds 12 doped-gel vials (radius 9 mm) whose T1 spans about
0.1–2.5 s and T2 about 0.01–0.6 s, in a lightly doped fill. All values are
invented but kept physically plausible (T2 ≤ T1, T2* < T2, T1 and T2 rising
with temperature).

This module is the single source of the phantom's numbers. The reference table
and layout written by ``relaxline simulate`` (and kept in
``sample_config/phantom/``) are produced from it.

Reference-table contract (TSV): ``label, name, T1, T2, T1_sd, T2_sd,
temperature, field, T1_coef, T2_coef`` — T1/T2 in seconds at ``temperature``
(°C) and ``field`` (T); ``*_coef`` are fractional changes per °C, so
value(T) = value·(1 + coef·(T − temperature)).

Layout contract (TSV): ``label, x_mm, y_mm, radius_mm`` — vial centres relative
to the phantom centre in the phantom frame (x towards the image's +x / right,
y towards +y / anterior, RAS+ world axes when the phantom is not rotated).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

PHANTOM_NAME = "relaxline demo phantom"
SUBJECT_LABEL = "relaxlinedemo"  # BIDS sub-<label>
CYLINDER_RADIUS_MM = 80.0
VIAL_RADIUS_MM = 9.0
REFERENCE_TEMPERATURE_C = 20.0
FIELD_T = 3.0
# Static dephasing R2' = 1/T2* − 1/T2 (1/s): gel vials dephase more than the liquid fill.
R2_PRIME_VIAL = 8.0
R2_PRIME_FILL = 3.0


@dataclass(frozen=True)
class Compartment:
    """Relaxation properties of one compartment at the reference temperature."""

    label: int
    name: str
    t1: float        # s
    t2: float        # s
    pd: float        # proton density relative to pure water
    t1_coef: float   # fractional change per °C
    t2_coef: float   # fractional change per °C
    r2_prime: float  # 1/s

    def at(self, temperature: float) -> tuple[float, float]:
        """(T1, T2) at ``temperature`` °C: value·(1 + coef·(T − T_ref))."""
        dt = temperature - REFERENCE_TEMPERATURE_C
        return self.t1 * (1.0 + self.t1_coef * dt), self.t2 * (1.0 + self.t2_coef * dt)


# Invented doped-gel vials, ordered by T1. Coefficients grow as the dopant
# concentration falls (more water-like), a common-practice trend, invented numbers.
_VIAL_VALUES = [
    # T1 (s), T2 (s), PD, T1_coef, T2_coef
    (0.105, 0.012, 0.90, 0.0080, 0.0060),
    (0.180, 0.025, 0.91, 0.0085, 0.0065),
    (0.260, 0.040, 0.92, 0.0090, 0.0070),
    (0.350, 0.055, 0.93, 0.0095, 0.0075),
    (0.480, 0.075, 0.94, 0.0100, 0.0080),
    (0.620, 0.095, 0.95, 0.0110, 0.0085),
    (0.800, 0.130, 0.96, 0.0120, 0.0090),
    (1.000, 0.170, 0.97, 0.0130, 0.0100),
    (1.250, 0.230, 0.97, 0.0140, 0.0110),
    (1.550, 0.300, 0.98, 0.0155, 0.0120),
    (1.900, 0.420, 0.98, 0.0170, 0.0135),
    (2.450, 0.580, 0.99, 0.0190, 0.0150),
]

VIALS: tuple[Compartment, ...] = tuple(
    Compartment(label=i + 1, name=f"vial{i + 1:02d}", t1=t1, t2=t2, pd=pd, t1_coef=c1,
                t2_coef=c2, r2_prime=R2_PRIME_VIAL)
    for i, (t1, t2, pd, c1, c2) in enumerate(_VIAL_VALUES))

FILL = Compartment(label=0, name="fill", t1=2.000, t2=1.200, pd=1.00, t1_coef=0.0200,
                   t2_coef=0.0180, r2_prime=R2_PRIME_FILL)

# Reference uncertainty (1 SD) quoted with the invented values.
T1_SD_FRACTION = 0.02
T2_SD_FRACTION = 0.03


def _ring(radius_mm: float, angles_deg: list[float]) -> list[tuple[float, float]]:
    return [(round(radius_mm * math.cos(math.radians(a)), 1),
             round(radius_mm * math.sin(math.radians(a)), 1)) for a in angles_deg]


# Outer ring: 8 vials every 40° from 90° (a 80° gap centred on 50°); inner ring of
# 4 at irregular angles. No rotation or mirror maps the layout onto itself, so an
# automatic localiser can tell orientation and handedness from positions alone.
_CENTRES = (_ring(52.0, [90.0 + 40.0 * k for k in range(8)])
            + _ring(24.0, [90.0, 170.0, 230.0, 300.0]))


def reference_table():
    """The reference table (pandas DataFrame, contract columns)."""
    import pandas as pd
    rows = [{"label": v.label, "name": v.name, "T1": v.t1, "T2": v.t2,
             "T1_sd": round(T1_SD_FRACTION * v.t1, 5), "T2_sd": round(T2_SD_FRACTION * v.t2, 5),
             "temperature": REFERENCE_TEMPERATURE_C, "field": FIELD_T,
             "T1_coef": v.t1_coef, "T2_coef": v.t2_coef} for v in VIALS]
    return pd.DataFrame(rows, columns=["label", "name", "T1", "T2", "T1_sd", "T2_sd",
                                       "temperature", "field", "T1_coef", "T2_coef"])


def layout_table():
    """The layout table (pandas DataFrame: label, x_mm, y_mm, radius_mm)."""
    import pandas as pd
    return pd.DataFrame([{"label": v.label, "x_mm": x, "y_mm": y, "radius_mm": VIAL_RADIUS_MM}
                         for v, (x, y) in zip(VIALS, _CENTRES)],
                        columns=["label", "x_mm", "y_mm", "radius_mm"])


def world_to_phantom(x: np.ndarray, y: np.ndarray, shift_mm: tuple[float, float],
                     rotation_deg: float) -> tuple[np.ndarray, np.ndarray]:
    """Phantom-frame coordinates of world points.

    The phantom frame is the world frame rotated by ``rotation_deg`` (counter-clockwise
    seen from +z) and moved by ``shift_mm``: world = R(θ)·p + shift.
    """
    th = math.radians(rotation_deg)
    dx, dy = x - shift_mm[0], y - shift_mm[1]
    c, s = math.cos(th), math.sin(th)
    return c * dx + s * dy, -s * dx + c * dy


def label_map(x: np.ndarray, y: np.ndarray, shift_mm: tuple[float, float],
              rotation_deg: float) -> tuple[np.ndarray, np.ndarray]:
    """Vial labels (0 outside vials) and the inside-cylinder mask at world points (mm).

    A voxel belongs to a vial when its centre lies within the vial radius (no partial
    volume), so the label map and the simulated images agree voxel for voxel.
    """
    px, py = world_to_phantom(x, y, shift_mm, rotation_deg)
    inside = px ** 2 + py ** 2 <= CYLINDER_RADIUS_MM ** 2
    labels = np.zeros(np.shape(px), dtype=np.int16)
    for row in layout_table().itertuples(index=False):
        labels[(px - row.x_mm) ** 2 + (py - row.y_mm) ** 2 <= row.radius_mm ** 2] = row.label
    return labels, inside
