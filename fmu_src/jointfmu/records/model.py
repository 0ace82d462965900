"""Ring-down records in memory: :class:`Channel`, :class:`Record` and their checks.

A record is one free decay (or any measured time history) of a structure: uniform sample times
and one channel per measured quantity.  Channel names follow the FMU's outputs:
``point.<label>.a`` (m/s^2), ``point.<label>.v`` (m/s), ``point.<label>.x`` (m) at a point with
role ``output`` or ``both``, and ``point.<label>.force`` (N), a measured input force at a point
with role ``input`` or ``both``.  All values SI.

:func:`check_record` holds every rule a record must meet against a parameter set (the template);
the file readers call it, so that a CSV and a UFF file are judged alike.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError, did_you_mean
from ..params.names import parse_name, point_name

__all__ = [
    "QUANTITIES",
    "RESPONSE_QUANTITIES",
    "UNITS",
    "CLIP_RUN",
    "TIME_TOLERANCE",
    "Channel",
    "Record",
    "channel_name",
    "check_record",
    "check_time",
    "clipped_run",
]

#: Measured quantities of a channel, in the order the writers put them.
QUANTITIES = ("a", "v", "x", "force")
#: The motion quantities (a response channel); ``force`` is an input.
RESPONSE_QUANTITIES = ("a", "v", "x")
#: SI unit of each quantity.
UNITS = {"a": "m/s^2", "v": "m/s", "x": "m", "force": "N"}
#: A channel is clipped when at least this many consecutive samples equal its largest (or its
#: smallest) value while that value is away from the channel's median: the flat top of a signal
#: that hit the range of its sensor or converter.  A real signal sampled at >= 8 samples per
#: period never repeats its extreme value exactly three times in a row.
CLIP_RUN = 3
#: Each step between samples may differ from the median step by at most this fraction of it
#: (rounding in a written file; a missed or doubled sample is a whole step).
TIME_TOLERANCE = 0.01

_NAME_RULE = ("must be point.<label>.a (m/s^2), point.<label>.v (m/s), point.<label>.x (m) or "
              "point.<label>.force (N)")


def channel_name(point: str, quantity: str) -> str:
    """``"point.<point>.<quantity>"``, formatted by :func:`jointfmu.params.names.point_name`."""
    return point_name(point, quantity)


def _parse(name):
    parsed = parse_name(name)
    return parsed if parsed is not None and parsed.kind == "point" else None


@dataclass(frozen=True, eq=False)
class Channel:
    """One measured time history.

    Parameters
    ----------
    name : str
        ``point.<label>.a|v|x|force``.
    data : ndarray, shape (n,)
        Samples in SI units (m/s^2, m/s, m or N), float64; stored read-only.
    """

    name: str
    data: np.ndarray

    def __post_init__(self) -> None:
        if _parse(self.name) is None:
            raise InputError(f"channel {self.name!r}: {_NAME_RULE}")
        d = np.array(self.data, dtype=float)  # a copy: the record owns its data
        if d.ndim != 1:
            raise InputError(f"channel {self.name!r}: data must be 1-D, got shape {d.shape}")
        d.setflags(write=False)
        object.__setattr__(self, "data", d)

    @property
    def point(self) -> str:
        """Label of the point the channel belongs to."""
        return _parse(self.name).label  # type: ignore[union-attr]

    @property
    def quantity(self) -> str:
        """``"a"``, ``"v"``, ``"x"`` or ``"force"``."""
        return _parse(self.name).quantity  # type: ignore[union-attr]

    @property
    def unit(self) -> str:
        """SI unit of the samples."""
        return UNITS[self.quantity]

    @property
    def is_response(self) -> bool:
        """True for a motion channel (a, v or x), False for a force."""
        return self.quantity in RESPONSE_QUANTITIES


@dataclass(frozen=True, eq=False)
class Record:
    """One ring-down record: uniform times and the channels measured at them.

    Parameters
    ----------
    time : ndarray, shape (n,)
        Sample times [s], increasing and uniformly spaced (see :func:`check_time`); may start
        before the impact (pre-trigger samples, negative times allowed).
    channels : tuple of Channel
        Each with ``n`` samples; names unique.
    comments : tuple of str
        Free text (the CSV's ``#`` lines), one line each.
    source : str
        Where the record came from (a path), used in messages.
    """

    time: np.ndarray
    channels: tuple[Channel, ...]
    comments: tuple[str, ...] = ()
    source: str = "<record>"

    def __post_init__(self) -> None:
        src = self.source
        t = np.array(self.time, dtype=float)
        if t.ndim != 1 or t.size < 2:
            raise InputError(f"{src}: time must be a 1-D array of at least 2 samples, got shape "
                             f"{t.shape}")
        t.setflags(write=False)
        object.__setattr__(self, "time", t)
        chans = tuple(self.channels)
        seen: set[str] = set()
        for c in chans:
            if not isinstance(c, Channel):
                raise InputError(f"{src}: channels must be Channel objects, got {type(c).__name__}")
            if c.data.shape != t.shape:
                raise InputError(f"{src}: channel {c.name!r} has {c.data.size} samples, time has "
                                 f"{t.size}: every channel needs one sample per time")
            if c.name in seen:
                raise InputError(f"{src}: channel {c.name!r} appears twice; each channel once")
            seen.add(c.name)
        object.__setattr__(self, "channels", chans)
        comments = tuple(str(c) for c in self.comments)
        for c in comments:
            if "\n" in c or "\r" in c:
                raise InputError(f"{src}: comment {c!r} spans lines; give one line per comment")
        object.__setattr__(self, "comments", comments)

    # --- views -----------------------------------------------------------------------------
    @property
    def dt(self) -> float:
        """Sample step [s] (mean spacing)."""
        return float((self.time[-1] - self.time[0]) / (self.time.size - 1))

    @property
    def rate(self) -> float:
        """Sample rate [Hz]."""
        return 1.0 / self.dt

    @property
    def names(self) -> tuple[str, ...]:
        """Channel names in order."""
        return tuple(c.name for c in self.channels)

    def channel(self, name: str) -> Channel:
        """The channel called ``name``."""
        for c in self.channels:
            if c.name == name:
                return c
        raise InputError(f"{self.source}: no channel {name!r}; channels: {', '.join(self.names)}"
                         + (f" ({did_you_mean(name, self.names)})" if did_you_mean(name, self.names)
                            else ""))

    @property
    def responses(self) -> tuple[Channel, ...]:
        """Motion channels (a, v, x), in order."""
        return tuple(c for c in self.channels if c.is_response)

    @property
    def forces(self) -> tuple[Channel, ...]:
        """Force channels, in order."""
        return tuple(c for c in self.channels if not c.is_response)


def check_time(t: np.ndarray, where: str, line_of=None) -> None:
    """Check that sample times increase and are uniform: every step within
    :data:`TIME_TOLERANCE` of the median step.

    Parameters
    ----------
    t : ndarray, shape (n,)
    where : str
        The file, for the message.
    line_of : callable, optional
        Sample index -> text naming its place in the file (e.g. ``"line 12"``).

    Raises
    ------
    InputError
        Naming the first sample that breaks the rule.
    """
    line_of = line_of or (lambda k: f"sample {k}")
    if not np.all(np.isfinite(t)):
        k = int(np.flatnonzero(~np.isfinite(t))[0])
        raise InputError(f"{where}: {line_of(k)}: time {float(t[k])!r} is not a finite number")
    d = np.diff(t)
    if np.any(d <= 0.0):
        k = int(np.flatnonzero(d <= 0.0)[0]) + 1
        raise InputError(f"{where}: {line_of(k)}: time {float(t[k])!r} s does not increase "
                         f"(previous {float(t[k - 1])!r} s); times must be strictly increasing")
    dt = float(np.median(d))
    dev = np.abs(d - dt)
    if np.any(dev > TIME_TOLERANCE * dt):
        k = int(np.argmax(dev > TIME_TOLERANCE * dt)) + 1
        raise InputError(
            f"{where}: {line_of(k)}: time {float(t[k])!r} s comes {d[k - 1] / dt:.3g} steps after "
            f"the previous sample (step {dt:.6g} s); samples must be uniformly spaced within "
            f"{TIME_TOLERANCE:g} of a step (a missing or doubled sample?)")


def clipped_run(x: np.ndarray) -> tuple[int, float] | None:
    """First flat top at the channel's extreme: ``(start index, value)`` or None.

    A run of at least :data:`CLIP_RUN` consecutive samples exactly equal to the channel's largest
    or smallest value, where that value differs from the channel's median (common practice: a
    signal that hit its sensor's or converter's range is cut flat at that level).
    """
    if x.size < CLIP_RUN:
        return None
    med = float(np.median(x))
    best: tuple[int, float] | None = None
    for v in (float(np.max(x)), float(np.min(x))):
        if v == med:
            continue
        eq = (x == v).astype(np.int8)
        # runs of ones: start where the run sum over CLIP_RUN samples is full
        full = np.convolve(eq, np.ones(CLIP_RUN, dtype=np.int8), mode="valid") == CLIP_RUN
        if np.any(full):
            k = int(np.argmax(full))
            if best is None or k < best[0]:
                best = (k, v)
    return best


def _point_rule(quantity: str) -> str:
    if quantity == "force":
        return "a force channel needs a point with role 'input' or 'both'"
    return "a motion channel (a, v, x) needs a point with role 'output' or 'both'"


def check_record(record: Record, template, line_of=None) -> None:
    """Every rule a record must meet against a template parameter set.

    Times increasing and uniform (:func:`check_time`); every value finite; each channel names a
    template point of the right role (motion at ``output``/``both``, force at ``input``/``both``);
    no channel clipped (:func:`clipped_run`); at least one motion channel.  Channel names are
    unique by construction of :class:`Record`.

    Parameters
    ----------
    record : Record
    template : ParameterSet
    line_of : callable, optional
        Sample index -> place in the file, for messages (default ``"sample k"``).

    Raises
    ------
    InputError
        One line naming the file, the line or channel, what is wrong and what is allowed.
    """
    src = record.source
    check_time(record.time, src, line_of)
    points = {p.label: p for p in template.points}
    line_of = line_of or (lambda k: f"sample {k}")
    for c in record.channels:
        p = points.get(c.point)
        if p is None:
            labels = [q.label for q in template.points if
                      (q.is_input if c.quantity == "force" else q.is_output)]
            hint = did_you_mean(c.point, labels)
            raise InputError(
                f"{src}: channel {c.name!r}: no point {c.point!r} in the template "
                f"{template.source}; allowed points for this channel: "
                f"{', '.join(labels) if labels else '(none)'}" + (f" ({hint})" if hint else ""))
        ok = p.is_input if c.quantity == "force" else p.is_output
        if not ok:
            raise InputError(f"{src}: channel {c.name!r}: point {p.label!r} has role {p.role!r}; "
                             f"{_point_rule(c.quantity)}")
        bad = ~np.isfinite(c.data)
        if np.any(bad):
            k = int(np.flatnonzero(bad)[0])
            raise InputError(f"{src}: {line_of(k)}: channel {c.name!r} is {float(c.data[k])!r}; values "
                             "must be finite numbers")
        clip = clipped_run(c.data)
        if clip is not None:
            k, v = clip
            raise InputError(
                f"{src}: channel {c.name!r} is clipped: {CLIP_RUN} or more samples in a row equal "
                f"its extreme {v!r} {c.unit} from {line_of(k)}; records must stay inside the "
                "sensor's range (repeat the test at a lower level or with a larger range)")
    if not record.responses:
        raise InputError(f"{src}: no response channel; a record needs at least one of "
                         "point.<label>.a, .v or .x at an output point")
