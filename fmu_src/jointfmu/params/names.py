"""Names of a parameter set's quantities: the one module that formats them and parses them back.

The FMU's variables, the channels of a test record and the rows and columns of a linear model
spell the quantities of a parameter set the same way (FMI 2.0 standard, sec. 2.2.9,
``variableNamingConvention="structured"``: dots for hierarchy, ``[i]`` for a 1-based index):

====================================  ==========================================================
``mode[i].f0``, ``mode[i].zeta``      a mode's values (:data:`.rules.MODE_VALUE_RULES`)
``mode[i].joint.Fs`` ... ``.beta``    its joint's values
``mode[i].force``                     direct modal force (input)
``mode[i].q``, ``.qdot``,             modal displacement, velocity, joint force (outputs)
``.joint_force``
``point.<label>.force``               force at an input point (input; a measured channel)
``point.<label>.x``, ``.v``, ``.a``   motion at an output point (outputs; measured channels)
``base.acceleration``                 the base's acceleration (input)
``base.force``                        the force on the mounting (output)
``energy.input`` ...                  cumulative energies (outputs)
``steps_per_period``                  the solver setting (a parameter of the FMU)
====================================  ==========================================================

Format with the functions below; read a name back with :func:`parse_name`.  Nothing else in
jointfmu writes ``"mode["`` or ``"point."`` by hand.  This module imports only :mod:`.rules`.
"""
from __future__ import annotations

import operator
import re
from dataclasses import dataclass
from typing import Optional

from .rules import MODE_VALUE_RULES, RULES_BY_NAME

__all__ = [
    "LABEL_PATTERN",
    "MODE_QUANTITIES",
    "POINT_QUANTITIES",
    "POINT_INPUT_QUANTITIES",
    "POINT_OUTPUT_QUANTITIES",
    "ENERGIES",
    "BASE_ACCELERATION",
    "BASE_FORCE",
    "STEPS_PER_PERIOD",
    "VariableName",
    "mode_prefix",
    "mode_value_name",
    "mode_name",
    "point_name",
    "energy_name",
    "mode_value_names",
    "mode_value_pattern",
    "parse_name",
]

#: A mode or point label (and a structure name): a letter, then letters, digits or '_'.
LABEL_PATTERN = r"[A-Za-z][A-Za-z0-9_]*"
#: What a mode carries besides its six values: the direct modal force (input) and the outputs.
MODE_QUANTITIES = ("force", "q", "qdot", "joint_force")
#: What a point carries: its force (input point) and its motion (output point).
POINT_INPUT_QUANTITIES = ("force",)
POINT_OUTPUT_QUANTITIES = ("x", "v", "a")
POINT_QUANTITIES = POINT_INPUT_QUANTITIES + POINT_OUTPUT_QUANTITIES
#: Cumulative energies: work of the inputs, dissipated in the joints, dissipated viscously.
ENERGIES = ("input", "joint", "viscous")
BASE_ACCELERATION = "base.acceleration"
BASE_FORCE = "base.force"
STEPS_PER_PERIOD = "steps_per_period"

_MODE_VALUE_KEYS = "|".join(re.escape(r.key) for r in MODE_VALUE_RULES)
_NAME_RE = re.compile(
    r"^(?:mode\[(?P<mode>[1-9][0-9]*)\]\.(?:(?P<value>" + _MODE_VALUE_KEYS + r")|(?P<mq>"
    + "|".join(MODE_QUANTITIES) + r"))"
    r"|point\.(?P<label>" + LABEL_PATTERN + r")\.(?P<pq>" + "|".join(POINT_QUANTITIES) + r")"
    r"|(?P<base>" + re.escape(BASE_ACCELERATION) + "|" + re.escape(BASE_FORCE) + r")"
    r"|energy\.(?P<energy>" + "|".join(ENERGIES) + r")"
    r"|(?P<setting>" + STEPS_PER_PERIOD + r"))$")
_KEY_TO_VALUE = {r.key: r.name for r in MODE_VALUE_RULES}


@dataclass(frozen=True)
class VariableName:
    """A name read back by :func:`parse_name`.

    Attributes
    ----------
    kind : str
        ``"mode_value"`` (``mode[i].joint.chi``), ``"mode"`` (``mode[i].q``), ``"point"``,
        ``"base"``, ``"energy"`` or ``"setting"``.
    quantity : str
        The value or quantity: ``"chi"``, ``"q"``, ``"a"``, ``"acceleration"``, ``"joint"``,
        ``"steps_per_period"``...
    mode : int or None
        1-based mode index (kinds ``mode_value`` and ``mode``).
    label : str or None
        Point label (kind ``point``).
    """

    kind: str
    quantity: str
    mode: Optional[int] = None
    label: Optional[str] = None


def mode_prefix(mode: int) -> str:
    """``"mode[2]"``: mode 2 (1-based), the prefix of its names (and of its fields in messages)."""
    return f"mode[{_index(mode)}]"


def mode_value_name(mode: int, value: str) -> str:
    """``"mode[2].joint.chi"`` for mode 2 (1-based) and value ``"chi"`` (a rule's name)."""
    return f"{mode_prefix(mode)}.{RULES_BY_NAME[value].key}"


def mode_name(mode: int, quantity: str) -> str:
    """``"mode[2].q"``: a modal input or output of mode 2 (1-based); quantity one of
    :data:`MODE_QUANTITIES`."""
    if quantity not in MODE_QUANTITIES:
        raise ValueError(f"mode quantity {quantity!r}: allowed are {', '.join(MODE_QUANTITIES)}")
    return f"{mode_prefix(mode)}.{quantity}"


def point_name(label: str, quantity: str) -> str:
    """``"point.tip.a"``: a point's force or motion; quantity one of :data:`POINT_QUANTITIES`."""
    if quantity not in POINT_QUANTITIES:
        raise ValueError(f"point quantity {quantity!r}: allowed are {', '.join(POINT_QUANTITIES)}")
    return f"point.{label}.{quantity}"


def energy_name(kind: str) -> str:
    """``"energy.joint"``; kind one of :data:`ENERGIES`."""
    if kind not in ENERGIES:
        raise ValueError(f"energy {kind!r}: allowed are {', '.join(ENERGIES)}")
    return f"energy.{kind}"


def mode_value_names(n_modes: int) -> list[str]:
    """Every mode value's name for ``n_modes`` modes: mode by mode, in the rules' order."""
    return [mode_value_name(i, r.name) for i in range(1, n_modes + 1) for r in MODE_VALUE_RULES]


def mode_value_pattern(n_modes: Optional[int] = None) -> str:
    """``"mode[i].f0, mode[i].zeta, mode[i].joint.Fs, ... (i = 1..3)"`` for messages."""
    fields = ", ".join(f"mode[i].{r.key}" for r in MODE_VALUE_RULES)
    return f"{fields} ({f'i = 1..{n_modes}' if n_modes else 'i = 1, 2, ...'})"


def parse_name(name: str) -> Optional[VariableName]:
    """Read a name back; None when it is not one of the forms above.

    Labels and mode indices are read as written; whether a structure has that mode or point is
    for the caller to check.
    """
    if not isinstance(name, str):
        return None
    m = _NAME_RE.match(name)
    if m is None:
        return None
    g = m.groupdict()
    if g["mode"] is not None:
        if g["value"] is not None:
            return VariableName("mode_value", _KEY_TO_VALUE[g["value"]], mode=int(g["mode"]))
        return VariableName("mode", g["mq"], mode=int(g["mode"]))
    if g["label"] is not None:
        return VariableName("point", g["pq"], label=g["label"])
    if g["base"] is not None:
        return VariableName("base", g["base"].split(".", 1)[1])
    if g["energy"] is not None:
        return VariableName("energy", g["energy"])
    return VariableName("setting", g["setting"])


def _index(mode: int) -> int:
    try:
        i = operator.index(mode)
    except TypeError:
        i = 0
    if isinstance(mode, bool) or i < 1:
        raise ValueError(f"mode index {mode!r}: allowed are integers >= 1 (1-based)")
    return i
