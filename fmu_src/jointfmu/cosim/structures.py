"""Structures and FMUs as components of the loop: any FMU through fmpy, a linear state space.

* :class:`FmuComponent`: an FMI 2.0 co-simulation FMU loaded with fmpy (``FMU2Slave``), the
  structure that ``jointfmu build`` made or the loads and damper FMUs of :mod:`.components`,
  stepped exactly as an FMI master steps it.  Inputs are set and outputs read through
  ``fmi2SetReal`` / ``fmi2GetReal`` on arrays made once per variable list (fmpy's ``setReal`` /
  ``getReal`` make new arrays at every call).
* :class:`LinearStructure`: a linear time-invariant structure with the FMU's variable names, and
  :func:`equivalent_linear_structure`, the equivalent-linear model of a build in that form.
* :func:`pin_pythonfmu` and the extraction of FMUs (once per process) that loading them needs.

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import atexit
import ctypes
import os
import shutil
import sys
import tempfile
from pathlib import Path
from typing import Sequence

import numpy as np

from ..analysis.linear import available_inputs, available_outputs, equivalent_linear
from ..errors import InputError, SimulationError
from ..params.names import parse_name
from .component import Component

__all__ = ["FmuComponent", "LinearStructure", "equivalent_linear_structure", "pin_pythonfmu"]

_EXTRACTED: dict[tuple, str] = {}      # (path, size, mtime) -> folder


def _cleanup_extracted() -> None:
    for d in _EXTRACTED.values():
        shutil.rmtree(d, ignore_errors=True)
    _EXTRACTED.clear()


atexit.register(_cleanup_extracted)


def pin_pythonfmu() -> None:
    """Import pythonfmu from its installed location before any FMU is loaded in this process.

    pythonfmu's FMU binary puts the FMU's ``resources`` folder first on ``sys.path``, and that
    folder holds a copy of pythonfmu's runtime without the FMU binaries.  If the first import of
    ``pythonfmu`` came from there, a later ``build_fmu`` in the same process (a sweep worker
    that then runs a characterization task, say) finds no binary and fails.
    """
    import pythonfmu.builder  # noqa: F401


def _unpin_resources(folder: str) -> None:
    """Take an FMU's resources folder off ``sys.path`` again (its modules stay imported), so
    child processes spawned later (Dask workers) do not inherit it."""
    res = os.path.join(folder, "resources")
    sys.path[:] = [p for p in sys.path if os.path.normpath(p) != os.path.normpath(res)]


def _extract_once(fmu_path: Path) -> str:
    """Unzip an FMU once per process (keyed by path, size and mtime)."""
    from fmpy import extract

    st = fmu_path.stat()
    key = (str(fmu_path.resolve()), st.st_size, st.st_mtime_ns)
    d = _EXTRACTED.get(key)
    if d is None or not os.path.isdir(d):
        d = extract(str(fmu_path), unzipdir=tempfile.mkdtemp(prefix="jointfmu_cosim_"))
        _EXTRACTED[key] = d
    return d



class _FmuRefs:
    """Value references of a variable list and a value buffer, as ctypes arrays made once."""

    __slots__ = ("vr", "n", "buf")

    def __init__(self, vrs: list):
        self.n = len(vrs)
        self.vr = (ctypes.c_uint * self.n)(*vrs)
        self.buf = (ctypes.c_double * self.n)()

    def __len__(self) -> int:
        return self.n


class FmuComponent(Component):
    """An FMI 2.0 co-simulation FMU as a component (fmpy ``FMU2Slave``), variables by name.

    Parameters
    ----------
    fmu_path : path-like
        An FMU (built by ``jointfmu build``, or a loads or damper FMU of :mod:`.components`).
    instance_name : str
    start_values : mapping of str to float, optional
        Parameter values set before initialization.

    Instantiated and initialized on construction (start time 0); use as a context manager, the
    instance is terminated and freed on exit.

    Raises
    ------
    InputError
        The file does not exist, or a start value names no parameter of the FMU.
    """

    def __init__(self, fmu_path, instance_name: str = "structure", start_values=None):
        from fmpy import calloc, free, read_model_description
        from fmpy.fmi2 import (FMU2Slave, fmi2CallbackAllocateMemoryTYPE,
                               fmi2CallbackFreeMemoryTYPE, fmi2CallbackFunctions,
                               fmi2CallbackLoggerTYPE)

        path = Path(fmu_path)
        if not path.is_file():
            raise InputError(f"FMU {str(path)!r} does not exist; build one with 'jointfmu build'")
        self.path = path
        self.label = path.name
        md = read_model_description(str(path))
        self.md = md
        self._vars = {v.name: v for v in md.modelVariables}
        self.inputs = tuple(v.name for v in md.modelVariables if v.causality == "input")
        self.outputs = tuple(v.name for v in md.modelVariables if v.causality == "output")
        self.messages: list[str] = []
        self._alive = False

        def logger(env, instance, status, category, message):
            self.messages.append(message.decode("utf-8", "replace"))

        cb = fmi2CallbackFunctions()
        cb.logger = fmi2CallbackLoggerTYPE(logger)
        cb.allocateMemory = fmi2CallbackAllocateMemoryTYPE(calloc)
        cb.freeMemory = fmi2CallbackFreeMemoryTYPE(free)
        self._cb = cb          # keep the ctypes callbacks alive as long as the instance
        pin_pythonfmu()
        self._dir = _extract_once(path)
        self._fmu = FMU2Slave(guid=md.guid, unzipDirectory=self._dir,
                              modelIdentifier=md.coSimulation.modelIdentifier,
                              instanceName=instance_name)
        self._fmu.instantiate(callbacks=cb, loggingOn=False)
        self._alive = True
        for name, value in (start_values or {}).items():
            var = self._vars.get(name)
            if var is None or var.causality != "parameter":
                self.close()
                params = [v.name for v in md.modelVariables if v.causality == "parameter"]
                raise InputError(f"{name!r} is not a parameter of {path.name}; parameters: "
                                 + ", ".join(params))
            self._fmu.setReal([var.valueReference], [float(value)])
        self._fmu.setupExperiment(startTime=0.0)
        self._fmu.enterInitializationMode()
        self._fmu.exitInitializationMode()
        self._component = self._fmu.component
        self._set_real = self._fmu.fmi2SetReal
        self._get_real = self._fmu.fmi2GetReal
        self._do_step = self._fmu.fmi2DoStep

    def _ref(self, name: str, causality: str):
        var = self._vars.get(name)
        return var.valueReference if var is not None and var.causality == causality else None

    def _pack(self, refs: list) -> _FmuRefs:
        return _FmuRefs(refs)

    def set(self, refs: _FmuRefs, values) -> None:
        if not self._alive:
            raise SimulationError(f"{self.path.name}: the instance is closed")
        refs.buf[:] = values
        try:
            self._set_real(self._component, refs.vr, refs.n, refs.buf)
        except Exception as exc:  # noqa: BLE001 - fmpy raises on an error status
            raise SimulationError(f"{self.path.name}: setting inputs failed: "
                                  + ("; ".join(self.messages[-3:]) or str(exc))) from None

    def get(self, refs: _FmuRefs) -> list:
        if not self._alive:
            raise SimulationError(f"{self.path.name}: the instance is closed")
        try:
            self._get_real(self._component, refs.vr, refs.n, refs.buf)
        except Exception as exc:  # noqa: BLE001 - fmpy raises on an error status
            raise SimulationError(f"{self.path.name}: reading outputs failed: "
                                  + ("; ".join(self.messages[-3:]) or str(exc))) from None
        return refs.buf[:]

    def do_step(self, t: float, h: float) -> tuple[bool, str]:
        if not self._alive:   # an FMI call on a freed instance would crash the process
            return False, f"{self.path.name}: the instance is closed"
        try:
            self._do_step(self._component, t, h, 1)
        except Exception as exc:  # noqa: BLE001 - fmpy raises on fmi2Discard/fmi2Error
            return False, (f"{self.path.name}: " + ("; ".join(self.messages[-3:]) or str(exc)))
        return True, ""

    def close(self) -> None:
        if self._alive:
            self._alive = False
            try:
                self._fmu.terminate()
            finally:
                self._fmu.freeInstance()
                _unpin_resources(self._dir)


class LinearStructure(Component):
    """A linear time-invariant structure (state space) with the FMU's variable names.

    Discretized exactly for inputs held over a step (zero-order hold, C. F. Van Loan, "Computing
    integrals involving the matrix exponential", IEEE Trans. Automat. Control 23(3):395-404,
    1978): ``x <- Ad x + Bd u``, ``y = C x + D u``.

    Parameters
    ----------
    A, B, C, D : array_like, shapes (n, n), (n, m), (p, n), (p, m)
    inputs, outputs : sequence of str, lengths m and p
        Variable names of the columns of B and rows of C (FMU names, e.g. ``point.tip.a``).
    """

    def __init__(self, A, B, C, D, inputs: Sequence[str], outputs: Sequence[str]):
        self.A, self.B = np.asarray(A, float), np.asarray(B, float)
        self.C, self.D = np.asarray(C, float), np.asarray(D, float)
        self.inputs, self.outputs = tuple(inputs), tuple(outputs)
        self.label = "the linear model"
        n, m = self.B.shape
        if self.A.shape != (n, n) or self.C.shape != (len(self.outputs), n) \
                or self.D.shape != (len(self.outputs), m) or m != len(self.inputs):
            raise InputError("linear model: shapes of A, B, C, D do not match its inputs/outputs")
        self.x = np.zeros(n)
        self.u = np.zeros(m)
        self._disc: dict[float, tuple[np.ndarray, np.ndarray]] = {}

    def set(self, vrs, values) -> None:
        self.u[list(vrs)] = values

    def get(self, vrs) -> list[float]:
        y = self.C @ self.x + self.D @ self.u
        return list(y[list(vrs)])

    def do_step(self, t: float, h: float) -> tuple[bool, str]:
        d = self._disc.get(h)
        if d is None:
            from scipy.linalg import expm

            n, m = self.B.shape
            M = np.zeros((n + m, n + m))
            M[:n, :n], M[:n, n:] = self.A * h, self.B * h
            E = expm(M)
            d = (E[:n, :n], E[:n, n:])
            if len(self._disc) > 8:
                self._disc.clear()
            self._disc[h] = d
        Ad, Bd = d
        self.x = Ad @ self.x + Bd @ self.u
        return True, ""


def equivalent_linear_structure(params, amplitudes) -> tuple[LinearStructure, str]:
    """The equivalent-linear structure at modal amplitudes, as a loop component.

    The model of :func:`.linear.equivalent_linear` (first-harmonic frequency, energy-equivalent
    viscous damping at that frequency) with every point-force and base input and every output,
    named like the FMU's variables.

    Returns
    -------
    (LinearStructure, str)
        The component and the name of the definition used.
    """
    ins = [n for n in available_inputs(params) if parse_name(n).kind != "mode"]
    lm = equivalent_linear(params, np.asarray(amplitudes, float), inputs=ins,
                           outputs=list(available_outputs(params)))
    return (LinearStructure(lm.A, lm.B, lm.C, lm.D, list(lm.input_names), list(lm.output_names)),
            "first-harmonic (linear.equivalent_linear)")
