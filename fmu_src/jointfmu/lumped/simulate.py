"""Time integration of a discrete-joint structure with every joint exact.

:class:`LumpedSimulator` holds the state of the whole structure in its stuck-joint modal
coordinates (all of them: nothing is truncated, x = Phi q exactly) together with the reversal
memory of every joint, and advances it over caller's steps through the stepping contract of
:class:`jointfmu.physics.stepping.Stepper` (``step(dt) -> (ok, message)``, state kept on
failure).  The maths of a sub-step is in :mod:`.kernel`.

Why this method
---------------
Between joint events the structure is linear except for the joints' remainders g_j = F_j - K_T,j
u_j, which are small in micro-slip and bounded by the slip forces beyond.  So the linear part is
propagated exactly, mode by mode, with the stuck joints' stiffness in it (an exponential
integrator: S. M. Cox and P. C. Matthews, "Exponential time differencing for stiff systems",
J. Comput. Phys. 176(2):430-455, 2002; coefficients by Van Loan's block exponential, IEEE Trans.
Automat. Control 23(3), 1978), and only the remainders are expanded over the step, with
derivatives taken exactly from each joint; reversals and macro-slip onsets inside a step are
located as in the modal core (:mod:`jointfmu.physics.kernel`), per joint, and the closing of
hysteresis loops (frequent when a joint sees several modes at once) corrected too.  Compared with
a second-order implicit scheme (Newmark's average acceleration: N. M. Newmark, "A method of
computation for structural dynamics", J. Eng. Mech. Div. ASCE 85(EM3):67-94, 1959) this is exact
for the linear part at any step, so there is no period error in the modes and no iteration per
step; it is of third order in the step as measured, and it reduces exactly to the modal core's
scheme for one mode (tested).

The sub-step is at most ``1 / (steps_per_period * f_max)`` with f_max the highest stuck-joint
mode: the joints couple every mode, so one step serves all.  Measured accuracy (tests and
``tests/bench/bench_lumped.py``; README "Discrete-joint structures"): see
:data:`DEFAULT_STEPS_PER_PERIOD`.
"""
from __future__ import annotations

import math

import numpy as np

from ..errors import InputError, SimulationError
from ..physics import kernel as PK
from ..physics.integrate import (DEFAULT_MERGE_TOL, DEFAULT_STACK_CAPACITY, MAX_INPUT,
                                 step_coefficients)
from ..physics.iwan import kernel_table
from ..physics.stepping import Stepper
from . import kernel as LK
from .compiled import select_kernel
from .model import LumpedModel
from .modes import StuckModes, stuck_modes

__all__ = ["LumpedSimulator", "DEFAULT_STEPS_PER_PERIOD", "MIN_STEPS_PER_PERIOD", "QUANTITIES"]

#: Sub-steps per period of the highest stuck-joint mode.  At this setting impact ring-downs in
#: micro- and macro-slip converge to 3e-7 - 7e-7 of their peak on the six-DOF test structure and
#: 1e-8 - 4e-8 on the 20-DOF benchmark and the example tray (against 4x the steps; README).
DEFAULT_STEPS_PER_PERIOD = 200.0
#: Below this the explicit treatment of the joint remainders is no longer safely stable.
MIN_STEPS_PER_PERIOD = 8.0
#: Sensor quantities and their codes in the kernel.
QUANTITIES = {"x": 0, "v": 1, "a": 2}


class LumpedSimulator(Stepper):
    """State and stepping of one discrete-joint structure.

    Parameters
    ----------
    model : LumpedModel
        The structure (one build).
    steps_per_period : float
        Sub-steps per period of the highest stuck-joint mode (>= ``MIN_STEPS_PER_PERIOD``).
    kernel : {"auto", "python", "compiled"}
        Which implementation of the step (see :func:`.compiled.select_kernel`); the choice is in
        the attribute ``kernel``: ``"numba"`` or ``"python"``.
    merge_tol : float
        Reversal pairs whose force effect is below ``merge_tol * Fs`` are dropped.
    stack_capacity : int
        Reversal stack entries per joint.
    x0, v0 : array_like, shape (n_dofs,), optional
        Initial displacements [m] and velocities [m/s]; each joint starts on its virgin curve at
        its initial relative displacement (as if loaded monotonically from 0).

    Notes
    -----
    Inputs are forces at the model's input points (role ``input`` or ``both``, file order).
    Over every following caller's step the force at point p is F_p + F'_p t + F''_p t^2/2, t from
    that step's start, as last given to :meth:`set_inputs` (rates zero: held, as in the modal
    core).  Outputs reflect the held value F_p.
    """

    def __init__(self, model: LumpedModel, steps_per_period: float = DEFAULT_STEPS_PER_PERIOD,
                 kernel: str = "auto", merge_tol: float = DEFAULT_MERGE_TOL,
                 stack_capacity: int = DEFAULT_STACK_CAPACITY, x0=None, v0=None,
                 modes: StuckModes | None = None):
        spp = float(steps_per_period)
        if not math.isfinite(spp) or spp < MIN_STEPS_PER_PERIOD:
            raise InputError(f"steps_per_period = {steps_per_period!r}: must be a finite number >= "
                             f"{MIN_STEPS_PER_PERIOD:g} (default {DEFAULT_STEPS_PER_PERIOD:g})")
        if not (math.isfinite(merge_tol) and 0.0 <= merge_tol < 1e-3):
            raise InputError(f"merge_tol = {merge_tol!r}: must satisfy 0 <= merge_tol < 1e-3")
        if int(stack_capacity) < 8:
            raise InputError(f"stack_capacity = {stack_capacity!r}: must be an integer >= 8")
        self.model = model
        self.modes = modes if modes is not None else stuck_modes(model)
        self.steps_per_period = spp
        self.merge_tol = float(merge_tol)
        self._k, self.kernel = select_kernel(kernel)
        m = self.modes
        n, nj = m.n_modes, model.n_joints
        self.h_max = 1.0 / (spp * float(m.frequency.max()))
        self._phi = np.ascontiguousarray(m.shapes)
        self._md = np.ascontiguousarray(np.column_stack([2.0 * m.zeta * m.omega, m.omega**2]))
        self._C = np.ascontiguousarray(m.coupling.reshape(nj, n))
        self.input_labels = tuple(p.label for p in model.input_points)
        self.output_labels = tuple(p.label for p in model.output_points)
        self._P = np.ascontiguousarray(model.point_vectors(model.input_points) @ self._phi
                                       ).reshape(len(self.input_labels), n)
        self._Sout = (model.point_vectors(model.output_points) @ self._phi).reshape(
            len(self.output_labels), n)
        js_ = model.joints
        self._jc = kernel_table([j.Fs for j in js_], [j.Kt for j in js_], [j.chi for j in js_],
                                [j.beta for j in js_], np.zeros(nj), self.merge_tol
                                ).reshape(nj, PK.NJC)
        self._Klin = model.stiffness(joints_stuck=False)
        self._cap = int(stack_capacity)
        self._x0 = self._vector(x0, "x0")
        self._v0 = self._vector(v0, "v0")
        ni = len(self.input_labels)
        self._st = np.zeros((n, 2))
        self._js = np.zeros((nj, PK.NJS))
        self._stk = np.zeros((nj, self._cap, 3))
        self._bk = np.zeros((nj, self._cap, 3))
        self._wm = np.zeros((n, 8))
        self._wj = np.zeros((nj, 8))
        self._fw = np.zeros((ni, 3))
        self._fin = np.zeros((ni, 3))
        self._en = np.zeros(2)
        self._peak = np.zeros(n)
        self._jstat = np.zeros((nj, 2))
        self._acc = np.zeros(n)
        self._st_saved = np.zeros_like(self._st)
        self._js_saved = np.zeros_like(self._js)
        self._en_saved = np.zeros(2)
        self._peak_saved = np.zeros(n)
        self._jstat_saved = np.zeros_like(self._jstat)
        self._plans: dict[float, tuple[np.int64, np.ndarray]] = {}
        self._advance = self._k.lumped_advance
        self._record = self._k.lumped_record
        if self.kernel == "numba":
            # the machine code bound to this simulator's array types (no per-call dispatch)
            from ..physics.compiled import bind

            plan = (np.int64(1), np.zeros((n, 11)))
            self._advance = bind(self._advance, plan + self._arrays())
            self._record = bind(self._record, (np.int64(1),) + plan + self._arrays()
                                + (np.zeros((1, n)), np.int64(0), np.zeros((1, 1)),
                                   self._st_saved, self._js_saved, self._en_saved))
        self.reset()

    # -- set-up ------------------------------------------------------------------------------
    def _vector(self, value, name):
        n = self.model.n_dofs
        if value is None:
            return np.zeros(n)
        a = np.asarray(value, dtype=float).reshape(-1)
        if a.shape != (n,) or not np.all(np.isfinite(a)):
            raise InputError(f"{name}: must be {n} finite numbers (one per DOF), got {value!r}")
        return a.copy()

    def _arrays(self) -> tuple:
        """Arguments of the kernel's ``lumped_advance`` after (n_sub, coef)."""
        return (self._md, self._C, self._P, self._fin, self._st, self._jc, self._js, self._stk,
                self._bk, self._wm, self._wj, self._fw, self._en, self._peak, self._jstat)

    def reset(self) -> None:
        """Back to the initial state: time 0, initial conditions, virgin joints, inputs zero."""
        m = self.model.masses()
        self.time = 0.0
        self._st[:, 0] = self._phi.T @ (m * self._x0)
        self._st[:, 1] = self._phi.T @ (m * self._v0)
        self._js[:] = 0.0
        self._stk[:] = 0.0
        self._bk[:] = 0.0
        u0 = self._C @ self._st[:, 0]
        for j in range(self.model.n_joints):
            PK.joint_set_virgin(j, float(u0[j]), self._jc, self._js)
        self._fin[:] = 0.0
        self._en[:] = 0.0
        self._peak[:] = np.abs(self._st[:, 0])
        self._jstat[:] = 0.0
        self._e0 = self._held_energy()

    def set_inputs(self, point_forces=None, force_rates=None, force_accels=None) -> None:
        """Set the input forces at the input points, held over every following step.

        Parameters
        ----------
        point_forces : array_like, shape (n_in,)
            Forces F_p [N] along each input point's direction, ``model.input_points`` order.
        force_rates, force_accels : array_like, shape (n_in,)
            F'_p [N/s] and F''_p [N/s^2]: the force over a step is F + F' t + F'' t^2/2 from the
            step's start (omitted: unchanged; all zero after construction and :meth:`reset`).

        Raises
        ------
        InputError
            Wrong length, not finite or larger than 1e12 in magnitude; nothing is changed then.
        """
        new = [self._checked(v, name) for v, name in ((point_forces, "point_forces"),
                                                      (force_rates, "force_rates"),
                                                      (force_accels, "force_accels"))]
        for col, v in enumerate(new):
            if v is not None:
                self._fin[:, col] = v

    def _checked(self, value, name):
        if value is None:
            return None
        labels = self.input_labels
        try:
            values = np.array([float(x) for x in np.atleast_1d(np.asarray(value, dtype=object))])
        except (TypeError, ValueError):
            raise InputError(f"{name}: expected {len(labels)} numbers ({', '.join(labels) or 'none'}), "
                             f"got {value!r}") from None
        if values.shape[0] != len(labels):
            raise InputError(f"{name}: expected {len(labels)} values ({', '.join(labels) or 'none'}), "
                             f"got {values.shape[0]}")
        for j, x in enumerate(values):
            if not (math.isfinite(x) and abs(x) <= MAX_INPUT):
                raise InputError(f"{name}[{labels[j]}] = {x!r}: must be finite with |value| <= "
                                 f"{MAX_INPUT:g}")
        return values

    # -- stepping ----------------------------------------------------------------------------
    def _plan(self, dt: float) -> tuple[np.int64, np.ndarray]:
        plan = self._plans.get(dt)
        if plan is None:
            if len(self._plans) > 32:
                self._plans.clear()
            n_sub = max(1, int(math.ceil(dt / self.h_max * (1.0 - 1e-12))))
            coef = step_coefficients(self.modes.omega, self.modes.zeta,
                                     np.full(self.modes.n_modes, dt / n_sub))
            plan = self._plans[dt] = (np.int64(n_sub), np.ascontiguousarray(coef))
        return plan

    def sub_steps(self, dt: float) -> int:
        """Equal sub-steps a caller's step ``dt`` is split into."""
        return int(self._plan(float(dt))[0])

    def _save(self) -> None:
        self._st_saved[:] = self._st
        self._js_saved[:] = self._js
        self._en_saved[:] = self._en
        self._peak_saved[:] = self._peak
        self._jstat_saved[:] = self._jstat

    def _step_impl(self, dt: float) -> tuple[bool, str]:
        n_sub, coef = self._plan(dt)
        check = self._advance(n_sub, coef, *self._arrays())
        if not math.isfinite(check):
            return False, "the step produced a non-finite state"
        return True, ""

    def _restore(self) -> None:
        LK.lumped_restore(self._st, self._js, self._st_saved, self._js_saved, self._stk, self._bk)
        self._en[:] = self._en_saved
        self._peak[:] = self._peak_saved
        self._jstat[:] = self._jstat_saved

    def record(self, n_steps: int, dt: float, points, quantity: str = "a") -> np.ndarray:
        """``n_steps`` caller's steps of ``dt`` with the inputs held; the sensors after each.

        Parameters
        ----------
        n_steps : int
        dt : float
            Caller's step [s] (the sample interval of the simulated signal).
        points : sequence of str
            Labels of the model's points to sense (any role).
        quantity : {"a", "v", "x"}
            Absolute acceleration [m/s^2], velocity [m/s] or displacement [m] along each point's
            direction (the ground does not move).

        Returns
        -------
        ndarray, shape (n_steps, len(points))

        Raises
        ------
        SimulationError
            A step gave a non-finite state; the state is that after the last good step.
        """
        if quantity not in QUANTITIES:
            raise InputError(f"quantity {quantity!r}: allowed are " + ", ".join(QUANTITIES))
        n_steps = int(n_steps)
        dt = float(dt)
        if not (math.isfinite(dt) and dt > 0.0) or n_steps < 0:
            raise InputError(f"record: need n_steps >= 0 and a finite dt > 0, got {n_steps}, {dt!r}")
        pts = [self.model.point(lab) for lab in points]
        S = np.ascontiguousarray(self.model.point_vectors(pts) @ self._phi).reshape(len(pts), -1)
        out = np.zeros((max(n_steps, 1), len(pts)))
        n_sub, coef = self._plan(dt)
        done = self._record(np.int64(n_steps), n_sub, coef, *self._arrays(), S,
                            np.int64(QUANTITIES[quantity]), out, self._st_saved, self._js_saved,
                            self._en_saved)
        self.time += done * dt
        if done < n_steps:
            raise SimulationError(f"step from t = {self.time:.9g} s by {dt:.3g} s: the step produced "
                                  "a non-finite state; state kept")
        return out[:n_steps]

    # -- outputs -----------------------------------------------------------------------------
    @property
    def q(self) -> np.ndarray:
        """Stuck-joint modal displacements, shape (N,) [m sqrt(kg)]."""
        return self._st[:, 0].copy()

    @property
    def qdot(self) -> np.ndarray:
        """Modal velocities, shape (N,) [m sqrt(kg)/s]."""
        return self._st[:, 1].copy()

    @property
    def qddot(self) -> np.ndarray:
        """Modal accelerations with the held input force, shape (N,) [m sqrt(kg)/s^2]."""
        self._k.lumped_modal_acc(self._md, self._C, self._P, np.ascontiguousarray(self._fin[:, 0]),
                                 self._st, self._jc, self._js, self._acc)
        return self._acc.copy()

    @property
    def x(self) -> np.ndarray:
        """DOF displacements, shape (n_dofs,) [m]."""
        return self._phi @ self._st[:, 0]

    @property
    def v(self) -> np.ndarray:
        """DOF velocities, shape (n_dofs,) [m/s]."""
        return self._phi @ self._st[:, 1]

    @property
    def a(self) -> np.ndarray:
        """DOF accelerations with the held input force, shape (n_dofs,) [m/s^2]."""
        return self._phi @ self.qddot

    @property
    def point_x(self) -> np.ndarray:
        """Displacement at the output points along their directions, shape (n_out,) [m]."""
        return self._Sout @ self._st[:, 0]

    @property
    def point_v(self) -> np.ndarray:
        """Velocity at the output points, shape (n_out,) [m/s]."""
        return self._Sout @ self._st[:, 1]

    @property
    def point_a(self) -> np.ndarray:
        """Acceleration at the output points, shape (n_out,) [m/s^2]."""
        return self._Sout @ self.qddot

    @property
    def joint_displacement(self) -> np.ndarray:
        """Relative displacement of each joint, shape (n_joints,) [m]."""
        return self._js[:, PK.U_PREV].copy()

    @property
    def joint_force(self) -> np.ndarray:
        """Force of each joint, shape (n_joints,) [N]."""
        return self._js[:, PK.F_PREV].copy()

    @property
    def peak_modal_amplitude(self) -> np.ndarray:
        """Largest |q_i| reached since the start or :meth:`reset`, shape (N,) [m sqrt(kg)]."""
        return self._peak.copy()

    @property
    def joint_peak_ratio(self) -> np.ndarray:
        """Largest |F_j| / Fs_j reached, shape (n_joints,)."""
        return self._jstat[:, LK.JS_MAXRATIO].copy()

    @property
    def joint_reached_macroslip(self) -> np.ndarray:
        """Whether each joint has been in macro-slip (|F| = Fs, tangent 0), shape (n_joints,)."""
        return self._jstat[:, LK.JS_MACRO] > 0.0

    @property
    def stack_depth(self) -> np.ndarray:
        """Reversal points held per joint, shape (n_joints,)."""
        return self._js[:, PK.DEPTH].astype(int)

    @property
    def merges(self) -> tuple[np.ndarray, np.ndarray]:
        """Per joint: reversal pairs dropped under the tolerance, and forced by a full stack."""
        return self._js[:, PK.N_MERGE].astype(int), self._js[:, PK.N_FORCED].astype(int)

    # -- energy ------------------------------------------------------------------------------
    @property
    def energy_input(self) -> float:
        """Work done by the input forces since the start [J]."""
        return float(self._en[LK.EN_INPUT])

    @property
    def energy_viscous(self) -> float:
        """Energy dissipated by viscous damping since the start [J]."""
        return float(self._en[LK.EN_VISCOUS])

    @property
    def energy_joint(self) -> float:
        """Energy dissipated by the joints (micro- and macro-slip) since the start [J]."""
        return float(self._js[:, PK.D_PREV].sum())

    @property
    def energy_joint_stored(self) -> float:
        """Elastic energy held in the joints' sliders now [J]."""
        return float(self._js[:, PK.E_PREV].sum())

    @property
    def energy_kinetic_springs(self) -> float:
        """Kinetic energy plus the energy of the linear springs now [J]."""
        x = self.x
        return float(0.5 * np.dot(self._st[:, 1], self._st[:, 1]) + 0.5 * x @ self._Klin @ x)

    def _held_energy(self) -> float:
        return self.energy_kinetic_springs + self.energy_joint_stored

    @property
    def energy_residual(self) -> float:
        """Energy balance error [J]: initial + input - (held + dissipated)."""
        return self._e0 + self.energy_input - (self._held_energy() + self.energy_joint
                                               + self.energy_viscous)
