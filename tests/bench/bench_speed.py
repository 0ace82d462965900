"""Speed of the jointfmu core and FMU, measured side by side in one run.

Run::

    .venv/bin/python tests/bench/bench_speed.py [--quick]

It prints readable tables, then, as its LAST line, one JSON object with (at least)
``kernel_ns_per_mode_step``, ``fmu_realtime_factor`` (fmpy's FMU2Slave, fmi2SetReal/fmi2GetReal
on arrays; ``fmu_realtime_factor_lists`` with lists), ``fmu_realtime_factor_c_host``,
``speedup_vs_reference``, ``cold_start_s``, ``fallback_ns_per_mode_step``, each target also
``*_scaled``.  Nothing is asserted: this is a benchmark, not a
test (timing assertions do not belong in tests).  Every timing is the best of several repeats (the
least disturbed by other processes on the machine); the machine is shared, so compare ratios
measured in the same run rather than absolute numbers across runs.

Problem.  An invented 10-mode structure, natural frequencies 20..500 Hz (geometric), joints with
general (non-special) chi between -0.35 and -0.62, beta = 0.1, joint 20 % of the modal stiffness,
one force input point and one output point.  It is generated here and the FMU is built from it
into a temporary folder.

What is measured
----------------
kernel
    Core stepping, ns per mode and internal step, default ``steps_per_period`` (the
    ModalSimulator default), while the joints ring down with reversals (long ``step`` calls so
    Python overhead does not count), beside a bare exact joint force; both also with the power
    x^(chi+2) replaced by a product, which shows what bounds their ratio.  Also for the
    plain-Python kernel (the fallback).
scaling
    ns per mode-step against the number of modes, against ``steps_per_period``, and along a long
    ring-down as the reversal stack deepens (cost per step should not grow with depth).
fmu
    Through fmpy's ``FMU2Slave``: a 1 ms communication step, inputs set and outputs read every
    step, two cases: "typical" (the point force in; x, v, a of the output point out) and "all
    variables" (every input, every output).  The same loops against an empty pythonfmu slave with
    the same number of variables give the floor of the Python FMU machinery, and the core alone
    (``set_inputs`` + ``step``) gives what the simulator itself costs per communication step.
    The typical case with arrays also at the communication steps of ``COMM_STEPS``: a line
    through them gives the fixed cost per step and the cost per mode-step.
c host
    The same typical case driven by a C program (tests/c_master/fmi2_master.c in its timing
    mode; it loads libpython itself, no host interpreter in the loop), at the communication
    steps of ``COMM_STEPS``, a fresh process per round, alternating with the two machine
    anchors below.  The fitted fixed cost per step is the part of the step outside the joints.
cold start
    A fresh process: extract, instantiate, initialize, first ``doStep``; once with the compiled
    kernel in its cache (``$JOINTFMU_CACHE_DIR``, warm) and once with an empty cache (cold: Numba
    compiles).  Also the import time of everything before.
memory
    Resident set size over 10^7 internal steps of the core (10^6 in ``--quick``) and over many
    FMU steps.
reference
    Speedup over the SciPy reference integration (``jointfmu.physics.reference.simulate``) at equal or
    better accuracy.  Accuracy is measured on the same forced 10-mode problem against the
    reference at rtol 1e-11 (the "truth"; the reference integrates branch by branch with events at
    every reversal, so its error follows its tolerance).  The reference is timed at a sweep of
    looser tolerances; the speedup is taken against the TIGHTEST tolerance whose error is still
    at least the core's error, i.e. against the most accurate reference run that the core at its
    default setting matches or beats.  (Timing a tighter reference than the core's accuracy needs
    would inflate the ratio; timing a looser one would compare the core to a less accurate
    reference than it is.)  The error is the largest |q - q_true| over the record, per mode
    relative to that mode's largest |q_true|, then the largest over the modes.  The core's error
    falls smoothly with steps_per_period (measured: 5e-4, 6e-5, 9e-6 at 40, 80, 160); the
    reference's error does not fall smoothly with rtol: single modes show sporadic errors of
    1e-4..1e-3 even at rtol 1e-8..1e-10 (seen on this problem; reported to the lead), which is why
    the sweep is printed in full.  The core is timed per 1 ms communication step with its Python
    overhead (set_inputs + step), as a co-simulation runs it.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


# ------------------------------------------------------------------------------- problem
def make_params(n_modes: int = 10, fmin: float = 20.0, fmax: float = 500.0):
    """The invented benchmark structure (see the module docstring)."""
    from jointfmu import JointParams, Mode, ParameterSet, Point, Provenance

    f0 = np.geomspace(fmin, fmax, n_modes) if n_modes > 1 else np.array([fmin])
    chi = np.linspace(-0.35, -0.62, n_modes)
    modes = []
    for i, f in enumerate(f0):
        w2 = (2 * np.pi * f) ** 2
        modes.append(Mode(label=f"m{i + 1}", f0=float(f), zeta=0.002,
                          joint=JointParams(Fs=2.0 + 0.5 * i, Kt=0.2 * w2, chi=float(chi[i]),
                                            beta=0.1)))
    return ParameterSet(
        name="speedbench", build="b1",
        description="invented structure for the speed benchmark",
        provenance=Provenance(fitted_by="bench_speed.py", date="2026-12-01",
                              source_data="none (generated)"),
        modes=tuple(modes),
        points=(Point("drive", "input", "+z", tuple(np.linspace(1.0, 0.4, n_modes))),
                Point("tip", "output", "+z", tuple(np.linspace(0.9, -0.6, n_modes)))),
    )


def best(fn, repeats: int) -> float:
    """Smallest wall time of ``repeats`` calls [s]."""
    out = np.inf
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        out = min(out, time.perf_counter() - t)
    return out


def rss_mb() -> float:
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    import resource
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def excited(params, kernel="auto", **kw):
    """A simulator whose joints were just kicked well into micro-slip (ring-down follows)."""
    from jointfmu.physics.integrate import ModalSimulator

    sim = ModalSimulator(params, kernel=kernel, **kw)
    sim.set_inputs(modal_forces=[3.0 * m.joint.Fs for m in params.modes])
    sim.step(0.004)
    sim.set_inputs(modal_forces=np.zeros(params.n_modes))
    return sim


def ns_per_mode_step(sim, seconds: float, repeats: int) -> float:
    """Wall time of ``sim.step(seconds)`` per mode and internal step [ns] (state advances)."""
    mode_steps = int(sim.sub_steps(seconds).sum())  # each mode sub-steps at its own frequency
    t = best(lambda: sim.step(seconds), repeats)
    return t / mode_steps * 1e9


# ------------------------------------------------------------------------------- sections
def _kernel_without_power():
    """``step_planned`` of jointfmu's kernel source with the power x^(chi+2) replaced by x*x,
    compiled here (``compiled.compile_source``, beside the kernel in the per-user cache, so a
    second run of the benchmark loads it): a wrong joint, for one measurement only (what the
    rest of a mode-step costs; see bench_kernel).  None when the source no longer has that
    line."""
    from jointfmu.physics import compiled as C
    from jointfmu.physics import kernel as K

    source = Path(K.__file__).read_text(encoding="utf-8")
    line = "p = math.pow(x, jc[i, E2])"
    if source.count(line) != 1:
        return None
    _, mod = C.compile_source(source.replace(line, "p = x * x"), "bench_nopower",
                              K.COLD + K.ENTRIES)
    return mod.step_planned


def bench_kernel(params, quick):
    """Our kernel and the bare joint of :func:`bench_bare_joint` measured alternately, many
    rounds, the fastest of each: both then see the same machine (it is shared and its speed
    drifts by 1.5x within minutes).

    What bounds the ratio: each is measured again with its power x^(chi+2) replaced by a
    product (ours: :func:`_kernel_without_power`, the bare joint: ``power=False``), in the same
    rounds.  The differences are what the power costs in each; the rest is what each does
    besides it (ours: the exponential time step with the joint's tangent and curvature, the
    reversal insertion, energies, memory bound; the bare joint: a stack and a backbone on a
    prescribed path, no time step, so its evaluations do not wait on each other)."""
    from jointfmu.physics.integrate import kernel_info

    fast = excited(params)
    slow = excited(params, kernel="python")
    bare = bench_bare_joint(quick)
    bare_np = bench_bare_joint(quick, power=False)
    nopower = _kernel_without_power()
    np_sim = excited(params)
    np_sim.sub_steps(0.05)     # planned
    np_args = (0.05,) + np_sim._step_args   # the simulator's own arguments of step_planned
    if nopower is not None:
        nopower(*np_args)      # compiled now
    mode_steps = int(fast.sub_steps(0.05).sum())
    t_ours = t_bare = t_ours_np = t_bare_np = np.inf
    for _ in range(15 if quick else 40):
        t_ours = min(t_ours, best(lambda: fast.step(0.05), 1))
        t_bare = min(t_bare, best(bare, 1))
        t_bare_np = min(t_bare_np, best(bare_np, 1))
        if nopower is not None:
            t_ours_np = min(t_ours_np, best(lambda: nopower(*np_args), 1))
    r = {
        "kernel": fast.kernel,
        "kernel_reason": kernel_info()["reason"],
        "kernel_ns_per_mode_step": t_ours / mode_steps * 1e9,
        "bare_joint_ns": t_bare / bare.evaluations * 1e9,
        "kernel_without_power_ns": t_ours_np / mode_steps * 1e9,
        "bare_joint_without_power_ns": t_bare_np / bare_np.evaluations * 1e9,
        "fallback_ns_per_mode_step": ns_per_mode_step(slow, 0.002 if quick else 0.01, 3),
        "steps_per_period": fast.steps_per_period,
    }
    r["compiled_over_python"] = r["fallback_ns_per_mode_step"] / r["kernel_ns_per_mode_step"]
    return r


def bench_scaling(quick):
    from jointfmu.physics.integrate import ModalSimulator  # noqa: F401

    rep = 8 if quick else 15
    modes = {}
    for n in (1, 3, 10, 30) if quick else (1, 3, 10, 30, 100):
        p = make_params(n)
        sim = excited(p)
        # at least 2e5 mode-steps per call, so the Python call overhead does not count
        seconds = max(0.02 if quick else 0.05, 2e5 * sim.h_max / n)
        modes[n] = ns_per_mode_step(sim, seconds, rep)
    p10 = make_params(10)
    spp = {}
    for s in (10, 20, 40, 80, 160):
        sim = excited(p10, steps_per_period=s)
        ns = ns_per_mode_step(sim, 0.02 if quick else 0.05, rep)
        spp[s] = {"ns_per_mode_step": ns,
                  "us_per_simulated_ms": ns * int(sim.sub_steps(1e-3).sum()) * 1e-3}
    # a long ring-down in chunks: cost per chunk against the deepest stack (merge_tol default)
    sim = excited(p10)
    chunk = 0.25 if quick else 0.5
    depth = []
    for k in range(8 if quick else 20):
        # five pieces, the fastest counts (least disturbed by other processes)
        mode_steps = int(sim.sub_steps(chunk / 5).sum())
        el = np.inf
        for _ in range(5):
            t = time.perf_counter()
            sim.step(chunk / 5)
            el = min(el, time.perf_counter() - t)
        depth.append({"t_end_s": round(sim.time, 3), "max_depth": int(sim.stack_depth.max()),
                      "mean_depth": float(sim.stack_depth.mean()),
                      "merges": int(sim.merges[0].sum()), "forced_merges": int(sim.merges[1].sum()),
                      "ns_per_mode_step": el / mode_steps * 1e9})
    # a stack that fills (merge_tol 0, small capacity): every push then costs a forced merge,
    # which scans the whole stack
    sim = excited(p10, merge_tol=0.0, stack_capacity=512)
    sim.step(1.0)
    full = {"capacity": 512, "forced_merges_before": int(sim.merges[1].sum()),
            "ns_per_mode_step": ns_per_mode_step(sim, 0.05, rep)}
    full["forced_merges_after"] = int(sim.merges[1].sum())
    return {"modes": modes, "steps_per_period": spp, "depth": depth, "full_stack": full}


_EMPTY_SLAVE = '''
from pythonfmu import Fmi2Slave
from pythonfmu.enums import Fmi2Causality
from pythonfmu.variables import Real


class EmptyBenchSlave(Fmi2Slave):
    """No model: {n_in} inputs, {n_out} outputs, do_step returns at once, get_real and set_real
    touch nothing (the floor of a Python FMU)."""

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        for k in range({n_in}):
            setattr(self, f"u{{k}}", 0.0)
            self.register_variable(Real(f"u{{k}}", causality=Fmi2Causality.input))
        for k in range({n_out}):
            setattr(self, f"y{{k}}", 0.0)
            self.register_variable(Real(f"y{{k}}", causality=Fmi2Causality.output))

    def do_step(self, current_time, step_size):
        return True

    # no Python per variable either: what is left is pythonfmu's C++ wrapper and the host's calls
    def get_real(self, vrs):
        return [0.0] * len(vrs)

    def set_real(self, vrs, values):
        pass
'''


def _open_fmu(path):
    from fmpy import extract, read_model_description
    from fmpy.fmi2 import FMU2Slave

    md = read_model_description(str(path))
    unzip = extract(str(path))
    s = FMU2Slave(guid=md.guid, unzipDirectory=unzip,
                  modelIdentifier=md.coSimulation.modelIdentifier, instanceName="bench")
    s.instantiate()
    s.setupExperiment(startTime=0.0)
    s.enterInitializationMode()
    s.exitInitializationMode()
    return s, md


def _loop(s, ivr, ovr, n, dt=1e-3, amp=None, style="lists"):
    """A host loop of ``n`` communication steps: set inputs, doStep, read outputs.

    ``style="lists"``: FMU2Slave's ``setReal``/``getReal`` with Python lists (ctypes arrays made
    at every call).  ``style="arrays"``: FMU2Slave's ``fmi2SetReal``/``fmi2GetReal`` on ctypes
    arrays made once.  ``style="mixed"``: as fmpy's own ``simulate_fmu`` does it, inputs through
    ``fmi2SetReal`` on arrays made once, outputs through ``getReal``.  ``ivr = ovr = None``: doStep
    alone.
    """
    from fmpy.fmi2 import fmi2Real, fmi2ValueReference

    w = 2 * np.pi * 35.0
    s_time = [0.0]
    if ivr is None:
        def run():
            t0 = s_time[0]
            for k in range(n):
                s.doStep(t0 + k * dt, dt)
            s_time[0] = t0 + n * dt
        return run
    amp = amp if amp is not None else [0.0] * len(ivr)
    if style == "mixed":   # fmpy's simulate_fmu: Input sets arrays, Recorder reads lists
        vi, xi = (fmi2ValueReference * len(ivr))(*ivr), (fmi2Real * len(ivr))()
        set_real_arrays, c, ni = s.fmi2SetReal, s.component, len(ivr)

        def run():
            t0 = s_time[0]
            for k in range(n):
                t = t0 + k * dt
                x = math.sin(w * t)
                for j in range(ni):
                    xi[j] = amp[j] * x
                set_real_arrays(c, vi, ni, xi)
                s.doStep(t, dt)
                s.getReal(ovr)
            s_time[0] = t0 + n * dt
        return run
    if style == "lists":
        def run():
            t0 = s_time[0]
            for k in range(n):
                t = t0 + k * dt
                x = math.sin(w * t)
                s.setReal(ivr, [a * x for a in amp])
                s.doStep(t, dt)
                s.getReal(ovr)
            s_time[0] = t0 + n * dt
        return run
    vi, xi = (fmi2ValueReference * len(ivr))(*ivr), (fmi2Real * len(ivr))()
    vo, xo = (fmi2ValueReference * len(ovr))(*ovr), (fmi2Real * len(ovr))()
    ni, no, c = len(ivr), len(ovr), s.component
    set_real, do_step, get_real = s.fmi2SetReal, s.fmi2DoStep, s.fmi2GetReal

    def run():
        t0 = s_time[0]
        for k in range(n):
            t = t0 + k * dt
            x = math.sin(w * t)
            for j in range(ni):
                xi[j] = amp[j] * x
            set_real(c, vi, ni, xi)
            do_step(c, t, dt, 1)
            get_real(c, vo, no, xo)
        s_time[0] = t0 + n * dt
    return run


#: Communication steps [s] at which the cost per step is measured (fixed cost + joint work).
COMM_STEPS = (1e-4, 2e-4, 5e-4, 1e-3, 1e-2)
#: The line of fixed_and_per_mode_step is fitted up to this step: the drive (a 35 Hz sine,
#: held over each step) is then still a smooth sine to the joints; held over 10 ms it is a
#: staircase that rings the higher modes, another regime with its own cost per mode-step.
FIT_UP_TO = 1e-3


def fixed_and_per_mode_step(by_dt: dict) -> tuple[float, float]:
    """Least-squares line through (mode-steps per communication step, us per step) for the
    steps up to FIT_UP_TO: the cost of a communication step that does not grow with the joint
    work (us) and the cost per mode-step (ns), in the FMU as the host drives it."""
    pts = [(v["mode_steps"], v["us_per_step"]) for dt, v in by_dt.items()
           if float(dt) <= FIT_UP_TO * (1 + 1e-9)]
    x, y = np.array(pts, dtype=float).T
    slope, fixed = np.polyfit(x, y, 1)
    return float(fixed), float(slope * 1e3)


#: Host styles of driving the FMU through FMU2Slave (see _loop).
STYLES = {"lists": "setReal/getReal (lists)",
          "mixed": "as simulate_fmu (arrays in, lists out)",
          "arrays": "fmi2SetReal/fmi2GetReal (arrays)"}


def bench_fmu(params, work: Path, quick):
    from pythonfmu.builder import FmuBuilder

    from jointfmu import save_parameter_set
    from jointfmu.fmu.build import build_fmu

    pfile = save_parameter_set(params, work / "speedbench.toml")
    t = time.perf_counter()
    built = build_fmu(pfile, work / "speedbench.fmu")
    ours = built.path
    build_s = time.perf_counter() - t

    s, md = _open_fmu(ours)
    # a second instance whose doStep goes through Python every step (the path before the
    # compiled doStep, kept by JOINTFMU_DOSTEP=python at initialization), for comparison
    os.environ["JOINTFMU_DOSTEP"] = "python"
    try:
        sp, _ = _open_fmu(ours)
    finally:
        del os.environ["JOINTFMU_DOSTEP"]
    vars_ = {v.name: v for v in md.modelVariables}
    ins = [v.valueReference for v in md.modelVariables if v.causality == "input"]
    outs = [v.valueReference for v in md.modelVariables if v.causality == "output"]
    typ_in = [vars_["point.drive.force"].valueReference]
    typ_out = [vars_[f"point.tip.{k}"].valueReference for k in ("x", "v", "a")]

    script = work / "empty_bench_slave.py"
    script.write_text(_EMPTY_SLAVE.format(n_in=len(ins), n_out=len(outs)))
    empty = FmuBuilder.build_FMU(script, dest=work)
    e, emd = _open_fmu(empty)
    e_in = [v.valueReference for v in emd.modelVariables if v.causality == "input"]
    e_out = [v.valueReference for v in emd.modelVariables if v.causality == "output"]

    # many short windows, the fastest counts (the machine may be shared); ours and the empty
    # slave alternate, so both see the same conditions
    n = 100 if quick else 200
    rep = 8 if quick else 20
    drive = 4.0 * params.modes[0].joint.Fs
    res = {"build_s": build_s, "n_inputs": len(ins), "n_outputs": len(outs),
           "binary": built.binary.get("kind", "pythonfmu")}
    cases = {
        "typical": (typ_in, typ_out, len(typ_in), len(typ_out)),
        "all": (ins, outs, len(ins), len(outs)),
    }
    # every loop once per round, the fastest round of each counts: all see the same machine
    loops = {"doStep_only_us": _loop(s, None, None, n),
             "empty_doStep_only_us": _loop(e, None, None, n)}
    for name, (iv, ov, ni, no) in cases.items():
        for style in STYLES:
            loops[f"{name}_{style}"] = _loop(s, iv, ov, n, amp=[drive] * ni, style=style)
            loops[f"{name}_{style}_empty"] = _loop(e, e_in[:ni], e_out[:no], n, style=style)
            loops[f"{name}_{style}_python_dostep"] = _loop(sp, iv, ov, n, amp=[drive] * ni,
                                                           style=style)
    # how the cost grows with the communication step (typical case, arrays)
    for dt in COMM_STEPS:
        if dt != 1e-3:
            loops[f"typical_arrays_dt_{dt:g}"] = _loop(s, typ_in, typ_out, n, dt=dt,
                                                       amp=[drive], style="arrays")
    fastest = dict.fromkeys(loops, np.inf)
    for _ in range(rep):
        for key, loop in loops.items():
            fastest[key] = min(fastest[key], best(loop, 1))
    us = {key: t / n * 1e6 for key, t in fastest.items()}
    for name in cases:
        for style in STYLES:
            key = f"{name}_{style}"
            res[key] = {"us_per_step": us[key], "realtime_factor": 1e3 / us[key],
                        "empty_us_per_step": us[key + "_empty"],
                        "python_dostep_us_per_step": us[key + "_python_dostep"]}
    res["doStep_only_us"] = us["doStep_only_us"]
    sim_plan = excited(params)
    res["arrays_by_dt"] = {
        f"{dt:g}": {"us_per_step": us["typical_arrays"] if dt == 1e-3
                    else us[f"typical_arrays_dt_{dt:g}"],
                    "mode_steps": int(sim_plan.sub_steps(dt).sum())} for dt in COMM_STEPS}
    res["empty_fmu_path"] = str(empty)
    res["empty_doStep_only_us"] = us["empty_doStep_only_us"]
    # the core alone, per communication step, fed as the slave feeds it
    sim = excited(params)
    pos = [sim.input_index("point_forces", 0)]

    def core():
        for k in range(n):
            sim.set_input_values(pos, [drive * math.sin(0.2 * k)])
            sim.step(1e-3)
            sim.output_values()
    res["core_us_per_step"] = best(core, rep) / n * 1e6
    res["mode_steps_per_step"] = int(sim.sub_steps(1e-3).sum())
    # memory over many FMU steps
    m_steps = 20000 if quick else 100000
    loop = _loop(s, typ_in, typ_out, m_steps // 10, amp=[drive])
    rss = [rss_mb()]
    for _ in range(10):
        loop()
        rss.append(rss_mb())
    res["memory_fmu"] = {"steps": m_steps, "rss_mb": [round(x, 1) for x in rss]}
    for fmu in (s, sp, e):
        fmu.terminate()
        fmu.freeInstance()
    return res, ours


def _libpython():
    import sysconfig

    if not sysconfig.get_config_var("Py_ENABLE_SHARED"):
        return None
    lib = Path(sysconfig.get_config_var("LIBDIR")) / sysconfig.get_config_var("LDLIBRARY")
    return lib if lib.is_file() else None


def bench_c_host(params, fmu_path: Path, empty_fmu: Path, work: Path, quick):
    """The FMU driven by a C host: the project's C master (tests/c_master/fmi2_master.c) in its
    timing mode, a fresh process per round, alternating with the machine's two anchors (an
    empty pythonfmu doStep through fmpy, the bare joint), the fastest of each counts.  The same
    problem as the fmpy loops (point force in; x, v, a of the tip out), at the communication
    steps of COMM_STEPS.  None (and why) where it cannot run (no C compiler, no shared
    libpython, not Linux)."""
    import shutil
    import site
    import zipfile

    from fmpy import read_model_description

    cc = shutil.which(os.environ.get("CC", "cc")) or shutil.which("gcc")
    libpython = _libpython()
    if not sys.platform.startswith("linux") or cc is None or libpython is None:
        return {"skipped": "needs Linux, a C compiler and a shared libpython"}
    exe = work / "fmi2_master"
    subprocess.run([cc, "-O2", "-o", str(exe), str(HERE.parent / "c_master" / "fmi2_master.c"),
                    "-ldl", "-lm"], check=True, capture_output=True)
    md = read_model_description(str(fmu_path))
    vr = {v.name: v.valueReference for v in md.modelVariables}
    unzipped = work / "c_host_fmu"
    with zipfile.ZipFile(fmu_path) as z:
        z.extractall(unzipped)
    ident = md.coSimulation.modelIdentifier
    drive = 4.0 * params.modes[0].joint.Fs
    n = 500 if quick else 1000
    cmd = [str(exe), "--time", str(libpython),
           str(unzipped / "binaries" / "linux64" / f"{ident}.so"), (unzipped / "resources").as_uri(),
           md.guid, ",".join(repr(dt) for dt in COMM_STEPS), str(n), "3" if quick else "5",
           str(vr["point.drive.force"]), repr(drive), "35.0",
           ",".join(str(vr[f"point.tip.{k}"]) for k in ("x", "v", "a"))]
    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTHON")}
    env["PYTHONHOME"] = sys.base_prefix
    env["PYTHONPATH"] = os.pathsep.join(site.getsitepackages())
    e, _ = _open_fmu(empty_fmu)
    empty_loop = _loop(e, None, None, 200)
    bare = bench_bare_joint(quick)
    fastest = {dt: np.inf for dt in COMM_STEPS}
    t_empty = t_bare = np.inf
    for _ in range(3 if quick else 6):
        out = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600)
        if out.returncode != 0:
            return {"skipped": f"the C master failed ({out.returncode}): {out.stderr[-500:]}"}
        for line in out.stdout.splitlines():
            if line.startswith("T "):
                _, dt, sec = line.split()
                key = min(COMM_STEPS, key=lambda d: abs(d - float(dt)))
                fastest[key] = min(fastest[key], float(sec))
        t_empty = min(t_empty, best(empty_loop, 1) / 200)
        t_bare = min(t_bare, best(bare, 1) / bare.evaluations)
    e.terminate()
    e.freeInstance()
    sim = excited(params)
    by_dt = {f"{dt:g}": {"us_per_step": fastest[dt] * 1e6,
                         "mode_steps": int(sim.sub_steps(dt).sum())} for dt in COMM_STEPS}
    fixed_us, per_mode_step_ns = fixed_and_per_mode_step(by_dt)
    us_1ms = by_dt["0.001"]["us_per_step"]
    return {"by_dt": by_dt, "us_per_step": us_1ms, "realtime_factor": 1e3 / us_1ms,
            "fixed_us_per_step": fixed_us, "ns_per_mode_step_in_fmu": per_mode_step_ns,
            "outside_joints_share": fixed_us / us_1ms,
            "empty_doStep_us": t_empty * 1e6, "bare_joint_ns": t_bare * 1e9}


_COLD = '''
import json, sys, time
t_proc = time.perf_counter()
import numpy as np
from fmpy import extract, read_model_description
from fmpy.fmi2 import FMU2Slave
t_imp = time.perf_counter()
path = sys.argv[1]
md = read_model_description(path)
vr = {v.name: v.valueReference for v in md.modelVariables}
t0 = time.perf_counter()
unzip = extract(path)
s = FMU2Slave(guid=md.guid, unzipDirectory=unzip, modelIdentifier=md.coSimulation.modelIdentifier,
              instanceName="cold")
s.instantiate()
s.setupExperiment(startTime=0.0)
s.enterInitializationMode()
s.exitInitializationMode()
s.setReal([vr["point.drive.force"]], [1.0])
s.doStep(0.0, 1e-3)
s.getReal([vr["point.tip.x"]])
t1 = time.perf_counter()
s.terminate(); s.freeInstance()
print(json.dumps({"instantiate_to_first_step_s": t1 - t0, "imports_s": t_imp - t_proc}))
'''


def bench_cold(fmu: Path, work: Path):
    script = work / "cold_start.py"
    script.write_text(_COLD)

    def once(cache_dir):
        env = dict(os.environ, JOINTFMU_CACHE_DIR=str(cache_dir))
        t = time.perf_counter()
        out = subprocess.run([sys.executable, str(script), str(fmu)], env=env, check=True,
                             capture_output=True, text=True, timeout=300)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        r["process_s"] = time.perf_counter() - t
        return r

    fresh = Path(tempfile.mkdtemp(prefix="cold-cache-", dir=work))
    cold = once(fresh)                   # empty cache: Numba compiles
    warm = min((once(fresh) for _ in range(3)), key=lambda r: r["instantiate_to_first_step_s"])
    env = dict(os.environ, JOINTFMU_KERNEL="python", JOINTFMU_CACHE_DIR=str(fresh))
    out = subprocess.run([sys.executable, str(script), str(fmu)], env=env, check=True,
                         capture_output=True, text=True, timeout=300)
    fallback = json.loads(out.stdout.strip().splitlines()[-1])
    return {"warm_cache": warm, "cold_cache": cold, "python_kernel": fallback}


def bench_memory_core(params, quick):
    sim = excited(params)
    n_total = 10**6 if quick else 10**7
    n_sub_chunk = n_total // 10
    rss = [rss_mb()]
    for _ in range(10):
        sim.step(n_sub_chunk * sim.h_max * (1 - 1e-9))
        rss.append(rss_mb())
    return {"internal_steps": n_total, "rss_mb": [round(x, 1) for x in rss],
            "max_depth": int(sim.stack_depth.max())}


def bench_reference(params, quick):
    from jointfmu.physics import reference
    from jointfmu.physics.integrate import ModalSimulator

    T = 0.1 if quick else 0.2
    dt = 1e-3
    t = np.arange(0.0, T + dt / 2, dt)
    rng = np.random.default_rng(7)
    fs = np.array([m.joint.Fs for m in params.modes])
    # bursts at two levels (micro-slip, then near macro-slip) and a ring-down
    env = np.where(t[:-1] < 0.3 * T, 0.6, np.where(t[:-1] < 0.6 * T, 2.5, 0.0))
    f = env[:, None] * fs[None, :] * np.sin(2 * np.pi * np.outer(t[:-1], [m.f0 for m in params.modes])
                                           + rng.uniform(0, 2 * np.pi, params.n_modes))
    truth = reference.simulate(params, t, f, rtol=1e-11)["q"]
    scale = np.abs(truth).max(axis=0)

    def err(q):
        return float((np.abs(q - truth).max(axis=0) / scale).max())

    sim = ModalSimulator(params)

    def core():
        sim.reset()
        out = [sim.q]
        for k in range(len(t) - 1):
            sim.set_inputs(modal_forces=f[k])
            sim.step(dt)
            out.append(sim.q)
        return np.array(out)

    q_core = core()
    t_core = best(core, 5)
    e_core = err(q_core)
    sweep = []
    for rtol in (1e-6, 1e-8, 1e-9) if quick else (1e-4, 1e-5, 1e-6, 1e-7, 1e-8, 1e-9, 1e-10):
        t0 = time.perf_counter()
        q = reference.simulate(params, t, f, rtol=rtol)["q"]
        sweep.append({"rtol": rtol, "seconds": time.perf_counter() - t0, "error": err(q)})
    # tightest rtol still at least as inaccurate as the core
    worse = [r for r in sweep if r["error"] >= e_core]
    chosen = min(worse, key=lambda r: r["rtol"]) if worse else max(sweep, key=lambda r: r["rtol"])
    n_mode_steps = (len(t) - 1) * int(sim.sub_steps(dt).sum())
    return {"T_s": T, "core_seconds": t_core, "core_error": e_core, "sweep": sweep,
            "chosen_seconds": chosen["seconds"], "n_mode_steps": n_mode_steps,
            "chosen_rtol": chosen["rtol"], "core_at_least_as_accurate": bool(worse),
            "speedup_vs_reference": chosen["seconds"] / t_core}


def bench_slave_internals(params, fmu_path: Path, quick):
    """Where the time of one communication step goes inside our slave (no FMI wrapper)."""
    import importlib
    import zipfile

    work = Path(tempfile.mkdtemp(prefix="slave-"))
    with zipfile.ZipFile(fmu_path) as z:
        z.extractall(work)
    res = work / "resources"
    entry = (res / "slavemodule.txt").read_text().strip() if (res / "slavemodule.txt").exists() \
        else next(p.stem for p in res.glob("Jfmu_*.py"))
    sys.path.insert(0, str(res))
    mod = importlib.import_module(entry.removesuffix(".py"))
    cls = next(v for k, v in vars(mod).items() if k.startswith("Jfmu_") and isinstance(v, type))
    slave = cls(instance_name="internals", resources=str(res), visible=False, logger=None)
    slave.enter_initialization_mode()
    slave.exit_initialization_mode()
    vars_ = {v.name: v.value_reference for v in slave.vars.values()}
    ins = [v.value_reference for v in slave.vars.values() if v.causality.name == "input"]
    outs = [v.value_reference for v in slave.vars.values() if v.causality.name == "output"]
    typ_out = [vars_[f"point.tip.{k}"] for k in ("x", "v", "a")]
    typ_in = [vars_["point.drive.force"]]
    n = 100 if quick else 200
    rep = 8 if quick else 20
    vals = [0.0] * len(ins)

    r = {}
    for label, fn in (
        ("set_real_all_us", lambda: slave.set_real(ins, vals)),
        ("set_real_one_and_push_us", lambda: (slave.set_real(typ_in, [1.0]),
                                              slave._push_inputs())),
        ("do_step_us", lambda: slave.do_step(0.0, 1e-3)),
        ("get_real_typical_us", lambda: slave.get_real(typ_out)),
        ("get_real_all_us", lambda: slave.get_real(outs)),
    ):
        r[label] = best(lambda: [fn() for _ in range(n)], rep) / n * 1e6
    sys.path.remove(str(res))
    return r


# ------------------------------------------------------------------------------- machine anchors
#: The issue's own measurements "on this kind of machine", against which its targets were set
#: (issue 5): a bare compiled exact reversal-stack Iwan joint force, general chi, about 18 ns per
#: mode-step; an empty doStep of a pythonfmu FMU through fmpy's FMU2Slave, about 1.4 us.  The
#: same two things are measured here, in this run, so that the targets can be scaled to the
#: machine the benchmark runs on (shared machines differ by 2-3x from day to day).
ISSUE_BARE_JOINT_NS = 18.0
ISSUE_EMPTY_DOSTEP_US = 1.4
TARGET_KERNEL_NS = 30.0
TARGET_REALTIME_FACTOR = 100.0


def _bare_joint_kernel(power=True):
    """A bare exact Iwan joint force, compiled: N joints, each on its own prescribed decaying
    displacement path, force from the backbone and a reversal stack (Masing's rules with
    wiping-out, one power per evaluation, as the exact model needs for general chi; Segalman
    2005, the backbone F = Kt x - R x^(chi+2)/((chi+1)(chi+2)) below phimax).  No time
    integration, no energies, no memory bound: the floor a joint-force evaluation costs on this
    machine, written here independently of jointfmu's kernel.  ``power=False``: x^(chi+2)
    replaced by x*x (a wrong joint: what the rest costs; a constant when compiled)."""
    import numba

    @numba.njit(cache=False, error_model="numpy")
    def run(u, kt, cf, e2, phimax, fs, stk_u, stk_f):
        n_steps, n_joints = u.shape
        depth = np.zeros(n_joints, dtype=np.int64)
        dirn = np.zeros(n_joints)
        u_prev = np.zeros(n_joints)
        f_prev = np.zeros(n_joints)
        total = 0.0
        for k in range(n_steps):
            for j in range(n_joints):
                uk = u[k, j]
                d = 1.0 if uk > u_prev[j] else -1.0
                if dirn[j] != 0.0 and d != dirn[j]:
                    stk_u[j, depth[j]] = u_prev[j]
                    stk_f[j, depth[j]] = f_prev[j]
                    depth[j] += 1
                dirn[j] = d
                while depth[j] > 0:
                    dj = depth[j]
                    uc = stk_u[j, dj - 2] if dj >= 2 else -stk_u[j, 0]
                    if (uk - uc) * d <= 0.0:
                        break
                    depth[j] = dj - 2 if dj >= 2 else 0
                if depth[j] == 0:
                    ur, fr, c = 0.0, 0.0, 1.0
                else:
                    ur, fr, c = stk_u[j, depth[j] - 1], stk_f[j, depth[j] - 1], 2.0
                du = uk - ur
                x = abs(du) / c
                if x < phimax[j]:
                    fbb = kt[j] * x - cf[j] * (x ** e2[j] if power else x * x)
                else:
                    fbb = fs[j]
                f = fr + (c if du >= 0.0 else -c) * fbb
                u_prev[j] = uk
                f_prev[j] = f
                total += f
        return total
    return run


def bench_bare_joint(quick, power=True):
    """A call that runs :func:`_bare_joint_kernel` on 10 joints, 40 points per period,
    amplitudes decaying from 0.9 to 0.05 phimax (micro-slip: the power is taken every time);
    its attribute ``evaluations`` is the number of joint evaluations per call."""
    run = _bare_joint_kernel(power)
    n_j, n_steps = 10, 2000
    chi = np.linspace(-0.35, -0.62, n_j)
    kt, fs, beta = np.full(n_j, 1.0), np.full(n_j, 1.0), 0.1
    a = (chi + 1.0) / (chi + 2.0)
    phimax = fs * (1.0 + beta) / (kt * (beta + a))
    R = fs * (chi + 1.0) / (phimax ** (chi + 2.0) * (beta + a))
    cf = R / ((chi + 1.0) * (chi + 2.0))
    k = np.arange(n_steps)[:, None]
    amp = phimax * np.geomspace(0.9, 0.05, n_steps)[:, None]
    u = amp * np.sin(2 * np.pi * k / 40.0 * (1.0 + 0.03 * np.arange(n_j)) + np.arange(n_j))
    stk_u, stk_f = np.zeros((n_j, n_steps)), np.zeros((n_j, n_steps))
    args = (u, kt, cf, chi + 2.0, phimax, fs, stk_u, stk_f)
    run(*args)   # compile

    def call():
        run(*args)
    call.evaluations = n_steps * n_j
    return call


# ------------------------------------------------------------------------------- report
def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="shorter runs (about a minute)")
    args = ap.parse_args(argv)
    quick = args.quick
    work = Path(tempfile.mkdtemp(prefix="jointfmu-bench-"))

    params = make_params()
    t_all = time.perf_counter()
    k = bench_kernel(params, quick)
    bare_ns = k["bare_joint_ns"]
    kernel_factor = bare_ns / ISSUE_BARE_JOINT_NS
    print(f"kernel: {k['kernel']} ({k['kernel_reason']})")
    print(f"  core stepping, 10 modes, steps_per_period {k['steps_per_period']:g}: "
          f"{k['kernel_ns_per_mode_step']:.1f} ns per mode-step")
    print(f"  bare compiled Iwan joint force on this machine: {bare_ns:.1f} ns (the issue's machine: "
          f"{ISSUE_BARE_JOINT_NS:g}): target <= {TARGET_KERNEL_NS:g} ns there is <= "
          f"{TARGET_KERNEL_NS * kernel_factor:.1f} ns here; ours / bare = "
          f"{k['kernel_ns_per_mode_step'] / bare_ns:.2f} (target "
          f"{TARGET_KERNEL_NS / ISSUE_BARE_JOINT_NS:.2f})")
    pw_ours = k["kernel_ns_per_mode_step"] - k["kernel_without_power_ns"]
    pw_bare = bare_ns - k["bare_joint_without_power_ns"]
    k["floor_ratio"] = (k["kernel_without_power_ns"] + pw_bare) / bare_ns
    print(f"  what bounds the ratio: with the power x^(chi+2) replaced by a product, ours "
          f"{k['kernel_without_power_ns']:.1f} ns, the bare joint "
          f"{k['bare_joint_without_power_ns']:.1f} ns; the power costs ours {pw_ours:.1f} ns, "
          f"the bare joint {pw_bare:.1f} ns.  The rest of a mode-step (exponential update, "
          f"tangent and curvature, reversal insertion, energies, memory bound) with the power "
          f"at the bare joint's cost gives a floor of {k['floor_ratio']:.2f}x the bare joint")
    print(f"  plain-Python fallback: {k['fallback_ns_per_mode_step']:.0f} ns per mode-step "
          f"({k['compiled_over_python']:.0f}x slower)")

    sc = bench_scaling(quick)
    print("\nscaling (ns per mode-step)")
    print("  modes:            " + "  ".join(f"{n}: {v:.1f}" for n, v in sc["modes"].items()))
    print("  steps_per_period: " + "  ".join(f"{s}: {v['ns_per_mode_step']:.1f}"
                                             for s, v in sc["steps_per_period"].items()))
    print("  core wall time per simulated ms, 10 modes: " + "  ".join(
        f"spp {s}: {v['us_per_simulated_ms']:.2f} us" for s, v in sc["steps_per_period"].items()))
    print("  ring-down, stack depth:  t [s]  max depth  mean depth  merges  forced  ns/mode-step")
    for d in sc["depth"]:
        print(f"                          {d['t_end_s']:5.2f}  {d['max_depth']:9d}  "
              f"{d['mean_depth']:10.1f}  {d['merges']:6d}  {d['forced_merges']:6d}  "
              f"{d['ns_per_mode_step']:8.1f}")

    fs_ = sc["full_stack"]
    print(f"  full stack (capacity {fs_['capacity']}, merge_tol 0, forced merges "
          f"{fs_['forced_merges_before']} -> {fs_['forced_merges_after']}): "
          f"{fs_['ns_per_mode_step']:.1f} ns per mode-step")

    fm, fmu_path = bench_fmu(params, work, quick)
    print(f"\nFMU through fmpy FMU2Slave, 1 ms step ({fm['mode_steps_per_step']} mode-steps), "
          f"{fm['n_inputs']} inputs, {fm['n_outputs']} outputs; built in {fm['build_s']:.2f} s, "
          f"{fm['binary']} binary (JOINTFMU_FMU_BINARY=pythonfmu for pythonfmu's)")
    fmu_factor = fm["empty_doStep_only_us"] / ISSUE_EMPTY_DOSTEP_US
    us_target_here = 1e3 / TARGET_REALTIME_FACTOR * fmu_factor
    print(f"  empty doStep alone: {fm['empty_doStep_only_us']:.2f} us (the issue's machine: "
          f"{ISSUE_EMPTY_DOSTEP_US:g}), ours {fm['doStep_only_us']:.2f} us; "
          f"{TARGET_REALTIME_FACTOR:g}x real time there (<= {1e3 / TARGET_REALTIME_FACTOR:g} us per "
          f"step) is <= {us_target_here:.1f} us per step here")
    print("  case     host calls                              ours [us/step]  realtime x  "
          "scaled x  empty slave [us]  doStep via Python [us]")
    for name in ("typical", "all"):
        for style, text in STYLES.items():
            c = fm[f"{name}_{style}"]
            c["realtime_factor_scaled"] = c["realtime_factor"] * fmu_factor
            print(f"  {name:8s} {text:40s} {c['us_per_step']:14.1f}  "
                  f"{c['realtime_factor']:10.0f}  {c['realtime_factor_scaled']:8.0f}  "
                  f"{c['empty_us_per_step']:16.1f}  {c['python_dostep_us_per_step']:22.1f}")
    print("  (doStep via Python: the same FMU with JOINTFMU_DOSTEP=python, the path before "
          "doStep ran compiled)")
    fixed, per_ms = fixed_and_per_mode_step(fm["arrays_by_dt"])
    print("  typical, arrays, by communication step: " + "  ".join(
        f"{dt} s: {v['us_per_step']:.1f} us ({v['mode_steps']} mode-steps)"
        for dt, v in fm["arrays_by_dt"].items())
        + f"; fit: {fixed:.1f} us per step + {per_ms:.1f} ns per mode-step")
    fm["arrays_fixed_us_per_step"] = fixed
    kern_us = k["kernel_ns_per_mode_step"] * fm["mode_steps_per_step"] * 1e-3
    print(f"  core alone (inputs, step, outputs): {fm['core_us_per_step']:.1f} us per step, of which "
          f"the kernel about {kern_us:.1f} us")
    si = bench_slave_internals(params, fmu_path, quick)
    print("  inside our slave (no FMI wrapper): " + ", ".join(f"{k_}: {v:.1f}"
                                                             for k_, v in si.items()))
    print(f"  memory over {fm['memory_fmu']['steps']} FMU steps, RSS MB: "
          f"{fm['memory_fmu']['rss_mb']}")

    ch = bench_c_host(params, fmu_path, Path(fm["empty_fmu_path"]), work, quick)
    if "skipped" in ch:
        print(f"\nC host: skipped ({ch['skipped']})")
    else:
        ch_fmu_factor = ch["empty_doStep_us"] / ISSUE_EMPTY_DOSTEP_US
        ch_kernel_factor = ch["bare_joint_ns"] / ISSUE_BARE_JOINT_NS
        # scaled by the bare joint: the C host's step is compiled code, mostly the joints'
        ch["realtime_factor_scaled"] = ch["realtime_factor"] * ch_kernel_factor
        ch["realtime_factor_scaled_by_empty_dostep"] = ch["realtime_factor"] * ch_fmu_factor
        ch["machine_factor_fmu"], ch["machine_factor_kernel"] = ch_fmu_factor, ch_kernel_factor
        print("\nFMU through a C host (tests/c_master/fmi2_master.c --time: fmi2SetReal of the "
              "force, fmi2DoStep, fmi2GetReal of x, v, a), fresh process per round")
        print("  " + "  ".join(f"{dt} s: {v['us_per_step']:.2f} us per step ({v['mode_steps']} "
                               f"mode-steps)" for dt, v in ch["by_dt"].items()))
        print(f"  1 ms: {ch['realtime_factor']:.0f}x real time, scaled "
              f"{ch['realtime_factor_scaled']:.0f}x by the bare joint measured between its rounds "
              f"({ch['bare_joint_ns']:.1f} ns; the step is compiled code, mostly the joints'); "
              f"by the empty doStep ({ch['empty_doStep_us']:.2f} us) as the fmpy hosts: "
              f"{ch['realtime_factor_scaled_by_empty_dostep']:.0f}x")
        print(f"  fit over the communication steps: {ch['fixed_us_per_step']:.2f} us per step "
              f"+ {ch['ns_per_mode_step_in_fmu']:.1f} ns per mode-step; outside the joints at 1 ms:"
              f" {100 * ch['outside_joints_share']:.0f} % of the step")

    mem = bench_memory_core(params, quick)
    print(f"\nmemory over {mem['internal_steps']:.0e} internal steps of the core (max stack depth "
          f"{mem['max_depth']}), RSS MB: {mem['rss_mb']}")

    cold = bench_cold(fmu_path, work)
    print("\ncold start (fresh process; instantiate .. first doStep done)")
    for name, r in cold.items():
        print(f"  {name:14s} {r['instantiate_to_first_step_s']:.2f} s   (imports before: "
              f"{r['imports_s']:.2f} s, whole process {r.get('process_s', float('nan')):.2f} s)")

    ref = bench_reference(params, quick)
    print(f"\nvs SciPy reference, 10 modes, {ref['T_s']:g} s forced record (truth: rtol 1e-11)")
    print(f"  core (default settings): {ref['core_seconds'] * 1e3:.1f} ms, error "
          f"{ref['core_error']:.2e}")
    print("  reference rtol   seconds    error")
    for r in ref["sweep"]:
        mark = "  <- compared" if r["rtol"] == ref["chosen_rtol"] else ""
        print(f"  {r['rtol']:13.0e}  {r['seconds']:8.2f}  {r['error']:.2e}{mark}")
    if not ref["core_at_least_as_accurate"]:
        print("  NOTE: the core is less accurate than every reference run; compared to the loosest")
    print(f"  speedup at equal or better accuracy: {ref['speedup_vs_reference']:.0f}x")
    kern_s = k["kernel_ns_per_mode_step"] * 1e-9 * ref["n_mode_steps"]
    ref["speedup_kernel_only"] = ref["chosen_seconds"] / kern_s
    print(f"  of the core's time, the kernel is about {kern_s * 1e3:.1f} ms (the rest is Python per "
          f"1 ms step): with no per-step overhead the speedup would be about "
          f"{ref['speedup_kernel_only']:.0f}x")
    print(f"\n(total {time.perf_counter() - t_all:.0f} s; work folder {work})")

    typ, typ_arrays = fm["typical_lists"], fm["typical_arrays"]
    summary = {
        "kernel": k["kernel"],
        "kernel_ns_per_mode_step": round(k["kernel_ns_per_mode_step"], 2),
        "kernel_over_bare_joint": round(k["kernel_ns_per_mode_step"] / bare_ns, 3),
        "kernel_without_power_ns": round(k["kernel_without_power_ns"], 2),
        "kernel_floor_over_bare_joint": round(k["floor_ratio"], 3),
        "bare_joint_without_power_ns": round(k["bare_joint_without_power_ns"], 2),
        "fallback_ns_per_mode_step": round(k["fallback_ns_per_mode_step"], 1),
        "fmu_binary": fm["binary"],
        # fmpy FMU2Slave with fmi2SetReal/fmi2GetReal on arrays (the issue 13 target); the
        # same with setReal/getReal on lists in *_lists
        "fmu_realtime_factor": round(typ_arrays["realtime_factor"], 1),
        "fmu_realtime_factor_arrays": round(typ_arrays["realtime_factor"], 1),
        "fmu_realtime_factor_lists": round(typ["realtime_factor"], 1),
        "fmu_realtime_factor_mixed": round(fm["typical_mixed"]["realtime_factor"], 1),
        "fmu_realtime_factor_all_variables": round(fm["all_lists"]["realtime_factor"], 1),
        "fmu_us_per_step": round(typ_arrays["us_per_step"], 2),
        "fmu_us_per_step_lists": round(typ["us_per_step"], 2),
        "fmu_us_per_step_python_dostep": round(typ_arrays["python_dostep_us_per_step"], 2),
        "fmu_us_per_step_by_comm_step": {dt: round(v["us_per_step"], 2)
                                         for dt, v in fm["arrays_by_dt"].items()},
        "fmu_fixed_us_per_step": round(fm["arrays_fixed_us_per_step"], 2),
        "empty_fmu_us_per_step": round(typ_arrays["empty_us_per_step"], 2),
        "core_us_per_step": round(fm["core_us_per_step"], 2),
        "speedup_vs_reference": round(ref["speedup_vs_reference"], 1),
        "reference_rtol_compared": ref["chosen_rtol"],
        "speedup_vs_reference_kernel_only_estimate": round(ref["speedup_kernel_only"], 1),
        "core_error": ref["core_error"],
        "cold_start_s": round(cold["warm_cache"]["instantiate_to_first_step_s"], 3),
        "cold_start_cold_cache_s": round(cold["cold_cache"]["instantiate_to_first_step_s"], 3),
        "rss_growth_core_mb": round(mem["rss_mb"][-1] - mem["rss_mb"][1], 1),
        "rss_growth_fmu_mb": round(fm["memory_fmu"]["rss_mb"][-1] - fm["memory_fmu"]["rss_mb"][1], 1),
        "ns_per_mode_step_by_modes": {str(n): round(v, 2) for n, v in sc["modes"].items()},
        "ns_per_mode_step_by_steps_per_period": {str(s): round(v["ns_per_mode_step"], 2)
                                                 for s, v in sc["steps_per_period"].items()},
        "ns_per_mode_step_full_stack_512": round(sc["full_stack"]["ns_per_mode_step"], 1),
        # the machine against the issue's (its anchors measured in this run; see the top)
        "bare_joint_ns": round(bare_ns, 2),
        "empty_doStep_us": round(fm["empty_doStep_only_us"], 3),
        "machine_factor_kernel": round(kernel_factor, 3),
        "machine_factor_fmu": round(fmu_factor, 3),
        "kernel_ns_per_mode_step_scaled": round(k["kernel_ns_per_mode_step"] / kernel_factor, 2),
        "fmu_realtime_factor_scaled": round(typ_arrays["realtime_factor_scaled"], 1),
        "fmu_realtime_factor_arrays_scaled": round(typ_arrays["realtime_factor_scaled"], 1),
        "fmu_realtime_factor_lists_scaled": round(typ["realtime_factor_scaled"], 1),
        "fmu_realtime_factor_mixed_scaled": round(fm["typical_mixed"]["realtime_factor_scaled"], 1),
        "cold_start_s_scaled": round(cold["warm_cache"]["instantiate_to_first_step_s"]
                                     / fmu_factor, 3),
        "quick": quick,
    }
    if "skipped" in ch:
        summary["c_host_skipped"] = ch["skipped"]
    else:
        summary.update({
            "fmu_realtime_factor_c_host": round(ch["realtime_factor"], 1),
            "fmu_realtime_factor_c_host_scaled": round(ch["realtime_factor_scaled"], 1),
            "fmu_realtime_factor_c_host_scaled_by_empty_dostep":
                round(ch["realtime_factor_scaled_by_empty_dostep"], 1),
            "c_host_us_per_step_by_comm_step": {dt: round(v["us_per_step"], 3)
                                                for dt, v in ch["by_dt"].items()},
            "c_host_fixed_us_per_step": round(ch["fixed_us_per_step"], 3),
            "c_host_ns_per_mode_step": round(ch["ns_per_mode_step_in_fmu"], 2),
            "c_host_outside_joints_share": round(ch["outside_joints_share"], 3),
            "c_host_machine_factor_fmu": round(ch["machine_factor_fmu"], 3),
            "c_host_machine_factor_kernel": round(ch["machine_factor_kernel"], 3),
        })
    print(json.dumps(summary))
    return 0


if __name__ == "__main__":
    sys.exit(main())
