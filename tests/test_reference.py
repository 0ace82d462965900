"""Tests of the SciPy reference integration (fmu_src/jointfmu/reference.py).

Each check names its source.  The joint is checked on its own (prescribed paths) against Segalman's
closed-form dissipation and against an independent stop-operator replay; the integration against
exact linear solutions, energy balance and self-convergence.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad

from jointfmu.physics import reference as ref
from jointfmu.errors import InputError, ParameterError

F0 = 100.0                      # Hz, invented demo mode
W0 = 2 * math.pi * F0
KT = 0.3 * W0 ** 2              # joint carries 30 % of the low-amplitude stiffness
FS = 2.0                        # modal slip force
ZETA = 0.01


def consts(chi, beta, Fs=FS, Kt=KT):
    return ref._check_mode_params(F0, ZETA, Fs, Kt, chi, beta)


def D_closed(iw, A):
    """Dissipation per cycle of amplitude A.

    Segalman, "A four-parameter Iwan model for lap-type joints", J. Appl. Mech. 72(5), 2005
    (physics sheet sec. 4): 4 R A^(chi+3)/((chi+2)(chi+3)) below phimax, D(phimax) + 4 F_S (A - phimax)
    beyond.
    """
    c = iw.chi
    if A <= iw.phimax:
        return 4 * iw.R * A ** (c + 3) / ((c + 2) * (c + 3))
    return D_closed(iw, iw.phimax) + 4 * iw.Fs * (A - iw.phimax)


# ------------------------------------------------------------------------------------------------
# Independent joint: the stop-type Prandtl-Ishlinskii operator (Krasnosel'skii and Pokrovskii,
# Systems with Hysteresis, 1989; physics sheet sec. 3), replayed over the FULL reversal history
# (wiped-out reversals included, so the wiping-out of the memory stack is checked, not assumed).
# ------------------------------------------------------------------------------------------------
def stop_states(phi, path):
    """Element stretch e_phi after the monotone pieces of `path` (starting virgin at 0)."""
    e = np.zeros_like(phi)
    prev = 0.0
    for u in path:
        e = np.clip(e + (u - prev), -phi, phi)
        prev = u
    return e


def pi_force_and_energy(iw, path):
    """Joint force and stored spring energy by quadrature over the Segalman density."""
    pts = sorted({min(abs(a - b) / 2, iw.phimax) for a, b in zip([0.0] + path[:-1], path)}
                 | {min(abs(u), iw.phimax) for u in path})
    pts = [x for x in pts if 0 < x < iw.phimax]

    def rho_e(phi, power):
        e = stop_states(np.array([phi]), path)[0]
        return iw.R * phi ** iw.chi * e ** power

    kw = dict(points=pts or None, limit=2000, epsabs=0, epsrel=1e-13)
    F = quad(rho_e, 0, iw.phimax, args=(1,), **kw)[0]
    U = 0.5 * quad(rho_e, 0, iw.phimax, args=(2,), **kw)[0]
    e_max = stop_states(np.array([iw.phimax]), path)[0]
    return F + iw.S * e_max, U + 0.5 * iw.S * e_max ** 2


# ------------------------------------------------------------------------------------------------
# 1. The joint on prescribed paths
# ------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("chi", [-0.5, -0.2, -0.8])
@pytest.mark.parametrize("beta", [0.0, 0.5])
@pytest.mark.parametrize("A_over_phimax", [0.05, 0.7, 3.0])
def test_loop_area_matches_segalman_dissipation(chi, beta, A_over_phimax):
    # Source: Segalman 2005, dissipation per cycle D(A) (physics sheet sec. 4), micro and macro-slip.
    iw = consts(chi, beta)
    A = A_over_phimax * iw.phimax
    mem = ref._Memory.virgin_at(iw, 0.0)
    mem.drive(0.0, A)
    mem.drive(A, -A)          # first branch closes at -A: back on the virgin curve
    assert mem.depth == 0
    down = ref._Memory(iw=iw, levels=[ref._Level(0.0, 0.0, 1.0, 1.0, 0.0)])
    down.drive(0.0, A)
    down.push(A, -1.0)
    mem.push(-A, 1.0)         # up branch from -A
    brk = [x for x in (A - 2 * iw.phimax, -A + 2 * iw.phimax) if -A < x < A] + [-A, A]
    brk = sorted(brk)

    def up(q):
        return mem.force(q, mem.top.d * (q - mem.top.u) >= 2 * iw.phimax)

    def dn(q):
        return down.force(q, down.top.d * (q - down.top.u) >= 2 * iw.phimax)
    area = sum(quad(lambda q: up(q) - dn(q), a, b, epsabs=0, epsrel=1e-13, limit=200)[0]
               for a, b in zip(brk[:-1], brk[1:]))
    D = D_closed(iw, A)
    assert abs(area - D) <= 1e-8 * D
    # the closed-form bookkeeping of the memory gives the same per-cycle dissipation
    assert abs(2 * (mem.dissipation(A) - mem.dissipation(-A)) - D) <= 1e-10 * D


@pytest.mark.parametrize("chi,beta", [(-0.5, 0.5), (-0.8, 0.0), (-0.2, 0.5)])
def test_memory_matches_stop_operator_with_wiping_out(chi, beta):
    # Source: stop-type Prandtl-Ishlinskii form of the Iwan model (Krasnosel'skii and Pokrovskii
    # 1989; physics sheet sec. 3), replayed over the whole history including wiped-out reversals.
    iw = consts(chi, beta)
    pm = iw.phimax
    path = [0.6 * pm, -0.3 * pm, 0.2 * pm, -0.1 * pm, 0.4 * pm,   # inner loops, then wipe two pairs
            -0.5 * pm, 0.55 * pm, -0.7 * pm,                       # passes -u_1: back to virgin
            1.8 * pm, -0.9 * pm, 1.2 * pm, -2.5 * pm, 0.3 * pm]   # macro-slip branches
    mem = ref._Memory.virgin_at(iw, 0.0)
    prev = 0.0
    depths = []
    for u in path:
        mem.drive(prev, u)
        depths.append(mem.depth)
        F_pi, U_pi = pi_force_and_energy(iw, path[: len(depths)])
        assert abs(mem.force(u, mem.top.slip) - F_pi) <= 1e-10 * iw.Fs
        prev = u
    # stack depth after each leg (derived by hand from the wiping-out rule)
    assert depths == [0, 1, 2, 3, 2, 1, 2, 0, 0, 1, 2, 0, 1]


def leg_work(mem, a, b):
    """Drive `mem` monotonically from a to b; return the integral of F du (quadrature per smooth piece,
    cut at closure points and slip onsets)."""
    d = float(np.sign(b - a))
    if mem.top.d == 0:
        mem.set_direction(d)
    elif d != mem.top.d:
        mem.push(a, d)
    x, W = a, 0.0
    while x != b:
        L = mem.top
        tgt = mem.target()
        on = None if L.slip else mem.onset()
        stops = [s for s in (tgt, on) if s is not None and d * (s - x) > 0 and d * (b - s) > 0]
        s = min(stops, key=lambda z: abs(z - x)) if stops else b
        slip = L.slip
        W += quad(lambda q: mem.force(q, slip), x, s, epsabs=0, epsrel=1e-13, limit=200)[0]
        if s == tgt:
            mem.pop(s)
        elif s == on:
            L.slip = True
        x = s
    return W


@pytest.mark.parametrize("chi,beta", [(-0.5, 0.5), (-0.8, 0.0)])
def test_work_minus_dissipation_is_stored_energy_on_path(chi, beta):
    # Source: energy of the Jenkins elements, W = dissipation + stored spring energy; stored energy
    # from the stop-operator replay (physics sheet sec. 3), dissipation from the closed forms (sec. 4).
    iw = consts(chi, beta)
    pm = iw.phimax
    path = [0.6 * pm, -0.3 * pm, 0.2 * pm, -0.45 * pm, 1.7 * pm, -1.1 * pm, 0.1 * pm]
    mem = ref._Memory.virgin_at(iw, 0.0)
    work = 0.0
    prev = 0.0
    for u in path:
        work += leg_work(mem, prev, u)
        prev = u
    _, U = pi_force_and_energy(iw, path)
    D = mem.dissipation(path[-1])
    assert U >= 0
    assert abs(work - D - U) <= 1e-9 * abs(work)


# ------------------------------------------------------------------------------------------------
# 2. Linear limit: exact damped oscillator (common practice, any vibration text)
# ------------------------------------------------------------------------------------------------
def exact_linear(t, v0, P, zeta=ZETA, w0=W0):
    wd = w0 * math.sqrt(1 - zeta ** 2)
    e = np.exp(-zeta * w0 * t)
    ring = v0 / wd * e * np.sin(wd * t)
    step = P / w0 ** 2 * (1 - e * (np.cos(wd * t) + zeta / math.sqrt(1 - zeta ** 2) * np.sin(wd * t)))
    return ring + step


@pytest.mark.parametrize("chi,scale", [(-0.5, 1e-20), (0.0, 1e-11)])
@pytest.mark.parametrize("case", ["ringdown", "step"])
def test_linear_limit_exact(chi, scale, case):
    # Tiny amplitude: the joint stays on its K_T slope (deviation ~ (A/phimax)^(chi+1)), so the mode
    # is the linear damped oscillator omega0, zeta.  Source: exact solution, common practice.
    iw = consts(chi, 0.5)
    A = scale * iw.phimax
    t = np.linspace(0.0, 0.1, 401)        # 10 periods
    v0, P = (A * W0, 0.0) if case == "ringdown" else (0.0, A * W0 ** 2)
    o = ref.simulate_mode(F0, ZETA, FS, KT, chi, 0.5, t, np.full(t.size - 1, P), 0.0, v0)
    qx = exact_linear(t, v0, P)
    peak = np.max(np.abs(qx))
    assert np.max(np.abs(o["q"] - qx)) <= 1e-8 * peak
    assert o["n_events"] >= 19            # a reversal each half period


# ------------------------------------------------------------------------------------------------
# 3. Energy balance and stored energy along integrated responses
# ------------------------------------------------------------------------------------------------
def forcing(kind, amp, t, seed=3):
    n = t.size - 1
    if kind == "ringdown":
        return np.zeros(n)
    if kind == "sine":
        return amp * np.sin(2 * math.pi * 0.93 * F0 * t[:-1])
    rng = np.random.default_rng(seed)
    return amp * rng.standard_normal(n)


def kinf_(iw):
    return W0 ** 2 - iw.Kt


CASES = [  # (forcing, level, chi, beta): each chi x beta pair appears once per level
    ("ringdown", "micro", -0.5, 0.0), ("sine", "micro", -0.2, 0.5), ("random", "micro", -0.8, 0.0),
    ("ringdown", "macro", -0.8, 0.5), ("sine", "macro", -0.5, 0.5), ("random", "macro", -0.2, 0.0),
    ("ringdown", "micro", -0.2, 0.0), ("sine", "micro", -0.8, 0.5), ("random", "macro", -0.5, 0.0),
    ("ringdown", "macro", -0.2, 0.5), ("sine", "macro", -0.8, 0.0), ("random", "micro", -0.5, 0.5),
]


def run_case(kind, level, chi, beta, rtol=1e-11, T=0.08, n=321):
    iw = consts(chi, beta)
    t = np.linspace(0.0, T, n)
    amp = iw.phimax * (0.3 if level == "micro" else 6.0)
    if kind == "ringdown":
        v0, p = amp * W0, forcing(kind, 0, t)
    else:
        # static-ish force level for the target amplitude, scaled by the secant stiffness
        v0 = 0.0
        p = forcing(kind, 0.25 * amp * kinf_(iw) if level == "macro" else 0.1 * amp * W0 ** 2, t)
    o, mem, log = ref._run_mode(F0, ZETA, FS, KT, chi, beta, t, p, 0.0, v0, rtol)
    return iw, t, p, v0, o, mem, log


@pytest.mark.parametrize("kind,level,chi,beta", CASES[:6])
def test_energy_balance_and_stored_energy(kind, level, chi, beta):
    # Source: work-energy theorem for q'' + c q' + K_inf q + F_J = p (common practice); stored joint
    # energy from the stop-operator replay (physics sheet sec. 3), dissipation closed form (sec. 4).
    iw, t, p, v0, o, mem, log = run_case(kind, level, chi, beta)
    E0 = 0.5 * v0 ** 2
    lhs = o["e_input"] + E0
    rhs = 0.5 * o["qdot"] ** 2 + 0.5 * kinf_(iw) * o["q"] ** 2 + o["e_viscous"] + o["e_joint_work"]
    scale = max(np.max(np.abs(lhs)), E0)
    assert np.max(np.abs(lhs - rhs)) <= 1e-9 * scale
    stored = o["e_joint_work"] - o["e_joint_dissipation"]
    assert np.min(stored) >= -1e-9 * scale
    # at the end: W_J - D equals the Jenkins springs' energy of the replayed full history
    F_pi, U_pi = pi_force_and_energy(iw, list(mem.history) + [float(o["q"][-1])])
    assert abs(stored[-1] - U_pi) <= 1e-9 * scale
    assert abs(o["joint_force"][-1] - F_pi) <= 1e-8 * iw.Fs
    if level == "macro":
        # macro-slip reached, and at least one reversal taken while slipping
        kinds = [k for _, k, _ in log]
        assert "slip" in kinds
        assert any(a == "slip" and b == "reversal" for a, b in zip(kinds, kinds[1:]))


# ------------------------------------------------------------------------------------------------
# 4. Self-convergence (derived here: the reference must be its own judge)
# ------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind,level,chi,beta", CASES)
def test_self_convergence(kind, level, chi, beta):
    res = {r: run_case(kind, level, chi, beta, rtol=r)[4] for r in (1e-9, 1e-11, 1e-12)}
    peak = np.max(np.abs(res[1e-12]["q"]))
    for r in (1e-9, 1e-11):
        assert np.max(np.abs(res[r]["q"] - res[1e-12]["q"])) <= 1e-7 * peak, r
    vpk = np.max(np.abs(res[1e-12]["qdot"]))
    assert np.max(np.abs(res[1e-11]["qdot"] - res[1e-12]["qdot"])) <= 1e-7 * vpk


@pytest.mark.slow
@pytest.mark.parametrize("kind,level,chi,beta", [("ringdown", "macro", -0.8, 0.5),
                                                 ("random", "macro", -0.5, 0.5)])
def test_self_convergence_long_record(kind, level, chi, beta):
    # 100 periods, 4000 held input values: accumulated error stays within 1e-7 of peak (derived here)
    a = run_case(kind, level, chi, beta, rtol=1e-9, T=1.0, n=4001)[4]
    b = run_case(kind, level, chi, beta, rtol=1e-12, T=1.0, n=4001)[4]
    assert np.max(np.abs(a["q"] - b["q"])) <= 1e-7 * np.max(np.abs(b["q"]))


# ------------------------------------------------------------------------------------------------
# 5. Event logic
# ------------------------------------------------------------------------------------------------
def test_nested_reversals_wipe_out_to_virgin():
    # Overdamped mode under held force levels: q follows the levels, so the reversal pattern is known.
    # Expected stack depths derived by hand from the wiping-out rule (physics sheet sec. 3).
    chi, beta, zeta = -0.5, 0.5, 2.0
    iw = consts(chi, beta)
    levels = np.array([0.8, -0.4, 0.2, -0.6, 0.9, -0.95, 0.0]) * iw.Fs
    t = np.linspace(0.0, 0.07 * levels.size, 20 * levels.size + 1)
    p = np.repeat(levels, 20)
    o, mem, log = ref._run_mode(F0, zeta, FS, KT, chi, beta, t, p, 0.0, 0.0)
    seq = [(k, d) for _, k, d in log if k != "slip"]
    assert seq == [("reversal", 1), ("reversal", 2), ("reversal", 3), ("closure", 1),
                   ("reversal", 2), ("closure", 0), ("reversal", 1), ("closure", 0),
                   ("reversal", 1)]
    assert np.max(np.abs(o["q"])) < iw.phimax       # stayed in micro-slip
    F_pi, _ = pi_force_and_energy(iw, list(mem.history) + [float(o["q"][-1])])
    assert abs(o["joint_force"][-1] - F_pi) <= 1e-9 * iw.Fs


def test_release_from_rest_reverses_at_t0():
    # v0 = 0, q0 != 0 on the virgin curve, no force: the mode starts back towards zero at t0.
    iw = consts(-0.5, 0.5)
    t = np.linspace(0, 0.02, 11)
    q0 = 0.5 * iw.phimax
    o, mem, log = ref._run_mode(F0, ZETA, FS, KT, -0.5, 0.5, t, np.zeros(10), q0, 0.0)
    assert log[0][:2] == (0.0, "reversal") and mem.history[0] == q0
    assert o["qddot"][0] == pytest.approx(-(kinf_(iw) * q0 + iw.fbb(q0)), rel=1e-14)
    assert o["q"][1] < q0


def test_release_continues_on_virgin_curve_when_pushed_outward():
    iw = consts(-0.5, 0.5)
    t = np.linspace(0, 1e-4, 3)
    q0 = 0.2 * iw.phimax
    P = 2 * (kinf_(iw) * q0 + iw.fbb(q0))   # net force points away from zero
    o, mem, log = ref._run_mode(F0, ZETA, FS, KT, -0.5, 0.5, t, [P, P], q0, 0.0)
    assert not log and o["q"][-1] > q0 and mem.depth == 0


def test_rest_with_zero_force_does_not_loop():
    t = np.linspace(0, 1.0, 5)
    o = ref.simulate_mode(F0, ZETA, FS, KT, -0.5, 0.5, t, np.zeros(4))
    assert o["n_events"] == 0 and np.all(o["q"] == 0) and np.all(o["e_joint_work"] == 0)


# ------------------------------------------------------------------------------------------------
# 6. Multi-mode wrapper and bad input
# ------------------------------------------------------------------------------------------------
class _J:
    def __init__(self, **kw):
        self.__dict__.update(kw)


def test_simulate_matches_simulate_mode():
    modes = [_J(f0=F0, zeta=ZETA, joint=_J(Fs=FS, Kt=KT, chi=-0.5, beta=0.5)),
             _J(f0=230.0, zeta=0.02, joint=_J(Fs=0.5, Kt=0.1 * (2 * math.pi * 230) ** 2, chi=-0.2,
                                              beta=0.0))]
    params = _J(modes=modes)
    t = np.linspace(0, 0.02, 41)
    f = np.random.default_rng(0).standard_normal((41, 2)) * [1.0, 0.3]
    o = ref.simulate(params, t, f, q0=[1e-6, 0.0], v0=[0.0, 1e-3])
    assert o["q"].shape == (41, 2) and o["n_events"].shape == (2,)
    o1 = ref.simulate_mode(230.0, 0.02, 0.5, 0.1 * (2 * math.pi * 230) ** 2, -0.2, 0.0, t, f[:, 1],
                           0.0, 1e-3)
    np.testing.assert_array_equal(o["q"][:, 1], o1["q"])
    # the project's own parameter classes expose the same attributes
    params_mod = pytest.importorskip("jointfmu.params")
    real = [params_mod.Mode(label=f"m{i}", f0=m.f0, zeta=m.zeta,
                            joint=params_mod.JointParams(Fs=m.joint.Fs, Kt=m.joint.Kt,
                                                         chi=m.joint.chi, beta=m.joint.beta))
            for i, m in enumerate(modes)]
    o2 = ref.simulate(_J(modes=real), t, f, q0=[1e-6, 0.0], v0=[0.0, 1e-3])
    np.testing.assert_array_equal(o2["q"], o["q"])


@pytest.mark.parametrize("kw,match", [
    (dict(chi=-1.0), r"chi = -1.0: chi > -1"),
    (dict(Fs=0.0), r"Fs = 0.0: Fs > 0"),
    (dict(beta=-0.1), r"beta = -0.1: beta >= 0"),
    (dict(Kt=2 * W0 ** 2), r"Kt <= omega0\^2"),
    (dict(f0=float("nan")), r"f0 = nan: a finite real number"),
])
def test_bad_parameters_are_named(kw, match):
    args = dict(f0=F0, zeta=ZETA, Fs=FS, Kt=KT, chi=-0.5, beta=0.5)
    args.update(kw)
    with pytest.raises(ParameterError, match=match):
        ref.simulate_mode(t=[0, 1e-3, 2e-3], p=[0, 0], **args)


@pytest.mark.parametrize("t,p,match", [
    ([0, 1e-3, 1e-3], [0, 0], "strictly increasing"),
    ([0, 1e-3, 2e-3], [0, 0, 0, 0], r"shape \(2,\) or \(3,\)"),
    ([0, 1e-3, 2e-3], [0, np.nan], "finite"),
])
def test_bad_inputs_are_named(t, p, match):
    with pytest.raises(InputError, match=match):
        ref.simulate_mode(F0, ZETA, FS, KT, -0.5, 0.5, t, p)
