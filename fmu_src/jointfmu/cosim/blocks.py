"""The arithmetic of the loads model and the active damper, written once.

The Python components of the loop (:func:`.loads.loads_component`,
:func:`.controller.damper_component`) and the FMUs of :mod:`.components` run this same code: each
of those FMUs carries a copy of this file as its own module (``resources/jf_blocks_<hash>.py``,
the hash of this file's text, so two versions never share a module in one process).  Hence it
imports the standard library only (``math``) and nothing of jointfmu.

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import math

__all__ = ["ActiveDamper", "HeldProfile"]


class ActiveDamper:
    """The controller's arithmetic: ``tau u' + u = -g v``, force ``F = clip(u, -F_max, F_max)``.

    The lag is discretized exactly for a velocity held over the step (zero-order hold, the
    exact solution of a first-order lag with constant input):
    ``u <- e^(-h/tau) u + (1 - e^(-h/tau)) (-g v)``.

    Parameters
    ----------
    settings : object with ``gain`` [N s/m], ``tau`` [s], ``force_limit`` [N]
        Read at every step and every force read (the damper FMU passes itself, so parameter
        values set before initialization count); a :class:`.controller.ControllerSettings`.
    """

    def __init__(self, settings):
        self.settings = settings
        self.u = 0.0          # actuator state (unsaturated force) [N]
        self.v = 0.0          # held sensor input [m/s]

    @property
    def force(self) -> float:
        """Actuator force output [N]."""
        lim = self.settings.force_limit
        return min(lim, max(-lim, self.u))

    def set_input(self, velocity: float) -> None:
        """Hold the sensed velocity [m/s] over the next step."""
        self.v = float(velocity)

    def do_step(self, h: float) -> None:
        """Advance the lag by ``h`` [s] with the held velocity."""
        s = self.settings
        e = math.exp(-h / s.tau)
        self.u = e * self.u + (1.0 - e) * (-s.gain * self.v)


class HeldProfile:
    """A table of values on the grid ``t_k = k * step``, each held from ``t_k`` to ``t_{k+1}``.

    Parameters
    ----------
    values : sequence of float, shape (M+1,)
        The value held from each grid point on (the last one is what a read at the end gives).
    step : float
        Grid spacing [s].

    Notes
    -----
    The grid point reached by a step is found by rounding ``(t + h) / step``, never by counting
    steps, so a host that steps in multiples of ``step`` (or restarts) reads the right value.
    """

    def __init__(self, values, step: float):
        self.values = values
        self.step = float(step)
        self.value = float(values[0])

    def do_step(self, t: float, h: float) -> None:
        """Move to the grid point nearest to ``t + h`` [s] (clamped to the table)."""
        k = int(round((t + h) / self.step))
        self.value = float(self.values[min(max(k, 0), len(self.values) - 1)])
