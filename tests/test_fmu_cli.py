"""``jointfmu build``, ``info`` and ``simulate``: outputs, default paths, atomic writes, bad input.

The simulated CSV is checked against the SciPy reference (``jointfmu.physics.reference``) with the modal
force of the held point force formed here: f = phi_shaker F (mass-normalized modal equations,
common practice).
"""
from __future__ import annotations

import csv
import os
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("fmpy")
pytest.importorskip("pythonfmu")

from jointfmu.fmu import build as jbuild  # noqa: E402
from jointfmu.physics import reference  # noqa: E402
from jointfmu.cli import main  # noqa: E402
from jointfmu.errors import BuildError  # noqa: E402
from jointfmu.params import load_parameter_set  # noqa: E402

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
NOMINAL = EXAMPLES / "tray_nominal.toml"


@pytest.fixture(scope="module")
def nominal_fmu(example_fmus):
    return example_fmus["tray_nominal"].path  # the build command itself is tested below


def test_build_prints_where_and_default_path_outside_repo(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["build", str(NOMINAL)]) == 0
    ps = load_parameter_set(NOMINAL)
    expected = tmp_path / "build" / f"{ps.name}_sn-0002.fmu"
    assert expected.is_file()
    out = capsys.readouterr().out
    assert str(expected) in out
    assert "joint kernel: " in out      # compiled here, not at the first doStep (or why not)
    assert [p.name for p in expected.parent.iterdir()] == [expected.name]   # no temp files
    mask = os.umask(0)
    os.umask(mask)
    assert expected.stat().st_mode & 0o777 == 0o666 & ~mask     # not the temp file's 0600


def test_default_path_inside_repo_is_repo_build(tmp_path):
    repo = tmp_path / "repo"
    (repo / "sub" / "dir").mkdir(parents=True)
    (repo / "pyproject.toml").write_text('[project]\nname = "jointfmu"\n')
    ps = load_parameter_set(NOMINAL)
    assert jbuild.default_output_path(ps, repo / "sub" / "dir") == \
        repo / "build" / "avionics_tray_sn-0002.fmu"


def test_failed_build_leaves_nothing_and_keeps_old_file(tmp_path, monkeypatch):
    out = tmp_path / "x.fmu"
    out.write_bytes(b"previous build")

    def broken(*a, **k):
        raise OSError("disk full (simulated)")
    monkeypatch.setattr(jbuild, "_complete_fmu", broken)
    with pytest.raises(BuildError, match="disk full"):
        jbuild.build_fmu(NOMINAL, out)
    assert out.read_bytes() == b"previous build"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["x.fmu"]


def test_build_bad_params_exit_1_with_check_message(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text(NOMINAL.read_text().replace("chi = -0.45", "chi = 0.3", 1))
    assert main(["build", str(bad), "-o", str(tmp_path / "b.fmu")]) == 1
    err = capsys.readouterr().err
    assert "chi" in err and "-1 < chi <= 0" in err
    assert not (tmp_path / "b.fmu").exists()


def test_info_lists_identity_modes_io_and_requirements(nominal_fmu, capsys):
    ps = load_parameter_set(NOMINAL)
    assert main(["info", str(nominal_fmu)]) == 0
    out = capsys.readouterr().out
    assert ps.set_id in out and ps.content_hash() in out
    for m in ps.modes:
        assert m.label in out
    assert "point.shaker.force" in out and "[N]" in out and "point.tip.a" in out
    assert "numpy" in out and "scipy" in out


def test_info_of_non_fmu_is_clear_error(tmp_path, capsys):
    f = tmp_path / "not.fmu"
    f.write_text("hello")
    assert main(["info", str(f)]) == 1
    assert "not a readable FMU" in capsys.readouterr().err


def _write_csv(path, header, rows):
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(header)
        w.writerows(rows)


def test_simulate_csv_matches_reference(nominal_fmu, tmp_path):
    ps = load_parameter_set(NOMINAL)
    dt = 2e-4
    t = np.arange(301) * dt
    F = 25.0 * np.sin(2 * np.pi * 130.0 * t)
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "point.shaker.force"], [[repr(float(a)), repr(float(b))] for a, b in zip(t, F)])
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp),
                 "--step", repr(dt)]) == 0
    with open(outp) as f:
        rows = list(csv.reader(f))
    header = rows[0]
    data = np.array(rows[1:], dtype=float)
    assert header[0] == "time" and "energy.joint" in header and "point.tip.x" in header
    assert np.allclose(data[:, 0], t)
    shaker = next(p for p in ps.input_points if p.label == "shaker")
    ref = reference.simulate(ps, t, np.outer(F, shaker.shape)[:-1])
    for i in range(len(ps.modes)):
        q = data[:, header.index(f"mode[{i + 1}].q")]
        peak = np.abs(ref["q"][:, i]).max()
        assert np.abs(q - ref["q"][:, i]).max() <= 1e-3 * peak


def test_simulate_from_params_holds_inputs_between_rows(tmp_path):
    """Rows at 0 and 0.01 s only: the first value is held until the second row."""
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "mode[1].force"], [["0", "10"], ["0.01", "0"]])
    assert main(["simulate", str(NOMINAL), "--input", str(inp), "--output", str(outp),
                 "--step", "0.001", "--stop-time", "0.02"]) == 0
    with open(outp) as f:
        rows = list(csv.reader(f))
    data = np.array(rows[1:], dtype=float)
    assert np.allclose(data[:, 0], np.arange(21) * 1e-3)
    ps = load_parameter_set(NOMINAL)
    tt = np.arange(21) * 1e-3
    f = np.zeros((20, len(ps.modes)))
    f[:10, 0] = 10.0
    ref = reference.simulate(ps, tt, f)
    q1 = data[:, rows[0].index("mode[1].q")]
    assert np.abs(q1 - ref["q"][:, 0]).max() <= 1e-3 * np.abs(ref["q"][:, 0]).max()


def test_simulate_bad_column_names_allowed(nominal_fmu, tmp_path, capsys):
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "point.shakr.force"], [["0", "1"]])
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp)]) == 1
    err = capsys.readouterr().err
    assert "'point.shakr.force'" in err and "point.shaker.force" in err and "base.acceleration" in err
    assert not outp.exists()


@pytest.mark.parametrize("rows,needle", [
    ([["0", "x"]], "not a number"),
    ([["0", "1"], ["0", "2"]], "strictly increase"),
    ([["0", "nan"]], "finite"),
])
def test_simulate_bad_values(nominal_fmu, tmp_path, capsys, rows, needle):
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "mode[2].force"], rows)
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp)]) == 1
    assert needle in capsys.readouterr().err
    assert not outp.exists()


def test_simulate_missing_time_column(nominal_fmu, tmp_path, capsys):
    inp = tmp_path / "in.csv"
    _write_csv(inp, ["t", "mode[2].force"], [["0", "1"]])
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output",
                 str(tmp_path / "o.csv")]) == 1
    assert "no 'time' column" in capsys.readouterr().err


def test_ssv_valid_against_ssp_schema_and_exact(tmp_path, capsys):
    """SSP 1.0 SystemStructureParameterValues.xsd (as shipped with fmpy) validates the file;
    every fitted value round-trips exactly and carries its FMU parameter name."""
    from fmpy.ssp.ssd import read_ssv

    worn = EXAMPLES / "tray_worn.toml"
    out = tmp_path / "worn.ssv"
    assert main(["export-ssv", str(worn), "-o", str(out)]) == 0
    assert str(out) in capsys.readouterr().out
    pset = read_ssv(str(out), validate=True)
    ps = load_parameter_set(worn)
    assert pset.name == ps.set_id
    values = {p.name: (float(p.value), p.unit) for p in pset.parameters}
    assert len(values) == 6 * len(ps.modes)
    for i, m in enumerate(ps.modes, 1):
        assert values[f"mode[{i}].f0"] == (m.f0, "Hz")
        assert values[f"mode[{i}].joint.Kt"] == (m.joint.Kt, "1/s2")
        assert values[f"mode[{i}].joint.Fs"] == (m.joint.Fs, None)   # no integer-exponent unit
        assert values[f"mode[{i}].joint.chi"][0] == m.joint.chi


def test_ssv_bad_suffix(tmp_path, capsys):
    assert main(["export-ssv", str(NOMINAL), "-o", str(tmp_path / "x.xml")]) == 1
    assert "must end in '.ssv'" in capsys.readouterr().err
