"""The shared vocabulary between detectors and the engine.

Detectors work in *standardized units*: the engine hands each one ``z = (x - center) / sigma``
(or, for the moving-range chart, the moving range itself), so a detector never needs to know the
baseline and the same detector object serves any stream. The engine turns a detector's
:class:`Signal` into a stream event by adding stream id, time and raw value.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, ClassVar, Literal, NoReturn, Protocol, Self, runtime_checkable

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


def refuse_reading(rule: str, last: int | None, index: int, value: float) -> NoReturn:
    """Raise for a reading that would corrupt a detector's state: a value that is not a finite
    number, else a position that does not follow ``last`` (the last position seen).

    One wording for every detector. Detectors call it only after their own inline test has
    failed, so a good reading never pays for the call.
    """
    if not math.isfinite(value):
        raise ValueError(f"{rule}: reading {index} is not a finite number ({value!r})")
    raise ValueError(
        f"{rule}: expected reading position {last + 1 if last is not None else 0}, got {index}"
    )


@runtime_checkable
class Detector(Protocol):
    """One small protocol for every rule, EWMA and CUSUM.

    ``update`` is O(1) in time and state. ``state`` returns plain JSON-ready data -- the rule,
    its parameters and its changing values -- from which ``from_state`` rebuilds an identical
    detector: ``type(d).from_state(d.state())`` continues exactly as ``d`` does.
    """

    rule: ClassVar[str]
    chart: ClassVar[Chart]

    def update(self, index: int, value: float) -> Signal | None: ...

    def reset(self) -> None: ...

    def state(self) -> dict[str, Any]: ...

    @classmethod
    def from_state(cls, data: Mapping[str, Any]) -> Self: ...


class Stateful:
    """The serialisation pair every detector shares, from the names of its parameters
    (``_params``, constructor arguments) and of its changing values (``_state``, slots).

    One pair and one layout for every detector, so that a checkpoint, the average-run-length
    planner and the tests all treat any detector alike. ``from_state`` builds the detector
    through its constructor, so parameters are checked as for a new one; the state's keys must
    be exactly the detector's. A detector whose values need converting (JSON gives ``0`` for a
    float that was ``0.0`` only if a person wrote it) overrides :meth:`_load`.
    """

    __slots__ = ()
    rule: ClassVar[str]
    _params: ClassVar[tuple[str, ...]] = ()
    _state: ClassVar[tuple[str, ...]] = ()

    def state(self) -> dict[str, Any]:
        """``{"rule": id, "params": {...}, "state": {...}}``; the state's values come in
        ``_state`` order, the position of the last reading seen last."""
        return {
            "rule": self.rule,
            "params": {name: getattr(self, name) for name in self._params},
            "state": {name.lstrip("_"): getattr(self, name) for name in self._state},
        }

    @classmethod
    def from_state(cls, data: Mapping[str, Any]) -> Self:
        """The detector :meth:`state` described (e.g. read back from JSON)."""
        if data.get("rule") != cls.rule:
            raise ValueError(f"state is for {data.get('rule')!r}, not {cls.rule!r}")
        saved = data.get("state")
        keys = [name.lstrip("_") for name in cls._state]
        if not isinstance(saved, Mapping) or set(saved) != set(keys):
            found = sorted(saved) if isinstance(saved, Mapping) else saved
            raise ValueError(f"{cls.rule} state needs keys {sorted(keys)}, got {found!r}")
        detector = cls(**data.get("params", {}))
        detector._load([saved[key] for key in keys])
        return detector

    def _load(self, values: Sequence[Any]) -> None:
        for name, value in zip(self._state, values, strict=True):
            setattr(self, name, value)
