"""The component contract of the co-simulation master loop, written once, and the Python adapter.

Everything the master loop (:func:`.master.co_simulate`) steps is a :class:`Component`: the
structure FMU, a loads model or a controller, as FMUs (:class:`.structures.FmuComponent`, fmpy's
``FMU2Slave``) or in Python (:class:`PythonComponent`, :class:`.structures.LinearStructure`).
The contract is FMI 2.0 co-simulation's, reduced to what a Jacobi master with zero-order hold
uses (FMI 2.0 sec. 4.2: set inputs, ``fmi2DoStep``, get outputs):

* ``inputs``, ``outputs``: the variable names (FMI names for an FMU);
* ``refs(names, causality)``: resolve names once, before the loop, to references that only this
  component understands (value references and buffers for an FMU, indices in Python); an
  unknown name is an :class:`~jointfmu.errors.InputError` naming the component and the allowed
  names;
* ``set(refs, values)``: hold input values over the next step;
* ``get(refs) -> list of float``: output values at the current communication point (an FMU
  that answers either with an error status raises :class:`~jointfmu.errors.SimulationError`);
* ``do_step(t, h) -> (ok, message)``: advance from ``t`` to ``t + h`` [s]; a refused step is
  reported, not raised (as ``fmi2DoStep`` returns a status), and the master raises;
* ``close()``: free what the component holds (also on leaving a ``with`` block).
"""
from __future__ import annotations

from typing import Callable, Mapping, Sequence

from ..errors import InputError

__all__ = ["Component", "PythonComponent"]


class Component:
    """Base class of co-simulation components (the contract above).

    Attributes
    ----------
    label : str
        How messages name the component (an FMU: its file name).
    inputs, outputs : tuple of str
        Variable names.

    Subclasses implement :meth:`_ref`, :meth:`set`, :meth:`get` and :meth:`do_step`, and
    :meth:`close` when they hold resources.
    """

    label: str = "component"
    inputs: tuple = ()
    outputs: tuple = ()

    def refs(self, names: Sequence[str], causality: str) -> list:
        """References of variables, checked to exist with the given causality.

        Parameters
        ----------
        names : sequence of str
        causality : {"input", "output"}

        Raises
        ------
        InputError
            A name that is not an input (output) of this component; the message lists them.
        """
        if causality not in ("input", "output"):
            raise InputError(f"causality {causality!r}: allowed are 'input' and 'output'")
        out = []
        for n in names:
            r = self._ref(n, causality)
            if r is None:
                allowed = self.inputs if causality == "input" else self.outputs
                raise InputError(f"{n!r} is not an {causality} of {self.label}; "
                                 f"{causality}s: {', '.join(allowed) or '(none)'}")
            out.append(r)
        return self._pack(out)

    def _ref(self, name: str, causality: str):
        """The reference of one variable, or None when there is none of that causality."""
        table = self.inputs if causality == "input" else self.outputs
        return table.index(name) if name in table else None

    def _pack(self, refs: list):
        """What :meth:`refs` hands out for a checked list of references (default the list)."""
        return refs

    def set(self, refs, values: Sequence[float]) -> None:
        """Hold input values over the next step (``refs`` from :meth:`refs`)."""
        raise NotImplementedError

    def get(self, refs) -> list:
        """Output values at the current communication point (``refs`` from :meth:`refs`)."""
        raise NotImplementedError

    def do_step(self, t: float, h: float) -> tuple[bool, str]:
        """Advance from ``t`` to ``t + h`` [s]; ``(False, message)`` when the step is refused."""
        raise NotImplementedError

    def close(self) -> None:
        """Free what the component holds (nothing by default)."""

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class PythonComponent(Component):
    """A component written in Python: one setter per input, one getter per output, a step.

    Parameters
    ----------
    label : str
        How messages name it.
    inputs : mapping of str to callable(float)
        Input name -> setter (holds the value over the next step).
    outputs : mapping of str to callable() -> float
        Output name -> getter.
    step : callable(t, h)
        Advances the component from ``t`` by ``h`` [s]; an exception it raises refuses the step
        (``do_step`` returns it as the message).
    """

    def __init__(self, label: str, inputs: Mapping[str, Callable[[float], None]],
                 outputs: Mapping[str, Callable[[], float]], step: Callable[[float, float], None]):
        self.label = label
        self.inputs = tuple(inputs)
        self.outputs = tuple(outputs)
        self._setters = tuple(inputs.values())
        self._getters = tuple(outputs.values())
        self._step = step

    def set(self, refs, values) -> None:
        setters = self._setters
        for r, v in zip(refs, values):
            setters[r](v)

    def get(self, refs) -> list:
        getters = self._getters
        return [getters[r]() for r in refs]

    def do_step(self, t: float, h: float) -> tuple[bool, str]:
        try:
            self._step(t, h)
        except Exception as exc:  # noqa: BLE001 - a refused step is reported, as FMI does
            return False, f"{type(exc).__name__}: {exc}"
        return True, ""
