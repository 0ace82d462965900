"""Discrete-joint structure files (jointfmu-lumped/1): every check and its message; virtual tests:
the sensor chain, the records read back through jointfmu.records (CSV and UFF 58), the command
lines; the shipped example model and records (regenerated bit for bit)."""
import copy
import json
import math
import re
import types
from pathlib import Path

import numpy as np
import pytest
import scipy.signal

from jointfmu.cli import main
from jointfmu.errors import InputError, ParameterError
from jointfmu.lumped.model import load_lumped, parse_lumped
from jointfmu.lumped.modes import modal_iwan_template, stuck_modes
from jointfmu.lumped.virtual_test import (AA_ATTEN, AA_PASS, AA_STOP, VirtualTest, anti_alias_filter,
                                          run_virtual_test, write_campaign)
from jointfmu.params import check_parameter_file, load_parameter_set
from jointfmu.records import read_record

EXAMPLES = Path(__file__).resolve().parents[1] / "fmu_src" / "jointfmu" / "examples"

VALID = {
    "format": "jointfmu-lumped/1",
    "structure": {"name": "rig", "build": "R1"},
    "dofs": [{"label": "a", "mass": 1.0, "axis": "z"}, {"label": "b", "mass": 0.5, "axis": "z"},
             {"label": "c", "mass": 0.8, "axis": "z"}],
    "springs": [{"dofs": ["a"], "k": 1e6}, {"dofs": ["a", "b"], "k": 5e5},
                {"dofs": ["b", "c"], "k": 8e5}],
    "joints": [{"label": "j1", "dofs": ["c"], "Fs": 30.0, "Kt": 4e5, "chi": -0.5, "beta": 0.2},
               {"label": "j2", "dofs": ["a", "c"], "Fs": 20.0, "Kt": 2e5, "chi": -0.3, "beta": 0.0}],
    "damping": {"zeta": [0.01, 0.005], "zeta_rest": 0.003},
    "modes": {"labels": ["low", "mid"], "count": 2},
    "points": [{"label": "hit", "dof": "a", "direction": "+z", "role": "input", "test_node": 7},
               {"label": "s1", "dof": "b", "direction": "-z", "role": "output", "test_node": 8},
               {"label": "s2", "dof": "c", "direction": "+z", "role": "both", "test_node": 9}],
    "builds": [{"label": "loose", "build": "R2", "joint_factors": {"Fs": 0.5}}],
}


def mutate(path, value):
    d = copy.deepcopy(VALID)
    *head, last = path
    t = d
    for k in head:
        t = t[k]
    if value is KeyError:
        del t[last]
    else:
        t[last] = value
    return d


def test_valid_file_parses():
    m = parse_lumped(VALID, "rig.toml")
    assert (m.n_dofs, m.n_joints, [p.label for p in m.output_points]) == (3, 2, ["s1", "s2"])
    assert m.variant("loose").joints[0].Fs == 15.0 and m.variant("R2").build == "R2"


@pytest.mark.parametrize("path, value, field, text", [
    (("joints", 1, "dofs"), ["a", "d"], "joints[2] (j2).dofs[2]", "unknown DOF"),
    (("dofs", 0, "mass"), 0.0, "dofs[1] (a).mass", "must satisfy mass > 0 kg"),
    (("dofs", 1, "mass"), -2.0, "dofs[2] (b).mass", "must satisfy mass > 0 kg"),
    (("joints", 1, "dofs"), ["c", "c"], "joints[2] (j2).dofs", "a joint from a DOF to itself"),
    (("springs", 0, "dofs"), ["b", "b"], "springs[1].dofs", "a spring from a DOF to itself"),
    (("points", 0, "dof"), "x", "points[1] (hit).dof", "unknown DOF"),
    (("points", 1, "direction"), "+y", "points[2] (s1).direction", "must be '+z' or '-z'"),
    (("points", 1, "direction"), "z", "points[2] (s1).direction", "'+<axis>' or '-<axis>'"),
    (("points", 2, "role"), "sensor", "points[3] (s2).role", "must be one of"),
    (("joints", 0, "chi"), -1.2, "joints[1] (j1).chi", "-1 < chi <= 0"),
    (("joints", 0, "Fs"), 0.0, "joints[1] (j1).Fs", "Fs > 0"),
    (("joints", 0, "Kt"), "stiff", "joints[1] (j1).Kt", "must be a finite number in N/m"),
    (("joints", 0, "beta"), -0.1, "joints[1] (j1).beta", "beta >= 0"),
    (("springs", 1, "k"), -1.0, "springs[2].k", "k > 0"),
    (("dofs", 2, "label"), "a", "dofs[3].label", "must be unique among dofs"),
    (("points", 2, "test_node"), 7, "points[3] (s2).test_node", "must be unique among points"),
    (("points", 2, "test_node"), 0, "points[3] (s2).test_node", "positive integer"),
    (("damping", "zeta_rest"), KeyError, "damping.zeta_rest", "missing: zeta lists 2 ratios for 3"),
    (("damping", "rayleigh_alpha"), 2.0, "damping", "not both"),
    (("damping", "zeta"), [0.1, 1.2], "damping.zeta[2]", "0 <= zeta < 1"),
    (("joints", 0, "Fss"), 3.0, "joints[1] (j1).Fss", "unknown key"),
    (("format",), "jointfmu-params/1", "format", "jointfmu-lumped/1"),
    (("format",), KeyError, "format", "missing required key"),
    (("joints", 1, "gains"), [1.0], "joints[2] (j2).gains", "must be an array of 2 numbers"),
    (("joints", 1, "gains"), [1.0, 0.0], "joints[2] (j2).gains[2]", "other than 0"),
    (("joints", 0, "dofs"), ["a", "b", "c"], "joints[1] (j1).gains", "needs gains"),
    (("builds", 0, "joint_factors"), {"Fs": -1.0}, "builds[1] (loose).joint_factors.Fs", "factor > 0"),
    (("builds", 0, "label"), "nominal", "builds[1] (nominal).label", "must be unique"),
    (("modes", "count"), 5, "modes.count", "from 1 to 3"),
])
def test_bad_file_names_field_value_and_allowed(path, value, field, text):
    with pytest.raises(ParameterError) as e:
        parse_lumped(mutate(path, value), "rig.toml")
    hits = [p for p in e.value.problems if p.field == field]
    assert hits, [str(p) for p in e.value.problems]
    assert any(text in str(p) for p in hits), [str(p) for p in hits]
    assert all(p.file == "rig.toml" for p in e.value.problems)


def test_unknown_dof_suggests_the_nearest():
    with pytest.raises(ParameterError) as e:
        parse_lumped(mutate(("joints", 0, "dofs"), ["cc"]), "rig.toml")
    assert "did you mean 'c'?" in str(e.value)


@pytest.mark.parametrize("springs, free", [
    ([{"dofs": ["a", "b"], "k": 5e5}, {"dofs": ["b", "c"], "k": 8e5}], "a, b, c"),   # no ground at all
    ([{"dofs": ["a"], "k": 1e6}], "b"),                                            # b hangs on nothing
])
def test_structure_free_to_drift_is_refused(springs, free):
    """Rigid-body motion with the joints stuck: zero eigenvalue of the stuck stiffness (numpy)."""
    d = copy.deepcopy(VALID)
    d["springs"] = springs
    d["joints"] = [{"label": "j", "dofs": ["a", "c"], "Fs": 1.0, "Kt": 1e5, "chi": -0.5, "beta": 0.0}]
    with pytest.raises(ParameterError) as e:
        parse_lumped(d, "rig.toml")
    p = [p for p in e.value.problems if "free to drift" in p.allowed]
    assert len(p) == 1 and p[0].value == free


def test_every_problem_is_collected():
    d = mutate(("dofs", 0, "mass"), -1.0)
    d["joints"][0]["chi"] = 0.5
    d["points"][0]["dof"] = "nowhere"
    with pytest.raises(ParameterError) as e:
        parse_lumped(d, "rig.toml")
    fields = {p.field for p in e.value.problems}
    assert {"dofs[1] (a).mass", "joints[1] (j1).chi", "points[1] (hit).dof"} <= fields


def test_toml_syntax_error_names_the_line(tmp_path):
    f = tmp_path / "bad.toml"
    f.write_text('format = "jointfmu-lumped/1"\n[structure]\nname = rig\n')
    with pytest.raises(ParameterError) as e:
        load_lumped(f)
    assert e.value.problems[0].field == "line 3" and "name = rig" in str(e.value)


def test_rayleigh_damping_too_large_is_refused():
    d = copy.deepcopy(VALID)
    d["damping"] = {"rayleigh_alpha": 5000.0, "rayleigh_beta": 0.0}
    with pytest.raises(ParameterError, match="damping ratio >= 1 for mode 1"):
        stuck_modes(parse_lumped(d))


def test_unknown_build_names_the_allowed():
    with pytest.raises(ParameterError, match="unknown build; allowed: nominal, loose, R2"):
        parse_lumped(VALID).variant("tight")


# ----------------------------------------------------------------------------- virtual tests
@pytest.fixture(scope="module")
def rig():
    return parse_lumped(VALID, "rig.toml")


def quick(**kw):
    base = dict(impact="hit", levels=(400.0,), sensors=("s1", "s2"), rate=2048.0, duration=0.25,
                pretrigger=0.02, seed=5)
    base.update(kw)
    return VirtualTest(**base)


def test_anti_alias_filter_meets_its_design():
    """Pass band flat within 0.1 %, stop band at least 85 dB down (scipy.signal.freqz of the taps;
    Kaiser's design targets 90 dB); linear phase (symmetric taps)."""
    taps, D = anti_alias_filter(2560.0, 8)
    assert np.allclose(taps, taps[::-1]) and len(taps) == 2 * D * 8 + 1
    w, H = scipy.signal.freqz(taps, worN=8192, fs=2560.0 * 8)
    g = np.abs(H)
    assert np.all(np.abs(g[w <= AA_PASS * 2560.0] - 1.0) < 1e-3)
    assert 20 * np.log10(g[w >= AA_STOP * 2560.0].max()) < -(AA_ATTEN - 5)


def test_virtual_test_channels_noise_and_seed(rig):
    r1, = run_virtual_test(rig, quick())
    r2, = run_virtual_test(rig, quick())
    r3, = run_virtual_test(rig, quick(seed=6))
    assert list(r1.channels) == ["point.s1.a", "point.s2.a", "point.hit.force"]
    for name, d in r1.channels.items():
        assert np.array_equal(d, r2.channels[name])            # seeded: reproducible
        assert not np.array_equal(d, r3.channels[name])        # another seed: other noise
        clean = r1.clean[name]
        rms = math.sqrt(np.mean(clean[round(0.02 * 2048):] ** 2))
        assert r1.noise_rms[name] == pytest.approx(rms * 10 ** (-40 / 20), rel=1e-12)
        # the noise drawn has that RMS (3 % at 512 samples; rounding to 7 digits is far below)
        assert np.std(d - clean) == pytest.approx(r1.noise_rms[name], rel=0.1)
    f = r1.clean["point.hit.force"]
    i0 = round(0.02 * 2048)
    D = anti_alias_filter(2048.0, 8)[1]
    assert np.all(f[: i0 - D] == 0.0)                           # at rest before the impact...
    assert i0 <= np.argmax(f) <= i0 + 2    # ...but for the zero-phase filter's spread of the pulse
    # a 0.5 ms half-sine of 400 N has an impulse of 2 F T / pi; the filtered samples keep it (to
    # the rectangle rule of the pulse sampled 8 times in 0.5 ms at the simulation rate)
    assert f.sum() / 2048 == pytest.approx(2 * 400 * 5e-4 / math.pi, rel=1e-2)
    assert r1.energy_residual == pytest.approx(0.0, abs=1e-5 * r1.energy_input)


def test_virtual_test_without_noise_and_with_clipping(rig):
    r, = run_virtual_test(rig, quick(snr_db=math.inf, digits=None))
    for name, d in r.channels.items():
        assert np.array_equal(d, r.clean[name])
    top = 0.5 * np.abs(r.clean["point.s1.a"]).max()
    c, = run_virtual_test(rig, quick(snr_db=math.inf, clip=top, digits=None))
    assert np.abs(c.channels["point.s1.a"]).max() == top
    assert np.sum(np.abs(c.channels["point.s1.a"]) == top) >= 3
    assert np.abs(c.channels["point.hit.force"]).max() > top     # the force is not clipped


@pytest.mark.parametrize("kw, text", [
    ({"impact": "s1"}, "role 'output'"),
    ({"impact": "nowhere"}, "unknown point"),
    ({"sensors": ("hit",)}, "point has role 'input'"),
    ({"levels": (0.0,)}, "each peak force must be a finite number > 0 N"),
    ({"duration": 0.01}, "must exceed pretrigger + pulse"),
    ({"quantity": "j"}, "allowed: x, v, a"),
])
def test_virtual_test_bad_settings(rig, kw, text):
    with pytest.raises((InputError, ParameterError), match=re.escape(text)):
        run_virtual_test(rig, quick(**kw))


@pytest.mark.parametrize("quantity", ["a", "v", "x"])
def test_records_round_trip_csv_and_uff(rig, tmp_path, quantity):
    """Written with jointfmu.records and read back with the modal template of the same model:
    CSV exactly (repr), UFF 58 to the precision of its values; test_node numbers map UFF nodes."""
    settings = quick(levels=(100.0, 400.0), quantity=quantity)
    results = run_virtual_test(rig, settings)
    paths = write_campaign(rig, settings, results, tmp_path, ("csv", "uff"), "test")
    template = modal_iwan_template(rig)
    assert [p.test_node for p in template.points] == [7, 8, 9]
    for r in results:
        stem = f"level{r.index + 1}_{r.level:g}N"
        for suffix, exact in ((".csv", True), (".uff", False)):
            rec = read_record(tmp_path / (stem + suffix), template)
            assert rec.names == tuple(r.channels)
            assert np.allclose(rec.time, r.time, rtol=0, atol=1e-9)
            for name, data in r.channels.items():
                got = rec.channel(name).data
                if exact:
                    assert np.array_equal(got, data)
                else:
                    assert np.allclose(got, data, rtol=1e-6, atol=0)
    summary = json.loads((tmp_path / "campaign.json").read_text())
    assert [lv["level_N"] for lv in summary["levels"]] == [100.0, 400.0]
    assert sorted(p.name for p in paths)[-1] == "level2_400N.uff"


def test_clipped_record_is_refused_by_the_reader(rig, tmp_path):
    """A virtual test with a saturated sensor gives what the fit must refuse (issue 11)."""
    r, = run_virtual_test(rig, quick(snr_db=math.inf))
    top = 0.5 * np.abs(r.clean["point.s1.a"]).max()
    settings = quick(clip=top)
    write_campaign(rig, settings, run_virtual_test(rig, settings), tmp_path, ("csv",))
    with pytest.raises(InputError, match="clipped"):
        read_record(tmp_path / "level1_400N.csv", modal_iwan_template(rig))


# ----------------------------------------------------------------------------- command line
@pytest.fixture
def rig_file(tmp_path):
    import tomllib  # noqa: F401 - the file is written by hand below, read by jointfmu
    lines = ['format = "jointfmu-lumped/1"', '[structure]', 'name = "rig"', 'build = "R1"']
    for d in VALID["dofs"]:
        lines += ["[[dofs]]", f'label = "{d["label"]}"', f'mass = {d["mass"]}', 'axis = "z"']
    for s in VALID["springs"]:
        lines += ["[[springs]]", f"dofs = {json.dumps(s['dofs'])}", f"k = {s['k']}"]
    for j in VALID["joints"]:
        lines += ["[[joints]]", f'label = "{j["label"]}"', f"dofs = {json.dumps(j['dofs'])}",
                  f"Fs = {j['Fs']}", f"Kt = {j['Kt']}", f"chi = {j['chi']}", f"beta = {j['beta']}"]
    lines += ["[damping]", "zeta = [0.01, 0.005]", "zeta_rest = 0.003"]
    for p in VALID["points"]:
        lines += ["[[points]]", f'label = "{p["label"]}"', f'dof = "{p["dof"]}"',
                  f'direction = "{p["direction"]}"', f'role = "{p["role"]}"',
                  f'test_node = {p["test_node"]}']
    f = tmp_path / "rig.toml"
    f.write_text("\n".join(lines) + "\n")
    return f


def test_cli_modes_prints_and_writes_a_checked_template(rig_file, tmp_path, capsys):
    out = tmp_path / "t.toml"
    assert main(["modes", str(rig_file), "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "rig@R1: 3 DOFs, 2 joints" in text and f"wrote {out}" in text
    assert check_parameter_file(out) == []
    ps = load_parameter_set(out)
    f = stuck_modes(load_lumped(rig_file)).frequency
    assert [m.f0 for m in ps.modes] == pytest.approx(list(f), rel=1e-12)
    assert [p.test_node for p in ps.points] == [7, 8, 9]


def test_cli_virtual_test_writes_records(rig_file, tmp_path, capsys):
    out = tmp_path / "rec"
    code = main(["virtual-test", str(rig_file), "--impact", "hit", "--levels", "50,500",
                 "--sensors", "s1,s2", "--rate", "2048", "--duration", "0.2", "--pretrigger",
                 "0.02", "--seed", "3", "-o", str(out)])
    assert code == 0
    text = capsys.readouterr().out
    assert "rig@R1: 2 records, impact at hit" in text and "peak modal amplitude" in text
    names = sorted(p.name for p in out.iterdir())
    assert names == ["campaign.json", "level1_50N.csv", "level1_50N.uff", "level2_500N.csv",
                     "level2_500N.uff"]


@pytest.mark.parametrize("args, text", [
    (["--impact", "nowhere", "--levels", "10"], "unknown point; allowed: hit, s1, s2"),
    (["--impact", "hit", "--levels", "10,x"], "--levels '10,x': expected numbers"),
    (["--impact", "s1", "--levels", "10"], "the impact needs a point with role 'input' or 'both'"),
    (["--impact", "hit", "--levels", "10", "--rate", "-5"], "rate = -5.0: must be > 0 Hz"),
    (["--impact", "hit", "--levels", "10", "-o", "/proc/version/x"], "--output"),
])
def test_cli_virtual_test_errors_are_one_line(rig_file, tmp_path, capsys, args, text):
    if "-o" not in args:
        args = [*args, "-o", str(tmp_path / "x")]
    code = main(["virtual-test", str(rig_file), *args])
    err = capsys.readouterr().err
    assert code == 1 and err.startswith("jointfmu: error:") and text in err
    assert "Traceback" not in err and len(err.strip().splitlines()) <= 2
    assert not (tmp_path / "x").exists()


def test_cli_check_takes_lumped_files(rig_file, capsys):
    assert main(["check", str(rig_file), str(EXAMPLES / "tray_nominal.toml")]) == 0
    out = capsys.readouterr().out
    assert "rig@R1, discrete-joint structure: 3 DOFs, 2 joints, 3 points" in out
    assert "avionics_tray@SN-0002, 4 modes" in out


def test_cli_bad_file_lists_problems_without_traceback(tmp_path, capsys):
    f = tmp_path / "bad.toml"
    f.write_text('format = "jointfmu-lumped/1"\n[structure]\nname = "r"\nbuild = "b"\n'
                 '[[dofs]]\nlabel = "a"\nmass = -1\naxis = "z"\n[damping]\nzeta = [0.01]\n')
    assert main(["modes", str(f)]) == 1
    err = capsys.readouterr().err
    assert err.startswith("jointfmu: error:") and "dofs[1] (a).mass = -1" in err
    assert "Traceback" not in err
    assert main(["modes", str(tmp_path / "missing.toml")]) == 1
    assert "cannot be read" in capsys.readouterr().err
    assert main(["check", str(f)]) == 1
    assert "FAIL" in capsys.readouterr().out


# ----------------------------------------------------------------------------- the shipped example
TARGETS = {"nominal": (68.0, 131.0, 236.0, 412.0)}


@pytest.mark.parametrize("build", ["nominal", "undertorqued", "worn"])
def test_example_model_modes_near_the_parameter_files(build):
    """The stuck-joint modes of each build within 1.7 % of the hand-written parameter files' f0
    (examples/tray_*.toml), every other mode above 600 Hz, and the template passes the checks."""
    model = load_lumped(EXAMPLES / "tray_lumped.toml", build)
    f = stuck_modes(model).frequency
    ref = load_parameter_set(EXAMPLES / f"tray_{build}.toml")
    assert f[:4] == pytest.approx([m.f0 for m in ref.modes], rel=0.017)
    assert f[4] > 600.0
    ps = modal_iwan_template(model)
    assert [m.label for m in ps.modes] == [m.label for m in ref.modes]
    assert [p.label for p in ps.points] == [p.label for p in ref.points]


def _make_records():
    """The example script as a module, executed from its text (no __pycache__ is left in the
    package's examples folder, which ships as package data)."""
    path = EXAMPLES / "make_records.py"
    mod = types.ModuleType("make_records")
    mod.__file__ = str(path)
    exec(compile(path.read_text(encoding="utf-8"), str(path), "exec"), mod.__dict__)
    return mod


@pytest.mark.parametrize("build, level", [("nominal", 0), ("worn", 5)])
def test_shipped_records_regenerate_bit_for_bit(tmp_path, build, level):
    """examples/make_records.py, one level of a build: the same bytes as the shipped file."""
    mod = _make_records()
    paths = mod.make(build, tmp_path, levels=[level])
    for p in paths:
        if p.suffix in (".csv", ".uff"):
            assert p.read_bytes() == (EXAMPLES / "records" / build / p.name).read_bytes(), p.name


@pytest.mark.parametrize("build", ["nominal", "undertorqued", "worn"])
def test_shipped_records_read_with_both_templates(build):
    """Every shipped CSV reads with the hand-written parameter file of its build as template
    (labels and roles agree), the nominal UFF files with the model's own template (test nodes);
    the campaign reaches macro-slip at its highest level and stays in micro-slip at its lowest."""
    folder = EXAMPLES / "records" / build
    ref = load_parameter_set(EXAMPLES / f"tray_{build}.toml")
    csvs = sorted(folder.glob("*.csv"))
    assert len(csvs) == 6
    for f in csvs:
        rec = read_record(f, ref)
        assert rec.rate == 2560.0 and rec.time.size == 5120
    if build == "nominal":
        tmpl = modal_iwan_template(load_lumped(EXAMPLES / "tray_lumped.toml", build))
        for f in sorted(folder.glob("*.uff")):
            read_record(f, tmpl)
    summary = json.loads((folder / "campaign.json").read_text())
    lv = summary["levels"]
    assert not any(lv[0]["joint_reached_macroslip"].values())
    assert all(lv[-1]["joint_reached_macroslip"].values())
    assert any(lv[-1]["mode_reaches_macroslip"])
    assert max(abs(x["energy_residual_relative"]) for x in lv) < 1e-5
