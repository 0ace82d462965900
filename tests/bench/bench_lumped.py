"""Speed and accuracy of the discrete-joint structure's integration, measured in one run (not a test).

* a 20-DOF structure with 4 Iwan joints (a 5 x 4 grid of masses, bolted at its corners): a 2 s
  ring-down after a hammer impact that drives every joint into macro-slip, sampled at 20480 Hz
  (the virtual test's simulation rate for 2560 Hz records), at the default steps per period:
  wall time against real time (best of three rounds; the machine is shared);
* the example tray (examples/tray_lumped.toml, 10 DOFs): the same;
* cost per sub-step, and the plain-Python kernel against the compiled one on the same steps;
* accuracy at the default: self-convergence against 4x the steps per period (and 2x fewer, for the
  order), as a fraction of each sensor's peak.

    .venv/bin/python tests/bench/bench_lumped.py [--quick]

The last line is one JSON object with the figures.
"""
from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import numpy as np

from jointfmu.lumped.model import Damping, Dof, Joint, LumpedModel, LumpedPoint, Spring, load_lumped
from jointfmu.lumped.simulate import DEFAULT_STEPS_PER_PERIOD, LumpedSimulator
from jointfmu.lumped.virtual_test import simulate_impact

EXAMPLES = Path(__file__).resolve().parents[2] / "fmu_src" / "jointfmu" / "examples"


def grid_model() -> LumpedModel:
    """20 DOFs: a 5 x 4 grid of 0.25 kg masses joined by springs to their neighbours, each corner
    held to ground by a bracket spring and an Iwan joint (chi -0.5, beta 0.2), soft ground
    springs at two edge nodes; stuck-joint modes from about 110 Hz to 2 kHz."""
    nx, ny = 5, 4
    lab = lambda i, j: f"n{i}{j}"  # noqa: E731
    dofs = tuple(Dof(lab(i, j), 0.25, "z") for j in range(ny) for i in range(nx))
    springs = []
    for j in range(ny):
        for i in range(nx):
            if i + 1 < nx:
                springs.append(Spring((lab(i, j), lab(i + 1, j)), 6.4e6))
            if j + 1 < ny:
                springs.append(Spring((lab(i, j), lab(i, j + 1)), 4.8e6))
    corners = [(0, 0), (nx - 1, 0), (0, ny - 1), (nx - 1, ny - 1)]
    springs += [Spring((lab(i, j),), 1.5e5) for i, j in corners]
    springs += [Spring((lab(2, 0),), 2e4), Spring((lab(2, ny - 1),), 2e4)]
    joints = tuple(Joint(f"bolt{k}", (lab(i, j),), 15.0, 4e4, -0.5, 0.2)
                   for k, (i, j) in enumerate(corners))
    points = (LumpedPoint("hit", lab(1, 1), "+z", "input"), LumpedPoint("s1", lab(4, 3), "+z", "output"),
              LumpedPoint("s2", lab(2, 2), "+z", "output"), LumpedPoint("s3", lab(0, 3), "+z", "output"))
    return LumpedModel(name="grid20", build="bench", dofs=dofs, springs=tuple(springs), joints=joints,
                       damping=Damping(zeta=(0.004, 0.003), zeta_rest=0.002), points=points)


def ring_down(model, impact, force, sensors, duration, spp=DEFAULT_STEPS_PER_PERIOD, rate=20480.0):
    t0 = time.perf_counter()
    y, _, sim = simulate_impact(model, impact, force, 5e-4, 1.0 / rate, int(duration * rate),
                                sensors, "a", steps_per_period=spp)
    return y, sim, time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="0.5 s instead of 2 s")
    args = ap.parse_args()
    dur = 0.5 if args.quick else 2.0
    out: dict = {"duration_s": dur, "steps_per_period": DEFAULT_STEPS_PER_PERIOD}
    cases = {"grid20": (grid_model(), "hit", 20000.0, ("s1", "s2", "s3")),
             "tray": (load_lumped(EXAMPLES / "tray_lumped.toml"), "shaker", 8000.0,
                      ("tip", "center", "psu_foot"))}
    ring_down(cases["grid20"][0], "hit", 100.0, ("s1",), 0.01)  # load the compiled kernel
    for name, (model, imp, F, sens) in cases.items():
        walls = []
        for _ in range(3):
            y, sim, wall = ring_down(model, imp, F, sens, dur)
            walls.append(wall)
        wall = min(walls)
        n_sub = dur / sim.h_max
        out[f"{name}_dofs"] = model.n_dofs
        out[f"{name}_joints"] = model.n_joints
        out[f"{name}_fmax_hz"] = float(sim.modes.frequency.max())
        out[f"{name}_wall_s"] = wall
        out[f"{name}_x_real_time"] = dur / wall
        out[f"{name}_ns_per_substep"] = 1e9 * wall / n_sub
        out[f"{name}_macroslip_joints"] = int(sim.joint_reached_macroslip.sum())
        print(f"{name}: {model.n_dofs} DOFs, {model.n_joints} joints, f_max {sim.modes.frequency.max():.0f} Hz; "
              f"{dur:g} s ring-down in {wall:.3f} s = {dur / wall:.1f}x real time "
              f"({1e9 * wall / n_sub:.0f} ns per sub-step, {int(sim.joint_reached_macroslip.sum())} "
              f"joints in macro-slip)")
        # accuracy: default against 4x finer; 2x coarser for the order
        yd = y
        yf, _, _ = ring_down(model, imp, F, sens, dur, spp=4 * DEFAULT_STEPS_PER_PERIOD)
        yc, _, _ = ring_down(model, imp, F, sens, dur, spp=DEFAULT_STEPS_PER_PERIOD / 2)
        peak = np.abs(yf).max(axis=0)
        e_def = float((np.abs(yd - yf).max(axis=0) / peak).max())
        e_half = float((np.abs(yc - yf).max(axis=0) / peak).max())
        out[f"{name}_selfconv_default"] = e_def
        out[f"{name}_selfconv_half"] = e_half
        out[f"{name}_energy_residual_relative"] = float(sim.energy_residual / sim.energy_input)
        print(f"  self-convergence (acceleration, fraction of each sensor's peak, vs 4x the steps): "
              f"{e_def:.2e} at {DEFAULT_STEPS_PER_PERIOD:g} steps per period, {e_half:.2e} at "
              f"{DEFAULT_STEPS_PER_PERIOD / 2:g} (order {np.log2(e_half / e_def):.1f}); energy "
              f"residual {sim.energy_residual / sim.energy_input:.1e} of the input")
    # plain Python against compiled, the same 2000 sub-steps of the grid
    model = cases["grid20"][0]
    t = {}
    for kernel in ("compiled", "python"):
        sim = LumpedSimulator(model, kernel=kernel)
        sim.set_inputs([2000.0])
        sim.step(5e-4)
        sim.set_inputs([0.0])
        sim.sub_steps(20 * sim.h_max)  # the step's coefficients, computed once, outside the timing
        t0 = time.perf_counter()
        sim.record(100, 20 * sim.h_max, ["s1"], "a")
        t[kernel] = time.perf_counter() - t0
    out["python_over_compiled"] = t["python"] / t["compiled"]
    print(f"plain-Python kernel: {t['python'] / t['compiled']:.0f}x slower than the compiled one")
    print(json.dumps(out))


if __name__ == "__main__":
    main()
