"""The example FMUs in a second co-simulation engine that nobody here wrote: libcosim (the C++
engine of the Open Simulation Platform, through its Python wrapper ``libcosimpy``).

Each case runs in a subprocess (``tests/libcosim_case.py``: libcosim loads the FMU into that
Python process, so no LD_PRELOAD or PYTHONHOME is needed, but an engine that aborts, as
libcosim does when a model fails its initialization, must not take the test session along).
Checked, with both FMU binaries: the same inputs as an fmpy run (fmpy driven with libcosim's
steps, which are whole nanoseconds: see run_fmpy) give the same outputs within 1e-12 of their
peak (measured: bit for bit); two builds in one execution each give their solo run; a parameter
out of range stops the run with the FMU's own message (the one `jointfmu check` gives).
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("libcosimpy")
pytest.importorskip("fmpy")

from jointfmu.errors import BuildError  # noqa: E402
from jointfmu.fmu.build import build_fmu  # noqa: E402
from jointfmu.fmu.native import compile_shell  # noqa: E402

from test_fmu import Slave  # noqa: E402

HERE = Path(__file__).resolve().parent
EXAMPLES = HERE.parent / "examples"
STEP_NS = 100_000            # 0.1 ms, libcosim's step in integer nanoseconds
N_STEPS = 400
OUTPUTS = ["mode[1].q", "mode[2].qdot", "mode[3].joint_force", "point.tip.a", "point.center.x",
           "point.psu_foot.v", "base.force", "energy.joint"]


def _can_compile() -> bool:
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        return compile_shell(Path(d), "probe")[0] is not None


BINARIES = [pytest.param("native", marks=pytest.mark.skipif(not _can_compile(),
                                                             reason="no C compiler")),
            "pythonfmu"]


@pytest.fixture(scope="module")
def fmus(tmp_path_factory, example_fmus):
    out = tmp_path_factory.mktemp("libcosim")
    made = {}
    for name in ("tray_nominal", "tray_worn"):
        for kind in ("native", "pythonfmu"):
            if example_fmus[name].binary["kind"] == kind:
                made[name, kind] = example_fmus[name].path   # the session's build has it already
                continue
            try:
                made[name, kind] = build_fmu(EXAMPLES / f"{name}.toml", out / f"{name}_{kind}.fmu",
                                             binary=kind).path
            except BuildError:
                made[name, kind] = None
    return made


def _inputs(seed):
    """A sine sweep at the shaker and random base acceleration, held over each step."""
    rng = np.random.default_rng(seed)
    t = np.arange(N_STEPS) * (STEP_NS / 1e9)
    sweep = 25.0 * np.sin(2 * np.pi * (50.0 * t + 2000.0 * t ** 2))
    return {"point.shaker.force": sweep.tolist(),
            "base.acceleration": (8.0 * rng.standard_normal(N_STEPS)).tolist()}


def run_libcosim(slaves, n_steps=N_STEPS):
    spec = {"step_ns": STEP_NS, "n_steps": n_steps, "slaves": slaves}
    proc = subprocess.run([sys.executable, str(HERE / "libcosim_case.py"), json.dumps(spec)],
                          capture_output=True, text=True, timeout=600)
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("{")]
    return proc, (json.loads(lines[-1]) if lines else None)


def run_fmpy(path, inputs, initial=None):
    """fmpy's FMU2Slave driven as libcosim drives it: inputs set, doStep(t_k, h_k), outputs read;
    libcosim keeps time in integer nanoseconds and hands the FMU t_k = k n / 1e9 s and
    h_k = t_(k+1) - t_k in double precision (measured: with h = n / 1e9 instead, outputs differ by
    2e-14 of peak, with this h they are bit-equal)."""
    s = Slave(path, "fmpy")
    try:
        s.init(initial)
        rows = []
        for k in range(N_STEPS):
            s.set({n: v[k] for n, v in inputs.items()})
            t0, t1 = (k * STEP_NS) / 1e9, ((k + 1) * STEP_NS) / 1e9
            s.fmu.doStep(currentCommunicationPoint=t0, communicationStepSize=t1 - t0)
            rows.append(s.get(OUTPUTS))
        return np.array(rows)
    finally:
        s.close()


def _fmu(fmus, name, kind):
    if fmus[name, kind] is None:
        pytest.skip(f"no {kind} build")
    return str(fmus[name, kind])


@pytest.mark.parametrize("kind", BINARIES)
def test_libcosim_equals_fmpy(fmus, kind):
    """The same held inputs and steps through libcosim and through fmpy: every output within
    1e-12 of its peak (the engines differ only in how they call the FMU)."""
    path = _fmu(fmus, "tray_nominal", kind)
    inputs = _inputs(1)
    proc, res = run_libcosim([{"fmu": path, "name": "tray", "inputs": inputs, "outputs": OUTPUTS}])
    assert proc.returncode == 0 and res and res["ok"], (proc.returncode, proc.stderr[-2000:])
    got = np.array(res["rows"]["tray"])
    ref = run_fmpy(path, inputs)
    assert got.shape == ref.shape == (N_STEPS, len(OUTPUTS))
    peak = np.abs(ref).max(axis=0)
    assert np.all(peak > 0)
    err = np.abs(got - ref).max(axis=0) / peak
    assert np.all(err <= 1e-12), dict(zip(OUTPUTS, err))


@pytest.mark.parametrize("kind", BINARIES)
def test_two_builds_in_one_execution_equal_their_solo_runs(fmus, kind):
    """Two builds (distinct model identifiers, distinct bundled cores) in one libcosim
    execution, each with its own inputs: each gives exactly its solo run."""
    a, b = _fmu(fmus, "tray_nominal", kind), _fmu(fmus, "tray_worn", kind)
    ia, ib = _inputs(2), _inputs(3)
    slaves = [{"fmu": a, "name": "nominal", "inputs": ia, "outputs": OUTPUTS},
              {"fmu": b, "name": "worn", "inputs": ib, "outputs": OUTPUTS}]
    proc, both = run_libcosim(slaves)
    assert proc.returncode == 0 and both["ok"], proc.stderr[-2000:]
    for sl in slaves:
        proc, solo = run_libcosim([sl])
        assert proc.returncode == 0 and solo["ok"], proc.stderr[-2000:]
        assert both["rows"][sl["name"]] == solo["rows"][sl["name"]], sl["name"]
    assert both["rows"]["nominal"] != both["rows"]["worn"]


@pytest.mark.parametrize("kind", BINARIES)
def test_out_of_range_parameter_stops_the_run_with_the_fmus_message(fmus, kind):
    """A parameter out of range given as libcosim's initial value: fmi2ExitInitializationMode
    refuses it and libcosim stops (it aborts the process from its worker thread) with the FMU's
    message, the same text as `jointfmu check` for that value; no step is taken."""
    path = _fmu(fmus, "tray_nominal", kind)
    proc, res = run_libcosim([{"fmu": path, "name": "tray", "inputs": _inputs(4),
                               "outputs": OUTPUTS, "initial": {"mode[2].joint.chi": 0.5}}], 5)
    assert not (res and res["ok"])
    text = proc.stderr + (res["error"] if res else "")
    assert "fmi2ExitInitializationMode" in text
    assert ("mode[2].joint.chi = 0.5: must satisfy -1 < chi <= 0 (chi > 0 is outside the "
            "physical range; chi = 0 is Goodman's cubic micro-slip law") in text, text[-2000:]
