"""The co-simulation system loop (``jointfmu.cosim.master``): the tray FMU with loads model and controller.

References outside the product:

* controller off: the FMU in the loop equals the FMU driven directly by ``build.run_fmu`` with
  the same base acceleration (same FMI calls, same grid): bit for bit;
* controller on: an independent continuous-time closed loop solved with SciPy
  (``scipy.signal.lsim``, zero-order-hold input) from the mass-normalized modal equations of a
  base-mounted structure (common practice: q'' + 2 zeta w q' + w^2 q = phi_p F - Gamma a_b,
  a_o = phi_o q'' + a_b) with the joints made linear (Fs scaled up 1e9-fold, so every
  amplitude is far below the onset of micro-slip and the joint acts as its stiffness Kt,
  Segalman 2005), plus tau u' = -u - g v (first-order lag, derived here).  The loop acts on
  the velocity of the previous communication point, so the two differ by O(h): loose tolerance;
* loads: the RMS of the random profile against the integral of its PSD done by hand, the
  half-sine pulse against its closed-form velocity change 2 A tau / pi;
* controller component: the exact step response of a first-order lag, 1 - exp(-t/tau).
"""
from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("fmpy")
pytest.importorskip("pythonfmu")

from jointfmu.fmu.build import build_fmu
from jointfmu.fmu.run import run_fmu
from jointfmu.errors import InputError, SimulationError  # noqa: E402
from jointfmu.params import load_parameter_set, save_parameter_set  # noqa: E402
from jointfmu.cosim.component import PythonComponent  # noqa: E402
from jointfmu.cosim.controller import ActiveDamper, ControllerSettings  # noqa: E402
from jointfmu.cosim.loads import G0, LOAD_CASES, base_motion  # noqa: E402
from jointfmu.cosim.master import SystemSettings, run_system  # noqa: E402
from jointfmu.cosim.structures import FmuComponent  # noqa: E402
from jointfmu.cosim.runs import run_case  # noqa: E402

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
NOMINAL = EXAMPLES / "tray_nominal.toml"


@pytest.fixture(scope="module")
def nominal_fmu(example_fmus):
    return example_fmus["tray_nominal"].path


@pytest.fixture(scope="module")
def linear_joint(tmp_path_factory):
    """The nominal build with Fs x 1e9: the joints stay far below micro-slip (linear, stiffness Kt)."""
    ps = load_parameter_set(NOMINAL)
    stiff = ps.with_mode_values({(i + 1, "Fs"): m.joint.Fs * 1e9 for i, m in enumerate(ps.modes)})
    d = tmp_path_factory.mktemp("lin")
    toml = save_parameter_set(stiff, d / "stiff.toml")
    return load_parameter_set(toml), build_fmu(toml, d / "stiff.fmu").path


# ------------------------------------------------------------------------ loop vs direct
@pytest.mark.parametrize("case", ["curb_strike", "rough_traverse"])
def test_controller_off_loop_equals_fmu_driven_directly(nominal_fmu, case):
    s = SystemSettings(duration=0.05)
    with FmuComponent(nominal_fmu) as st:
        run = run_system(st, case, controller_on=False, settings=s)
    t = run.history["time"]
    a = run.history["base.acceleration"]
    assert np.max(np.abs(a)) > 1.0          # the case does load the structure
    header, rows = run_fmu(nominal_fmu, list(t), {"base.acceleration": list(a)},
                           stop_time=float(t[-1]), step=s.step)
    rows = np.asarray(rows)
    assert rows.shape[0] == t.shape[0]
    np.testing.assert_array_equal(rows[:, 0], t)
    for name in ("point.tip.a", "base.force", "energy.joint", "mode[1].q", "mode[4].q"):
        np.testing.assert_array_equal(run.history[name], rows[:, header.index(name)], err_msg=name)
    assert np.all(run.history["actuator.force"] == 0.0)


# ---------------------------------------------------------- closed loop vs SciPy reference
def _scipy_closed_loop(ps, t, a_base, gain, tau, tip="tip", point="psu_foot"):
    """Continuous closed loop, linear joints, ZOH base acceleration: tip acceleration, shape (M+1,)."""
    from scipy.signal import StateSpace, lsim

    n = ps.n_modes
    w = np.array([2 * math.pi * m.f0 for m in ps.modes])
    z = np.array([m.zeta for m in ps.modes])
    gam = np.array([m.base_participation for m in ps.modes])
    pts = {p.label: np.array(p.shape) for p in ps.points}
    phi_a, phi_t = pts[point], pts[tip]
    # state [q (n), q' (n), u]; input a_b; force F = u acts at 'point' (no saturation here)
    A = np.zeros((2 * n + 1, 2 * n + 1))
    A[:n, n:2 * n] = np.eye(n)
    A[n:2 * n, :n] = -np.diag(w**2)
    A[n:2 * n, n:2 * n] = -np.diag(2 * z * w)
    A[n:2 * n, 2 * n] = phi_a
    A[2 * n, n:2 * n] = -gain * phi_a / tau
    A[2 * n, 2 * n] = -1.0 / tau
    B = np.zeros((2 * n + 1, 1))
    B[n:2 * n, 0] = -gam
    # a_tip = phi_t . q'' + a_b
    C = (phi_t @ A[n:2 * n]).reshape(1, -1)
    D = np.array([[phi_t @ B[n:2 * n, 0] + 1.0]])
    _, _, x = lsim(StateSpace(A, B, C, D), a_base, t, interp=False)
    # an output read at t_k is computed with the input held over the step that ended there
    # (FMI 2.0 co-simulation: inputs set before doStep act over that step), so the
    # feedthrough uses u_{k-1}
    u_prev = np.concatenate([[0.0], np.asarray(a_base)[:-1]])
    return (np.asarray(x) @ C.T).reshape(-1) + D[0, 0] * u_prev


@pytest.mark.parametrize("case", ["curb_strike", "motor_sweep"])
def test_controller_on_matches_scipy_closed_loop(linear_joint, case):
    ps, fmu = linear_joint
    ctrl = ControllerSettings(gain=200.0, tau=0.5e-3, force_limit=1e9)
    s = SystemSettings(step=2e-5, duration=0.12, controller=ctrl)
    with FmuComponent(fmu) as st:
        on = run_system(st, case, True, s)
    with FmuComponent(fmu) as st:
        off = run_system(st, case, False, s)
    t, a = on.history["time"], on.history["base.acceleration"]
    ref_on = _scipy_closed_loop(ps, t, a, ctrl.gain, ctrl.tau)
    ref_off = _scipy_closed_loop(ps, t, a, 0.0, ctrl.tau)
    got_on, got_off = on.history["point.tip.a"], off.history["point.tip.a"]
    rms = lambda x: float(np.sqrt(np.mean(x * x)))  # noqa: E731
    # controller off: same linear dynamics, no coupling delay: close
    assert rms(got_off - ref_off) <= 1e-3 * rms(ref_off)
    # controller on: one-step coupling delay (h = 20 us): loose
    err = rms(got_on - ref_on) / rms(ref_on)
    assert err <= 0.02, err
    # and the check can tell the controller's effect apart from the error
    effect = rms(ref_on - ref_off) / rms(ref_on)
    assert effect > 10 * err


def test_saturation_limits_the_actuator_force(nominal_fmu):
    ctrl = ControllerSettings(gain=2000.0, force_limit=5.0)
    s = SystemSettings(duration=0.05, controller=ctrl)
    with FmuComponent(nominal_fmu) as st:
        run = run_system(st, "curb_strike", True, s)
    f = run.history["actuator.force"]
    assert np.max(np.abs(f)) == pytest.approx(5.0)
    assert np.mean(np.abs(f) == 5.0) > 0.05


# ----------------------------------------------------------------------------- components
def test_first_order_lag_step_response():
    # exact: u(t) = -g v (1 - exp(-t/tau)) for a held v (first-order lag, closed form)
    c = ControllerSettings(gain=100.0, tau=1e-3, force_limit=1e9)
    d = ActiveDamper(c)
    d.set_input(0.5)
    h = 1e-4
    for k in range(1, 31):
        d.do_step(h)
        expected = -100.0 * 0.5 * (1.0 - math.exp(-k * h / c.tau))
        assert d.force == pytest.approx(expected, rel=1e-12)


def test_random_profile_rms_matches_its_psd_and_is_seeded():
    # PSD integral by hand: 0.02*(20^2-5^2)/(2*20) + 0.02*130 + 0.02*150^2*(1/150-1/500) g^2
    var_g2 = 0.02 * (400 - 25) / 40 + 0.02 * 130 + 0.02 * 150**2 * (1 / 150 - 1 / 500)
    t, a = base_motion("rough_traverse", 1e-4, 4.0, seed=7)
    mid = a[(t > 0.1) & (t < 3.9)]          # away from the fade-in and fade-out
    assert np.sqrt(np.mean(mid**2)) / G0 == pytest.approx(math.sqrt(var_g2), rel=0.03)
    _, a2 = base_motion("rough_traverse", 1e-4, 4.0, seed=7)
    _, a3 = base_motion("rough_traverse", 1e-4, 4.0, seed=8)
    np.testing.assert_array_equal(a, a2)
    assert not np.array_equal(a, a3)


def test_half_sine_velocity_change():
    # integral of A sin(pi t / tau) over [0, tau] = 2 A tau / pi (closed form)
    h = 1e-5
    t, a = base_motion("curb_strike", h, 0.05)
    dv = float(np.sum(a[:-1]) * h)
    assert dv == pytest.approx(2 * 25 * G0 * 0.004 / math.pi, rel=1e-3)
    assert np.max(a) == pytest.approx(25 * G0, rel=1e-3)


# ------------------------------------------------------------------------------ bad input
def test_unknown_case_names_the_allowed_ones():
    with pytest.raises(InputError, match="rough_traverse, motor_sweep, curb_strike"):
        base_motion("pothole", 1e-4, 0.1)


@pytest.mark.parametrize("step,duration,match", [
    (0.0, 1.0, "communication step"), (1e-4, -1.0, "duration"), (float("nan"), 1.0, "step")])
def test_bad_step_or_duration(step, duration, match):
    with pytest.raises(InputError, match=match):
        base_motion("curb_strike", step, duration)


@pytest.mark.parametrize("kw,match", [({"gain": -1.0}, "gain"), ({"tau": 0.0}, "tau"),
                                      ({"force_limit": float("inf")}, "force_limit")])
def test_bad_controller_settings(kw, match):
    with pytest.raises(InputError, match=match):
        ControllerSettings(**kw)


def test_missing_fmu_is_a_clear_error(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        FmuComponent(tmp_path / "none.fmu")


def test_run_case_row_and_history(nominal_fmu, tmp_path):
    s = SystemSettings(duration=0.03)
    row = run_case(NOMINAL, nominal_fmu, "curb_strike", True, s.to_dict(),
                   history_path=tmp_path / "h.parquet")
    import pandas as pd

    h = pd.read_parquet(tmp_path / "h.parquet")
    assert len(h) == round(0.03 / s.step) + 1
    assert row["tip_acc_peak"] == pytest.approx(float(np.max(np.abs(h["point.tip.a"]))))
    assert row["energy_joint"] == pytest.approx(float(h["energy.joint"].iloc[-1]))
    assert row["energy_joint"] > 0 and row["controller"] is True
    assert set(LOAD_CASES) >= {row["case"]}
    assert math.isfinite(row["lin_rms_diff"])


def test_coupling_error_is_first_order_in_the_step(linear_joint):
    # explicit (Jacobi) coupling with zero-order hold: the controller acts one step late, so the
    # error against the continuous closed loop falls as h (common practice for co-simulation
    # without extrapolation); a 5x smaller step gives about 5x less error.
    ps, fmu = linear_joint
    ctrl = ControllerSettings(gain=200.0, tau=0.5e-3, force_limit=1e9)
    errs = []
    for h in (1e-4, 2e-5):
        s = SystemSettings(step=h, duration=0.08, controller=ctrl)
        with FmuComponent(fmu) as st:
            on = run_system(st, "motor_sweep", True, s)
        t, a = on.history["time"], on.history["base.acceleration"]
        ref = _scipy_closed_loop(ps, t, a, ctrl.gain, ctrl.tau)
        errs.append(float(np.sqrt(np.mean((on.history["point.tip.a"] - ref) ** 2))
                          / np.sqrt(np.mean(ref**2))))
    assert 3.5 < errs[0] / errs[1] < 7.0, errs


# ------------------------------------------------------------------------------- the CLI
def test_cosim_cli_writes_histories_and_summary(nominal_fmu, tmp_path, capsys):
    from jointfmu.cli import main

    out = tmp_path / "run.csv"
    rc = main(["cosim", str(nominal_fmu), "--case", "curb_strike", "--controller", "on",
               "--duration", "0.02", "-o", str(out)])
    text = capsys.readouterr().out
    assert rc == 0, text
    import pandas as pd

    df = pd.read_csv(out)
    assert len(df) == 201 and {"time", "point.tip.a", "actuator.force"} <= set(df.columns)
    assert "tip acceleration" in text and "interface force" in text and "qualification" in text


@pytest.mark.parametrize("argv,code,match", [
    (["--case", "curb_strike", "-o", "x.xlsx"], 1, ".parquet and .csv"),
    (["--case", "pothole", "-o", "x.csv"], 2, "invalid choice"),
    (["--case", "curb_strike", "-o", "x.csv", "--step", "0"], 1, "communication step"),
])
def test_cosim_cli_bad_input(nominal_fmu, tmp_path, capsys, monkeypatch, argv, code, match):
    from jointfmu.cli import main

    monkeypatch.chdir(tmp_path)
    assert main(["cosim", str(nominal_fmu), *argv]) == code
    assert match in capsys.readouterr().err
    assert not list(tmp_path.glob("x.*"))


def test_loading_an_fmu_first_leaves_building_possible(nominal_fmu, tmp_path):
    # In a fresh process: run the FMU (pythonfmu's binary puts the FMU's resources, which hold a
    # copy of pythonfmu without binaries, first on sys.path), then build an FMU.  Found when a
    # sweep worker ran a characterization task after system runs.
    import subprocess
    import sys

    code = (
        "import sys\n"
        "from jointfmu.cosim.structures import FmuComponent\n"
        "from jointfmu.fmu.build import build_fmu\n"
        f"with FmuComponent({str(nominal_fmu)!r}) as s:\n"
        "    s.do_step(0.0, 1e-4)\n"
        "assert not [p for p in sys.path if p.endswith('resources')], sys.path\n"
        f"build_fmu({str(NOMINAL)!r}, {str(tmp_path / 'again.fmu')!r})\n"
        "print('ok', flush=True)\n"
        # skip interpreter finalization: processes that loaded a pythonfmu FMU sometimes abort
        # there (see DEVELOPERS.md), which is not what this test is about
        "import os; os._exit(0)\n")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0 and "ok" in r.stdout, r.stderr[-2000:]


# ------------------------------------------------------------- a system of three FMUs
@pytest.mark.parametrize("case", ["curb_strike", "rough_traverse"])
def test_three_fmu_system_equals_python_components(nominal_fmu, tmp_path, case):
    from fmpy.validation import validate_fmu

    from jointfmu.cosim.components import build_controller_fmu, build_loads_fmu, run_system_of_fmus

    s = SystemSettings(duration=0.04, controller=ControllerSettings(force_limit=8.0))
    loads = build_loads_fmu(case, tmp_path / "loads.fmu", s)
    ctrl = build_controller_fmu(tmp_path / "ctrl.fmu", s.controller)
    # FMI 2.0 model-description rules as fmpy checks them
    assert validate_fmu(str(loads)) == [] and validate_fmu(str(ctrl)) == []
    three = run_system_of_fmus(nominal_fmu, loads, ctrl, True, s, case=case)
    with FmuComponent(nominal_fmu) as st:
        py = run_system(st, case, True, s)
    assert set(three.history) == set(py.history)
    for name in py.history:
        np.testing.assert_array_equal(three.history[name], py.history[name], err_msg=name)
    assert np.max(np.abs(py.history["actuator.force"])) > 1.0   # the controller did act


def test_loads_fmu_for_another_step_is_refused(nominal_fmu, tmp_path):
    from jointfmu.cosim.components import build_controller_fmu, build_loads_fmu, run_system_of_fmus

    loads = build_loads_fmu("curb_strike", tmp_path / "l.fmu", SystemSettings(duration=0.01))
    ctrl = build_controller_fmu(tmp_path / "c.fmu")
    with pytest.raises(InputError, match="built for step"):
        run_system_of_fmus(nominal_fmu, loads, ctrl, True, SystemSettings(step=5e-5, duration=0.01))
    with pytest.raises(InputError, match="holds case 'curb_strike'"):
        run_system_of_fmus(nominal_fmu, loads, ctrl, True, SystemSettings(duration=0.01),
                           case="motor_sweep")


# ----------------------------------------------------------------------- the master loop
def _integrator():
    """x' = u with u held over the step: x <- x + h u (exact for a held input)."""
    s = {"x": 1.0, "u": 0.0}

    def step(t, h):
        s["x"] = s["x"] + h * s["u"]

    return PythonComponent("the integrator", {"u": lambda v: s.__setitem__("u", v)},
                           {"x": lambda: s["x"]}, step)


def _gain(a):
    """Direct feedthrough: out = -a * in, of the input held since the last set."""
    s = {"in": 0.0}
    return PythonComponent("the gain", {"in": lambda v: s.__setitem__("in", v)},
                           {"out": lambda: -a * s["in"]}, lambda t, h: None)


def test_master_loop_is_jacobi_with_zero_order_hold():
    # x' = -a x closed through a feedthrough gain.  Jacobi with zero-order hold (derived here):
    # at t_k the gain's output is -a times the x it was given at t_{k-1}, so
    # x_{k+1} = x_k + h (-a x_{k-1}), x_{-1} = 0 (the gain's input starts at 0).
    from jointfmu.cosim.master import Connection, co_simulate

    a, t = 30.0, np.arange(41) * 1e-2
    hist, _ = co_simulate({"int": _integrator(), "gain": _gain(a)},
                          [Connection("int", "x", "gain", "in"), Connection("gain", "out", "int", "u")],
                          t, {"x": ("int", "x"), "f": ("gain", "out")})
    x = [1.0]
    prev = 0.0
    for k in range(40):
        h = t[k + 1] - t[k]
        x.append(x[k] + h * (-a * prev))
        prev = x[k]
    np.testing.assert_array_equal(hist["x"], x)
    np.testing.assert_array_equal(hist["time"], t)
    assert hist["f"][0] == 0.0 and hist["f"][1] == -a * 1.0


@pytest.mark.parametrize("connections,record,times,match", [
    ([("nope", "x", "gain", "in")], {}, None, "no component 'nope'; components: int, gain"),
    ([("int", "v", "gain", "in")], {}, None, "'v' is not an output of the integrator; outputs: x"),
    ([("int", "x", "gain", "u")], {}, None, "'u' is not an input of the gain; inputs: in"),
    ([("int", "x", "gain", "in"), ("gain", "out", "gain", "in")], {}, None,
     "input gain.in is already fed by another connection"),
    ([], {"time": ("int", "x")}, None, "'time' is the name of the communication points"),
    ([], {"x": ("int", "x")}, [0.0, 0.1, 0.1], "strictly increasing"),
])
def test_master_loop_bad_wiring(connections, record, times, match):
    from jointfmu.cosim.master import Connection, co_simulate

    with pytest.raises(InputError, match=re.escape(match)):
        co_simulate({"int": _integrator(), "gain": _gain(1.0)},
                    [Connection(*c) for c in connections],
                    np.arange(4) * 0.1 if times is None else times, record)


def test_master_loop_reports_a_refused_step():
    from jointfmu.cosim.master import Connection, co_simulate

    def step(t, h):
        if t > 0.15:
            raise ValueError("out of range")

    bad = PythonComponent("the bad one", {"u": lambda v: None}, {}, step)
    with pytest.raises(SimulationError,
                       match=re.escape("component 'bad': step at t = 0.2 s failed: "
                                       "ValueError: out of range")):
        co_simulate({"int": _integrator(), "bad": bad}, [Connection("int", "x", "bad", "u")],
                    [0.0, 0.1, 0.2, 0.3], {})


def test_structure_refusing_a_step_is_a_simulation_error(nominal_fmu):
    # the structure FMU refuses a NaN input at doStep (fmi2Discard, FMI 2.0 sec. 4.2.2, from memory)
    s = SystemSettings(duration=0.01)
    t, a = base_motion("curb_strike", s.step, 0.01)
    a[50] = float("nan")
    with FmuComponent(nominal_fmu) as st:
        with pytest.raises(SimulationError, match=re.escape(
                f"component 'structure': step at t = 0.005 s failed: {nominal_fmu.name}: ")):
            run_system(st, "curb_strike", False, s, base_acc=a)


def test_system_connections_match_the_fmus(nominal_fmu, tmp_path):
    # the public connection list of the demo system against the three FMUs' model descriptions
    # (FMI 2.0 sec. 2.2.7: causality input/output), and each component FMU carrying blocks.py
    import zipfile

    from fmpy import read_model_description

    import jointfmu.cosim.blocks as blocks
    from jointfmu.cosim.components import build_controller_fmu, build_loads_fmu
    from jointfmu.cosim.master import SYSTEM_CONNECTIONS

    s = SystemSettings(duration=0.01)
    fmus = {"structure": nominal_fmu, "loads": build_loads_fmu("curb_strike", tmp_path / "l.fmu", s),
            "damper": build_controller_fmu(tmp_path / "c.fmu")}
    causality = {name: {v.name: v.causality for v in read_model_description(str(f)).modelVariables}
                 for name, f in fmus.items()}
    assert [str(c) for c in SYSTEM_CONNECTIONS] == [
        "loads.base.acceleration -> structure.base.acceleration",
        "structure.point.psu_foot.v -> damper.velocity",
        "damper.force -> structure.point.psu_foot.force"]
    for c in SYSTEM_CONNECTIONS:
        assert causality[c.source][c.output] == "output", str(c)
        assert causality[c.target][c.input] == "input", str(c)
    text = Path(blocks.__file__).read_text(encoding="utf-8")
    for name in ("loads", "damper"):
        with zipfile.ZipFile(fmus[name]) as z:
            copies = [n for n in z.namelist() if n.startswith("resources/jf_blocks_")]
            assert len(copies) == 1 and z.read(copies[0]).decode("utf-8") == text


def test_closed_fmu_component_refuses_calls(nominal_fmu):
    # an FMI call on a freed instance is undefined (FMI 2.0 sec. 2.1.5, from memory: after
    # fmi2FreeInstance the instance is gone); the component refuses instead
    with FmuComponent(nominal_fmu) as st:
        refs = st.refs(["point.tip.a"], "output")
    assert st.do_step(0.0, 1e-4) == (False, f"{nominal_fmu.name}: the instance is closed")
    with pytest.raises(SimulationError, match="the instance is closed"):
        st.get(refs)
