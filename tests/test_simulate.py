"""``jointfmu simulate`` streams its run: communication points from integers, rows written as
they are read, a run that cannot fit refused up front, why and when a stopped run stopped.

References: IEEE 754 binary64 with round-to-nearest (``float("0.009")`` is the double nearest
9/1000, and Python's ``decimal`` multiplies exactly), FMI 2.0 sec. 4.2.3 (a master's reaction to
``fmi2Discard``).  Everything else is derived here.
"""
from __future__ import annotations

import csv
import inspect
from decimal import Decimal
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("fmpy")
pytest.importorskip("pythonfmu")

from jointfmu.cli import main  # noqa: E402
from jointfmu.errors import InputError  # noqa: E402
from jointfmu.fmu import run as jrun  # noqa: E402
from jointfmu.fmu.run import GRID_TOLERANCE, plan_run  # noqa: E402

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
NOMINAL = EXAMPLES / "tray_nominal.toml"


@pytest.fixture(scope="module")
def nominal_fmu(example_fmus):
    return example_fmus["tray_nominal"].path  # built once per session (conftest.py)


def _write_csv(path, header, rows):
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(header)
        w.writerows(rows)


def _read_csv(path):
    with open(path) as f:
        rows = list(csv.reader(f))
    return rows[0], np.array(rows[1:], dtype=float)


# ------------------------------------------------------------------------ the plan
@pytest.mark.parametrize("step,stop,inputs,expected", [
    # 1 ms input file and 1 ms step: one point per millisecond, each the decimal time (IEEE 754:
    # float("0.009") is the double nearest 9/1000; 9 * 0.001 is 0.009000000000000001)
    (1e-3, 0.02, [k / 1000 for k in range(21)], [float(f"{k / 1000}") for k in range(21)]),
    # the same file written as k * 0.001 (noisy decimals): the file's times, once each
    (1e-3, 0.01, [k * 0.001 for k in range(11)], [k * 0.001 for k in range(11)]),
    # input times off the grid become points of their own; an off-grid stop is the last point
    (0.25, 0.6, [0.0, 0.1, 0.5], [0.0, 0.1, 0.25, 0.5, 0.6]),
    # input times before 0 or after the stop add no point
    (0.5, 1.0, [-1.0, 2.0], [0.0, 0.5, 1.0]),
    (1e-3, 0.0, [0.0], [0.0]),
])
def test_plan_points(step, stop, inputs, expected):
    plan = plan_run(step, stop, inputs)
    pts = list(plan.points())
    assert pts == expected
    assert plan.n_points == len(pts)


@pytest.mark.parametrize("step,stop", [(1e-3, 0.2), (2e-4, 0.2), (1e-4, 1.0), (0.1, 0.7)])
def test_plan_regular_points_are_k_times_the_decimal_step(step, stop):
    """Derived here: t_k is the double nearest k x (the step as written), never a running sum."""
    plan = plan_run(step, stop)
    pts = list(plan.points())
    assert pts == [float(Decimal(repr(step)) * k) for k in range(len(pts))]
    assert np.all(np.diff(pts) > 0)
    assert pts[-1] == pytest.approx(stop, abs=GRID_TOLERANCE * step)


def test_plan_counts_without_making_the_grid():
    """--step 1e-9 on 0.2 s: 200,000,001 points, counted from integers; the points come from a
    generator, one at a time."""
    plan = plan_run(1e-9, 0.2, [0.0, 0.1])
    assert plan.n_points == 200_000_001
    pts = plan.points()
    assert inspect.isgenerator(pts)
    assert [next(pts) for _ in range(3)] == [0.0, 1e-9, 2e-9]


@pytest.mark.parametrize("step,stop,needle", [
    (0.0, 1.0, "--step"), (float("nan"), 1.0, "--step"), (1e-3, -1.0, "--stop-time"),
    (1e-3, float("inf"), "--stop-time"),
])
def test_plan_bad_step_or_stop(step, stop, needle):
    with pytest.raises(InputError, match=needle):
        plan_run(step, stop)


# --------------------------------------------------------------------- the command
def test_simulate_1ms_csv_rows_strictly_increase_once_per_ms(nominal_fmu, tmp_path, capsys):
    """The issue's case: a 1 ms input file gave rows at 0.009 and 0.009000000000000001."""
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "point.shaker.force"],
               [[f"{k / 1000}", "5" if k < 5 else "0"] for k in range(21)])
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp),
                 "--step", "1e-3"]) == 0
    header, data = _read_csv(outp)
    assert list(data[:, 0]) == [float(f"{k / 1000}") for k in range(21)]
    assert np.all(np.diff(data[:, 0]) > 0.999e-3)


def test_simulate_default_step_with_1ms_csv(nominal_fmu, tmp_path):
    """The FMU's own step (DefaultExperiment) finer than the file's: every file time is a
    point, and no two points are closer than the step's rounding noise."""
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "point.shaker.force"], [[f"{k / 1000}", "1"] for k in range(11)])
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp)]) == 0
    _, data = _read_csv(outp)
    t = data[:, 0]
    assert set(float(f"{k / 1000}") for k in range(11)) <= set(t)
    steps = np.diff(t)
    assert np.all(steps > 0) and steps.min() > 0.999 * steps.max()


def test_simulate_refuses_too_many_rows_up_front(nominal_fmu, tmp_path, capsys):
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "base.acceleration"], [["0", "1"], ["0.2", "0"]])
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp),
                 "--step", "1e-9"]) == 1
    err = capsys.readouterr().err
    assert "200,000,001 communication points" in err and "10,000,000 rows (--max-rows)" in err
    errors = [line for line in err.splitlines() if not line.startswith("jointfmu: warning:")]
    assert "Traceback" not in err and len(errors) == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.csv"]


def test_simulate_refuses_what_the_disk_cannot_hold(nominal_fmu, tmp_path, capsys, monkeypatch):
    """The bound: rows x columns x 25 bytes (the longest repr of a double, 24 characters, plus a
    separator) against the free space of the output's folder (here made 1 MB)."""
    class Usage:
        free = 1_000_000
    monkeypatch.setattr(jrun.shutil, "disk_usage", lambda p: Usage)
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "base.acceleration"], [["0", "1"], ["1.0", "0"]])
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp),
                 "--step", "1e-4"]) == 1
    err = capsys.readouterr().err
    cols = len(_read_header(nominal_fmu))
    need = 10001 * cols * 25
    assert f"10,001 communication points (output rows) of {cols} columns" in err
    assert f"{need / 1e6:.3g} MB" in err and "1 MB free" in err
    assert not outp.exists()


def _read_header(fmu):
    from fmpy import read_model_description

    md = read_model_description(str(fmu))
    return ["time"] + [v.name for v in md.modelVariables if v.causality == "output"]


def test_simulate_streams_rows_into_a_temp_file(nominal_fmu, tmp_path, monkeypatch):
    """Halfway through a run of 2001 rows (about 1 MB of CSV), most of the first half is in the
    temporary file beside the output already (less one write buffer), and the output itself
    does not exist yet: it replaces nothing until the run has finished."""
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "mode[1].force"], [["0", "1"], ["0.01", "0"]])
    seen = []
    real_run = jrun._Setup.run

    def spy(self, emit):
        def watching_emit(row):
            emit(row)
            if not seen and row[0] >= 0.01:
                parts = [p for p in tmp_path.iterdir() if p.name.endswith(".part")]
                seen.append((outp.exists(), [p.stat().st_size for p in parts]))
        return real_run(self, watching_emit)
    monkeypatch.setattr(jrun._Setup, "run", spy)
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp),
                 "--step", "1e-5", "--stop-time", "0.02"]) == 0
    size = outp.stat().st_size
    assert len(seen) == 1 and seen[0][0] is False and len(seen[0][1]) == 1
    assert seen[0][1][0] > 0.4 * size
    _, data = _read_csv(outp)
    assert data.shape[0] == 2001


def test_simulate_says_why_and_when_a_run_stopped(nominal_fmu, tmp_path, capsys):
    """An input the FMU rejects (|force| > 1e12) at t = 4 ms: the step from there is discarded
    (FMI 2.0 sec. 4.2.3); the message names the step, the FMU's reason and where the run
    stopped, and nothing is written."""
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "mode[1].force"], [["0", "1"], ["0.004", "1e13"], ["0.01", "0"]])
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp),
                 "--step", "2e-4"]) == 1
    err = capsys.readouterr().err.strip().splitlines()[-1]
    assert "discarded the step from t = 0.004 s" in err
    assert "1e+13" in err or "10000000000000.0" in err          # the FMU's own message
    assert "the run stopped at t = 0.004 s after 20 of 50 steps" in err
    assert "was not written" in err and not outp.exists()


def test_simulate_warns_of_inputs_without_a_column(nominal_fmu, tmp_path, capsys):
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time", "point.shaker.force"], [["0", "1"], ["0.002", "0"]])
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp)]) == 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("jointfmu: warning: input CSV")
    for name in ("base.acceleration", "point.psu_foot.force", "mode[1].force"):
        assert name in err[0]
    assert "point.shaker.force" not in err[0] and "held at 0" in err[0]


def test_simulate_no_warning_when_every_input_has_a_column(nominal_fmu, tmp_path, capsys):
    names = _inputs(nominal_fmu)
    inp, outp = tmp_path / "in.csv", tmp_path / "out.csv"
    _write_csv(inp, ["time"] + names, [["0"] + ["0"] * len(names)])
    assert main(["simulate", str(nominal_fmu), "--input", str(inp), "--output", str(outp),
                 "--stop-time", "0.001"]) == 0
    assert "warning" not in capsys.readouterr().err


def _inputs(fmu):
    from fmpy import read_model_description

    md = read_model_description(str(fmu))
    return [v.name for v in md.modelVariables if v.causality == "input"]
