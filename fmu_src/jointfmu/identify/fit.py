"""Identification of a modal Iwan model from ring-down records: the fit of one build.

Per mode (the modes are uncoupled, so each is fitted on its own):

1. Every record is processed (:mod:`.process`): modal filter, mirror about the impact,
   zero-phase band-pass and Hilbert transform, trimming, noise floor.  What is compared is the
   log envelope ``ln A`` and the phase ``psi`` of the analytic signal at samples ``1/ENBW`` apart
   (nearly independent for band-limited noise) inside each record's window.
2. **Start** (:mod:`.closed_form`): micro-slip closed forms fitted to the damping and frequency
   curves.
3. **Fit to simulated ring-downs**: the exact core (:class:`jointfmu.physics.integrate.ModalSimulator`,
   every record's ring-down of this mode at once, each from an impulse at the record's impact
   time with its own initial velocity) gives the same quantity at the record's samples; it goes
   through the *same* processing, and the weighted misfit

       chi2 = sum over records and samples of (A/sigma)^2 [(ln A_rec - ln A_sim)^2
                                                           + (psi_rec - psi_sim - phi_r)^2]

   is minimized (``sigma`` the noise of the analytic signal per component, so that each term is
   a unit-variance normal deviate: ``delta ln A`` and ``delta psi`` of a sine in noise both have
   variance ``sigma^2/A^2``; ``phi_r`` a per-record phase offset, solved in closed form) by
   Levenberg-Marquardt least squares (:meth:`_Problem.solve`).  Processing biases cancel, and the
   transition from micro- to macro-slip, where the closed forms are several percent off, comes
   out right (physics sheet sec. 9).  The unknowns are ``f0, zeta, chi, ln R`` in micro-slip
   (any ``Kt`` share and ``beta`` give the same ring-down below the onset of macro-slip), or
   ``f0, zeta, chi, ln Fs, Kt/(2 pi f0)^2, beta`` with macro-slip; plus the log initial velocity
   of every record.
4. **Macro-slip decision**: the macro-slip model is fitted when there is a hint of it (see
   :func:`_needs_macro`) and kept when it lowers ``chi2`` significantly (likelihood-ratio test,
   two added parameters, at the 0.1 % level: ``Delta chi2 / s^2 > 13.8``; S. S. Wilks, "The
   large-sample distribution of the likelihood ratio for testing composite hypotheses", Ann. Math.
   Statist. 9(1):60-62, 1938) with the
   onset of macro-slip inside the range of the data.  Otherwise only the micro-slip values are
   determined: the template's ``Kt`` share and ``beta`` are kept and ``Fs`` is solved from ``R``.
5. **95 % intervals** by profile likelihood (e.g. D. J. Venzon and S. H. Moolgavkar, "A method
   for computing profile-likelihood-based confidence intervals", Appl. Statist. 37(1):87-94,
   1988): for each parameter the others (and the initial velocities) are re-optimized at the
   Wald points +-1.96 standard errors by one Gauss-Newton step from their linear prediction,
   and the crossing of ``Delta chi2 = 3.84 s^2`` is found on each side from the profile's
   curvature there; ``s^2 = max(1, chi2_min / dof)`` widens the intervals where the simulated
   ring-downs miss the records by more than the noise (common practice in nonlinear regression,
   D. M. Bates and D. G. Watts, Nonlinear Regression Analysis and Its Applications, Wiley 1988).
6. **Collapse** (:func:`_collapse`): the damping curves of every record and every sensor
   against modal amplitude, each compared with the fitted model's curve for that record
   (simulated and processed alike); ``collapse`` is the RMS relative deviation.  Large values mean
   the uncoupled-modes picture does not hold for this mode (coupling, a sensor or impact point that
   sees the mode weakly, a joint slipping in several modes).

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..params import JointParams, Mode, ParameterSet, Provenance
from ..physics.integrate import ModalSimulator
from ..physics.iwan import joint_constants, slip_force_from_R
from ..records import Record
from . import process as P
from .closed_form import MICRO_SHARE, ClosedFormFit, fit_micro_slip

__all__ = [
    "MIN_STEPS_PER_PERIOD_FIT",
    "Segment",
    "ModeFit",
    "BuildFit",
    "prepare_mode",
    "record_signals",
    "fit_build",
    "simulate_segments",
]

_TWO_PI = 2.0 * math.pi
#: Sub-steps per period of the exact core in the fit (at least; see :func:`_plan`).
MIN_STEPS_PER_PERIOD_FIT = 64.0
#: chi2 quantile of one degree of freedom at 95 %.
CHI2_95 = 3.841458820694124
#: Likelihood-ratio threshold for macro-slip: chi2 with 2 degrees of freedom at 0.1 %.
CHI2_MACRO = 13.815510557964274
#: A record is used for a mode only if its window spans at least this amplitude ratio.
MIN_RANGE = 1.5
#: Macro-slip values whose 95 % interval is wider than this (relative half-width) are warned about.
WIDE_MACRO = 0.10
#: Collapse above this is warned about.
COLLAPSE_WARN = 0.10

MICRO_NAMES = ("f0", "zeta", "chi", "lnR")
MACRO_NAMES = ("f0", "zeta", "chi", "lnFs", "share", "beta")


# ------------------------------------------------------------------------------------------
# one record's data for one mode
# ------------------------------------------------------------------------------------------
@dataclass
class Segment:
    """What one record contributes to the fit of one mode.

    All sample positions are relative to the impact sample ``index`` of the record.
    """

    record: int
    source: str
    quantity: str
    power: int
    dt: float
    t0: float                # time of the mirror sample [s]
    t_imp: float             # impact time [s]
    n_use: int               # samples processed (from the mirror sample)
    idx: np.ndarray          # fit samples (positions)
    lnA: np.ndarray          # record's log envelope at idx
    psi: np.ndarray          # record's phase at idx
    sigma: float             # noise of the analytic signal per component
    noise_from: str
    weights: np.ndarray      # (n_channels,) modal-filter weights
    channels: tuple          # channel names
    phi: np.ndarray          # (n_channels,) this mode's shapes at those channels
    curve: P.ModeCurves | None = None
    sensor_curves: list = field(default_factory=list)   # (channel, ModeCurves)
    amp_range: tuple = (0.0, 0.0)   # modal displacement amplitude range of the window
    cidx: np.ndarray | None = None  # samples of the curves (the same for the simulation)
    f_c: float = 0.0                # frequency that sets the curves' smoothing [Hz]
    level: float = 0.0       # A at the window start / noise floor

    @property
    def k1(self) -> int:
        """First processed sample at or after the impact."""
        return 0 if self.t0 >= self.t_imp else 1

    @property
    def delta(self) -> float:
        """Time from the impact to sample ``k1`` [s]."""
        return self.t0 + self.k1 * self.dt - self.t_imp

    @property
    def w(self) -> np.ndarray:
        """Weight of each fit sample, ``A / sigma``."""
        return np.exp(self.lnA) / self.sigma


def _choose_channels(record: Record):
    """The response channels of the quantity most channels measure (ties: a, v, x)."""
    groups: dict[str, list] = {}
    for c in record.responses:
        groups.setdefault(c.quantity, []).append(c)
    order = {"a": 0, "v": 1, "x": 2}
    q = max(groups, key=lambda k: (len(groups[k]), -order[k]))
    ignored = [c.name for c in record.responses if c.quantity != q]
    return q, groups[q], ignored


# ------------------------------------------------------------------------------------------
# simulation of many ring-downs of one mode at once
# ------------------------------------------------------------------------------------------
def _plan(f0: float, dt: float) -> tuple[float, int]:
    """``steps_per_period`` for the core: at least MIN_STEPS_PER_PERIOD_FIT sub-steps per period,
    a whole number of them per sample, and that number unchanged while the fit moves f0.

    The core splits a sample step into ``ceil(dt spp f0)`` sub-steps; putting ``dt spp f0``
    half-way between two integers keeps that count, hence the discretization, fixed for f0 within
    ``+-0.5/(n_sub - 0.5)`` of the start, so finite differences see a smooth function.
    """
    n_sub = max(1, int(math.ceil(dt * MIN_STEPS_PER_PERIOD_FIT * f0)))
    return (n_sub - 0.5) / (dt * f0), n_sub


def _impulse_state(v0, f0, zeta, delta):
    """State of a linear oscillator ``delta`` after an impulse ``v0`` (modal mass 1)."""
    w = _TWO_PI * f0
    wd = w * math.sqrt(max(1.0 - zeta * zeta, 1e-12))
    e = np.exp(-zeta * w * delta)
    q = v0 * e * math.sin(wd * delta) / wd
    v = v0 * e * (math.cos(wd * delta) - zeta * w / wd * math.sin(wd * delta))
    return q, v


def simulate_segments(joints, v0, segments, spp):
    """Simulate the ring-downs of one mode for many parameter sets at once.

    Parameters
    ----------
    joints : list of (f0, zeta, Fs, Kt, chi, beta), length Q
    v0 : ndarray, shape (Q, R)
        Initial velocity of each record's ring-down [m sqrt(kg)/s].
    segments : list of Segment, length R (one sample step ``dt``)
    spp : float
        ``steps_per_period`` of the core.

    Returns
    -------
    list of ndarray
        Per segment, shape (n_use, Q): the record's quantity (x, v or a) on its samples from
        the mirror sample on (zero before the impact).
    """
    Q, R = len(joints), len(segments)
    modes = []
    q0 = np.empty(Q * R)
    qd0 = np.empty(Q * R)
    for q, (f0, zeta, Fs, Kt, chi, beta) in enumerate(joints):
        jp = JointParams(Fs, Kt, chi, beta)
        for r, s in enumerate(segments):
            k = q * R + r
            modes.append(Mode(f"m{k}", f0, zeta, jp))
            q0[k], qd0[k] = _impulse_state(v0[q, r], f0, zeta, s.delta)
    ps = ParameterSet("fit", "fit", "", Provenance(), tuple(modes), ())
    sim = ModalSimulator(ps, steps_per_period=spp, q0=q0, qdot0=qd0)
    M = Q * R
    dt = segments[0].dt
    n_steps = max(s.n_use - s.k1 for s in segments)
    qtys = sorted({s.quantity for s in segments})
    names = {"x": "q", "v": "qdot", "a": "qddot"}
    pos = {qt: sim.output_index(names[qt], 0) for qt in qtys}
    out = {qt: np.empty((n_steps, M)) for qt in qtys}
    vals = sim.output_values()
    for qt in qtys:
        out[qt][0] = vals[pos[qt]: pos[qt] + M]
    for k in range(1, n_steps):
        ok, msg = sim.step(dt)
        if not ok:
            raise InputError(f"simulated ring-down failed: {msg}")
        vals = sim.output_values()
        for qt in qtys:
            out[qt][k] = vals[pos[qt]: pos[qt] + M]
    res = []
    for r, s in enumerate(segments):
        y = np.zeros((s.n_use, Q))
        cols = np.arange(Q) * R + r
        y[s.k1:] = out[s.quantity][: s.n_use - s.k1][:, cols]
        res.append(y)
    return res


# ------------------------------------------------------------------------------------------
# the least-squares problem of one mode
# ------------------------------------------------------------------------------------------
class _Problem:
    """Residuals of one mode's fit: unknowns ``theta`` (micro or macro names) + log v0 per record."""

    def __init__(self, segments, band, kind, spp):
        self.segs = segments
        self.band = band
        self.kind = kind
        self.names = MICRO_NAMES if kind == "micro" else MACRO_NAMES
        self.p = len(self.names)
        self.R = len(segments)
        self.spp = spp
        self.n_eval = 0   # simulated ring-downs, for the curious
        self.better = None  # a profile point below the minimum, set by _profile

    # --- parameters -> joint
    def joint(self, theta):
        if self.kind == "micro":
            f0, zeta, chi, lnR = theta
            kt = MICRO_SHARE * (_TWO_PI * f0) ** 2
            return (f0, zeta, slip_force_from_R(math.exp(lnR), kt, chi, 0.0), kt, chi, 0.0)
        f0, zeta, chi, lnFs, share, beta = theta
        return (f0, zeta, math.exp(lnFs), share * (_TWO_PI * f0) ** 2, chi, beta)

    def steps(self, x):
        """Finite-difference steps."""
        f0 = x[0]
        base = {"f0": 2e-7 * f0, "zeta": 1e-4 * max(x[1], 1e-4), "chi": 1e-4, "lnR": 1e-4,
                "lnFs": 1e-4, "share": 1e-4, "beta": 1e-3}
        return np.array([base[n] for n in self.names])

    # --- residuals of many points at once
    def evaluate(self, X):
        X = np.atleast_2d(np.asarray(X, dtype=float))
        Q = X.shape[0]
        out = np.full((Q, self.n_res), 1e3)
        joints, keep = [], []
        for q in range(Q):
            try:
                j = self.joint(X[q, : self.p])
                JointParams(j[2], j[3], j[4], j[5])
                Mode("m", j[0], j[1], JointParams(j[2], j[3], j[4], j[5]))
            except Exception:  # noqa: BLE001 - inadmissible point: large residual
                continue
            joints.append(j)
            keep.append(q)
        if not joints:
            return out
        v0 = np.exp(X[keep, self.p:])
        ys = simulate_segments(joints, v0, self.segs, self.spp)
        self.n_eval += len(joints)
        parts = []
        for s, y in zip(self.segs, ys):
            lnA, psi = P.envelope(P.analytic(y, 0, s.quantity, self.band))
            lnA, psi = lnA[s.idx], psi[s.idx]
            w = s.w[:, None]
            eA = (s.lnA[:, None] - lnA) * w
            d = s.psi[:, None] - psi
            w2 = w**2
            phi = np.sum(w2 * d, axis=0) / np.sum(w2)
            eP = (d - phi) * w
            parts += [eA, eP]
        res = np.concatenate(parts, axis=0).T
        res[~np.isfinite(res)] = 1e3
        out[keep] = res
        return out

    @property
    def n_res(self):
        return 2 * sum(s.idx.size for s in self.segs)

    def jac_points(self, x, free=None):
        """Points whose residuals give the Jacobian at x: base, one per free theta, one for all
        log v0 together (each record's residuals depend only on its own v0)."""
        free = list(range(self.p)) if free is None else free
        h = self.steps(x)
        pts = [x.copy()]
        for j in free:
            y = x.copy()
            y[j] += h[j]
            pts.append(y)
        y = x.copy()
        y[self.p:] += 1e-4
        pts.append(y)
        return pts, h

    def jac_from(self, x, res, free=None):
        """Jacobian (forward differences) from the residuals of :meth:`jac_points`."""
        free = list(range(self.p)) if free is None else free
        h = self.steps(x)
        r0 = res[0]
        cols = [(res[1 + k] - r0) / h[j] for k, j in enumerate(free)]
        dv = (res[-1] - r0) / 1e-4
        # each record's residuals ([A_r, P_r] in order) depend only on its own v0
        blocks = []
        pos = 0
        for s in self.segs:
            n = s.idx.size
            blk = np.zeros(self.n_res)
            blk[pos: pos + 2 * n] = dv[pos: pos + 2 * n]
            blocks.append(blk)
            pos += 2 * n
        return np.column_stack(cols + blocks)

    def jacobian(self, x):
        """``(residual, Jacobian)`` at x, from one batch of simulations."""
        pts, _ = self.jac_points(x)
        res = self.evaluate(np.array(pts))
        return res[0], self.jac_from(x, res)

    def solve(self, x0, lower, upper, max_iter=25):
        """Levenberg-Marquardt with simple bounds on theta (K. Levenberg, Q. Appl. Math.
        2:164-168, 1944; D. W. Marquardt, J. SIAM 11(2):431-441, 1963; diagonal scaling as in
        J. J. More, "The Levenberg-Marquardt algorithm: implementation and theory", 1978).

        Each iteration simulates the Jacobian's points in one batch and three damping values
        in a second; a parameter at a bound that the step would push out of it is held there
        for that step.  Stops when every step is below 1 % of the parameter's standard error.
        """
        p = self.p
        x = x0.copy()
        eps_lo = np.where(np.isfinite(lower), 1e-9 * (np.abs(lower) + 1e-9), 0.0)
        eps_hi = np.where(np.isfinite(upper), 1e-9 * (np.abs(upper) + 1e-9), 0.0)
        x[:p] = np.clip(x[:p], lower + eps_lo, upper - eps_hi)
        if not np.all(np.isfinite(x)):
            raise InputError(f"no finite start for the fit: {x!r}")
        lo = np.concatenate([lower, np.full(self.R, -np.inf)])
        hi = np.concatenate([upper, np.full(self.R, np.inf)])
        r, J = self.jacobian(x)
        c = float(r @ r)
        lam = 1e-3
        for _ in range(max_iter):
            g = J.T @ r
            H = J.T @ J
            d = np.maximum(np.diag(H), 1e-300)
            act = ((x <= lo) & (g > 0)) | ((x >= hi) & (g < 0))
            fr = np.flatnonzero(~act)
            cands, lams = [], (lam * 0.1, lam, lam * 10.0)
            for lm in lams:
                step = np.zeros_like(x)
                Hf = H[np.ix_(fr, fr)] + lm * np.diag(d[fr])
                step[fr] = -np.linalg.lstsq(Hf, g[fr], rcond=None)[0]
                cands.append(np.clip(x + step, lo, hi))
            R = self.evaluate(np.array(cands))
            costs = np.einsum("ij,ij->i", R, R)
            k = int(np.argmin(costs))
            if not costs[k] < c:
                lam *= 100.0
                if lam > 1e8:
                    break
                continue
            dx = cands[k] - x
            cov = np.linalg.pinv(H)
            s2 = max(1.0, c / max(1, r.size - x.size - self.R))
            se = np.sqrt(np.maximum(np.diag(cov), 1e-300) * s2)
            x, lam = cands[k], max(lams[k], 1e-9)
            small = bool(np.all(np.abs(dx) <= 0.01 * se))
            c_old, c = c, float(costs[k])
            r, J = self.jacobian(x)
            c = float(r @ r)
            if small or (c_old - c) < 1e-6 * c:
                break
        return _Solution(x, r, J, 0.5 * c)


@dataclass
class _Solution:
    x: np.ndarray
    fun: np.ndarray
    jac: np.ndarray
    cost: float


# ------------------------------------------------------------------------------------------
# results
# ------------------------------------------------------------------------------------------
@dataclass
class ModeFit:
    """The outcome for one mode.

    ``params`` maps ``f0, zeta, chi, Fs, Kt, beta, R`` to ``{"value", "interval", "source"}``
    exactly as the ``.fit.json`` file holds them.
    """

    index: int
    label: str
    mode: Mode                              # the fitted mode (template values when not excited)
    params: dict
    amplitude_range: list | None
    reached_macroslip: bool
    collapse: float | None
    warnings: list
    kind: str = "template"                  # "micro", "macro" or "template"
    segments: list = field(default_factory=list)
    start: ClosedFormFit | None = None
    chi2: float = float("nan")
    dof: int = 0
    s2: float = 1.0
    lr_macro: float | None = None
    band: P.Band | None = None
    v0: np.ndarray | None = None
    spp: float = 0.0
    curves_sim: list = field(default_factory=list)
    collapse_frequency: float | None = None
    collapse_detail: list = field(default_factory=list)
    theta: np.ndarray | None = None
    theta_names: tuple = ()
    intervals: dict = field(default_factory=dict)
    f_obs: float = 0.0                      # frequency the processing was set up for [Hz]
    cov: np.ndarray | None = None           # covariance of theta (Wald, times s2)
    kind_joint: tuple = ()                  # (f0, zeta, Fs, Kt, chi, beta) the fit simulated


@dataclass
class BuildFit:
    """All modes of one build, and the records they came from."""

    template: ParameterSet
    records: list
    modes: list
    warnings: list
    params: ParameterSet | None = None


# ------------------------------------------------------------------------------------------
# preparation of the records
# ------------------------------------------------------------------------------------------
def _search_range(template, i):
    """Where to look for mode i's frequency: within +-30 % of the template's f0 and no nearer
    to a neighbouring mode than the geometric mean of the two frequencies."""
    f = [m.f0 for m in template.modes]
    lo, hi = 0.7 * f[i], 1.3 * f[i]
    for j, fj in enumerate(f):
        if fj < f[i]:
            lo = max(lo, math.sqrt(fj * f[i]))
        elif fj > f[i]:
            hi = min(hi, math.sqrt(fj * f[i]))
    return lo, hi


def _band_edges(f_obs, template, i, ratio, fs):
    """Pass band of mode i: +-BAND_HALF_WIDTH about the observed frequency, cut at the geometric
    mean with each neighbour (template frequencies scaled by this build's ratio)."""
    lo = (1.0 - P.BAND_HALF_WIDTH) * f_obs
    hi = (1.0 + P.BAND_HALF_WIDTH) * f_obs
    for j, m in enumerate(template.modes):
        fj = m.f0 * ratio
        if j != i and fj < f_obs:
            lo = max(lo, math.sqrt(fj * f_obs))
        elif j != i and fj > f_obs:
            hi = min(hi, math.sqrt(fj * f_obs))
    return lo, min(hi, 0.45 * fs)


def record_signals(record: Record, template: ParameterSet):
    """Channels, shapes, impact and pre-trigger noise of a record (what every mode needs)."""
    q, chans, ignored = _choose_channels(record)
    pts = {p.label: p for p in template.points}
    phi = np.array([pts[c.point].shape for c in chans])        # (n_ch, N)
    X = np.column_stack([c.data for c in chans])               # (n, n_ch)
    imp = P.impact(record)
    sig = P.channel_noise(record, tuple(c.name for c in chans), imp.pre)
    return dict(q=q, chans=chans, ignored=ignored, phi=phi, X=X, imp=imp, sig=sig)


def _modes_in_band(template, f_obs, band_lo, band_hi, i):
    """Template modes whose (scaled) frequency falls inside mode i's band."""
    ratio = f_obs / template.modes[i].f0
    return [j for j, m in enumerate(template.modes)
            if j == i or band_lo <= m.f0 * ratio <= band_hi]


#: Largest condition number of the (noise-weighted) shapes at the sensors for which the modal
#: filter separates all modes at once.
MAX_CONDITION = 30.0


def _separated_modes(template, sg, f_obs, band, i):
    """The modes the modal filter separates from mode i: mode i and its nearest neighbours in
    frequency, as many as the sensors can separate (no more than the channels, a condition number
    of the noise-weighted shapes up to MAX_CONDITION), all of them when possible.  None when
    the modes inside the pass band cannot all be separated (the band-pass removes the rest)."""
    phi = sg["phi"]
    sig = sg["sig"]
    ws = phi if sig is None else phi / np.maximum(sig, 1e-300)[:, None]
    f = np.array([m.f0 for m in template.modes])
    order = [int(j) for j in np.argsort(np.abs(np.log(f / f[i]))) if j != i]
    chosen = [i]
    for j in order:
        trial = chosen + [j]
        if len(trial) > phi.shape[0] or np.linalg.cond(ws[:, trial]) > MAX_CONDITION:
            break
        chosen = trial
    inb = _modes_in_band(template, f_obs, band.f_lo, band.f_hi, i)
    if not set(inb) <= set(chosen):
        return None
    return sorted(chosen)


#: A mode counts as present in a record when its spectral peak stands this far above the median
#: of the spectrum around it.
PEAK_RATIO = 20.0


def prepare_mode(records, sigs, template, i, warn, band=None, f_obs=None):
    """Process every record for mode ``i``: band, segments (fit samples) and curves.

    ``band`` and ``f_obs`` (the mode's frequency) are found from the records unless given.
    Returns ``(band, segments, f_obs)``; ``segments`` empty when no record excites the mode above
    its noise floor.
    """
    m = template.modes[i]
    if band is None:
        lo_s, hi_s = _search_range(template, i)
        peaks = []
        for rec, sg in zip(records, sigs):
            w = P.modal_weights(sg["phi"], list(range(template.n_modes)), i, sg["sig"])
            y = sg["X"] @ w
            k = sg["imp"].index
            f, ratio = P.spectral_peak(y[k:], rec.dt, lo_s, hi_s)
            if np.isfinite(f) and ratio > PEAK_RATIO:
                peaks.append((ratio, f))
        if not peaks:
            return None, [], m.f0
        peaks.sort()
        f_obs = float(np.median([f for _, f in peaks[len(peaks) // 2:]]))
        fs = records[0].rate
        band = P.make_band(*_band_edges(f_obs, template, i, f_obs / m.f0, fs), fs)
    fs = band.fs
    per = 1.0 / f_obs
    segs = []
    for r, (rec, sg) in enumerate(zip(records, sigs)):
        if abs(rec.rate - fs) > 1e-6 * fs:
            warn(f"{rec.source}: sample rate {rec.rate:g} Hz differs from {fs:g} Hz of the "
                 f"other records; not used for mode {i + 1} ({m.label})")
            continue
        sep = _separated_modes(template, sg, f_obs, band, i)
        if sep is None:
            inb = _modes_in_band(template, f_obs, band.f_lo, band.f_hi, i)
            warn(f"{rec.source}: modes {', '.join(str(j + 1) for j in inb)} fall in one pass band "
                 f"and the {len(sg['chans'])} sensors cannot separate them")
            sep = inb
        w = P.modal_weights(sg["phi"], sep, i, sg["sig"])
        imp = sg["imp"]
        k = imp.index
        n_after = rec.time.size - k
        trim0 = band.transient + 2.0 * per
        trim1 = band.transient + 4.0 * per
        need = trim0 + trim1 + 8.0 * per
        if n_after * rec.dt < need:
            raise InputError(
                f"{rec.source}: record too short for mode {i + 1} ({m.label}, ~{f_obs:.4g} Hz): "
                f"{n_after * rec.dt:.3g} s after the impact; need at least {need:.3g} s (filter "
                f"transients of {band.transient:.3g} s at each end and 14 periods)")
        y = sg["X"] @ w
        Z = P.analytic(y, k, sg["q"], band)
        sigma, how = P.noise_level(None, None, band, w, sg["sig"])
        if sigma <= 0.0:
            tail = Z[int(0.8 * Z.shape[0]): Z.shape[0] - int(trim1 / rec.dt)]
            sigma, how = P.noise_level(None, tail, band)
        lnA, psi = P.envelope(Z, sigma)
        i0 = int(math.ceil(trim0 / rec.dt))
        i1 = Z.shape[0] - int(math.ceil(trim1 / rec.dt))
        a = np.exp(lnA)
        floor = P.FLOOR * sigma
        below = np.flatnonzero(a[i0:i1] < floor)
        # end at the first lasting drop below the floor (one period of samples below it)
        nper = max(1, int(per / rec.dt))
        end = i1
        if below.size:
            run = np.convolve((a[i0:i1] < floor).astype(int), np.ones(nper, int), "valid")
            hit = np.flatnonzero(run == nper)
            if hit.size:
                end = i0 + int(hit[0])
        if end - i0 < 8.0 * per / rec.dt or a[i0] < MIN_RANGE * max(a[end - 1], floor):
            warn(f"{rec.source}: mode {i + 1} ({m.label}) is barely excited (its response stays "
                 f"within {a[i0] / max(floor, 1e-300) * P.FLOOR:.3g}x the noise); record not "
                 "used for this mode")
            continue
        step = max(1, int(round(1.0 / (band.enbw * rec.dt))))
        idx = np.arange(i0, end, step)
        # the processed length: the window plus two transients (identical for the simulation)
        n_use = min(Z.shape[0], end + int(math.ceil((2 * band.transient + 4 * per) / rec.dt)))
        Zu = P.analytic(y[: k + n_use], k, sg["q"], band)
        lnA_u, psi_u = P.envelope(Zu, sigma)
        seg = Segment(record=r, source=rec.source, quantity=sg["q"], power=P.QUANTITY_POWER[sg["q"]],
                      dt=rec.dt, t0=float(rec.time[k]), t_imp=imp.time, n_use=n_use, idx=idx,
                      lnA=lnA_u[idx], psi=psi_u[idx], sigma=sigma, noise_from=how, weights=w,
                      channels=tuple(c.name for c in sg["chans"]), phi=sg["phi"][:, i])
        # curves: modal signal and each sensor alone
        cidx = np.arange(i0, end, max(1, int(round(per / (4 * rec.dt)))))
        if cidx.size > 600:
            cidx = np.linspace(i0, end - 1, 600).astype(int)
        tt = cidx * rec.dt
        seg.cidx, seg.f_c = cidx, f_obs
        seg.curve = P.curves(tt, lnA_u[cidx], psi_u[cidx], seg.power, f_obs)
        # the modal displacement amplitudes the fit uses: A / omega^p, omega from the phase
        om = np.gradient(seg.psi, idx * rec.dt)
        amp = np.exp(seg.lnA) / np.abs(om) ** seg.power
        seg.amp_range = (float(amp.min()), float(amp.max()))
        seg.level = float(a[i0] / floor * P.FLOOR)
        for c_i, ch in enumerate(sg["chans"]):
            ph = abs(sg["phi"][c_i, i])
            if ph < 1e-12:
                continue
            Zc = P.analytic(sg["X"][: k + n_use, c_i], k, sg["q"], band)
            s_c = (P.noise_level(None, None, band, np.array([1.0]), sg["sig"][c_i: c_i + 1])[0]
                   if sg["sig"] is not None else sigma * ph / max(np.linalg.norm(w) * ph, 1e-300))
            la_c, ps_c = P.envelope(Zc, s_c)
            good = np.exp(la_c[cidx]) > P.FLOOR * s_c
            if good.sum() < 8 or np.exp(la_c[cidx[0]]) < MIN_RANGE * P.FLOOR * s_c:
                continue
            cc = cidx[: int(np.argmin(good)) if not good.all() else cidx.size]
            if cc.size < 8:
                continue
            seg.sensor_curves.append((ch.name, P.curves(cc * rec.dt, la_c[cc], ps_c[cc], seg.power,
                                                        f_obs, scale=ph)))
        segs.append(seg)
    return band, segs, f_obs


# ------------------------------------------------------------------------------------------
# the fit of one mode
# ------------------------------------------------------------------------------------------
def _initial_v0(seg: Segment, cf: ClosedFormFit) -> float:
    """Initial velocity from the envelope at the window start, extrapolated back with the
    start's damping (linear estimate; the fit refines it)."""
    w = _TWO_PI * cf.f0
    t = seg.idx[0] * seg.dt
    zeta_here = float(np.interp(np.log(seg.amp_range[1]), np.log(seg.curve.amplitude[::-1]),
                                seg.curve.zeta[::-1])) if seg.curve is not None else cf.zeta
    A_y = math.exp(seg.lnA[0]) * math.exp(max(zeta_here, cf.zeta) * w * t)
    return A_y / w ** (seg.power - 1)


def _chi2(res):
    return float(res @ res)


def _refine_v0(prob: _Problem, x):
    """Two passes of scaling each record's v0 by its amplitude misfit at the window start."""
    for _ in range(2):
        Xs = x[None, :]
        joints = [prob.joint(x[: prob.p])]
        ys = simulate_segments(joints, np.exp(Xs[:, prob.p:]), prob.segs, prob.spp)
        for r, (s, y) in enumerate(zip(prob.segs, ys)):
            la = P.envelope(P.analytic(y, 0, s.quantity, prob.band))[0][s.idx[:3]]
            x[prob.p + r] += float(np.mean(s.lnA[:3] - la[:, 0]))
    return x


def _bounds(kind, f0):
    if kind == "micro":
        return (np.array([0.7 * f0, 0.0, -0.95, -np.inf]), np.array([1.3 * f0, 0.5, 0.0, np.inf]))
    return (np.array([0.7 * f0, 0.0, -0.95, -np.inf, 0.002, 0.0]),
            np.array([1.3 * f0, 0.5, 0.0, np.inf, 0.98, 20.0]))


def _profile(prob: _Problem, x, J, res, s2, lower, upper):
    """95 % profile-likelihood intervals of the theta parameters (see the module docstring)."""
    p = prob.p
    chi2_min = _chi2(res)
    JTJ = J.T @ J
    cov = np.linalg.pinv(JTJ)
    se = np.sqrt(np.maximum(np.diag(cov)[:p], 0.0) * s2)
    # points: for each parameter and side, theta_j fixed at the Wald end, others linearly
    # re-optimized
    starts, meta = [], []
    for j in range(p):
        for side in (-1.0, 1.0):
            d = side * math.sqrt(CHI2_95) * se[j]
            xj = x[j] + d
            if xj <= lower[j] or xj >= upper[j]:
                xj = min(max(xj, lower[j] + 1e-9 * (abs(lower[j]) + 1)), upper[j] - 1e-9 * (abs(upper[j]) + 1))
                d = xj - x[j]
            if d == 0.0:
                meta.append((j, side, 0.0, None))
                continue
            others = [k for k in range(J.shape[1]) if k != j]
            Jo = J[:, others]
            delta = -np.linalg.lstsq(Jo, J[:, j] * d, rcond=None)[0]
            y = x.copy()
            y[j] = xj
            y[others] += delta
            y[:p] = np.clip(y[:p], lower, upper)
            starts.append(y)
            meta.append((j, side, d, len(starts) - 1))
    if not starts:
        return {}
    # one Gauss-Newton step of the others at every start: Jacobians in one batch
    pts, owners = [], []
    for n, y in enumerate(starts):
        j = [m[0] for m in meta if m[3] == n][0]
        free = [k for k in range(p) if k != j]
        pp, _ = prob.jac_points(y, free)
        pts += pp
        owners.append((len(pts) - len(pp), len(pp), free))
    R = prob.evaluate(np.array(pts))
    finals = []
    for n, y in enumerate(starts):
        a, cnt, free = owners[n]
        res_n = R[a: a + cnt]
        Jn = prob.jac_from(y, res_n, free)
        step = -np.linalg.lstsq(Jn, res_n[0], rcond=None)[0]
        z = y.copy()
        cols = free + list(range(p, p + prob.R))
        z[cols] += step
        z[:p] = np.clip(z[:p], lower, upper)
        finals.append((z, _chi2(res_n[0])))
    R2 = prob.evaluate(np.array([z for z, _ in finals]))
    # a profile point below the minimum means the fit had not found it: report it
    c2 = np.array([_chi2(r) for r in R2])
    kbest = int(np.argmin(c2))
    prob.better = finals[kbest][0] if c2[kbest] < chi2_min - 0.05 * s2 else None
    out = {}
    for j in range(p):
        ends = []
        for side in (-1.0, 1.0):
            m = [mm for mm in meta if mm[0] == j and mm[1] == side][0]
            _, _, d, n = m
            if n is None:
                ends.append(x[j])
                continue
            c = min(_chi2(R2[n]), finals[n][1]) - chi2_min
            if c <= 1e-12:
                ends.append(lower[j] if side < 0 else upper[j])
                continue
            dstar = abs(d) * math.sqrt(CHI2_95 * s2 / c)
            e = x[j] + side * dstar
            ends.append(min(max(e, lower[j]), upper[j]))
        out[prob.names[j]] = (float(ends[0]), float(ends[1]), float(se[j]))
    return out


def _needs_macro(template_mode: Mode, amax: float, s2: float, prob, res) -> str | None:
    """Why the macro-slip model is tried (None: micro-slip alone explains the data)."""
    tm = joint_constants(template_mode.joint.Fs, template_mode.joint.Kt, template_mode.joint.chi,
                         template_mode.joint.beta).phimax
    if tm < 2.0 * amax:
        return "template's onset of macro-slip near the data"
    if s2 > 2.0:
        return "micro-slip fit misses the records"
    # systematic misfit of the envelope at the records' highest amplitudes
    pos, top = 0, []
    for s in prob.segs:
        n = s.idx.size
        k = max(2, n // 5)
        top.append(res[pos: pos + k])
        pos += 2 * n
    t = np.concatenate(top)
    if t.size > 4 and abs(t.mean()) * math.sqrt(t.size) / max(t.std(), 1e-12) > 4.0:
        return "systematic misfit at the highest amplitudes"
    return None


def fit_mode(i, template: ParameterSet, band, segs, f_obs, warn_mode) -> ModeFit:
    """Fit one mode from its prepared segments (see the module docstring)."""
    tm = template.modes[i]
    if not segs:
        return _template_only(i, tm, ["not excited above the noise in any record: template "
                                      "values kept, all marked 'template'"])
    amax = max(s.amp_range[1] for s in segs)
    amin = min(s.amp_range[0] for s in segs)
    a_peak = _damping_peak([s.curve for s in segs], amax)
    cut = None if a_peak is None else 0.5 * a_peak
    cf = fit_micro_slip([s.curve for s in segs], f_obs, a_max=cut)
    spp, _ = _plan(cf.f0, segs[0].dt)
    prob = _Problem(segs, band, "micro", spp)
    lo, hi = _bounds("micro", cf.f0)
    x0 = np.concatenate([[cf.f0, cf.zeta, cf.chi, math.log(cf.R)],
                         [math.log(max(_initial_v0(s, cf), 1e-300)) for s in segs]])
    x0[:4] = np.clip(x0[:4], lo + 1e-9, hi - 1e-9)
    x0 = _refine_v0(prob, x0)
    kind, lr, macro = "micro", None, None
    if a_peak is not None:
        # macro-slip is likely: fit it first, from the onset at the damping peak; the micro-slip
        # fit then only has to show it is much worse
        macro = _try_macro(segs, band, spp, x0, tm, (0.7 * a_peak, a_peak, 1.4 * a_peak),
                           chi2_ref=_chi2(prob.evaluate(x0[None, :])[0]))
        sol = prob.solve(x0, lo, hi, max_iter=8 if macro is not None else 30)
    else:
        sol = prob.solve(x0, lo, hi)
    x, res = sol.x, sol.fun
    dof = max(1, res.size - x.size - len(segs))
    chi2 = _chi2(res)
    s2 = max(1.0, chi2 / dof)
    if macro is None and _needs_macro(tm, amax, chi2 / dof, prob, res):
        macro = _try_macro(segs, band, spp, x, tm, (0.4 * amax, 0.6 * amax, 0.85 * amax),
                           chi2_ref=chi2)
    if macro is not None:
        lr = (chi2 - macro[2]) / max(1.0, macro[2] / max(1, res.size - macro[0].size - len(segs)))
        f0m, _, chim, lnfs, share, betam = macro[0][:6]
        pm = joint_constants(math.exp(lnfs), share * (_TWO_PI * f0m) ** 2, chim, betam).phimax
        if lr > CHI2_MACRO and pm < amax:
            kind = "macro"
    if kind == "micro" and a_peak is not None and macro is not None:
        # the micro-slip fit was cut short for the likelihood-ratio test: finish it
        sol = prob.solve(x, lo, hi)
        x, res = sol.x, sol.fun
        chi2 = _chi2(res)
        s2 = max(1.0, chi2 / dof)
    if kind == "macro":
        prob = _Problem(segs, band, "macro", spp)
        x, res, J = macro[0], macro[1], macro[3]
        lo, hi = _bounds("macro", x[0])
        dof = max(1, res.size - x.size - len(segs))
        chi2 = _chi2(res)
        s2 = max(1.0, chi2 / dof)
    else:
        J = sol.jac
    intervals = _profile(prob, x, J, res, s2, lo, hi)
    if getattr(prob, "better", None) is not None:
        # the profile found a lower chi2 than the fit: fit again from there, once
        sol2 = prob.solve(prob.better, lo, hi)
        if _chi2(sol2.fun) < chi2:
            x, res, J = sol2.x, sol2.fun, sol2.jac
            chi2 = _chi2(res)
            s2 = max(1.0, chi2 / dof)
        intervals = _profile(prob, x, J, res, s2, lo, hi)
    warns = list(warn_mode)
    theta = x[: prob.p]
    f0, zeta, chi = float(theta[0]), float(theta[1]), float(theta[2])
    w0sq = (_TWO_PI * f0) ** 2
    iv = intervals
    ci = (lambda n: [iv[n][0], iv[n][1]] if n in iv else None)
    params = {"f0": {"value": f0, "interval": ci("f0"), "source": "data"},
              "zeta": {"value": zeta, "interval": ci("zeta"), "source": "data"},
              "chi": {"value": chi, "interval": ci("chi"), "source": "data"}}
    if kind == "micro":
        R = math.exp(theta[3])
        share = tm.joint.Kt / tm.omega0 ** 2
        beta = tm.joint.beta
        kt = share * w0sq
        Fs = slip_force_from_R(R, kt, chi, beta)
        lnr = iv.get("lnR")
        params.update({
            "Fs": {"value": Fs, "interval": None, "source": "template"},
            "Kt": {"value": kt, "interval": None, "source": "template"},
            "beta": {"value": beta, "interval": None, "source": "template"},
            "R": {"value": R, "interval": [math.exp(lnr[0]), math.exp(lnr[1])] if lnr else None,
                  "source": "data"}})
        pm = joint_constants(Fs, kt, chi, beta).phimax
        if pm < amax:
            warns.append(f"the template's joint-stiffness share {share:.3g} and beta {beta:.3g} put "
                         f"the onset of macro-slip at {pm:.3g} m*sqrt(kg), below the largest "
                         f"amplitude the records reach ({amax:.3g}) without showing macro-slip: "
                         "the records' slip force is higher than Fs given here")
    else:
        lnfs, share, beta = float(theta[3]), float(theta[4]), float(theta[5])
        Fs, kt = math.exp(lnfs), share * w0sq
        c = joint_constants(Fs, kt, chi, beta)
        wide = {"Fs": (math.exp(iv["lnFs"][1]) - math.exp(iv["lnFs"][0])) / 2.0 / Fs,
                "Kt": (iv["share"][1] - iv["share"][0]) / 2.0 / share} if (
            "lnFs" in iv and "share" in iv) else {}
        if wide and max(wide.values()) > WIDE_MACRO:
            warns.append(
                f"the records reach only {amax / c.phimax:.2g}x the fitted onset of macro-slip "
                f"({c.phimax:.3g} m*sqrt(kg)): Fs and Kt are determined to +-{100 * wide['Fs']:.2g} % "
                f"and +-{100 * wide['Kt']:.2g} % only (95 %); records at higher levels narrow "
                "them")
        params.update({
            "Fs": {"value": Fs, "interval": [math.exp(iv["lnFs"][0]), math.exp(iv["lnFs"][1])]
                   if "lnFs" in iv else None, "source": "data"},
            "Kt": {"value": kt, "interval": [iv["share"][0] * w0sq, iv["share"][1] * w0sq]
                   if "share" in iv else None, "source": "data"},
            "beta": {"value": beta, "interval": ci("beta"), "source": "data"},
            "R": {"value": c.R, "interval": None, "source": "data"}})
    mode = Mode(tm.label, f0, max(zeta, 0.0),
                JointParams(params["Fs"]["value"], params["Kt"]["value"], chi,
                            params["beta"]["value"]), tm.base_participation)
    if chi2 / dof > 4.0:
        warns.append(f"the simulated ring-downs miss the records by more than their noise "
                     f"(chi2/dof = {chi2 / dof:.3g}): intervals widened by "
                     f"{math.sqrt(s2):.3g}x; look at the residuals in the report")
    for n in ("chi", "zeta"):
        if n in iv and (iv[n][0] <= lo[prob.names.index(n)] or iv[n][1] >= hi[prob.names.index(n)]):
            warns.append(f"the 95 % interval of {n} reaches the end of its allowed range")
    mf = ModeFit(index=i + 1, label=tm.label, mode=mode, params=params,
                 amplitude_range=[amin, amax], reached_macroslip=(kind == "macro"),
                 collapse=None, warnings=warns, kind=kind, segments=segs, start=cf, chi2=chi2,
                 dof=dof, s2=s2, lr_macro=lr, band=band, v0=np.exp(x[prob.p:]), spp=spp,
                 theta=theta, theta_names=prob.names, intervals=intervals, f_obs=f_obs,
                 cov=np.linalg.pinv(J.T @ J)[: prob.p, : prob.p] * s2,
                 kind_joint=prob.joint(theta))
    _collapse(mf, prob, x)
    return mf


def _macro_start(x_micro, beta, a_onset):
    """Macro-slip parameters with the micro-slip values of ``x_micro`` (f0, zeta, chi, ln R) and
    the onset of macro-slip at ``a_onset`` (Segalman 2005, physics sheet sec. 1:
    ``Kt = R phimax^(chi+1) (1+beta)/(chi+1)``, ``Fs = R phimax^(chi+2) (1/(chi+2) + beta/(chi+1))``),
    or None when that would make the joint stiffer than the mode."""
    f0, zeta, chi, lnR = x_micro[:4]
    R = math.exp(lnR)
    w0sq = (_TWO_PI * f0) ** 2
    kt = R * a_onset ** (chi + 1.0) * (1.0 + beta) / (chi + 1.0)
    if not kt < 0.95 * w0sq:
        return None
    fs = R * a_onset ** (chi + 2.0) * (1.0 / (chi + 2.0) + beta / (chi + 1.0))
    return np.concatenate([[f0, zeta, chi, math.log(fs), kt / w0sq, beta], x_micro[4:]])


def _try_macro(segs, band, spp, x_micro, tm, onsets, chi2_ref=None, tries=3):
    """Fit the macro-slip model; ``(x, residual, chi2, jacobian)`` or None.

    The starts are a few onsets of macro-slip (``onsets``, amplitudes) and two values of beta,
    ranked by their misfit in one batch of simulations; Levenberg-Marquardt refines the best start
    of the best two onsets (of a third too while neither beats ``chi2_ref``, the micro-slip
    fit's), and the better result is kept: the misfit has shallow valleys along Fs-beta where a
    single start can stall.
    """
    prob = _Problem(segs, band, "macro", spp)
    lo, hi = _bounds("macro", x_micro[0])
    starts, onset_of = [], []
    for a in onsets:
        for beta in (tm.joint.beta, 0.5 * tm.joint.beta + 0.05):
            x0 = _macro_start(x_micro, beta, a)
            if x0 is not None:
                x0[:6] = np.clip(x0[:6], lo, hi)
                starts.append(x0)
                onset_of.append(a)
    if not starts:
        return None
    costs = np.einsum("ij,ij->i", *(2 * [prob.evaluate(np.array(starts))]))
    # the best-ranked start of each onset, best onsets first
    order, seen = [], set()
    for k in np.argsort(costs):
        if onset_of[int(k)] not in seen:
            seen.add(onset_of[int(k)])
            order.append(int(k))
    best = None
    for n, k in enumerate(order[:tries]):
        try:
            sol = prob.solve(starts[k], lo, hi)
        except InputError:
            continue
        if best is None or sol.cost < best.cost:
            best = sol
        if n >= 1 and (chi2_ref is None or 2.0 * best.cost < chi2_ref):
            break   # two onsets tried and better than the micro-slip fit
    if best is None:
        return None
    return best.x, best.fun, _chi2(best.fun), best.jac


def _damping_peak(curve_list, amax):
    """Amplitude of an interior maximum of the pooled damping curve, or None.

    Ring-down damping rises with amplitude in micro-slip (log-log slope chi + 1) and falls again
    in macro-slip (the joint part goes as 2 Fs/(pi k A), physics sheet sec. 5): a maximum below
    the top of the data, with the damping there at least 20 % lower, hints at macro-slip.
    """
    A = np.concatenate([c.amplitude for c in curve_list])
    z = np.concatenate([c.zeta for c in curve_list])
    ok = (A > 0) & np.isfinite(z)
    A, z = A[ok], z[ok]
    if A.size < 16:
        return None
    edges = np.geomspace(A.min(), A.max() * (1 + 1e-12), max(6, int(8 * math.log10(A.max() / A.min())) + 1))
    k = np.digitize(A, edges) - 1
    med = np.array([np.median(z[k == b]) if np.any(k == b) else np.nan for b in range(edges.size - 1)])
    good = np.flatnonzero(np.isfinite(med))
    if good.size < 4:
        return None
    b = good[int(np.nanargmax(med[good]))]
    top = med[good[-1]]
    if b >= good[-2] or not top < 0.8 * med[b]:
        return None
    return float(math.sqrt(edges[b] * edges[b + 1]))


def _template_only(i, tm: Mode, warns):
    params = {n: {"value": v, "interval": None, "source": "template"} for n, v in
              (("f0", tm.f0), ("zeta", tm.zeta), ("chi", tm.joint.chi), ("Fs", tm.joint.Fs),
               ("Kt", tm.joint.Kt), ("beta", tm.joint.beta))}
    params["R"] = {"value": tm.joint.R, "interval": None, "source": "template"}
    return ModeFit(index=i + 1, label=tm.label, mode=tm, params=params, amplitude_range=None,
                   reached_macroslip=False, collapse=None, warnings=warns, kind="template")


# ------------------------------------------------------------------------------------------
# collapse
# ------------------------------------------------------------------------------------------
def _collapse(mf: ModeFit, prob: _Problem, x):
    """RMS relative deviation of every record's and sensor's damping curve from the fitted
    model's (simulated and processed alike, per record); the same for frequency."""
    segs = prob.segs
    ys = simulate_segments([prob.joint(x[: prob.p])], np.exp(x[prob.p:])[None, :], segs, prob.spp)
    dz, df, detail = [], [], []
    for s, y in zip(segs, ys):
        Z = P.analytic(y[:, 0], 0, s.quantity, prob.band)
        lnA, psi = P.envelope(Z)
        cidx = s.cidx
        sim_curve = P.curves(cidx * s.dt, lnA[cidx], psi[cidx], s.power, s.f_c)
        mf.curves_sim.append(sim_curve)
        for name, c in [("modal", s.curve)] + list(s.sensor_curves):
            lo, hi = float(c.amplitude.min()), float(c.amplitude.max())
            if not hi > lo:
                continue
            grid = np.geomspace(lo, hi, max(4, int(20 * math.log10(hi / lo))))
            zc, fc = c.at(grid)
            zs, fsim = sim_curve.at(grid)
            ok = np.isfinite(zc) & np.isfinite(zs) & (zs > 0)
            if ok.sum() < 2:
                continue
            rz = zc[ok] / zs[ok] - 1.0
            rf = fc[ok] / fsim[ok] - 1.0
            dz.append(rz)
            df.append(rf)
            detail.append({"record": s.source, "signal": name,
                           "spread": float(np.sqrt(np.mean(rz**2))),
                           "spread_frequency": float(np.sqrt(np.mean(rf**2)))})
    if dz:
        mf.collapse = float(np.sqrt(np.mean(np.concatenate(dz) ** 2)))
        mf.collapse_frequency = float(np.sqrt(np.mean(np.concatenate(df) ** 2)))
        mf.collapse_detail = detail
        if mf.collapse > COLLAPSE_WARN:
            worst = max(detail, key=lambda d: d["spread"])
            mf.warnings.append(
                f"curves do not collapse: damping of the records and sensors differs from the "
                f"fitted curve by {100 * mf.collapse:.3g} % rms (worst: "
                f"{Path(worst['record']).name}, "
                f"{worst['signal']}, {100 * worst['spread']:.3g} %): mode coupling, a sensor or "
                "impact point that sees this mode weakly, or a joint slipping in several modes")


# ------------------------------------------------------------------------------------------
# the build
# ------------------------------------------------------------------------------------------
def fit_build(records, template: ParameterSet) -> BuildFit:
    """Fit every mode of ``template`` to the records of one build.

    Parameters
    ----------
    records : list of Record
        Read and checked against ``template`` (:func:`jointfmu.records.read_record`).
    template : ParameterSet

    Returns
    -------
    BuildFit
        With ``modes`` (one :class:`ModeFit` per template mode); ``params`` is filled in by
        :func:`jointfmu.identify.result.fitted_parameter_set`.

    Raises
    ------
    InputError
        A record too short for a mode, or no records.
    """
    if not records:
        raise InputError("no records given: fit needs at least one ring-down record")
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - a declared dependency; the fit works without it
        return _fit_build(records, template)
    # The fit builds thousands of 5x5 matrix exponentials (the core's step coefficients) and
    # small least-squares systems: BLAS threads only add overhead, and on a busy machine they
    # make it about three times slower (measured).
    with threadpool_limits(limits=1, user_api="blas"):
        return _fit_build(records, template)


def _fit_build(records, template: ParameterSet) -> BuildFit:
    build_warn: list[str] = []
    sigs = []
    for rec in records:
        sg = record_signals(rec, template)
        if sg["ignored"]:
            build_warn.append(f"{rec.source}: channels {', '.join(sg['ignored'])} measure another "
                              f"quantity than the {len(sg['chans'])} '{sg['q']}' channels and are "
                              "not used")
        if sg["sig"] is None:
            build_warn.append(f"{rec.source}: no pre-trigger (under 32 samples before the "
                              "impact): noise estimated from the tail of the record")
        sigs.append(sg)
    modes = []
    for i in range(template.n_modes):
        wm: list[str] = []
        band, segs, f_obs = prepare_mode(records, sigs, template, i, wm.append)
        modes.append(fit_mode(i, template, band, segs, f_obs, wm))
    return BuildFit(template=template, records=list(records), modes=modes, warnings=build_warn)
