"""The discrete-joint structure file (format ``jointfmu-lumped/1``): parse, check, dataclasses.

A structure of lumped masses (degrees of freedom along one axis each), linear springs and discrete
four-parameter Iwan joints (D. J. Segalman, "A four-parameter Iwan model for lap-type joints",
J. Appl. Mech. 72(5):752-760, 2005), each between two DOFs or from one DOF to ground, in SI
units.  Viscous damping is given as modal damping ratios of the stuck-joint modes or as Rayleigh
coefficients; labelled points (a DOF and a direction sign) are where hammers hit and sensors sit.
Optional ``[[builds]]`` change the joint values of the same structure for other hardware builds.

Layout (keys in the order the checks expect; every key is described in examples/README.md)::

    format = "jointfmu-lumped/1"
    [structure]  name, build, build_label (default "nominal"), description
    [base]       direction            (optional: DOFs along this axis move with the mounting)
    [[dofs]]     label, mass [kg], axis
    [[springs]]  dofs = [a] or [a, b] (or more, with gains), k [N/m], label, gains (optional)
    [[joints]]   label, dofs = [a] or [a, b] (or more, with gains), Fs [N], Kt [N/m], chi, beta
    [damping]    zeta = [...] and zeta_rest   |   rayleigh_alpha [1/s], rayleigh_beta [s]
    [modes]      labels = [...], count        (optional: names and number of template modes)
    [[points]]   label, dof (or dofs with gains), direction ("+z"/"-z"), role, test_node
    [[builds]]   label, build, description, zeta_factor, joint_factors = {Fs, Kt},
                 joint_values = {chi, beta}

A joint or spring between DOFs a and b acts on the relative displacement u = x_a - x_b; to
ground, on u = x_a.  With ``gains = [g1, g2, ...]`` it acts on u = g1 x_1 + g2 x_2 + ..., the way
a connection or a sensor on a rigid body sees the body's translation and rotations through its
lever arms (e.g. u = z + y rx - x ry for a point at (x, y) of a plate with DOFs z, rx, ry; the
gains carry the units, m/rad for a lever arm); a point's motion likewise.  Every problem in a file is collected and raised at once as one
:class:`~jointfmu.errors.ParameterError`, each naming the file, the field, the value and what
is allowed.  The dataclasses check themselves in ``__post_init__``, so an invalid model cannot
exist.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass, field, replace
from datetime import date, datetime, time
from pathlib import Path
from typing import Any, Mapping

import numpy as np

try:  # Python >= 3.11
    import tomllib as _toml
except ModuleNotFoundError:  # pragma: no cover - Python 3.10 with the tomli backport
    import tomli as _toml  # type: ignore[no-redef]

from ..params.checks import (LABEL_RE as _LABEL_RE, label as _label, number as _number,
                             required as _required, table as _table, toml_table as _toml_table,
                             type_name as _type_name)
from ..errors import InputError, ParameterError, Problem, did_you_mean
from ..params import ROLES, JointParams
from ..params.rules import RULES_BY_NAME

__all__ = [
    "FORMAT",
    "Dof",
    "Spring",
    "Joint",
    "Damping",
    "LumpedPoint",
    "BuildVariant",
    "LumpedModel",
    "parse_lumped",
    "load_lumped",
    "check_lumped_file",
    "is_lumped_file",
]

#: The one format this version reads.
FORMAT = "jointfmu-lumped/1"

_PY = "<python>"


_TOP_KEYS = ("format", "structure", "base", "dofs", "springs", "joints", "damping", "modes",
             "points", "builds")
_STRUCTURE_KEYS = ("name", "build", "build_label", "description")
_BASE_KEYS = ("direction",)
_DOF_KEYS = ("label", "mass", "axis")
_SPRING_KEYS = ("label", "dofs", "gains", "k")
_JOINT_KEYS = ("label", "dofs", "gains", "Fs", "Kt", "chi", "beta")
_DAMPING_KEYS = ("zeta", "zeta_rest", "rayleigh_alpha", "rayleigh_beta")
_MODES_KEYS = ("labels", "count")
_POINT_KEYS = ("label", "dof", "dofs", "gains", "direction", "role", "test_node")
_BUILD_KEYS = ("label", "build", "description", "zeta_factor", "joint_factors", "joint_values")
_FACTOR_KEYS = ("Fs", "Kt")
_VALUE_KEYS = ("chi", "beta")

# Physical units of a discrete joint's values (a mode's joint is in modal units: params.rules)
_JOINT_UNITS = {"Fs": "N", "Kt": "N/m", "chi": "", "beta": ""}


def _joint_value(name: str, x: Any, file: str, fld: str, problems: list[Problem]) -> float | None:
    """A discrete joint's value checked by the rules of the parameter files (the one table of
    the ranges, :data:`jointfmu.params.rules.RULES_BY_NAME`: Segalman 2005), in physical units."""
    unit = _JOINT_UNITS[name]
    v = _number(x, file, fld, f" in {unit}" if unit else "", problems)
    if v is None:
        return None
    bad = RULES_BY_NAME[name].violation(v)
    if bad is not None:
        allowed, hint = bad
        allowed = allowed.replace("N/sqrt(kg)", unit).replace("1/s^2", unit)
        problems.append(Problem(file, fld, x, allowed, hint))
        return None
    return v


# ---------------------------------------------------------------------------------------------
# small checkers: each records a Problem and returns None when the value is not acceptable
# ---------------------------------------------------------------------------------------------
def _ranged(x: Any, file: str, fld: str, unit: str, rule: str, ok, problems: list[Problem],
            hint: str = "") -> float | None:
    v = _number(x, file, fld, unit, problems)
    if v is not None and not ok(v):
        problems.append(Problem(file, fld, x, rule, hint))
        return None
    return v


def _text(x: Any, file: str, fld: str, problems: list[Problem], nonempty: bool = False) -> str | None:
    if isinstance(x, (datetime, date, time)):
        return x.isoformat()
    if not isinstance(x, str):
        problems.append(Problem(file, fld, x, f"must be a string (text), got {_type_name(x)}"))
        return None
    if nonempty and not x.strip():
        problems.append(Problem(file, fld, x, "must be a non-empty string"))
        return None
    return x


def _keys(table: Mapping[str, Any], allowed: tuple[str, ...], where: str, prefix: str, file: str,
          problems: list[Problem]) -> None:
    for key in table:
        if key not in allowed:
            problems.append(Problem(file, f"{prefix}{key}", table[key],
                                    f"unknown key in {where}; allowed keys: {', '.join(allowed)}",
                                    did_you_mean(key, allowed)))


def _raise(problems: list[Problem]) -> None:
    if problems:
        raise ParameterError(problems)


def _item_prefix(what: str, k: int, label: Any) -> str:
    lab = f" ({label})" if isinstance(label, str) and _LABEL_RE.match(label) else ""
    return f"{what}[{k}]{lab}"


# ---------------------------------------------------------------------------------------------
# dataclasses
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Dof:
    """One degree of freedom: a lumped mass moving along one axis.

    Parameters
    ----------
    label : str
        Name, ``^[A-Za-z][A-Za-z0-9_]*$``.
    mass : float
        Mass [kg] (for a rotation, the moment of inertia [kg m^2]), > 0.
    axis : str
        The axis it moves along, a label such as ``"z"``; springs, joints and points must agree.
    """

    label: str
    mass: float
    axis: str

    def __post_init__(self) -> None:
        p: list[Problem] = []
        _label(self.label, _PY, "dof.label", p)
        m = _ranged(self.mass, _PY, f"dof ({self.label}).mass", " in kg", "must satisfy mass > 0 kg",
                    lambda v: v > 0.0, p)
        _label(self.axis, _PY, f"dof ({self.label}).axis", p)
        _raise(p)
        object.__setattr__(self, "mass", m)


@dataclass(frozen=True)
class Spring:
    """A linear spring [N/m] between two DOFs (on x_a - x_b) or from one DOF to ground (on x_a)."""

    dofs: tuple[str, ...]
    k: float
    label: str = ""
    gains: tuple[float, ...] | None = None

    def __post_init__(self) -> None:
        p: list[Problem] = []
        object.__setattr__(self, "dofs", tuple(self.dofs))
        g = _check_ends(self.dofs, self.gains, _PY, f"spring ({self.label or '-'})", "spring", p)
        object.__setattr__(self, "gains", g)
        k = _ranged(self.k, _PY, f"spring ({self.label or '-'}).k", " in N/m", "must satisfy k > 0 N/m",
                    lambda v: v > 0.0, p)
        if self.label:
            _label(self.label, _PY, "spring.label", p)
        _raise(p)
        object.__setattr__(self, "k", k)

    @property
    def weights(self) -> tuple[float, ...]:
        """The gains of its DOFs: given, or (1,) to ground, (1, -1) between two DOFs."""
        return self.gains if self.gains is not None else _default_gains(len(self.dofs))


@dataclass(frozen=True)
class Joint:
    """A discrete four-parameter Iwan joint (Segalman 2005) in physical units.

    Parameters
    ----------
    label : str
        Name.
    dofs : tuple of str
        ``(a, b)``: acts on u = x_a - x_b; ``(a,)``: from DOF a to ground, u = x_a; any number
        of DOFs with ``gains``: u = sum g_k x_k.
    Fs : float
        Slip force at the onset of macro-slip [N], > 0.
    Kt : float
        Stiffness at zero load [N/m], > 0.
    chi : float
        Exponent of the slider density, -1 < chi <= 0.
    beta : float
        Weight of the point mass of the density at phimax, >= 0.
    gains : tuple of float, optional
        One per DOF (see the module docstring).
    """

    label: str
    dofs: tuple[str, ...]
    Fs: float
    Kt: float
    chi: float
    beta: float
    gains: tuple[float, ...] | None = None

    def __post_init__(self) -> None:
        p: list[Problem] = []
        object.__setattr__(self, "dofs", tuple(self.dofs))
        _label(self.label, _PY, "joint.label", p)
        g = _check_ends(self.dofs, self.gains, _PY, f"joint ({self.label})", "joint", p)
        object.__setattr__(self, "gains", g)
        _raise(p)
        jp = JointParams(Fs=self.Fs, Kt=self.Kt, chi=self.chi, beta=self.beta)  # range checks
        for name in ("Fs", "Kt", "chi", "beta"):
            object.__setattr__(self, name, getattr(jp, name))

    @property
    def weights(self) -> tuple[float, ...]:
        """The gains of its DOFs: given, or (1,) to ground, (1, -1) between two DOFs."""
        return self.gains if self.gains is not None else _default_gains(len(self.dofs))

    @property
    def params(self) -> JointParams:
        """The four parameters as a :class:`~jointfmu.params.JointParams` (physical units)."""
        return JointParams(self.Fs, self.Kt, self.chi, self.beta)


@dataclass(frozen=True)
class Damping:
    """Viscous damping: modal ratios of the stuck-joint modes, or Rayleigh coefficients.

    Either ``zeta`` (ratios of modes 1, 2, ... in order of frequency, 0 <= zeta < 1) with
    ``zeta_rest`` for every mode beyond the list, or ``rayleigh_alpha`` [1/s] and
    ``rayleigh_beta`` [s] (C = alpha M + beta K with the joints stuck; zeta_i = alpha/(2 w_i) +
    beta w_i / 2, common practice, e.g. Craig and Kurdila, Fundamentals of Structural Dynamics,
    2006).  Both forms are diagonal in the stuck-joint modes.
    """

    zeta: tuple[float, ...] = ()
    zeta_rest: float | None = None
    rayleigh_alpha: float | None = None
    rayleigh_beta: float | None = None

    def __post_init__(self) -> None:
        p: list[Problem] = []
        object.__setattr__(self, "zeta", tuple(float(z) for z in self.zeta))
        _check_damping_forms(bool(self.zeta), self.zeta_rest is not None,
                             self.rayleigh_alpha is not None or self.rayleigh_beta is not None,
                             _PY, p)
        for k, z in enumerate(self.zeta, start=1):
            _ranged(z, _PY, f"damping.zeta[{k}]", "", "must satisfy 0 <= zeta < 1",
                    lambda v: 0.0 <= v < 1.0, p)
        if self.zeta_rest is not None:
            _ranged(self.zeta_rest, _PY, "damping.zeta_rest", "", "must satisfy 0 <= zeta < 1",
                    lambda v: 0.0 <= v < 1.0, p)
        for name in ("rayleigh_alpha", "rayleigh_beta"):
            v = getattr(self, name)
            if v is not None:
                _ranged(v, _PY, f"damping.{name}", "", f"must satisfy {name} >= 0",
                        lambda x: x >= 0.0, p)
        _raise(p)

    @property
    def is_rayleigh(self) -> bool:
        return self.rayleigh_alpha is not None or self.rayleigh_beta is not None

    def ratios(self, omega: np.ndarray) -> np.ndarray:
        """Damping ratio of each stuck-joint mode, shape like ``omega`` [rad/s] (ascending)."""
        omega = np.asarray(omega, dtype=float)
        if self.is_rayleigh:
            a = self.rayleigh_alpha or 0.0
            b = self.rayleigh_beta or 0.0
            return a / (2.0 * omega) + b * omega / 2.0
        n = omega.shape[0]
        z = np.full(n, self.zeta_rest if self.zeta_rest is not None else np.nan)
        k = min(n, len(self.zeta))
        z[:k] = self.zeta[:k]
        return z

    def scaled(self, factor: float) -> "Damping":
        """Every ratio (or both Rayleigh coefficients) times ``factor``."""
        if self.is_rayleigh:
            return Damping(rayleigh_alpha=(self.rayleigh_alpha or 0.0) * factor,
                           rayleigh_beta=(self.rayleigh_beta or 0.0) * factor)
        return Damping(zeta=tuple(z * factor for z in self.zeta),
                       zeta_rest=None if self.zeta_rest is None else self.zeta_rest * factor)


@dataclass(frozen=True)
class LumpedPoint:
    """A labelled point: a DOF and a direction sign, where a hammer hits or a sensor sits.

    Parameters
    ----------
    label : str
        Name; record channels are ``point.<label>.a`` and so on.
    dof : str or tuple of str
        The DOF, or the DOFs whose combination with ``gains`` is the point's motion.
    direction : str
        ``"+<axis>"`` or ``"-<axis>"`` with the (first) DOF's axis: the sign of force and motion.
    role : str
        ``"input"``, ``"output"`` or ``"both"`` (as in parameter files).
    test_node : int or None
        Node number of the point in test files (Universal File Format), > 0, unique.
    gains : tuple of float, optional
        With several DOFs: x_point = sign * sum g_k x_k (lever arms on a rigid body).
    """

    label: str
    dof: str | tuple[str, ...]
    direction: str
    role: str
    test_node: int | None = None
    gains: tuple[float, ...] | None = None

    def __post_init__(self) -> None:
        p: list[Problem] = []
        _label(self.label, _PY, "point.label", p)
        if isinstance(self.dof, str) and self.gains is None:
            _label(self.dof, _PY, f"point ({self.label}).dof", p)
        else:
            dofs = (self.dof,) if isinstance(self.dof, str) else tuple(self.dof)
            object.__setattr__(self, "dof", dofs)
            g = _check_ends(dofs, self.gains, _PY, f"point ({self.label})", "point", p)
            object.__setattr__(self, "gains", g)
        _check_direction_form(self.direction, _PY, f"point ({self.label}).direction", p)
        _check_role(self.role, _PY, f"point ({self.label}).role", p)
        _check_test_node(self.test_node, _PY, f"point ({self.label}).test_node", p)
        _raise(p)

    @property
    def dofs(self) -> tuple[str, ...]:
        """The DOF(s) the point moves with."""
        return (self.dof,) if isinstance(self.dof, str) else tuple(self.dof)

    @property
    def weights(self) -> tuple[float, ...]:
        """Gains of :attr:`dofs` (1.0 for a single DOF)."""
        return self.gains if self.gains is not None else (1.0,) * len(self.dofs)

    @property
    def sign(self) -> float:
        """+1.0 or -1.0, from the direction."""
        return -1.0 if self.direction.startswith("-") else 1.0

    @property
    def axis(self) -> str:
        return self.direction[1:]

    @property
    def is_input(self) -> bool:
        return self.role in ("input", "both")

    @property
    def is_output(self) -> bool:
        return self.role in ("output", "both")


@dataclass(frozen=True)
class BuildVariant:
    """Another hardware build of the same structure: joint values and damping changed.

    Every joint's ``Fs`` and ``Kt`` are multiplied by ``Fs_factor`` and ``Kt_factor``; ``chi`` and
    ``beta``, when given, replace every joint's values; every damping ratio (or both Rayleigh
    coefficients) is multiplied by ``zeta_factor``.
    """

    label: str
    build: str
    description: str = ""
    zeta_factor: float = 1.0
    Fs_factor: float = 1.0
    Kt_factor: float = 1.0
    chi: float | None = None
    beta: float | None = None

    def __post_init__(self) -> None:
        p: list[Problem] = []
        pre = f"build ({self.label})"
        _label(self.label, _PY, "build.label", p)
        _text(self.build, _PY, pre + ".build", p, nonempty=True)
        for name in ("zeta_factor", "Fs_factor", "Kt_factor"):
            _ranged(getattr(self, name), _PY, f"{pre}.{name}", "", f"must satisfy {name} > 0",
                    lambda v: v > 0.0, p)
        for name in ("chi", "beta"):
            v = getattr(self, name)
            if v is not None:
                _joint_value(name, v, _PY, f"{pre}.{name}", p)
        _raise(p)


def _default_gains(n: int) -> tuple[float, ...]:
    return (1.0,) if n == 1 else (1.0, -1.0)


def _check_ends(dofs: Any, gains: Any, file: str, pre: str, what: str, problems: list[Problem],
                known: Mapping[str, "Dof"] | None = None) -> tuple[float, ...] | None:
    """A spring's, joint's or point's DOFs and gains: labels, distinct, known, gains one per DOF
    (finite, non-zero; needed beyond two DOFs), one axis for two DOFs without gains.  Returns the
    gains as a tuple of floats (None when not given)."""
    fld = pre + ".dofs"
    if not isinstance(dofs, (list, tuple)) or not dofs or not all(isinstance(d, str) for d in dofs):
        problems.append(Problem(file, fld, dofs if not isinstance(dofs, tuple) else list(dofs),
                                f"must be an array of one DOF label (a {what} to ground), two (a "
                                f"{what} between them) or more with gains"))
        return None
    if len(dofs) == 2 and dofs[0] == dofs[1]:
        problems.append(Problem(file, fld, list(dofs),
                                f"a {what} from a DOF to itself does nothing: give two different "
                                f"DOFs, or one DOF for a {what} to ground"))
        return None
    dup = sorted({d for d in dofs if list(dofs).count(d) > 1})
    if dup:
        problems.append(Problem(file, fld, list(dofs), f"each DOF once; repeated: {', '.join(dup)}"))
        return None
    out = None
    if gains is None:
        if len(dofs) > 2 and what != "point":
            problems.append(Problem(file, pre + ".gains", None,
                                    f"missing: a {what} on more than two DOFs needs gains = "
                                    "[...], one per DOF (u = sum g_k x_k)"))
        elif what == "point" and len(dofs) > 1:
            problems.append(Problem(file, pre + ".gains", None,
                                    "missing: a point on several DOFs needs gains = [...], one per "
                                    "DOF (x = sum g_k x_k)"))
    elif not isinstance(gains, (list, tuple)) or len(gains) != len(dofs):
        problems.append(Problem(file, pre + ".gains", gains if not isinstance(gains, tuple)
                                else list(gains),
                                f"must be an array of {len(dofs)} numbers, one per DOF"))
    else:
        vals = []
        for k, g in enumerate(gains, start=1):
            v = _ranged(g, file, f"{pre}.gains[{k}]", "", "must be a finite number other than 0",
                        lambda x: x != 0.0, problems)
            vals.append(v)
        if all(v is not None for v in vals):
            out = tuple(vals)
    if known is None:
        return out
    ok = True
    for k, d in enumerate(dofs, start=1):
        if d not in known:
            ok = False
            problems.append(Problem(file, f"{fld}[{k}]", d, "unknown DOF; allowed: the labels of "
                                    "[[dofs]]", did_you_mean(d, known)))
    if ok and gains is None and len(dofs) == 2 and known[dofs[0]].axis != known[dofs[1]].axis:
        problems.append(Problem(file, fld, list(dofs),
                                f"a {what} acts along one axis: {dofs[0]} moves along "
                                f"{known[dofs[0]].axis!r}, {dofs[1]} along {known[dofs[1]].axis!r} "
                                "(with a lever arm, give gains)"))
    return out


def _check_direction_form(direction: Any, file: str, fld: str, problems: list[Problem]) -> bool:
    if not isinstance(direction, str) or len(direction) < 2 or direction[0] not in "+-" \
            or not _LABEL_RE.match(direction[1:]):
        problems.append(Problem(file, fld, direction,
                                "must be '+<axis>' or '-<axis>' with the axis of the point's DOF, "
                                "e.g. '+z'"))
        return False
    return True


def _check_role(role: Any, file: str, fld: str, problems: list[Problem]) -> None:
    if role not in ROLES:
        problems.append(Problem(file, fld, role, "must be one of " + ", ".join(repr(r) for r in ROLES),
                                did_you_mean(role, ROLES) if isinstance(role, str) else ""))


def _check_test_node(node: Any, file: str, fld: str, problems: list[Problem]) -> None:
    if node is None:
        return
    if not isinstance(node, int) or isinstance(node, bool) or node <= 0:
        problems.append(Problem(file, fld, node, "must be a positive integer (the node number in "
                                "Universal File Format records)"))


def _check_damping_forms(has_zeta: bool, has_rest: bool, has_rayleigh: bool, file: str,
                         problems: list[Problem]) -> None:
    if has_zeta and has_rayleigh:
        problems.append(Problem(file, "damping", "zeta and rayleigh_*",
                                "give either modal ratios (zeta, zeta_rest) or Rayleigh "
                                "coefficients (rayleigh_alpha, rayleigh_beta), not both"))
    elif not has_zeta and not has_rayleigh:
        problems.append(Problem(file, "damping", None if not has_rest else "zeta_rest only",
                                "give modal ratios zeta = [...] (with zeta_rest for the modes "
                                "beyond the list) or rayleigh_alpha and rayleigh_beta"))


def _floating_dofs(dofs, elements) -> list[str]:
    """DOFs that move in a rigid-body mode (zero stiffness with every joint stuck), or [].

    ``elements``: (dof labels, gains, stiffness) of every spring and joint (K_T).  The stuck
    stiffness matrix is positive definite exactly when no motion costs zero energy; its
    mass-weighted eigenvalues (:func:`numpy.linalg.eigh`) below 1e-11 of the largest mark such
    motions, and the DOFs with a large share in them are named.
    """
    n = len(dofs)
    index = {d.label: k for k, d in enumerate(dofs)}
    K = np.zeros((n, n))
    for ends, gains, k in elements:
        b = np.zeros(n)
        for d, g in zip(ends, gains):
            b[index[d]] = g
        K += k * np.outer(b, b)
    w = 1.0 / np.sqrt([d.mass for d in dofs])
    lam, vec = np.linalg.eigh(K * np.outer(w, w))
    top = max(float(lam[-1]), 0.0)
    null = vec[:, lam <= 1e-11 * top] if top > 0.0 else np.eye(n)
    if null.shape[1] == 0:
        return []
    share = np.abs(null).max(axis=1)
    return [dofs[k].label for k in range(n) if share[k] > 0.1 * share.max()]


def _cross_checks(dofs, springs, joints, points, damping, mode_labels, template_count, base_dir,
                  build_label, build, builds, file, problems, fields=None, complete=True) -> None:
    """Checks that involve several tables: references, uniqueness, grounding, counts.

    ``complete`` is False when some spring or joint entry was already refused: the grounding
    check is then skipped (it would blame the DOFs that entry connects).
    """
    fields = fields or {}
    known = {d.label: d for d in dofs}
    index = {d.label: k for k, d in enumerate(dofs)}
    for what, items in (("dofs", dofs), ("joints", joints), ("points", points)):
        seen: dict[str, int] = {}
        for k, it in enumerate(items, start=1):
            if it.label in seen:
                problems.append(Problem(file, f"{what}[{k}].label", it.label,
                                        f"must be unique among {what}; already used by "
                                        f"{what}[{seen[it.label]}]"))
            else:
                seen[it.label] = k
    elements = []
    for what, items in (("springs", springs), ("joints", joints)):
        for k, it in enumerate(items, start=1):
            pre = fields.get((what, k), _item_prefix(what, k, getattr(it, "label", "")))
            n0 = len(problems)
            _check_ends(it.dofs, it.gains, file, pre, what[:-1], problems, known)
            if len(problems) == n0:
                elements.append((it.dofs, it.weights, it.k if what == "springs" else it.Kt))
    nodes: dict[int, int] = {}
    for k, pt in enumerate(points, start=1):
        pre = fields.get(("points", k), _item_prefix("points", k, pt.label))
        n0 = len(problems)
        if isinstance(pt.dof, str) and pt.gains is None:
            if pt.dof not in known:
                problems.append(Problem(file, pre + ".dof", pt.dof,
                                        "unknown DOF; allowed: the labels of [[dofs]]",
                                        did_you_mean(pt.dof, known)))
        else:
            _check_ends(pt.dofs, pt.gains, file, pre, "point", problems, known)
        first = pt.dofs[0]
        if len(problems) == n0 and pt.axis != known[first].axis:
            problems.append(Problem(file, pre + ".direction", pt.direction,
                                    f"must be '+{known[first].axis}' or '-{known[first].axis}': "
                                    f"DOF {first} moves along {known[first].axis!r}"))
        if pt.test_node is not None:
            if pt.test_node in nodes:
                problems.append(Problem(file, pre + ".test_node", pt.test_node,
                                        f"must be unique among points; already used by "
                                        f"points[{nodes[pt.test_node]}]"))
            else:
                nodes[pt.test_node] = k
    n = len(dofs)
    if n == 0:
        problems.append(Problem(file, "dofs", [], "at least one [[dofs]] entry is required"))
    elif complete and len(elements) == len(springs) + len(joints):
        names = _floating_dofs(dofs, elements)
        if names:
            shown = ", ".join(names[:6]) + (f" and {len(names) - 6} more" if len(names) > 6 else "")
            problems.append(Problem(
                file, "springs/joints", shown,
                "these DOFs can move without deforming any spring or joint: the structure is "
                "free to drift (a rigid-body mode at 0 Hz with the joints stuck); every DOF must "
                "be held to ground through springs or joints",
                "add a spring or joint with one DOF (to ground), e.g. the mounting stiffness"))
    if damping is not None and not damping.is_rayleigh and n:
        if len(damping.zeta) > n:
            problems.append(Problem(file, "damping.zeta", list(damping.zeta),
                                    f"at most one ratio per mode: the structure has {n} DOFs, "
                                    f"so {n} modes"))
        elif len(damping.zeta) < n and damping.zeta_rest is None:
            problems.append(Problem(file, "damping.zeta_rest", None,
                                    f"missing: zeta lists {len(damping.zeta)} ratios for {n} modes; "
                                    "give zeta_rest for the others (0 <= zeta_rest < 1)"))
    if len(mode_labels) > max(n, 1):
        problems.append(Problem(file, "modes.labels", list(mode_labels),
                                f"at most one label per mode ({n} modes)"))
    seen_m: dict[str, int] = {}
    for k, lab in enumerate(mode_labels, start=1):
        if lab in seen_m:
            problems.append(Problem(file, f"modes.labels[{k}]", lab,
                                    f"must be unique; already used by modes.labels[{seen_m[lab]}]"))
        seen_m[lab] = k
    if template_count is not None and n and not 1 <= template_count <= n:
        problems.append(Problem(file, "modes.count", template_count,
                                f"must be an integer from 1 to {n} (the number of modes)"))
    if base_dir is not None and n and base_dir not in {d.axis for d in dofs}:
        problems.append(Problem(file, "base.direction", base_dir,
                                "no DOF moves along this axis; allowed: "
                                + ", ".join(sorted({d.axis for d in dofs}))))
    seen_b = {build_label: "structure.build_label"}
    seen_id = {build: "structure.build"}
    for k, b in enumerate(builds, start=1):
        pre = fields.get(("builds", k), _item_prefix("builds", k, b.label))
        if b.label in seen_b:
            problems.append(Problem(file, pre + ".label", b.label,
                                    f"must be unique; already used by {seen_b[b.label]}"))
        seen_b.setdefault(b.label, pre + ".label")
        if b.build in seen_id:
            problems.append(Problem(file, pre + ".build", b.build,
                                    f"must be unique; already used by {seen_id[b.build]}"))
        seen_id.setdefault(b.build, pre + ".build")


@dataclass(frozen=True)
class LumpedModel:
    """A discrete-joint structure of one hardware build (see the module docstring).

    Attributes
    ----------
    name : str
        Structure name (a label; goes into template and record names).
    build : str
        Build or serial id.
    build_label : str
        Short name of this build (``--build`` on the command line), default ``"nominal"``.
    dofs, springs, joints, points : tuples
        The parts, in file order.
    damping : Damping
    mode_labels : tuple of str
        Names of the lowest stuck-joint modes (others are ``mode_<k>``).
    template_count : int or None
        Modes written into the modal-Iwan template (default: as many as ``mode_labels``, or all).
    base_direction : str or None
        Axis of the mounting's motion: DOFs along it move with the base (for the template's base
        participation factors).
    builds : tuple of BuildVariant
        Other builds of the same structure (:meth:`variant`).
    source : str
        Where the model was read from; not compared.
    source_sha256 : str
        SHA-256 of the file read (empty when built in Python); not compared.
    """

    name: str
    build: str
    dofs: tuple[Dof, ...]
    springs: tuple[Spring, ...]
    joints: tuple[Joint, ...]
    damping: Damping
    points: tuple[LumpedPoint, ...] = ()
    description: str = ""
    build_label: str = "nominal"
    mode_labels: tuple[str, ...] = ()
    template_count: int | None = None
    base_direction: str | None = None
    builds: tuple[BuildVariant, ...] = ()
    source: str = field(default=_PY, compare=False)
    source_sha256: str = field(default="", compare=False)

    def __post_init__(self) -> None:
        p: list[Problem] = []
        for name, typ in (("dofs", Dof), ("springs", Spring), ("joints", Joint),
                          ("points", LumpedPoint), ("builds", BuildVariant)):
            items = getattr(self, name)
            if not isinstance(items, (list, tuple)) or not all(isinstance(x, typ) for x in items):
                p.append(Problem(self.source, name, items, f"must be a sequence of {typ.__name__}"))
            else:
                object.__setattr__(self, name, tuple(items))
        if not isinstance(self.damping, Damping):
            p.append(Problem(self.source, "damping", self.damping, "must be a Damping"))
        _raise(p)
        object.__setattr__(self, "mode_labels", tuple(self.mode_labels))
        _label(self.name, self.source, "structure.name", p)
        _text(self.build, self.source, "structure.build", p, nonempty=True)
        _label(self.build_label, self.source, "structure.build_label", p)
        for k, lab in enumerate(self.mode_labels, start=1):
            _label(lab, self.source, f"modes.labels[{k}]", p)
        _cross_checks(self.dofs, self.springs, self.joints, self.points, self.damping,
                      self.mode_labels, self.template_count, self.base_direction,
                      self.build_label, self.build, self.builds, self.source, p)
        _raise(p)

    # --- views ---------------------------------------------------------------------------------
    @property
    def n_dofs(self) -> int:
        return len(self.dofs)

    @property
    def n_joints(self) -> int:
        return len(self.joints)

    @property
    def set_id(self) -> str:
        return f"{self.name}@{self.build}"

    def dof_index(self, label: str) -> int:
        for k, d in enumerate(self.dofs):
            if d.label == label:
                return k
        raise KeyError(label)

    def point(self, label: str) -> LumpedPoint:
        """The point named ``label``; InputError naming the file and the allowed labels if there
        is none (a label asked for, e.g. ``--impact``, not a problem of the file)."""
        for pt in self.points:
            if pt.label == label:
                return pt
        allowed = [pt.label for pt in self.points]
        hint = did_you_mean(label, allowed)
        raise InputError(f"point {label!r} of {self.source}: unknown point; "
                         f"allowed: {', '.join(allowed) or '(none)'}" + (f" ({hint})" if hint else ""))

    @property
    def input_points(self) -> tuple[LumpedPoint, ...]:
        """Points where a force may act (role input or both), in file order."""
        return tuple(pt for pt in self.points if pt.is_input)

    @property
    def output_points(self) -> tuple[LumpedPoint, ...]:
        """Points where motion is sensed (role output or both), in file order."""
        return tuple(pt for pt in self.points if pt.is_output)

    # --- matrices ------------------------------------------------------------------------------
    def masses(self) -> np.ndarray:
        """Lumped masses, shape (n_dofs,) [kg]."""
        return np.array([d.mass for d in self.dofs])

    def _incidence(self, ends: tuple[str, ...], gains: tuple[float, ...]) -> np.ndarray:
        b = np.zeros(self.n_dofs)
        for d, g in zip(ends, gains):
            b[self.dof_index(d)] = g
        return b

    def joint_vectors(self) -> np.ndarray:
        """Incidence of each joint, shape (n_joints, n_dofs): u_j = B[j] @ x (x_a - x_b, x_a, or
        sum g_k x_k)."""
        return np.array([self._incidence(j.dofs, j.weights) for j in self.joints]
                        ).reshape(self.n_joints, self.n_dofs)

    def stiffness(self, joints_stuck: bool = True) -> np.ndarray:
        """Stiffness matrix, shape (n_dofs, n_dofs) [N/m]: springs, plus each joint's Kt when stuck."""
        n = self.n_dofs
        K = np.zeros((n, n))
        for s in self.springs:
            b = self._incidence(s.dofs, s.weights)
            K += s.k * np.outer(b, b)
        if joints_stuck:
            for j in self.joints:
                b = self._incidence(j.dofs, j.weights)
                K += j.Kt * np.outer(b, b)
        return K

    def point_vectors(self, points) -> np.ndarray:
        """Each point's motion in terms of the DOFs, shape (len(points), n_dofs): the point's sign
        times its gains (1 for a single DOF)."""
        S = np.zeros((len(points), self.n_dofs))
        for r, pt in enumerate(points):
            S[r] = pt.sign * self._incidence(pt.dofs, pt.weights)
        return S

    def base_vector(self) -> np.ndarray:
        """Motion of each DOF under a unit motion of the base, shape (n_dofs,): 1 along the base
        direction, 0 otherwise (all zero without a base)."""
        return np.array([1.0 if d.axis == self.base_direction else 0.0 for d in self.dofs])

    # --- builds --------------------------------------------------------------------------------
    @property
    def build_labels(self) -> tuple[str, ...]:
        """Labels of this build and of every variant."""
        return (self.build_label,) + tuple(b.label for b in self.builds)

    def variant(self, which: str | None) -> "LumpedModel":
        """The model of another build: ``which`` is a variant's label or build id (None, this
        build's label or id: the model itself)."""
        if which is None or which in (self.build_label, self.build):
            return self
        for b in self.builds:
            if which in (b.label, b.build):
                joints = tuple(replace(j, Fs=j.Fs * b.Fs_factor, Kt=j.Kt * b.Kt_factor,
                                       chi=j.chi if b.chi is None else b.chi,
                                       beta=j.beta if b.beta is None else b.beta)
                               for j in self.joints)
                return replace(self, build=b.build, build_label=b.label,
                               description=b.description or self.description, joints=joints,
                               damping=self.damping.scaled(b.zeta_factor), builds=())
        raise ParameterError([Problem(self.source, "builds", which,
                                      "unknown build; allowed: " + ", ".join(
                                          self.build_labels + tuple(b.build for b in self.builds)),
                                      did_you_mean(which, self.build_labels))])


# ---------------------------------------------------------------------------------------------
# parsing
# ---------------------------------------------------------------------------------------------
def _array_of_tables(d: Mapping[str, Any], key: str, file: str, problems: list[Problem],
                     required: bool) -> list[Mapping[str, Any]]:
    if key not in d:
        if required:
            problems.append(Problem(file, key, None, f"missing: at least one [[{key}]] entry is required"))
        return []
    raw = d[key]
    if not isinstance(raw, list) or not all(isinstance(x, Mapping) for x in raw):
        problems.append(Problem(file, key, raw, f"must be an array of tables [[{key}]], got "
                                f"{_type_name(raw)}"))
        return []
    if required and not raw:
        problems.append(Problem(file, key, raw, f"at least one [[{key}]] entry is required"))
    return raw


def _parse_joint_values(t: Mapping[str, Any], names, pre: str, f: str, problems: list[Problem],
                        required: bool) -> dict[str, float | None]:
    out: dict[str, float | None] = {}
    for name in names:
        if name not in t:
            if required:
                rule = RULES_BY_NAME[name]
                unit = f" in {_JOINT_UNITS[name]}" if _JOINT_UNITS[name] else ""
                problems.append(Problem(f, pre + name, None, f"missing required key {name!r} "
                                        f"({rule.meaning}{unit}, {rule.rule(upper_known=False)})"))
            out[name] = None
            continue
        out[name] = _joint_value(name, t[name], f, pre + name, problems)
    return out


def parse_lumped(data: Mapping[str, Any], source: str = "<dict>", sha256: str = "") -> LumpedModel:
    """Build a :class:`LumpedModel` from a dict in the TOML layout, checking everything.

    Raises
    ------
    ParameterError
        Listing every problem found, each with file, field, value and what is allowed.
    """
    f = source
    p: list[Problem] = []
    if not isinstance(data, Mapping):
        _raise([Problem(f, "(top level)", data, f"must be a table, got {_type_name(data)}")])
    _keys(data, _TOP_KEYS, "the top level", "", f, p)
    if "format" not in data:
        p.append(Problem(f, "format", None, f"missing required key; must be {FORMAT!r}",
                         f'add the line: format = "{FORMAT}"'))
    elif data["format"] != FORMAT:
        p.append(Problem(f, "format", data["format"],
                         f"must be {FORMAT!r} (the only discrete-joint format this version reads)"))

    name = build = None
    build_label, description = "nominal", ""
    st = _table(data, "structure", f, p, required=True)
    if st is not None:
        _keys(st, _STRUCTURE_KEYS, "[structure]", "structure.", f, p)
        name = _required(st, "name", f, "structure.name", "structure name, a label", p)
        if name is not None:
            name = _label(name, f, "structure.name", p)
        build = _required(st, "build", f, "structure.build", "build or serial id, free text", p)
        if build is not None:
            build = _text(build, f, "structure.build", p, nonempty=True)
        if "build_label" in st:
            build_label = _label(st["build_label"], f, "structure.build_label", p) or "nominal"
        description = _text(st.get("description", ""), f, "structure.description", p) or ""

    base_dir = None
    bt = _table(data, "base", f, p, required=False)
    if bt is not None:
        _keys(bt, _BASE_KEYS, "[base]", "base.", f, p)
        d = _required(bt, "direction", f, "base.direction", "the axis the mounting moves along", p)
        if d is not None:
            base_dir = _label(d, f, "base.direction", p)

    dofs: list[Dof] = []
    for k, t in enumerate(_array_of_tables(data, "dofs", f, p, required=True), start=1):
        pre = _item_prefix("dofs", k, t.get("label"))
        n0 = len(p)
        _keys(t, _DOF_KEYS, "[[dofs]]", pre + ".", f, p)
        lab = _required(t, "label", f, pre + ".label", "a label", p)
        lab = _label(lab, f, pre + ".label", p) if lab is not None else None
        m = _required(t, "mass", f, pre + ".mass", "mass in kg, > 0", p)
        if m is not None:
            m = _ranged(m, f, pre + ".mass", " in kg", "must satisfy mass > 0 kg", lambda v: v > 0.0, p)
        ax = _required(t, "axis", f, pre + ".axis", "the axis it moves along, e.g. 'z'", p)
        ax = _label(ax, f, pre + ".axis", p) if ax is not None else None
        if len(p) == n0:
            dofs.append(Dof(lab, m, ax))

    fields: dict[tuple[str, int], str] = {}
    springs: list[Spring] = []
    raw_springs = _array_of_tables(data, "springs", f, p, required=False)
    for k, t in enumerate(raw_springs, start=1):
        pre = _item_prefix("springs", k, t.get("label"))
        fields[("springs", len(springs) + 1)] = pre
        n0 = len(p)
        _keys(t, _SPRING_KEYS, "[[springs]]", pre + ".", f, p)
        lab = t.get("label", "")
        if lab != "":
            lab = _label(lab, f, pre + ".label", p) or ""
        ends = _required(t, "dofs", f, pre + ".dofs", "one DOF label (to ground) or two", p)
        gains = None
        if ends is not None:
            gains = _check_ends(ends, t.get("gains"), f, pre, "spring", p)
        kk = _required(t, "k", f, pre + ".k", "stiffness in N/m, > 0", p)
        if kk is not None:
            kk = _ranged(kk, f, pre + ".k", " in N/m", "must satisfy k > 0 N/m", lambda v: v > 0.0, p)
        if len(p) == n0:
            springs.append(Spring(tuple(ends), kk, lab, gains))

    joints: list[Joint] = []
    raw_joints = _array_of_tables(data, "joints", f, p, required=False)
    for k, t in enumerate(raw_joints, start=1):
        pre = _item_prefix("joints", k, t.get("label"))
        fields[("joints", len(joints) + 1)] = pre
        n0 = len(p)
        _keys(t, _JOINT_KEYS, "[[joints]]", pre + ".", f, p)
        lab = _required(t, "label", f, pre + ".label", "a label", p)
        lab = _label(lab, f, pre + ".label", p) if lab is not None else None
        ends = _required(t, "dofs", f, pre + ".dofs", "one DOF label (to ground) or two", p)
        gains = None
        if ends is not None:
            gains = _check_ends(ends, t.get("gains"), f, pre, "joint", p)
        vals = _parse_joint_values(t, ("Fs", "Kt", "chi", "beta"), pre + ".", f, p, required=True)
        if len(p) == n0:
            joints.append(Joint(lab, tuple(ends), vals["Fs"], vals["Kt"], vals["chi"], vals["beta"],
                                gains))

    damping = None
    dt = _table(data, "damping", f, p, required=True)
    if dt is not None:
        n0 = len(p)
        _keys(dt, _DAMPING_KEYS, "[damping]", "damping.", f, p)
        zeta: list[float] = []
        if "zeta" in dt:
            z = dt["zeta"]
            if not isinstance(z, list) or not z:
                p.append(Problem(f, "damping.zeta", z, "must be a non-empty array of damping ratios "
                                 "(0 <= zeta < 1), modes in order of frequency"))
            else:
                for k, v in enumerate(z, start=1):
                    r = _ranged(v, f, f"damping.zeta[{k}]", "", "must satisfy 0 <= zeta < 1",
                                lambda x: 0.0 <= x < 1.0, p)
                    zeta.append(r if r is not None else 0.0)
        rest = None
        if "zeta_rest" in dt:
            rest = _ranged(dt["zeta_rest"], f, "damping.zeta_rest", "", "must satisfy 0 <= zeta < 1",
                           lambda x: 0.0 <= x < 1.0, p)
        ray = {}
        for nm in ("rayleigh_alpha", "rayleigh_beta"):
            if nm in dt:
                unit = " in 1/s" if nm.endswith("alpha") else " in s"
                ray[nm] = _ranged(dt[nm], f, "damping." + nm, unit, f"must satisfy {nm} >= 0",
                                  lambda x: x >= 0.0, p)
        _check_damping_forms("zeta" in dt, "zeta_rest" in dt, bool(ray), f, p)
        if ray and "zeta_rest" in dt and "zeta" not in dt:
            p.append(Problem(f, "damping.zeta_rest", dt["zeta_rest"],
                             "only with modal ratios zeta = [...], not with Rayleigh coefficients"))
        if len(p) == n0:
            if ray:
                damping = Damping(rayleigh_alpha=ray.get("rayleigh_alpha") or 0.0,
                                  rayleigh_beta=ray.get("rayleigh_beta") or 0.0)
            else:
                damping = Damping(zeta=tuple(zeta), zeta_rest=rest)

    mode_labels: list[str] = []
    count = None
    mt = _table(data, "modes", f, p, required=False)
    if mt is not None:
        _keys(mt, _MODES_KEYS, "[modes]", "modes.", f, p)
        if "labels" in mt:
            ml = mt["labels"]
            if not isinstance(ml, list):
                p.append(Problem(f, "modes.labels", ml, "must be an array of mode labels, lowest "
                                 "mode first"))
            else:
                for k, lab in enumerate(ml, start=1):
                    if _label(lab, f, f"modes.labels[{k}]", p) is not None:
                        mode_labels.append(lab)
        if "count" in mt:
            c = mt["count"]
            if not isinstance(c, int) or isinstance(c, bool) or c < 1:
                p.append(Problem(f, "modes.count", c, "must be a positive integer (modes in the "
                                 "modal-Iwan template)"))
            else:
                count = c

    points: list[LumpedPoint] = []
    for k, t in enumerate(_array_of_tables(data, "points", f, p, required=False), start=1):
        pre = _item_prefix("points", k, t.get("label"))
        fields[("points", len(points) + 1)] = pre
        n0 = len(p)
        _keys(t, _POINT_KEYS, "[[points]]", pre + ".", f, p)
        lab = _required(t, "label", f, pre + ".label", "a label", p)
        lab = _label(lab, f, pre + ".label", p) if lab is not None else None
        gains = None
        if "dofs" in t and "dof" not in t:
            dof = t["dofs"]
            gains = _check_ends(dof, t.get("gains"), f, pre, "point", p)
            dof = tuple(dof) if isinstance(dof, list) else dof
        elif "dofs" in t:
            p.append(Problem(f, pre + ".dofs", t["dofs"], "give either dof (one DOF) or dofs with "
                             "gains (a point on several DOFs), not both"))
            dof = None
        else:
            dof = _required(t, "dof", f, pre + ".dof", "the label of a DOF", p)
            dof = _label(dof, f, pre + ".dof", p) if dof is not None else None
            if "gains" in t:
                p.append(Problem(f, pre + ".gains", t["gains"], "only with dofs = [...] (a point on "
                                 "several DOFs)"))
        direction = _required(t, "direction", f, pre + ".direction", "'+<axis>' or '-<axis>'", p)
        if direction is not None:
            _check_direction_form(direction, f, pre + ".direction", p)
        role = _required(t, "role", f, pre + ".role", "one of 'input', 'output', 'both'", p)
        if role is not None:
            _check_role(role, f, pre + ".role", p)
        node = t.get("test_node")
        _check_test_node(node, f, pre + ".test_node", p)
        if len(p) == n0:
            points.append(LumpedPoint(lab, dof, direction, role, node, gains))

    builds: list[BuildVariant] = []
    for k, t in enumerate(_array_of_tables(data, "builds", f, p, required=False), start=1):
        pre = _item_prefix("builds", k, t.get("label"))
        fields[("builds", len(builds) + 1)] = pre
        n0 = len(p)
        _keys(t, _BUILD_KEYS, "[[builds]]", pre + ".", f, p)
        lab = _required(t, "label", f, pre + ".label", "a label, used as --build", p)
        lab = _label(lab, f, pre + ".label", p) if lab is not None else None
        bid = _required(t, "build", f, pre + ".build", "build or serial id, free text", p)
        bid = _text(bid, f, pre + ".build", p, nonempty=True) if bid is not None else None
        desc = _text(t.get("description", ""), f, pre + ".description", p) or ""
        zf = _ranged(t.get("zeta_factor", 1.0), f, pre + ".zeta_factor", "",
                     "must satisfy zeta_factor > 0", lambda v: v > 0.0, p)
        facs: dict[str, float | None] = {"Fs": 1.0, "Kt": 1.0}
        jf = t.get("joint_factors", {})
        if not isinstance(jf, Mapping):
            p.append(Problem(f, pre + ".joint_factors", jf, "must be a table {Fs = ..., Kt = ...} "
                             "of factors > 0"))
        else:
            _keys(jf, _FACTOR_KEYS, "joint_factors", pre + ".joint_factors.", f, p)
            for nm in _FACTOR_KEYS:
                if nm in jf:
                    facs[nm] = _ranged(jf[nm], f, f"{pre}.joint_factors.{nm}", "",
                                       "must satisfy factor > 0", lambda v: v > 0.0, p)
        vals: dict[str, float | None] = {"chi": None, "beta": None}
        jv = t.get("joint_values", {})
        if not isinstance(jv, Mapping):
            p.append(Problem(f, pre + ".joint_values", jv, "must be a table {chi = ..., beta = ...}"))
        else:
            _keys(jv, _VALUE_KEYS, "joint_values", pre + ".joint_values.", f, p)
            vals = _parse_joint_values(jv, _VALUE_KEYS, pre + ".joint_values.", f, p, required=False)
        if len(p) == n0:
            builds.append(BuildVariant(lab, bid, desc, zf, facs["Fs"], facs["Kt"], vals["chi"],
                                       vals["beta"]))

    complete = (len(springs) == len(raw_springs) and len(joints) == len(raw_joints)
                and isinstance(data.get("springs", []), list)
                and isinstance(data.get("joints", []), list))
    _cross_checks(dofs, springs, joints, points, damping, mode_labels, count, base_dir,
                  build_label, build, builds, f, p, fields, complete)
    _raise(p)
    return LumpedModel(name=name, build=build, dofs=tuple(dofs), springs=tuple(springs),
                       joints=tuple(joints), damping=damping, points=tuple(points),
                       description=description, build_label=build_label,
                       mode_labels=tuple(mode_labels), template_count=count,
                       base_direction=base_dir, builds=tuple(builds), source=source,
                       source_sha256=sha256)


def _read(path: Path, problems: list[Problem]) -> tuple[dict | None, str]:
    file = str(path)
    try:
        raw = path.read_bytes()
    except OSError as e:
        problems.append(Problem(file, "(file)", file, f"cannot be read: {e.strerror or e}",
                                "give the path of a jointfmu-lumped/1 .toml file"))
        return None, ""
    digest = hashlib.sha256(raw).hexdigest()
    return _toml_table(raw, file, problems), digest


def load_lumped(path, build: str | None = None) -> LumpedModel:
    """Read and check a ``jointfmu-lumped/1`` file; ``build`` selects a variant (label or id).

    Raises
    ------
    ParameterError
        When the file cannot be read, is not TOML (the line is named) or holds any invalid value
        (every problem listed), or ``build`` names no build of the file.
    """
    path = Path(path)
    problems: list[Problem] = []
    data, digest = _read(path, problems)
    _raise(problems)
    return parse_lumped(data, source=str(path), sha256=digest).variant(build)


def check_lumped_file(path) -> list[Problem]:
    """Every problem in a discrete-joint file; empty when it is valid."""
    try:
        load_lumped(path)
    except ParameterError as e:
        return list(e.problems)
    return []


def is_lumped_file(path) -> bool:
    """True when ``path`` is a TOML file whose ``format`` is ``jointfmu-lumped/1`` (a quick look
    for commands that take either kind of file; False when it cannot be read)."""
    try:
        data = _toml.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, _toml.TOMLDecodeError):
        return False
    return isinstance(data, dict) and data.get("format") == FORMAT
