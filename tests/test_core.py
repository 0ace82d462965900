"""The modal core (ModalSimulator) against exact linear solutions, Segalman's closed forms and the
SciPy reference integration (jointfmu.physics.reference, independent event-driven formulation)."""
import math

import numpy as np
import pytest

from jointfmu.physics import kernel as K
from jointfmu.physics import reference
from jointfmu.errors import InputError
from jointfmu.physics.integrate import DEFAULT_STEPS_PER_PERIOD, ModalSimulator
from jointfmu.physics.iwan import dissipation_per_cycle, joint_constants
from jointfmu.params import parse_parameter_set

TOL_DEFAULT = 1e-3  # core vs reference at default settings, fraction of peak (issue 2)


def make_set(modes, base_mass=None, points=()):
    data = {"format": "jointfmu-params/1",
            "structure": {"name": "testrig", "build": "T1", "description": "test"},
            "modes": [], "points": list(points)}
    for k, (f0, zeta, frac, Fs, chi, beta) in enumerate(modes):
        m = {"label": f"m{k + 1}", "f0": f0, "zeta": zeta,
             "joint": {"Fs": Fs, "Kt": frac * (2 * math.pi * f0) ** 2, "chi": chi, "beta": beta}}
        if base_mass is not None:
            m["base_participation"] = 0.4
        data["modes"].append(m)
    if base_mass is not None:
        data["base"] = {"total_mass": base_mass, "direction": "z"}
    return parse_parameter_set(data)


ONE = make_set([(100.0, 0.003, 0.25, 1.0, -0.5, 0.2)])
# heavily damped: a quasi-static drive leaves no free ripple (whose extra small loops would add dissipation)
QUASI = make_set([(100.0, 0.3, 0.25, 1.0, -0.5, 0.2)])
FIVE = make_set([(31.0, 0.004, 0.2, 2.0, -0.45, 0.2), (87.0, 0.003, 0.25, 1.5, -0.6, 0.0),
                 (150.0, 0.002, 0.12, 1.0, -0.3, 0.5), (260.0, 0.003, 0.3, 0.8, -0.8, 0.1),
                 (410.0, 0.002, 0.08, 0.5, 0.0, 1.0)])


def phimax(ps):
    return np.array([joint_constants(m.joint.Fs, m.joint.Kt, m.joint.chi, m.joint.beta).phimax for m in ps.modes])


def run_core(ps, t, f, **kw):
    """Step the core over the communication grid t with modal force f[k] held on [t_k, t_k+1)."""
    sim = ModalSimulator(ps, kernel="python", **kw)
    out = np.empty((len(t), ps.n_modes))
    out[0] = sim.q
    for k in range(len(t) - 1):
        sim.set_inputs(modal_forces=f[k])
        ok, msg = sim.step(t[k + 1] - t[k])
        assert ok, msg
        out[k + 1] = sim.q
    return out, sim


def forcing(kind, ps, t, level, seed=0):
    """Held modal forces (M-1, N): level is in units of each mode's slip force."""
    n = len(t) - 1
    Fs = np.array([m.joint.Fs for m in ps.modes])
    f0 = np.array([m.f0 for m in ps.modes])
    tt = t[:-1, None]
    if kind == "ringdown":  # a short pulse, then free decay
        f = np.where(tt < 0.5 / f0.max(), level * Fs * 20.0, 0.0)
    elif kind == "sine":    # near each mode's resonance, then free
        f = level * Fs * np.sin(2 * np.pi * 0.95 * f0 * tt) * (tt < 0.12)
    elif kind == "random":  # white held random values, then free
        rng = np.random.default_rng(seed)
        f = level * Fs * rng.standard_normal((n, len(Fs))) * (tt < 0.12)
    else:
        raise ValueError(kind)
    return f


# ------------------------------------------------------------------------- linear limit
@pytest.mark.parametrize("chi", [-0.5, 0.0])
def test_linear_limit_matches_exact_damped_oscillator(chi):
    """Tiny motion: the joint acts as its stiffness K_T, so the mode is the linear oscillator with
    f0 and zeta.  Exact solution of q'' + 2 zeta w q' + w^2 q = F (step) from rest (common
    practice): q = F/w^2 (1 - e^(-zeta w t) (cos wd t + zeta w / wd sin wd t)), wd = w sqrt(1-zeta^2).
    Nonlinearity scales as (A/phimax)^(chi+1), hence the tiny level."""
    ps = make_set([(100.0, 0.01, 0.3, 1.0, chi, 0.2)])
    w = 2 * math.pi * 100.0
    z = 0.01
    wd = w * math.sqrt(1 - z * z)
    F = 1e-14 * w * w * phimax(ps)[0]
    t = np.arange(0, 0.1, 1e-3)
    q, _ = run_core(ps, t, np.full((len(t) - 1, 1), F))
    exact = F / w**2 * (1 - np.exp(-z * w * t) * (np.cos(wd * t) + z * w / wd * np.sin(wd * t)))
    assert np.abs(q[:, 0] - exact).max() <= 1e-6 * np.abs(exact).max()


# ----------------------------------------------------------------- dissipation per cycle
@pytest.mark.parametrize("amp", [0.01, 0.03, 0.1, 0.3, 0.6, 0.9])
def test_dissipation_per_cycle_in_the_modal_core(amp):
    """Quasi-static sine drive of one mode (20x below resonance): the joint energy dissipated over
    a cycle equals Segalman's closed form D(A) = 4 R A^(chi+3)/((chi+2)(chi+3)) (Segalman 2005)
    with A the half peak-to-peak modal displacement of that cycle, within 0.5 %."""
    ps = QUASI
    m = ps.modes[0]
    j = m.joint
    pm = phimax(ps)[0]
    f_drive = 5.0
    F = amp * pm * (2 * math.pi * m.f0) ** 2
    sim = ModalSimulator(ps, kernel="python")
    dt = 1.0 / (f_drive * 400)
    q, e = [], []
    for k in range(3 * 400):
        sim.set_inputs(modal_forces=[F * math.sin(2 * math.pi * f_drive * (k + 0.5) * dt)])
        sim.step(dt)
        q.append(sim.q[0])
        e.append(sim.energy_joint)
    q, e = np.array(q), np.array(e)
    last = slice(800, 1200)   # the third cycle, after the virgin loading
    A = (q[last].max() - q[last].min()) / 2
    D = e[1199] - e[799]
    expected = float(dissipation_per_cycle(A, j.Fs, j.Kt, j.chi, j.beta))
    assert D == pytest.approx(expected, rel=5e-3)


def test_damping_ratio_slope_is_one_plus_chi():
    """Equivalent joint damping zeta_J = D/(2 pi k A^2) ~ A^(chi+1) in micro-slip (Segalman 2005;
    physics sheet sec. 5): the log-log slope of the simulated D/A^2 over 1e-3..1e-1 phimax."""
    ps = QUASI
    chi = ps.modes[0].joint.chi
    pm = phimax(ps)[0]
    w2 = (2 * math.pi * ps.modes[0].f0) ** 2
    amps, zetas = [], []
    for level in np.geomspace(1e-3, 1e-1, 5):
        sim = ModalSimulator(ps, kernel="python")
        dt = 1.0 / 2000
        q, e = [], []
        for k in range(1200):
            sim.set_inputs(modal_forces=[level * pm * w2 * math.sin(2 * math.pi * 5.0 * (k + 0.5) * dt)])
            sim.step(dt)
            q.append(sim.q[0])
            e.append(sim.energy_joint)
        A = (max(q[800:]) - min(q[800:])) / 2
        amps.append(A)
        zetas.append((e[1199] - e[799]) / (2 * math.pi * w2 * A * A))
    slope = np.polyfit(np.log(amps), np.log(zetas), 1)[0]
    assert slope == pytest.approx(1 + chi, abs=0.01)


# ------------------------------------------------------------------------ energy balance
@pytest.mark.parametrize("level", [0.05, 3.0])
def test_energy_balance_closes(level):
    """initial + input = kinetic + spring + joint stored + joint dissipated + viscous
    (conservation of energy; the joint's stored and dissipated parts in closed form).  The core's
    balance error is its discretization error: <= 1e-6 of the input at 640 steps per period, and
    it falls at least as h^2."""
    ps = ONE
    t = np.arange(0, 0.3, 1e-3)
    f = forcing("sine", ps, t, level)
    res = []
    for spp in (80, 160, 640):
        _, sim = run_core(ps, t, f, steps_per_period=spp)
        res.append(abs(sim.energy_residual) / sim.energy_input)
    assert res[2] <= 1e-6
    assert math.log2(res[0] / res[1]) >= 2.0
    assert 0.05 < sim.energy_joint / sim.energy_input < 1.0  # the joint does dissipate here


# --------------------------------------------------------------------- convergence order
@pytest.mark.parametrize("level", [0.05, 3.0])
def test_convergence_order_at_least_two(level):
    """Error against the reference (rtol 1e-11) at 20, 40, 80 steps per period: observed order
    log2(e_h / e_h/2) >= 2 (the scheme is second order overall, third where g is smooth)."""
    ps = ONE
    t = np.arange(0, 0.2, 1e-3)
    f = forcing("sine", ps, t, level)
    ref = reference.simulate(ps, t, f)["q"]
    errs = [np.abs(run_core(ps, t, f, steps_per_period=s)[0] - ref).max() for s in (20, 40, 80)]
    orders = np.log2(np.array(errs[:-1]) / np.array(errs[1:]))
    assert orders.min() >= 2.0, orders


# -------------------------------------------------------------------- core vs reference
@pytest.mark.parametrize("ps_name", ["one", "five"])
@pytest.mark.parametrize("kind", ["ringdown", "sine", "random"])
@pytest.mark.parametrize("regime,level", [("micro", 0.02), ("macro", 3.0)])
def test_core_matches_reference_at_default_settings(ps_name, kind, regime, level):
    """Default steps per period: q within 1e-3 of its peak, every mode, against the SciPy
    reference with the same held inputs; the run reaches the intended regime."""
    ps = ONE if ps_name == "one" else FIVE
    t = np.arange(0, 0.2, 1e-3)
    f = forcing(kind, ps, t, level if kind != "ringdown" else level * 0.3, seed=3)
    ref = reference.simulate(ps, t, f)["q"]
    got, sim = run_core(ps, t, f)
    assert sim.steps_per_period == DEFAULT_STEPS_PER_PERIOD
    peak = np.abs(ref).max(axis=0)
    err = np.abs(got - ref).max(axis=0)
    assert np.all(err <= TOL_DEFAULT * peak), err / peak
    reach = peak / phimax(ps)
    if regime == "macro":
        assert reach.max() > 1.0
    else:
        assert reach.max() < 1.0


# ----------------------------------------------------------------- contract of step()
def test_step_contract_and_state_round_trip():
    """Zero steps are no-ops, a restored state continues bit for bit, results are deterministic."""
    ps = FIVE
    t = np.arange(0, 0.05, 1e-3)
    f = forcing("random", ps, t, 2.0, seed=5)
    sim = ModalSimulator(ps, kernel="python")
    for k in range(25):
        sim.set_inputs(modal_forces=f[k])
        sim.step(1e-3)
    before = sim.q.copy()
    assert sim.step(0.0) == (True, "")
    assert np.array_equal(sim.q, before)
    saved = sim.get_state()
    rest = []
    for k in range(25, 49):
        sim.set_inputs(modal_forces=f[k])
        sim.step(1e-3)
        rest.append(np.r_[sim.q, sim.qdot, sim.joint_force, sim.energy_joint])
    other = ModalSimulator(ps, kernel="python")
    other.set_state(saved)
    for k, row in zip(range(25, 49), rest):
        other.set_inputs(modal_forces=f[k])
        other.step(1e-3)
        assert np.array_equal(np.r_[other.q, other.qdot, other.joint_force, other.energy_joint], row)



def test_state_of_another_layout_is_refused():
    """A state whose joint-state array has another width (an older layout) is refused, not
    half-restored."""
    import io

    sim = ModalSimulator(FIVE, kernel="python")
    sim.step(1e-3)
    with np.load(io.BytesIO(sim.get_state())) as z:
        parts = {k: z[k] for k in z.files}
    before = sim.get_state()
    parts["js"] = parts["js"][:, :14]
    buf = io.BytesIO()
    np.savez(buf, **parts)
    with pytest.raises(InputError, match="another structure or version"):
        sim.set_state(buf.getvalue())
    assert sim.get_state() == before

def test_failed_step_keeps_the_state(monkeypatch):
    """A step that fails midway (here: the kernel raises after doing real work, popping loops
    below the starting depth) is undone exactly, stack included."""
    ps = ONE
    sim = ModalSimulator(ps, kernel="python")
    pm = phimax(ps)[0]
    w2 = (2 * math.pi * 100.0) ** 2
    for level in (0.8, -0.6, 0.4, -0.2, 0.1):   # nested loops on the stack
        sim.set_inputs(modal_forces=[level * pm * w2])
        sim.step(0.5)
    assert sim.stack_depth[0] >= 4
    sim.set_inputs(modal_forces=[-2.0 * pm * w2])   # will wipe out every loop
    state = sim.get_state()
    stack = sim._stk.copy()
    real = K.advance

    def failing(*args):
        real(*args)
        raise FloatingPointError("injected")

    monkeypatch.setattr(K, "advance", failing)
    ok, msg = sim.step(0.1)
    assert not ok and "injected" in msg and "state kept" in msg
    assert sim.get_state() == state
    assert np.array_equal(sim._stk[:, : sim.stack_depth.max()], stack[:, : sim.stack_depth.max()])


@pytest.mark.parametrize("bad,msg", [
    (dict(modal_forces=[float("nan")]), "must be finite"),
    (dict(modal_forces=[1.0, 2.0]), "expected 1 values"),
    (dict(modal_forces=[1e300]), "|value| <="),
    (dict(base_acc=1.0), "no [base] mounting"),
])
def test_bad_inputs_rejected_and_nothing_changed(bad, msg):
    sim = ModalSimulator(ONE, kernel="python")
    sim.set_inputs(modal_forces=[0.5])
    with pytest.raises(InputError, match=None) as e:
        sim.set_inputs(**bad)
    assert msg in str(e.value)
    assert np.array_equal(sim.modal_force, [0.5])


@pytest.mark.parametrize("dt", [float("nan"), -1e-3, float("inf")])
def test_bad_step_sizes_refused(dt):
    sim = ModalSimulator(ONE, kernel="python")
    ok, msg = sim.step(dt)
    assert not ok and "finite and >= 0" in msg and sim.time == 0.0


def test_bad_settings_rejected():
    with pytest.raises(InputError, match="steps_per_period"):
        ModalSimulator(ONE, steps_per_period=4)
    with pytest.raises(InputError, match="kernel"):
        ModalSimulator(ONE, kernel="fortran")


def test_point_outputs_and_base_force():
    """Point motion is the mode-shape sum; the interface force obeys Newton's second law for the
    whole structure, F_base = sum_p r_p F_p - M a_b - sum_i Gamma_i q_i'' (common practice,
    modal effective mass; see modal.py), checked here in a static limit: a constant point force
    with no base motion comes out at the base, and a constant base acceleration gives -M a_b."""
    pts = [{"label": "tip", "role": "both", "direction": "+z", "shape": [0.3, -0.2], "base_factor": 1.0}]
    ps = make_set([(50.0, 0.2, 0.2, 1e6, -0.5, 0.1), (120.0, 0.2, 0.2, 1e6, -0.5, 0.1)], base_mass=2.0,
                  points=pts)
    sim = ModalSimulator(ps, kernel="python")
    sim.set_inputs(point_forces=[3.0])
    for _ in range(200):
        sim.step(0.01)   # heavily damped: settles
    assert sim.base_force == pytest.approx(3.0, rel=1e-6)
    assert sim.point_x[0] == pytest.approx(0.3 * sim.q[0] - 0.2 * sim.q[1])
    sim.set_inputs(point_forces=[0.0], base_acc=9.81)
    for _ in range(200):
        sim.step(0.01)
    assert sim.base_force == pytest.approx(-2.0 * 9.81, rel=1e-6)
    assert sim.point_a[0] == pytest.approx(9.81, rel=1e-6)   # absolute: moves with the base


def test_outputs_follow_the_modal_mapping_while_moving():
    """During a forced response with base motion, every output equals the modal formulas written
    out here with NumPy (modal.py's docstring; Craig and Kurdila 2006, ch. 10-11):
    x = Phi_o q, v = Phi_o q', a = Phi_o q'' + r_o a_b, q'' = f - c q' - Kinf q - F_J,
    f = Phi_i^T F + f_mod - Gamma a_b, F_base = r_i . F - M a_b - Gamma . q''."""
    pts = [{"label": "drive", "role": "input", "direction": "+z", "shape": [0.4, -0.3], "base_factor": 0.8},
           {"label": "s1", "role": "output", "direction": "+z", "shape": [0.2, 0.5], "base_factor": 1.0},
           {"label": "s2", "role": "both", "direction": "+x", "shape": [-0.1, 0.25], "base_factor": 0.0}]
    ps = make_set([(40.0, 0.01, 0.2, 0.5, -0.5, 0.1), (95.0, 0.01, 0.2, 0.5, -0.4, 0.2)], base_mass=1.5,
                  points=pts)
    sim = ModalSimulator(ps, kernel="python")
    m = sim.model
    for k in range(60):
        F = np.array([3.0 * math.sin(0.3 * k), -2.0 * math.cos(0.2 * k)])
        fm = np.array([0.1 * k % 0.7, -0.05])
        ab = 4.0 * math.sin(0.11 * k)
        sim.set_inputs(point_forces=F, modal_forces=fm, base_acc=ab)
        sim.step(1e-3)
    f = m.phi_in.T @ F + fm - m.gamma * ab
    qdd = f - 2 * m.zeta * m.omega0 * sim.qdot - m.Kinf * sim.q - sim.joint_force
    assert np.allclose(sim.modal_force, f, rtol=1e-13, atol=0)
    assert np.allclose(sim.qddot, qdd, rtol=1e-12, atol=1e-12 * np.abs(qdd).max())
    assert np.allclose(sim.point_x, m.phi_out @ sim.q, rtol=1e-13)
    assert np.allclose(sim.point_v, m.phi_out @ sim.qdot, rtol=1e-13)
    assert np.allclose(sim.point_a, m.phi_out @ qdd + m.r_out * ab, rtol=1e-11)
    assert sim.base_force == pytest.approx(m.r_in @ F - 1.5 * ab - m.gamma @ qdd, rel=1e-11)
    assert sim.energy_joint > 0 and sim.energy_joint_stored > 0


# ----------------------------------------------------------- inputs by position (the FMU's path)
def _positional_set():
    pts = [{"label": "drive", "role": "input", "direction": "+z", "shape": [0.4, -0.3], "base_factor": 0.8},
           {"label": "s1", "role": "output", "direction": "+z", "shape": [0.2, 0.5], "base_factor": 1.0}]
    return make_set([(40.0, 0.01, 0.2, 0.5, -0.5, 0.1), (95.0, 0.01, 0.2, 0.5, -0.4, 0.2)],
                    base_mass=1.5, points=pts)


def test_inputs_by_position_equal_inputs_by_group():
    """set_input_values at input_index positions and set_inputs are two doors to the same held
    inputs: the runs agree bit for bit (outputs with direct feedthrough included)."""
    ps = _positional_set()
    by_group, by_pos = ModalSimulator(ps), ModalSimulator(ps)
    pos = [by_pos.input_index("point_forces", 0), by_pos.input_index("modal_forces", 0),
           by_pos.input_index("modal_forces", 1), by_pos.input_index("base_acc")]
    assert sorted(pos) == [0, 1, 2, 3]
    for k in range(80):
        F, f1, f2, ab = 30.0 * math.sin(0.3 * k), 0.2 * math.cos(0.2 * k), -0.1, 9.0 * math.sin(0.11 * k)
        by_group.set_inputs(point_forces=[F], modal_forces=[f1, f2], base_acc=ab)
        if k % 3 == 0:      # every input at once, one group at a time, or one by one
            by_pos.set_input_values(pos, [F, f1, f2, ab])
        elif k % 3 == 1:
            by_pos.set_input_values(pos[:1], [F])
            by_pos.set_input_values(pos[1:], [f1, f2, ab])
        else:
            for p, x in zip(pos, [F, f1, f2, ab]):
                by_pos.set_input_value(p, x)
        assert np.array_equal(by_pos.output_values(), by_group.output_values())
        assert by_group.step(1e-3) == by_pos.step(1e-3) == (True, "")
    assert np.array_equal(by_pos.output_values(), by_group.output_values())


@pytest.mark.parametrize("positions,values,msg", [
    ([0], [float("nan")], "point_forces[drive] = nan: must be finite"),
    ([2], [1e300], "modal_forces[m2] = 1e+300: must be finite with |value| <="),
    ([7], [1.0], "input position 7: allowed are integers 0..3"),
    ([0, 1], [1.0], "3 input positions but 2 values: expected one value per position"),
    ([0], ["x"], "input positions and values"),
    ([1.5], [1.0], "input positions and values"),
])
def test_bad_inputs_by_position_rejected_and_nothing_changed(positions, values, msg):
    sim = ModalSimulator(_positional_set())
    sim.set_input_values([0, 1], [2.0, 0.5])
    before = sim.output_values().copy()
    with pytest.raises(InputError) as e:
        sim.set_input_values([1] + positions, [0.7] + values)   # a good value first: not applied
    assert msg in str(e.value)
    assert np.array_equal(sim.output_values(), before)


@pytest.mark.parametrize("position,value,msg", [
    (0, float("nan"), "point_forces[drive] = nan: must be finite"),
    (2, -1e300, "modal_forces[m2] = -1e+300: must be finite with |value| <="),
    (3, float("inf"), "base_acc = inf: must be finite"),
    (4, 1.0, "input position 4: allowed are integers 0..3"),
    (0, "1", None),     # a numeric string is a number here, as in set_inputs
])
def test_single_input_by_position_checked_like_the_others(position, value, msg):
    sim = ModalSimulator(_positional_set())
    sim.set_input_value(0, 2.0)
    before = sim.output_values().copy()
    if msg is None:
        sim.set_input_value(position, value)
        assert sim.output_values()[sim.output_index("point_a", 0)] != \
            before[sim.output_index("point_a", 0)]
        return
    with pytest.raises(InputError) as e:
        sim.set_input_value(position, value)
    assert msg in str(e.value)
    assert np.array_equal(sim.output_values(), before)


def test_base_input_by_position_needs_a_base():
    sim = ModalSimulator(ONE)
    with pytest.raises(InputError, match="no \\[base\\] mounting"):
        sim.input_index("base_acc")
    with pytest.raises(InputError, match="no \\[base\\] mounting; only 0 is allowed"):
        sim.set_input_values([1], [2.0])     # the base slot of the input vector
    with pytest.raises(InputError, match="no \\[base\\] mounting; only 0 is allowed"):
        sim.set_input_value(1, 2.0)
    sim.set_input_values([1], [0.0])
    sim.set_input_value(1, 0.0)
    with pytest.raises(InputError, match="needs an index in 0..0"):
        sim.input_index("modal_forces", 1)
    with pytest.raises(InputError, match="unknown input 'force'; allowed: point_forces, modal_forces"):
        sim.input_index("force")


def test_inputs_written_from_outside_are_seen():
    """input_buffer + inputs_written (the FMU's native binary writes inputs without Python) give
    the same outputs and the same step as set_input_value."""
    ps = _positional_set()
    a, b = ModalSimulator(ps), ModalSimulator(ps)
    p = a.input_index("point_forces", 0)
    a.set_input_value(p, 12.5)
    b.output_values()
    assert b.outputs_current
    b.input_buffer()[p] = 12.5
    b.inputs_written()
    assert not b.outputs_current
    assert np.array_equal(a.output_values(), b.output_values()) and b.outputs_current
    assert a.step(1e-3) == b.step(1e-3) == (True, "")
    assert np.array_equal(a.output_values(), b.output_values())
