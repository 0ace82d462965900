"""Cost of the system co-simulation and its sweeps, measured side by side in one run (not a test).

* one system run: Python loads + controller components vs a system of three FMUs (same numbers),
  wall time per communication step;
* a sweep of builds x cases x controller: plain loop in this process vs Dask LocalCluster
  (2 worker processes), including the cluster start.

    .venv/bin/python tests/bench/bench_system.py [--quick]

The last line is one JSON object with the measured times and ratios.
"""
from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

from jointfmu.fmu.build import build_fmu
from jointfmu.cosim.components import build_controller_fmu, build_loads_fmu, run_system_of_fmus
from jointfmu.cosim.sweep import run_tasks, system_tasks
from jointfmu.cosim.master import SystemSettings, run_system
from jointfmu.cosim.structures import FmuComponent

EXAMPLES = Path(__file__).resolve().parents[2] / "examples"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    dur = 0.1 if args.quick else 0.5
    out = {}
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        builds = [(EXAMPLES / f"{b}.toml", build_fmu(EXAMPLES / f"{b}.toml", d / f"{b}.fmu").path)
                  for b in ("tray_nominal", "tray_undertorqued", "tray_worn")]
        s = SystemSettings(duration=dur)
        loads = build_loads_fmu("rough_traverse", d / "loads.fmu", s)
        ctrl = build_controller_fmu(d / "ctrl.fmu", s.controller)
        n = round(dur / s.step)
        # warm-up: the first run in a process loads the compiled kernel and the FMU binaries
        w = SystemSettings(duration=0.01)
        with FmuComponent(builds[0][1]) as st:
            run_system(st, "rough_traverse", True, w)
        run_system_of_fmus(builds[0][1], build_loads_fmu("rough_traverse", d / "w.fmu", w),
                           ctrl, True, w)
        with FmuComponent(builds[0][1]) as st:
            py = run_system(st, "rough_traverse", True, s)
        three = run_system_of_fmus(builds[0][1], loads, ctrl, True, s)
        out["step_us_python_components"] = 1e6 * py.wall_time / n
        out["step_us_three_fmus"] = 1e6 * three.wall_time / n
        out["ratio_three_fmus_over_python"] = three.wall_time / py.wall_time
        print(f"one run, {n} steps: Python components {out['step_us_python_components']:.0f} "
              f"us/step, three FMUs {out['step_us_three_fmus']:.0f} us/step "
              f"(x{out['ratio_three_fmus_over_python']:.2f})")

        ts = system_tasks(builds, ["rough_traverse", "curb_strike"], (False, True),
                          SystemSettings(duration=dur / 2))
        t0 = time.perf_counter()
        run_tasks(ts, d / "loop.parquet", executor="loop", progress=False)
        out["sweep_loop_s"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        run_tasks(ts, d / "dask.parquet", progress=False)
        out["sweep_dask_s"] = time.perf_counter() - t0
        out["sweep_runs"] = len(ts)
        out["speedup_dask_over_loop"] = out["sweep_loop_s"] / out["sweep_dask_s"]
        print(f"sweep of {len(ts)} runs: loop {out['sweep_loop_s']:.1f} s, Dask (2 workers, "
              f"incl. start) {out['sweep_dask_s']:.1f} s (x{out['speedup_dask_over_loop']:.2f})")
    print(json.dumps(out))


if __name__ == "__main__":
    main()
