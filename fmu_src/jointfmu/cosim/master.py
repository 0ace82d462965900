"""The co-simulation master: one loop over components and connections, and the demo system.

:func:`co_simulate` is *the* master loop of jointfmu: it steps any set of :class:`.component.
Component` (Python components and FMUs alike) wired by a list of :class:`Connection`.

Coupling scheme (common practice for explicit co-simulation: Jacobi / parallel with zero-order
hold): at each communication point ``t_k`` every component's outputs are read, all inputs are
set from them, and then every component steps from ``t_k`` to ``t_{k+1}``.  Nothing is
extrapolated or iterated, so a loop through two components (structure -> controller ->
structure) acts one step late: a delay of up to one step ``h`` (at the default h = 0.1 ms, 15
degrees of phase at the highest tray mode, 412 Hz), a coupling error of first order in ``h``
(tested against a continuous closed loop).

The demo system (``jointfmu cosim``, the sweeps, the demo) is three components, named as in
:data:`SYSTEM_CONNECTIONS`:

* ``loads``: the loads model (:mod:`.loads`), output ``base.acceleration``;
* ``structure``: the tray FMU that ``jointfmu build`` made (:class:`.structures.FmuComponent`),
  or any structure with its variable names (:class:`.structures.LinearStructure`);
* ``damper``: the controller, an active damper (:mod:`.controller`), input ``velocity``,
  output ``force``.

Why the loads model and the controller are plain Python components by default: they are a few
lines each, they must be seeded and bit-reproducible, and as pythonfmu FMUs they roughly double
the cost of a step (measured, ``tests/bench/bench_system.py``); the structure is the part that has
to "drop into any FMI-capable simulator", and it does so here through fmpy, stepped exactly like
an FMI master would step it.  :mod:`.components` packages the loads model and the controller as
FMUs of their own with the same variable names and the same arithmetic (:mod:`.blocks`):
:func:`.components.run_system_of_fmus` runs the same system as three FMUs, with the same numbers
bit for bit (tested).

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import hashlib
import json
import math
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np

from ..errors import InputError, SimulationError
from ..fileio import atomic_write
from ..params.names import (BASE_ACCELERATION, BASE_FORCE, ENERGIES, energy_name, mode_name,
                            point_name)
from .component import Component
from .controller import ControllerSettings, damper_component
from .loads import G0, base_motion, check_case, loads_component

__all__ = [
    "Connection",
    "co_simulate",
    "SYSTEM_CONNECTIONS",
    "system_connections",
    "recorded_outputs",
    "SystemSettings",
    "settings_from_dict",
    "SystemRun",
    "run_system",
    "simulate_system",
    "rms",
    "summarize",
    "write_history",
]


# ============================================================================ the master loop
@dataclass(frozen=True)
class Connection:
    """One connection: an output of one component feeds an input of another.

    The four fields are SSP 1.0's ``Connection`` attributes (``startElement``,
    ``startConnector``, ``endElement``, ``endConnector``) under shorter names.

    Attributes
    ----------
    source : str
        Name of the component whose output is read.
    output : str
        That output's variable name.
    target : str
        Name of the component whose input is set.
    input : str
        That input's variable name.
    """

    source: str
    output: str
    target: str
    input: str

    def __str__(self) -> str:
        return f"{self.source}.{self.output} -> {self.target}.{self.input}"


def co_simulate(components: Mapping[str, Component], connections: Sequence[Connection],
                times, record: Mapping[str, tuple[str, str]]) -> tuple[dict, float]:
    """Step components from ``times[0]`` to ``times[-1]``, Jacobi with zero-order hold.

    At each communication point ``t_k``: every output that a connection or ``record`` needs is
    read, every connected input is set from the outputs read, and every component steps from
    ``t_k`` by ``h_k = t_{k+1} - t_k`` (in the order of ``components``; the order changes no
    number).  An input that no connection feeds keeps the value it has (an FMU's start value).

    Parameters
    ----------
    components : mapping of str to Component
        The components by name, initialized and not yet stepped.
    connections : sequence of Connection
        Each input is fed by at most one connection.
    times : array_like, shape (M+1,)
        Communication points [s], strictly increasing.
    record : mapping of str to (str, str)
        History name -> (component name, output name) to keep at every communication point.

    Returns
    -------
    (dict of str to ndarray, float)
        ``time`` (shape (M+1,)) and each recorded output (shape (M+1,)), in the order of
        ``record``; and the seconds the loop took.

    Raises
    ------
    InputError
        A connection or record names an unknown component or variable, an input is fed twice,
        or ``times`` is not a strictly increasing grid of at least two points.
    SimulationError
        A component refused a step; the message names it, the time and its reason.
    """
    names = list(components)
    comps = [components[n] for n in names]
    index = {n: i for i, n in enumerate(names)}

    def element(name: str, what: str) -> int:
        if name not in index:
            raise InputError(f"{what}: no component {name!r}; components: {', '.join(names)}")
        return index[name]

    reads: list[list[str]] = [[] for _ in names]       # outputs read, per component

    def read_position(i: int, output: str) -> int:
        if output not in reads[i]:
            reads[i].append(output)
        return reads[i].index(output)

    writes: list[list[str]] = [[] for _ in names]      # inputs set, per component
    sources: list[list[tuple[int, int]]] = [[] for _ in names]
    for c in connections:
        s = element(c.source, f"connection {c}")
        d = element(c.target, f"connection {c}")
        if c.input in writes[d]:
            raise InputError(f"connection {c}: input {c.target}.{c.input} is already fed by "
                             "another connection")
        writes[d].append(c.input)
        sources[d].append((s, read_position(s, c.output)))
    if "time" in record:
        raise InputError("record: 'time' is the name of the communication points; choose another")
    kept = [(key, element(e, f"record {key!r}"), out) for key, (e, out) in record.items()]
    kept = [(key, i, read_position(i, out)) for key, i, out in kept]
    t = np.asarray(times, dtype=float)
    if t.ndim != 1 or t.shape[0] < 2 or not np.all(np.diff(t) > 0):
        raise InputError(f"times: need a strictly increasing grid of at least 2 points, got "
                         f"shape {t.shape}")
    # resolve every name once (an unknown one fails here, before any step)
    setters = [(comps[i], comps[i].refs(writes[i], "input"), sources[i])
               for i in range(len(names)) if writes[i]]
    getters = [(i, comps[i], comps[i].refs(reads[i], "output"))
               for i in range(len(names)) if reads[i]]
    steppers = list(zip(names, comps))
    tl = t.tolist()
    n = len(tl) - 1
    rows = [np.empty((n + 1, len(reads[i]))) for i in range(len(names))]
    ys: list = [()] * len(names)
    t0 = time.perf_counter()
    for i, comp, refs in getters:
        ys[i] = rows[i][0] = comp.get(refs)
    for k in range(n):
        tk = tl[k]
        h = tl[k + 1] - tk
        for comp, refs, src in setters:
            comp.set(refs, [ys[i][j] for i, j in src])
        for name, comp in steppers:
            ok, msg = comp.do_step(tk, h)
            if not ok:
                raise SimulationError(f"component {name!r}: step at t = {tk!r} s failed: {msg}")
        for i, comp, refs in getters:
            ys[i] = rows[i][k + 1] = comp.get(refs)
    wall = time.perf_counter() - t0
    history = {"time": t}
    for key, i, j in kept:
        history[key] = rows[i][:, j].copy()
    return history, wall


# ============================================================================ the demo system
def system_connections(point: str = ControllerSettings.point,
                       controller: bool = True) -> tuple[Connection, ...]:
    """The connections of the demo system (components ``loads``, ``structure``, ``damper``).

    The one list of them: :func:`simulate_system` runs it, the SSP export
    (:func:`.ssp.system_description`) declares it.

    Parameters
    ----------
    point : str
        Point label of the damper's actuator and sensor (``ControllerSettings.point``).
    controller : bool
        With the damper's two connections, or without them (controller absent).

    Returns
    -------
    tuple of Connection
        ``loads.base.acceleration -> structure.base.acceleration``, and with the controller
        ``structure.point.<point>.v -> damper.velocity`` and
        ``damper.force -> structure.point.<point>.force``.
    """
    out = [Connection("loads", BASE_ACCELERATION, "structure", BASE_ACCELERATION)]
    if controller:
        out += [Connection("structure", point_name(point, "v"), "damper", "velocity"),
                Connection("damper", "force", "structure", point_name(point, "force"))]
    return tuple(out)


#: The demo system's connections with the controller at its default point (``psu_foot``):
#: what ``jointfmu cosim --controller on`` runs and ``jointfmu export-ssp --controller on``
#: declares.
SYSTEM_CONNECTIONS: tuple[Connection, ...] = system_connections()


def recorded_outputs(structure: Component, tip: str, point: str) -> list[str]:
    """The structure outputs a system run keeps: tip and actuator-point motion, interface force,
    energies, modal coordinates (those the structure has, in this order)."""
    names = [point_name(tip, "a"), point_name(tip, "v"), point_name(point, "v"),
             point_name(point, "a"), BASE_FORCE, *(energy_name(e) for e in ENERGIES)]
    k = 1
    while mode_name(k, "q") in structure.outputs:
        names.append(mode_name(k, "q"))
        k += 1
    seen, out = set(), []
    for n in names:
        if n not in seen and n in structure.outputs:
            seen.add(n)
            out.append(n)
    return out


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
        ``tests/bench/bench_system.py``).  Read by :func:`.runs.run_case`.
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
        """Simulated time [s] of a run of ``case``: ``duration``, or the case's default."""
        return float(self.duration if self.duration is not None else check_case(case).duration)

    def to_dict(self) -> dict:
        return asdict(self)

    def digest(self) -> str:
        """8 hex digits of SHA-256 of the settings (floats exact), for result keys."""
        text = json.dumps(self.to_dict(), sort_keys=True,
                          default=lambda x: float(x).hex() if isinstance(x, float) else str(x))
        return hashlib.sha256(text.encode()).hexdigest()[:8]


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


def simulate_system(structure: Component, loads: Component, controller: Component | None,
                    times, case: str, tip: str = "tip",
                    point: str = ControllerSettings.point) -> SystemRun:
    """Run the demo system on a grid: loads -> structure <-> controller (:func:`co_simulate`).

    Parameters
    ----------
    structure, loads : Component
        Initialized, not yet stepped; ``loads`` holds the profile on ``times``.
    controller : Component or None
        The damper; None: absent (zero actuator force).
    times : ndarray, shape (M+1,)
        Communication points [s].
    case : str
        Load-case name, kept in the result.
    tip, point : str
        Point labels of the summarised tip and of the damper.

    Returns
    -------
    SystemRun
    """
    rec = recorded_outputs(structure, tip, point)
    parts = {"loads": loads, "structure": structure}
    record = {BASE_ACCELERATION: ("loads", BASE_ACCELERATION)}
    if controller is not None:
        parts["damper"] = controller
        record["actuator.force"] = ("damper", "force")
    record.update((name, ("structure", name)) for name in rec)
    hist, wall = co_simulate(parts, system_connections(point, controller is not None), times,
                             record)
    history = {"time": hist["time"], BASE_ACCELERATION: hist[BASE_ACCELERATION],
               "actuator.force": hist.get("actuator.force", np.zeros(len(hist["time"])))}
    history.update((name, hist[name]) for name in rec)
    return SystemRun(history, case, controller is not None, wall)


def run_system(structure: Component, case: str, controller_on: bool,
               settings: SystemSettings | None = None,
               base_acc: np.ndarray | None = None) -> SystemRun:
    """Run the demo system with Python loads and controller components around a structure.

    Parameters
    ----------
    structure : Component
        A freshly initialized structure (:class:`.structures.FmuComponent` or
        :class:`.structures.LinearStructure`, not yet stepped).
    case : str
        Load case, a key of :data:`.loads.LOAD_CASES`.
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
    t, a = base_motion(case, s.step, s.resolved_duration(case), s.seed, s.level)
    if base_acc is not None:
        base_acc = np.asarray(base_acc, dtype=float)
        if base_acc.shape != a.shape:
            raise InputError(f"base_acc: expected shape {a.shape}, got {base_acc.shape}")
        a = base_acc
    damper = damper_component(s.controller) if controller_on else None
    return simulate_system(structure, loads_component(a, s.step), damper, t, case, s.tip,
                           s.controller.point)


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
    a_tip = h[point_name(tip, "a")]
    out = {
        "tip_acc_peak": float(np.max(np.abs(a_tip))),
        "tip_acc_rms": rms(a_tip),
        "base_force_peak": float(np.max(np.abs(h[BASE_FORCE]))),
        "energy_input": float(h[energy_name("input")][-1]),
        "energy_joint": float(h[energy_name("joint")][-1]),
        "energy_viscous": float(h[energy_name("viscous")][-1]),
        "actuator_force_peak": float(np.max(np.abs(h["actuator.force"]))),
        "base_acc_rms": rms(h[BASE_ACCELERATION]),
    }
    out["tip_acc_peak_g"] = out["tip_acc_peak"] / G0
    out["tip_acc_rms_g"] = out["tip_acc_rms"] / G0
    if force_limit is not None and run.controller_on:
        out["actuator_saturated"] = float(np.mean(np.abs(h["actuator.force"])
                                                  >= force_limit * (1 - 1e-12)))
    else:
        out["actuator_saturated"] = 0.0
    i = 1
    while mode_name(i, "q") in h:
        q = h[mode_name(i, "q")]
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
