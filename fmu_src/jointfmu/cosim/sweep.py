"""Sweeps: many independent simulations through Dask distributed, results in one table on disk.

A sweep is a list of :class:`Task` (a key and a self-contained call).  :func:`run_tasks` runs the
ones whose key is not yet in the result table, on

* a local Dask cluster by default (``LocalCluster``, worker *processes*, one thread each, two on a
  2-core machine),
* an existing Dask scheduler when its address is given (``tcp://host:8786``): the same sweep
  then runs on whatever workers that scheduler has (each needs jointfmu installed and the FMU
  paths readable),
* or a plain in-process loop (``executor="loop"``), which gives the same numbers (tested).

Results are one row per task, keyed by :attr:`Task.key`, in a Parquet file (pyarrow) written
atomically (temp file, then rename) as rows arrive, so an interrupted sweep keeps what it
finished and a rerun skips it.  A task that fails is reported and not written, so a rerun retries
it.

The characterization report's ring-downs (one record of every mode ringing down at once, and one
of the first mode alone, per build) run the same way, one task per build
(:func:`prefetch_ring_downs`), and reach the report through :class:`CachedRunner`.

Each task opens its own FMU in the worker process: nothing but paths and numbers travels to the
workers.  pythonfmu shares Python modules by name inside a process; every jointfmu FMU has its own
model identifier and bundled package name (see :mod:`jointfmu.fmu.build`), so one worker can
run several builds.
"""
from __future__ import annotations

import os
import sys
import time
import traceback
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping, Sequence

from ..analysis.runners import FmuRunner
from ..analysis.summary import FULL_RING_DOWNS, QUICK_RING_DOWNS
from ..errors import InputError, SimulationError
from ..fileio import atomic_write
from ..params import load_parameter_set
from .loads import LOAD_CASES
from .master import SystemSettings
from .runs import run_case
from .structures import pin_pythonfmu

__all__ = [
    "Task",
    "SweepResult",
    "run_tasks",
    "dask_client",
    "read_table",
    "write_table",
    "system_tasks",
    "raise_failures",
    "CachedRunner",
    "characterize_task",
    "prefetch_ring_downs",
    "DEFAULT_WORKERS",
]

#: Local cluster size: worker processes (one thread each).
DEFAULT_WORKERS = 2


@dataclass(frozen=True)
class Task:
    """One independent simulation.

    Attributes
    ----------
    key : str
        Stable identity of the result (e.g. build hash + case + settings digest); the row key.
    fn : callable
        A module-level function (importable in the worker) returning a dict of scalars.
    kwargs : mapping
        Its keyword arguments (paths, numbers, strings: picklable and small).
    """

    key: str
    fn: Callable[..., Mapping[str, Any]]
    kwargs: Mapping[str, Any] = field(default_factory=dict)


@dataclass
class SweepResult:
    """What :func:`run_tasks` did.

    Attributes
    ----------
    table : pandas.DataFrame
        All rows of the table file (earlier ones and new ones), one per key.
    ran, skipped : list of str
        Keys run now, keys found done already.
    failed : dict of str to str
        Key -> error text of tasks that failed (not in the table).
    wall_time : float
        Seconds, including cluster start.
    path : Path or None
    """

    table: Any
    ran: list
    skipped: list
    failed: dict
    wall_time: float
    path: Path | None


def _call(fn: Callable, kwargs: Mapping[str, Any]) -> tuple[bool, Any]:
    """Run one task; never raise (an exception becomes ``(False, text)``)."""
    try:
        out = dict(fn(**kwargs))
        return True, out
    except Exception as exc:  # noqa: BLE001 - reported per task, the sweep goes on
        tb = traceback.format_exc(limit=3)
        return False, f"{type(exc).__name__}: {exc}\n{tb}"


# ------------------------------------------------------------------------------- table I/O
def read_table(path) -> Any:
    """Read a result table (Parquet, or CSV by suffix); an empty frame when absent."""
    import pandas as pd

    p = Path(path)
    if not p.exists():
        return pd.DataFrame({"key": pd.Series([], dtype=str)})
    try:
        if p.suffix.lower() == ".csv":
            return pd.read_csv(p)
        return pd.read_parquet(p)
    except Exception as exc:  # noqa: BLE001
        raise InputError(f"result table {str(p)!r} cannot be read ({exc}); move it away to "
                         "start the sweep afresh") from exc


def write_table(df, path) -> Path:
    """Write a result table atomically: Parquet (``.parquet``) or CSV (``.csv``)."""
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix not in (".parquet", ".csv"):
        raise InputError(f"result table {str(p)!r}: allowed suffixes are .parquet and .csv")
    with atomic_write(p, "wb") as f:
        if suffix == ".csv":
            f.write(df.to_csv(index=False).encode("utf-8"))
        else:
            df.to_parquet(f, index=False)
    return p


# ------------------------------------------------------------------------------- executors
@contextmanager
def dask_client(scheduler: str | None = None, n_workers: int = DEFAULT_WORKERS,
                timeout: float = 10.0):
    """A Dask client: to ``scheduler`` when given, else to a new local cluster of processes.

    Parameters
    ----------
    scheduler : str, optional
        Address of a running scheduler, e.g. ``"tcp://10.0.0.5:8786"``.
    n_workers : int
        Worker processes of the local cluster (one thread each).
    timeout : float
        Seconds to wait for a given scheduler before giving up.
    """
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError as exc:  # pragma: no cover - a dependency
        raise InputError(f"sweeps through Dask need dask[distributed]: {exc}") from exc
    if scheduler is not None:
        if not isinstance(scheduler, str) or "://" not in scheduler:
            raise InputError(f"--scheduler {scheduler!r}: allowed is a Dask scheduler address "
                             "such as tcp://host:8786")
        try:
            client = Client(scheduler, timeout=timeout)
        except Exception as exc:  # noqa: BLE001
            raise InputError(f"cannot reach the Dask scheduler at {scheduler!r}: {exc}") from exc
        try:
            yield client
        finally:
            client.close()
        return
    if not (isinstance(n_workers, int) and n_workers >= 1):
        raise InputError(f"workers = {n_workers!r}: allowed is an integer >= 1")
    # Worker processes are spawned with this process's sys.path; leave out the resources
    # folders that loading FMUs put there (see structures.pin_pythonfmu), else a worker could
    # import pythonfmu from an FMU's copy and then fail to build FMUs.
    saved = list(sys.path)
    sys.path[:] = [p for p in sys.path if not _is_fmu_resources(p)]
    try:
        # dashboard on a free port (":0"): a second cluster on the machine must not collide
        cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                               dashboard_address=":0")
    finally:
        sys.path[:] = saved
    client = Client(cluster)
    try:
        yield client
    finally:
        client.close()
        cluster.close()


def _is_fmu_resources(path: str) -> bool:
    p = Path(path)
    return p.name == "resources" and (p.parent / "modelDescription.xml").is_file()


def _progress(total: int, enabled: bool, desc: str):
    if not enabled:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit="run", leave=True)


def run_tasks(tasks: Sequence[Task], table_path=None, *, executor: str = "dask",
              scheduler: str | None = None, client=None, n_workers: int = DEFAULT_WORKERS,
              progress: bool = True, desc: str = "sweep", save_interval: float = 2.0
              ) -> SweepResult:
    """Run the tasks not yet in the table; save rows as they arrive.

    Parameters
    ----------
    tasks : sequence of Task
        Keys must be unique.
    table_path : path-like, optional
        Result table (``.parquet`` or ``.csv``); None keeps results in memory only.
    executor : {"dask", "loop"}
        Dask distributed, or a plain loop in this process.
    scheduler : str, optional
        Dask scheduler address; default a local cluster of ``n_workers`` processes.
    client : dask.distributed.Client, optional
        Use this client (it is not closed); overrides ``scheduler``.
    progress : bool
        Show a tqdm progress bar.
    save_interval : float
        At most one table write per this many seconds while running (always one at the end).

    Returns
    -------
    SweepResult

    Raises
    ------
    InputError
        Duplicate keys, unknown executor, unreadable table, unreachable scheduler.
    """
    import pandas as pd

    t_start = time.perf_counter()
    if executor not in ("dask", "loop"):
        raise InputError(f"executor {executor!r}: allowed are 'dask' and 'loop'")
    keys = [t.key for t in tasks]
    if len(set(keys)) != len(keys):
        dup = sorted({k for k in keys if keys.count(k) > 1})
        raise InputError(f"duplicate task keys: {', '.join(dup[:5])}")
    path = Path(table_path) if table_path is not None else None
    if path is not None and path.suffix.lower() not in (".parquet", ".csv"):
        raise InputError(f"result table {str(path)!r}: allowed suffixes are .parquet and .csv")
    old = read_table(path) if path is not None else pd.DataFrame({"key": pd.Series([], dtype=str)})
    done = set(old["key"].astype(str)) if "key" in old else set()
    todo = [t for t in tasks if t.key not in done]
    skipped = [t.key for t in tasks if t.key in done]
    rows: list[dict] = []
    failed: dict[str, str] = {}
    last_save = [time.perf_counter()]

    def table_now():
        new = pd.DataFrame(rows) if rows else None
        if new is None:
            return old
        both = new if len(old) == 0 else pd.concat([old, new], ignore_index=True)
        # rows in key order, whatever order the workers finished in: the same file each time
        return both.sort_values("key", kind="stable").reset_index(drop=True)

    def save(force=False):
        if path is None or not rows:
            return
        if force or time.perf_counter() - last_save[0] >= save_interval:
            write_table(table_now(), path)
            last_save[0] = time.perf_counter()

    def collect(task: Task, ok: bool, value: Any):
        if ok:
            rows.append({"key": task.key, **value})
        else:
            failed[task.key] = value
        save()

    bar = _progress(len(todo), progress and bool(todo), desc)
    try:
        if todo and executor == "loop":
            for t in todo:
                collect(t, *_call(t.fn, t.kwargs))
                if bar is not None:
                    bar.update(1)
        elif todo:
            with (_given(client) if client is not None else dask_client(scheduler, n_workers)) as c:
                from dask.distributed import as_completed

                futures = {}
                for t in todo:
                    fut = c.submit(_call, t.fn, dict(t.kwargs), pure=False,
                                   key=f"jointfmu-{t.key}-{os.getpid()}-{id(t)}")
                    futures[fut] = t
                for fut in as_completed(list(futures)):
                    collect(futures[fut], *fut.result())
                    if bar is not None:
                        bar.update(1)
    finally:
        if bar is not None:
            bar.close()
        save(force=True)
    table = table_now()
    return SweepResult(table, [t.key for t in todo if t.key not in failed], skipped, failed,
                       time.perf_counter() - t_start, path)


@contextmanager
def _given(client):
    yield client


def raise_failures(result: SweepResult) -> None:
    """Raise :class:`SimulationError` naming the failed tasks of a sweep, if any."""
    if result.failed:
        lines = [f"  {k}: {v.splitlines()[0]}" for k, v in list(result.failed.items())[:10]]
        raise SimulationError(f"{len(result.failed)} of {len(result.failed) + len(result.ran)} "
                              "runs failed (the others are saved; rerun to retry):\n"
                              + "\n".join(lines))


# ------------------------------------------------------------------------- system sweeps
def system_tasks(builds: Sequence[tuple[Any, Any]], cases: Iterable[str],
                 controller: Iterable[bool] = (False, True), settings=None,
                 history_dir=None, linear: bool = True) -> list[Task]:
    """Tasks of a builds x load cases x controller sweep.

    Parameters
    ----------
    builds : sequence of (params path, FMU path)
        Each build's parameter file and its built FMU.
    cases : iterable of str
        Load-case names (keys of :data:`.loads.LOAD_CASES`).
    controller : iterable of bool
        Controller off and/or on.
    settings : SystemSettings, optional
    history_dir : path-like, optional
        Where each run writes its time histories (``<key>.parquet``); None: not written.
    linear : bool
        Also run the equivalent-linear model of each run and report the difference.

    Returns
    -------
    list of Task
        Keys ``<params hash12>:<case>:ctrl-<on|off>:<settings digest>``.
    """
    s = settings or SystemSettings()
    cases = list(cases)
    for c in cases:
        if c not in LOAD_CASES:
            raise InputError(f"load case {c!r}: allowed are {', '.join(LOAD_CASES)}")
    tasks = []
    for params_path, fmu_path in builds:
        ps = load_parameter_set(params_path)
        for case in cases:
            for on in controller:
                key = f"{ps.content_hash()[:12]}:{case}:ctrl-{'on' if on else 'off'}:{s.digest()}"
                hist = None
                if history_dir is not None:
                    hist = str(Path(history_dir) / (key.replace(":", "_") + ".parquet"))
                tasks.append(Task(key, run_case, dict(
                    params_path=str(params_path), fmu_path=str(fmu_path), case=case,
                    controller_on=bool(on), settings=s.to_dict(), history_path=hist,
                    linear=bool(linear))))
    return tasks


# -------------------------------------------------------------- characterization runs
def _ring_down_key(params, impulses, dt, n_steps) -> tuple:
    import numpy as np

    imp = np.asarray(impulses, dtype=float).reshape(-1)
    return (params.content_hash(), imp.tobytes(), float(dt).hex(), int(n_steps))


def _fmu_runner():
    """The characterization report's FMU ring-down runner."""
    return FmuRunner()


class _RecordingRunner:
    """Wraps a ring-down runner and keeps every result by its call arguments."""

    def __init__(self, inner):
        self.inner = inner
        self.name = getattr(inner, "name", "fmu")
        self.records: list = []

    def __call__(self, params, impulses, dt, n_steps):
        rd = self.inner(params, impulses, dt, n_steps)
        self.records.append((_ring_down_key(params, impulses, dt, n_steps), rd))
        return rd


class CachedRunner:
    """A ring-down runner that serves results computed elsewhere (e.g. on Dask workers).

    A call whose arguments (parameter-set hash, impulses, dt, n_steps) were computed before
    returns that result; any other call is computed by ``fallback``, so the cache only saves
    time and never changes a number.

    Parameters
    ----------
    cache : dict
        Key -> :class:`~.characterize.RingDown` (from :func:`prefetch_ring_downs`).
    fallback : runner, optional
        Default the report's FMU runner (``FmuRunner``).
    """

    def __init__(self, cache: Mapping, fallback=None):
        self.cache = dict(cache)
        self.fallback = fallback if fallback is not None else _fmu_runner()
        self.name = getattr(self.fallback, "name", "fmu")
        self.hits = 0
        self.misses = 0

    def __call__(self, params, impulses, dt, n_steps):
        rd = self.cache.get(_ring_down_key(params, impulses, dt, n_steps))
        if rd is not None:
            self.hits += 1
            return rd
        self.misses += 1
        return self.fallback(params, impulses, dt, n_steps)


def characterize_task(params_path, quick: bool = False) -> list:
    """Ring-downs of one build, as the characterization report asks for them (worker task).

    Runs the report's :class:`~jointfmu.analysis.summary.RingDownPlan` (quick or full,
    the same object the report uses) with the FMU runner and returns every ring-down it made
    as ``(key, RingDown)`` pairs.
    """
    pin_pythonfmu()    # before any FMU of an earlier task could shadow it
    rec = _RecordingRunner(_fmu_runner())
    plan = QUICK_RING_DOWNS if quick else FULL_RING_DOWNS
    plan.run(load_parameter_set(params_path), rec)
    return rec.records


def prefetch_ring_downs(param_files: Sequence, client=None, *, quick: bool = False,
                        progress: bool = True) -> dict:
    """Compute the characterization ring-downs of every build in parallel.

    One task per build on the Dask ``client`` (or in this process when None); the result feeds
    :class:`CachedRunner`, which :func:`jointfmu.report.characterization.write_report` then uses.

    Returns
    -------
    dict
        Key -> RingDown.
    """
    cache: dict = {}
    bar = _progress(len(param_files), progress, "characterization")
    try:
        if client is None:
            outs = []
            for p in param_files:
                outs.append(characterize_task(str(p), quick))
                if bar is not None:
                    bar.update(1)
        else:
            from dask.distributed import as_completed

            futs = [client.submit(characterize_task, str(p), quick, pure=False)
                    for p in param_files]
            outs = []
            for f in as_completed(futs):
                outs.append(f.result())
                if bar is not None:
                    bar.update(1)
    finally:
        if bar is not None:
            bar.close()
    for records in outs:
        for key, rd in records:
            cache[key] = rd
    return cache
