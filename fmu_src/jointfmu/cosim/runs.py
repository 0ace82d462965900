"""One system run as a self-contained task: the parameter set, the structure FMU, the load case
and the controller, with Python components or FMU components, and the equivalent-linear check."""
from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np

from ..fmu.info import read_fmu_info
from ..params import load_parameter_set
from ..params.names import BASE_FORCE, point_name
from .components import build_controller_fmu, build_loads_fmu, run_system_of_fmus
from .master import (SystemSettings, rms, run_system, settings_from_dict, summarize,
                     write_history)
from .structures import FmuComponent, equivalent_linear_structure

__all__ = ["run_case"]


def run_case(params_path, fmu_path, case: str, controller_on: bool, settings=None,
             history_path=None, linear: bool = True) -> dict:
    """One system run as a self-contained task (what a sweep worker calls).

    Loads the parameter set and the FMU itself, runs :func:`.master.run_system` (or
    :func:`.components.run_system_of_fmus` with ``components="fmu"``), writes the time
    histories (Parquet) when ``history_path`` is given, and, with ``linear``, runs the
    equivalent-linear structure at the run's own sine-equivalent modal amplitudes
    (``sqrt(2)`` times the RMS of each ``mode[i].q``) through the same loop and reports how far
    its tip acceleration is from the nonlinear one.

    Returns
    -------
    dict of scalars
        :func:`summarize` plus identity (``build``, ``set_id``, ``params_hash``, ``case``,
        ``controller``), settings and the ``lin_*`` columns.
    """
    s = settings if isinstance(settings, SystemSettings) else settings_from_dict(settings or {})
    if params_path is None:  # the parameter set bundled in the FMU
        ps = read_fmu_info(fmu_path)["params"]
    else:
        ps = load_parameter_set(params_path)
    if s.components == "fmu":
        with tempfile.TemporaryDirectory(prefix="jointfmu_sys_") as d:
            loads = build_loads_fmu(case, Path(d) / "loads.fmu", s)
            ctrl = build_controller_fmu(Path(d) / "controller.fmu", s.controller)
            run = run_system_of_fmus(fmu_path, loads, ctrl, controller_on, s, case=case)
    else:
        with FmuComponent(fmu_path, instance_name=f"{case}") as st:
            run = run_system(st, case, controller_on, s)
    row = {"build": ps.build, "set_id": ps.set_id, "params_hash": ps.short_hash(), "case": case,
           "controller": bool(controller_on), "step": s.step,
           "duration": s.resolved_duration(case), "seed": s.seed, "level": s.level,
           "components": s.components}
    row.update(summarize(run, s.tip, s.controller.point, s.controller.force_limit))
    if history_path is not None:
        write_history(run, history_path)
        row["history"] = str(Path(history_path).name)
    if linear:
        amps = [row[f"q_amp_{i}"] for i in range(1, ps.n_modes + 1)]
        lin, how = equivalent_linear_structure(ps, amps)
        lrun = run_system(lin, case, controller_on, s)
        a_nl = run.history[point_name(s.tip, "a")]
        a_li = lrun.history[point_name(s.tip, "a")]
        rms_nl = rms(a_nl)
        row["lin_model"] = how
        row["lin_tip_acc_rms"] = rms(a_li)
        row["lin_tip_acc_peak"] = float(np.max(np.abs(a_li)))
        row["lin_rms_diff"] = row["lin_tip_acc_rms"] / rms_nl - 1.0 if rms_nl > 0 else 0.0
        row["lin_peak_diff"] = (row["lin_tip_acc_peak"] / row["tip_acc_peak"] - 1.0
                                if row["tip_acc_peak"] > 0 else 0.0)
        row["lin_waveform_err"] = rms(a_li - a_nl) / rms_nl if rms_nl > 0 else 0.0
        row["lin_base_force_peak"] = float(np.max(np.abs(lrun.history[BASE_FORCE])))
    return row
