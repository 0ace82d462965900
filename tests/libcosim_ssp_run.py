"""Run an SSP package in libcosim (libcosimpy) and record variables after every step.

Used by tests/test_ssp.py in a subprocess of its own, so that the engine, its worker threads and
the FMUs it loads live and end apart from the test session.  The FMUs are Python FMUs: their
binary runs in the CPython of this process (README, "What a host needs"), so no further setup
is needed when this script runs in the interpreter jointfmu is installed in.

Usage: python libcosim_ssp_run.py SSP STEPS COMPONENT:VARIABLE,... OUT.npy
Writes an array of shape (STEPS, variables); prints one JSON line: the simulated time after
each step in integer nanoseconds (libcosim's clock) and the components found.
"""
import json
import sys

import numpy as np
from libcosimpy.CosimExecution import CosimExecution
from libcosimpy.CosimLogging import CosimLogLevel, log_output_level
from libcosimpy.CosimObserver import CosimObserver


def _text(x):
    return x.decode() if isinstance(x, bytes) else x


def main(ssp: str, steps: int, wanted: list[tuple[str, str]], out: str) -> None:
    log_output_level(CosimLogLevel.WARNING)
    ex = CosimExecution.from_ssp_file(ssp)   # the step comes from the package's annotation
    obs = CosimObserver.create_last_value()
    ex.add_observer(obs)
    index = {_text(s.name): s.index for s in ex.slave_infos()}
    refs = {(c, _text(v.name)): v.reference for c, i in index.items()
            for v in ex.slave_variables(i)}
    rows, times = [], []
    for _ in range(steps):
        if not ex.step(1):
            raise SystemExit(f"libcosim step failed: {ex.status()}")
        times.append(int(ex.status().current_time))
        rows.append([obs.last_real_values(index[c], [refs[(c, v)]])[0] for c, v in wanted])
    np.save(out, np.array(rows, dtype=float))
    print(json.dumps({"times_ns": times, "components": sorted(index)}))


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]),
         [tuple(x.split(":", 1)) for x in sys.argv[3].split(",")], sys.argv[4])
