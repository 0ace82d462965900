"""Small checkers shared by the file readers (parameter sets, discrete-joint structures): each
records a :class:`~jointfmu.errors.Problem` and returns None when a value is not acceptable, so a
reader collects every problem of a file before it raises once."""
from __future__ import annotations

import math
import numbers
import re
from collections.abc import Mapping
from datetime import date, datetime, time
from typing import Any

try:
    import tomllib as _toml
except ModuleNotFoundError:  # pragma: no cover - Python < 3.11
    try:
        import tomli as _toml  # type: ignore[no-redef]
    except ModuleNotFoundError:
        _toml = None  # type: ignore[assignment]  (the readers say what is missing)

from ..errors import Problem
from .names import LABEL_PATTERN

__all__ = ["LABEL_RE", "LABEL_RULE", "type_name", "is_number", "number", "label", "required",
           "table", "toml_table"]

LABEL_RE = re.compile(f"^{LABEL_PATTERN}$")
LABEL_RULE = "must match ^[A-Za-z][A-Za-z0-9_]*$ (a letter, then letters, digits or '_')"


def type_name(x: Any) -> str:
    """What a TOML value is, in words ("a string", "an array", ...), for a message."""
    if isinstance(x, bool):
        return "a boolean"
    if isinstance(x, str):
        return "a string"
    if isinstance(x, (list, tuple)):
        return "an array"
    if isinstance(x, Mapping):
        return "a table"
    if isinstance(x, (datetime, date, time)):
        return "a date/time"
    return f"a {type(x).__name__}"  # "a float", "an int" where a text or table was due


def is_number(x: Any) -> bool:
    """A real number that is not a boolean."""
    return isinstance(x, numbers.Real) and not isinstance(x, bool)


def number(x: Any, file: str, fld: str, unit: str, problems: list[Problem]) -> float | None:
    """Return ``x`` as a finite float, or record why not and return None."""
    if not is_number(x):
        problems.append(Problem(file, fld, x, f"must be a finite number{unit}, got {type_name(x)}"))
        return None
    v = float(x)
    if not math.isfinite(v):
        problems.append(Problem(file, fld, x, f"must be a finite number{unit} (not NaN or infinity)"))
        return None
    return v + 0.0  # folds -0.0 to 0.0 so equal sets hash equal


def label(x: Any, file: str, fld: str, problems: list[Problem]) -> str | None:
    """A label (letters, digits, '_'; a letter first), or record why not."""
    if not isinstance(x, str):
        problems.append(Problem(file, fld, x, f"{LABEL_RULE}, got {type_name(x)}"))
        return None
    if not LABEL_RE.match(x):
        problems.append(Problem(file, fld, x, LABEL_RULE))
        return None
    return x


def required(t: Mapping[str, Any], key: str, file: str, fld: str, what: str,
             problems: list[Problem]) -> Any:
    """``t[key]``, or record that the key is missing."""
    if key not in t:
        problems.append(Problem(file, fld, None, f"missing required key {key!r} ({what})"))
        return None
    return t[key]


def table(d: Mapping[str, Any], key: str, file: str, problems: list[Problem], *,
          required: bool) -> Mapping[str, Any] | None:
    """The TOML table ``d[key]``, or record that it is missing (when ``required``) or not a table."""
    if key not in d:
        if required:
            problems.append(Problem(file, key, None, f"missing required table [{key}]"))
        return None
    t = d[key]
    if not isinstance(t, Mapping):
        problems.append(Problem(file, key, t, f"must be a table [{key}], got {type_name(t)}"))
        return None
    return t


def toml_table(raw: bytes, file: str, problems: list[Problem]) -> dict | None:
    """The TOML document in ``raw`` (UTF-8), or record why not (the line of a syntax error named,
    with its text) and return None."""
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as e:
        problems.append(Problem(file, "(file)", f"byte {e.start}",
                                "cannot be read: not UTF-8 text (TOML files are UTF-8)"))
        return None
    try:
        return _toml.loads(text)
    except _toml.TOMLDecodeError as e:
        msg = str(e)
        m = re.search(r"line (\d+)", msg)
        line_text = ""
        if m:
            lines = text.splitlines()
            n = int(m.group(1))
            if 1 <= n <= len(lines):
                line_text = lines[n - 1]
        problems.append(Problem(file, f"line {m.group(1)}" if m else "(TOML syntax)", line_text,
                                f"TOML syntax error: {msg}"))
        return None
