"""The FMU class: a thin pythonfmu slave around :class:`.integrate.ModalSimulator`.

Each built FMU carries a generated entry module whose class subclasses :class:`JointSlave` under a
unique name (see :mod:`.build`).  The slave declares the variables of :func:`.variables.variable_table`,
keeps the parameter and input values the host sets, and hands ``do_step`` to the core.

pythonfmu 0.7.0 facts this class is written around (read in its source):

- The builder instantiates the class once at build time, and ``fmi2Reset`` instantiates it anew,
  so ``__init__`` only reads the parameter set and registers variables; the simulator is created
  at ``exit_initialization_mode``.  The builder also reads start values with ``get_real`` in the
  state "instantiated" (:meth:`JointSlave.to_xml`).
- FMU states are whatever ``_get_fmu_state`` returns; ``_fmu_state_to_bytes`` and
  ``_fmu_state_from_bytes`` are called on the class.  Here a state is an immutable ``bytes``.
- ``self.log`` messages reach the host's logger only while debug logging is on
  (``loggingOn`` at fmi2Instantiate, or fmi2SetDebugLogging), whatever their status; with it
  off the host sees only the returned status.
- pythonfmu cannot return fmi2Error from Python: ``do_step`` -> True/False gives fmi2OK or
  fmi2Discard, every method fmi2OK unless it raises, and then fmi2Fatal (measured with pythonfmu
  0.7.0's binary).  Its wrapper then empties the log queue with the exception pending (which
  loses the exception) and releases one reference each to the instance, its class and its log
  queue that it never took; a second such call used freed objects (a segfault, measured).
  Nothing here raises except a deliberate refusal (:meth:`JointSlave._refuse`), which allows for
  both.

FMI 2.0's rules.  The slave follows the co-simulation state machine (FMI 2.0 standard, sec.
4.2.4; :data:`ALLOWED_STATES`): a call not allowed in the current state, an unknown value
reference, a variable that cannot be set in that state, an FMU state that is not one of this
FMU's and parameters out of range at ``exit_initialization_mode`` are refused: a message,
nothing changed (the bad parameters leave the FMU in the error state), and
:class:`~.errors.FmiCallError` raised to the binary.  jointfmu's native binary
(``native/fmi2_shell.c``, which checks the same state machine itself first) answers it with
fmi2Error; pythonfmu's binary can only answer fmi2Fatal, the nearest status that still stops the
host, and :meth:`JointSlave._refuse` gives its wrapper the references it will drop, so that the
instance stays safe to free.  A step that cannot be taken (a NaN input, numerical trouble) is
not a refused call: ``do_step`` returns False (fmi2Discard) in both binaries, the state from
before the step kept, and the FMU is in the state "step failed" (only reading, fmi2Terminate,
a status query, fmi2SetFMUstate or fmi2Reset may follow).
"""
from __future__ import annotations

import base64
import json
import math
import os
from pathlib import Path
from typing import Any

from pythonfmu import Fmi2Slave
from pythonfmu.enums import Fmi2Causality, Fmi2Initial, Fmi2Status, Fmi2Variability
from pythonfmu.variables import Real

from ..errors import FmiCallError, InputError, JointFmuError
from ..physics.integrate import MAX_INPUT
from ..params import load_parameter_set
from .variables import variable_table

__all__ = ["JointSlave", "PARAMETER_FILE", "BUILD_INFO_FILE", "FMI_STATES", "ALLOWED_STATES",
           "INSTANTIATED", "INITIALIZATION_MODE", "STEP_COMPLETE", "STEP_FAILED", "TERMINATED",
           "ERROR", "DOSTEP_ENV"]

#: Resource file names written by :mod:`.build`.
PARAMETER_FILE = "parameters.toml"
BUILD_INFO_FILE = "jointfmu_build.json"

_STATE_MAGIC = "jointfmu-state-1"

#: ``JOINTFMU_DOSTEP=python`` at instantiation keeps the native binary's doStep in Python even
#: where it could run compiled (to compare, or to rule the compiled doStep out); same results.
DOSTEP_ENV = "JOINTFMU_DOSTEP"

# The FMU's states in FMI 2.0's co-simulation state machine (sec. 4.2.4; the native shell,
# native/fmi2_shell.c, uses the same numbers).  "step failed" follows a doStep that returned
# fmi2Discard; "error" follows parameters refused at fmi2ExitInitializationMode.
INSTANTIATED, INITIALIZATION_MODE, STEP_COMPLETE, STEP_FAILED, TERMINATED, ERROR = range(6)
#: Names of the states, by number.
FMI_STATES = ("instantiated", "initialization mode", "step complete", "step failed",
              "terminated", "error")
_ANY = frozenset(range(6))
_READABLE = frozenset({INITIALIZATION_MODE, STEP_COMPLETE, STEP_FAILED, TERMINATED, ERROR})
#: FMI 2.0 sec. 4.2.4: the states each call that reaches the slave is allowed in (the native
#: shell holds the same table for every FMI call; tests/test_fmu_standard.py compares them).
ALLOWED_STATES = {
    "fmi2SetupExperiment": frozenset({INSTANTIATED}),
    "fmi2EnterInitializationMode": frozenset({INSTANTIATED}),
    "fmi2ExitInitializationMode": frozenset({INITIALIZATION_MODE}),
    "fmi2DoStep": frozenset({STEP_COMPLETE}),
    "fmi2Terminate": frozenset({STEP_COMPLETE, STEP_FAILED}),
    "fmi2GetReal": _READABLE,
    "fmi2SetReal": frozenset({INSTANTIATED, INITIALIZATION_MODE, STEP_COMPLETE}),
    "fmi2GetFMUstate": _ANY,
    "fmi2SetFMUstate": _ANY,
}

#: (instance, class, log queue) of every call refused under pythonfmu's binary, kept for the
#: life of the process: see JointSlave._refuse.
_REFUSED: list = []

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

    #: The exception of a refused call (the native shell answers it with fmi2Error).
    CALL_ERROR = FmiCallError

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
        # the native binary's doStep in compiled code, unless the environment says otherwise
        # at instantiation (or reset, which instantiates anew)
        self._compiled_steps = os.environ.get(DOSTEP_ENV, "").strip().lower() != "python"
        self._fmi_state = INSTANTIATED
        self._native = False         # set by jointfmu's native shell right after instantiation
        self._describing = False     # see to_xml
        for vr, var in enumerate(self._table):
            self.register_variable(self._real(vr, var), nested=False)
            if self.vars[vr].value_reference != vr:  # build time: pythonfmu numbering changed
                raise RuntimeError("value references out of step with the variable table")

    # ----------------------------------------------------------------------------- variables
    def _real(self, vr: int, var) -> Real:
        # the per-variable getter and setter go through the same paths as the host's calls
        initial = Fmi2Initial[var.initial] if var.initial else None
        return Real(var.name, start=var.start, causality=Fmi2Causality[var.causality],
                    variability=Fmi2Variability[var.variability], initial=initial,
                    description=var.description,
                    getter=lambda vr=vr: self.get_real([vr])[0],
                    setter=lambda value, vr=vr: self.set_real([vr], [value]))

    def to_xml(self, model_options=None):
        """pythonfmu's builder: the model description; it reads the start values with get_real
        in the state "instantiated", where an FMI host may not (FMI 2.0 sec. 4.2.4)."""
        self._describing = True
        try:
            return super().to_xml(model_options if model_options is not None else {})
        finally:
            self._describing = False

    # ----------------------------------------------------------------------- FMI's rules
    def _refuse(self, message: str, state: int | None = None):
        """Refuse the current FMI call: optionally a new FMI state (the error state), and
        :class:`FmiCallError` to the binary with the message.  The caller has changed nothing
        else.  jointfmu's native shell answers fmi2Error after the message, logged here with
        error status; pythonfmu's binary answers fmi2Fatal and logs, with that status, its own
        text followed by the exception's repr, which is the message."""
        if state is not None:
            self._fmi_state = state
        if self._native:
            self.log(message, Fmi2Status.error)
        else:
            # pythonfmu 0.7.0's wrapper (PySlaveInstance::handle_py_exception) first empties the
            # log queue with the exception pending, which loses the exception (its text then
            # reads "unknown error"; measured): so nothing is queued here.  It also drops one
            # reference each to this instance, its class and its log queue that it never took
            # (cleanPyObject): keep one of each alive for it, or the next call or
            # fmi2FreeInstance works on freed objects (measured: a segfault).
            _REFUSED.append((self, type(self), self.log_queue))
        raise FmiCallError(message)

    def _check_call(self, fmi_call: str) -> None:
        """Refuse ``fmi_call`` unless FMI 2.0's state machine allows it in the current state."""
        allowed = ALLOWED_STATES[fmi_call]
        if self._fmi_state not in allowed:
            names = ", ".join(repr(FMI_STATES[k]) for k in sorted(allowed))
            self._refuse(f"{fmi_call} is not allowed in the state {FMI_STATES[self._fmi_state]!r} "
                         f"(FMI 2.0 sec. 4.2.4: allowed in {names}); nothing was changed")

    def _check_references(self, vrs, fmi_call: str) -> None:
        """Refuse a call naming a value reference this FMU does not have."""
        n = len(self._table)
        bad = [vr for vr in vrs if not (type(vr) is int and 0 <= vr < n)]
        if bad:
            self._refuse(f"{fmi_call}: value reference {bad[0]!r} is not a variable of this FMU: "
                         f"allowed are 0..{n - 1}, as in modelDescription.xml; nothing was "
                         "changed")

    def get_real(self, vrs):
        """Values of the variables ``vrs`` (fmi2GetReal); pythonfmu's C wrapper calls this once
        per host call.

        Outputs are read from the simulator's output buffer, current with the state and the
        inputs (outputs with direct feedthrough, accelerations and the base force, see inputs
        set since the last step; an input refused at doStep leaves them at the last valid
        inputs).  Refused (:meth:`_refuse`) in a state where fmi2GetReal is not allowed (before
        fmi2EnterInitializationMode) and for an unknown value reference.
        """
        if self._fmi_state not in _READABLE and not self._describing:
            self._check_call("fmi2GetReal")
        try:
            if self._pending:
                self._push_inputs_if_valid()
            outs = self._sim.output_buffer()     # AttributeError before a simulator exists
            key = tuple(vrs)
            plan = self._read_plans.get(key) or self._read_plan(key)
            values = self._values
            return [outs[p] if p >= 0 else values[~p] for p in plan]
        except Exception:
            pass
        self._check_references(vrs, "fmi2GetReal")
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

    def _get_one(self, vr: int) -> float:
        """One value on the slow path: before a simulator exists (outputs read 0), or an output
        that cannot be evaluated (NaN)."""
        if not self._table[vr].is_output:
            return self._values[vr]
        if self._sim is None:
            return 0.0
        try:
            self._push_inputs_if_valid()
            return self._sim.output_buffer()[self._out_pos[vr]]
        except Exception:       # never raise into the C wrapper
            return math.nan

    def set_real(self, vrs, values) -> None:
        """Set the variables ``vrs`` (fmi2SetReal).  A valid input goes to the simulator at once;
        one set before the simulator exists, or refused by it, waits for the next doStep (which
        reports a refused one, names it, and does not step) or output read.  Refused as a whole,
        nothing set (:meth:`_refuse`): a state where fmi2SetReal is not allowed, an unknown value
        reference, an output, a parameter after fmi2ExitInitializationMode (variability "fixed",
        FMI 2.0 sec. 2.2.7 and the table of sec. 4.2.4)."""
        stored, pending, sim = self._values, self._pending, self._sim
        if (pending or sim is None or self._fmi_state != STEP_COMPLETE
                or not self._input_vrs.issuperset(vrs)):
            self._check_set(vrs)
            if sim is None or pending:
                # handed over together at the next doStep or read
                inputs = self._input_vrs
                for vr, value in zip(vrs, values):
                    if vr in inputs:
                        stored[vr] = value
                        pending.add(vr)
                    else:
                        stored[vr] = float(value)       # a parameter
                        self._settings_changed = True
                return
        in_pos = self._in_pos
        for vr, value in zip(vrs, values):
            p = in_pos.get(vr)
            if p is None:                 # a parameter (checked above: before initialization ends)
                stored[vr] = float(value)
                self._settings_changed = True
                continue
            stored[vr] = value
            try:
                sim.set_input_value(p, value)
            except JointFmuError:
                pending.add(vr)     # refused, naming its FMU variable, at the next doStep

    def _check_set(self, vrs) -> None:
        """Refuse an fmi2SetReal that is not allowed as a whole (nothing is set then)."""
        if self._fmi_state not in ALLOWED_STATES["fmi2SetReal"]:
            self._check_call("fmi2SetReal")
        self._check_references(vrs, "fmi2SetReal")
        for vr in vrs:
            var = self._table[vr]
            if var.is_output:
                self._refuse(f"fmi2SetReal: {var.name} is an output and cannot be set "
                             "(FMI 2.0 sec. 4.2.4); nothing was changed")
            if not var.is_input and self._fmi_state not in (INSTANTIATED, INITIALIZATION_MODE):
                self._refuse(f"fmi2SetReal: parameter {var.name} has variability \"fixed\" and "
                             "can only be set before fmi2ExitInitializationMode (FMI 2.0 sec. "
                             "2.2.7); nothing was changed: instantiate anew or reset to change it")

    # ------------------------------------------------------------------------- life cycle
    def setup_experiment(self, start_time: float, stop_time=None, tolerance=None) -> None:
        """fmi2SetupExperiment: allowed once instantiated (the times are the host's business:
        the FMU has no clock of its own, each doStep says where it starts)."""
        self._check_call("fmi2SetupExperiment")

    def enter_initialization_mode(self) -> None:
        self._check_call("fmi2EnterInitializationMode")
        self._fmi_state = INITIALIZATION_MODE

    def exit_initialization_mode(self) -> None:
        """fmi2ExitInitializationMode: the simulator is made from the parameter values set.
        Values out of range are refused here, with the messages of ``jointfmu check``, and leave
        the FMU in the error state (FMI 2.0 sec. 2.1.3: only fmi2Reset, fmi2FreeInstance,
        fmi2SetFMUstate and reading may follow)."""
        self._check_call("fmi2ExitInitializationMode")
        self._initialized = True
        if not self._ensure_simulator():
            self._refuse(f"fmi2ExitInitializationMode: {self._init_error}", state=ERROR)
        self._fmi_state = STEP_COMPLETE

    def terminate(self) -> None:
        self._check_call("fmi2Terminate")
        self._fmi_state = TERMINATED

    def do_step(self, current_time: float, step_size: float) -> bool:
        """fmi2DoStep: True (fmi2OK) when the step was taken, False (fmi2Discard) when it could
        not be, the state from before it kept and a message logged; refused (:meth:`_refuse`)
        outside the state "step complete"."""
        if self._fmi_state != STEP_COMPLETE:
            self._check_call("fmi2DoStep")
        if not 0.0 <= step_size < math.inf:
            self._refuse(f"fmi2DoStep: communication step size {step_size!r} at t = "
                         f"{current_time!r} s is invalid: allowed is a finite step >= 0 s; "
                         "nothing was changed")
        ok = self._step(current_time, step_size)
        self._fmi_state = STEP_COMPLETE if ok else STEP_FAILED
        return ok

    def _step(self, current_time: float, step_size: float) -> bool:
        try:
            if (self._sim is None or self._settings_changed) and not self._ensure_simulator():
                self.log(f"cannot step: {self._init_error}", Fmi2Status.error)
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
        """Build the simulator for the current parameter values; False if they are out of
        range (why in ``_init_error``, the callers say it)."""
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
            self._install(self._build(self._values))
        except JointFmuError as exc:
            self._init_error = f"parameters out of range at initialization: {exc}"
            return False
        except Exception as exc:
            self._init_error = f"could not set up the simulation: {type(exc).__name__}: {exc}"
            return False
        self._init_error = None
        return True

    def _build(self, values):
        """A simulator for the variable values ``values`` (nothing of the slave changed):
        ``(simulator, input position per value reference, output position per value
        reference)``.  Raises ParameterError (the messages of ``jointfmu check``) for values out
        of range."""
        from ..physics.integrate import ModalSimulator  # its range check names steps_per_period
        sim = ModalSimulator(self._effective_params(values),
                             steps_per_period=values[self._steps_vr])
        in_pos = {vr: sim.input_index(_INPUT_NAMES[v.kind], v.index)
                  for vr, v in enumerate(self._table) if v.is_input}
        out_pos = {vr: sim.output_index(v.kind, v.index)
                   for vr, v in enumerate(self._table) if v.is_output}
        return sim, in_pos, out_pos

    def _install(self, built) -> None:
        self._sim, self._in_pos, self._out_pos = built
        self._read_plans = {}

    def _effective_params(self, values):
        changes = {}
        for k in self._param_vrs:
            var = self._table[k]
            if values[k] != var.start or not math.isfinite(values[k]):
                changes[(var.index + 1, var.field)] = values[k]  # 1-based in params
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
        layout again); bit 2: the outputs are current with the state and the inputs; bit 3:
        the next steps may run in compiled code (see :meth:`_native_step_entry`)."""
        if vrs:
            self._native_take(vrs)
        sim = self._sim
        ok = self.do_step(current_time, step_size)
        new = self._sim
        return ((1 if ok else 0) | (2 if new is not sim else 0)
                | (4 if new is not None and new.outputs_current else 0)
                | (8 if ok and self._native_steps_allowed() else 0))

    def _native_steps_allowed(self) -> bool:
        """Whether a doStep may skip :meth:`do_step` and run the simulator's compiled step
        alone, until the shell next calls into Python: True when do_step would do nothing but
        step (state "step complete", which a step taken keeps; a simulator for the current
        parameters; no input held back)."""
        return (self._fmi_state == STEP_COMPLETE and self._sim is not None
                and not self._settings_changed and not self._pending
                and self._init_error is None and self._initialized)

    def _native_step_entry(self):
        """The simulator's compiled step for the shell: None (doStep goes through
        :meth:`_native_do_step`), or ``(address, pointers, dims, simulator)`` from
        :meth:`.ModalSimulator.c_step_entry`; the shell holds the simulator, whose arrays the
        pointers point into.  The shell calls it when its result is ``STEP_DONE`` and goes
        through _native_do_step otherwise (which plans a new step size, or words a refusal).
        Asked again with the layout (:meth:`_native_layout`)."""
        sim = self._sim
        if sim is None or not self._compiled_steps:
            return None
        try:
            entry = sim.c_step_entry()
        except Exception as exc:     # the entry failed to compile: steps go through Python
            self.log(f"compiled doStep not available, steps go through Python: "
                     f"{type(exc).__name__}: {exc}", Fmi2Status.warning)
            return None
        return None if entry is None else entry + (sim,)

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
        """fmi2GetFMUstate (allowed in every state): the variable values, the FMI state and the
        simulator's state, as bytes."""
        header = {
            "magic": _STATE_MAGIC,
            "parameter_set": self._identity(),
            "values": self._values,
            "initialized": self._initialized,
            "fmi_state": self._fmi_state,
            "core": None,
        }
        if self._sim is not None:
            header["core"] = base64.b64encode(self._sim.get_state()).decode("ascii")
        # json keeps every float bit for bit (shortest repr round-trips); NaN is allowed.
        return json.dumps(header).encode("utf-8")

    def _set_fmu_state(self, state) -> None:
        """fmi2SetFMUstate (allowed in every state): the state saved by :meth:`_get_fmu_state`,
        the FMI state included.  A state that is not one of this FMU's (corrupt, truncated,
        another build's or structure's) is refused and the current state kept, inputs set
        before the call included: everything is checked before anything changes."""
        try:
            data = self._read_state(state)
            values, core = data["values"], data["core"]
            settings = (tuple(values[k] for k in self._param_vrs), values[self._steps_vr])
            built = None
            if core is not None:
                if self._sim is not None and settings == self._active:
                    self._sim.check_state(core)
                else:
                    built = self._build(values)
                    built[0].set_state(core)
        except Exception as exc:
            self._refuse(f"FMU state rejected, current state kept: {exc}")
        # from here on nothing fails
        self._values = values
        self._initialized = data["initialized"]
        self._fmi_state = data["fmi_state"]
        if core is None:                    # saved before the simulator existed
            self._sim, self._active, self._init_error = None, None, None
            self._settings_changed = True
            self._pending = set(self._input_vrs)
            return
        if built is not None:
            self._install(built)
            self._active, self._init_error = settings, None
        else:
            self._sim.set_state(core)
        self._settings_changed = False
        self._pending = set()   # the state holds its inputs

    def _read_state(self, state) -> dict:
        """A saved state's contents, checked to be one of this FMU's (no simulator involved);
        ValueError saying what is wrong otherwise."""
        try:
            data = json.loads(bytes(state).decode("utf-8"))
        except (UnicodeDecodeError, ValueError, TypeError) as exc:
            raise ValueError(f"not a jointfmu FMU state (corrupt or truncated: {exc})") from None
        if not isinstance(data, dict) or data.get("magic") != _STATE_MAGIC:
            raise ValueError("not a jointfmu FMU state")
        if data.get("parameter_set") != self._identity():
            raise ValueError(f"state of parameter set {data.get('parameter_set')}, this FMU "
                             f"is {self._identity()}")
        values = data.get("values")
        if not isinstance(values, list) or len(values) != len(self._values):
            raise ValueError("state has a different number of variables")
        for var, x in zip(self._table, values):
            if (x is None) != var.is_output or not (x is None or type(x) in (int, float)):
                raise ValueError(f"state holds {x!r} for {var.name}")
        fmi_state = data.get("fmi_state",
                             STEP_COMPLETE if data.get("initialized") else INSTANTIATED)
        if type(fmi_state) is not int or fmi_state not in _ANY:
            raise ValueError(f"state has no FMI state ({fmi_state!r})")
        core = data.get("core")
        if core is not None:
            try:
                core = base64.b64decode(core, validate=True)
            except (TypeError, ValueError) as exc:
                raise ValueError(f"corrupt simulator state ({exc})") from None
        return {"values": [None if x is None else float(x) for x in values],
                "initialized": bool(data.get("initialized")), "fmi_state": fmi_state,
                "core": core}

    def _state_problem(self, data) -> str | None:
        """What is wrong with serialized state bytes (None: nothing found before restoring);
        jointfmu's native shell asks at fmi2DeSerializeFMUstate."""
        try:
            self._read_state(data)
        except ValueError as exc:
            return str(exc)
        return None

    @staticmethod
    def _fmu_state_to_bytes(state) -> bytes:
        return bytes(state)

    @staticmethod
    def _fmu_state_from_bytes(data) -> bytes:
        # checked at fmi2SetFMUstate (pythonfmu calls this on the class, where a refusal could
        # not keep its instance safe: see _refuse); the native shell checks here already
        return bytes(data)

    def _identity(self) -> str:
        p = self._params0
        return f"{p.set_id}:{p.content_hash()}"

