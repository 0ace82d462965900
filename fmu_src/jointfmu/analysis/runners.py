"""Ring-down runners: who simulates a free decay of every mode after a short modal pulse.

A *runner* is a callable ``runner(params, impulses, dt, n_steps) -> RingDown``.
:class:`CoreRunner` steps the NumPy core (:class:`~jointfmu.physics.integrate.ModalSimulator`);
:class:`FmuRunner` builds the FMU of the parameter set and runs it with fmpy (the same numbers,
about ten times slower).  :func:`get_runner` is the one place a runner is chosen by name.
"""
from __future__ import annotations

import math
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Protocol

import numpy as np

from ..errors import InputError, SimulationError
from ..params.names import STEPS_PER_PERIOD, mode_name, point_name

__all__ = ["RingDown", "Runner", "check_run_args", "CoreRunner", "FmuRunner", "get_runner",
           "RUNNER_NAMES"]

#: Runner names :func:`get_runner` accepts.
RUNNER_NAMES = ("core", "fmu")


@dataclass(frozen=True)
class RingDown:
    """A simulated free decay of every mode after a short modal force pulse.

    Convention (every runner keeps it): the modal force ``impulses[i] / dt`` acts on mode i over
    the first step ``[0, dt)`` and nothing afterwards, so the motion is free from ``t = dt`` on and,
    to first order, that of an impulse at ``t = dt/2`` (the symmetry centre for the odd extension
    of the Hilbert analysis).

    Attributes
    ----------
    t : ndarray, shape (n+1,)
        Sample times ``k dt`` [s].
    q : ndarray, shape (n+1, N)
        Modal displacements [m sqrt(kg)].
    point_a : ndarray, shape (n+1, n_out)
        Absolute accelerations at the output points [m/s^2].  Samples 0 and 1 are taken while the
        pulse acts (the FMU reports 0 at sample 0, before its first step).
    output_labels : tuple of str
        Output point labels (columns of ``point_a``).
    impulses : ndarray, shape (N,)
        Modal impulses [m sqrt(kg)/s].
    dt : float
        Sample (and communication) step [s].
    source : str
        What produced it, e.g. ``"core"`` or ``"fmu"``.
    """

    t: np.ndarray
    q: np.ndarray
    point_a: np.ndarray
    output_labels: tuple
    impulses: np.ndarray
    dt: float
    source: str

    @property
    def t_sym(self) -> float:
        """Symmetry centre of the equivalent impulse, ``dt/2`` [s]."""
        return 0.5 * self.dt


class Runner(Protocol):
    """Makes a :class:`RingDown`: ``runner(params, impulses, dt, n_steps) -> RingDown``."""

    name: str

    def __call__(self, params, impulses, dt: float, n_steps: int) -> RingDown: ...


def check_run_args(params, impulses, dt, n_steps):
    """Checked ``(impulses, dt, n_steps)`` of a runner call (for writers of runners).

    Raises
    ------
    InputError
        Wrong number of impulses, non-finite values, ``dt <= 0`` or ``n_steps < 1``.
    """
    imp = np.asarray(impulses, dtype=float).reshape(-1)
    if imp.shape != (params.n_modes,) or not np.all(np.isfinite(imp)):
        raise InputError(f"impulses: must be {params.n_modes} finite numbers (one per mode, "
                         f"m*sqrt(kg)/s), got {impulses!r}")
    if not (math.isfinite(dt) and dt > 0):
        raise InputError(f"dt = {dt!r}: must be a finite step > 0 s")
    if int(n_steps) < 1:
        raise InputError(f"n_steps = {n_steps!r}: must be an integer >= 1")
    return imp, float(dt), int(n_steps)


@dataclass
class CoreRunner:
    """Ring-downs from the NumPy core (:class:`~.integrate.ModalSimulator`), no FMU.

    Parameters
    ----------
    steps_per_period : float, optional
        Internal sub-steps per period of each mode (default: the core's default, the same
        as the FMU's ``steps_per_period`` start value).
    """

    steps_per_period: float | None = None
    name: str = "core"

    def __call__(self, params, impulses, dt, n_steps) -> RingDown:
        from ..physics.integrate import DEFAULT_STEPS_PER_PERIOD, ModalSimulator

        imp, dt, n_steps = check_run_args(params, impulses, dt, n_steps)
        sim = ModalSimulator(params, steps_per_period=self.steps_per_period or DEFAULT_STEPS_PER_PERIOD)
        q = np.empty((n_steps + 1, params.n_modes))
        a = np.empty((n_steps + 1, len(params.output_points)))
        sim.set_inputs(modal_forces=imp / dt)
        q[0], a[0] = sim.q, sim.point_a
        zero = np.zeros(params.n_modes)
        for k in range(1, n_steps + 1):
            ok, msg = sim.step(dt)
            if not ok:
                raise SimulationError(f"ring-down of {params.set_id}: {msg}")
            q[k], a[k] = sim.q, sim.point_a  # read before the input changes, as fmpy does
            if k == 1:
                sim.set_inputs(modal_forces=zero)
        return RingDown(np.arange(n_steps + 1) * dt, q, a,
                        tuple(p.label for p in params.output_points), imp, dt, "core")


@dataclass
class FmuRunner:
    """Ring-downs from the FMU of the parameter set, run with fmpy.

    The FMU is built once per parameter set (by content hash) into ``build_dir`` (default a
    temporary folder removed with the runner) with :func:`~.build.build_fmu`.

    Parameters
    ----------
    build_dir : path-like, optional
        Where FMUs are written (kept).  Default: a private temporary folder.
    steps_per_period : float, optional
        Value of the FMU parameter ``steps_per_period`` (default: the FMU's start value).
    """

    build_dir: str | os.PathLike | None = None
    steps_per_period: float | None = None
    name: str = "fmu"
    _fmus: dict = field(default_factory=dict, repr=False)
    _tmp: object = field(default=None, repr=False)

    def fmu_for(self, params) -> Path:
        """The FMU of ``params`` (built on first use) [path]."""
        from ..fmu.build import build_fmu
        from ..params import save_parameter_set

        h = params.content_hash()
        if h not in self._fmus:
            if self.build_dir is None:
                if self._tmp is None:
                    self._tmp = tempfile.TemporaryDirectory(prefix="jointfmu_rd_")
                folder = Path(self._tmp.name)
            else:
                folder = Path(self.build_dir)
                folder.mkdir(parents=True, exist_ok=True)
            toml = save_parameter_set(params, folder / f"{h[:12]}.toml")
            self._fmus[h] = build_fmu(toml, folder / f"{h[:12]}.fmu").path
        return self._fmus[h]

    def __call__(self, params, impulses, dt, n_steps) -> RingDown:
        from ..fmu.run import run_fmu

        imp, dt, n_steps = check_run_args(params, impulses, dt, n_steps)
        fmu = self.fmu_for(params)
        inputs = {mode_name(i + 1, "force"): [imp[i] / dt, 0.0] for i in range(params.n_modes)}
        start = {STEPS_PER_PERIOD: float(self.steps_per_period)} if self.steps_per_period else None
        header, rows = run_fmu(fmu, [0.0, dt], inputs, stop_time=n_steps * dt, step=dt,
                               start_values=start)
        r = np.asarray(rows, dtype=float)
        col = {name: k for k, name in enumerate(header)}
        q = r[:, [col[mode_name(i + 1, "q")] for i in range(params.n_modes)]]
        labels = tuple(p.label for p in params.output_points)
        a = r[:, [col[point_name(lab, "a")] for lab in labels]] if labels else np.zeros((len(r), 0))
        return RingDown(r[:, 0], q, a, labels, imp, dt, "fmu")


def get_runner(runner=None, *, default: str):
    """The runner for ``runner``: ``"core"`` (:class:`CoreRunner`), ``"fmu"``
    (:class:`FmuRunner`), any callable with the :class:`Runner` signature, or ``None`` for
    ``default`` (which the caller states: the report checks the FMU, the analysis the core).

    Raises
    ------
    InputError
        ``runner`` is another string or not callable.
    """
    if runner is None:
        runner = default
    if runner == "core":
        return CoreRunner()
    if runner == "fmu":
        return FmuRunner()
    if isinstance(runner, str) or not callable(runner):
        raise InputError(f"runner = {runner!r}: allowed are 'core', 'fmu' or a callable "
                         "runner(params, impulses, dt, n_steps) -> RingDown")
    return runner
