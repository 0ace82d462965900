"""The FMU class: a thin pythonfmu slave around :class:`.integrate.ModalSimulator`.

Each built FMU carries a generated entry module whose class subclasses :class:`JointSlave` under a
unique name (see :mod:`.build`).  The slave declares the variables of :func:`.variables.variable_table`,
keeps the parameter and input values the host sets, and hands ``do_step`` to the core.

pythonfmu 0.7.0 facts this class is written around (read in its source):

- The builder instantiates the class once at build time, and ``fmi2Reset`` instantiates it anew,
  so ``__init__`` only reads the parameter set and registers variables; the simulator is created
  at ``exit_initialization_mode`` (or the first step).
- A Python exception escaping any method becomes ``fmi2Fatal`` and the C wrapper drops its
  references to the instance, so nothing here raises into the wrapper: problems are logged with
  ``Fmi2Status.error`` and ``do_step`` returns False (the wrapper reports ``fmi2Discard``).
- FMU states are whatever ``_get_fmu_state`` returns; ``_fmu_state_to_bytes`` and
  ``_fmu_state_from_bytes`` are called on the class.  Here a state is an immutable ``bytes``.
- ``self.log`` messages reach the host's logger only while debug logging is on
  (``loggingOn`` at fmi2Instantiate, or fmi2SetDebugLogging), whatever their status; with it
  off the host sees only the returned status.
- pythonfmu cannot return fmi2Error from Python: ``do_step`` -> True/False gives fmi2OK or
  fmi2Discard, every other method fmi2OK unless it raises (fmi2Fatal).  Out-of-range parameters
  are therefore reported at exit_initialization_mode by an error-status message, and every
  later ``do_step`` refuses to run.
"""
from __future__ import annotations

import base64
import json
import math
from pathlib import Path
from typing import Any

from pythonfmu import Fmi2Slave
from pythonfmu.enums import Fmi2Causality, Fmi2Initial, Fmi2Status, Fmi2Variability
from pythonfmu.variables import Real

from ..errors import InputError, JointFmuError
from ..physics.integrate import MAX_INPUT
from ..params import load_parameter_set
from .variables import variable_table

__all__ = ["JointSlave", "PARAMETER_FILE", "BUILD_INFO_FILE"]

#: Resource file names written by :mod:`.build`.
PARAMETER_FILE = "parameters.toml"
BUILD_INFO_FILE = "jointfmu_build.json"

_STATE_MAGIC = "jointfmu-state-1"

#: Input kinds of the variable table -> the simulator's names for them (ModalSimulator.input_index).
_INPUT_NAMES = {"modal_force": "modal_forces", "point_force": "point_forces",
                "base_acc": "base_acc"}


class JointSlave(Fmi2Slave):
    """FMI 2.0 co-simulation slave of one modal Iwan model.

    Parameters
    ----------
    **kwargs
        As pythonfmu passes them: ``instance_name``, ``resources`` (the FMU's resources folder,
        holding :data:`PARAMETER_FILE`), ``visible``, ``logger``.
    """

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        resources = Path(self.resources) if self.resources else Path(".")
        self._params0 = load_parameter_set(resources / PARAMETER_FILE)
        self._table = variable_table(self._params0)
        self.description = getattr(self._params0, "description", None) or None
        # Values set by the host, indexed like the table (outputs keep None).
        self._values: list[Any] = [v.start for v in self._table]
        self._param_vrs = [k for k, v in enumerate(self._table) if v.kind == "parameter"]
        self._steps_vr = next(k for k, v in enumerate(self._table) if v.kind == "steps_per_period")
        self._input_vrs = frozenset(k for k, v in enumerate(self._table) if v.is_input)
        self._sim = None
        self._in_pos: dict[int, int] = {}    # input vr -> position in the simulator's inputs
        self._out_pos: dict[int, int] = {}   # output vr -> position in its output vector
        self._pending = set(self._input_vrs)  # inputs set since they were last handed over
        self._read_plans: dict[tuple, list] = {}   # see _read_plan
        self._settings_changed = True        # a parameter was set since the last check
        self._active = None          # (parameter values, steps) the simulator was built with
        self._init_error: str | None = None
        self._initialized = False
        for vr, var in enumerate(self._table):
            self.register_variable(self._real(vr, var), nested=False)
            if self.vars[vr].value_reference != vr:  # build time: pythonfmu numbering changed
                raise RuntimeError("value references out of step with the variable table")

    # ----------------------------------------------------------------------------- variables
    def _real(self, vr: int, var) -> Real:
        # the per-variable getter and setter go through the same fast paths as the host's calls
        initial = Fmi2Initial[var.initial] if var.initial else None
        return Real(var.name, start=var.start, causality=Fmi2Causality[var.causality],
                    variability=Fmi2Variability[var.variability], initial=initial,
                    description=var.description,
                    getter=lambda vr=vr: self.get_real([vr])[0],
                    setter=lambda value, vr=vr: self.set_real([vr], [value]))

    def get_real(self, vrs):
        """Values of the variables ``vrs`` (fmi2GetReal); pythonfmu's C wrapper calls this once
        per host call.

        Outputs are read from the simulator's output buffer, current with the state and the
        inputs (outputs with direct feedthrough, accelerations and the base force, see inputs
        set since the last step; an input refused at doStep leaves them at the last valid
        inputs).  An unknown value reference is reported and reads NaN: nothing here raises
        into the C wrapper.
        """
        try:
            if self._pending:
                self._push_inputs_if_valid()
            outs = self._sim.output_buffer()     # AttributeError before a simulator exists
            key = tuple(vrs)
            plan = self._read_plans.get(key) or self._read_plan(key)
            values = self._values
            return [outs[p] if p >= 0 else values[~p] for p in plan]
        except Exception:
            return [self._get_one(vr) for vr in vrs]

    def _read_plan(self, vrs: tuple) -> list:
        """Where get_real finds each of ``vrs``: p >= 0 at position p of the output buffer,
        p < 0 in the stored values at ~p.  Kept per tuple of value references (a host reads the
        same ones every step); LookupError for an unknown value reference."""
        n = len(self._table)
        if not all(type(vr) is int and 0 <= vr < n for vr in vrs):
            raise LookupError(vrs)
        if len(self._read_plans) > 64:
            self._read_plans.clear()
        out_pos = self._out_pos
        plan = self._read_plans[vrs] = [out_pos.get(vr, ~vr) for vr in vrs]
        return plan

    def _push_inputs_if_valid(self) -> None:
        try:
            self._push_inputs()
        except JointFmuError:
            pass    # refused, and reported, at doStep

    def _get_one(self, vr) -> float:
        """One value on the slow path: before a simulator exists (outputs read 0), an unknown
        value reference (reported, NaN), or an output that cannot be evaluated (NaN)."""
        if not self._known(vr, "read as NaN"):
            return math.nan
        if not self._table[vr].is_output:
            return self._values[vr]
        if self._sim is None:
            return 0.0
        try:
            self._push_inputs_if_valid()
            return self._sim.output_buffer()[self._out_pos[vr]]
        except Exception:       # never raise into the C wrapper
            return math.nan

    def _known(self, vr, consequence: str) -> bool:
        """True for a value reference of this FMU; otherwise an error-status message."""
        if isinstance(vr, int) and 0 <= vr < len(self._table):
            return True
        self.log(f"value reference {vr!r} is not a variable of this FMU ({consequence}): allowed "
                 f"are 0..{len(self._table) - 1}, as in modelDescription.xml", Fmi2Status.error)
        return False

    def set_real(self, vrs, values) -> None:
        """Set the variables ``vrs`` (fmi2SetReal).  A valid input goes to the simulator at once;
        one set before the simulator exists, or refused by it, waits for the next doStep (which
        reports a refused one, names it, and does not step) or output read.  Parameters only
        before initialization ends; outputs and unknown value references are refused with an
        error-status message."""
        stored, pending, sim = self._values, self._pending, self._sim
        if sim is None or pending:
            # handed over together at the next doStep or read
            inputs = self._input_vrs
            for vr, value in zip(vrs, values):
                if vr in inputs:
                    stored[vr] = value
                    pending.add(vr)
                else:
                    self._set_value(vr, value)
            return
        in_pos = self._in_pos
        for vr, value in zip(vrs, values):
            p = in_pos.get(vr)
            if p is None:
                self._set_value(vr, value)
                continue
            stored[vr] = value
            try:
                sim.set_input_value(p, value)
            except JointFmuError:
                pending.add(vr)     # refused, naming its FMU variable, at the next doStep

    def _set_value(self, vr, value) -> None:
        if not self._known(vr, f"value {value!r} ignored"):
            return
        var = self._table[vr]
        if var.is_output:
            self.log(f"{var.name} is an output and cannot be set (value {value!r} ignored)",
                     Fmi2Status.error)
            return
        if self._initialized:
            self.log(f"parameter {var.name} can only be set before initialization ends "
                     f"(value {value!r} ignored); instantiate anew or reset to change it",
                     Fmi2Status.error)
            return
        self._values[vr] = float(value)     # a parameter (set_real itself takes the inputs)
        self._settings_changed = True

    # ------------------------------------------------------------------------- life cycle
    def exit_initialization_mode(self):
        self._initialized = True
        self._ensure_simulator()

    def do_step(self, current_time: float, step_size: float) -> bool:
        try:
            if (self._sim is None or self._settings_changed) and not self._ensure_simulator():
                self.log(f"cannot step: {self._init_error}", Fmi2Status.error)
                return False
            if not 0.0 <= step_size < math.inf:
                self.log(f"communication step size {step_size!r} at t = {current_time!r} s is "
                         "invalid: allowed is a finite step >= 0 s", Fmi2Status.error)
                return False
            if self._pending:
                try:
                    self._push_inputs()
                except JointFmuError as exc:
                    self.log(f"input at t = {current_time!r} s rejected, step not taken, state "
                             f"kept: {exc}", Fmi2Status.error)
                    return False
            ok, message = self._sim.step(step_size)
            if not ok:
                self.log(f"step from t = {current_time!r} s by {step_size!r} s failed, state kept: "
                         f"{message}", Fmi2Status.error)
                return False
            return True
        except Exception as exc:     # a bug, still never across the C boundary
            self.log(f"internal error in do_step at t = {current_time!r} s, state kept: "
                     f"{type(exc).__name__}: {exc}", Fmi2Status.error)
            return False

    def _push_inputs(self) -> None:
        """Hand the inputs set since the last push to the simulator (all or none of them)."""
        pending = self._pending
        if not pending:
            return
        vals, in_pos = self._values, self._in_pos
        vrs = list(pending)
        try:
            self._sim.set_input_values([in_pos[k] for k in vrs], [vals[k] for k in vrs])
        except InputError:
            for k in sorted(vrs):    # name the refused input by its FMU variable
                x, var = vals[k], self._table[k]
                if not (isinstance(x, (int, float)) and -MAX_INPUT <= x <= MAX_INPUT):
                    raise InputError(f"input {var.name} = {x!r} [{var.unit}]: allowed are "
                                     f"finite values with |value| <= {MAX_INPUT:g}") from None
            raise
        pending.clear()

    def _current_settings(self):
        return (tuple(self._values[k] for k in self._param_vrs), self._values[self._steps_vr])

    def _ensure_simulator(self) -> bool:
        """Build the simulator for the current parameter values; False (and a logged error) if
        they are out of range."""
        if self._sim is not None and not self._settings_changed:
            return True
        self._settings_changed = False
        settings = self._current_settings()
        if self._sim is not None and settings == self._active:
            return True
        if self._init_error is not None and settings == self._active:
            return False
        self._active = settings
        self._sim = None
        self._pending = set(self._input_vrs)   # a new simulator starts from zero inputs
        try:
            params = self._effective_params()
            from ..physics.integrate import ModalSimulator  # its range check names steps_per_period
            sim = ModalSimulator(params, steps_per_period=self._values[self._steps_vr])
            self._in_pos = {vr: sim.input_index(_INPUT_NAMES[v.kind], v.index)
                            for vr, v in enumerate(self._table) if v.is_input}
            self._out_pos = {vr: sim.output_index(v.kind, v.index)
                             for vr, v in enumerate(self._table) if v.is_output}
            self._read_plans = {}
            self._sim = sim
        except JointFmuError as exc:
            self._init_error = str(exc)
            self.log(f"parameters out of range at initialization: {exc}", Fmi2Status.error)
            return False
        except Exception as exc:
            self._init_error = f"{type(exc).__name__}: {exc}"
            self.log(f"could not set up the simulation: {self._init_error}", Fmi2Status.error)
            return False
        self._init_error = None
        return True

    def _effective_params(self):
        changes = {}
        for k in self._param_vrs:
            var = self._table[k]
            if self._values[k] != var.start or not math.isfinite(self._values[k]):
                changes[(var.index + 1, var.field)] = self._values[k]  # 1-based in params
        if not changes:
            return self._params0
        return self._params0.with_mode_values(changes)

    # ------------------------------------------------------------------ native binary support
    # jointfmu's own FMI binary (native/fmi2_shell.c) answers fmi2SetReal of inputs and
    # fmi2GetReal of outputs from the simulator's buffers and calls these methods; pythonfmu's
    # binary never does.  None of them raises into C on purpose; the shell reports any exception.
    def _native_layout(self):
        """Where the shell finds the inputs and outputs: None before a simulator exists, else
        ``(input buffer, output buffer, input position per value reference (-1: not an input),
        output position per value reference (-1: not an output), position of the base
        acceleration, has_base, MAX_INPUT, inputs held back)``.  The buffers are the
        simulator's own ``array.array("d")`` objects; the shell keeps them exported, so they
        cannot be resized while it writes into them."""
        sim = self._sim
        if sim is None:
            return None
        n = len(self._table)
        in_pos, out_pos = [-1] * n, [-1] * n
        for vr, p in self._in_pos.items():
            in_pos[vr] = p
        for vr, p in self._out_pos.items():
            out_pos[vr] = p
        base = sim.input_index("base_acc") if sim.model.has_base else len(sim.input_buffer()) - 1
        return (sim.input_buffer(), sim.output_buffer(), tuple(in_pos), tuple(out_pos), base,
                bool(sim.model.has_base), float(MAX_INPUT), bool(self._pending))

    def _native_take(self, vrs) -> None:
        """The shell wrote the inputs ``vrs`` straight into the simulator's input buffer
        (values it checked as ModalSimulator.set_input_value does): record them as set."""
        sim = self._sim
        if sim is None:
            return
        ubuf, in_pos, values = sim.input_buffer(), self._in_pos, self._values
        for vr in vrs:
            values[vr] = ubuf[in_pos[vr]]
        sim.inputs_written()

    def _native_do_step(self, current_time: float, step_size: float, vrs) -> int:
        """fmi2DoStep from the shell, one Python call: take the inputs ``vrs`` it wrote, step.
        Returns bit 0: stepped; bit 1: the simulator was replaced (the shell asks for the
        layout again); bit 2: the outputs are current with the state and the inputs."""
        if vrs:
            self._native_take(vrs)
        sim = self._sim
        ok = self.do_step(current_time, step_size)
        new = self._sim
        return ((1 if ok else 0) | (2 if new is not sim else 0)
                | (4 if new is not None and new.outputs_current else 0))

    def _native_refresh(self, vrs) -> int:
        """Bring the outputs in line with the inputs (the shell reads them next).  Returns bit
        0: the output buffer is current; bit 1: inputs are still held back (a refused value
        waits for doStep), so the shell keeps going through get_real/set_real."""
        try:
            if vrs:
                self._native_take(vrs)
            if self._pending:
                self._push_inputs_if_valid()
            sim = self._sim
            if sim is None:
                return 2
            sim.output_buffer()
            return (1 if sim.outputs_current else 0) | (2 if self._pending else 0)
        except Exception:     # get_real reports it (an output that cannot be evaluated: NaN)
            return 2

    # ----------------------------------------------------------------------------- states
    def _get_fmu_state(self) -> bytes:
        header = {
            "magic": _STATE_MAGIC,
            "parameter_set": self._identity(),
            "values": self._values,
            "initialized": self._initialized,
            "core": None,
        }
        if self._sim is not None:
            header["core"] = base64.b64encode(self._sim.get_state()).decode("ascii")
        # json keeps every float bit for bit (shortest repr round-trips); NaN is allowed.
        return json.dumps(header).encode("utf-8")

    def _set_fmu_state(self, state) -> None:
        try:
            data = json.loads(bytes(state).decode("utf-8"))
            if not isinstance(data, dict) or data.get("magic") != _STATE_MAGIC:
                raise ValueError("not a jointfmu FMU state")
            if data["parameter_set"] != self._identity():
                raise ValueError(f"state of parameter set {data['parameter_set']}, this FMU "
                                 f"is {self._identity()}")
            values = data["values"]
            if len(values) != len(self._values):
                raise ValueError("state has a different number of variables")
        except Exception as exc:
            self.log(f"FMU state rejected, current state kept: {exc}", Fmi2Status.error)
            return
        self._values = [None if v is None else float(v) for v in values]
        self._settings_changed = True
        self._initialized = bool(data["initialized"])
        if data["core"] is None:            # saved before the simulator existed
            self._sim, self._active, self._init_error = None, None, None
            return
        # _ensure_simulator keeps the simulator when the parameter values are unchanged
        if self._ensure_simulator():
            try:
                self._sim.set_state(base64.b64decode(data["core"]))
                self._pending = set()   # the state holds its inputs
            except Exception as exc:
                self._sim, self._active = None, None
                self.log(f"FMU state could not be restored: {exc}", Fmi2Status.error)

    @staticmethod
    def _fmu_state_to_bytes(state) -> bytes:
        return bytes(state)

    @staticmethod
    def _fmu_state_from_bytes(data) -> bytes:
        return bytes(data)

    def _identity(self) -> str:
        p = self._params0
        return f"{p.set_id}:{p.content_hash()}"

