"""Look-Locker and saturation-recovery signal equations (pure, vectorised numpy).

Broadcasting as in :mod:`fitting.signals`: the acquisition time (TI after the inversion,
or the delay after the saturation pulse) is a 1D array on the last axis; the parameters
broadcast to a shape B; results are B + (M,). Times in seconds, angles in degrees.

Look-Locker (inversion recovery sampled by a continuous train of small-angle readouts)
-------------------------------------------------------------------------------------
Every readout pulse of angle α tips Mz to Mz·cos α, and between pulses (spacing τ) Mz
relaxes towards M0 with T1. The deviation from the driven steady state therefore decays
by e^(−τ/T1)·cos α per pulse: the recovery is exponential with the *apparent* time T1*,

    1/T1* = 1/T1 − ln(cos α)/τ,

towards the apparent equilibrium M0* < M0, and the sampled signal is

    S(TI) = A − B·e^(−TI/T1*)

(Deichmann & Haase 1992, J Magn Reson 96:608). With an ideal inversion and the readout
starting right after it, A = M0*, B = M0 + M0* and, in the limit of continuous readout
(τ ≪ T1), M0*/M0 = T1*/T1, hence the published correction

    T1 = T1*·(B/A − 1)

which is also the correction of the modified sequences used for cardiac T1 with pauses
and several inversions (Messroghli et al. 2004, Magn Reson Med 52:141). It needs no
readout parameters, but it is biased when the inversion is imperfect or the first image
comes after a pause. When the readout train is known (angle α, pulse spacing τ, and B1),
T1 follows from T1* alone (first equation), whatever the inversion did.

Saturation recovery
-------------------
A saturation pulse leaves Mz = (1 − η)·M0 (η = 1: perfect saturation), which recovers
with T1 for a delay TD before the readout:

    S(TD) = M0·(1 − η·e^(−TD/T1))

(the three-parameter form of Chow et al. 2014, Magn Reson Med 71:2082). Because the
saturation resets the history, no repetition-time term appears.
"""
from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from fitting.signals import _prep


def ll_t1_from_ab(t1star: ArrayLike, a: ArrayLike, b: ArrayLike) -> np.ndarray:
    """The Look-Locker correction T1 = T1*·(B/A − 1) (Deichmann & Haase 1992,
    J Magn Reson 96:608; Messroghli et al. 2004, Magn Reson Med 52:141)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(t1star, float) * (np.asarray(b, float) / np.asarray(a, float) - 1.0)


def ll_signal(ti: ArrayLike, t1: ArrayLike, m0: ArrayLike, t1star: ArrayLike) -> np.ndarray:
    """Look-Locker recovery in the parameters of the published correction, signed.

    A = M0·T1*/T1 and B = M0 + A, so that T1*·(B/A − 1) = T1 (see the module docstring):

        S(TI) = M0·[T1*/T1 − (1 + T1*/T1)·e^(−TI/T1*)]
    """
    ti, (t1, m0, t1s) = _prep(ti, t1, m0, t1star)
    r = t1s / t1
    return m0 * (r - (1.0 + r) * np.exp(-ti / t1s))


def ll_t1star(t1: ArrayLike, alpha_deg: ArrayLike, tau: ArrayLike) -> np.ndarray:
    """Apparent T1* of a continuous readout: 1/T1* = 1/T1 − ln(cos α)/τ (Deichmann &
    Haase 1992). α is the actual readout angle (nominal × B1), τ the pulse spacing (s)."""
    t1, a, tau = np.broadcast_arrays(*map(lambda v: np.asarray(v, float), (t1, alpha_deg, tau)))
    with np.errstate(divide="ignore", invalid="ignore"):
        return 1.0 / (1.0 / t1 - np.log(np.cos(np.deg2rad(a))) / tau)


def ll_t1_from_readout(t1star: ArrayLike, alpha_deg: ArrayLike, tau: ArrayLike) -> np.ndarray:
    """T1 from T1* and the readout train: 1/T1 = 1/T1* + ln(cos α)/τ (Deichmann & Haase
    1992); NaN where the train would saturate faster than T1* allows."""
    t1s, a, tau = np.broadcast_arrays(*map(lambda v: np.asarray(v, float), (t1star, alpha_deg,
                                                                          tau)))
    with np.errstate(divide="ignore", invalid="ignore"):
        rate = 1.0 / t1s + np.log(np.cos(np.deg2rad(a))) / tau
        return np.where(rate > 0, 1.0 / rate, np.nan)


def ll_steady_fraction(t1: ArrayLike, alpha_deg: ArrayLike, tau: ArrayLike) -> np.ndarray:
    """Mz/M0 just before each pulse in the driven steady state of a spoiled train:
    (1 − E1)/(1 − E1·cos α), E1 = e^(−τ/T1) (Deichmann & Haase 1992)."""
    t1, a, tau = np.broadcast_arrays(*map(lambda v: np.asarray(v, float), (t1, alpha_deg, tau)))
    e1 = np.exp(-tau / t1)
    return -np.expm1(-tau / t1) / (1.0 - e1 * np.cos(np.deg2rad(a)))


def ll_signal_readout(ti: ArrayLike, t1: ArrayLike, m0: ArrayLike, eff: ArrayLike,
                      alpha_deg: ArrayLike, tau: ArrayLike) -> np.ndarray:
    """Look-Locker recovery with a known readout train (angle α actual, spacing τ), signed.

    Mz just before the readout pulses recovers from −eff·M0 (``eff``: apparent inversion
    efficiency, 1 for an ideal inversion followed at once by the train) towards the
    steady state m_ss·M0 with the apparent time T1* of :func:`ll_t1star`:

        S(TI) = M0·[m_ss − (m_ss + eff)·e^(−TI/T1*)],  m_ss = (1 − E1)/(1 − E1·cos α)

    (Deichmann & Haase 1992, J Magn Reson 96:608). The readout's sin α is folded into M0.
    """
    ti, (t1, m0, eff, a, tau) = _prep(ti, t1, m0, eff, alpha_deg, tau)
    mss = ll_steady_fraction(t1, a, tau)
    return m0 * (mss - (mss + eff) * np.exp(-ti / ll_t1star(t1, a, tau)))


def sr_signal(td: ArrayLike, t1: ArrayLike, m0: ArrayLike, eff: ArrayLike = 1.0) -> np.ndarray:
    """Saturation recovery S(TD) = M0·(1 − η·e^(−TD/T1)), η = ``eff`` the saturation
    efficiency (1: Mz = 0 after the pulse; Chow et al. 2014, Magn Reson Med 71:2082)."""
    td, (t1, m0, eff) = _prep(td, t1, m0, eff)
    return m0 * (1.0 - eff * np.exp(-td / t1))


# --------------------------------------------------------------------------- whole cycles
# Longitudinal magnetisation under spoiled pulses and relaxation evolves by affine maps
# Mz → a·Mz + b·M0; a sequence is their composition and its steady state b/(1 − a).

def relax_map(t, t1):
    """Relaxation over t: (e^(−t/T1), 1 − e^(−t/T1))."""
    e = np.exp(-t / t1)
    return e, 1.0 - e


def train_map(k, alpha_rad, tau: float, t1):
    """k (an integer, or an array broadcasting with α and T1) spoiled excitations of angle
    α (radians), each followed by τ of relaxation:
    (q^k, (1 − E)·(1 − q^k)/(1 − q)) with E = e^(−τ/T1), q = E·cos α."""
    e = np.exp(-tau / t1)
    q = e * np.cos(alpha_rad)
    qk = q ** k
    with np.errstate(divide="ignore", invalid="ignore"):
        geo = np.where(np.abs(1.0 - q) > 1e-12, (1.0 - qk) / (1.0 - q), np.asarray(k, float))
    return qk, (1.0 - e) * geo


def compose(f, g):
    """The map g∘f (first f, then g) of two affine maps (a, b)."""
    return g[0] * f[0], g[0] * f[1] + g[1]


def ll_cycle_signals(t1: ArrayLike, m0: ArrayLike, alpha_deg: ArrayLike, tau: float,
                     n_images: int, first: float, t_prep: float, eff: float = 1.0
                     ) -> np.ndarray:
    """Signed signals of the steady-state cycle of a continuous Look-Locker acquisition.

    Every ``t_prep`` an inversion (Mz → −eff·Mz), after ``first`` the first of ``n_images``
    spoiled readouts of angle α spaced τ, then recovery until the next inversion. Readout k
    (at TI = first + k·τ) gives sin α·Mz just before it. Unlike :func:`ll_signal` (one
    recovery from a known start), this includes the pause before the train and the
    incomplete recovery between inversions. Shape B + (n_images,).
    """
    t1, m0, a = np.broadcast_arrays(*(np.asarray(v, float) for v in (t1, m0, alpha_deg)))
    ar = np.deg2rad(a)
    start = compose((-eff * np.ones_like(t1), np.zeros_like(t1)), relax_map(first, t1))
    cycle = compose(compose(start, train_map(n_images, ar, tau, t1)),
                    relax_map(t_prep - first - n_images * tau, t1))
    mstar = cycle[1] / (1.0 - cycle[0])
    k = np.arange(n_images)
    before = train_map(k, ar[..., None], tau, t1[..., None])        # k pulses done
    mz = before[0] * (start[0] * mstar + start[1])[..., None] + before[1]
    return m0[..., None] * np.sin(ar)[..., None] * mz


def sr_efficiency(t1: ArrayLike, sat_deg: ArrayLike, wait: float) -> np.ndarray:
    """Saturation efficiency η = 1 − cos θ·(1 − e^(−wait/T1)) of a saturation pulse θ that
    follows a 90° readout (which leaves Mz = 0) after ``wait``: Mz then recovers to
    M0·(1 − e^(−wait/T1)) and the pulse keeps cos θ of it (the η of :func:`sr_signal`)."""
    t1, th = np.broadcast_arrays(np.asarray(t1, float), np.asarray(sat_deg, float))
    return 1.0 - np.cos(np.deg2rad(th)) * -np.expm1(-wait / t1)
