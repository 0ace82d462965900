"""The loads model: base-motion profiles of the chassis under the tray bracket.

One of :data:`LOAD_CASES` (``rough_traverse``, ``motor_sweep``, ``curb_strike``), sampled on the
communication grid by :func:`base_motion` and held over each step by :func:`loads_component`
(the Python component of the loop) or by the loads FMU of :func:`.components.build_loads_fmu`
(the same table and the same arithmetic, :class:`.blocks.HeldProfile`).  The profiles are
invented for the jointfmu demo scenario (a rover driving); no measured or standardised spectrum
is claimed.

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..errors import InputError
from ..params.names import BASE_ACCELERATION
from .blocks import HeldProfile
from .component import PythonComponent

__all__ = [
    "G0",
    "LoadCase",
    "LOAD_CASES",
    "check_case",
    "n_steps",
    "base_motion",
    "loads_component",
]

#: Standard gravity [m/s^2] (a defined constant, CGPM 1901), to quote accelerations in g.
G0 = 9.80665


@dataclass(frozen=True)
class LoadCase:
    """One base-motion profile of the loads model.

    Attributes
    ----------
    name : str
        Identifier used on the command line and in result keys.
    description : str
        One line for tables and plots.
    duration : float
        Default simulated time [s].
    quick_duration : float
        Simulated time for ``--quick`` runs [s].
    """

    name: str
    description: str
    duration: float
    quick_duration: float


def _taper(n: int, dt: float, ramp: float) -> np.ndarray:
    """Raised-cosine fade-in and fade-out of ``ramp`` seconds, shape (n,)."""
    w = np.ones(n)
    m = min(n // 2, max(1, int(round(ramp / dt))))
    r = 0.5 - 0.5 * np.cos(np.pi * np.arange(m) / m)
    w[:m] = r
    w[n - m:] = r[::-1]
    return w


def _traverse_psd(f: np.ndarray) -> np.ndarray:
    """One-sided base-acceleration PSD of the invented 'rough_traverse' case [g^2/Hz].

    Shape chosen for the demo (not a standard's spectrum): +3 dB/octave from 5 to 20 Hz, a
    plateau of 0.02 g^2/Hz from 20 to 150 Hz (wheel-terrain impacts and suspension), -6 dB/octave
    from 150 to 500 Hz, nothing outside 5-500 Hz.  Overall about 2.2 g RMS.
    """
    f = np.asarray(f, dtype=float)
    g = np.zeros_like(f)
    lo = (f >= 5.0) & (f < 20.0)
    mid = (f >= 20.0) & (f <= 150.0)
    hi = (f > 150.0) & (f <= 500.0)
    g[lo] = 0.02 * f[lo] / 20.0
    g[mid] = 0.02
    g[hi] = 0.02 * (150.0 / f[hi]) ** 2
    return g


def _rough_traverse(t: np.ndarray, dt: float, seed: int) -> np.ndarray:
    # Spectral shaping of seeded white Gaussian noise (common practice for random-vibration
    # synthesis): the FFT of the noise is weighted by sqrt(PSD) and the result scaled to the
    # RMS the PSD integrates to.
    n = t.shape[0]
    rng = np.random.default_rng(seed)
    white = rng.standard_normal(n)
    f = np.fft.rfftfreq(n, dt)
    shaped = np.fft.irfft(np.fft.rfft(white) * np.sqrt(_traverse_psd(f)), n)
    fine = np.linspace(0.0, 500.0, 50001)
    target_rms = math.sqrt(float(np.trapezoid(_traverse_psd(fine), fine))) * G0
    std = float(np.std(shaped))
    a = shaped * (target_rms / std) if std > 0 else shaped
    return a * _taper(n, dt, 0.05)


def _motor_sweep(t: np.ndarray, dt: float, seed: int) -> np.ndarray:
    # Drive-motor spin-up seen at the bracket as an order sweeping exponentially (a logarithmic
    # sine sweep) from 40 to 320 Hz, 1.5 g amplitude: crosses tray modes 1-3.
    T = float(t[-1] + dt) if t.size else 1.0
    f1, f2 = 40.0, 320.0
    k = math.log(f2 / f1) / T
    phase = 2.0 * math.pi * f1 * (np.expm1(k * t)) / k
    return 1.5 * G0 * np.sin(phase) * _taper(t.shape[0], dt, 0.02)


def _curb_strike(t: np.ndarray, dt: float, seed: int) -> np.ndarray:
    # A wheel striking a rock edge: a half-sine acceleration pulse (the usual idealized shock
    # shape, common practice) of 25 g and 4 ms at t = 10 ms, then free ring-down.
    t0, width, peak = 0.010, 0.004, 25.0 * G0
    s = (t - t0) / width
    return np.where((s >= 0.0) & (s <= 1.0), peak * np.sin(np.pi * np.clip(s, 0.0, 1.0)), 0.0)


_PROFILES: dict[str, Callable[[np.ndarray, float, int], np.ndarray]] = {
    "rough_traverse": _rough_traverse,
    "motor_sweep": _motor_sweep,
    "curb_strike": _curb_strike,
}

#: The load cases of the demo scenario, by name (all invented).
LOAD_CASES: dict[str, LoadCase] = {
    "rough_traverse": LoadCase(
        "rough_traverse", "driving over rough regolith: random base acceleration, 5-500 Hz, "
        "about 2.2 g RMS", 2.0, 0.25),
    "motor_sweep": LoadCase(
        "motor_sweep", "drive-motor spin-up: log sine sweep 40-320 Hz at 1.5 g", 2.0, 0.3),
    "curb_strike": LoadCase(
        "curb_strike", "wheel strikes a rock edge: 25 g, 4 ms half-sine, then ring-down",
        0.5, 0.15),
}


def check_case(name: str) -> LoadCase:
    """The load case of that name; an :class:`~jointfmu.errors.InputError` listing the allowed
    names when there is none."""
    try:
        return LOAD_CASES[name]
    except KeyError:
        raise InputError(f"load case {name!r}: allowed are {', '.join(LOAD_CASES)}") from None


def base_motion(case: str, step: float, duration: float, seed: int = 0,
                level: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    """Base acceleration of a load case on the communication grid.

    Parameters
    ----------
    case : str
        A key of :data:`LOAD_CASES`.
    step : float
        Communication step h [s].
    duration : float
        Simulated time [s]; the grid has ``round(duration / h)`` steps.
    seed : int
        Seed of the random parts (same seed, same profile, bit for bit).
    level : float
        Scale factor on the profile [-].

    Returns
    -------
    (ndarray, ndarray), shapes (M+1,), (M+1,)
        Times ``t_k = k h`` [s] and the base acceleration held from ``t_k`` to ``t_{k+1}``
        [m/s^2] (the last value is never used for a step).
    """
    check_case(case)
    n = n_steps(step, duration)
    t = np.arange(n + 1) * float(step)
    a = _PROFILES[case](t, float(step), int(seed)) * float(level)
    return t, a


def n_steps(step: float, duration: float) -> int:
    """Number of communication steps ``round(duration / step)``, both checked.

    Raises
    ------
    InputError
        ``step`` outside 1e-7..1e-2 s, or ``duration`` outside ``step``..600 s.
    """
    if not (isinstance(step, (int, float)) and math.isfinite(step) and 1e-7 <= step <= 1e-2):
        raise InputError(f"communication step {step!r} s: allowed is 1e-7 <= step <= 1e-2 s")
    if not (isinstance(duration, (int, float)) and math.isfinite(duration)
            and step <= duration <= 600.0):
        raise InputError(f"duration {duration!r} s: allowed is step <= duration <= 600 s")
    return int(round(duration / step))


def loads_component(values, step: float) -> PythonComponent:
    """The loads model as a Python component of the loop: output ``base.acceleration`` [m/s^2].

    Parameters
    ----------
    values : ndarray, shape (M+1,)
        Base acceleration on the grid ``t_k = k step`` (:func:`base_motion`), each value held
        from ``t_k`` to ``t_{k+1}``.
    step : float
        Communication step [s] of that grid.

    Returns
    -------
    PythonComponent
        No inputs; the same arithmetic as the loads FMU (:class:`.blocks.HeldProfile`).
    """
    profile = HeldProfile(values, step)
    return PythonComponent("the loads model", {}, {BASE_ACCELERATION: lambda: profile.value},
                           profile.do_step)
