"""The contract of a stepping object, written once.

A stepping object holds the state of a structure and advances it over caller's steps with the
inputs set beforehand.  :class:`Stepper` writes the contract; a subclass supplies the maths in
``_step_impl`` and the undo in ``_restore`` (the pattern of SciPy's ``OdeSolver.step`` /
``_step_impl`` in ``scipy/integrate/_ivp/base.py``).

Contract of :meth:`Stepper.step`
--------------------------------
* ``dt`` finite and ``>= 0``; 0 is a no-op that succeeds.
* On success returns ``(True, "")`` and ``time`` has advanced by ``dt``.
* On failure returns ``(False, message)``, never raises, and the state is exactly as before the
  call (``_restore`` puts back what ``_save`` kept).
* Deterministic: the same inputs and steps give bit-identical results.

:class:`~jointfmu.physics.integrate.ModalSimulator` keeps the same contract in its own
``step`` (tuned for the per-step cost of an FMU); the discrete-joint structure
(:class:`jointfmu.lumped.simulate.LumpedSimulator`) steps through this class.
"""
from __future__ import annotations

import math

__all__ = ["Stepper"]


class Stepper:
    """Base class of stepping objects: public :meth:`step`, private ``_step_impl``.

    Subclasses implement

    ``_save()``
        Keep what is needed to undo the next step (called before every step).
    ``_step_impl(dt) -> (bool, str)``
        Advance the state by ``dt > 0``; return ``(False, message)`` on numerical trouble.
        An exception it raises is caught and reported as a failed step.
    ``_restore()``
        Put back the state kept by ``_save`` (called after a failed step).
    """

    #: Simulated time [s].
    time: float = 0.0

    def step(self, dt) -> tuple[bool, str]:
        """Advance by ``dt`` seconds with the inputs set (see the module docstring)."""
        try:
            dt = float(dt)
        except (TypeError, ValueError):
            return False, f"step size {dt!r} is not a number"
        if not math.isfinite(dt) or dt < 0.0:
            return False, f"step size {dt!r}: must be finite and >= 0"
        if dt == 0.0:
            return True, ""
        self._save()
        try:
            ok, message = self._step_impl(dt)
        except Exception as exc:  # noqa: BLE001 - reported as a failed step, never thrown
            ok, message = False, f"the step failed: {type(exc).__name__}: {exc}"
        if not ok:
            self._restore()
            return False, f"step from t = {self.time:.9g} s by {dt:.3g} s: {message}; state kept"
        self.time += dt
        return True, ""

    def _save(self) -> None:  # pragma: no cover - abstract
        raise NotImplementedError

    def _step_impl(self, dt: float) -> tuple[bool, str]:  # pragma: no cover - abstract
        raise NotImplementedError

    def _restore(self) -> None:  # pragma: no cover - abstract
        raise NotImplementedError
