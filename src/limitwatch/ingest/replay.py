"""Run recorded readings through the same engine the service uses.

Replay is how a team tries rule sets on last month's data before switching them on, and how the
tests check the engine against datasets with known changes. One :class:`StreamMonitor` per stream,
created on the stream's first row.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass

from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.ingest.csvfile import Row
from limitwatch.model import Outcome, Reading


@dataclass(frozen=True, slots=True)
class ReplayStep:
    row: Row
    outcome: Outcome
    monitor: StreamMonitor


def replay(rows: Iterable[Row], settings: MonitorSettings) -> Iterator[ReplayStep]:
    """Yield each row with what the engine made of it, in file order."""
    monitors: dict[str, StreamMonitor] = {}
    for row in rows:
        monitor = monitors.get(row.stream)
        if monitor is None:
            monitor = monitors[row.stream] = StreamMonitor(row.stream, settings)
        outcome = monitor.update(Reading(row.stream, row.time, row.value))
        yield ReplayStep(row, outcome, monitor)
