"""Parameter sets: loading, strict validation, content hash, TOML round trip, ``jointfmu check``.

Reference checks name their source; "derived here" marks a value worked out by hand for the test.
"""
from __future__ import annotations

import dataclasses
import math
import os
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from jointfmu import (InputError, JointParams, Mode, ParameterError, ParameterSet, Point,
                      Provenance, check_mode_values, check_parameter_file, load_parameter_set,
                      parse_parameter_set, save_parameter_set)
import importlib

cli = importlib.import_module("jointfmu.cli.main")  # the module (jointfmu.cli.main is also the name of its function)

ROOT = Path(__file__).resolve().parents[1]
# the parameter files among the examples (tray_lumped.toml is a discrete-joint structure,
# format jointfmu-lumped/1, tested in test_lumped_files.py)
EXAMPLES = sorted(p for p in (ROOT / "examples").glob("*.toml")
                  if 'format = "jointfmu-params/1"' in p.read_text(encoding="utf-8"))
PYTHON = sys.executable

# A small valid set, written out so that each bad variant below changes exactly one line.
# (2 pi 100)^2 = 3.948e5, (2 pi 200)^2 = 1.579e6, (2 pi 300)^2 = 3.553e6 1/s^2 (derived here);
# sum Gamma^2 = 1.5^2 + 0.8^2 + 0.4^2 = 3.05 kg <= 4 kg.
GOOD = """\
# test set; joint values in mass-normalized modal coordinates
format = "jointfmu-params/1"

[structure]
name = "test_tray"
build = "T-1"
description = "a valid base for the bad variants"

[provenance]
fitted_by = "test suite"
date = "2026-10-14"

[base]
total_mass = 4.0
direction = "z"

[[modes]]
label = "m_one"
f0 = 100.0
zeta = 0.004
base_participation = 1.5
[modes.joint]
Fs = 10.0
Kt = 8.0e4
chi = -0.4
beta = 0.2

[[modes]]
label = "m_two"
f0 = 200.0
zeta = 0.003
base_participation = 0.8
[modes.joint]
Fs = 5.0
Kt = 3.0e5
chi = -0.5
beta = 0.1

[[modes]]
label = "m_three"
f0 = 300.0
zeta = 0.002
base_participation = -0.4
[modes.joint]
Fs = 2.5
Kt = 2.0e5
chi = -0.6
beta = 0.0

[[points]]
label = "drive"
role = "input"
direction = "+z"
shape = [0.5, 0.3, -0.2]

[[points]]
label = "tip"
role = "output"
direction = "+z"
shape = [0.7, -0.4, 0.6]
base_factor = 1.0
"""

# The same set with tables and keys reordered, comments added and numbers spelled differently.
REORDERED = """\
format = "jointfmu-params/1"   # top-level keys must precede the tables in TOML

[[points]]
role = "input"
shape = [0.5, 0.3, -0.2]
direction = "+z"
label = "drive"

[[points]]
base_factor = 1
label = "tip"          # a comment
role = "output"
shape = [0.70, -0.40, 0.60]
direction = "+z"

[provenance]
date = "2026-10-14"
fitted_by = "test suite"

[[modes]]
zeta = 4e-3
label = "m_one"
base_participation = 1.5
f0 = 100
joint = { beta = 0.2, chi = -0.4, Kt = 80000, Fs = 10 }

[[modes]]
joint.beta = 0.1
joint.Kt = 300000.0
label = "m_two"
joint.chi = -0.50
f0 = 200.0
joint.Fs = 5.0
zeta = 0.003
base_participation = 0.8

[[modes]]
label = "m_three"
f0 = 3.0e2
zeta = 0.002
base_participation = -0.4
[modes.joint]
beta = 0
chi = -0.6
Fs = 2.5
Kt = 2e5

[base]
direction = "z"
total_mass = 4

[structure]
description = "a valid base for the bad variants"
build = "T-1"
name = "test_tray"
"""


def _write(tmp_path: Path, text: str, name: str = "set.toml") -> Path:
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def _sub(text: str, old: str, new: str) -> str:
    assert text.count(old) == 1, f"{old!r} must occur once in the base text"
    return text.replace(old, new)


def _line_of(text: str, needle: str) -> int:
    return next(i for i, line in enumerate(text.splitlines(), start=1) if needle in line)


# ---------------------------------------------------------------------------------------------
# examples
# ---------------------------------------------------------------------------------------------
def test_examples_exist():
    names = {p.name for p in EXAMPLES}
    assert {"tray_nominal.toml", "tray_undertorqued.toml", "tray_worn.toml"} <= names


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_example_loads_and_checks(path):
    assert check_parameter_file(path) == []
    ps = load_parameter_set(path)
    assert ps.name == "avionics_tray"
    assert ps.n_modes == 4
    assert ps.base is not None
    assert ps.input_points and len(ps.output_points) >= 2
    text = path.read_text(encoding="utf-8")
    assert "MASS-NORMALIZED MODAL COORDINATES" in text
    for m in ps.modes:
        # Scope of the examples (README): 60-450 Hz, joint share of the modal stiffness 5-30 %.
        assert 60.0 <= m.f0 <= 450.0
        assert 0.05 <= m.joint.Kt / m.omega0 ** 2 <= 0.30
        assert -0.6 <= m.joint.chi <= -0.3
        assert 0.001 <= m.zeta <= 0.01
    # Effective modal masses cannot exceed the total mass (common practice; Craig and Kurdila,
    # Fundamentals of Structural Dynamics, 2006, modal effective mass).
    assert sum(m.base_participation ** 2 for m in ps.modes) <= ps.base.total_mass


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_example_to_toml_round_trip(path, tmp_path):
    ps = load_parameter_set(path)
    text = ps.to_toml()
    again = parse_parameter_set(tomllib.loads(text), source="round trip")
    assert again == ps
    assert again.content_hash() == ps.content_hash()
    assert again.to_toml() == text  # the writer is a fixed point


def test_undertorqued_build_has_lower_slip_forces_and_more_microslip():
    """Scenario claims of examples/README.md, checked on the files.

    Micro-slip dissipation per cycle D = 4 R A^(chi+3)/((chi+2)(chi+3)) for A <= phimax
    (Segalman, J. Appl. Mech. 72(5), 2005; physics.md sec. 4): same chi, so larger R means more
    dissipation at the same amplitude.
    """
    nom = load_parameter_set(ROOT / "examples" / "tray_nominal.toml")
    low = load_parameter_set(ROOT / "examples" / "tray_undertorqued.toml")
    for a, b in zip(nom.modes, low.modes):
        assert b.joint.Fs < a.joint.Fs
        assert b.joint.chi == a.joint.chi
        assert b.joint.R > 1.1 * a.joint.R
        assert b.Kinf == pytest.approx(a.Kinf, rel=2e-3)  # same tray design, f0 rounded to 0.1 Hz


# ---------------------------------------------------------------------------------------------
# derived quantities against the published relations
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("chi", [-0.9, -0.5, -0.2, 0.0])
@pytest.mark.parametrize("beta", [0.0, 0.2, 3.0])
def test_joint_inverse_relations_match_forward_ones(chi, beta):
    """phimax, R, S must reproduce K_T and F_S through the forward relations
    K_T = R phimax^(chi+1)/(chi+1) + S,  F_S = R phimax^(chi+2)/(chi+2) + S phimax,
    beta = S (chi+1)/(R phimax^(chi+1))  (Segalman, J. Appl. Mech. 72(5):752-760, 2005)."""
    j = JointParams(Fs=3.0, Kt=2.5e5, chi=chi, beta=beta)
    R, S, p = j.R, j.S, j.phimax
    assert R * p ** (chi + 1) / (chi + 1) + S == pytest.approx(2.5e5, rel=1e-12)
    assert R * p ** (chi + 2) / (chi + 2) + S * p == pytest.approx(3.0, rel=1e-12)
    assert S * (chi + 1) / (R * p ** (chi + 1)) == pytest.approx(beta, rel=1e-12, abs=1e-15)


def test_mode_derived_frequencies():
    # omega0^2 = Kinf + K_T (physics.md sec. 5); f_macro = sqrt(Kinf)/(2 pi).
    m = Mode("m", f0=100.0, zeta=0.01, joint=JointParams(1.0, 1.0e5, -0.5, 0.1))
    assert m.omega0 == pytest.approx(628.3185307179587, rel=1e-15)
    assert m.Kinf == pytest.approx(628.3185307179587 ** 2 - 1.0e5, rel=1e-14)
    assert m.f_macro == pytest.approx(math.sqrt(394784.176 - 1.0e5) / (2 * math.pi), rel=1e-9)


def test_f_macro_gives_the_equivalent_kt(tmp_path):
    text = _sub(GOOD, "Kt = 3.0e5", "f_macro = 150.0")
    ps = load_parameter_set(_write(tmp_path, text))
    m = ps.modes[1]
    # Kt = (2 pi f0)^2 - (2 pi f_macro)^2 = 4 pi^2 (200^2 - 150^2) (derived here)
    assert m.joint.Kt == pytest.approx(4 * math.pi ** 2 * (200.0 ** 2 - 150.0 ** 2), rel=1e-14)
    assert m.f_macro == pytest.approx(150.0, rel=1e-13)
    assert "f_macro" not in ps.to_dict()["modes"][1]["joint"]


# ---------------------------------------------------------------------------------------------
# content hash
# ---------------------------------------------------------------------------------------------
def test_hash_same_file_twice(tmp_path):
    p = _write(tmp_path, GOOD)
    a, b = load_parameter_set(p), load_parameter_set(p)
    assert a.content_hash() == b.content_hash()
    assert len(a.content_hash()) == 64 and a.short_hash() == a.content_hash()[:12]


def test_hash_ignores_order_comments_and_number_spelling(tmp_path):
    a = load_parameter_set(_write(tmp_path, GOOD, "a.toml"))
    b = load_parameter_set(_write(tmp_path, REORDERED, "b.toml"))
    assert a == b
    assert a.content_hash() == b.content_hash()
    assert a.source != b.source  # where it came from is not part of the identity


def test_every_shipped_example_has_a_pinned_hash():
    """The content hash's recipe (canonical JSON of to_dict(), sorted keys, floats as
    float.hex(), SHA-256) is checked by the literal hashes of the shipped examples
    (EXAMPLE_HASHES, test_example_hashes_are_unchanged below), not by re-deriving it: FMUs, .ssv
    files and reports carry these hashes as the builds' identity, so a change must show.  Every
    shipped example is pinned there."""
    assert {p.name for p in EXAMPLES} == set(EXAMPLE_HASHES)


def test_hash_is_stable_across_processes(tmp_path):
    p = _write(tmp_path, GOOD)
    code = ("import sys, jointfmu; "
            "print(jointfmu.load_parameter_set(sys.argv[1]).content_hash())")
    seen = set()
    for seed in ("0", "12345"):
        env = dict(os.environ, PYTHONHASHSEED=seed)
        out = subprocess.run([PYTHON, "-c", code, str(p)], capture_output=True, text=True,
                             env=env, check=True)
        seen.add(out.stdout.strip())
    assert seen == {load_parameter_set(p).content_hash()}


@pytest.mark.parametrize("old,new", [
    ("zeta = 0.003", "zeta = 0.0030000000000000005"),   # one ulp-ish change
    ("chi = -0.5", "chi = -0.51"),
    ('build = "T-1"', 'build = "T-2"'),
    ('fitted_by = "test suite"', 'fitted_by = "someone else"'),   # provenance is hashed
    ("shape = [0.7, -0.4, 0.6]", "shape = [0.7, -0.4, 0.61]"),
    ("total_mass = 4.0", "total_mass = 4.5"),
])
def test_hash_changes_with_any_value(tmp_path, old, new):
    a = load_parameter_set(_write(tmp_path, GOOD, "a.toml"))
    b = load_parameter_set(_write(tmp_path, _sub(GOOD, old, new), "b.toml"))
    assert a != b
    assert a.content_hash() != b.content_hash()


def test_negative_zero_hashes_like_zero(tmp_path):
    a = load_parameter_set(_write(tmp_path, GOOD, "a.toml"))
    b = load_parameter_set(_write(tmp_path, _sub(GOOD, "beta = 0.0", "beta = -0.0"), "b.toml"))
    assert a.content_hash() == b.content_hash()


# ---------------------------------------------------------------------------------------------
# TOML writing
# ---------------------------------------------------------------------------------------------
def test_to_toml_escapes_awkward_text(tmp_path):
    ps = load_parameter_set(_write(tmp_path, GOOD))
    odd = 'quote " backslash \\ tab \t newline \n cr \r unicode \u00e9\u2103 \U0001f529'
    ps2 = dataclasses.replace(ps, description=odd, provenance=Provenance(notes=odd))
    back = parse_parameter_set(tomllib.loads(ps2.to_toml()))
    assert back.description == odd and back.provenance.notes == odd
    assert back.content_hash() == ps2.content_hash()


def test_to_toml_without_base_or_points():
    ps = parse_parameter_set({
        "format": "jointfmu-params/1",
        "structure": {"name": "bare", "build": "B"},
        "modes": [{"label": "m", "f0": 50.0, "zeta": 0.0,
                   "joint": {"Fs": 1.0, "Kt": 1.0e4, "chi": 0.0, "beta": 0.0}}],
    })
    text = ps.to_toml()
    assert "[base]" not in text and "[[points]]" not in text and "base_participation" not in text
    assert parse_parameter_set(tomllib.loads(text)) == ps


def test_save_parameter_set_writes_atomically(tmp_path):
    ps = load_parameter_set(_write(tmp_path, GOOD))
    out = save_parameter_set(ps, tmp_path / "saved.toml")
    assert load_parameter_set(out) == ps
    assert sorted(p.name for p in tmp_path.iterdir()) == ["saved.toml", "set.toml"]


# ---------------------------------------------------------------------------------------------
# bad files: one defect each, each with its specific message
# ---------------------------------------------------------------------------------------------
def _drop_base(t):
    return _sub(t, '[base]\ntotal_mass = 4.0\ndirection = "z"\n', "")


def _drop_modes(t):
    return t[:t.index("[[modes]]")] + t[t.index("[[points]]"):]


BAD = [
    # id, edit, substrings expected in one problem line
    ("chi_minus_one", lambda t: _sub(t, "chi = -0.5", "chi = -1.0"),
     ["modes[2] (m_two).joint.chi = -1.0", "must satisfy -1 < chi <= 0"]),
    ("chi_positive", lambda t: _sub(t, "chi = -0.5", "chi = 0.1"),
     ["modes[2] (m_two).joint.chi = 0.1", "must satisfy -1 < chi <= 0"]),
    ("beta_negative", lambda t: _sub(t, "beta = 0.1", "beta = -0.1"),
     ["modes[2] (m_two).joint.beta = -0.1", "must satisfy beta >= 0"]),
    ("Fs_zero", lambda t: _sub(t, "Fs = 5.0", "Fs = 0.0"),
     ["modes[2] (m_two).joint.Fs = 0.0", "must satisfy Fs > 0 N/sqrt(kg)"]),
    # (2 pi 200 Hz)^2 = 1.579e6 1/s^2 (derived here)
    ("Kt_too_large", lambda t: _sub(t, "Kt = 3.0e5", "Kt = 2.0e6"),
     ["modes[2] (m_two).joint.Kt = 2000000.0", "must satisfy 0 < Kt < (2 pi f0)^2 = 1.58e6 1/s^2"]),
    ("Kt_negative", lambda t: _sub(t, "Kt = 3.0e5", "Kt = -1.0"),
     ["modes[2] (m_two).joint.Kt = -1.0", "0 < Kt < (2 pi f0)^2"]),
    ("Kt_and_f_macro", lambda t: _sub(t, "Kt = 3.0e5", "Kt = 3.0e5\nf_macro = 150.0"),
     ["modes[2] (m_two).joint", "give exactly one of Kt (1/s^2) or f_macro (Hz), not both"]),
    ("neither_Kt_nor_f_macro", lambda t: _sub(t, "Kt = 3.0e5\n", ""),
     ["modes[2] (m_two).joint.Kt = None", "give exactly one of Kt (1/s^2) or f_macro (Hz)"]),
    ("f_macro_above_f0", lambda t: _sub(t, "Kt = 3.0e5", "f_macro = 250.0"),
     ["modes[2] (m_two).joint.f_macro = 250.0", "must satisfy 0 < f_macro < f0 = 200 Hz"]),
    ("zeta_one", lambda t: _sub(t, "zeta = 0.003", "zeta = 1.0"),
     ["modes[2] (m_two).zeta = 1.0", "must satisfy 0 <= zeta < 1"]),
    ("zeta_negative", lambda t: _sub(t, "zeta = 0.003", "zeta = -0.001"),
     ["modes[2] (m_two).zeta = -0.001", "must satisfy 0 <= zeta < 1"]),
    ("f0_negative", lambda t: _sub(t, "f0 = 200.0", "f0 = -5.0"),
     ["modes[2] (m_two).f0 = -5.0", "must satisfy f0 > 0 Hz"]),
    ("nan", lambda t: _sub(t, "Fs = 5.0", "Fs = nan"),
     ["modes[2] (m_two).joint.Fs = nan", "must be a finite number in N/sqrt(kg) (not NaN or infinity)"]),
    ("inf", lambda t: _sub(t, "f0 = 200.0", "f0 = inf"),
     ["modes[2] (m_two).f0 = inf", "must be a finite number in Hz (not NaN or infinity)"]),
    ("string_for_number", lambda t: _sub(t, "Fs = 5.0", 'Fs = "5.0"'),
     ["modes[2] (m_two).joint.Fs = '5.0'", "must be a finite number in N/sqrt(kg), got a string"]),
    ("bool_for_number", lambda t: _sub(t, "beta = 0.1", "beta = true"),
     ["modes[2] (m_two).joint.beta = True", "must be a finite number, got a boolean"]),
    ("duplicate_mode_label", lambda t: _sub(t, 'label = "m_three"', 'label = "m_two"'),
     ["modes[3].label = 'm_two'", "must be unique among modes; already used by modes[2]"]),
    ("duplicate_point_label", lambda t: _sub(t, 'label = "tip"', 'label = "drive"'),
     ["points[2].label = 'drive'", "must be unique among points; already used by points[1]"]),
    ("bad_mode_label", lambda t: _sub(t, 'label = "m_two"', 'label = "2nd mode"'),
     ["modes[2].label = '2nd mode'", "must match ^[A-Za-z][A-Za-z0-9_]*$"]),
    ("bad_structure_name", lambda t: _sub(t, 'name = "test_tray"', 'name = "test tray"'),
     ["structure.name = 'test tray'", "must match ^[A-Za-z][A-Za-z0-9_]*$"]),
    ("empty_build", lambda t: _sub(t, 'build = "T-1"', 'build = " "'),
     ["structure.build = ' '", "must be a non-empty string"]),
    ("missing_name", lambda t: _sub(t, 'name = "test_tray"\n', ""),
     ["structure.name = None", "missing required key 'name'"]),
    ("shape_wrong_length", lambda t: _sub(t, "shape = [0.5, 0.3, -0.2]", "shape = [0.5, 0.3]"),
     ["points[1] (drive).shape = [0.5, 0.3]", "must have one coefficient per mode: 3 values, got 2"]),
    ("shape_entry_text", lambda t: _sub(t, "shape = [0.5, 0.3, -0.2]", 'shape = [0.5, "x", -0.2]'),
     ["points[1] (drive).shape[2] = 'x'", "must be a finite number in 1/sqrt(kg), got a string"]),
    ("base_factor_above_one", lambda t: _sub(t, "base_factor = 1.0", "base_factor = 1.5"),
     ["points[2] (tip).base_factor = 1.5", "must satisfy -1 <= base_factor <= 1"]),
    ("bad_role", lambda t: _sub(t, 'role = "output"', 'role = "ouput"'),
     ["points[2] (tip).role = 'ouput'", "must be one of 'input', 'output', 'both'",
      "did you mean 'output'?"]),
    ("unknown_joint_key", lambda t: _sub(t, "Fs = 5.0", "Ft = 5.0"),
     ["modes[2] (m_two).joint.Ft = 5.0", "unknown key in [modes.joint]",
      "allowed keys: Fs, Kt, f_macro, chi, beta", "did you mean 'Fs'"]),
    ("unknown_mode_key", lambda t: _sub(t, "zeta = 0.003", "zeta = 0.003\nzetta = 0.003"),
     ["modes[2] (m_two).zetta = 0.003", "unknown key in [[modes]]", "did you mean 'zeta'?"]),
    ("unknown_base_key", lambda t: _sub(t, 'direction = "z"', 'direction = "z"\ntotal_mas = 4.0'),
     ["base.total_mas = 4.0", "unknown key in [base]", "did you mean 'total_mass'?"]),
    ("unknown_point_key", lambda t: _sub(t, "base_factor = 1.0", "base_factor = 1.0\nshap = 1"),
     ["points[2] (tip).shap = 1", "unknown key in [[points]]", "did you mean 'shape'?"]),
    ("unknown_top_key", lambda t: "fromat = 1\n" + t,
     ["fromat = 1", "unknown key in the top level", "did you mean 'format'?"]),
    ("bad_format", lambda t: _sub(t, 'format = "jointfmu-params/1"', 'format = "jointfmu-params/2"'),
     ["format = 'jointfmu-params/2'", "must be 'jointfmu-params/1'"]),
    ("missing_format", lambda t: _sub(t, 'format = "jointfmu-params/1"\n', ""),
     ["format = None", "missing required key; must be 'jointfmu-params/1'"]),
    # 1.5^2 + 0.8^2 + 0.4^2 = 3.05 kg (derived here)
    ("mass_sum_exceeds_total", lambda t: _sub(t, "total_mass = 4.0", "total_mass = 3.0"),
     ["modes[*].base_participation = 3.05",
      "sum of base_participation^2 (effective modal masses) = 3.05 kg must not exceed "
      "base.total_mass = 3 kg", "Craig and Kurdila"]),
    ("total_mass_zero", lambda t: _sub(t, "total_mass = 4.0", "total_mass = 0.0"),
     ["base.total_mass = 0.0", "must satisfy total_mass > 0 kg"]),
    ("base_participation_without_base", _drop_base,
     ["modes[1] (m_one).base_participation = 1.5", "only allowed when the file has a [base] table"]),
    ("missing_modes", _drop_modes,
     ["modes = None", "at least one [[modes]] entry is required"]),
    ("missing_joint", lambda t: _sub(t, "[modes.joint]\nFs = 5.0\nKt = 3.0e5\nchi = -0.5\nbeta = 0.1\n",
                                     ""),
     ["modes[2] (m_two).joint = None", "missing required table [modes.joint]"]),
]


@pytest.mark.parametrize("edit,expected", [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_bad_file_reports_specific_problem(tmp_path, edit, expected):
    path = _write(tmp_path, edit(GOOD))
    problems = check_parameter_file(path)
    lines = [str(p) for p in problems]
    assert any(all(e in line for e in expected) for line in lines), "\n".join(lines)
    assert all(p.file == str(path) for p in problems)
    with pytest.raises(ParameterError) as info:
        load_parameter_set(path)
    assert [str(p) for p in info.value.problems] == lines  # (str: NaN != NaN)
    assert str(path) in str(info.value)


def test_toml_syntax_error_names_the_line(tmp_path):
    text = _sub(GOOD, "zeta = 0.003", "zeta = = 0.003")
    n = _line_of(text, "zeta = = 0.003")
    problems = check_parameter_file(_write(tmp_path, text))
    assert len(problems) == 1
    msg = str(problems[0])
    assert f"line {n}" in msg and "TOML syntax error" in msg and "zeta = = 0.003" in msg


@pytest.mark.parametrize("kind", ["missing", "directory", "not_utf8"])
def test_unreadable_file_is_a_clear_error(tmp_path, kind):
    if kind == "missing":
        path, words = tmp_path / "nope.toml", "cannot be read: No such file"
    elif kind == "directory":
        path, words = tmp_path, "cannot be read"
    else:
        path, words = tmp_path / "latin1.toml", "not UTF-8"
        path.write_bytes(b'format = "jointfmu-params/1"\n# caf\xe9\n')
    problems = check_parameter_file(path)
    assert len(problems) == 1 and words in str(problems[0])


def test_three_defects_are_all_reported(tmp_path):
    text = _sub(GOOD, "chi = -0.5", "chi = 0.1")
    text = _sub(text, 'label = "tip"', 'label = "drive"')
    text = _sub(text, 'build = "T-1"', 'build = "T-1"\ncolour = "blue"')
    problems = check_parameter_file(_write(tmp_path, text))
    fields = sorted(p.field for p in problems)
    assert fields == ["modes[2] (m_two).joint.chi", "points[2].label", "structure.colour"]
    with pytest.raises(ParameterError, match="3 problems in parameter set"):
        load_parameter_set(tmp_path / "set.toml")


# ---------------------------------------------------------------------------------------------
# dataclasses cannot exist invalid
# ---------------------------------------------------------------------------------------------
def test_dataclasses_reject_bad_values():
    with pytest.raises(ParameterError, match=r"joint\.chi = 0\.5: must satisfy -1 < chi <= 0"):
        JointParams(Fs=1.0, Kt=1.0e4, chi=0.5, beta=0.0)
    with pytest.raises(ParameterError, match=r"mode \(m\)\.joint\.Kt .*\(2 pi f0\)\^2 = 3\.95e3"):
        Mode("m", f0=10.0, zeta=0.01, joint=JointParams(1.0, 1.0e4, -0.5, 0.0))
    with pytest.raises(ParameterError, match="must be one of 'input', 'output', 'both'"):
        Point("p", "sideways", "+z", (1.0,))
    good = Mode("m", f0=100.0, zeta=0.01, joint=JointParams(1.0, 1.0e4, -0.5, 0.0))
    with pytest.raises(ParameterError, match="only allowed when the set has a"):
        ParameterSet("s", "b", "", Provenance(), (dataclasses.replace(good, base_participation=1.0),), ())
    with pytest.raises(ParameterError, match="1 values, got 2"):
        ParameterSet("s", "b", "", Provenance(), (good,), (Point("p", "input", "+z", (1.0, 2.0)),))


def test_dataclasses_are_frozen_and_normalized():
    p = Point("p", "both", "+z", [1, 2])
    assert p.shape == (1.0, 2.0) and isinstance(p.shape[0], float)
    assert p.is_input and p.is_output
    with pytest.raises(dataclasses.FrozenInstanceError):
        p.role = "input"  # type: ignore[misc]


def test_views(tmp_path):
    ps = load_parameter_set(_write(tmp_path, GOOD))
    assert ps.set_id == "test_tray@T-1"
    assert [p.label for p in ps.input_points] == ["drive"]
    assert [p.label for p in ps.output_points] == ["tip"]
    assert ps.to_dict()["modes"][0]["joint"] == {"Fs": 10.0, "Kt": 8.0e4, "chi": -0.4, "beta": 0.2}


# ---------------------------------------------------------------------------------------------
# with_mode_values and check_mode_values
# ---------------------------------------------------------------------------------------------
def test_with_mode_values_valid_override(tmp_path):
    ps = load_parameter_set(_write(tmp_path, GOOD))
    new = ps.with_mode_values({(2, "chi"): -0.3, (1, "zeta"): 0.01})
    assert new.modes[1].joint.chi == -0.3 and new.modes[0].zeta == 0.01
    assert ps.modes[1].joint.chi == -0.5  # the original is untouched
    assert new.content_hash() != ps.content_hash()
    assert new.source == "FMU parameter"
    assert ps.with_mode_values({}).content_hash() == ps.content_hash()


def test_with_mode_values_invalid_override_names_the_field(tmp_path):
    ps = load_parameter_set(_write(tmp_path, GOOD))
    with pytest.raises(ParameterError) as info:
        ps.with_mode_values({(2, "chi"): 0.1, (3, "Ft"): 1.0, (9, "f0"): 5.0})
    text = str(info.value)
    assert "FMU parameter: mode[2].joint.chi = 0.1: must satisfy -1 < chi <= 0" in text
    assert "mode[3].Ft" in text and "did you mean 'Fs'" in text
    assert "mode index must satisfy 1 <= index <= 3" in text


def test_with_mode_values_messages_match_check(tmp_path):
    """The same range text whether the value comes from a file or from an FMU parameter."""
    ps = load_parameter_set(_write(tmp_path, GOOD))
    from_file = check_parameter_file(_write(tmp_path, _sub(GOOD, "Kt = 3.0e5", "Kt = 2.0e6"), "b.toml"))
    with pytest.raises(ParameterError) as info:
        ps.with_mode_values({(2, "Kt"): 2.0e6})
    assert [p.allowed for p in info.value.problems] == [p.allowed for p in from_file]
    assert info.value.problems[0].field == "mode[2].joint.Kt"


def test_with_mode_values_lowering_f0_below_joint_stiffness(tmp_path):
    ps = load_parameter_set(_write(tmp_path, GOOD))
    # Kt = 3e5 needs f0 > sqrt(3e5)/(2 pi) = 87.2 Hz (derived here)
    with pytest.raises(ParameterError, match=r"mode\[2\]\.joint\.Kt"):
        ps.with_mode_values({(2, "f0"): 80.0})
    assert ps.with_mode_values({(2, "f0"): 90.0}).modes[1].Kinf > 0


def test_check_mode_values_collects_everything():
    probs = check_mode_values(4, "m_x", f0=0.0, zeta=1.5, Fs=-1.0, Kt=1.0, chi=-2.0, beta=-1.0,
                              source="here")
    fields = [p.field for p in probs]
    assert fields == ["modes[4] (m_x).f0", "modes[4] (m_x).zeta", "modes[4] (m_x).joint.Fs",
                      "modes[4] (m_x).joint.chi", "modes[4] (m_x).joint.beta"]
    assert check_mode_values(1, "ok", 100.0, 0.01, 1.0, 1.0e5, -0.5, 0.0, "here") == []


# ---------------------------------------------------------------------------------------------
# jointfmu check
# ---------------------------------------------------------------------------------------------
def test_cli_check_ok(tmp_path, capsys):
    path = _write(tmp_path, GOOD)
    short = load_parameter_set(path).short_hash()
    assert cli.main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert out.strip() == f"OK  {path}: test_tray@T-1, 3 modes, 2 points, hash {short}"


def test_cli_check_reports_every_problem(tmp_path, capsys):
    good = _write(tmp_path, GOOD, "good.toml")
    text = _sub(_sub(GOOD, "chi = -0.5", "chi = 0.1"), "beta = 0.1", "beta = -0.1")
    bad = _write(tmp_path, text, "bad.toml")
    assert cli.main(["check", str(good), str(bad)]) == 1
    out = capsys.readouterr().out.splitlines()
    assert out[0].startswith(f"OK  {good}: ")
    assert out[1] == f"FAIL {bad}: 2 problems"
    assert any("modes[2] (m_two).joint.chi = 0.1: must satisfy -1 < chi <= 0" in line for line in out)
    assert any("modes[2] (m_two).joint.beta = -0.1: must satisfy beta >= 0" in line for line in out)


@pytest.mark.parametrize("argv", [[], ["check"], ["no-such-command"], ["check", "--bogus", "x"]])
def test_cli_usage_errors_exit_2(argv, capsys):
    assert cli.main(argv) == 2
    assert "usage" in capsys.readouterr().err


def test_cli_missing_file_exits_1(tmp_path, capsys):
    assert cli.main(["check", str(tmp_path / "absent.toml")]) == 1
    assert "cannot be read" in capsys.readouterr().out


def test_cli_error_is_clean(monkeypatch, capsys):
    def boom(path):
        raise InputError("the input was bad, allowed: good input")
    monkeypatch.setattr(cli, "check_parameter_file", boom)
    assert cli.main(["check", "x.toml"]) == 1
    err = capsys.readouterr().err
    assert err.strip() == "jointfmu: error: the input was bad, allowed: good input"


def test_python_dash_m_jointfmu(tmp_path):
    good = _write(tmp_path, GOOD, "good.toml")
    bad = _write(tmp_path, _sub(GOOD, "zeta = 0.003", "zeta = 1.0"), "bad.toml")
    ok = subprocess.run([PYTHON, "-m", "jointfmu", "check", str(good)], capture_output=True,
                        text=True)
    assert ok.returncode == 0 and ok.stdout.startswith("OK  ")
    fail = subprocess.run([PYTHON, "-m", "jointfmu", "check", str(bad)], capture_output=True,
                          text=True)
    assert fail.returncode == 1
    assert "modes[2] (m_two).zeta = 1.0: must satisfy 0 <= zeta < 1" in fail.stdout
    assert "Traceback" not in fail.stderr


def test_unquoted_toml_date_is_kept_as_text(tmp_path):
    # TOML 1.0 reads an unquoted 2026-10-14 as a local date; provenance is free text.
    text = _sub(GOOD, 'date = "2026-10-14"', "date = 2026-10-14")
    a = load_parameter_set(_write(tmp_path, text, "a.toml"))
    b = load_parameter_set(_write(tmp_path, GOOD, "b.toml"))
    assert a.provenance.date == "2026-10-14"
    assert a.content_hash() == b.content_hash()


# ---------------------------------------------------------------------------------------------
# points[].test_node (optional; maps Universal File Format records to points)
# ---------------------------------------------------------------------------------------------
#: Content hashes of the shipped examples, pinned: adding the optional test_node to the format
#: must not change the hash of a file that does not use it.
EXAMPLE_HASHES = {
    "tray_nominal.toml": "0775cca76afb2e52efc578e1fcf8018cde53bac3a572d0e6d5253e5c0d892859",
    "tray_undertorqued.toml": "9ebc2bd3ede6b233d4da5fd79d0b5d08627865fe4a82b07ac38bf1888eed04fb",
    "tray_worn.toml": "919b8aff6e8f9d7ff1c1bd5e766d199c75fc6ff8f29a3f1282a990ab3d3f156a",
}

WITH_NODES = _sub(_sub(GOOD, 'shape = [0.5, 0.3, -0.2]\n', 'shape = [0.5, 0.3, -0.2]\ntest_node = 7\n'),
                  "base_factor = 1.0\n", "base_factor = 1.0\ntest_node = 12\n")


@pytest.mark.parametrize("name", sorted(EXAMPLE_HASHES))
def test_example_hashes_are_unchanged(name):
    assert load_parameter_set(ROOT / "examples" / name).content_hash() == EXAMPLE_HASHES[name]


def test_test_node_is_read_and_written_back(tmp_path):
    ps = load_parameter_set(_write(tmp_path, WITH_NODES))
    assert [p.test_node for p in ps.points] == [7, 12]
    assert isinstance(ps.points[0].test_node, int)
    text = ps.to_toml()
    assert "test_node = 7\n" in text and "test_node = 12\n" in text
    again = parse_parameter_set(tomllib.loads(text), source="round trip")
    assert again == ps and again.content_hash() == ps.content_hash()
    assert again.to_toml() == text


def test_test_node_changes_the_hash_only_when_present(tmp_path):
    plain = load_parameter_set(_write(tmp_path, GOOD, "a.toml"))
    nodes = load_parameter_set(_write(tmp_path, WITH_NODES, "b.toml"))
    assert "test_node" not in plain.to_dict()["points"][0]
    assert "test_node" not in plain.to_toml()
    assert nodes.content_hash() != plain.content_hash()  # a node number is part of the identity
    stripped = dataclasses.replace(nodes, points=tuple(dataclasses.replace(p, test_node=None)
                                                       for p in nodes.points))
    assert stripped.content_hash() == plain.content_hash()


BAD_NODES = [
    ("zero", "test_node = 7", "test_node = 0",
     ["points[1] (drive).test_node = 0", "must be a positive integer", ">= 1"]),
    ("negative", "test_node = 7", "test_node = -3",
     ["points[1] (drive).test_node = -3", "must be a positive integer"]),
    ("float", "test_node = 7", "test_node = 7.0",
     ["points[1] (drive).test_node = 7.0", "must be a positive integer", "got a float"]),
    ("text", "test_node = 7", 'test_node = "7"',
     ["points[1] (drive).test_node = '7'", "must be a positive integer", "got a string"]),
    ("bool", "test_node = 7", "test_node = true",
     ["points[1] (drive).test_node = True", "got a boolean"]),
    ("duplicate", "test_node = 12", "test_node = 7",
     ["points[2] (tip).test_node = 7", "must be unique among points; already used by points[1] (drive)"]),
    ("misspelt", "test_node = 7", "testnode = 7",
     ["points[1] (drive).testnode = 7", "unknown key in [[points]]", "did you mean 'test_node'?"]),
]


@pytest.mark.parametrize("old,new,expected", [b[1:] for b in BAD_NODES], ids=[b[0] for b in BAD_NODES])
def test_bad_test_node_is_reported(tmp_path, old, new, expected):
    path = _write(tmp_path, _sub(WITH_NODES, old, new))
    lines = [str(p) for p in check_parameter_file(path)]
    assert any(all(e in line for e in expected) for line in lines), "\n".join(lines)


def test_point_dataclass_checks_test_node():
    assert Point("p", "output", "+z", (1.0,), test_node=3).test_node == 3
    with pytest.raises(ParameterError, match=r"point \(p\)\.test_node = 0: must be a positive integer"):
        Point("p", "output", "+z", (1.0,), test_node=0)
    good = Mode("m", f0=100.0, zeta=0.01, joint=JointParams(1.0, 1.0e4, -0.5, 0.0))
    with pytest.raises(ParameterError, match=r"test_node = 4: must be unique among points"):
        ParameterSet("s", "b", "", Provenance(), (good,),
                     (Point("p", "input", "+z", (1.0,), test_node=4),
                      Point("q", "output", "+z", (1.0,), test_node=4)))


def test_cli_check_accepts_test_node(tmp_path, capsys):
    path = _write(tmp_path, WITH_NODES)
    assert cli.main(["check", str(path)]) == 0
    assert capsys.readouterr().out.startswith("OK  ")


# ------------------------------------------------------- text that goes into XML (FMU, .ssv)
# XML 1.0 (Fifth Edition) sec. 2.2, production [2]: a document holds only tab, line feed, carriage
# return, U+0020..U+D7FF, U+E000..U+FFFD and U+10000..U+10FFFF.  Each free text of a parameter set
# reaches modelDescription.xml or an .ssv, so `check` refuses the rest, naming the field.
@pytest.mark.parametrize("field,text,code", [
    ("structure.build", "SN-\x07", "U+0007"),
    ("structure.build", "SN-1\n", "U+000A"),           # one line: it names files and instances
    ("structure.description", "tray\x1b[1m", "U+001B"),
    ("structure.description", "tray \x00", "U+0000"),
    ("structure.description", "tray \ud800", "U+D800"),  # a surrogate
    ("structure.description", "tray \uffff", "U+FFFF"),
    ("structure.description", "tray \x7f", "U+007F"),
    ("provenance.fitted_by", "lab\tteam", "U+0009"),
    ("provenance.notes", "x\x0cy", "U+000C"),
    ("base.direction", "z\x08", "U+0008"),
    ("points[1] (drive).direction", "+z\r", "U+000D"),
])
def test_text_that_xml_cannot_hold_is_refused_naming_the_field(tmp_path, field, text, code):
    d = tomllib.loads(GOOD)
    if field.startswith("points"):
        d["points"][0]["direction"] = text
    else:
        table, key = field.split(".")
        d[table][key] = text
    with pytest.raises(ParameterError) as exc:
        parse_parameter_set(d, "f.toml")
    (p,) = exc.value.problems
    assert p.field == field and p.value == text
    assert f"is {code}" in p.allowed and "XML 1.0 sec. 2.2" in p.allowed


@pytest.mark.parametrize("field", ["structure.description", "provenance.notes",
                                   "provenance.source_data"])
def test_line_breaks_and_tabs_allowed_in_free_text(field):
    d = tomllib.loads(GOOD)
    table, key = field.split(".")
    d[table][key] = "first line\n\tsecond line\r\nthird, caf\u00e9 \u2103 \U0001f529"
    ps = parse_parameter_set(d)
    assert getattr(ps if table == "structure" else ps.provenance, key) == d[table][key]


def test_dataclass_refuses_control_characters():
    with pytest.raises(ParameterError, match=r"provenance\.fitted_by = 'a\\x07': character 2 is "
                                             r"U\+0007"):
        Provenance(fitted_by="a\x07")


def test_cli_check_names_a_control_character_in_build(tmp_path, capsys):
    bad = _write(tmp_path, _sub(GOOD, 'build = "T-1"', 'build = "T-\\u0007"'), "bad.toml")
    assert cli.main(["check", str(bad)]) == 1
    out = capsys.readouterr().out
    assert "structure.build = 'T-\\x07': character 3 is U+0007" in out


# ------------------------------------------------------------------- the rules table
def test_rules_table_states_each_range_once():
    """params/rules.py: the range text of each mode value is the one the checks, the FMU
    parameter descriptions and the missing-key messages use (issue 9: one rules table)."""
    from jointfmu.params.rules import MODE_VALUE_RULES
    from jointfmu.fmu.variables import PARAMETER_FIELDS

    expected = {"f0": "f0 > 0", "zeta": "0 <= zeta < 1", "Fs": "Fs > 0",
                "Kt": "0 < Kt < (2 pi f0)^2", "chi": "-1 < chi <= 0", "beta": "beta >= 0"}
    assert {r.name: r.rule() for r in MODE_VALUE_RULES} == expected
    assert tuple(r.name for r in MODE_VALUE_RULES) == ("f0", "zeta", "Fs", "Kt", "chi", "beta")
    for r in MODE_VALUE_RULES:
        assert PARAMETER_FIELDS[r.name] == (r.unit, r.description)
        assert r.description.endswith(expected[r.name]) and r.source


@pytest.mark.parametrize("name,value,upper,allowed", [
    # the boundaries themselves: open and closed ends
    ("chi", -1.0, None, "must satisfy -1 < chi <= 0"),
    ("chi", 0.0, None, None),
    ("zeta", 0.0, None, None),
    ("zeta", 1.0, None, "must satisfy 0 <= zeta < 1"),
    ("beta", 0.0, None, None),
    ("Fs", 0.0, None, "must satisfy Fs > 0 N/sqrt(kg)"),
    ("Kt", 2.0e6, 1.579e6, "must satisfy 0 < Kt < (2 pi f0)^2 = 1.58e6 1/s^2"),
    ("Kt", 2.0e6, None, None),                    # the bound set by f0 is unknown: not checked
    ("Kt", -1.0, None, "must satisfy Kt > 0 1/s^2"),
    ("f0", 0.0, None, "must satisfy f0 > 0 Hz"),
])
def test_rule_boundaries(name, value, upper, allowed):
    from jointfmu.params.rules import RULES_BY_NAME

    got = RULES_BY_NAME[name].violation(value, upper)
    assert (got[0] if got else None) == allowed


# ------------------------------------------------------------------------------ names
@pytest.mark.parametrize("name,kind,quantity,mode,label", [
    ("mode[1].f0", "mode_value", "f0", 1, None),
    ("mode[12].joint.chi", "mode_value", "chi", 12, None),
    ("mode[3].q", "mode", "q", 3, None),
    ("mode[2].joint_force", "mode", "joint_force", 2, None),
    ("point.psu_foot.a", "point", "a", None, "psu_foot"),
    ("point.shaker.force", "point", "force", None, "shaker"),
    ("base.acceleration", "base", "acceleration", None, None),
    ("energy.joint", "energy", "joint", None, None),
    ("steps_per_period", "setting", "steps_per_period", None, None),
])
def test_names_parse_what_they_format(name, kind, quantity, mode, label):
    from jointfmu.params import names

    got = names.parse_name(name)
    assert (got.kind, got.quantity, got.mode, got.label) == (kind, quantity, mode, label)
    again = {"mode_value": lambda: names.mode_value_name(mode, quantity),
             "mode": lambda: names.mode_name(mode, quantity),
             "point": lambda: names.point_name(label, quantity),
             "energy": lambda: names.energy_name(quantity)}.get(kind, lambda: name)()
    assert again == name


@pytest.mark.parametrize("name", ["mode[0].f0", "mode[1].Fs", "mode[1].joint.f0", "mode[x].q",
                                  "point.1tip.a", "point.tip.acc", "base.velocity", "mode[1]",
                                  "point.tip", "energy.stored", " mode[1].q", "mode[01].q"])
def test_names_refuse_what_is_not_a_name(name):
    from jointfmu.params import names

    assert names.parse_name(name) is None


def test_a_discrete_joint_file_given_as_parameter_file_is_one_line():
    """A jointfmu file of another format (here the discrete-joint tray) is named once, with the
    command that writes its parameter file, not key by key."""
    with pytest.raises(ParameterError) as exc:
        load_parameter_set(ROOT / "examples" / "tray_lumped.toml")
    assert len(exc.value.problems) == 1
    p = exc.value.problems[0]
    assert p.field == "format" and p.value == "jointfmu-lumped/1"
    assert "jointfmu modes FILE -o TEMPLATE.toml" in str(exc.value)
