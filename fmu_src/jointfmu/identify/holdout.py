"""A record held out of the fit, predicted by the fitted model.

The check an engineer trusts most: fit the build without one record, then simulate that record
with the fitted model and compare.  Each mode's initial velocity comes from the record's force
channel when it has one (modal impulse ``phi_p,i * integral F dt``, a true prediction; common
practice of impact testing), else it is the one value fitted to the record (its envelope at the
start of the window), and the rest of the ring-down is predicted.  The record and the simulation
go through the same processing (:mod:`.process`), and the envelopes are compared over the
record's window: ``ln(A_rec / A_sim)`` is the relative envelope error.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..records import Record
from . import process as P
from .fit import BuildFit, ModeFit, Segment, prepare_mode, record_signals, simulate_segments

__all__ = ["CLEAN", "ModePrediction", "predict_record"]

#: Envelope errors are taken where the record's envelope is at least this many times its noise
#: (the noise then changes it by under 1 %).
CLEAN = 100.0


@dataclass(frozen=True)
class ModePrediction:
    """One mode of a held-out record against the fitted model's simulation of it.

    Attributes
    ----------
    index, label :
        The mode.
    t : ndarray
        Times after the impact of the compared samples [s].
    amplitude_record, amplitude_model : ndarray
        Modal displacement envelopes [m sqrt(kg)] (processed alike).
    rms_error, max_error : float
        RMS and largest ``|ln(A_rec / A_sim)|`` (relative envelope error) over the samples of
        the window where the record's envelope is at least :data:`CLEAN` times its noise.
    v0_from : str
        ``"force channel"`` or ``"fitted to the record's envelope"``.
    frequency : float
        The mode's frequency in the records [Hz].
    signal_record, signal_model : ndarray
        The processed (band-passed) modal signal of the record and of the simulation, shape
        (n,), on the record's samples from the impact on; the simulation's phase is its own
        (a per-record phase offset is not predicted).
    """

    index: int
    label: str
    t: np.ndarray
    amplitude_record: np.ndarray
    amplitude_model: np.ndarray
    rms_error: float
    max_error: float
    v0_from: str
    signal_record: np.ndarray
    signal_model: np.ndarray
    frequency: float


def _impulse(record: Record) -> tuple[str, float] | None:
    """(point label, impulse N s) of the strongest force channel, or None.

    The force summed over the pulse and three times its width on either side (at least 16
    samples), less the channel's median: an anti-alias filter spreads a short pulse into a main
    lobe with side lobes of the opposite sign, and only the whole keeps the impulse (the filter's
    gain at zero frequency is one).
    """
    if not record.forces:
        return None
    c = max(record.forces, key=lambda ch: float(np.max(np.abs(ch.data))))
    f = c.data - np.median(c.data)
    k = int(np.argmax(np.abs(f)))
    sgn = np.sign(f[k])
    lo, hi = k, k
    while lo > 0 and sgn * f[lo - 1] > 0.05 * abs(f[k]):
        lo -= 1
    while hi < f.size - 1 and sgn * f[hi + 1] > 0.05 * abs(f[k]):
        hi += 1
    pad = max(16, 3 * (hi - lo + 1))
    return c.point, float(np.sum(f[max(0, lo - pad): hi + 1 + pad]) * record.dt)


def predict_record(bf: BuildFit, record: Record) -> list[ModePrediction]:
    """Predict every fitted mode of ``record`` with the model of ``bf`` (fitted without it).

    Modes the record does not excite above its noise, and modes kept from the template, are
    left out.
    """
    template = bf.template
    sg = record_signals(record, template)
    pts = {p.label: p for p in template.points}
    imp = _impulse(record)
    out = []
    for i, mf in enumerate(bf.modes):
        if mf.kind == "template" or mf.band is None:
            continue
        warn: list[str] = []
        _, segs, _ = prepare_mode([record], [sg], template, i, warn.append, band=mf.band,
                                  f_obs=mf.f_obs)
        if not segs:
            continue
        seg = segs[0]
        m = mf.mode
        joint = (m.f0, m.zeta, m.joint.Fs, m.joint.Kt, m.joint.chi, m.joint.beta)
        if imp is not None and imp[0] in pts:
            v0 = pts[imp[0]].shape[i] * imp[1]   # signed: the phase is predicted too
            how = "force channel"
        else:
            v0 = _fit_v0(mf, seg, joint)
            how = "fitted to the record's envelope"
        y = simulate_segments([joint], np.array([[v0]]), [seg], mf.spp)[0][:, 0]
        Zs = P.analytic(y, 0, seg.quantity, mf.band)
        lnA, _ = P.envelope(Zs)
        d_all = seg.lnA - lnA[seg.idx]
        # compared where the record's noise adds under 1 % to its envelope
        clean = seg.w >= CLEAN
        d = d_all[clean] if clean.sum() >= 3 else d_all
        om = 2.0 * math.pi * mf.f_obs
        scale = om ** seg.power
        k = int(round((seg.t0 - record.time[0]) / record.dt))
        Zr = P.analytic((sg["X"] @ seg.weights)[: k + seg.n_use], k, seg.quantity, mf.band)
        out.append(ModePrediction(
            index=mf.index, label=mf.label, t=seg.idx * seg.dt,
            amplitude_record=np.exp(seg.lnA) / scale, amplitude_model=np.exp(lnA[seg.idx]) / scale,
            rms_error=float(np.sqrt(np.mean(d**2))), max_error=float(np.max(np.abs(d))),
            v0_from=how, signal_record=Zr.real, signal_model=Zs.real, frequency=mf.f_obs))
    return out


def _fit_v0(mf: ModeFit, seg: Segment, joint) -> float:
    """Initial velocity that matches the record's envelope over the first samples of its
    window (two passes of scaling; the decay after them is predicted)."""
    t = seg.idx[0] * seg.dt
    v0 = math.exp(seg.lnA[0]) * math.exp(joint[1] * 2 * math.pi * joint[0] * t) / (
        2 * math.pi * joint[0]) ** (seg.power - 1)
    for _ in range(3):
        y = simulate_segments([joint], np.array([[v0]]), [seg], mf.spp)[0]
        la = P.envelope(P.analytic(y, 0, seg.quantity, mf.band))[0][seg.idx[:3], 0]
        v0 *= math.exp(float(np.mean(seg.lnA[:3] - la)))
    return v0
