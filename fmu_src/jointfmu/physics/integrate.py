"""Time stepping of a modal Iwan structure: the core every other part of jointfmu runs on.

:class:`ModalSimulator` holds the state of all modes and advances it over caller's steps with
inputs held constant (zero-order hold) over each step.  The maths of one sub-step is in
:mod:`jointfmu._kernel` (exact Iwan memory + ETD2 exponential integrator); this module owns the
arrays, chooses the sub-step, checks inputs and undoes a step that fails.

Contract of :meth:`ModalSimulator.step`
---------------------------------------
* ``dt >= 0`` finite; 0 is a no-op.  Each mode splits the step into the fewest equal sub-steps
  no longer than ``1 / (steps_per_period * f0)`` of its own low-amplitude frequency f0: the modes
  are uncoupled and the input is held, so every mode gets the same accuracy per period, and the
  highest mode fixes none of the others' cost.
* Inputs set by :meth:`set_inputs` are held over the whole step.
* On success returns ``(True, "")``.  On failure returns ``(False, message)`` and the state is
  exactly as before the call.
* Deterministic: the same inputs and steps give bit-identical results.

Accuracy at the default ``steps_per_period`` is stated in the README (measured against the SciPy
reference, :mod:`jointfmu.reference`); the scheme is second order in the sub-step and exact for
the linear part.
"""
from __future__ import annotations

import array
import io
import math
import warnings
from operator import index as _integer

import numpy as np
from scipy.linalg import expm

from . import kernel as K
from ..errors import InputError
from .iwan import kernel_table
from .modal import ModalModel

__all__ = [
    "ModalSimulator",
    "DEFAULT_STEPS_PER_PERIOD",
    "DEFAULT_MERGE_TOL",
    "DEFAULT_STACK_CAPACITY",
    "MIN_STEPS_PER_PERIOD",
    "MAX_INPUT",
    "PLAN_SLOTS",
    "kernel_info",
]

#: Sub-steps per period of each mode.  Measured error against the reference: see README.
DEFAULT_STEPS_PER_PERIOD = 40.0
#: Below this the explicit treatment of the joint remainder is no longer safely stable.
MIN_STEPS_PER_PERIOD = 8.0
#: A reversal pair is dropped when the force error it causes is below this fraction of Fs.
DEFAULT_MERGE_TOL = 1e-10
#: Reversal stack entries per mode (a hard bound; reaching it drops the innermost loop).
DEFAULT_STACK_CAPACITY = 4096
#: Largest magnitude accepted for an input (keeps every intermediate value finite).
MAX_INPUT = K.MAX_INPUT
#: Step sizes whose plan (sub-step counts and coefficients) is kept at once.  A host that
#: computes each step as the difference of two communication points (fmpy's simulate_fmu:
#: t_(n+1) - t_n) sends step sizes that differ in their last bits: about 20 distinct ones over
#: 10^6 steps of 0.1 or 1 ms (counted here), each planned once.
PLAN_SLOTS = 64

#: 3: the joint state ``js`` also caches the branch root, the closure point and the power
#: x^(chi+2) at the joint's position (_kernel.NJS = 20).
_STATE_VERSION = 3


def step_coefficients(omega0, zeta, h):
    """Exact discretization of q'' + 2 zeta w q' + w^2 q = p0 + p1 t + p2 t^2/2 over a step ``h``.

    ``h`` is one step for all modes or one per mode, shape (N,).

    Van Loan's block-exponential method (C. F. Van Loan, "Computing integrals involving the matrix
    exponential", IEEE Trans. Automat. Control 23(3):395-404, 1978): expm of the 5x5 block matrix
    [[A, b, 0, 0], [0, 0, 1, 0], [0, 0, 0, 1], [0, 0, 0, 0]] h holds Phi = e^(A h) and
    Gamma_j = int_0^h e^(A (h - s)) b s^j ds for j = 0, 1 and Gamma_2 / 2.

    Returns
    -------
    ndarray, shape (N, 11)
        Phi (row-major), Gamma0 (q, v), Gamma1 (q, v), Gamma2/2 (q, v), h.
    """
    omega0 = np.asarray(omega0, dtype=float)
    n = omega0.shape[0]
    M = np.zeros((n, 5, 5))
    M[:, 0, 1] = 1.0
    M[:, 1, 0] = -omega0**2
    M[:, 1, 1] = -2.0 * np.asarray(zeta) * omega0
    M[:, 1, 2] = 1.0
    M[:, 2, 3] = 1.0
    M[:, 3, 4] = 1.0
    h = np.broadcast_to(np.asarray(h, dtype=float), (n,))
    E = expm(M * h[:, None, None])
    coef = np.empty((n, 11))
    coef[:, 0:4] = E[:, 0:2, 0:2].reshape(n, 4)
    coef[:, 4:6] = E[:, 0:2, 2]
    coef[:, 6:8] = E[:, 0:2, 3]
    coef[:, 8:10] = E[:, 0:2, 4]
    coef[:, 10] = h
    return coef


#: Outcome of the one attempt per process to load the compiled kernel: (module or None, reason).
_COMPILED: list = []


def _load_compiled():
    """Import :mod:`._compiled` once per process; returns ``(module or None, reason)``."""
    if not _COMPILED:
        try:
            from . import compiled as _compiled  # optional fast path (Numba)

            _COMPILED.append((_compiled, f"compiled kernel loaded from {_compiled.CACHE_FILE}"))
        except Exception as exc:  # noqa: BLE001 - any failure falls back, and is reported
            _COMPILED.append((None, f"{type(exc).__name__}: {exc}"))
    return _COMPILED[0]


def kernel_info() -> dict:
    """Which kernel ``kernel="auto"`` gives in this process, and why.

    Returns
    -------
    dict
        ``{"kernel": "numba" or "python", "reason": str}``; the reason names the cache file of
        the compiled kernel, or why it could not be used (Numba missing, ``JOINTFMU_KERNEL=python``
        set, a compile error...).
    """
    mod, reason = _load_compiled()
    return {"kernel": mod.NAME if mod is not None else "python", "reason": reason}


def _select_kernel(kernel: str):
    """Return ``(module, name)`` of the requested kernel (``_kernel`` or the compiled one).

    ``"auto"`` takes the compiled kernel when it loads and otherwise the plain-Python one, with a
    RuntimeWarning (once per process) that says why, unless ``JOINTFMU_KERNEL=python`` asked for
    it.  ``"compiled"`` raises :class:`InputError` when the compiled kernel is not available.
    """
    if kernel not in ("auto", "python", "compiled"):
        raise InputError(f"kernel = {kernel!r}: allowed values are 'auto', 'python', 'compiled'")
    if kernel != "python":
        mod, reason = _load_compiled()
        if mod is not None:
            return mod, mod.NAME
        if kernel == "compiled":
            raise InputError(f"kernel = 'compiled' requested but not available: {reason}")
        if len(_COMPILED) == 1 and "JOINTFMU_KERNEL=python" not in reason:
            _COMPILED.append(True)  # warned
            warnings.warn(f"jointfmu: using the plain-Python joint kernel (10-100x slower): {reason}",
                          RuntimeWarning, stacklevel=3)
    return K, "python"


class ModalSimulator:
    """State and stepping of one modal Iwan structure.

    Parameters
    ----------
    params : ParameterSet
        The structure build.
    steps_per_period : float
        Sub-steps per period of each mode (>= ``MIN_STEPS_PER_PERIOD``).
    kernel : {"auto", "python", "compiled"}
        Which implementation of the hot loop; "auto" takes the compiled one when available
        (see :func:`kernel_info`).  The choice is in the attribute ``kernel``: "numba" or "python".
    merge_tol : float
        Reversal pairs whose force effect is below ``merge_tol * Fs`` are dropped.
    stack_capacity : int
        Reversal stack entries per mode.
    q0, qdot0 : array_like, shape (N,), optional
        Initial modal displacement [m sqrt(kg)] and velocity [m sqrt(kg)/s]; the joint starts on its
        virgin curve at q0 (as if loaded monotonically from 0).
    """

    def __init__(
        self,
        params,
        steps_per_period: float = DEFAULT_STEPS_PER_PERIOD,
        kernel: str = "auto",
        merge_tol: float = DEFAULT_MERGE_TOL,
        stack_capacity: int = DEFAULT_STACK_CAPACITY,
        q0=None,
        qdot0=None,
    ):
        spp = float(steps_per_period)
        if not math.isfinite(spp) or spp < MIN_STEPS_PER_PERIOD:
            raise InputError(
                f"steps_per_period = {steps_per_period!r}: must be a finite number >= "
                f"{MIN_STEPS_PER_PERIOD:g} (default {DEFAULT_STEPS_PER_PERIOD:g})"
            )
        if not (math.isfinite(merge_tol) and 0.0 <= merge_tol < 1e-3):
            raise InputError(f"merge_tol = {merge_tol!r}: must satisfy 0 <= merge_tol < 1e-3")
        if int(stack_capacity) < 8:
            raise InputError(f"stack_capacity = {stack_capacity!r}: must be an integer >= 8")
        self.params = params
        self.model = ModalModel.from_params(params)
        self.steps_per_period = spp
        self.merge_tol = float(merge_tol)
        kern, self.kernel = _select_kernel(kernel)
        self._kern = kern
        self._step, self._refresh = kern.step_planned, kern.refresh
        n = self.model.n_modes
        # each mode's longest sub-step, from its own frequency
        self._h_mode = 2.0 * math.pi / (spp * self.model.omega0)
        self.h_max = float(self._h_mode.min())  # the highest mode's: the shortest of them
        m = self.model
        self._jc = kernel_table(m.Fs, m.Kt, m.chi, m.beta, m.Kinf, self.merge_tol)
        self._cap = int(stack_capacity)
        self._q0 = self._vector(q0, "q0", n)
        self._qdot0 = self._vector(qdot0, "qdot0", n)
        # plans per step size (see _plan), in arrays the kernel reads itself: a step with a
        # step size planned before needs no Python (step_planned finds its slot)
        self._plans: dict[float, tuple[np.ndarray, np.ndarray]] = {}
        self._plan_dt = np.full(PLAN_SLOTS, np.nan)
        self._oldest_plan = 0     # the slot a new plan takes once all are in use
        self._plan_nsub = np.zeros((PLAN_SLOTS, n), dtype=np.int64)
        self._plan_coef = np.zeros((PLAN_SLOTS, n, 11))
        self._st = np.zeros((n, 6))
        self._js = np.zeros((n, K.NJS))
        self._stk = np.zeros((n, self._cap, 3))
        self._bk = np.zeros((n, self._cap, 3))
        self._st_saved = np.zeros_like(self._st)
        self._js_saved = np.zeros_like(self._js)
        m = self.model
        self._n_in, self._n_out = len(m.input_labels), len(m.output_labels)
        # inputs [point forces, modal forces, base acceleration] and the kernel's mapping table
        # (see _kernel.modal_inputs), outputs in the layout of _kernel.outputs
        # inputs and outputs live in array.array buffers with NumPy views for the kernel: a
        # co-simulation host reads and writes single values, which array.array does as
        # Python floats without NumPy's per-item cost
        self._ubuf = array.array("d", bytes(8 * (self._n_in + n + 1)))
        self._u = np.frombuffer(self._ubuf, dtype=float)
        self._base_pos = self._n_in + n   # the base acceleration's place in the input vector
        self._mp = np.zeros((self._n_in + self._n_out + 1, n + 1))
        self._mp[: self._n_in, :n] = m.phi_in
        self._mp[: self._n_in, n] = m.r_in
        self._mp[self._n_in: -1, :n] = m.phi_out
        self._mp[self._n_in: -1, n] = m.r_out
        self._mp[-1, :n] = m.gamma
        self._mp[-1, n] = m.total_mass
        self._f = np.zeros(n)
        self._ybuf = array.array("d", bytes(8 * (4 * n + 3 * self._n_out + K.Y_TAIL)))
        self._y = np.frombuffer(self._ybuf, dtype=float)
        o = 4 * n
        self._slices = {
            "q": slice(0, n), "qdot": slice(n, 2 * n), "joint_force": slice(2 * n, 3 * n),
            "qddot": slice(3 * n, o), "point_x": slice(o, o + self._n_out),
            "point_v": slice(o + self._n_out, o + 2 * self._n_out),
            "point_a": slice(o + 2 * self._n_out, o + 3 * self._n_out),
        }
        self._tail = o + 3 * self._n_out
        # time and whether y and f agree with the state and the inputs (kernel.CLOCK_*): in a
        # buffer, because the kernel updates them when the FMU's binary steps without Python
        self._clk = array.array("d", bytes(16))
        self._clock = np.frombuffer(self._clk, dtype=float)
        self._step_args = (int(self.model.has_base),) + self._step_arrays()
        bind = getattr(kern, "bind", None)
        if bind is not None:
            # the compiled functions bound to the types of this simulator's arrays (no
            # per-call dispatch); the arrays are allocated once, above
            self._step = bind(self._step, (1e-3,) + self._step_args)
            self._refresh = bind(self._refresh, self._refresh_arrays())
        self.reset()

    # -- set-up ------------------------------------------------------------------------------
    @staticmethod
    def _vector(value, name, n):
        if value is None:
            return np.zeros(n)
        a = np.asarray(value, dtype=float).reshape(-1)
        if a.shape != (n,) or not np.all(np.isfinite(a)):
            raise InputError(f"{name}: must be {n} finite numbers (one per mode), got {value!r}")
        return a.copy()

    @property
    def time(self) -> float:
        """Simulated time [s]: the sum of the steps taken since the start (or reset, or the
        restored state's time)."""
        return self._clk[K.CLOCK_T]

    @time.setter
    def time(self, value: float) -> None:
        self._clk[K.CLOCK_T] = float(value)

    def reset(self) -> None:
        """Back to the initial state: time 0, initial conditions, virgin joints, inputs zero."""
        n = self.model.n_modes
        self.time = 0.0
        self._st[:] = 0.0
        self._st[:, 0] = self._q0
        self._st[:, 1] = self._qdot0
        self._st[:, 5] = 2.0 * self.model.zeta * self.model.omega0
        self._js[:] = 0.0
        self._stk[:] = 0.0
        for i in range(n):
            K.joint_set_virgin(i, float(self._q0[i]), self._jc, self._js)
        self._u[:] = 0.0
        self._clk[K.CLOCK_FRESH] = 0.0
        self._e0 = float(self.kinetic_potential_energy.sum() + self._js[:, K.E_PREV].sum())

    def set_inputs(self, point_forces=None, modal_forces=None, base_acc=None) -> None:
        """Set held inputs; ``None`` leaves one unchanged.

        Parameters
        ----------
        point_forces : array_like, shape (n_in,)
            Forces at the input points, in ``params.input_points`` order [N].
        modal_forces : array_like, shape (N,)
            Direct modal forces [N/sqrt(kg)].
        base_acc : float
            Base acceleration [m/s^2]; only for a base-mounted structure.

        Raises
        ------
        InputError
            Wrong shape, non-finite or out-of-range value; nothing is changed then.
        """
        new_p = self._checked(point_forces, "point_forces", self.model.input_labels)
        new_m = self._checked(modal_forces, "modal_forces", self.model.mode_labels)
        if base_acc is not None:
            a = float(base_acc)
            if not self.model.has_base and a != 0.0:
                raise InputError("base_acc: this structure has no [base] mounting; only 0 is allowed")
            if not (math.isfinite(a) and abs(a) <= MAX_INPUT):
                raise InputError(f"base_acc = {base_acc!r}: must be finite with |value| <= {MAX_INPUT:g} m/s^2")
            self._u[-1] = a
        n_in = self._n_in
        if new_p is not None:
            self._u[:n_in] = new_p
        if new_m is not None:
            self._u[n_in:-1] = new_m
        self._clk[K.CLOCK_FRESH] = 0.0

    #: Input groups of :meth:`set_inputs`, in the order of the input vector.
    _INPUT_NAMES = ("point_forces", "modal_forces", "base_acc")

    def input_index(self, name: str, index: int | None = None) -> int:
        """Position of one input in the input vector used by :meth:`set_input_values`:
        ``name`` is a keyword of :meth:`set_inputs`, ``index`` the input point or mode for the
        array-valued ones (the vector is [point forces, modal forces, base acceleration])."""
        n_in, n = self._n_in, self.model.n_modes
        if name == "base_acc":
            if not self.model.has_base:
                raise InputError("base_acc: this structure has no [base] mounting")
            return n_in + n
        if name in ("point_forces", "modal_forces"):
            start, count = (0, n_in) if name == "point_forces" else (n_in, n)
            if index is None or not 0 <= int(index) < count:
                raise InputError(f"input {name!r} needs an index in 0..{count - 1}, got {index!r}")
            return start + int(index)
        raise InputError(f"unknown input {name!r}; allowed: {', '.join(self._INPUT_NAMES)}")

    def set_input_values(self, positions, values) -> None:
        """Set single held inputs by position (from :meth:`input_index`); the same checks as
        :meth:`set_inputs`, and nothing is changed if any value is refused.

        This is the per-variable path of a co-simulation host, which sets a few inputs each step;
        it costs a fraction of :meth:`set_inputs`.

        Raises
        ------
        InputError
            A position outside the input vector, or a value that is not finite or exceeds
            ``MAX_INPUT`` in magnitude.
        """
        last = self._u.shape[0] - 1
        try:
            n_pos, n_val = len(positions), len(values)
            checked = [(_integer(p), float(x)) for p, x in zip(positions, values)]
        except (TypeError, ValueError) as exc:
            raise InputError(f"input positions and values: {exc}; expected sequences of "
                             "positions (from input_index) and as many numbers") from None
        if n_pos != n_val:
            raise InputError(f"{n_pos} input positions but {n_val} values: expected one value "
                             "per position")
        for p, x in checked:
            if not (-MAX_INPUT <= x <= MAX_INPUT and 0 <= p <= last) \
                    or (p == last and x != 0.0 and not self.model.has_base):
                raise InputError(self._input_problem(p, x))
        ubuf = self._ubuf
        for p, x in checked:
            ubuf[p] = x
        self._clk[K.CLOCK_FRESH] = 0.0

    def set_input_value(self, position: int, value: float) -> None:
        """Set one held input by position (from :meth:`input_index`): :meth:`set_input_values`
        for a single value, the cheapest way in (a host sets a few inputs every step).

        Raises
        ------
        InputError
            As :meth:`set_input_values`; nothing is changed then.
        """
        if type(position) is int and type(value) is float and 0 <= position < self._base_pos \
                and -MAX_INPUT <= value <= MAX_INPUT:
            self._ubuf[position] = value
            self._clk[K.CLOCK_FRESH] = 0.0
        else:   # the base acceleration, other types, refused values: the general path decides
            self.set_input_values((position,), (value,))

    def _input_problem(self, p, x) -> str:
        """What is wrong with value ``x`` at input position ``p`` (for an error message)."""
        last = self._u.shape[0] - 1
        if not 0 <= p <= last:
            return f"input position {p!r}: allowed are integers 0..{last}"
        if not -MAX_INPUT <= x <= MAX_INPUT:   # also NaN
            return f"{self._input_name(p)} = {x!r}: must be finite with |value| <= {MAX_INPUT:g}"
        return "base_acc: this structure has no [base] mounting; only 0 is allowed"

    def _input_name(self, p: int) -> str:
        """The input at position ``p`` named as :meth:`set_inputs` names it in its messages."""
        n_in = self._n_in
        if p < n_in:
            return f"point_forces[{self.model.input_labels[p]}]"
        if p < n_in + self.model.n_modes:
            return f"modal_forces[{self.model.mode_labels[p - n_in]}]"
        return "base_acc"

    @staticmethod
    def _checked(value, name, labels):
        """``value`` as a list of floats, one per label, checked; None stays None."""
        if value is None:
            return None
        try:
            values = [float(x) for x in value]
        except TypeError:
            values = [float(value)]
        if len(values) != len(labels):
            raise InputError(
                f"{name}: expected {len(labels)} values ({', '.join(labels) or 'none'}), got {len(values)}"
            )
        for j, x in enumerate(values):
            if not (math.isfinite(x) and abs(x) <= MAX_INPUT):
                raise InputError(f"{name}[{labels[j]}] = {x!r}: must be finite with |value| <= {MAX_INPUT:g}")
        return values

    def _step_arrays(self) -> tuple:
        """The array arguments of the kernel's ``step_planned``, in its order (after ``dt``
        and ``has_base``)."""
        return (self._plan_dt, self._plan_nsub, self._plan_coef, self._clock, self._u, self._mp,
                self._st, self._jc, self._js, self._stk, self._bk, self._f, self._y,
                self._st_saved, self._js_saved)

    def _refresh_arrays(self) -> tuple:
        """The arguments of the kernel's ``refresh``."""
        return self._u, self._mp, self._st, self._jc, self._js, self._f, self._y

    def _update(self) -> None:
        """Bring the modal force and the outputs in line with the inputs (no time passes)."""
        if not self._clk[K.CLOCK_FRESH]:
            self._refresh(*self._refresh_arrays())
            self._clk[K.CLOCK_FRESH] = 1.0

    # -- stepping ----------------------------------------------------------------------------
    def sub_steps(self, dt: float) -> np.ndarray:
        """Sub-steps each mode takes over a caller's step ``dt``, shape (N,) (int64)."""
        return self._plan(float(dt))[0].copy()

    def _plan(self, dt: float) -> tuple[np.ndarray, np.ndarray]:
        """Per-mode sub-step counts and step coefficients for a caller's step ``dt``.

        A step size ``0 < dt < inf`` is kept in a slot of the plan arrays, where the kernel's
        ``step_planned`` finds it; when every slot is taken, the oldest plan makes way.
        """
        plan = self._plans.get(dt)
        if plan is None:
            n_sub = np.maximum(1, np.ceil(dt / self._h_mode * (1.0 - 1e-12))).astype(np.int64)
            coef = step_coefficients(self.model.omega0, self.model.zeta, dt / n_sub)
            if not 0.0 < dt < math.inf:
                return n_sub, coef
            slot = len(self._plans)
            if slot == PLAN_SLOTS:
                slot = self._oldest_plan
                self._oldest_plan = (slot + 1) % PLAN_SLOTS
                del self._plans[float(self._plan_dt[slot])]
                self._plan_dt[slot] = np.nan      # free while it is rewritten
            self._plan_nsub[slot] = n_sub
            self._plan_coef[slot] = coef
            self._plan_dt[slot] = dt     # last: the slot is whole before the kernel can match it
            plan = self._plans[dt] = (self._plan_nsub[slot], self._plan_coef[slot])
        return plan

    @property
    def modal_force(self) -> np.ndarray:
        """The held modal force, shape (N,) [N/sqrt(kg)]."""
        self._update()
        return self._f.copy()

    def step(self, dt: float) -> tuple[bool, str]:
        """Advance by ``dt`` seconds with the held inputs (see the module docstring).

        The kernel's ``step_planned`` does the whole step, time and undo of a failure included;
        Python only checks an unusual step size and plans a step size seen for the first time
        (the FMU's native binary calls the same compiled function without Python, see
        :meth:`c_step_entry`).
        """
        if type(dt) is not float or not 0.0 < dt < math.inf:   # check it
            try:
                dt = float(dt)
            except (TypeError, ValueError):
                return False, f"step size {dt!r} is not a number"
            if not math.isfinite(dt) or dt < 0.0:
                return False, f"step size {dt!r}: must be finite and >= 0"
            if dt == 0.0:
                return True, ""
        try:
            code = self._step(dt, *self._step_args)
        except Exception as exc:  # noqa: BLE001 - reported, never thrown across the FMI boundary
            code, message = self._failed(exc)
        if code == K.STEP_NO_PLAN:     # a step size not seen before
            self._plan(dt)
            try:
                code = self._step(dt, *self._step_args)
            except Exception as exc:  # noqa: BLE001
                code, message = self._failed(exc)
        if code == K.STEP_DONE:
            return True, ""
        if code == K.STEP_FAILED:
            message = "the step produced a non-finite state"
        elif code == K.STEP_INPUT:
            message = self._refused_input()
        elif code is not None:
            message = f"the kernel returned {code!r}"
        return False, f"step from t = {self.time:.9g} s by {dt:.3g} s: {message}; state kept"

    def _failed(self, exc: Exception) -> tuple[None, str]:
        """The kernel raised inside a step (the plain-Python kernel can, e.g. on an overflow):
        undo it (the kernel copies the state before it changes any of it)."""
        self._undo()
        return None, f"the step failed: {exc}"

    def _refused_input(self) -> str:
        """What the kernel refused in the input buffer (written from outside: see
        :meth:`input_buffer`)."""
        has_base = self.model.has_base
        for p, x in enumerate(self._ubuf):
            if not -MAX_INPUT <= x <= MAX_INPUT or (p == self._base_pos and x != 0.0
                                                    and not has_base):
                return self._input_problem(p, x)
        return "an input was refused"

    def _undo(self) -> None:
        """Back to the state before a step the kernel did not finish (see kernel.undo)."""
        self._kern.undo(self._st, self._js, self._stk, self._bk, self._st_saved, self._js_saved)
        self._clk[K.CLOCK_FRESH] = 0.0

    # -- outputs -----------------------------------------------------------------------------
    def _out(self, name: str) -> np.ndarray:
        self._update()
        return self._y[self._slices[name]].copy()

    #: The scalar outputs after the arrays, in the order _kernel.outputs writes them.
    _TAIL_NAMES = ("base_force", "energy_input", "energy_viscous", "energy_joint", "energy_joint_stored")

    def output_index(self, name: str, index: int | None = None) -> int:
        """Position of an output in :meth:`output_values`: ``name`` is one of the output
        properties (``"q"``, ``"point_a"``, ``"base_force"``, ...), ``index`` the mode or output
        point for the array-valued ones."""
        if name in self._slices:
            sl = self._slices[name]
            n = sl.stop - sl.start
            if index is None or not 0 <= int(index) < n:
                raise InputError(f"output {name!r} needs an index in 0..{n - 1}, got {index!r}")
            return sl.start + int(index)
        if name in self._TAIL_NAMES:
            return self._tail + self._TAIL_NAMES.index(name)
        allowed = ", ".join(list(self._slices) + list(self._TAIL_NAMES))
        raise InputError(f"unknown output {name!r}; allowed: {allowed}")

    def _scalar(self, name: str) -> float:
        return float(self.output_values()[self.output_index(name)])

    def input_buffer(self) -> array.array:
        """The held inputs as the simulator's own flat ``array.array("d")`` (positions from
        :meth:`input_index`), for a caller that writes them without Python, as the FMU's native
        binary does.  Such a caller writes only values :meth:`set_input_value` would accept and
        calls :meth:`inputs_written` before anything else reads the simulator."""
        return self._ubuf

    def c_step_entry(self):
        """The compiled step as a C function over this simulator's arrays, for a caller
        without Python (the FMU's native binary); None with the plain-Python kernel.

        Returns
        -------
        tuple or None
            ``(address, pointers, dims)``: calling the C function at ``address``,
            ``int64_t step(void **pointers, const int64_t *dims, double dt)``, with arrays of
            these pointers and dims does what :meth:`step` does for a step size planned before
            (the kernel's ``step_planned``: inputs checked, time advanced, a failed step undone)
            and returns its code (``kernel.STEP_*``); for any code but ``STEP_DONE`` the caller
            calls :meth:`step` (which plans, or words the refusal).  The pointers are to this
            simulator's arrays, allocated once: valid while the caller holds a reference to
            the simulator.  The caller runs it only when nothing else uses the simulator, and
            reads the outputs from :meth:`output_buffer`'s buffer afterwards.
        """
        entry = getattr(self._kern, "c_step_entry", None)
        if entry is None:
            return None
        return entry(self._step_args)

    def inputs_written(self) -> None:
        """The input buffer was written from outside: outputs are recomputed when next read."""
        self._clk[K.CLOCK_FRESH] = 0.0

    @property
    def outputs_current(self) -> bool:
        """Whether the output buffer already agrees with the state and the inputs."""
        return bool(self._clk[K.CLOCK_FRESH])

    def output_buffer(self) -> array.array:
        """Every output at once as a flat ``array.array("d")`` holding the same numbers as
        :meth:`output_values` (positions from :meth:`output_index`); indexing it gives Python
        floats at a fraction of NumPy's per-item cost.  The buffer is the simulator's own: read
        it, do not keep it across steps or change it."""
        if not self._clk[K.CLOCK_FRESH]:
            self._update()
        return self._ybuf

    def output_values(self) -> np.ndarray:
        """Every output at once, current with the state and the inputs (positions from
        :meth:`output_index`).  The array is the simulator's own: read it, do not keep it
        across steps or change it."""
        self._update()
        return self._y

    @property
    def q(self) -> np.ndarray:
        """Modal displacements, shape (N,) [m sqrt(kg)]."""
        return self._st[:, 0].copy()

    @property
    def qdot(self) -> np.ndarray:
        """Modal velocities, shape (N,) [m sqrt(kg)/s]."""
        return self._st[:, 1].copy()

    @property
    def joint_force(self) -> np.ndarray:
        """Joint forces, shape (N,) [N/sqrt(kg)]."""
        return self._js[:, K.F_PREV].copy()

    @property
    def qddot(self) -> np.ndarray:
        """Modal accelerations with the held input, shape (N,) [m sqrt(kg)/s^2]."""
        return self._out("qddot")

    @property
    def point_x(self) -> np.ndarray:
        """Displacement at the output points relative to the base, shape (n_out,) [m]."""
        return self._out("point_x")

    @property
    def point_v(self) -> np.ndarray:
        """Velocity at the output points relative to the base, shape (n_out,) [m/s]."""
        return self._out("point_v")

    @property
    def point_a(self) -> np.ndarray:
        """Absolute acceleration at the output points, shape (n_out,) [m/s^2]."""
        return self._out("point_a")

    @property
    def base_force(self) -> float:
        """Force the structure exerts on its mounting along the base direction [N]."""
        return self._scalar("base_force")

    @property
    def energy_input(self) -> float:
        """Work done by the inputs since the start, in the base frame [J]."""
        return self._scalar("energy_input")

    @property
    def energy_viscous(self) -> float:
        """Energy dissipated by viscous damping since the start [J]."""
        return self._scalar("energy_viscous")

    @property
    def energy_joint(self) -> float:
        """Energy dissipated by the joints (micro- and macro-slip) since the start [J]."""
        return self._scalar("energy_joint")

    @property
    def energy_joint_stored(self) -> float:
        """Elastic energy held in the joints' springs now [J]."""
        return self._scalar("energy_joint_stored")

    @property
    def kinetic_potential_energy(self) -> np.ndarray:
        """Kinetic plus linear-spring energy per mode, shape (N,) [J]."""
        q, v = self._st[:, 0], self._st[:, 1]
        return 0.5 * v * v + 0.5 * self.model.Kinf * q * q

    @property
    def energy_residual(self) -> float:
        """Energy balance error: initial + input - (stored + dissipated) [J]."""
        held = self.kinetic_potential_energy.sum() + self.energy_joint_stored
        return self._e0 + self.energy_input - (held + self.energy_joint + self.energy_viscous)

    @property
    def stack_depth(self) -> np.ndarray:
        """Reversal points held per mode, shape (N,)."""
        return self._js[:, K.DEPTH].astype(int)

    @property
    def merges(self) -> tuple[np.ndarray, np.ndarray]:
        """Per mode: reversal pairs dropped under the tolerance, and forced by a full stack."""
        return self._js[:, K.N_MERGE].astype(int), self._js[:, K.N_FORCED].astype(int)

    # -- state -------------------------------------------------------------------------------
    def get_state(self) -> bytes:
        """All internal state as bytes (NumPy ``.npz``, no pickle); restores bit for bit."""
        depth = int(self._js[:, K.DEPTH].max()) if self.model.n_modes else 0
        buf = io.BytesIO()
        np.savez(
            buf,
            version=np.array(_STATE_VERSION),
            time=np.array(self.time),
            st=self._st,
            js=self._js,
            stk=self._stk[:, :depth],
            u=self._u,
            e0=np.array(self._e0),
        )
        return buf.getvalue()

    def check_state(self, data: bytes) -> dict:
        """The parts of a state from :meth:`get_state`, checked to fit this simulator; nothing is
        changed.  Raises InputError saying why a state does not fit."""
        try:
            with np.load(io.BytesIO(bytes(data)), allow_pickle=False) as z:
                parts = {k: z[k] for k in z.files}
        except Exception as exc:  # noqa: BLE001
            raise InputError(f"FMU state: not a jointfmu state ({exc})") from exc
        missing = {"version", "st", "js", "stk", "u", "e0", "time"} - set(parts)
        if missing:
            raise InputError(f"FMU state: not a jointfmu state (no {', '.join(sorted(missing))})")
        if (int(parts["version"]) != _STATE_VERSION or parts["st"].shape != self._st.shape
                or parts["js"].shape != self._js.shape or parts["u"].shape != self._u.shape):
            raise InputError("FMU state: made by another structure or version of jointfmu")
        if parts["stk"].ndim != self._stk.ndim or parts["stk"].shape[0] != self._stk.shape[0] \
                or parts["stk"].shape[2:] != self._stk.shape[2:]:
            raise InputError("FMU state: made by another structure or version of jointfmu")
        if parts["stk"].shape[1] > self._cap:
            raise InputError("FMU state: reversal stack larger than this simulator's capacity")
        return parts

    def set_state(self, data: bytes) -> None:
        """Restore a state from :meth:`get_state` of a simulator of the same structure
        (checked first with :meth:`check_state`: a state that does not fit changes nothing)."""
        parts = self.check_state(data)
        depth = parts["stk"].shape[1]
        self._st[:] = parts["st"]
        self._js[:] = parts["js"]
        self._stk[:, :depth] = parts["stk"]
        self._u[:] = parts["u"]
        self._clk[K.CLOCK_FRESH] = 0.0
        self._e0 = float(parts["e0"])
        self.time = float(parts["time"])
