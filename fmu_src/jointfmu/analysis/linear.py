"""Equivalent linear models of a modal Iwan structure at chosen amplitudes.

At a modal displacement amplitude A_i per mode, each joint is replaced by its describing function
(first harmonic of the steady Masing loop): an in-phase stiffness k1(A) and a quadrature part
``k2 = D_J(A) / (pi A^2)`` (D_J the joint's dissipation per cycle, Segalman, "A four-parameter Iwan
model for lap-type joints", J. Appl. Mech. 72(5):752-760, 2005).  The state-space model needs a
viscous form, so the quadrature part is taken as viscous at the first-harmonic frequency:

    omega_1^2 = Kinf + k1(A)                          (first-harmonic frequency, physics sheet
                                                       sec. 5, [derived])
    c_eq      = 2 zeta omega0 + D_J / (pi omega_1 A^2)  (energy equivalence at omega_1)
    zeta_eq   = c_eq / (2 omega_1)
              = (D_J + pi c omega_1 A^2) / (2 pi omega_1^2 A^2)

These are the frequency and damping a *steady-state harmonic response* near resonance needs: at
omega_1 the model dissipates per cycle exactly what the Iwan joint does.  They are not the
ring-down values (a free decay measures ``zeta_rd``, a few percent higher, see
:class:`~.characterize.ModeCurves`), and away from omega_1 the viscous form overstates (above) or
understates (below) the rate-independent joint damping.  Higher harmonics are neglected: near
resonance expect agreement with the nonlinear model within a few percent (measured in
``tests/test_linear.py``).  At A = 0 the model is the low-amplitude one (f0, zeta).

States ``[q_1, qdot_1, q_2, qdot_2, ...]`` (modal displacement [m sqrt(kg)] and velocity), inputs
and outputs named like the FMU variables:

* inputs: ``point.<label>.force`` [N], ``mode[<i>].force`` [N/sqrt(kg)], ``base.acceleration``
  [m/s^2];
* outputs: ``point.<label>.x`` [m], ``point.<label>.v`` [m/s] (relative to the base),
  ``point.<label>.a`` [m/s^2] (absolute), ``base.force`` [N], ``mode[<i>].q``, ``mode[<i>].qdot``.

The input-output relations are those of :mod:`.modal` with the joint linearized.

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import csv
import io
import json
import math
import os
import shutil
import tempfile
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
from scipy.optimize import brentq

from ..errors import InputError
from ..fileio import check_output_path, swap_into_place
from ..params.names import (BASE_ACCELERATION, BASE_FORCE, mode_name, parse_name,
                            point_name)
from ..physics.iwan import dissipation_per_cycle, joint_constants

__all__ = [
    "LinearModel",
    "equivalent_linear",
    "modal_amplitudes_at_point",
    "amplitude_vector",
    "available_inputs",
    "available_outputs",
    "CAUTION",
    "FILE_FORMAT",
]

#: The caution every written model carries.
CAUTION = ("A fitted model is no substitute for qualification testing; defer to the applicable "
           "codes, standards and licensed engineering practice.")
#: Format tag of the files :meth:`LinearModel.save` writes.
FILE_FORMAT = "jointfmu-linear/1"

_TWO_PI = 2.0 * math.pi
_DEFINITIONS = {
    "states": "[q_i, qdot_i] per mode: mass-normalized modal displacement [m*sqrt(kg)] and "
              "velocity [m*sqrt(kg)/s]",
    "dynamics": "qdot_i' = -omega_i^2 q_i - 2 zeta_i omega_i qdot_i + f_i, f_i = sum_p phi_pi F_p "
                "+ f_modal_i - Gamma_i a_base",
    "frequency": "first-harmonic (describing-function) frequency omega_1(A) = sqrt(Kinf + k1(A)) "
                 "of the Iwan joint's steady Masing loop at modal amplitude A",
    "damping": "energy-equivalent at omega_1: zeta_eq = (D_J(A) + pi c omega_1 A^2) / "
               "(2 pi omega_1^2 A^2), c = 2 zeta omega0, D_J the joint dissipation per cycle "
               "(Segalman 2005)",
    "use": "steady-state harmonic response near each mode's resonance at the chosen amplitude; "
           "not ring-down (free-decay) damping, not transient or broadband response",
    "outputs": "point x and v relative to the base, point a absolute, base.force the force on "
               "the mounting along the base direction",
}


def _fmt_modes(labels) -> str:
    return ", ".join(f"{i + 1} ({lab})" for i, lab in enumerate(labels))


def available_inputs(params) -> tuple[str, ...]:
    """Input names a linear model of ``params`` can have, in the default order."""
    names = [point_name(p.label, "force") for p in params.input_points]
    names += [mode_name(i + 1, "force") for i in range(params.n_modes)]
    if params.base is not None:
        names.append(BASE_ACCELERATION)
    return tuple(names)


def available_outputs(params) -> tuple[str, ...]:
    """Output names a linear model of ``params`` can have, in the default order."""
    names = []
    for p in params.output_points:
        names += [point_name(p.label, q) for q in ("x", "v", "a")]
    if params.base is not None:
        names.append(BASE_FORCE)
    for i in range(params.n_modes):
        names += [mode_name(i + 1, "q"), mode_name(i + 1, "qdot")]
    return tuple(names)


def _is_modal(name: str) -> bool:
    parsed = parse_name(name)
    return parsed is not None and parsed.kind == "mode"


def _default_inputs(params):
    phys = tuple(n for n in available_inputs(params) if not _is_modal(n))
    return phys or available_inputs(params)  # no points and no base: the modal forces


def _default_outputs(params):
    phys = tuple(n for n in available_outputs(params) if not _is_modal(n))
    return phys or available_outputs(params)  # no points and no base: the modal coordinates


def _mode_index(params, key) -> int:
    """0-based mode index from a 1-based int, its text, or a mode label."""
    labels = [m.label for m in params.modes]
    if isinstance(key, (int, np.integer)) and not isinstance(key, bool):
        k = int(key)
    elif isinstance(key, str) and key.strip().isdigit():
        k = int(key)
    elif isinstance(key, str) and key in labels:
        return labels.index(key)
    else:
        raise InputError(f"mode {key!r}: not a mode of {params.set_id}; allowed are the numbers "
                         f"1..{params.n_modes} or the labels: {_fmt_modes(labels)}")
    if not 1 <= k <= params.n_modes:
        raise InputError(f"mode {key!r}: allowed are 1..{params.n_modes} ({_fmt_modes(labels)})")
    return k - 1


def amplitude_vector(params, amplitudes) -> np.ndarray:
    """Modal amplitudes as an array, shape (N,), from an array or a mapping.

    Parameters
    ----------
    params : ParameterSet
    amplitudes : array_like, shape (N,), or mapping
        One modal amplitude per mode [m sqrt(kg)], >= 0; or mode (1-based number, its text, or
        label) -> amplitude, the modes not named 0.  In a mapping a later key for the same mode
        wins.

    Raises
    ------
    InputError
        Unknown mode, wrong count, negative or non-finite value.
    """
    n = params.n_modes
    if isinstance(amplitudes, Mapping):
        out = np.zeros(n)
        for key, val in amplitudes.items():
            out[_mode_index(params, key)] = _amp_value(val, f"amplitude of mode {key!r}")
        return out
    a = np.asarray(amplitudes, dtype=float).reshape(-1) if not np.isscalar(amplitudes) else None
    if a is None or a.shape != (n,):
        raise InputError(f"amplitudes: give {n} modal amplitudes (one per mode, m*sqrt(kg), >= 0) "
                         f"or a mapping mode -> amplitude; got {amplitudes!r}")
    for i, v in enumerate(a):
        _amp_value(v, f"amplitude of mode {i + 1}")
    return a.astype(float)


def _amp_value(v, what) -> float:
    try:
        x = float(v)
    except (TypeError, ValueError):
        raise InputError(f"{what}: {v!r} is not a number (modal amplitude in m*sqrt(kg), >= 0)") from None
    if not (math.isfinite(x) and x >= 0):
        raise InputError(f"{what}: {x!r}; allowed is a finite modal amplitude >= 0 m*sqrt(kg)")
    return x


def _mode_freq_zeta(mode, A: float) -> tuple[float, float]:
    """(omega_1 [rad/s], zeta_eq [-]) of one mode at modal amplitude A (see module docstring)."""
    w0 = _TWO_PI * mode.f0
    if A == 0.0:
        return w0, mode.zeta
    from .characterize import first_harmonic_stiffness

    j = mode.joint
    k1 = float(first_harmonic_stiffness(A, j.Fs, j.Kt, j.chi, j.beta))
    w1 = math.sqrt(mode.Kinf + k1)
    dj = float(dissipation_per_cycle(A, j.Fs, j.Kt, j.chi, j.beta))
    c_eq = 2.0 * mode.zeta * w0 + dj / (math.pi * w1 * A * A)
    return w1, c_eq / (2.0 * w1)


def modal_amplitudes_at_point(params, point: str, amplitude: float, quantity: str = "x",
                              modes: Sequence | None = None) -> np.ndarray:
    """Modal amplitudes at which each mode, alone and at its first-harmonic frequency, moves an
    output point by a given physical amplitude.

    For mode i with shape coefficient phi_i at the point: ``x = |phi_i| A_i``,
    ``v = omega_1(A_i) |phi_i| A_i``, ``a = omega_1(A_i)^2 |phi_i| A_i`` (harmonic motion relative
    to a still base), solved for A_i.  This is how a resonance test of one mode at a measured
    level reads; with several modes responding at once their contributions add.

    Parameters
    ----------
    params : ParameterSet
    point : str
        Label of an output point.
    amplitude : float
        Physical amplitude, > 0: [m] for ``"x"``, [m/s] for ``"v"``, [m/s^2] for ``"a"``.
    quantity : {"x", "v", "a"}
    modes : sequence, optional
        Modes to set (1-based numbers or labels); the others get 0 (low amplitude).  Default all.

    Returns
    -------
    ndarray, shape (N,)
        Modal amplitudes [m sqrt(kg)].

    Raises
    ------
    InputError
        Unknown point or quantity, bad amplitude, or a chosen mode that does not move the point.
    """
    outs = {p.label: p for p in params.output_points}
    if point not in outs:
        raise InputError(f"point {point!r}: not an output point of {params.set_id}; output points: "
                         f"{', '.join(outs) or 'none'}")
    if quantity not in ("x", "v", "a"):
        raise InputError(f"quantity {quantity!r}: allowed are 'x' (m), 'v' (m/s), 'a' (m/s^2)")
    try:
        X = float(amplitude)
    except (TypeError, ValueError):
        raise InputError(f"amplitude {amplitude!r} at {point!r}: not a number") from None
    unit = {"x": "m", "v": "m/s", "a": "m/s^2"}[quantity]
    if not (math.isfinite(X) and X > 0):
        raise InputError(f"amplitude {amplitude!r} at {point!r}: allowed is a finite value > 0 {unit}")
    sel = range(params.n_modes) if modes is None else [_mode_index(params, k) for k in modes]
    out = np.zeros(params.n_modes)
    power = {"x": 0, "v": 1, "a": 2}[quantity]
    for i in sel:
        phi = abs(outs[point].shape[i])
        m = params.modes[i]
        if phi == 0.0:
            raise InputError(f"mode {i + 1} ({m.label}) does not move point {point!r} (shape 0); "
                             "give its modal amplitude instead")
        if power == 0:
            out[i] = X / phi
            continue

        def g(A, i=i, m=m, phi=phi):
            return _mode_freq_zeta(m, A)[0] ** power * phi * A - X

        hi = X / (phi * m.Kinf ** (power / 2.0)) * 1.01  # omega_1 >= sqrt(Kinf): an upper bound
        out[i] = brentq(g, 0.0, hi, xtol=1e-15 * hi, rtol=1e-13)
    return out


@dataclass(frozen=True, eq=False)
class LinearModel:
    """An equivalent linear modal state-space model ``x' = A x + B u``, ``y = C x + D u``.

    Attributes
    ----------
    A : ndarray, shape (2N, 2N)
    B : ndarray, shape (2N, n_in)
    C : ndarray, shape (n_out, 2N)
    D : ndarray, shape (n_out, n_in)
    state_names, input_names, output_names : tuple of str
    mode_labels : tuple of str, shape (N,)
    modal_amplitude : ndarray, shape (N,)
        Amplitude each mode was linearized at [m sqrt(kg)].
    frequency : ndarray, shape (N,)
        Equivalent natural frequencies omega_1/(2 pi) [Hz].
    zeta : ndarray, shape (N,)
        Equivalent damping ratios zeta_eq [-].
    phimax : ndarray, shape (N,)
        Onset of macro-slip per mode [m sqrt(kg)] (for reading the amplitudes).
    set_id, content_hash : str
        Identity of the parameter set.
    info : dict
        Version, creation time, definitions, caution (goes into the metadata file).
    """

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray
    state_names: tuple
    input_names: tuple
    output_names: tuple
    mode_labels: tuple
    modal_amplitude: np.ndarray
    frequency: np.ndarray
    zeta: np.ndarray
    phimax: np.ndarray
    set_id: str
    content_hash: str
    info: dict = field(default_factory=dict)

    def frequency_response(self, f) -> np.ndarray:
        """``H(j omega) = C (j omega I - A)^-1 B + D``, shape (n_f, n_out, n_in), f in Hz."""
        f = np.atleast_1d(np.asarray(f, dtype=float))
        n = self.A.shape[0]
        out = np.empty((f.size, self.C.shape[0], self.B.shape[1]), dtype=complex)
        for k, fk in enumerate(f):
            out[k] = self.C @ np.linalg.solve(1j * _TWO_PI * fk * np.eye(n) - self.A, self.B) + self.D
        return out

    def to_scipy(self):
        """The model as :class:`scipy.signal.StateSpace`."""
        from scipy.signal import StateSpace

        return StateSpace(self.A, self.B, self.C, self.D)

    def metadata(self) -> dict:
        """Plain-JSON description: identity, amplitudes, frequencies, damping, names, definitions."""
        return {
            "format": FILE_FORMAT,
            "parameter_set": self.set_id,
            "content_hash": self.content_hash,
            **self.info,
            "modes": [
                {"index": i + 1, "label": lab, "modal_amplitude": float(self.modal_amplitude[i]),
                 "amplitude_over_phimax": float(self.modal_amplitude[i] / self.phimax[i]),
                 "frequency_hz": float(self.frequency[i]), "zeta": float(self.zeta[i])}
                for i, lab in enumerate(self.mode_labels)],
            "states": list(self.state_names),
            "inputs": list(self.input_names),
            "outputs": list(self.output_names),
            "definitions": dict(_DEFINITIONS),
            "files": {"model.npz": "A, B, C, D, state_names, input_names, output_names, "
                                   "metadata (this JSON text)",
                      "A.csv, B.csv, C.csv, D.csv": "one matrix each; first row the column "
                                                    "names, first column the row names"},
            "caution": CAUTION,
        }

    def save(self, directory: str | os.PathLike) -> Path:
        """Write ``model.npz``, ``A.csv`` .. ``D.csv`` and ``metadata.json`` into ``directory``.

        Atomic as a whole: everything is written into a temporary folder beside ``directory``,
        which then replaces it; on failure an existing ``directory`` is left as it was.

        Returns
        -------
        Path
            ``directory``.
        """
        target = Path(directory)
        parent = target.parent
        check_output_path(target, "folder", "output folder")
        parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".part", dir=parent))
        os.chmod(tmp, 0o755)  # mkdtemp makes it private; the model is meant to be shared
        try:
            meta = self.metadata()
            text = json.dumps(meta, indent=2) + "\n"
            (tmp / "metadata.json").write_text(text, encoding="utf-8")
            np.savez(tmp / "model.npz", A=self.A, B=self.B, C=self.C, D=self.D,
                     state_names=np.array(self.state_names), input_names=np.array(self.input_names),
                     output_names=np.array(self.output_names), metadata=np.array(text))
            rows = {"A": self.state_names, "B": self.state_names, "C": self.output_names,
                    "D": self.output_names}
            cols = {"A": self.state_names, "B": self.input_names, "C": self.state_names,
                    "D": self.input_names}
            for name in "ABCD":
                buf = io.StringIO()
                w = csv.writer(buf, lineterminator="\n")
                w.writerow([f"{name} (row \\ column)"] + list(cols[name]))
                for r, vals in zip(rows[name], getattr(self, name)):
                    w.writerow([r] + [repr(float(v)) for v in vals])
                (tmp / f"{name}.csv").write_text(buf.getvalue(), encoding="utf-8")
            swap_into_place(tmp, target)
            tmp = None
        finally:
            if tmp is not None:
                shutil.rmtree(tmp, ignore_errors=True)
        return target

    @classmethod
    def load(cls, directory: str | os.PathLike) -> "LinearModel":
        """Read a model written by :meth:`save` (from ``model.npz``)."""
        path = Path(directory) / "model.npz"
        try:
            with np.load(path, allow_pickle=False) as z:
                meta = json.loads(str(z["metadata"]))
                parts = {k: z[k] for k in ("A", "B", "C", "D")}
                names = {k: tuple(str(s) for s in z[k]) for k in
                         ("state_names", "input_names", "output_names")}
        except (OSError, KeyError, ValueError) as exc:
            raise InputError(f"{str(path)!r}: not a linear model written by jointfmu ({exc})") from None
        if meta.get("format") != FILE_FORMAT:
            raise InputError(f"{str(path)!r}: format {meta.get('format')!r}, expected {FILE_FORMAT!r}")
        modes = meta["modes"]
        amp = np.array([m["modal_amplitude"] for m in modes])
        ratio = np.array([m["amplitude_over_phimax"] for m in modes])
        with np.errstate(invalid="ignore", divide="ignore"):
            pm = np.where(ratio > 0, amp / np.where(ratio > 0, ratio, 1.0), np.nan)
        info = {k: meta[k] for k in ("jointfmu_version", "created") if k in meta}
        return cls(**parts, **names, mode_labels=tuple(m["label"] for m in modes),
                   modal_amplitude=amp, frequency=np.array([m["frequency_hz"] for m in modes]),
                   zeta=np.array([m["zeta"] for m in modes]), phimax=pm,
                   set_id=meta["parameter_set"], content_hash=meta["content_hash"], info=info)


def _ro(a):
    a = np.array(a, dtype=float)
    a.setflags(write=False)
    return a


def equivalent_linear(params, amplitudes, inputs: Sequence[str] | None = None,
                      outputs: Sequence[str] | None = None) -> LinearModel:
    """The equivalent linear state-space model of ``params`` at the given modal amplitudes.

    Parameters
    ----------
    params : ParameterSet
    amplitudes : array_like, shape (N,), or mapping
        Modal displacement amplitude per mode [m sqrt(kg)], >= 0 (0: the low-amplitude model);
        or a mapping from mode (1-based number or label) to amplitude, the others 0.  For a
        physical amplitude at an output point use :func:`modal_amplitudes_at_point`.
    inputs : sequence of str, optional
        Input names (see :func:`available_inputs`); default all point forces and the base
        acceleration (the direct modal forces only when there are neither).
    outputs : sequence of str, optional
        Output names (see :func:`available_outputs`); default every point x, v, a and the base
        force (the modal coordinates only when there are neither).

    Returns
    -------
    LinearModel

    Raises
    ------
    InputError
        Bad amplitude or an unknown input/output name (the message lists the allowed ones).
    """
    from .. import __version__
    from ..physics.modal import ModalModel

    amp = amplitude_vector(params, amplitudes)
    ins = _default_inputs(params) if inputs is None else tuple(inputs)
    outs = _default_outputs(params) if outputs is None else tuple(outputs)
    for kind, chosen, allowed in (("input", ins, available_inputs(params)),
                                  ("output", outs, available_outputs(params))):
        bad = [n for n in chosen if n not in allowed]
        if bad:
            raise InputError(f"{kind}s {bad}: not {kind}s of {params.set_id}; allowed: "
                             f"{', '.join(allowed)}")
        if len(set(chosen)) != len(chosen):
            raise InputError(f"{kind}s {list(chosen)}: each name at most once")
    mm = ModalModel.from_params(params)
    n = params.n_modes
    w = np.empty(n)
    z = np.empty(n)
    for i, m in enumerate(params.modes):
        w[i], z[i] = _mode_freq_zeta(m, float(amp[i]))
    A = np.zeros((2 * n, 2 * n))
    for i in range(n):
        A[2 * i, 2 * i + 1] = 1.0
        A[2 * i + 1, 2 * i] = -w[i] ** 2
        A[2 * i + 1, 2 * i + 1] = -2.0 * z[i] * w[i]
    # modal force per unit input, shape (N, n_in)
    in_points = [p.label for p in params.input_points]
    G = np.zeros((n, len(ins)))
    r_in = np.zeros(len(ins))  # resultant on the base per unit input (point forces)
    base_col = np.zeros(len(ins))  # 1 for the base acceleration column
    for k, name in enumerate(ins):   # names checked above against available_inputs
        parsed = parse_name(name)
        if parsed.kind == "base":
            G[:, k] = -mm.gamma
            base_col[k] = 1.0
        elif parsed.kind == "mode":
            G[parsed.mode - 1, k] = 1.0
        else:
            j = in_points.index(parsed.label)
            G[:, k] = mm.phi_in[j]
            r_in[k] = mm.r_in[j]
    B = np.zeros((2 * n, len(ins)))
    B[1::2] = G
    # modal accelerations: qddot = Aq x + G u with Aq the odd rows of A
    Aq = A[1::2]
    out_points = [p.label for p in params.output_points]
    C = np.zeros((len(outs), 2 * n))
    D = np.zeros((len(outs), len(ins)))
    for r, name in enumerate(outs):   # names checked above against available_outputs
        parsed = parse_name(name)
        if parsed.kind == "base":
            # F_base = sum_p r_p F_p - M a_b - sum_i Gamma_i qddot_i   (modal.py)
            C[r] = -mm.gamma @ Aq
            D[r] = r_in - mm.total_mass * base_col - mm.gamma @ G
        elif parsed.kind == "mode":
            i = parsed.mode - 1
            C[r, 2 * i + (1 if parsed.quantity == "qdot" else 0)] = 1.0
        else:
            q = parsed.quantity
            j = out_points.index(parsed.label)
            phi = mm.phi_out[j]
            if q == "x":
                C[r, 0::2] = phi
            elif q == "v":
                C[r, 1::2] = phi
            else:  # absolute acceleration: phi qddot + r_o a_b
                C[r] = phi @ Aq
                D[r] = phi @ G + mm.r_out[j] * base_col
    states = tuple(mode_name(i + 1, q) for i in range(n) for q in ("q", "qdot"))
    pm = np.array([joint_constants(m.joint.Fs, m.joint.Kt, m.joint.chi, m.joint.beta).phimax
                   for m in params.modes])
    info = {"jointfmu_version": __version__,
            "created": datetime.now(timezone.utc).isoformat(timespec="seconds")}
    return LinearModel(_ro(A), _ro(B), _ro(C), _ro(D), states, ins, outs,
                       tuple(m.label for m in params.modes), _ro(amp), _ro(w / _TWO_PI), _ro(z),
                       _ro(pm), params.set_id, params.content_hash(), info)
