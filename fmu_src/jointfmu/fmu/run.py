"""``jointfmu simulate``: run a built FMU with fmpy on inputs from a CSV file, results to CSV."""
from __future__ import annotations

import csv
import math
import os
import shutil
from pathlib import Path
from typing import Iterable, Mapping, Sequence

from ..fileio import atomic_write
from ..errors import InputError

__all__ = [
    "read_input_csv",
    "run_fmu",
    "write_csv_atomic",
]

# ------------------------------------------------------------------------------ simulate
def read_input_csv(path: str | os.PathLike, allowed: Sequence[str]) -> tuple[list[float],
                                                                              dict[str, list[float]]]:
    """Read an input CSV: a ``time`` column [s] (strictly increasing) and input columns.

    Parameters
    ----------
    path : path-like
        The CSV file (header row, comma separated).
    allowed : sequence of str
        The FMU's input variable names.

    Returns
    -------
    (list of float, dict of str -> list of float)
        Times, shape (M,), and each input column, shape (M,).

    Raises
    ------
    InputError
        Naming the file, the bad column, row or value, and what is allowed.
    """
    path = Path(path)
    allowed_text = "time, " + ", ".join(allowed) if allowed else "time"
    try:
        with open(path, newline="", encoding="utf-8") as f:
            rows = list(csv.reader(f))
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read input CSV {str(path)!r}: {exc}") from exc
    rows = [r for r in rows if r and any(c.strip() for c in r)]
    if not rows:
        raise InputError(f"input CSV {str(path)!r} is empty: it needs a header row with "
                         f"columns from: {allowed_text}")
    header = [c.strip() for c in rows[0]]
    if "time" not in header:
        raise InputError(f"input CSV {str(path)!r} has no 'time' column; allowed columns: "
                         f"{allowed_text}")
    bad = [c for c in header if c != "time" and c not in allowed]
    if bad:
        raise InputError(f"input CSV {str(path)!r}: unknown column(s) {', '.join(map(repr, bad))}; "
                         f"allowed columns: {allowed_text}")
    dup = sorted({c for c in header if header.count(c) > 1})
    if dup:
        raise InputError(f"input CSV {str(path)!r}: column(s) {', '.join(map(repr, dup))} appear "
                         "more than once")
    cols: dict[str, list[float]] = {c: [] for c in header}
    for n, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise InputError(f"input CSV {str(path)!r} line {n}: {len(row)} fields, the header "
                             f"has {len(header)}")
        for c, cell in zip(header, row):
            try:
                x = float(cell)
            except ValueError:
                raise InputError(f"input CSV {str(path)!r} line {n}, column {c!r}: {cell!r} is "
                                 "not a number") from None
            if not math.isfinite(x):
                raise InputError(f"input CSV {str(path)!r} line {n}, column {c!r}: {cell!r}; "
                                 "allowed are finite numbers")
            cols[c].append(x)
    t = cols.pop("time")
    if not t:
        raise InputError(f"input CSV {str(path)!r} has a header but no data rows")
    for n in range(1, len(t)):
        if not t[n] > t[n - 1]:
            raise InputError(f"input CSV {str(path)!r} line {n + 2}: time {t[n]!r} s does not "
                             f"increase (previous {t[n - 1]!r} s); times must strictly increase")
    return t, cols


def run_fmu(fmu_path: str | os.PathLike, times: Sequence[float],
            inputs: Mapping[str, Sequence[float]], stop_time: float | None = None,
            step: float | None = None, start_values: Mapping[str, float] | None = None,
            ) -> tuple[list[str], list[list[float]]]:
    """Run a jointfmu FMU with fmpy, inputs held between the given times.

    The input value at each communication point is that of the last row with ``time <= t``
    (zero before the first row); the communication grid is ``start, start + step, ...`` with
    every input time added, so a change in an input always starts a step.

    Parameters
    ----------
    fmu_path : path-like
    times : sequence of float, shape (M,)
        Input times [s], strictly increasing.
    inputs : mapping str -> sequence of float, each shape (M,)
        Input variable name -> values.
    stop_time : float, optional
        Default the last input time, or the DefaultExperiment stopTime without inputs.
    step : float, optional
        Communication step [s]; default the DefaultExperiment stepSize.
    start_values : mapping, optional
        Parameter values to set at instantiation.

    Returns
    -------
    (list of str, list of list of float)
        Column names (``time`` then every output) and rows.

    Raises
    ------
    InputError
        Bad step or stop time.
    SimulationError
        A step failed (the FMU's log message included).
    """
    from fmpy import extract, read_model_description
    from fmpy.fmi2 import FMU2Slave

    from ..errors import SimulationError

    md = read_model_description(str(fmu_path))
    by_name = {v.name: v for v in md.modelVariables}
    de = md.defaultExperiment
    if step is None:
        step = float(de.stepSize) if de is not None and de.stepSize else 1e-3
    if not (math.isfinite(step) and step > 0):
        raise InputError(f"--step {step!r}: allowed is a finite step > 0 s")
    if stop_time is None:
        stop_time = float(times[-1]) if len(times) else float(de.stopTime if de else 1.0)
    if not (math.isfinite(stop_time) and stop_time >= 0):
        raise InputError(f"--stop-time {stop_time!r}: allowed is a finite time >= 0 s")
    for name in inputs:
        if name not in by_name or by_name[name].causality != "input":
            allowed = [v.name for v in md.modelVariables if v.causality == "input"]
            raise InputError(f"{name!r} is not an input of this FMU; inputs: {', '.join(allowed)}")
    for name in (start_values or {}):
        if name not in by_name or by_name[name].causality != "parameter":
            allowed = [v.name for v in md.modelVariables if v.causality == "parameter"]
            raise InputError(f"{name!r} is not a parameter of this FMU; parameters: "
                             f"{', '.join(allowed)}")
    outputs = [v for v in md.modelVariables if v.causality == "output"]
    in_names = list(inputs)
    in_vrs = [by_name[n].valueReference for n in in_names]
    out_vrs = [v.valueReference for v in outputs]

    n_steps = int(math.floor(stop_time / step + 1e-9))
    grid = sorted({k * step for k in range(n_steps + 1)} | {float(t) for t in times
                                                             if 0.0 < t < stop_time}
                  | {float(stop_time)})
    messages: list[str] = []

    from fmpy.fmi2 import fmi2CallbackFunctions, fmi2CallbackLoggerTYPE, \
        fmi2CallbackAllocateMemoryTYPE, fmi2CallbackFreeMemoryTYPE
    from fmpy import calloc, free

    def logger(env, instance, status, category, message):
        messages.append(message.decode("utf-8", "replace"))

    callbacks = fmi2CallbackFunctions()
    callbacks.logger = fmi2CallbackLoggerTYPE(logger)
    callbacks.allocateMemory = fmi2CallbackAllocateMemoryTYPE(calloc)
    callbacks.freeMemory = fmi2CallbackFreeMemoryTYPE(free)

    unzipdir = extract(str(fmu_path))
    fmu = FMU2Slave(guid=md.guid, unzipDirectory=unzipdir,
                    modelIdentifier=md.coSimulation.modelIdentifier, instanceName="jointfmu")
    rows: list[list[float]] = []
    try:
        fmu.instantiate(callbacks=callbacks, loggingOn=True)
        try:
            for name, value in (start_values or {}).items():
                fmu.setReal([by_name[name].valueReference], [float(value)])
            fmu.setupExperiment(startTime=0.0)
            fmu.enterInitializationMode()
            fmu.exitInitializationMode()
            row_idx = -1
            for k, t in enumerate(grid):
                while row_idx + 1 < len(times) and times[row_idx + 1] <= t + 1e-12:
                    row_idx += 1
                if in_vrs:
                    vals = [inputs[n][row_idx] if row_idx >= 0 else 0.0 for n in in_names]
                    fmu.setReal(in_vrs, vals)
                if k == 0:
                    rows.append([t] + list(fmu.getReal(out_vrs)))
                if k + 1 == len(grid):
                    break
                try:
                    fmu.doStep(currentCommunicationPoint=t, communicationStepSize=grid[k + 1] - t)
                except Exception as exc:
                    raise SimulationError(f"step at t = {t!r} s failed: "
                                          + ("; ".join(messages[-3:]) or str(exc))) from None
                rows.append([grid[k + 1]] + list(fmu.getReal(out_vrs)))
            fmu.terminate()
        finally:
            fmu.freeInstance()
    finally:
        shutil.rmtree(unzipdir, ignore_errors=True)
    return ["time"] + [v.name for v in outputs], rows


def write_csv_atomic(path: str | os.PathLike, header: Sequence[str],
                     rows: Iterable[Sequence[float]]) -> Path:
    """Write a CSV atomically (temp file beside it, then ``os.replace``); floats with repr."""
    path = Path(path)
    with atomic_write(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(header)
        for r in rows:
            w.writerow([repr(float(x)) for x in r])
    return path


