"""The one table of FMU variables.

:func:`variable_table` turns a :class:`~.params.ParameterSet` into an ordered tuple of
:class:`FmuVariable`.  The slave registers the variables in this order (pythonfmu numbers value
references by registration order, so the value reference of a variable is its index here), and
:mod:`.build` writes units, descriptions, start values and the ModelStructure of
``modelDescription.xml`` from the same table.  Nothing else lists variables.

Names come from :mod:`jointfmu.params.names` (which also reads them back), the units, meanings and
ranges of the six mode values from :mod:`jointfmu.params.rules`.

Direct feedthrough (FMI 2.0 standard, sec. 2.2.8, ``ModelStructure/Outputs``): each output lists
the inputs it depends on at a communication point, before the next step
(:attr:`FmuVariable.depends_on`), from :meth:`.physics.modal.ModalModel.feedthrough`: the point
accelerations and the base force see the inputs through the modal accelerations; states,
displacements, velocities, joint forces and energies change only inside doStep and see none.

Units (FMI 2.0 standard, sec. 2.2.2, ``UnitDefinitions``): a ``BaseUnit`` holds integer exponents
of the SI base units, so units of mass-normalized modal quantities (``m*kg^0.5`` and its relatives,
common practice for modal coordinates with unit modal mass) get a ``Unit`` with a name and no
``BaseUnit``; every other unit gets its exponents.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Optional

from ..params.names import (BASE_ACCELERATION, BASE_FORCE, STEPS_PER_PERIOD, energy_name,
                            mode_name, mode_value_name, point_name)
from ..params.rules import MODE_VALUE_RULES
from ..physics.integrate import DEFAULT_STEPS_PER_PERIOD
from ..physics.modal import ModalModel

__all__ = [
    "FmuVariable",
    "UNITS",
    "PARAMETER_FIELDS",
    "DEFAULT_STEPS_PER_PERIOD",
    "DEPENDENCY_KIND",
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

#: Parameter field -> (unit, description with the admissible range), from the rules table.
PARAMETER_FIELDS: Mapping[str, tuple[str, str]] = {
    r.name: (r.unit, r.description) for r in MODE_VALUE_RULES}

#: How every direct dependency of an output enters it: a constant factor (FMI 2.0 standard,
#: sec. 2.2.8, ``dependenciesKind="constant"``: c*v with c fixed before initialization; here c
#: is made of mode shapes, base participations, base factors and the total mass, none of them an
#: FMU parameter, see ModalModel.feedthrough).
DEPENDENCY_KIND = "constant"


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
    depends_on : tuple of int
        Outputs: value references of the inputs the output depends on directly, before a step
        (FMI 2.0 sec. 2.2.8), ascending; each enters with a constant factor
        (:data:`DEPENDENCY_KIND`).  Empty for every other variable.
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
    depends_on: tuple[int, ...] = ()

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


def _output(name, unit, description, kind, index=None, depends_on=()) -> FmuVariable:
    return FmuVariable(name, "output", "continuous", "calculated", unit, description, None,
                       kind, index, None, tuple(depends_on))


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
        for rule in MODE_VALUE_RULES:
            owner = mode.joint if rule.key.startswith("joint.") else mode
            table.append(_param(mode_value_name(i + 1, rule.name), rule.unit,
                                f"{what}: {rule.description}", getattr(owner, rule.name),
                                "parameter", i, rule.name))
    table.append(_param(
        STEPS_PER_PERIOD, "1",
        "internal time steps per period of each mode (>= 8; the error falls at least as its square)",
        steps_per_period, "steps_per_period"))

    # inputs; u_vr: value reference of each input in the kernel's input order (point forces,
    # modal forces, base acceleration), for the feedthrough below
    inputs_at = len(table)
    for i, mode in enumerate(modes):
        what = _mode_text(i, getattr(mode, "label", ""))
        table.append(_input(mode_name(i + 1, "force"), "N/kg^0.5",
                            f"direct modal force on {what}, held over each communication step",
                            "modal_force", i))
    for j, point in enumerate(params.input_points):
        table.append(_input(point_name(point.label, "force"), "N",
                            f"force at input point {point.label!r} along {_direction(point)}, "
                            "held over each communication step", "point_force", j))
    if params.base is not None:
        table.append(_input(BASE_ACCELERATION, "m/s2",
                            f"base acceleration along {_direction(params.base)}, "
                            "held over each communication step", "base_acc"))
    n_modes, n_in = len(modes), len(params.input_points)
    u_vr = ([inputs_at + n_modes + j for j in range(n_in)]
            + [inputs_at + i for i in range(n_modes)]
            + ([inputs_at + n_modes + n_in] if params.base is not None else [-1]))
    d_a, d_base = ModalModel.from_params(params).feedthrough(structural=True)

    def deps(row) -> tuple[int, ...]:
        return tuple(sorted(u_vr[k] for k in range(len(u_vr)) if row[k] != 0.0 and u_vr[k] >= 0))

    for i, mode in enumerate(modes):
        what = _mode_text(i, getattr(mode, "label", ""))
        table.append(_output(mode_name(i + 1, "q"), "m*kg^0.5",
                             f"modal displacement of {what} (mass-normalized)", "q", i))
        table.append(_output(mode_name(i + 1, "qdot"), "m*kg^0.5/s",
                             f"modal velocity of {what} (mass-normalized)", "qdot", i))
        table.append(_output(mode_name(i + 1, "joint_force"), "N/kg^0.5",
                             f"Iwan joint modal restoring force of {what}", "joint_force", i))
    for j, point in enumerate(params.output_points):
        along = _direction(point)
        table.append(_output(point_name(point.label, "x"), "m",
                             f"displacement at output point {point.label!r} along {along}, "
                             "relative to the base", "point_x", j))
        table.append(_output(point_name(point.label, "v"), "m/s",
                             f"velocity at output point {point.label!r} along {along}, "
                             "relative to the base", "point_v", j))
        table.append(_output(point_name(point.label, "a"), "m/s2",
                             f"absolute acceleration at output point {point.label!r} along "
                             f"{along}", "point_a", j, deps(d_a[j])))
    if params.base is not None:
        table.append(_output(BASE_FORCE, "N",
                             "force the structure exerts on its mounting along "
                             f"{_direction(params.base)}", "base_force", None, deps(d_base)))
    table.append(_output(energy_name("input"), "J",
                         "work done by all inputs since the start (base frame)", "energy_input"))
    table.append(_output(energy_name("joint"), "J",
                         "energy dissipated in all Iwan joints (micro- and macro-slip) since the start", "energy_joint"))
    table.append(_output(energy_name("viscous"), "J",
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
