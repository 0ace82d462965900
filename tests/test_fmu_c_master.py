"""The FMU driven by a C master (tests/c_master/fmi2_master.c) through the FMI 2.0 C API.

A host that is not Python: the master loads libpython (RTLD_GLOBAL), then the FMU binary, and runs
instantiate, setup, initialization, set/get real, doStep and get/set FMU state (FMI 2.0 standard,
sec. 2.1 and 4.2).  Its trajectory is checked against the SciPy reference
(``jointfmu.physics.reference``), the replay after fmi2SetFMUstate against the first run, and the
whole run against the same FMU built with pythonfmu's binary and driven by fmpy (doStep through
Python every step, where the C host's native binary steps in compiled code), bit for bit.
"""
from __future__ import annotations

import os
import shutil
import site
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("fmpy")
from fmpy import read_model_description  # noqa: E402

from jointfmu.fmu.build import build_fmu  # noqa: E402
from jointfmu.physics import reference  # noqa: E402
from jointfmu.params import load_parameter_set  # noqa: E402

HERE = Path(__file__).resolve().parent
NOMINAL = HERE.parent / "examples" / "tray_nominal.toml"


def _libpython() -> Path | None:
    if not sysconfig.get_config_var("Py_ENABLE_SHARED"):
        return None
    p = Path(sysconfig.get_config_var("LIBDIR")) / sysconfig.get_config_var("LDLIBRARY")
    return p if p.is_file() else None


pytestmark = [
    pytest.mark.skipif(shutil.which("gcc") is None, reason="needs gcc"),
    pytest.mark.skipif(_libpython() is None, reason="needs a shared libpython"),
    pytest.mark.skipif(not sys.platform.startswith("linux"), reason="Linux master"),
]


@pytest.fixture(scope="module")
def master(tmp_path_factory, example_fmus):
    d = tmp_path_factory.mktemp("c_master")
    exe = d / "fmi2_master"
    subprocess.run(["gcc", "-O1", "-Wall", "-o", str(exe), str(HERE / "c_master" / "fmi2_master.c"),
                    "-ldl", "-lm"], check=True, capture_output=True)
    fmu = example_fmus["tray_nominal"].path
    unzipped = d / "fmu"
    with zipfile.ZipFile(fmu) as z:
        z.extractall(unzipped)
    python_path = build_fmu(NOMINAL, d / "nominal_pythonfmu.fmu", binary="pythonfmu").path
    return exe, fmu, unzipped, python_path


def test_c_master_matches_reference_and_replays_state(master):
    exe, fmu, unzipped, python_path = master
    ps = load_parameter_set(NOMINAL)
    md = read_model_description(str(fmu))
    vr = {v.name: v.valueReference for v in md.modelVariables}
    ident = md.coSimulation.modelIdentifier
    n_modes = len(ps.modes)
    dt, n = 2e-4, 400
    u = np.zeros(n)
    u[:3] = 60.0                                  # a short pulse on mode 1, then free decay
    outs = [f"mode[{i + 1}].q" for i in range(n_modes)]
    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTHON")}
    env["PYTHONHOME"] = sys.base_prefix
    env["PYTHONPATH"] = os.pathsep.join(site.getsitepackages())
    proc = subprocess.run(
        [str(exe), str(_libpython()), str(unzipped / "binaries" / "linux64" / f"{ident}.so"),
         (unzipped / "resources").as_uri(), md.guid, repr(dt), str(n), str(vr["mode[1].force"]),
         ",".join(str(vr[o]) for o in outs)],
        input="\n".join(repr(float(x)) for x in u), capture_output=True, text=True, env=env,
        timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    rows = [line.split() for line in proc.stdout.splitlines()]
    first = {int(r[1]): np.array(r[2:], dtype=float) for r in rows if r[0] == "S"}
    again = {int(r[1]): np.array(r[2:], dtype=float) for r in rows if r[0] == "R"}
    assert sorted(first) == list(range(n + 1)) and sorted(again) == list(range(n // 2 + 1, n + 1))
    for k, row in again.items():
        assert np.array_equal(row, first[k]), k          # bit for bit after fmi2SetFMUstate
    data = np.array([first[k] for k in range(n + 1)])
    t = data[:, 0]
    f = np.zeros((n, n_modes))
    f[:, 0] = u
    ref = reference.simulate(ps, t, f)
    q, q_ref = data[:, 1], ref["q"][:, 0]
    assert np.abs(q - q_ref).max() <= 1e-3 * np.abs(q_ref).max()
    assert np.abs(data[:, 2:]).max() == 0.0              # the other modes were not excited
    # and the C host sees what fmpy sees with doStep through Python at every step: the FMU
    # built with pythonfmu's binary, through fmpy's FMU2Slave, same inputs
    from fmpy import extract
    from fmpy.fmi2 import FMU2Slave

    md_py = read_model_description(str(python_path))
    s = FMU2Slave(guid=md_py.guid, unzipDirectory=extract(str(python_path)),
                  modelIdentifier=md_py.coSimulation.modelIdentifier, instanceName="py")
    s.instantiate()
    s.setupExperiment(startTime=0.0)
    s.enterInitializationMode()
    s.exitInitializationMode()
    rows_py = [s.getReal([vr[o] for o in outs])]
    for k in range(n):
        s.setReal([vr["mode[1].force"]], [float(u[k])])
        s.doStep(currentCommunicationPoint=k * dt, communicationStepSize=dt)
        rows_py.append(s.getReal([vr[o] for o in outs]))
    s.terminate()
    s.freeInstance()
    assert np.array_equal(np.array(rows_py), data[:, 1:])


def _c_host_env():
    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTHON")}
    env["PYTHONHOME"] = sys.base_prefix
    env["PYTHONPATH"] = os.pathsep.join(site.getsitepackages())
    return env


def test_c_master_varied_steps_equal_the_python_path(master):
    """Varied step sizes and a random force through the C master (native binary: doStep in
    compiled code after the first step of each size, and after the restored state) and through
    fmpy with pythonfmu's binary (doStep through Python every step): every output row equal to
    the bit, and the replay after fmi2SetFMUstate too (derived here: the same compiled step)."""
    exe, fmu, unzipped, python_path = master
    md = read_model_description(str(fmu))
    vr = {v.name: v.valueReference for v in md.modelVariables}
    outs = [v.name for v in md.modelVariables if v.causality == "output"]
    n = 300
    rng = np.random.default_rng(21)
    sizes = (1e-4, 2e-4, 5e-4, 1e-3, 3.3e-4)
    h = np.array([sizes[(k // 7) % len(sizes)] for k in range(n)])
    u = 40.0 * rng.standard_normal(n)
    proc = subprocess.run(
        [str(exe), str(_libpython()),
         str(unzipped / "binaries" / "linux64" / f"{md.coSimulation.modelIdentifier}.so"),
         (unzipped / "resources").as_uri(), md.guid, "-", str(n), str(vr["mode[1].force"]),
         ",".join(str(vr[o]) for o in outs)],
        input="\n".join(f"{a!r} {b!r}" for a, b in zip(h.tolist(), u.tolist())),
        capture_output=True, text=True, env=_c_host_env(), timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    rows = [line.split() for line in proc.stdout.splitlines()]
    first = {int(r[1]): np.array(r[3:], dtype=float) for r in rows if r[0] == "S"}
    again = {int(r[1]): np.array(r[3:], dtype=float) for r in rows if r[0] == "R"}
    from fmpy import extract
    from fmpy.fmi2 import FMU2Slave

    md_py = read_model_description(str(python_path))
    s = FMU2Slave(guid=md_py.guid, unzipDirectory=extract(str(python_path)),
                  modelIdentifier=md_py.coSimulation.modelIdentifier, instanceName="py")
    s.instantiate()
    s.setupExperiment(startTime=0.0)
    s.enterInitializationMode()
    s.exitInitializationMode()
    out_vrs = [vr[o] for o in outs]
    rows_py, t = [s.getReal(out_vrs)], 0.0
    for k in range(n):
        s.setReal([vr["mode[1].force"]], [float(u[k])])
        s.doStep(currentCommunicationPoint=t, communicationStepSize=float(h[k]))
        t += float(h[k])
        rows_py.append(s.getReal(out_vrs))
    s.terminate()
    s.freeInstance()
    assert np.array_equal(np.array([first[k] for k in range(n + 1)]), np.array(rows_py))
    for k, row in again.items():
        assert np.array_equal(row, first[k]), k
