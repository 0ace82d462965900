"""All errors jointfmu raises on purpose.

One base class, :class:`JointFmuError`; each subclass is also the builtin that fits, so callers can
catch ``ValueError`` or ``RuntimeError`` as usual.  Each carries structured fields as well as a
message that says what is wrong and what is allowed.
"""
from __future__ import annotations

from dataclasses import dataclass
import difflib
from typing import Any, Iterable, Sequence

__all__ = [
    "JointFmuError",
    "Problem",
    "ParameterError",
    "InputError",
    "SimulationError",
    "BuildError",
    "OutputPathError",
    "JointFmuWarning",
    "FmiCallError",
    "did_you_mean",
]


class JointFmuError(Exception):
    """Base class of every error jointfmu raises on purpose."""


@dataclass(frozen=True)
class Problem:
    """One thing wrong in a parameter set.

    Attributes
    ----------
    file : str
        Where the value came from (a path, ``"<dict>"`` or ``"FMU parameter"``).
    field : str
        Dotted location of the value, e.g. ``"modes[2].joint.chi"``.
    value : Any
        The offending value as given.
    allowed : str
        What would have been accepted, e.g. ``"-1 < chi <= 0"``.
    hint : str
        Optional extra advice (a did-you-mean suggestion, say).
    """

    file: str
    field: str
    value: Any
    allowed: str
    hint: str = ""

    def __str__(self) -> str:
        text = f"{self.file}: {self.field} = {self.value!r}: {self.allowed}"
        if self.hint:
            text += f" ({self.hint})"
        return text


class ParameterError(JointFmuError, ValueError):
    """A parameter set (file, dict or FMU parameters) is invalid.

    ``problems`` lists every problem found, not only the first.
    """

    def __init__(self, problems: Sequence[Problem]):
        self.problems = tuple(problems)
        n = len(self.problems)
        head = f"{n} problem{'s' if n != 1 else ''} in parameter set"
        super().__init__(head + ":\n" + "\n".join(f"  - {p}" for p in self.problems))


class InputError(JointFmuError, ValueError):
    """An input to a simulation (force, acceleration, step size, CSV column...) is invalid."""


class SimulationError(JointFmuError, RuntimeError):
    """A time step could not be completed; the state from before the step is kept."""


class BuildError(JointFmuError, RuntimeError):
    """An FMU could not be built; nothing was left behind."""


class OutputPathError(JointFmuError, OSError):
    """A file or folder cannot be written where it was asked for (under a regular file, in a
    folder without write permission, a folder where a file is expected...).  Raised before any
    work starts, so nothing is half-written.

    Attributes
    ----------
    path : str
        The output path as given.
    reason : str
        Why it cannot be written there.
    """

    def __init__(self, what: str, path: str, reason: str):
        self.path = path
        self.reason = reason
        super().__init__(f"{what} {path!r}: {reason}")

    def __str__(self) -> str:  # OSError's own __str__ would print the args tuple
        return self.args[0]


class JointFmuWarning(UserWarning):
    """Something the user should know that does not stop the work (an FMU input left at its
    start value because the input file has no column for it, say)."""


class FmiCallError(JointFmuError, RuntimeError):
    """An FMI call the FMU refuses, with the fmi2Error status of the FMI 2.0 standard: a call not
    allowed in the FMU's state (sec. 4.2.4), an unknown value reference or a variable that cannot
    be set then, an FMU state that is not one of this FMU's, parameters out of range at
    fmi2ExitInitializationMode.  Raised by the FMU's slave towards its binary, never to a user:
    jointfmu's native binary returns fmi2Error, pythonfmu's fmi2Fatal (it has no other way).
    Its repr is its message: pythonfmu's binary logs the repr of an exception."""

    def __repr__(self) -> str:
        return str(self)


def did_you_mean(key: str, allowed: Iterable[str]) -> str:
    """Hint naming the closest allowed keys (difflib ratio >= 0.5, case-insensitive, ties kept)."""
    scored = []
    for a in allowed:
        r = difflib.SequenceMatcher(None, key.lower(), a.lower()).ratio()
        if r >= 0.5:
            scored.append((-r, a))
    scored.sort()
    if not scored:
        return ""
    best = [a for r, a in scored if r == scored[0][0]][:2]  # ties kept: "Ft" is as near "Fs" as "Kt"
    return "did you mean " + " or ".join(repr(a) for a in best) + "?"
