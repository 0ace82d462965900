"""The controller: an active damper between the bracket and the power-supply box foot.

An actuator commanded from the relative velocity sensed at the same point (collocated velocity
feedback), through a first-order actuator lag, force-limited.  :class:`ControllerSettings` holds
its settings; the arithmetic is :class:`ActiveDamper` (in :mod:`.blocks`, which the damper FMU of
:func:`.components.build_controller_fmu` carries too); :func:`damper_component` makes it a
Python component of the loop with the FMU's variable names (input ``velocity`` [m/s], output
``force`` [N]).

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from ..errors import InputError
from .blocks import ActiveDamper
from .component import PythonComponent

__all__ = ["ControllerSettings", "ActiveDamper", "damper_component"]


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


def damper_component(settings: ControllerSettings) -> PythonComponent:
    """The active damper as a Python component of the loop.

    Input ``velocity`` [m/s] (sensed at ``settings.point``), output ``force`` [N] (applied
    there), the names of the damper FMU's variables.
    """
    d = ActiveDamper(settings)
    return PythonComponent("the controller", {"velocity": d.set_input},
                           {"force": lambda: d.force}, lambda t, h: d.do_step(h))
