"""The X-over-MR chart of a notification's recent readings, as PNG bytes for an e-mail.

Why here: the body already carries the stream's last readings and the limits in force
(``recent``, ``center``, ``sigma``, ``ucl``, ``lcl``, ``mr_ucl``), so a notifier can draw the
picture without opening the database. The drawing itself is :func:`limitwatch.charts.render`;
this module only turns a body into its plain data. Without matplotlib (the ``charts`` extra),
or without readings in the body, there is no picture and the mail stays plain text.

>>> body = {"stream": "s", "center": 10.0, "sigma": 1.0, "ucl": 13.0, "lcl": 7.0,
...         "mr_ucl": 3.686, "recent": {"index": [0, 1], "time": [0.0, 60.0],
...         "value": [10.0, 14.0], "mr": [None, 4.0], "learning": [False, False],
...         "signals": [[], ["beyond-limits"]]}}
>>> data = chart_data(body)
>>> [p.value for p in data.points], [(f.index, f.rule, f.chart) for f in data.flags]
([10.0, 14.0], [(1, 'beyond-limits', 'x')])
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path
from typing import Any

from limitwatch import charts
from limitwatch.stats.constants import D2

_MR_RULES = frozenset({"mr-beyond-limit"})


def _finite(x: Any) -> float | None:
    return float(x) if isinstance(x, int | float) and math.isfinite(x) else None


def chart_data(body: dict[str, Any]) -> charts.ChartData | None:
    """The picture's data from a notification body; None when it has no readings to draw."""
    recent = body.get("recent")
    if not isinstance(recent, dict) or not recent.get("time"):
        return None
    points = []
    flags = []
    for i, (index, t, value, mr, learning, fired) in enumerate(
        zip(
            recent["index"],
            recent["time"],
            recent["value"],
            recent["mr"],
            recent["learning"],
            recent["signals"],
            strict=True,
        )
    ):
        if _finite(value) is None or _finite(t) is None:
            continue
        at = index if isinstance(index, int) else i
        points.append(charts.Point(at, float(t), float(value), _finite(mr), bool(learning)))
        for rule in fired or ():
            flags.append(charts.Flag(at, rule, "mr" if rule in _MR_RULES else "x"))
    if not points:
        return None
    limits: tuple[charts.LimitSet, ...] = ()
    center, sigma = _finite(body.get("center")), _finite(body.get("sigma"))
    if center is not None and sigma is not None and sigma > 0:
        start = next((p.index for p in points if not p.learning), points[-1].index)
        limits = (
            charts.LimitSet(
                version=body.get("baseline_version"),
                start=start,
                center=center,
                sigma=sigma,
                ucl=_finite(body.get("ucl")),
                lcl=_finite(body.get("lcl")),
                mr_center=sigma * D2,
                mr_ucl=_finite(body.get("mr_ucl")) or 0.0,
                n=0,
                method="mean",
            ),
        )
    return charts.ChartData(
        stream=str(body.get("stream", "?")),
        points=tuple(points),
        limits=limits,
        flags=tuple(flags),
        window=f"the last {len(points)} readings",
    )


def chart_png(body: dict[str, Any], *, width_px: int = 900, height_px: int = 600) -> bytes | None:
    """PNG bytes of the body's recent readings, or None (no readings, or no matplotlib)."""
    data = chart_data(body)
    if data is None:
        return None
    try:
        charts.require_matplotlib()
    except charts.ChartsUnavailable:
        return None
    with tempfile.TemporaryDirectory(prefix="limitwatch-chart-") as tmp:
        path = charts.render(data, Path(tmp) / "chart.png", width_px=width_px, height_px=height_px)
        return path.read_bytes()
