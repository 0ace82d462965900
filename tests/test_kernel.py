"""The compiled (Numba) joint kernel against the plain-Python kernel, and its selection.

The plain-Python kernel (``jointfmu.physics.kernel`` run by the interpreter) is the reference here: the
compiled kernel is the same source compiled, so the results must agree to rounding (<= 1e-12
relative; in practice bit for bit).  The run is built to pass through every branch of the joint
memory: reversals, wiping-out, macro-slip, merges under the tolerance and forced merges of a full
stack.  The joint physics itself is checked against closed forms in test_iwan.py/test_reference.py.
"""
from __future__ import annotations

import ctypes
import json
import math
import os
import subprocess
import sys

import numpy as np
import pytest

from jointfmu import JointParams, Mode, ParameterSet, Point, Provenance
from jointfmu.errors import InputError
from jointfmu.physics import kernel as K
from jointfmu.physics.integrate import PLAN_SLOTS, ModalSimulator, kernel_info

numba = pytest.importorskip("numba")
if os.environ.get("JOINTFMU_KERNEL", "").strip().lower() == "python":
    pytest.skip("JOINTFMU_KERNEL=python: the compiled kernel is switched off", allow_module_level=True)


def three_modes() -> ParameterSet:
    """An invented three-mode structure: one force input, chi and beta spread over their range."""
    modes = []
    for k, (f0, chi, beta) in enumerate(((31.0, -0.3, 0.0), (87.0, -0.55, 0.25), (163.0, -0.8, 1.0))):
        w2 = (2.0 * np.pi * f0) ** 2
        modes.append(Mode(label=f"m{k + 1}", f0=f0, zeta=0.003,
                          joint=JointParams(Fs=2.0 + k, Kt=0.25 * w2, chi=chi, beta=beta)))
    return ParameterSet(
        name="kernel_check", build="t1", description="invented for the kernel test",
        provenance=Provenance(fitted_by="tests", date="2026-12-01", source_data="none"),
        modes=tuple(modes),
        points=(Point("drive", "input", "+z", (1.0, -0.8, 0.6)),),
    )


def force_history(n: int, dt: float) -> np.ndarray:
    """Bursts at three levels, each followed by a ring-down: the smallest leaves loops small enough
    to merge under the tolerance, the largest drives every mode into macro-slip."""
    t = np.arange(n) * dt
    f = np.zeros(n)
    for t0, amp in ((0.0, 0.01), (0.15, 15.0), (0.3, 2000.0)):
        on = (t >= t0) & (t < t0 + 0.05)
        f[on] = amp * (np.sin(2 * np.pi * 31.0 * t[on]) + np.sin(2 * np.pi * 87.0 * t[on])
                       + np.sin(2 * np.pi * 163.0 * t[on]))
    return f


def run(kernel: str, n: int = 600, dt: float = 1e-3):
    sim = ModalSimulator(three_modes(), kernel=kernel, merge_tol=1e-5, stack_capacity=8)
    fs = np.array([m.joint.Fs for m in sim.params.modes])
    out, depth, merges, slip = [], [], [], np.zeros(3, bool)
    for f in force_history(n, dt):
        sim.set_inputs(point_forces=[f])
        ok, msg = sim.step(dt)
        assert ok, msg
        out.append(np.concatenate([sim.q, sim.qdot, sim.joint_force,
                                   [sim.energy_joint, sim.energy_viscous, sim.energy_input,
                                    sim.energy_joint_stored]]))
        depth.append(sim.stack_depth)
        merges.append(np.concatenate(sim.merges))
        slip |= np.abs(sim.joint_force) >= fs * (1 - 1e-9)
    return sim, np.array(out), np.array(depth), np.array(merges), slip


@pytest.fixture(scope="module")
def runs():
    return run("python"), run("compiled")


def test_compiled_kernel_is_numba():
    sim = ModalSimulator(three_modes(), kernel="auto")
    info = kernel_info()
    assert sim.kernel == "numba", info
    assert info["kernel"] == "numba" and "jfmu_kernel_" in info["reason"]


def test_run_covers_every_branch_of_the_memory(runs):
    """The comparison below means something only if the run went through all of these."""
    _, _, depth, merges, slip = runs[0]
    n_mode = depth.shape[1]
    tol_merges, forced = merges[-1, :n_mode], merges[-1, n_mode:]
    dmerge = np.diff(merges.sum(axis=1))
    wiped = (np.diff(depth, axis=0) < 0).any(axis=1) & (dmerge == 0)
    assert depth.max() >= 3                 # nested reversals
    assert wiped.any()                      # a depth drop with no merge: wiping-out
    assert slip.all()                       # every mode reached macro-slip
    assert tol_merges.sum() > 0 and forced.sum() > 0


def test_compiled_equals_plain_python(runs):
    (_, a, da, ma, _), (sim, b, db, mb, _) = runs
    assert sim.kernel == "numba"
    scale = np.abs(a).max(axis=0) + 1e-300  # per quantity, so that zero crossings do not matter
    assert np.abs(b - a).max(axis=0).max() <= 1e-12 * scale.max()
    assert (np.abs(b - a) <= 1e-12 * scale).all()
    assert np.array_equal(da, db) and np.array_equal(ma, mb)


def test_compiled_state_round_trip_continues_identically():
    """A state saved from the compiled run and restored into a plain-Python simulator goes on
    exactly as the compiled one does (the state layout is shared)."""
    fast = ModalSimulator(three_modes(), kernel="compiled", merge_tol=1e-5, stack_capacity=8)
    f = force_history(600, 1e-3)
    for x in f[:330]:
        fast.set_inputs(point_forces=[x])
        assert fast.step(1e-3)[0]
    slow = ModalSimulator(three_modes(), kernel="python", merge_tol=1e-5, stack_capacity=8)
    slow.set_state(fast.get_state())
    for x in f[330:]:
        for s in (fast, slow):
            s.set_inputs(point_forces=[x])
            assert s.step(1e-3)[0]
    np.testing.assert_allclose(fast.q, slow.q, rtol=1e-12, atol=0.0)
    np.testing.assert_allclose(fast.joint_force, slow.joint_force, rtol=1e-12, atol=0.0)


def test_bound_entry_equals_numba_dispatch():
    """The simulator calls the compiled functions through entry points bound to its array types
    (no per-call dispatch, ``_compiled.bind``); the same run through Numba's ordinary dispatch
    gives the same bits, outputs refreshed between steps included."""
    from jointfmu.physics import compiled as _compiled

    bound = ModalSimulator(three_modes(), kernel="compiled", merge_tol=1e-5, stack_capacity=8)
    plain = ModalSimulator(three_modes(), kernel="compiled", merge_tol=1e-5, stack_capacity=8)
    assert bound._step is not _compiled.step_planned            # bound at construction
    plain._step, plain._refresh = _compiled.step_planned, _compiled.refresh
    for x in force_history(450, 1e-3):
        for s in (bound, plain):
            s.set_inputs(point_forces=[x])
            s.output_values()                                    # refresh before the step
            assert s.step(1e-3)[0]
        assert np.array_equal(bound.output_values(), plain.output_values())
    assert bound.get_state() == plain.get_state()


def c_step(sim):
    """The simulator's compiled C entry (what the FMU's native binary calls), called through
    ctypes: ``dt -> kernel.STEP_* code``."""
    address, pointers, dims = sim.c_step_entry()
    fn = ctypes.CFUNCTYPE(ctypes.c_int64, ctypes.c_void_p, ctypes.c_void_p,
                          ctypes.c_double)(address)
    p = (ctypes.c_void_p * len(pointers))(*pointers)
    d = (ctypes.c_int64 * len(dims))(*dims)
    return lambda dt: fn(p, d, dt)


#: More step sizes than the plan slots, so that the oldest plans also make way.
STEP_SIZES = [2e-4 * 1.03 ** k for k in range(PLAN_SLOTS + 16)]


def test_c_entry_equals_the_python_path_bit_for_bit():
    """A long run with varied inputs and step sizes through the C entry (falling back to
    ``step`` when it has no plan, as the FMU's binary does) and through ``step`` with the
    compiled and the plain-Python kernel: outputs after every step and the final states are
    equal to the bit.  (Derived here: the C entry runs the same compiled step_planned.)"""
    assert len(STEP_SIZES) > PLAN_SLOTS
    sims = [ModalSimulator(three_modes(), kernel=k, merge_tol=1e-5, stack_capacity=8)
            for k in ("python", "compiled", "compiled")]
    step_c = c_step(sims[2])
    pos = sims[0].input_index("point_forces", 0)
    codes = []
    for k, x in enumerate(force_history(700, 1e-3)):
        # mostly ten step sizes in turn, every third step one of the others
        dt = STEP_SIZES[(k * 7) % 10] if k % 3 else STEP_SIZES[10 + (k // 3) % (len(STEP_SIZES) - 10)]
        for s in sims:
            s.set_input_value(pos, float(x))
        assert sims[0].step(dt) == (True, "") and sims[1].step(dt) == (True, "")
        codes.append(step_c(dt))
        if codes[-1] != K.STEP_DONE:
            assert codes[-1] == K.STEP_NO_PLAN
            assert sims[2].step(dt) == (True, "")
        ref = sims[0].output_values()
        for s in sims[1:]:
            assert np.array_equal(s.output_values(), ref), (k, dt)
    assert sims[0].get_state() == sims[1].get_state() == sims[2].get_state()
    assert sims[2].time == sims[0].time
    # the C entry did most steps; the others were step sizes it had no plan (any more) for
    assert codes.count(K.STEP_DONE) > 0.5 * len(codes)
    assert codes.count(K.STEP_NO_PLAN) > len(STEP_SIZES)      # some were planned again


@pytest.mark.parametrize("where,value,says", [
    ("point", math.nan, "point_forces[drive] = nan: must be finite"),
    ("point", math.inf, "point_forces[drive] = inf: must be finite"),
    ("modal", -math.inf, "modal_forces[m2] = -inf: must be finite"),
    ("modal", 1.0000001e12, "modal_forces[m2] = 1000000100000.0: must be finite with |value| <= 1e+12"),
    ("base", 1.0, "base_acc: this structure has no [base] mounting"),
])
def test_c_entry_refuses_a_bad_input_and_changes_nothing(where, value, says):
    """An input the checks of set_input_value refuse, written into the input buffer from
    outside: the C entry does not step (STEP_INPUT) and changes nothing; ``step`` refuses
    it with a message naming the input."""
    sim = ModalSimulator(three_modes(), kernel="compiled")
    sim.set_input_values([0], [3.0])
    assert sim.step(1e-3)[0]
    before = (sim.get_state(), bytes(sim.output_buffer()))
    buf = sim.input_buffer()
    buf[{"point": 0, "modal": 2, "base": len(buf) - 1}[where]] = value
    sim.inputs_written()
    assert c_step(sim)(1e-3) == K.STEP_INPUT
    ok, msg = sim.step(1e-3)
    assert not ok and says in msg and "state kept" in msg
    buf[{"point": 0, "modal": 2, "base": len(buf) - 1}[where]] = 3.0 if where == "point" else 0.0
    assert (sim.get_state(), bytes(sim.output_buffer())) == before


@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning")  # the energies at q0
@pytest.mark.parametrize("path", ["c_entry", "step"])
def test_a_failed_compiled_step_keeps_the_state(path):
    """A state so large that the step overflows (a non-finite new state): the compiled step
    undoes it, and the state, time and outputs are those from before, to the bit."""
    sim = ModalSimulator(three_modes(), kernel="compiled", q0=[1e308, 0.0, 0.0],
                         qdot0=[1e308, 0.0, 0.0])
    sim.sub_steps(1e-3)          # planned: the C entry runs it
    before = (sim.get_state(), sim.output_values().tobytes())
    if path == "c_entry":
        assert c_step(sim)(1e-3) == K.STEP_FAILED
    else:
        ok, msg = sim.step(1e-3)
        assert not ok and "non-finite state; state kept" in msg
    assert (sim.get_state(), sim.output_values().tobytes()) == before
    assert sim.time == 0.0


def test_plain_python_kernel_has_no_c_entry():
    assert ModalSimulator(three_modes(), kernel="python").c_step_entry() is None


def test_unknown_kernel_is_refused_with_the_allowed_values():
    with pytest.raises(InputError, match="kernel = 'fast'.*'auto', 'python', 'compiled'"):
        ModalSimulator(three_modes(), kernel="fast")


_PROBE = (
    "import json, warnings\n"
    "warnings.simplefilter('always')\n"
    "from jointfmu.physics.integrate import kernel_info\n"
    "info = kernel_info()\n"
    "if info['kernel'] == 'numba':\n"
    "    from jointfmu.physics import compiled as C\n"
    "    info['file'] = str(C.CACHE_FILE)\n"
    "    info['hits'] = sum(len(d.stats.cache_hits) for d in (C.step_planned, C.refresh))\n"
    "    info['misses'] = sum(len(d.stats.cache_misses) for d in (C.step_planned, C.refresh))\n"
    "print(json.dumps(info))\n"
)


def probe(**env):
    e = dict(os.environ)
    e.update(env)
    out = subprocess.run([sys.executable, "-c", _PROBE], env=e, capture_output=True, text=True,
                         timeout=120, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_environment_forces_the_plain_kernel_and_says_so():
    info = probe(JOINTFMU_KERNEL="python")
    assert info["kernel"] == "python"
    assert "JOINTFMU_KERNEL=python" in info["reason"]


def test_cache_folder_is_used_and_reused(tmp_path):
    """First process compiles into $JOINTFMU_CACHE_DIR, the second loads from Numba's cache."""
    first = probe(JOINTFMU_CACHE_DIR=str(tmp_path), JOINTFMU_KERNEL="auto")
    assert first["kernel"] == "numba", first
    assert first["file"].startswith(str(tmp_path))
    assert first["misses"] > 0
    second = probe(JOINTFMU_CACHE_DIR=str(tmp_path), JOINTFMU_KERNEL="auto")
    assert second["file"] == first["file"]
    assert second["misses"] == 0 and second["hits"] > 0
