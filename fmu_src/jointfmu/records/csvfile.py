"""Ring-down records as CSV text.

Layout (read by other tools: keep it): optional comment lines starting with ``#`` at the top
(free text; the writer puts ``# `` before each), one header row ``time,<channel>,...``, then one
row per sample, comma-separated.  ``time`` in s, uniform; channels named
``point.<label>.a|v|x|force`` in SI units (:mod:`.model`).  The writer gives every number with
``repr`` (the shortest text that reads back to the same double), so a round trip is exact.
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..fileio import atomic_write
from .model import Channel, Record, check_record

__all__ = ["write_csv", "read_csv"]


def write_csv(record: Record, path: str | os.PathLike) -> Path:
    """Write a record as CSV, atomically (nothing is left behind on failure).

    Parameters
    ----------
    record : Record
    path : str or path-like

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    InputError
        When a value is not finite (the file is not written).
    """
    path = Path(path)
    for c in record.channels:
        bad = ~np.isfinite(c.data)
        if np.any(bad):
            raise InputError(f"{path}: channel {c.name!r} sample {int(np.flatnonzero(bad)[0])} is "
                             "not a finite number; only finite values can be written")
    cols = [record.time.tolist()] + [c.data.tolist() for c in record.channels]
    with atomic_write(path, "w", newline="\n") as f:
        for line in record.comments:
            f.write(f"# {line}\n")
        f.write(",".join(("time",) + record.names) + "\n")
        f.writelines(",".join(map(repr, row)) + "\n" for row in zip(*cols))
    return path


def _unquote(s: str) -> str:
    s = s.strip()
    if len(s) >= 2 and s[0] == s[-1] == '"':
        return s[1:-1].strip()
    return s


def read_csv(path: str | os.PathLike, template) -> Record:
    """Read and check a CSV record against a template parameter set.

    Raises
    ------
    InputError
        One line naming the file, the line (or the channel), what is wrong and what is allowed:
        unreadable file, no header, first column not ``time``, a badly named or duplicate
        channel, a row with the wrong number of fields, text, NaN or infinity in the data, and
        everything :func:`.model.check_record` checks.
    """
    path = Path(path)
    src = str(path)
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except OSError as e:
        raise InputError(f"{src}: cannot be read: {e.strerror or e}") from None
    except UnicodeDecodeError as e:
        raise InputError(f"{src}: byte {e.start}: not UTF-8 text; a CSV record is UTF-8") from None
    lines = text.splitlines()
    comments: list[str] = []
    k = 0
    while k < len(lines) and (lines[k].startswith("#") or not lines[k].strip()):
        if lines[k].startswith("#"):
            c = lines[k][1:]
            comments.append(c[1:] if c.startswith(" ") else c)
        k += 1
    if k == len(lines):
        raise InputError(f"{src}: no header row; expected 'time,point.<label>.a,...' after the "
                         "# comment lines")
    header_line = k + 1
    header = [_unquote(h) for h in lines[k].split(",")]
    if header[0] != "time":
        raise InputError(f"{src}: line {header_line}: first column is {header[0]!r}; it must be "
                         "'time' (s)")
    names = header[1:]
    if not names:
        raise InputError(f"{src}: line {header_line}: no channel columns after 'time'")
    for j, name in enumerate(names, start=2):
        if name in names[: j - 2]:
            raise InputError(f"{src}: line {header_line}, column {j}: channel {name!r} appears "
                             f"twice (first in column {names.index(name) + 2}); each channel once")
        try:
            Channel(name, np.zeros(0))
        except InputError as e:
            raise InputError(f"{src}: line {header_line}, column {j}: {e}") from None
    ncol = len(header)
    rows: list[list[float]] = []
    line_no: list[int] = []
    for n, line in enumerate(lines[k + 1:], start=header_line + 1):
        if not line.strip():
            continue
        fields = line.split(",")
        if len(fields) != ncol:
            raise InputError(f"{src}: line {n}: {len(fields)} fields, the header has {ncol}; one "
                             "number per column")
        row = []
        for j, fld in enumerate(fields):
            try:
                v = float(fld)
            except ValueError:
                raise InputError(f"{src}: line {n}, column {header[j]!r}: {fld.strip()!r} is not a "
                                 "number; values must be finite numbers") from None
            if v != v or v in (float("inf"), float("-inf")):
                raise InputError(f"{src}: line {n}, column {header[j]!r}: {fld.strip()!r}; values "
                                 "must be finite numbers (no NaN or infinity)")
            row.append(v)
        rows.append(row)
        line_no.append(n)
    if len(rows) < 2:
        raise InputError(f"{src}: {len(rows)} data row(s); a record needs samples")
    data = np.array(rows, dtype=float)
    record = Record(time=data[:, 0], channels=tuple(Channel(nm, data[:, j + 1])
                                                    for j, nm in enumerate(names)),
                    comments=tuple(comments), source=src)
    check_record(record, template, line_of=lambda i: f"line {line_no[i]}")
    return record
