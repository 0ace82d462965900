"""Signal processing of ring-down records, one mode at a time.

The same functions process a lab's record and a simulated ring-down of the fitted model
(:mod:`.fit`), so that whatever bias the processing has is the same on both sides and cancels in
the comparison.  Steps, per mode:

1. **Modal filter** (:func:`modal_weights`): the response channels of one quantity (a, v or x)
   are combined through the pseudo-inverse of the template's mode shapes at the sensors,
   restricted to the modes whose frequencies fall inside this mode's pass band (the band-pass
   removes the others), weighted by each channel's noise when a pre-trigger gives it (weighted
   least squares; common practice of modal filtering, e.g. Q. Zhang, R. J. Allemang and
   D. L. Brown, "Modal filter: concept and applications", IMAC 1990).
2. **Zero-phase band-pass and Hilbert transform in one step** (:func:`analytic`): the modal
   signal after the impact is mirrored about the impact (odd symmetry for acceleration and
   displacement, even for velocity: an impulse response continues smoothly, physics sheet
   sec. 6), then multiplied in the frequency domain by ``2 |H(f)|^2`` on positive frequencies
   and 0 on negative ones, ``H`` a Butterworth band-pass (:data:`BAND_ORDER`): the magnitude of a
   forward-backward (zero-phase) filter, and the analytic signal ``A exp(i psi)`` of the result
   (M. Feldman, "Non-linear system vibration analysis using Hilbert transform - I. Free vibration
   analysis method 'FREEVIB'", MSSP 8(2):119-127, 1994; M. Feldman, "Hilbert transform in
   vibration analysis", MSSP 25(3):735-802, 2011, zero-phase band-pass before the transform for
   multi-component signals).
3. **Trimming** (:class:`Band`): the impact, the filter's transient and the Hilbert end effects
   are dropped: ``Band.transient`` plus two periods after the impact, ``Band.transient`` plus
   four periods before the end of the record (physics sheet sec. 9: "drop at least two periods
   plus the filter transient at each end").
4. **Noise floor** (:func:`noise_level`): from the pre-trigger (each channel's variance, carried
   through the modal filter and the band-pass, white-noise assumption), or, without a
   pre-trigger, from the scatter of the envelope about a smooth curve in the record's tail.  The
   data are used down to :data:`FLOOR` times the noise level of the analytic signal, where the
   envelope's noise bias (power subtraction, :func:`envelope`) is below 1 %.
5. **Curves** (:func:`curves`): smoothing splines of log amplitude and phase (scipy's
   ``make_smoothing_spline``: C. H. Reinsch, "Smoothing by spline functions", Numer. Math.
   10:177-183, 1967; P. Craven and G. Wahba, Numer. Math. 31:377-403, 1979), differentiated
   analytically; damping ``zeta = -(ln A)'/psi'`` (the free-decay damping of physics sheet sec. 5,
   ``zeta_rd``; Feldman 1994's simplified estimate, sheet sec. 6) and frequency ``psi'/(2 pi)``
   against the modal displacement amplitude ``A / (omega^p |phi|)`` (p = 2 for acceleration,
   1 for velocity, 0 for displacement).  Log amplitude and phase are fitted rather than
   differentiated numerically (Sumali and Kellogg, IMAC 2011, physics sheet sec. 9).

Units: modal quantities are mass-normalized (modal displacement in m*sqrt(kg)); frequencies in
Hz; times in s.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import fft as _fft
from scipy import signal as _signal

from ..errors import InputError
from ..records import Record

__all__ = [
    "BAND_ORDER",
    "BAND_HALF_WIDTH",
    "TRANSIENT_LEVEL",
    "FLOOR",
    "QUANTITY_POWER",
    "Band",
    "Impact",
    "ModeCurves",
    "make_band",
    "impact",
    "modal_weights",
    "analytic",
    "envelope",
    "noise_level",
    "curves",
    "spectral_peak",
]

#: Order of the Butterworth band-pass (its magnitude is applied squared: zero phase).
BAND_ORDER = 4
#: The filter transient lasts until the zero-phase impulse response's envelope is below this
#: fraction of its peak.  The mode's own transient is the same in the simulated ring-down and
#: cancels; what is dropped is the impact's direct (mass-line) part and the leakage of other
#: modes, which the mirror about the impact already reduces.
TRANSIENT_LEVEL = 1e-2
#: Relative half-width of a mode's pass band when no neighbour is nearer: it must pass the
#: frequency drift from micro- to macro-slip (down to sqrt(1 - Kt/omega0^2) of f0).
BAND_HALF_WIDTH = 0.4
#: Data are used down to this many times the noise level of the analytic signal.
FLOOR = 10.0
#: Power of omega between a quantity's amplitude and the displacement amplitude.
QUANTITY_POWER = {"x": 0, "v": 1, "a": 2}
_PARITY = {"x": -1.0, "v": 1.0, "a": -1.0}   # odd or even extension about the impact
_TWO_PI = 2.0 * math.pi


@dataclass(frozen=True)
class Band:
    """The pass band of one mode and what it implies for trimming and noise.

    Attributes
    ----------
    f_lo, f_hi : float
        Edges (-3 dB of H, -6 dB of the applied ``|H|^2``) [Hz].
    fs : float
        Sample rate [Hz].
    transient : float
        Time over which the zero-phase impulse response's envelope falls below
        :data:`TRANSIENT_LEVEL` of its peak [s]: what is dropped after the impact and before the
        end, besides whole periods.
    enbw : float
        Equivalent noise bandwidth of the applied ``|H|^2`` [Hz]: samples of the analytic signal
        this far apart are nearly independent.
    gain2 : float
        ``E|Z|^2 / s^2`` for white input noise of variance ``s^2``.
    """

    f_lo: float
    f_hi: float
    fs: float
    transient: float
    enbw: float
    gain2: float
    _cache: dict = field(default_factory=dict, compare=False, repr=False)

    @property
    def f_mid(self) -> float:
        return math.sqrt(self.f_lo * self.f_hi)

    def weights(self, n_fft: int) -> np.ndarray:
        """``2 |H(f)|^2`` on the positive frequencies of an ``n_fft`` transform, 0 elsewhere,
        shape (n_fft,)."""
        w = self._cache.get(n_fft)
        if w is None:
            f = _fft.fftfreq(n_fft, 1.0 / self.fs)
            w = np.zeros(n_fft)
            pos = f > 0
            w[pos] = 2.0 * _h2(self.f_lo, self.f_hi, self.fs, f[pos])
            if len(self._cache) > 32:
                self._cache.clear()
            self._cache[n_fft] = w
        return w


def _h2(f_lo, f_hi, fs, f):
    sos = _signal.butter(BAND_ORDER, [f_lo, f_hi], btype="bandpass", fs=fs, output="sos")
    _, h = _signal.sosfreqz(sos, worN=f, fs=fs)
    return np.abs(h) ** 2


def make_band(f_lo: float, f_hi: float, fs: float) -> Band:
    """A :class:`Band` with its transient, noise bandwidth and noise gain worked out."""
    nyq = 0.5 * fs
    if not 0.0 < f_lo < f_hi < nyq:
        raise InputError(f"pass band {f_lo:.4g}-{f_hi:.4g} Hz: need 0 < low < high < {nyq:.4g} Hz "
                         "(half the sample rate)")
    # noise bandwidth and gain from a fine grid of |H|^2
    f = np.linspace(0.0, nyq, 20001)[1:]
    h2 = _h2(f_lo, f_hi, fs, f)
    df = f[1] - f[0]
    enbw = float(np.sum(h2**2) * df / np.max(h2) ** 2)
    gain2 = float(4.0 * np.sum(h2**2) * df / fs)
    # transient: the zero-phase impulse response's envelope (inverse transform of |H|^2)
    n = 1 << int(math.ceil(math.log2(fs / (f_hi - f_lo) * 200)))
    ff = _fft.fftfreq(n, 1.0 / fs)
    w = np.zeros(n)
    pos = ff > 0
    w[pos] = 2.0 * _h2(f_lo, f_hi, fs, ff[pos])
    g = np.abs(_fft.ifft(w))[: n // 2]
    above = np.flatnonzero(g > TRANSIENT_LEVEL * g.max())
    transient = float((above[-1] + 1) / fs)
    return Band(float(f_lo), float(f_hi), float(fs), transient, enbw, gain2)


# ------------------------------------------------------------------------------------------
# the impact
# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Impact:
    """When the hammer struck.

    Attributes
    ----------
    time : float
        Impact time [s] (centre of the force pulse, or the response's onset).
    index : int
        Sample nearest to ``time``: the mirror point of the processing.
    how : str
        ``"force channel <name>"`` or ``"response onset"``.
    pre : int
        Samples before the impact that hold no response (the pre-trigger, less a margin).
    """

    time: float
    index: int
    how: str
    pre: int


def impact(record: Record) -> Impact:
    """Find the impact: the centroid of the force pulse on the strongest force channel
    (common practice), else the first sample where a response channel reaches 10 % of its
    largest value."""
    t = record.time
    dt = record.dt
    forces = record.forces
    if forces:
        c = max(forces, key=lambda ch: float(np.max(np.abs(ch.data))))
        f = c.data - np.median(c.data)
        k = int(np.argmax(np.abs(f)))
        sgn = np.sign(f[k])
        lo = k
        while lo > 0 and sgn * f[lo - 1] > 0.05 * abs(f[k]):
            lo -= 1
        hi = k
        while hi < f.size - 1 and sgn * f[hi + 1] > 0.05 * abs(f[k]):
            hi += 1
        w = sgn * f[lo: hi + 1]
        ti = float(np.sum(t[lo: hi + 1] * w) / np.sum(w))
        how, pre = f"force channel {c.name}", lo
    else:
        onsets = []
        for c in record.responses:
            x = np.abs(c.data - np.median(c.data[: max(8, c.data.size // 50)]))
            onsets.append(int(np.argmax(x >= 0.1 * x.max())))
        k0 = min(onsets)
        ti, how, pre = float(t[k0]), "response onset", k0
    index = int(np.clip(round((ti - t[0]) / dt), 0, t.size - 1))
    # samples clear of the pulse: a margin before its start of 16 samples and a tenth of the
    # pre-trigger, for the pre-ringing of a linear-phase anti-alias filter
    return Impact(ti, index, how, max(0, pre - 16 - pre // 10))


# ------------------------------------------------------------------------------------------
# modal filter
# ------------------------------------------------------------------------------------------
def modal_weights(phi: np.ndarray, modes: list[int], mode: int,
                  sigma: np.ndarray | None = None) -> np.ndarray:
    """Weights that take mode ``mode`` out of the sensor channels, shape (n_channels,).

    The row of ``mode`` in the (noise-weighted) pseudo-inverse of ``phi[:, modes]``, the
    template's shapes at the sensors restricted to the modes inside this mode's pass band:
    ``(Phi^T S^-1 Phi)^+ Phi^T S^-1`` with ``S = diag(sigma^2)`` (weighted least squares; the
    plain pseudo-inverse when ``sigma`` is None).

    Parameters
    ----------
    phi : ndarray, shape (n_channels, n_modes)
        Mode shapes at the sensors [1/sqrt(kg)].
    modes : list of int
        0-based modes to separate (must contain ``mode``).
    mode : int
    sigma : ndarray, shape (n_channels,), optional
        Noise standard deviation of each channel.
    """
    P = phi[:, modes]
    winv = np.ones(phi.shape[0]) if sigma is None else 1.0 / np.maximum(sigma, 1e-300) ** 2
    A = P.T * winv
    W = np.linalg.pinv(A @ P) @ A
    return W[modes.index(mode)]


# ------------------------------------------------------------------------------------------
# band-pass + Hilbert
# ------------------------------------------------------------------------------------------
def analytic(y: np.ndarray, index: int, quantity: str, band: Band) -> np.ndarray:
    """Analytic signal of the band-passed free decay after the impact.

    Parameters
    ----------
    y : ndarray, shape (n,) or (n, m)
        Modal (or single-channel) signals on the record's samples.
    index : int
        The impact's sample: the mirror point.
    quantity : {"a", "v", "x"}
        Decides the mirror symmetry (odd for a and x, even for v).
    band : Band

    Returns
    -------
    ndarray, complex, shape (n - index,) or (n - index, m)
        ``A exp(i psi)`` at the samples from ``index`` on.
    """
    seg = np.asarray(y, dtype=float)[index:]
    m = seg.shape[0]
    ext = np.concatenate([_PARITY[quantity] * seg[:0:-1], seg], axis=0)
    n_fft = _fft.next_fast_len(ext.shape[0])
    X = _fft.fft(ext, n=n_fft, axis=0)
    w = band.weights(n_fft)
    Z = _fft.ifft(X * (w if X.ndim == 1 else w[:, None]), axis=0)
    return Z[m - 1: 2 * m - 1]


def envelope(Z: np.ndarray, sigma: float | np.ndarray = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """``(ln A, psi)`` of an analytic signal, the envelope corrected for its noise bias.

    ``E|Z|^2 = A^2 + 2 sigma^2`` for a signal in complex Gaussian noise of ``sigma`` per
    component, so ``A = sqrt(|Z|^2 - 2 sigma^2)`` (power subtraction, common practice; Rice,
    "Mathematical analysis of random noise", Bell Syst. Tech. J. 24, 1945, for the envelope
    of a sine in noise).  Where that is not positive the uncorrected value is kept (such samples
    lie below the noise floor and are not used).
    """
    p = np.abs(Z) ** 2
    pc = p - 2.0 * np.asarray(sigma) ** 2
    lnA = 0.5 * np.log(np.where(pc > 0.25 * p, pc, p))
    psi = np.unwrap(np.angle(Z), axis=0)
    return lnA, psi


# ------------------------------------------------------------------------------------------
# noise
# ------------------------------------------------------------------------------------------
def noise_level(y_pre: np.ndarray | None, Z_tail: np.ndarray | None, band: Band,
                weights: np.ndarray | None = None, channel_sigma: np.ndarray | None = None
                ) -> tuple[float, str]:
    """Noise of the analytic signal, per real component [units of the signal].

    From the pre-trigger when the channels' noise is known: ``sigma^2 = (sum_c w_c^2 s_c^2)
    gain2 / 2`` (white noise through the modal filter and the band-pass).  Otherwise from the
    tail of the record: the scatter of ``|Z|`` about a straight line in ``ln|Z|`` over the last
    fifth of the processed samples, ``sigma = 1.4826 median(|r| A)`` (median absolute deviation
    scaled for a normal distribution, common practice).

    Returns
    -------
    (float, str)
        The level and where it came from.
    """
    if channel_sigma is not None and weights is not None:
        s2 = float(np.sum(np.asarray(weights) ** 2 * np.asarray(channel_sigma) ** 2))
        return math.sqrt(0.5 * s2 * band.gain2), "pre-trigger"
    if Z_tail is None or Z_tail.size < 16:
        return 0.0, "none"
    a = np.abs(Z_tail)
    tt = np.arange(a.size, dtype=float)
    la = np.log(np.maximum(a, 1e-300))
    coef = np.polyfit(tt, la, 2)
    r = la - np.polyval(coef, tt)
    return float(1.4826 * np.median(np.abs(r) * a)), "tail"


def channel_noise(record: Record, names: tuple[str, ...], pre: int) -> np.ndarray | None:
    """Noise standard deviation of each named channel over the pre-trigger (None if under 32
    samples): ``1.4826 median|x - median(x)|``, the median absolute deviation scaled for a normal
    distribution (common practice), which a few disturbed samples do not move."""
    if pre < 32:
        return None
    out = []
    for n in names:
        x = record.channel(n).data[:pre]
        out.append(1.4826 * float(np.median(np.abs(x - np.median(x)))))
    return np.array(out)


# ------------------------------------------------------------------------------------------
# frequency of a mode in a record
# ------------------------------------------------------------------------------------------
def spectral_peak(y: np.ndarray, dt: float, f_lo: float, f_hi: float) -> tuple[float, float]:
    """Largest peak of the Hann-windowed amplitude spectrum in ``[f_lo, f_hi]``, refined by
    parabolic interpolation of the log magnitude (common practice): ``(frequency, peak / median
    of the whole spectrum)``, the median standing for the noise floor (peaks hold few bins)."""
    n = y.size
    n_fft = _fft.next_fast_len(4 * n)
    S = np.abs(_fft.rfft((y - y.mean()) * np.hanning(n), n_fft))
    f = _fft.rfftfreq(n_fft, dt)
    sel = np.flatnonzero((f >= f_lo) & (f <= f_hi))
    if sel.size < 3:
        return float("nan"), 0.0
    k = int(sel[np.argmax(S[sel])])
    if 0 < k < S.size - 1:
        a, b, c = np.log(S[k - 1: k + 2] + 1e-300)
        d = 0.5 * (a - c) / (a - 2 * b + c) if (a - 2 * b + c) != 0 else 0.0
    else:
        d = 0.0
    ratio = float(S[k] / max(np.median(S[1:]), 1e-300))
    return float(f[k] + d * (f[1] - f[0])), ratio


# ------------------------------------------------------------------------------------------
# damping and frequency against amplitude
# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class ModeCurves:
    """Damping and frequency of one mode against amplitude, from one signal, shape (m,) each.

    Attributes
    ----------
    t : ndarray
        Times [s].
    amplitude : ndarray
        Modal displacement amplitude [m sqrt(kg)].
    zeta : ndarray
        Free-decay damping ratio ``-(ln A)'/psi'`` [-].
    frequency : ndarray
        Instantaneous frequency ``psi'/(2 pi)`` [Hz].
    """

    t: np.ndarray
    amplitude: np.ndarray
    zeta: np.ndarray
    frequency: np.ndarray

    def at(self, amplitudes) -> tuple[np.ndarray, np.ndarray]:
        """``(zeta, frequency)`` interpolated in log amplitude; NaN outside the range covered."""
        A = np.asarray(amplitudes, dtype=float)
        o = np.argsort(self.amplitude)
        la = np.log(self.amplitude[o])
        return (np.interp(np.log(A), la, self.zeta[o], left=np.nan, right=np.nan),
                np.interp(np.log(A), la, self.frequency[o], left=np.nan, right=np.nan))


#: Smoothing bandwidth of the curves at the strongest sample, in periods (it widens as
#: ``sqrt`` of the fall in amplitude, where the data are noisier).
SMOOTH_PERIODS = 2.0
#: A curve is kept only where its smoothing bandwidth is at most this many periods (down to
#: ``(SMOOTH_PERIODS / MAX_SMOOTH_PERIODS)^2`` = 4 % of its largest amplitude); lower amplitudes
#: are covered by records at lower levels.
MAX_SMOOTH_PERIODS = 10.0


def curves(t: np.ndarray, lnA: np.ndarray, psi: np.ndarray, power: int, f_c: float,
           scale: float = 1.0) -> ModeCurves:
    """Smoothing splines of ``ln A`` and ``psi`` over ``t``, differentiated analytically.

    The weights are ``A^2`` (the inverse variance of ``ln A`` and ``psi`` under additive noise),
    normalized to 1 at the strongest sample, and the smoothing parameter is set so that the
    spline's equivalent kernel (B. W. Silverman, "Spline smoothing: the equivalent variable
    kernel method", Ann. Statist. 12(3):898-916, 1984: bandwidth ``(lambda / (w rho))^(1/4)``
    for weight ``w`` and ``rho`` points per second) spans :data:`SMOOTH_PERIODS` periods there.
    The same rule on a simulated ring-down gives the same smoothing, so the two compare alike.

    Parameters
    ----------
    t, lnA, psi : ndarray, shape (m,)
        Samples inside the trimmed window (spaced about a quarter period).
    power : int
        ``QUANTITY_POWER`` of the signal's quantity.
    f_c : float
        Approximate frequency [Hz] (sets the smoothing).
    scale : float
        Divides the amplitude (``|phi|`` of a single sensor; 1 for a modal signal).
    """
    from scipy.interpolate import make_smoothing_spline

    if t.size < 8:
        raise InputError("too few samples for amplitude curves (need at least 8 in the window)")
    w = np.exp(2.0 * (lnA - lnA.max()))
    rho = (t.size - 1) / (t[-1] - t[0])
    lam = rho * (SMOOTH_PERIODS / f_c) ** 4
    w0 = _TWO_PI * f_c
    sa = make_smoothing_spline(t, lnA, w=w, lam=lam)
    sp = make_smoothing_spline(t, psi - w0 * t, w=w, lam=lam)
    dla = sa.derivative()(t)
    om = sp.derivative()(t) + w0
    la = sa(t)
    keep = w >= (SMOOTH_PERIODS / MAX_SMOOTH_PERIODS) ** 4
    amp = np.exp(la) / (np.abs(om) ** power * scale)
    return ModeCurves(t[keep], amp[keep], (-dla / om)[keep], (om / _TWO_PI)[keep])
