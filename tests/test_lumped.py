"""The discrete-joint structure (jointfmu.lumped): its time integration against the modal core,
exact linear modal superposition (SciPy), energy balance and self-convergence; the stuck-joint
modes against closed forms and SciPy; the stepping contract; compiled = plain Python."""
import math

import numpy as np
import pytest
import scipy.integrate
import scipy.linalg

from jointfmu.errors import InputError
from jointfmu.lumped.model import Damping, Dof, Joint, LumpedModel, LumpedPoint, Spring
from jointfmu.lumped.modes import modal_iwan_template, stuck_modes
from jointfmu.lumped.simulate import DEFAULT_STEPS_PER_PERIOD, LumpedSimulator
from jointfmu.lumped.virtual_test import simulate_impact
from jointfmu.params import parse_parameter_set
from jointfmu.physics.integrate import ModalSimulator
from jointfmu.physics.iwan import joint_constants


def one_dof(Fs=400.0, Kt=1e6, chi=-0.5, beta=0.3, m=2.0, k=3e6, zeta=0.004):
    return LumpedModel(name="one", build="T", dofs=(Dof("a", m, "z"),), springs=(Spring(("a",), k),),
                       joints=(Joint("j", ("a",), Fs, Kt, chi, beta),), damping=Damping(zeta=(zeta,)),
                       points=(LumpedPoint("p", "a", "+z", "both"),))


def modal_one(model):
    """The same single DOF as a modal Iwan parameter set: q = sqrt(m) x, so in modal coordinates
    K_T -> K_T/m, F_S -> F_S/sqrt(m), f0 = sqrt((k + K_T)/m)/(2 pi) (derived here)."""
    d, s, j = model.dofs[0], model.springs[0], model.joints[0]
    phi = 1.0 / math.sqrt(d.mass)
    f0 = math.sqrt((s.k + j.Kt) / d.mass) / (2 * math.pi)
    return parse_parameter_set({
        "format": "jointfmu-params/1", "structure": {"name": "one", "build": "T"},
        "modes": [{"label": "m1", "f0": f0, "zeta": model.damping.zeta[0],
                   "joint": {"Fs": j.Fs * phi, "Kt": j.Kt * phi**2, "chi": j.chi, "beta": j.beta}}],
        "points": [{"label": "p", "role": "both", "direction": "+z", "shape": [phi]}]})


def six_dof(beta=(0.2, 0.0, 0.4), chi=(-0.5, -0.3, -0.7), fs_scale=1.0):
    """A chain-and-branch of six masses: two joints to ground, one between DOFs, linear springs
    everywhere so that every mode is grounded; frequencies about 60-700 Hz."""
    dofs = tuple(Dof(f"d{k}", m, "z") for k, m in enumerate((0.8, 0.5, 0.6, 0.4, 0.7, 0.3)))
    springs = (Spring(("d0",), 2e5), Spring(("d0", "d1"), 6e5), Spring(("d1", "d2"), 4e5),
               Spring(("d2", "d3"), 8e5), Spring(("d1", "d4"), 3e5), Spring(("d4", "d5"), 5e5),
               Spring(("d3",), 1e5))
    joints = (Joint("ja", ("d0",), 40.0 * fs_scale, 3e5, chi[0], beta[0]),
              Joint("jb", ("d2", "d4"), 25.0 * fs_scale, 2e5, chi[1], beta[1]),
              Joint("jc", ("d5",), 10.0 * fs_scale, 1e5, chi[2], beta[2]))
    points = (LumpedPoint("hit", "d1", "+z", "input"), LumpedPoint("s1", "d3", "+z", "output"),
              LumpedPoint("s2", "d5", "-z", "output"), LumpedPoint("s3", "d0", "+z", "output"))
    return LumpedModel(name="six", build="T", dofs=dofs, springs=springs, joints=joints,
                       damping=Damping(zeta=(0.004, 0.003), zeta_rest=0.002), points=points)


# ------------------------------------------------------------------ one DOF = the modal core
@pytest.mark.parametrize("force, regime", [(3000.0, "micro-slip"), (9000.0, "macro-slip, beta > 0")])
@pytest.mark.parametrize("spp", [40.0, DEFAULT_STEPS_PER_PERIOD])
def test_one_dof_one_joint_is_the_modal_core(force, regime, spp):
    """One mass on a spring with one Iwan joint to ground is the modal core's single mode in the
    coordinate q = sqrt(m) x (derived here).  With the same sub-steps both run the same scheme
    (exact linear part, remainder expanded with the joint's derivatives, reversal and onset
    located alike), so they agree to rounding: stated agreement 1e-12 of peak."""
    model = one_dof()
    ls = LumpedSimulator(model, steps_per_period=spp)
    ms = ModalSimulator(modal_one(model), steps_per_period=spp)
    dt = 3.0 / (spp * ms.model.omega0[0] / (2 * math.pi))
    assert ls.sub_steps(dt) == ms.sub_steps(dt)[0] == 3
    ql, qm = [], []
    n_hold = round(2 * spp / 40.0)  # the same impulse at every step size
    for n in range(1500):
        f = force if n < n_hold else 0.0
        ls.set_inputs([f])
        ms.set_inputs(point_forces=[f])
        assert ls.step(dt) == (True, "") and ms.step(dt) == (True, "")
        ql.append(ls.q[0])
        qm.append(ms.q[0])
    ql, qm = np.array(ql), np.array(qm)
    assert np.abs(ql - qm).max() <= 1e-12 * np.abs(qm).max()
    assert ls.joint_reached_macroslip[0] == (regime != "micro-slip")
    # the same joint energy (exact closed forms in both)
    assert ls.energy_joint == pytest.approx(ms.energy_joint, rel=1e-10)


def test_relative_joint_between_two_dofs_is_one_modal_iwan_mode():
    """Two equal masses m, each on a ground spring k, joined by a joint: the symmetric mode does
    not load the joint, the antisymmetric one (phi = [1, -1]/sqrt(2m)) is a single modal Iwan
    mode with K_T -> 2 K_T/m, F_S -> sqrt(2/m) F_S, w^2 = (k + 2 K_T)/m (derived here).  Checks
    that the joint acts on the relative displacement x_a - x_b: agreement with the modal core to
    rounding (1e-12 of peak)."""
    m, k, Kt, Fs = 1.5, 2e6, 8e5, 150.0
    model = LumpedModel(name="two", build="T", dofs=(Dof("a", m, "z"), Dof("b", m, "z")),
                        springs=(Spring(("a",), k), Spring(("b",), k)),
                        joints=(Joint("j", ("a", "b"), Fs, Kt, -0.4, 0.25),),
                        damping=Damping(zeta=(0.01, 0.003)),
                        points=(LumpedPoint("p", "a", "+z", "input"),))
    c = math.sqrt(2.0 / m)
    f0 = math.sqrt((k + 2 * Kt) / m) / (2 * math.pi)
    ps = parse_parameter_set({
        "format": "jointfmu-params/1", "structure": {"name": "two", "build": "T"},
        "modes": [{"label": "anti", "f0": f0, "zeta": 0.003,
                   "joint": {"Fs": c * Fs, "Kt": c * c * Kt, "chi": -0.4, "beta": 0.25}}],
        "points": [{"label": "p", "role": "input", "direction": "+z", "shape": [1 / math.sqrt(2 * m)]}]})
    ls = LumpedSimulator(model)
    ms = ModalSimulator(ps, steps_per_period=DEFAULT_STEPS_PER_PERIOD * f0 / ls.modes.frequency[1])
    assert ls.modes.frequency[1] == pytest.approx(f0, rel=1e-12)
    dt = 4 * ls.h_max
    assert ms.sub_steps(dt)[0] == ls.sub_steps(dt) == 4
    ql, qm = [], []
    for n in range(2000):
        f = 4000.0 if n < 3 else 0.0
        ls.set_inputs([f])
        ms.set_inputs(point_forces=[f])
        assert ls.step(dt)[0] and ms.step(dt)[0]
        ql.append(ls.q[1])
        qm.append(ms.q[0])
    ql, qm = np.array(ql), np.array(qm)
    assert ls.joint_reached_macroslip[0]
    assert np.abs(ql - qm).max() <= 1e-12 * np.abs(qm).max()


# ------------------------------------------------------------------ linear limit
def scipy_modal_superposition(model, impact, points, F, T, t, quantity):
    """Reference: the stuck-joint modes from scipy.linalg.eigh, each mode's response to the
    half-sine pulse by SciPy's DOP853 (rtol 1e-12), superposed (linear modal superposition,
    common practice; independent of jointfmu's exponential coefficients)."""
    m = model.masses()
    lam, phi = scipy.linalg.eigh(model.stiffness(), np.diag(m))
    w = np.sqrt(lam)
    zeta = model.damping.ratios(w)
    bi = model.point_vectors([model.point(impact)])[0] @ phi
    S = model.point_vectors([model.point(p) for p in points]) @ phi
    out = np.zeros((t.size, len(points)))
    for i in range(w.size):
        def rhs(tt, y, on):
            f = bi[i] * F * math.sin(math.pi * tt / T) if on else 0.0
            return [y[1], f - 2 * zeta[i] * w[i] * y[1] - w[i] ** 2 * y[0]]
        scale = abs(bi[i]) * F * T / max(w[i], 1.0)
        kw = dict(method="DOP853", rtol=1e-12, atol=1e-16 * max(scale, 1e-300))
        s1 = scipy.integrate.solve_ivp(rhs, (0, T), [0.0, 0.0], args=(True,), dense_output=True, **kw)
        s2 = scipy.integrate.solve_ivp(rhs, (T, t[-1] + 1e-12), s1.y[:, -1], args=(False,),
                                       dense_output=True, **kw)
        y = np.where(t <= T, s1.sol(np.minimum(t, T)), s2.sol(np.maximum(t, T)))
        acc = np.where(t < T, bi[i] * F * np.sin(np.pi * np.minimum(t, T) / T), 0.0) \
            - 2 * zeta[i] * w[i] * y[1] - w[i] ** 2 * y[0]
        modal = {"x": y[0], "v": y[1], "a": acc}[quantity]
        out += np.outer(modal, S[:, i])
    return out


@pytest.mark.parametrize("quantity", ["x", "a"])
def test_tiny_amplitudes_are_linear_modal_superposition(quantity):
    """With joint forces below 1e-14 of their slip forces the joints act as their stiffness K_T
    (the nonlinear part ~ (u/phimax)^(chi+1) < 1e-7 for chi >= -0.5): the response must be the
    linear modal superposition computed by SciPy, within 1e-6 of peak (issue 10; measured 2e-9)."""
    model = six_dof(chi=(-0.5, -0.3, 0.0))
    F, T, dt, n = 1e-18, 5e-4, 1.0 / 20480, 2048
    pts = ("s1", "s2", "s3")
    y, _, sim = simulate_impact(model, "hit", F, T, dt, n, pts, quantity)
    t = np.arange(n) * dt
    ref = scipy_modal_superposition(model, "hit", pts, F, T, t, quantity)
    assert 0 < sim.joint_peak_ratio.max() < 1e-14
    err = np.abs(y - ref).max() / np.abs(ref).max()
    assert err < 1e-6, err


# ------------------------------------------------------------------ energy balance, convergence
def test_energy_balance_at_a_fine_setting():
    """Energy in = held + dissipated (kinetic + linear springs + joint sliders' stored energy;
    viscous + joint dissipation): residual below 1e-6 of the impact's work at 1000 steps per
    period of the highest mode, with every joint in macro-slip at times (issue 10)."""
    model = six_dof(fs_scale=0.05)
    y, _, sim = simulate_impact(model, "hit", 2000.0, 5e-4, 1 / 20480, 4096, ("s1",), "x",
                                steps_per_period=1000.0)
    assert sim.joint_reached_macroslip.all()
    assert sim.energy_joint > 0.25 * sim.energy_input
    assert abs(sim.energy_residual) < 1e-6 * sim.energy_input


def test_energy_balance_converges_with_the_step():
    """The residual is a discretization error: it falls by at least 4x when the step halves."""
    model = six_dof(fs_scale=0.05)
    res = []
    for spp in (50.0, 100.0):
        _, _, sim = simulate_impact(model, "hit", 2000.0, 5e-4, 1 / 20480, 2048, ("s1",), "x",
                                    steps_per_period=spp)
        res.append(abs(sim.energy_residual) / sim.energy_input)
    assert res[1] < res[0] / 4


@pytest.mark.parametrize("fs_scale, regime", [(1.0, "micro-slip"), (0.05, "macro-slip")])
@pytest.mark.parametrize("quantity", ["x", "a"])
def test_self_convergence_at_the_default_setting(fs_scale, regime, quantity):
    """The default step against 4x finer, same scheme: within 1e-6 of peak (issue 10), with the
    joints in micro-slip only and in macro-slip."""
    model = six_dof(fs_scale=fs_scale)
    out = []
    for spp in (DEFAULT_STEPS_PER_PERIOD, 4 * DEFAULT_STEPS_PER_PERIOD):
        y, _, sim = simulate_impact(model, "hit", 300.0, 5e-4, 1 / 20480, 8192, ("s1", "s2", "s3"),
                                    quantity, steps_per_period=spp)
        out.append(y)
    assert sim.joint_reached_macroslip.any() == (regime == "macro-slip")
    err = np.abs(out[0] - out[1]).max() / np.abs(out[1]).max()
    assert err < 1e-6, err


# ------------------------------------------------------------------ modes and template
def test_stuck_modes_two_dof_closed_form():
    """Two equal masses on ground springs k joined by a joint K_T: w^2 = k/m and (k + 2 K_T)/m,
    shapes [1, 1] and [1, -1] over sqrt(2m) (closed form); mass-normalized."""
    m, k, Kt = 1.5, 2e6, 8e5
    model = LumpedModel(name="two", build="T", dofs=(Dof("a", m, "z"), Dof("b", m, "z")),
                        springs=(Spring(("a",), k), Spring(("b",), k)),
                        joints=(Joint("j", ("a", "b"), 100.0, Kt, -0.5, 0.0),),
                        damping=Damping(rayleigh_alpha=2.0, rayleigh_beta=1e-5))
    md = stuck_modes(model)
    assert md.omega ** 2 == pytest.approx([k / m, (k + 2 * Kt) / m], rel=1e-12)
    assert md.shapes == pytest.approx(np.array([[1, 1], [1, -1]]) / math.sqrt(2 * m), abs=1e-12)
    assert md.shapes.T @ np.diag(model.masses()) @ md.shapes == pytest.approx(np.eye(2), abs=1e-12)
    assert md.zeta == pytest.approx(2.0 / (2 * md.omega) + 1e-5 * md.omega / 2, rel=1e-12)
    assert md.joint_share == pytest.approx([0.0, 2 * Kt / (k + 2 * Kt)], abs=1e-12)


def test_template_of_a_single_joint_mode_is_the_exact_projection():
    """A mode that loads one joint alone: its modal Iwan joint is the joint seen through
    u = c q: K_T c^2, F_S |c| (derived here; the micro-slip match reproduces it exactly), same
    chi and beta; and the template passes the parameter-file checks."""
    model = one_dof(Fs=400.0, Kt=1e6, chi=-0.35, beta=0.3, m=2.0)
    ps = modal_iwan_template(model)
    j = ps.modes[0].joint
    c = 1 / math.sqrt(2.0)
    assert (j.Kt, j.Fs, j.chi, j.beta) == pytest.approx((1e6 * c * c, 400.0 * c, -0.35, 0.3), rel=1e-9)
    assert ps.modes[0].f0 == pytest.approx(math.sqrt(4e6 / 2.0) / (2 * math.pi), rel=1e-12)
    assert parse_parameter_set(ps.to_dict()) == ps


# ------------------------------------------------------------------ contract and kernels
def test_compiled_kernel_equals_plain_python():
    """The Numba-compiled step is the plain-Python one, bit for bit."""
    model = six_dof(fs_scale=0.1)
    runs = []
    for kernel in ("python", "compiled"):
        sim = LumpedSimulator(model, kernel=kernel)
        sim.set_inputs([500.0], [1e5], [-1e9])
        assert sim.step(3e-4)[0]
        sim.set_inputs([0.0], [0.0], [0.0])
        y = sim.record(40, 1e-4, ["s1", "s2"], "a")
        runs.append(np.concatenate([y.ravel(), sim.q, sim.qdot, sim.joint_force,
                                    [sim.energy_input, sim.energy_viscous, sim.energy_joint]]))
    assert np.array_equal(runs[0], runs[1])


def test_step_contract():
    """step(0) is a no-op; a bad step size is refused with a message and changes nothing; a step
    that fails leaves the state exactly as before (stepping contract, physics.stepping)."""
    sim = LumpedSimulator(six_dof(fs_scale=0.1))
    sim.set_inputs([800.0])
    assert sim.step(2e-4) == (True, "")
    before = (sim.q, sim.qdot, sim.joint_force, sim.stack_depth, sim.time, sim.energy_input)
    assert sim.step(0.0) == (True, "")
    for bad in (-1e-3, float("nan"), "x"):
        ok, msg = sim.step(bad)
        assert not ok and "step size" in msg
    sim.set_inputs([0.0])

    class Broken(LumpedSimulator):
        def _step_impl(self, dt):
            super()._step_impl(dt)          # really changes the state (and the stacks)
            return False, "made to fail"

    broken = Broken(six_dof(fs_scale=0.1))
    broken.set_inputs([800.0])
    assert broken.step(2e-4)[0] is False  # fails, state restored to the start
    assert np.array_equal(broken.q, np.zeros(6)) and broken.time == 0.0
    ok, msg = broken.step(1e-4)
    assert not ok and "made to fail" in msg and "state kept" in msg
    after = (sim.q, sim.qdot, sim.joint_force, sim.stack_depth, sim.time, sim.energy_input)
    for a, b in zip(before, after):
        assert np.array_equal(a, b)


def test_failed_step_keeps_the_state_with_reversals():
    """A step undone after it pushed and popped reversals restores the stacks exactly."""
    model = six_dof(fs_scale=0.05)
    sim = LumpedSimulator(model)
    sim.set_inputs([3000.0])
    sim.step(5e-4)
    sim.set_inputs([0.0])
    sim.step(0.01)
    saved = (sim.q.copy(), sim.joint_force.copy(), sim.stack_depth.copy(), sim._stk.copy())
    sim._save()
    sim._step_impl(0.02)  # many reversals
    sim._restore()
    assert np.array_equal(saved[0], sim.q) and np.array_equal(saved[1], sim.joint_force)
    assert np.array_equal(saved[2], sim.stack_depth)
    d = sim.stack_depth
    for j in range(3):
        assert np.array_equal(saved[3][j, :d[j]], sim._stk[j, :d[j]])


@pytest.mark.parametrize("kw, text", [
    ({"point_forces": [1.0, 2.0]}, "expected 1 values"),
    ({"point_forces": [float("nan")]}, "must be finite"),
    ({"force_rates": [1e13]}, "|value| <= 1e+12"),
    ({"force_accels": ["a"]}, "expected 1 numbers"),
])
def test_bad_inputs_are_refused(kw, text):
    sim = LumpedSimulator(six_dof())
    with pytest.raises(InputError, match=text.replace("|", r"\|").replace("+", r"\+")):
        sim.set_inputs(**kw)


def test_bad_settings_are_refused():
    with pytest.raises(InputError, match="steps_per_period"):
        LumpedSimulator(six_dof(), steps_per_period=4.0)
    with pytest.raises(InputError, match="x0: must be 6 finite numbers"):
        LumpedSimulator(six_dof(), x0=[0.0])
