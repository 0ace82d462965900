"""Parameter sets: one modal Iwan model of one hardware build.

A parameter set describes a bolted structure in mass-normalized modal coordinates (modal mass 1):
each mode is a one-degree-of-freedom oscillator with viscous damping plus a four-parameter Iwan
joint (Segalman, "A four-parameter Iwan model for lap-type joints", J. Appl. Mech. 72(5):752-760,
2005), and optional points map the modal coordinates to physical forces and motions.

Sets live in TOML files (format ``"jointfmu-params/1"``, SI units), read with :mod:`tomllib`.
Everything is checked at the boundary: :func:`parse_parameter_set` collects every problem in the
data and raises one :class:`~.errors.ParameterError` listing them all, and the dataclasses below
re-check themselves in ``__post_init__`` so that an invalid one cannot exist.

Content hash
------------
:meth:`ParameterSet.content_hash` is the SHA-256 (hex) of a canonical JSON text of
:meth:`ParameterSet.to_dict`: keys sorted, no whitespace, ASCII only, every float written as
``float.hex()`` (exact, the same on every IEEE-754 machine and Python version), ``-0.0`` folded to
``0.0``.  ``Kt`` is always stored, so a file giving ``f_macro`` hashes like one giving the
equivalent ``Kt``.  Provenance is part of the hash; :attr:`ParameterSet.source` (where the set was
read from) is not.  Comments, key order and table order in the file do not change the hash.
"""
from __future__ import annotations

import hashlib
import json
import math
import numbers
import os
from dataclasses import dataclass, field, replace
from datetime import date, datetime, time
from pathlib import Path
from typing import Any, Iterable, Mapping

try:  # Python >= 3.11
    import tomllib as _toml
except ModuleNotFoundError:  # pragma: no cover - Python 3.10 with the tomli backport
    try:
        import tomli as _toml  # type: ignore[no-redef]
    except ModuleNotFoundError:
        _toml = None  # type: ignore[assignment]

from ..fileio import atomic_write
from .checks import LABEL_RE as _LABEL_RE
from .checks import is_number as _is_number
from .checks import label as _label
from .checks import number as _number
from .checks import required as _required
from .checks import table as _table
from .checks import toml_table as _toml_table
from .checks import type_name as _type_name
from ..errors import ParameterError, Problem, did_you_mean
from .names import mode_prefix
from .rules import MODE_VALUE_RULES, RULES_BY_NAME, short_number

__all__ = [
    "FORMAT",
    "ROLES",
    "MODE_VALUE_NAMES",
    "JointParams",
    "Mode",
    "Point",
    "Base",
    "Provenance",
    "ParameterSet",
    "parse_parameter_set",
    "load_parameter_set",
    "save_parameter_set",
    "check_parameter_file",
    "check_mode_values",
]

#: The one file format this version reads and writes.
FORMAT = "jointfmu-params/1"
#: Allowed values of ``points[].role``.
ROLES = ("input", "output", "both")
#: Names accepted by :meth:`ParameterSet.with_mode_values` (and by FMU parameters).
MODE_VALUE_NAMES = tuple(r.name for r in MODE_VALUE_RULES)


_LABEL_WHAT = "a label: a letter, then letters, digits or '_'"
_TWO_PI = 2.0 * math.pi
_PYTHON = "<python>"  # the "file" of a dataclass built directly in Python

# Allowed keys per table, in the order the writer emits them.
_TOP_KEYS = ("format", "structure", "provenance", "base", "modes", "points")
_STRUCTURE_KEYS = ("name", "build", "description")
_PROVENANCE_KEYS = ("fitted_by", "date", "source_data", "notes")
_BASE_KEYS = ("total_mass", "direction")
_MODE_KEYS = ("label", "f0", "zeta", "base_participation", "joint")
_JOINT_KEYS = ("Fs", "Kt", "f_macro", "chi", "beta")
_POINT_KEYS = ("label", "role", "direction", "shape", "base_factor", "test_node")

_HEADER = """\
# jointfmu parameter set (format jointfmu-params/1), SI units.
# Joint values are in MASS-NORMALIZED MODAL COORDINATES (modal mass 1): Fs in N/sqrt(kg),
# Kt in 1/s^2, mode shapes in 1/sqrt(kg), base participation in sqrt(kg).
# A fitted model is no substitute for qualification testing; defer to the applicable codes,
# standards and licensed engineering practice.
"""


# --------------------------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------------------------
def _g(x: float) -> str:
    """Format a number with 3 significant digits, exponent without '+' or leading zeros."""
    return short_number(x)


def _check_keys(table: Mapping[str, Any], allowed: tuple[str, ...], where: str, prefix: str,
                file: str, problems: list[Problem]) -> None:
    for key in table:
        if key not in allowed:
            problems.append(Problem(
                file, f"{prefix}{key}", table[key],
                f"unknown key in {where}; allowed keys: {', '.join(allowed)}",
                did_you_mean(key, allowed)))


def _text(x: Any, file: str, fld: str, problems: list[Problem], *, required_nonempty: bool = False
          ) -> str | None:
    if isinstance(x, (datetime, date, time)):
        # TOML reads an unquoted 2026-10-14 as a date; free text is what we mean.
        return x.isoformat()
    if not isinstance(x, str):
        problems.append(Problem(file, fld, x, f"must be a string (text), got {_type_name(x)}"))
        return None
    if required_nonempty and not x.strip():
        problems.append(Problem(file, fld, x, "must be a non-empty string"))
        return None
    bad = _unwritable_character(x, multiline=fld.rpartition(".")[2] in _MULTILINE_FIELDS)
    if bad is not None:
        problems.append(Problem(file, fld, x, bad))
        return None
    return x


#: Free-text fields that may hold line breaks and tabs; every other text is one line.
_MULTILINE_FIELDS = frozenset({"description", "notes", "source_data"})


def _unwritable_character(text: str, *, multiline: bool) -> str | None:
    """Why ``text`` cannot go into an XML file as it is, or None.

    Every free text of a parameter set ends up in XML (modelDescription.xml of the FMU, its
    variable descriptions, the .ssv and SSP files), whose documents may hold only the characters
    of XML 1.0 (Fifth Edition) sec. 2.2, production [2] Char: tab, line feed, carriage return and
    U+0020 and above, without the surrogates and U+FFFE, U+FFFF.  The other control characters
    (Unicode category Cc) are refused as well, and in one-line fields line breaks and tabs too.
    """
    import unicodedata

    for k, ch in enumerate(text, start=1):
        code = ord(ch)
        if ch in "\t\n\r":
            if multiline:
                continue
        elif not (unicodedata.category(ch) in ("Cc", "Cs") or code in (0xFFFE, 0xFFFF)):
            continue
        allowed = ("text without control characters (line breaks and tabs allowed)" if multiline
                   else "one line of text without control characters, line breaks or tabs")
        return (f"character {k} is U+{code:04X} ({_character_name(ch)}); allowed is {allowed}, "
                "because the text goes into XML files (modelDescription.xml, .ssv; XML 1.0 "
                "sec. 2.2)")
    return None


def _character_name(ch: str) -> str:
    names = {"\t": "tab", "\n": "line feed", "\r": "carriage return", "\x7f": "delete"}
    if ch in names:
        return names[ch]
    if 0xD800 <= ord(ch) <= 0xDFFF:
        return "a surrogate"
    if ord(ch) in (0xFFFE, 0xFFFF):
        return "a noncharacter"
    return "a control character"


# --------------------------------------------------------------------------------------------
# shared range checks
# --------------------------------------------------------------------------------------------
def _check_value(name: str, x: Any, file: str, fld: str, problems: list[Problem],
                 upper: float | None = None, context: str = "") -> float | None:
    """One mode value against its rule (:data:`.rules.MODE_VALUE_RULES`): a finite number in
    range, or a problem recorded (and None returned for a value that is not a number)."""
    rule = RULES_BY_NAME[name]
    v = _number(x, file, fld, rule.number_text, problems)
    if v is not None:
        bad = rule.violation(v, upper, context)
        if bad is not None:
            problems.append(Problem(file, fld, x, *bad))
    return v


def _check_joint(Fs: Any, Kt: Any, chi: Any, beta: Any, file: str, prefix: str,
                 problems: list[Problem], kt_max: float | None = None, f0: float | None = None
                 ) -> tuple[float | None, float | None, float | None, float | None]:
    """Range checks of the four Iwan parameters (Segalman 2005, sec. 1 of physics.md); Kt below
    ``kt_max = (2 pi f0)^2`` when f0 is known."""
    context = f"f0 = {_g(f0)} Hz" if f0 is not None else ""
    return (_check_value("Fs", Fs, file, prefix + "Fs", problems),
            _check_value("Kt", Kt, file, prefix + "Kt", problems, kt_max, context),
            _check_value("chi", chi, file, prefix + "chi", problems),
            _check_value("beta", beta, file, prefix + "beta", problems))


def _mode_prefix(index: int | None, label: Any) -> str:
    lab = f" ({label})" if isinstance(label, str) and _LABEL_RE.match(label) else ""
    if index is None:
        return f"mode{lab}" if lab else "mode"
    return f"modes[{index}]{lab}"


def check_mode_values(index: int | None, label: str, f0: Any, zeta: Any, Fs: Any, Kt: Any,
                      chi: Any, beta: Any, source: str, *, field_prefix: str | None = None
                      ) -> list[Problem]:
    """Range checks of one mode's values, shared by files, dataclasses and FMU parameters.

    Parameters
    ----------
    index : int or None
        1-based mode index (None when unknown).
    label : str
        Mode label, shown in the field name when valid.
    f0 : float
        Low-amplitude natural frequency [Hz], ``f0 > 0``.
    zeta : float
        Viscous damping ratio [-], ``0 <= zeta < 1``.
    Fs : float
        Modal slip force [N/sqrt(kg)], ``Fs > 0``.
    Kt : float
        Joint stiffness at zero load [1/s^2], ``0 < Kt < (2 pi f0)^2``.
    chi : float
        Iwan density exponent [-], ``-1 < chi <= 0``.
    beta : float
        Ratio of the macro-slip point mass to the power-law part [-], ``beta >= 0``.
    source : str
        Where the values came from (goes into ``Problem.file``).
    field_prefix : str, optional
        Field name of the mode, e.g. ``"mode[2]"``; default ``"modes[<index>] (<label>)"``.

    Returns
    -------
    list of Problem
        Empty when every value is admissible.  Non-numbers, booleans, NaN and infinity are reported
        with their type; each range violation names the field, the value and the allowed range.
    """
    problems: list[Problem] = []
    pre = (field_prefix if field_prefix is not None else _mode_prefix(index, label)) + "."
    n_before = len(problems)
    f0_v = _check_value("f0", f0, source, pre + "f0", problems)
    if len(problems) > n_before:
        f0_v = None
    _check_value("zeta", zeta, source, pre + "zeta", problems)
    kt_max = (_TWO_PI * f0_v) ** 2 if f0_v is not None else None
    _check_joint(Fs, Kt, chi, beta, source, pre + "joint.", problems, kt_max, f0_v)
    return problems


def _raise(problems: list[Problem]) -> None:
    if problems:
        raise ParameterError(problems)


# --------------------------------------------------------------------------------------------
# dataclasses
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class JointParams:
    """Segalman's four-parameter Iwan joint, in mass-normalized modal coordinates.

    Parameters
    ----------
    Fs : float
        Modal slip force at the onset of macro-slip [N/sqrt(kg)], > 0.
    Kt : float
        Joint stiffness at zero load [1/s^2], > 0.
    chi : float
        Exponent of the power-law part of the slider density [-], -1 < chi <= 0.
    beta : float
        Strength of the point mass at phimax relative to the power-law part [-], >= 0.
    """

    Fs: float
    Kt: float
    chi: float
    beta: float

    def __post_init__(self) -> None:
        problems: list[Problem] = []
        vals = _check_joint(self.Fs, self.Kt, self.chi, self.beta, _PYTHON, "joint.", problems)
        _raise(problems)
        for name, v in zip(("Fs", "Kt", "chi", "beta"), vals):
            object.__setattr__(self, name, v)

    @property
    def _a(self) -> float:
        return (self.chi + 1.0) / (self.chi + 2.0)

    @property
    def phimax(self) -> float:
        """Slider strength where macro-slip begins [sqrt(kg) m, modal displacement].

        ``phimax = Fs (1 + beta) / (Kt (beta + a))``, ``a = (chi+1)/(chi+2)``
        (Segalman 2005, inverse relations; physics.md sec. 1).
        """
        return self.Fs * (1.0 + self.beta) / (self.Kt * (self.beta + self._a))

    @property
    def R(self) -> float:
        """Coefficient of the power-law density ``R phi^chi`` [units so that F is N/sqrt(kg)].

        ``R = Fs (chi+1) / (phimax^(chi+2) (beta + a))`` (Segalman 2005; physics.md sec. 1).
        """
        return self.Fs * (self.chi + 1.0) / (self.phimax ** (self.chi + 2.0) * (self.beta + self._a))

    @property
    def S(self) -> float:
        """Strength of the point mass at ``phimax`` [1/s^2]: ``S = beta Kt / (1 + beta)``
        (Segalman 2005; physics.md sec. 1)."""
        return self.beta * self.Kt / (1.0 + self.beta)


@dataclass(frozen=True)
class Mode:
    """One mode: viscous oscillator plus Iwan joint, ``q'' + 2 zeta omega0 q' + Kinf q + F_J = f``.

    Parameters
    ----------
    label : str
        Name of the mode, ``^[A-Za-z][A-Za-z0-9_]*$``.
    f0 : float
        Low-amplitude natural frequency [Hz], > 0; ``(2 pi f0)^2 = Kinf + Kt``.
    zeta : float
        Viscous damping ratio at the low-amplitude frequency [-], 0 <= zeta < 1.
    joint : JointParams
        The joint, with ``Kt < (2 pi f0)^2``.
    base_participation : float
        ``Gamma = phi^T M r`` [sqrt(kg)]; 0 when the structure has no moving base.
    """

    label: str
    f0: float
    zeta: float
    joint: JointParams
    base_participation: float = 0.0

    def __post_init__(self) -> None:
        problems: list[Problem] = []
        _label(self.label, _PYTHON, "mode.label", problems)
        pre = _mode_prefix(None, self.label)
        if not isinstance(self.joint, JointParams):
            problems.append(Problem(_PYTHON, pre + ".joint", self.joint,
                                    f"must be a JointParams, got {_type_name(self.joint)}"))
            _raise(problems)
        j = self.joint
        problems += check_mode_values(None, self.label, self.f0, self.zeta, j.Fs, j.Kt, j.chi,
                                      j.beta, _PYTHON)
        gamma = _number(self.base_participation, _PYTHON, pre + ".base_participation", " in sqrt(kg)",
                        problems)
        _raise(problems)
        object.__setattr__(self, "f0", float(self.f0) + 0.0)
        object.__setattr__(self, "zeta", float(self.zeta) + 0.0)
        object.__setattr__(self, "base_participation", gamma)

    @property
    def omega0(self) -> float:
        """Low-amplitude natural circular frequency ``2 pi f0`` [rad/s]."""
        return _TWO_PI * self.f0

    @property
    def Kinf(self) -> float:
        """Stiffness left in macro-slip, ``omega0^2 - Kt`` [1/s^2] (> 0)."""
        return self.omega0 ** 2 - self.joint.Kt

    @property
    def f_macro(self) -> float:
        """Tangent frequency in macro-slip, ``sqrt(Kinf) / (2 pi)`` [Hz]."""
        return math.sqrt(self.Kinf) / _TWO_PI


@dataclass(frozen=True)
class Point:
    """A physical point where a force acts (input) or a motion is sensed (output).

    Parameters
    ----------
    label : str
        Name, ``^[A-Za-z][A-Za-z0-9_]*$``; FMU variables are ``point.<label>.x`` and so on.
    role : str
        ``"input"``, ``"output"`` or ``"both"``.
    direction : str
        Free-text direction of the force or sensor, e.g. ``"+z"``; non-empty.
    shape : tuple of float, shape (n_modes,)
        Mass-normalized mode-shape coefficient of every mode at this point [1/sqrt(kg)].
    base_factor : float
        Component of the unit base motion along this point's direction [-], ``|base_factor| <= 1``.
    test_node : int or None
        Node number of this point in the lab's test geometry (a positive integer, unique among
        the points), used to map Universal File Format records to the point; None when not
        given.  Optional and left out of the canonical form when None, so sets without it keep
        their content hash.
    """

    label: str
    role: str
    direction: str
    shape: tuple[float, ...]
    base_factor: float = 1.0
    test_node: int | None = None

    def __post_init__(self) -> None:
        problems: list[Problem] = []
        _label(self.label, _PYTHON, "point.label", problems)
        pre = f"point ({self.label})" if isinstance(self.label, str) else "point"
        shape = _check_point_values(self.role, self.direction, self.shape, self.base_factor,
                                    _PYTHON, pre + ".", problems, self.test_node)
        _raise(problems)
        object.__setattr__(self, "shape", shape)
        object.__setattr__(self, "base_factor", float(self.base_factor) + 0.0)
        if self.test_node is not None:
            object.__setattr__(self, "test_node", int(self.test_node))

    @property
    def is_input(self) -> bool:
        """True when a force acts here (role ``input`` or ``both``)."""
        return self.role in ("input", "both")

    @property
    def is_output(self) -> bool:
        """True when motion is sensed here (role ``output`` or ``both``)."""
        return self.role in ("output", "both")


def _check_point_values(role: Any, direction: Any, shape: Any, base_factor: Any, file: str,
                        pre: str, problems: list[Problem], test_node: Any = None
                        ) -> tuple[float, ...] | None:
    if role not in ROLES:
        problems.append(Problem(file, pre + "role", role,
                                "must be one of " + ", ".join(repr(r) for r in ROLES),
                                did_you_mean(role, ROLES) if isinstance(role, str) else ""))
    _text(direction, file, pre + "direction", problems, required_nonempty=True)
    out: tuple[float, ...] | None = None
    if isinstance(shape, (list, tuple)):
        if len(shape) == 0:
            problems.append(Problem(file, pre + "shape", list(shape),
                                    "must have one coefficient (1/sqrt(kg)) per mode, at least one"))
        vals = [_number(s, file, f"{pre}shape[{k}]", " in 1/sqrt(kg)", problems)
                for k, s in enumerate(shape, start=1)]
        if all(v is not None for v in vals):
            out = tuple(vals)  # type: ignore[arg-type]
    else:
        problems.append(Problem(file, pre + "shape", shape,
                                f"must be an array of numbers (1/sqrt(kg)), one per mode, got "
                                f"{_type_name(shape)}"))
    bf = _number(base_factor, file, pre + "base_factor", "", problems)
    if bf is not None and not abs(bf) <= 1.0:
        problems.append(Problem(file, pre + "base_factor", base_factor,
                                "must satisfy -1 <= base_factor <= 1 (a component of a unit vector)"))
    if test_node is not None:
        rule = "must be a positive integer (the point's node number in the test geometry)"
        if not isinstance(test_node, numbers.Integral) or isinstance(test_node, bool):
            problems.append(Problem(file, pre + "test_node", test_node,
                                    f"{rule}, got {_type_name(test_node)}"))
        elif not test_node > 0:
            problems.append(Problem(file, pre + "test_node", test_node, rule + ", >= 1"))
    return out


@dataclass(frozen=True)
class Base:
    """The moving base the structure sits on.

    Parameters
    ----------
    total_mass : float
        Total mass of the structure carried by the base [kg], > 0.
    direction : str
        Free-text label of the base-motion direction, e.g. ``"z"``.
    """

    total_mass: float
    direction: str = ""

    def __post_init__(self) -> None:
        problems: list[Problem] = []
        m = _check_base_values(self.total_mass, self.direction, _PYTHON, "base.", problems)
        _raise(problems)
        object.__setattr__(self, "total_mass", m)


def _check_base_values(total_mass: Any, direction: Any, file: str, pre: str,
                       problems: list[Problem]) -> float | None:
    m = _number(total_mass, file, pre + "total_mass", " in kg", problems)
    if m is not None and not m > 0.0:
        problems.append(Problem(file, pre + "total_mass", total_mass, "must satisfy total_mass > 0 kg"))
        m = None
    _text(direction, file, pre + "direction", problems)
    return m


@dataclass(frozen=True)
class Provenance:
    """Who fitted the set, when, and from what (free text; part of the content hash)."""

    fitted_by: str = ""
    date: str = ""
    source_data: str = ""
    notes: str = ""

    def __post_init__(self) -> None:
        problems: list[Problem] = []
        for name in _PROVENANCE_KEYS:
            v = _text(getattr(self, name), _PYTHON, "provenance." + name, problems)
            if v is not None:
                object.__setattr__(self, name, v)
        _raise(problems)


def _check_unique(items: list[Any], what: str, file: str, problems: list[Problem]) -> None:
    """Report the second and later uses of a label among ``modes`` or ``points``."""
    seen: dict[str, int] = {}
    for i, item in enumerate(items, start=1):
        lab = item.label if isinstance(item, (Mode, Point)) else (
            item.get("label") if isinstance(item, Mapping) else None)
        if not isinstance(lab, str):
            continue
        if lab in seen:
            problems.append(Problem(file, f"{what}[{i}].label", lab,
                                    f"must be unique among {what}; already used by {what}[{seen[lab]}]"))
        else:
            seen[lab] = i


def _check_unique_nodes(nodes: list[Any], fields: list[str], file: str,
                        problems: list[Problem]) -> None:
    """Report the second and later uses of a ``test_node`` number among the points."""
    seen: dict[int, str] = {}
    for node, fld in zip(nodes, fields):
        if not (isinstance(node, numbers.Integral) and not isinstance(node, bool)):
            continue
        if int(node) in seen:
            problems.append(Problem(file, fld + ".test_node", node,
                                    f"must be unique among points; already used by {seen[int(node)]}"))
        else:
            seen[int(node)] = fld


def _check_mass_sum(gammas: Iterable[float], base: Base, file: str, problems: list[Problem]) -> None:
    """sum(Gamma_i^2) <= total mass: effective modal masses cannot exceed the total mass."""
    total = math.fsum(float(g) ** 2 for g in gammas)
    if total > base.total_mass:
        problems.append(Problem(
            file, "modes[*].base_participation", total,
            f"the sum of base_participation^2 (effective modal masses) = {_g(total)} kg must not "
            f"exceed base.total_mass = {_g(base.total_mass)} kg",
            "the effective modal masses of all modes add up to at most the total mass; common "
            "practice, Craig and Kurdila, Fundamentals of Structural Dynamics, 2006, modal "
            "effective mass"))


def _check_set(name: Any, build: Any, description: Any, modes: Any, points: Any, base: Any,
               file: str, problems: list[Problem],
               mode_fields: list[str] | None = None, point_fields: list[str] | None = None) -> None:
    """Checks that involve the whole set: labels, shape lengths, base participation."""
    _label(name, file, "structure.name", problems)
    _text(build, file, "structure.build", problems, required_nonempty=True)
    _text(description, file, "structure.description", problems)
    n = len(modes)
    mode_fields = mode_fields or [_mode_prefix(i, m.label) for i, m in enumerate(modes, start=1)]
    point_fields = point_fields or [f"points[{k}] ({p.label})" for k, p in enumerate(points, start=1)]
    if n == 0:
        problems.append(Problem(file, "modes", [], "at least one mode is required"))
    _check_unique(list(modes), "modes", file, problems)
    _check_unique(list(points), "points", file, problems)
    _check_unique_nodes([p.test_node for p in points], point_fields, file, problems)
    for k, p in enumerate(points, start=1):
        if n and len(p.shape) != n:
            problems.append(Problem(file, point_fields[k - 1] + ".shape", list(p.shape),
                                    f"must have one coefficient per mode: {n} values, got {len(p.shape)}"))
    if base is None:
        for i, m in enumerate(modes, start=1):
            if m.base_participation != 0.0:
                problems.append(Problem(
                    file, mode_fields[i - 1] + ".base_participation", m.base_participation,
                    "only allowed when the set has a [base] table (a base-mounted structure)",
                    "add [base] with total_mass, or remove base_participation"))
    else:
        _check_mass_sum([m.base_participation for m in modes], base, file, problems)


@dataclass(frozen=True)
class ParameterSet:
    """One modal Iwan model of one hardware build.

    Parameters
    ----------
    name : str
        Structure name, ``^[A-Za-z][A-Za-z0-9_]*$`` (goes into FMU names).
    build : str
        Build or serial id, non-empty free text.
    description : str
        Free text.
    provenance : Provenance
        Who fitted the set, when, from what.
    modes : tuple of Mode, shape (n_modes,)
        At least one; labels unique.
    points : tuple of Point
        Labels unique; each ``shape`` has ``n_modes`` entries.
    base : Base or None
        Present for a base-mounted structure; ``sum(Gamma_i^2) <= base.total_mass``.
    source : str
        Where the set came from (path, ``"<dict>"``, ``"FMU parameter"``); not compared, not hashed.
    """

    name: str
    build: str
    description: str
    provenance: Provenance
    modes: tuple[Mode, ...]
    points: tuple[Point, ...]
    base: Base | None = None
    source: str = field(default="<dict>", compare=False)

    def __post_init__(self) -> None:
        problems: list[Problem] = []
        src = self.source if isinstance(self.source, str) else repr(self.source)
        modes, points = self.modes, self.points
        if not isinstance(self.provenance, Provenance):
            problems.append(Problem(src, "provenance", self.provenance, "must be a Provenance"))
        if self.base is not None and not isinstance(self.base, Base):
            problems.append(Problem(src, "base", self.base, "must be a Base or None"))
        if not isinstance(modes, (list, tuple)) or not all(isinstance(m, Mode) for m in modes):
            problems.append(Problem(src, "modes", modes, "must be a sequence of Mode"))
        if not isinstance(points, (list, tuple)) or not all(isinstance(p, Point) for p in points):
            problems.append(Problem(src, "points", points, "must be a sequence of Point"))
        _raise(problems)
        object.__setattr__(self, "modes", tuple(modes))
        object.__setattr__(self, "points", tuple(points))
        _check_set(self.name, self.build, self.description, self.modes, self.points, self.base,
                   src, problems)
        _raise(problems)

    # --- views ---------------------------------------------------------------------------
    @property
    def n_modes(self) -> int:
        """Number of modes."""
        return len(self.modes)

    @property
    def input_points(self) -> tuple[Point, ...]:
        """Points where a force acts (role ``input`` or ``both``), in file order."""
        return tuple(p for p in self.points if p.is_input)

    @property
    def output_points(self) -> tuple[Point, ...]:
        """Points where motion is sensed (role ``output`` or ``both``), in file order."""
        return tuple(p for p in self.points if p.is_output)

    @property
    def set_id(self) -> str:
        """``"<name>@<build>"``."""
        return f"{self.name}@{self.build}"

    # --- canonical form ------------------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """Canonical plain dict in the layout of the TOML file.

        ``Kt`` is always given (never ``f_macro``), all numbers are floats, all provenance keys are
        present, ``base_participation`` appears only when there is a base, a point's ``test_node``
        only when it has one, ``points`` is a list (possibly empty).  ``parse_parameter_set(s.to_dict()) == s``.
        """
        d: dict[str, Any] = {
            "format": FORMAT,
            "structure": {"name": self.name, "build": self.build, "description": self.description},
            "provenance": {k: getattr(self.provenance, k) for k in _PROVENANCE_KEYS},
        }
        if self.base is not None:
            d["base"] = {"total_mass": self.base.total_mass, "direction": self.base.direction}
        modes = []
        for m in self.modes:
            md: dict[str, Any] = {"label": m.label, "f0": m.f0, "zeta": m.zeta}
            if self.base is not None:
                md["base_participation"] = m.base_participation
            md["joint"] = {"Fs": m.joint.Fs, "Kt": m.joint.Kt, "chi": m.joint.chi, "beta": m.joint.beta}
            modes.append(md)
        d["modes"] = modes
        d["points"] = []
        for p in self.points:
            pd: dict[str, Any] = {"label": p.label, "role": p.role, "direction": p.direction,
                                  "shape": list(p.shape), "base_factor": p.base_factor}
            if p.test_node is not None:  # only when given: sets without it keep their hash
                pd["test_node"] = p.test_node
            d["points"].append(pd)
        return d

    def content_hash(self) -> str:
        """SHA-256 hex digest of the canonical JSON of :meth:`to_dict` (see the module docstring).

        Stable across runs, machines and Python versions; ``source`` is excluded.
        """
        def canon(x: Any) -> Any:
            if isinstance(x, float):
                return {"f": x.hex()}
            if isinstance(x, dict):
                return {k: canon(v) for k, v in x.items()}
            if isinstance(x, list):
                return [canon(v) for v in x]
            return x

        text = json.dumps(canon(self.to_dict()), sort_keys=True, separators=(",", ":"),
                          ensure_ascii=True)
        return hashlib.sha256(text.encode("ascii")).hexdigest()

    def short_hash(self) -> str:
        """First 12 hex characters of :meth:`content_hash`."""
        return self.content_hash()[:12]

    def to_toml(self) -> str:
        """The set as TOML text that :func:`load_parameter_set` reads back to an equal set.

        Floats are written with ``repr`` (shortest text that round-trips exactly).
        """
        d = self.to_dict()
        out = [_HEADER, f"# content hash: sha256 {self.content_hash()}\n\n",
               f"format = {_tstr(FORMAT)}\n"]

        def table(header: str, items: Mapping[str, Any]) -> None:
            out.append(f"\n{header}\n")
            for k, v in items.items():
                out.append(f"{k} = {_tval(v)}\n")

        table("[structure]", d["structure"])
        table("[provenance]", d["provenance"])
        if "base" in d:
            table("[base]", d["base"])
        for md in d["modes"]:
            table("[[modes]]", {k: v for k, v in md.items() if k != "joint"})
            table("[modes.joint]", md["joint"])
        for pd in d["points"]:
            table("[[points]]", pd)
        return "".join(out)

    # --- derived sets --------------------------------------------------------------------
    def with_mode_values(self, overrides: Mapping[tuple[int, str], Any],
                         source: str = "FMU parameter") -> "ParameterSet":
        """A copy with some mode values replaced, checked like a file.

        Parameters
        ----------
        overrides : mapping (int, str) -> float
            Keyed by (1-based mode index, name), name one of ``f0, zeta, Fs, Kt, chi, beta``.
        source : str
            Goes into ``Problem.file`` and into the new set's ``source``.

        Returns
        -------
        ParameterSet
            The new set (the original is unchanged).

        Raises
        ------
        ParameterError
            Listing every bad key or value, with fields named like ``"mode[2].joint.chi"``.
        """
        problems: list[Problem] = []
        per_mode: dict[int, dict[str, Any]] = {}
        for key, value in overrides.items():
            ok = (isinstance(key, tuple) and len(key) == 2 and isinstance(key[0], int)
                  and not isinstance(key[0], bool) and isinstance(key[1], str))
            if not ok:
                problems.append(Problem(source, repr(key), value,
                                        "override keys must be (mode index, name) tuples"))
                continue
            i, name = key
            if not 1 <= i <= self.n_modes:
                problems.append(Problem(source, f"mode[{i}]", value,
                                        f"mode index must satisfy 1 <= index <= {self.n_modes}"))
                continue
            if name not in MODE_VALUE_NAMES:
                problems.append(Problem(source, f"{mode_prefix(i)}.{name}", value,
                                        "unknown mode value; allowed: " + ", ".join(MODE_VALUE_NAMES),
                                        did_you_mean(name, MODE_VALUE_NAMES)))
                continue
            per_mode.setdefault(i, {})[name] = value
        new_values: dict[int, dict[str, Any]] = {}
        for i, ov in sorted(per_mode.items()):
            m = self.modes[i - 1]
            v = {"f0": m.f0, "zeta": m.zeta, "Fs": m.joint.Fs, "Kt": m.joint.Kt, "chi": m.joint.chi,
                 "beta": m.joint.beta}
            v.update(ov)
            probs = check_mode_values(i, m.label, v["f0"], v["zeta"], v["Fs"], v["Kt"], v["chi"],
                                      v["beta"], source, field_prefix=mode_prefix(i))
            problems += [replace(p, hint=(p.hint + "; " if p.hint else "") + f"mode {i} is {m.label!r}")
                         for p in probs]
            new_values[i] = v
        _raise(problems)
        modes = list(self.modes)
        for i, v in new_values.items():
            m = modes[i - 1]
            modes[i - 1] = replace(m, f0=float(v["f0"]), zeta=float(v["zeta"]),
                                   joint=JointParams(float(v["Fs"]), float(v["Kt"]),
                                                     float(v["chi"]), float(v["beta"])))
        return replace(self, modes=tuple(modes), source=source)


# --------------------------------------------------------------------------------------------
# TOML writing
# --------------------------------------------------------------------------------------------
_ESCAPES = {"\b": "\\b", "\t": "\\t", "\n": "\\n", "\f": "\\f", "\r": "\\r", '"': '\\"', "\\": "\\\\"}


def _tstr(s: str) -> str:
    """TOML basic string (TOML 1.0, 'Basic strings')."""
    parts = []
    for ch in s:
        if ch in _ESCAPES:
            parts.append(_ESCAPES[ch])
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            parts.append(f"\\u{ord(ch):04X}")
        else:
            parts.append(ch)
    return '"' + "".join(parts) + '"'


def _tval(v: Any) -> str:
    if isinstance(v, str):
        return _tstr(v)
    if isinstance(v, float):
        return repr(v)  # always has '.' or 'e'; never nan/inf (validated)
    if isinstance(v, int) and not isinstance(v, bool):
        return str(v)  # an integer (test_node), read back as a TOML integer
    if isinstance(v, list):
        return "[" + ", ".join(_tval(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")  # pragma: no cover


def save_parameter_set(pset: ParameterSet, path: str | os.PathLike) -> Path:
    """Write ``pset.to_toml()`` to ``path`` atomically (temporary file in the same folder, then
    rename), so a failure never leaves a half-written file.  Returns the path."""
    path = Path(path)
    text = pset.to_toml()
    with atomic_write(path, "w", newline="\n") as f:
        f.write(text)
    return path


# --------------------------------------------------------------------------------------------
# parsing
# --------------------------------------------------------------------------------------------
def parse_parameter_set(data: Mapping[str, Any], source: str = "<dict>") -> ParameterSet:
    """Build a :class:`ParameterSet` from a dict in the TOML layout, checking everything.

    Parameters
    ----------
    data : mapping
        As returned by ``tomllib.load`` (or :meth:`ParameterSet.to_dict`).
    source : str
        Name of the origin, used in every :class:`~.errors.Problem` and kept as ``source``.

    Raises
    ------
    ParameterError
        Listing every problem found (not only the first).
    """
    problems: list[Problem] = []
    f = source
    if not isinstance(data, Mapping):
        _raise([Problem(f, "(top level)", data, f"must be a table, got {_type_name(data)}")])
    other = data.get("format")
    if (isinstance(other, str) and other.startswith("jointfmu-")
            and not other.startswith("jointfmu-params/")):
        # another jointfmu file (a discrete-joint structure, a fit result...): one line, not a
        # problem for every key the two formats do not share
        hint = ("`jointfmu modes FILE -o TEMPLATE.toml` writes the parameter file of a "
                "discrete-joint structure" if other.startswith("jointfmu-lumped/") else "")
        _raise([Problem(f, "format", other, f"a parameter file is format {FORMAT!r}; this file "
                        f"is another kind of jointfmu file", hint)])
    _check_keys(data, _TOP_KEYS, "the top level", "", f, problems)

    if "format" not in data:
        problems.append(Problem(f, "format", None, f"missing required key; must be {FORMAT!r}",
                                f"add the line: format = {_tstr(FORMAT)}"))
    elif data["format"] != FORMAT:
        problems.append(Problem(f, "format", data["format"],
                                f"must be {FORMAT!r} (the only format this version reads)"))

    # [structure]
    name = build = None
    description: Any = ""
    st = _table(data, "structure", f, problems, required=True)
    if st is not None:
        _check_keys(st, _STRUCTURE_KEYS, "[structure]", "structure.", f, problems)
        name = _required(st, "name", f, "structure.name", "structure name, " + _LABEL_WHAT, problems)
        build = _required(st, "build", f, "structure.build", "build or serial id, free text", problems)
        description = st.get("description", "")
        if isinstance(description, (date, datetime, time)):
            description = description.isoformat()

    # [provenance]
    prov_kw: dict[str, str] = {}
    pv = _table(data, "provenance", f, problems, required=False)
    if pv is not None:
        _check_keys(pv, _PROVENANCE_KEYS, "[provenance]", "provenance.", f, problems)
        for k in _PROVENANCE_KEYS:
            if k in pv:
                v = _text(pv[k], f, "provenance." + k, problems)
                if v is not None:
                    prov_kw[k] = v

    # [base]
    base: Base | None = None
    has_base = "base" in data
    bt = _table(data, "base", f, problems, required=False)
    if bt is not None:
        _check_keys(bt, _BASE_KEYS, "[base]", "base.", f, problems)
        if "total_mass" not in bt:
            problems.append(Problem(f, "base.total_mass", None,
                                    "missing required key 'total_mass' (kg, > 0)"))
        else:
            n_before = len(problems)
            m = _check_base_values(bt["total_mass"], bt.get("direction", ""), f, "base.", problems)
            if m is not None and len(problems) == n_before:
                base = Base(m, _text(bt.get("direction", ""), f, "base.direction", []) or "")

    # [[modes]]
    modes: list[Mode] = []
    raw_modes = data.get("modes")
    if "modes" not in data:
        problems.append(Problem(f, "modes", None,
                                "missing: at least one [[modes]] entry is required"))
    elif not isinstance(raw_modes, list) or not all(isinstance(m, Mapping) for m in raw_modes):
        problems.append(Problem(f, "modes", raw_modes,
                                f"must be an array of tables [[modes]], got {_type_name(raw_modes)}"))
    elif not raw_modes:
        problems.append(Problem(f, "modes", raw_modes, "at least one [[modes]] entry is required"))
    else:
        for i, md in enumerate(raw_modes, start=1):
            mode = _parse_mode(i, md, has_base, f, problems)
            if mode is not None:
                modes.append(mode)

    # [[points]]
    points: list[Point] = []
    point_fields: list[str] = []
    raw_points = data.get("points", [])
    if not isinstance(raw_points, list) or not all(isinstance(p, Mapping) for p in raw_points):
        problems.append(Problem(f, "points", raw_points,
                                f"must be an array of tables [[points]], got {_type_name(raw_points)}"))
    else:
        for k, pd in enumerate(raw_points, start=1):
            lab = pd.get("label")
            pre = f"points[{k}]" + (f" ({lab})" if isinstance(lab, str) and _LABEL_RE.match(lab) else "")
            point_fields.append(pre)
            _check_keys(pd, _POINT_KEYS, "[[points]]", pre + ".", f, problems)
            n_before = len(problems)
            lab = _required(pd, "label", f, pre + ".label", _LABEL_WHAT, problems)
            if lab is not None:
                _label(lab, f, pre + ".label", problems)
            role = _required(pd, "role", f, pre + ".role", "one of 'input', 'output', 'both'", problems)
            direction = _required(pd, "direction", f, pre + ".direction", "free text, e.g. '+z'",
                                  problems)
            shape = _required(pd, "shape", f, pre + ".shape",
                              "array of mode-shape coefficients in 1/sqrt(kg), one per mode", problems)
            missing = len(problems) > n_before
            shp = _check_point_values(role if role is not None else "input",
                                      direction if direction is not None else "-",
                                      shape if shape is not None else [0.0],
                                      pd.get("base_factor", 1.0), f, pre + ".", problems,
                                      pd.get("test_node"))
            if len(problems) == n_before and not missing and shp is not None:
                points.append(Point(lab, role, direction, shp, float(pd.get("base_factor", 1.0)) + 0.0,
                                    pd.get("test_node")))

    # Whole-set checks, on the raw data so that they run even when some mode or point is broken.
    if name is not None:
        _label(name, f, "structure.name", problems)
    if build is not None:
        _text(build, f, "structure.build", problems, required_nonempty=True)
    _text(description, f, "structure.description", problems)
    n_modes = len(raw_modes) if isinstance(raw_modes, list) else None
    _check_unique(raw_modes if isinstance(raw_modes, list) else [], "modes", f, problems)
    if isinstance(raw_points, list):
        _check_unique(raw_points, "points", f, problems)
        _check_unique_nodes([pd.get("test_node") if isinstance(pd, Mapping) else None
                             for pd in raw_points], point_fields, f, problems)
        for k, pd in enumerate(raw_points, start=1):
            shape = pd.get("shape") if isinstance(pd, Mapping) else None
            if n_modes and isinstance(shape, list) and shape and len(shape) != n_modes:
                problems.append(Problem(f, point_fields[k - 1] + ".shape", shape,
                                        f"must have one coefficient per mode: {n_modes} values, "
                                        f"got {len(shape)}"))
    if base is not None and isinstance(raw_modes, list):
        # On the raw values, so the sum is checked even when some other mode value is broken.
        gammas = [md.get("base_participation", 0.0) for md in raw_modes if isinstance(md, Mapping)]
        _check_mass_sum([g for g in gammas if _is_number(g) and math.isfinite(g)], base, f, problems)
    _raise(problems)
    return ParameterSet(name=name, build=build, description=description,
                        provenance=Provenance(**prov_kw), modes=tuple(modes), points=tuple(points),
                        base=base, source=source)


def _parse_mode(i: int, md: Mapping[str, Any], has_base: bool, f: str,
                problems: list[Problem]) -> Mode | None:
    pre = _mode_prefix(i, md.get("label"))
    n_before = len(problems)
    _check_keys(md, _MODE_KEYS, "[[modes]]", pre + ".", f, problems)
    lab = _required(md, "label", f, pre + ".label", _LABEL_WHAT, problems)
    if lab is not None:
        _label(lab, f, pre + ".label", problems)
    f0 = _required(md, "f0", f, pre + ".f0", RULES_BY_NAME["f0"].summary, problems)
    zeta = _required(md, "zeta", f, pre + ".zeta", RULES_BY_NAME["zeta"].summary, problems)
    gamma: float | None = 0.0
    if "base_participation" in md:
        gamma = _number(md["base_participation"], f, pre + ".base_participation", " in sqrt(kg)",
                        problems)
        if not has_base:
            problems.append(Problem(f, pre + ".base_participation", md["base_participation"],
                                    "only allowed when the file has a [base] table "
                                    "(a base-mounted structure)",
                                    "add [base] with total_mass, or remove base_participation"))
    jt = md.get("joint")
    if jt is None:
        problems.append(Problem(f, pre + ".joint", None,
                                "missing required table [modes.joint] (Fs, Kt or f_macro, chi, beta)"))
        return None
    if not isinstance(jt, Mapping):
        problems.append(Problem(f, pre + ".joint", jt,
                                f"must be a table [modes.joint], got {_type_name(jt)}"))
        return None
    jp = pre + ".joint."
    _check_keys(jt, _JOINT_KEYS, "[modes.joint]", jp, f, problems)
    Fs = _required(jt, "Fs", f, jp + "Fs", RULES_BY_NAME["Fs"].summary, problems)
    chi = _required(jt, "chi", f, jp + "chi", RULES_BY_NAME["chi"].summary, problems)
    beta = _required(jt, "beta", f, jp + "beta", RULES_BY_NAME["beta"].summary, problems)
    Kt: Any = None
    kt_given = "Kt" in jt
    fm_given = "f_macro" in jt
    skip_kt = False
    if kt_given and fm_given:
        problems.append(Problem(f, pre + ".joint", {"Kt": jt["Kt"], "f_macro": jt["f_macro"]},
                                "give exactly one of Kt (1/s^2) or f_macro (Hz), not both"))
        skip_kt = True
    elif not kt_given and not fm_given:
        problems.append(Problem(f, jp + "Kt", None,
                                "missing: give exactly one of Kt (1/s^2) or f_macro (Hz)"))
        skip_kt = True
    elif kt_given:
        Kt = jt["Kt"]
    else:
        fm = _number(jt["f_macro"], f, jp + "f_macro", " in Hz", problems)
        f0_v = float(f0) if _is_number(f0) and math.isfinite(f0) and f0 > 0 else None
        skip_kt = True
        if fm is not None and f0_v is not None:
            if not 0.0 < fm < f0_v:
                problems.append(Problem(f, jp + "f_macro", jt["f_macro"],
                                        f"must satisfy 0 < f_macro < f0 = {_g(f0_v)} Hz",
                                        "the macro-slip frequency sqrt(Kinf)/(2 pi) lies below f0"))
            else:
                # Kinf = (2 pi f_macro)^2 and (2 pi f0)^2 = Kinf + Kt  (physics.md sec. 5)
                Kt = (_TWO_PI * f0_v) ** 2 - (_TWO_PI * fm) ** 2
                skip_kt = False
    # The shared checks; a missing value was reported above, so skip its range message.
    probs = check_mode_values(i, lab if isinstance(lab, str) else "", f0, zeta, Fs,
                              Kt if not skip_kt else 1.0, chi, beta, f, field_prefix=pre)
    missing = {n for n, v in (("f0", f0), ("zeta", zeta), ("joint.Fs", Fs), ("joint.chi", chi),
                              ("joint.beta", beta)) if v is None}
    if skip_kt:
        missing.add("joint.Kt")
    problems += [p for p in probs if p.field[len(pre) + 1:] not in missing]
    if len(problems) > n_before:
        return None
    return Mode(lab, float(f0), float(zeta), JointParams(float(Fs), float(Kt), float(chi), float(beta)),
                gamma if gamma is not None else 0.0)


def _read_toml(path: Path, problems: list[Problem]) -> dict[str, Any] | None:
    file = str(path)
    if _toml is None:  # pragma: no cover
        problems.append(Problem(file, "(file)", file, "cannot be read: needs Python >= 3.11 (tomllib) "
                                "or the 'tomli' package"))
        return None
    try:
        raw = path.read_bytes()
    except OSError as e:
        problems.append(Problem(file, "(file)", file,
                                f"cannot be read: {e.strerror or e}", "give the path of a .toml file"))
        return None
    return _toml_table(raw, file, problems)


def load_parameter_set(path: str | os.PathLike) -> ParameterSet:
    """Read and check a parameter file.

    Parameters
    ----------
    path : str or path-like
        A ``jointfmu-params/1`` TOML file.

    Raises
    ------
    ParameterError
        When the file cannot be read, is not valid TOML (the problem names the line), or holds any
        invalid value (every problem is listed).
    """
    path = Path(path)
    problems: list[Problem] = []
    data = _read_toml(path, problems)
    _raise(problems)
    return parse_parameter_set(data, source=str(path))  # type: ignore[arg-type]


def check_parameter_file(path: str | os.PathLike) -> list[Problem]:
    """Every problem in a parameter file; an empty list means the file is valid."""
    try:
        load_parameter_set(path)
    except ParameterError as e:
        return list(e.problems)
    return []
