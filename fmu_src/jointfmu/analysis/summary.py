"""What the characterization of one build consists of: closed-form curves, simulated ring-downs
and their Hilbert estimates (:func:`summarize_build`), the numbers a report lays out."""
from __future__ import annotations

import os
from dataclasses import dataclass

from ..errors import InputError
from .characterize import amplitude_curves, identify_ringdown, ring_down
from .runners import RingDown, get_runner

__all__ = ["BuildSummary", "summarize_build", "as_parameter_set", "reference_points"]


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


def summarize_build(params, runner=None, *, start: float = 2.0, end: float = 0.03,
                    samples_per_period: float = 40.0) -> BuildSummary:
    """Curves, ring-down and Hilbert estimates of one build (the data of one report section).

    Parameters
    ----------
    params : ParameterSet or path
    runner : Runner, "fmu", "core" or None
        Who simulates the ring-down (default the FMU, :class:`FmuRunner`).
    start, end : float
        Ring-down from about ``start * phimax`` to ``end * phimax`` (every mode at once).
    samples_per_period : float
        Ring-down samples per period of the highest mode.
    """
    ps = as_parameter_set(params)
    curves = amplitude_curves(ps, lo=1e-3, hi=3.0, n=160)
    runner = get_runner(runner, default="fmu")
    rd = ring_down(ps, runner, start=start, end=end, samples_per_period=samples_per_period)
    est = [identify_ringdown(rd, i) for i in range(ps.n_modes)]
    rd1 = ring_down(ps, runner, start=start, end=0.1, modes=[0], max_periods=60,
                      samples_per_period=samples_per_period)
    return BuildSummary(ps, curves, rd, rd1, est, reference_points(ps))
