"""The per-step hot loop: exact Iwan joint memory and the modal time step.

Everything here is plain scalar Python on NumPy arrays, written so that a compiler (Numba) can take
it unchanged: no Python objects, no allocation inside the loops.  ``integrate.py`` owns the arrays
and calls :func:`step_planned` (a whole step: :func:`step_all`, around :func:`advance`), which the
FMU's native binary also calls, compiled, without Python; ``iwan.py`` calls :func:`joint_move` for a
single joint.

Joint model
-----------
Segalman's four-parameter Iwan joint (D. J. Segalman, "A four-parameter Iwan model for lap-type
joints", J. Appl. Mech. 72(5):752-760, 2005) is a parallel array of Jenkins elements with the
power-law density rho(phi) = R phi^chi on (0, phimax) plus a point mass S at phimax.  It obeys
Masing's rules with wiping-out, so the force is evaluated in closed form from the virgin curve
(backbone) F_bb and a stack of reversal points (u_r, F_r):

    virgin curve       F = F_bb(u)
    after a reversal   F = F_r + 2 F_bb((u - u_r)/2)

(physics sheet, sec. 2-3: Masing branches hold exactly for this model; the extended rules delete
the pair (u_{n-1}, u_n) once u passes u_{n-1}, and the first reversal u_1 once u passes -u_1).

With x = |u - u_r| / c (c = 1 on the virgin curve, 2 on a Masing branch) and p = x^(chi+2):

    F_bb(x) = Kt x - R p / ((chi+1)(chi+2))                 x < phimax, else Fs
    tangent = Kt - R x^(chi+1) / (chi+1)                    x < phimax, else 0
    dissipation on the branch   c * Dv(x),  Dv(x) = R x p / ((chi+2)(chi+3)), beyond phimax
                                Dv(phimax) + Fs (x - phimax)
    stored energy, virgin       Uv(x) = Kt x^2 / 2 - R x p / ((chi+1)(chi+3)),  beyond phimax Uv(phimax)
    stored energy, Masing       U = U_r + (u - u_r)(F + F_r) / 2

The dissipation forms follow from each Jenkins element dissipating phi |dx| while it slips (the
per-cycle value 4 R A^(chi+3)/((chi+2)(chi+3)) is Segalman's closed form); the stored-energy forms
are derived here from U = int rho(phi) e_phi^2 / 2 dphi with the nested memory of Masing models.
One power per evaluation serves force, dissipation and energy.

Bounded memory.  Wiping-out removes closed loops.  A decaying oscillation still nests a new, smaller
loop every half cycle, so a pair of reversals is also dropped when the force error it would cause,
|F_top - F_alt(u_top)| with F_alt the branch two reversals down, is below ``merge_tol`` (an absolute
force, ``merge_tol_rel * Fs`` in :mod:`integrate`).  If the stack is full all the same, the interior
pair that matters least is dropped (see :func:`_forced_merge`), and counted as a forced merge.

Time step (per mode, mass-normalized)
-------------------------------------
    q'' + 2 zeta w0 q' + w0^2 q = f - g,    g = F_J(q) - Kt q

The linear part (with the full low-amplitude stiffness w0^2) is propagated exactly over the step
(exponential integrator); the held input f is constant over it, and g, the nonlinear remainder, is
expanded to second order about the start of the step with its derivatives known exactly from the
joint: g' = (k_t - Kt) q', g'' = (dk_t/du) q'^2 + (k_t - Kt) q''.  The step is then

    x1 = Phi x0 + Gamma0 (f - g) - Gamma1 g' - Gamma2 g''/2,   Gamma_j = int_0^h e^(A(h-s)) b s^j ds

an exponential Taylor (Lawson/ETD-type) scheme (S. M. Cox and P. C. Matthews, "Exponential time
differencing for stiff systems", J. Comput. Phys. 176(2):430-455, 2002, sec. 2, with the history
terms replaced by exact derivatives).  It is exact in the linear limit (g = 0), of third order
where g is smooth and of second order overall, since g'' jumps at each reversal and, for
beta > 0, g' jumps at the onset of macro-slip.  The joint sees the path through the step's end
points, with the displacement extremum inserted where the velocity changes sign inside the step
(constant-acceleration estimate), so reversals are located to third order in the step.
"""
from __future__ import annotations

import math

#: Functions taken rarely, which a compiler should call rather than inline into the hot loop.
COLD = ("_onset_correction", "onset_crossing", "undo")
#: Entry points called from outside the kernel, compiled once and called, not inlined, by the
#: C entry that wraps them (see compiled.py).
ENTRIES = ("step_planned",)

# Indices into the per-mode constant table ``jc`` (shape (N, NJC)).
# (CKC = -CK (E2 - 1), the factor of the tangent's slope, computed once.)
KT, FS, CHI, PHIMAX, CF, CD, CUV, CK, DVPM, UVPM, MERGE_TOL, E2, KINF, SPOINT, CKC = range(15)
NJC = 15

# Indices into the per-mode scalar joint state ``js`` (shape (N, NJS)).
# ROOT_U, ROOT_F, ROOT_E, ROOT_C: the current branch root (u_r, F_r, U_r, c), and CLOSE_U the
# point where the motion closes the innermost loop (wiping-out), both cached from the stack top by
# :func:`_set_root` whenever the stack changes, so the hot path does not read the stack.
# P_PREV: the power x^(chi+2) at U_PREV, from which :func:`_energies` brings E_PREV and D_PREV
# up to date when they are needed (the time step does not compute them at every sub-step).
(U_PREV, F_PREV, E_PREV, D_ACC, D_PREV, DIRN, DEPTH, N_MERGE, N_FORCED, LOW, KTAN, KCURV,
 ONSET_HI, ONSET_LO, ROOT_U, ROOT_F, ROOT_E, ROOT_C, CLOSE_U, P_PREV) = range(20)
NJS = 20

#: Largest magnitude accepted for an input (keeps every intermediate value finite).
MAX_INPUT = 1e12

# Indices into the simulator's ``clock`` (shape (2,)): the time [s], and 1.0 when the modal
# force and the outputs agree with the state and the inputs (0.0 otherwise).
CLOCK_T, CLOCK_FRESH = 0, 1

# What :func:`step_planned` returns.  STEP_NO_PLAN: no coefficients for this step size (the
# caller plans, then calls again); STEP_INPUT: an input is outside the allowed range; both leave
# everything as it was.  STEP_FAILED: the step gave a non-finite state and was undone.
STEP_DONE, STEP_NO_PLAN, STEP_INPUT, STEP_FAILED = 1, 0, 2, -1


def _branch(x, jc, i):
    """Backbone force, dissipation Dv, virgin stored energy Uv, tangent and its slope at ``x >= 0``.

    Returns ``(F_bb, Dv, Uv, k_t, dk_t/dx)`` for mode ``i``; one power evaluation.
    """
    fbb, kt, kc, p = _branch_force(x, jc, i)
    dv, uv = _branch_energy(x, p, jc, i)
    return fbb, dv, uv, kt, kc


def _branch_force(x, jc, i):
    """The force part of :func:`_branch`: ``(F_bb, k_t, dk_t/dx, p)`` with the power
    p = x^(chi+2) (0 where it is not needed, x = 0 or beyond phimax)."""
    if x < jc[i, PHIMAX]:
        if x > 0.0:
            p = math.pow(x, jc[i, E2])
            fbb = jc[i, KT] * x - jc[i, CF] * p
            r = 1.0 / x
            y = p * r  # x^(chi+1)
            kt = jc[i, KT] - jc[i, CK] * y
            kc = jc[i, CKC] * y * r  # CKC = -CK (E2 - 1)
            return fbb, kt, kc, p
        return 0.0, jc[i, KT], 0.0, 0.0
    return jc[i, FS], 0.0, 0.0, 0.0


def _branch_energy(x, p, jc, i):
    """The energy part of :func:`_branch`: ``(Dv, Uv)`` at ``x`` from the power ``p`` that
    :func:`_branch_force` returned there."""
    if x < jc[i, PHIMAX]:
        if x > 0.0:
            dv = jc[i, CD] * x * p
            uv = 0.5 * jc[i, KT] * x * x - jc[i, CUV] * x * p
            return dv, uv
        return 0.0, 0.0
    return jc[i, DVPM] + jc[i, FS] * (x - jc[i, PHIMAX]), jc[i, UVPM]


def _root(i, js):
    """Current branch root ``(u_r, F_r, U_r, c)``; (0, 0, 0, 1) on the virgin curve (cached in
    ``js`` by :func:`_set_root`)."""
    return js[i, ROOT_U], js[i, ROOT_F], js[i, ROOT_E], js[i, ROOT_C]


def _eval_at(i, u, jc, js):
    """Joint force, total dissipation, stored energy and tangent at ``u`` on the current branch.

    Also leaves the tangent and its slope d(k_t)/du there in ``js[i, KTAN]``, ``js[i, KCURV]``.
    """
    f, kt, p = _eval_force(i, u, jc, js)
    d, e = _eval_energy(i, u, f, p, jc, js)
    return f, d, e, kt


def _eval_force(i, u, jc, js):
    """The force part of :func:`_eval_at`: joint force, tangent and the power p at ``u``."""
    ur, fr, er, c = _root(i, js)
    du = u - ur
    half = c == 2.0
    x = abs(du) * 0.5 if half else abs(du)  # |du| / c, exactly
    fbb, kt, kc, p = _branch_force(x, jc, i)
    s = 1.0 if du >= 0.0 else -1.0
    f = fr + s * c * fbb
    js[i, KCURV] = kc * s * 0.5 if half else kc * s
    js[i, KTAN] = kt
    return f, kt, p


def _eval_energy(i, u, f, p, jc, js):
    """The energy part of :func:`_eval_at`: total dissipation and stored energy at ``u``, where
    :func:`_eval_force` gave the force ``f`` and the power ``p``."""
    ur, fr, er, c = _root(i, js)
    du = u - ur
    half = c == 2.0
    x = abs(du) * 0.5 if half else abs(du)
    dv, uv = _branch_energy(x, p, jc, i)
    d = js[i, D_ACC] + c * dv
    if half:
        e = er + 0.5 * du * (f + fr)
    else:
        e = uv
    return d, e


def _energies(i, jc, js):
    """Bring ``js[i, E_PREV]`` and ``js[i, D_PREV]`` up to date with the joint's position, force
    and power (the time step leaves them behind; see :func:`_move`)."""
    u = js[i, U_PREV]
    d, e = _eval_energy(i, u, js[i, F_PREV], js[i, P_PREV], jc, js)
    js[i, E_PREV] = e
    js[i, D_PREV] = d


def _backup_from(i, j0, js, stk, bk):
    """Copy stack entries from ``j0`` up to the lowest depth reached so far in this step to
    ``bk``, before they can be changed; ``js[i, LOW]`` then becomes ``j0`` (see _lower_depth)."""
    low = int(js[i, LOW])
    if j0 < low:
        for j in range(j0, low):
            bk[i, j, 0] = stk[i, j, 0]
            bk[i, j, 1] = stk[i, j, 1]
            bk[i, j, 2] = stk[i, j, 2]
        js[i, LOW] = j0


def _set_root(i, jc, js, stk):
    """Cache the branch root from the stack top after the stack changed: ``ROOT_U``, ``ROOT_F``,
    ``ROOT_E``, ``ROOT_C`` (see :func:`_root`); the closure point ``CLOSE_U`` of the innermost loop,
    u_{n-1} (or -u_1 with one reversal; unused on the virgin curve); and where the branch enters
    macro-slip, moving up (``ONSET_HI``) or down (``ONSET_LO``): u_r +- c phimax, so the time
    step can tell cheaply whether a step may cross it (see :func:`_onset_correction`)."""
    d = int(js[i, DEPTH])
    if d == 0:
        ur, fr, er, c = 0.0, 0.0, 0.0, 1.0
        js[i, CLOSE_U] = 0.0
    else:
        ur, fr, er, c = stk[i, d - 1, 0], stk[i, d - 1, 1], stk[i, d - 1, 2], 2.0
        js[i, CLOSE_U] = stk[i, d - 2, 0] if d >= 2 else -stk[i, 0, 0]
    js[i, ROOT_U] = ur
    js[i, ROOT_F] = fr
    js[i, ROOT_E] = er
    js[i, ROOT_C] = c
    js[i, ONSET_HI] = ur + c * jc[i, PHIMAX]
    js[i, ONSET_LO] = ur - c * jc[i, PHIMAX]


def _lower_depth(i, new_depth, u, d_total, jc, js, stk, bk):
    """Drop stack entries down to ``new_depth`` and keep the dissipation continuous at ``u``.

    Entries are never erased, only left above the depth; before any entry that was live at the
    start of the step can be overwritten by a later push it is copied to ``bk``, so a failed step
    can be undone exactly (``js[i, LOW]`` is the lowest depth reached in this step).
    """
    _backup_from(i, new_depth, js, stk, bk)
    js[i, DEPTH] = new_depth
    _set_root(i, jc, js, stk)
    ur, fr, er, c = _root(i, js)
    x = abs(u - ur) / c
    fbb, dv, uv, kt, kc = _branch(x, jc, i)
    js[i, D_ACC] = d_total - c * dv


def _forced_merge(i, jc, js, stk, bk):
    """Drop the interior reversal pair that matters least (the stack is full).

    Removing the pair (u_k, u_k+1), 1 <= k <= depth - 3, leaves the current branch and force as
    they are.  Only if the motion later wipes out the loops above it does the joint return to the
    branch from u_k-1 instead of u_k+1, and its force then jumps by
    e_k = |F_k-1 + 2 F_bb((u_k+2 - u_k-1)/2) - F_k+2|; the pair with the smallest e_k goes.
    """
    depth = int(js[i, DEPTH])
    best = 1
    best_err = -1.0
    for k in range(1, depth - 2):
        du = stk[i, k + 2, 0] - stk[i, k - 1, 0]
        fbb, dv, uv, kt, kc = _branch(abs(du) * 0.5, jc, i)
        err = abs(stk[i, k - 1, 1] + (2.0 if du >= 0.0 else -2.0) * fbb - stk[i, k + 2, 1])
        if best_err < 0.0 or err < best_err:
            best_err = err
            best = k
    _backup_from(i, best, js, stk, bk)
    for j in range(best, depth - 2):
        stk[i, j, 0] = stk[i, j + 2, 0]
        stk[i, j, 1] = stk[i, j + 2, 1]
        stk[i, j, 2] = stk[i, j + 2, 2]
    js[i, DEPTH] = depth - 2.0


def _reverse(i, u0, jc, js, stk, bk):
    """Push the reversal at ``u0`` (the joint's last position) onto the stack of joint ``i``;
    then drop the pair (u_{n-1}, u_n) if the loop it closes is too small to matter."""
    _energies(i, jc, js)
    cap = stk.shape[1]
    depth = int(js[i, DEPTH])
    if depth >= cap:
        # full: drop the interior pair that matters least (counted; see module docstring)
        _forced_merge(i, jc, js, stk, bk)
        js[i, N_FORCED] += 1.0
        depth -= 2
    stk[i, depth, 0] = u0
    stk[i, depth, 1] = js[i, F_PREV]
    stk[i, depth, 2] = js[i, E_PREV]
    js[i, DEPTH] = depth + 1.0
    _set_root(i, jc, js, stk)
    js[i, D_ACC] = js[i, D_PREV]
    # a loop too small to matter: drop the pair (u_{n-1}, u_n) if the branch from u_{n-2}
    # passes within merge_tol of F_n at u_n
    if depth >= 2:
        ur = stk[i, depth - 2, 0]
        du2 = u0 - ur
        fbb, dv, uv, kt, kc = _branch(abs(du2) * 0.5, jc, i)
        falt = stk[i, depth - 2, 1] + (2.0 if du2 >= 0.0 else -2.0) * fbb
        if abs(falt - js[i, F_PREV]) <= jc[i, MERGE_TOL]:
            _lower_depth(i, depth - 1, u0, js[i, D_PREV], jc, js, stk, bk)
            js[i, N_MERGE] += 1.0


def joint_move(i, u, jc, js, stk, bk):
    """Move joint ``i`` monotonically from ``js[i, U_PREV]`` to ``u``; update its memory.

    Parameters
    ----------
    i : int
        Mode (joint) index.
    u : float
        New joint displacement (modal coordinate).
    jc : ndarray, shape (N, NJC)
        Joint constants.
    js : ndarray, shape (N, NJS)
        Scalar joint state, updated in place.
    stk : ndarray, shape (N, capacity, 3)
        Reversal stack: displacement, force and stored energy at each reversal.
    bk : ndarray, shape (N, capacity, 3)
        Backup of stack entries a step has dropped (see :func:`_lower_depth`).

    Returns
    -------
    tangent : float
        Tangent stiffness dF/du at ``u``.
    """
    kt = _move(i, u, jc, js, stk, bk)
    _energies(i, jc, js)
    return kt


def _move(i, u, jc, js, stk, bk):
    """:func:`joint_move` without bringing ``E_PREV`` and ``D_PREV`` up to date (the time step
    calls :func:`_energies` once at the end of its step instead)."""
    u0 = js[i, U_PREV]
    step = u - u0
    if step == 0.0:
        f, kt, p = _eval_force(i, u, jc, js)
        return kt
    dnew = 1.0 if step > 0.0 else -1.0
    dirn = js[i, DIRN]
    if dirn != 0.0 and dnew != dirn:
        _reverse(i, u0, jc, js, stk, bk)
    js[i, DIRN] = dnew
    # wiping-out: pop every loop the motion has closed (closure point u_{n-1}, or -u_1)
    while js[i, DEPTH] != 0.0 and not (u - js[i, CLOSE_U]) * dnew <= 0.0:
        uc = js[i, CLOSE_U]
        depth = int(js[i, DEPTH])
        # dissipation at the closure point on the branch that closes
        f, d, e, kt = _eval_at(i, uc, jc, js)
        _lower_depth(i, depth - 2 if depth >= 2 else 0, uc, d, jc, js, stk, bk)
    f, kt, p = _eval_force(i, u, jc, js)
    js[i, U_PREV] = u
    js[i, F_PREV] = f
    js[i, P_PREV] = p
    return kt


def joint_set_virgin(i, u, jc, js):
    """Put joint ``i`` on its virgin curve at ``u``, reached by monotone loading from 0.

    The dissipation counter starts at zero here (the loading is before the record starts).
    """
    x = abs(u)
    fbb, kt, kc, p = _branch_force(x, jc, i)
    dv, uv = _branch_energy(x, p, jc, i)
    s = 1.0 if u >= 0.0 else -1.0
    js[i, P_PREV] = p
    js[i, U_PREV] = u
    js[i, F_PREV] = s * fbb
    js[i, E_PREV] = uv
    js[i, D_ACC] = -dv
    js[i, D_PREV] = 0.0
    js[i, DIRN] = 0.0 if u == 0.0 else s
    js[i, DEPTH] = 0.0
    js[i, KTAN] = kt
    js[i, KCURV] = kc * s
    js[i, ONSET_HI] = jc[i, PHIMAX]
    js[i, ONSET_LO] = -jc[i, PHIMAX]
    js[i, ROOT_U] = 0.0
    js[i, ROOT_F] = 0.0
    js[i, ROOT_E] = 0.0
    js[i, ROOT_C] = 1.0
    js[i, CLOSE_U] = 0.0


def onset_crossing(i, q0, v0, a0, q1, h, jc, js):
    """Where a step of joint ``i``'s coordinate crosses the onset of macro-slip on its branch.

    The step goes from ``q0`` (velocity ``v0``, acceleration ``a0``) to ``q1`` in time ``h``,
    without a velocity reversal.  At the onset the joint's tangent drops from S (the point mass
    of the density at phimax, beta > 0) to 0.

    Returns
    -------
    r : float
        Time left in the step after the crossing, h - tau*; -1.0 when the step does not cross
        the onset (it starts beyond it, moves away from it, or the branch closes before it).
    jump : float
        S v*, with v* the velocity at the crossing: the drop of the slope of the joint force
        there (0.0 when there is no crossing).
    """
    dirn = 1.0 if v0 > 0.0 else -1.0
    ur, fr, er, c = _root(i, js)
    x0 = abs(q0 - ur) * (0.5 if c == 2.0 else 1.0)  # |q0 - ur| / c, exactly
    if x0 >= jc[i, PHIMAX] or (q0 - ur) * dirn < 0.0:
        return -1.0, 0.0
    us = ur + dirn * c * jc[i, PHIMAX]
    if (q1 - us) * dirn <= 0.0:
        return -1.0, 0.0
    if js[i, DEPTH] != 0.0:
        uc = js[i, CLOSE_U]
        if (us - uc) * dirn > 0.0:
            return -1.0, 0.0  # the branch closes before its onset
    # crossing time from q0 + v0 t + a0 t^2 / 2 = us (root nearest 0 in [0, h])
    d = us - q0
    disc = v0 * v0 + 2.0 * a0 * d
    if a0 != 0.0 and disc >= 0.0:
        ts = 2.0 * d / (v0 + dirn * math.sqrt(disc))
    else:
        ts = d / v0
    if ts < 0.0:
        ts = 0.0
    if ts > h:
        ts = h
    vs = v0 + a0 * ts
    return h - ts, jc[i, SPOINT] * vs


def _onset_correction(i, q0, v0, a0, q1, h, jc, js, stk):
    """Correct a step that crosses the onset of macro-slip on the current branch (beta > 0).

    There the joint's tangent drops from S (the point mass of the density) to 0, a jump in g'
    that the Taylor expansion of the step cannot see.  With tau* the crossing time and v* the
    velocity there (:func:`onset_crossing`), the forcing gains S v* (t - tau*) after it, which
    adds S v* (h - tau*)^2 / 2 to the velocity and S v* (h - tau*)^3 / 6 to the displacement
    (leading terms).  Returns the corrected displacement and the velocity change.
    """
    r, jump = onset_crossing(i, q0, v0, a0, q1, h, jc, js)
    if r < 0.0:
        return q1, 0.0
    return q1 + jump * r * r * r / 6.0, jump * r * r * 0.5


def _substep(i, q0, v0, e_in, e_visc, fi, cv, coef, jc, js, stk, bk):
    """One sub-step of mode ``i`` from ``(q0, v0)`` (see :func:`advance` and the module
    docstring); returns the new ``q, qdot`` and the energy input and viscous energy sums."""
    h = coef[i, 10]
    kt = jc[i, KT]
    fj = js[i, F_PREV]
    kt0 = js[i, KTAN] - kt
    g0 = fj - kt * q0
    a0 = fi - cv * v0 - jc[i, KINF] * q0 - fj
    g1 = kt0 * v0
    g2 = js[i, KCURV] * v0 * v0 + kt0 * a0
    p0 = fi - g0
    q1 = coef[i, 0] * q0 + coef[i, 1] * v0 + coef[i, 4] * p0 - coef[i, 6] * g1 - coef[i, 8] * g2
    v1 = coef[i, 2] * q0 + coef[i, 3] * v0 + coef[i, 5] * p0 - coef[i, 7] * g1 - coef[i, 9] * g2
    if jc[i, SPOINT] > 0.0 and v0 * v1 > 0.0:
        # cheap necessary condition first: the step passes the branch's onset point
        if v0 > 0.0:
            near = q0 < js[i, ONSET_HI] < q1
        else:
            near = q1 < js[i, ONSET_LO] < q0
        if near:
            q1, dv = _onset_correction(i, q0, v0, a0, q1, h, jc, js, stk)
            v1 += dv
    if v0 * v1 < 0.0:
        # velocity reversal inside the step: insert the displacement extremum
        ts = v0 / (v0 - v1)
        ue = q0 + 0.5 * v0 * ts * h
        if v0 > 0.0:
            ue = max(ue, q0, q1)
        else:
            ue = min(ue, q0, q1)
        _move(i, ue, jc, js, stk, bk)
    _move(i, q1, jc, js, stk, bk)
    e_in += fi * (q1 - q0)
    e_visc += cv * h * 0.5 * (v0 * v0 + v1 * v1)
    return q1, v1, e_in, e_visc


def advance(n_sub, coef, f, st, jc, js, stk, bk):
    """Advance every mode over one caller's step, mode i by ``n_sub[i]`` equal sub-steps.

    Parameters
    ----------
    n_sub : ndarray of int64, shape (N,)
        Sub-steps per mode (each mode's step is chosen from its own frequency).
    coef : ndarray, shape (N, 11)
        Per mode: Phi (2x2, row-major: 4), Gamma0 (q, v), Gamma1 (q, v), Gamma2/2 (q, v), h.
    f : ndarray, shape (N,)
        Held modal force over the step [N/sqrt(kg) = sqrt(kg) m/s^2].
    st : ndarray, shape (N, 6)
        Per mode: q, qdot, (spare), energy in, viscous energy, c = 2 zeta w0.
    jc, js, stk, bk :
        Joint constants, joint state and reversal stacks (see :func:`joint_move`).

    Returns
    -------
    float
        Sum of the final q, qdot and joint force of all modes: finite exactly when the new state
        is (the caller's one check), otherwise the caller restores its copy of the state.

    Notes
    -----
    The modes are independent.  They run in pairs, (0, 1), (2, 3), ..., one sub-step of each
    in turn (the rest of the one with more sub-steps after), so that the processor can overlap
    the two modes' work; each mode's state and sums stay in local variables meanwhile.  Measured
    on the benchmark set: pairs 3-8 % faster than one mode at a time, which is 2-17 % faster
    than interleaving all modes sub-step by sub-step.  The joints' stored energy and dissipation
    (``E_PREV``, ``D_PREV``) are brought up to date once, at the end (see :func:`_energies`).
    """
    n_modes = st.shape[0]
    for i in range(n_modes):
        js[i, LOW] = js[i, DEPTH]
    for a in range(0, n_modes, 2):
        b = a + 1 if a + 1 < n_modes else a
        fa, ca, fb, cb = f[a], st[a, 5], f[b], st[b, 5]
        qa, va, ia, wa = st[a, 0], st[a, 1], st[a, 3], st[a, 4]
        qb, vb, ib, wb = st[b, 0], st[b, 1], st[b, 3], st[b, 4]
        na = n_sub[a]
        nb = n_sub[b] if b != a else 0
        n = na if na < nb else nb
        for k in range(n):
            qa, va, ia, wa = _substep(a, qa, va, ia, wa, fa, ca, coef, jc, js, stk, bk)
            qb, vb, ib, wb = _substep(b, qb, vb, ib, wb, fb, cb, coef, jc, js, stk, bk)
        for k in range(n, na):
            qa, va, ia, wa = _substep(a, qa, va, ia, wa, fa, ca, coef, jc, js, stk, bk)
        for k in range(n, nb):
            qb, vb, ib, wb = _substep(b, qb, vb, ib, wb, fb, cb, coef, jc, js, stk, bk)
        st[a, 0], st[a, 1], st[a, 3], st[a, 4] = qa, va, ia, wa
        if b != a:
            st[b, 0], st[b, 1], st[b, 3], st[b, 4] = qb, vb, ib, wb
    check = 0.0
    for i in range(n_modes):
        _energies(i, jc, js)
        check += st[i, 0] + st[i, 1] + js[i, F_PREV]
    return check


# Layout of the output vector ``y`` filled by :func:`outputs` (N modes, n_out output points):
#   q (N), qdot (N), joint force (N), qddot (N), point x (n_out), v (n_out), a (n_out),
#   base force, energy input, energy viscous, energy joint (dissipated), joint stored energy.
Y_TAIL = 5


def modal_inputs(u, mp, f):
    """Held modal force from the input vector (modal.py gives the mapping and its sources).

    ``u`` = [point forces (n_in), direct modal forces (N), base acceleration];
    ``mp`` rows 0..n_in-1 and n_in..n_in+n_out-1 are the input and output points (mode shapes in
    columns 0..N-1, base factor r in column N), its last row the base participation factors
    (columns 0..N-1) and the total mass (column N).
    f_i = sum_p phi_pi F_p + f_mod,i - Gamma_i a_b.
    """
    n_modes = f.shape[0]
    n_in = u.shape[0] - n_modes - 1
    last = mp.shape[0] - 1
    a = u[n_in + n_modes]
    for i in range(n_modes):
        s = u[n_in + i] - mp[last, i] * a
        for p in range(n_in):
            s += mp[p, i] * u[p]
        f[i] = s


def outputs(u, mp, st, jc, js, f, y):
    """Fill ``y`` (layout above) from the state and the held input; see modal.py for the physics.

    Point x and v are relative to the base, a is absolute; the base force is the force the
    structure exerts on its mounting, sum_p r_p F_p - M a_b - sum_i Gamma_i q_i''.
    """
    n_modes = f.shape[0]
    n_in = u.shape[0] - n_modes - 1
    last = mp.shape[0] - 1
    n_out = last - n_in
    a = u[n_in + n_modes]
    base = -mp[last, n_modes] * a
    for p in range(n_in):
        base += mp[p, n_modes] * u[p]
    e_in = 0.0
    e_visc = 0.0
    e_joint = 0.0
    e_stored = 0.0
    for i in range(n_modes):
        q = st[i, 0]
        v = st[i, 1]
        fj = js[i, F_PREV]
        acc = f[i] - st[i, 5] * v - jc[i, KINF] * q - fj
        y[i] = q
        y[n_modes + i] = v
        y[2 * n_modes + i] = fj
        y[3 * n_modes + i] = acc
        base -= mp[last, i] * acc
        e_in += st[i, 3]
        e_visc += st[i, 4]
        e_joint += js[i, D_PREV]
        e_stored += js[i, E_PREV]
    o = 4 * n_modes
    for k in range(n_out):
        row = n_in + k
        x = 0.0
        vv = 0.0
        aa = mp[row, n_modes] * a
        for i in range(n_modes):
            x += mp[row, i] * y[i]
            vv += mp[row, i] * y[n_modes + i]
            aa += mp[row, i] * y[3 * n_modes + i]
        y[o + k] = x
        y[o + n_out + k] = vv
        y[o + 2 * n_out + k] = aa
    t = o + 3 * n_out
    y[t] = base
    y[t + 1] = e_in
    y[t + 2] = e_visc
    y[t + 3] = e_joint
    y[t + 4] = e_stored


def step_all(n_sub, coef, u, mp, st, jc, js, stk, bk, f, y, st_saved, js_saved):
    """One caller's step: modal force from the inputs, :func:`advance`, then the outputs.

    ``st`` and ``js`` are first copied to ``st_saved`` and ``js_saved`` (with ``bk``, what the
    caller needs to undo the step).  Returns the finiteness check value of :func:`advance`.
    """
    for i in range(st.shape[0]):
        for j in range(st.shape[1]):
            st_saved[i, j] = st[i, j]
        for j in range(js.shape[1]):
            js_saved[i, j] = js[i, j]
    modal_inputs(u, mp, f)
    check = advance(n_sub, coef, f, st, jc, js, stk, bk)
    outputs(u, mp, st, jc, js, f, y)
    return check


def refresh(u, mp, st, jc, js, f, y):
    """Modal force and outputs after the inputs changed (no time passes)."""
    modal_inputs(u, mp, f)
    outputs(u, mp, st, jc, js, f, y)


def undo(st, js, stk, bk, st_saved, js_saved):
    """Put back the state from before the last :func:`step_all`: ``st`` and ``js`` from their
    copies, and the stack entries the step dropped (from ``js[i, LOW]`` up to the depth it
    started at) from the backup ``bk`` (see :func:`_lower_depth`)."""
    for i in range(st.shape[0]):
        low, d0 = int(js[i, LOW]), int(js_saved[i, DEPTH])
        for j in range(low, d0):
            stk[i, j, 0] = bk[i, j, 0]
            stk[i, j, 1] = bk[i, j, 1]
            stk[i, j, 2] = bk[i, j, 2]
        for j in range(st.shape[1]):
            st[i, j] = st_saved[i, j]
        for j in range(js.shape[1]):
            js[i, j] = js_saved[i, j]


def inputs_allowed(u, has_base):
    """True when every held input is finite with magnitude <= MAX_INPUT, and the base
    acceleration (the last input) is 0 on a structure without a base mounting."""
    for k in range(u.shape[0]):
        x = u[k]
        if not (-MAX_INPUT <= x <= MAX_INPUT):   # also NaN
            return False
    return has_base != 0 or u[u.shape[0] - 1] == 0.0


def step_planned(dt, has_base, plan_dt, plan_nsub, plan_coef, clock, u, mp, st, jc, js, stk, bk,
                 f, y, st_saved, js_saved):
    """One caller's step of ``dt`` seconds with a plan made before: the whole of a step that
    needs no Python, for the simulator and for the FMU's binary alike.

    Parameters
    ----------
    dt : float
        The step [s]; it runs only when ``0 < dt < inf`` and ``plan_dt`` holds it exactly.
    has_base : int
        1 when the structure has a base mounting (its base acceleration may be non-zero).
    plan_dt : ndarray, shape (P,)
        Step sizes planned so far (NaN: a free slot).
    plan_nsub : ndarray of int64, shape (P, N)
        Sub-steps per mode for each planned step size (see :func:`advance`).
    plan_coef : ndarray, shape (P, N, 11)
        Step coefficients for each planned step size (see :func:`advance`).
    clock : ndarray, shape (2,)
        Time [s] and the outputs-current flag (``CLOCK_T``, ``CLOCK_FRESH``).
    u, mp, st, jc, js, stk, bk, f, y, st_saved, js_saved :
        As :func:`step_all`.

    Returns
    -------
    int
        ``STEP_DONE``: stepped, the time advanced by ``dt``, the outputs current.
        ``STEP_NO_PLAN`` (no plan for ``dt``) or ``STEP_INPUT`` (an input out of range, see
        :func:`inputs_allowed`): nothing changed.  ``STEP_FAILED``: the new state was not
        finite; the state is back as it was (:func:`undo`) and the outputs are not current.
    """
    if not 0.0 < dt < math.inf:
        return STEP_NO_PLAN
    slot = -1
    for k in range(plan_dt.shape[0]):
        if plan_dt[k] == dt:
            slot = k
            break
    if slot < 0:
        return STEP_NO_PLAN
    if not inputs_allowed(u, has_base):
        return STEP_INPUT
    check = step_all(plan_nsub[slot], plan_coef[slot], u, mp, st, jc, js, stk, bk, f, y,
                     st_saved, js_saved)
    if not math.isfinite(check):
        undo(st, js, stk, bk, st_saved, js_saved)
        clock[CLOCK_FRESH] = 0.0
        return STEP_FAILED
    clock[CLOCK_FRESH] = 1.0
    clock[CLOCK_T] += dt
    return STEP_DONE
