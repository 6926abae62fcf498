"""Holding readings briefly so that a reordering on the way is undone before the chart sees it.

A gateway built on paho-mqtt that publishes while it reconnects sends the new message ahead of
the ones it held, so readings arrive n+1 before n. The monitor must see a stream's readings in
order (its moving ranges and run tests depend on it) and refuses one that comes after a newer
one (``late``). With ``reorder_within`` set on a source, each of its readings is held for that
long after it arrived; when a reading's time is up it is released together with every held
reading of its stream that sorts before it (by sequence number, else time), lowest first. So a
reading overtaken by up to ``reorder_within`` is applied in its place, and a stream's readings
are delayed by at most that much (plus the worker's wake-up, at most half a second).

The buffer only orders; it keeps a token per item (the delivery, for its acknowledgement) and
never acknowledges anything: a held reading is neither committed nor acknowledged, so the broker
still has it if the service dies meanwhile. Time comes in as ``now``.

>>> from limitwatch.model import Reading
>>> buffer = ReorderBuffer(within=2.0)
>>> for seq, arrived in ((0, 0.0), (1, 0.1), (3, 0.2), (2, 0.3)):
...     buffer.hold(Reading("s", 10.0 + seq, 1.0, seq), token=seq, now=arrived)
>>> [token for _, token in buffer.release(now=2.25)]
[0, 1, 2, 3]
>>> len(buffer)
0

References
----------
Apache Flink documentation, "Timely Stream Processing": bounded out-of-orderness watermarks
hold events for a fixed delay and emit them in event-time order; the same trade of a known delay
for order is made here per stream.
"""

from __future__ import annotations

import heapq
import itertools
from collections import deque
from typing import Any

from limitwatch.model import Reading


class _Held:
    __slots__ = ("arrived", "key", "reading", "released", "token")

    def __init__(self, reading: Reading, token: Any, arrived: float) -> None:
        self.reading = reading
        self.token = token
        self.arrived = arrived
        self.key = (reading.seq if reading.seq is not None else reading.time, reading.time)
        self.released = False


class ReorderBuffer:
    """Readings held per stream, released in order once their hold time is up."""

    def __init__(self, within: float) -> None:
        if not within > 0:
            raise ValueError(f"the reorder window must be positive seconds, got {within}")
        self.within = within
        self._arrivals: deque[_Held] = deque()
        self._streams: dict[str, list[tuple[tuple[float, float], int, _Held]]] = {}
        self._counter = itertools.count()
        self._held = 0

    def __len__(self) -> int:
        return self._held

    def hold(self, reading: Reading, token: Any, now: float) -> None:
        item = _Held(reading, token, now)
        self._arrivals.append(item)
        heap = self._streams.setdefault(reading.stream, [])
        heapq.heappush(heap, (item.key, next(self._counter), item))
        self._held += 1

    def release(self, now: float, *, everything: bool = False) -> list[tuple[Reading, Any]]:
        """Readings whose hold is over (all with ``everything``, at a stop), each stream's in
        order, with their tokens."""
        cutoffs: dict[str, tuple[float, float]] = {}
        arrivals = self._arrivals
        while arrivals and (everything or now - arrivals[0].arrived >= self.within):
            item = arrivals.popleft()
            if item.released:
                continue
            stream = item.reading.stream
            best = cutoffs.get(stream)
            if best is None or item.key > best:
                cutoffs[stream] = item.key
        out: list[tuple[Reading, Any]] = []
        for stream, cutoff in cutoffs.items():
            heap = self._streams[stream]
            while heap and heap[0][0] <= cutoff:
                item = heapq.heappop(heap)[2]
                item.released = True
                out.append((item.reading, item.token))
            if not heap:
                del self._streams[stream]
        self._held -= len(out)
        return out
