"""The starting estimate of one mode: micro-slip closed forms fitted to the measured curves.

In micro-slip the records determine only ``f0``, ``zeta``, ``chi`` and Segalman's ``R``
(physics sheet sec. 9): the dissipation per cycle is ``D = 4 R A^(chi+3) / ((chi+2)(chi+3))``
(D. J. Segalman, "A four-parameter Iwan model for lap-type joints", J. Appl. Mech.
72(5):752-760, 2005) and the first-harmonic stiffness ``Kt - C1 R A^(chi+1)`` (physics sheet
sec. 5, [derived]).  The free-decay damping ``zeta_rd`` and the first-harmonic frequency are taken
from :func:`jointfmu.analysis.characterize.mode_curves`, which evaluates exactly these closed
forms; a joint with any ``Kt`` share and ``beta`` gives the same curves below the onset of
macro-slip, so a stiff joint without point mass (:data:`MICRO_SHARE`, beta 0) stands for all of
them here.

The fit is a weighted least-squares fit of those curves to the damping and frequency the records
show (:func:`jointfmu.identify.process.curves`), started from a grid in ``chi`` on which the
low-amplitude asymptotes (``omega^2 = omega0^2 - C1 R A^(chi+1)``,
``zeta = zeta_v + 2 R A^(chi+1) / (pi (chi+2)(chi+3) omega0^2)``, physics sheet sec. 5) are linear
in the other unknowns.  It is a start: the closed forms are several percent off near macro-slip
(physics sheet sec. 9), which the fit to simulated ring-downs (:mod:`.fit`) corrects.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

from ..analysis.characterize import c1_coefficient, mode_curves
from ..params import JointParams, Mode
from ..physics.iwan import slip_force_from_R

__all__ = ["MICRO_SHARE", "ClosedFormFit", "micro_mode", "fit_micro_slip"]

#: Joint share of the modal stiffness used to stand for "micro-slip only" (its onset of
#: macro-slip lies as high as the micro-slip data allow).
MICRO_SHARE = 0.95
_TWO_PI = 2.0 * math.pi


def micro_mode(f0: float, zeta: float, chi: float, R: float, label: str = "m",
               share: float = MICRO_SHARE, beta: float = 0.0) -> Mode:
    """A mode with these micro-slip values and a joint of the given ``Kt`` share and ``beta``
    (``Fs`` solved from ``R`` by :func:`jointfmu.physics.iwan.slip_force_from_R`)."""
    kt = share * (_TWO_PI * f0) ** 2
    return Mode(label, f0, zeta, JointParams(slip_force_from_R(R, kt, chi, beta), kt, chi, beta))


@dataclass(frozen=True)
class ClosedFormFit:
    """Closed-form micro-slip estimate of one mode.

    Attributes
    ----------
    f0 : float
        Low-amplitude natural frequency [Hz].
    zeta : float
        Viscous damping ratio [-].
    chi : float
        Iwan exponent [-].
    R : float
        Segalman's density coefficient [N/sqrt(kg) per (m sqrt(kg))^(chi+2)].
    rms_zeta, rms_freq : float
        RMS relative misfit of the damping and the frequency curves [-].
    """

    f0: float
    zeta: float
    chi: float
    R: float
    rms_zeta: float
    rms_freq: float

    def mode(self, label: str = "m") -> Mode:
        return micro_mode(self.f0, self.zeta, self.chi, self.R, label)


def _pool(curve_list, per_decade: int = 24, a_max: float | None = None):
    """Resample each curve on a grid in log amplitude, so each decade weighs alike."""
    A, z, f = [], [], []
    for c in curve_list:
        lo, hi = float(np.min(c.amplitude)), float(np.max(c.amplitude))
        if a_max is not None:
            hi = min(hi, a_max)
        if not hi > lo > 0:
            continue
        n = max(4, int(per_decade * math.log10(hi / lo)))
        grid = np.geomspace(lo, hi, n)
        zz, ff = c.at(grid)
        ok = np.isfinite(zz) & np.isfinite(ff)
        A.append(grid[ok])
        z.append(zz[ok])
        f.append(ff[ok])
    if not A:
        raise ValueError("no curve with a usable amplitude range")
    return np.concatenate(A), np.concatenate(z), np.concatenate(f)


def _linear_start(A, z, f, chi):
    """Asymptotic forms linear in (omega0^2, R) and (zeta_v, R) for fixed chi; least squares."""
    e = chi + 1.0
    x = A**e
    w2 = (_TWO_PI * f) ** 2
    # omega^2 = omega0^2 - C1 R x
    M = np.column_stack([np.ones_like(x), -c1_coefficient(chi) * x])
    (w02, R_f), *_ = np.linalg.lstsq(M, w2, rcond=None)
    if not w02 > 0:
        w02 = float(np.max(w2))
    k = 2.0 / (math.pi * (chi + 2.0) * (chi + 3.0) * w02)
    M = np.column_stack([np.ones_like(x), k * x])
    (zv, R_z), *_ = np.linalg.lstsq(M, z, rcond=None)
    R = R_z if R_z > 0 else (R_f if R_f > 0 else 1e-12 * w02)
    return math.sqrt(w02) / _TWO_PI, max(float(zv), 0.0), float(R)


def _model(p, A):
    f0, zeta, chi, lnR = p
    m = micro_mode(f0, zeta, chi, math.exp(lnR))
    cv = mode_curves(m, A)
    return cv.zeta_rd, cv.freq_1, cv.phimax


def fit_micro_slip(curve_list, f_hint: float, a_max: float | None = None) -> ClosedFormFit:
    """Fit the micro-slip closed forms to measured curves (see the module docstring).

    Parameters
    ----------
    curve_list : list of process.ModeCurves
        One mode's curves from the records (modal signals).
    f_hint : float
        Approximate frequency [Hz].
    a_max : float, optional
        Use the curves only below this amplitude (below a suspected onset of macro-slip).

    Raises
    ------
    ValueError
        When no curve has a usable amplitude range.
    """
    try:
        A, z, f = _pool(curve_list, a_max=a_max)
    except ValueError:
        A, z, f = _pool(curve_list)
    zs = max(float(np.median(np.abs(z))), 1e-5)
    fs_ = float(np.median(f))

    def resid(p):
        try:
            zr, fr, pm = _model(p, A)
        except Exception:  # noqa: BLE001 - an inadmissible trial point: a large misfit
            return np.full(2 * A.size, 1e3)
        return np.concatenate([(zr - z) / (0.01 * zs), (fr - f) / (1e-4 * fs_)])

    best = None
    for chi in (-0.8, -0.6, -0.4, -0.2, -0.05):
        f0, zv, R = _linear_start(A, z, f, chi)
        if not (0.5 * f_hint < f0 < 2.0 * f_hint):
            f0 = float(np.max(f))
        p0 = np.array([f0, min(zv, 0.49), chi, math.log(R)])
        try:
            sol = least_squares(resid, p0, bounds=([0.5 * f0, 0.0, -0.95, -np.inf],
                                                   [2.0 * f0, 0.5, 0.0, np.inf]),
                                x_scale=[1e-4 * f0, 0.01 * zs + 1e-6, 0.05, 0.1], max_nfev=60)
        except Exception:  # noqa: BLE001 - try the next start
            continue
        if best is None or sol.cost < best.cost:
            best = sol
    if best is None:
        raise ValueError("the closed-form fit failed from every start")
    f0, zeta, chi, lnR = best.x
    zr, fr, _ = _model(best.x, A)
    return ClosedFormFit(float(f0), float(zeta), float(chi), float(math.exp(lnR)),
                         float(np.sqrt(np.mean((zr / z - 1.0) ** 2))),
                         float(np.sqrt(np.mean((fr / f - 1.0) ** 2))))
