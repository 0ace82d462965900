"""Characterization of one build: amplitude-dependent frequency and damping, ring-down identification.

Three parts, no plotting here (see :mod:`.report`):

* **Closed-form amplitude curves** per mode (:func:`mode_curves`): first-harmonic frequency,
  secant/energy damping, ring-down damping, dissipation per cycle, from micro-slip well into
  macro-slip.  Formulas and their tags follow the project's physics sheet (``physics.md``
  sec. 2, 4, 5); the sources are named beside each function.
* **Ring-downs** (:class:`RingDown`) made by a *runner*: a callable that applies a short modal
  force pulse to every mode at once and returns the free decay.  :class:`CoreRunner` steps the
  NumPy core directly; :class:`jointfmu.report.FmuRunner` (the report's default) builds the FMU
  of the parameter set and runs it with fmpy (same numbers, about ten times slower).  This
  module belongs to the physics core and never imports pythonfmu or fmpy.
* **Hilbert-transform identification** (:func:`hilbert_ringdown`) of damping and frequency vs
  amplitude from one decaying record (M. Feldman, "Non-linear system vibration analysis using
  Hilbert transform - I. Free vibration analysis method 'FREEVIB'", Mech. Syst. Signal Process.
  8(2):119-127, 1994; M. Feldman, Hilbert Transform Applications in Mechanical Vibration,
  Wiley 2011).

Units: modal quantities are mass-normalized (modal mass 1): modal displacement in m*sqrt(kg),
modal force in N/sqrt(kg), energy in J, stiffness in 1/s^2.  Frequencies are returned in Hz.

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy import integrate as _integrate
from scipy import signal as _signal
from scipy import special as _special
from scipy.ndimage import uniform_filter1d

from ..errors import InputError
from ..physics.iwan import backbone, backbone_tangent, dissipation_per_cycle, joint_constants
from .runners import CoreRunner, RingDown, Runner, check_run_args, get_runner

__all__ = [
    "ModeCurves",
    "mode_curves",
    "amplitude_curves",
    "first_harmonic_stiffness",
    "backbone_work",
    "c1_coefficient",
    "impulse_for_amplitude",
    "RingDown",
    "Runner",
    "CoreRunner",
    "check_run_args",
    "get_runner",
    "ring_down",
    "predicted_decay_time",
    "HilbertEstimate",
    "hilbert_ringdown",
    "identify_ringdown",
    "hysteresis_loop",
    "BAND_ORDER",
    "simulated_dissipation",
]

_TWO_PI = 2.0 * math.pi
#: Order of the Butterworth band-pass of :func:`hilbert_ringdown` (run twice: zero phase).
BAND_ORDER = 6


def _joint(mode):
    j = mode.joint
    return j.Fs, j.Kt, j.chi, j.beta


# ------------------------------------------------------------------------------------------------
# Closed forms
# ------------------------------------------------------------------------------------------------
def c1_coefficient(chi: float) -> float:
    """First-harmonic coefficient C1 of the micro-slip softening term.

    ``C1 = 8 B(chi + 5/2, 3/2) / (pi (chi + 1))`` with B the Euler beta function, so that the
    in-phase first-harmonic stiffness of the joint over a symmetric cycle of amplitude A <= phimax
    is ``Kt - C1 R A^(chi+1)`` (physics sheet sec. 5, [derived]; the Masing loop of Segalman 2005
    expanded to its first Fourier coefficient).
    """
    return 8.0 * _special.beta(chi + 2.5, 1.5) / (math.pi * (chi + 1.0))


def backbone_work(A, Fs, Kt, chi, beta):
    """Work along the virgin curve, ``W(A) = integral_0^|A| F_bb(u) du`` [J in modal units].

    ``W = Kt A^2/2 - R A^(chi+3)/((chi+1)(chi+2)(chi+3))`` for A <= phimax and
    ``W(phimax) + Fs (A - phimax)`` beyond (integral of the backbone of physics sheet sec. 2,
    [derived] from Segalman 2005).
    """
    c = joint_constants(Fs, Kt, chi, beta)
    a = np.abs(np.asarray(A, dtype=float))
    s = np.minimum(a, c.phimax)
    w = 0.5 * Kt * s**2 - c.R * s ** (chi + 3.0) / ((chi + 1.0) * (chi + 2.0) * (chi + 3.0))
    return w + Fs * np.maximum(a - c.phimax, 0.0)


def _k1_quadrature(A: float, Fs, Kt, chi, beta) -> float:
    """In-phase first-harmonic stiffness of the joint by quadrature of the Masing loop.

    Descending branch from the loop tip (A, F_bb(A)): F(u) = F_bb(A) - 2 F_bb((A - u)/2)
    (Masing's rule, physics sheet sec. 3); with u = A cos(theta) over the half cycle
    0 <= theta <= pi, k1 = (2 / (pi A)) integral_0^pi F(A cos theta) cos theta dtheta
    (the ascending half is the mirror image and gives the same).
    """
    fa = float(backbone(A, Fs, Kt, chi, beta))

    def integrand(th):
        u = A * math.cos(th)
        return (fa - 2.0 * float(backbone(0.5 * (A - u), Fs, Kt, chi, beta))) * math.cos(th)

    c = joint_constants(Fs, Kt, chi, beta)
    points = []
    if A > c.phimax:  # the branch saturates where (A - u)/2 = phimax: a kink in the integrand
        points.append(math.acos(max(-1.0, 1.0 - 2.0 * c.phimax / A)))
    val, _ = _integrate.quad(integrand, 0.0, math.pi, points=points or None, limit=200,
                             epsabs=0.0, epsrel=1e-11)
    return 2.0 * val / (math.pi * A)


def first_harmonic_stiffness(A, Fs, Kt, chi, beta):
    """In-phase first-harmonic (describing-function) stiffness of the joint, k1(A) [1/s^2].

    ``k1 = Kt - C1 R A^(chi+1)`` for A <= phimax (:func:`c1_coefficient`, physics sheet sec. 5,
    [derived]); beyond phimax (macro-slip) by quadrature of the Masing loop
    (:func:`_k1_quadrature`).  The quadrature-phase part is ``k2 = D(A)/(pi A^2)`` exactly, with
    D the dissipation per cycle (Segalman 2005).

    Parameters
    ----------
    A : float or array_like
        Modal displacement amplitude(s) [m sqrt(kg)], > 0.
    """
    c = joint_constants(Fs, Kt, chi, beta)
    a = np.abs(np.asarray(A, dtype=float))
    out = Kt - c1_coefficient(chi) * c.R * np.minimum(a, c.phimax) ** (chi + 1.0)
    big = a > c.phimax
    if np.any(big):
        flat = out.reshape(-1)
        for k in np.flatnonzero(big.reshape(-1)):
            flat[k] = _k1_quadrature(float(a.reshape(-1)[k]), Fs, Kt, chi, beta)
        out = flat.reshape(a.shape)
    return out


@dataclass(frozen=True)
class ModeCurves:
    """Amplitude-dependent properties of one mode, from closed forms (no simulation).

    All arrays have shape (n,), one entry per amplitude.  Conventions: the viscous term of the
    model is ``c q'`` with ``c = 2 zeta omega0`` at the low-amplitude omega0 (fixed; physics
    sheet sec. 5); the viscous dissipation per cycle at amplitude A is ``pi c omega_1 A^2``,
    i.e. evaluated at the first-harmonic frequency.

    Attributes
    ----------
    label : str
        Mode label.
    amplitude : ndarray
        Modal displacement amplitude A [m sqrt(kg)].
    phimax : float
        Onset of macro-slip [m sqrt(kg)].
    freq_1 : ndarray
        First-harmonic (describing-function) frequency ``sqrt(Kinf + k1(A)) / (2 pi)`` [Hz]
        (physics sheet sec. 5, [derived]).  This is also the ring-down frequency to first order
        in the damping (averaging); the O(zeta^2) correction is neglected.
    zeta_sec : ndarray
        Secant/energy damping ``(D_J + pi c omega_1 A^2) / (2 pi k_sec A^2)``,
        ``k_sec = Kinf + F_bb(A)/A`` (physics sheet sec. 5) [-].
    zeta_eq : ndarray
        Energy-equivalent damping referred to the first-harmonic stiffness,
        ``(D_J + pi c omega_1 A^2) / (2 pi omega_1^2 A^2)`` [-]: the ratio the equivalent linear
        model uses (its dissipation per cycle at resonance equals the nonlinear one).  It
        differs from ``zeta_sec`` by the factor ``k_sec / omega_1^2``.
    zeta_rd : ndarray
        Ring-down damping, what a free-decay analysis measures,
        ``-(d ln A/dt)/omega_1 = (D_J + pi c omega_1 A^2) / (2 pi A^2 k_t(A))`` with the tangent
        ``k_t = Kinf + Kt - R A^(chi+1)/(chi+1)`` (``Kinf`` in macro-slip) (physics sheet
        sec. 5, [derived]).
    dissipation : ndarray
        Joint dissipation per cycle D_J(A) [J] (Segalman 2005; physics sheet sec. 4).
    k1 : ndarray
        In-phase first-harmonic joint stiffness [1/s^2].
    f0 : float
        Low-amplitude natural frequency [Hz].
    f_macro : float
        Tangent frequency in full macro-slip, ``sqrt(Kinf)/(2 pi)`` [Hz].
    zeta : float
        Viscous damping ratio (at omega0) [-].
    """

    label: str
    amplitude: np.ndarray
    phimax: float
    freq_1: np.ndarray
    zeta_sec: np.ndarray
    zeta_eq: np.ndarray
    zeta_rd: np.ndarray
    dissipation: np.ndarray
    k1: np.ndarray
    f0: float
    f_macro: float
    zeta: float

    @property
    def ratio(self) -> np.ndarray:
        """Amplitude relative to the onset of macro-slip, A / phimax [-]."""
        return self.amplitude / self.phimax


def _curves(label, f0, zeta, Fs, Kt, chi, beta, A) -> ModeCurves:
    w0 = _TWO_PI * f0
    kinf = w0 * w0 - Kt
    c = 2.0 * zeta * w0
    jc = joint_constants(Fs, Kt, chi, beta)
    A = np.asarray(A, dtype=float)
    if A.ndim != 1 or A.size == 0 or not np.all(np.isfinite(A)) or np.any(A <= 0):
        raise InputError("amplitudes: must be a non-empty 1-D array of finite values > 0 "
                         "(modal displacement amplitudes in m*sqrt(kg))")
    k1 = first_harmonic_stiffness(A, Fs, Kt, chi, beta)
    w1 = np.sqrt(kinf + k1)
    dj = dissipation_per_cycle(A, Fs, Kt, chi, beta)
    dv = math.pi * c * w1 * A**2
    ksec = kinf + backbone(A, Fs, Kt, chi, beta) / A
    kt = kinf + backbone_tangent(A, Fs, Kt, chi, beta)
    two_pi_a2 = _TWO_PI * A**2
    return ModeCurves(
        label=label, amplitude=A, phimax=jc.phimax, freq_1=w1 / _TWO_PI,
        zeta_sec=(dj + dv) / (two_pi_a2 * ksec), zeta_eq=(dj + dv) / (two_pi_a2 * w1**2),
        zeta_rd=(dj + dv) / (two_pi_a2 * kt), dissipation=dj, k1=k1, f0=f0,
        f_macro=math.sqrt(kinf) / _TWO_PI, zeta=zeta)


def mode_curves(mode, amplitudes=None, *, lo: float = 1e-3, hi: float = 3.0, n: int = 160
                ) -> ModeCurves:
    """Closed-form amplitude curves of one mode.

    Parameters
    ----------
    mode : Mode
        A mode of a :class:`~.params.ParameterSet`.
    amplitudes : array_like, shape (n,), optional
        Modal displacement amplitudes [m sqrt(kg)], > 0.  Default: ``n`` values log-spaced from
        ``lo * phimax`` to ``hi * phimax``.
    lo, hi : float
        Range relative to phimax when ``amplitudes`` is not given (``0 < lo < hi``).
    n : int
        Number of default amplitudes (>= 2).

    Returns
    -------
    ModeCurves
    """
    Fs, Kt, chi, beta = _joint(mode)
    if amplitudes is None:
        if not (0.0 < lo < hi and math.isfinite(hi)) or int(n) < 2:
            raise InputError(f"lo = {lo!r}, hi = {hi!r}, n = {n!r}: need 0 < lo < hi (finite) "
                             "and n >= 2")
        pm = joint_constants(Fs, Kt, chi, beta).phimax
        amplitudes = pm * np.logspace(math.log10(lo), math.log10(hi), int(n))
    return _curves(mode.label, mode.f0, mode.zeta, Fs, Kt, chi, beta, amplitudes)


def amplitude_curves(params, **kw) -> list[ModeCurves]:
    """:func:`mode_curves` for every mode of a parameter set (same keywords)."""
    return [mode_curves(m, **kw) for m in params.modes]


def impulse_for_amplitude(mode, A0: float) -> float:
    """Modal velocity (= impulse per unit modal mass) that lifts a mode at rest to the peak A0.

    Energy balance over the first quarter cycle on the virgin curve, damping neglected:
    ``v0^2 = Kinf A0^2 + 2 W(A0)`` with W the backbone work (:func:`backbone_work`).  The first
    peak is a little lower because of the damping.  [m sqrt(kg)/s]
    """
    Fs, Kt, chi, beta = _joint(mode)
    return math.sqrt(mode.Kinf * A0 * A0 + 2.0 * float(backbone_work(A0, Fs, Kt, chi, beta)))


def predicted_decay_time(mode, A_start: float, A_end: float) -> float:
    """Time for the ring-down envelope to fall from ``A_start`` to ``A_end`` [s].

    Integrates ``dA/dt = -zeta_rd(A) omega_1(A) A`` (physics sheet sec. 5) with the closed forms.
    """
    if not 0 < A_end < A_start:
        raise InputError(f"need 0 < A_end < A_start, got {A_end!r}, {A_start!r}")
    A = np.geomspace(A_end, A_start, 400)
    cv = mode_curves(mode, A)
    rate = cv.zeta_rd * _TWO_PI * cv.freq_1  # -(d ln A / dt)
    return float(np.trapezoid(1.0 / rate, np.log(A)) if hasattr(np, "trapezoid")
                 else np.trapz(1.0 / rate, np.log(A)))


# ------------------------------------------------------------------------------------------------
# Simulated joint cycles (IwanJoint, exact element)
# ------------------------------------------------------------------------------------------------
def hysteresis_loop(mode, A: float, n: int = 400, cycles: int = 2):
    """Joint force over symmetric displacement cycles of amplitude A, from the exact element.

    The path is ``u = A sin(2 pi s)`` from a virgin start; the first quarter (virgin loading) is
    dropped, so the result is the closed loop.  Returns ``(u, F)``, each shape (n*cycles + 1,),
    in m sqrt(kg) and N/sqrt(kg).
    """
    from ..physics.iwan import IwanJoint

    Fs, Kt, chi, beta = _joint(mode)
    j = IwanJoint(Fs, Kt, chi, beta)
    s = np.linspace(0.0, 0.25 + cycles, int(n * (0.25 + cycles)) + 1)
    u = A * np.sin(_TWO_PI * s)
    F = j.history(u)
    keep = s >= 0.25
    return u[keep], F[keep]


def simulated_dissipation(mode, amplitudes, n: int = 64) -> np.ndarray:
    """Dissipation per cycle measured on the exact joint element (:class:`~.iwan.IwanJoint`).

    For each amplitude, load from virgin to A, then one full cycle A -> -A -> A in ``n`` straight
    pieces; the dissipation is the element's dissipated energy over that cycle [J].  The joint is
    rate-independent and its memory keeps only reversal points, so any path with the same
    reversals (here exactly +-A) dissipates the same: ``n`` only needs to be even.  Shape like
    ``amplitudes``.
    """
    from ..physics.iwan import IwanJoint

    Fs, Kt, chi, beta = _joint(mode)
    out = []
    for A in np.asarray(amplitudes, dtype=float).ravel():
        j = IwanJoint(Fs, Kt, chi, beta)
        j.move(A)
        d0 = j.dissipated
        j.history(A * np.cos(np.linspace(0.0, _TWO_PI, n + 1)))
        out.append(j.dissipated - d0)
    return np.array(out).reshape(np.shape(amplitudes))


def ring_down(params, runner=None, *, start: float = 1.0, end: float = 0.03,
              samples_per_period: float = 40.0, max_periods: float = 4000.0,
              modes: Sequence[int] | None = None) -> RingDown:
    """Ring every mode down at once, from about ``start * phimax`` to below ``end * phimax``.

    Each mode gets the impulse of :func:`impulse_for_amplitude` for ``start * phimax``; the record
    lasts the longest predicted decay time (:func:`predicted_decay_time`) plus 6 periods, at
    ``samples_per_period`` samples per period of the highest excited mode.

    Parameters
    ----------
    params : ParameterSet
    runner : Runner, "core" or None
        See :func:`get_runner` (default the core; the report passes the FMU runner).
    start, end : float
        Start and end amplitude relative to phimax (``0 < end < start``).
    samples_per_period : float
        Samples per period of the highest excited mode (>= 16).
    max_periods : float
        Cap on the record length, in periods of the lowest excited mode.
    modes : sequence of int, optional
        0-based modes to excite (default all; the others stay at rest).
    """
    if not (0 < end < start and math.isfinite(start)):
        raise InputError(f"start = {start!r}, end = {end!r}: need 0 < end < start (relative to phimax)")
    if not samples_per_period >= 16:
        raise InputError(f"samples_per_period = {samples_per_period!r}: must be >= 16")
    run = get_runner(runner, default="core")
    sel = range(params.n_modes) if modes is None else list(modes)
    imp = np.zeros(params.n_modes)
    t_end = 0.0
    for i in sel:
        if not 0 <= int(i) < params.n_modes:
            raise InputError(f"modes: {i!r} is not a 0-based mode index below {params.n_modes}")
        m = params.modes[i]
        pm = joint_constants(*_joint(m)).phimax
        imp[i] = impulse_for_amplitude(m, start * pm)
        t_end = max(t_end, predicted_decay_time(m, start * pm, end * pm) + 6.0 / m.f_macro)
    excited = [params.modes[i] for i in sel]
    t_end = min(t_end, max_periods / min(m.f0 for m in excited))
    dt = 1.0 / (samples_per_period * max(m.f0 for m in excited))
    return run(params, imp, dt, int(math.ceil(t_end / dt)))


# ------------------------------------------------------------------------------------------------
# Hilbert-transform identification
# ------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class HilbertEstimate:
    """Instantaneous amplitude, frequency and damping from one ring-down, shape (m,) each.

    Attributes
    ----------
    t : ndarray
        Times [s] (start and end periods dropped).
    amplitude : ndarray
        Envelope A(t) (units of the signal).
    frequency : ndarray
        Instantaneous frequency omega/(2 pi) [Hz].
    zeta : ndarray
        Damping ratio [-] by the chosen method.
    natural_frequency : ndarray
        Feldman's estimate of the undamped natural frequency omega0/(2 pi) [Hz] (equal to
        ``frequency`` for the simplified method).
    method : str
        ``"simplified"`` or ``"feldman"``.
    """

    t: np.ndarray
    amplitude: np.ndarray
    frequency: np.ndarray
    zeta: np.ndarray
    natural_frequency: np.ndarray
    method: str

    def at(self, amplitudes) -> tuple[np.ndarray, np.ndarray]:
        """Damping and frequency interpolated at given envelope values, ``(zeta, freq)``.

        NaN outside the amplitude range covered.
        """
        A = np.asarray(amplitudes, dtype=float)
        order = np.argsort(self.amplitude)
        la = np.log(self.amplitude[order])
        z = np.interp(np.log(A), la, self.zeta[order], left=np.nan, right=np.nan)
        f = np.interp(np.log(A), la, self.frequency[order], left=np.nan, right=np.nan)
        return z, f


def _box(x, n):
    """Centred running mean over n samples, applied twice (a triangle of 2n - 1 samples).

    Twice, because a box of one period lets a fraction ~eps of a component through when the
    window is (1 + eps) periods long; two passes make it ~eps^2.
    """
    n = max(int(n), 1)
    return uniform_filter1d(uniform_filter1d(x, n, mode="nearest"), n, mode="nearest")


def hilbert_ringdown(t, x, *, extension: str | None = "odd", t_sym: float | None = None,
                     f_hint: float | None = None, method: str = "simplified",
                     smooth_periods: float = 1.0, drop_start_periods: float = 2.0,
                     drop_end_periods: float = 4.0, remove_offset: bool = True,
                     band: tuple[float, float] | None = None) -> HilbertEstimate:
    """Damping and frequency vs amplitude of one free decay, by the Hilbert transform.

    Analytic signal ``X = x + i H[x] = A exp(i psi)`` (:func:`scipy.signal.hilbert`), frequency
    ``omega = psi'``.  Damping, ``method="simplified"``: ``zeta = -(A'/A)/omega``;
    ``method="feldman"``: ``h = -A'/A - omega'/(2 omega)``,
    ``omega0^2 = omega^2 - A''/A + 2 (A'/A)^2 + A' omega'/(A omega)``, ``zeta = h/omega0``
    (Feldman, MSSP 8(2):119-127, 1994, FREEVIB; Feldman, Hilbert Transform Applications in
    Mechanical Vibration, Wiley 2011).  The simplified form is the definition of the ring-down
    damping ``zeta_rd`` of :class:`ModeCurves`, so it is the default.

    Pitfalls handled (physics sheet sec. 6): the abrupt start is removed by an odd (impulse start)
    or even (release from rest) extension about ``t_sym``; a residual offset (the joint locks in
    a small one) is removed by a running mean over whole periods; envelope and phase are smoothed
    over ``smooth_periods`` periods (hysteretic waveforms ripple at 2 omega); the first and last
    periods are dropped (end effects of the finite record).

    Parameters
    ----------
    t : array_like, shape (n,)
        Uniform sample times [s].
    x : array_like, shape (n,)
        One mode's free decay (any unit; a multi-mode record needs band-pass filtering first).
    extension : {"odd", "even", None}
        Mirror the record about ``t_sym`` before the transform.
    t_sym : float, optional
        Symmetry centre, ``t[0]`` (whole-sample) or ``t[0] - dt/2`` (half-sample); default
        ``t[0] - dt/2``.  Only with ``extension``.
    f_hint : float, optional
        Rough frequency [Hz] for the window lengths; default estimated from the phase.
    method : {"simplified", "feldman"}
    smooth_periods, drop_start_periods, drop_end_periods : float
        In periods of the mean frequency.
    remove_offset : bool
        Remove a running mean (window one period, applied twice) first.
    band : (float, float), optional
        Pass band [Hz] of a zero-phase band-pass filter applied first (Butterworth of order
        :data:`BAND_ORDER`, run forward and backward with :func:`scipy.signal.sosfiltfilt`), to
        take one mode out of a multi-mode record (Feldman 2011).  It has its own transients,
        lasting about ``BAND_ORDER / (pi * bandwidth)``: drop at least that many periods at the
        start and end (more at the end, where the record stops abruptly).

    Returns
    -------
    HilbertEstimate
    """
    t = np.asarray(t, dtype=float)
    x = np.asarray(x, dtype=float)
    if t.ndim != 1 or t.shape != x.shape or t.size < 64:
        raise InputError("t, x: need two 1-D arrays of the same length, at least 64 samples")
    dt = float(t[1] - t[0])
    if not dt > 0 or np.max(np.abs(np.diff(t) - dt)) > 1e-6 * dt:
        raise InputError("t: samples must be uniformly spaced and increasing")
    if method not in ("simplified", "feldman"):
        raise InputError(f"method = {method!r}: allowed are 'simplified', 'feldman'")
    if extension not in ("odd", "even", None):
        raise InputError(f"extension = {extension!r}: allowed are 'odd', 'even', None")
    n = x.size
    if extension is not None:
        ts = t[0] - 0.5 * dt if t_sym is None else float(t_sym)
        sign = -1.0 if extension == "odd" else 1.0
        if abs(ts - (t[0] - 0.5 * dt)) < 1e-6 * dt:
            ext = np.concatenate([sign * x[::-1], x])
        elif abs(ts - t[0]) < 1e-6 * dt:
            ext = np.concatenate([sign * x[:0:-1], x])
        else:
            raise InputError(f"t_sym = {t_sym!r}: must be t[0] = {t[0]!r} or t[0] - dt/2 = "
                             f"{t[0] - 0.5 * dt!r} s")
        i0 = ext.size - n
    else:
        ext, i0 = x.copy(), 0
    if band is not None:
        lo, hi = (float(b) for b in band)
        nyq = 0.5 / dt
        if not 0 < lo < hi < nyq:
            raise InputError(f"band = {band!r} Hz: need 0 < low < high < {nyq:g} Hz (half the "
                             "sample rate)")
        sos = _signal.butter(BAND_ORDER, [lo, hi], btype="bandpass", fs=1.0 / dt, output="sos")
        ext = _signal.sosfiltfilt(sos, ext)
    if f_hint is None:
        psi = np.unwrap(np.angle(_signal.hilbert(ext - ext.mean())))[i0:]
        mid = slice(n // 4, 3 * n // 4)
        f_hint = abs(np.polyfit(t[mid], psi[mid], 1)[0]) / _TWO_PI
    if not (f_hint and math.isfinite(f_hint) and f_hint * dt < 0.25):
        raise InputError(f"f_hint = {f_hint!r} Hz: need a finite frequency below a quarter of the "
                         f"sample rate {1 / dt:g} Hz")
    n_per = max(int(round(1.0 / (f_hint * dt))), 1)
    if n < (drop_start_periods + drop_end_periods + 4) * n_per:
        raise InputError(f"record too short: {n} samples, {n / n_per:.1f} periods; need at least "
                         f"{drop_start_periods + drop_end_periods + 4:g} periods")
    if remove_offset:
        ext = ext - _box(ext, n_per)
    X = _signal.hilbert(ext)[i0:]
    A = np.abs(X)
    if np.any(A <= 0):
        raise InputError("x: the envelope reaches zero; is the record a decaying oscillation?")
    psi = np.unwrap(np.angle(X))
    ns = max(int(round(smooth_periods * n_per)), 1)
    lnA = _box(np.log(A), ns)
    psi = _box(psi, ns)
    lam = uniform_filter1d(np.gradient(lnA, dt), ns, mode="nearest")   # A'/A
    w = uniform_filter1d(np.gradient(psi, dt), ns, mode="nearest")     # omega
    if method == "simplified":
        zeta, w0 = -lam / w, w
    else:
        wdot = uniform_filter1d(np.gradient(w, dt), ns, mode="nearest")
        lamdot = uniform_filter1d(np.gradient(lam, dt), ns, mode="nearest")
        h = -lam - wdot / (2.0 * w)
        # A''/A = lam' + lam^2, so omega0^2 = omega^2 - lam' + lam^2 + lam omega'/omega
        w0 = np.sqrt(np.maximum(w**2 - lamdot + lam**2 + lam * wdot / w, 0.0))
        zeta = h / w0
    keep = slice(int(drop_start_periods * n_per), n - int(drop_end_periods * n_per))
    return HilbertEstimate(t[keep], np.exp(lnA[keep]), w[keep] / _TWO_PI, zeta[keep],
                           w0[keep] / _TWO_PI, method)


def identify_ringdown(rd: RingDown, mode: int, **kw) -> HilbertEstimate:
    """:func:`hilbert_ringdown` of mode ``mode`` (0-based) of a :class:`RingDown`.

    Uses the free part (``t >= dt``), odd extension about the pulse centre ``dt/2``.
    """
    if not 0 <= mode < rd.q.shape[1]:
        raise InputError(f"mode = {mode!r}: must be a 0-based index below {rd.q.shape[1]}")
    if rd.impulses[mode] == 0:
        raise InputError(f"mode {mode + 1} was not excited in this ring-down (impulse 0)")
    kw.setdefault("extension", "odd")
    kw.setdefault("t_sym", rd.t_sym)
    return hilbert_ringdown(rd.t[1:], rd.q[1:, mode], **kw)
