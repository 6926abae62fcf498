"""Run tests for special causes on the individuals (X) and moving-range (MR) charts.

Each rule is a small detector (see :class:`limitwatch.stats.signal.Detector`) that is fed one
standardized reading at a time, so the same class serves every stream and a checkpoint holds a
handful of numbers per rule. The conventions below fix details that the handbooks leave open;
they move average run lengths in the second decimal, so they are stated once, here.

Units and positions
    X-chart rules get ``z = (x - center) / sigma``; the MR rule gets ``moving range / sigma``.
    ``index`` is the reading's 0-based position in its stream. X-chart rules require it to grow
    by exactly one per call (a run is a run of consecutive readings); the stateless rules accept
    any position. ``reset()`` forgets everything, including the last position.
Boundaries are strict
    ``z == 3.0`` is not beyond the limits, ``z == 2.0`` is not in zone A, ``z == 1.0`` is neither
    in zone B nor in zone C, ``z == 0`` is on neither side of the center line (it breaks a run),
    and equal successive readings break a trend or an alternation.
Start-up (zero state)
    Windows and runs start empty: the first two readings of a stream, both above +2 sigma,
    already signal two-of-three. This is the zero-state convention of Champ & Woodall (1987).
Restart after a signal
    A detector that signals forgets every reading up to and including the one that completed the
    signal (its window or run is cleared), so the same readings never complete a second signal of
    the same rule; a run of 16 readings above the center gives two run signals, at the 8th and
    16th. ``beyond-limits`` and ``mr-beyond-limit`` keep no state.
Involved readings
    ``Signal.involved`` holds the positions forming the pattern, ascending, ending with the
    signalling reading: the whole run for run rules; for the m-of-n rules the span from the
    earliest window reading that counts to the current one (readings in between included); the
    two readings whose difference is the moving range for ``mr-beyond-limit``.
Refused input
    A NaN or infinite value, or an out-of-sequence position, raises :class:`ValueError` and
    leaves the detector unchanged (the engine refuses such readings earlier; this only keeps a
    caller's mistake from silently corrupting state).

These classes are the reference for each test. A stream monitor runs its selection through
:mod:`limitwatch.stats.fused`, one call per reading, which the tests hold to exactly these
classes' signals and states.

References
----------
Western Electric Co. (1956). *Statistical Quality Control Handbook*. Indianapolis.
Nelson, L. S. (1984). The Shewhart control chart -- tests for special causes. *Journal of
Quality Technology* 16(4), 237-239.
Champ, C. W. & Woodall, W. H. (1987). Exact results for Shewhart control charts with
supplementary runs rules. *Technometrics* 29(4), 393-399.
Montgomery, D. C. *Introduction to Statistical Quality Control*, chapters on Shewhart charts
and on control charts for individual measurements.
"""

from __future__ import annotations

import math
import operator
from typing import Any, ClassVar

from limitwatch.stats.constants import MR_UCL_SIGMA
from limitwatch.stats.signal import Chart, Side, Signal, Stateful, refuse_reading

_isfinite = math.isfinite


MAX_LENGTH = 200
"""Longest run a run test may ask for. The published tests use 6 to 15; beyond a few hundred a
run cannot happen by chance in any plant's lifetime, and the average-run-length planner's work
grows with the length (a length of 10^8 once took a minute and 2 GB to plan)."""

MAX_WINDOW = 10
"""Widest window of a count-in-window test (the published ones use 3 and 5). The planner's exact
chain grows about fourfold per extra reading of window: 10 takes seconds, 20 takes minutes."""

MAX_SIGMAS = 10.0
"""Widest boundary or limit, in sigma: a normal reading lies beyond 10 sigma with probability
about 1.5e-23, so a wider one can never signal and is surely a typing slip."""


def _positive(name: str, value: Any, high: float = MAX_SIGMAS) -> float:
    x = float(value)
    if not (_isfinite(x) and 0.0 < x <= high):
        raise ValueError(f"{name} must be a positive number of at most {high:g}, got {value!r}")
    return x


def _count(name: str, value: Any, low: int, high: int = MAX_LENGTH) -> int:
    if isinstance(value, bool):
        raise ValueError(f"{name} must be a whole number, got {value!r}")
    n = operator.index(value)
    if n < low:
        raise ValueError(f"{name} must be at least {low}, got {value!r}")
    if n > high:
        raise ValueError(f"{name} must be at most {high}, got {value!r}")
    return n


class _Rule(Stateful):
    """Shared plumbing: reset and repr from the names of parameters and state slots (the
    serialisation pair comes from :class:`~limitwatch.stats.signal.Stateful`)."""

    __slots__ = ()
    rule: ClassVar[str]
    chart: ClassVar[Chart] = "x"

    def update(self, index: int, value: float) -> Signal | None:
        raise NotImplementedError  # every rule defines its own

    def reset(self) -> None:
        for name in self._state:
            setattr(self, name, None if name == "_last" else 0)

    def __repr__(self) -> str:
        args = ", ".join(f"{name}={getattr(self, name)!r}" for name in self._params)
        return f"{type(self).__name__}({args})"


class BeyondLimits(_Rule):
    """One reading beyond the control limits: ``|z| > k`` (Western Electric rule 1, Nelson test 1).

    ``statistic`` is ``z`` and ``limit`` the limit it crossed (``+k`` or ``-k``).

    >>> det = BeyondLimits()
    >>> det.update(0, 3.0) is None, det.update(1, -3.2).side
    (True, 'lower')

    References
    ----------
    Western Electric *Statistical Quality Control Handbook* (1956); Nelson (1984), *J. Quality
    Technology* 16(4).
    """

    __slots__ = ("k",)
    rule = "beyond-limits"
    _params = ("k",)

    def __init__(self, k: float = 3.0) -> None:
        self.k = _positive("k", k)

    def update(self, index: int, value: float) -> Signal | None:
        if value > self.k or value < -self.k:
            if not _isfinite(value):
                refuse_reading(self.rule, None, index, value)
            side: Side = "upper" if value > 0.0 else "lower"
            bound = self.k if value > 0.0 else -self.k
            return Signal(self.rule, "x", side, index, (index,), value, bound)
        if value != value:
            refuse_reading(self.rule, None, index, value)
        return None


class _CountInWindow(_Rule):
    """``count`` of the last ``window`` readings beyond ``boundary`` on the same side.

    The window is kept as two bit masks (bit 0 = newest reading), one per side, so the state is
    two small integers and the position of the last reading.
    """

    __slots__ = ("_down", "_full", "_last", "_up", "boundary", "count", "window")
    _down: int
    _last: int | None
    _up: int
    _params = ("count", "window", "boundary")
    _state = ("_up", "_down", "_last")

    def __init__(self, count: int, window: int, boundary: float) -> None:
        self.window = _count("window", window, 1, MAX_WINDOW)
        self.count = _count("count", count, 1)
        if self.count > self.window:
            raise ValueError(f"count must not exceed window ({self.window}), got {count!r}")
        self.boundary = _positive("boundary", boundary)
        self._full = (1 << self.window) - 1
        self.reset()

    def update(self, index: int, value: float) -> Signal | None:
        last = self._last
        if not _isfinite(value) or (last is not None and index != last + 1):
            refuse_reading(self.rule, last, index, value)
        self._last = index
        up = ((self._up << 1) | (value > self.boundary)) & self._full
        down = ((self._down << 1) | (value < -self.boundary)) & self._full
        side: Side
        if up.bit_count() >= self.count:
            side, mask = "upper", up
        elif down.bit_count() >= self.count:
            side, mask = "lower", down
        else:
            self._up, self._down = up, down
            return None
        self._up = self._down = 0
        first = index - mask.bit_length() + 1
        return Signal(self.rule, "x", side, index, tuple(range(first, index + 1)))


class TwoOfThreeZoneA(_CountInWindow):
    """Two of three readings in a row in zone A or beyond, same side (``z > 2`` or ``z < -2``).

    The third reading may be anywhere (Western Electric rule 2, Nelson test 5).

    >>> det = TwoOfThreeZoneA()
    >>> det.update(0, 2.5), det.update(1, -1.0)
    (None, None)
    >>> det.update(2, 2.1).involved
    (0, 1, 2)

    References
    ----------
    Western Electric *Statistical Quality Control Handbook* (1956); Nelson (1984), *J. Quality
    Technology* 16(4).
    """

    __slots__ = ()
    rule = "two-of-three-zone-a"

    def __init__(self, count: int = 2, window: int = 3, boundary: float = 2.0) -> None:
        super().__init__(count, window, boundary)


class FourOfFiveZoneB(_CountInWindow):
    """Four of five readings in a row in zone B or beyond, same side (``z > 1`` or ``z < -1``).

    The fifth reading may be anywhere (Western Electric rule 3, Nelson test 6).

    >>> det = FourOfFiveZoneB()
    >>> [det.update(i, z) for i, z in enumerate([-1.5, 0.2, -1.1, -2.0])]
    [None, None, None, None]
    >>> det.update(4, -1.3).side
    'lower'

    References
    ----------
    Western Electric *Statistical Quality Control Handbook* (1956); Nelson (1984), *J. Quality
    Technology* 16(4).
    """

    __slots__ = ()
    rule = "four-of-five-zone-b"

    def __init__(self, count: int = 4, window: int = 5, boundary: float = 1.0) -> None:
        super().__init__(count, window, boundary)


class RunOneSide(_Rule):
    """``length`` readings in a row on the same side of the center line.

    Eight is the Western Electric rule 4, nine is Nelson's test 2. ``z == 0`` breaks the run.

    >>> det = RunOneSide(length=3)
    >>> det.update(0, 0.4), det.update(1, 1.2)
    (None, None)
    >>> det.update(2, 0.1).involved
    (0, 1, 2)

    References
    ----------
    Western Electric *Statistical Quality Control Handbook* (1956); Nelson (1984), *J. Quality
    Technology* 16(4).
    """

    __slots__ = ("_last", "_run", "length")
    _last: int | None
    _run: int
    rule = "run-one-side"
    _params = ("length",)
    _state = ("_run", "_last")

    def __init__(self, length: int = 8) -> None:
        self.length = _count("length", length, 2)
        self.reset()

    def update(self, index: int, value: float) -> Signal | None:
        last = self._last
        if not _isfinite(value) or (last is not None and index != last + 1):
            refuse_reading(self.rule, last, index, value)
        self._last = index
        run = self._run  # signed: +n for n readings above the center, -n below
        if value > 0.0:
            run = run + 1 if run > 0 else 1
        elif value < 0.0:
            run = run - 1 if run < 0 else -1
        else:
            run = 0
        if run >= self.length or -run >= self.length:
            self._run = 0
            side: Side = "upper" if run > 0 else "lower"
            return Signal(
                self.rule, "x", side, index, tuple(range(index - self.length + 1, index + 1))
            )
        self._run = run
        return None


class Trend(_Rule):
    """``length`` readings in a row, each strictly higher (or lower) than the one before.

    Six readings (five steps) is Nelson's test 3; a tie breaks the trend. Side ``upper`` for a
    rising trend, ``lower`` for a falling one.

    >>> det = Trend(length=3)
    >>> det.update(0, -1.0), det.update(1, -1.0), det.update(2, 0.5)
    (None, None, None)
    >>> det.update(3, 0.7).involved
    (1, 2, 3)

    References
    ----------
    Nelson (1984), *J. Quality Technology* 16(4); Western Electric *Statistical Quality Control
    Handbook* (1956), on trends.
    """

    __slots__ = ("_last", "_prev", "_run", "length")
    _last: int | None
    _prev: float | None
    _run: int
    rule = "trend"
    _params = ("length",)
    _state = ("_prev", "_run", "_last")

    def __init__(self, length: int = 6) -> None:
        self.length = _count("length", length, 2)
        self.reset()

    def reset(self) -> None:
        self._prev, self._run, self._last = None, 0, None

    def update(self, index: int, value: float) -> Signal | None:
        last = self._last
        if not _isfinite(value) or (last is not None and index != last + 1):
            refuse_reading(self.rule, last, index, value)
        self._last = index
        prev, run = self._prev, self._run  # signed count of readings in the current trend, 0 = none
        if prev is None or value == prev:
            run = 0
        elif value > prev:
            run = run + 1 if run > 0 else 2
        else:
            run = run - 1 if run < 0 else -2
        if run >= self.length or -run >= self.length:
            self._prev, self._run = None, 0
            side: Side = "upper" if run > 0 else "lower"
            return Signal(
                self.rule, "x", side, index, tuple(range(index - self.length + 1, index + 1))
            )
        self._prev, self._run = value, run
        return None


class Alternating(_Rule):
    """``length`` readings in a row alternating up and down (Nelson's test 4: fourteen).

    Successive differences must alternate in sign; an equal pair breaks the pattern.

    >>> det = Alternating(length=4)
    >>> [det.update(i, z) for i, z in enumerate([0.0, 1.0, -0.5])]
    [None, None, None]
    >>> det.update(3, 0.2).involved
    (0, 1, 2, 3)

    References
    ----------
    Nelson (1984), *J. Quality Technology* 16(4).
    """

    __slots__ = ("_last", "_len", "_prev", "_step", "length")
    _last: int | None
    _len: int
    _prev: float | None
    _step: int
    rule = "alternating"
    _params = ("length",)
    _state = ("_prev", "_step", "_len", "_last")

    def __init__(self, length: int = 14) -> None:
        self.length = _count("length", length, 3)
        self.reset()

    def reset(self) -> None:
        self._prev, self._step, self._len, self._last = None, 0, 0, None

    def update(self, index: int, value: float) -> Signal | None:
        last = self._last
        if not _isfinite(value) or (last is not None and index != last + 1):
            refuse_reading(self.rule, last, index, value)
        self._last = index
        prev = self._prev
        step = 0 if prev is None else (value > prev) - (value < prev)
        if step == 0:
            n = 1
        elif step == -self._step:
            n = self._len + 1
        else:
            n = 2
        if n >= self.length:
            self._prev, self._step, self._len = None, 0, 0
            return Signal(self.rule, "x", "both", index, tuple(range(index - n + 1, index + 1)))
        self._prev, self._step, self._len = value, step, n
        return None


class HuggingCenter(_Rule):
    """``length`` readings in a row within ``boundary`` of the center (Nelson's test 7).

    Fifteen readings with ``|z| < 1`` (zone C) suggest the limits are too wide, often because
    the baseline mixed several streams or sigma was overestimated.

    >>> det = HuggingCenter(length=3)
    >>> det.update(0, 0.9), det.update(1, -0.2)
    (None, None)
    >>> det.update(2, 0.0).side
    'both'

    References
    ----------
    Nelson (1984), *J. Quality Technology* 16(4).
    """

    __slots__ = ("_last", "_len", "boundary", "length")
    _last: int | None
    _len: int
    rule = "hugging-center"
    _params = ("length", "boundary")
    _state = ("_len", "_last")

    def __init__(self, length: int = 15, boundary: float = 1.0) -> None:
        self.length = _count("length", length, 2)
        self.boundary = _positive("boundary", boundary)
        self.reset()

    def update(self, index: int, value: float) -> Signal | None:
        last = self._last
        if not _isfinite(value) or (last is not None and index != last + 1):
            refuse_reading(self.rule, last, index, value)
        self._last = index
        n = self._len + 1 if -self.boundary < value < self.boundary else 0
        if n >= self.length:
            self._len = 0
            return Signal(self.rule, "x", "both", index, tuple(range(index - n + 1, index + 1)))
        self._len = n
        return None


class AvoidingCenter(_Rule):
    """``length`` readings in a row farther than ``boundary`` from the center, either side.

    Eight readings with ``|z| > 1`` (none in zone C) is Nelson's test 8; the readings may all
    be on one side or on both. It points at a mixture of two levels.

    >>> det = AvoidingCenter(length=3)
    >>> det.update(0, 1.5), det.update(1, -2.0)
    (None, None)
    >>> det.update(2, 1.1).involved
    (0, 1, 2)

    References
    ----------
    Nelson (1984), *J. Quality Technology* 16(4).
    """

    __slots__ = ("_last", "_len", "boundary", "length")
    _last: int | None
    _len: int
    rule = "avoiding-center"
    _params = ("length", "boundary")
    _state = ("_len", "_last")

    def __init__(self, length: int = 8, boundary: float = 1.0) -> None:
        self.length = _count("length", length, 2)
        self.boundary = _positive("boundary", boundary)
        self.reset()

    def update(self, index: int, value: float) -> Signal | None:
        last = self._last
        if not _isfinite(value) or (last is not None and index != last + 1):
            refuse_reading(self.rule, last, index, value)
        self._last = index
        n = self._len + 1 if (value > self.boundary or value < -self.boundary) else 0
        if n >= self.length:
            self._len = 0
            return Signal(self.rule, "x", "both", index, tuple(range(index - n + 1, index + 1)))
        self._len = n
        return None


class MrBeyondLimit(_Rule):
    """A moving range above its upper limit: ``mr / sigma > limit``.

    The default limit is ``d2 + 3 d3`` (about 3.686), i.e. ``D4 * MRbar`` in sigma units.
    ``involved`` holds the two readings whose difference is the moving range.

    >>> det = MrBeyondLimit()
    >>> det.update(1, 3.6) is None, det.update(2, 4.0).involved
    (True, (1, 2))

    References
    ----------
    Montgomery, *Introduction to Statistical Quality Control*, control charts for individual
    measurements; Western Electric *Statistical Quality Control Handbook* (1956).
    """

    __slots__ = ("limit",)
    rule = "mr-beyond-limit"
    chart = "mr"
    _params = ("limit",)

    def __init__(self, limit: float = MR_UCL_SIGMA) -> None:
        self.limit = _positive("limit", limit)

    def update(self, index: int, value: float) -> Signal | None:
        if value > self.limit or not value >= 0.0:
            if not _isfinite(value):
                refuse_reading(self.rule, None, index, value)
            if value < 0.0:
                raise ValueError(f"{self.rule}: a moving range cannot be negative, got {value!r}")
            involved = (index - 1, index) if index > 0 else (index,)
            return Signal(self.rule, "mr", "upper", index, involved, value, self.limit)
        return None
