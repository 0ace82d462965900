"""The FMU's two binaries: jointfmu's native FMI 2.0 shell (``native/fmi2_shell.c``, the default
where a C compiler is found) and pythonfmu's own.

Key behaviour runs against both, built side by side: a run against the SciPy reference, a NaN
input refused with its message, the FMU state round trip (FMI 2.0 standard, sec. 2.1.8), outputs
with direct feedthrough seeing inputs before a step (sec. 2.2.8), input values beyond the allowed
magnitude, and a mixed fmi2GetReal.  The whole of ``test_fmu.py`` runs against pythonfmu's binary
with ``JOINTFMU_FMU_BINARY=pythonfmu``.  Also: the build option and its errors, the build info,
``jointfmu info``, ``fmpy.validation.validate_fmu``.
"""
from __future__ import annotations

import json
import math
import shutil
import zipfile
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("fmpy")
from fmpy.validation import validate_fmu  # noqa: E402

from jointfmu.fmu.build import build_fmu
from jointfmu.fmu.native import compile_shell
from jointfmu.fmu.info import format_fmu_info, read_fmu_info
from jointfmu.errors import BuildError  # noqa: E402
from jointfmu.params import load_parameter_set  # noqa: E402

from test_fmu import Slave, _drive, assert_close_to_reference, modal_force_of  # noqa: E402

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
NOMINAL = EXAMPLES / "tray_nominal.toml"


def _can_compile() -> bool:
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        return compile_shell(Path(d), "probe")[0] is not None


needs_cc = pytest.mark.skipif(not _can_compile(), reason="the native shell cannot be compiled here")
BINARIES = [pytest.param("native", marks=needs_cc), "pythonfmu"]


@pytest.fixture(scope="module")
def built(tmp_path_factory, example_fmus):
    out = tmp_path_factory.mktemp("binaries")
    made = {}
    for kind in ("native", "pythonfmu"):
        if kind == "native" and example_fmus["tray_nominal"].binary["kind"] == "native":
            made[kind] = example_fmus["tray_nominal"]  # the session's build has it already
            continue
        try:
            made[kind] = build_fmu(NOMINAL, out / f"{kind}.fmu", binary=kind)
        except BuildError:
            made[kind] = None
    return made


@pytest.fixture
def open_slave(built):
    made = []

    def make(kind, instance="jf"):
        if built[kind] is None:
            pytest.skip(f"no {kind} build")
        s = Slave(built[kind].path, instance)
        made.append(s)
        return s
    yield make
    for s in made:
        s.close()


@pytest.fixture(scope="module")
def ps():
    return load_parameter_set(NOMINAL)


# ------------------------------------------------------------------------------- the build
@needs_cc
def test_native_build_carries_the_shell_and_validates(built):
    r = built["native"]
    assert r.binary["kind"] == "native"
    assert validate_fmu(str(r.path)) == []
    with zipfile.ZipFile(r.path) as z:
        info = json.loads(z.read("resources/jointfmu_build.json"))
        lib = z.read(f"binaries/linux64/{r.model_identifier}.so")
    assert info["binary"]["kind"] == "native" and info["binary"]["platform"] == "linux64"
    from pythonfmu.builder import FmuBuilder  # noqa: F401
    import pythonfmu
    theirs = Path(pythonfmu.__file__).parent / "resources" / "binaries" / "linux64"
    assert lib != next(theirs.glob("*.so")).read_bytes()
    text = format_fmu_info(read_fmu_info(r.path))
    assert "FMU binary:        jointfmu's native FMI shell for linux64" in text
    assert info["binary"]["do_step"] == "compiled"
    assert ("doStep:            in compiled code, without Python, on linux64 hosts whose Python "
            "has Numba") in text


def test_pythonfmu_build_keeps_pythonfmus_binary(built):
    r = built["pythonfmu"]
    assert r.binary["kind"] == "pythonfmu" and "binary='pythonfmu'" in r.binary["reason"]
    assert validate_fmu(str(r.path)) == []
    import pythonfmu
    theirs = Path(pythonfmu.__file__).parent / "resources" / "binaries" / "linux64"
    with zipfile.ZipFile(r.path) as z:
        assert z.read(f"binaries/linux64/{r.model_identifier}.so") == \
            next(theirs.glob("*.so")).read_bytes()
    text = format_fmu_info(read_fmu_info(r.path))
    assert "FMU binary:        pythonfmu's (" in text
    assert "doStep:            through Python at every step (pythonfmu's binary)" in text


@pytest.mark.parametrize("binary,environ,says", [
    ({"kind": "native", "platform": "linux64", "do_step": "compiled"}, {},
     "Here: Numba {numba} is installed: compiled"),
    ({"kind": "native", "platform": "linux64", "do_step": "compiled"},
     {"JOINTFMU_KERNEL": "python"}, "Here: JOINTFMU_KERNEL=python is set: through Python"),
    ({"kind": "native", "platform": "linux64", "do_step": "compiled"},
     {"JOINTFMU_DOSTEP": "python"}, "Here: JOINTFMU_DOSTEP=python is set: through Python"),
    ({"kind": "native", "platform": "win64", "do_step": "compiled"}, {},
     "Here: this machine uses pythonfmu's binary (not win64): through Python"),
    ({"kind": "native", "platform": "linux64"}, {},
     "through Python at every step (a native binary from before doStep ran compiled"),
    ({"kind": "pythonfmu", "platform": "linux64", "do_step": "python"}, {},
     "through Python at every step (pythonfmu's binary)"),
])
def test_info_says_which_way_do_step_runs(binary, environ, says):
    """``jointfmu info``'s doStep line from the build info and this machine (a Linux machine
    with Numba, where the suite runs)."""
    import importlib.metadata
    import sys

    from jointfmu.fmu.info import do_step_path

    if not sys.platform.startswith("linux"):
        pytest.skip("written for a Linux machine")
    info = {"binary": binary, "built_with_python": ".".join(map(str, sys.version_info[:3]))}
    assert says.format(numba=importlib.metadata.version("numba")) in do_step_path(info, environ)


def test_unknown_binary_choice_named(tmp_path, monkeypatch):
    with pytest.raises(BuildError, match=r"binary = 'fast' .*allowed are 'auto', 'native', "
                                         r"'pythonfmu'"):
        build_fmu(NOMINAL, tmp_path / "x.fmu", binary="fast")
    monkeypatch.setenv("JOINTFMU_FMU_BINARY", "c")
    with pytest.raises(BuildError, match=r"\$JOINTFMU_FMU_BINARY = 'c'"):
        build_fmu(NOMINAL, tmp_path / "x.fmu")
    assert list(tmp_path.iterdir()) == []


def test_without_a_compiler_auto_keeps_pythonfmu_and_native_fails(tmp_path, monkeypatch):
    """No compiler: "auto" builds with pythonfmu's binary and records why; "native" is a
    BuildError naming the reason, and an existing FMU at the output stays as it was."""
    monkeypatch.setenv("CC", str(tmp_path / "no-such-cc"))
    r = build_fmu(NOMINAL, tmp_path / "auto.fmu", binary="auto")
    assert r.binary["kind"] == "pythonfmu" and "no C compiler" in r.binary["reason"]
    info = read_fmu_info(r.path)
    assert info["build_info"]["binary"]["kind"] == "pythonfmu"
    assert "no C compiler" in format_fmu_info(info)
    before = r.path.read_bytes()
    with pytest.raises(BuildError, match=r"native FMU binary cannot be built: no C compiler"):
        build_fmu(NOMINAL, r.path, binary="native")
    assert r.path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["auto.fmu"]


@pytest.mark.skipif(shutil.which("cc") is None, reason="needs cc")
def test_compile_error_reported(tmp_path, monkeypatch):
    fake = tmp_path / "cc"
    fake.write_text("#!/bin/sh\necho 'shell.c:1: error: something is wrong' >&2\nexit 1\n")
    fake.chmod(0o755)
    monkeypatch.setenv("CC", str(fake))
    with pytest.raises(BuildError, match=r"compiling fmi2_shell.c with .* failed \(exit 1\): "
                                         r"shell.c:1: error: something is wrong"):
        build_fmu(NOMINAL, tmp_path / "n.fmu", binary="native")
    assert not (tmp_path / "n.fmu").exists()


# -------------------------------------------------------------------- behaviour, both binaries
@pytest.mark.parametrize("kind", BINARIES)
def test_reference_run(open_slave, ps, kind):
    """Point-force sweep with base acceleration, FMU2Slave loop, vs the SciPy reference."""
    dt = 2e-4
    t = np.arange(601) * dt
    F = 20.0 * np.sin(2 * np.pi * (60.0 * t + 300.0 * t ** 2))
    a = 3.0 * np.sin(2 * np.pi * 90.0 * t)
    s = open_slave(kind)
    s.init()
    names = [f"mode[{i + 1}].q" for i in range(len(ps.modes))]
    out = s.run(t, {"point.shaker.force": F, "base.acceleration": a}, names)
    fm = modal_force_of(ps, point_forces={"shaker": F}, base_acc=a, M=len(t))
    assert_close_to_reference(ps, t, fm, out, f"{kind} binary")


@needs_cc
def test_both_binaries_give_the_same_numbers(open_slave):
    """The same inputs through either binary: the same outputs, bit for bit."""
    rows = {}
    for kind in ("native", "pythonfmu"):
        s = open_slave(kind, kind)
        s.init()
        rows[kind] = _drive(s, 0.0, 150, 2e-4, 11)
    assert np.array_equal(rows["native"], rows["pythonfmu"])


@pytest.mark.parametrize("kind", BINARIES)
def test_nan_input_refused_with_message(open_slave, kind):
    """A NaN input: doStep returns fmi2Discard with a message naming it, the state kept; the
    inputs read back as set (the valid one set after it too); after the FMU state saved before
    is restored (FMI 2.0 sec. 4.2.4: the way on from "step failed"), valid inputs step."""
    s = open_slave(kind)
    s.init()
    dt = 2e-4
    _drive(s, 0.0, 20, dt, 8)
    saved = s.fmu.getFMUstate()
    qs = [n for n in s.outputs if n.endswith(".q")]
    before = s.get(qs)
    s.set({"point.shaker.force": math.nan})
    s.set({"base.acceleration": 1.0})           # a valid input after the refused one
    with pytest.raises(Exception) as exc:
        s.fmu.doStep(currentCommunicationPoint=20 * dt, communicationStepSize=dt)
    assert getattr(exc.value, "status", None) == 2          # fmi2Discard
    assert any(st == 3 and "point.shaker.force" in msg and "finite" in msg for st, msg in s.log)
    assert np.array_equal(s.get(qs), before)         # state kept
    got = s.fmu.getReal([s.vr["point.shaker.force"], s.vr["base.acceleration"]])
    assert math.isnan(got[0]) and got[1] == 1.0
    s.fmu.setFMUstate(saved)
    s.set({"point.shaker.force": 1.0, "base.acceleration": 1.0})
    s.fmu.doStep(currentCommunicationPoint=20 * dt, communicationStepSize=dt)
    assert s.fmu.getReal([s.vr["point.shaker.force"], s.vr["base.acceleration"]]) == [1.0, 1.0]


@pytest.mark.parametrize("kind", BINARIES)
def test_input_beyond_the_allowed_magnitude_refused(open_slave, kind):
    s = open_slave(kind)
    s.init()
    s.set({"point.shaker.force": 2e12})
    with pytest.raises(Exception):
        s.fmu.doStep(currentCommunicationPoint=0.0, communicationStepSize=1e-4)
    assert any(st == 3 and "point.shaker.force" in msg and "1e+12" in msg for st, msg in s.log)


@pytest.mark.parametrize("kind", BINARIES)
def test_state_round_trip(open_slave, kind):
    """fmi2GetFMUstate/fmi2SetFMUstate and serialization into a new instance (sec. 2.1.8):
    the continued run repeats bit for bit, inputs set after saving do not leak into it."""
    s = open_slave(kind, "a")
    s.init()
    dt = 2e-4
    _drive(s, 0.0, 60, dt, 1)
    state = s.fmu.getFMUstate()
    data = s.fmu.serializeFMUstate(state)
    inputs_then = s.fmu.getReal([s.vr["point.shaker.force"], s.vr["base.acceleration"]])
    first = _drive(s, 60 * dt, 40, dt, 2)
    s.set({"point.shaker.force": 99.0})        # set, never stepped: the state replaces it
    s.fmu.setFMUstate(state)
    s.fmu.freeFMUstate(state)
    assert s.fmu.getReal([s.vr["point.shaker.force"], s.vr["base.acceleration"]]) == inputs_then
    second = _drive(s, 60 * dt, 40, dt, 2)
    b = open_slave(kind, "b")
    b.init()
    st_b = b.fmu.deSerializeFMUstate(data)
    b.fmu.setFMUstate(st_b)
    b.fmu.freeFMUstate(st_b)
    third = _drive(b, 60 * dt, 40, dt, 2)
    assert np.array_equal(first, second) and np.array_equal(first, third)


@pytest.mark.parametrize("kind", BINARIES)
def test_direct_feedthrough(open_slave, ps, kind):
    """Set an input, read an acceleration: it sees the input without a step (sec. 2.2.8); a
    second input set changes it again; reading the input gives the value set."""
    s = open_slave(kind)
    s.init()
    _drive(s, 0.0, 5, 2e-4, 4)
    shaker = next(p for p in ps.points if p.label == "shaker")
    tip = next(p for p in ps.points if p.label == "tip")
    a0 = s.get(["point.tip.a"])[0]
    for F in (7.0, -3.0):
        s.set({"point.shaker.force": F})
        a = s.get(["point.tip.a"])[0]
        s.set({"point.shaker.force": 0.0})
        a_zero = s.get(["point.tip.a"])[0]
        assert a - a_zero == pytest.approx(F * float(np.dot(tip.shape, shaker.shape)), rel=1e-9)
    s.set({"point.shaker.force": 2.5})
    assert s.get(["point.shaker.force", "point.tip.a"])[0] == 2.5
    assert np.isfinite(a0)


@pytest.mark.parametrize("kind", BINARIES)
def test_mixed_get_real_and_unknown_reference(open_slave, ps, kind):
    """One fmi2GetReal over parameters, inputs and outputs equals reading each alone; an
    unknown value reference in a set is reported and changes nothing."""
    s = open_slave(kind)
    s.init()
    _drive(s, 0.0, 10, 2e-4, 3)
    s.set({"point.shaker.force": 4.5})
    names = ["point.tip.a", "mode[2].joint.chi", "point.shaker.force", "mode[1].q", "base.force"]
    together = s.get(names)
    alone = np.array([s.get([n])[0] for n in names])
    assert np.array_equal(together, alone) and together[2] == 4.5
    before = s.get()
    with pytest.raises(Exception) as exc:
        s.fmu.setReal([s.vr["point.shaker.force"], 10 ** 6], [1.0, 1.0])
    assert getattr(exc.value, "status", None) == s.refused
    assert any(st == s.refused and "1000000" in msg for st, msg in s.log)
    assert np.array_equal(s.get(), before) and s.get(["point.shaker.force"])[0] == 4.5


# ------------------------------------------------------------------ doStep in compiled code
#: Communication step sizes a run goes through in turn (one new size now and then).
STEP_SIZES = (1e-4, 2e-4, 5e-4, 1e-3, 3.3e-4)


def _drive_varied(s, n, seed):
    """``n`` steps of a random force and base acceleration, the step size changing every 7
    steps; rows of every output after each step."""
    rng = np.random.default_rng(seed)
    rows, t = [], 0.0
    for k in range(n):
        dt = STEP_SIZES[(k // 7) % len(STEP_SIZES)]
        s.set({"point.shaker.force": 30.0 * rng.standard_normal(),
               "base.acceleration": 5.0 * rng.standard_normal()})
        s.fmu.doStep(currentCommunicationPoint=t, communicationStepSize=dt)
        rows.append(s.get())
        t += dt
    return np.array(rows)


def _count_python_steps(monkeypatch, result):
    """Count the native slave's doSteps through Python (JointSlave._native_do_step)."""
    import sys

    ident = result.model_identifier
    cls = getattr(sys.modules[ident], ident)
    calls = []
    through_python = cls._native_do_step

    def counted(self, *args):
        calls.append(self.instance_name)
        return through_python(self, *args)
    monkeypatch.setattr(cls, "_native_do_step", counted)
    return calls


@needs_cc
def test_compiled_do_step_equals_the_python_path(open_slave, built, monkeypatch):
    """A long run, varied inputs and step sizes, through the native binary (doStep in compiled
    code after the first step of each size) and through pythonfmu's binary (doStep through
    Python every time): every output after every step and the serialized end states are equal
    to the bit (derived here: both run the same compiled step_planned)."""
    slaves = {kind: open_slave(kind, kind) for kind in ("native", "pythonfmu")}
    calls = _count_python_steps(monkeypatch, built["native"])
    for s in slaves.values():
        s.init()
    rows = {kind: _drive_varied(s, 1500, 5) for kind, s in slaves.items()}
    assert np.array_equal(rows["native"], rows["pythonfmu"])
    states = {kind: s.fmu.serializeFMUstate(s.fmu.getFMUstate()) for kind, s in slaves.items()}
    assert states["native"] == states["pythonfmu"]
    assert calls == ["native"] * len(STEP_SIZES)


@needs_cc
def test_python_calls_between_steps_send_the_next_step_through_python(open_slave, built,
                                                                      monkeypatch):
    """A parameter set after initialization (refused, fmi2Error, FMI 2.0 sec. 4.2.4), a state
    restored, an output read, a NaN input (fmi2Discard) and the state restored after it: only
    a doStep through Python allows compiled steps again, and the numbers stay those of the
    same binary with every doStep through Python (JOINTFMU_DOSTEP=python)."""
    fast = open_slave("native", "fast")
    calls = _count_python_steps(monkeypatch, built["native"])
    monkeypatch.setenv("JOINTFMU_DOSTEP", "python")
    slow = open_slave("native", "slow")
    slow.init()
    monkeypatch.delenv("JOINTFMU_DOSTEP")
    fast.init()
    dt = 2e-4
    rows = {}
    for name, s in (("fast", fast), ("slow", slow)):
        r = [_drive(s, 0.0, 5, dt, 1)]                              # first step: Python
        state = s.fmu.getFMUstate()
        r.append(_drive(s, 5 * dt, 5, dt, 2))                       # compiled (reads between)
        with pytest.raises(Exception):
            s.set({"mode[1].joint.Fs": 1.0})                        # refused: initialized
        r.append(_drive(s, 10 * dt, 3, dt, 3))                      # one through Python
        s.fmu.setFMUstate(state)
        s.fmu.freeFMUstate(state)
        r.append(_drive(s, 5 * dt, 3, dt, 4))                       # one through Python
        state = s.fmu.getFMUstate()
        s.set({"point.shaker.force": math.nan})
        with pytest.raises(Exception):                              # fmi2Discard
            s.fmu.doStep(currentCommunicationPoint=8 * dt, communicationStepSize=dt)
        s.fmu.setFMUstate(state)                                    # the way on (sec. 4.2.4)
        s.fmu.freeFMUstate(state)
        r.append(_drive(s, 8 * dt, 3, dt, 5))                       # one through Python
        rows[name] = np.concatenate(r)
    assert np.array_equal(rows["fast"], rows["slow"])
    assert any(st == 3 and "mode[1].joint.Fs" in msg for st, msg in fast.log)
    # through Python: the first step, after the refused parameter, after the restored state,
    # the NaN step, after the state restored then; every step of the other instance
    assert calls.count("fast") == 5 and calls.count("slow") == 20


@needs_cc
def test_dostep_env_keeps_do_step_in_python(open_slave, built, monkeypatch):
    """JOINTFMU_DOSTEP=python at initialization: every doStep through Python, the same numbers
    as with the compiled doStep."""
    fast = open_slave("native", "fast")
    calls = _count_python_steps(monkeypatch, built["native"])
    fast.init()
    monkeypatch.setenv("JOINTFMU_DOSTEP", "python")
    slow = open_slave("native", "slow")
    slow.init()
    monkeypatch.delenv("JOINTFMU_DOSTEP")
    a = _drive_varied(fast, 300, 4)
    n_fast = len(calls)
    b = _drive_varied(slow, 300, 4)
    assert np.array_equal(a, b)
    assert n_fast == len(STEP_SIZES) and len(calls) - n_fast == 300


_PLAIN_KERNEL_RUN = """
import json, sys
sys.path.insert(0, sys.argv[2])
from test_fmu import Slave
from test_fmu_binary import _drive_varied
s = Slave(sys.argv[1], "plain")
s.init()
rows = _drive_varied(s, 200, 9)
s.close()
print(json.dumps(rows.tolist()), flush=True)
import os
os._exit(0)    # skip the interpreter teardown (see DEVELOPERS.md, processes that load an FMU)
"""


@needs_cc
def test_native_binary_with_the_plain_python_kernel_gives_the_same_numbers(open_slave, built):
    """Without the compiled kernel (JOINTFMU_KERNEL=python, in a fresh process) the native
    binary steps through Python, with the same results to the bit."""
    import json
    import os
    import subprocess
    import sys

    s = open_slave("native")
    s.init()
    ours = _drive_varied(s, 200, 9)
    env = dict(os.environ, JOINTFMU_KERNEL="python")
    out = subprocess.run([sys.executable, "-c", _PLAIN_KERNEL_RUN, str(built["native"].path),
                          str(Path(__file__).parent)], env=env, capture_output=True, text=True,
                         timeout=300, check=True)
    plain = np.array(json.loads(out.stdout.strip().splitlines()[-1]))
    assert np.array_equal(ours, plain)


# ------------------------------------------------------------------------------ command line
def test_cli_build_binary_option_and_info(tmp_path, capsys):
    from jointfmu.cli import main

    out = tmp_path / "p.fmu"
    assert main(["build", str(NOMINAL), "-o", str(out), "--binary", "pythonfmu"]) == 0
    assert "FMU binary: pythonfmu's (pythonfmu's binary was asked for" in capsys.readouterr().out
    assert main(["info", str(out)]) == 0
    assert "FMU binary:        pythonfmu's" in capsys.readouterr().out
    assert main(["build", str(NOMINAL), "-o", str(tmp_path / "q.fmu"), "--binary", "fast"]) == 2
    assert "invalid choice: 'fast'" in capsys.readouterr().err
    assert not (tmp_path / "q.fmu").exists()


@needs_cc
def test_cli_build_native(tmp_path, capsys):
    from jointfmu.cli import main

    out = tmp_path / "n.fmu"
    assert main(["build", str(NOMINAL), "-o", str(out), "--binary", "native"]) == 0
    assert "FMU binary: jointfmu's native shell (linux64)" in capsys.readouterr().out
    assert main(["info", str(out)]) == 0
    assert "jointfmu's native FMI shell for linux64" in capsys.readouterr().out


@pytest.mark.parametrize("kind", BINARIES)
def test_rejected_state_keeps_inputs_set_before(open_slave, kind):
    """A state that is not one of this FMU's: refused with fmi2Error and a message (jointfmu's
    binary at fmi2DeSerializeFMUstate; pythonfmu's at fmi2SetFMUstate, with fmi2Fatal); the
    inputs set just before stay set (read back, and used by the next step)."""
    s = open_slave(kind)
    s.init()
    _drive(s, 0.0, 5, 2e-4, 7)
    s.set({"point.shaker.force": 3.25})
    a_before = s.get(["point.tip.a"])[0]
    with pytest.raises(Exception) as exc:
        bad = s.fmu.deSerializeFMUstate(b"not a state")
        s.fmu.setFMUstate(bad)
    assert getattr(exc.value, "status", None) == s.refused
    assert exc.value.function == ("fmi2DeSerializeFMUstate" if kind == "native"
                                  else "fmi2SetFMUstate")
    assert any(st == s.refused and "FMU state rejected" in msg for st, msg in s.log)
    assert s.get(["point.shaker.force", "point.tip.a"]).tolist() == [3.25, a_before]


@needs_cc
def test_native_instantiate_without_resources_fails_with_message(built):
    """A broken unpacked FMU (no slavemodule.txt): fmi2Instantiate returns NULL and the logger
    gets a message naming the missing file; the host process goes on."""
    import fmpy
    from fmpy import extract, read_model_description
    from fmpy.fmi2 import (FMU2Slave, fmi2CallbackAllocateMemoryTYPE, fmi2CallbackFreeMemoryTYPE,
                           fmi2CallbackFunctions, fmi2CallbackLoggerTYPE)

    path = built["native"].path
    md = read_model_description(str(path))
    d = Path(extract(str(path)))
    (d / "resources" / "slavemodule.txt").unlink()
    got = []
    cb = fmi2CallbackFunctions()
    cb.logger = fmi2CallbackLoggerTYPE(lambda env, inst, st, cat, msg: got.append((st, msg)))
    cb.allocateMemory = fmi2CallbackAllocateMemoryTYPE(fmpy.calloc)
    cb.freeMemory = fmi2CallbackFreeMemoryTYPE(fmpy.free)
    fmu = FMU2Slave(guid=md.guid, unzipDirectory=str(d),
                    modelIdentifier=md.coSimulation.modelIdentifier, instanceName="broken")
    with pytest.raises(Exception):
        fmu.instantiate(callbacks=cb, loggingOn=True)
    assert any(st == 3 and b"slavemodule.txt" in msg for st, msg in got), got
    shutil.rmtree(d, ignore_errors=True)
