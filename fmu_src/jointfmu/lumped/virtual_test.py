"""Virtual ring-down tests: a hammer impact on the discrete-joint structure, recorded like a lab.

Per level: a half-sine force pulse (duration T, default 0.5 ms, peak F) at the impact point,
simulated with every joint exact (:class:`.simulate.LumpedSimulator`) on a grid ``oversample``
times finer than the record rate; at the sensors the acceleration (or velocity, displacement)
along each point's direction; the signals and the force passed through an anti-alias filter and
decimated to the record rate; seeded white sensor noise added at the stated signal-to-noise
ratio; optionally clipped at a stated range.  The record begins ``pretrigger`` seconds before the
impact.

Sensor chain (common practice for modal test acquisition; the choices are ours):

* Anti-alias filter: a linear-phase FIR low-pass with its delay compensated, as delta-sigma
  converters decimate (pass band to 0.4 x the record rate, stop band from 0.5 x, 90 dB), designed
  by the Kaiser window method (J. F. Kaiser, "Nonrecursive digital filter design using the
  I0-sinh window function", Proc. IEEE Int. Symp. Circuits and Systems, 1974;
  :func:`scipy.signal.kaiserord`, :func:`scipy.signal.firwin`), applied with
  :func:`scipy.signal.upfirdn`.  Zero phase: it rings slightly before the impact, as such
  converters do.
* Noise: per channel, Gaussian white at the record rate with RMS = (RMS of the noise-free channel
  from the impact to the end) x 10^(-SNR/20); drawn from NumPy's PCG64 generator seeded with
  (seed, level index, channel index), so every record is reproducible bit for bit.
* Clipping (optional): response channels limited to +-clip (in their unit) after the noise, as a
  sensor or converter at the end of its range; the force channel is not clipped.

The record's time starts at 0 with the first pre-trigger sample; the impact starts at
``pretrigger`` (rounded to a sample).  Channels: ``point.<sensor>.a|v|x`` and
``point.<impact>.force``, in the record formats of :mod:`jointfmu.records`.
"""
from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import scipy.signal

from ..errors import InputError, SimulationError
from ..fileio import atomic_write
from ..params.names import point_name
from ..physics.iwan import joint_constants
from .model import LumpedModel
from .modes import StuckModes, modal_iwan_template, stuck_modes
from .simulate import DEFAULT_STEPS_PER_PERIOD, QUANTITIES, LumpedSimulator

__all__ = ["VirtualTest", "LevelResult", "simulate_impact", "run_virtual_test", "write_campaign",
           "format_levels", "anti_alias_filter"]

#: Pass-band edge, stop-band edge (fractions of the record rate) and stop-band attenuation [dB].
AA_PASS, AA_STOP, AA_ATTEN = 0.4, 0.5, 90.0
#: The pulse is fed in at least this many pieces (each with its exact value, rate and second
#: derivative at its start): the quadratic expansion's error over a piece of T/512 is below 1e-8
#: of the pulse's effect (measured against SciPy in tests/test_lumped.py).
PULSE_PIECES = 512
#: Largest frequency of the structure, relative to the simulation rate, below which the
#: simulated signal is taken as free of aliasing before the filter.
_SIM_BAND = 0.45


@dataclass(frozen=True)
class VirtualTest:
    """Settings of a virtual test campaign (checked on construction; InputError names the field).

    Parameters
    ----------
    impact : str
        Point hit by the hammer (role ``input`` or ``both``).
    levels : tuple of float
        Peak forces of the impacts [N], > 0, one record each.
    sensors : tuple of str
        Points sensed (role ``output`` or ``both``); empty: every output point.
    rate : float
        Record sample rate [Hz].
    duration : float
        Record length [s], pre-trigger included.
    snr_db : float
        Signal-to-noise ratio of every channel [dB]; ``math.inf`` for no noise.
    seed : int
        Seed of the noise (>= 0).
    pulse : float
        Duration of the half-sine force pulse [s].
    pretrigger : float
        Time recorded before the impact [s].
    quantity : {"a", "v", "x"}
        What the sensors measure.
    clip : float or None
        Range of the response channels (in their unit), or None.
    oversample : int
        Simulation rate / record rate (raised automatically above the structure's band).
    digits : int or None
        Significant digits the recorded values are rounded to (as written; None: full
        precision).  7 digits resolve 1e-7 of a value, far below any noise a test has.
    steps_per_period : float
        Of the simulator (sub-steps per period of the highest stuck-joint mode).
    """

    impact: str
    levels: tuple[float, ...]
    sensors: tuple[str, ...] = ()
    rate: float = 5120.0
    duration: float = 2.0
    snr_db: float = 40.0
    seed: int = 0
    pulse: float = 5e-4
    pretrigger: float = 0.1
    quantity: str = "a"
    clip: float | None = None
    oversample: int = 8
    steps_per_period: float = DEFAULT_STEPS_PER_PERIOD
    digits: int | None = 7

    def __post_init__(self) -> None:
        object.__setattr__(self, "levels", tuple(float(x) for x in self.levels))
        object.__setattr__(self, "sensors", tuple(self.sensors))

        def need(ok, what, value, allowed):
            if not ok:
                raise InputError(f"virtual test {what} = {value!r}: {allowed}")

        need(len(self.levels) > 0, "levels", list(self.levels), "give at least one peak force in N")
        for x in self.levels:
            need(math.isfinite(x) and x > 0.0, "level", x, "each peak force must be a finite number > 0 N")
        need(math.isfinite(self.rate) and self.rate > 0.0, "rate", self.rate, "must be > 0 Hz")
        need(math.isfinite(self.duration) and self.duration > 0.0, "duration", self.duration, "must be > 0 s")
        need(self.snr_db > 0.0 and not math.isnan(self.snr_db), "snr", self.snr_db,
             "must be > 0 dB (inf for no noise)")
        need(isinstance(self.seed, int) and self.seed >= 0, "seed", self.seed, "must be an integer >= 0")
        need(math.isfinite(self.pulse) and self.pulse > 0.0, "pulse", self.pulse, "must be > 0 s")
        need(math.isfinite(self.pretrigger) and 0.0 <= self.pretrigger, "pretrigger", self.pretrigger,
             "must be >= 0 s")
        need(self.pretrigger + self.pulse < self.duration, "duration", self.duration,
             f"must exceed pretrigger + pulse = {self.pretrigger + self.pulse:g} s")
        need(self.quantity in QUANTITIES, "quantity", self.quantity,
             "allowed: " + ", ".join(QUANTITIES))
        need(self.clip is None or (math.isfinite(self.clip) and self.clip > 0.0), "clip", self.clip,
             "must be a finite range > 0 in the unit of the quantity")
        need(isinstance(self.oversample, int) and self.oversample >= 2, "oversample", self.oversample,
             "must be an integer >= 2")
        need(self.digits is None or (isinstance(self.digits, int) and 3 <= self.digits <= 17),
             "digits", self.digits, "must be an integer from 3 to 17, or None")


@dataclass(frozen=True, eq=False)
class LevelResult:
    """One impact level: the record and what the structure did.

    Attributes
    ----------
    index : int
        Position of the level in the campaign (0-based; names its file, seeds its noise).
    level : float
        Peak force [N].
    time : ndarray, shape (n,)
        Record times [s].
    channels : dict of str -> ndarray
        Record channels by name (responses first, force last).
    clean : dict of str -> ndarray
        The same channels before noise and clipping (filtered).
    noise_rms : dict of str -> float
        RMS of the noise added per channel.
    peak_modal : ndarray, shape (N,)
        Largest |q_i| of every stuck-joint mode [m sqrt(kg)].
    phimax : ndarray, shape (n_template,)
        Modal slip amplitude of each template mode's equivalent joint [m sqrt(kg)].
    joint_peak_ratio : ndarray, shape (n_joints,)
        Largest |F_j| / Fs_j.
    joint_macroslip : ndarray of bool, shape (n_joints,)
        Whether each joint reached macro-slip.
    energy_residual : float
        Energy balance error of the simulation [J] (relative to ``energy_input``).
    energy_input : float
        Work of the impact [J].
    """

    index: int
    level: float
    time: np.ndarray
    channels: dict
    clean: dict
    noise_rms: dict
    peak_modal: np.ndarray
    phimax: np.ndarray
    joint_peak_ratio: np.ndarray
    joint_macroslip: np.ndarray
    energy_residual: float
    energy_input: float

    @property
    def mode_macroslip(self) -> np.ndarray:
        """Per template mode: peak modal amplitude at or beyond the equivalent joint's phimax."""
        n = self.phimax.shape[0]
        return self.peak_modal[:n] >= self.phimax


def anti_alias_filter(rate: float, oversample: int) -> tuple[np.ndarray, int]:
    """The FIR taps at ``rate * oversample`` and the delay in record samples (see the module
    docstring).  The length is 2 D oversample + 1, so the delay is D whole record samples."""
    fs = rate * oversample
    width = (AA_STOP - AA_PASS) * rate
    numtaps, beta = scipy.signal.kaiserord(AA_ATTEN, width / (0.5 * fs))
    D = int(math.ceil((numtaps - 1) / (2 * oversample)))
    L = 2 * D * oversample + 1
    taps = scipy.signal.firwin(L, 0.5 * (AA_PASS + AA_STOP) * rate, window=("kaiser", beta), fs=fs)
    return taps, D


def _oversample_for(settings: VirtualTest, modes: StuckModes) -> int:
    ov = settings.oversample
    fmax = float(modes.frequency.max())
    while fmax >= _SIM_BAND * settings.rate * ov:
        ov += 1
    return ov


def simulate_impact(model: LumpedModel, impact: str, force: float, pulse: float, dt: float,
                    n_samples: int, points, quantity: str = "a",
                    steps_per_period: float = DEFAULT_STEPS_PER_PERIOD,
                    modes: StuckModes | None = None):
    """The response to a half-sine force pulse starting at t = 0, sampled every ``dt``.

    The pulse F sin(pi t / T) for 0 <= t <= T is fed to the simulator in pieces of at most one
    sub-step and at most T / ``PULSE_PIECES``, each with the pulse's exact value, rate and second
    derivative at its start, and ending on every sample time and at T; afterwards the structure
    rings down freely.

    Parameters
    ----------
    impact : str
        Input point hit.
    force, pulse : float
        Peak force F [N] and duration T [s].
    dt : float
        Sample interval [s].
    n_samples : int
        Samples, the first at t = 0 (at rest).
    points : sequence of str
        Points sensed.
    quantity : {"a", "v", "x"}

    Returns
    -------
    (y, f, sim)
        y, shape (n_samples, len(points)): the sensed quantity; f, shape (n_samples,): the force;
        sim: the :class:`LumpedSimulator` at the last sample (peaks, energies, joint states).
    """
    sim = LumpedSimulator(model, steps_per_period, modes=modes)
    T = float(pulse)
    w = math.pi / T
    imp = [p.label for p in model.input_points].index(impact)
    n_in = len(model.input_points)
    S = model.point_vectors([model.point(s) for s in points])
    y = np.zeros((n_samples, len(points)))
    f = np.zeros(n_samples)

    def inputs_at(tau):
        fp = np.zeros((3, n_in))
        if tau < T:
            s, c = math.sin(w * tau), math.cos(w * tau)
            fp[:, imp] = (force * s, force * w * c, -force * w * w * s)
        sim.set_inputs(*fp)

    def sense():
        return S @ getattr(sim, quantity)   # sim.x, sim.v or sim.a of every DOF

    m_last = int(math.floor(T / dt)) + 1          # the first sample after the pulse
    stops = sorted({m * dt for m in range(1, m_last + 1)} | {T})
    t = 0.0
    for tb in stops:
        h_piece = min(sim.h_max, T / PULSE_PIECES) if t < T else sim.h_max
        n = max(1, int(math.ceil((tb - t) / h_piece * (1.0 - 1e-12))))
        for i in range(n):
            inputs_at(t + (tb - t) * i / n)
            ok, msg = sim.step((tb - t) / n)
            if not ok:
                raise SimulationError(f"impact of {force:g} N at {impact}: {msg}")
        t = tb
        m = round(tb / dt)
        if abs(tb - m * dt) <= 1e-9 * dt and m < n_samples:
            inputs_at(tb)
            y[m] = sense()
    for m in range(0, min(m_last + 1, n_samples)):
        if m * dt <= T:
            f[m] = force * math.sin(w * m * dt)
    inputs_at(T)
    rest = n_samples - (m_last + 1)
    if rest > 0:
        y[m_last + 1:] = sim.record(rest, dt, points, quantity)
    return y, f, sim


def run_virtual_test(model: LumpedModel, settings: VirtualTest,
                     modes: StuckModes | None = None, only=None) -> list[LevelResult]:
    """Simulate and record every level of a campaign (see the module docstring).

    ``only``: indices of the levels to run (default all); each record is the same as in the
    full campaign.

    Raises
    ------
    InputError
        Impact or sensor points unknown or of the wrong role.
    """
    labels = [p.label for p in model.points]
    if settings.impact not in labels:
        model.point(settings.impact)  # ParameterError naming the allowed points
    if settings.impact not in [p.label for p in model.input_points]:
        raise InputError(f"--impact {settings.impact}: point has role "
                         f"{model.point(settings.impact).role!r}; the impact needs a point with role "
                         "'input' or 'both' (allowed: "
                         + ", ".join(p.label for p in model.input_points) + ")")
    sensors = settings.sensors or tuple(p.label for p in model.output_points)
    if not sensors:
        raise InputError(f"{model.source}: no point with role 'output' or 'both' to sense; give "
                         "--sensors or add points")
    for s in sensors:
        model.point(s)
        if not model.point(s).is_output:
            raise InputError(f"--sensors {s}: point has role 'input'; a sensor needs a point with "
                             "role 'output' or 'both' (allowed: "
                             + ", ".join(p.label for p in model.output_points) + ")")
    if len(set(sensors)) != len(sensors):
        raise InputError(f"--sensors {','.join(sensors)}: each point once")
    modes = modes or stuck_modes(model)
    template = modal_iwan_template(model, modes=modes)
    phimax = np.array([joint_constants(m.joint.Fs, m.joint.Kt, m.joint.chi, m.joint.beta).phimax
                       for m in template.modes])
    ov = _oversample_for(settings, modes)
    taps, D = anti_alias_filter(settings.rate, ov)
    n_rec = int(round(settings.duration * settings.rate))
    i_imp = int(round(settings.pretrigger * settings.rate))
    k_imp = i_imp * ov
    n_os = (n_rec - 1) * ov + D * ov + 1
    time = np.arange(n_rec) / settings.rate
    q = settings.quantity
    results = []
    chosen = range(len(settings.levels)) if only is None else sorted(set(int(k) for k in only))
    for li in chosen:
        if not 0 <= li < len(settings.levels):
            raise InputError(f"virtual test level index {li}: allowed 0..{len(settings.levels) - 1}")
        F = settings.levels[li]
        y = np.zeros((n_os, len(sensors)))
        force = np.zeros(n_os)
        y[k_imp:], force[k_imp:], sim = simulate_impact(
            model, settings.impact, F, settings.pulse, 1.0 / (settings.rate * ov), n_os - k_imp,
            sensors, q, settings.steps_per_period, modes)
        names = [point_name(s, q) for s in sensors] + [point_name(settings.impact, "force")]
        clean, noisy, sig = {}, {}, {}
        for ci, (name, x) in enumerate(zip(names, list(y.T) + [force])):
            c = scipy.signal.upfirdn(taps, x, 1, ov)[D:D + n_rec]
            clean[name] = c
            rms = float(np.sqrt(np.mean(c[i_imp:] ** 2)))
            sd = 0.0 if math.isinf(settings.snr_db) else rms * 10.0 ** (-settings.snr_db / 20.0)
            rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence([settings.seed, li, ci])))
            noise = rng.standard_normal(n_rec)
            d = c + sd * noise
            if settings.clip is not None and not name.endswith(".force"):
                d = np.clip(d, -settings.clip, settings.clip)
            if settings.digits is not None:
                fmt = f".{settings.digits}g"
                d = np.array([float(format(x, fmt)) for x in d.tolist()])
            noisy[name] = d
            sig[name] = sd
        results.append(LevelResult(
            index=li, level=F, time=time, channels=noisy, clean=clean, noise_rms=sig,
            peak_modal=sim.peak_modal_amplitude, phimax=phimax,
            joint_peak_ratio=sim.joint_peak_ratio, joint_macroslip=sim.joint_reached_macroslip,
            energy_residual=sim.energy_residual, energy_input=sim.energy_input))
    return results


def format_levels(model: LumpedModel, modes: StuckModes, results: list[LevelResult]) -> str:
    """Per level and template mode: peak modal amplitude, its ratio to the mode's phimax, and
    macro-slip; per joint: largest |F|/Fs and macro-slip."""
    n = results[0].phimax.shape[0] if results else 0
    lines = ["peak modal amplitude per level and mode [m sqrt(kg)] (ratio to the mode's phimax; "
             "MACRO: reaches macro-slip)"]
    head = f"  {'level [N]':>10}"
    for i in range(n):
        head += f" | {modes.labels[i][:22]:>22}"
    lines.append(head)
    for r in results:
        row = f"  {r.level:>10.4g}"
        for i in range(n):
            flag = "MACRO" if r.mode_macroslip[i] else "micro"
            row += f" | {r.peak_modal[i]:9.3e} {r.peak_modal[i] / r.phimax[i]:5.2f} {flag}"
        lines.append(row)
    if model.joints:
        lines.append("joints: largest |F|/Fs per level (MACRO: reached macro-slip)")
        lines.append(f"  {'level [N]':>10}" + "".join(f" | {j.label[:14]:>14}" for j in model.joints))
        for r in results:
            lines.append(f"  {r.level:>10.4g}" + "".join(
                f" | {r.joint_peak_ratio[k]:6.3f} {'MACRO' if r.joint_macroslip[k] else 'micro':>7}"
                for k in range(model.n_joints)))
    return "\n".join(lines)


def _level_name(k: int, F: float) -> str:
    text = f"{F:g}".replace("+", "").replace(".", "p")
    return f"level{k + 1}_{text}N"


def write_campaign(model: LumpedModel, settings: VirtualTest, results: list[LevelResult],
                   out_dir, formats=("csv", "uff"), version: str = "") -> list[Path]:
    """Write one record per level (CSV and/or UFF dataset 58) and ``campaign.json`` into
    ``out_dir``; every file atomically.  Returns the paths written."""
    from ..records import Channel, Record, write_csv, write_uff

    out = Path(out_dir)
    template = modal_iwan_template(model)
    written: list[Path] = []
    summary_levels = []
    for r in results:
        comments = (
            "VIRTUAL ring-down test: simulated by jointfmu on a discrete-joint model; invented "
            "data, not a measurement",
            f"model {Path(model.source).name}" + (f" (sha256 {model.source_sha256[:16]})"
                                                  if model.source_sha256 else "")
            + f", structure {model.name}, build {model.build} ({model.build_label})",
            f"impact at point {settings.impact}: half-sine {settings.pulse * 1e3:g} ms, peak "
            f"{r.level:g} N, starts at t = {round(settings.pretrigger * settings.rate) / settings.rate:g} s",
            f"sensors {', '.join(settings.sensors or [p.label for p in model.output_points])}: "
            f"{settings.quantity}, {settings.rate:g} Hz after a linear-phase FIR anti-alias filter "
            f"(pass to {AA_PASS * settings.rate:g} Hz)",
            f"noise: white, SNR {settings.snr_db:g} dB per channel (RMS after the impact), seed "
            f"{settings.seed}" + (f"; clipped at +-{settings.clip:g}" if settings.clip else "")
            + (f"; values to {settings.digits} significant digits" if settings.digits else ""),
            f"jointfmu {version}".strip() + "; a fitted model is no substitute for qualification "
            "testing",
        )
        channels = tuple(Channel(name=n, data=d) for n, d in r.channels.items())
        rec = Record(time=r.time, channels=channels, comments=comments, source="jointfmu virtual-test")
        stem = _level_name(r.index, r.level)
        files = []
        if "csv" in formats:
            written.append(write_csv(rec, out / f"{stem}.csv"))
            files.append(f"{stem}.csv")
        if "uff" in formats:
            written.append(write_uff(rec, out / f"{stem}.uff", template))
            files.append(f"{stem}.uff")
        summary_levels.append({
            "level_N": r.level, "files": files,
            "peak_modal_amplitude": [float(x) for x in r.peak_modal[:len(template.modes)]],
            "mode_phimax": [float(x) for x in r.phimax],
            "mode_reaches_macroslip": [bool(x) for x in r.mode_macroslip],
            "joint_peak_force_ratio": {j.label: float(r.joint_peak_ratio[i])
                                       for i, j in enumerate(model.joints)},
            "joint_reached_macroslip": {j.label: bool(r.joint_macroslip[i])
                                        for i, j in enumerate(model.joints)},
            "noise_rms": {n: float(v) for n, v in r.noise_rms.items()},
            "energy_residual_relative": float(r.energy_residual / r.energy_input)
            if r.energy_input else 0.0,
        })
    summary = {
        "format": "jointfmu-virtual-test/1",
        "note": "simulated records of a discrete-joint model: invented data, not measurements",
        "model": {"file": Path(model.source).name, "sha256": model.source_sha256,
                  "name": model.name, "build": model.build, "build_label": model.build_label},
        "settings": {k: (list(v) if isinstance(v, tuple) else
                         "inf" if isinstance(v, float) and math.isinf(v) else v)
                     for k, v in asdict(settings).items()},
        "modes": [{"label": m.label, "f0": m.f0, "zeta": m.zeta} for m in template.modes],
        "levels": summary_levels,
        "jointfmu": version,
    }
    path = out / "campaign.json"
    with atomic_write(path, "w", newline="\n") as fh:
        fh.write(json.dumps(summary, indent=1, allow_nan=False) + "\n")
    written.append(path)
    return written
