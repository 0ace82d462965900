"""SSP parameter values: ``jointfmu export-ssv`` and ``jointfmu simulate FMU --parameters X.ssv``.

One FMU serves every build of a structure: the builds in ``examples/`` share mode shapes, base
participation and points and differ only in the fitted mode values (f0, zeta, Fs, Kt, chi,
beta), which are FMU parameters (FMI 2.0 sec. 2.2.7, causality "parameter", variability
"fixed", settable before initialization).  The file format is checked with the SSP 1.0 schema
``SystemStructureParameterValues.xsd`` and parsed with ``fmpy.ssp.ssd.read_ssv`` (both from
fmpy, outside this project); ranges are those of ``jointfmu check`` (Segalman, "A
four-parameter Iwan model for lap-type joints", J. Appl. Mech. 72(5), 2005: -1 < chi).

FMUs are built once per session into a temporary folder.
"""
from __future__ import annotations

import csv
from pathlib import Path
from xml.etree import ElementTree as ET

import numpy as np
import pytest

pytest.importorskip("fmpy")
pytest.importorskip("pythonfmu")

from jointfmu.physics import reference  # noqa: E402
from jointfmu.fmu.ssv import parameter_values_ssv, read_parameter_values
from jointfmu.cli import main  # noqa: E402
from jointfmu.errors import InputError, ParameterError  # noqa: E402
from jointfmu.params import check_parameter_file, load_parameter_set  # noqa: E402

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
NOMINAL = EXAMPLES / "tray_nominal.toml"
WORN = EXAMPLES / "tray_worn.toml"
SSV = "{http://ssp-standard.org/SSP1/SystemStructureParameterValues}"


@pytest.fixture(scope="session")
def ssv_fmus(example_fmus):
    return {name: example_fmus[name].path for name in ("tray_nominal", "tray_worn")}


@pytest.fixture(scope="session")
def worn_ssv(tmp_path_factory):
    out = tmp_path_factory.mktemp("ssv") / "worn.ssv"
    assert main(["export-ssv", str(WORN), "-o", str(out)]) == 0
    return out


@pytest.fixture(scope="session")
def load_csv(tmp_path_factory):
    """Point force at the shaker and base acceleration, large enough for micro- and macro-slip
    (the joint values must matter), held over 2e-4 s steps."""
    dt = 2e-4
    t = np.arange(401) * dt
    F = 60.0 * np.sin(2 * np.pi * 70.0 * t) + 25.0 * np.sin(2 * np.pi * 131.0 * t)
    a = 30.0 * np.sin(2 * np.pi * 125.0 * t)
    path = tmp_path_factory.mktemp("ssv_in") / "in.csv"
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["time", "point.shaker.force", "base.acceleration"])
        w.writerows([repr(float(x)) for x in row] for row in zip(t, F, a))
    return path, t, F, a


def _read(path):
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    return rows[0], np.array(rows[1:], dtype=float)


def _simulate(fmu, inp, out, *extra):
    code = main(["simulate", str(fmu), "--input", str(inp), "--output", str(out),
                 "--step", "2e-4", *extra])
    assert code == 0
    return _read(out)


def _compared_columns(header):
    return [c for c in header if c.endswith(".q") or (c.startswith("point.") and c.endswith(".a"))]


def _edited_ssv(src: Path, dest: Path, name: str, value=None, new_name=None, unit=None) -> Path:
    """A copy of an .ssv with one parameter's value, name or unit changed."""
    tree = ET.ElementTree(ET.fromstring(src.read_bytes()))
    p = next(p for p in tree.getroot().iter(SSV + "Parameter") if p.get("name") == name)
    real = p.find(SSV + "Real")
    if value is not None:
        real.set("value", value)
    if new_name is not None:
        p.set("name", new_name)
    if unit is not None:
        real.set("unit", unit)
    tree.write(dest, encoding="UTF-8", xml_declaration=True)
    return dest


# ------------------------------------------------------------------------------ round trip
def test_examples_share_shapes_and_base():
    """Precondition of the round trip: only the mode values differ between the two builds."""
    nom, worn = load_parameter_set(NOMINAL), load_parameter_set(WORN)
    assert [p.shape for p in nom.points] == [p.shape for p in worn.points]
    assert [m.base_participation for m in nom.modes] == [m.base_participation for m in worn.modes]
    assert nom.base == worn.base


def test_read_agrees_with_fmpy_and_exact(worn_ssv, ssv_fmus):
    """fmpy's SSP reader (schema-validating) sees the same names and values; every value is the
    worn build's double exactly (repr round-trips a double, xs:double parses back to it)."""
    from fmpy.ssp.ssd import read_ssv

    ours = read_parameter_values(worn_ssv, ssv_fmus["tray_nominal"])
    theirs = {p.name: float(p.value) for p in read_ssv(str(worn_ssv), validate=True).parameters}
    assert ours == theirs
    worn = load_parameter_set(WORN)
    for i, m in enumerate(worn.modes, 1):
        assert ours[f"mode[{i}].f0"] == m.f0 and ours[f"mode[{i}].zeta"] == m.zeta
        assert ours[f"mode[{i}].joint.Kt"] == m.joint.Kt and ours[f"mode[{i}].joint.chi"] == m.joint.chi
        assert ours[f"mode[{i}].joint.Fs"] == m.joint.Fs and ours[f"mode[{i}].joint.beta"] == m.joint.beta


def test_round_trip_worn_values_on_nominal_fmu(ssv_fmus, worn_ssv, load_csv, tmp_path, capsys):
    """The nominal build's FMU with the worn build's .ssv reproduces the worn build's own FMU.

    Tolerance: bit-equal.  The slave turns the start values into a parameter set with
    ``with_mode_values``; with the same doubles (exact through the .ssv, see above) and the same
    shapes, base participation and points, that set is the worn set value for value, and the
    same deterministic code then runs on the same held inputs; the CSV writes doubles with repr.
    Any difference means a value was lost or altered on the way, so no tolerance is allowed.
    """
    inp = load_csv[0]
    h_applied, applied = _simulate(ssv_fmus["tray_nominal"], inp, tmp_path / "a.csv",
                                   "--parameters", str(worn_ssv))
    assert "24 parameter values from" in capsys.readouterr().out
    h_worn, own = _simulate(ssv_fmus["tray_worn"], inp, tmp_path / "w.csv")
    h_nom, nominal = _simulate(ssv_fmus["tray_nominal"], inp, tmp_path / "n.csv")
    assert h_applied == h_worn == h_nom
    cols = [h_worn.index(c) for c in _compared_columns(h_worn)]
    worn = load_parameter_set(WORN)
    assert len(cols) == len(worn.modes) + len(worn.output_points)
    assert np.array_equal(applied[:, cols], own[:, cols])
    assert np.array_equal(applied, own)                       # every output, not only those
    # the check can fail: without the .ssv the nominal FMU answers differently (by > 1 %)
    q = [h_worn.index(f"mode[{i}].q") for i in range(1, 5)]
    assert np.abs(nominal[:, q] - own[:, q]).max() > 1e-2 * np.abs(own[:, q]).max()


def test_round_trip_matches_scipy_reference(ssv_fmus, worn_ssv, load_csv, tmp_path):
    """The applied run against the SciPy reference integration of the worn set (DOP853 branch
    by branch), with the modal force formed here: f = phi_shaker F - Gamma a_base
    (mass-normalized modal equations of a base-mounted structure, common practice); 1e-3 of
    peak, the FMU's acceptance band."""
    inp, t, F, a = load_csv
    header, data = _simulate(ssv_fmus["tray_nominal"], inp, tmp_path / "a.csv",
                             "--parameters", str(worn_ssv))
    ps = load_parameter_set(WORN)
    shaker = next(p for p in ps.input_points if p.label == "shaker")
    gamma = np.array([m.base_participation for m in ps.modes])
    f = np.outer(F, shaker.shape) - np.outer(a, gamma)
    ref = reference.simulate(ps, t, f[:-1])
    for i in range(len(ps.modes)):
        q = data[:, header.index(f"mode[{i + 1}].q")]
        assert np.abs(q - ref["q"][:, i]).max() <= 1e-3 * np.abs(ref["q"][:, i]).max(), i


# --------------------------------------------------------------------------------- bad files
def _fails_and_keeps_old_output(fmu, inp, ssv, tmp_path, capsys) -> str:
    """simulate with a bad .ssv: exit 1, the previous output CSV untouched, no temp file."""
    out = tmp_path / "out.csv"
    out.write_text("previous run\n")
    before = sorted(p.name for p in tmp_path.iterdir())
    assert main(["simulate", str(fmu), "--input", str(inp), "--output", str(out),
                 "--parameters", str(ssv)]) == 1
    assert out.read_text() == "previous run\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    err = capsys.readouterr().err
    assert str(ssv) in err
    return err


def test_out_of_range_chi_gets_check_message(ssv_fmus, worn_ssv, load_csv, tmp_path, capsys):
    bad = _edited_ssv(worn_ssv, tmp_path / "bad.ssv", "mode[2].joint.chi", value="0.3")
    err = _fails_and_keeps_old_output(ssv_fmus["tray_nominal"], load_csv[0], bad, tmp_path, capsys)
    # what `jointfmu check` says of the same value in a parameter file
    toml = tmp_path / "bad.toml"
    toml.write_text(WORN.read_text().replace("chi = -0.36", "chi = 0.3", 1))
    problems = check_parameter_file(toml)
    assert len(problems) == 1 and "-1 < chi <= 0" in problems[0].allowed
    assert f"mode[2].joint.chi = 0.3: {problems[0].allowed}" in err
    # no output left behind at all when there was none before
    fresh = tmp_path / "fresh" / "o.csv"
    assert main(["simulate", str(ssv_fmus["tray_nominal"]), "--input", str(load_csv[0]),
                 "--output", str(fresh), "--parameters", str(bad)]) == 1
    assert not fresh.exists()


def test_unknown_name_refused_with_did_you_mean(ssv_fmus, worn_ssv, load_csv, tmp_path, capsys):
    bad = _edited_ssv(worn_ssv, tmp_path / "bad.ssv", "mode[2].joint.chi",
                      new_name="mode[2].joint.chii")
    err = _fails_and_keeps_old_output(ssv_fmus["tray_nominal"], load_csv[0], bad, tmp_path, capsys)
    assert "mode[2].joint.chii = " in err
    assert "did you mean 'mode[2].joint.chi'?" in err
    assert "mode[i].joint.chi" in err and "i = 1..4" in err


def test_mode_index_beyond_the_structure_refused(ssv_fmus, worn_ssv, tmp_path):
    bad = _edited_ssv(worn_ssv, tmp_path / "bad.ssv", "mode[4].f0", new_name="mode[5].f0")
    with pytest.raises(ParameterError, match=r"mode\[5\]\.f0 = .*i = 1\.\.4"):
        read_parameter_values(bad, ssv_fmus["tray_nominal"])


@pytest.mark.parametrize("value", ["INF", "-INF", "NaN"])
def test_non_finite_value_refused(ssv_fmus, worn_ssv, tmp_path, value):
    """xs:double admits INF, -INF and NaN (XML Schema Part 2, 3.2.5), so the schema passes them."""
    bad = _edited_ssv(worn_ssv, tmp_path / "bad.ssv", "mode[1].joint.Fs", value=value)
    with pytest.raises(ParameterError, match=rf"mode\[1\]\.joint\.Fs = '{value}': allowed are "
                                             "finite numbers"):
        read_parameter_values(bad, ssv_fmus["tray_nominal"])


def test_other_unit_refused(worn_ssv, tmp_path):
    bad = _edited_ssv(worn_ssv, tmp_path / "bad.ssv", "mode[1].f0", unit="rad/s")
    with pytest.raises(ParameterError, match=r"mode\[1\]\.f0 = .*unit 'rad/s': allowed is 'Hz'"):
        read_parameter_values(bad, NOMINAL)


@pytest.mark.parametrize("text,needle", [
    ("time,mode[1].f0\n0,68\n", "not well-formed XML"),
    ('<?xml version="1.0"?>\n<fmiModelDescription fmiVersion="2.0"/>\n', "root element"),
    # right root, wrong content: SSP 1.0 needs ssv:Parameters before ssv:Units
    ('<ssv:ParameterSet xmlns:ssv="http://ssp-standard.org/SSP1/SystemStructureParameterValues" '
     'version="1.0" name="x"><ssv:Units/></ssv:ParameterSet>', "SSP 1.0 schema"),
    ('<ssv:ParameterSet xmlns:ssv="http://ssp-standard.org/SSP1/SystemStructureParameterValues" '
     'version="1.0" name="x"><ssv:Parameters><ssv:Parameter name="mode[1].f0">'
     '<ssv:Real value="68 Hz"/></ssv:Parameter></ssv:Parameters></ssv:ParameterSet>', "xs:double"),
])
def test_not_ssp_refused(ssv_fmus, load_csv, tmp_path, capsys, text, needle):
    bad = tmp_path / "bad.ssv"
    bad.write_text(text)
    err = _fails_and_keeps_old_output(ssv_fmus["tray_nominal"], load_csv[0], bad, tmp_path, capsys)
    assert "is not an SSP 1.0 parameter-values file" in err and needle in err
    with pytest.raises(InputError, match=needle):
        read_parameter_values(bad)


def test_every_problem_listed_once(worn_ssv, tmp_path):
    """Collect every problem, then raise once (house rule): two bad values, two entries."""
    first = _edited_ssv(worn_ssv, tmp_path / "one.ssv", "mode[1].zeta", value="1.5")
    bad = _edited_ssv(first, tmp_path / "two.ssv", "mode[3].joint.beta", value="-0.1")
    with pytest.raises(ParameterError) as exc:
        read_parameter_values(bad, NOMINAL)
    assert [p.field for p in exc.value.problems] == ["mode[1].zeta", "mode[3].joint.beta"]
    assert all(p.file == str(bad) for p in exc.value.problems)


def test_without_a_structure_complete_modes_are_range_checked(worn_ssv, tmp_path):
    assert len(read_parameter_values(worn_ssv)) == 24
    bad = _edited_ssv(worn_ssv, tmp_path / "bad.ssv", "mode[2].joint.chi", value="-1")
    with pytest.raises(ParameterError, match=r"mode\[2\]\.joint\.chi = -1\.0: .*-1 < chi <= 0"):
        read_parameter_values(bad)


def test_exported_bytes_are_what_the_reader_reads(tmp_path):
    """parameter_values_ssv and the file export-ssv writes are the same bytes."""
    out = tmp_path / "w.ssv"
    assert main(["export-ssv", str(WORN), "-o", str(out)]) == 0
    assert out.read_bytes() == parameter_values_ssv(load_parameter_set(WORN))


def test_info_shows_the_modes_with_the_ssv_values(ssv_fmus, worn_ssv, tmp_path, capsys):
    assert main(["info", str(ssv_fmus["tray_nominal"]), "--parameters", str(worn_ssv)]) == 0
    out = capsys.readouterr().out
    nom = load_parameter_set(NOMINAL)
    assert nom.set_id in out and f"mode values:       from {worn_ssv}" in out
    rows = [ln.split() for ln in out.splitlines() if ln.strip().startswith(("1 tray", "4 tray"))]
    worn = load_parameter_set(WORN)
    assert [float(r[2]) for r in rows] == [worn.modes[0].f0, worn.modes[3].f0]   # 65.6, 406.2
    bad = _edited_ssv(worn_ssv, tmp_path / "bad.ssv", "mode[2].joint.chi", value="0.3")
    assert main(["info", str(ssv_fmus["tray_nominal"]), "--parameters", str(bad)]) == 1
    assert "mode[2].joint.chi = 0.3: must satisfy -1 < chi <= 0" in capsys.readouterr().err
