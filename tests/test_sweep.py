"""Sweeps (``jointfmu.cosim.sweep``): Dask gives the numbers a plain loop gives, reruns skip done rows,
failures are reported and retried, tables are written atomically, bad input is named.

The reference for the Dask path is the same tasks run one after the other in this process
(``executor="loop"``): the results must be equal bit for bit (wall time aside).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("fmpy")
pytest.importorskip("pandas")
pytest.importorskip("pyarrow")

import pandas as pd  # noqa: E402

from jointfmu.cli import main  # noqa: E402
from jointfmu.errors import InputError  # noqa: E402
from jointfmu.cosim.sweep import (Task, dask_client, read_table, run_tasks,  # noqa: E402
                            system_tasks, write_table)
from jointfmu.cosim.master import SystemSettings  # noqa: E402

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
BUILDS = ("tray_nominal", "tray_worn")


@pytest.fixture(scope="module")
def builds(example_fmus):
    return [(EXAMPLES / f"{b}.toml", example_fmus[b].path) for b in BUILDS]


@pytest.fixture(scope="module")
def tasks(builds):
    return system_tasks(builds, ["curb_strike", "motor_sweep"], (False, True),
                        SystemSettings(duration=0.04))


def _norm(df):
    return df.drop(columns=["wall_time"]).sort_values("key").reset_index(drop=True)


def test_dask_equals_plain_loop(tasks, tmp_path, dask_local_client):
    a = run_tasks(tasks, tmp_path / "dask.parquet", client=dask_local_client, progress=False)
    b = run_tasks(tasks, tmp_path / "loop.parquet", executor="loop", progress=False)
    assert not a.failed and not b.failed
    assert len(a.table) == len(tasks) == 8
    pd.testing.assert_frame_equal(_norm(a.table), _norm(b.table), check_exact=True)
    # and what is on disk is what was returned
    pd.testing.assert_frame_equal(_norm(read_table(tmp_path / "dask.parquet")), _norm(a.table),
                                  check_exact=True)
    # the runs differ from each other (a sweep of copies would pass the equality trivially)
    assert a.table["tip_acc_rms"].nunique() == len(tasks)


def test_keys_name_build_case_controller_and_settings(tasks, builds):
    from jointfmu.params import load_parameter_set

    h = load_parameter_set(builds[0][0]).content_hash()[:12]
    keys = [t.key for t in tasks]
    assert f"{h}:curb_strike:ctrl-off:{SystemSettings(duration=0.04).digest()}" in keys
    other = system_tasks(builds, ["curb_strike"], (False,), SystemSettings(duration=0.05))
    assert not set(t.key for t in other) & set(keys)     # other settings, other keys


# ---------------------------------------------------------------- rerun and failures
CALLS: list[int] = []


def _square(x):
    CALLS.append(x)
    return {"x": x, "y": x * x}


def _fails(x):
    raise ValueError(f"no good: {x}")


def test_rerun_skips_completed_rows(tmp_path):
    table = tmp_path / "t.parquet"
    ts = [Task(f"k{i}", _square, {"x": i}) for i in range(5)]
    CALLS.clear()
    r1 = run_tasks(ts[:3], table, executor="loop", progress=False)
    assert CALLS == [0, 1, 2] and r1.ran == ["k0", "k1", "k2"]
    CALLS.clear()
    r2 = run_tasks(ts, table, executor="loop", progress=False)
    assert CALLS == [3, 4]
    assert r2.skipped == ["k0", "k1", "k2"] and r2.ran == ["k3", "k4"]
    assert sorted(read_table(table)["key"]) == [f"k{i}" for i in range(5)]
    CALLS.clear()
    r3 = run_tasks(ts, table, executor="loop", progress=False)
    assert CALLS == [] and r3.ran == [] and len(r3.table) == 5


def test_failed_task_is_reported_not_saved_and_retried(tmp_path):
    table = tmp_path / "t.csv"
    ts = [Task("good", _square, {"x": 3}), Task("bad", _fails, {"x": 1})]
    r = run_tasks(ts, table, executor="loop", progress=False)
    assert list(r.failed) == ["bad"] and "no good: 1" in r.failed["bad"]
    assert list(read_table(table)["key"]) == ["good"]
    CALLS.clear()
    r2 = run_tasks([Task("good", _square, {"x": 3}), Task("bad", _square, {"x": 1})], table,
                   executor="loop", progress=False)
    assert r2.ran == ["bad"] and CALLS == [1]
    assert not list(tmp_path.glob("*.part"))


def test_sweep_cli_reruns_skip(builds, tmp_path, capsys):
    args = ["sweep", str(builds[0][0]), "--cases", "curb_strike", "--controller", "off",
            "--duration", "0.02", "--loop", "--no-progress", "--out", str(tmp_path)]
    assert main(args) == 0
    out = capsys.readouterr().out
    assert "1 run(s) done, 0 already" in out and "curb_strike" in out
    assert main(args) == 0
    assert "0 run(s) done, 1 already" in capsys.readouterr().out
    assert len(pd.read_parquet(tmp_path / "results.parquet")) == 1
    assert len(list((tmp_path / "histories").glob("*.parquet"))) == 1


# ------------------------------------------------------------------------ bad input
def test_bad_input_is_named(tmp_path):
    t = [Task("a", _square, {"x": 1})]
    with pytest.raises(InputError, match="'dask' and 'loop'"):
        run_tasks(t, None, executor="threads")
    with pytest.raises(InputError, match="duplicate task keys: a"):
        run_tasks(t + t, None, executor="loop")
    with pytest.raises(InputError, match=".parquet and .csv"):
        run_tasks(t, tmp_path / "t.xlsx", executor="loop")
    with pytest.raises(InputError, match="scheduler address"):
        with dask_client("localhost:8786"):
            pass
    with pytest.raises(InputError, match="load case 'pothole'"):
        system_tasks([], ["pothole"])
    bad = tmp_path / "broken.parquet"
    bad.write_text("not parquet")
    with pytest.raises(InputError, match="cannot be read"):
        run_tasks(t, bad, executor="loop")
    assert bad.read_text() == "not parquet"      # nothing overwritten


def test_unreachable_scheduler_is_a_clear_error():
    with pytest.raises(InputError, match="cannot reach the Dask scheduler"):
        with dask_client("tcp://127.0.0.1:1", timeout=1.0):
            pass


def test_write_table_is_atomic(tmp_path, monkeypatch):
    p = tmp_path / "t.parquet"
    write_table(pd.DataFrame({"key": ["a"], "v": [1.0]}), p)

    def boom(self, *a, **k):
        raise OSError("disk full")

    monkeypatch.setattr(pd.DataFrame, "to_parquet", boom)
    with pytest.raises(OSError):
        write_table(pd.DataFrame({"key": ["b"], "v": [2.0]}), p)
    monkeypatch.undo()
    assert list(pd.read_parquet(p)["key"]) == ["a"]
    assert not list(tmp_path.glob("*.part"))


def test_cached_runner_serves_hits_and_computes_misses():
    from jointfmu.analysis.characterize import CoreRunner
    from jointfmu.params import load_parameter_set
    from jointfmu.cosim.sweep import CachedRunner, _RecordingRunner

    ps = load_parameter_set(EXAMPLES / "tray_nominal.toml")
    rec = _RecordingRunner(CoreRunner())
    imp = np.array([0.05, 0.01, 0.0, 0.0])
    first = rec(ps, imp, 1e-4, 40)
    runner = CachedRunner(dict(rec.records), fallback=CoreRunner())
    again = runner(ps, imp.copy(), 1e-4, 40)
    assert again is first and (runner.hits, runner.misses) == (1, 0)
    other = runner(ps, imp * 2, 1e-4, 40)          # not prefetched: computed, same physics
    assert (runner.hits, runner.misses) == (1, 1)
    np.testing.assert_array_equal(other.q, CoreRunner()(ps, imp * 2, 1e-4, 40).q)


def test_existing_scheduler_by_address(tasks, tmp_path, dask_local_client):
    # what a user who outgrows one machine does: give the address of a running scheduler
    address = dask_local_client.scheduler.address
    assert address.startswith("tcp://")
    few = tasks[:2]
    a = run_tasks(few, tmp_path / "remote.parquet", scheduler=address, progress=False)
    b = run_tasks(few, tmp_path / "loop.parquet", executor="loop", progress=False)
    pd.testing.assert_frame_equal(_norm(a.table), _norm(b.table), check_exact=True)


def test_prefetched_ring_downs_are_the_ones_the_quick_report_asks_for(tmp_path):
    # the sweep computes ahead the report's ring-downs (one plan, analysis.summary): a
    # quick report served from them computes nothing itself
    from jointfmu.analysis.characterize import CoreRunner
    from jointfmu.analysis.summary import QUICK_RING_DOWNS
    from jointfmu.cosim.sweep import CachedRunner, _RecordingRunner
    from jointfmu.params import load_parameter_set
    from jointfmu.report.characterization import write_report

    ps = load_parameter_set(EXAMPLES / "tray_nominal.toml")
    rec = _RecordingRunner(CoreRunner())
    QUICK_RING_DOWNS.run(ps, rec)
    runner = CachedRunner(dict(rec.records), fallback=CoreRunner())
    write_report([ps], tmp_path / "report", runner=runner, quick=True)
    assert (runner.hits, runner.misses) == (2, 0)
