"""The modal structure: how physical inputs become modal forces and modal motion becomes outputs.

A structure is a set of uncoupled modes in mass-normalized coordinates q (modal mass 1, units
m*sqrt(kg)).  For a structure on a base that moves with acceleration a_b along its mounting
direction, in coordinates relative to the base (common practice; e.g. R. R. Craig and
A. J. Kurdila, Fundamentals of Structural Dynamics, 2nd ed., Wiley 2006, ch. 10 and 11):

    q_i'' + 2 zeta_i w_i q_i' + Kinf_i q_i + F_J,i(q_i) = sum_p phi_pi F_p + f_i - Gamma_i a_b

with phi_pi the mode-shape coefficient of mode i at input point p, f_i a direct modal force and
Gamma_i = phi_i^T M r the base participation factor.  Outputs at point o:

    x_o = sum_i phi_oi q_i            (relative to the base)
    v_o = sum_i phi_oi q_i'           (relative to the base)
    a_o = sum_i phi_oi q_i'' + r_o a_b   (absolute: what an accelerometer reads)

and the interface force, the force the structure exerts on its mounting along the base direction,

    F_base = sum_p r_p F_p - M a_b - sum_i Gamma_i q_i''

(Newton's second law for the whole structure; the residual mass M - sum Gamma_i^2 of the modes
left out moves rigidly with the base).  Direct modal forces are taken as self-equilibrated: they
have no resultant of their own on the base.

The arrays are built here; the mapping itself is evaluated inside the compiled step
(``_kernel.modal_inputs`` and ``_kernel.outputs``), so that one call does a whole caller's step.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ModalModel"]


@dataclass(frozen=True, eq=False)
class ModalModel:
    """Arrays of one parameter set, ready for stepping.

    Attributes
    ----------
    omega0 : ndarray, shape (N,)
        Low-amplitude natural circular frequencies [rad/s].
    zeta : ndarray, shape (N,)
        Viscous damping ratios [-], applied with omega0 (c = 2 zeta omega0).
    Kinf : ndarray, shape (N,)
        Stiffness left when the joint slips fully, omega0^2 - Kt [1/s^2].
    Fs, Kt, chi, beta : ndarray, shape (N,)
        Joint parameters in modal coordinates.
    phi_in : ndarray, shape (n_in, N)
        Mode shapes at input points [1/sqrt(kg)].
    phi_out : ndarray, shape (n_out, N)
        Mode shapes at output points [1/sqrt(kg)].
    r_in, r_out : ndarray, shape (n_in,), (n_out,)
        Component of the unit base motion along each point's direction [-].
    gamma : ndarray, shape (N,)
        Base participation factors [sqrt(kg)] (zero when not base-mounted).
    total_mass : float
        Total mass on the base [kg] (0 when not base-mounted).
    """

    omega0: np.ndarray
    zeta: np.ndarray
    Kinf: np.ndarray
    Fs: np.ndarray
    Kt: np.ndarray
    chi: np.ndarray
    beta: np.ndarray
    mode_labels: tuple
    input_labels: tuple
    output_labels: tuple
    phi_in: np.ndarray
    phi_out: np.ndarray
    r_in: np.ndarray
    r_out: np.ndarray
    gamma: np.ndarray
    total_mass: float
    has_base: bool

    @classmethod
    def from_params(cls, params) -> "ModalModel":
        """Build from a :class:`~jointfmu.params.ParameterSet`."""
        modes = params.modes
        n = len(modes)
        ins = params.input_points
        outs = params.output_points

        def arr(values):
            a = np.array(values, dtype=float)
            a.setflags(write=False)
            return a

        def shapes(points):
            return arr([p.shape for p in points]).reshape(len(points), n)

        has_base = params.base is not None
        return cls(
            omega0=arr([2.0 * np.pi * m.f0 for m in modes]),
            zeta=arr([m.zeta for m in modes]),
            Kinf=arr([(2.0 * np.pi * m.f0) ** 2 - m.joint.Kt for m in modes]),
            Fs=arr([m.joint.Fs for m in modes]),
            Kt=arr([m.joint.Kt for m in modes]),
            chi=arr([m.joint.chi for m in modes]),
            beta=arr([m.joint.beta for m in modes]),
            mode_labels=tuple(m.label for m in modes),
            input_labels=tuple(p.label for p in ins),
            output_labels=tuple(p.label for p in outs),
            phi_in=shapes(ins),
            phi_out=shapes(outs),
            r_in=arr([p.base_factor if has_base else 0.0 for p in ins]),
            r_out=arr([p.base_factor if has_base else 0.0 for p in outs]),
            gamma=arr([m.base_participation if has_base else 0.0 for m in modes]),
            total_mass=float(params.base.total_mass) if has_base else 0.0,
            has_base=has_base,
        )

    @property
    def n_modes(self) -> int:
        return int(self.omega0.shape[0])

    def feedthrough(self, structural: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """Direct feedthrough: how the outputs at a communication point depend on the held inputs.

        The state (q, q') does not change with the inputs before a step, so x, v, q, q', the
        joint force and the energies do not depend on them; the modal accelerations do,
        ``q_i'' = f_i(inputs) - 2 zeta_i w_i q_i' - Kinf_i q_i - F_J,i(q_i)`` with
        ``f_i = sum_p phi_pi F_p + f_i^direct - Gamma_i a_b``, and so do the point accelerations
        and the base force (module docstring).  Both are linear in the inputs with factors made of
        mode shapes, base participations, base factors and the total mass, none of which is an
        FMU parameter:

            d a_o / d F_p = sum_i phi_oi phi_pi,   d a_o / d f_i = phi_oi,
            d a_o / d a_b = r_o - sum_i phi_oi Gamma_i,
            d F_base / d F_p = r_p - sum_i Gamma_i phi_pi,   d F_base / d f_i = -Gamma_i,
            d F_base / d a_b = -M + sum_i Gamma_i^2.

        Parameters
        ----------
        structural : bool
            False: the factors above.  True: every term taken by its absolute value, so an entry
            is zero only when no term connects the input to the output (a structural dependency;
            a factor whose terms happen to cancel still counts).

        Returns
        -------
        (ndarray, ndarray)
            ``D_a``, shape (n_out, n_u): point accelerations per unit input; ``D_base``, shape
            (n_u,): base force per unit input.  Inputs in the kernel's order: point forces
            (n_in), direct modal forces (N), base acceleration (1; zero column without a base).
        """
        ab = np.abs if structural else (lambda a: a)
        sign = 1.0 if structural else -1.0
        n_in, n = self.phi_in.shape[0], self.n_modes
        n_u = n_in + n + 1
        d_a = np.zeros((self.phi_out.shape[0], n_u))
        d_base = np.zeros(n_u)
        d_a[:, :n_in] = ab(self.phi_out) @ ab(self.phi_in).T
        d_a[:, n_in:n_in + n] = ab(self.phi_out)
        d_base[n_in:n_in + n] = sign * ab(self.gamma)
        if self.has_base:
            d_a[:, n_in + n] = ab(self.r_out) + sign * (ab(self.phi_out) @ ab(self.gamma))
            d_base[:n_in] = ab(self.r_in) + sign * (ab(self.phi_in) @ ab(self.gamma))
            d_base[n_in + n] = sign * self.total_mass + float(np.sum(self.gamma ** 2))
        return d_a, d_base
