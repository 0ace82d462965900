"""SciPy reference integration of the modal Iwan model, branch by branch.

This is the yardstick for the fixed-step core and the FMU, so it is written independently of them:
the backbone, the Masing branches and the reversal memory are implemented here again, from the
project's physics sheet (``physics.md``), and only NumPy and SciPy are used.

Each mode (mass-normalized modal coordinate ``q``) obeys::

    q'' + 2 zeta omega0 q' + K_inf q + F_J(q; history) = p(t),   omega0 = 2 pi f0,  K_inf = omega0^2 - K_T

with ``F_J`` the four-parameter Iwan joint force (Segalman, "A four-parameter Iwan model for lap-type
joints", J. Appl. Mech. 72(5):752-760, 2005) and ``p`` held constant on each communication interval
(zero-order hold).  Between events the joint force is one smooth closed-form branch, so each piece is
integrated with ``solve_ivp`` (DOP853) and stopped by terminal events at

* ``q' = 0``: a reversal, pushed on the memory stack;
* the closure point of the current branch (``u_{n-1}``, or ``-u_1`` on the first branch): the pair
  is popped (wiping-out) and the older branch resumes;
* the onset of macro-slip on the current branch (``|q - u_r|/2 = phimax``, ``|q| = phimax`` on the
  virgin curve), where the force law loses smoothness (a slope jump when ``beta > 0``);

and at every input switch time.  Energies are carried as extra ODE states.  Only numpy/scipy.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.integrate import solve_ivp

from ..errors import InputError, ParameterError, Problem, SimulationError

__all__ = ["simulate_mode", "simulate", "iwan_constants"]


# ---------------------------------------------------------------------------------------------------
# Joint constants and closed forms
# ---------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Iwan:
    """Derived constants of one four-parameter Iwan joint (units: modal force, modal displacement)."""

    Fs: float
    Kt: float
    chi: float
    beta: float
    phimax: float
    R: float
    S: float

    def fbb_pre(self, x: float) -> float:
        """Micro-slip backbone formula, analytically continued past phimax (odd in x).

        F_bb(x) = K_T x - R x^(chi+2)/((chi+1)(chi+2)); physics sheet sec. 2 [derived] from
        Segalman 2005.  Continued past phimax so that a trial step straddling the onset of
        macro-slip sees a smooth right-hand side; the onset is an event, so the continuation is
        never accepted beyond it.
        """
        ax = abs(x)
        val = self.Kt * ax - self.R * ax ** (self.chi + 2.0) / ((self.chi + 1.0) * (self.chi + 2.0))
        return val if x >= 0.0 else -val

    def fbb(self, x: float) -> float:
        """Backbone (virgin loading curve) F_bb(x), saturating at F_S beyond phimax."""
        if abs(x) >= self.phimax:
            return math.copysign(self.Fs, x)
        return self.fbb_pre(x)

    def dissipation_virgin(self, u: float) -> float:
        """Energy dissipated by the sliders on monotone virgin loading from 0 to u.

        g_v(u) = integral rho(phi) phi (|u| - phi)_+ dphi, one Jenkins element of slip force phi
        slipping by |u| - phi (Segalman 2005 density, physics sheet sec. 1, integrated here).
        A full cycle of amplitude A dissipates 4 g_v(A) = D(A) of physics sheet sec. 4.
        """
        a = abs(u)
        c = self.chi
        if a <= self.phimax:
            return self.R * a ** (c + 3.0) / ((c + 2.0) * (c + 3.0))
        pm = self.phimax
        return (self.R * pm ** (c + 2.0) * (a / (c + 2.0) - pm / (c + 3.0))
                + self.S * pm * (a - pm))


def iwan_constants(Fs: float, Kt: float, chi: float, beta: float) -> dict[str, float]:
    """Derived constants of the four-parameter Iwan model.

    Kept here on purpose, beside :func:`jointfmu.physics.iwan.joint_constants` (the one the core,
    the kernel and the analysis share): the reference re-derives Segalman's inversion on its own so
    that it stays an independent check of them.

    Segalman, "A four-parameter Iwan model for lap-type joints", J. Appl. Mech. 72(5), 2005
    (inverse relations as on the physics sheet, sec. 1, [pub, recalled]).

    Parameters
    ----------
    Fs : float
        Force at the onset of macro-slip (modal force units).
    Kt : float
        Joint stiffness at zero load (modal force per modal displacement).
    chi : float
        Exponent of the power-law density, ``chi > -1``.
    beta : float
        Relative strength of the Dirac part of the density, ``beta >= 0``.

    Returns
    -------
    dict
        ``phimax`` (modal displacement), ``R``, ``S`` (modal stiffness).
    """
    a = (chi + 1.0) / (chi + 2.0)
    phimax = Fs * (1.0 + beta) / (Kt * (beta + a))
    R = Fs * (chi + 1.0) / (phimax ** (chi + 2.0) * (beta + a))
    S = (Fs / phimax) * beta / (beta + a)
    return {"phimax": phimax, "R": R, "S": S}


def _check_mode_params(f0, zeta, Fs, Kt, chi, beta, where="simulate_mode") -> _Iwan:
    problems = []

    def bad(name, value, allowed):
        problems.append(Problem(file=where, field=name, value=value, allowed=allowed))

    vals = {"f0": f0, "zeta": zeta, "Fs": Fs, "Kt": Kt, "chi": chi, "beta": beta}
    for k, v in vals.items():
        try:
            fv = float(v)
        except (TypeError, ValueError):
            bad(k, v, "a real number")
            continue
        if not math.isfinite(fv):
            bad(k, v, "a finite real number")
    if problems:
        raise ParameterError(problems)
    f0, zeta, Fs, Kt, chi, beta = (float(vals[k]) for k in ("f0", "zeta", "Fs", "Kt", "chi", "beta"))
    if f0 <= 0:
        bad("f0", f0, "f0 > 0 (Hz)")
    if zeta < 0:
        bad("zeta", zeta, "zeta >= 0")
    if Fs <= 0:
        bad("Fs", Fs, "Fs > 0")
    if Kt <= 0:
        bad("Kt", Kt, "Kt > 0")
    if not chi > -1.0:
        bad("chi", chi, "chi > -1 (physical range -1 < chi <= 0)")
    if beta < 0:
        bad("beta", beta, "beta >= 0")
    if not problems:
        w0 = 2.0 * math.pi * f0
        if Kt > w0 * w0:
            bad("Kt", Kt, f"Kt <= omega0^2 = (2 pi f0)^2 = {w0 * w0:.6g}, so that K_inf = omega0^2 - Kt >= 0")
    if problems:
        raise ParameterError(problems)
    c = iwan_constants(Fs, Kt, chi, beta)
    return _Iwan(Fs=Fs, Kt=Kt, chi=chi, beta=beta, **c)


# ---------------------------------------------------------------------------------------------------
# Reversal memory (Masing branches with wiping-out)
# ---------------------------------------------------------------------------------------------------
@dataclass
class _Level:
    """One level of the memory: the branch that starts at reversal (u, F).

    ``s`` is 1 for the virgin curve (u = F = 0) and 2 for a Masing branch; ``d`` is the direction
    of motion on the branch (+1/-1, 0 for an untouched virgin joint); ``base`` is the closed-form
    slider dissipation accumulated when the branch started; ``slip`` tells whether the branch has
    passed the onset of macro-slip.
    """

    u: float
    F: float
    s: float
    d: float
    base: float
    slip: bool = False


@dataclass
class _Memory:
    """Reversal stack of the Iwan joint, exact under Masing's extended rules.

    Masing branch after a reversal (u_r, F_r): F = F_r + 2 F_bb((u - u_r)/2); wiping-out: the pair
    (u_{n-1}, u_n) is deleted once u passes u_{n-1}, the first reversal once u passes -u_1
    (physics sheet sec. 3; Masing-type rules for parallel elasto-plastic elements after Jayakumar
    and Beck, formulas derived).  ``levels[0]`` is the virgin curve, ``levels[i]`` the branch from
    the i-th retained reversal.  ``history`` keeps every reversal ever pushed (wiped ones too), so
    tests can replay it through an independent operator.
    """

    iw: _Iwan
    levels: list = field(default_factory=list)
    history: list = field(default_factory=list)

    @classmethod
    def virgin_at(cls, iw: _Iwan, q0: float) -> "_Memory":
        """Joint loaded monotonically from 0 to q0 (the initial-state convention of the core)."""
        d = float(np.sign(q0))
        m = cls(iw=iw, levels=[_Level(0.0, 0.0, 1.0, d, 0.0)])
        m.levels[0].slip = abs(q0) >= iw.phimax
        return m

    @property
    def top(self) -> _Level:
        return self.levels[-1]

    @property
    def depth(self) -> int:
        """Number of retained reversals (0: on the virgin curve)."""
        return len(self.levels) - 1

    def force(self, q: float, slip: bool | None = None) -> float:
        """Joint force on the current branch at q (modal force)."""
        L = self.top
        if slip is None:
            slip = L.slip
        if slip:
            return L.F + L.s * L.d * self.iw.Fs
        return L.F + L.s * self.iw.fbb_pre((q - L.u) / L.s)

    def dissipation(self, q: float) -> float:
        """Closed-form energy dissipated in the sliders so far, at position q on the current branch."""
        L = self.top
        return L.base + L.s * self.iw.dissipation_virgin((q - L.u) / L.s)

    def target(self) -> float | None:
        """Closure point of the current branch, or None on the virgin curve."""
        n = self.depth
        if n == 0:
            return None
        if n == 1:
            return -self.levels[1].u
        return self.levels[-2].u

    def onset(self) -> float:
        """Position of the onset of macro-slip on the current branch (in its direction)."""
        L = self.top
        return L.u + L.d * L.s * self.iw.phimax

    def _slip_geometric(self, q: float) -> bool:
        L = self.top
        return L.d != 0 and L.d * (q - L.u) >= L.s * self.iw.phimax

    def push(self, q: float, d_new: float) -> None:
        """Reversal at q: the motion continues in direction d_new (opposite to the current one)."""
        F = self.force(q)
        D = self.dissipation(q)
        self.levels.append(_Level(q, F, 2.0, d_new, D, False))
        self.history.append(q)

    def set_direction(self, d_new: float) -> None:
        """Start of motion from the untouched virgin state at q = 0 (no reversal)."""
        self.top.d = d_new

    def drive(self, q_from: float, q_to: float) -> None:
        """Move the joint quasi-statically and monotonically from q_from to q_to.

        Used to check the memory on a prescribed path: pushes a reversal if the direction changes,
        pops every branch whose closure point is passed, and updates the macro-slip flag.
        """
        d = float(np.sign(q_to - q_from))
        if d == 0.0:
            return
        if self.top.d == 0.0:
            self.set_direction(d)
        elif d != self.top.d:
            self.push(q_from, d)
        while True:
            tgt = self.target()
            if tgt is None or d * (q_to - tgt) < 0.0:
                break
            self.pop(tgt)
        self.top.slip = self._slip_geometric(q_to)

    def pop(self, q: float) -> None:
        """The current branch reached its closure point q: wipe out the inner loop."""
        D = self.dissipation(q)
        n = self.depth
        d_cur = self.top.d
        del self.levels[-(2 if n >= 2 else 1):]
        L = self.top
        if n == 1:
            # Back on the virgin curve at -u_1, on the other side, moving away from zero.
            L.d = d_cur
        L.slip = self._slip_geometric(q)
        # Keep the closed-form dissipation continuous: the wiped-out loop's energy is banked.
        L.base = D - L.s * self.iw.dissipation_virgin((q - L.u) / L.s)


# ---------------------------------------------------------------------------------------------------
# One mode
# ---------------------------------------------------------------------------------------------------
def _as_times(t):
    t = np.asarray(t, dtype=float)
    if t.ndim != 1 or t.size < 2:
        raise InputError(f"t must be a 1-D array of at least 2 communication times, got shape {t.shape}")
    if not np.all(np.isfinite(t)):
        raise InputError("t must be finite (found NaN or inf)")
    if not np.all(np.diff(t) > 0):
        i = int(np.argmax(~(np.diff(t) > 0)))
        raise InputError(f"t must be strictly increasing; t[{i}] = {t[i]!r} >= t[{i + 1}] = {t[i + 1]!r}")
    return t


def _as_force(p, M, name="p"):
    p = np.asarray(p, dtype=float)
    if p.ndim != 1 or p.shape[0] not in (M - 1, M):
        raise InputError(f"{name} must have shape ({M - 1},) or ({M},) to match t of length {M}, "
                         f"got shape {p.shape}")
    if not np.all(np.isfinite(p)):
        raise InputError(f"{name} must be finite (found NaN or inf)")
    return p[: M - 1]


def _run_mode(f0, zeta, Fs, Kt, chi, beta, t, p, q0=0.0, v0=0.0, rtol=1e-11, atol=None,
              _where="simulate_mode"):
    """Integrate one mode; return (result dict, memory, event log).

    The event log is a list of ``(t, kind, depth_after)`` with kind in ``"reversal"``,
    ``"closure"``, ``"slip"``; the memory is the final :class:`_Memory` (with its full reversal
    history).  Internal: tests use it to check the memory logic.
    """
    iw = _check_mode_params(f0, zeta, Fs, Kt, chi, beta, where=_where)
    t = _as_times(t)
    M = t.size
    p = _as_force(p, M)
    try:
        q0 = float(q0)
        v0 = float(v0)
    except (TypeError, ValueError):
        raise InputError(f"q0 and v0 must be real numbers, got q0={q0!r}, v0={v0!r}") from None
    if not (math.isfinite(q0) and math.isfinite(v0)):
        raise InputError(f"q0 and v0 must be finite, got q0={q0!r}, v0={v0!r}")
    if not (0.0 < rtol < 1e-3):
        raise InputError(f"rtol must be in (0, 1e-3), got {rtol!r}")

    w0 = 2.0 * math.pi * float(f0)
    c = 2.0 * float(zeta) * w0
    kinf = w0 * w0 - iw.Kt
    # Characteristic amplitude, for an absolute tolerance scaled to the problem.
    pmax = float(np.max(np.abs(p))) if p.size else 0.0
    A = max(abs(q0), abs(v0) / w0, pmax / w0 ** 2)
    if A == 0.0:
        A = iw.phimax
    E = w0 * w0 * A * A
    if atol is None:
        atol_v = np.array([A, A * w0, E, E, E]) * 1e-13
    else:
        atol = float(atol)
        if not atol > 0:
            raise InputError(f"atol must be > 0 (modal displacement units), got {atol!r}")
        atol_v = np.array([atol, atol * w0, atol * E / A, atol * E / A, atol * E / A])

    mem = _Memory.virgin_at(iw, q0)
    log: list = []

    out = {k: np.empty(M) for k in ("q", "qdot", "qddot", "joint_force", "e_input", "e_viscous",
                                    "e_joint_work", "e_joint_dissipation")}
    p_at = np.append(p, p[-1])  # input held from t_k onward; the last point uses p_{M-2}

    def record(k, y, F, D):
        out["q"][k] = y[0]
        out["qdot"][k] = y[1]
        out["joint_force"][k] = F
        out["qddot"][k] = p_at[k] - c * y[1] - kinf * y[0] - F
        out["e_input"][k] = y[2]
        out["e_viscous"][k] = y[3]
        out["e_joint_work"][k] = y[4]
        out["e_joint_dissipation"][k] = D

    y = np.array([q0, v0, 0.0, 0.0, 0.0])
    record(0, y, mem.force(q0), mem.dissipation(q0))

    # Spans of constant held input: one integration per span, outputs from the dense output.
    k = 0
    n_events = 0
    while k < M - 1:
        j = k + 1
        while j < M - 1 and p[j] == p[k]:
            j += 1
        # span [t[k], t[j]] with input p[k]; outputs at t[k+1..j]
        pk = float(p[k])
        t_cur = float(t[k])
        t_end = float(t[j])
        next_out = k + 1
        stall = 0
        spins = 0
        while True:
            spins += 1
            if spins > 1000 + 2 * len(mem.levels):
                # Memory updates without any time advance: a logic fault, never silently loop.
                raise SimulationError(f"reference integration makes no progress at t = {t_cur!r} "
                                      f"(memory depth {mem.depth})")
            q, v = float(y[0]), float(y[1])
            # Direction of motion at the restart.
            if v == 0.0:
                a = pk - kinf * q - mem.force(q)
                if a == 0.0:
                    # At rest in equilibrium: the state holds until the input changes.
                    F = mem.force(q)
                    D = mem.dissipation(q)
                    while next_out <= j:
                        record(next_out, y, F, D)
                        next_out += 1
                    break
                d_new = 1.0 if a > 0 else -1.0
            else:
                d_new = 1.0 if v > 0 else -1.0
            L = mem.top
            if L.d == 0.0:
                mem.set_direction(d_new)
            elif d_new != L.d:
                # Usually v = 0 here (a q' = 0 event); v != 0 when the initial velocity points back
                # towards zero, or when a zero crossing of q' fell exactly on a span boundary.
                mem.push(q, d_new)
                n_events += 1
                log.append((t_cur, "reversal", mem.depth))
            # Closure or slip onset already reached at the restart (events at the very start).
            tgt = mem.target()
            if tgt is not None and mem.top.d * (q - tgt) >= 0.0:
                mem.pop(q)
                n_events += 1
                log.append((t_cur, "closure", mem.depth))
                continue
            L = mem.top
            if not L.slip and L.d * (q - L.u) >= L.s * iw.phimax:
                L.slip = True

            # Events of this branch.  Sign conventions make each g < 0 (or g = 0 and moving away)
            # at the start, so an event cannot re-trigger at the restart point.
            d = L.d
            slip = L.slip
            events = []

            def ev_rev(tt, yy, d=d):
                return d * yy[1]
            ev_rev.terminal = True
            ev_rev.direction = -1.0
            events.append(("reversal", ev_rev))
            if tgt is not None:
                def ev_close(tt, yy, d=d, tgt=tgt):
                    return d * (yy[0] - tgt)
                ev_close.terminal = True
                ev_close.direction = 1.0
                events.append(("closure", ev_close))
            if not slip:
                u_on = mem.onset()

                def ev_slip(tt, yy, d=d, u_on=u_on):
                    return d * (yy[0] - u_on)
                ev_slip.terminal = True
                ev_slip.direction = 1.0
                events.append(("slip", ev_slip))

            uR, FR, sR = L.u, L.F, L.s
            Kt_, R_, chi2 = iw.Kt, iw.R, iw.chi + 2.0
            cR = R_ / ((iw.chi + 1.0) * chi2)
            Fslip = FR + sR * d * iw.Fs

            if slip:
                def rhs(tt, yy):
                    v_ = yy[1]
                    return [v_, pk - c * v_ - kinf * yy[0] - Fslip, pk * v_, c * v_ * v_, Fslip * v_]
            else:
                def rhs(tt, yy):
                    q_, v_ = yy[0], yy[1]
                    x = (q_ - uR) / sR
                    ax = abs(x)
                    fb = Kt_ * ax - cR * ax ** chi2
                    F = FR + sR * (fb if x >= 0.0 else -fb)
                    return [v_, pk - c * v_ - kinf * q_ - F, pk * v_, c * v_ * v_, F * v_]

            sol = solve_ivp(rhs, (t_cur, t_end), y, method="DOP853", rtol=rtol, atol=atol_v,
                            events=[e for _, e in events], dense_output=True)
            if sol.status < 0:
                raise SimulationError(f"reference integration failed at t = {t_cur!r}: {sol.message}")
            t_reach = float(sol.t[-1])
            if sol.status == 1:
                # The earliest event (several can be recorded in the last step; it stopped at one).
                cand = [(float(te[0]), i) for i, te in enumerate(sol.t_events) if te.size]
                t_ev, i_ev = min(cand)
                kind = events[i_ev][0]
                y_ev = sol.y_events[i_ev][0].copy()
                t_reach = t_ev
            y_stop = y_ev if sol.status == 1 else sol.y[:, -1]
            # Outputs inside (t_cur, t_reach] from the dense output of this piece.
            while next_out <= j and t[next_out] <= t_reach:
                yk = y_stop if t[next_out] == t_reach else sol.sol(t[next_out])
                F = mem.force(float(yk[0]), slip)
                D = mem.dissipation(float(yk[0]))
                record(next_out, yk, F, D)
                next_out += 1
            if sol.status == 0:
                y = sol.y[:, -1].copy()
                break
            # A terminal event: update the memory and restart.
            stall = stall + 1 if t_reach - t_cur <= 4 * np.finfo(float).eps * max(1.0, abs(t_cur)) else 0
            if stall > 50:
                raise SimulationError(f"reference integration makes no progress at t = {t_cur!r} "
                                      f"(repeated {kind} events)")
            y = y_ev
            if t_reach > t_cur:
                spins = 0
            t_cur = t_reach
            n_events += 1
            if kind == "reversal":
                y[1] = 0.0  # exact by definition of the event
                n_events -= 1  # counted when pushed at the restart
            elif kind == "closure":
                mem.pop(float(y[0]))
                log.append((t_cur, "closure", mem.depth))
            else:
                mem.top.slip = True
                log.append((t_cur, "slip", mem.depth))
            if t_cur >= t_end:
                break
        k = j

    out["t"] = t.copy()
    out["n_events"] = int(n_events)
    return out, mem, log


def simulate_mode(f0, zeta, Fs, Kt, chi, beta, t, p, q0=0.0, v0=0.0, rtol=1e-11, atol=None) -> dict:
    """Reference response of one mode with a four-parameter Iwan joint, under held modal force.

    Parameters
    ----------
    f0 : float
        Low-amplitude natural frequency (Hz); omega0 = 2 pi f0 (rad/s).
    zeta : float
        Viscous damping ratio, applied with the low-amplitude omega0 (c = 2 zeta omega0).
    Fs, Kt, chi, beta : float
        Four-parameter Iwan joint (Segalman 2005): slip force (modal force), joint stiffness
        (1/s^2 in mass-normalized coordinates, Kt <= omega0^2), exponent (> -1), beta (>= 0).
    t : (M,) array_like
        Strictly increasing communication times (s); t[0] is the start.
    p : (M-1,) or (M,) array_like
        Modal force held on each [t_k, t_{k+1}) (the last value of an (M,) array is ignored).
    q0, v0 : float
        Initial modal displacement and velocity.  The joint is taken as loaded monotonically from 0
        to q0 (on the virgin curve, last moving in the direction sign(q0)).
    rtol : float
        Relative tolerance of DOP853.
    atol : float, optional
        Absolute tolerance on q (modal displacement); the default is 1e-13 times a characteristic
        amplitude max(|q0|, |v0|/omega0, max|p|/omega0^2).  Velocity and energies are scaled to it.

    Returns
    -------
    dict
        (M,) arrays ``t``, ``q``, ``qdot``, ``qddot`` (with the input p_k held from t_k onward; the
        last point uses p_{M-2}), ``joint_force``, ``e_input`` (integral p q' dt), ``e_viscous``
        (integral c q'^2 dt), ``e_joint_work`` (integral F_J q' dt, work done on the joint),
        ``e_joint_dissipation`` (closed-form slider dissipation, physics sheet sec. 4 per branch);
        and ``n_events`` (int, reversals + closures + macro-slip onsets).
    """
    out, _, _ = _run_mode(f0, zeta, Fs, Kt, chi, beta, t, p, q0, v0, rtol, atol)
    return out


def _get(obj: Any, name: str):
    if isinstance(obj, dict):
        return obj[name]
    return getattr(obj, name)


def simulate(params, t, modal_force, q0=None, v0=None, rtol=1e-11) -> dict:
    """Reference response of all modes of a parameter set (modes are uncoupled).

    Parameters
    ----------
    params : ParameterSet
        Anything with ``.modes[i].f0``, ``.zeta`` and ``.joint.Fs/.Kt/.chi/.beta`` (duck-typed;
        dicts with the same keys are accepted too).
    t : (M,) array_like
        Communication times (s).
    modal_force : (M-1, N) or (M, N) array_like
        Held modal forces.
    q0, v0 : (N,) array_like, optional
        Initial modal displacements and velocities (default zero).
    rtol : float
        Relative tolerance of DOP853.

    Returns
    -------
    dict
        (M, N) arrays with the keys of :func:`simulate_mode`; ``n_events`` is an (N,) int array.
    """
    modes = list(_get(params, "modes"))
    N = len(modes)
    t = _as_times(t)
    M = t.size
    f = np.asarray(modal_force, dtype=float)
    if f.ndim == 1 and N == 1:
        f = f[:, None]
    if f.ndim != 2 or f.shape[0] not in (M - 1, M) or f.shape[1] != N:
        raise InputError(f"modal_force must have shape ({M - 1}, {N}) or ({M}, {N}) for {M} times "
                         f"and {N} modes, got shape {f.shape}")

    def vec(x, name):
        if x is None:
            return np.zeros(N)
        x = np.asarray(x, dtype=float).reshape(-1)
        if x.shape != (N,):
            raise InputError(f"{name} must have shape ({N},) (one value per mode), got {x.shape}")
        return x

    q0 = vec(q0, "q0")
    v0 = vec(v0, "v0")
    res = None
    for i, m in enumerate(modes):
        j = _get(m, "joint")
        o, _, _ = _run_mode(_get(m, "f0"), _get(m, "zeta"), _get(j, "Fs"), _get(j, "Kt"),
                            _get(j, "chi"), _get(j, "beta"), t, f[:, i], q0[i], v0[i], rtol,
                            _where=f"modes[{i}]")
        if res is None:
            res = {k: (np.empty((M, N)) if k != "n_events" else np.zeros(N, dtype=int)) for k in o}
        for key, val in o.items():
            if key == "n_events":
                res[key][i] = val
            else:
                res[key][:, i] = val
    return res
