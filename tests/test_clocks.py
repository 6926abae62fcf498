"""The service clock: never backwards across wall-clock steps, catching up, steps reported."""

from __future__ import annotations

import itertools

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from limitwatch.clocks import CATCH_UP_RATE, ServiceClock

T0 = 1_798_761_600.0


class FakeClocks:
    """A wall clock and a monotonic clock moved by hand."""

    def __init__(self) -> None:
        self.wall_s = T0
        self.mono_s = 100.0

    def wall(self) -> float:
        return self.wall_s

    def mono(self) -> float:
        return self.mono_s

    def tick(self, seconds: float) -> None:
        self.wall_s += seconds
        self.mono_s += seconds


def test_a_step_back_is_reported_with_its_size_and_times_go_on_from_the_last_one():
    c = FakeClocks()
    clock = ServiceClock(c.wall, c.mono)
    c.tick(10)
    assert clock.step() is None and clock.now() == T0 + 10
    c.wall_s -= 7200
    c.tick(4)
    assert clock.step() == pytest.approx(-7200)
    assert clock.now() == pytest.approx(T0 + 10 + 4 * CATCH_UP_RATE)
    assert clock.ahead_s() == pytest.approx(7200 - 4 * (1 - CATCH_UP_RATE))
    assert clock.step() is None  # reported once


def test_after_a_step_back_the_service_clock_catches_the_wall_clock_up_and_follows_it():
    c = FakeClocks()
    clock = ServiceClock(c.wall, c.mono)
    clock.now()
    c.wall_s -= 7200
    catch_up = 7200 / (1 - CATCH_UP_RATE)
    times = []
    for _ in range(int(catch_up // 60) + 2):
        c.tick(60)
        times.append(clock.now())
    assert all(b > a for a, b in itertools.pairwise(times))
    assert clock.ahead_s() == 0 and times[-1] == c.wall_s
    # Until then the silence between two minutes' readings measured at least half a minute.
    assert min(b - a for a, b in itertools.pairwise(times)) >= 60 * CATCH_UP_RATE


def test_a_step_forward_is_followed_at_once():
    c = FakeClocks()
    clock = ServiceClock(c.wall, c.mono)
    clock.now()
    c.wall_s += 3600
    assert clock.step() == pytest.approx(3600)
    assert clock.now() == T0 + 3600


def test_receipt_times_keep_the_stamp_until_a_step_back_then_never_go_backwards():
    c = FakeClocks()
    clock = ServiceClock(c.wall, c.mono)
    first = clock.receipt(c.wall())
    assert first == T0
    c.tick(1)
    second = clock.receipt(c.wall())
    assert second == T0 + 1
    c.wall_s -= 7200
    c.tick(1)
    third = clock.receipt(c.wall())  # stamped two hours earlier than the one before
    assert third > second
    # two messages stamped the same microsecond still get distinct, increasing times
    assert clock.receipt(c.wall()) > third


@settings(max_examples=200, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.floats(0, 120),  # seconds that pass
            st.floats(-86400, 86400),  # a step of the wall clock (mostly none)
            st.booleans(),  # stepped at all
            st.booleans(),  # ask for a receipt time (else now)
        ),
        min_size=1,
        max_size=60,
    )
)
def test_service_times_never_go_backwards_and_receipt_times_always_go_forward(events):
    c = FakeClocks()
    clock = ServiceClock(c.wall, c.mono)
    last = clock.now()
    last_receipt = None
    for passed, jump, stepped, receipt in events:
        c.tick(passed)
        if stepped:
            c.wall_s += jump
        t = clock.receipt(c.wall()) if receipt else clock.now()
        assert t >= last
        if receipt:
            assert last_receipt is None or t > last_receipt
            last_receipt = t
        # never behind the wall clock, and ahead of it only after a step back
        assert t >= c.wall_s
        last = t
