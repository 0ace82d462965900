"""Ring-down record files: CSV and Universal File Format dataset 58.

One record is one free decay of a structure (:class:`Record`: uniform times, one
:class:`Channel` per measured quantity, named like the FMU's outputs ``point.<label>.a|v|x`` and
``point.<label>.force``).  :func:`read_record` reads either format and checks it against a
template parameter set (the points, their roles and test nodes); :func:`write_csv` and
:func:`write_uff` write them atomically.  Imports only :mod:`jointfmu.errors`,
:mod:`jointfmu.fileio` and NumPy (``pyuff`` when a UFF file is read or written).
"""
from __future__ import annotations

import os
from pathlib import Path

from ..errors import InputError
from .csvfile import read_csv, write_csv
from .model import (CLIP_RUN, QUANTITIES, RESPONSE_QUANTITIES, TIME_TOLERANCE, UNITS, Channel,
                    Record, channel_name, check_record, check_time, clipped_run)
from .uff import SPECIFIC_DATA_TYPES, direction_code, read_uff, write_uff

__all__ = [
    "Channel",
    "Record",
    "QUANTITIES",
    "RESPONSE_QUANTITIES",
    "UNITS",
    "CLIP_RUN",
    "TIME_TOLERANCE",
    "SPECIFIC_DATA_TYPES",
    "SUFFIXES",
    "channel_name",
    "check_record",
    "check_time",
    "clipped_run",
    "direction_code",
    "read_record",
    "read_csv",
    "read_uff",
    "write_csv",
    "write_uff",
]

#: File name endings :func:`read_record` reads, and the reader of each.
SUFFIXES = {".csv": "csv", ".uff": "uff", ".unv": "uff"}


def read_record(path: str | os.PathLike, template) -> "Record":
    """Read one record file (``.csv``, ``.uff`` or ``.unv``) and check it against ``template``.

    Parameters
    ----------
    path : str or path-like
    template : ParameterSet
        Its points (labels, roles, ``test_node``, directions) decide which channels are allowed.

    Raises
    ------
    InputError
        One line naming the file and what is wrong (see :func:`read_csv`, :func:`read_uff`).
    """
    path = Path(path)
    kind = SUFFIXES.get(path.suffix.lower())
    if kind is None:
        raise InputError(f"{path}: unknown record format {path.suffix or '(no suffix)'!r}; allowed: "
                         + ", ".join(SUFFIXES) + " (CSV or Universal File dataset 58)")
    if not path.is_file():
        raise InputError(f"{path}: cannot be read: no such file")
    return read_csv(path, template) if kind == "csv" else read_uff(path, template)
