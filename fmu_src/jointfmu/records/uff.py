"""Ring-down records as Universal File Format dataset 58 (function at nodal DOF), via ``pyuff``.

One file per record, one time-response function (dataset 58, function type 1) per channel.  A
function maps to a template point by its response node (the point's ``test_node``) and direction
(the point's ``direction``, ``x``/``y``/``z`` with an optional sign: UFF direction codes +-1, +-2,
+-3), and to a quantity by the ordinate's specific data type (8 displacement -> ``x``,
11 velocity -> ``v``, 12 acceleration -> ``a``, 13 excitation force -> ``force``).  A function
measured along the opposite sign of its point's direction is negated on reading.  The dataset
layout is the one the Universal File Format's dataset 58 defines (as documented with ``pyuff``,
after the University of Cincinnati SDRL description); units are SI (a dataset 164 with units code
1 is written first; a file declaring other units is refused).

The writer stores the abscissa explicitly (uneven spacing) in binary double precision, so times
and data read back bit for bit.  The reader also takes evenly spaced functions, whose increment
the format writes with six digits only: it is taken as ``1/round(1/inc)`` when that is within
1e-5 of it (a sample rate in whole hertz), else as written.  Comments go into the ID lines 2-5
of each function (at most four lines of 80 characters; ``NONE`` when empty).
"""
from __future__ import annotations

import os
import re
import tempfile
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..fileio import publish
from .model import Channel, Record, check_record, channel_name, check_time

__all__ = ["write_uff", "read_uff", "direction_code", "SPECIFIC_DATA_TYPES"]

#: UFF dataset 58 ordinate specific data type of each quantity.
SPECIFIC_DATA_TYPES = {"x": 8, "v": 11, "a": 12, "force": 13}
_QUANTITY_OF_TYPE = {v: k for k, v in SPECIFIC_DATA_TYPES.items()}
_TYPE_NAMES = {8: "displacement", 11: "velocity", 12: "acceleration", 13: "excitation force"}
#: Unit labels accepted on reading, per quantity (the writer uses the first).
_UNIT_LABELS = {"a": ("m/s^2", "m/s2", "m/s**2", "m s^-2", "m/s/s"), "v": ("m/s",),
                "x": ("m",), "force": ("N",)}
_DIR_RE = re.compile(r"^\s*([+-]?)\s*([xyzXYZ])\s*$")
_AXES = "xyz"
_TIME_TYPE = 17  # abscissa specific data type: time
_SI_UNITS = 1    # dataset 164 units code: SI (meter, newton)


def direction_code(direction: str) -> int | None:
    """UFF direction code of a point direction (``"+z"`` -> 3, ``"-x"`` -> -1), None if the text
    is not an axis x, y or z with an optional sign."""
    m = _DIR_RE.match(direction) if isinstance(direction, str) else None
    if m is None:
        return None
    code = _AXES.index(m.group(2).lower()) + 1
    return -code if m.group(1) == "-" else code


def _dir_text(code: int) -> str:
    return ("-" if code < 0 else "+") + _AXES[abs(code) - 1].upper() if 1 <= abs(code) <= 3 \
        else f"code {code}"


def _point_for_uff(template, label: str, where: str):
    for p in template.points:
        if p.label == label:
            break
    else:
        raise InputError(f"{where}: no point {label!r} in the template {template.source}")
    if p.test_node is None:
        raise InputError(f"{where}: point {label!r} has no test_node in {template.source}; a UFF "
                         "record needs one (a positive integer, unique among the points)")
    code = direction_code(p.direction)
    if code is None:
        raise InputError(f"{where}: point {label!r} has direction {p.direction!r}, which maps to no "
                         "UFF direction; allowed: x, y or z with an optional sign, e.g. '+z'")
    return p, code


def write_uff(record: Record, path: str | os.PathLike, template) -> Path:
    """Write a record as a Universal File (dataset 164 SI units, then one dataset 58 per channel).

    Parameters
    ----------
    record : Record
    path : str or path-like
        Written atomically (``.uff`` or ``.unv`` by convention).
    template : ParameterSet
        Gives each channel's point its ``test_node`` and direction.

    Returns
    -------
    Path

    Raises
    ------
    InputError
        A channel's point missing from the template, without ``test_node``, or with a direction
        that is not an axis; a non-finite value.  Nothing is written.
    """
    import pyuff

    path = Path(path)
    where = str(path)
    ids = [c[:80] for c in record.comments[:4]]
    ids += ["NONE"] * (4 - len(ids))
    ids = [i if i.strip() else "NONE" for i in ids]
    force_nodes = [_point_for_uff(template, c.point, where) for c in record.forces]
    ref_node, ref_dir = (force_nodes[0][0].test_node, force_nodes[0][1]) if force_nodes else (0, 0)
    sets: list[dict] = [{"type": 164, "units_code": _SI_UNITS, "units_description": "SI",
                         "temp_mode": 2, "length": 1.0, "force": 1.0, "temp": 1.0,
                         "temp_offset": 273.15}]
    for k, c in enumerate(record.channels, start=1):
        p, code = _point_for_uff(template, c.point, where)
        if not np.all(np.isfinite(c.data)):
            raise InputError(f"{where}: channel {c.name!r} holds a value that is not a finite "
                             "number; only finite values can be written")
        sets.append({
            "type": 58, "binary": 1, "id1": c.name, "id2": ids[0], "id3": ids[1], "id4": ids[2],
            "id5": ids[3], "func_type": 1, "func_id": k, "ver_num": 0, "load_case_id": 0,
            "rsp_ent_name": p.label[:10], "rsp_node": int(p.test_node), "rsp_dir": code,
            "ref_ent_name": "NONE", "ref_node": int(ref_node), "ref_dir": int(ref_dir),
            "abscissa_spacing": 0, "abscissa_spec_data_type": _TIME_TYPE,
            "abscissa_axis_lab": "Time", "abscissa_axis_units_lab": "s",
            "ordinate_spec_data_type": SPECIFIC_DATA_TYPES[c.quantity],
            "ordinate_axis_lab": _TYPE_NAMES[SPECIFIC_DATA_TYPES[c.quantity]][:20],
            "ordinate_axis_units_lab": _UNIT_LABELS[c.quantity][0],
            "orddenom_spec_data_type": 0, "z_axis_spec_data_type": 0,
            "x": np.array(record.time, dtype=float), "data": np.array(c.data, dtype=float),
        })
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    try:
        pyuff.UFF(tmp).write_sets(sets, mode="overwrite")
        publish(tmp, path)
    except BaseException as e:
        Path(tmp).unlink(missing_ok=True)
        if isinstance(e, Exception) and not isinstance(e, InputError):
            raise InputError(f"{where}: the Universal File could not be written: {e}") from e
        raise
    return path


def _snap_increment(inc: float) -> float:
    rate = round(1.0 / inc)
    if rate > 0 and abs(1.0 / rate - inc) <= 1e-5 * inc:
        return 1.0 / rate
    return inc


def _text(v) -> str:
    return str(v).strip() if v is not None else ""


def read_uff(path: str | os.PathLike, template) -> Record:
    """Read and check a Universal File record (dataset 58 functions) against a template.

    Raises
    ------
    InputError
        One line naming the file, the function (its number, response node and direction) or the
        channel, what is wrong and what is allowed: unreadable file, units not SI, no dataset 58,
        a function that is not a real time response, a node/direction that maps to no template
        point, a quantity not in {displacement, velocity, acceleration, excitation force}, a unit
        label not SI, two functions for one channel, functions on different time axes, and
        everything :func:`.model.check_record` checks.
    """
    import pyuff

    path = Path(path)
    src = str(path)
    if not path.is_file():
        raise InputError(f"{src}: cannot be read: no such file")
    try:
        uff = pyuff.UFF(src)
        types = list(uff.get_set_types())
        sets = uff.read_sets() if types else []
    except Exception as e:  # noqa: BLE001 - pyuff raises bare Exception for every problem
        raise InputError(f"{src}: cannot be read as a Universal File: {e}") from None
    if isinstance(sets, dict):
        sets = [sets]
    for s in sets:
        if s.get("type") == 164 and int(s.get("units_code", _SI_UNITS)) != _SI_UNITS:
            raise InputError(f"{src}: dataset 164 declares units code {s.get('units_code')} "
                             f"({_text(s.get('units_description'))}); only SI (code 1: m, N, s) "
                             "is read: convert the record to SI")
    funcs = [s for s in sets if s.get("type") == 58]
    if not funcs:
        raise InputError(f"{src}: no dataset 58 (function at nodal DOF) in the file; a record is "
                         "one time-response function per channel")
    by_node = {p.test_node: p for p in template.points if p.test_node is not None}
    known = ", ".join(f"{p.label}={p.test_node} ({p.direction})" for p in by_node.values()) or \
        "none: the template's points have no test_node"
    channels: list[Channel] = []
    origin: dict[str, int] = {}
    time = None
    comments: tuple[str, ...] = ()
    for k, s in enumerate(funcs, start=1):
        node, code = int(s.get("rsp_node", 0)), int(s.get("rsp_dir", 0))
        what = f"function {k} (response node {node}, direction {_dir_text(code)})"
        if int(s.get("func_type", 0)) != 1:
            raise InputError(f"{src}: {what}: function type {s.get('func_type')}; only time "
                             "responses (type 1) make a record")
        data = np.asarray(s.get("data"))
        if np.iscomplexobj(data):
            raise InputError(f"{src}: {what}: complex data; a time response is real")
        p = by_node.get(node)
        if p is None:
            raise InputError(f"{src}: {what} maps to no point of the template {template.source}; "
                             f"points with test_node: {known}")
        pcode = direction_code(p.direction)
        if pcode is None or abs(pcode) != abs(code):
            raise InputError(f"{src}: {what} maps to no point: node {node} is point {p.label!r} "
                             f"with direction {p.direction!r} in {template.source}; a function at "
                             "this node must be along the same axis (either sign)")
        stype = int(s.get("ordinate_spec_data_type", 0))
        qty = _QUANTITY_OF_TYPE.get(stype)
        if qty is None:
            allowed = ", ".join(f"{v} {n}" for v, n in _TYPE_NAMES.items())
            raise InputError(f"{src}: {what}: ordinate specific data type {stype}; allowed: "
                             f"{allowed}")
        unit = _text(s.get("ordinate_axis_units_lab"))
        if unit and unit.upper() != "NONE" and unit not in _UNIT_LABELS[qty]:
            raise InputError(f"{src}: {what}: unit {unit!r} for {_TYPE_NAMES[stype]}; only SI is "
                             f"read ({_UNIT_LABELS[qty][0]}): convert the record to SI")
        name = channel_name(p.label, qty)
        if name in origin:
            raise InputError(f"{src}: {what} is channel {name!r} again (already function "
                             f"{origin[name]}); each channel once")
        origin[name] = k
        if int(s.get("abscissa_spacing", 0)) == 1:
            inc = _snap_increment(float(s["abscissa_inc"]))
            t = float(s["abscissa_min"]) + inc * np.arange(data.size)
        else:
            t = np.asarray(s.get("x"), dtype=float)
        if t.shape != data.shape or data.ndim != 1:
            raise InputError(f"{src}: {what}: {t.size} abscissa values for {data.size} samples")
        if time is None:
            check_time(t, src, lambda i: f"{what}, sample {i}")
            time = t
            comments = tuple(_text(s.get(f"id{i}")) for i in range(2, 6)
                             if _text(s.get(f"id{i}")) and _text(s.get(f"id{i}")).upper() != "NONE")
        elif t.size != time.size or np.max(np.abs(t - time)) > 1e-6 * (time[1] - time[0]):
            raise InputError(f"{src}: {what}: {t.size} samples from {t[0]:.6g} s, function 1 has "
                             f"{time.size} from {time[0]:.6g} s; all channels of a record share "
                             "one time axis")
        sign = -1.0 if pcode != code else 1.0
        channels.append(Channel(name, data.astype(float) * sign if sign < 0 else
                                data.astype(float)))
    record = Record(time=time, channels=tuple(channels), comments=comments, source=src)
    check_record(record, template, line_of=lambda i: f"sample {i}")
    return record
