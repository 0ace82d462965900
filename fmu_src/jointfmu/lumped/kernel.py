"""The per-step hot loop of a discrete-joint structure: coupled modes, every joint exact.

Plain scalar Python on NumPy arrays, written like :mod:`jointfmu.physics.kernel` so that Numba can
compile it unchanged (:mod:`.compiled`, which compiles this file together with the physics
kernel).  The joints are the physics kernel's own elements (``joint_move``: reversal stack,
Masing's rules with wiping-out, closed-form force, dissipation and stored energy; Segalman, J.
Appl. Mech. 72(5), 2005), each driven by the relative displacement u_j = b_j^T x of its DOFs.
:class:`.simulate.LumpedSimulator` owns the arrays.

The equations
-------------
In the stuck-joint modes (x = Phi q, Phi mass-normalized; :mod:`.modes`) the structure is

    q_i'' + 2 zeta_i w_i q_i' + w_i^2 q_i = sum_p P_pi f_p(t) - sum_j C_ji g_j,
    g_j = F_j(u_j; history) - K_T,j u_j,      u_j = sum_i C_ji q_i,

with w_i^2 holding every joint's K_T (the stuck stiffness), P_pi the shape of mode i at input
point p (with the point's sign), C_ji = b_j^T phi_i, and g_j the nonlinear remainder of joint j.
The damping is diagonal in these modes (modal ratios or Rayleigh), so the linear part is n
independent oscillators.

The step
--------
The same exponential integrator as the modal core (:mod:`jointfmu.physics.kernel`, after Cox and
Matthews, "Exponential time differencing for stiff systems", J. Comput. Phys. 176(2):430-455,
2002, sec. 2, with the history terms replaced by exact derivatives): each mode's linear part is
propagated exactly over the sub-step h (coefficients Phi, Gamma_0..2 from Van Loan's block
exponential), and its forcing p_i(t) = p0 + p1 t + p2 t^2/2 is expanded to second order about the
start of the step: the input force from its given value, rate and second derivative, each
joint's remainder from the joint's exact tangent k_t and curvature dk_t/du,

    g_j' = (k_t - K_T) u_j',    g_j'' = (dk_t/du) u_j'^2 + (k_t - K_T) u_j'',

with u_j' and u_j'' from the modal velocities and accelerations at the start of the step.  The
joints couple the modes only through this remainder.  Events inside a step, per joint:

* reversal (u_j' changes sign): the joint is moved through the extremum of u_j
  (constant-acceleration estimate) before the end point, so a reversal is located to third
  order in h (as in the modal core);
* onset of macro-slip on the branch (beta > 0: the tangent drops from S to 0): every mode gets
  the leading-order correction c_ji S v* (h - t*)^3/6 in q and c_ji S v* (h - t*)^2/2 in q'
  (``onset_crossing`` of the physics kernel gives t* and S v*), as in the modal core;
* closure of a hysteresis loop (wiping-out: the branch rejoins an older one whose tangent is
  smaller): the slope of g_j jumps by (k_out - k_in) u_j'(t_c); every mode gets the
  leading-order correction -c_ji dg' (h - t_c)^3/6 in q and -c_ji dg' (h - t_c)^2/2 in q'.
  A single mode in free decay never closes a loop, but the joints of a coupled structure see
  several frequencies at once and close small loops all the time (in a measured impact about
  one closure for every two reversals); without this correction the scheme was of second order
  (2e-5 of peak at 100 steps per period of the highest mode), with it of third order (2e-6).

Exact in the linear limit; third order in h measured on coupled structures (tests and README).
For one DOF with one joint it is the modal core's scheme exactly as long as no loop closes (free
decay); the modal core would gain from the closure correction under forcing with several
frequencies.

Energy (for the balance check): the viscous dissipation sum_i 2 zeta_i w_i int q_i'^2 dt and the
input work int f . v dt per step by Simpson's rule, with the mid-step velocity from the cubic
Hermite interpolant of each mode's (q, q') at the step's ends (fourth-order local error); the
joints' dissipation and stored energy come exact from the joint kernel.
"""
from __future__ import annotations

import math

from ..physics.kernel import (CLOSE_U, DEPTH, F_PREV, FS, KCURV, KT, KTAN, LOW, ONSET_HI, ONSET_LO,
                              SPOINT, U_PREV, joint_move, onset_crossing)

#: Functions a compiler should call rather than inline into the hot loop.
COLD = ("lumped_restore",)

# Columns of the per-joint statistics ``jstat`` (shape (J, 2)).
JS_MAXRATIO, JS_MACRO = 0, 1
# Entries of the energy sums ``en`` (shape (2,)).
EN_INPUT, EN_VISCOUS = 0, 1


def _track(j, jc, js, jstat):
    """Largest |F|/Fs seen by joint ``j``, and whether it was in macro-slip (tangent exactly 0)."""
    r = abs(js[j, F_PREV]) / jc[j, FS]
    if r > jstat[j, JS_MAXRATIO]:
        jstat[j, JS_MAXRATIO] = r
    if js[j, KTAN] == 0.0:
        jstat[j, JS_MACRO] = 1.0


def _segment(j, target, ta, tb, ua, va, vb, h, C, wm, jc, js, stk, bk):
    """Move joint ``j`` monotonically to ``target`` over the part [ta, tb] of a step of length h
    (from ``ua`` with velocity ``va`` to velocity ``vb``), correcting for each loop it closes.

    At a closure point u_c (wiping-out: the branch rejoins an older one) the tangent jumps from
    k_in (current branch) to k_out (the older branch), so the slope of the remainder g_j jumps by
    (k_out - k_in) u_j'(t_c), which the expansion from the step's start did not see.  Each mode
    gets the leading-order correction -c_ji dg' (h - t_c)^3/6 in q and -c_ji dg' (h - t_c)^2/2
    in q' (accumulated in ``wm[:, 6:8]``); t_c and u_j'(t_c) linear along the segment.  The
    joint is moved to u_c (no closure yet), just past it (the loop closes) and on to ``target``.
    Returns True when a correction was made.
    """
    n = C.shape[1]
    span = target - ua
    corrected = False
    if span != 0.0:
        dirn = 1.0 if span > 0.0 else -1.0
        eps = 1e-9 * abs(span)
        for _ in range(64):
            if js[j, DEPTH] == 0.0:
                break
            uc = js[j, CLOSE_U]
            if not ((target - uc) * dirn > eps and (uc - js[j, U_PREV]) * dirn >= 0.0):
                break
            joint_move(j, uc, jc, js, stk, bk)
            k_in = js[j, KTAN]
            joint_move(j, uc + dirn * eps, jc, js, stk, bk)
            k_out = js[j, KTAN]
            frac = (uc - ua) / span
            r = h - (ta + (tb - ta) * frac)
            dg1 = (k_out - k_in) * (va + (vb - va) * frac)
            dq = -dg1 * r * r * r / 6.0
            dv = -dg1 * r * r * 0.5
            for i in range(n):
                wm[i, 6] += C[j, i] * dq
                wm[i, 7] += C[j, i] * dv
            corrected = True
    joint_move(j, target, jc, js, stk, bk)
    return corrected


def lumped_substep(coef, md, C, P, fw, st, jc, js, stk, bk, wm, wj, en, peak, jstat):
    """One sub-step of every mode and joint (see the module docstring).

    Parameters
    ----------
    coef : ndarray, shape (N, 11)
        Per mode: Phi (row-major), Gamma0 (q, v), Gamma1 (q, v), Gamma2/2 (q, v), h.
    md : ndarray, shape (N, 2)
        Per mode: 2 zeta w [1/s] and w^2 [1/s^2].
    C : ndarray, shape (J, N)
        Joint couplings c_ji = b_j^T phi_i [1/sqrt(kg)].
    P : ndarray, shape (n_in, N)
        Mode shapes at the input points, signed [1/sqrt(kg)].
    fw : ndarray, shape (n_in, 3)
        Input force, its rate and second derivative at the start of this sub-step [N, N/s, N/s^2].
    st : ndarray, shape (N, 2)
        Modal displacement and velocity, updated in place.
    jc, js, stk, bk :
        Joint constants, joint state and reversal stacks of the physics kernel.
    wm, wj : ndarray, shapes (N, 8), (J, 8)
        Work space.
    en : ndarray, shape (2,)
        Input work and viscous dissipation sums [J], updated.
    peak : ndarray, shape (N,)
        Largest |q_i| seen, updated.
    jstat : ndarray, shape (J, 2)
        Per joint: largest |F|/Fs seen, 1.0 once in macro-slip; updated.
    """
    n = st.shape[0]
    nj = C.shape[0]
    ni = P.shape[0]
    h = coef[0, 10]
    # each joint at the start: u, u', remainder g and its rate
    for j in range(nj):
        ud = 0.0
        for i in range(n):
            ud += C[j, i] * st[i, 1]
        u = js[j, U_PREV]
        kt = jc[j, KT]
        wj[j, 0] = u
        wj[j, 1] = ud
        wj[j, 3] = js[j, F_PREV] - kt * u
        wj[j, 4] = (js[j, KTAN] - kt) * ud
    # modal forcing p0, p1 (p2 without the joints yet) and the modal acceleration at the start
    for i in range(n):
        s0 = 0.0
        s1 = 0.0
        s2 = 0.0
        for p in range(ni):
            s0 += P[p, i] * fw[p, 0]
            s1 += P[p, i] * fw[p, 1]
            s2 += P[p, i] * fw[p, 2]
        for j in range(nj):
            s0 -= C[j, i] * wj[j, 3]
            s1 -= C[j, i] * wj[j, 4]
        wm[i, 0] = s0
        wm[i, 1] = s1
        wm[i, 2] = s2
        wm[i, 3] = s0 - md[i, 0] * st[i, 1] - md[i, 1] * st[i, 0]
        wm[i, 6] = 0.0
        wm[i, 7] = 0.0
    # each joint's acceleration and the second derivative of its remainder
    for j in range(nj):
        ua = 0.0
        for i in range(n):
            ua += C[j, i] * wm[i, 3]
        wj[j, 2] = ua
        ud = wj[j, 1]
        g2 = js[j, KCURV] * ud * ud + (js[j, KTAN] - jc[j, KT]) * ua
        wj[j, 5] = g2
        for i in range(n):
            wm[i, 2] -= C[j, i] * g2
    # exact propagation of each mode's linear part under its quadratic forcing
    for i in range(n):
        q0 = st[i, 0]
        v0 = st[i, 1]
        wm[i, 4] = (coef[i, 0] * q0 + coef[i, 1] * v0 + coef[i, 4] * wm[i, 0]
                    + coef[i, 6] * wm[i, 1] + coef[i, 8] * wm[i, 2])
        wm[i, 5] = (coef[i, 2] * q0 + coef[i, 3] * v0 + coef[i, 5] * wm[i, 0]
                    + coef[i, 7] * wm[i, 1] + coef[i, 9] * wm[i, 2])
    # each joint at the end of the step (kept in wj[:, 6:8] unless a correction changes it)
    for j in range(nj):
        u1 = 0.0
        ud1 = 0.0
        for i in range(n):
            u1 += C[j, i] * wm[i, 4]
            ud1 += C[j, i] * wm[i, 5]
        wj[j, 6] = u1
        wj[j, 7] = ud1
    # onset of macro-slip inside the step (beta > 0): the slope of g_j drops by S v*
    corrected = False
    for j in range(nj):
        if jc[j, SPOINT] > 0.0:
            ud0 = wj[j, 1]
            u1 = wj[j, 6]
            ud1 = wj[j, 7]
            if ud0 * ud1 > 0.0:
                u0 = wj[j, 0]
                if ud0 > 0.0:
                    near = u0 < js[j, ONSET_HI] < u1
                else:
                    near = u1 < js[j, ONSET_LO] < u0
                if near:
                    r, jump = onset_crossing(j, u0, ud0, wj[j, 2], u1, h, jc, js)
                    if r >= 0.0:
                        dq = jump * r * r * r / 6.0
                        dv = jump * r * r * 0.5
                        for i in range(n):
                            wm[i, 6] += C[j, i] * dq
                            wm[i, 7] += C[j, i] * dv
                        corrected = True
    if corrected:
        for i in range(n):
            wm[i, 4] += wm[i, 6]
            wm[i, 5] += wm[i, 7]
        for j in range(nj):
            u1 = 0.0
            ud1 = 0.0
            for i in range(n):
                u1 += C[j, i] * wm[i, 4]
                ud1 += C[j, i] * wm[i, 5]
            wj[j, 6] = u1
            wj[j, 7] = ud1
    # energy sums: Simpson's rule with the Hermite mid-step velocity of each mode
    ev = 0.0
    for i in range(n):
        q0 = st[i, 0]
        v0 = st[i, 1]
        q1 = wm[i, 4]
        v1 = wm[i, 5]
        vm = 1.5 * (q1 - q0) / h - 0.25 * (v0 + v1)
        wm[i, 6] = vm
        ev += md[i, 0] * (v0 * v0 + 4.0 * vm * vm + v1 * v1)
    en[EN_VISCOUS] += ev * h / 6.0
    ew = 0.0
    for p in range(ni):
        f0 = fw[p, 0]
        fm = f0 + 0.5 * h * fw[p, 1] + 0.125 * h * h * fw[p, 2]
        f1 = f0 + h * fw[p, 1] + 0.5 * h * h * fw[p, 2]
        va = 0.0
        vm = 0.0
        vb = 0.0
        for i in range(n):
            va += P[p, i] * st[i, 1]
            vm += P[p, i] * wm[i, 6]
            vb += P[p, i] * wm[i, 5]
        ew += f0 * va + 4.0 * fm * vm + f1 * vb
    en[EN_INPUT] += ew * h / 6.0
    # every joint follows its path, through the extremum of u_j if u_j' changes sign; where the
    # path closes a hysteresis loop (wiping-out) the joint's tangent drops, and the modes get the
    # leading-order correction for that jump of g_j' (see _segment)
    for i in range(n):
        wm[i, 6] = 0.0
        wm[i, 7] = 0.0
    corrected = False
    for j in range(nj):
        u1 = wj[j, 6]
        ud1 = wj[j, 7]
        u0 = wj[j, 0]
        ud0 = wj[j, 1]
        if ud0 * ud1 < 0.0:
            ts = ud0 / (ud0 - ud1)
            ue = u0 + 0.5 * ud0 * ts * h
            if ud0 > 0.0:
                ue = max(ue, u0, u1)
            else:
                ue = min(ue, u0, u1)
            if _segment(j, ue, 0.0, ts * h, u0, ud0, 0.0, h, C, wm, jc, js, stk, bk):
                corrected = True
            _track(j, jc, js, jstat)
            if _segment(j, u1, ts * h, h, ue, 0.0, ud1, h, C, wm, jc, js, stk, bk):
                corrected = True
        elif _segment(j, u1, 0.0, h, u0, ud0, ud1, h, C, wm, jc, js, stk, bk):
            corrected = True
        _track(j, jc, js, jstat)
    if corrected:
        for i in range(n):
            wm[i, 4] += wm[i, 6]
            wm[i, 5] += wm[i, 7]
    # the new state
    for i in range(n):
        st[i, 0] = wm[i, 4]
        st[i, 1] = wm[i, 5]
        a = abs(wm[i, 4])
        if a > peak[i]:
            peak[i] = a


def lumped_advance(n_sub, coef, md, C, P, fin, st, jc, js, stk, bk, wm, wj, fw, en, peak, jstat):
    """Advance over one caller's step: ``n_sub`` equal sub-steps of ``coef[0, 10]``.

    ``fin`` (shape (n_in, 3)) is the input over the caller's step from its start: force
    F + F' t + F'' t^2/2, re-expanded at each sub-step.  Other arguments as
    :func:`lumped_substep`.  Returns the sum of the new q, q' and joint forces: finite exactly
    when the new state is (the caller's one check).
    """
    n = st.shape[0]
    nj = C.shape[0]
    ni = P.shape[0]
    h = coef[0, 10]
    for j in range(nj):
        js[j, LOW] = js[j, DEPTH]
    for k in range(n_sub):
        t = k * h
        for p in range(ni):
            fw[p, 0] = fin[p, 0] + t * fin[p, 1] + 0.5 * t * t * fin[p, 2]
            fw[p, 1] = fin[p, 1] + t * fin[p, 2]
            fw[p, 2] = fin[p, 2]
        lumped_substep(coef, md, C, P, fw, st, jc, js, stk, bk, wm, wj, en, peak, jstat)
    check = 0.0
    for i in range(n):
        check += st[i, 0] + st[i, 1]
    for j in range(nj):
        check += js[j, F_PREV]
    return check


def lumped_modal_acc(md, C, P, f, st, jc, js, acc):
    """Modal accelerations q'' with the input forces ``f`` (shape (n_in,)) now, into ``acc`` (N,)."""
    n = st.shape[0]
    nj = C.shape[0]
    ni = P.shape[0]
    for i in range(n):
        s = -md[i, 0] * st[i, 1] - md[i, 1] * st[i, 0]
        for p in range(ni):
            s += P[p, i] * f[p]
        for j in range(nj):
            s -= C[j, i] * (js[j, F_PREV] - jc[j, KT] * js[j, U_PREV])
        acc[i] = s


def lumped_restore(st, js, st_saved, js_saved, stk, bk):
    """Undo a caller's step: the state copied before it, and the stack entries it dropped
    (entries from the lowest depth the step reached up to the old depth, kept in ``bk`` by the
    joint kernel)."""
    for j in range(js.shape[0]):
        low = int(js[j, LOW])
        d0 = int(js_saved[j, DEPTH])
        for k in range(low, d0):
            stk[j, k, 0] = bk[j, k, 0]
            stk[j, k, 1] = bk[j, k, 1]
            stk[j, k, 2] = bk[j, k, 2]
        for c in range(js.shape[1]):
            js[j, c] = js_saved[j, c]
    for i in range(st.shape[0]):
        st[i, 0] = st_saved[i, 0]
        st[i, 1] = st_saved[i, 1]


def lumped_record(n_steps, n_sub, coef, md, C, P, fin, st, jc, js, stk, bk, wm, wj, fw, en, peak,
                  jstat, S, kind, out, st_saved, js_saved, en_saved):
    """``n_steps`` caller's steps with the same input, sensor values after each.

    ``S`` (shape (n_s, N)) maps modal motion to the sensors; ``kind`` 0, 1, 2: displacement,
    velocity, acceleration (with the input ``fin[:, 0]`` held at the step's end); ``out`` (shape
    (>= n_steps, n_s)) receives them.  Returns the number of steps done: fewer than ``n_steps``
    when a step gave a non-finite state, which is then undone (the state is that after the last
    good step).
    """
    n = st.shape[0]
    ns = S.shape[0]
    for k in range(n_steps):
        for i in range(n):
            st_saved[i, 0] = st[i, 0]
            st_saved[i, 1] = st[i, 1]
        for j in range(js.shape[0]):
            for c in range(js.shape[1]):
                js_saved[j, c] = js[j, c]
        en_saved[0] = en[0]
        en_saved[1] = en[1]
        check = lumped_advance(n_sub, coef, md, C, P, fin, st, jc, js, stk, bk, wm, wj, fw, en,
                               peak, jstat)
        if not math.isfinite(check):
            lumped_restore(st, js, st_saved, js_saved, stk, bk)
            en[0] = en_saved[0]
            en[1] = en_saved[1]
            return k
        if kind == 2:
            for p in range(fin.shape[0]):
                fw[p, 0] = fin[p, 0]
            lumped_modal_acc(md, C, P, fw[:, 0], st, jc, js, wm[:, 3])
        for s in range(ns):
            y = 0.0
            for i in range(n):
                if kind == 0:
                    y += S[s, i] * st[i, 0]
                elif kind == 1:
                    y += S[s, i] * st[i, 1]
                else:
                    y += S[s, i] * wm[i, 3]
            out[k, s] = y
    return n_steps
