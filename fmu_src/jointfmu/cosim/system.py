"""The system around the structure: a tray FMU in a co-simulation loop with a loads model and a
feedback controller (``jointfmu cosim``).

The structure is the FMU that ``jointfmu build`` made, loaded with fmpy (``FMU2Slave``) and
stepped by the master loop of :func:`run_system`, which exchanges inputs and outputs with two
other components at every communication step:

* a **loads model** (:class:`LoadCase`): a base-acceleration profile of the chassis under the tray
  bracket, one of :data:`LOAD_CASES` (``rough_traverse``, ``motor_sweep``, ``curb_strike``).  The
  profiles are invented for the jointfmu demo scenario (a rover driving); no measured or
  standardised spectrum is claimed;
* a **controller** (:class:`ActiveDamper`): an actuator between the bracket and the power-supply
  box foot, commanded from the relative velocity sensed at that foot (collocated velocity
  feedback), through a first-order actuator lag, force-limited.

Why the loads model and the controller are plain Python components by default: they are a few
lines each, they must be seeded and bit-reproducible, and as pythonfmu FMUs they roughly double
the cost of a step (measured, ``tests/bench/bench_system.py``); the structure is the part that has
to "drop into any FMI-capable simulator", and it does so here through fmpy, stepped exactly like
an FMI master would step it.  Each component keeps the co-simulation contract (inputs held over a
step, outputs read at communication points), and :mod:`.components` packages both as FMUs of
their own: ``SystemSettings(components="fmu")`` runs the same system as three FMUs, with the same
numbers bit for bit (tested).

Coupling scheme (common practice for explicit co-simulation: Jacobi / parallel with zero-order
hold): at each communication point ``t_k = k h`` every component's outputs are read, all inputs
are set from them, and then every component steps from ``t_k`` to ``t_{k+1}``.  The controller
therefore acts on the velocity of ``t_k`` over the whole step (a delay of up to one step ``h``;
at the default h = 0.1 ms this is 15 degrees of phase at the highest tray mode, 412 Hz).

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import atexit
import hashlib
import json
import math
import os
import shutil
import sys
import tempfile
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable, Mapping, Sequence

import numpy as np

from ..fileio import atomic_write
from ..errors import InputError, SimulationError

__all__ = [
    "G0",
    "LoadCase",
    "LOAD_CASES",
    "ControllerSettings",
    "SystemSettings",
    "ActiveDamper",
    "FmuStructure",
    "LinearStructure",
    "SystemRun",
    "base_motion",
    "run_system",
    "run_structure_direct",
    "summarize",
]

#: Standard gravity [m/s^2] (a defined constant, CGPM 1901), to quote accelerations in g.
G0 = 9.80665


# ============================================================================ loads model
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


def _case(name: str) -> LoadCase:
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
    _case(case)
    n = _n_steps(step, duration)
    t = np.arange(n + 1) * float(step)
    a = _PROFILES[case](t, float(step), int(seed)) * float(level)
    return t, a


def _n_steps(step: float, duration: float) -> int:
    if not (isinstance(step, (int, float)) and math.isfinite(step) and 1e-7 <= step <= 1e-2):
        raise InputError(f"communication step {step!r} s: allowed is 1e-7 <= step <= 1e-2 s")
    if not (isinstance(duration, (int, float)) and math.isfinite(duration)
            and step <= duration <= 600.0):
        raise InputError(f"duration {duration!r} s: allowed is step <= duration <= 600 s")
    return int(round(duration / step))


# ============================================================================= controller
@dataclass(frozen=True)
class ControllerSettings:
    """Active damper: collocated velocity feedback with actuator lag and force limit.

    Attributes
    ----------
    point : str
        Point label of actuator and sensor (an input and output point of the structure).
    gain : float
        Velocity gain g [N s/m]: commanded force ``-g v``.
    tau : float
        Actuator time constant [s] (first-order lag).
    force_limit : float
        Saturation of the actuator force [N].
    """

    point: str = "psu_foot"
    gain: float = 200.0
    tau: float = 0.5e-3
    force_limit: float = 30.0

    def __post_init__(self):
        problems = []
        if not (math.isfinite(self.gain) and self.gain >= 0.0):
            problems.append(f"gain = {self.gain!r} N s/m: allowed is a finite gain >= 0")
        if not (math.isfinite(self.tau) and self.tau > 0.0):
            problems.append(f"tau = {self.tau!r} s: allowed is a finite time constant > 0")
        if not (math.isfinite(self.force_limit) and self.force_limit > 0.0):
            problems.append(f"force_limit = {self.force_limit!r} N: allowed is a finite force > 0")
        if problems:
            raise InputError("controller settings: " + "; ".join(problems))


class ActiveDamper:
    """The controller component: ``tau u' + u = -g v``, force ``F = clip(u, -F_max, F_max)``.

    The lag is discretized exactly for a velocity held over the step (zero-order hold):
    ``u <- e^(-h/tau) u + (1 - e^(-h/tau)) (-g v)``.

    Parameters
    ----------
    settings : ControllerSettings
    """

    def __init__(self, settings: ControllerSettings):
        self.settings = settings
        self.u = 0.0          # actuator state (unsaturated force) [N]
        self.v = 0.0          # held sensor input [m/s]

    @property
    def force(self) -> float:
        """Actuator force output [N]."""
        lim = self.settings.force_limit
        return min(lim, max(-lim, self.u))

    def set_input(self, velocity: float) -> None:
        self.v = float(velocity)

    def do_step(self, h: float) -> None:
        s = self.settings
        e = math.exp(-h / s.tau)
        self.u = e * self.u + (1.0 - e) * (-s.gain * self.v)


# ======================================================================= structure (FMU)
_EXTRACTED: dict[tuple, str] = {}


def _cleanup_extracted() -> None:
    for d in _EXTRACTED.values():
        shutil.rmtree(d, ignore_errors=True)
    _EXTRACTED.clear()


atexit.register(_cleanup_extracted)


def pin_pythonfmu() -> None:
    """Import pythonfmu from its installed location before any FMU is loaded in this process.

    pythonfmu's FMU binary puts the FMU's ``resources`` folder first on ``sys.path``, and that
    folder holds a copy of pythonfmu's runtime without the FMU binaries.  If the first import of
    ``pythonfmu`` came from there, a later ``build_fmu`` in the same process (a sweep worker
    that then runs a characterization task, say) finds no binary and fails.
    """
    import pythonfmu.builder  # noqa: F401


def _unpin_resources(folder: str) -> None:
    """Take an FMU's resources folder off ``sys.path`` again (its modules stay imported), so
    child processes spawned later (Dask workers) do not inherit it."""
    res = os.path.join(folder, "resources")
    sys.path[:] = [p for p in sys.path if os.path.normpath(p) != os.path.normpath(res)]


def _extract_once(fmu_path: Path) -> str:
    """Unzip an FMU once per process (keyed by path, size and mtime)."""
    from fmpy import extract

    st = fmu_path.stat()
    key = (str(fmu_path.resolve()), st.st_size, st.st_mtime_ns)
    d = _EXTRACTED.get(key)
    if d is None or not os.path.isdir(d):
        d = extract(str(fmu_path), unzipdir=tempfile.mkdtemp(prefix="jointfmu_cosim_"))
        _EXTRACTED[key] = d
    return d


class FmuStructure:
    """The tray FMU as a co-simulation component (fmpy ``FMU2Slave``), inputs and outputs by name.

    Parameters
    ----------
    fmu_path : path-like
        An FMU built by ``jointfmu build``.
    instance_name : str
    start_values : mapping of str to float, optional
        Parameter values set before initialization.

    Use as a context manager; the instance is freed on exit.
    """

    def __init__(self, fmu_path, instance_name: str = "tray", start_values=None):
        from fmpy import calloc, free, read_model_description
        from fmpy.fmi2 import (FMU2Slave, fmi2CallbackAllocateMemoryTYPE,
                               fmi2CallbackFreeMemoryTYPE, fmi2CallbackFunctions,
                               fmi2CallbackLoggerTYPE)

        path = Path(fmu_path)
        if not path.is_file():
            raise InputError(f"FMU {str(path)!r} does not exist; build one with 'jointfmu build'")
        self.path = path
        md = read_model_description(str(path))
        self.md = md
        self._vars = {v.name: v for v in md.modelVariables}
        self.inputs = [v.name for v in md.modelVariables if v.causality == "input"]
        self.outputs = [v.name for v in md.modelVariables if v.causality == "output"]
        self.messages: list[str] = []

        def logger(env, instance, status, category, message):
            self.messages.append(message.decode("utf-8", "replace"))

        cb = fmi2CallbackFunctions()
        cb.logger = fmi2CallbackLoggerTYPE(logger)
        cb.allocateMemory = fmi2CallbackAllocateMemoryTYPE(calloc)
        cb.freeMemory = fmi2CallbackFreeMemoryTYPE(free)
        self._cb = cb          # keep the ctypes callbacks alive as long as the instance
        pin_pythonfmu()
        self._dir = _extract_once(path)
        self._fmu = FMU2Slave(guid=md.guid, unzipDirectory=self._dir,
                              modelIdentifier=md.coSimulation.modelIdentifier,
                              instanceName=instance_name)
        self._fmu.instantiate(callbacks=cb, loggingOn=False)
        self._alive = True
        for name, value in (start_values or {}).items():
            var = self._vars.get(name)
            if var is None or var.causality != "parameter":
                self.close()
                params = [v.name for v in md.modelVariables if v.causality == "parameter"]
                raise InputError(f"{name!r} is not a parameter of {path.name}; parameters: "
                                 + ", ".join(params))
            self._fmu.setReal([var.valueReference], [float(value)])
        self._fmu.setupExperiment(startTime=0.0)
        self._fmu.enterInitializationMode()
        self._fmu.exitInitializationMode()

    def vr(self, names: Sequence[str], causality: str) -> list[int]:
        """Value references of variables, checked to have the given causality."""
        out = []
        for n in names:
            var = self._vars.get(n)
            if var is None or var.causality != causality:
                allowed = self.inputs if causality == "input" else self.outputs
                raise InputError(f"{n!r} is not an {causality} of {self.path.name}; "
                                 f"{causality}s: {', '.join(allowed)}")
            out.append(var.valueReference)
        return out

    def set(self, vrs: Sequence[int], values: Sequence[float]) -> None:
        self._fmu.setReal(list(vrs), [float(x) for x in values])

    def get(self, vrs: Sequence[int]) -> list[float]:
        return self._fmu.getReal(list(vrs))

    def do_step(self, t: float, h: float) -> None:
        try:
            self._fmu.doStep(currentCommunicationPoint=t, communicationStepSize=h)
        except Exception as exc:
            raise SimulationError(f"{self.path.name}: step at t = {t!r} s failed: "
                                  + ("; ".join(self.messages[-3:]) or str(exc))) from None

    def close(self) -> None:
        if self._alive:
            self._alive = False
            try:
                self._fmu.terminate()
            finally:
                self._fmu.freeInstance()
                _unpin_resources(self._dir)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class LinearStructure:
    """A linear time-invariant structure (state space) with the FMU's variable names.

    Discretized exactly for inputs held over a step (zero-order hold, C. F. Van Loan, "Computing
    integrals involving the matrix exponential", IEEE Trans. Automat. Control 23(3):395-404,
    1978): ``x <- Ad x + Bd u``, ``y = C x + D u``.

    Parameters
    ----------
    A, B, C, D : array_like, shapes (n, n), (n, m), (p, n), (p, m)
    inputs, outputs : sequence of str, lengths m and p
        Variable names of the columns of B and rows of C (FMU names, e.g. ``point.tip.a``).
    """

    def __init__(self, A, B, C, D, inputs: Sequence[str], outputs: Sequence[str]):
        self.A, self.B = np.asarray(A, float), np.asarray(B, float)
        self.C, self.D = np.asarray(C, float), np.asarray(D, float)
        self.inputs, self.outputs = list(inputs), list(outputs)
        n, m = self.B.shape
        if self.A.shape != (n, n) or self.C.shape != (len(self.outputs), n) \
                or self.D.shape != (len(self.outputs), m) or m != len(self.inputs):
            raise InputError("linear model: shapes of A, B, C, D do not match its inputs/outputs")
        self.x = np.zeros(n)
        self.u = np.zeros(m)
        self._disc: dict[float, tuple[np.ndarray, np.ndarray]] = {}

    def vr(self, names: Sequence[str], causality: str) -> list[int]:
        table = self.inputs if causality == "input" else self.outputs
        out = []
        for nme in names:
            if nme not in table:
                raise InputError(f"{nme!r} is not an {causality} of the linear model; "
                                 f"{causality}s: {', '.join(table)}")
            out.append(table.index(nme))
        return out

    def set(self, vrs, values) -> None:
        self.u[list(vrs)] = values

    def get(self, vrs) -> list[float]:
        y = self.C @ self.x + self.D @ self.u
        return list(y[list(vrs)])

    def do_step(self, t: float, h: float) -> None:
        d = self._disc.get(h)
        if d is None:
            from scipy.linalg import expm

            n, m = self.B.shape
            M = np.zeros((n + m, n + m))
            M[:n, :n], M[:n, n:] = self.A * h, self.B * h
            E = expm(M)
            d = (E[:n, :n], E[:n, n:])
            if len(self._disc) > 8:
                self._disc.clear()
            self._disc[h] = d
        Ad, Bd = d
        self.x = Ad @ self.x + Bd @ self.u

    def close(self) -> None:
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


# ============================================================================ system loop
@dataclass(frozen=True)
class SystemSettings:
    """Settings of one system run (everything that changes its numbers).

    Attributes
    ----------
    step : float
        Communication step h [s].
    duration : float or None
        Simulated time [s]; None: the load case's default.
    seed : int
        Seed of the random load.
    level : float
        Scale on the load profile [-].
    controller : ControllerSettings
    tip : str
        Output point whose acceleration is summarised.
    components : {"python", "fmu"}
        Loads model and controller as Python components of the loop, or as FMUs of their own
        (:mod:`.components`; same numbers, about 2x the loop's cost per step, measured in
        ``tests/bench/bench_system.py``).
    """

    step: float = 1e-4
    duration: float | None = None
    seed: int = 2026
    level: float = 1.0
    controller: ControllerSettings = field(default_factory=ControllerSettings)
    tip: str = "tip"
    components: str = "python"

    def __post_init__(self):
        if self.components not in ("python", "fmu"):
            raise InputError(f"components = {self.components!r}: allowed are 'python' and 'fmu'")

    def resolved_duration(self, case: str) -> float:
        return float(self.duration if self.duration is not None else _case(case).duration)

    def to_dict(self) -> dict:
        return asdict(self)

    def digest(self) -> str:
        """8 hex digits of SHA-256 of the settings (floats exact), for result keys."""
        text = json.dumps(self.to_dict(), sort_keys=True,
                          default=lambda x: float(x).hex() if isinstance(x, float) else str(x))
        return hashlib.sha256(text.encode()).hexdigest()[:8]


@dataclass
class SystemRun:
    """What one system run produced.

    Attributes
    ----------
    history : dict of str to ndarray, each shape (M+1,)
        Time histories at the communication points: ``time``, ``base.acceleration``,
        ``actuator.force`` and the recorded structure outputs.
    case : str
    controller_on : bool
    wall_time : float
        Seconds the loop took.
    """

    history: dict
    case: str
    controller_on: bool
    wall_time: float


def recorded_outputs(structure, tip: str, point: str, n_modes: int) -> list[str]:
    names = [f"point.{tip}.a", f"point.{tip}.v", f"point.{point}.v", f"point.{point}.a",
             "base.force", "energy.input", "energy.joint", "energy.viscous"]
    names += [f"mode[{i}].q" for i in range(1, n_modes + 1)]
    seen, out = set(), []
    for n in names:
        if n not in seen and n in structure.outputs:
            seen.add(n)
            out.append(n)
    return out


def n_modes_of(structure) -> int:
    k = 0
    while f"mode[{k + 1}].q" in structure.outputs:
        k += 1
    return k


def run_system(structure, case: str, controller_on: bool, settings: SystemSettings | None = None,
               base_acc: np.ndarray | None = None) -> SystemRun:
    """Run the system loop: loads model -> structure <-> controller, every communication step.

    Parameters
    ----------
    structure : FmuStructure or LinearStructure
        A freshly initialized structure component (not yet stepped).
    case : str
        Load case, a key of :data:`LOAD_CASES`.
    controller_on : bool
        With the active damper, or with it absent (zero actuator force).
    settings : SystemSettings, optional
    base_acc : ndarray, shape (M+1,), optional
        Base acceleration to use instead of the load case's profile (same grid).

    Returns
    -------
    SystemRun

    Raises
    ------
    InputError
        Unknown case, bad settings, or the structure lacks the variables the loop needs.
    SimulationError
        A structure step failed.
    """
    s = settings or SystemSettings()
    ctrl_point = s.controller.point
    t, a = base_motion(case, s.step, s.resolved_duration(case), s.seed, s.level)
    if base_acc is not None:
        base_acc = np.asarray(base_acc, dtype=float)
        if base_acc.shape != a.shape:
            raise InputError(f"base_acc: expected shape {a.shape}, got {base_acc.shape}")
        a = base_acc
    in_vr = structure.vr(["base.acceleration", f"point.{ctrl_point}.force"], "input")
    rec = recorded_outputs(structure, s.tip, ctrl_point, n_modes_of(structure))
    out_vr = structure.vr(rec, "output")
    sense_idx = rec.index(f"point.{ctrl_point}.v")
    damper = ActiveDamper(s.controller)
    n = t.shape[0] - 1
    hist = np.empty((n + 1, len(rec)))
    force = np.zeros(n + 1)
    t0 = time.perf_counter()
    y = structure.get(out_vr)
    hist[0] = y
    for k in range(n):
        f_act = damper.force if controller_on else 0.0
        force[k] = f_act
        structure.set(in_vr, (a[k], f_act))
        damper.set_input(y[sense_idx])
        h = float(t[k + 1] - t[k])
        structure.do_step(float(t[k]), h)
        damper.do_step(h)
        y = structure.get(out_vr)
        hist[k + 1] = y
    force[n] = damper.force if controller_on else 0.0
    wall = time.perf_counter() - t0
    history = {"time": t, "base.acceleration": a, "actuator.force": force}
    for j, name in enumerate(rec):
        history[name] = hist[:, j].copy()
    return SystemRun(history, case, bool(controller_on), wall)


def run_structure_direct(structure, times: np.ndarray, base_acc: np.ndarray,
                         outputs: Sequence[str]) -> np.ndarray:
    """Drive a structure with a base acceleration alone (no loop, no controller).

    Returns the outputs at ``times``, shape (M+1, len(outputs)).  For checks of the loop.
    """
    in_vr = structure.vr(["base.acceleration"], "input")
    out_vr = structure.vr(list(outputs), "output")
    res = np.empty((len(times), len(outputs)))
    res[0] = structure.get(out_vr)
    for k in range(len(times) - 1):
        structure.set(in_vr, [base_acc[k]])
        structure.do_step(float(times[k]), float(times[k + 1] - times[k]))
        res[k + 1] = structure.get(out_vr)
    return res


def rms(x: np.ndarray) -> float:
    return float(np.sqrt(np.mean(np.square(x)))) if x.size else 0.0


def summarize(run: SystemRun, tip: str = "tip", point: str = "psu_foot",
              force_limit: float | None = None) -> dict:
    """Scalar results of a run (one row of the sweep table).

    Returns
    -------
    dict
        ``tip_acc_peak`` / ``tip_acc_rms`` [m/s^2] and in g, ``base_force_peak`` [N] (interface
        force through the bolted joints), ``energy_joint``, ``energy_viscous``, ``energy_input``
        [J] at the end, ``actuator_force_peak`` [N], ``actuator_saturated`` (fraction of steps at
        the limit), ``q_rms_<i>`` and ``q_amp_<i>`` = sqrt(2) q_rms (sine-equivalent modal
        amplitude) [m sqrt(kg)], ``wall_time`` [s].
    """
    h = run.history
    a_tip = h[f"point.{tip}.a"]
    out = {
        "tip_acc_peak": float(np.max(np.abs(a_tip))),
        "tip_acc_rms": rms(a_tip),
        "base_force_peak": float(np.max(np.abs(h["base.force"]))),
        "energy_input": float(h["energy.input"][-1]),
        "energy_joint": float(h["energy.joint"][-1]),
        "energy_viscous": float(h["energy.viscous"][-1]),
        "actuator_force_peak": float(np.max(np.abs(h["actuator.force"]))),
        "base_acc_rms": rms(h["base.acceleration"]),
    }
    out["tip_acc_peak_g"] = out["tip_acc_peak"] / G0
    out["tip_acc_rms_g"] = out["tip_acc_rms"] / G0
    if force_limit is not None and run.controller_on:
        out["actuator_saturated"] = float(np.mean(np.abs(h["actuator.force"])
                                                  >= force_limit * (1 - 1e-12)))
    else:
        out["actuator_saturated"] = 0.0
    i = 1
    while f"mode[{i}].q" in h:
        q = h[f"mode[{i}].q"]
        out[f"q_rms_{i}"] = rms(q)
        out[f"q_amp_{i}"] = math.sqrt(2.0) * rms(q)
        i += 1
    out["wall_time"] = run.wall_time
    return out


def write_history(run: SystemRun, path) -> Path:
    """Write the time histories to a Parquet file atomically (temp file, then rename)."""
    import pandas as pd

    path = Path(path)
    df = pd.DataFrame(run.history)
    with atomic_write(path, "wb") as f:
        df.to_parquet(f, index=False)
    return path


# =================================================================== equivalent-linear model
def equivalent_linear_structure(params, amplitudes) -> tuple[LinearStructure, str]:
    """The equivalent-linear structure at modal amplitudes, as a loop component.

    The model of :func:`.linear.equivalent_linear` (first-harmonic frequency, energy-equivalent
    viscous damping at that frequency) with every point-force and base input and every output,
    named like the FMU's variables.

    Returns
    -------
    (LinearStructure, str)
        The component and the name of the definition used.
    """
    from ..analysis.linear import available_inputs, available_outputs, equivalent_linear

    ins = [n for n in available_inputs(params) if not n.startswith("mode[")]
    lm = equivalent_linear(params, np.asarray(amplitudes, float), inputs=ins,
                           outputs=list(available_outputs(params)))
    return (LinearStructure(lm.A, lm.B, lm.C, lm.D, list(lm.input_names), list(lm.output_names)),
            "first-harmonic (linear.equivalent_linear)")


# ============================================================================= one task
def settings_from_dict(d: Mapping) -> SystemSettings:
    """Inverse of :meth:`SystemSettings.to_dict` (unknown keys are an error)."""
    d = dict(d)
    ctrl = d.pop("controller", None)
    allowed = {"step", "duration", "seed", "level", "tip", "components"}
    bad = set(d) - allowed
    if bad:
        raise InputError(f"system settings: unknown key(s) {sorted(bad)}; allowed: "
                         f"{sorted(allowed | {'controller'})}")
    c = ControllerSettings(**ctrl) if isinstance(ctrl, Mapping) else ControllerSettings()
    return SystemSettings(controller=c, **d)
