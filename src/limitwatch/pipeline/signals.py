"""Signals the pipeline makes itself, not the engine: a stream gone silent or gone offline."""

from __future__ import annotations

from collections.abc import Callable, Mapping

from limitwatch.engine import StreamMonitor
from limitwatch.model import StreamSignal


def stale_signals(
    monitors: Mapping[str, StreamMonitor],
    now: float,
    cadence_for: Callable[[str], tuple[float | None, float]],
) -> list[StreamSignal]:
    """A ``stale`` signal for each monitored stream silent for longer than its expected
    cadence times its multiple. ``cadence_for(stream)`` gives (cadence s or None, multiple)."""
    out = []
    for stream, monitor in monitors.items():
        cadence, multiple = cadence_for(stream)
        last = monitor.last_time
        if cadence is None or last is None:
            continue
        if now - last <= cadence * multiple:
            continue
        out.append(stale_signal(monitor, now, limit=cadence * multiple))
    return out


def offline_signals(
    monitors: Mapping[str, StreamMonitor], causes: dict[str, str], now: float
) -> list[StreamSignal]:
    """A ``stale`` signal at once for each stream whose sender said it went offline
    (``causes``: stream -> the words why), whatever its cadence: the same signal the stale
    check makes, with the cause and without a limit. Streams never read are left out
    (there is no last reading to speak of); no monitor is made for them."""
    out = []
    for stream, cause in causes.items():
        monitor = monitors.get(stream)
        if monitor is None or monitor.last_time is None:
            continue
        out.append(stale_signal(monitor, now, limit=None, cause=cause))
    return out


def stale_signal(
    monitor: StreamMonitor, now: float, *, limit: float | None, cause: str | None = None
) -> StreamSignal:
    """A ``stale`` signal for ``monitor``'s stream as of ``now``: its statistic is the silence
    since the last reading, so the incident's silence begins there."""
    assert monitor.last_time is not None
    b = monitor.baseline
    return StreamSignal(
        stream=monitor.stream,
        rule="stale",
        chart="x",
        side=None,
        index=max(monitor.count - 1, 0),
        time=now,
        value=monitor.last_value if monitor.last_value is not None else float("nan"),
        involved=(),
        center=b.center if b else float("nan"),
        sigma=b.sigma if b else float("nan"),
        ucl=b.ucl if b else None,
        lcl=b.lcl if b else None,
        mr=None,
        mr_ucl=b.mr_ucl if b else float("nan"),
        baseline_version=monitor.baseline_version,
        statistic=max(now - monitor.last_time, 0.0),
        limit=limit,
        cause=cause,
    )
