"""Reading and Signal: plain slotted dataclasses that the tests hold read-only (conftest.py)."""

from __future__ import annotations

import dataclasses
import pickle

import pytest

from limitwatch.model import Reading
from limitwatch.stats.signal import Signal


def test_a_reading_refuses_changes_throughout_the_tests():
    reading = Reading("line-1/temp", 60.0, 21.5, seq=3)
    for name, value in (("value", 0.0), ("time", 0.0), ("stream", "x"), ("seq", 4)):
        with pytest.raises(dataclasses.FrozenInstanceError, match=name):
            setattr(reading, name, value)
    with pytest.raises(dataclasses.FrozenInstanceError):
        del reading.value
    assert reading == Reading("line-1/temp", 60.0, 21.5, 3)


def test_a_reading_is_slotted_and_survives_pickling():
    reading = Reading("line-1/temp", 60.0, 21.5)
    assert not hasattr(reading, "__dict__")
    assert pickle.loads(pickle.dumps(reading)) == reading
    assert repr(reading) == "Reading(stream='line-1/temp', time=60.0, value=21.5, seq=None)"


def test_a_signal_refuses_changes_throughout_the_tests():
    signal = Signal("trend", "x", "upper", 9, (4, 5, 6, 7, 8, 9))
    with pytest.raises(dataclasses.FrozenInstanceError, match="involved"):
        signal.involved = (9,)
    assert not hasattr(signal, "__dict__")
    assert pickle.loads(pickle.dumps(signal)) == signal
