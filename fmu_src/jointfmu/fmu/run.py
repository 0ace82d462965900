"""``jointfmu simulate``: run a built FMU with fmpy on inputs from a CSV file, results to CSV.

The run is streamed: communication points are generated one at a time from integers
(:class:`RunPlan`), every row of outputs goes to the output file as soon as it is read, and the
file is published atomically at the end.  Nothing proportional to the run's length is held in
memory, and a run whose output cannot fit is refused before it starts, with the numbers.
"""
from __future__ import annotations

import collections
import csv
import math
import os
import shutil
import warnings
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path
from typing import Callable, Iterator, Mapping, Sequence

from ..fileio import atomic_write, check_output_path, nearest_folder
from ..errors import InputError, JointFmuWarning, SimulationError

__all__ = [
    "DEFAULT_MAX_ROWS",
    "BYTES_PER_VALUE",
    "GRID_TOLERANCE",
    "RunPlan",
    "SimulateResult",
    "plan_run",
    "read_input_csv",
    "run_fmu",
    "simulate_to_csv",
]

#: Most output rows (communication points) a run may have unless told otherwise: 10 million
#: rows, about 10 GB of CSV for the example tray's 40 outputs.  A cap on purpose, so that a
#: mistyped ``--step`` is refused at once rather than found out after hours; ``--max-rows``
#: raises it.
DEFAULT_MAX_ROWS = 10_000_000

#: Upper bound of the CSV bytes of one value: ``repr`` of a double is at most 24 characters
#: (``-1.2345678901234567e-308``), plus one separator or line end.
BYTES_PER_VALUE = 25

#: Two times closer than this fraction of the communication step are the same communication
#: point (the floating-point noise of decimal times such as 9 x 0.001 = 0.009000000000000001).
GRID_TOLERANCE = 1e-9


# ---------------------------------------------------------------------- communication points
@dataclass(frozen=True)
class RunPlan:
    """The communication points of a run, counted before it starts and generated one by one.

    The regular points are ``t_k = k h`` for ``k = 0 .. n_steps``, each computed from the
    integer ``k`` (the double nearest to ``k`` times the decimal value of ``h``, so that
    9 x 0.001 s is 0.009 s), never by adding steps.  Each input time between 0 and the stop time
    is a point as well, so that a change of an input always starts a step; an input time within
    :data:`GRID_TOLERANCE` x h of a regular point takes that point's place (the point is then
    the input file's time), and a stop time off the regular grid is the last point.  The points
    strictly increase.

    Attributes
    ----------
    step : float
        Communication step h [s].
    stop_time : float
        Last communication point [s].
    n_steps : int
        Index of the last regular point.
    n_points : int
        Number of communication points, i.e. of output rows.
    """

    step: float
    stop_time: float
    n_steps: int
    n_points: int
    _replaced: Mapping[int, float]
    _extra: tuple[float, ...]

    def regular(self, k: int) -> float:
        """The regular point ``t_k = k h`` [s], from the integer ``k``."""
        return _grid_time(self.step, k)

    def points(self) -> Iterator[float]:
        """The communication points in increasing order [s], shape (n_points,), one at a time."""
        extra = iter(self._extra)
        e = next(extra, None)
        for k in range(self.n_steps + 1):
            t = self._replaced.get(k)
            if t is None:
                t = _grid_time(self.step, k)
            while e is not None and e < t:
                yield e
                e = next(extra, None)
            yield t
        while e is not None:
            yield e
            e = next(extra, None)


def _grid_time(step: float, k: int) -> float:
    return float(Decimal(repr(step)) * k) if k else 0.0


def plan_run(step: float, stop_time: float, input_times: Sequence[float] = ()) -> RunPlan:
    """The communication points of a run from 0 to ``stop_time`` at ``step``, with the input
    times in between (see :class:`RunPlan`).

    Parameters
    ----------
    step : float
        Communication step h [s], finite and > 0.
    stop_time : float
        Stop time [s], finite and >= 0.
    input_times : sequence of float, shape (M,)
        Times of the input rows [s], strictly increasing.

    Returns
    -------
    RunPlan
    """
    if not (isinstance(step, (int, float)) and math.isfinite(step) and step > 0):
        raise InputError(f"--step {step!r}: allowed is a finite step > 0 s")
    if not (isinstance(stop_time, (int, float)) and math.isfinite(stop_time) and stop_time >= 0):
        raise InputError(f"--stop-time {stop_time!r}: allowed is a finite time >= 0 s")
    step, stop_time = float(step), float(stop_time)
    tol = GRID_TOLERANCE * step
    n = int(math.floor(stop_time / step + GRID_TOLERANCE))
    while _grid_time(step, n + 1) <= stop_time + tol:
        n += 1
    while n > 0 and _grid_time(step, n) > stop_time + tol:
        n -= 1
    replaced: dict[int, float] = {}
    extra: list[float] = []
    for t in input_times:
        t = float(t)
        if t <= tol or t > stop_time + tol:
            continue
        k = int(round(t / step))
        if k <= n and abs(t - _grid_time(step, k)) <= tol:
            replaced.setdefault(k, t)
        elif t < stop_time - tol:
            extra.append(t)
    if stop_time - _grid_time(step, n) > tol:
        extra.append(stop_time)
    return RunPlan(step, stop_time, n, n + 1 + len(extra), replaced, tuple(extra))


# ------------------------------------------------------------------------------ input CSV
def read_input_csv(path: str | os.PathLike, allowed: Sequence[str]) -> tuple[list[float],
                                                                              dict[str, list[float]]]:
    """Read an input CSV: a ``time`` column [s] (strictly increasing) and input columns.

    An input of ``allowed`` without a column is held at its start value 0 for the whole run,
    with a :class:`JointFmuWarning` naming it.

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
    missing = [a for a in allowed if a not in cols]
    if missing:
        warnings.warn(JointFmuWarning(
            f"input CSV {str(path)!r} has no column for input(s) {', '.join(missing)}: held at "
            "0 for the whole run"), stacklevel=2)
    return t, cols


# ------------------------------------------------------------------------------ the run
@dataclass(frozen=True)
class SimulateResult:
    """What :func:`simulate_to_csv` wrote.

    Attributes
    ----------
    path : Path
    n_rows : int
        Data rows (communication points, 0 to ``stop_time``).
    columns : tuple of str
        ``time`` and the FMU's outputs.
    step, stop_time : float
        Communication step and last point [s].
    """

    path: Path
    n_rows: int
    columns: tuple[str, ...]
    step: float
    stop_time: float


class _Setup:
    """The checked pieces of a run: model description, variables, plan."""

    def __init__(self, fmu_path, times, inputs, stop_time, step, start_values):
        from fmpy import read_model_description

        self.fmu_path = fmu_path
        md = read_model_description(str(fmu_path))
        self.md = md
        by_name = {v.name: v for v in md.modelVariables}
        de = md.defaultExperiment
        if step is None:
            step = float(de.stepSize) if de is not None and de.stepSize else 1e-3
        if stop_time is None:
            stop_time = float(times[-1]) if len(times) else \
                float(de.stopTime if de is not None and de.stopTime else 1.0)
        self.plan = plan_run(step, stop_time, times)
        for name in inputs:
            if name not in by_name or by_name[name].causality != "input":
                allowed = [v.name for v in md.modelVariables if v.causality == "input"]
                raise InputError(f"{name!r} is not an input of this FMU; inputs: "
                                 f"{', '.join(allowed)}")
        for name in (start_values or {}):
            if name not in by_name or by_name[name].causality != "parameter":
                allowed = [v.name for v in md.modelVariables if v.causality == "parameter"]
                raise InputError(f"{name!r} is not a parameter of this FMU; parameters: "
                                 f"{', '.join(allowed)}")
        self.start = [(by_name[n].valueReference, float(x)) for n, x in (start_values or {}).items()]
        outputs = [v for v in md.modelVariables if v.causality == "output"]
        self.columns = ("time",) + tuple(v.name for v in outputs)
        self.out_vrs = [v.valueReference for v in outputs]
        self.in_names = list(inputs)
        self.in_vrs = [by_name[n].valueReference for n in self.in_names]
        self.times = times
        self.inputs = inputs

    def check_size(self, max_rows: int | None, output: Path | None = None) -> None:
        """Refuse, with the numbers, a run beyond ``max_rows`` rows or whose CSV (at most
        :data:`BYTES_PER_VALUE` per value) would not fit in the output folder's free space."""
        p = self.plan
        rows, cols = p.n_points, len(self.columns)
        what = (f"a run from 0 to {p.stop_time!r} s at a step of {p.step!r} s has {rows:,} "
                f"communication points (output rows) of {cols} columns")
        if max_rows is not None and rows > max_rows:
            raise InputError(f"{what}; the limit is {max_rows:,} rows (--max-rows): give a "
                             "larger --step, a smaller --stop-time, or a larger --max-rows")
        if output is not None:
            need = rows * cols * BYTES_PER_VALUE
            folder = nearest_folder(output)
            free = shutil.disk_usage(folder).free
            if need > free:
                raise InputError(f"{what}, up to {_bytes_text(need)} of CSV "
                                 f"({BYTES_PER_VALUE} bytes per value at most); the folder "
                                 f"{str(folder)!r} has {_bytes_text(free)} free: give a larger "
                                 "--step or a smaller --stop-time, or write elsewhere")

    def run(self, emit: Callable[[list[float]], None]) -> None:
        """Run the FMU over the plan; ``emit`` gets each row ``[t, *outputs]`` as it is read."""
        from fmpy import calloc, extract, free
        from fmpy.fmi1 import FMICallException
        from fmpy.fmi2 import (FMU2Slave, fmi2CallbackAllocateMemoryTYPE,
                               fmi2CallbackFreeMemoryTYPE, fmi2CallbackFunctions,
                               fmi2CallbackLoggerTYPE)

        messages: collections.deque[str] = collections.deque(maxlen=5)

        def logger(env, instance, status, category, message):
            messages.append(message.decode("utf-8", "replace"))

        callbacks = fmi2CallbackFunctions()
        callbacks.logger = fmi2CallbackLoggerTYPE(logger)
        callbacks.allocateMemory = fmi2CallbackAllocateMemoryTYPE(calloc)
        callbacks.freeMemory = fmi2CallbackFreeMemoryTYPE(free)

        md, plan = self.md, self.plan
        times, inputs, in_names, in_vrs, out_vrs = (self.times, self.inputs, self.in_names,
                                                    self.in_vrs, self.out_vrs)
        tol = GRID_TOLERANCE * plan.step
        unzipdir = extract(str(self.fmu_path))
        fmu = FMU2Slave(guid=md.guid, unzipDirectory=unzipdir,
                        modelIdentifier=md.coSimulation.modelIdentifier, instanceName="jointfmu")
        try:
            fmu.instantiate(callbacks=callbacks, loggingOn=True)
            try:
                try:
                    for vr, x in self.start:
                        fmu.setReal([vr], [x])
                    fmu.setupExperiment(startTime=0.0)
                    fmu.enterInitializationMode()
                    fmu.exitInitializationMode()
                except FMICallException as exc:
                    said = "; ".join(m.strip() for m in messages) or "the FMU logged no message"
                    raise SimulationError(f"the FMU refused to start ({exc}): {said}") from None
                row_idx = -1
                points = plan.points()
                t = next(points)
                for k in range(plan.n_points):
                    while row_idx + 1 < len(times) and times[row_idx + 1] <= t + tol:
                        row_idx += 1
                    if in_vrs:
                        fmu.setReal(in_vrs, [inputs[n][row_idx] if row_idx >= 0 else 0.0
                                             for n in in_names])
                    if k == 0:
                        emit([t] + list(fmu.getReal(out_vrs)))
                    if k + 1 == plan.n_points:
                        break
                    t_next = next(points)
                    messages.clear()              # keep what the FMU says about this step
                    try:
                        fmu.doStep(currentCommunicationPoint=t, communicationStepSize=t_next - t)
                    except FMICallException as exc:
                        raise SimulationError(_stopped_text(fmu, exc, t, t_next, k, plan,
                                                            messages)) from None
                    emit([t_next] + list(fmu.getReal(out_vrs)))
                    t = t_next
                fmu.terminate()
            finally:
                fmu.freeInstance()
        finally:
            shutil.rmtree(unzipdir, ignore_errors=True)


def _stopped_text(fmu, exc, t: float, t_next: float, k: int, plan: RunPlan, messages) -> str:
    """Why and when a run stopped: the FMU's status, its messages, the last good point."""
    from fmpy.fmi1 import FMICallException
    from fmpy.fmi2 import fmi2Discard, fmi2LastSuccessfulTime, fmi2Terminated

    label = {2: "discarded", 3: "failed (fmi2Error)", 4: "failed (fmi2Fatal)"}.get(
        exc.status, f"failed (status {exc.status})")
    said = "; ".join(m.strip() for m in messages) or "the FMU logged no message"
    last, why = t, ""
    if exc.status == fmi2Discard:
        # FMI 2.0 sec. 4.2.3: after fmi2Discard the master may ask whether the slave wants the
        # run to end and up to which time it got.  An FMU that cannot answer leaves the
        # master's own last communication point.
        try:
            terminated = fmu.getBooleanStatus(fmi2Terminated)
            last = fmu.getRealStatus(fmi2LastSuccessfulTime)
            why = (" (the FMU asks to end the run)" if terminated else
                   " (the FMU does not ask to end the run; this master ends it)")
        except (FMICallException, OSError, AttributeError):
            why = " (the FMU does not report fmi2Terminated / fmi2LastSuccessfulTime)"
    return (f"the FMU {label} the step from t = {t!r} s to {t_next!r} s{why}: {said}; the run "
            f"stopped at t = {last!r} s after {k} of {plan.n_points - 1} steps")


def run_fmu(fmu_path: str | os.PathLike, times: Sequence[float],
            inputs: Mapping[str, Sequence[float]], stop_time: float | None = None,
            step: float | None = None, start_values: Mapping[str, float] | None = None,
            max_rows: int | None = DEFAULT_MAX_ROWS) -> tuple[list[str], list[list[float]]]:
    """Run a jointfmu FMU with fmpy, inputs held between the given times; rows in memory.

    The input value at each communication point is that of the last row with ``time <= t``
    (zero before the first row); the communication points are those of :func:`plan_run`.
    :func:`simulate_to_csv` is the same run streamed to a file.

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
    max_rows : int or None
        Refuse a run with more communication points (None: no limit).

    Returns
    -------
    (list of str, list of list of float)
        Column names (``time`` then every output) and rows, shape (n_points, 1 + outputs).

    Raises
    ------
    InputError
        Bad step, stop time, variable name, or too many rows.
    SimulationError
        A step failed: why (the FMU's status and messages) and when the run stopped.
    """
    setup = _Setup(fmu_path, times, inputs, stop_time, step, start_values)
    setup.check_size(max_rows)
    rows: list[list[float]] = []
    setup.run(rows.append)
    return list(setup.columns), rows


def simulate_to_csv(fmu_path: str | os.PathLike, times: Sequence[float],
                    inputs: Mapping[str, Sequence[float]], output: str | os.PathLike,
                    stop_time: float | None = None, step: float | None = None,
                    start_values: Mapping[str, float] | None = None,
                    max_rows: int | None = DEFAULT_MAX_ROWS) -> SimulateResult:
    """Run a jointfmu FMU (as :func:`run_fmu`) and stream its outputs to a CSV file.

    Each row is written as soon as it is read from the FMU (floats with ``repr``); the file is
    a temporary file beside ``output`` until the run has finished, then it replaces ``output``.
    Before the run starts it is refused when the output folder cannot be written, when it has
    more than ``max_rows`` rows, or when its CSV (at most :data:`BYTES_PER_VALUE` bytes per
    value) would not fit in the folder's free space.

    Returns
    -------
    SimulateResult

    Raises
    ------
    OutputPathError
        ``output`` cannot be written there.
    InputError
        As :func:`run_fmu`, or the output would not fit.
    SimulationError
        A step failed: why and when the run stopped (nothing is written then).
    """
    out = check_output_path(output, "file", "output CSV")
    setup = _Setup(fmu_path, times, inputs, stop_time, step, start_values)
    setup.check_size(max_rows, out)
    try:
        with atomic_write(out, "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(setup.columns)
            setup.run(lambda row: w.writerow([repr(float(x)) for x in row]))
    except SimulationError as exc:
        raise SimulationError(f"{exc}; {str(out)!r} was not written") from None
    return SimulateResult(out, setup.plan.n_points, setup.columns, setup.plan.step,
                          setup.plan.stop_time)


def _bytes_text(n: float) -> str:
    for unit in ("bytes", "kB", "MB", "GB", "TB"):
        if n < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "bytes" else f"{n:.3g} {unit}"
        n /= 1000.0
    return f"{n:.3g} TB"  # pragma: no cover
