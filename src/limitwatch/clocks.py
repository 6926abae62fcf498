"""The service's time: wall-clock time that never goes backwards, and notice of clock steps.

Why: the wall clock of a plant computer is stepped now and then -- NTP finding it far off after
a boot, an operator setting it by hand, a virtual machine resumed. A step back of two hours
used to make every reading timed at receipt (an MQTT payload without a time field) older than
the stream's last one, so each was refused as out of order until the clock had made up the two
hours; and it hid silent streams from the stale check for as long.

:class:`ServiceClock` is what the service asks for "now" and for receipt times:

* while the wall clock moves forward it *is* the wall clock;
* when the wall clock steps back, the service clock does not: it goes on from the last time it
  gave out, at :data:`CATCH_UP_RATE` times the speed of the monotonic clock, until the wall
  clock has caught up with it, and then follows the wall clock again. After a step back of
  S seconds that takes S / (1 - CATCH_UP_RATE) seconds (four hours for a two-hour step); in
  that time the service's times run ahead of the wall clock, by less and less;
* a step forward is followed at once (times must not go back, but they may jump ahead);
* a restart goes on from the last time the previous run committed, when the wall clock is
  behind it by at most :data:`CARRY_ON_AT_MOST_S` (a clock stepped back while the service was
  down); further behind than that, the stored time is taken to be the wrong one.

So receipt times never go backwards and silence (``now`` minus a stream's last receipt time)
is measured on one clock: a stale stream is noticed through a step back, at worst
``1 / CATCH_UP_RATE`` times later than usual while the service clock catches up.

:meth:`ServiceClock.step` compares how far the wall and the monotonic clocks moved since it was
last asked; the service asks every round of its worker, logs a WARNING naming the step, and
plans its scheduled jobs again (the scheduler plans on the wall clock).

>>> wall, mono = [1000.0], [0.0]
>>> clock = ServiceClock(lambda: wall[0], lambda: mono[0])
>>> clock.now()
1000.0
>>> wall[0], mono[0] = 10.0, 10.0      # ten seconds later, the wall clock says 10.0
>>> round(clock.step())                # it stepped back by 1000 s
-1000
>>> clock.now()                        # going on from 1000.0 at half speed
1005.0
>>> wall[0], mono[0] = 2020.0, 2020.0  # the wall clock has caught up and passed it
>>> clock.now()
2020.0
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable

from limitwatch.durations import format_elapsed

CATCH_UP_RATE = 0.5
"""How fast the service clock runs, against the monotonic clock, while it is ahead of a wall
clock that stepped back. Below 1 so that it is caught up (after ``step / (1 - rate)``);
not far below, so that durations measured meanwhile (silence, reminder intervals) stretch
by at most ``1 / rate``."""

STEP_TOLERANCE_S = 1.0
"""Smallest difference between wall and monotonic elapsed time reported as a step. NTP's
gradual corrections change the wall clock's rate by at most 500 parts per million, a
thousand times less than this over the half second between two looks."""

CARRY_ON_AT_MOST_S = 86400.0
"""Furthest ahead of the wall clock a restart goes on from the previous run's last time. A
store written while the clock was a year fast must not hold the service's time a year ahead
for two years."""

RECEIPT_TICK_S = 1e-6
"""Least gap between two receipt times given out: one stream's readings need distinct times."""


class ServiceClock:
    """Wall-clock time that never goes backwards; thread-safe. See the module docstring."""

    def __init__(
        self,
        wall: Callable[[], float] = time.time,
        monotonic: Callable[[], float] = time.monotonic,
        tolerance_s: float = STEP_TOLERANCE_S,
    ) -> None:
        self.wall = wall
        self.monotonic = monotonic
        self.tolerance_s = tolerance_s
        self._lock = threading.Lock()
        self._last = -math.inf
        """The latest time given out."""
        self._last_mono = monotonic()
        self._seen_wall = wall()
        self._seen_mono = self._last_mono
        self.steps = 0
        """How many steps :meth:`step` has reported."""

    def now(self) -> float:
        """The service's current time (epoch seconds)."""
        with self._lock:
            return self._issue(self.wall(), self.monotonic())

    def _issue(self, wall: float, mono: float) -> float:
        held = self._last + max(0.0, mono - self._last_mono) * CATCH_UP_RATE
        now = wall if wall >= held else held
        self._last, self._last_mono = now, mono
        return now

    def receipt(self, stamped: float) -> float:
        """A receipt time for a message the wall clock stamped ``stamped`` when it arrived
        (in the connection process, a moment ago): the stamp itself while it is later than
        every time given out so far, otherwise the service's current time, and always later
        than the previous receipt time."""
        with self._lock:
            if stamped > self._last:
                self._last = stamped
                self._last_mono = self.monotonic()
                return stamped
            floor = self._last + RECEIPT_TICK_S
            now = self._issue(self.wall(), self.monotonic())
            if now < floor:
                now = self._last = floor
            return now

    def carry_on_from(self, time_: float) -> bool:
        """Never give out a time earlier than ``time_`` (the last time a previous run of the
        service committed); True when that is ahead of the wall clock, which then has to
        catch up with it as after a step back."""
        with self._lock:
            if time_ <= self._last:
                return False
            self._last, self._last_mono = time_, self.monotonic()
            return time_ > self.wall()

    def step(self) -> float | None:
        """Seconds the wall clock jumped (negative: back) since the last call, beyond what the
        monotonic clock moved; None when the two agree within the tolerance."""
        with self._lock:
            wall, mono = self.wall(), self.monotonic()
            jump = (wall - self._seen_wall) - (mono - self._seen_mono)
            self._seen_wall, self._seen_mono = wall, mono
        if abs(jump) < self.tolerance_s:
            return None
        self.steps += 1
        return jump

    def ahead_s(self) -> float:
        """How far the service clock runs ahead of the wall clock (0 when caught up)."""
        with self._lock:
            return max(0.0, self._last - self.wall())


def describe_step(seconds: float) -> str:
    """``'back by 2h (7200.0 s)'``: a step's size for a log line, to the whole second (the
    two clocks are read a moment apart: 7199.99 s is a 2 h step).

    >>> describe_step(-7200.0)
    'back by 2h (7200.0 s)'
    >>> describe_step(95.5)
    'forward by 1m36s (95.5 s)'
    """
    size = abs(seconds)
    return f"{'back' if seconds < 0 else 'forward'} by {format_elapsed(size)} ({size:.1f} s)"
