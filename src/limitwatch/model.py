"""Plain value types that cross module boundaries: what comes in (Reading) and what the engine
says about it (Outcome, StreamSignal). Kept free of behaviour so every layer can share them."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

from limitwatch.stats.signal import Chart, Side

Phase = Literal["learning", "monitoring"]


@dataclass(slots=True)
class Reading:
    """One individual value of one stream. ``time`` is epoch seconds (UTC) and always supplied by
    the caller: the engine never reads a clock. ``seq`` is an optional sender sequence number,
    the preferred key for refusing redelivered readings.

    Treat it as read-only: a reading is a fact that arrived. It is not ``frozen`` because one is
    made for every message, and a frozen dataclass's ``__init__`` (a guarded
    ``object.__setattr__`` per field) cost about three times as much. The test suite makes
    every ``Reading`` refuse changes after construction (``tests/conftest.py``), so code that
    would change one fails there."""

    stream: str
    time: float
    value: float
    seq: int | None = None


@dataclass(frozen=True, slots=True)
class StreamSignal:
    """A detector's :class:`~limitwatch.stats.signal.Signal` placed in its stream: raw value,
    time and the limits in force, so an alert text can be written without looking anything up."""

    stream: str
    rule: str
    chart: Chart
    side: Side | None
    index: int
    time: float
    value: float
    involved: tuple[int, ...]
    center: float
    sigma: float
    ucl: float | None
    lcl: float | None
    mr: float | None
    mr_ucl: float
    baseline_version: int
    statistic: float | None = None
    limit: float | None = None
    cause: str | None = None
    """Why a ``stale`` signal came before its time, in words for people (a source said the
    sender went offline); None for the silence the stale check measures."""


@dataclass(slots=True)
class Outcome:
    """What one reading did. A refused reading has ``accepted=False`` and a ``reason`` naming why
    (``duplicate``, ``out-of-order``, ``not-finite``, ``below-lower-bound``, ``above-upper-bound``,
    ``off-scale``; see ``limitwatch.engine.REFUSAL_WORDS``); it changed no state.

    Treat it as read-only. It is not ``frozen`` only because one is made for every reading, and a
    frozen dataclass's ``__init__`` (a guarded ``object.__setattr__`` per field) took a fifth of
    the engine's time; without it the engine runs about a third faster."""

    reading: Reading
    accepted: bool
    reason: str | None = None
    index: int | None = None
    phase: Phase = "learning"
    z: float | None = None
    mr: float | None = None
    signals: tuple[StreamSignal, ...] = field(default_factory=tuple)
    baseline_fitted: bool = False
    """True on the reading that completed the learning phase and locked a new baseline."""
    baseline_version: int | None = None
    """The baseline version this reading was judged against (the store's number for it); None
    for a learning reading, which no baseline judged, and for a refused one. Stored with the
    reading, so a chart draws the limits each reading met from the stored version."""
