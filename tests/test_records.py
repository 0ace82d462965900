"""Ring-down record files: CSV and Universal File Format dataset 58 (UFF 58, read and written with
the general-purpose ``pyuff`` package), round trips and every bad input with its message.
"""
from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from jointfmu import InputError, load_parameter_set
from jointfmu.records import (CLIP_RUN, Channel, Record, clipped_run, direction_code, read_record,
                              write_csv, write_uff)

ROOT = Path(__file__).resolve().parents[1]
RATE = 5120.0
N = 1200


@pytest.fixture(scope="module")
def template():
    """The nominal example with test nodes (shaker 101 +z, tip 102 +z, center 103 -z,
    psu_foot 104 +z): one point measured along the negative axis."""
    ps = load_parameter_set(ROOT / "examples" / "tray_nominal.toml")
    pts = []
    for k, p in enumerate(ps.points, start=1):
        pts.append(dataclasses.replace(p, test_node=100 + k,
                                       direction="-z" if p.label == "center" else p.direction))
    return dataclasses.replace(ps, points=tuple(pts))


def _record(seed: int = 1, names=("point.tip.a", "point.center.a", "point.psu_foot.v",
                                  "point.shaker.force")) -> Record:
    rng = np.random.default_rng(seed)
    t = -0.02 + np.arange(N) / RATE  # pre-trigger: starts before 0
    env = np.exp(-3.0 * np.maximum(t, 0.0))
    chans = tuple(Channel(n, env * np.sin(2 * np.pi * (60.0 + 7 * k) * t + k)
                          + 1e-3 * rng.standard_normal(N) * (1.0 + 1e9 * (k == 2)))
                  for k, n in enumerate(names))
    return Record(t, chans, ("virtual test, level 3", "impact at shaker, 40 N"), "<test>")


def _same(a: Record, b: Record) -> None:
    assert a.names == b.names
    assert np.array_equal(a.time, b.time)  # bit for bit
    for ca, cb in zip(a.channels, b.channels):
        assert ca.data.tobytes() == cb.data.tobytes(), ca.name


# ---------------------------------------------------------------------------------------------
# the model
# ---------------------------------------------------------------------------------------------
def test_channel_properties():
    c = Channel("point.psu_foot.force", [1, 2, 3])
    assert (c.point, c.quantity, c.unit, c.is_response) == ("psu_foot", "force", "N", False)
    assert c.data.dtype == float and not c.data.flags.writeable
    assert Channel("point.tip.a", [0.0]).unit == "m/s^2"


@pytest.mark.parametrize("name", ["tip.a", "point.tip.acc", "point.2tip.a", "point.tip", "time"])
def test_channel_name_rule(name):
    with pytest.raises(InputError, match="must be point.<label>.a .* or point.<label>.force"):
        Channel(name, [0.0])


def test_record_rules():
    t = np.arange(4.0)
    with pytest.raises(InputError, match="appears twice"):
        Record(t, (Channel("point.tip.a", t), Channel("point.tip.a", t)), (), "r")
    with pytest.raises(InputError, match="has 3 samples, time has 4"):
        Record(t, (Channel("point.tip.a", t[:3]),), (), "r")
    r = Record(t, (Channel("point.tip.a", t), Channel("point.shaker.force", t)))
    assert r.dt == 1.0 and [c.name for c in r.responses] == ["point.tip.a"]
    assert r.channel("point.shaker.force").quantity == "force"
    with pytest.raises(InputError, match="did you mean 'point.tip.a'"):
        r.channel("point.tip.v")


def test_direction_codes():
    # UFF dataset 58 record 6 field 7: +-1 X, +-2 Y, +-3 Z translation (the format's definition)
    assert [direction_code(d) for d in ("+x", "y", "-z", " +Z ", "radial", "+xy")] == \
        [1, 2, -3, 3, None, None]


# ---------------------------------------------------------------------------------------------
# clipping: the test of model.clipped_run
# ---------------------------------------------------------------------------------------------
def test_clipping_detected_and_not_falsely():
    t = np.arange(4000) / RATE
    x = np.exp(-2 * t) * np.sin(2 * np.pi * 97.0 * t)
    assert clipped_run(x) is None
    top = 0.8 * x.max()
    k, v = clipped_run(np.clip(x, -top, top))
    assert v == top and x[k] > top  # the first sample of the flat top
    force = np.zeros_like(t)
    force[10:13] = np.sin(np.pi * np.arange(1, 4) / 4)  # a pulse on an exact zero baseline
    assert clipped_run(force) is None   # the flat baseline is the median, not an extreme
    y = x.copy()
    y[100:100 + CLIP_RUN - 1] = y.max()  # one sample short of the rule
    assert clipped_run(y) is None or clipped_run(y)[1] != y.max()


# ---------------------------------------------------------------------------------------------
# round trips (bit-exact)
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("seed", [1, 2])
def test_csv_round_trip_is_exact(tmp_path, template, seed):
    r = _record(seed)
    path = write_csv(r, tmp_path / "level3.csv")
    back = read_record(path, template)
    _same(r, back)
    assert back.comments == r.comments and back.source == str(path)
    text = path.read_text()
    assert text.startswith("# virtual test, level 3\n# impact at shaker, 40 N\ntime,point.tip.a,")


@pytest.mark.parametrize("seed", [1, 2])
def test_uff_round_trip_is_exact(tmp_path, template, seed):
    r = _record(seed)
    path = write_uff(r, tmp_path / "level3.uff", template)
    back = read_record(path, template)
    _same(r, back)
    assert back.comments == r.comments


def test_uff_functions_carry_nodes_directions_and_types(tmp_path, template):
    import pyuff

    path = write_uff(_record(), tmp_path / "r.unv", template)
    sets = [s for s in pyuff.UFF(str(path)).read_sets() if s["type"] == 58]
    got = [(s["id1"].strip(), s["rsp_node"], s["rsp_dir"], s["ordinate_spec_data_type"])
           for s in sets]
    # UFF 58: specific data type 12 acceleration, 11 velocity, 13 excitation force; the centre
    # sensor points along -z (direction code -3)
    assert got == [("point.tip.a", 102, 3, 12), ("point.center.a", 103, -3, 12),
                   ("point.psu_foot.v", 104, 3, 11), ("point.shaker.force", 101, 3, 13)]
    assert all(s["func_type"] == 1 for s in sets)  # time response


def _lab_uff(path: Path, functions, inc=1.0 / RATE, t0=-0.02, units_code=None):
    """A UFF file as another program writes it: evenly spaced abscissa, increment with the six
    digits of the format's record 7."""
    import pyuff

    sets = []
    if units_code is not None:
        sets.append({"type": 164, "units_code": units_code, "units_description": "other",
                     "temp_mode": 1, "length": 1.0, "force": 1.0, "temp": 1.0, "temp_offset": 0.0})
    for k, (node, direction, stype, data) in enumerate(functions, start=1):
        sets.append({"type": 58, "binary": 0, "func_type": 1, "func_id": k, "rsp_node": node,
                     "rsp_dir": direction, "ref_node": 101, "ref_dir": 3, "abscissa_spacing": 1,
                     "abscissa_spec_data_type": 17, "ordinate_spec_data_type": stype,
                     "orddenom_spec_data_type": 0, "z_axis_spec_data_type": 0,
                     "x": t0 + inc * np.arange(len(data)), "data": np.asarray(data, float)})
    pyuff.UFF(str(path)).write_sets(sets, mode="overwrite")
    return path


def test_evenly_spaced_uff_from_another_program(tmp_path, template):
    r = _record()
    tip, center = r.channel("point.tip.a").data, r.channel("point.center.a").data
    # the centre point is -z in the template; a function along +z there is negated on reading
    path = _lab_uff(tmp_path / "lab.uff", [(102, 3, 12, tip), (103, 3, 12, center)])
    back = read_record(path, template)
    assert back.names == ("point.tip.a", "point.center.a")
    # ASCII double precision is written with 12 significant digits (UFF 58 format 4E20.12)
    np.testing.assert_allclose(back.channel("point.tip.a").data, tip, rtol=1e-11, atol=1e-12)
    np.testing.assert_allclose(back.channel("point.center.a").data, -center, rtol=1e-11, atol=1e-12)
    # the increment 1.95312e-04 written with six digits is taken as 1/5120 s
    assert back.dt == pytest.approx(1.0 / RATE, rel=1e-12)
    assert back.time[0] == -0.02


# ---------------------------------------------------------------------------------------------
# bad CSV files: one defect each, one clear message
# ---------------------------------------------------------------------------------------------
def _csv_lines(r: Record | None = None) -> list[str]:
    r = r or _record()
    cols = [r.time] + [c.data for c in r.channels]
    return (["# a comment", "time," + ",".join(r.names)]
            + [",".join(repr(float(v)) for v in row) for row in zip(*cols)])


def _set_field(lines, line_no, col, text):
    f = lines[line_no - 1].split(",")
    f[col] = text
    lines[line_no - 1] = ",".join(f)
    return lines


def _clip(lines):
    r = _record()
    x = r.channel("point.tip.a").data
    top = 0.7 * x.max()
    chans = tuple(Channel(c.name, np.clip(c.data, -top, top) if c.name == "point.tip.a" else c.data)
                  for c in r.channels)
    return _csv_lines(Record(r.time, chans))


def _rename(old, new):
    def edit(lines):
        lines[1] = lines[1].replace(old, new)
        return lines
    return edit


BAD_CSV = [
    ("time_not_increasing", lambda ls: _set_field(ls, 40, 0, ls[38].split(",")[0]),
     ["line 40:", "does not increase", "times must be strictly increasing"]),
    ("time_not_uniform", lambda ls: ls[:50] + ls[51:],
     ["line 51:", "comes 2 steps after the previous sample", "uniformly spaced within 0.01 of a step"]),
    ("nan", lambda ls: _set_field(ls, 77, 1, "nan"),
     ["line 77, column 'point.tip.a'", "'nan'", "must be finite numbers"]),
    ("text", lambda ls: _set_field(ls, 78, 2, "overload"),
     ["line 78, column 'point.center.a'", "'overload' is not a number"]),
    ("empty_field", lambda ls: _set_field(ls, 79, 2, ""),
     ["line 79, column 'point.center.a'", "'' is not a number"]),
    ("wrong_field_count", lambda ls: ls[:60] + [ls[60] + ",1.0"] + ls[61:],
     ["line 61:", "6 fields, the header has 5"]),
    ("no_such_point", _rename("point.tip.a", "point.tipp.a"),
     ["channel 'point.tipp.a'", "no point 'tipp' in the template", "did you mean 'tip'"]),
    ("motion_at_input_point", _rename("point.tip.a", "point.shaker.a"),
     ["channel 'point.shaker.a'", "point 'shaker' has role 'input'",
      "a motion channel (a, v, x) needs a point with role 'output' or 'both'"]),
    ("force_at_output_point", _rename("point.shaker.force", "point.tip.force"),
     ["channel 'point.tip.force'", "point 'tip' has role 'output'",
      "a force channel needs a point with role 'input' or 'both'"]),
    ("duplicate_channel", _rename("point.center.a", "point.tip.a"),
     ["line 2, column 3", "channel 'point.tip.a' appears twice (first in column 2)"]),
    ("bad_channel_name", _rename("point.center.a", "center_acc"),
     ["line 2, column 3", "'center_acc'", "must be point.<label>.a (m/s^2)"]),
    ("first_column_not_time", _rename("time,", "t,"),
     ["line 2: first column is 't'", "must be 'time' (s)"]),
    ("clipped", _clip,
     ["channel 'point.tip.a' is clipped", f"{CLIP_RUN} or more samples in a row equal its extreme",
      "m/s^2 from line", "must stay inside the sensor's range"]),
    ("no_response_channel",
     lambda ls: [",".join([row.split(",")[0], row.split(",")[4]]) for row in ls[1:]],
     ["no response channel", "point.<label>.a, .v or .x"]),
    ("no_header", lambda ls: ["# only a comment"], ["no header row"]),
]


@pytest.mark.parametrize("edit,expected", [b[1:] for b in BAD_CSV], ids=[b[0] for b in BAD_CSV])
def test_bad_csv_gives_one_clear_error(tmp_path, template, edit, expected):
    path = tmp_path / "bad.csv"
    path.write_text("\n".join(edit(_csv_lines())) + "\n")
    with pytest.raises(InputError) as info:
        read_record(path, template)
    msg = str(info.value)
    assert msg.startswith(str(path) + ": ") and "\n" not in msg
    for e in expected:
        assert e in msg, msg


def test_small_time_jitter_is_accepted(tmp_path, template):
    lines = _csv_lines()
    t = float(lines[40].split(",")[0])
    _set_field(lines, 41, 0, repr(t + 0.004 / RATE))  # 0.4 % of a step, within the tolerance
    path = tmp_path / "jitter.csv"
    path.write_text("\n".join(lines) + "\n")
    assert read_record(path, template).time.size == N


@pytest.mark.parametrize("name,expected", [("r.txt", "unknown record format '.txt'"),
                                           ("missing.csv", "cannot be read: no such file")])
def test_unknown_suffix_or_missing_file(tmp_path, template, name, expected):
    if name.endswith(".txt"):
        (tmp_path / name).write_text("time\n")
    with pytest.raises(InputError, match=expected):
        read_record(tmp_path / name, template)


def test_write_csv_refuses_nan_and_leaves_the_old_file(tmp_path):
    path = tmp_path / "r.csv"
    path.write_text("old\n")
    r = _record()
    bad = Record(r.time, (Channel("point.tip.a", np.where(r.time > 0.01, np.nan, 0.0)),))
    with pytest.raises(InputError, match="'point.tip.a' sample .* not a finite number"):
        write_csv(bad, path)
    assert path.read_text() == "old\n"
    assert [p.name for p in tmp_path.iterdir()] == ["r.csv"]  # no temporary file left


# ---------------------------------------------------------------------------------------------
# bad UFF files
# ---------------------------------------------------------------------------------------------
def test_uff_node_that_maps_to_no_point(tmp_path, template):
    x = _record().channel("point.tip.a").data
    path = _lab_uff(tmp_path / "n.uff", [(102, 3, 12, x), (7, 3, 12, x)])
    with pytest.raises(InputError) as info:
        read_record(path, template)
    msg = str(info.value)
    assert "function 2 (response node 7, direction +Z) maps to no point of the template" in msg
    assert "points with test_node: shaker=101 (+z), tip=102 (+z), center=103 (-z)" in msg


def test_uff_direction_on_another_axis(tmp_path, template):
    x = _record().channel("point.tip.a").data
    path = _lab_uff(tmp_path / "d.uff", [(102, 1, 12, x)])
    with pytest.raises(InputError, match=r"function 1 \(response node 102, direction \+X\) maps to "
                                         r"no point: node 102 is point 'tip' with direction '\+z'"):
        read_record(path, template)


def test_uff_duplicate_channel(tmp_path, template):
    x = _record().channel("point.tip.a").data
    path = _lab_uff(tmp_path / "dup.uff", [(102, 3, 12, x), (102, -3, 12, -x)])
    with pytest.raises(InputError, match=r"function 2 .* is channel 'point.tip.a' again \(already "
                                         r"function 1\); each channel once"):
        read_record(path, template)


def test_uff_quantity_not_a_motion_or_force(tmp_path, template):
    x = _record().channel("point.tip.a").data
    path = _lab_uff(tmp_path / "q.uff", [(102, 3, 2, x)])  # 2: stress
    with pytest.raises(InputError, match="ordinate specific data type 2; allowed: 8 displacement, "
                                         "11 velocity, 12 acceleration, 13 excitation force"):
        read_record(path, template)


def test_uff_units_not_si(tmp_path, template):
    x = _record().channel("point.tip.a").data
    path = _lab_uff(tmp_path / "u.uff", [(102, 3, 12, x)], units_code=2)  # 2: BG (foot, pound)
    with pytest.raises(InputError, match="units code 2 .* only SI .* is read"):
        read_record(path, template)


def test_uff_clipped_channel(tmp_path, template):
    x = _record().channel("point.tip.a").data
    top = 0.5 * x.max()
    path = _lab_uff(tmp_path / "c.uff", [(102, 3, 12, np.clip(x, -top, top))])
    with pytest.raises(InputError, match=r"channel 'point.tip.a' is clipped: .* from sample \d+"):
        read_record(path, template)


def test_uff_not_a_universal_file(tmp_path, template):
    path = tmp_path / "junk.uff"
    path.write_text("this is not a universal file\n")
    with pytest.raises(InputError, match=r"junk.uff: (no dataset 58|cannot be read as a Universal)"):
        read_record(path, template)


def test_write_uff_needs_test_node_and_an_axis_direction(tmp_path, template):
    no_nodes = dataclasses.replace(template, points=tuple(dataclasses.replace(p, test_node=None)
                                                          for p in template.points))
    with pytest.raises(InputError, match="point 'shaker' has no test_node"):
        write_uff(_record(), tmp_path / "a.uff", no_nodes)
    radial = dataclasses.replace(template, points=tuple(
        dataclasses.replace(p, direction="radial") if p.label == "tip" else p
        for p in template.points))
    with pytest.raises(InputError, match="direction 'radial', which maps to no UFF direction"):
        write_uff(_record(), tmp_path / "a.uff", radial)
    assert list(tmp_path.iterdir()) == []  # nothing written
