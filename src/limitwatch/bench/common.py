"""What every measurement shares: sizes, the figure record, the machine's description and a
CPU clock."""

from __future__ import annotations

import os
import platform
import statistics
import time
from dataclasses import dataclass, field
from typing import Any

ALL_DETECTORS = "nelson,ewma,cusum"
"""Every run test of Nelson's eight, the moving-range limit, EWMA and CUSUM."""

SIGNAL_HEAVY_SHIFT = 1.5
"""Sigmas by which the signal-heavy engine run moves the level up and down."""

T0 = 1_767_225_600.0
"""2026-01-01T00:00:00Z, the invented plant's first reading: in the past, since the service refuses
readings stamped later than the clock by more than [service] future_tolerance."""


@dataclass(frozen=True)
class Sizes:
    """How much work each measurement does; ``quick`` keeps the whole run near a minute."""

    repeats: int
    engine_few: tuple[int, int]
    """(streams, readings per stream) for the few-streams engine run."""
    engine_many: tuple[int, int]
    file_lines: int
    file_streams: int
    mqtt_messages: int
    mqtt_streams: int
    latency_rate: int
    latency_seconds: float
    latency_warmup_s: float
    """Readings published this early in a delay run are left out of its percentiles."""
    latency_streams: int
    memory_streams: int
    flat_pairs: int = 11
    """Paired runs (engine, yardstick, in turn) for the comparison with the flat yardstick.
    Single pairs of a fraction of a second each scatter widely on a shared machine (0.4 to 1.0
    seen in one run of twelve); the median of many is steady."""


FULL = Sizes(
    repeats=3,
    engine_few=(1_000, 200),
    engine_many=(100_000, 3),
    file_lines=100_000,
    file_streams=1_000,
    mqtt_messages=50_000,
    mqtt_streams=1_000,
    latency_rate=2_000,
    latency_seconds=10.0,
    latency_warmup_s=1.0,
    latency_streams=1_000,
    memory_streams=100_000,
)
QUICK = Sizes(
    repeats=3,
    engine_few=(1_000, 50),
    engine_many=(100_000, 1),
    file_lines=15_000,
    file_streams=1_000,
    mqtt_messages=10_000,
    mqtt_streams=1_000,
    latency_rate=2_000,
    latency_seconds=3.0,
    latency_warmup_s=1.0,
    latency_streams=1_000,
    memory_streams=25_000,
    flat_pairs=7,
)

PARTS = ("engine", "file", "mqtt", "latency", "memory")
EXTRA_PARTS = ("cluster",)
"""Parts measured only when asked for (``--only cluster``): they start several processes and a
Kafka-protocol broker, and take minutes."""

LATENCY_BATCH_WAITS = (("200ms", "the default"), ("50ms", "a lower setting"))
"""The delay is mostly ``batch_wait`` (how long the worker may wait to fill a batch), so it is
measured at the default and at a lower setting."""


@dataclass
class Figure:
    """One measured figure: the median of ``runs``, its unit, and what it was measured under."""

    name: str
    unit: str
    runs: list[float]
    conditions: dict[str, Any]
    target: tuple[str, float] | None = None
    """(">=", "<=" or "<", bound): what an issue asks for; printed for comparison, never
    asserted."""
    extra: dict[str, Any] = field(default_factory=dict)
    """Companion numbers measured in the same runs (medians), e.g. the bare subscriber's rate."""
    skipped: str | None = None

    @property
    def value(self) -> float | None:
        return statistics.median(self.runs) if self.runs else None

    @property
    def met(self) -> bool | None:
        if self.target is None or self.value is None:
            return None
        op, bound = self.target
        if op == ">=":
            return self.value >= bound
        return self.value <= bound if op == "<=" else self.value < bound

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "value": self.value,
            "unit": self.unit,
            "runs": self.runs,
            "conditions": self.conditions,
            "extra": self.extra,
            "target": None if self.target is None else f"{self.target[0]} {self.target[1]:g}",
            "target_met": self.met,
            "skipped": self.skipped,
        }


def load_average() -> str | None:
    """The 1, 5 and 15 minute load averages: how busy the machine was (on a 2-core machine a
    load of 4 means each process gets about half a core)."""
    if not hasattr(os, "getloadavg"):
        return None
    return " / ".join(f"{x:.2f}" for x in os.getloadavg())


def machine() -> dict[str, Any]:
    """What the figures were measured on."""
    return {
        "python": platform.python_version(),
        "implementation": platform.python_implementation(),
        "machine": platform.machine(),
        "system": f"{platform.system()} {platform.release()}",
        "cpus": os.cpu_count(),
        "load_average_1m": round(os.getloadavg()[0], 2) if hasattr(os, "getloadavg") else None,
        "load_average": load_average(),
    }


@dataclass
class Clock:
    """CPU time of this process (every thread) and wall time, started together."""

    cpu: float = field(default_factory=time.process_time)
    wall: float = field(default_factory=time.perf_counter)

    def lap(self) -> tuple[float, float]:
        """(CPU seconds, wall seconds) since the start."""
        return time.process_time() - self.cpu, time.perf_counter() - self.wall
