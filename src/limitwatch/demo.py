"""The invented demo scenario: Quillmoor Works, a plant that does not exist.

Three packaging lines report unplanned downtime minutes per shift, a compressor reports its
discharge temperature every minute and an oven line reports energy per batch. After a quiet
stretch that the baselines learn from, four believable special causes are injected:

* ``pack-2/downtime``: a sustained shift (a worn sealing jaw adds about 6 minutes a shift);
* ``comp-a/discharge-temp``: a slow drift (a fouling aftercooler, +0.04 degC a minute);
* ``oven-1/energy``: one wild reading (a door left open for one batch);
* ``pack-3/downtime``: goes quiet -- the sensor stops reporting (stale).

Everything here is invented for demonstration; none of it is measured data.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np

PLANT = "Quillmoor Works"
START = 1_798_761_600.0  # 2027-01-01T00:00:00Z
SHIFT = 8 * 3600.0
MINUTE = 60.0
BATCH = 45 * 60.0


@dataclass(frozen=True)
class DemoStream:
    stream: str
    unit: str
    description: str
    cadence_s: float
    lower_bound: float | None
    injected: str | None
    """The special cause injected after the quiet stretch, or None for a stream left alone."""


STREAMS: tuple[DemoStream, ...] = (
    DemoStream(
        "pack-1/downtime", "min", "unplanned downtime per shift, packaging line 1", SHIFT, 0.0, None
    ),
    DemoStream(
        "pack-2/downtime",
        "min",
        "unplanned downtime per shift, packaging line 2",
        SHIFT,
        0.0,
        "sustained shift",
    ),
    DemoStream(
        "pack-3/downtime",
        "min",
        "unplanned downtime per shift, packaging line 3",
        SHIFT,
        0.0,
        "stops reporting",
    ),
    DemoStream(
        "comp-a/discharge-temp",
        "degC",
        "compressor A discharge temperature",
        MINUTE,
        None,
        "slow drift",
    ),
    DemoStream(
        "oven-1/energy", "kWh", "energy per batch, oven line 1", BATCH, 0.0, "one wild reading"
    ),
)

SPARKPLUG_SOURCE = "quillmoor-edge"
"""The source's name in ``limitwatch demo --sparkplug`` (its births file is named after it)."""

LEARN = 30
"""Readings per stream in the quiet stretch; the demo's baselines learn from these."""


def generate(
    seed: int = 7, after: int = 40, end: float | None = None
) -> list[tuple[str, float, float]]:
    """(stream, epoch seconds, value) rows, in time order within each stream.

    ``after`` (at least 10) readings follow the quiet stretch; the injected causes start a few
    readings in. With ``end``, every stream's timeline ends there (the live demo passes the
    current time, so a stream that stopped reporting is really overdue); otherwise the
    timelines start at :data:`START`.
    """
    if after < 10:
        raise ValueError(f"after must be at least 10 readings, got {after}")
    rng = np.random.default_rng(seed)
    rows: list[tuple[str, float, float]] = []
    total = LEARN + after
    for spec in STREAMS:
        first = START if end is None else end - spec.cadence_s * (total - 1)
        times = first + spec.cadence_s * np.arange(total)
        if spec.stream.endswith("downtime"):
            values = np.clip(rng.normal(18.0, 3.5, total), 0.0, None)
        elif spec.stream.startswith("comp-a"):
            values = 86.0 + rng.normal(0.0, 0.6, total)
        else:
            values = 412.0 + rng.normal(0.0, 6.0, total)
        start = LEARN + 5
        if spec.injected == "sustained shift":
            values[start:] += 6.0
        elif spec.injected == "slow drift":
            values[start:] += 0.04 * np.arange(total - start) * 2.0
        elif spec.injected == "one wild reading":
            values[start + 3] += 55.0
        count = LEARN + 8 if spec.injected == "stops reporting" else total
        rows.extend(
            (spec.stream, float(t), round(float(v), 2))
            for t, v in zip(times[:count], values[:count], strict=True)
        )
    return rows


def write_csv(path: Path, rows: list[tuple[str, float, float]]) -> Path:
    """Write rows sorted by time, as a controller export would interleave them."""
    from limitwatch.ingest.timeparse import format_time

    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["time", "stream", "value"])
        for stream, moment, value in sorted(rows, key=lambda r: (r[1], r[0])):
            writer.writerow([format_time(moment), stream, f"{value:.2f}"])
    return path
