"""The one table of FMU variables.

:func:`variable_table` turns a :class:`~.params.ParameterSet` into an ordered tuple of
:class:`FmuVariable`.  The slave registers the variables in this order (pythonfmu numbers value
references by registration order, so the value reference of a variable is its index here), and
:mod:`.build` writes units, descriptions, start values and the ModelStructure of
``modelDescription.xml`` from the same table.  Nothing else lists variables.

Units (FMI 2.0 standard, sec. 2.2.2, ``UnitDefinitions``): a ``BaseUnit`` holds integer exponents
of the SI base units, so units of mass-normalized modal quantities (``m*kg^0.5`` and its relatives,
common practice for modal coordinates with unit modal mass) get a ``Unit`` with a name and no
``BaseUnit``; every other unit gets its exponents.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Optional

from ..physics.integrate import DEFAULT_STEPS_PER_PERIOD

__all__ = [
    "FmuVariable",
    "UNITS",
    "PARAMETER_FIELDS",
    "DEFAULT_STEPS_PER_PERIOD",
    "variable_table",
    "variables_by_name",
]


#: Unit name -> SI base-unit exponents (``None``: no integer-exponent form, name only).
UNITS: Mapping[str, Optional[Mapping[str, int]]] = {
    "1": {},
    "Hz": {"s": -1},
    "1/s2": {"s": -2},
    "N": {"kg": 1, "m": 1, "s": -2},
    "m": {"m": 1},
    "m/s": {"m": 1, "s": -1},
    "m/s2": {"m": 1, "s": -2},
    "J": {"kg": 1, "m": 2, "s": -2},
    # Mass-normalized modal quantities: half-integer kg exponents, no BaseUnit possible.
    "m*kg^0.5": None,
    "m*kg^0.5/s": None,
    "N/kg^0.5": None,
}

#: Parameter field -> (unit, description with the admissible range of ``params.check_mode_values``).
PARAMETER_FIELDS: Mapping[str, tuple[str, str]] = {
    "f0": ("Hz", "low-amplitude natural frequency, f0 > 0"),
    "zeta": ("1", "viscous damping ratio, 0 <= zeta < 1"),
    "Fs": ("N/kg^0.5", "Iwan joint modal slip force (onset of macro-slip), Fs > 0"),
    "Kt": ("1/s2", "Iwan joint stiffness at zero load, 0 < Kt < (2 pi f0)^2"),
    "chi": ("1", "Iwan density exponent (micro-slip), -1 < chi <= 0"),
    "beta": ("1", "Iwan macro-slip point-mass ratio, beta >= 0"),
}

_MODE_FIELDS = ("f0", "zeta")
_JOINT_FIELDS = ("Fs", "Kt", "chi", "beta")


@dataclass(frozen=True)
class FmuVariable:
    """One scalar Real variable of the FMU interface.

    Attributes
    ----------
    name : str
        FMI name (structured naming convention), e.g. ``"mode[1].joint.chi"``.
    causality : str
        ``"parameter"``, ``"input"`` or ``"output"``.
    variability : str
        ``"fixed"`` (parameters) or ``"continuous"``.
    initial : str or None
        ``"exact"`` (parameters), ``"calculated"`` (outputs) or None (inputs: FMI 2.0 allows none).
    unit : str
        A key of :data:`UNITS`.
    description : str
        Text written to ``modelDescription.xml``.
    start : float or None
        Start value (parameters and inputs), None for outputs.
    kind : str
        What the slave binds the variable to: ``"parameter"`` (``field`` of mode ``index``),
        ``"steps_per_period"``, ``"modal_force"``, ``"point_force"``, ``"base_acc"``, or for
        outputs the name of the simulator attribute (``"q"``, ``"point_x"``, ``"energy_joint"``...).
    index : int or None
        0-based mode or point index into the simulator's arrays; None for scalars.
    field : str or None
        Parameter field (``"f0"``, ``"zeta"``, ``"Fs"``, ``"Kt"``, ``"chi"``, ``"beta"``).
    """

    name: str
    causality: str
    variability: str
    initial: Optional[str]
    unit: str
    description: str
    start: Optional[float]
    kind: str
    index: Optional[int] = None
    field: Optional[str] = None

    @property
    def is_parameter(self) -> bool:
        return self.causality == "parameter"

    @property
    def is_input(self) -> bool:
        return self.causality == "input"

    @property
    def is_output(self) -> bool:
        return self.causality == "output"


def _param(name, unit, description, start, kind, index=None, field=None) -> FmuVariable:
    return FmuVariable(name, "parameter", "fixed", "exact", unit, description, float(start),
                       kind, index, field)


def _input(name, unit, description, kind, index=None) -> FmuVariable:
    return FmuVariable(name, "input", "continuous", None, unit, description, 0.0, kind, index)


def _output(name, unit, description, kind, index=None) -> FmuVariable:
    return FmuVariable(name, "output", "continuous", "calculated", unit, description, None,
                       kind, index)


def _mode_text(i: int, label: str) -> str:
    return f"mode {i + 1} ({label!r})" if label else f"mode {i + 1}"


def variable_table(params, steps_per_period: float | None = None) -> tuple[FmuVariable, ...]:
    """Build the ordered variable table of an FMU from a parameter set.

    Parameters
    ----------
    params : ParameterSet
        The validated parameter set the FMU is built from (start values of the parameters).
    steps_per_period : float, optional
        Start value of ``steps_per_period``; default the core's
        :data:`.integrate.DEFAULT_STEPS_PER_PERIOD` (re-exported here).

    Returns
    -------
    tuple of FmuVariable
        Parameters first (per mode f0, zeta, Fs, Kt, chi, beta; then ``steps_per_period``), then
        inputs, then outputs.  The index of a variable is its value reference.
    """
    if steps_per_period is None:
        steps_per_period = DEFAULT_STEPS_PER_PERIOD
    table: list[FmuVariable] = []
    modes = list(params.modes)
    for i, mode in enumerate(modes):
        what = _mode_text(i, getattr(mode, "label", ""))
        for field in _MODE_FIELDS:
            unit, text = PARAMETER_FIELDS[field]
            table.append(_param(f"mode[{i + 1}].{field}", unit, f"{what}: {text}",
                                getattr(mode, field), "parameter", i, field))
        for field in _JOINT_FIELDS:
            unit, text = PARAMETER_FIELDS[field]
            table.append(_param(f"mode[{i + 1}].joint.{field}", unit, f"{what}: {text}",
                                getattr(mode.joint, field), "parameter", i, field))
    table.append(_param(
        "steps_per_period", "1",
        "internal time steps per period of each mode (>= 8; the error falls at least as its square)",
        steps_per_period, "steps_per_period"))

    for i, mode in enumerate(modes):
        what = _mode_text(i, getattr(mode, "label", ""))
        table.append(_input(f"mode[{i + 1}].force", "N/kg^0.5",
                            f"direct modal force on {what}, held over each communication step",
                            "modal_force", i))
    for j, point in enumerate(params.input_points):
        table.append(_input(f"point.{point.label}.force", "N",
                            f"force at input point {point.label!r} along {_direction(point)}, "
                            "held over each communication step", "point_force", j))
    if params.base is not None:
        table.append(_input("base.acceleration", "m/s2",
                            f"base acceleration along {_direction(params.base)}, "
                            "held over each communication step", "base_acc"))

    for i, mode in enumerate(modes):
        what = _mode_text(i, getattr(mode, "label", ""))
        table.append(_output(f"mode[{i + 1}].q", "m*kg^0.5",
                             f"modal displacement of {what} (mass-normalized)", "q", i))
        table.append(_output(f"mode[{i + 1}].qdot", "m*kg^0.5/s",
                             f"modal velocity of {what} (mass-normalized)", "qdot", i))
        table.append(_output(f"mode[{i + 1}].joint_force", "N/kg^0.5",
                             f"Iwan joint modal restoring force of {what}", "joint_force", i))
    for j, point in enumerate(params.output_points):
        along = _direction(point)
        table.append(_output(f"point.{point.label}.x", "m",
                             f"displacement at output point {point.label!r} along {along}, "
                             "relative to the base", "point_x", j))
        table.append(_output(f"point.{point.label}.v", "m/s",
                             f"velocity at output point {point.label!r} along {along}, "
                             "relative to the base", "point_v", j))
        table.append(_output(f"point.{point.label}.a", "m/s2",
                             f"absolute acceleration at output point {point.label!r} along "
                             f"{along}", "point_a", j))
    if params.base is not None:
        table.append(_output("base.force", "N",
                             "force the structure exerts on its mounting along "
                             f"{_direction(params.base)}", "base_force"))
    table.append(_output("energy.input", "J",
                         "work done by all inputs since the start (base frame)", "energy_input"))
    table.append(_output("energy.joint", "J",
                         "energy dissipated in all Iwan joints (micro- and macro-slip) since the start", "energy_joint"))
    table.append(_output("energy.viscous", "J",
                         "energy dissipated by viscous damping since the start", "energy_viscous"))

    names = [v.name for v in table]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        # Point labels are validated unique by params; this guards the table itself.
        raise ValueError(f"duplicate FMU variable names {dup}: point labels must be unique")
    return tuple(table)


def variables_by_name(table) -> dict[str, FmuVariable]:
    """Map variable name -> :class:`FmuVariable`."""
    return {v.name: v for v in table}


def _direction(obj) -> str:
    d = getattr(obj, "direction", None)
    if d is None:
        return "its direction"
    if isinstance(d, str):
        return d
    try:
        return "(" + ", ".join(f"{float(c):g}" for c in d) + ")"
    except TypeError:
        return str(d)
