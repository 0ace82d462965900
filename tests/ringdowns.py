"""Synthetic ring-down records with known answers, for the identification tests and benchmark.

Made by the SciPy reference integration (:mod:`jointfmu.physics.reference`, an independent
event-driven DOP853 integration of each mode), not by the core the fit uses: the truth is an
impulse at one point at t = 0 (modal velocities ``phi_p,i * impulse``), sampled from a
pre-trigger on.  Sensor noise is white and Gaussian, at a signal-to-noise ratio defined on each
channel's RMS after the impact (``SNR = 20 log10(rms_signal / rms_noise)``); the force channel is
a half-sine pulse of the same impulse (0.5 ms, common hammer practice) with 0.1 % noise.
"""
from __future__ import annotations

import math

import numpy as np

from jointfmu.physics.reference import simulate
from jointfmu.records import Channel, Record

__all__ = ["make_record", "with_noise", "quantity_of"]

_KEY = {"a": "qddot", "v": "qdot", "x": "q"}


def quantity_of(res: dict, quantity: str) -> np.ndarray:
    return res[_KEY[quantity]]


def make_record(params, impact_point: str, impulse: float, *, rate: float = 5120.0,
                duration: float = 2.0, pre: float = 0.05, snr_db: float | None = 40.0,
                seed: int = 0, sensors=None, quantity: str = "a", pulse: float = 0.5e-3,
                force: bool = True, source: str | None = None, rtol: float = 1e-9) -> Record:
    """One record: ``impulse`` (N s) at ``impact_point`` at t = 0, ``sensors`` (default every
    output point) measuring ``quantity``, from ``-pre`` to ``duration`` seconds.  ``rtol``: of the
    reference (1e-9 gives about 1e-8 of peak, far below the sensor noise; physics sheet sec. 7)."""
    rng = np.random.default_rng(seed)
    pts = {p.label: p for p in params.points}
    v0 = np.array(pts[impact_point].shape) * impulse
    n = int(round((pre + duration) * rate))
    t = -pre + np.arange(n) / rate
    k0 = int(np.searchsorted(t, 0.0))
    tt = t[k0:] if t[k0] == 0.0 else np.concatenate([[0.0], t[k0:]])
    res = simulate(params, tt, np.zeros((tt.size, params.n_modes)), v0=v0, rtol=rtol)
    Q = quantity_of(res, quantity)[-(n - k0):]
    sensors = sensors or [p.label for p in params.points if p.is_output]
    chans = []
    for s in sensors:
        y = np.zeros(n)
        y[k0:] = Q @ np.array(pts[s].shape)
        if snr_db is not None:
            rms = math.sqrt(float(np.mean(y[k0:] ** 2)))
            y = y + rng.standard_normal(n) * rms * 10.0 ** (-snr_db / 20.0)
        chans.append(Channel(f"point.{s}.{quantity}", y))
    if force:
        f = np.where(np.abs(t) < pulse / 2, np.cos(np.pi * t / pulse), 0.0)
        f *= impulse / (np.sum(f) / rate)
        f = f + rng.standard_normal(n) * 1e-3 * float(f.max())
        chans.append(Channel(f"point.{impact_point}.force", f))
    comments = (f"synthetic ring-down (SciPy reference), impulse {impulse:g} N s at {impact_point}",
                f"seed {seed}, SNR {snr_db} dB")
    return Record(t, tuple(chans), comments, source or f"syn_{impact_point}_{impulse:g}_{seed}.csv")


def with_noise(record: Record, snr_db: float, seed: int, source: str | None = None) -> Record:
    """The same record with fresh sensor noise (responses at ``snr_db`` on their RMS after the
    impact at t = 0, forces at 0.1 % of their peak): many noise draws of one noise-free truth."""
    rng = np.random.default_rng(seed)
    k0 = int(np.searchsorted(record.time, 0.0))
    chans = []
    for c in record.channels:
        if c.is_response:
            rms = math.sqrt(float(np.mean(c.data[k0:] ** 2)))
            scale = rms * 10.0 ** (-snr_db / 20.0)
        else:
            scale = 1e-3 * float(np.max(np.abs(c.data)))
        chans.append(Channel(c.name, c.data + rng.standard_normal(c.data.size) * scale))
    return Record(record.time, tuple(chans), record.comments + (f"noise seed {seed}",),
                  source or record.source)
