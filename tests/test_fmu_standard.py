"""FMI 2.0's rules, through both FMU binaries (jointfmu's native shell and pythonfmu's).

Checked against the FMI 2.0 standard, each test naming its section: the direct dependencies
that ModelStructure declares, against the FMU's behaviour (sec. 2.2.8); the co-simulation state
machine, call by call in every state (sec. 4.2.4, its table written out here as
``FMI2_ALLOWED``); the status of a refused call (sec. 2.1.3); the status queries a master makes
after fmi2Discard (sec. 4.2.3) and fmpy's ``simulate_fmu``, which makes them; FMU states that
are not this FMU's (sec. 2.1.8); text that reaches modelDescription.xml (XML 1.0 sec. 2.2).

pythonfmu's binary has no state machine of its own and cannot return fmi2Error: the slave
refuses what reaches it and pythonfmu turns that into fmi2Fatal (slave.py); the calls its C++
answers alone (the status queries, the Integer/Boolean/String calls, fmi2SetDebugLogging...)
follow pythonfmu's rules, not these.
"""
from __future__ import annotations

import ctypes
import json
import math
import shutil
import zipfile
from pathlib import Path
from xml.etree import ElementTree as ET

import numpy as np
import pytest

fmpy = pytest.importorskip("fmpy")
from fmpy import extract, read_model_description, simulate_fmu  # noqa: E402
from fmpy.fmi2 import fmi2DoStepStatus, fmi2LastSuccessfulTime, fmi2Terminated  # noqa: E402
from fmpy.validation import validate_fmu  # noqa: E402

from jointfmu.errors import BuildError  # noqa: E402
from jointfmu.fmu.build import build_fmu  # noqa: E402
from jointfmu.fmu.native import compile_shell  # noqa: E402
from jointfmu.fmu import slave as slave_module  # noqa: E402
from jointfmu.params import load_parameter_set  # noqa: E402

from test_fmu import Slave, _drive  # noqa: E402

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
NOMINAL = EXAMPLES / "tray_nominal.toml"

# A structure whose points see only some modes, so that not every output depends on every
# input (invented for this test).  Sum Gamma^2 = 0.25 + 0.09 = 0.34 kg <= 2 kg; each Kt below
# (2 pi f0)^2 = 9.87e4, 5.68e5, 3.55e6 1/s^2 (derived here).
SPARSE = """\
format = "jointfmu-params/1"
[structure]
name = "sparse_bracket"
build = "S-1"
description = "three modes; points that see only some of them"
[base]
total_mass = 2.0
direction = "z"
[[modes]]
label = "m1"
f0 = 50.0
zeta = 0.01
base_participation = 0.5
[modes.joint]
Fs = 5.0
Kt = 2.0e4
chi = -0.5
beta = 0.1
[[modes]]
label = "m2"
f0 = 120.0
zeta = 0.01
base_participation = 0.0
[modes.joint]
Fs = 5.0
Kt = 1.0e5
chi = -0.5
beta = 0.1
[[modes]]
label = "m3"
f0 = 300.0
zeta = 0.01
base_participation = 0.3
[modes.joint]
Fs = 5.0
Kt = 5.0e5
chi = -0.5
beta = 0.1
[[points]]
label = "drive"
role = "input"
direction = "+z"
shape = [1.0, 0.0, 0.0]
base_factor = 0.0
[[points]]
label = "push"
role = "input"
direction = "+z"
shape = [0.0, 0.7, 0.0]
base_factor = 1.0
[[points]]
label = "probe"
role = "output"
direction = "+z"
shape = [0.0, 0.8, 0.3]
base_factor = 1.0
[[points]]
label = "edge"
role = "output"
direction = "+z"
shape = [0.4, 0.0, 0.0]
base_factor = 0.0
[[points]]
label = "quiet"
role = "output"
direction = "+z"
shape = [0.0, 0.6, 0.0]
base_factor = 0.0
"""


def _can_compile() -> bool:
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        return compile_shell(Path(d), "probe")[0] is not None


needs_cc = pytest.mark.skipif(not _can_compile(), reason="the native shell cannot be compiled here")
BINARIES = [pytest.param("native", marks=needs_cc), "pythonfmu"]
#: The status of a refused call: fmi2Error (sec. 2.1.3); pythonfmu's binary can only say fmi2Fatal.
REFUSED = {"native": 3, "pythonfmu": 4}


@pytest.fixture(scope="module")
def built(tmp_path_factory, example_fmus):
    out = tmp_path_factory.mktemp("standard")
    sparse = out / "sparse.toml"
    sparse.write_text(SPARSE)
    made = {}
    for which, toml in (("nominal", NOMINAL), ("sparse", sparse)):
        for kind in ("native", "pythonfmu"):
            session = example_fmus["tray_nominal"] if which == "nominal" else None
            if session is not None and session.binary["kind"] == kind:
                made[which, kind] = session.path     # the session's build has it already
                continue
            try:
                made[which, kind] = build_fmu(toml, out / f"{which}_{kind}.fmu", binary=kind).path
            except BuildError:
                made[which, kind] = None
    return made


@pytest.fixture
def open_fmu(built):
    made = []

    def make(kind, which="nominal", instance="jf"):
        if built[which, kind] is None:
            pytest.skip(f"no {kind} build")
        s = Slave(built[which, kind], instance)
        made.append(s)
        return s
    yield make
    for s in made:
        s.close()


def status_of(call, *args):
    """The FMI status of a call through fmpy (which raises for anything above fmi2Warning)."""
    try:
        call(*args)
    except Exception as exc:  # fmpy.fmi1.FMICallException
        return getattr(exc, "status", -1)
    return 0


# ------------------------------------------------------------- ModelStructure (sec. 2.2.8)
def _declared(path):
    md = read_model_description(str(path))
    deps = {u.variable.name: {d.name for d in u.dependencies} for u in md.outputs}
    kinds = {u.variable.name: set(u.dependenciesKind) for u in md.outputs}
    inputs = [v.name for v in md.modelVariables if v.causality == "input"]
    return deps, kinds, inputs


@pytest.mark.parametrize("which", ["nominal", "sparse"])
@pytest.mark.parametrize("kind", BINARIES)
def test_declared_dependencies_are_what_the_fmu_does(open_fmu, built, kind, which):
    """FMI 2.0 sec. 2.2.8: an output lists exactly the inputs it depends on at a communication
    point.  Perturb each input before a step and see which outputs move: they are the declared
    ones, in the nominal set (all outputs a and base.force see every input) and in one whose
    points see only some modes.  States, displacements, velocities, joint forces and energies
    change only in doStep and declare nothing."""
    deps, kinds, inputs = _declared(built[which, kind])
    s = open_fmu(kind, which)
    s.init()
    rng = np.random.default_rng(3)
    for k in range(20):
        s.set({n: float(rng.standard_normal()) for n in inputs})
        s.fmu.doStep(currentCommunicationPoint=k * 1e-4, communicationStepSize=1e-4)
    y0 = s.get()
    for name in inputs:
        x0 = s.get([name])[0]
        s.set({name: x0 + 1.0})
        y1 = s.get()
        s.set({name: x0})
        assert np.array_equal(s.get(), y0), name         # setting it back restores every output
        moved = {o for o, a, b in zip(s.outputs, y0, y1) if a != b}
        declared = {o for o, d in deps.items() if name in d}
        assert moved == declared, (name, sorted(moved ^ declared))
    assert set().union(*kinds.values()) <= {"constant"}
    assert all(not d for o, d in deps.items() if not (o.endswith(".a") or o == "base.force"))


@pytest.mark.parametrize("kind", BINARIES)
def test_dependencies_enter_with_constant_factors(open_fmu, kind):
    """dependenciesKind="constant" (sec. 2.2.8: c*v, c fixed before initialization): the change
    of an output per unit input is the same at another state.  Values derived here from the
    sparse set by the modal equations (Craig and Kurdila 2006, modal superposition; Newton's
    second law for the base force): d probe.a/d push.force = 0.8 * 0.7; d quiet.a/d push.force
    = 0.6 * 0.7; d edge.a/d base.acceleration = 0 - 0.4 * 0.5; d base.force/d base.acceleration
    = -(2 - 0.34); d base.force/d mode[1].force = -0.5; d base.force/d drive.force = 0 - 0.5."""
    s = open_fmu(kind, "sparse")
    s.init()
    expected = {("probe.a", "push.force"): 0.56, ("quiet.a", "push.force"): 0.42,
                ("edge.a", "base.acceleration"): -0.2, ("base.force", "base.acceleration"): -1.66,
                ("base.force", "mode[1].force"): -0.5, ("base.force", "drive.force"): -0.5}

    def factors():
        got = {}
        for (out, inp), _ in expected.items():
            o = out if out == "base.force" else f"point.{out}"
            i = inp if inp.startswith(("base.", "mode[")) else f"point.{inp}"
            x0 = s.get([i])[0]
            y0 = s.get([o])[0]
            s.set({i: x0 + 2.0})
            got[out, inp] = (s.get([o])[0] - y0) / 2.0
            s.set({i: x0})
        return got

    first = factors()
    _drive_sparse(s, 30)
    second = factors()
    for key, value in expected.items():
        assert first[key] == pytest.approx(value, rel=1e-9, abs=1e-12), key
        assert second[key] == pytest.approx(first[key], rel=1e-9, abs=1e-12), key


def _drive_sparse(s, n):
    rng = np.random.default_rng(5)
    for k in range(n):
        s.set({"point.drive.force": 40.0 * rng.standard_normal(),
               "point.push.force": 40.0 * rng.standard_normal(),
               "base.acceleration": 5.0 * rng.standard_normal()})
        s.fmu.doStep(currentCommunicationPoint=k * 2e-4, communicationStepSize=2e-4)


def test_model_description_lists_the_dependencies_of_the_variable_table(built):
    """The XML carries the variable table's feedthrough: 1-based ScalarVariable indices, in
    ascending order, one kind per dependency (schema fmi2VariableDependency.xsd)."""
    from jointfmu.fmu.variables import variable_table

    path = built["sparse", "pythonfmu"]
    with zipfile.ZipFile(path) as z:
        root = ET.fromstring(z.read("modelDescription.xml"))
    table = variable_table(load_parameter_set(Path(path).with_name("sparse.toml")))
    unknowns = root.findall("ModelStructure/Outputs/Unknown")
    assert [int(u.get("index")) for u in unknowns] == [k + 1 for k, v in enumerate(table)
                                                       if v.is_output]
    for u in unknowns:
        var = table[int(u.get("index")) - 1]
        got = [int(x) for x in u.get("dependencies").split()]
        assert got == sorted(got) == [vr + 1 for vr in var.depends_on]
        assert u.get("dependenciesKind").split() == ["constant"] * len(got)
    assert validate_fmu(str(path)) == []


# ------------------------------------------------------------ state machine (sec. 4.2.4)
STATES = ("instantiated", "initialization mode", "step complete", "step failed", "terminated",
          "error")
_INST, _INIT, _DONE, _FAIL, _TERM, _ERR = STATES
_READ = {_INIT, _DONE, _FAIL, _TERM, _ERR}
_SET = {_INST, _INIT, _DONE}
_ANY = set(STATES)
_STATUS = {_DONE, _FAIL, _TERM}
#: FMI 2.0 sec. 4.2.4, the table of allowed calls per state for co-simulation, written out
#: from the standard (the same as the Modelica Association's Reference FMUs implement it);
#: "step in progress" and "step canceled" cannot occur (doStep is synchronous).
FMI2_ALLOWED = {
    "fmi2SetDebugLogging": _ANY, "fmi2SetupExperiment": {_INST},
    "fmi2EnterInitializationMode": {_INST}, "fmi2ExitInitializationMode": {_INIT},
    "fmi2Terminate": {_DONE, _FAIL}, "fmi2Reset": _ANY,
    "fmi2GetReal": _READ, "fmi2GetInteger": _READ, "fmi2GetBoolean": _READ,
    "fmi2GetString": _READ, "fmi2SetReal": _SET, "fmi2SetInteger": _SET,
    "fmi2SetBoolean": _SET, "fmi2SetString": _SET,
    "fmi2GetFMUstate": _ANY, "fmi2SetFMUstate": _ANY, "fmi2FreeFMUstate": _ANY,
    "fmi2SerializedFMUstateSize": _ANY, "fmi2SerializeFMUstate": _ANY,
    "fmi2DeSerializeFMUstate": _ANY, "fmi2GetDirectionalDerivative": _READ,
    "fmi2SetRealInputDerivatives": _SET, "fmi2GetRealOutputDerivatives": _READ - {_INIT},
    "fmi2DoStep": {_DONE}, "fmi2CancelStep": set(), "fmi2GetStatus": _STATUS,
    "fmi2GetRealStatus": _STATUS, "fmi2GetIntegerStatus": _STATUS,
    "fmi2GetBooleanStatus": _STATUS, "fmi2GetStringStatus": _STATUS,
}


def _into(s, state):
    """Bring a fresh instance into ``state`` of the state machine."""
    if state == _ERR:
        s.set({"mode[1].joint.chi": 0.5})        # out of range: refused at exit
    if state != _INST:
        s.fmu.setupExperiment(startTime=0.0)
        s.fmu.enterInitializationMode()
    if state in (_DONE, _FAIL, _TERM):
        s.fmu.exitInitializationMode()
    if state == _ERR:
        assert status_of(s.fmu.exitInitializationMode) == s.refused
    if state == _FAIL:
        s.set({"point.shaker.force": math.nan})
        assert status_of(s.fmu.doStep, 0.0, 1e-4) == 2
    if state == _TERM:
        s.fmu.doStep(currentCommunicationPoint=0.0, communicationStepSize=1e-4)
        s.fmu.terminate()


def _calls(s):
    """Each FMI call with arguments it accepts where it is allowed; the expected status there
    (fmi2OK, or fmi2Discard for the status kinds this FMU has nothing to report on, sec. 2.1.3;
    or fmi2Error for the functions it does not provide)."""
    out_vr = [s.vr["point.tip.a"]]
    in_vr = [s.vr["point.shaker.force"]]
    fmu = s.fmu

    def with_state(f):
        def call():
            st = fmu.getFMUstate()
            try:
                f(st)
            finally:
                fmu.freeFMUstate(st)
        return call

    return {
        "fmi2SetDebugLogging": (lambda: fmu.setDebugLogging(True, []), 0),
        "fmi2SetupExperiment": (lambda: fmu.setupExperiment(startTime=0.0), 0),
        "fmi2EnterInitializationMode": (fmu.enterInitializationMode, 0),
        "fmi2ExitInitializationMode": (fmu.exitInitializationMode, 0),
        "fmi2Terminate": (fmu.terminate, 0),
        "fmi2Reset": (fmu.reset, 0),
        "fmi2GetReal": (lambda: fmu.getReal(out_vr), 0),
        "fmi2GetInteger": (lambda: fmu.getInteger([]), 0),
        "fmi2GetBoolean": (lambda: fmu.getBoolean([]), 0),
        "fmi2GetString": (lambda: fmu.getString([]), 0),
        "fmi2SetReal": (lambda: fmu.setReal(in_vr, [1.0]), 0),
        "fmi2SetInteger": (lambda: fmu.setInteger([], []), 0),
        "fmi2SetBoolean": (lambda: fmu.setBoolean([], []), 0),
        "fmi2SetString": (lambda: fmu.setString([], []), 0),
        "fmi2GetFMUstate": (with_state(lambda st: None), 0),
        "fmi2SetFMUstate": (with_state(fmu.setFMUstate), 0),
        "fmi2FreeFMUstate": (with_state(lambda st: None), 0),
        "fmi2SerializedFMUstateSize": (with_state(fmu.serializeFMUstate), 0),
        "fmi2SerializeFMUstate": (with_state(fmu.serializeFMUstate), 0),
        "fmi2DeSerializeFMUstate": (with_state(
            lambda st: fmu.freeFMUstate(fmu.deSerializeFMUstate(fmu.serializeFMUstate(st)))), 0),
        "fmi2GetDirectionalDerivative": (lambda: fmu.getDirectionalDerivative(out_vr, in_vr,
                                                                              [1.0]), 3),
        "fmi2SetRealInputDerivatives": (lambda: fmu.setRealInputDerivatives([], [], []), 0),
        "fmi2GetRealOutputDerivatives": (lambda: fmu.getRealOutputDerivatives([], []), 0),
        "fmi2DoStep": (lambda: fmu.doStep(currentCommunicationPoint=0.0,
                                          communicationStepSize=1e-4), 0),
        "fmi2CancelStep": (fmu.cancelStep, 3),
        "fmi2GetStatus": (lambda: fmu.getStatus(fmi2DoStepStatus), 2),
        "fmi2GetRealStatus": (lambda: fmu.getRealStatus(fmi2LastSuccessfulTime), 0),
        "fmi2GetIntegerStatus": (lambda: fmu.getIntegerStatus(fmi2DoStepStatus), 2),
        "fmi2GetBooleanStatus": (lambda: fmu.getBooleanStatus(fmi2Terminated), 0),
        "fmi2GetStringStatus": (lambda: fmu.getStringStatus(fmi2DoStepStatus), 2),
    }


@needs_cc
@pytest.mark.parametrize("state", STATES)
def test_native_binary_follows_the_state_machine(built, state):
    """Every FMI call in every state of the native binary: allowed calls do what they do,
    the others return fmi2Error with a message naming the call, the state and where it is
    allowed (sec. 4.2.4), and change nothing: the FMU is still in its state (the same calls
    are allowed and refused afterwards)."""
    path = built["nominal", "native"]
    if path is None:
        pytest.skip("no native build")
    for call in FMI2_ALLOWED:
        s = Slave(path, "m")
        try:
            _into(s, state)
            fn, ok_status = _calls(s)[call]
            n_log = len(s.log)
            got = status_of(fn)
            if state in FMI2_ALLOWED[call]:
                assert got == ok_status, (call, state, got, s.log[n_log:])
            else:
                assert got == 3, (call, state, got)
                assert any(f"{call} is not allowed in the state '{state}'" in m
                           for _, m in s.log[n_log:]), (call, s.log[n_log:])
                assert _probe_state(s) == state, call
        finally:
            s.close()


def _probe_state(s):
    """The state an instance is in, told by calls that change nothing of it: which of
    fmi2SetupExperiment, fmi2GetReal, fmi2SetReal (of an input) and fmi2GetRealStatus are
    allowed, and fmi2Terminated (sec. 4.2.4, the table above)."""
    fmu = s.fmu
    key = (status_of(fmu.setupExperiment, None, 0.0) == 0,
           status_of(fmu.getReal, [s.vr["point.tip.a"]]) == 0,
           status_of(fmu.setReal, [s.vr["point.shaker.force"]], [1.0]) == 0,
           status_of(fmu.getRealStatus, fmi2LastSuccessfulTime) == 0)
    if key[3]:
        if fmu.getBooleanStatus(fmi2Terminated):
            return _FAIL
    return {(True, False, True, False): _INST, (False, True, True, False): _INIT,
            (False, True, True, True): _DONE, (False, True, False, True): _TERM,
            (False, True, False, False): _ERR}.get(key, "?")


@needs_cc
def test_native_and_slave_tables_are_the_standards(built):
    """The shell's table (exported as jointfmu_allowed_states) and the slave's
    (slave.ALLOWED_STATES, what pythonfmu's binary relies on) are the standard's (sec. 4.2.4)."""
    path = built["nominal", "native"]
    md = read_model_description(str(path))
    d = Path(extract(str(path)))
    try:
        lib = ctypes.CDLL(str(d / "binaries" / "linux64" / f"{md.coSimulation.modelIdentifier}.so"))
        lib.jointfmu_allowed_states.restype = ctypes.c_int
        lib.jointfmu_allowed_states.argtypes = [ctypes.c_char_p]
        for call, states in FMI2_ALLOWED.items():
            mask = lib.jointfmu_allowed_states(call.encode())
            assert {STATES[k] for k in range(6) if mask >> k & 1} == states, call
        assert lib.jointfmu_allowed_states(b"fmi2NoSuchCall") == -1
    finally:
        shutil.rmtree(d, ignore_errors=True)
    assert slave_module.FMI_STATES == STATES
    for call, states in slave_module.ALLOWED_STATES.items():
        assert {STATES[k] for k in states} == FMI2_ALLOWED[call], call


#: The calls pythonfmu's binary hands to the slave (the others its C++ answers itself).
PYTHON_CALLS = ("fmi2SetupExperiment", "fmi2EnterInitializationMode",
                "fmi2ExitInitializationMode", "fmi2Terminate", "fmi2GetReal", "fmi2SetReal",
                "fmi2DoStep", "fmi2GetFMUstate", "fmi2SetFMUstate")


@pytest.mark.parametrize("state", STATES)
def test_pythonfmu_binary_refuses_the_calls_that_reach_the_slave(built, state):
    """pythonfmu's binary: the same table for the calls it hands to the slave; a refused call
    returns fmi2Fatal (pythonfmu's only non-OK status besides doStep's fmi2Discard), with the
    slave's message, and the instance stays usable and safe to free."""
    path = built["nominal", "pythonfmu"]
    for call in PYTHON_CALLS:
        s = Slave(path, "p")
        try:
            _into(s, state)
            fn, ok_status = _calls(s)[call]
            n_log = len(s.log)
            got = status_of(fn)
            if state in FMI2_ALLOWED[call]:
                assert got == ok_status, (call, state, got, s.log[n_log:])
            else:
                assert got == 4, (call, state, got)
                assert any(st == s.refused and f"{call} is not allowed in the state '{state}'" in m
                           for st, m in s.log[n_log:]), (call, s.log[n_log:])
        finally:
            s.close()


@pytest.mark.parametrize("kind", BINARIES)
@pytest.mark.parametrize("when", ["before initialization", "in initialization mode",
                                  "after terminate"])
def test_do_step_out_of_order_changes_nothing(open_fmu, kind, when):
    """Issue 12 item 3 (sec. 4.2.4): doStep before initialization, in initialization mode or
    after terminate is refused with a message, and the run is then exactly that of an FMU that
    was never asked (bit for bit), or, after terminate, its outputs stay as they were."""
    s = open_fmu(kind, instance="a")
    clean = open_fmu(kind, instance="b")
    clean.init()
    reference = _drive(clean, 0.0, 30, 2e-4, 12)
    if when == "after terminate":
        s.init()
        first = _drive(s, 0.0, 30, 2e-4, 12)
        s.fmu.terminate()
        before = s.get()
    elif when == "in initialization mode":
        s.fmu.setupExperiment(startTime=0.0)
        s.fmu.enterInitializationMode()
    got = status_of(s.fmu.doStep, 0.0, 2e-4)
    assert got == REFUSED[kind]
    assert any(st == s.refused and "fmi2DoStep is not allowed in the state" in m for st, m in s.log)
    if when == "after terminate":
        assert np.array_equal(first, reference) and np.array_equal(s.get(), before)
        return
    if when == "before initialization":
        s.fmu.setupExperiment(startTime=0.0)
        s.fmu.enterInitializationMode()
    s.fmu.exitInitializationMode()
    assert np.array_equal(_drive(s, 0.0, 30, 2e-4, 12), reference)


@pytest.mark.parametrize("kind", BINARIES)
def test_bad_parameter_refused_at_exit_initialization_with_check_message(open_fmu, kind):
    """Issue 12 item 4: a parameter out of range set at instantiation makes
    fmi2ExitInitializationMode return the error (fmi2Error; pythonfmu's binary fmi2Fatal) with
    the message of `jointfmu check` for that value (its field, value and allowed range)."""
    from jointfmu.params import check_mode_values

    ps = load_parameter_set(NOMINAL)
    m = ps.modes[2]
    expected = check_mode_values(3, m.label, m.f0, m.zeta, m.joint.Fs, m.joint.Kt, -1.5,
                                 m.joint.beta, "FMU parameter", field_prefix="mode[3]")
    s = open_fmu(kind)
    s.set({"mode[3].joint.chi": -1.5})
    s.fmu.setupExperiment(startTime=0.0)
    s.fmu.enterInitializationMode()
    assert status_of(s.fmu.exitInitializationMode) == REFUSED[kind]
    (p,) = expected
    text = f"FMU parameter: mode[3].joint.chi = -1.5: {p.allowed} ({p.hint}; mode 3 is {m.label!r})"
    assert any(st == s.refused and text in msg for st, msg in s.log), s.log


# ----------------------------------------------------- status after a Discard (sec. 4.2.3)
@pytest.mark.parametrize("kind", BINARIES)
def test_status_queries_after_discard(open_fmu, kind):
    """fmi2GetBooleanStatus(fmi2Terminated) and fmi2GetRealStatus(fmi2LastSuccessfulTime), as a
    master asks them after fmi2Discard: false and the end of the last step while steps succeed;
    after a refused step true (the slave cannot go on by itself) and the start of that step.
    The same in both binaries.  Once an FMU state is restored and a step taken, the native
    binary says false again; pythonfmu 0.7.0's keeps saying true (measured; sec. 4.2.3 defines
    the answer only after a Discard)."""
    s = open_fmu(kind)
    s.init()
    dt = 2e-4
    saved = s.fmu.getFMUstate()
    _drive(s, 0.0, 3, dt, 1)
    t = 2 * dt
    assert s.fmu.getBooleanStatus(fmi2Terminated) is False
    assert s.fmu.getRealStatus(fmi2LastSuccessfulTime) == t + dt
    s.set({"point.shaker.force": math.inf})
    assert status_of(s.fmu.doStep, 3 * dt, dt) == 2
    assert s.fmu.getBooleanStatus(fmi2Terminated) is True
    assert s.fmu.getRealStatus(fmi2LastSuccessfulTime) == 3 * dt
    s.fmu.setFMUstate(saved)
    s.fmu.doStep(currentCommunicationPoint=0.0, communicationStepSize=dt)
    assert s.fmu.getRealStatus(fmi2LastSuccessfulTime) == dt
    assert s.fmu.getBooleanStatus(fmi2Terminated) is (kind == "pythonfmu")


def test_simulate_fmu_stops_at_the_refused_step_in_both_binaries(built):
    """fmpy's simulate_fmu asks fmi2Terminated after a Discard and, when true, records
    fmi2LastSuccessfulTime and stops (fmpy.simulation.simulateCS): with a NaN in the input at
    t = 0.01 s both binaries stop there, with the same rows."""
    results = {}
    t = np.arange(0, 0.0201, 1e-3)
    sig = np.zeros(len(t), dtype=[("time", float), ("point.shaker.force", float)])
    sig["time"] = t
    sig["point.shaker.force"] = 10.0 * np.sin(2 * np.pi * 70.0 * t)
    sig["point.shaker.force"][10:] = np.nan
    for kind in ("native", "pythonfmu"):
        if built["nominal", kind] is None:
            continue
        results[kind] = simulate_fmu(str(built["nominal", kind]), stop_time=0.02,
                                     output_interval=1e-3, input=sig,
                                     output=["point.tip.a", "mode[1].q"])
    for kind, res in results.items():
        assert res["time"][-1] == pytest.approx(0.01, abs=1e-12), kind
        assert len(res) < 22
    if len(results) == 2:
        assert np.array_equal(results["native"], results["pythonfmu"])


# ------------------------------------------------------------------ FMU states (sec. 2.1.8)
def _bad_state(kind_of_bad, s, other):
    good = s.fmu.serializeFMUstate(s.fmu.getFMUstate())
    if kind_of_bad == "garbage":
        return b"\x00\x01 not a state"
    if kind_of_bad == "truncated":
        return good[: len(good) // 2]
    if kind_of_bad == "other build":
        return other.fmu.serializeFMUstate(other.fmu.getFMUstate())
    data = json.loads(bytes(good))
    if kind_of_bad == "corrupt simulator state":
        import base64
        data["core"] = base64.b64encode(b"PK\x03\x04 not an npz").decode()
    elif kind_of_bad == "wrong variable count":
        data["values"] = data["values"][:-1]
    return json.dumps(data).encode()


@pytest.mark.parametrize("bad", ["garbage", "truncated", "other build", "wrong variable count",
                                 "corrupt simulator state"])
@pytest.mark.parametrize("kind", BINARIES)
def test_rejected_state_is_an_error_and_changes_nothing(open_fmu, kind, bad):
    """Issue 12 item 2: a corrupt, truncated or other build's state is refused with fmi2Error
    (pythonfmu's binary: fmi2Fatal), at fmi2DeSerializeFMUstate or at fmi2SetFMUstate, with a
    message; the run then goes on exactly as if it had not been offered."""
    s = open_fmu(kind, instance="a")
    other = open_fmu(kind, "sparse", instance="o")
    other.init()
    s.init()
    _drive(s, 0.0, 10, 2e-4, 2)
    saved = s.fmu.getFMUstate()
    data = _bad_state(bad, s, other)
    n_log = len(s.log)

    def offer():
        st = s.fmu.deSerializeFMUstate(data)
        try:
            s.fmu.setFMUstate(st)
        finally:
            s.fmu.freeFMUstate(st)
    assert status_of(offer) == REFUSED[kind]
    assert any(st == s.refused and "FMU state rejected" in m
               for st, m in s.log[n_log:]), s.log[n_log:]
    after = _drive(s, 10 * 2e-4, 10, 2e-4, 4)
    s.fmu.setFMUstate(saved)
    assert np.array_equal(after, _drive(s, 10 * 2e-4, 10, 2e-4, 4))


# --------------------------------------------------------- text into XML (XML 1.0 sec. 2.2)
def test_free_text_with_line_breaks_reaches_the_model_description_intact(tmp_path):
    """Issue 12 item 6: text that passes `check` makes a well-formed modelDescription.xml whose
    description carries it character for character (markup characters escaped by the writer)."""
    text = 'Tray, re-torqued.\n\tSecond line: <5 N m> & "quoted" caf\u00e9'
    toml = tmp_path / "t.toml"
    toml.write_text(NOMINAL.read_text().replace(
        'description = "Rover avionics tray on its chassis bracket. Bolts at nominal torque '
        '(4 x M5, 5.0 N m, lubricated threads)."',
        'description = ' + json.dumps(text)))
    path = build_fmu(toml, tmp_path / "t.fmu", binary="pythonfmu").path
    with zipfile.ZipFile(path) as z:
        root = ET.fromstring(z.read("modelDescription.xml"))
    assert root.get("description").startswith(text + " [jointfmu parameter set")
    assert validate_fmu(str(path)) == []


@pytest.mark.parametrize("field,old,new", [
    ("structure.build", 'build = "SN-0002"', 'build = "SN-\\u0007"'),
    ("structure.description", 'description = "Rover', 'description = "\\u001bRover'),
    ("provenance.fitted_by", 'fitted_by = "jointfmu', 'fitted_by = "\\u0000jointfmu'),
])
def test_build_refuses_text_xml_cannot_hold_naming_the_field(tmp_path, capsys, field, old, new):
    """Issue 12 item 6: `jointfmu build` exits non-zero with the check message naming the field,
    and writes no FMU (before: exit 0 and an FMU whose modelDescription.xml was not well-formed,
    or an XML parser error naming nothing)."""
    from jointfmu.cli import main

    src = NOMINAL.read_text()
    assert old in src
    toml = tmp_path / "bad.toml"
    toml.write_text(src.replace(old, new, 1))
    out = tmp_path / "bad.fmu"
    assert main(["build", str(toml), "-o", str(out)]) == 1
    captured = capsys.readouterr()
    assert f"{field} = " in captured.out + captured.err
    assert "XML 1.0 sec. 2.2" in captured.out + captured.err
    assert not out.exists()
