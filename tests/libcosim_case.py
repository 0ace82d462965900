"""One libcosim execution of jointfmu FMUs, its results printed as one JSON line (used by
tests/test_fmu_libcosim.py; not collected by pytest).

Usage: python libcosim_case.py SPEC_JSON, SPEC = {"step_ns": int, "n_steps": int, "slaves": [
{"fmu": path, "name": instance name, "inputs": {variable: [value per step]}, "outputs":
[variable, ...], "initial": {variable: value}}]}.  Prints {"ok": bool, "steps": steps taken,
"error": libcosim's last error message, "rows": {name: [[output values] after each step]}}.

libcosimpy loads libcosim into this Python process through ctypes (its calls release the GIL),
so the FMUs' Python runs in this interpreter; a separate process only keeps an engine crash or
hang, and pythonfmu's occasional abort at interpreter exit, out of the test session.  Inputs are
set before every step with libcosim's override manipulator and outputs read after it with a
last-value observer, the way a libcosim user drives a model from a script.
"""
import json
import os
import sys


def main(spec):
    from libcosimpy.CosimExecution import CosimExecution
    from libcosimpy.CosimLogging import CosimLogLevel, log_output_level
    from libcosimpy.CosimManipulator import CosimManipulator
    from libcosimpy.CosimObserver import CosimObserver
    from libcosimpy.CosimSlave import CosimLocalSlave
    from libcosimpy._internal import get_last_error_message

    log_output_level(CosimLogLevel[spec.get("log_level", "WARNING")])
    ex = CosimExecution.from_step_size(int(spec["step_ns"]))
    man = CosimManipulator.create_override()
    obs = CosimObserver.create_last_value()
    slaves = []
    for sl in spec["slaves"]:
        idx = ex.add_local_slave(CosimLocalSlave(fmu_path=sl["fmu"], instance_name=sl["name"]))
        if idx < 0:
            return {"ok": False, "steps": 0, "error": get_last_error_message(), "rows": {}}
        vr = {(v.name.decode() if isinstance(v.name, bytes) else v.name): v.reference
              for v in ex.slave_variables(idx)}
        for name, value in sl.get("initial", {}).items():
            ex.real_initial_value(idx, vr[name], float(value))
        slaves.append((sl, idx, vr))
    ex.add_manipulator(man)
    ex.add_observer(obs)
    rows = {sl["name"]: [] for sl, _, _ in slaves}
    ok, k = True, 0
    for k in range(int(spec["n_steps"])):
        for sl, idx, vr in slaves:
            names = list(sl.get("inputs", {}))
            if names:
                man.slave_real_values(idx, [vr[n] for n in names],
                                      [float(sl["inputs"][n][k]) for n in names])
        if not ex.step(1):
            ok = False
            break
        for sl, idx, vr in slaves:
            rows[sl["name"]].append(list(obs.last_real_values(idx, [vr[n] for n in sl["outputs"]])))
    else:
        k = int(spec["n_steps"])
    return {"ok": ok, "steps": k, "error": get_last_error_message(), "rows": rows}


if __name__ == "__main__":
    result = main(json.loads(sys.argv[1]))
    sys.stdout.write(json.dumps(result) + "\n")
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(0)    # skip interpreter teardown (pythonfmu's abort at exit, DEVELOPERS.md)
