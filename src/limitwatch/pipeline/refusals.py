"""The names and words of a dead letter: why a reading was refused, and where it was."""

from __future__ import annotations

from collections.abc import Sequence

from limitwatch.engine import StreamMonitor
from limitwatch.ingest.timeparse import format_time
from limitwatch.model import Outcome, Reading
from limitwatch.store import Store

ORDER_REASONS = frozenset({"duplicate", "out-of-order"})


class AppliedReadings:
    """The readings a batch has applied so far, for the question "was this one applied?".

    A set of keys, one for (stream, time, value) and one for (stream, sequence number), kept
    up to date with the batch's outcomes as they grow (only the outcomes appended since the
    last question are added), so a refusal costs a lookup, not a scan of the whole batch: a
    redelivered batch of thousands of repeats would otherwise cost their square. Two readings
    are the same when they share a stream and either their time and value or their sequence
    number.
    """

    __slots__ = ("_keys", "_outcomes", "_seen")

    def __init__(self, outcomes: Sequence[Outcome]) -> None:
        self._outcomes = outcomes
        self._seen = 0
        self._keys: set[tuple[object, ...]] = set()

    def __contains__(self, reading: Reading) -> bool:
        outcomes = self._outcomes
        keys = self._keys
        for outcome in outcomes[self._seen :]:
            r = outcome.reading
            keys.add((r.stream, r.time, r.value))
            if r.seq is not None:
                keys.add((r.stream, None, r.seq))
        self._seen = len(outcomes)
        if (reading.stream, reading.time, reading.value) in keys:
            return True
        return reading.seq is not None and (reading.stream, None, reading.seq) in keys


def where(reading: Reading) -> str:
    """The refused reading, named as a person looks for it: stream, ISO 8601 time, sequence."""
    seq = "" if reading.seq is None else f", seq {reading.seq}"
    try:
        when = format_time(reading.time)
    except (OverflowError, OSError, ValueError):
        when = repr(reading.time)
    return f"stream {reading.stream!r} at {when}{seq}, value {reading.value!r}"


def dead_reason(code: str, detail: str) -> str:
    """The dead letter's reason text. It must be storable whatever the input held: a lone
    surrogate (from a file name, say) would fail the commit, so such characters are escaped."""
    text = f"{code}: {detail}" if detail else code
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        text = text.encode("utf-8", "backslashreplace").decode("utf-8")
    return text


def refused_because(
    store: Store, reading: Reading, monitor: StreamMonitor, said: str, applied: AppliedReadings
) -> str:
    """The true name of a reading the monitor refused for its order. The monitor keeps only
    its stream's last reading, so all it knows is "not newer"; the store (and this batch)
    knows whether the reading was ever applied. ``duplicate``: it was, this is a repeat.
    ``late``: it never was, and came after a newer one (a gateway that sends n+1 before n
    on reconnecting) -- a reading lost to the chart, to be counted apart from repeats.
    ``out-of-order`` stays for a reading whose sequence number is newer but whose time is
    not, or one at the time of the last reading with another value."""
    if reading in applied or store.has_reading(reading):
        return "duplicate"
    if said == "duplicate":  # an older sequence number (or a pruned repeat)
        return "late"
    last = monitor.last_time
    if reading.seq is None and last is not None and reading.time < last:
        return "late"
    return said
