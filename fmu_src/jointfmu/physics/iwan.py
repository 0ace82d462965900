"""The four-parameter Iwan joint: closed forms and an exact single-joint element.

Source: D. J. Segalman, "A four-parameter Iwan model for lap-type joints", J. Appl. Mech.
72(5):752-760, 2005.  Parameters: slip force ``Fs``, stiffness at zero load ``Kt``, power-law
exponent ``chi`` (-1 < chi <= 0) and ``beta`` >= 0 (the weight of the point mass of the slider
density at phimax).  Formulas and their tags are on the project's physics sheet; each is cited
beside its function.  All quantities are in whatever consistent units the caller uses (in
jointfmu, mass-normalized modal coordinates).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..params import JointParams  # validates the ranges with the project's messages
from . import kernel as K

__all__ = [
    "JointConstants",
    "joint_constants",
    "slip_force_from_R",
    "kernel_table",
    "backbone",
    "backbone_tangent",
    "dissipation_per_cycle",
    "IwanJoint",
]


@dataclass(frozen=True)
class JointConstants:
    """Density parameters of the slider distribution rho(phi) = R phi^chi + S delta(phi - phimax)."""

    phimax: float
    R: float
    S: float


def joint_constants(Fs, Kt, chi, beta) -> JointConstants:
    """phimax, R, S from (Fs, Kt, chi, beta).

    Segalman 2005 (physics sheet sec. 1, inverse form), with a = (chi+1)/(chi+2):
    phimax = Fs (1+beta) / (Kt (beta + a)),  R = Fs (chi+1) / (phimax^(chi+2) (beta + a)),
    S = beta Kt / (1 + beta).
    """
    a = (chi + 1.0) / (chi + 2.0)
    phimax = Fs * (1.0 + beta) / (Kt * (beta + a))
    R = Fs * (chi + 1.0) / (phimax ** (chi + 2.0) * (beta + a))
    S = beta * Kt / (1.0 + beta)
    return JointConstants(phimax, R, S)


def slip_force_from_R(R, Kt, chi, beta):
    """The slip force Fs of the joint with micro-slip coefficient ``R`` and ``Kt``, ``chi``, ``beta``.

    Segalman 2005 inverse relations (physics sheet secs. 1 and 9), solved for Fs:
    R = (chi+1) Kt^(chi+2) (beta + a)^(chi+1) / (Fs^(chi+1) (1+beta)^(chi+2)), a = (chi+1)/(chi+2),
    so Fs = [(chi+1) Kt^(chi+2) (beta + a)^(chi+1) / (R (1+beta)^(chi+2))]^(1/(chi+1)).
    ``joint_constants(slip_force_from_R(R, ...), Kt, chi, beta).R == R`` (to rounding).
    """
    a = (chi + 1.0) / (chi + 2.0)
    return ((chi + 1.0) * Kt ** (chi + 2.0) * (beta + a) ** (chi + 1.0)
            / (R * (1.0 + beta) ** (chi + 2.0))) ** (1.0 / (chi + 1.0))


def kernel_table(Fs, Kt, chi, beta, Kinf, merge_tol: float) -> np.ndarray:
    """The constant table the kernel reads per joint, shape (N, kernel.NJC).

    Parameters
    ----------
    Fs, Kt, chi, beta, Kinf : array_like, shape (N,)
        Joint parameters and the stiffness that stays in macro-slip (1/s^2 for a modal joint).
    merge_tol : float
        Reversal pairs whose force effect is below ``merge_tol * Fs`` are dropped.

    The density constants come from :func:`joint_constants` (the one place Segalman's inversion
    is written; :mod:`.reference` keeps its own on purpose, as an independent check); the rest
    are the coefficients of the closed-form force, dissipation and stored energy of
    physics sheet secs. 2-4.
    """
    Fs, Kt, chi, beta = (np.asarray(v, dtype=float) for v in (Fs, Kt, chi, beta))
    c = joint_constants(Fs, Kt, chi, beta)
    phimax, R = c.phimax, c.R
    jc = np.zeros((Fs.shape[0], K.NJC))
    jc[:, K.KT] = Kt
    jc[:, K.FS] = Fs
    jc[:, K.CHI] = chi
    jc[:, K.PHIMAX] = phimax
    jc[:, K.CF] = R / ((chi + 1.0) * (chi + 2.0))
    jc[:, K.CD] = R / ((chi + 2.0) * (chi + 3.0))
    jc[:, K.CUV] = R / ((chi + 1.0) * (chi + 3.0))
    jc[:, K.CK] = R / (chi + 1.0)
    jc[:, K.E2] = chi + 2.0
    jc[:, K.CKC] = -jc[:, K.CK] * (jc[:, K.E2] - 1.0)
    pm = phimax ** (chi + 2.0)
    jc[:, K.DVPM] = jc[:, K.CD] * phimax * pm
    jc[:, K.UVPM] = 0.5 * Kt * phimax**2 - jc[:, K.CUV] * phimax * pm
    jc[:, K.MERGE_TOL] = merge_tol * Fs
    jc[:, K.KINF] = Kinf
    jc[:, K.SPOINT] = c.S
    return jc


def backbone(u, Fs, Kt, chi, beta):
    """Virgin-loading force F_bb(u), odd in u.

    F_bb(u) = Kt u - R u^(chi+2) / ((chi+1)(chi+2)) for 0 <= u < phimax, Fs beyond
    (physics sheet sec. 2, derived from Segalman 2005 eq. for the force of the density).
    """
    c = joint_constants(Fs, Kt, chi, beta)
    u = np.asarray(u, dtype=float)
    x = np.abs(u)
    xs = np.minimum(x, c.phimax)
    f = np.where(x < c.phimax, Kt * xs - c.R * xs ** (chi + 2.0) / ((chi + 1.0) * (chi + 2.0)), Fs)
    return np.sign(u) * f


def backbone_tangent(u, Fs, Kt, chi, beta):
    """Tangent stiffness of the virgin curve: Kt - R |u|^(chi+1)/(chi+1) below phimax, 0 beyond."""
    c = joint_constants(Fs, Kt, chi, beta)
    x = np.abs(np.asarray(u, dtype=float))
    xs = np.minimum(x, c.phimax)
    return np.where(x < c.phimax, Kt - c.R * xs ** (chi + 1.0) / (chi + 1.0), 0.0)


def dissipation_per_cycle(A, Fs, Kt, chi, beta):
    """Energy dissipated per symmetric displacement cycle of amplitude A.

    Segalman 2005 (physics sheet sec. 4): D = 4 R A^(chi+3) / ((chi+2)(chi+3)) for A <= phimax,
    D(phimax) + 4 Fs (A - phimax) beyond.
    """
    c = joint_constants(Fs, Kt, chi, beta)
    A = np.abs(np.asarray(A, dtype=float))
    As = np.minimum(A, c.phimax)
    d = 4.0 * c.R * As ** (chi + 3.0) / ((chi + 2.0) * (chi + 3.0))
    return d + 4.0 * Fs * np.maximum(A - c.phimax, 0.0)


class IwanJoint:
    """One exact four-parameter Iwan joint driven by a displacement history.

    The force is evaluated in closed form from the backbone and the stack of reversal points
    (Masing's rules with wiping-out, :mod:`jointfmu._kernel`); no slider discretization.  The
    displacement path is taken as piecewise linear between the values given to :meth:`move`.

    Parameters
    ----------
    Fs, Kt, chi, beta : float
        Joint parameters.
    merge_tol : float
        Reversal pairs whose force effect is below ``merge_tol * Fs`` are dropped.
    capacity : int
        Reversal stack size.
    u0 : float
        Start on the virgin curve at ``u0``.
    """

    def __init__(self, Fs, Kt, chi, beta, merge_tol=1e-10, capacity=4096, u0=0.0):

        JointParams(Fs=float(Fs), Kt=float(Kt), chi=float(chi), beta=float(beta))
        self._jc = kernel_table([Fs], [Kt], [chi], [beta], [0.0], merge_tol)
        self._js = np.zeros((1, K.NJS))
        self._stk = np.zeros((1, int(capacity), 3))
        self._bk = np.zeros_like(self._stk)
        K.joint_set_virgin(0, float(u0), self._jc, self._js)
        self._kt = float(Kt)

    def move(self, u: float) -> float:
        """Move to displacement ``u``; returns the joint force there."""
        self._js[0, K.LOW] = self._js[0, K.DEPTH]
        self._kt = K.joint_move(0, float(u), self._jc, self._js, self._stk, self._bk)
        return float(self._js[0, K.F_PREV])

    def history(self, u) -> np.ndarray:
        """Forces along a displacement history, shape like ``u``."""
        return np.array([self.move(x) for x in np.asarray(u, dtype=float).ravel()]).reshape(np.shape(u))

    @property
    def force(self) -> float:
        return float(self._js[0, K.F_PREV])

    @property
    def tangent(self) -> float:
        """Tangent stiffness dF/du at the current point, along the current direction."""
        return self._kt

    @property
    def dissipated(self) -> float:
        """Energy dissipated since the start."""
        return float(self._js[0, K.D_PREV])

    @property
    def stored(self) -> float:
        """Elastic energy held in the sliders' springs now."""
        return float(self._js[0, K.E_PREV])

    @property
    def depth(self) -> int:
        """Reversal points held."""
        return int(self._js[0, K.DEPTH])

    @property
    def reversals(self) -> np.ndarray:
        """Displacements of the reversal points held, oldest first."""
        return self._stk[0, : self.depth, 0].copy()
