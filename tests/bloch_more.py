"""Independent Bloch simulations of the sequences of looklocker, sr, afi, mp2rage, mese-multi.

Nothing here uses the project's forward models: each sequence is played event by event on
a magnetisation vector with the hard-pulse rotation and relaxing free precession of
``tests/test_bloch.py`` (themselves checked against scipy's ODE solver on the Bloch
equations there), with ideal spoiling (transverse magnetisation destroyed after each
readout, the assumption of every spoiled model here) and as many repetitions as needed to
reach the steady state. Signals are the transverse magnetisation right after the readout
pulse, along the axis the pulse tips Mz onto (signed; −M_y for a pulse about +x).
"""
from __future__ import annotations

import numpy as np

from test_bloch import free_precession, hard_pulse, isochromat_cpmg

# A spoiled gradient-echo cycle settles within a few T1; repeat preparations until the
# signals change less than this (relative), at most MAX_CYCLES times.
CONVERGED = 1e-12
MAX_CYCLES = 400


class Spin:
    """One isochromat on resonance: magnetisation (3,) with relaxation T1, T2 (s)."""

    def __init__(self, t1: float, t2: float = 0.05, m0: float = 1.0) -> None:
        self.t1, self.t2, self.m0 = float(t1), float(t2), float(m0)
        self.m = np.array([0.0, 0.0, self.m0])

    def wait(self, t: float) -> None:
        if t < -1e-12:
            raise ValueError(f"negative wait {t}")
        if t > 0:
            self.m = free_precession(self.m, 0.0, t, self.t1, self.t2, self.m0)

    def pulse(self, angle_deg: float, axis: str = "x") -> float:
        """Rotate; return the signal along the tipped axis (−M_y for +x) just after."""
        self.m = hard_pulse(self.m, axis, angle_deg)
        return float(-self.m[1] if axis == "x" else self.m[0])

    def spoil(self) -> None:
        self.m[:2] = 0.0


def _repeat(cycle, *args) -> np.ndarray:
    """Run ``cycle(*args)`` (returning the signals of one preparation) until steady."""
    last = None
    for _ in range(MAX_CYCLES):
        out = np.asarray(cycle(*args), float)
        if last is not None and np.max(np.abs(out - last)) <= CONVERGED * max(
                np.max(np.abs(out)), 1e-30):
            return out
        last = out
    return out


def spoiled_steady_state(t1: float, alpha_deg: float, tr: float) -> float:
    """Signal of a spoiled train at steady state (for the helper's own check)."""
    s = Spin(t1)

    def cycle():
        v = s.pulse(alpha_deg)
        s.spoil()
        s.wait(tr)
        return [v]
    return float(_repeat(cycle)[0])


def looklocker(t1: float, alpha_deg: float, tau: float, n_pulses: int, first: float,
               t_prep: float, inversion_deg: float = 180.0, m0: float = 1.0) -> tuple:
    """Inversion, a pause ``first`` to the first readout, then ``n_pulses`` readouts every
    ``tau``; next inversion ``t_prep`` after the previous one. Returns (times after the
    inversion, signals) of the steady-state cycle."""
    s = Spin(t1, m0=m0)
    times = first + tau * np.arange(n_pulses)

    def cycle():
        s.pulse(inversion_deg)
        s.spoil()
        s.wait(first)
        out = []
        for _ in range(n_pulses):
            out.append(s.pulse(alpha_deg))
            s.spoil()
            s.wait(tau)
        s.wait(t_prep - first - n_pulses * tau)
        return out
    return times, _repeat(cycle)


def saturation_recovery(t1: float, delays, sat_deg: float = 90.0, readout_deg: float = 90.0,
                        pre_wait: float = 0.5, m0: float = 1.0) -> np.ndarray:
    """One shot per delay: readout of the previous shot, ``pre_wait``, the saturation pulse
    (spoiled), the delay, the readout. Shots repeat in the listed order until steady."""
    s = Spin(t1, m0=m0)

    def cycle():
        out = []
        for td in delays:
            s.wait(pre_wait)
            s.pulse(sat_deg)
            s.spoil()
            s.wait(td)
            out.append(s.pulse(readout_deg))
            s.spoil()
        return out
    return _repeat(cycle)


def afi_pair(t1: float, alpha_deg: float, tr1: float, tr2: float, m0: float = 1.0
             ) -> np.ndarray:
    """Steady-state signals read in the TR1 and TR2 intervals of the interleaved sequence."""
    s = Spin(t1, m0=m0)

    def cycle():
        s1 = s.pulse(alpha_deg)
        s.spoil()
        s.wait(tr1)
        s2 = s.pulse(alpha_deg)
        s.spoil()
        s.wait(tr2)
        return [s1, s2]
    return _repeat(cycle)


def mp2rage_pair(t1: float, ti1: float, ti2: float, alphas: tuple[float, float], tau: float,
                 n: int, n_before: int, tr: float, inversion_deg: float = 180.0,
                 m0: float = 1.0) -> np.ndarray:
    """The two centre-line signals of an MP2RAGE cycle at steady state (inversion, block of
    ``n`` readouts of α1 with ``n_before`` before the centre line at TI1, block of α2 with
    its centre line at TI2, next inversion ``tr`` after this one)."""
    s = Spin(t1, m0=m0)

    def block(alpha: float, start: float, clock: float):
        s.wait(start - clock)
        centre = None
        for k in range(n):
            v = s.pulse(alpha)
            if k == n_before:
                centre = v
            s.spoil()
            s.wait(tau)
        return centre, start + n * tau

    def cycle():
        s.pulse(inversion_deg)
        s.spoil()
        g1, clock = block(alphas[0], ti1 - n_before * tau, 0.0)
        g2, clock = block(alphas[1], ti2 - n_before * tau, clock)
        s.wait(tr - clock)
        return [g1, g2]
    return _repeat(cycle)


def cpmg_pools(n_echoes: int, esp: float, pools, t1: float = 1.0, b1: float = 1.0,
               refocus_deg: float = 180.0) -> np.ndarray:
    """Echo train of a mixture: Σ fraction·(isochromat CPMG of its T2); ``pools`` is a list
    of (fraction, T2). 4·N + 3 isochromats spread over 2π: no dephasing order of an N-echo
    train aliases onto the echo (the count used against EPG in test_epg.py)."""
    return sum(f * isochromat_cpmg(n_echoes, esp, t2, t1, b1=b1, refocus_deg=refocus_deg,
                                   n_iso=4 * n_echoes + 3) for f, t2 in pools)
