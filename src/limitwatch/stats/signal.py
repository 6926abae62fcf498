"""The shared vocabulary between detectors and the engine.

Detectors work in *standardized units*: the engine hands each one ``z = (x - center) / sigma``
(or, for the moving-range chart, the moving range itself), so a detector never needs to know the
baseline and the same detector object serves any stream. The engine turns a detector's
:class:`Signal` into a stream event by adding stream id, time and raw value.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, ClassVar, Literal, Protocol, runtime_checkable

Chart = Literal["x", "mr"]
Side = Literal["upper", "lower", "both"]


@dataclass(slots=True)
class Signal:
    """A rule that fired.

    ``index`` is the 0-based position (within its stream's monitored readings) of the reading that
    completed the pattern; ``involved`` lists the positions of every reading that is part of it,
    in ascending order and ending with ``index``.

    Treat it as read-only. It is not ``frozen`` because a stream in a long alarm makes one for
    most of its readings, and a frozen dataclass's ``__init__`` cost about five times as much;
    the test suite makes every ``Signal`` refuse changes after construction (``tests/conftest.py``).
    """

    rule: str
    chart: Chart
    side: Side | None
    index: int
    involved: tuple[int, ...]
    statistic: float | None = None
    """The detector's own statistic when it has one (EWMA value, CUSUM sum, moving range)."""
    limit: float | None = None
    """The threshold that statistic crossed, in the same units."""


@runtime_checkable
class Detector(Protocol):
    """One small protocol for every rule, EWMA and CUSUM.

    ``update`` is O(1) in time and state. ``snapshot`` returns plain JSON-serialisable data from
    which ``from_snapshot`` rebuilds an identical detector (a checkpoint can hold it).
    """

    rule: ClassVar[str]
    chart: ClassVar[Chart]

    def update(self, index: int, value: float) -> Signal | None: ...

    def reset(self) -> None: ...

    def snapshot(self) -> dict[str, Any]: ...

    @classmethod
    def from_snapshot(cls, data: dict[str, Any]) -> Detector: ...
