"""Stuck-joint modes of a discrete-joint structure, and the modal-Iwan template they give.

With every joint stuck (its stiffness K_T in the stiffness matrix) the structure is linear:
K0 phi = w^2 M phi, solved with :func:`scipy.linalg.eigh` (generalized symmetric problem; the
shapes come out mass-normalized, phi^T M phi = 1).  Sign convention: each shape's largest
component (the first one on a tie) is positive.

The template (a ``jointfmu-params/1`` parameter set) keeps the lowest modes: their f0 and damping
ratio, their mass-normalized shapes at the points, the base participation factors and, per mode,
one equivalent modal Iwan joint, derived here from the discrete joints for a motion in that mode
alone.  With c_j = b_j^T phi the joint's relative displacement per unit modal amplitude:

* K_T of the mode = sum_j c_j^2 K_T,j: exact at low amplitude (the stuck stiffness the joints
  add to the mode);
* chi and beta: means of the joints' values weighted by c_j^2 K_T,j;
* F_S from the micro-slip dissipation: the mode's joints dissipate D(A) = sum_j D_j(|c_j| A) per
  cycle of modal amplitude A (Segalman 2005, physics sheet sec. 4), matched at A_ref = 0.1 of the
  smallest amplitude at which a joint reaches its phimax, D = 4 R A^(chi+3)/((chi+2)(chi+3)),
  and F_S solved from R, K_T, chi, beta (:func:`jointfmu.physics.iwan.slip_force_from_R`).

This is the uncoupled-modes picture the fit assumes; it is an approximation where one joint
slips in several modes (what the discrete-joint model is there to show), and at the transition
to macro-slip (the sum of joint backbones is not one four-parameter backbone).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy.linalg

from ..errors import ParameterError, Problem
from ..params import (Base, JointParams, Mode, ParameterSet, Point, Provenance,
                      save_parameter_set)
from ..physics.iwan import dissipation_per_cycle, joint_constants, slip_force_from_R
from .model import LumpedModel

__all__ = ["StuckModes", "stuck_modes", "modal_joint", "modal_iwan_template", "write_template",
           "format_modes"]

_TWO_PI = 2.0 * math.pi


@dataclass(frozen=True, eq=False)
class StuckModes:
    """The linear modes of a structure with every joint stuck.

    Attributes
    ----------
    frequency : ndarray, shape (N,)
        Natural frequencies [Hz], ascending (N = number of DOFs).
    omega : ndarray, shape (N,)
        Circular frequencies [rad/s].
    zeta : ndarray, shape (N,)
        Viscous damping ratios from the model's ``[damping]``.
    shapes : ndarray, shape (n_dofs, N)
        Mass-normalized shapes [1/sqrt(kg)], phi^T M phi = I.
    labels : tuple of str
        Mode labels (the model's ``[modes] labels``, then ``mode_<k>``).
    coupling : ndarray, shape (n_joints, N)
        c[j, i] = b_j^T phi_i: joint j's relative displacement per unit modal amplitude of mode i.
    base_participation : ndarray, shape (N,)
        Gamma_i = phi_i^T M r [sqrt(kg)] (zero without a base).
    joint_share : ndarray, shape (N,)
        Share of the modal stiffness w_i^2 carried by the stuck joints, sum_j c_ji^2 K_T,j / w_i^2.
    """

    frequency: np.ndarray
    omega: np.ndarray
    zeta: np.ndarray
    shapes: np.ndarray
    labels: tuple
    coupling: np.ndarray
    base_participation: np.ndarray
    joint_share: np.ndarray

    @property
    def n_modes(self) -> int:
        return int(self.omega.shape[0])


def stuck_modes(model: LumpedModel) -> StuckModes:
    """Frequencies, mass-normalized shapes and damping of the stuck-joint modes.

    Raises
    ------
    ParameterError
        When the damping gives a ratio >= 1 for some mode (Rayleigh coefficients too large).
    """
    m = model.masses()
    K0 = model.stiffness(joints_stuck=True)
    lam, phi = scipy.linalg.eigh(K0, np.diag(m))
    # grounding was checked with the file, so K0 is positive definite; clip rounding only
    omega = np.sqrt(np.maximum(lam, 0.0))
    big = np.argmax(np.abs(phi), axis=0)
    phi = phi * np.where(phi[big, np.arange(phi.shape[1])] < 0.0, -1.0, 1.0)
    zeta = model.damping.ratios(omega)
    bad = np.nonzero(~(zeta < 1.0))[0]
    if bad.size:
        i = int(bad[0])
        fld = "damping.rayleigh_alpha/rayleigh_beta" if model.damping.is_rayleigh else "damping"
        raise ParameterError([Problem(model.source, fld, float(zeta[i]),
                                      f"gives a damping ratio >= 1 for mode {i + 1} "
                                      f"({omega[i] / _TWO_PI:.4g} Hz): every mode must oscillate "
                                      "(0 <= zeta < 1)")])
    n = omega.shape[0]
    labels = tuple(model.mode_labels[i] if i < len(model.mode_labels) else f"mode_{i + 1}"
                   for i in range(n))
    C = model.joint_vectors() @ phi
    kt = np.array([j.Kt for j in model.joints])
    share = (kt[:, None] * C**2).sum(axis=0) / np.maximum(omega**2, np.finfo(float).tiny)
    gamma = phi.T @ (m * model.base_vector())
    ro = lambda a: (a.setflags(write=False), a)[1]  # noqa: E731 - read-only views
    return StuckModes(ro(omega / _TWO_PI), ro(omega), ro(np.asarray(zeta, dtype=float)), ro(phi),
                      labels, ro(C), ro(gamma), ro(share))


def modal_joint(model: LumpedModel, modes: StuckModes, i: int) -> tuple[JointParams, str]:
    """The equivalent modal Iwan joint of mode ``i`` (0-based; see the module docstring).

    Returns
    -------
    (JointParams, str)
        The joint in modal coordinates (Fs in N/sqrt(kg), Kt in 1/s^2) and a note ("" when
        nothing was adjusted).
    """
    w2 = modes.omega[i] ** 2
    c = np.abs(modes.coupling[:, i])
    joints = model.joints
    wts = np.array([j.Kt for j in joints]) * c**2
    kt = float(wts.sum())
    if not joints or kt <= 1e-9 * w2:
        # the joints do not move in this mode: a stiff joint far from slipping stands in
        ktp = 1e-6 * w2
        return (JointParams(Fs=ktp * 1e3, Kt=ktp, chi=-0.5, beta=0.0),
                "joints do not move in this mode; placeholder joint (Kt 1e-6 of the modal "
                "stiffness, slip far away)")
    note = ""
    if kt >= (1.0 - 1e-6) * w2:
        kt = (1.0 - 1e-6) * w2
        note = "joints carry the whole modal stiffness; Kt capped at (1 - 1e-6) (2 pi f0)^2"
    share = wts / wts.sum()
    chi = float(np.dot(share, [j.chi for j in joints]))
    beta = float(np.dot(share, [j.beta for j in joints]))
    moving = [k for k in range(len(joints)) if share[k] > 1e-6]
    a_onset = min(joint_constants(joints[k].Fs, joints[k].Kt, joints[k].chi,
                                  joints[k].beta).phimax / c[k] for k in moving)
    a_ref = 0.1 * a_onset
    d_ref = sum(float(dissipation_per_cycle(c[k] * a_ref, joints[k].Fs, joints[k].Kt,
                                            joints[k].chi, joints[k].beta)) for k in moving)
    # D = 4 R A^(chi+3) / ((chi+2)(chi+3))  (Segalman 2005; physics sheet sec. 4)
    R = d_ref * (chi + 2.0) * (chi + 3.0) / (4.0 * a_ref ** (chi + 3.0))
    Fs = float(slip_force_from_R(R, kt, chi, beta))
    return JointParams(Fs=Fs, Kt=kt, chi=chi, beta=beta), note


def modal_iwan_template(model: LumpedModel, count: int | None = None,
                        modes: StuckModes | None = None) -> ParameterSet:
    """The modal-Iwan parameter set of the lowest ``count`` stuck-joint modes (a fit template).

    ``count`` defaults to the model's ``[modes] count``, else the number of ``[modes] labels``,
    else every mode.  Points keep their labels, roles, directions and ``test_node`` numbers.
    """
    modes = modes or stuck_modes(model)
    n = modes.n_modes
    if count is None:
        count = model.template_count or len(model.mode_labels) or n
    if not 1 <= int(count) <= n:
        raise ParameterError([Problem(model.source, "modes.count", count,
                                      f"must be an integer from 1 to {n} (the number of modes)")])
    count = int(count)
    has_base = model.base_direction is not None
    r = model.base_vector()
    out_modes = []
    notes = []
    for i in range(count):
        joint, note = modal_joint(model, modes, i)
        if note:
            notes.append(f"mode {i + 1}: {note}")
        out_modes.append(Mode(modes.labels[i], float(modes.frequency[i]), float(modes.zeta[i]),
                              joint, float(modes.base_participation[i]) if has_base else 0.0))
    Sp = model.point_vectors(model.points)
    shapes = Sp @ modes.shapes[:, :count]
    rp = Sp @ r
    points = [Point(pt.label, pt.role, pt.direction, tuple(float(x) for x in shapes[k]),
                    float(rp[k]) if has_base else 1.0, test_node=pt.test_node)
              for k, pt in enumerate(model.points)]
    base = None
    if has_base:
        base = Base(float(np.dot(model.masses(), r)), model.base_direction)
    src = Path(model.source).name
    digest = f", sha256 {model.source_sha256[:16]}" if model.source_sha256 else ""
    prov = Provenance(
        fitted_by="jointfmu modes (stuck-joint modes of a discrete-joint structure)",
        date="",
        source_data=f"discrete-joint model {src}{digest}, build {model.build}",
        notes=("Template for a fit: f0, zeta, shapes and base participation are the stuck-joint "
               "modes' (exact for the model); each mode's joint is the equivalent modal Iwan "
               "joint for a motion in that mode alone (Kt exact at low amplitude, chi and beta "
               "weighted means, Fs matching the micro-slip dissipation at 0.1 of the first "
               "joint's slip amplitude)." + (" " + "; ".join(notes) if notes else "")))
    return ParameterSet(name=model.name, build=model.build,
                        description=(model.description or "") + " [stuck-joint modal template]",
                        provenance=prov, modes=tuple(out_modes), points=tuple(points), base=base,
                        source=f"template of {model.source}")


def write_template(model: LumpedModel, path, count: int | None = None) -> Path:
    """Write :func:`modal_iwan_template` atomically to ``path``; returns the path."""
    return save_parameter_set(modal_iwan_template(model, count), path)


def format_modes(model: LumpedModel, modes: StuckModes | None = None, count: int | None = None) -> str:
    """A text table of the stuck-joint modes: frequency, damping, joint share, base
    participation, and each joint's share of the mode's joint stiffness."""
    modes = modes or stuck_modes(model)
    n = modes.n_modes if count is None else min(count, modes.n_modes)
    lines = [f"{model.set_id}: {model.n_dofs} DOFs, {model.n_joints} joints; stuck-joint modes"]
    head = f"  {'#':>3} {'label':<16} {'f [Hz]':>10} {'zeta':>8} {'joints':>7}"
    if model.base_direction is not None:
        head += f" {'Gamma':>8}"
    if model.joints:
        head += "  joint shares (c^2 Kt / sum)"
    lines.append(head)
    kt = np.array([j.Kt for j in model.joints])
    for i in range(n):
        row = (f"  {i + 1:>3} {modes.labels[i]:<16} {modes.frequency[i]:>10.4f} "
               f"{modes.zeta[i]:>8.5f} {100 * modes.joint_share[i]:>6.2f}%")
        if model.base_direction is not None:
            row += f" {modes.base_participation[i]:>8.4f}"
        if model.joints:
            w = kt * modes.coupling[:, i] ** 2
            tot = w.sum()
            row += "  " + " ".join(f"{j.label}:{(w[k] / tot if tot > 0 else 0):.2f}"
                                   for k, j in enumerate(model.joints))
        lines.append(row)
    return "\n".join(lines)
