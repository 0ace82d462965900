"""The rules of the six mode values: one table for every place that states or checks them.

A mode of a parameter set carries six values: ``f0`` and ``zeta`` of the oscillator and ``Fs``,
``Kt``, ``chi``, ``beta`` of its four-parameter Iwan joint (Segalman, "A four-parameter Iwan model
for lap-type joints", J. Appl. Mech. 72(5):752-760, 2005).  :data:`MODE_VALUE_RULES` holds, for
each, its name, where it sits in a mode (``key``), its meaning, its unit, its admissible range and
the source of that range.  The parameter checks (:func:`.parameter_set.check_mode_values`), the
descriptions of the FMU's parameters (``fmu/variables.py``) and the SSP parameter values
(``fmu/ssv.py``) read their texts from here, so the range of chi is written once.

This module imports nothing of jointfmu (it sits at the bottom of :mod:`jointfmu.params`).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Optional

__all__ = [
    "ModeValueRule",
    "MODE_VALUE_RULES",
    "RULES_BY_NAME",
    "short_number",
]


def short_number(x: float) -> str:
    """``x`` with 3 significant digits, the exponent without '+' or leading zeros (1.58e6)."""
    text = f"{x:.3g}"
    if "e" in text:
        mant, exp = text.split("e")
        sign = "-" if exp.startswith("-") else ""
        text = f"{mant}e{sign}{exp.lstrip('+-').lstrip('0') or '0'}"
    return text


def _bound(x: float) -> str:
    return f"{x:g}"


@dataclass(frozen=True)
class ModeValueRule:
    """The admissible range of one mode value, and how to say it.

    Attributes
    ----------
    name : str
        ``"f0"``, ``"zeta"``, ``"Fs"``, ``"Kt"``, ``"chi"`` or ``"beta"``.
    key : str
        Where the value sits in a mode: ``"f0"``, ``"zeta"`` on the mode, ``"joint.Fs"`` ... in its
        joint (the file's ``[modes.joint]`` table; the FMU parameter ``mode[i].joint.Fs``).
    meaning : str
        What the value is, for descriptions.
    unit : str
        Unit of the FMU variable (a key of ``fmu.variables.UNITS``): ``"Hz"``, ``"1"``...
    unit_text : str
        The unit as messages write it (``"N/sqrt(kg)"``); empty for a dimensionless value.
    lower : float
        Lower bound.
    lower_inclusive : bool
        True for ``lower <= value``, False for ``lower < value``.
    upper : float or None
        Upper bound, None when there is none or when it depends on another value (``upper_text``).
    upper_inclusive : bool
        True for ``value <= upper``.
    upper_text : str
        An upper bound set by another value of the mode, e.g. ``"(2 pi f0)^2"``; empty otherwise.
    source : str
        Where the range comes from (publication, physics sheet section, or common practice).
    hint : str
        Advice given with any violation.
    hint_low, hint_high : str
        Advice given with a value below the lower bound, or above the upper bound.
    """

    name: str
    key: str
    meaning: str
    unit: str
    unit_text: str
    lower: float
    lower_inclusive: bool
    upper: Optional[float]
    upper_inclusive: bool
    upper_text: str
    source: str
    hint: str = ""
    hint_low: str = ""
    hint_high: str = ""

    # ------------------------------------------------------------------------ texts
    @property
    def has_upper(self) -> bool:
        return self.upper is not None or bool(self.upper_text)

    def rule(self, *, upper_known: bool = True) -> str:
        """The range as a formula, ``"-1 < chi <= 0"``; without the upper bound (``"Kt > 0"``)
        when it depends on a value that is not known (``upper_known=False``)."""
        low_op = "<=" if self.lower_inclusive else "<"
        if self.has_upper and (upper_known or self.upper is not None):
            high = self.upper_text or _bound(self.upper)
            high_op = "<=" if self.upper_inclusive else "<"
            return f"{_bound(self.lower)} {low_op} {self.name} {high_op} {high}"
        return f"{self.name} {'>=' if self.lower_inclusive else '>'} {_bound(self.lower)}"

    @property
    def description(self) -> str:
        """Meaning and range, ``"Iwan density exponent (micro-slip), -1 < chi <= 0"`` (the FMU
        parameter's description)."""
        return f"{self.meaning}, {self.rule()}"

    @property
    def summary(self) -> str:
        """Meaning, unit and range, for a missing key (``"viscous damping ratio, 0 <= zeta <
        1"``)."""
        unit = f" in {self.unit_text}" if self.unit_text else ""
        return f"{self.meaning}{unit}, {self.rule()}"

    @property
    def number_text(self) -> str:
        """What a non-number is told: ``"a finite number in Hz"`` -> suffix ``" in Hz"``."""
        return f" in {self.unit_text}" if self.unit_text else ""

    # ------------------------------------------------------------------------ check
    def violation(self, value: float, upper: Optional[float] = None, context: str = ""
                  ) -> Optional[tuple[str, str]]:
        """Why ``value`` is outside the range: ``(allowed, hint)``, or None when it is inside.

        Parameters
        ----------
        value : float
            A finite number.
        upper : float, optional
            The value of an upper bound that depends on another value (``upper_text``), e.g.
            ``(2 pi f0)^2`` for Kt; without it such a bound is not checked.
        context : str
            Shown after a computed upper bound, e.g. ``"f0 = 200 Hz"``.
        """
        hi = self.upper if self.upper is not None else upper
        low_ok = value >= self.lower if self.lower_inclusive else value > self.lower
        high_ok = hi is None or (value <= hi if self.upper_inclusive else value < hi)
        if low_ok and high_ok:
            return None
        unit = f" {self.unit_text}" if self.unit_text else ""
        if self.upper_text and hi is not None:
            allowed = f"must satisfy {self.rule()} = {short_number(hi)}{unit}"
            if context:
                allowed += f" ({context})"
        else:
            allowed = f"must satisfy {self.rule(upper_known=hi is not None)}{unit}"
        hint = self.hint or (self.hint_low if not low_ok else self.hint_high)
        return allowed, hint


_SEGALMAN = ('Segalman, "A four-parameter Iwan model for lap-type joints", J. Appl. Mech. '
             '72(5), 2005')

#: The six mode values, in the order of the file, the FMU parameters and the .ssv.
MODE_VALUE_RULES: tuple[ModeValueRule, ...] = (
    ModeValueRule(
        "f0", "f0", "low-amplitude natural frequency", "Hz", "Hz", 0.0, False, None, False, "",
        "a natural frequency is positive (common practice)"),
    ModeValueRule(
        "zeta", "zeta", "viscous damping ratio", "1", "", 0.0, True, 1.0, False, "",
        "a viscously damped mode that still oscillates, 0 <= zeta < 1 (common practice)",
        hint="the viscous damping ratio of a mode that still oscillates"),
    ModeValueRule(
        "Fs", "joint.Fs", "Iwan joint modal slip force (onset of macro-slip)", "N/kg^0.5",
        "N/sqrt(kg)", 0.0, False, None, False, "",
        f"{_SEGALMAN}; physics sheet sec. 1: F_S > 0",
        hint="the modal slip force sets where macro-slip begins"),
    ModeValueRule(
        "Kt", "joint.Kt", "Iwan joint stiffness at zero load", "1/s2", "1/s^2", 0.0, False,
        None, False, "(2 pi f0)^2",
        f"{_SEGALMAN}; physics sheet sec. 1: K_T > 0; sec. 5: omega0^2 = K_inf + K_T with "
        "K_inf > 0 (a mode stiffer than its joint)",
        hint_high="the joint cannot be stiffer than the whole mode: Kinf = (2 pi f0)^2 - Kt must "
                  "be > 0"),
    ModeValueRule(
        "chi", "joint.chi", "Iwan density exponent (micro-slip)", "1", "", -1.0, False, 0.0,
        True, "",
        f"{_SEGALMAN}; physics sheet sec. 1: chi > -1 for finite K_T and F_S, -1 < chi <= 0 "
        "the physical range, chi = 0 Goodman's cubic micro-slip law",
        hint_low="chi <= -1 makes Kt and Fs infinite, Segalman 2005",
        hint_high="chi > 0 is outside the physical range; chi = 0 is Goodman's cubic micro-slip "
                  "law"),
    ModeValueRule(
        "beta", "joint.beta", "Iwan macro-slip point-mass ratio", "1", "", 0.0, True, None,
        False, "",
        f"{_SEGALMAN}; physics sheet sec. 1: beta >= 0 (the point mass S at phimax is not "
        "negative)"),
)

#: Rule by name.
RULES_BY_NAME: Mapping[str, ModeValueRule] = {r.name: r for r in MODE_VALUE_RULES}
