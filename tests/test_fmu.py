"""The built FMU through fmpy (FMI 2.0 co-simulation).

Reference for the dynamics: the SciPy reference integration (``jointfmu.physics.reference``, DOP853
branch by branch), fed the same held modal force.  The modal force of point forces and base
acceleration is formed here independently of the product: f = sum_j phi_j F_j - Gamma a_base
(mass-normalized modal equations of a base-mounted structure in relative coordinates, common
practice).  Interface checks follow the FMI 2.0 standard (sections named at each test) and
``fmpy.validation.validate_fmu``.

FMUs are built once per session into a temporary folder.
"""
from __future__ import annotations

import json
import math
import zipfile
from pathlib import Path
from xml.etree import ElementTree as ET

import numpy as np
import pytest

fmpy = pytest.importorskip("fmpy")
from fmpy import extract, read_model_description, simulate_fmu  # noqa: E402
from fmpy.fmi2 import (FMU2Slave, fmi2CallbackAllocateMemoryTYPE,  # noqa: E402
                       fmi2CallbackFreeMemoryTYPE, fmi2CallbackFunctions, fmi2CallbackLoggerTYPE)
from fmpy.validation import validate_fmu  # noqa: E402

from jointfmu.physics import reference  # noqa: E402
from jointfmu.fmu.build import build_fmu
from jointfmu.fmu.info import read_fmu_info
from jointfmu.params import check_mode_values, load_parameter_set  # noqa: E402

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
NAMES = ("tray_nominal", "tray_undertorqued", "tray_worn")
TOL = 1e-3          # of peak, at default settings (the acceptance band)


# --------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="session")
def fmus(tmp_path_factory):
    out = tmp_path_factory.mktemp("fmus")
    built = {}
    for name in NAMES:
        r = build_fmu(EXAMPLES / f"{name}.toml", out / f"{name}.fmu")
        built[name] = r
    return built


@pytest.fixture(scope="session")
def psets():
    return {name: load_parameter_set(EXAMPLES / f"{name}.toml") for name in NAMES}


#: The status a refused call returns (FMI 2.0 sec. 2.1.3 says fmi2Error): jointfmu's native
#: binary returns fmi2Error, pythonfmu's binary can only return fmi2Fatal (slave.py).
REFUSED = {"native": 3, "pythonfmu": 4}


class Slave:
    """An FMU2Slave with a log-capturing logger; inputs/outputs by name."""

    def __init__(self, path, instance="jf"):
        self.md = read_model_description(str(path))
        with zipfile.ZipFile(path) as z:
            self.binary = json.loads(z.read("resources/jointfmu_build.json"))["binary"]["kind"]
        self.refused = REFUSED[self.binary]
        self.vr = {v.name: v.valueReference for v in self.md.modelVariables}
        self.outputs = [v.name for v in self.md.modelVariables if v.causality == "output"]
        self.inputs = [v.name for v in self.md.modelVariables if v.causality == "input"]
        self.log: list[tuple[int, str]] = []
        self.dir = extract(str(path))
        self.fmu = FMU2Slave(guid=self.md.guid, unzipDirectory=self.dir,
                             modelIdentifier=self.md.coSimulation.modelIdentifier,
                             instanceName=instance)
        cb = fmi2CallbackFunctions()
        cb.logger = fmi2CallbackLoggerTYPE(self._logger)
        cb.allocateMemory = fmi2CallbackAllocateMemoryTYPE(fmpy.calloc)
        cb.freeMemory = fmi2CallbackFreeMemoryTYPE(fmpy.free)
        self._cb = cb
        self.fmu.instantiate(callbacks=cb, loggingOn=True)

    def _logger(self, env, instance, status, category, message):
        self.log.append((int(status), message.decode("utf-8", "replace")))

    def init(self, start_values=None):
        for k, v in (start_values or {}).items():
            self.fmu.setReal([self.vr[k]], [float(v)])
        self.fmu.setupExperiment(startTime=0.0)
        self.fmu.enterInitializationMode()
        self.fmu.exitInitializationMode()

    def set(self, values):
        names = list(values)
        self.fmu.setReal([self.vr[n] for n in names], [float(values[n]) for n in names])

    def get(self, names=None):
        names = self.outputs if names is None else names
        return np.array(self.fmu.getReal([self.vr[n] for n in names]))

    def run(self, t, inputs, names=None):
        """Held inputs (name -> (M,) array, value k on [t_k, t_k+1)); outputs (M, n_out)."""
        rows = [self.get(names)]
        for k in range(len(t) - 1):
            self.set({n: a[k] for n, a in inputs.items()})
            self.fmu.doStep(currentCommunicationPoint=t[k], communicationStepSize=t[k + 1] - t[k])
            rows.append(self.get(names))
        return np.array(rows)

    def close(self):
        try:
            self.fmu.terminate()
        except Exception:
            pass
        self.fmu.freeInstance()


@pytest.fixture
def slave_of(fmus):
    made = []

    def make(name, instance="jf"):
        s = Slave(fmus[name].path, instance)
        made.append(s)
        return s
    yield make
    for s in made:
        s.close()


def modal_force_of(ps, point_forces=None, base_acc=None, modal=None, M=None):
    """Held modal force (M, N) from physical inputs: f = sum_j phi_j F_j - Gamma a (derived here)."""
    N = len(ps.modes)
    f = np.zeros((M, N))
    if modal is not None:
        f += modal
    if point_forces:
        for p in ps.input_points:
            if p.label in point_forces:
                f += np.outer(point_forces[p.label], np.array(p.shape))
    if base_acc is not None:
        gamma = np.array([m.base_participation for m in ps.modes])
        f -= np.outer(base_acc, gamma)
    return f


def phimax(mode):
    """Segalman (2005) inverse relations (physics sheet sec. 1)."""
    j = mode.joint
    a = (j.chi + 1) / (j.chi + 2)
    return j.Fs * (1 + j.beta) / (j.Kt * (j.beta + a))


def assert_close_to_reference(ps, t, fmodal, got_q, what):
    ref = reference.simulate(ps, t, fmodal[:-1])
    for i in range(len(ps.modes)):
        peak = np.abs(ref["q"][:, i]).max()
        err = np.abs(got_q[:, i] - ref["q"][:, i]).max()
        assert err <= TOL * peak, (f"{what}: mode {i + 1} q error {err:.3g} = "
                                   f"{err / peak:.3g} of peak {peak:.3g} (allowed {TOL:g})")
    return ref


# ----------------------------------------------------------------- model description
@pytest.mark.parametrize("name", NAMES)
def test_validate_fmu_reports_no_problems(fmus, name):
    """fmpy.validate_fmu: schema, names (structured), ModelStructure, start values, units."""
    assert validate_fmu(str(fmus[name].path)) == []


@pytest.mark.parametrize("name", NAMES)
def test_model_description_complete(fmus, psets, name):
    """FMI 2.0 sec. 2.2.2 (units), 2.2.7 (variables), 2.2.8 (ModelStructure)."""
    ps = psets[name]
    with zipfile.ZipFile(fmus[name].path) as z:
        root = ET.fromstring(z.read("modelDescription.xml"))
        files = set(z.namelist())
    assert root.get("variableNamingConvention") == "structured"
    assert ps.set_id in root.get("description") and ps.content_hash() in root.get("description")
    tool = root.find("VendorAnnotations/Tool[@name='jointfmu']/ParameterSet")
    assert tool.get("contentHash") == ps.content_hash() and tool.get("id") == ps.set_id
    de = root.find("DefaultExperiment")
    assert float(de.get("stepSize")) > 0 and float(de.get("stopTime")) > 0
    units = {u.get("name"): u for u in root.find("UnitDefinitions")}
    # mass-normalized modal units have half-integer exponents: name only, no BaseUnit
    assert units["m*kg^0.5"].find("BaseUnit") is None
    assert units["N"].find("BaseUnit").attrib == {"kg": "1", "m": "1", "s": "-2"}
    svs = root.findall("ModelVariables/ScalarVariable")
    for sv in svs:
        assert sv.get("description"), sv.get("name")
        assert sv.find("Real").get("unit") in units, sv.get("name")
    names = [sv.get("name") for sv in svs]
    n = len(ps.modes)
    for i in range(1, n + 1):
        for f in ("f0", "zeta", "joint.Fs", "joint.Kt", "joint.chi", "joint.beta", "force", "q",
                  "qdot", "joint_force"):
            assert f"mode[{i}].{f}" in names
    for k, m in enumerate(ps.modes, 1):   # start values exact (repr round-trip)
        sv = svs[names.index(f"mode[{k}].joint.Fs")]
        assert float(sv.find("Real").get("start")) == m.joint.Fs
    for p in ps.input_points:
        assert f"point.{p.label}.force" in names
    for p in ps.output_points:
        assert {f"point.{p.label}.{c}" for c in "xva"} <= set(names)
    assert ("base.acceleration" in names) == ("base.force" in names) == (ps.base is not None)
    assert {"steps_per_period", "energy.input", "energy.joint", "energy.viscous"} <= set(names)
    outputs = [str(k + 1) for k, sv in enumerate(svs) if sv.get("causality") == "output"]
    assert [u.get("index") for u in root.find("ModelStructure/Outputs")] == outputs
    assert [u.get("index") for u in root.find("ModelStructure/InitialUnknowns")] == outputs
    ident = fmus[name].model_identifier
    assert root.find("CoSimulation").get("canGetAndSetFMUstate") == "true"
    assert root.find("CoSimulation").get("canSerializeFMUstate") == "true"
    assert f"resources/{ident}.py" in files and "resources/requirements.txt" in files
    assert any(f.startswith(f"resources/{fmus[name].core_package}/") for f in files)


def test_names_unique_per_build(fmus):
    idents = {r.model_identifier for r in fmus.values()}
    cores = {r.core_package for r in fmus.values()}
    assert len(idents) == len(cores) == len(NAMES)


def test_info_reports_identity_and_units(fmus, psets):
    info = read_fmu_info(fmus["tray_worn"].path)
    assert info["set_id"] == psets["tray_worn"].set_id
    assert info["content_hash"] == psets["tray_worn"].content_hash() and info["hash_ok"]
    units = {v["name"]: v["unit"] for v in info["variables"]}
    assert units["point.tip.a"] == "m/s2" and units["mode[2].q"] == "m*kg^0.5"
    assert any(r.startswith("numpy") for r in info["requirements"])


# -------------------------------------------------------------- dynamics vs reference
def _ringdown_force(ps, t, level):
    """A short modal force pulse (2 steps) giving each mode an initial velocity with the
    amplitude level * phimax (level < 1 micro-slip, > 1 macro-slip); impulse I = A omega0."""
    f = np.zeros((len(t), len(ps.modes)))
    tau = t[2] - t[0]
    for i, m in enumerate(ps.modes):
        f[:2, i] = level * phimax(m) * m.omega0 / tau
    return f


@pytest.mark.parametrize("level", [0.1, 3.0], ids=["micro", "macro"])
def test_ringdown_simulate_fmu(fmus, psets, level):
    """fmpy.simulate_fmu with modal force pulses vs reference.simulate."""
    ps = psets["tray_nominal"]
    dt = 2e-4
    t = np.arange(751) * dt
    f = _ringdown_force(ps, t, level)
    sig = np.zeros(len(t), dtype=[("time", float)] + [(f"mode[{i + 1}].force", float)
                                                      for i in range(len(ps.modes))])
    sig["time"] = t
    for i in range(len(ps.modes)):
        sig[f"mode[{i + 1}].force"] = f[:, i]
    res = simulate_fmu(str(fmus["tray_nominal"].path), stop_time=t[-1], output_interval=dt,
                       input=sig)
    assert np.allclose(res["time"], t)
    q = np.column_stack([res[f"mode[{i + 1}].q"] for i in range(len(ps.modes))])
    ref = assert_close_to_reference(ps, t, f, q, f"ring-down level {level}")
    # the level really reaches micro- or macro-slip (joint force vs Fs)
    jf = np.abs(ref["joint_force"]).max(axis=0) / np.array([m.joint.Fs for m in ps.modes])
    assert (jf.max() < 0.9) if level < 1 else (jf.max() > 0.999)


def assert_regime(ps, ref, regime):
    """The run really is in micro-slip (every joint force below 0.9 Fs) or reaches macro-slip
    (some joint at Fs)."""
    jf = np.abs(ref["joint_force"]).max(axis=0) / np.array([m.joint.Fs for m in ps.modes])
    assert (jf.max() < 0.9) if regime == "micro" else (jf.max() > 0.999), jf


@pytest.mark.parametrize("regime,amp", [("micro", 2.0), ("macro", 60.0)])
def test_sine_sweep_point_force_slave_loop(slave_of, psets, regime, amp):
    """FMU2Slave loop, point force sweep 40..450 Hz (held per step), vs reference; point.tip.x
    against the mode-shape sum of the reference q."""
    ps = psets["tray_nominal"]
    dt = 2e-4
    t = np.arange(1251) * dt
    f0, f1, T = 40.0, 450.0, t[-1]
    phase = 2 * np.pi * (f0 * t + (f1 - f0) * t ** 2 / (2 * T))
    F = amp * np.sin(phase)
    s = slave_of("tray_nominal")
    s.init()
    names = [f"mode[{i + 1}].q" for i in range(len(ps.modes))] + ["point.tip.x"]
    out = s.run(t, {"point.shaker.force": F}, names)
    fm = modal_force_of(ps, point_forces={"shaker": F}, M=len(t))
    ref = assert_close_to_reference(ps, t, fm, out[:, :-1], "sine sweep")
    assert_regime(ps, ref, regime)
    tip = next(p for p in ps.output_points if p.label == "tip")
    x_ref = ref["q"] @ np.array(tip.shape)
    assert np.abs(out[:, -1] - x_ref).max() <= TOL * np.abs(x_ref).max()


@pytest.mark.parametrize("regime,level", [("micro", 0.1), ("macro", 6.0)])
def test_random_modal_force_slave_loop(slave_of, psets, regime, level):
    """FMU2Slave loop, random held modal forces (seeded), vs reference."""
    ps = psets["tray_worn"]
    dt = 5e-4
    t = np.arange(301) * dt
    rng = np.random.default_rng(20261201)
    scale = np.array([m.joint.Fs for m in ps.modes]) * level
    f = rng.standard_normal((len(t), len(ps.modes))) * scale
    s = slave_of("tray_worn")
    s.init()
    inputs = {f"mode[{i + 1}].force": f[:, i] for i in range(len(ps.modes))}
    out = s.run(t, inputs, [f"mode[{i + 1}].q" for i in range(len(ps.modes))])
    assert_regime(ps, assert_close_to_reference(ps, t, f, out, "random"), regime)


@pytest.mark.parametrize("regime,amp", [("micro", 3.0), ("macro", 60.0)])
def test_base_excitation_simulate_fmu(fmus, psets, regime, amp):
    """simulate_fmu with a base acceleration (sine near mode 1), reference with f = -Gamma a."""
    ps = psets["tray_undertorqued"]
    dt = 2e-4
    t = np.arange(751) * dt
    a = amp * np.sin(2 * np.pi * 0.97 * ps.modes[0].f0 * t)
    sig = np.zeros(len(t), dtype=[("time", float), ("base.acceleration", float)])
    sig["time"], sig["base.acceleration"] = t, a
    res = simulate_fmu(str(fmus["tray_undertorqued"].path), stop_time=t[-1], output_interval=dt,
                       input=sig)
    q = np.column_stack([res[f"mode[{i + 1}].q"] for i in range(len(ps.modes))])
    ref = assert_close_to_reference(ps, t, modal_force_of(ps, base_acc=a, M=len(t)), q, "base")
    assert_regime(ps, ref, regime)


def test_variable_zero_and_tiny_steps(slave_of, psets):
    """Communication steps from 1e-6 s to 0.1 s and zero-length steps (FMI 2.0 sec. 4.2.2
    allows a zero step); compared with the reference on the same grid (zero steps dropped)."""
    ps = psets["tray_nominal"]
    rng = np.random.default_rng(7)
    steps = [1e-6, 0.0, 1e-6, 3e-6, 1e-5, 0.0, 2e-4, 1e-3, 1e-6, 0.1, 0.0, 5e-4, 2e-5]
    t = np.concatenate([[0.0], np.cumsum(steps)])
    f = np.zeros((len(t), len(ps.modes)))
    f[:4] = 1e5 * np.array([phimax(m) for m in ps.modes])       # a 5e-6 s pulse
    f[6:9] = rng.standard_normal((3, len(ps.modes))) * 5.0
    s = slave_of("tray_nominal")
    s.init()
    names = [f"mode[{i + 1}].q" for i in range(len(ps.modes))]
    out = s.run(t, {f"mode[{i + 1}].force": f[:, i] for i in range(len(ps.modes))}, names)
    for k, h in enumerate(steps):
        if h == 0.0:
            assert np.array_equal(out[k + 1], out[k])
    # a zero step k leaves t[k] == t[k+1]; the input held onward is f[k+1], so drop point k
    keep = np.r_[np.array(steps) > 0, True]
    assert_close_to_reference(ps, t[keep], f[keep], out[keep], "variable steps")


# ------------------------------------------------------------------ process isolation
def test_two_builds_in_one_process_give_their_own_results(slave_of, psets):
    """Two FMUs of different parameter sets loaded at once: each matches its own reference
    (pythonfmu shares modules by name inside a process; distinct names keep them apart)."""
    dt = 2e-4
    t = np.arange(401) * dt
    a, b = slave_of("tray_nominal", "a"), slave_of("tray_worn", "b")
    a.init()
    b.init()
    outs = {}
    for name, s in (("tray_nominal", a), ("tray_worn", b)):
        ps = psets[name]
        f = _ringdown_force(psets["tray_nominal"], t, 2.0)   # the same input for both
        out = s.run(t, {f"mode[{i + 1}].force": f[:, i] for i in range(len(ps.modes))},
                    [f"mode[{i + 1}].q" for i in range(len(ps.modes))])
        assert_close_to_reference(ps, t, f, out, name)
        outs[name] = out
    assert not np.allclose(outs["tray_nominal"], outs["tray_worn"], rtol=1e-2)


def test_other_builds_values_as_start_values(slave_of, psets):
    """One FMU takes another build's fitted values at instantiation and then reproduces that
    build's FMU bit for bit (same shapes and base, FMI 2.0 parameters of variability fixed)."""
    worn = psets["tray_worn"]
    values = {}
    for i, m in enumerate(worn.modes, 1):
        values.update({f"mode[{i}].f0": m.f0, f"mode[{i}].zeta": m.zeta,
                       f"mode[{i}].joint.Fs": m.joint.Fs, f"mode[{i}].joint.Kt": m.joint.Kt,
                       f"mode[{i}].joint.chi": m.joint.chi, f"mode[{i}].joint.beta": m.joint.beta})
    same_geometry = all(p.shape == q.shape for p, q in zip(worn.points, psets["tray_nominal"].points))
    if not same_geometry:
        pytest.skip("example builds differ in mode shapes")
    t = np.arange(301) * 2e-4
    F = 40.0 * np.sin(2 * np.pi * 70.0 * t)
    a = slave_of("tray_nominal", "a")
    a.init(values)
    b = slave_of("tray_worn", "b")
    b.init()
    ra = a.run(t, {"point.shaker.force": F})
    rb = b.run(t, {"point.shaker.force": F})
    assert np.array_equal(ra, rb)


# ----------------------------------------------------------------------- FMU state
def _drive(s, t0, n, dt, seed):
    rng = np.random.default_rng(seed)
    rows = []
    for k in range(n):
        s.set({"point.shaker.force": 30.0 * rng.standard_normal(), "base.acceleration":
               5.0 * rng.standard_normal()})
        s.fmu.doStep(currentCommunicationPoint=t0 + k * dt, communicationStepSize=dt)
        rows.append(s.get())
    return np.array(rows)


def test_get_set_state_bit_exact(slave_of):
    """fmi2GetFMUstate / fmi2SetFMUstate (FMI 2.0 sec. 2.1.8): the continued trajectory repeats
    bit for bit, joint memory included."""
    s = slave_of("tray_nominal")
    s.init()
    dt = 2e-4
    _drive(s, 0.0, 100, dt, 1)
    state = s.fmu.getFMUstate()
    first = _drive(s, 100 * dt, 80, dt, 2)
    s.fmu.setFMUstate(state)
    second = _drive(s, 100 * dt, 80, dt, 2)
    s.fmu.freeFMUstate(state)
    assert np.array_equal(first, second)


def test_serialized_state_into_new_instance_bit_exact(slave_of):
    """fmi2SerializeFMUstate / fmi2DeSerializeFMUstate into another instance."""
    a = slave_of("tray_nominal", "a")
    a.init()
    dt = 2e-4
    _drive(a, 0.0, 120, dt, 3)
    st = a.fmu.getFMUstate()
    data = a.fmu.serializeFMUstate(st)
    a.fmu.freeFMUstate(st)
    first = _drive(a, 120 * dt, 60, dt, 4)
    b = slave_of("tray_nominal", "b")
    b.init()
    st_b = b.fmu.deSerializeFMUstate(data)
    b.fmu.setFMUstate(st_b)
    b.fmu.freeFMUstate(st_b)
    second = _drive(b, 120 * dt, 60, dt, 4)
    assert np.array_equal(first, second)


def test_state_of_other_build_rejected_with_message(slave_of):
    """Another build's state: refused with fmi2Error (pythonfmu's binary: fmi2Fatal), at
    fmi2DeSerializeFMUstate or fmi2SetFMUstate, with a message; the current state kept."""
    a = slave_of("tray_nominal", "a")
    a.init()
    _drive(a, 0.0, 10, 2e-4, 5)
    b = slave_of("tray_worn", "b")
    b.init()
    before = b.get()
    data = a.fmu.serializeFMUstate(a.fmu.getFMUstate())
    with pytest.raises(Exception) as exc:
        b.fmu.setFMUstate(b.fmu.deSerializeFMUstate(data))
    assert getattr(exc.value, "status", None) == b.refused
    assert any(st == b.refused and "FMU state rejected" in msg and "avionics_tray@SN-0002" in msg
               for st, msg in b.log)
    assert np.array_equal(b.get(), before)


def test_reset_restarts_from_instantiation(slave_of):
    """fmi2Reset (FMI 2.0 sec. 2.1.6): back to the state after instantiation, start values
    included; the same run repeats exactly."""
    s = slave_of("tray_nominal")
    s.init({"mode[1].zeta": 0.02})
    first = _drive(s, 0.0, 60, 2e-4, 6)
    s.fmu.reset()
    s.fmu.setupExperiment(startTime=0.0)
    s.fmu.enterInitializationMode()      # fmi2GetReal is allowed from here (sec. 4.2.4)
    zeta0 = s.fmu.getReal([s.vr["mode[1].zeta"]])[0]
    s.set({"mode[1].zeta": 0.02})
    s.fmu.exitInitializationMode()
    second = _drive(s, 0.0, 60, 2e-4, 6)
    assert np.array_equal(first, second)
    assert zeta0 != 0.02        # reset dropped the value set before it


# ------------------------------------------------------------------------- failures
def test_nan_input_refused_state_kept(slave_of):
    """NaN input: doStep returns fmi2Discard, an error-status log message names the input, and
    the state from before the step is kept.  The FMU is then in the state "step failed" (FMI 2.0
    sec. 4.2.4): it can be read, and restoring the state saved before lets the run go on exactly
    as if the refused step had never been asked for."""
    s = slave_of("tray_nominal")
    s.init()
    dt = 2e-4
    _drive(s, 0.0, 50, dt, 8)
    before = s.get()
    state = s.fmu.getFMUstate()
    s.set({"point.shaker.force": math.nan})
    with pytest.raises(Exception) as exc:
        s.fmu.doStep(currentCommunicationPoint=50 * dt, communicationStepSize=dt)
    assert getattr(exc.value, "status", None) == 2          # fmi2Discard
    assert any(st == 3 and "shaker" in msg and "finite" in msg for st, msg in s.log), s.log
    with pytest.raises(Exception) as exc:                   # nor can inputs be set now
        s.set({"point.shaker.force": 0.0})
    assert getattr(exc.value, "status", None) == s.refused
    assert np.array_equal(s.get(), before)
    s.fmu.setFMUstate(state)
    after_nan = _drive(s, 50 * dt, 20, dt, 9)
    s.fmu.setFMUstate(state)
    clean = _drive(s, 50 * dt, 20, dt, 9)
    assert np.array_equal(after_nan, clean)


@pytest.mark.parametrize("field,value", [("joint.chi", 0.5), ("zeta", -0.1), ("joint.Fs", 0.0)])
def test_out_of_range_parameter_at_instantiation(slave_of, psets, field, value):
    """Out-of-range start value: fmi2ExitInitializationMode returns fmi2Error (pythonfmu's
    binary: fmi2Fatal) with the check message of ``jointfmu check`` through the FMI logger;
    the FMU is then in the error state and doStep is refused (FMI 2.0 sec. 2.1.3)."""
    ps = psets["tray_nominal"]
    s = slave_of("tray_nominal")
    with pytest.raises(Exception) as exc:
        s.init({f"mode[2].{field}": value})
    assert getattr(exc.value, "status", None) == s.refused
    assert "fmi2ExitInitializationMode" in str(exc.value)
    m = ps.modes[1]
    vals = dict(f0=m.f0, zeta=m.zeta, Fs=m.joint.Fs, Kt=m.joint.Kt, chi=m.joint.chi,
                beta=m.joint.beta)
    vals[field.split(".")[-1]] = value
    expected = check_mode_values(2, m.label, source="FMU parameter", field_prefix="mode[2]",
                                 **vals)
    assert expected
    errors = [msg for st, msg in s.log if st == s.refused]
    assert any(f"mode[2].{field} = {value!r}" in msg and expected[0].allowed in msg
               for msg in errors), errors
    with pytest.raises(Exception) as exc:
        s.fmu.doStep(currentCommunicationPoint=0.0, communicationStepSize=1e-3)
    assert getattr(exc.value, "status", None) == s.refused
    assert any(st == s.refused and "fmi2DoStep is not allowed in the state 'error'" in msg
               for st, msg in s.log)


def test_negative_step_refused(slave_of):
    """A negative step is a call the FMU cannot take: refused, nothing changed (the next step
    runs)."""
    s = slave_of("tray_nominal")
    s.init()
    with pytest.raises(Exception) as exc:
        s.fmu.doStep(currentCommunicationPoint=0.0, communicationStepSize=-1e-3)
    assert getattr(exc.value, "status", None) == s.refused
    assert any(st == s.refused and "step size -0.001" in msg for st, msg in s.log)
    s.fmu.doStep(currentCommunicationPoint=0.0, communicationStepSize=1e-3)


def test_parameter_set_after_initialization_refused(slave_of):
    """FMI 2.0 sec. 2.2.7: a parameter of variability "fixed" cannot change after
    initialization: fmi2SetReal returns fmi2Error (pythonfmu's binary: fmi2Fatal) with a message
    naming it, and nothing of the call is set, the input beside it included."""
    s = slave_of("tray_nominal")
    s.init()
    with pytest.raises(Exception) as exc:
        s.set({"point.shaker.force": 5.0, "mode[1].joint.chi": -0.2})
    assert getattr(exc.value, "status", None) == s.refused
    assert s.fmu.getReal([s.vr["mode[1].joint.chi"], s.vr["point.shaker.force"]]) == [-0.45, 0.0]
    assert any(st == s.refused and "mode[1].joint.chi" in msg and "before fmi2ExitInitializationMode"
               in msg for st, msg in s.log)


def test_build_forgets_its_staging_modules(fmus):
    """pythonfmu imports the entry module at build time; the build must not leave it (or the
    core package, or the staging folder) behind, or this process would run the staging copy."""
    import sys
    for r in fmus.values():
        assert r.model_identifier not in sys.modules or \
            "jointfmu_build_" not in (sys.modules[r.model_identifier].__file__ or "")
        assert not any(m == r.core_package or m.startswith(r.core_package + ".")
                       for m, mod in sys.modules.items()
                       if "jointfmu_build_" in (getattr(mod, "__file__", "") or ""))
    assert not any("jointfmu_build_" in p for p in sys.path)


def test_new_source_gives_new_names(psets, monkeypatch):
    """Two versions of jointfmu must not share module names in one process either."""
    from jointfmu.fmu import bundle
    ps = psets["tray_nominal"]
    before = bundle.fmu_names(ps)
    monkeypatch.setattr(bundle, "source_hash", lambda: "0" * 64)
    after = bundle.fmu_names(ps)
    assert before[0] != after[0] and before[1] != after[1]
    assert after[0].startswith("Jfmu_avionics_tray_") and after[1].startswith("jfmu_core_")


def test_structure_without_base(tmp_path, psets):
    """A set without [base]: no base.acceleration / base.force, validate_fmu clean, and a
    point-force run against the reference (f = phi F)."""
    from jointfmu.params import parse_parameter_set
    d = psets["tray_nominal"].to_dict()
    d.pop("base")
    for m in d["modes"]:
        m.pop("base_participation", None)
    d["structure"]["build"] = "fixed-base variant"
    ps = parse_parameter_set(d)
    toml = tmp_path / "fixed.toml"
    toml.write_text(ps.to_toml())
    r = build_fmu(toml, tmp_path / "fixed.fmu")
    assert validate_fmu(str(r.path)) == []
    s = Slave(r.path)
    try:
        assert "base.acceleration" not in s.vr and "base.force" not in s.vr
        s.init()
        t = np.arange(201) * 2e-4
        F = 30.0 * np.sin(2 * np.pi * 131.0 * t)
        out = s.run(t, {"point.psu_foot.force": F},
                    [f"mode[{i + 1}].q" for i in range(len(ps.modes))])
    finally:
        s.close()
    assert_close_to_reference(ps, t, modal_force_of(ps, point_forces={"psu_foot": F}, M=len(t)),
                              out, "no base")


def test_bundle_is_self_contained(fmus):
    """The bundled core is loaded under its own name, so no bundled module may import
    ``jointfmu`` absolutely (it would run the host's copy); host-side modules stay out."""
    import re
    r = fmus["tray_nominal"]
    with zipfile.ZipFile(r.path) as z:
        prefix = f"resources/{r.core_package}/"
        core = {n[len(prefix):]: z.read(n).decode() for n in z.namelist()
                if n.startswith(prefix) and n.endswith(".py")}
        req = z.read("resources/requirements.txt").decode()
    assert {"__init__.py", "fmu/slave.py", "params/parameter_set.py", "params/names.py",
            "params/rules.py", "physics/integrate.py",
            "fmu/variables.py"} <= set(core)
    # only params, physics, the slave and its table travel (fmu.bundle.BUNDLE)
    assert {n.split("/")[0] for n in core if "/" in n} == {"params", "physics", "fmu"}
    assert {n for n in core if n.startswith("fmu/")} == {"fmu/__init__.py", "fmu/slave.py",
                                                         "fmu/variables.py"}
    for name, text in core.items():
        assert not re.search(r"^\s*(import|from)\s+jointfmu\b", text, re.M), name
    assert re.search(r"^numpy", req, re.M) and re.search(r"^scipy", req, re.M)


def test_direct_feedthrough_outputs_see_inputs_before_a_step(slave_of, psets):
    """Accelerations and the interface force depend directly on the inputs (FMI 2.0 sec. 2.2.8,
    ModelStructure dependencies): set an input, read them, no doStep in between.  At rest the
    modal acceleration is the modal force, so tip.a = sum_i phi_tip,i phi_shaker,i F and
    base.force = F r_shaker - sum_i Gamma_i q_i'' (modal.py; Newton's second law)."""
    ps = psets["tray_nominal"]
    s = slave_of("tray_nominal")
    s.init()
    F = 7.0
    s.set({"point.shaker.force": F})
    shaker = next(p for p in ps.points if p.label == "shaker")
    tip = next(p for p in ps.points if p.label == "tip")
    qdd = np.array(shaker.shape) * F
    gamma = np.array([m.base_participation for m in ps.modes])
    got_a, got_base = s.get(["point.tip.a", "base.force"])
    assert got_a == pytest.approx(float(np.dot(tip.shape, qdd)), rel=1e-12)
    assert got_base == pytest.approx(F * shaker.base_factor - float(gamma @ qdd), rel=1e-12)


# ------------------------------------------------------------ getReal / setReal (FMI 2.0 sec. 2.1.7)
def test_one_get_real_reads_parameters_inputs_and_outputs(slave_of, psets):
    """fmi2GetReal with value references of every causality in one call, in any order, repeated:
    each value is the one it has alone (parameter start value, input as set, output as read on
    its own)."""
    ps = psets["tray_nominal"]
    s = slave_of("tray_nominal")
    s.init()
    _drive(s, 0.0, 40, 2e-4, 3)
    s.set({"point.shaker.force": 4.5})
    names = ["point.tip.a", "mode[2].joint.chi", "point.shaker.force", "mode[1].q",
             "point.tip.a", "base.force", "steps_per_period"]
    together = s.get(names)
    alone = np.array([s.get([n])[0] for n in names])
    assert np.array_equal(together, alone)
    assert together[1] == ps.modes[1].joint.chi and together[2] == 4.5 and together[0] == together[4]


def test_unknown_value_reference_reported(slave_of):
    """A value reference that is not in modelDescription.xml: getReal and setReal return
    fmi2Error (pythonfmu's binary: fmi2Fatal), an error-status message names it and the allowed
    range, and nothing changes."""
    s = slave_of("tray_nominal")
    s.init()
    n = len(s.md.modelVariables)
    before = s.get()
    with pytest.raises(Exception) as exc:
        s.fmu.getReal([s.vr["mode[1].q"], n + 5])
    assert getattr(exc.value, "status", None) == s.refused
    with pytest.raises(Exception):
        s.fmu.setReal([s.vr["point.shaker.force"], n + 7], [1.0, 1.0])
    msgs = [msg for st, msg in s.log if st == s.refused]
    assert any(f"value reference {n + 5} is not a variable" in m and f"0..{n - 1}" in m for m in msgs)
    assert any(f"value reference {n + 7} is not a variable" in m and "nothing was changed" in m
               for m in msgs)
    assert np.array_equal(s.get(), before)
    assert s.fmu.getReal([s.vr["point.shaker.force"]]) == [0.0]


def test_output_cannot_be_set(slave_of):
    s = slave_of("tray_nominal")
    s.init()
    before = s.get()
    with pytest.raises(Exception) as exc:
        s.set({"point.tip.x": 3.0})
    assert getattr(exc.value, "status", None) == s.refused
    assert np.array_equal(s.get(), before)
    assert any(st == s.refused and "point.tip.x is an output and cannot be set" in msg for st, msg in s.log)


def test_input_beyond_the_allowed_magnitude_refused(slave_of):
    """A finite input too large for the core (|value| > 1e12) is refused at doStep like NaN,
    named by its FMU variable; a valid value afterwards lets the run go on."""
    s = slave_of("tray_nominal")
    s.init()
    state = s.fmu.getFMUstate()
    s.set({"base.acceleration": 1e15})
    with pytest.raises(Exception) as exc:
        s.fmu.doStep(currentCommunicationPoint=0.0, communicationStepSize=1e-3)
    assert getattr(exc.value, "status", None) == 2          # fmi2Discard
    assert any(st == 3 and "base.acceleration = 1000000000000000.0" in msg
               and "|value| <= 1e+12" in msg for st, msg in s.log), s.log
    s.fmu.setFMUstate(state)
    s.set({"base.acceleration": 1.0})
    s.fmu.doStep(currentCommunicationPoint=0.0, communicationStepSize=1e-3)
