"""The exact four-parameter Iwan joint against closed forms and an independent slider model.

Sources: D. J. Segalman, "A four-parameter Iwan model for lap-type joints", J. Appl. Mech.
72(5):752-760, 2005 (density, K_T, F_S, dissipation per cycle); Masing's rules with wiping-out for
parallel elasto-plastic elements (physics sheet sec. 3); the stop-operator replay of a fine
Jenkins-element discretization in ``tests/jenkins.py`` (independent of the closed form).
"""
import numpy as np
import pytest

from jenkins import JenkinsArray
from jointfmu.errors import ParameterError
from jointfmu.physics.iwan import IwanJoint, backbone, backbone_tangent, dissipation_per_cycle, joint_constants

FS, KT = 2.5, 4.0e4
CASES = [(-0.5, 0.2), (-0.8, 0.0), (0.0, 1.0), (-0.2, 0.5), (-0.95, 0.1)]


def turning_points(rng, phimax, n=50):
    """Random turning points: nested reversals, wiping-out, excursions into full macro-slip."""
    tp = np.cumsum(rng.normal(0.0, 0.7 * phimax, n))
    tp[n // 3: n // 3 + 4] *= 4.0                       # macro-slip both ways
    tp[-10:] = tp[-11] + 0.05 * phimax * rng.standard_normal(10)  # small nested loops
    return tp


def densify(tp, per_leg=6):
    path, u = [], 0.0
    for x in tp:
        path.extend(np.linspace(u, x, per_leg + 1)[1:])
        u = x
    return np.array(path)


@pytest.mark.parametrize("chi,beta", CASES)
def test_force_matches_20000_jenkins_elements(chi, beta):
    """Max force error <= 1e-6 Fs against 20 000 Jenkins elements on random histories."""
    ja = JenkinsArray(FS, KT, chi, beta, n=20000)
    joint = IwanJoint(FS, KT, chi, beta, merge_tol=0.0)
    rng = np.random.default_rng(int(100 * (chi + 2) + 10 * beta))
    path = densify(turning_points(rng, ja.phimax))
    err_f = err_e = 0.0
    for u in path:
        err_f = max(err_f, abs(ja.move(u) - joint.move(u)))
        err_e = max(err_e, abs(ja.stored() - joint.stored))
    assert err_f <= 1e-6 * FS
    assert err_e <= 1e-6 * FS * ja.phimax      # stored (elastic) energy, derived closed form
    assert np.abs(path).max() > 2 * ja.phimax  # the history did reach macro-slip


@pytest.mark.parametrize("chi,beta", CASES)
def test_backbone_closed_forms(chi, beta):
    """F_bb(0) slope is K_T, F_bb saturates at F_S at phimax, and the curve is odd."""
    c = joint_constants(FS, KT, chi, beta)
    # K_T and F_S recovered from the density (Segalman 2005)
    assert c.R * c.phimax ** (chi + 1) / (chi + 1) + c.S == pytest.approx(KT, rel=1e-12)
    assert c.R * c.phimax ** (chi + 2) / (chi + 2) + c.S * c.phimax == pytest.approx(FS, rel=1e-12)
    assert backbone_tangent(0.0, FS, KT, chi, beta) == pytest.approx(KT)
    assert backbone(c.phimax, FS, KT, chi, beta) == pytest.approx(FS, rel=1e-12)
    assert backbone(5 * c.phimax, FS, KT, chi, beta) == FS
    assert backbone(-0.3 * c.phimax, FS, KT, chi, beta) == -backbone(0.3 * c.phimax, FS, KT, chi, beta)
    # tangent just below phimax is S (point mass still stuck), 0 beyond
    assert backbone_tangent(c.phimax * (1 - 1e-12), FS, KT, chi, beta) == pytest.approx(c.S, abs=1e-6 * KT)
    assert backbone_tangent(2 * c.phimax, FS, KT, chi, beta) == 0.0
    # the exact joint follows the backbone on virgin loading
    j = IwanJoint(FS, KT, chi, beta)
    for u in np.linspace(0, 2 * c.phimax, 30)[1:]:
        assert j.move(u) == pytest.approx(float(backbone(u, FS, KT, chi, beta)), rel=1e-13)


def test_initial_stiffness_from_tiny_motion():
    """Secant stiffness of a tiny virgin loading tends to K_T; K_T - F/u ~ u^(chi+1) (physics
    sheet sec. 2), so test the closed-form rate rather than a finite difference."""
    chi, beta = -0.5, 0.2
    c = joint_constants(FS, KT, chi, beta)
    for u in (1e-6, 1e-9) * np.array(c.phimax):
        j = IwanJoint(FS, KT, chi, beta)
        gap = KT - j.move(u) / u
        assert gap == pytest.approx(c.R * u ** (chi + 1) / ((chi + 1) * (chi + 2)), rel=1e-6)


@pytest.mark.parametrize("chi,beta", CASES)
@pytest.mark.parametrize("amp", [0.01, 0.1, 0.5, 0.99, 1.5, 4.0])
def test_dissipation_per_cycle(chi, beta, amp):
    """Energy per symmetric cycle: 4 R A^(chi+3)/((chi+2)(chi+3)) in micro-slip,
    D(phimax) + 4 F_S (A - phimax) in macro-slip (Segalman 2005; physics sheet sec. 4),
    both from the joint's own dissipation counter and from the loop area int F du."""
    c = joint_constants(FS, KT, chi, beta)
    A = amp * c.phimax
    j = IwanJoint(FS, KT, chi, beta)
    j.move(A)
    j.move(-A)
    j.move(A)
    d0 = j.dissipated
    u = np.concatenate([np.linspace(A, -A, 4001), np.linspace(-A, A, 4001)[1:]])
    f = j.history(u)
    expected = float(dissipation_per_cycle(A, FS, KT, chi, beta))
    assert j.dissipated - d0 == pytest.approx(expected, rel=1e-12)
    area = np.trapezoid(f, u)  # descending on the upper branch, back on the lower one
    assert area == pytest.approx(expected, rel=2e-5)
    if amp < 1:
        assert expected == pytest.approx(4 * c.R * A ** (chi + 3) / ((chi + 2) * (chi + 3)), rel=1e-12)


def test_masing_branch_and_wiping_out():
    """After a reversal the branch is F_r + 2 F_bb((u - u_r)/2); closing an inner loop brings
    the outer branch back (wiping-out); passing -u_1 returns to the virgin curve."""
    chi, beta = -0.4, 0.3
    c = joint_constants(FS, KT, chi, beta)
    bb = lambda x: float(backbone(x, FS, KT, chi, beta))  # noqa: E731
    j = IwanJoint(FS, KT, chi, beta)
    u1 = 0.6 * c.phimax
    f1 = j.move(u1)
    assert j.move(0.1 * c.phimax) == pytest.approx(f1 + 2 * bb((0.1 * c.phimax - u1) / 2), rel=1e-13)
    assert j.depth == 1
    j.move(0.3 * c.phimax)  # inner reversal at 0.1 phimax
    assert j.depth == 2
    j.move(0.05 * c.phimax)  # passes 0.1 phimax: the inner loop is wiped out
    assert j.depth == 1
    assert j.force == pytest.approx(f1 + 2 * bb((0.05 * c.phimax - u1) / 2), rel=1e-12)
    j.move(-0.7 * c.phimax)  # passes -u1: back on the virgin curve
    assert j.depth == 0
    assert j.force == pytest.approx(bb(-0.7 * c.phimax), rel=1e-12)


def test_stack_bounded_by_merge_tolerance():
    """A slowly decaying oscillation nests a loop per half cycle; pairs whose force effect is
    below merge_tol * Fs are dropped, so the stack stays bounded and the force error stays below
    the tolerance (compared with no merging)."""
    chi, beta = -0.5, 0.1
    c = joint_constants(FS, KT, chi, beta)
    n = 4000
    k = np.arange(n)
    u = c.phimax * np.exp(-0.01 * k) * np.cos(np.pi * k) + 1e-3 * c.phimax
    exact = IwanJoint(FS, KT, chi, beta, merge_tol=0.0, capacity=8192)
    merged = IwanJoint(FS, KT, chi, beta, merge_tol=1e-10)
    fe = exact.history(u)
    fm = merged.history(u)
    assert exact.depth > 2500            # without merging nearly every half cycle stays
    # below ~1e-6 phimax (hysteresis < 1e-10 Fs) no new loop is kept: about 1400 half cycles here
    assert merged.depth < 1500 < exact.depth
    assert np.abs(fe - fm).max() <= 1e-9 * FS


def test_full_stack_drops_innermost_loop():
    """A stack at capacity drops its innermost pair: bounded memory, force still sane."""
    chi, beta = -0.5, 0.1
    c = joint_constants(FS, KT, chi, beta)
    k = np.arange(400)
    u = c.phimax * (0.9 ** (k / 10)) * np.cos(np.pi * k)
    small = IwanJoint(FS, KT, chi, beta, merge_tol=0.0, capacity=8)
    big = IwanJoint(FS, KT, chi, beta, merge_tol=0.0)
    fs, fb = small.history(u), big.history(u)
    assert small.depth <= 8
    assert np.abs(fs - fb).max() <= 0.05 * FS


@pytest.mark.parametrize("bad", [dict(chi=-1.0), dict(chi=0.2), dict(beta=-0.1), dict(Fs=0.0), dict(Kt=-1.0)])
def test_bad_joint_parameters_rejected(bad):
    args = dict(Fs=FS, Kt=KT, chi=-0.5, beta=0.1) | bad
    with pytest.raises(ParameterError) as e:
        IwanJoint(**args)
    assert list(bad)[0] in str(e.value)
