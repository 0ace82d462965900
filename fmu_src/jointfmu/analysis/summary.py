"""What the characterization of one build consists of: closed-form curves, simulated ring-downs
and their Hilbert estimates (:func:`summarize_build`), the numbers a report lays out."""
from __future__ import annotations

import os
from dataclasses import dataclass

from ..errors import InputError
from .characterize import amplitude_curves, identify_ringdown, ring_down
from .runners import RingDown, get_runner

__all__ = ["BuildSummary", "summarize_build", "as_parameter_set", "reference_points",
           "RingDownPlan", "FULL_RING_DOWNS", "QUICK_RING_DOWNS"]


@dataclass
class BuildSummary:
    """Everything the report shows of one build (also usable on its own).

    Attributes
    ----------
    params : ParameterSet
    curves : list of ModeCurves
        Closed-form curves per mode, 1e-3..3 phimax.
    ringdown : RingDown
        The simulated free decay of all modes (struck together).
    ringdown_1 : RingDown
        Mode 1 alone struck (for the time-history plot at an output point).
    estimates : list of HilbertEstimate
        Identified damping/frequency per mode.
    ref_points : list of (str, float)
        Per mode, the output point where it moves most and its |shape| [1/sqrt(kg)].
    """

    params: object
    curves: list
    ringdown: RingDown
    ringdown_1: RingDown
    estimates: list
    ref_points: list


def as_parameter_set(p):
    """``p`` if it is a ParameterSet, else the parameter file at path ``p`` loaded."""
    from ..params import ParameterSet, load_parameter_set

    if isinstance(p, ParameterSet):
        return p
    if isinstance(p, (str, os.PathLike)):
        return load_parameter_set(p)
    raise InputError(f"{p!r}: give a ParameterSet or the path of a parameter file")


def reference_points(params):
    """Per mode, the output point where it moves most and its |shape| [1/sqrt(kg)]."""
    out = []
    for i in range(params.n_modes):
        best = max(params.output_points, key=lambda p: abs(p.shape[i]), default=None)
        out.append((best.label, abs(best.shape[i])) if best is not None and best.shape[i] else (None, 1.0))
    return out


@dataclass(frozen=True)
class RingDownPlan:
    """The two ring-downs that characterize a build, and their size.

    One record of every mode ringing down at once, from about ``start * phimax`` to below
    ``end * phimax``, and one of the first mode alone, from ``start * phimax`` to below
    ``0.1 phimax`` (at most 60 periods), both at ``samples_per_period`` samples per period of
    the highest excited mode (:func:`.characterize.ring_down`).  :func:`summarize_build` (the
    report) runs them, and the sweeps compute them ahead on Dask workers
    (:func:`jointfmu.cosim.sweep.characterize_task`): both take the plan from here, so the
    ring-downs computed ahead are exactly the ones the report asks for.

    Attributes
    ----------
    start, end : float
        Start and end amplitude of the all-modes record, relative to phimax.
    samples_per_period : float
        Samples per period of the highest excited mode.
    """

    start: float = 2.0
    end: float = 0.03
    samples_per_period: float = 40.0

    def run(self, params, runner=None) -> tuple[RingDown, RingDown]:
        """Both ring-downs of ``params`` by ``runner`` (see :func:`.runners.get_runner`; default
        the core).

        Returns
        -------
        (RingDown, RingDown)
            Every mode at once; the first mode alone.
        """
        every = ring_down(params, runner, start=self.start, end=self.end,
                          samples_per_period=self.samples_per_period)
        first = ring_down(params, runner, start=self.start, end=0.1, modes=[0], max_periods=60,
                          samples_per_period=self.samples_per_period)
        return every, first


#: The report's ring-downs at full size.
FULL_RING_DOWNS = RingDownPlan()
#: The reduced size of quick reports (tests, a first look, ``jointfmu demo --quick``): down to
#: 0.2 phimax only, 24 samples per period (the Hilbert estimates then cover 0.2..~1 phimax).
QUICK_RING_DOWNS = RingDownPlan(end=0.2, samples_per_period=24.0)


def summarize_build(params, runner=None, *,
                    plan: RingDownPlan = FULL_RING_DOWNS) -> BuildSummary:
    """Curves, ring-down and Hilbert estimates of one build (the data of one report section).

    Parameters
    ----------
    params : ParameterSet or path
    runner : Runner, "fmu", "core" or None
        Who simulates the ring-down (default the FMU, :class:`FmuRunner`).
    plan : RingDownPlan
        Which ring-downs, at what size (:data:`QUICK_RING_DOWNS` for quick reports).
    """
    ps = as_parameter_set(params)
    curves = amplitude_curves(ps, lo=1e-3, hi=3.0, n=160)
    runner = get_runner(runner, default="fmu")
    rd, rd1 = plan.run(ps, runner)
    est = [identify_ringdown(rd, i) for i in range(ps.n_modes)]
    return BuildSummary(ps, curves, rd, rd1, est, reference_points(ps))
